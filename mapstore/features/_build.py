"""Feature sets: every map resampled once onto one grid and mask, provenance-linked.

A feature set is a folder in the store::

    features/<name>/set.json            grid, mask, method, stat conversion, versions
    features/<name>/mask.npy            flat C-order voxel indices of the mask on the grid
    features/<name>/shards/*.npy        float32 rows (maps x mask voxels), C order, memory-mappable
    features/<name>/rows-<snap>.parquet one row per served map: map_id, feature_key, shard, row, ...

Each row's ``feature_key`` hashes the source's SHA-256 with everything that made
the vector (grid, mask, method, conversion and its DOF, mapstore version), so a
re-run skips rows whose key exists and a changed source gets a new row.
Workers write new shard files only; the new rows table is published with the
store's atomic HEAD replacement.
"""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import hashlib
import json
import os
import shutil
import sys
import time
import uuid
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from ..statkinds import convertible_to_z
from .._params import (BACKGROUND, BATCH_SIZE, FEATURE_STAT, JOBS, P_SIDE, RESAMPLE_METHOD, declared,
                       resolve_jobs)
from .._runner import run as run_units
from .._warm import build_settings, remember, settings_digest
from .._version import __version__
from ..errors import FeatureError, MapstoreError, QueryError, StoreFull
from ..store import (
    write_json_atomic,
    read_parquet,
    FPROBLEMS_SCHEMA,
    ROWS_SCHEMA,
    Catalog,
    FeatureEntry,
    FeatureSetSpec,
    Problem,
    collect_feature_garbage,
    commit_head,
    conform,
    file_slug,
    new_snapshot_id,
    read_head,
    write_lock,
    write_parquet_atomic,
)
from ..targets import (
    BuildSettings,
    Mask,
    SourceMap,
    Target,
    attach_registrations,
    mask_from_array,
    resolve_mask,
    resolve_target,
)
from ._copies import Sketcher, find_copies, sketch_kind
from ._reader import FeatureSet
from ._rows import Batch, run_batch
from ..formats import plural

__all__ = ["FeatureReport", "build_features", "DEFAULT_SET", "feature_key", "spec_id"]

DEFAULT_SET = "default"


@dataclass
class FeatureReport:
    """What one ``features`` run did."""

    name: str
    n_features: int  # a row's values (in ``unit``)
    grid: str
    mask: str
    n_built: int
    n_unchanged: int
    n_removed: int  # rows of maps gone from the catalog or no longer selected
    n_problems: int
    seconds: float
    paths: dict[str, int] = field(default_factory=dict)
    problems: list[Problem] = field(default_factory=list)
    left_out: dict[str, int] = field(default_factory=dict)
    unit: str = "voxels"  # what a row's values are: voxels, vertices, grayordinates or parcels

    @property
    def problem_codes(self) -> dict[str, int]:
        """Problems by code, as :attr:`IndexReport.problem_codes`."""
        return dict(Counter(p.code for p in self.problems))

    def summary(self) -> str:
        rate = self.n_built / self.seconds if self.seconds > 0 else 0.0
        lines = [f"feature set {self.name!r}: grid {self.grid}, mask {self.mask} ({self.n_features:,} {self.unit})",
                 f"built {plural(self.n_built, 'row')} ({rate:,.1f} maps/s), kept {self.n_unchanged:,} unchanged, "
                 f"removed {self.n_removed} stale, {self.n_problems} failed in {self.seconds:.1f} s"]
        for why, n in self.left_out.items():
            lines.append(f"left out {n} {why}")
        if self.paths:
            lines.append("resampling paths: " + ", ".join(f"{k} x{v}" for k, v in sorted(self.paths.items())))
        for p in self.problems[:5]:
            lines.append(f"  failed: {p.path}: {p.reason}")
        if len(self.problems) > 5:
            lines.append(f"  ... and {len(self.problems) - 5} more (SELECT * FROM feature_problems)")
        return "\n".join(lines)


def library_versions() -> dict[str, str]:
    from importlib.metadata import version  # the installed versions, without importing scipy and nibabel

    return {"mapstore": __version__, "numpy": np.__version__, "scipy": version("scipy"),
            "nibabel": version("nibabel")}


def spec_id(spec: FeatureSetSpec, projection: dict[str, Any] | None = None) -> str:
    """A set's identity: what its rows' values depend on (``projection`` stands in for the spec's own)."""
    keep: dict[str, Any] = {k: getattr(spec, k) for k in ("grid_id", "mask_sha256", "method", "stat", "p_sided",
                                                          "zero_as_missing", "background", "kinds")}
    projection = spec.projection if projection is None else projection
    if projection is not None:  # surface sets only: volume sets keep their ids
        keep["projection"] = projection
    return hashlib.sha256(json.dumps(keep, sort_keys=True).encode()).hexdigest()[:16]


def feature_key(sha256: str, spec: FeatureSetSpec, dof: float | None, model_mask_sha256: str | None = None,
                more: str = "", dof1: float | None = None, map_index: int | None = None,
                registration: str = "") -> str:
    """Hash of everything a row's values depend on; ``more`` adds an item's other sources (a hemisphere,
    and a native map's ``registration``, which a volume set adds on its own)."""
    parts = [sha256, spec.grid_id, spec.mask_sha256, spec.method, spec.stat,
             spec.p_sided, str(spec.zero_as_missing), spec.background, model_mask_sha256 or "",
             "" if dof is None or spec.stat == "native" else f"{dof:.6g}", __version__]
    if spec.projection is not None:
        parts += [json.dumps(spec.projection, sort_keys=True), more]
    if dof1 is not None and spec.stat != "native":  # an F map's contrast rank
        parts.append(f"df1={dof1:.6g}")
    if map_index is not None:  # one map of a file of several
        parts.append(f"map={map_index}")
    if spec.projection is None and registration:  # a volume set: only a native map's registration adds
        parts.append(registration)
    text = "|".join(parts)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def _per_dataset(items: list[SourceMap], dataset_of: dict[str, str], n: int):
    """Batches of at most ``n`` items of one dataset each: a study's rows live in its own shards."""
    groups: dict[str, list[SourceMap]] = {}
    for it in items:
        groups.setdefault(dataset_of[it.map_id], []).append(it)
    k = 0
    for ds, group in groups.items():
        for i in range(0, len(group), n):
            yield ds, group[i:i + n], k
            k += 1


_Z_READY = convertible_to_z()


def _select_maps(cat: Catalog, where: str | None, kinds: tuple[str, ...], target: Target, stat: str,
                 volumes: bool | str = True) -> tuple[list[dict[str, Any]], dict[str, int]]:
    """Maps the set takes, and how many the defaults left out (and why).

    ``volumes`` False (or the reason, a str) leaves volume maps out of a meshed set.

    A surface set takes a hemisphere pair as one map, under the left file's id (the right file
    is its ``linked_map``); an unpaired hemisphere comes alone, the other half missing.
    """
    q = ("SELECT m.map_id, m.dataset, m.stat, m.sha256, m.dof, m.relpath, d.root, m.map_kind, m.n_volumes, m.content, "
         "m.model_mask, m.model_mask_sha256, m.geometry, m.hemi, m.space, m.sub, m.space_kind, m.registration, "
         "m.dof_numerator, m.map_index, ")
    second = target.second_halves("m")
    if second:  # the right hemisphere's file beside the left's
        q += ("r.relpath AS relpath_r, r.sha256 AS sha256_r, r.model_mask AS model_mask_r, "
              "r.model_mask_sha256 AS model_mask_sha256_r, r.n_volumes AS n_volumes_r FROM maps m "
              "JOIN datasets d USING (dataset) LEFT JOIN maps r ON r.map_id = m.linked_map AND m.hemi = 'L' "
              "AND r.hemi = 'R'")
    else:  # a volume set: no second read of the maps table
        q += ("NULL AS n_volumes_r FROM maps m JOIN datasets d USING (dataset)")
    conds = [f"({where})"] if where else []
    if second:  # a pair comes once, as its left file
        conds.append(f"NOT ({second})")
    if conds:
        q += " WHERE " + " AND ".join(conds)
    q += " ORDER BY m.dataset, m.relpath"  # batches (and so shards) hold one dataset's maps
    try:
        rows = cat.sql(q).to_pylist()
    except QueryError as exc:
        raise QueryError(f"--where {where!r}: {exc}") from exc
    left: dict[str, int] = {}
    keep = []
    for r in rows:
        why = target.leaves_out(r["geometry"], volumes) or _left_out(r, kinds, stat)
        if why is None:
            keep.append(r)
        else:
            left[why] = left.get(why, 0) + 1
    return keep, left


def _left_out(r: dict[str, Any], kinds: tuple[str, ...], stat: str) -> str | None:
    """Why the set's settings leave a catalog map out (None: taken)."""
    if r["map_kind"] not in kinds:
        return "model maps (no contrast: residuals, fit; --model-maps takes them)"
    if max(r["n_volumes"] or 1, r["n_volumes_r"] or 1) > 1 and r["map_index"] is None:
        return "multi-volume maps (e.g. an F contrast's effect, one volume per contrast row)"
    if stat == "z" and r["stat"] not in _Z_READY:
        return "maps with no z equivalent (only t, F, p and z maps go into a z set)"
    return None


@declared(method=RESAMPLE_METHOD, stat=FEATURE_STAT, p_sided=P_SIDE, background=BACKGROUND, jobs=JOBS,
          batch_size=BATCH_SIZE)
def build_features(
    store: str | os.PathLike[str],
    name: str | None = None,
    *,
    grid: str | Target | dict = "MNI152-2mm",
    mask: str | os.PathLike[str] | np.ndarray = "brain",
    method: str = "linear",
    stat: str = "native",
    p_sided: str = "one",
    zero_as_missing: bool = False,
    background: str = "auto",
    model_maps: bool = False,
    where: str | None = None,
    projection: dict[str, Any] | None = None,
    volumes: bool = True,
    mesh: str | os.PathLike[str] | Target | None = None,
    subjects_dir: str | os.PathLike[str] | None = None,
    jobs: int | None = None,
    scheduler: Any = None,
    batch_size: int | None = None,
    progress: bool | None = None,
) -> FeatureReport:
    """Resample the catalog's maps onto one grid and mask into a named feature set.

    Parameters
    ----------
    store : path
        A store with a catalog (``mapstore index``).
    name : str, optional
        Feature set name; default ``"default"`` for the default settings, else one made
        from the settings.
    grid : str, TargetGrid or dict, default="MNI152-2mm"
        ``MNI152-1mm``/``MNI152-2mm``/``MNI152-3mm`` (nilearn's template grids), a
        reference image path, a JSON file ``{"shape": ..., "affine": ...}``, or a grid.
        ``fsaverage5`` makes a surface set: both hemispheres of nilearn's fsaverage5 in one
        row (left vertices, then right), surface maps resampled between fsaverage densities
        by nearest vertex on the sphere, volume maps projected (``projection``).  A JSON mesh
        description (:func:`mapstore.targets.mesh_from_description`: GIFTI surfaces per
        hemisphere, e.g. fsLR or another fsaverage density) makes a surface set on that mesh.
        A CIFTI-2 file (``.dscalar.nii``) makes a grayordinate set on its brain models.
    mask : str, path or ndarray, default="brain"
        ``brain`` (nilearn's MNI152 brain mask on the grid), ``intersection`` (voxels
        every selected map covers), ``coverage:F`` (covered by at least a fraction F of
        the maps), a mask image, or a boolean array of the grid's shape.
    method : {"linear", "nearest", "cubic"}, default="linear"
    stat : {"native", "z"}, default="native"
        Keep each map's own statistic, or convert t and p maps to z (z maps pass).
    p_sided : {"one", "two"}, default="one"
        How p maps were computed, for p to z.
    zero_as_missing : bool, default=False
        Treat every exact zero in the sources as missing (a manual switch; the model's
        mask and ``background`` usually make it unnecessary).
    background : {"auto", "keep"}, default="auto"
        Where a map's model left no mask, ``auto`` treats a zero background (exact zeros
        reaching the edge of the volume, see :func:`zero_background`) as missing; ``keep``
        counts it as data.  A model's own mask (nilearn's ``_mask.nii.gz``, a BIDS ``_mask``
        with the map's entities, a name rule's ``mask``) always applies.
    model_maps : bool, default=False
        Also take model maps (a stat without a contrast: residuals, R squared).  By default
        a set holds contrast maps only.  Multi-volume maps are always left out (reported).
    where : str, optional
        SQL predicate over ``maps`` (aliased ``m``) choosing which maps to include.
    projection : dict, optional
        Surface sets: ``nilearn.surface.vol_to_surf`` parameters for volume maps (default
        :data:`mapstore.targets.DEFAULT_PROJECTION`: five depths between the white and pial
        surfaces, linear interpolation); recorded in every row's feature key.
    volumes : bool, default=True
        Surface sets: project volume maps onto the mesh (False leaves them out).
    mesh : path or SurfaceTarget, optional
        Grayordinate sets: a mesh description of the template's cortex (its vertex counts), to
        project volume maps' cortex and resample GIFTI maps of other spaces onto it.  Without
        it, a template on fsaverage5 uses nilearn's; others leave volume maps' cortex missing.
    subjects_dir : path, optional
        Surface and grayordinate sets on fsaverage: the FreeSurfer subjects folder (fMRIPrep's
        ``sourcedata/freesurfer``) whose ``sub-<label>/surf/?h.sphere.reg`` take each subject's
        ``space-fsnative`` maps onto the target (nearest vertex by angle); the files' hashes are in
        the rows' feature keys.
    jobs : int, optional
        Local worker processes (default: all cores).
    scheduler : dask.distributed.Client or str, optional
        Run the batches on this Dask cluster instead (workers must see the same files).
    batch_size : int, optional
        Maps per task and per shard file.
    progress : bool, optional
        Progress bar (default: when standard error is a terminal).
    """
    t0 = time.perf_counter()
    jobs = resolve_jobs(jobs)
    if progress is None:
        progress = sys.stderr.isatty()
    digest = settings_digest(__version__, build_settings(
        name, grid=grid, mask=mask, method=method, stat=stat, p_sided=p_sided, zero_as_missing=zero_as_missing,
        background=background, model_maps=model_maps, where=where, projection=projection, volumes=volumes,
        mesh=mesh, subjects_dir=subjects_dir))
    target = resolve_target(grid, mesh)
    cat = Catalog(store)
    cat.require_catalog()
    default_settings = (grid == "MNI152-2mm" and str(mask) == "brain" and method == "linear"
                        and stat == "native" and not zero_as_missing and background == "auto" and not model_maps)
    name = _set_name(name or target.default_name(mask, method, stat, default_settings))
    settings, volumes_in = target.prepare(
        BuildSettings(method, stat, p_sided, zero_as_missing, background, projection), volumes)
    store_path = cat.path
    set_dir = store_path / "features" / name
    # scipy (the zero background's components, sparse resampling) and zlib-ng imported once, before the fork
    run = dict(jobs=jobs, scheduler=scheduler, progress=progress, preload=WORKER_IMPORTS)
    with write_lock(store_path):
        head = read_head(store_path)
        kinds = ("contrast", "model") if model_maps else ("contrast",)
        rows_sel, left_out = _select_maps(Catalog(store_path), where, kinds, target, stat, volumes_in)
        attach_registrations(rows_sel, subjects_dir)
        batch_n = batch_size or max(4, min(64, len(rows_sel) // (jobs * 4) + 1))
        mk, coverage_problems = _resolve_mask(mask, target, settings, rows_sel, set_dir, batch_n, run)
        existing = head.features.get(name)
        spec = _set_spec(name, target, mk, settings, kinds, where, sketch_of(store_path, existing, mk.n_voxels),
                         os.path.abspath(subjects_dir) if subjects_dir is not None else None)
        old_rows = _previous_rows(store_path, name, existing, spec)
        try:
            _write_set_files(set_dir, spec, mk, fresh=not existing)
            kept, todo, dropped, absent = _plan_rows(rows_sel, spec, old_rows, batch_n, set_dir, mk, target, settings)
            built = _run_batches(todo, run, store_path, set_dir, name)
            new_rows, problems = built.rows, coverage_problems + absent + built.problems
            default = name if head.default_features is None or name == DEFAULT_SET else head.default_features
            if (existing is not None and not todo and not dropped and not problems and existing.catalog == head.catalog
                    and existing.spec_id == spec.spec_id and existing.n_rows == kept.num_rows
                    and default == head.default_features):
                # nothing changed (a warm run): the set's tables and HEAD stay as they are
                rows_table, entry = kept, existing
            else:
                rows_table, entry = write_tables(store_path, name, kept, built, problems, dropped, existing)
                head.features[name] = dataclasses.replace(entry, n_rows=rows_table.num_rows, spec_id=spec.spec_id,
                                                          catalog=head.catalog)
                head.default_features = default
                commit_head(store_path, head, {"event": "features", "set": name, "built": len(new_rows),
                                               "rows": rows_table.num_rows})
        except BaseException as exc:
            try:
                named = read_head(store_path).features.get(name) is not None
            except MapstoreError:
                named = True  # unsure what HEAD names: keep the files
            if not existing and not named:
                shutil.rmtree(set_dir, ignore_errors=True)  # a new set no HEAD names: nothing of it is kept
            if isinstance(exc, OSError):
                _raise_if_full(exc, store_path, [])
            raise
        collect_feature_garbage(store_path, set_dir, entry.rows, existing.rows if existing else None)
        if not problems:  # nothing to retry: the same settings on the same catalog have nothing to do
            shards = sorted(set(rows_table["shard"].to_pylist()))
            remember(store_path, digest, {
                "name": name, "catalog": head.catalog, "rows": entry.rows, "n_rows": rows_table.num_rows,
                "shards": {f: (set_dir / "shards" / f).stat().st_size for f in shards},
                "head_line": f"feature set {name!r}: grid {target.name}, mask {mk.name} ({mk.n_voxels:,} {target.unit})",
                "left_out": left_out}, write_json_atomic)

    report = FeatureReport(name=name, n_features=mk.n_voxels, grid=target.name, mask=mk.name,
                           n_built=len(new_rows), n_unchanged=kept.num_rows, n_removed=dropped,
                           n_problems=len(problems),
                           seconds=time.perf_counter() - t0, paths=built.paths, problems=problems, left_out=left_out,
                           unit=target.unit)
    if rows_table.num_rows == 0 and problems:
        reasons = Counter(p.reason for p in problems).most_common(3)
        raise FeatureError(f"feature set {name!r}: every selected map failed ({len(problems)}); most common "
                           "reasons: " + "; ".join(f"{r} (x{n})" for r, n in reasons) +
                           f". The failures are recorded: mapstore sql --store {store_path} "
                           "\"SELECT * FROM feature_problems\"", report=report)
    return report


def _set_name(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_.:" else "_" for c in name).replace(":", "_")


def _resolve_mask(mask: Any, target: Target, settings: BuildSettings, rows_sel: list[dict[str, Any]],
                  set_dir: Path, batch_n: int, run: dict[str, Any]) -> tuple[Mask, list[Problem]]:
    """The set's mask; a coverage mask (``intersection``, ``coverage:F``) reads every selected map once."""
    mk = resolve_mask(mask, target)
    if not isinstance(mk, float):
        return mk, []
    items = [SourceMap.from_row(r, "") for r in rows_sel]
    batches = [Batch(str(set_dir), "", items[i:i + batch_n], target, settings, coverage_only=True)
               for i in range(0, len(items), batch_n)]
    counts = np.zeros(target.n_positions, dtype=np.int64)
    n_ok = 0
    problems: list[Problem] = []
    for res in run_units(run_batch, batches, desc="coverage", weight=len, unit="map", **run):
        counts += res.counts
        n_ok += res.n
        problems += res.problems
    if n_ok == 0:
        raise FeatureError("no selected map could be read to compute a coverage mask")
    need = int(np.ceil(mk * n_ok - 1e-9))
    label = "intersection" if mk == 1.0 else f"coverage>={mk:g}"
    # within the brain (the cortex): fields of view reach far outside it
    base = target.base_mask()
    inside = base.to_volume().reshape(-1)
    return mask_from_array(target, ((counts >= max(need, 1)) & inside).reshape(target.shape),
                           f"{base.name}&{label}"), problems


def _set_spec(name: str, target: Target, mk: Mask, settings: BuildSettings, kinds: tuple[str, ...],
              where: str | None, sketch: str, subjects_dir: str | None) -> FeatureSetSpec:
    """``set.json``: everything a row's value depends on, and its id (made last, never changed after)."""
    extra = target.spec_fields(settings)
    versions = {**library_versions(), **extra.pop("versions", {})}
    spec = FeatureSetSpec(name=name, grid=target.to_json(), grid_id=target.grid_id,
                          mask={"name": mk.name, "n_voxels": mk.n_voxels, "sha256": mk.sha256}, mask_sha256=mk.sha256,
                          method=settings.method, stat=settings.stat, p_sided=settings.p_sided,
                          zero_as_missing=settings.zero_as_missing, background=settings.background, kinds=list(kinds),
                          where=where, versions=versions, **extra,
                          sketch=sketch, subjects_dir=subjects_dir)  # the last two recorded, not in the id
    spec.spec_id = spec_id(spec)
    return spec


def sketch_of(store_path: Path, existing: FeatureEntry | None, n_voxels: int) -> str:
    """A set keeps the sketch directions it was made with (its rows' sketches must compare)."""
    if existing:
        return FeatureSetSpec.read(store_path / existing.dir).sketch
    return sketch_kind(n_voxels)


def _previous_rows(store_path: Path, name: str, existing: FeatureEntry | None, spec: FeatureSetSpec) -> pa.Table:
    """The set's current rows; a set of this name with other settings is refused."""
    if not existing:
        return ROWS_SCHEMA.empty_table()
    old = FeatureSetSpec.read(store_path / existing.dir)
    if old.spec_id != spec.spec_id:
        raise FeatureError(f"feature set {name!r} exists with other settings (grid "
                           f"{old.grid['name']}, mask {old.mask['name']}, method "
                           f"{old.method}, stat {old.stat}); choose another name")
    return conform(read_parquet(store_path / existing.rows), ROWS_SCHEMA)


def _write_set_files(set_dir: Path, spec: FeatureSetSpec, mk: Mask, fresh: bool) -> None:
    (set_dir / "shards").mkdir(parents=True, exist_ok=True)
    if fresh or not (set_dir / "mask.npy").exists():
        tmp = set_dir / f".mask.{uuid.uuid4().hex}.npy"
        np.save(tmp, mk.indices)
        os.replace(tmp, set_dir / "mask.npy")
    try:  # the same spec again (a warm run) leaves the file alone
        same = json.loads((set_dir / "set.json").read_text()) == json.loads(json.dumps(spec.to_json()))
    except (OSError, ValueError):
        same = False
    if not same:
        spec.write(set_dir)


def _plan_rows(rows_sel: list[dict[str, Any]], spec: FeatureSetSpec, old_rows: pa.Table, batch_n: int,
               set_dir: Path, mk: Mask, target: Target, settings: BuildSettings
               ) -> tuple[pa.Table, list[Batch], int, list[Problem]]:
    """Rows kept as they are, batches of maps to build (one dataset each), how many rows go, and the
    annexed maps not fetched that have no row (a problem each)."""
    wanted: dict[str, SourceMap] = {}
    dataset_of: dict[str, str] = {}
    for r in rows_sel:
        key = feature_key(r["sha256"], spec, r["dof"], r["model_mask_sha256"], SourceMap.key_sources(r),
                          r.get("dof_numerator"), r.get("map_index"), SourceMap.registration_key(r))
        wanted[r["map_id"]] = SourceMap.from_row(r, key)
        dataset_of[r["map_id"]] = r["dataset"]
    # keyed by map too: byte-identical copies of a file share a feature key, not a row
    have = {mk_: i for i, mk_ in enumerate(zip(old_rows["map_id"].to_pylist(),
                                               old_rows["feature_key"].to_pylist()))}
    # a row whose shard is damaged (missing, cut short, not a float32 .npy of the mask's width) is built again
    sound = _sound_shards(set_dir, old_rows, mk.n_voxels)
    shard_of, row_of = old_rows["shard"].to_pylist(), old_rows["row"].to_pylist()
    have = {k: i for k, i in have.items() if sound.get(shard_of[i], 0) > row_of[i] >= 0}
    keep_idx = [have[(m, it.key)] for m, it in wanted.items() if (m, it.key) in have]
    todo = [it for m, it in wanted.items() if (m, it.key) not in have]
    # an annexed map not fetched keeps a row built from the same content (its key names it), and
    # has none built until it is fetched
    gone = {r["map_id"]: r for r in rows_sel if r.get("content") == "not-present"}
    absent = [Problem(os.path.join(gone[it.map_id]["root"], gone[it.map_id]["relpath"]), "not-present",
                      "an annexed map whose content is not fetched: no row until it is",
                      "fetch it ('mapstore index --fetch', or 'datalad get' on it), index, then build again",
                      "warning", stage="features", map_id=it.map_id) for it in todo if it.map_id in gone]
    todo = [it for it in todo if it.map_id not in gone]
    if len(keep_idx) == old_rows.num_rows:  # nothing changed (a warm run): no take, whose index array
        kept = old_rows                     # would be pyarrow's first conversion, which imports pandas
    else:
        kept = old_rows.take(pa.array(sorted(keep_idx), pa.int64())) if keep_idx else old_rows.slice(0, 0)
    seed = Sketcher.for_set(mk.sha256, mk.n_voxels).seed
    batches = [Batch(str(set_dir), f"shard-{file_slug(ds)}-{new_snapshot_id()}-{i:05d}.npy", items, target,
                     settings, sketch_seed=seed, sketch=spec.sketch)
               for ds, items, i in _per_dataset(todo, dataset_of, batch_n)]
    return kept, batches, old_rows.num_rows - kept.num_rows, absent


def _sound_shards(set_dir: Path, rows: pa.Table, n_voxels: int) -> dict[str, int]:
    """Rows held by each sound shard the rows table names (a damaged shard is left out: its rows are
    built again).  Only headers and sizes are read."""
    import stat as stat_

    out: dict[str, int] = {}
    for name in set(rows["shard"].to_pylist()) if rows.num_rows else ():
        f = set_dir / "shards" / str(name)
        try:
            if "/" in str(name) or not stat_.S_ISREG(os.stat(f).st_mode):
                continue
            arr = np.load(f, mmap_mode="r", allow_pickle=False)
            if arr.dtype == np.float32 and arr.ndim == 2 and arr.shape[1] == n_voxels and \
                    os.path.getsize(f) >= arr.offset + arr.nbytes:  # type: ignore[attr-defined]
                out[str(name)] = arr.shape[0]
        except (OSError, ValueError, EOFError):
            continue
    return out


@dataclass
class Built:
    rows: list[dict[str, Any]]
    problems: list[Problem]
    paths: dict[str, int]
    created: list[Path]  # what this run wrote, removed if the disk fills
    snap: str  # names this run's rows, problems and copies tables


WORKER_IMPORTS = ("scipy.ndimage", "scipy.sparse", "zlib_ng")  # what a batch imports beyond this module's imports


def _run_batches(batches: list[Batch], run: dict[str, Any], store_path: Path, set_dir: Path, name: str) -> Built:
    snap = new_snapshot_id()
    built = Built([], [], {}, [set_dir / "shards" / b.shard for b in batches] +
                  [set_dir / f"{kind}-{snap}.parquet" for kind in ("rows", "problems", "copies")], snap)
    try:
        for res in run_units(run_batch, batches, desc=f"features {name}", weight=len, unit="map", **run):
            built.rows += res.rows
            built.problems += res.problems
            for r in res.rows:
                built.paths[r["resample_path"]] = built.paths.get(r["resample_path"], 0) + 1
    except OSError as exc:
        _raise_if_full(exc, store_path, built.created)
        raise
    return built


def write_tables(store_path: Path, name: str, kept: pa.Table, built: Built, problems: list[Problem],
                  dropped: int, existing: FeatureEntry | None, copies: pa.Table | None = None
                  ) -> tuple[pa.Table, FeatureEntry]:
    """The rows, problems and copies tables of the new state of the set; returns rows and its HEAD entry.

    ``copies`` gives the copies table (a parcel set takes its source set's) instead of scanning the rows.
    """
    new_rows, created, snap = built.rows, built.created, built.snap
    rows_table = pa.concat_tables([kept, pa.Table.from_pylist(new_rows, schema=ROWS_SCHEMA)])
    rows_table = rows_table.sort_by([("map_id", "ascending")])
    rel = {kind: f"features/{name}/{kind}-{snap}.parquet" for kind in ("rows", "problems", "copies")}
    entry = FeatureEntry(f"features/{name}", rel["rows"], rel["problems"])
    try:
        write_parquet_atomic(rows_table, store_path / rel["rows"])
        write_parquet_atomic(pa.Table.from_pylist([p.row(FPROBLEMS_SCHEMA) for p in problems], schema=FPROBLEMS_SCHEMA), store_path / rel["problems"])
        # copies among all the set's rows, from the sketches (new shards are in place already)
        if copies is None and not new_rows and not dropped and existing and existing.copies and \
                (store_path / existing.copies).exists():
            copies = read_parquet(store_path / existing.copies)  # same rows: same pairs
        if copies is None:
            copies = find_copies(FeatureSet(store_path, name, entry))
        write_parquet_atomic(copies, store_path / rel["copies"])
    except OSError as exc:
        _raise_if_full(exc, store_path, created)
        raise
    return rows_table, dataclasses.replace(entry, copies=rel["copies"])


def _raise_if_full(exc: OSError, store: Path, created: list[Path]) -> None:
    """On a full disk, remove what this run wrote and say so (the store still serves its last state)."""
    if exc.errno not in (errno.ENOSPC, errno.EDQUOT):
        return
    for p in created:
        with contextlib.suppress(OSError):
            p.unlink()
    raise StoreFull(f"{store}: no space left on the device (while building features); the store still serves "
                    "what it served before, and nothing of this run was kept. Free space, or move the store, "
                    "and run the command again") from exc
