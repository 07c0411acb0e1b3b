"""Files users write (vocabularies, name rules, origins): read with line numbers, checked against
their JSON Schemas, failures named by file, key path and line."""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ._schemafiles import schema_text

__all__ = ["UserFile", "load_user_file", "check_user_doc", "format_key_path"]


@dataclass
class UserFile:
    """A YAML or JSON file a user wrote (vocabulary, name rules, origins), as read."""

    path: Path
    raw: bytes
    doc: Any
    lines: dict[tuple, int]  # YAML: 1-based line of each key path, for messages (empty for JSON)


def load_user_file(path: str | os.PathLike[str], error: type[Exception], what: str = "file") -> UserFile:
    """Read a YAML (``.yaml``/``.yml``) or JSON file; a failure is ``error`` naming the file and line."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError as exc:
        raise error(f"{p}: {what} not found") from exc
    except OSError as exc:
        raise error(f"{p}: cannot read ({exc.strerror})") from exc
    text = raw.decode("utf-8", errors="replace")
    if p.suffix.lower() in (".yaml", ".yml"):
        import yaml  # a few users need YAML; importing it costs ~40 ms

        try:
            doc = yaml.safe_load(text)
        except yaml.YAMLError as exc:
            mark = getattr(exc, "problem_mark", None)
            where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
            raise error(f"{p}: not valid YAML{where} ({getattr(exc, 'problem', exc)})") from exc
        return UserFile(p, raw, doc, _line_index(text))
    try:
        return UserFile(p, raw, json.loads(text), {})
    except json.JSONDecodeError as exc:
        raise error(f"{p}: not valid JSON at line {exc.lineno}, column {exc.colno} ({exc.msg})") from exc


def check_user_doc(f: UserFile, schema: str, error: type[Exception]) -> None:
    """Validate a user file against its JSON Schema (``schemas/``, shipped in the package).

    The first violation becomes ``error``: ``FILE: KEY.PATH (line N): MESSAGE``, the message
    taken from the schema's ``x-messages`` for the failed keyword when it has one.
    """
    import jsonschema  # ~0.1 s to import; only user files need it

    doc = json.loads(schema_text(schema))
    validator = jsonschema.Draft202012Validator(doc)
    errors = list(validator.iter_errors(f.doc))
    if not errors:
        return
    # the first in document order, at the level where it failed (a oneOf's own message, not one of
    # its branches')
    err = min(errors, key=lambda e: [f"{x:09d}" if isinstance(x, int) else str(x) for x in e.absolute_path])
    key, msg = _schema_message(err)
    line = f.lines.get(key)
    raise error(f"{f.path}: {format_key_path(key)}{f' (line {line})' if line else ''}: {msg}")


def _schema_message(err) -> tuple[tuple, str]:
    """(key path, message) of one jsonschema error, in mapstore's words."""
    path = tuple(err.absolute_path)
    schema = err.schema if isinstance(err.schema, dict) else {}
    text = (schema.get("x-messages") or {}).get(err.validator)
    if err.validator == "additionalProperties":
        allowed = list(schema.get("properties", {}))
        extra = sorted(set(err.instance) - set(allowed), key=str)
        text = text or "unknown key; allowed: {allowed}"
        return path + (extra[0],), text.format(extra=extra, allowed=", ".join(allowed))
    if err.validator == "required":
        missing = [k for k in err.validator_value if k not in err.instance]
        sub = schema.get("properties", {}).get(missing[0], {}) if missing else {}
        text = text or (sub.get("x-messages") or {}).get("required") or f"missing key {missing[0]!r}"
        return (path + (missing[0],) if missing else path), text
    return path, text or err.message


def format_key_path(path: tuple) -> str:
    """``rules[0].concepts[1]`` from ("rules", 0, "concepts", 1)."""
    out = ""
    for p in path:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else str(p))
    return out or "(top level)"


def _line_index(text: str) -> dict[tuple, int]:
    """Line numbers (1-based) of YAML nodes by key path, for error messages."""
    import yaml

    lines: dict[tuple, int] = {}
    try:
        root = yaml.compose(text)
    except yaml.YAMLError:
        return lines

    def walk(node, path: tuple) -> None:
        lines[path] = node.start_mark.line + 1
        if isinstance(node, yaml.MappingNode):
            for k, v in node.value:
                walk(v, path + (k.value,))
        elif isinstance(node, yaml.SequenceNode):
            for i, v in enumerate(node.value):
                walk(v, path + (i,))

    if root is not None:
        walk(root, ())
    return lines
