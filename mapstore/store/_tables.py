"""What the store holds: the Arrow schema of every table and the records of HEAD and snapshots.

One home for each: a new ``maps`` column is one edit here plus its producer (``catalog``);
readers, writers and the JSON Schemas (``schemas.py``) all take them from this module.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, ClassVar

import pyarrow as pa

from ..errors import StoreCorrupt
from ._atomic import write_json_atomic
from ._paths import check_types, relative_path

__all__ = [
    "MAPS_SCHEMA", "MAPS_SCHEMA_ID", "DATASETS_SCHEMA", "PROBLEMS_SCHEMA", "PARTICIPANTS_SCHEMA", "LABELS_SCHEMA",
    "ROWS_SCHEMA", "FPROBLEMS_SCHEMA", "COPIES_SCHEMA", "FEATURE_SETS_SCHEMA", "PARTS_DIR",
    "Head", "FeatureEntry", "LabelsEntry", "FeatureSetSpec", "CatalogPart", "CatalogManifest", "conform", "arrow_to_json_schema", "SCHEMA_BASE",
]

SCHEMA_BASE = "https://mapstore.invalid/schemas/"

_s, _i32, _i64, _f64 = pa.string(), pa.int32(), pa.int64(), pa.float64()
MAPS_SCHEMA = pa.schema([
    ("map_id", _s), ("dataset", _s), ("relpath", _s),
    ("sub", _s), ("ses", _s), ("task", _s), ("acq", _s), ("run", _s), ("rec", _s),
    ("space", _s), ("res", _s), ("den", _s), ("hemi", _s), ("desc", _s), ("contrast", _s), ("stat", _s), ("map_kind", _s),
    ("suffix", _s), ("extension", _s), ("entities", _s), ("named_by", _s),
    ("participant", _s), ("study", _s), ("site", _s), ("lab", _s),
    ("sha256", _s), ("nbytes", _i64), ("mtime_ns", _i64),
    ("nifti_version", _i32), ("endianness", _s), ("shape", pa.list_(_i64)), ("n_volumes", _i64),
    ("dtype", _s), ("bitpix", _i32), ("vox_offset", _i64),
    ("scl_slope", _f64), ("scl_inter", _f64), ("intent_code", _i32), ("intent_name", _s), ("intent_p1", _f64),
    ("qform_code", _i32), ("sform_code", _i32), ("affine_source", _s),
    ("affine", pa.list_(_f64)), ("voxel_size", pa.list_(_f64)), ("orientation", _s),
    ("grid_id", _s), ("descrip", _s), ("dof", _f64), ("dof_source", _s), ("model_mask", _s),
    ("model_mask_sha256", _s), ("metadata", _s), ("sidecars", pa.list_(_s)),
    ("header_warnings", pa.list_(_s)),
    # surface maps: 'volume' (NIfTI), 'surface' (GIFTI, one hemisphere per file) or 'grayordinates'
    # (CIFTI-2); the values per map; CIFTI structures; the map_id of the other hemisphere's file
    ("geometry", _s), ("n_vertices", _i64), ("structures", _s), ("linked_map", _s),
    # 'template', 'native' or 'unstated' (no space entity); a native volume's registration to a template
    # (JSON: {"to": space, "steps": [{"path", "sha256", "format", ...}]}, template side first)
    ("space_kind", _s), ("registration", _s),
    # an F map's numerator degrees of freedom: its contrast's rank (the volumes of its effect map)
    ("dof_numerator", _f64),
    # a file of several maps (CIFTI-2 scalars, GIFTI data arrays) gives one row per map: its position
    # in the file (0-based) and the name the file gives it; null for a file that is one map
    ("map_index", _i64), ("map_name", _s),
    # whom the map summarises: run, session, subject (one person's), group or unknown; a group map's
    # count of inputs where its writer says; a higher-level contrast (FEAT .gfeat: group mean, ...)
    ("level", _s), ("n_inputs", _i64), ("group_contrast", _s),
    # the file's format: nifti1, nifti2, gifti, cifti2, or one read through nibabel (nifti1-pair, analyze,
    # afni, mgh, minc1, minc2)
    ("file_format", _s),
    # 'present', or 'not-present': an annexed file whose content is not fetched (sha256 and nbytes from
    # its git-annex key where the key gives them; header facts come when the content does); the key
    ("content", _s), ("annex_key", _s),
])
DATASETS_SCHEMA = pa.schema([
    ("dataset", _s), ("name", _s), ("study", _s), ("root", _s), ("dataset_type", _s),
    ("generated_by", _s), ("bids_version", _s), ("raw_root", _s), ("raw_name", _s),
    ("participants_file", _s), ("n_maps", _i64), ("description", _s),
])
ROWS_SCHEMA = pa.schema([
    ("map_id", _s), ("feature_key", _s), ("sha256", _s),
    ("shard", _s), ("row", _i64), ("coverage", _f64),
    ("stat_in", _s), ("stat_out", _s), ("conversion", _s),
    ("resample_path", _s), ("built_at", _s), ("row_sha256", _s),
    ("vmin", _f64), ("vmax", _f64), ("vmean", _f64),
    ("missing_from", _s), ("p_clipped", _i64), ("sketch", pa.binary()),
    ("source_key", _s),  # parcel sets: the feature_key of the source set's row
])
# pairs of rows of one feature set that are copies (written by features, read by check and export)
COPIES_SCHEMA = pa.schema([("map_a", _s), ("map_b", _s), ("kind", _s), ("r", _f64), ("n_common", _i64)])
FPROBLEMS_SCHEMA = pa.schema([
    ("map_id", _s), ("path", _s), ("code", _s), ("reason", _s),
    ("remedy", _s),
])


# the fixed columns; participants.tsv adds its own
PARTICIPANTS_SCHEMA = pa.schema([("dataset", _s), ("participant_id", _s), ("sub", _s), ("participant", _s)])
LABELS_SCHEMA = pa.schema([("map_id", _s), ("concept", _s), ("direct", pa.bool_()), ("rule", _i32),
                           ("vocabulary_sha256", _s)])
FEATURE_SETS_SCHEMA = pa.schema([("feature_set", _s), ("default", pa.bool_()), ("rows", _i64), ("grid", _s),
                                 ("grid_id", _s), ("shape", pa.list_(_i64)), ("mask", _s), ("n_voxels", _i64),
                                 ("method", _s), ("stat", _s), ("spec_id", _s)])

PROBLEMS_SCHEMA = pa.schema([
    ("path", _s), ("dataset", _s), ("code", _s), ("level", _s), ("stage", _s),
    ("reason", _s), ("remedy", _s), ("count", _i64),
])


@dataclass(frozen=True)
class Problem:
    """A file that could not be used, or was used with a caveat (level ``warning``): one type for the
    index's problems table and a feature set's."""

    path: str
    code: str
    reason: str
    remedy: str
    level: str = "error"
    dataset: str | None = None
    stage: str = "discover"
    map_id: str | None = None  # a feature problem's map
    count: int = 1  # files the row stands for (one row for many files passed over alike)

    def row(self, schema: pa.Schema) -> dict[str, Any]:
        """The record as a row of a table with ``schema`` (the problems or feature_problems table)."""
        return {name: getattr(self, name) for name in schema.names}


_S, _I, _L, _D, _B = (str,), (int,), (list,), (dict,), (bool,)


class _JsonRecord:
    """to_json / from_json for the dataclass records of HEAD and set.json.

    A record read from a store is checked first: each field of ``_TYPES`` has its type, each field of
    ``_PATHS`` is a relative path with no ``..`` step (StoreCorrupt otherwise, naming the record).
    """

    _TYPES: ClassVar[dict[str, tuple[type, ...]]] = {}
    _PATHS: ClassVar[tuple[str, ...]] = ()

    def to_json(self) -> dict[str, Any]:
        return dict(self.__dict__)

    @classmethod
    def from_json(cls, doc: dict[str, Any], record: str = ""):
        """The record from its JSON object; keys it does not know (from newer versions) are ignored."""
        record = record or cls.__name__
        check_types(doc, cls._TYPES, record)
        for k in cls._PATHS:
            if doc.get(k) is not None:
                relative_path(doc[k], f"{record}.{k}")
        names = {f.name for f in fields(cls)}  # type: ignore[arg-type]
        try:
            return cls(**{k: v for k, v in doc.items() if k in names})
        except TypeError as exc:  # a required field missing
            raise StoreCorrupt(f"{record}: {exc}; the store was damaged or crafted: restore it from a backup, "
                               "or index the datasets again into a new store") from exc


@dataclass
class FeatureEntry(_JsonRecord):
    """HEAD's record of one feature set: its folder and the tables of its current state."""

    dir: str
    rows: str
    problems: str
    copies: str | None = None
    n_rows: int | None = None
    spec_id: str | None = None
    catalog: str | None = None  # the catalog snapshot it was built from

    _TYPES: ClassVar[dict[str, tuple[type, ...]]] = {
        "dir": _S, "rows": _S, "problems": _S, "copies": _S, "n_rows": _I, "spec_id": _S, "catalog": _S}
    _PATHS: ClassVar[tuple[str, ...]] = ("dir", "rows", "problems", "copies", "catalog")


@dataclass
class LabelsEntry(_JsonRecord):
    """HEAD's record of the labels: the table, and the vocabulary (its stored copy) that made it."""

    table: str
    vocabulary: str | None = None
    version: str | None = None
    sha256: str | None = None  # of the vocabulary file as the user gave it
    source: str | None = None
    copy: str | None = None  # the stored copy, relative to the store
    inherit_broader: bool | None = None
    catalog: str | None = None  # the catalog snapshot it labels
    concepts: list[str] = field(default_factory=list)

    _TYPES: ClassVar[dict[str, tuple[type, ...]]] = {
        "table": _S, "vocabulary": _S, "version": _S, "sha256": _S, "source": _S, "copy": _S,
        "inherit_broader": _B, "catalog": _S, "concepts": _L}
    _PATHS: ClassVar[tuple[str, ...]] = ("table", "copy", "catalog")


@dataclass
class FeatureSetSpec(_JsonRecord):
    """``features/<set>/set.json``: everything a set's rows depend on (written once per set)."""

    name: str
    grid: dict[str, Any]  # name, shape, affine, grid_id
    grid_id: str
    mask: dict[str, Any]  # name, n_voxels, sha256
    mask_sha256: str
    method: str
    stat: str
    p_sided: str
    zero_as_missing: bool
    background: str = "keep"
    kinds: list[str] = field(default_factory=lambda: ["contrast", "model"])
    where: str | None = None
    versions: dict[str, str] = field(default_factory=dict)
    spec_id: str = ""
    geometry: str = "volume"  # the kind of target (targets.KINDS): volume, surface, grayordinates, parcels
    projection: dict[str, Any] | None = None  # surface sets: how volume maps are projected onto the mesh
    parcels: dict[str, Any] | None = None  # parcel sets: the atlas, the reducer and the source set
    sketch: str = "count"  # the rows' sketch directions: count (sparse) or gauss (dense, small sets)
    subjects_dir: str | None = None  # FreeSurfer subjects whose sphere.reg took fsnative maps onto the mesh

    _TYPES: ClassVar[dict[str, tuple[type, ...]]] = {
        "name": _S, "grid": _D, "grid_id": _S, "mask": _D, "mask_sha256": _S, "method": _S, "stat": _S,
        "p_sided": _S, "zero_as_missing": _B, "background": _S, "kinds": _L, "where": _S, "versions": _D,
        "spec_id": _S, "geometry": _S, "projection": _D, "parcels": _D, "sketch": _S, "subjects_dir": _S}

    def write(self, folder: Path) -> None:
        """Write ``folder/set.json`` atomically (the one writer of the file)."""
        write_json_atomic(Path(folder) / "set.json", self.to_json())

    @classmethod
    def read(cls, folder: Path) -> "FeatureSetSpec":
        """Read ``folder/set.json`` (OSError and ValueError pass to the caller; a FIFO or device is refused)."""
        from ._paths import regular_file

        f = regular_file(folder / "set.json", "set.json")
        spec = cls.from_json(json.loads(f.read_text()), str(f))
        mask = spec.mask
        if not isinstance(mask.get("n_voxels"), int) or isinstance(mask.get("n_voxels"), bool) or \
                not 0 < mask["n_voxels"] < 2 ** 40:
            raise StoreCorrupt(f"{f}: mask.n_voxels {mask.get('n_voxels')!r} is not a count; rebuild the set")
        return spec


@dataclass
class Head:
    """What the store currently serves: one catalog snapshot, the feature sets and the labels."""

    catalog: str | None = None
    features: dict[str, FeatureEntry] = field(default_factory=dict)
    default_features: str | None = None
    labels: LabelsEntry | None = None
    history: list[dict[str, Any]] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        return {"catalog": self.catalog, "features": {k: v.to_json() for k, v in self.features.items()},
                "default_features": self.default_features,
                "labels": self.labels.to_json() if self.labels else None, "history": self.history[-50:]}

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> "Head":
        check_types(doc, {"catalog": _S, "features": _D, "default_features": _S, "labels": _D, "history": _L},
                    "HEAD")
        if doc.get("catalog") is not None:
            relative_path(doc["catalog"], "HEAD catalog")
        labels = doc.get("labels")
        return cls(doc.get("catalog"),
                   {str(k): FeatureEntry.from_json(v, f"HEAD features.{k}") for k, v in (doc.get("features") or {}).items()},
                   doc.get("default_features"), LabelsEntry.from_json(labels, "HEAD labels") if labels else None,
                   list(doc.get("history") or []))

    def paths(self) -> list[tuple[str, str, bool]]:
        """(record, path, is a folder) of every store path HEAD names."""
        out = [("HEAD catalog", self.catalog, True)] if self.catalog else []
        for name, e in self.features.items():
            out += [(f"HEAD features.{name}.{k}", getattr(e, k), k in ("dir", "catalog"))
                    for k in FeatureEntry._PATHS if getattr(e, k)]
        if self.labels:
            out += [(f"HEAD labels.{k}", getattr(self.labels, k), k == "catalog") for k in LabelsEntry._PATHS
                    if getattr(self.labels, k)]
        return out


MAPS_SCHEMA_ID = hashlib.sha256(MAPS_SCHEMA.to_string().encode()).hexdigest()[:16]
PARTS_DIR = "catalog/parts"


@dataclass
class CatalogPart:
    """One Parquet part of the maps table: the rows one unit of work (a dataset, or some of its
    top-level folders) wrote.  Parts are shared between snapshots until their unit changes."""

    dataset: str
    unit: str  # stable key of the unit of work (dataset + its top folders)
    maps: str  # path relative to the store
    rows: int
    problems: str | None = None  # the unit's problems (Parquet, PROBLEMS_SCHEMA), if it had any
    digest: str | None = None  # fingerprint of everything the rows were made from; None: never reused
    schema: str = MAPS_SCHEMA_ID  # MAPS_SCHEMA when written

    def to_json(self) -> dict[str, Any]:
        return dict(self.__dict__)

    @classmethod
    def from_json(cls, doc: dict[str, Any], record: str = "parts.json") -> "CatalogPart":
        check_types(doc, {"dataset": _S, "unit": _S, "maps": _S, "rows": _I, "problems": _S, "digest": _S,
                          "schema": _S}, record)
        for k in ("maps", "problems"):
            if doc.get(k) is not None:
                relative_path(doc[k], f"{record}.{k}")
        if doc.get("maps") is None:
            raise StoreCorrupt(f"{record}: a part with no maps file; re-run 'mapstore index'")
        return cls(**{k: doc.get(k) for k in ("dataset", "unit", "maps", "rows", "problems", "digest")},
                   schema=doc.get("schema", ""))


INDEX_INPUTS_FILE = "index-inputs.json"  # in each catalog snapshot: the name rules and origins it was made with


def check_index_inputs(doc: Any, record: str) -> dict[str, Any]:
    """A snapshot's index inputs, type-checked: ``rules`` (a list of ``{"preset": name}`` or ``{"file",
    "sha256", "content"}``) and ``origins`` (one such file, or null)."""
    def given_file(d: Any, where: str) -> None:
        if not (isinstance(d, dict) and isinstance(d.get("file"), str) and isinstance(d.get("sha256"), str)
                and isinstance(d.get("content"), dict)):
            raise StoreCorrupt(f"{record}: {where} is not a file record (file, sha256, content); re-run "
                               "'mapstore index'")

    if not isinstance(doc, dict) or not isinstance(doc.get("rules"), list):
        raise StoreCorrupt(f"{record}: not an index-inputs record (rules, origins); re-run 'mapstore index'")
    for i, r in enumerate(doc["rules"]):
        if not (isinstance(r, dict) and isinstance(r.get("preset"), str)):
            given_file(r, f"rules[{i}]")
    if doc.get("origins") is not None:
        given_file(doc["origins"], "origins")
    return doc


@dataclass
class CatalogManifest:
    """``catalog/<snapshot>/parts.json``: the maps parts a snapshot is made of, in dataset order."""

    parts: list[CatalogPart] = field(default_factory=list)

    FILE = "parts.json"

    def to_json(self) -> dict[str, Any]:
        return {"format": 2, "parts": [p.to_json() for p in self.parts]}

    @classmethod
    def from_json(cls, doc: dict[str, Any], record: str = "parts.json") -> "CatalogManifest":
        check_types(doc, {"parts": _L}, record)
        return cls([CatalogPart.from_json(d, f"{record} part {i}") for i, d in enumerate(doc.get("parts") or [])])

    @classmethod
    def read(cls, store: Path, snapshot: str) -> "CatalogManifest":
        """The manifest of ``snapshot`` (a store-relative folder)."""
        from ._paths import RealPaths, store_file

        real_paths = RealPaths()
        f = store_file(store, f"{snapshot}/{cls.FILE}", f"HEAD catalog {snapshot}", real_paths=real_paths)
        try:
            manifest = cls.from_json(json.loads(f.read_text()), str(f))
            for i, p in enumerate(manifest.parts):
                for k in ("maps", "problems"):
                    if getattr(p, k):
                        store_file(store, getattr(p, k), f"{f} part {i}.{k}", real_paths=real_paths)
            return manifest
        except FileNotFoundError:
            raise
        except (OSError, ValueError) as exc:
            raise StoreCorrupt(f"{f}: unreadable ({exc}); re-run 'mapstore index'") from exc


def conform(table: pa.Table, schema: pa.Schema) -> pa.Table:
    """A table with exactly ``schema``'s columns: ones added since it was written are null."""
    if table.schema.equals(schema):
        return table
    # a cast imports pyarrow.compute (~70 ms): only columns whose type changed are cast
    cols = [(table[f.name] if table.schema.field(f.name).type == f.type else table[f.name].cast(f.type))
            if f.name in table.column_names else pa.nulls(table.num_rows, f.type) for f in schema]
    return pa.Table.from_arrays(cols, schema=schema)


def _arrow_type(t: pa.DataType) -> dict[str, Any]:
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return {"type": ["string", "null"]}
    if pa.types.is_integer(t):
        return {"type": ["integer", "null"]}
    if pa.types.is_floating(t):
        return {"type": ["number", "null"]}
    if pa.types.is_binary(t) or pa.types.is_large_binary(t):
        return {}  # raw bytes: JSON has no type for them (Parquet stores them as they are)
    if pa.types.is_boolean(t):
        return {"type": ["boolean", "null"]}
    if pa.types.is_list(t) or pa.types.is_large_list(t) or pa.types.is_fixed_size_list(t):
        return {"type": ["array", "null"], "items": _arrow_type(t.value_type)}
    return {}


def arrow_to_json_schema(name: str, schema: pa.Schema, description: str,
                         docs: dict[str, str] | None = None) -> dict[str, Any]:
    """JSON Schema of one row of a catalog table."""
    props = {}
    for f in schema:
        p = dict(_arrow_type(f.type))
        if docs and f.name in docs:
            p["description"] = docs[f.name]
        props[f.name] = p
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": SCHEMA_BASE + f"{name}.schema.json",
        "title": f"mapstore catalog table '{name}' (one row)",
        "description": description,
        "type": "object",
        "properties": props,
        "required": [schema[0].name],
    }
