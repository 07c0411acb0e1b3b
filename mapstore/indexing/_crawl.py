"""Build the catalog: discover -> hash + header -> one atomic catalog snapshot.

Re-indexing is incremental: a map whose size and mtime are unchanged keeps its
hash and header facts from the previous snapshot; changed files are read again;
files gone from disk leave the catalog.  A file that cannot be read never stops
the crawl: it becomes a row of ``problems``.
"""

from __future__ import annotations

import dataclasses
import errno
import gc
import hashlib
import json
import math
import operator
import os
import re
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import pyarrow as pa
import pyarrow.parquet as pq

from ._layouts import LayoutReader, level_from_entities
from ._spaces import RegistrationFinder, registration_json, space_kind
from ._datasets import DatasetInfo, find_datasets, top_folders
from ._metadata import MetadataOverrides, ModelFiles, SidecarResolver, read_participants
from ._names import EntityParser, NameRules
from ._walk import walk_dataset
from ._annex import fetch_files, uninstalled_subdatasets
from ..store import Problem, inside, lies_within
from .._version import __version__
from .._params import JOBS, MAP_MB_LIMIT, READ_TIMEOUT, declared, resolve_jobs
from .._runner import die_once_for_tests, run as run_units
from ..errors import HeaderError, MapstoreError, NoDatasetsFound, ParameterError, StoreFull
from ..labels import refresh_labels
from ..statkinds import LEVELS, kind_for_word, kinds_for_intent, stat_kind
from ..formats import REAL_SCALAR_DTYPES, ReadDeadline, ReadTimeout, afni_brick, afni_extension, digest_file, digest_map
from ..formats import foreign_format, read_foreign_header
from ..formats import (
    NIFTI1_SIZE,
    NIFTI2_SIZE,
    HeaderFacts,
    expected_vertices,
    header_prefix,
    parse_header,
    read_surface_header,
    surface_format,
    surface_grid_id,
)
from ..store import (
    read_parquet,
    DATASETS_SCHEMA,
    MAPS_SCHEMA,
    MAPS_SCHEMA_ID,
    PARTS_DIR,
    PROBLEMS_SCHEMA,
    Catalog,
    CatalogManifest,
    CatalogPart,
    Head,
    INDEX_INPUTS_FILE,
    commit_head,
    ensure_store,
    file_slug,
    leased_files,
    new_snapshot_id,
    read_head,
    write_json_atomic,
    write_lock,
    write_parquet_atomic,
)

__all__ = ["IndexReport", "index", "map_id_for", "probe_file"]

MAX_MAP_MB = 4096  # the default bound on a map's declared voxel data (index(max_map_mb=...))
_N1_SIZES = (NIFTI1_SIZE.to_bytes(4, "little"), NIFTI1_SIZE.to_bytes(4, "big"))

_ENTITY_COLUMNS = ("sub", "ses", "task", "acq", "run", "rec", "space", "res", "den", "hemi", "desc", "contrast",
                   "stat")
_HEADER_COLUMNS = ("sha256", "nbytes", "mtime_ns", "nifti_version", "endianness", "shape", "n_volumes",
                   "dtype", "bitpix", "vox_offset", "scl_slope", "scl_inter", "intent_code",
                   "intent_name", "intent_p1", "qform_code", "sform_code", "affine_source", "affine",
                   "voxel_size", "orientation", "grid_id", "descrip", "header_warnings", "geometry",
                   "n_vertices", "structures", "file_format")


@dataclass
class IndexReport:
    """What one ``index`` run did."""

    store: str
    n_datasets: int
    n_maps: int
    n_new: int
    n_changed: int
    n_unchanged: int
    n_removed: int
    n_problems: int  # files or datasets that could not be used (errors and warnings)
    n_kept_datasets: int
    seconds: float
    problem_codes: dict[str, int] = field(default_factory=dict)
    passed_over: dict[str, int] = field(default_factory=dict)  # image files no naming took, by name ending
    n_notes: int = 0  # caveats (info rows of problems), and the passed-over files' rows
    note_codes: dict[str, int] = field(default_factory=dict)
    n_touched: int = 0  # of the unchanged: read again (new size or time) and found the same content
    n_not_present: int = 0  # annexed maps whose content is not fetched (rows from their keys)
    n_no_sha256: int = 0  # of those, keys of a backend that names no SHA-256 (DataLad's default MD5E)
    n_unread: int = 0  # of the new and changed maps, the ones not present (nothing was read)

    @property
    def n_passed_over(self) -> int:
        return sum(self.passed_over.values())

    def summary(self) -> str:
        read = self.n_new + self.n_changed + self.n_touched - self.n_unread
        rate = read / self.seconds if self.seconds > 0 else 0.0
        touched = f" ({self.n_touched} touched: new timestamps, same content)" if self.n_touched else ""
        lines = [
            f"store: {self.store}",
            f"datasets: {self.n_datasets}   maps: {self.n_maps}   "
            f"(new {self.n_new}, changed {self.n_changed}, unchanged {self.n_unchanged}{touched}, "
            f"removed {self.n_removed})",
            f"read {read} file{'' if read == 1 else 's'} in {self.seconds:.2f} s ({rate:,.0f} maps/s)",
        ]
        if self.n_not_present:
            known = "the SHA-256 and size" if not self.n_no_sha256 else \
                "the size (and, for SHA256 keys, the SHA-256)" if self.n_no_sha256 < self.n_not_present else \
                "the size (their keys' backend names no SHA-256: the hash comes with the content)"
            lines.append(f"not present: {self.n_not_present} annexed map(s) whose content is not fetched; their rows "
                         f"hold {known} their git-annex keys give, and header facts once fetched (index --fetch "
                         "gets just the maps)")
        if self.n_kept_datasets:
            lines.append(f"kept {self.n_kept_datasets} dataset(s) from earlier runs, not under these roots")
        if self.passed_over:
            top = ", ".join(f"*{k} x{v}" for k, v in sorted(self.passed_over.items(), key=lambda kv: -kv[1])[:4])
            lines.append(f"passed over {self.n_passed_over} image file(s) that no naming takes ({top}); a name rule "
                         "would take them: see SELECT path, remedy FROM problems WHERE code = 'unmatched-images'")
        if self.n_problems:
            codes = ", ".join(f"{k} x{v}" for k, v in sorted(self.problem_codes.items()))
            lines.append(f"problems: {self.n_problems} ({codes}); see: mapstore sql --store {self.store} "
                         "\"SELECT * FROM problems WHERE level <> 'info'\"")
        notes = {k: v for k, v in self.note_codes.items() if k != "unmatched-images"}
        if notes:
            lines.append(f"notes: {sum(notes.values())} ({', '.join(f'{k} x{v}' for k, v in sorted(notes.items()))})")
        return "\n".join(lines)


def map_id_for(dataset_key: str, relpath: str) -> str:
    """Stable id of a map: a hash of its dataset identity and its path in the dataset."""
    return hashlib.sha256(f"{dataset_key}\n{relpath}".encode()).hexdigest()[:16]


def probe_file(path: str, cache: dict[bytes, dict[str, Any]] | None = None, progress=None,
               max_bytes: int = MAX_MAP_MB << 20) -> tuple[dict[str, Any], str, int] | Problem:
    """Hash one file and parse its header from the same read.

    Returns the header columns (shared between files with byte-identical headers
    through ``cache``; do not modify), the SHA-256 and the size, or a Problem.
    """
    try:
        dig = digest_file(path, progress=progress)
    except FileNotFoundError:
        return Problem(path, "missing-file", "file vanished during the crawl", "index again")
    except OSError as exc:
        return Problem(path, "unreadable", f"cannot read file ({exc.strerror})", "check permissions")
    try:
        prefix = header_prefix(path, dig.head)
        # maps of one study usually share byte-identical headers: parse each header once
        key = prefix[:NIFTI1_SIZE] if prefix[:4] in _N1_SIZES else prefix[:NIFTI2_SIZE]
        cols = cache.get(key) if cache is not None else None
        if cols is None:
            facts = parse_header(path, prefix)
            if not facts.single_file:
                return Problem(path, "pair-header", "a NIfTI pair header (magic ni1/ni2): the voxels are in a "
                               "separate .img file", "convert the .hdr/.img pair to a single .nii(.gz) file, "
                               "for example with nibabel", stage="header")
            # a bucket AFNI wrote as NIfTI: (x, y, z, 1, bricks) with its attributes in an extension
            bucket = afni_extension(path, facts.n_volumes) if facts.n_volumes > 1 and facts.vox_offset > 352 \
                else None
            refused = _not_a_map(path, facts) if bucket is None else None
            if refused is not None:
                return refused
            cols = _header_columns(facts)
            if bucket is not None:
                cols.update(_map_names=list(bucket[0]), _bricks=list(bucket[1]), _afni=True)
            elif cache is not None:  # headers with extensions are not shared: the extension is not in the key
                cache[key] = cols
    except HeaderError as exc:
        return Problem(path, exc.code, exc.reason, exc.remedy, stage="header")
    if cols["_data_nbytes"] > max_bytes:
        return _too_large(path, cols["_data_nbytes"], max_bytes)
    if dig.head[:2] != b"\x1f\x8b" and dig.nbytes < cols["vox_offset"] + cols["_data_nbytes"]:
        return Problem(path, "truncated-data",
                       f"file has {dig.nbytes} bytes, header promises {cols['vox_offset'] + cols['_data_nbytes']}",
                       "the file was cut short; re-create or re-download it", stage="header")
    return cols, dig.sha256, dig.nbytes


def _failed_read(path: str, exc: Exception) -> Problem:
    """The problem row of a file whose header could not be read: gone, damaged, or unreadable."""
    if isinstance(exc, HeaderError):
        return Problem(path, exc.code, exc.reason, exc.remedy, stage="header")
    if isinstance(exc, FileNotFoundError):
        return Problem(path, "missing-file", "file vanished during the crawl", "index again")
    return Problem(path, "unreadable", f"cannot read file ({getattr(exc, 'strerror', None) or exc})",
                   "check permissions")


def _too_large(path: str, declared: int, limit: int) -> Problem:
    return Problem(path, "map-too-large", f"the header declares {declared:,} bytes of voxel data, more than the "
                   f"{limit >> 20:,} MiB a map may hold (a damaged header, or a compressed bomb); not read",
                   "re-create the file; if it is a real map this large, index with a larger --max-map-mb",
                   stage="header")


def probe_foreign(path: str, progress=None, max_bytes: int = MAX_MAP_MB << 20,
                  entities: dict[str, str] | None = None) -> tuple[dict[str, Any], str, int] | Problem:
    """Hash a map of another format (both files of a two-file one) and read its header through nibabel."""
    try:
        info = read_foreign_header(path)
        if info.facts.data_nbytes > max_bytes:
            return _too_large(path, info.facts.data_nbytes, max_bytes)
        dig = digest_map(path, progress=progress)
    except (HeaderError, OSError) as exc:
        return _failed_read(path, exc)
    if info.surface_vertices is not None:
        return _surface_overlay(path, info, dig, entities or {})
    refused = _not_a_map(path, info.facts)
    if refused is not None:
        return refused
    cols = _header_columns(info.facts)
    cols.update(file_format=info.file_format, _map_names=list(info.map_names), _bricks=list(info.statistics))
    return cols, dig.sha256, dig.nbytes


_FS_HEMI = re.compile(r"(?:^|/)(lh|rh)(?:\.|/|$)")


def _surface_overlay(path: str, info, dig, entities: dict[str, str]) -> tuple[dict[str, Any], str, int] | Problem:
    """A FreeSurfer surface overlay (values per vertex in an MGH file): a surface map on the mesh its vertex
    count names, its hemisphere from the hemi entity or FreeSurfer's lh./rh. naming."""
    n = int(info.surface_vertices)
    shape = info.facts.shape
    n_maps = math.prod(shape[3:]) if len(shape) > 3 else 1
    if n_maps > 1:
        return Problem(path, "too-many-dimensions", f"a surface overlay of {n_maps} frames: a statistic map is one",
                       "save one frame per file", stage="header")
    hits = _FS_HEMI.findall(path.replace(os.sep, "/"))
    side = entities.get("hemi") or ({"lh": "L", "rh": "R"}[hits[-1]] if hits else None)
    if side not in ("L", "R"):
        return Problem(path, "unknown-hemisphere", f"a surface overlay of {n} vertices whose hemisphere nothing "
                       "names", "put it under a folder named lh.* or rh.* (FreeSurfer's naming), or name it hemi-L "
                       "or hemi-R", stage="header")
    space, den = _mesh_name(entities.get("space"), entities.get("den"), n, "gifti")
    cols = _header_columns(info.facts)
    cols.update(shape=[n], n_volumes=1, affine=None, voxel_size=None, orientation=None, affine_source=None,
                geometry="surface", n_vertices=n, structures={"L": "CortexLeft", "R": "CortexRight"}[side],
                grid_id=surface_grid_id(f"gifti|{n}", space, den, side), file_format=info.file_format, _hemi=side)
    return cols, dig.sha256, dig.nbytes


def _not_a_map(path: str, facts: HeaderFacts) -> Problem | None:
    """A header that cannot hold a statistic map: refused at once, not when a feature set reads it."""
    if facts.dtype not in REAL_SCALAR_DTYPES:
        return Problem(path, "not-real-valued", f"the voxels are {facts.dtype} (not real numbers): a statistic map "
                       "holds one real value per voxel", "save the magnitude or the real part as a float32 map",
                       stage="header")
    extra = facts.shape[4:]
    if any(d > 1 for d in extra):
        return Problem(path, "too-many-dimensions", f"a {len(facts.shape)}-D image of shape {facts.shape}: a "
                       "statistic map is 3-D (or 4-D: the volumes of one contrast)", "split it into one 3-D "
                       "(or 4-D) map per file", stage="header")
    return None


def _header_columns(facts: HeaderFacts) -> dict[str, Any]:
    return {
        "nifti_version": facts.nifti_version, "endianness": facts.endianness,
        "shape": list(facts.shape), "n_volumes": facts.n_volumes, "dtype": facts.dtype,
        "bitpix": facts.bitpix, "vox_offset": facts.vox_offset,
        "scl_slope": facts.scl_slope, "scl_inter": facts.scl_inter,
        "intent_code": facts.intent_code, "intent_name": facts.intent_name,
        "intent_p1": facts.intent_p1,
        "qform_code": facts.qform_code, "sform_code": facts.sform_code,
        "affine_source": facts.affine_source, "affine": list(facts.affine),
        "voxel_size": list(facts.voxel_size), "orientation": facts.orientation,
        "grid_id": facts.grid_id, "descrip": facts.descrip, "header_warnings": list(facts.warnings),
        "_data_nbytes": facts.data_nbytes, "geometry": "volume", "n_vertices": None, "structures": None,
        "file_format": f"nifti{facts.nifti_version}" if facts.nifti_version else None,
    }


_FSAVERAGE_BY_COUNT = {10 * 4 ** k + 2: f"fsaverage{k}" for k in range(3, 7)} | {163842: "fsaverage"}


def _mesh_name(space: str | None, den: str | None, n_vertices: int, fmt: str) -> tuple[str | None, str | None]:
    """(space, den) naming a GIFTI map's mesh: an fsaverage map named only by its vertex count (nilearn's
    ``den-10242``, no space) and one named ``space-fsaverage5`` are on the same mesh."""
    if fmt == "gifti" and n_vertices in _FSAVERAGE_BY_COUNT and (not space or space.startswith("fsaverage")) \
            and (not den or den == str(n_vertices)):
        return _FSAVERAGE_BY_COUNT[n_vertices], None
    return space, den


_SIDE = {"CortexLeft": "L", "CortexRight": "R", "CORTEX_LEFT": "L", "CORTEX_RIGHT": "R"}


def probe_surface_file(path: str, entities: dict[str, str], progress=None, max_bytes: int = MAX_MAP_MB << 20
                       ) -> tuple[dict[str, Any], str, int] | Problem:
    """Hash one GIFTI or CIFTI-2 file and read its header facts (no value decoded).

    Returns header columns (with ``_hemi``, the hemisphere the file says it holds), the SHA-256
    and the size, or a Problem.
    """
    try:
        dig = digest_file(path, progress=progress)
        facts = read_surface_header(path)
    except (HeaderError, OSError) as exc:
        return _failed_read(path, exc)
    declared = facts.n_vertices * facts.n_volumes * max(1, (facts.bitpix or 32) // 8)
    if declared > max_bytes:
        return _too_large(path, declared, max_bytes)
    hemi, space, den = entities.get("hemi"), entities.get("space"), entities.get("den")
    warnings = list(facts.warnings)
    side = _SIDE.get(facts.structure or "")
    if facts.format == "gifti":
        want = expected_vertices(space, den)
        if want is not None and facts.n_vertices != want:
            warnings.append(f"{facts.n_vertices} vertices, but space-{space}{f'_den-{den}' if den else ''} "
                            f"has {want} per hemisphere")
        if hemi and side and hemi != side:
            warnings.append(f"named hemi-{hemi}, but the file says AnatomicalStructurePrimary={facts.structure}")
        if not hemi and side is None:
            return Problem(path, "unknown-hemisphere", "a GIFTI map with no hemi entity and no "
                           "AnatomicalStructurePrimary: its hemisphere is unknown",
                           "name it with hemi-L or hemi-R (…_hemi-L_space-fsaverage5_…_statmap.func.gii)",
                           stage="header")
    cols = {
        "nifti_version": facts.nifti_version, "endianness": facts.endianness, "shape": list(facts.shape),
        "n_volumes": facts.n_volumes, "dtype": facts.dtype, "bitpix": facts.bitpix, "vox_offset": facts.vox_offset,
        "scl_slope": facts.scl_slope, "scl_inter": facts.scl_inter, "intent_code": facts.intent_code,
        "intent_name": facts.intent_name, "intent_p1": None, "qform_code": None, "sform_code": None,
        "affine_source": None, "affine": None, "voxel_size": None, "orientation": None,
        "grid_id": surface_grid_id(facts.geometry_key, *_mesh_name(space, den, facts.n_vertices, facts.format),
                                   None if facts.format == "cifti" else hemi or side),
        "descrip": facts.descrip, "header_warnings": warnings,
        "geometry": "surface" if facts.format == "gifti" else "grayordinates",
        "n_vertices": facts.n_vertices, "structures": facts.structure, "_hemi": side,
        "file_format": "gifti" if facts.format == "gifti" else "cifti2",
        "_map_names": list(facts.map_names),
    }
    return cols, dig.sha256, dig.nbytes


def _to_float(v: Any) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f


def _participants_table(rows: list[dict[str, Any]]) -> pa.Table:
    """Union of participants columns; a column is numeric when every value parses as a number."""
    fixed = ["dataset", "participant_id", "sub", "participant"]
    extra: list[str] = []
    for r in rows:
        for k in r:
            if k not in fixed and k not in extra:
                extra.append(k)
    cols: dict[str, pa.Array] = {k: pa.array([r.get(k) for r in rows], pa.string()) for k in fixed}
    for k in extra:
        vals = [r.get(k) for r in rows]
        present = [v for v in vals if v is not None]
        if present and all(_to_float(v) is not None for v in present):
            if all(float(v).is_integer() and "." not in str(v) for v in present):
                cols[k] = pa.array([None if v is None else int(float(v)) for v in vals], pa.int64())
            else:
                cols[k] = pa.array([None if v is None else float(v) for v in vals], pa.float64())
        else:
            cols[k] = pa.array(vals, pa.string())
    return pa.table(cols)


def _under(path: str, roots: list[Path]) -> bool:
    return any(inside(path, r) for r in roots)


@dataclass
class _Unit:
    """One piece of crawl work: a dataset, or some of its top-level folders; it writes one part."""

    ds: DatasetInfo
    parser: EntityParser
    top: list[str] | None
    root_maps: bool
    by_sub: dict[str, dict[str, Any]]
    rules: NameRules
    overrides: MetadataOverrides
    key: str  # stable across runs while the dataset's top folders stay the same
    inputs: str  # digest of what the rows depend on beyond the unit's files
    store: str
    prev_part: CatalogPart | None = None  # this unit's part in the previous snapshot
    prev_files: list[str] = field(default_factory=list)  # the dataset's previous parts, for reusing headers
    read_timeout: float | None = None
    transforms: tuple[str, ...] = ()  # folders of registrations given by the user
    max_map_bytes: int = 0  # a map whose header declares more voxel bytes is refused (0: the default)


@dataclass
class _UnitResult:
    part: CatalogPart | None  # None: the unit found no maps
    problems: list[Problem]
    new: int
    changed: int
    unchanged: int  # touched ones included
    reused: bool
    touched: int = 0  # read again for a new size or time, content the same
    unread: int = 0  # of the new and changed: annexed maps not fetched, rows from their keys


# problems that may go away without a file changing: a unit that had one is always crawled again
_NOT_REUSED_LEVEL = "error"


def _previous_rows(unit: _Unit) -> pa.Table | None:
    """Rows of the previous snapshot this unit may reuse (header facts of unchanged files)."""
    if unit.prev_part is not None:
        files = [os.path.join(unit.store, unit.prev_part.maps)]
    else:
        files = unit.prev_files
    if not files:
        return None
    import pyarrow.compute as pc

    cols = ["relpath", "dataset", "map_index", "map_name", "annex_key", *_HEADER_COLUMNS]
    try:
        t = pa.concat_tables([_read_columns(f, cols) for f in files])
    except (OSError, pa.ArrowException):
        return None  # not reusable: the files are read again
    t = t.filter(pc.equal(t["dataset"], unit.ds.key))
    if unit.top is not None and unit.prev_part is None:
        first = pc.list_element(pc.split_pattern(t["relpath"], "/", max_splits=1), 0)
        keep = pc.is_in(first, pa.array(unit.top, pa.string()))
        if unit.root_maps:
            keep = pc.or_(keep, pc.invert(pc.match_substring(t["relpath"], "/")))
        t = t.filter(keep)
    return t


def _read_columns(path: str, cols: list[str]) -> pa.Table:
    """``cols`` of a maps part; columns it predates are null."""
    f = pq.ParquetFile(path)
    have = [c for c in cols if c in f.schema_arrow.names]
    t = f.read(columns=have)
    fields = {x.name: x for x in MAPS_SCHEMA}
    return pa.Table.from_arrays([t[c].cast(fields[c].type) if c in have else pa.nulls(t.num_rows, fields[c].type)
                                 for c in cols], names=cols)


_STATIC_HEADER = tuple(c for c in _HEADER_COLUMNS if c not in ("sha256", "nbytes", "mtime_ns"))
_SIDECAR_COLUMNS = ("metadata", "sidecars")
# every other maps column is set per row by _RowBuilder.add: a new column is one edit in tables.py
# plus its value there (a column without one fails the first index loudly)
_PER_ROW = tuple(f.name for f in MAPS_SCHEMA if f.name not in _STATIC_HEADER and f.name not in _SIDECAR_COLUMNS)
_ROW_TUPLE = operator.itemgetter(*_PER_ROW)


def _run_unit(unit: _Unit) -> _UnitResult:
    """Crawl one unit and write its part (or keep the previous one when nothing it reads changed).

    Header facts and sidecar metadata repeat across a study's maps, so each distinct
    value is built once and the columns are gathered with one Arrow ``take``.
    """
    with ReadDeadline(unit.read_timeout) as deadline:
        enabled = gc.isenabled()
        gc.disable()  # rows are tuples of strings (no cycles); collections over a growing heap cost O(n^2)
        try:
            result = _crawl_unit(unit, deadline)
        finally:
            if enabled:
                gc.enable()
    die_once_for_tests()  # a worker lost after writing its part: the part is an orphan, the unit runs again
    return result


def _crawl_unit(unit: _Unit, deadline: ReadDeadline) -> _UnitResult:
    fingerprint = hashlib.sha256(unit.inputs.encode())
    prev_part = unit.prev_part
    if not unit.rules.rules and prev_part is not None and prev_part.digest is not None:
        # a warm run: the walk's listing (a scandir and a stat per file) decides before anything is parsed
        listing = fingerprint.copy()
        walk_dataset(unit.ds, unit.parser, unit.rules, unit.top, unit.root_maps, listing, unit.ds.exclude,
                     listing_only=True)
        if prev_part.digest == listing.hexdigest() and _part_files_exist(unit):
            return _UnitResult(prev_part, _read_problems(unit.store, prev_part), 0, 0, prev_part.rows, True)
    maps, jsons, problems = walk_dataset(unit.ds, unit.parser, unit.rules, unit.top, unit.root_maps, fingerprint,
                                         unit.ds.exclude)
    digest = None if unit.rules.rules or any(p.level == _NOT_REUSED_LEVEL for p in problems) \
        else fingerprint.hexdigest()
    rows = _RowBuilder(unit, jsons, problems, deadline)
    for m in maps:
        rows.add(m)
    table = rows.table()
    problems = rows.all_problems()
    if any(p.level == _NOT_REUSED_LEVEL for p in problems) or rows.native:
        digest = None  # a native map's registration may change outside the unit's files
    part = _write_part(unit, table, problems, digest)
    return _UnitResult(part, problems, rows.new, rows.changed, rows.unchanged + rows.touched, False, rows.touched,
                       rows.unread)


class _RowBuilder:
    """The maps rows of one unit, one tuple per map, with repeated values built once.

    Header facts and sidecar metadata repeat across a study's maps: each distinct value is
    kept once (``headers``, ``sidecars``) and rows point at it (``hidx``, ``sidx``), so the
    columns are gathered with one Arrow ``take`` at the end.  Unchanged files (same size and
    mtime as in the previous part) take their hash and header from it.
    """

    def __init__(self, unit: _Unit, jsons: dict[str, list[str]], problems: list[Problem],
                 deadline: ReadDeadline) -> None:
        self.unit, self.ds, self.deadline = unit, unit.ds, deadline
        self.problems = problems
        self.resolver = SidecarResolver(unit.ds, jsons, unit.parser)
        self.model = ModelFiles(unit.ds, jsons, unit.parser)
        self.prev_table = _previous_rows(unit)
        pt = self.prev_table
        self.pcol = {c: pt[c].to_pylist() for c in ("relpath", "nbytes", "mtime_ns", "sha256", "intent_code",
                                                    "intent_p1", "descrip", "geometry", "structures", "n_volumes",
                                                    "map_index", "map_name", "annex_key")
                     } if pt is not None and pt.num_rows else {}
        self.prev = {r: i for i, r in enumerate(self.pcol.get("relpath", []))}
        # the map names of the previous rows of files of several maps, by file
        self.prev_names: dict[str, dict[int, str]] = {}
        for r, i, n in zip(self.pcol.get("relpath", []), self.pcol.get("map_index", []),
                           self.pcol.get("map_name", [])):
            if i is not None:
                self.prev_names.setdefault(r, {})[i] = n or ""
        self.cache: dict[bytes, dict[str, Any]] = {}
        self.rows: list[tuple] = []
        self.headers: list[dict[str, Any]] = []
        self.header_pos: dict[Any, int] = {}
        self.sidecars: list[dict[str, Any]] = []
        self.sidecar_pos: dict[tuple, int] = {}
        self.hidx: list[int] = []
        self.sidx: list[int] = []
        self.origins: dict[str | None, dict[str, Any]] = {}
        self.mask_sha: dict[str, str | None] = {}
        self.new = self.changed = self.unchanged = self.touched = self.absent = self.unread = 0
        self.native = 0  # native-space maps: their registration lives outside the unit's files
        self.registrations = RegistrationFinder(unit.ds.root, unit.ds.source_roots, unit.transforms)
        self.layouts = LayoutReader(unit.ds.root, unit.ds.key, jsons, unit.ds.index_root)
        over = unit.overrides
        self.levels_given = any("level" in v for v in (*over.datasets.values(), *over.subjects.values()))

    def _header(self, m) -> tuple[dict[str, Any], str, int, int] | None:
        """Header columns, sha256, size and header position of a map (None, with a problem, when it cannot
        be read).  The position is >= 0 in ``headers``, or -1 - i for row i of the previous table."""
        pcol = self.pcol
        old = self.prev.get(m.relpath)
        if not m.present:
            return self._not_present(m, old)
        # an AFNI bucket's sub-bricks take their statistics from its header: read again
        if old is not None and pcol["nbytes"][old] == m.nbytes and pcol["mtime_ns"][old] == m.mtime_ns \
                and m.entities.get("extension") != ".head" and not (
                    pcol["map_index"][old] is not None and pcol["geometry"][old] in (None, "volume")):
            self.unchanged += 1
            return self._previous(m, old)
        try:
            with self.deadline.armed():
                limit = self.unit.max_map_bytes or MAX_MAP_MB << 20
                if surface_format(m.path):
                    res = probe_surface_file(m.path, m.entities, self.deadline.progress, limit)
                elif foreign_format(m.path):
                    res = probe_foreign(m.path, self.deadline.progress, limit, m.entities)
                else:
                    res = probe_file(m.path, self.cache, self.deadline.progress, limit)
        except ReadTimeout:
            res = Problem(m.path, "read-timeout", f"reading the file made no progress for "
                          f"{self.unit.read_timeout:g} s (a stalled network or FUSE mount, or a file fetched on "
                          "access?); it was skipped", "make the file readable (fetch it, check the mount), then "
                          "index again; --read-timeout sets the deadline")
        if isinstance(res, Problem):
            self.problems.append(Problem(res.path, res.code, res.reason, res.remedy, res.level, self.ds.key,
                                         res.stage))
            return None
        hdr = res[0]
        if m.annex is not None and m.annex.sha256 and res[1] != m.annex.sha256:
            # git-annex fetched (or someone replaced) content that is not what the key names
            self.problems.append(Problem(m.path, "annex-content-mismatch", f"its content's SHA-256 {res[1][:12]}... "
                                         f"is not the one its git-annex key names ({m.annex.sha256[:12]}...); it "
                                         "was not indexed", "fetch it again ('git annex fsck' on it finds and drops "
                                         "bad copies), then index again", "error", self.ds.key))
            return None
        if old is None:
            self.new += 1
        elif res[1] == pcol["sha256"][old]:  # a new time (a copy, a restore, a touch), the same content
            self.touched += 1
        else:
            self.changed += 1
        key = id(hdr)  # probe_file shares one dict per distinct header
        pos = self.header_pos.get(key)
        if pos is None:
            pos = self.header_pos[key] = len(self.headers)
            self.headers.append(hdr)
        return (*res, pos)

    def _previous(self, m, old: int) -> tuple[dict[str, Any], str, int, int]:
        """The header facts, sha256 and size row ``old`` of the previous part holds for map ``m``."""
        pcol = self.pcol
        n = pcol["n_volumes"][old] or 1
        names = self.prev_names.get(m.relpath, {})
        return ({"intent_code": pcol["intent_code"][old], "intent_p1": pcol["intent_p1"][old],
                 "descrip": pcol["descrip"][old], "geometry": pcol["geometry"][old], "n_volumes": n,
                 "_map_names": [names.get(i, "") for i in range(n)],
                 "_hemi": _SIDE.get(pcol["structures"][old] or "")}, pcol["sha256"][old], pcol["nbytes"][old],
                -1 - old)

    def _not_present(self, m, old: int | None) -> tuple[dict[str, Any], str, int, int] | None:
        """An annexed map whose content is not fetched: a row from its key (sha256 and size where the
        key gives them), with the header facts of the last read of the same content when there was one."""
        pcol, key = self.pcol, m.annex
        self.absent += 1
        # the same content as the last read: its key then, or the SHA-256 its key names
        same = old is not None and pcol["sha256"][old] is not None and (
            pcol["annex_key"][old] == key.key or (bool(key.sha256) and pcol["sha256"][old] == key.sha256))
        if old is None:
            self.new += 1
        elif same:
            self.unchanged += 1
        else:
            self.changed += 1
        self.unread += not same
        if same:  # the same content was read before: its facts still hold
            return self._previous(m, old)
        low = m.relpath.lower()
        geometry = "grayordinates" if ".dscalar.nii" in low or ".dtseries.nii" in low else \
            "surface" if low.endswith(".gii") else "volume"
        hdr: dict[str, Any] = {"geometry": geometry}
        pos = self.header_pos.get(geometry)
        if pos is None:
            pos = self.header_pos[geometry] = len(self.headers)
            self.headers.append(hdr)
        return self.headers[pos], key.sha256 or "", key.size if key.size is not None else m.nbytes, pos

    def _model_mask(self, m, surface: bool = False) -> tuple[str | None, str | None]:
        rel = m.extras.get("mask") or self.model.mask_for(m.relpath, m.entities, surface)
        if rel is not None and rel not in self.mask_sha:
            self.mask_sha[rel] = _mask_digest(self.ds, rel, self.problems)
        sha = self.mask_sha.get(rel) if rel else None
        return (rel, sha) if sha is not None else (None, None)

    def add(self, m) -> None:
        got = self._header(m)
        if got is None:
            return
        hdr, sha, nbytes, hpos = got
        ds = self.ds
        given = m.entities.pop("level", None)
        if given is None and self.levels_given:  # an origins file that sets levels
            given = self.unit.overrides.apply(ds.key, m.entities.get("sub"), {}).get("level")
        if given is not None and given not in LEVELS:
            self.problems.append(Problem(m.path, "bad-level", f"level {given!r} (from a name rule or the origins "
                                         f"file) is not one of {', '.join(LEVELS)}; the layout's level is used",
                                         "write one of " + ", ".join(LEVELS), "warning", ds.key))
            given = None
        place = self.layouts.facts(m.relpath, m.entities, given)
        m.entities.update(place.entities)
        self.problems.extend(place.problems)
        meta, used, meta_json = self.resolver.resolve_full(m.relpath, m.entities)
        skey = (meta_json, *used)
        spos = self.sidecar_pos.get(skey)
        if spos is None:
            spos = self.sidecar_pos[skey] = len(self.sidecars)
            self.sidecars.append({"metadata": meta_json, "sidecars": used})
        file_row = self._file_row(m, hdr, sha, nbytes, meta, used)
        if file_row["dof"] is None and place.dof is not None:
            file_row.update(dof=place.dof, dof_source=place.dof_source)
        if file_row["dof_numerator"] is None and place.dof_numerator is not None and m.entities.get("stat") == "F":
            file_row["dof_numerator"] = place.dof_numerator
        n_inputs = place.n_inputs
        if n_inputs is None and place.level == "group":
            n_inputs = self.model.design_rows(m.relpath, m.entities)
        file_row.update(level=place.level, n_inputs=n_inputs, group_contrast=place.group_contrast)
        maps = maps_in_file(m.path, m.entities, hdr)
        afni = m.entities.get("extension") == ".head" or bool(hdr.get("_afni"))
        bricks = hdr.get("_bricks") if afni else None
        for index, name in maps:
            row = file_row if len(maps) == 1 else dict(file_row)
            row.update(map_index=index, map_name=name)
            if afni:  # a sub-brick: its label and statistic code say what it is
                if not self._afni_brick(m, row, index, (hdr.get("_map_names") or [""])[index or 0],
                                        (bricks or [])[index or 0] if bricks and (index or 0) < len(bricks) else (0, ())):
                    continue
            elif index is not None:  # one map of several: its name may give entities the file name lacks
                ents = {**entities_from_map_name(name, m.path), **m.entities}
                row.update({c: ents.get(c) for c in _ENTITY_COLUMNS if c != "hemi"})
                row["map_id"] = map_id_for(ds.key, f"{m.relpath}#{index}")
                row["entities"] = json.dumps({k: v for k, v in ents.items() if k not in ("suffix", "extension")},
                                             sort_keys=True)
                if ents.get("sub") and not m.entities.get("sub") and not given:
                    # stacked subjects' maps in one file (named sub-XX): each is that subject's
                    row.update(level=level_from_entities(ents), n_inputs=None)
            kind = stat_kind(row["stat"])
            row["map_kind"] = "contrast" if row["contrast"] and (kind is None or kind.role == "contrast") else "model"
            origin = self.origins.get(row["sub"])
            if origin is None:
                origin = self.origins[row["sub"]] = _origin(ds, row["sub"], self.unit.by_sub, self.unit.overrides)
            lab = origin["lab"]
            if lab is None and meta.get("InstitutionName") is not None:
                lab = str(meta["InstitutionName"])
            row.update(participant=origin["participant"], study=origin["study"], site=origin["site"], lab=lab)
            self.hidx.append(hpos)
            self.sidx.append(spos)
            self.rows.append(_ROW_TUPLE(row))

    def _afni_brick(self, m, row: dict[str, Any], index: int | None, label: str,
                    stat: tuple[int, tuple[float, ...]]) -> bool:
        """Fill one AFNI sub-brick's row from its label and statistic code; False (with a note) for a brick
        whose statistic nothing names."""
        info = afni_brick(label, *stat)
        kinds = kinds_for_intent(info.get("intent"))
        word = kind_for_word(info.get("word"))
        label_stat = kinds[0] if kinds else word.label if word else m.entities.get("stat")
        if not label_stat:
            self.problems.append(Problem(f"{m.path}[{index or 0}]", "unknown-stat", f"sub-brick {index or 0} "
                                         f"({label or 'no label'}) has no statistic code and its label names no "
                                         "statistic; it was passed over", "label it (3drefit -sublabel) with a "
                                         "statistic word (Coef, Tstat, Fstat, Zscr), or index it with a name rule",
                                         "info", self.ds.key))
            return False
        contrast = m.entities.get("contrast") or info.get("contrast")
        ents = {**m.entities, "stat": label_stat, **({"contrast": contrast} if contrast else {})}
        row.update({c: ents.get(c) for c in _ENTITY_COLUMNS if c != "hemi"})
        row["map_index"] = index
        if index is not None:
            row["map_id"] = map_id_for(self.ds.key, f"{m.relpath}#{index}")
        row["entities"] = json.dumps({k: v for k, v in ents.items() if k not in ("suffix", "extension")
                                      and v is not None}, sort_keys=True)
        if info.get("dof"):
            row.update(dof=float(info["dof"]), dof_source="afni-statistic")
        if info.get("dof_numerator"):
            row["dof_numerator"] = float(info["dof_numerator"])
        return True

    def _file_row(self, m, hdr: dict[str, Any], sha: str, nbytes: int, meta: dict[str, Any], used: list[str]
                  ) -> dict[str, Any]:
        """The columns a file's maps share (entities, origin and map columns are set per map)."""
        ds, ents = self.ds, m.entities
        volume = hdr.get("geometry") in (None, "volume")
        # a volume's model mask is a NIfTI, a surface map's a GIFTI of its hemisphere (CIFTI: none)
        mask_rel, msha = self._model_mask(m, not volume) if hdr.get("geometry") != "grayordinates" else (None, None)
        dof, dof_source = _degrees_of_freedom(m, meta, used, hdr, self.model, self.problems)
        get = ents.get
        kind = space_kind(get("space"), ds.root, m.relpath)
        reg, why = None, ""
        if kind == "native" and volume:
            self.native += 1
            reg, why = self.registrations.find(get("space"), get("sub"), get("ses"), ds.root, m.relpath)
            if reg is None:
                self.problems.append(Problem(m.path, "no-registration", why, "give the folder holding the "
                                             "subject's registration to a template with --transforms (index), or "
                                             "index the map written in template space", "warning", ds.key))
        row = {c: get(c) for c in _ENTITY_COLUMNS}
        if not volume and row["hemi"] is None and hdr.get("_hemi"):
            row["hemi"] = hdr["_hemi"]  # GIFTI's AnatomicalStructurePrimary, where the name has no hemi
        row.update(
            map_id=map_id_for(ds.key, m.relpath), dataset=ds.key, relpath=m.relpath,
            suffix=get("suffix"), extension=get("extension"),
            entities=json.dumps({k: v for k, v in ents.items() if k not in ("suffix", "extension")}, sort_keys=True),
            named_by=m.named_by, sha256=sha or None, nbytes=nbytes, mtime_ns=m.mtime_ns, dof=dof, dof_source=dof_source,
            content="present" if m.present else "not-present", annex_key=m.annex.key if m.annex else None,
            model_mask=mask_rel, model_mask_sha256=msha, linked_map=None, space_kind=kind,
            dof_numerator=(descrip_f_dof(hdr.get("descrip")) or (None,))[0] if get("stat") == "F" else None,
            registration=registration_json(reg or ({"missing": why} if kind == "native" and volume else None)))
        return row

    def table(self) -> pa.Table:
        # one tuple per row while crawling, transposed into columns once
        rows = self.rows
        cols = dict(zip(_PER_ROW, (list(c) for c in zip(*rows)))) if rows else {c: [] for c in _PER_ROW}
        self.rows = []
        cols["linked_map"] = link_hemispheres(cols["relpath"], cols["hemi"], cols["map_id"], cols["map_index"])
        table = _assemble(cols, self.headers, self.hidx, self.sidecars, self.sidx, self.prev_table)
        return _f_ranks(table)

    def all_problems(self) -> list[Problem]:
        key = self.ds.key
        return [p if p.dataset else dataclasses.replace(p, dataset=key)
                for p in self.problems + self.resolver.problems]


_TIME_SERIES = 2001  # NIFTI_INTENT_TIME_SERIES (nifti1.h)
_SERIES_STATS = ("errorts",)  # nilearn's residuals: one volume or array per scan
_MAP_FILE_ENDINGS = (".dscalar.nii", ".func.gii", ".shape.gii", ".label.gii", ".nii.gz", ".nii", ".gii")
_ENTITY_TOKEN = re.compile(r"^([a-zA-Z]+)-((?:[^\W_]|[+.])+)$")
_NO_NAME = re.compile(r"^(#?\d*|map|column \d+)$", re.IGNORECASE)


def maps_in_file(path: str, entities: dict[str, str], hdr: dict[str, Any]) -> list[tuple[int | None, str | None]]:
    """(position, name) of each map of a file: one row per map for a CIFTI-2 dense-scalar file or a GIFTI
    file of several named data arrays, [(None, None)] for a file that is one map.

    A multi-volume NIfTI stays one row, and so do a GIFTI series (unnamed arrays, a time-series intent or
    nilearn's residuals: one array per scan) and the effect file of an F contrast (its volumes are the
    contrast's rows, not maps of their own; the F map is beside it).
    """
    n = hdr.get("n_volumes") or 1
    if n >= 2 and (hdr.get("file_format") == "afni" or hdr.get("_afni")):
        names = list(hdr.get("_map_names") or [])
        return [(i, names[i] if i < len(names) else "") for i in range(n)]  # an AFNI bucket: a map per sub-brick
    if n < 2 or hdr.get("geometry") in (None, "volume"):
        return [(None, None)]
    if entities.get("stat") == "effect" and "_stat-effect_" in path and \
            os.path.exists(path.replace("_stat-effect_", "_stat-F_")):
        return [(None, None)]
    names = list(hdr.get("_map_names") or [])
    names += [""] * (n - len(names))
    if hdr.get("geometry") == "surface" and (not any(names) or hdr.get("intent_code") == _TIME_SERIES
                                             or entities.get("stat") in _SERIES_STATS):
        return [(None, None)]
    return list(enumerate(names[:n]))


def entities_from_map_name(name: str | None, path: str) -> dict[str, str]:
    """The entities a map's name in a file of several maps gives: BIDS key-value pairs when it is a BIDS
    name (``sub-02_contrast-tools``: stacked subjects' maps), else the name as the contrast; nothing for
    an empty or numbered name or one that repeats the file's own name.

    >>> entities_from_map_name("sub-02_task-read_contrast-words_stat-t_statmap.dscalar.nii", "x")
    {'sub': '02', 'task': 'read', 'contrast': 'words', 'stat': 't'}
    >>> entities_from_map_name("faces minus houses", "x"), entities_from_map_name("#3", "x")
    ({'contrast': 'faces minus houses'}, {})
    >>> entities_from_map_name("BODY-AVG", "x"), entities_from_map_name("2BK-0BK", "x")
    ({'contrast': 'BODY-AVG'}, {'contrast': '2BK-0BK'})
    """
    text = (name or "").strip()
    for end in _MAP_FILE_ENDINGS:
        if text.endswith(end):
            text = text[:-len(end)]
            break
    base = os.path.basename(path)
    if not text or _NO_NAME.match(text) or base.startswith(text + "."):
        return {}
    tokens = text.split("_")
    pairs = [_ENTITY_TOKEN.match(t) for t in tokens]
    if pairs[0] is not None and all(p is not None for p in pairs[:-1]):  # the last may be a suffix
        found = {p.group(1): p.group(2) for p in pairs if p is not None}
        if all(k in _ENTITY_COLUMNS for k in found):  # BODY-AVG is a contrast, not an entity BODY
            return found
    return {"contrast": text}


_HEMI_IN_NAME = re.compile(r"(?<=[_/])hemi-[LR](?=_)|^hemi-[LR](?=_)|(?<=/)[lr]h(?=[./])|^[lr]h(?=[./])")


def _f_ranks(table: pa.Table) -> pa.Table:
    """An F map's numerator DOF, where its header gave none (SPM's description does): the volumes of
    the effect map its writer left beside it (one per row of the F contrast, as nilearn's
    ``save_glm_to_bids`` writes them)."""
    stats = table["stat"].to_pylist()
    if "F" not in stats:
        return table
    rel = table["relpath"].to_pylist()
    vols = dict(zip(rel, table["n_volumes"].to_pylist()))
    out = []
    for r, s, have in zip(rel, stats, table["dof_numerator"].to_pylist()):
        n = vols.get(r.replace("_stat-F_", "_stat-effect_")) if s == "F" and "_stat-F_" in r else None
        out.append(have if have is not None else float(n) if n else None)
    i = table.schema.get_field_index("dof_numerator")
    return table.set_column(i, table.schema.field(i), pa.array(out, pa.float64()))


def link_hemispheres(relpaths: list[str], hemis: list[str | None], map_ids: list[str],
                     map_index: list[int | None] | None = None) -> list[str | None]:
    """For each map, the map_id of the other hemisphere of the same map (file names equal but for
    hemi-L/R; in files of several maps, the map at the same position).

    >>> link_hemispheres(["s/a_hemi-L_x", "s/a_hemi-R_x", "s/b"], ["L", "R", None], ["1", "2", "3"])
    ['2', '1', None]
    """
    by_key: dict[tuple[str, int | None], dict[str, int]] = {}
    index = map_index or [None] * len(relpaths)
    for i, (rel, hemi, k) in enumerate(zip(relpaths, hemis, index)):
        if hemi in ("L", "R") and _HEMI_IN_NAME.search(rel):
            by_key.setdefault((_HEMI_IN_NAME.sub("hemi-*", rel), k), {})[hemi] = i
    out: list[str | None] = [None] * len(relpaths)
    for pair in by_key.values():
        if len(pair) == 2:
            out[pair["L"]], out[pair["R"]] = map_ids[pair["R"]], map_ids[pair["L"]]
    return out


def _part_files_exist(unit: _Unit) -> bool:
    """The previous part can be kept only if its files are still there and sound (someone may have deleted
    or damaged them: a damaged part is written again, which is how ``index`` repairs a catalog)."""
    part = unit.prev_part
    for f in (part.maps, part.problems):
        if not f:
            continue
        path = os.path.join(unit.store, f)
        try:
            if not os.path.isfile(path) or pq.ParquetFile(path).metadata.num_rows < 0:
                return False
        except (OSError, pa.ArrowException):
            return False
    return True


def _part_name(unit: _Unit) -> str:
    return f"{PARTS_DIR}/{file_slug(unit.ds.key)}-{new_snapshot_id()}"


def _write_part(unit: _Unit, table: pa.Table, problems: list[Problem], digest: str | None) -> CatalogPart | None:
    """Write the unit's maps (sorted by path) and problems as new part files."""
    if table.num_rows == 0 and not problems:
        return None
    base = _part_name(unit)
    folder = Path(unit.store) / PARTS_DIR
    folder.mkdir(parents=True, exist_ok=True)
    table = table.sort_by([("relpath", "ascending"), ("map_index", "ascending")])
    write_parquet_atomic(table, Path(unit.store) / f"{base}.parquet", row_group_size=_ROW_GROUP)
    prob = None
    if problems:
        prob = f"{base}.problems.parquet"
        write_parquet_atomic(_problems_table(problems), Path(unit.store) / prob)
    return CatalogPart(unit.ds.key, unit.key, f"{base}.parquet", table.num_rows, prob, digest)


# row groups of this many rows: DuckDB skips a group whose statistics rule it out
_ROW_GROUP = 32768


def _problems_table(problems: list[Problem]) -> pa.Table:
    return pa.Table.from_pylist([p.row(PROBLEMS_SCHEMA) for p in problems], schema=PROBLEMS_SCHEMA)


def _read_problems(store: str, part: CatalogPart) -> list[Problem]:
    if not part.problems:
        return []
    rows = read_parquet(os.path.join(store, part.problems)).to_pylist()
    return [Problem(r["path"], r["code"], r["reason"], r["remedy"], r["level"], r["dataset"], r["stage"],
                    count=r.get("count") or 1) for r in rows]


# SPM writes the DOF of a T image into its header description: "SPM{T_[20.0]} - contrast 1: ...",
# and both of an F image's: "SPM{F_[2.0,20.0]} - ..." (numerator, then error DOF)
_NUM = r"\s*([0-9]+(?:\.[0-9]*)?(?:[eE][+-]?[0-9]+)?)\s*"
_DESCRIP_DOF = re.compile(r"\{T_\[" + _NUM + r"\]\}")
_DESCRIP_F = re.compile(r"\{F_\[" + _NUM + "," + _NUM + r"\]\}")


def descrip_f_dof(descrip: str | None) -> tuple[float, float] | None:
    """(df1, df2) of an F image from SPM's header description, or None.

    >>> descrip_f_dof("SPM{F_[2.0,96.0]} - contrast 2: effects of interest")
    (2.0, 96.0)
    """
    hit = _DESCRIP_F.search(descrip or "")
    return (float(hit.group(1)), float(hit.group(2))) if hit else None


def _degrees_of_freedom(m, meta: dict[str, Any], sidecars: list[str], hdr: dict[str, Any], model: ModelFiles,
                        problems: list[Problem]) -> tuple[float | None, str | None]:
    """A map's DOF from what the software left, first found wins.

    1. sidecar ``DegreesOfFreedom``; 2. header ``intent_p1`` of a t-test intent (nifti1.h);
    3. the design matrices beside the map (rows - rank); 4. a header description
    ``{T_[df]}`` (SPM); 5. a DOF text file named by a name rule (FSL's ``stats/dof``).
    A value that is not a positive number is a warning naming the file, and the next source
    is tried.
    """
    ds = m.dataset
    raw = meta.get("DegreesOfFreedom")
    if raw is not None:
        dof = _to_float(raw)
        if dof is not None and dof > 0 and math.isfinite(dof):
            return dof, "sidecar"
        where = os.path.join(ds.root, sidecars[-1]) if sidecars else m.path
        problems.append(Problem(m.path, "bad-dof", f"DegreesOfFreedom {raw!r} (in {where}) is not a positive "
                                "number; it was ignored", "write the number, e.g. \"DegreesOfFreedom\": 70",
                                "warning", ds.key))
    if hdr["intent_code"] == 3 and hdr["intent_p1"] and hdr["intent_p1"] > 0:
        return float(hdr["intent_p1"]), "header"
    dof, designs, why = model.design_dof(m.relpath, m.entities)
    if why:
        problems.append(Problem(m.path, "bad-design", why, "fix the design matrix (a TSV of numbers with a "
                                "header row)", "warning", ds.key))
    if dof is not None:
        return dof, "design"
    hit = _DESCRIP_DOF.search(hdr.get("descrip") or "")
    if hit:
        return float(hit.group(1)), "descrip"
    f_dof = descrip_f_dof(hdr.get("descrip"))
    if f_dof is not None:
        return f_dof[1], "descrip"
    dof_file = m.extras.get("dof_file")
    if dof_file:
        path = os.path.join(ds.root, dof_file)
        try:
            with open(path, encoding="utf-8") as fh:
                text = fh.read().strip()
        except OSError:
            return None, None
        dof = _to_float(text)
        if dof is not None and dof > 0 and math.isfinite(dof):
            return dof, "dof-file"
        problems.append(Problem(m.path, "bad-dof", f"the DOF file {path} holds {text[:40]!r}, not a positive "
                                "number; it was ignored", "write the number alone in the file", "warning", ds.key))
    return None, None


def _mask_digest(ds: DatasetInfo, rel: str, problems: list[Problem]) -> str | None:
    path = os.path.join(ds.root, rel)
    try:
        return digest_file(path).sha256
    except OSError as exc:
        problems.append(Problem(path, "unreadable-mask", f"cannot read the model's mask ({exc.strerror}); its "
                                "maps are used without it", "fix or fetch the mask file", "warning", ds.key))
        return None


def _origin(ds: DatasetInfo, sub: str | None, by_sub: dict[str, dict[str, Any]],
            over: MetadataOverrides) -> dict[str, Any]:
    """study, site, lab (None: from each map's sidecar) and participant of one subject."""
    prow = by_sub.get(sub) if sub is not None else None
    site = None
    if prow:
        for k in ("site", "Site", "site_id"):
            if prow.get(k) is not None:
                site = str(prow[k])
                break
    base = {"study": ds.study, "site": site, "lab": None}
    origin = over.apply(ds.key, sub, base)
    origin["participant"] = origin.get("participant") or (
        f"{origin['study']}/sub-{sub}" if sub is not None else None)
    return origin


def _assemble(cols: dict[str, list[Any]], headers: list[dict[str, Any]], hidx: list[int],
              sidecars: list[dict[str, Any]], sidx: list[int], prev: pa.Table | None) -> pa.Table:
    """Columns in schema order; ``hidx`` >= 0 points into ``headers``, -1 - i at row i of ``prev``."""
    fields = {f.name: f for f in MAPS_SCHEMA}
    arrays: dict[str, pa.Array] = {c: pa.array(v, fields[c].type) for c, v in cols.items()}
    if hidx:
        hschema = pa.schema([fields[c] for c in _STATIC_HEADER])
        htab = pa.Table.from_pylist(headers, schema=hschema)
        if prev is not None and any(i < 0 for i in hidx):
            htab = pa.concat_tables([htab, prev.select(list(_STATIC_HEADER)).cast(hschema)])
            hidx = [i if i >= 0 else len(headers) - 1 - i for i in hidx]
        stab = pa.Table.from_pylist(sidecars, schema=pa.schema([fields[c] for c in _SIDECAR_COLUMNS]))
        hi = pa.array(hidx, pa.int32())
        si = pa.array(sidx, pa.int32())
        for c in _STATIC_HEADER:
            arrays[c] = htab[c].take(hi).combine_chunks()
        for c in _SIDECAR_COLUMNS:
            arrays[c] = stab[c].take(si).combine_chunks()
    else:
        for c in _STATIC_HEADER + _SIDECAR_COLUMNS:
            arrays[c] = pa.array([], fields[c].type)
    return pa.Table.from_arrays([arrays[f.name] for f in MAPS_SCHEMA], schema=MAPS_SCHEMA)


# a unit covers at most this many top-level folders (subjects): parts stay big enough for DuckDB to
# read few files, and small enough for a worker to hold
_TOPS_PER_UNIT = 500


def _units(ds: DatasetInfo, parser: EntityParser, by_sub: dict[str, dict[str, Any]], rules: NameRules,
           over: MetadataOverrides, prev: "_Previous", store: Path, split: int, read_timeout: float | None,
           transforms: tuple[str, ...] = (), max_map_bytes: int = 0) -> list[_Unit]:
    """The units of one dataset: contiguous runs of its top folders (unit 0 also takes root maps).

    Their boundaries depend on the folders alone (and ``split``, raised when there are fewer
    datasets than workers), so a re-index finds each unit's previous part by its key.
    """
    tops = top_folders(ds)
    n = min(len(tops), max(math.ceil(len(tops) / _TOPS_PER_UNIT), split)) or 1
    size = math.ceil(len(tops) / n) if tops else 0
    chunks: list[list[str] | None] = [None] if n == 1 else [tops[i:i + size] for i in range(0, len(tops), size)]
    inputs = json.dumps([__version__, MAPS_SCHEMA_ID, ds.__dict__, by_sub, over.datasets, over.subjects, transforms],
                        sort_keys=True, default=str)
    prev_files = prev.files_of(ds.key)
    units = []
    for i, top in enumerate(chunks):
        key = f"{ds.key}|*" if top is None else \
            f"{ds.key}|{hashlib.sha256(chr(0).join(top).encode()).hexdigest()[:16]}"
        units.append(_Unit(ds, parser, top, i == 0, by_sub, rules, over, key, inputs, str(store),
                           prev.by_unit.get(key), prev_files, read_timeout, transforms, max_map_bytes))
    return units


@dataclass
class _Previous:
    """What a re-index needs of the last snapshot: its parts list and small tables, never all maps."""

    parts: list[CatalogPart] = field(default_factory=list)
    datasets: list[dict[str, Any]] = field(default_factory=list)
    participants: list[dict[str, Any]] = field(default_factory=list)
    problems: list[dict[str, Any]] = field(default_factory=list)
    store: Path | None = None

    @property
    def by_unit(self) -> dict[str, CatalogPart]:
        return {p.unit: p for p in self.parts if p.unit}

    def files_of(self, dataset: str) -> list[str]:
        assert self.store is not None or not self.parts
        return [str(self.store / p.maps) for p in self.parts if p.dataset == dataset]

    @classmethod
    def load(cls, store: Path, head: Head) -> "_Previous":
        if not head.catalog:
            return cls()
        # the small tables straight from their files: no view over the parts, which may be damaged
        # (a re-index is how a damaged store is mended)
        snap = store / head.catalog
        tables = {}
        for name in ("datasets", "participants", "problems"):
            f = snap / f"{name}.parquet"
            try:
                tables[name] = read_parquet(f).to_pylist() if f.exists() else []
            except (OSError, pa.ArrowException):
                tables[name] = []  # unreadable: the crawl rebuilds what it covers
        try:
            parts = CatalogManifest.read(store, head.catalog).parts
        except (OSError, MapstoreError):
            parts = []
        return cls(parts, tables["datasets"], tables["participants"], tables["problems"], store)


@declared(jobs=JOBS, read_timeout=READ_TIMEOUT, max_map_mb=MAP_MB_LIMIT)
def index(
    roots: Iterable[str | os.PathLike[str]],
    store: str | os.PathLike[str],
    *,
    rules: str | os.PathLike[str] | list[str | os.PathLike[str]] | None = None,
    origins: str | os.PathLike[str] | None = None,
    jobs: int | None = None,
    prune: bool = False,
    progress: bool | None = None,
    read_timeout: float | None = 60.0,
    scheduler: Any = None,
    transforms: Iterable[str | os.PathLike[str]] = (),
    overrides: str | os.PathLike[str] | None = None,
    max_map_mb: int = MAX_MAP_MB,
    fetch: bool = False,
) -> IndexReport:
    """Crawl derivative datasets and publish a new catalog snapshot in ``store``.

    Parameters
    ----------
    roots : iterable of path
        Derivative datasets, raw datasets holding ``derivatives/``, or folders of them.
    store : path
        The store folder (created if missing).  Never inside the roots' datasets.
    rules : path, preset name, or a list of them, optional
        Name rules for statistic maps without BIDS ``_statmap`` names: files, or built-in
        presets (``fsl-feat``, ``spm``).
    origins : path, optional
        An origins file setting study, site and lab per dataset or subject (the CLI's ``--origins``;
        ``examples/origins.yaml``).
    jobs : int, optional
        Processes for crawling, hashing and header reading (default: all cores).
    prune : bool, default=False
        Drop datasets indexed by earlier runs that are not under these roots.
    progress : bool, optional
        Show a progress bar (default: when standard error is a terminal).
    max_map_mb : int, default=4096
        A map whose header declares more voxel data than this many MiB is refused, from the header,
        before any of it is inflated (a damaged header, or a compressed bomb); real maps are far smaller
        (a 1 mm MNI152 float64 map is 58 MB).
    read_timeout : float or None, default=60
        Seconds a file's read may make no progress before the file is skipped as a
        ``read-timeout`` problem (a stalled mount must not stall the crawl); each block read
        restarts the deadline; None waits forever.  Enforced in the
        main thread of the crawling processes (not on Dask workers, whose tasks run in threads).
    scheduler : dask.distributed.Client or str, optional
        Send the units of work to this Dask cluster instead of local processes.  Workers must
        see the datasets and the store at the same paths; each unit writes its own part.
    transforms : iterable of path, optional
        Folders holding registrations of native-space maps to a template
        (``sub-<label>[_ses-<label>]_..._from-<space>_to-<template>_mode-image_xfm.{h5,txt,mat}``,
        in ``sub-<label>/`` folders or lying flat), looked in after the map's own dataset and the
        datasets its ``SourceDatasets`` names.
    overrides : path, optional
        The earlier name of ``origins``, still accepted.
    fetch : bool, default=False
        In datasets shared through git-annex (DataLad datasets), fetch the content of the files the
        name rules and presets take as maps, and nothing else (never the series, masks or other files
        beside them), in batches with ``git annex get``, which checks each file against its key;
        subdatasets not installed are installed first.  Without it, a map whose content is not
        fetched is a row marked ``content = 'not-present'`` with the SHA-256 and size its key gives.

    Returns
    -------
    IndexReport
    """
    t0 = time.perf_counter()
    roots = [Path(r).expanduser().absolute() for r in roots]
    if not roots:
        raise ParameterError("index needs at least one ROOT folder")
    jobs = resolve_jobs(jobs)
    if overrides is not None:  # the earlier name of ``origins``
        if origins is not None:
            raise ParameterError("give origins= only (overrides= is its earlier name)")
        origins = overrides
    name_rules = NameRules.load(rules)
    meta_over = MetadataOverrides.load(origins)
    xfm_roots = tuple(str(Path(t).expanduser().absolute()) for t in ([transforms] if isinstance(transforms, (str, os.PathLike)) else transforms))
    for t in xfm_roots:
        if not os.path.isdir(t):
            raise ParameterError(f"transforms folder {t} does not exist; give a folder holding the registrations "
                                 "(sub-<label>_..._from-<space>_to-<template>_mode-image_xfm.h5 files)")
    store_path = Path(store).expanduser().absolute()
    if progress is None:
        progress = sys.stderr.isatty()
    fetched: list[Problem] = []
    if fetch:
        fetched += install_subdatasets(roots, say=_say if progress else None)  # type: ignore[arg-type]
    datasets, problems = _find(roots, store_path)  # type: ignore[arg-type]
    if fetch:
        fetched += fetch_maps(datasets, name_rules, say=_say if progress else None)
    problems += fetched + _not_installed(roots, datasets)  # type: ignore[arg-type]
    store_path = ensure_store(store_path)
    with write_lock(store_path):
        head = read_head(store_path)
        prev = _Previous.load(store_path, head)
        plan = _plan(datasets, prev, roots, prune, name_rules, meta_over, store_path, jobs, scheduler, read_timeout,  # type: ignore[arg-type]
                     xfm_roots, max_map_mb << 20)
        problems += plan.problems
        try:
            results = list(run_units(_run_unit, plan.units, jobs=jobs, scheduler=scheduler, progress=progress,
                                     desc="indexing", ordered=True, unit="part", preload=WORKER_IMPORTS))
            inputs = {"rules": name_rules.given, "origins": meta_over.given}
            report = _publish(store_path, head, prev, plan, results, problems, roots, inputs)  # type: ignore[arg-type]
        except OSError as exc:
            if exc.errno in (errno.ENOSPC, errno.EDQUOT):
                raise StoreFull(f"{store_path}: no space left on the device (while writing the catalog); the "
                                "store still serves what it served before. Free space, or move the store, and "
                                "run the command again") from exc
            raise
    report.seconds = time.perf_counter() - t0
    return report


def _say(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def fetch_maps(datasets: list[DatasetInfo], rules: NameRules, say=None) -> list[Problem]:
    """Fetch the annexed content of every file the walk takes as a map (nothing else) in ``datasets``."""
    parser = EntityParser()
    problems: list[Problem] = []
    for ds in datasets:
        maps, _, _ = walk_dataset(ds, parser, rules, skip_folders=ds.exclude)
        absent = [m.path for m in maps if not m.present]
        if absent:
            if say is not None:
                say(f"{ds.name}: fetching {len(absent):,} annexed map(s) ...")
            problems += fetch_files(absent, say, ds.key)
    return problems


def install_subdatasets(roots: list[Path], say=None) -> list[Problem]:
    """Install the subdatasets not installed under ``roots`` (``git submodule update --init``), so their
    maps can be found; a problem for each that cannot be."""
    problems: list[Problem] = []
    pending = [str(r) for r in roots]
    while pending:
        root = pending.pop()
        for sub in uninstalled_subdatasets(root):
            if say is not None:
                say(f"installing the subdataset {sub} ...")
            why = _install(root, sub)
            if why:
                problems.append(Problem(sub, "subdataset-not-installed", f"a subdataset that could not be installed "
                                        f"({why})", "install it ('datalad get -n' on it), then index again",
                                        "error", ""))
            else:
                pending.append(sub)
    return problems


def _install(root: str, sub: str) -> str:
    """Install one subdataset (its tree, no annexed content): through DataLad where it is installed (it
    also sets the clone up for git-annex), else as a git submodule; the reason it failed, or ''."""
    try:
        import datalad.api as dl
    except ImportError:
        run = subprocess.run(["git", "-C", root, "submodule", "update", "--init", "--", os.path.relpath(sub, root)],
                             capture_output=True, text=True)
        return (run.stderr.strip().splitlines() or ["failed"])[-1] if run.returncode else ""
    try:
        dl.get(sub, dataset=root, get_data=False, result_renderer="disabled", on_failure="stop")
    except Exception as exc:  # noqa: BLE001 - DataLad raises its own kinds; the reason becomes a problem row
        return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return ""


def _not_installed(roots: list[Path], datasets: list[DatasetInfo]) -> list[Problem]:
    """A note per subdataset still not installed under the roots: its maps are not in the catalog."""
    out = []
    for root in {str(r) for r in roots} | {d.root for d in datasets}:
        for sub in uninstalled_subdatasets(root):
            out.append(Problem(sub, "subdataset-not-installed", "a subdataset that is not installed (an empty "
                               "folder): maps in it are not in the catalog", "index with --fetch (installs it "
                               "and fetches its maps), or install it ('datalad get -n' on it)", "warning", ""))
    return out


def _find(roots: list[Path], store_path: Path) -> tuple[list[DatasetInfo], list[Problem]]:
    """The datasets under ``roots``; refuses a store inside one of them."""
    datasets, problems = find_datasets(roots)
    if not datasets:
        why = "; ".join(f"{p.path}: {p.reason}" for p in problems if p.level == "error" or
                        p.code == "no-derivatives") or "no dataset_description.json or sub-* folders"
        subs = [s for r in roots for s in uninstalled_subdatasets(str(r))]
        if subs:
            why += (f"; {len(subs)} subdataset(s) not installed (e.g. {subs[0]}): index with --fetch, which "
                    "installs them and fetches their maps, or install them ('datalad get -n')")
        raise NoDatasetsFound(f"no BIDS derivative dataset found under {', '.join(map(str, roots))} ({why}); "
                              "give a derivative dataset, a raw dataset with derivatives/, or a folder of them. "
                              "Nothing was written.")
    for ds in datasets:
        if lies_within(store_path, ds.root):
            raise ParameterError(f"--store {store_path} lies inside the dataset {ds.root}; keep the store "
                                 "outside source datasets (mapstore never writes to them)")
    return datasets, problems


@dataclass
class _Plan:
    datasets: list[DatasetInfo]
    units: list[_Unit]
    kept: list[dict[str, Any]]  # datasets rows of earlier runs kept as they are
    participants: list[dict[str, Any]]
    participant_files: dict[str, str | None]
    problems: list[Problem]


def _plan(datasets: list[DatasetInfo], prev: _Previous, roots: list[Path], prune: bool, rules: NameRules,
          over: MetadataOverrides, store: Path, jobs: int, scheduler: Any, read_timeout: float | None,
          transforms: tuple[str, ...] = (), max_map_bytes: int = 0) -> _Plan:
    """Participants of every dataset, and the units of work (each knowing its previous part)."""
    found = {d.key for d in datasets}
    kept = [] if prune else [d for d in prev.datasets if d["dataset"] not in found and not _under(d["root"], roots)]
    kept_keys = {d["dataset"] for d in kept}
    participants = [r for r in prev.participants if r["dataset"] in kept_keys]
    parser = EntityParser()
    split = 1 if scheduler is None and len(datasets) >= jobs else jobs
    units: list[_Unit] = []
    files: dict[str, str | None] = {}
    problems: list[Problem] = []
    for ds in datasets:
        prows, files[ds.key], pprobs = read_participants(ds)
        problems.extend(pprobs)
        by_sub: dict[str, dict[str, Any]] = {}
        for r in prows:
            pid = r.get("participant_id") or ""
            sub = pid[4:] if pid.startswith("sub-") else pid
            rec = {"dataset": ds.key, "participant_id": pid, "sub": sub, "participant": f"{ds.study}/sub-{sub}",
                   **{k: v for k, v in r.items() if k != "participant_id"}}
            by_sub[sub] = rec
            participants.append(rec)
        units += _units(ds, parser, by_sub, rules, over, prev, store, split, read_timeout, transforms, max_map_bytes)
    return _Plan(datasets, units, kept, participants, files, problems)


def _publish(store: Path, head: Head, prev: _Previous, plan: _Plan, results: list[_UnitResult],
             problems: list[Problem], roots: list[Path], inputs: dict[str, Any] | None = None) -> IndexReport:
    """Write the snapshot (parts list and small tables) and replace HEAD: the one atomic step."""
    kept_keys = {d["dataset"] for d in plan.kept}
    parts = [p for p in prev.parts if p.dataset in kept_keys]
    for res in results:
        problems.extend(res.problems)
        if res.part is not None:
            parts.append(res.part)
    n_maps: dict[str, int] = {}
    for p in parts:
        n_maps[p.dataset] = n_maps.get(p.dataset, 0) + p.rows
    ds_rows = list(plan.kept)
    for ds in plan.datasets:
        ds_rows.append({
            "dataset": ds.key, "name": ds.name, "study": ds.study, "root": ds.root,
            "dataset_type": ds.dataset_type, "generated_by": json.dumps(ds.generated_by),
            "bids_version": ds.bids_version, "raw_root": ds.raw_root, "raw_name": ds.raw_name,
            "participants_file": plan.participant_files[ds.key], "n_maps": n_maps.get(ds.key, 0),
            "description": json.dumps(ds.description, sort_keys=True, default=str),
        })
    for ds in plan.datasets:
        if not n_maps.get(ds.key):
            problems.append(Problem(ds.root, "no-maps", "the dataset yielded no statistic maps",
                                    "see its unmatched-images rows (the image files no naming took, with a rule "
                                    "that would take them); or index it with a name-rules file (--rules)",
                                    "warning", ds.key))
    prob_rows = [r for r in prev.problems if r.get("dataset") in kept_keys]
    prob_rows += _problems_table(problems).to_pylist()
    snap = new_snapshot_id()
    snap_dir = store / "catalog" / snap
    try:
        snap_dir.mkdir(parents=True)
        write_parquet_atomic(pa.Table.from_pylist(ds_rows, schema=DATASETS_SCHEMA), snap_dir / "datasets.parquet")
        write_parquet_atomic(_participants_table(plan.participants), snap_dir / "participants.parquet")
        write_parquet_atomic(pa.Table.from_pylist(prob_rows, schema=PROBLEMS_SCHEMA), snap_dir / "problems.parquet")
        write_json_atomic(snap_dir / CatalogManifest.FILE, CatalogManifest(parts).to_json())
        # the name rules and origins this snapshot was made with, as given: what a rebuild elsewhere needs
        write_json_atomic(snap_dir / INDEX_INPUTS_FILE, inputs or {"rules": [], "origins": None})
        head.catalog = f"catalog/{snap}"
        old_labels = head.labels.table if head.labels else None
        _relabel(store, head)
    except OSError:
        shutil.rmtree(snap_dir, ignore_errors=True)
        raise
    total = sum(n_maps.values())
    commit_head(store, head, {"event": "index", "roots": [str(r) for r in roots], "maps": total, "snapshot": snap})
    if old_labels and head.labels and old_labels != head.labels.table and \
            old_labels not in {d.get("labels") for d in leased_files(store)}:
        (store / old_labels).unlink(missing_ok=True)  # re-derived for the new catalog; no reader holds it
    codes: dict[str, int] = {}
    passed: dict[str, int] = {}
    notes: dict[str, int] = {}
    for p in prob_rows:  # type: ignore[assignment]
        into = notes if p["level"] == "info" else codes  # type: ignore[index]
        into[p["code"]] = into.get(p["code"], 0) + 1  # type: ignore[index]
        if p["code"] == "unmatched-images":  # type: ignore[index]
            ending = p["reason"].split("(*", 1)[-1].split(")", 1)[0]  # type: ignore[index]
            passed[ending] = passed.get(ending, 0) + (p["count"] or 1)  # type: ignore[index]
    new = sum(r.new for r in results)
    changed = sum(r.changed for r in results)
    unchanged = sum(r.unchanged for r in results)
    touched = sum(r.touched for r in results)
    before = sum(d.get("n_maps") or 0 for d in prev.datasets if d["dataset"] not in kept_keys)
    not_present = no_sha = 0
    for r in results:
        if r.part is not None:
            try:
                t = read_parquet(store / r.part.maps, columns=["content", "sha256"])
            except (KeyError, ValueError, OSError):  # a part written before the column
                continue
            for c, h in zip(t["content"].to_pylist(), t["sha256"].to_pylist()):
                not_present += c == "not-present"
                no_sha += c == "not-present" and h is None
    return IndexReport(store=str(store), n_datasets=len(ds_rows), n_maps=total, n_new=new, n_changed=changed,
                       n_unchanged=unchanged, n_removed=max(0, before - changed - unchanged),
                       n_problems=sum(codes.values()), n_kept_datasets=len(plan.kept), seconds=0.0,
                       problem_codes=codes, passed_over=passed, n_notes=sum(notes.values()), note_codes=notes,
                       n_touched=touched, n_not_present=not_present, n_no_sha256=no_sha,
                       n_unread=sum(r.unread for r in results))


# what a unit imports beyond this module's imports: pyarrow's first conversion of Python values imports
# pandas (0.4 s), which the parent imports anyway when it gathers the parts
WORKER_IMPORTS = ("pandas", "pyarrow.pandas_compat", "pyarrow.vendored.version")


def _relabel(store: Path, head: Head) -> None:
    """Labels for the new catalog from the stored vocabulary, so readers never derive them."""
    entry = head.labels
    if not entry or not entry.copy:
        return
    table = refresh_labels(Catalog(store, head), entry)
    rel = f"labels/labels-{Path(head.catalog).name}.parquet"
    write_parquet_atomic(table, store / rel)
    head.labels = dataclasses.replace(entry, table=rel, catalog=head.catalog)
