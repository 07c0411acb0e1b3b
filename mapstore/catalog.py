"""Build the catalog: discover -> hash + header -> one atomic catalog snapshot.

Re-indexing is incremental: a map whose size and mtime are unchanged keeps its
hash and header facts from the previous snapshot; changed files are read again;
files gone from disk leave the catalog.  A file that cannot be read never stops
the crawl: it becomes a row of ``problems``.
"""

from __future__ import annotations

import errno
import hashlib
import json
import math
import os
import re
import shutil
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import pyarrow as pa

from .discover import (
    DatasetInfo,
    EntityParser,
    MetadataOverrides,
    ModelFiles,
    NameRules,
    Problem,
    SidecarResolver,
    find_datasets,
    read_participants,
    top_folders,
    walk_dataset,
)
from .params import resolve_jobs
from .pool import process_pool
from .errors import HeaderError, NoDatasetsFound, ParameterError, StoreFull
from .hashing import ReadDeadline, ReadTimeout, digest_file
from .header import NIFTI1_SIZE, NIFTI2_SIZE, HeaderFacts, header_prefix, parse_header
from .store import (
    DATASETS_SCHEMA,
    MAPS_SCHEMA,
    PROBLEMS_SCHEMA,
    Catalog,
    commit_head,
    conform,
    ensure_store,
    new_snapshot_id,
    read_head,
    write_lock,
    write_parquet_atomic,
)

__all__ = ["IndexReport", "index", "map_id_for", "probe_file"]

_N1_SIZES = (NIFTI1_SIZE.to_bytes(4, "little"), NIFTI1_SIZE.to_bytes(4, "big"))

_ENTITY_COLUMNS = ("sub", "ses", "task", "acq", "run", "rec", "space", "res", "desc", "contrast", "stat")
_HEADER_COLUMNS = ("sha256", "nbytes", "mtime_ns", "nifti_version", "endianness", "shape", "n_volumes",
                   "dtype", "bitpix", "vox_offset", "scl_slope", "scl_inter", "intent_code",
                   "intent_name", "intent_p1", "qform_code", "sform_code", "affine_source", "affine",
                   "voxel_size", "orientation", "grid_id", "descrip", "header_warnings")


@dataclass
class IndexReport:
    """What one ``index`` run did."""

    store: str
    datasets: int
    maps: int
    new: int
    changed: int
    unchanged: int
    removed: int
    problems: int
    kept_datasets: int
    seconds: float
    problem_codes: dict[str, int] = field(default_factory=dict)

    def summary(self) -> str:
        rate = (self.new + self.changed) / self.seconds if self.seconds > 0 else 0.0
        lines = [
            f"store: {self.store}",
            f"datasets: {self.datasets}   maps: {self.maps}   "
            f"(new {self.new}, changed {self.changed}, unchanged {self.unchanged}, removed {self.removed})",
            f"read {self.new + self.changed} files in {self.seconds:.2f} s ({rate:,.0f} maps/s)",
        ]
        if self.kept_datasets:
            lines.append(f"kept {self.kept_datasets} dataset(s) from earlier runs, not under these roots")
        if self.problems:
            codes = ", ".join(f"{k} x{v}" for k, v in sorted(self.problem_codes.items()))
            lines.append(f"problems: {self.problems} ({codes}); see: mapstore sql --store {self.store} "
                         "\"SELECT * FROM problems\"")
        return "\n".join(lines)


def map_id_for(dataset_key: str, relpath: str) -> str:
    """Stable id of a map: a hash of its dataset identity and its path in the dataset."""
    return hashlib.sha256(f"{dataset_key}\n{relpath}".encode()).hexdigest()[:16]


def probe_file(path: str, cache: dict[bytes, dict[str, Any]] | None = None, progress=None
               ) -> tuple[dict[str, Any], str, int] | Problem:
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
            cols = _header_columns(facts)
            if cache is not None:
                cache[key] = cols
    except HeaderError as exc:
        return Problem(path, exc.code, exc.reason, exc.remedy, stage="header")
    if not path.endswith(".gz") and dig.nbytes < cols["vox_offset"] + cols["_data_nbytes"]:
        return Problem(path, "truncated-data",
                       f"file has {dig.nbytes} bytes, header promises {cols['vox_offset'] + cols['_data_nbytes']}",
                       "the file was cut short; re-create or re-download it", stage="header")
    return cols, dig.sha256, dig.nbytes


def _probe_batch(paths: list[str]) -> list[tuple[dict[str, Any], str, int] | Problem]:
    cache: dict[bytes, dict[str, Any]] = {}
    return [probe_file(p, cache) for p in paths]


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
        "_data_nbytes": facts.data_nbytes,
    }


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
    p = Path(path)
    return any(p == r or r in p.parents for r in roots)


@dataclass
class _Unit:
    """One piece of crawl work: a dataset, or some of its top-level folders."""

    ds: DatasetInfo
    parser: EntityParser
    top: list[str] | None
    root_maps: bool
    by_sub: dict[str, dict[str, Any]]
    rules: NameRules
    overrides: MetadataOverrides
    prev: pa.Table | None  # this unit's rows of the previous snapshot, for incremental runs
    read_timeout: float | None = None


@dataclass
class _UnitResult:
    rows: pa.Table
    problems: list[Problem]
    new: int
    changed: int
    unchanged: int


def _previous_subset(prev: pa.Table | None, dataset: str, top: list[str] | None,
                     root_maps: bool) -> pa.Table | None:
    """Rows of the previous snapshot that one unit of work may reuse."""
    if prev is None:
        return None
    import pyarrow.compute as pc

    t = prev.filter(pc.equal(prev["dataset"], dataset))
    if top is not None:
        first = pc.list_element(pc.split_pattern(t["relpath"], "/", max_splits=1), 0)
        keep = pc.is_in(first, pa.array(top, pa.string()))
        if root_maps:
            keep = pc.or_(keep, pc.invert(pc.match_substring(t["relpath"], "/")))
        t = t.filter(keep)
    return t


_STATIC_HEADER = tuple(c for c in _HEADER_COLUMNS if c not in ("sha256", "nbytes", "mtime_ns"))
_PER_ROW = ("map_id", "dataset", "relpath", *_ENTITY_COLUMNS, "map_kind", "suffix", "extension", "entities",
            "named_by", "participant", "study", "site", "lab", "sha256", "nbytes", "mtime_ns", "dof", "dof_source",
            "model_mask", "model_mask_sha256")
_SIDECAR_COLUMNS = ("metadata", "sidecars")


def _run_unit(unit: _Unit) -> _UnitResult:
    """Crawl one unit and build its rows column by column.

    Header facts and sidecar metadata repeat across a study's maps, so each distinct
    value is built once and the columns are gathered with one Arrow ``take``.
    """
    with ReadDeadline(unit.read_timeout) as deadline:
        return _crawl_unit(unit, deadline)


def _crawl_unit(unit: _Unit, deadline: ReadDeadline) -> _UnitResult:
    ds = unit.ds
    parser = unit.parser
    maps, jsons, problems = walk_dataset(ds, parser, unit.rules, unit.top, unit.root_maps)
    resolver = SidecarResolver(ds, jsons, parser)
    model = ModelFiles(ds, jsons, parser)
    mask_sha: dict[str, str | None] = {}
    # previous rows: a few columns as lists; reused header columns are gathered from the table
    pt = unit.prev
    pcol = {c: pt[c].to_pylist() for c in ("relpath", "nbytes", "mtime_ns", "sha256", "intent_code",
                                             "intent_p1", "descrip")} if pt is not None and pt.num_rows else {}
    prev = {r: i for i, r in enumerate(pcol.get("relpath", []))}
    cache: dict[bytes, dict[str, Any]] = {}
    rows: list[tuple] = []
    headers: list[dict[str, Any]] = []
    header_pos: dict[Any, int] = {}
    sidecars: list[dict[str, Any]] = []
    sidecar_pos: dict[tuple, int] = {}
    hidx: list[int] = []
    sidx: list[int] = []
    origins: dict[str | None, dict[str, Any]] = {}
    new = changed = unchanged = 0
    for m in maps:
        old = prev.get(m.relpath)
        if old is not None and pcol["nbytes"][old] == m.nbytes and pcol["mtime_ns"][old] == m.mtime_ns:
            sha, nbytes = pcol["sha256"][old], pcol["nbytes"][old]
            hdr = {"intent_code": pcol["intent_code"][old], "intent_p1": pcol["intent_p1"][old],
                   "descrip": pcol["descrip"][old]}
            hidx.append(-1 - old)  # a previous row: resolved against the previous table
            unchanged += 1
        else:
            try:
                with deadline.armed():
                    res = probe_file(m.path, cache, deadline.progress)
            except ReadTimeout:
                res = Problem(m.path, "read-timeout", f"reading the file made no progress for {unit.read_timeout:g} s "
                              "(a stalled network or FUSE mount, or a file fetched on access?); it was skipped",
                              "make the file readable (fetch it, check the mount), then index again; "
                              "--read-timeout sets the deadline")
            if isinstance(res, Problem):
                problems.append(Problem(res.path, res.code, res.reason, res.remedy, res.level,
                                        ds.key, res.stage))
                continue
            hdr, sha, nbytes = res
            key = id(hdr)  # probe_file shares one dict per distinct header
            if old is None:
                new += 1
            else:
                changed += 1
            pos = header_pos.get(key)
            if pos is None:
                pos = header_pos[key] = len(headers)
                headers.append(hdr)
            hidx.append(pos)
        ents = m.entities
        meta, used, meta_json = resolver.resolve_full(m.relpath, ents)
        skey = (meta_json, *used)
        spos = sidecar_pos.get(skey)
        if spos is None:
            spos = sidecar_pos[skey] = len(sidecars)
            sidecars.append({"metadata": meta_json, "sidecars": used})
        sidx.append(spos)
        sub = ents.get("sub")
        origin = origins.get(sub)
        if origin is None:
            origin = origins[sub] = _origin(ds, sub, unit.by_sub, unit.overrides)
        lab = origin["lab"]
        if lab is None and meta.get("InstitutionName") is not None:
            lab = str(meta["InstitutionName"])
        mask_rel = m.extras.get("mask") or model.mask_for(m.relpath, ents)
        if mask_rel is not None and mask_rel not in mask_sha:
            mask_sha[mask_rel] = _mask_digest(ds, mask_rel, problems)
        msha = mask_sha.get(mask_rel) if mask_rel else None
        if msha is None:
            mask_rel = None
        dof, dof_source = _degrees_of_freedom(m, meta, used, hdr, model, problems)
        get = ents.get
        rows.append((
            map_id_for(ds.key, m.relpath), ds.key, m.relpath,
            *[get(c) for c in _ENTITY_COLUMNS], "contrast" if get("contrast") else "model",
            get("suffix"), get("extension"),
            json.dumps({k: v for k, v in ents.items() if k not in ("suffix", "extension")}, sort_keys=True),
            m.named_by, origin["participant"], origin["study"], origin["site"], lab,
            sha, nbytes, m.mtime_ns, dof, dof_source, mask_rel, msha,
        ))
    problems.extend(resolver.problems)
    # one tuple per row while crawling, transposed into columns once
    cols = dict(zip(_PER_ROW, (list(c) for c in zip(*rows)))) if rows else {c: [] for c in _PER_ROW}
    return _UnitResult(_assemble(cols, headers, hidx, sidecars, sidx, pt), problems, new, changed, unchanged)


# SPM writes the DOF of a T image into its header description: "SPM{T_[20.0]} - contrast 1: ..."
_DESCRIP_DOF = re.compile(r"\{T_\[\s*([0-9]+(?:\.[0-9]*)?(?:[eE][+-]?[0-9]+)?)\s*\]\}")


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


def _units(ds: DatasetInfo, parser: EntityParser, by_sub: dict[str, dict[str, Any]], rules: NameRules,
           over: MetadataOverrides, prev: pa.Table | None, jobs: int, read_timeout: float | None = None
           ) -> list[_Unit]:
    if jobs == 1:
        return [_Unit(ds, parser, None, True, by_sub, rules, over,
                      _previous_subset(prev, ds.key, None, True), read_timeout)]
    tops = top_folders(ds)
    # one part per worker, finer for big datasets (progress, balance): ~25 top folders per part
    n_parts = min(len(tops), max(jobs, len(tops) // 25)) or 1
    parts = [tops[i::n_parts] for i in range(n_parts)]
    return [_Unit(ds, parser, part, i == 0, by_sub, rules, over,
                  _previous_subset(prev, ds.key, part, i == 0), read_timeout)
            for i, part in enumerate(parts)]


def index(
    roots: Iterable[str | os.PathLike[str]],
    store: str | os.PathLike[str],
    *,
    rules: str | os.PathLike[str] | list[str | os.PathLike[str]] | None = None,
    overrides: str | os.PathLike[str] | None = None,
    jobs: int | None = None,
    prune: bool = False,
    progress: bool | None = None,
    read_timeout: float | None = 60.0,
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
    overrides : path, optional
        A mapping file setting study, site and lab per dataset or subject.
    jobs : int, optional
        Processes for crawling, hashing and header reading (default: all cores).
    prune : bool, default=False
        Drop datasets indexed by earlier runs that are not under these roots.
    progress : bool, optional
        Show a progress bar (default: when standard error is a terminal).
    read_timeout : float or None, default=60
        Seconds a file's read may make no progress before the file is skipped as a
        ``read-timeout`` problem (a stalled mount must not stall the crawl); each block read
        restarts the deadline; None waits forever.  Enforced in the
        main thread of the crawling processes.

    Returns
    -------
    IndexReport
    """
    t0 = time.perf_counter()
    roots = [Path(r).expanduser().absolute() for r in roots]
    if not roots:
        raise ParameterError("index needs at least one ROOT folder")
    jobs = resolve_jobs(jobs)
    if read_timeout is not None and not (isinstance(read_timeout, (int, float)) and read_timeout > 0):
        raise ParameterError(f"read_timeout must be a positive number of seconds or None, got {read_timeout!r}")
    name_rules = NameRules.load(rules)
    meta_over = MetadataOverrides.load(overrides)
    store_path = Path(store).expanduser().absolute()
    datasets, problems = find_datasets(roots)
    if not datasets:
        why = "; ".join(f"{p.path}: {p.reason}" for p in problems if p.level == "error" or
                        p.code == "no-derivatives") or "no dataset_description.json or sub-* folders"
        raise NoDatasetsFound(f"no BIDS derivative dataset found under {', '.join(map(str, roots))} ({why}); "
                             "give a derivative dataset, a raw dataset with derivatives/, or a folder of them. "
                             "Nothing was written.")
    for ds in datasets:
        droot = Path(ds.root)
        if store_path == droot or droot in store_path.parents:
            raise ParameterError(f"--store {store_path} lies inside the dataset {droot}; keep the store "
                                 "outside source datasets (mapstore never writes to them)")
    store_path = ensure_store(store_path)
    if progress is None:
        progress = sys.stderr.isatty()

    with write_lock(store_path):
        head = read_head(store_path)
        prev: pa.Table | None = None
        prev_keys: set[tuple[str, str]] = set()
        prev_datasets: list[dict[str, Any]] = []
        prev_participants: list[dict[str, Any]] = []
        prev_problems: list[dict[str, Any]] = []
        found_keys = {d.key for d in datasets}
        if head.catalog:
            old = Catalog(store_path)
            old_maps = conform(old.table("maps"), MAPS_SCHEMA)
            prev = old_maps.select(["relpath", "dataset", *_HEADER_COLUMNS])
            prev_datasets = old.table("datasets").to_pylist()
            prev_participants = old.table("participants").to_pylist()
            prev_problems = old.table("problems").to_pylist()
            prev_keys = set(zip(prev["dataset"].to_pylist(), prev["relpath"].to_pylist()))
        kept = [] if prune else [d for d in prev_datasets if d["dataset"] not in found_keys
                                 and not _under(d["root"], roots)]
        kept_keys = {d["dataset"] for d in kept}
        tables: list[pa.Table] = []
        if kept_keys:
            import pyarrow.compute as pc

            tables.append(old_maps.filter(pc.is_in(old_maps["dataset"], pa.array(sorted(kept_keys)))))

        participant_rows = [r for r in prev_participants if r["dataset"] in kept_keys]
        parser = EntityParser()
        units: list[_Unit] = []
        pfiles: dict[str, str | None] = {}
        for ds in datasets:
            prows, pfile, pprobs = read_participants(ds)
            problems.extend(pprobs)
            pfiles[ds.key] = pfile
            by_sub: dict[str, dict[str, Any]] = {}
            for r in prows:
                pid = r.get("participant_id") or ""
                sub = pid[4:] if pid.startswith("sub-") else pid
                rec = {"dataset": ds.key, "participant_id": pid, "sub": sub,
                       "participant": f"{ds.study}/sub-{sub}",
                       **{k: v for k, v in r.items() if k != "participant_id"}}
                by_sub[sub] = rec
                participant_rows.append(rec)
            units += _units(ds, parser, by_sub, name_rules, meta_over, prev, jobs, read_timeout)

        results: list[_UnitResult] = []
        bar = None
        if progress:
            from tqdm import tqdm

            bar = tqdm(total=len(units), unit="part", desc="indexing", file=sys.stderr)
        if jobs > 1 and len(units) > 1:
            with process_pool(min(jobs, len(units))) as pool:
                for res in pool.map(_run_unit, units):
                    results.append(res)
                    if bar:
                        bar.update(1)
        else:
            for u in units:
                results.append(_run_unit(u))
                if bar:
                    bar.update(1)
        if bar:
            bar.close()

        n_maps_by_ds: dict[str, int] = {}
        new = changed = unchanged = 0
        for u, res in zip(units, results):
            tables.append(res.rows)
            problems.extend(res.problems)
            new, changed, unchanged = new + res.new, changed + res.changed, unchanged + res.unchanged
            n_maps_by_ds[u.ds.key] = n_maps_by_ds.get(u.ds.key, 0) + res.rows.num_rows
        maps_table = pa.concat_tables(tables) if tables else MAPS_SCHEMA.empty_table()
        maps_table = maps_table.sort_by([("dataset", "ascending"), ("relpath", "ascending")])
        current_keys = set(zip(maps_table["dataset"].to_pylist(), maps_table["relpath"].to_pylist()))
        removed = sum(1 for k in prev_keys if k not in current_keys)

        ds_rows = list(kept)
        for ds in datasets:
            ds_rows.append({
                "dataset": ds.key, "name": ds.name, "study": ds.study, "root": ds.root,
                "dataset_type": ds.dataset_type, "generated_by": json.dumps(ds.generated_by),
                "bids_version": ds.bids_version, "raw_root": ds.raw_root, "raw_name": ds.raw_name,
                "participants_file": pfiles[ds.key], "n_maps": n_maps_by_ds.get(ds.key, 0),
                "description": json.dumps(ds.description, sort_keys=True, default=str),
            })
        prob_rows = [r for r in prev_problems if r.get("dataset") in kept_keys]
        prob_rows += [{"path": p.path, "dataset": p.dataset, "code": p.code, "level": p.level,
                       "stage": p.stage, "reason": p.reason, "remedy": p.remedy} for p in problems]

        snap = new_snapshot_id()
        snap_dir = store_path / "catalog" / snap
        try:
            snap_dir.mkdir(parents=True)
            write_parquet_atomic(maps_table, snap_dir / "maps.parquet")
            write_parquet_atomic(pa.Table.from_pylist(ds_rows, schema=DATASETS_SCHEMA),
                                 snap_dir / "datasets.parquet")
            write_parquet_atomic(_participants_table(participant_rows), snap_dir / "participants.parquet")
            write_parquet_atomic(pa.Table.from_pylist(prob_rows, schema=PROBLEMS_SCHEMA),
                                 snap_dir / "problems.parquet")
        except OSError as exc:
            shutil.rmtree(snap_dir, ignore_errors=True)
            if exc.errno in (errno.ENOSPC, errno.EDQUOT):
                raise StoreFull(f"{store_path}: no space left on the device (while writing the catalog); the "
                                "store still serves what it served before. Free space, or move the store, and "
                                "run the command again") from None
            raise
        head.catalog = f"catalog/{snap}"
        commit_head(store_path, head, {"event": "index", "roots": [str(r) for r in roots],
                                       "maps": maps_table.num_rows, "snapshot": snap})

    codes: dict[str, int] = {}
    for p in prob_rows:
        codes[p["code"]] = codes.get(p["code"], 0) + 1
    return IndexReport(
        store=str(store_path), datasets=len(ds_rows), maps=maps_table.num_rows, new=new, changed=changed,
        unchanged=unchanged, removed=removed, problems=len(prob_rows), kept_datasets=len(kept),
        seconds=time.perf_counter() - t0, problem_codes=codes,
    )
