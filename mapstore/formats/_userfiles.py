"""Files users write (vocabularies, name rules, origins): read with line numbers, checked against
their JSON Schemas, failures named by file, key path and line."""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ._schemafiles import schema_text

__all__ = ["UserFile", "load_user_file", "check_user_doc", "format_key_path", "USER_FILE_LIMIT", "MAX_DEPTH",
           "MAX_ALIASES", "nesting_depth", "bounded_yaml_loader"]

# what a file a user (or a collaborator) hands over may hold: a vocabulary, name rules or origins file of
# real use is a few kB; these limits are far above that and far below what could hurt the machine
USER_FILE_LIMIT = 8 << 20  # bytes
MAX_DEPTH = 64  # nesting of objects and lists
MAX_ALIASES = 100  # YAML aliases (*name): a few hundred bytes of nested aliases expand to gigabytes
MAX_NODES = 200_000  # values in a document once its aliases are expanded (as any reader of it will)


def nesting_depth(doc: Any, limit: int = MAX_DEPTH) -> int:
    """How deeply lists and objects nest in ``doc`` (counted without recursion; stops past ``limit``)."""
    deepest = 0
    stack = [(doc, 1)]
    while stack:
        node, d = stack.pop()
        if isinstance(node, (dict, list)):
            deepest = max(deepest, d)
            if deepest > limit:
                return deepest
            stack.extend((v, d + 1) for v in (node.values() if isinstance(node, dict) else node))
    return deepest


def bounded_yaml_loader():
    """PyYAML's safe loader (no custom tags) that refuses more than MAX_ALIASES aliases and nesting deeper
    than MAX_DEPTH while it composes, before anything is built."""
    import yaml

    class Loader(yaml.SafeLoader):
        def __init__(self, stream):
            super().__init__(stream)
            self._aliases = 0
            self._depth = 0

        def compose_node(self, parent, index):
            if self.check_event(yaml.AliasEvent):
                self._aliases += 1
                if self._aliases > MAX_ALIASES:
                    raise yaml.YAMLError(f"more than {MAX_ALIASES} aliases (*name)")
            self._depth += 1
            try:
                if self._depth > MAX_DEPTH:
                    raise yaml.YAMLError(f"nested deeper than {MAX_DEPTH} levels")
                return super().compose_node(parent, index)
            finally:
                self._depth -= 1

        def compose_document(self):
            root = super().compose_document()
            if root is not None and _expanded_size(root) > MAX_NODES:
                raise yaml.YAMLError(f"more than {MAX_NODES:,} values once its aliases are expanded")
            return root

    return Loader


def _expanded_size(root) -> int:
    """Values a YAML node tree holds with every alias expanded, each distinct node counted once (memo)."""
    import yaml

    size: dict[int, int] = {}
    open_: set[int] = set()  # nodes whose children are being counted: meeting one again is a cycle
    stack = [(root, False)]
    while stack:
        node, done = stack.pop()
        if id(node) in size:
            continue
        if not done and id(node) in open_:
            return MAX_NODES + 1  # a recursive alias (&a [*a]) never ends
        open_.add(id(node))
        kids = [c for kv in node.value for c in kv] if isinstance(node, yaml.MappingNode) else \
            list(node.value) if isinstance(node, yaml.SequenceNode) else []
        if done or not kids:
            size[id(node)] = 1 + sum(size[id(c)] for c in kids)
            if size[id(node)] > MAX_NODES:
                return size[id(node)]
            continue
        stack.append((node, True))
        stack.extend((c, False) for c in kids if id(c) not in size)
    return size[id(root)]


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
        size = p.stat().st_size
        if size > USER_FILE_LIMIT:
            raise error(f"{p}: {size:,} bytes, more than the {USER_FILE_LIMIT >> 20} MiB a {what} may hold")
        if not p.is_file():
            raise error(f"{p}: not a regular file; give the {what} itself")
        raw = p.read_bytes()[:USER_FILE_LIMIT + 1]
    except FileNotFoundError as exc:
        raise error(f"{p}: {what} not found") from exc
    except OSError as exc:
        raise error(f"{p}: cannot read ({exc.strerror})") from exc
    text = raw.decode("utf-8", errors="replace")
    if p.suffix.lower() in (".yaml", ".yml"):
        import yaml  # a few users need YAML; importing it costs ~40 ms

        try:
            doc = yaml.load(text, Loader=bounded_yaml_loader())  # noqa: S506  # a safe loader, bounded
        except yaml.YAMLError as exc:
            mark = getattr(exc, "problem_mark", None)
            where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
            raise error(f"{p}: not valid YAML{where} ({getattr(exc, 'problem', None) or exc})") from exc
        except RecursionError as exc:
            raise error(f"{p}: nested deeper than {MAX_DEPTH} levels") from exc
        return UserFile(p, raw, doc, _line_index(text))
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise error(f"{p}: not valid JSON at line {exc.lineno}, column {exc.colno} ({exc.msg})") from exc
    except RecursionError as exc:
        raise error(f"{p}: nested deeper than {MAX_DEPTH} levels") from exc
    if nesting_depth(doc) > MAX_DEPTH:
        raise error(f"{p}: nested deeper than {MAX_DEPTH} levels")
    return UserFile(p, raw, doc, {})


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
        root = yaml.compose(text, Loader=bounded_yaml_loader())
    except (yaml.YAMLError, RecursionError):
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
