"""The export manifest as one typed record: written by ``export``, read (as untrusted input) by ``verify``
and ``rebuild``.

A manifest comes from a collaborator as often as from oneself, so reading it is bounded in size and
depth and every field is type-checked before anything uses it; a bad one is refused in one line.
Older manifests still read: ``target`` (now ``y_from``) and ``feature_set`` (now the set's
``feature_settings``) are taken when the newer field is absent.
"""

from __future__ import annotations

import dataclasses
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..errors import ExportError
from ..formats import nesting_depth

__all__ = ["ExportManifest", "ManifestSource", "MANIFEST_FORMAT", "read_manifest"]

MANIFEST_FORMAT = "mapstore-export"
MANIFEST_LIMIT = 256 << 20  # bytes: a manifest of a hundred thousand maps is about 60 MB
MANIFEST_DEPTH = 16


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


@dataclass
class ManifestSource:
    """One exported row's source map, and the hashes that tie it to the store and the export."""

    map_id: str
    dataset: str
    relpath: str
    path: str  # where the source was when exported
    sha256: str
    feature_key: str
    row_sha256: str  # the store's row
    x_sha256: str | None = None  # the exported row (None in manifests before missing-value policies)
    stat: str | None = None
    dof: float | None = None
    map_index: int | None = None  # the map's position in a file of several maps
    annex_key: str | None = None  # the git-annex key of a source in an annexed dataset (what to fetch)

    @property
    def x_hash(self) -> str:
        return self.x_sha256 or self.row_sha256

    def to_json(self) -> dict[str, Any]:
        doc = dataclasses.asdict(self)
        for k in ("map_index", "annex_key"):  # written only where they say something
            if doc[k] is None:
                del doc[k]
        return doc

    @classmethod
    def from_json(cls, doc: Any, i: int, bad) -> "ManifestSource":
        if not isinstance(doc, dict):
            raise bad(f"sources[{i}] must be an object")
        for k in ("map_id", "dataset", "path", "sha256", "feature_key", "row_sha256", "relpath"):
            if not isinstance(doc.get(k), str):
                raise bad(f"sources[{i}].{k} is {type(doc.get(k)).__name__}, not text")
        for k in ("x_sha256", "stat", "annex_key"):
            if doc.get(k) is not None and not isinstance(doc[k], str):
                raise bad(f"sources[{i}].{k} must be text")
        if doc.get("dof") is not None and (isinstance(doc["dof"], bool) or not isinstance(doc["dof"], (int, float))):
            raise bad(f"sources[{i}].dof must be a number")
        if doc.get("map_index") is not None and not (_is_int(doc["map_index"]) and doc["map_index"] >= 0):
            raise bad(f"sources[{i}].map_index must be a whole number")
        return cls(**{f.name: doc.get(f.name) for f in dataclasses.fields(cls)})


# field -> the JSON types it may hold (None always allowed for optional fields)
_TEXT, _OBJ, _LIST, _BOOL = (str,), (dict,), (list,), (bool,)


@dataclass
class ExportManifest:
    """What an export holds and how to reproduce it (``manifest.json``)."""

    store: str
    feature_settings: dict[str, Any]  # the feature set's set.json
    query: dict[str, Any]
    y_from: str
    group_by: str
    scheme: str
    seed: int
    shape: list[int]
    sources: list[ManifestSource]
    layout: str = "npy"
    created: str = ""
    mapstore_version: str = ""
    versions: dict[str, str] = field(default_factory=dict)
    datasets: dict[str, Any] | None = None  # key -> name and generator: what a rebuild matches
    catalog_snapshot: str | None = None
    dropped: dict[str, Any] = field(default_factory=dict)
    vocabulary: dict[str, Any] | None = None
    vocabulary_content: dict[str, Any] | None = None
    index_inputs: dict[str, Any] | None = None
    concepts: list[str] = field(default_factory=list)
    allow_leak: bool = False
    leaks: list[str] = field(default_factory=list)
    splits: list[Any] = field(default_factory=list)
    missing: dict[str, Any] = field(default_factory=dict)
    near_copy_r: float | None = None
    allow_unseen: bool = False
    unseen: list[str] = field(default_factory=list)
    personal_data: dict[str, Any] | None = None
    files: dict[str, str] = field(default_factory=dict)  # export file -> sha256 (the data files: by row)
    dtype: str = "float32"
    format: str = MANIFEST_FORMAT
    format_version: int = 1

    _TYPES = {"store": _TEXT, "feature_settings": _OBJ, "query": _OBJ, "y_from": _TEXT, "group_by": _TEXT,
              "scheme": _TEXT, "layout": _TEXT, "created": _TEXT, "mapstore_version": _TEXT, "versions": _OBJ,
              "datasets": _OBJ, "catalog_snapshot": _TEXT, "dropped": _OBJ, "vocabulary": _OBJ,
              "vocabulary_content": _OBJ, "index_inputs": _OBJ, "concepts": _LIST, "allow_leak": _BOOL,
              "leaks": _LIST, "splits": _LIST, "missing": _OBJ, "allow_unseen": _BOOL, "unseen": _LIST,
              "personal_data": _OBJ, "dtype": _TEXT}

    @property
    def set_name(self) -> str:
        return self.feature_settings["name"]

    @property
    def set_spec_id(self) -> str:
        return self.feature_settings.get("spec_id", "")

    def to_json(self) -> dict[str, Any]:
        doc = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        doc["sources"] = [s.to_json() for s in self.sources]
        return doc

    def write(self, folder: Path) -> None:
        (Path(folder) / "manifest.json").write_text(json.dumps(self.to_json(), indent=1, sort_keys=True,
                                                               default=str))

    @classmethod
    def from_json(cls, doc: dict[str, Any], where: str) -> "ExportManifest":
        """A manifest document, every field checked; ExportError naming the field otherwise."""
        def bad(what: str) -> ExportError:
            return ExportError(f"{where}: malformed manifest ({what}); export again with this mapstore")

        doc = dict(doc)
        if "y_from" not in doc and "target" in doc:  # manifests before the rename
            doc["y_from"] = doc["target"]
        if "feature_settings" not in doc and isinstance(doc.get("feature_set"), dict):  # before rebuilds
            doc["feature_settings"] = doc["feature_set"]
        for k, types in cls._TYPES.items():
            if doc.get(k) is not None and not isinstance(doc[k], types):
                raise bad(f"'{k}' must be {'text' if types is _TEXT else types[0].__name__}")
        if doc.get("feature_set") is not None and not isinstance(doc["feature_set"], dict):
            raise bad("'feature_set' must be an object")
        for k in ("store", "feature_settings", "query", "y_from", "group_by", "scheme"):
            if doc.get(k) is None:
                raise bad(f"no '{k}'")
        if not isinstance(doc["feature_settings"].get("name"), str):
            raise bad("'feature_settings.name' must be text")
        if not _is_int(doc.get("seed")):
            raise bad("'seed' must be a whole number")
        shape = doc.get("shape")
        if not (isinstance(shape, list) and len(shape) == 2 and all(_is_int(v) and v >= 0 for v in shape)):
            raise bad("'shape' must be two whole numbers")
        files = doc.get("files") or {}
        if not isinstance(files, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in files.items()):
            raise bad("'files' must map file names to hashes")
        for name in files:
            if not name or "/" in name or "\\" in name or name in (".", "..") or "\x00" in name:
                raise bad(f"'files' names {name!r}, which is not a file of the export folder")
        if not isinstance(doc.get("sources"), list):
            raise bad("'sources' must be a list of objects")
        if doc.get("near_copy_r") is not None and (isinstance(doc["near_copy_r"], bool)
                                                   or not isinstance(doc["near_copy_r"], (int, float))):
            raise bad("'near_copy_r' must be a number")
        sources = [ManifestSource.from_json(s, i, bad) for i, s in enumerate(doc["sources"])]
        known = {f.name for f in dataclasses.fields(cls)}
        kept = {k: v for k, v in doc.items() if k in known and v is not None and k not in ("sources", "files")}
        return cls(**{**kept, "sources": sources, "files": files})


def _regular(p: Path) -> bool:
    import stat

    try:
        return stat.S_ISREG(os.stat(p).st_mode)
    except OSError:
        return False


def read_manifest(manifest_path: str | os.PathLike[str]) -> tuple[Path, ExportManifest]:
    """A manifest as untrusted input: bounded in size and depth, its types checked before anything reads
    it; returns its path and record, or ExportError in one line."""
    mpath = Path(manifest_path)
    if mpath.is_dir():
        mpath = mpath / "manifest.json"
    try:
        if not mpath.exists():
            raise FileNotFoundError(mpath)
        if not _regular(mpath):
            raise ExportError(f"{mpath}: not a regular file; give the export folder or its manifest.json")
        size = mpath.stat().st_size
        if size > MANIFEST_LIMIT:
            raise ExportError(f"{mpath}: {size:,} bytes, more than the {MANIFEST_LIMIT >> 20} MiB a manifest may hold")
        doc = json.loads(mpath.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        if mpath.parent.name.endswith(".partial"):
            raise ExportError(f"{mpath.parent}: the unfinished folder of an interrupted run, not a result; run it "
                              "again (the next run removes it)") from exc
        raise ExportError(f"{mpath}: manifest not found; give the export folder or its manifest.json") from exc
    except RecursionError as exc:
        raise ExportError(f"{mpath}: malformed manifest (nested deeper than {MANIFEST_DEPTH} levels)") from exc
    except (OSError, ValueError) as exc:
        raise ExportError(f"{mpath}: unreadable manifest ({exc})") from exc
    if not isinstance(doc, dict) or doc.get("format") != MANIFEST_FORMAT:
        raise ExportError(f"{mpath}: not a mapstore export manifest")
    if nesting_depth(doc, MANIFEST_DEPTH) > MANIFEST_DEPTH:
        raise ExportError(f"{mpath}: malformed manifest (nested deeper than {MANIFEST_DEPTH} levels)")
    return mpath, ExportManifest.from_json(doc, str(mpath))
