"""``pooled.json``: what a pooled-maps folder holds and where it came from, as one typed record with one
writer and one reader.

The reader treats the file as untrusted input (a folder someone sent): bounded in size and depth,
the fields ``verify`` uses type-checked before anything reads them, refused in one line otherwise.
The method's own details (its settings, the studies, what was left out) travel in ``details`` and
are written beside the typed fields, so the JSON reads flat.
"""

from __future__ import annotations

import dataclasses
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ParameterError
from ..formats import nesting_depth

__all__ = ["PooledRecord", "PooledSource", "RECORD_LIMIT"]

RECORD_LIMIT = 256 << 20  # bytes of a pooled.json
_DEPTH = 16


@dataclass
class PooledSource:
    """One map that went into the pooled maps: its file and the store row read from it."""

    map_id: str
    path: str
    sha256: str | None
    row_sha256: str | None = None

    @classmethod
    def from_json(cls, doc: Any, where: str) -> "PooledSource":
        if not isinstance(doc, dict) or not isinstance(doc.get("path"), str) or \
                not all(doc.get(k) is None or isinstance(doc[k], str) for k in ("map_id", "sha256", "row_sha256")):
            raise ParameterError(f"{where}: a malformed pooled.json (each source is an object with a path and text "
                                 "hashes); give a folder 'mapstore pool' wrote")
        return cls(str(doc.get("map_id") or ""), doc["path"], doc.get("sha256"), doc.get("row_sha256"))


@dataclass
class PooledRecord:
    """The provenance of a pooled-maps folder."""

    method: str
    details: dict[str, Any] = field(default_factory=dict)  # the method's settings, studies, what was left out
    fdr: dict[str, Any] | None = None  # q, the z threshold it gives, the values tested
    files: list[str] = field(default_factory=list)
    file_sha256: dict[str, str] = field(default_factory=dict)
    sources: list[PooledSource] = field(default_factory=list)
    variance_sources: list[PooledSource] = field(default_factory=list)

    _TYPED = ("method", "fdr", "files", "file_sha256", "sources", "variance_sources")

    def to_json(self) -> dict[str, Any]:
        doc = {k: v for k, v in self.details.items() if k not in self._TYPED}
        doc.update(method=self.method, fdr=self.fdr, files=list(self.files), file_sha256=dict(self.file_sha256),
                   sources=[dataclasses.asdict(s) for s in self.sources])
        if self.variance_sources:
            doc["variance_sources"] = [dataclasses.asdict(s) for s in self.variance_sources]
        return _strict(doc)

    def write(self, folder: str | os.PathLike[str]) -> None:
        """``folder/pooled.json``, strict JSON (a value nothing gave is null, never NaN)."""
        (Path(folder) / "pooled.json").write_text(json.dumps(self.to_json(), indent=1, default=str, allow_nan=False))

    @classmethod
    def from_json(cls, doc: Any, where: str) -> "PooledRecord":
        def bad(what: str) -> ParameterError:
            return ParameterError(f"{where}: a malformed pooled.json ({what}); give a folder 'mapstore pool' wrote")

        if not isinstance(doc, dict):
            raise bad("not an object")
        files = doc.get("file_sha256") or {}
        if not isinstance(files, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in files.items()):
            raise bad("file_sha256 must map names to hashes")
        lists = {k: doc.get(k) or [] for k in ("sources", "variance_sources")}
        if not all(isinstance(v, list) for v in lists.values()):
            raise bad("sources must be a list of objects")
        if not isinstance(doc.get("files") or [], list) or not isinstance(doc.get("fdr") or {}, dict):
            raise bad("files must be a list, fdr an object")
        return cls(str(doc.get("method") or ""), {k: v for k, v in doc.items() if k not in cls._TYPED},
                   doc.get("fdr"), [str(f) for f in doc.get("files") or []], files,
                   [PooledSource.from_json(s, where) for s in lists["sources"]],
                   [PooledSource.from_json(s, where) for s in lists["variance_sources"]])

    @classmethod
    def read(cls, folder: str | os.PathLike[str]) -> "PooledRecord":
        """The record of a folder ``write_pooled`` wrote, read as untrusted input."""
        folder = Path(os.fspath(folder))
        record = folder / "pooled.json"
        try:
            if record.stat().st_size > RECORD_LIMIT:
                raise ValueError(f"larger than {RECORD_LIMIT >> 20} MiB")
            doc = json.loads(record.read_text())
            if not isinstance(doc, dict) or nesting_depth(doc, _DEPTH) > _DEPTH:
                raise ValueError(f"not an object, or nested deeper than {_DEPTH} levels")
        except RecursionError as exc:
            raise ParameterError(f"{folder}: pooled.json is nested too deeply; give a folder 'mapstore pool' "
                                 "wrote") from exc
        except (OSError, ValueError) as exc:
            if folder.name.endswith(".partial"):
                raise ParameterError(f"{folder}: the unfinished folder of an interrupted run, not a result; run it "
                                     "again (the next run removes it)") from exc
            raise ParameterError(f"{folder}: no readable pooled.json ({exc}); give a folder 'mapstore pool' "
                                 "wrote") from exc
        return cls.from_json(doc, str(folder))


def _strict(obj: Any) -> Any:
    """The record with every non-finite number as None (JSON has no NaN or Infinity)."""
    if isinstance(obj, dict):
        return {k: _strict(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_strict(v) for v in obj]
    if isinstance(obj, (float, np.floating)):
        return float(obj) if np.isfinite(obj) else None
    if isinstance(obj, np.integer):
        return int(obj)
    return obj
