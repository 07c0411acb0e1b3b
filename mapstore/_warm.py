"""A feature set rebuilt with the settings of its last build, on the catalog it was built from, has
nothing to do: said without importing numpy, pyarrow or DuckDB (a warm ``mapstore features`` is then
start-up and a few ``stat`` calls).

A build that ends with nothing left to retry records, under a digest of its settings (and of the files
they name), the catalog snapshot, the set's rows table and the size of every shard.  A later call with
the same settings finds the record, checks HEAD still names that catalog and rows table and that every
shard is there at its size, and answers.  Anything else (a record that is missing, damaged or stale)
means the full build runs, which decides for itself.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from typing import Any

__all__ = ["RECORDS", "build_settings", "remember", "settings_digest", "unchanged"]

RECORDS = "features/unchanged.json"  # store-relative: digest -> what the last build with those settings left
_PLAIN = (str, int, float, bool, type(None))
_MAX_BYTES = 1 << 20  # the record file is small; a bigger one is not ours to parse


def _plain(value: Any) -> bool:
    if isinstance(value, dict):
        return all(isinstance(k, str) and _plain(v) for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return all(_plain(v) for v in value)
    return isinstance(value, _PLAIN)


def build_settings(name: str | None, **settings: Any) -> dict[str, Any]:
    """What a build's result depends on among its arguments (not jobs, scheduler or progress): the CLI
    makes it from its options before importing the features stage, the build from its parameters."""
    return {"name": name, **settings}


def settings_digest(version: str, settings: dict[str, Any]) -> str | None:
    """A digest of a build's settings and of the files they name (path, size, time), or None when a
    setting is not plain data (an array, a target object) or names a folder (whose files may change
    without it)."""
    if not _plain(settings):
        return None
    files = []
    for key in ("grid", "mask", "mesh"):
        v = settings.get(key)
        if isinstance(v, str) and os.path.exists(v):
            if os.path.isdir(v):
                return None
            st = os.stat(v)
            files.append([os.path.abspath(v), st.st_size, st.st_mtime_ns])
    if settings.get("subjects_dir") is not None:
        return None
    doc = json.dumps({"version": version, "settings": settings, "files": files}, sort_keys=True, default=str)
    return hashlib.sha256(doc.encode()).hexdigest()


def _read(path: str) -> Any:
    with open(path, "rb") as fh:
        data = fh.read(_MAX_BYTES + 1)
    if len(data) > _MAX_BYTES:
        raise ValueError("too large")
    return json.loads(data)


def unchanged(store: str | os.PathLike[str], digest: str | None) -> dict[str, Any] | None:
    """The record of the last build with these settings, if nothing it depends on changed since."""
    if digest is None:
        return None
    root = os.path.abspath(store)
    try:
        rec = _read(os.path.join(root, RECORDS)).get(digest)
        head = _read(os.path.join(root, "HEAD"))
        entry = head["features"][rec["name"]]
        if head["catalog"] != rec["catalog"] or entry["rows"] != rec["rows"]:
            return None
        shards = os.path.join(root, "features", os.path.basename(rec["name"]), "shards")
        for name, size in rec["shards"].items():
            if os.path.basename(name) != name or os.stat(os.path.join(shards, name)).st_size != size:
                return None
        if not os.path.isfile(os.path.join(root, rec["rows"])):
            return None
        # what the command prints from it: of the types a build writes, or the build decides
        if not (isinstance(rec["head_line"], str) and isinstance(rec["n_rows"], int) and isinstance(rec["left_out"], dict)
                and all(isinstance(k, str) and isinstance(v, int) for k, v in rec["left_out"].items())):
            return None
        return rec
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return None  # no record, or not one to trust: the build decides


def remember(store: str | os.PathLike[str], digest: str | None, record: dict[str, Any],
             write_json_atomic) -> None:
    """Keep ``record`` for ``digest``; an earlier record of the same set is dropped (a set holds what its
    last build made)."""
    if digest is None:
        return
    path = os.path.join(os.path.abspath(store), RECORDS)
    try:
        records = _read(path)
        if not isinstance(records, dict):
            records = {}
    except (OSError, ValueError):
        records = {}
    if records.get(digest) == json.loads(json.dumps(record)):
        return  # the same record (a warm run through the API): nothing to write
    records = {k: v for k, v in records.items() if isinstance(v, dict) and v.get("name") != record["name"]}
    records[digest] = record
    write_json_atomic(Path(path), records)
