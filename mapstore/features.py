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
import sys
import time
import uuid
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ._version import __version__
from .params import positive_int, resolve_jobs
from .runner import run as run_units
from .errors import FeatureError, GridError, MapstoreError, ParameterError, QueryError, StoreFull
from .grid import (
    METHODS,
    Mask,
    TargetGrid,
    builtin_grid,
    crop_grid,
    grid_from_image,
    grid_from_spec,
    mask_from_array,
    mask_from_image,
    mni152_brain_mask,
    read_volume,
    resample,
)
from .atlas import ParcelGrid, paint
from .grayordinates import (
    GrayordinateTarget,
    cortex_positions,
    grayordinate_target,
    match,
    target_from_spec as gray_from_spec,
    to_cifti_image,
    voxel_positions,
)
from .copies import SKETCH_BITS, Sketcher, find_copies, sketch_kind
from .meshfiles import MeshFile, mesh_file
from .surface import (
    SurfaceTarget,
    builtin_surface,
    check_projection,
    cifti_cortex,
    cortex_mask,
    mesh_from_description,
    missing_meshes,
    vertex_index,
    project_volume,
    read_surface_values,
    surface_from_spec,
    to_surface_image,
)
from .stats import convert
from .tables import FeatureEntry, FeatureSetSpec
from .store import (
    FPROBLEMS_SCHEMA,
    ROWS_SCHEMA,
    Catalog,
    checkpoint,
    commit_head,
    conform,
    file_slug,
    leased_files,
    new_snapshot_id,
    read_head,
    write_json_atomic,
    write_lock,
    write_parquet_atomic,
)

__all__ = ["FeatureReport", "FeatureSet", "build_features", "ROWS_SCHEMA", "DEFAULT_SET"]

DEFAULT_SET = "default"
_MESHED = (SurfaceTarget, GrayordinateTarget)
UNITS = {"volume": "voxels", "surface": "vertices", "grayordinates": "grayordinates", "parcels": "parcels"}  # targets whose rows are vertices (and voxels), not a volume
@dataclass
class FeatureReport:
    """What one ``features`` run did."""

    name: str
    n_voxels: int
    grid: str
    mask: str
    built: int
    skipped: int
    dropped: int
    failed: int
    seconds: float
    paths: dict[str, int] = field(default_factory=dict)
    problems: list[dict[str, Any]] = field(default_factory=list)
    left_out: dict[str, int] = field(default_factory=dict)
    unit: str = "voxels"  # what a row's values are: voxels, vertices, grayordinates or parcels

    def summary(self) -> str:
        rate = self.built / self.seconds if self.seconds > 0 else 0.0
        lines = [f"feature set {self.name!r}: grid {self.grid}, mask {self.mask} ({self.n_voxels:,} {self.unit})",
                 f"built {self.built} rows ({rate:,.1f} maps/s), kept {self.skipped} unchanged, "
                 f"dropped {self.dropped} stale, {self.failed} failed in {self.seconds:.1f} s"]
        for why, n in self.left_out.items():
            lines.append(f"left out {n} {why}")
        if self.paths:
            lines.append("resampling paths: " + ", ".join(f"{k} x{v}" for k, v in sorted(self.paths.items())))
        for p in self.problems[:5]:
            lines.append(f"  failed: {p['path']}: {p['reason']}")
        if len(self.problems) > 5:
            lines.append(f"  ... and {len(self.problems) - 5} more (SELECT * FROM feature_problems)")
        return "\n".join(lines)


def _library_versions() -> dict[str, str]:
    import nibabel
    import scipy

    return {"mapstore": __version__, "numpy": np.__version__, "scipy": scipy.__version__,
            "nibabel": nibabel.__version__}


def _resolve_grid(grid: Any, mesh: Any = None) -> TargetGrid | SurfaceTarget | GrayordinateTarget:
    if mesh is not None:
        if not (isinstance(grid, GrayordinateTarget) or (isinstance(grid, str) and (
                grid.startswith("cifti:") or grid.endswith((".dscalar.nii", ".dtseries.nii"))))):
            raise ParameterError("mesh applies to grayordinate sets (a CIFTI template as grid); a surface set's "
                                 "mesh is its grid: pass the mesh description as grid")
        surf = mesh if isinstance(mesh, SurfaceTarget) else mesh_from_description(mesh)
        if isinstance(grid, GrayordinateTarget):
            return grayordinate_target(grid.template, surf)
        return grayordinate_target(grid[len("cifti:"):] if grid.startswith("cifti:") else grid, surf)
    if isinstance(grid, (TargetGrid, *_MESHED)):
        return grid
    if isinstance(grid, str) and builtin_surface(grid):
        return builtin_surface(grid)
    if isinstance(grid, str) and (grid.startswith("cifti:") or grid.endswith((".dscalar.nii", ".dtseries.nii"))):
        return grayordinate_target(grid[len("cifti:"):] if grid.startswith("cifti:") else grid)
    if isinstance(grid, dict):
        return grid_from_spec(grid["shape"], grid["affine"], grid.get("name", "custom"))
    if not isinstance(grid, str):
        raise ParameterError(f"grid must be a built-in name, an image path, a JSON spec path or a "
                             f"TargetGrid, got {type(grid).__name__}")
    if grid.endswith(".json"):
        want = '{"shape": [x, y, z], "affine": [[...4x4...]]}'
        try:
            doc = json.loads(Path(grid).read_text())
        except (OSError, ValueError) as exc:
            raise ParameterError(f"grid spec {grid}: cannot read ({exc}); expected JSON {want}") from None
        if isinstance(doc, dict) and "hemispheres" in doc:  # a mesh description: a surface set on the user's mesh
            return mesh_from_description(grid)
        missing = [k for k in ("shape", "affine") if not isinstance(doc, dict) or k not in doc]
        if missing:
            raise ParameterError(f"grid spec {grid}: no {' and no '.join(missing)}; expected JSON {want}")
        try:
            return grid_from_spec(doc["shape"], doc["affine"], doc.get("name", Path(grid).stem))
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"grid spec {grid}: {exc}; expected JSON {want}") from None
    if grid.endswith((".nii", ".nii.gz")):
        return grid_from_image(grid)
    return builtin_grid(grid)


def _spec_id(doc: dict[str, Any]) -> str:
    keep = {k: doc.get(k) for k in ("grid_id", "mask_sha256", "method", "stat", "p_sided", "zero_as_missing",
                                    "background", "kinds")}
    if doc.get("projection") is not None:  # surface sets only: volume sets keep their ids
        keep["projection"] = doc["projection"]
    return hashlib.sha256(json.dumps(keep, sort_keys=True).encode()).hexdigest()[:16]


def feature_key(sha256: str, spec: dict[str, Any], dof: float | None, model_mask_sha256: str | None = None,
                more: str = "") -> str:
    """Hash of everything a row's values depend on; ``more`` adds an item's other sources (a hemisphere)."""
    parts = [sha256, spec["grid_id"], spec["mask_sha256"], spec["method"], spec["stat"],
             spec["p_sided"], str(spec["zero_as_missing"]), spec["background"], model_mask_sha256 or "",
             "" if dof is None or spec["stat"] == "native" else f"{dof:.6g}", __version__]
    if spec.get("projection") is not None:
        parts += [json.dumps(spec["projection"], sort_keys=True), more]
    text = "|".join(parts)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


@dataclass
class _Item:
    map_id: str
    path: str
    sha256: str
    stat: str
    dof: float | None
    key: str
    mask_path: str | None = None  # the model's own mask
    mask_sha256: str | None = None
    geometry: str = "volume"  # of the source: volume, surface (a hemisphere pair) or grayordinates
    hemi: str | None = None  # surface: the hemisphere of path
    path_r: str | None = None  # surface: the right hemisphere's file (path is then the left's)
    sha256_r: str | None = None
    mask_path_r: str | None = None
    mask_sha256_r: str | None = None
    space: str | None = None  # surface: the map's space entity (chooses the resampling path)
    native: dict[str, MeshFile] | None = None  # fsnative maps: the subject's sphere.reg per hemisphere
    native_missing: str | None = None  # fsnative maps: why there is no registration


@dataclass
class _Batch:
    set_dir: str
    shard: str
    items: list[_Item]
    grid: TargetGrid
    method: str
    stat: str
    p_sided: str
    zero_as_missing: bool
    background: str = "auto"
    coverage_only: bool = False
    sketch_seed: int = 0
    sketch: str = "count"  # the set's sketch directions (copies.sketch_kind)
    projection: dict[str, Any] | None = None  # surface sets: how volume maps are projected


def zero_background(vol: np.ndarray, min_fraction: float = 0.01) -> np.ndarray | None:
    """The voxels of a zero background: exact zeros that reach the edge of the volume.

    GLM software writes exact 0 outside its analysis mask.  The rule: the exact zeros that
    are connected, through voxel faces, to a face of the volume are background when they
    make up at least ``min_fraction`` of it; zeros enclosed by data stay values (a true
    zero effect).  Returns the background as booleans, or None when there is none.

    Examples
    --------
    >>> vol = np.zeros((6, 6, 6), dtype=np.float32); vol[1:5, 1:5, 1:5] = 1.0; vol[2, 2, 2] = 0.0
    >>> bg = zero_background(vol)
    >>> int(bg.sum()), bool(bg[2, 2, 2])   # 216 - 64 voxels of border zeros; the enclosed zero is data
    (152, False)
    """
    from scipy import ndimage

    zero = vol == 0
    if not zero.any():
        return None
    labels, _ = ndimage.label(zero)  # face connectivity
    faces = np.concatenate([labels[0].ravel(), labels[-1].ravel(), labels[:, 0].ravel(), labels[:, -1].ravel(),
                            labels[:, :, 0].ravel(), labels[:, :, -1].ravel()])
    edge = np.unique(faces[faces > 0])
    if edge.size == 0:
        return None
    bg = np.isin(labels, edge)
    return bg if bg.sum() >= min_fraction * vol.size else None


def _model_mask(path: str, sha256: str, facts, cache: dict[str, np.ndarray]) -> np.ndarray:
    """The model's mask on a map's grid (nearest neighbour if its grid differs), as booleans."""
    key = f"{sha256}|{facts.grid_id}"
    hit = cache.get(key)
    if hit is None:
        try:
            data, mfacts = read_volume(path, expect_sha256=sha256)
        except GridError as exc:
            raise FeatureError(f"the model's mask of this map is unusable: {exc}") from None
        if mfacts.grid_id != facts.grid_id:
            data = resample(data, mfacts.affine_array, grid_from_spec(facts.spatial_shape, facts.affine_array),
                            "nearest")
        hit = cache[key] = np.nan_to_num(data, nan=0.0) != 0
    return hit


def _vector(item: _Item, b: _Batch, indices: np.ndarray | None, grid: TargetGrid | None = None,
            masks: dict[str, np.ndarray] | None = None) -> tuple[np.ndarray, str, str, str, int]:
    """One map's feature vector: missing region, conversion on the source grid, resampling.

    A statistic transform (t or p to z) is not linear, so it does not commute with
    interpolation: it runs on the source voxels, before resampling.
    """
    if isinstance(b.grid, SurfaceTarget):
        return _surface_vector(item, b, indices, masks)
    if isinstance(b.grid, GrayordinateTarget):
        return _grayordinate_vector(item, b, indices, masks)
    vol, facts, conversion, missing_from, clipped = _source_volume(item, b, masks)
    out, path = resample(np.asarray(vol, dtype=np.float32), facts.affine_array, grid or b.grid, b.method,
                         return_path=True)
    flat = out.reshape(-1)
    vec = flat if indices is None else flat[indices]
    return np.asarray(vec, dtype=np.float32), conversion, path, missing_from, clipped


def _source_volume(item: _Item, b: _Batch, masks: dict[str, np.ndarray] | None):
    """A volume map's values on its own grid: missing region as NaN, statistic converted."""
    converting = b.stat == "z" and item.stat in ("t", "p")
    # p close to 1 (z < -5) is not representable in float32: convert from the file's precision
    vol, facts = read_volume(item.path, expect_sha256=item.sha256, dtype=np.float64 if converting else np.float32)
    missing_from = "none"
    if item.mask_path and item.mask_sha256:
        vol[~_model_mask(item.mask_path, item.mask_sha256, facts, {} if masks is None else masks)] = np.nan
        missing_from = "model-mask"
    elif b.background == "auto":
        bg = zero_background(vol)
        if bg is not None:
            vol[bg] = np.nan
            missing_from = "zero-background"
    if b.zero_as_missing:
        vol[vol == 0] = np.nan
        missing_from = "zeros" if missing_from == "none" else missing_from + "+zeros"
    clipped = 0
    if b.stat == "z" and item.stat == "p":
        clipped = int(np.count_nonzero(vol == 0))  # p = 0 where the model has data: clipped, reported
    vol, conversion = convert(vol, item.stat, b.stat, dof=item.dof, sided=b.p_sided, where=item.path)
    return vol, facts, conversion, missing_from, clipped


def _surface_vector(item: _Item, b: _Batch, indices: np.ndarray | None, masks: dict[str, Any] | None
                    ) -> tuple[np.ndarray, str, str, str, int]:
    """One row of a surface set: both hemispheres on the target mesh (left, then right)."""
    target: SurfaceTarget = b.grid  # type: ignore[assignment]
    cache = {} if masks is None else masks
    out = np.full(target.n_vertices, np.nan, dtype=np.float32)
    if item.geometry == "volume":
        vol, facts, conversion, missing_from, clipped = _source_volume(item, b, cache)
        out[:] = project_volume(np.asarray(vol, dtype=np.float32), facts.affine_array, target, b.projection,
                                _meshes(cache, target), cache)
        return (out if indices is None else out[indices]), conversion, "vol_to_surf", missing_from, 0
    halves, conversion, clipped, missing = _hemispheres(item, b)
    paths = set()
    for hemi, vals in halves.items():
        idx, path = vertex_index(item.space, vals.size, hemi, target, cache, _native(item, hemi))
        paths.add(path)
        out[target.part(hemi)] = vals if idx is None else vals[idx]
    return (out if indices is None else out[indices]), conversion, "+".join(sorted(paths)) or "none", \
        "+".join(missing) or "none", clipped


def _meshes(cache: dict[str, Any], target: SurfaceTarget) -> dict[str, Any]:
    """The target's surfaces, read once per batch."""
    meshes = cache.get("_meshes")
    if meshes is None:
        meshes = cache["_meshes"] = target.meshes()
    return meshes


def _native(item: _Item, hemi: str) -> MeshFile | None:
    """The subject's registration sphere of an fsnative map's hemisphere (None: not an fsnative map)."""
    if item.native_missing:
        raise FeatureError(item.native_missing)
    return (item.native or {}).get(hemi)


_FS_HEMI = {"L": "lh", "R": "rh"}


def _attach_registrations(rows: list[dict[str, Any]], subjects_dir: str | os.PathLike[str] | None) -> None:
    """Give each fsnative map its subject's FreeSurfer ``surf/?h.sphere.reg`` (read, checked and hashed
    once per subject), or the reason it has none."""
    found: dict[tuple[str, str], Any] = {}
    for r in rows:
        if not (r.get("space") or "").startswith("fsnative") or r.get("geometry") != "surface":
            continue
        if subjects_dir is None:
            continue  # vertex_index says subjects_dir is needed
        sub = r.get("sub")
        if not sub:
            r["native_missing"] = "an fsnative map without a sub- entity: its subject's registration cannot be found"
            continue
        native = {}
        for hemi, fs in _FS_HEMI.items():
            path = os.path.join(os.fspath(subjects_dir), f"sub-{sub}", "surf", f"{fs}.sphere.reg")
            if (sub, hemi) not in found:
                try:
                    found[(sub, hemi)] = mesh_file(str(subjects_dir), "", hemi, "sphere.reg", path, data=False)[0]
                except ParameterError as exc:
                    found[(sub, hemi)] = str(exc)
            native[hemi] = found[(sub, hemi)]
        bad = [v for v in native.values() if isinstance(v, str)]
        if bad:
            r["native_missing"] = f"the subject's registration is unusable: {bad[0]}"
        else:
            r["native"] = native


def _hemispheres(item: _Item, b: _Batch) -> tuple[dict[str, np.ndarray], str, int, list[str]]:
    """A surface map's hemispheres (GIFTI pair, or a CIFTI file's cortex), masked and converted.

    Returns {hemi: values}, the conversion, p values clipped, and what made values missing.
    """
    if item.geometry == "grayordinates":
        halves = cifti_cortex(item.path, read_surface_values(item.path, item.sha256))
        sources = {h: (v, None) for h, v in halves.items()}
    else:
        sources = {}
        for hemi, path, sha, mpath, msha in (("L", item.path, item.sha256, item.mask_path, item.mask_sha256),
                                             ("R", item.path_r, item.sha256_r, item.mask_path_r, item.mask_sha256_r)):
            if path is not None:
                sources[hemi] = (read_surface_values(path, sha), (mpath, msha) if mpath else None)
    missing = ["model-mask"] if any(m for _, m in sources.values()) else []
    conversion, clipped, out = "none", 0, {}
    for hemi in ("L", "R"):
        if hemi not in sources:
            missing.append(f"no-hemi-{hemi}")
            continue
        vals, model_mask = sources[hemi]
        vals = vals.astype(np.float64 if b.stat == "z" and item.stat in ("t", "p") else np.float32)
        if model_mask is not None:
            mvals = read_surface_values(*model_mask)
            if mvals.shape != vals.shape:
                raise FeatureError(f"{model_mask[0]}: the model's mask has {mvals.size} vertices, the map "
                                   f"{vals.size}")
            vals[~(np.nan_to_num(mvals) != 0)] = np.nan
        if b.zero_as_missing:
            vals[vals == 0] = np.nan
        if b.stat == "z" and item.stat == "p":
            clipped += int(np.count_nonzero(vals == 0))
        vals, conversion = convert(vals, item.stat, b.stat, dof=item.dof, sided=b.p_sided,
                                   where=item.path or item.path_r or "")
        out[hemi] = np.asarray(vals, dtype=np.float32)
    if b.zero_as_missing:
        missing.append("zeros")
    return out, conversion, clipped, missing


def _grayordinate_vector(item: _Item, b: _Batch, indices: np.ndarray | None, masks: dict[str, Any] | None
                         ) -> tuple[np.ndarray, str, str, str, int]:
    """One row of a grayordinate set, in the template's brain-model order.

    CIFTI-2 maps are matched by structure and vertex (voxels by position, on the same volume);
    GIFTI hemispheres fill the cortex; volume maps fill the voxels (sampled at the template's voxel
    centres) and, on an fsaverage5 cortex, the vertices through ``vol_to_surf``.
    """
    target: GrayordinateTarget = b.grid  # type: ignore[assignment]
    cache = {} if masks is None else masks
    axis = cache.get("_axis")
    if axis is None:
        axis = cache["_axis"] = target.axis()
    out = np.full(target.n_grayordinates, np.nan, dtype=np.float32)
    missing: list[str] = []
    clipped = 0
    if item.geometry == "grayordinates":
        import nibabel as nib

        vals = read_surface_values(item.path, item.sha256).astype(np.float64)
        if b.zero_as_missing:
            vals[vals == 0] = np.nan
        vals, conversion = convert(vals, item.stat, b.stat, dof=item.dof, sided=b.p_sided, where=item.path)
        t_pos, s_pos = match(nib.load(item.path).header.get_axis(1), axis)
        out[t_pos] = vals[s_pos]
        path = "cifti"
        if t_pos.size < out.size:
            missing.append("not-in-source")
    elif item.geometry == "surface":
        halves, conversion, clipped, missing = _hemispheres(item, b)
        cortex = cortex_positions(axis)
        mesh = _cortex_mesh(target, cache) or SurfaceTarget(
            "template-cortex", cortex["L"][2] if "L" in cortex else 0, cortex["R"][2] if "R" in cortex else 0,
            item.space or "")  # no mesh given: the template's cortex is taken to be on the map's own mesh
        for hemi, (pos, vertex, _) in cortex.items():
            if hemi in halves:
                vals = halves[hemi]
                idx, _ = vertex_index(item.space, vals.size, hemi, mesh, cache, _native(item, hemi))
                out[pos] = (vals if idx is None else vals[idx])[vertex]
        path = "surface-cortex"
        missing.append("volume-structures")
    else:
        vol, facts, conversion, missing_from, clipped = _source_volume(item, b, cache)
        missing = [] if missing_from == "none" else [missing_from]
        vox, flat, vshape, vaff = voxel_positions(axis)
        if vox.size:
            res = resample(np.asarray(vol, dtype=np.float32), facts.affine_array, grid_from_spec(vshape, vaff),
                           b.method)
            out[vox] = res.reshape(-1)[flat]
        cortex = cortex_positions(axis)
        path = "voxels"
        mesh = _cortex_mesh(target, cache)
        if cortex and mesh is not None:
            proj = project_volume(np.asarray(vol, dtype=np.float32), facts.affine_array, mesh, b.projection,
                                  _meshes(cache, mesh), cache)
            for hemi, (pos, vertex, _) in cortex.items():
                out[pos] = proj[mesh.part(hemi)][vertex]
            path = "voxels+vol_to_surf"
        elif cortex:
            missing.append("no-cortex-mesh")
    return (out if indices is None else out[indices]), conversion, path, "+".join(missing) or "none", clipped


def _cortex_mesh(target: GrayordinateTarget, cache: dict[str, Any]) -> SurfaceTarget | None:
    """The template cortex's mesh, found once per batch (it reads the template's header)."""
    if "_cortex_mesh" not in cache:
        cache["_cortex_mesh"] = target.cortex_mesh()
    return cache["_cortex_mesh"]


def _run_batch(b: _Batch) -> dict[str, Any]:
    """Resample a batch of maps into one new shard file (or, for coverage masks, count coverage)."""
    problems: list[dict[str, Any]] = []
    if b.coverage_only:
        counts = np.zeros(b.grid.n_voxels, dtype=np.int32)
        done = 0
        masks: dict[str, np.ndarray] = {}
        for it in b.items:
            try:
                vec = _vector(it, b, None, masks=masks)[0]
            except MapstoreError as exc:
                problems.append(_problem(it, exc))
                continue
            counts += np.isfinite(vec)
            done += 1
        return {"counts": counts, "n": done, "problems": problems}
    indices = np.load(os.path.join(b.set_dir, "mask.npy"))
    if isinstance(b.grid, _MESHED):
        box, local = None, indices
    else:
        box, local = crop_grid(b.grid, indices)  # resample the mask's bounding box only
    shard_path = os.path.join(b.set_dir, "shards", b.shard)
    # built in memory and written with write(): a full disk is then an OSError (ENOSPC), where
    # writing through a memory map would kill the process with SIGBUS
    arr = np.empty((len(b.items), indices.size), dtype=np.float32)
    rows: list[dict[str, Any]] = []
    now = time.strftime("%Y-%m-%dT%H:%M:%S")
    masks: dict[str, np.ndarray] = {}
    sketcher = Sketcher(b.sketch_seed, indices.size, b.sketch)
    for i, it in enumerate(b.items):
        try:
            vec, conversion, path, missing_from, clipped = _vector(it, b, local, box, masks)
        except MapstoreError as exc:
            arr[i] = np.nan
            problems.append(_problem(it, exc))
            continue
        arr[i] = vec
        finite = np.isfinite(vec)
        vals = vec[finite]
        rows.append({"map_id": it.map_id, "feature_key": it.key, "sha256": it.sha256, "shard": b.shard,
                     "row": i, "coverage": float(finite.mean()), "stat_in": it.stat,
                     "stat_out": it.stat if b.stat == "native" else b.stat, "conversion": conversion,
                     "resample_path": path, "built_at": now,
                     "row_sha256": hashlib.sha256(vec.tobytes()).hexdigest(),
                     "vmin": float(vals.min()) if vals.size else None,
                     "vmax": float(vals.max()) if vals.size else None,
                     "vmean": float(vals.mean(dtype=np.float64)) if vals.size else None,
                     "missing_from": missing_from, "p_clipped": clipped,
                     "sketch": sketcher.sketch(vec[None, :])[0].tobytes()})
    write_shard(shard_path, arr)
    return {"rows": rows, "problems": problems}


def write_shard(shard_path: str, arr: np.ndarray) -> None:
    """Write a float32 (rows x features) shard: a new file, then one atomic rename."""
    tmp = shard_path + f".{uuid.uuid4().hex}.tmp"
    try:
        with open(tmp, "wb", buffering=0) as fh:
            np.lib.format.write_array_header_1_0(fh, {"descr": "<f4", "fortran_order": False, "shape": arr.shape})
            view = memoryview(np.ascontiguousarray(arr, dtype=np.float32)).cast("B")
            while view:  # plain writes: a full disk raises ENOSPC (numpy's tofile loses the errno)
                view = view[fh.write(view):]
            os.fsync(fh.fileno())
        checkpoint()
        os.replace(tmp, shard_path)
        checkpoint()
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _per_dataset(items: list[_Item], dataset_of: dict[str, str], n: int):
    """Batches of at most ``n`` items of one dataset each: a study's rows live in its own shards."""
    groups: dict[str, list[_Item]] = {}
    for it in items:
        groups.setdefault(dataset_of[it.map_id], []).append(it)
    k = 0
    for ds, group in groups.items():
        for i in range(0, len(group), n):
            yield ds, group[i:i + n], k
            k += 1


def _n_items(b: _Batch) -> int:
    return len(b.items)


def _problem(it: _Item, exc: Exception) -> dict[str, Any]:
    code = type(exc).__name__.replace("Error", "").lower() or "error"
    reason = str(exc)
    path = it.path or it.path_r or ""
    if reason.startswith(path + ": "):
        reason = reason[len(path) + 2:]  # the row names the file already
    remedy = "re-run 'mapstore index' if the file changed" if "index" in reason else \
        "fix or exclude the map (see the reason)"
    return {"map_id": it.map_id, "path": path, "code": code, "reason": reason, "remedy": remedy}


_Z_READY = ("t", "p", "z")


def _select_maps(cat: Catalog, where: str | None, kinds: tuple[str, ...], stat: str, surface: bool = False,
                 volumes: bool | str = True) -> tuple[list[dict[str, Any]], dict[str, int]]:
    """Maps the set takes, and how many the defaults left out (and why).

    ``volumes`` False (or the reason, a str) leaves volume maps out of a surface set.

    A surface set takes a hemisphere pair as one map, under the left file's id (the right file
    is its ``linked_map``); an unpaired hemisphere comes alone, the other half missing.
    """
    q = ("SELECT m.map_id, m.dataset, m.stat, m.sha256, m.dof, m.relpath, d.root, m.map_kind, m.n_volumes, "
         "m.model_mask, m.model_mask_sha256, coalesce(m.geometry, 'volume') AS geometry, m.hemi, m.space, m.sub, ")
    if surface:  # the right hemisphere's file beside the left's
        q += ("r.relpath AS relpath_r, r.sha256 AS sha256_r, r.model_mask AS model_mask_r, "
              "r.model_mask_sha256 AS model_mask_sha256_r, r.n_volumes AS n_volumes_r FROM maps m "
              "JOIN datasets d USING (dataset) LEFT JOIN maps r ON r.map_id = m.linked_map AND m.hemi = 'L' "
              "AND r.hemi = 'R'")
    else:  # a volume set: no second read of the maps table
        q += ("NULL AS n_volumes_r FROM maps m JOIN datasets d USING (dataset)")
    conds = [f"({where})"] if where else []
    if surface:  # a pair comes once, as its left file
        conds.append("NOT (coalesce(m.geometry, 'volume') = 'surface' AND m.hemi = 'R' AND m.linked_map IS NOT NULL)")
    if conds:
        q += " WHERE " + " AND ".join(conds)
    q += " ORDER BY m.dataset, m.relpath"  # batches (and so shards) hold one dataset's maps
    try:
        rows = cat.sql(q).to_pylist()
    except QueryError as exc:
        raise QueryError(f"--where {where!r}: {exc}") from None
    left: dict[str, int] = {}
    keep = []
    for r in rows:
        kind = r["map_kind"] or "contrast"  # tables from before map kinds were recorded
        if not surface and r["geometry"] != "volume":
            why = f"{r['geometry']} maps (a volume set takes volume maps only)"
        elif surface and r["geometry"] == "volume" and volumes is not True:
            why = volumes if isinstance(volumes, str) else \
                "volume maps (projecting volumes onto the mesh was turned off)"
        elif kind not in kinds:
            why = "model maps (no contrast: residuals, fit; --model-maps takes them)"
        elif max(r["n_volumes"] or 1, r["n_volumes_r"] or 1) > 1:
            why = "multi-volume maps (e.g. an F contrast's effect, one volume per contrast row)"
        elif stat == "z" and r["stat"] not in _Z_READY:
            why = "maps with no z equivalent (only t, p and z maps go into a z set)"
        else:
            keep.append(r)
            continue
        left[why] = left.get(why, 0) + 1
    return keep, left


def _make_mask(mask: str | os.PathLike[str] | np.ndarray, grid: TargetGrid | SurfaceTarget) -> Mask | float:
    """A Mask, or a coverage fraction (float) when the mask comes from the maps themselves."""
    if isinstance(mask, np.ndarray):
        return mask_from_array(grid, mask, "array")
    m = str(mask)
    if isinstance(grid, GrayordinateTarget):
        if m in ("brain", "all"):
            return mask_from_array(grid, np.ones(grid.n_grayordinates, bool), "all-grayordinates")
        if m != "intersection" and not m.startswith("coverage:"):
            raise ParameterError(f"a grayordinate set's mask must be 'all' (the default), 'intersection', "
                                 f"'coverage:FRACTION' or a boolean array of {grid.n_grayordinates}; got {m!r}")
    if isinstance(grid, SurfaceTarget):
        if m in ("brain", "cortex"):
            cortex = cortex_mask(grid)
            if cortex is not None:
                return mask_from_array(grid, cortex, f"{grid.name}-cortex")
            if m == "cortex":
                raise ParameterError(f"mesh {grid.name}: its description gives no 'cortex' files; add them (non-zero "
                                     "on cortex) or use mask='all'")
            return mask_from_array(grid, np.ones(grid.n_vertices, bool), f"{grid.name}-all")
        if m == "all":
            return mask_from_array(grid, np.ones(grid.n_vertices, bool), f"{grid.name}-all")
        if m not in ("intersection",) and not m.startswith("coverage:"):
            raise ParameterError(f"a surface set's mask must be 'cortex' (the default), 'all', 'intersection', "
                                 f"'coverage:FRACTION' or a boolean array of {grid.n_vertices} vertices (left, "
                                 f"then right); got {m!r}")
    if m in ("brain", "MNI152-brain"):
        return mni152_brain_mask(grid)
    if m == "intersection":
        return 1.0
    if m.startswith("coverage:"):
        try:
            frac = float(m.split(":", 1)[1])
        except ValueError:
            frac = -1.0
        if not 0 < frac <= 1:
            raise ParameterError(f"mask {m!r}: the coverage fraction must be in (0, 1], e.g. coverage:0.9")
        return frac
    if os.path.exists(m):
        return mask_from_image(m, grid)
    raise ParameterError(f"mask must be 'brain', 'intersection', 'coverage:FRACTION' or a mask file; got "
                         f"{m!r} (no such file)")


def build_features(
    store: str | os.PathLike[str],
    name: str | None = None,
    *,
    grid: str | TargetGrid | dict = "MNI152-2mm",
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
    mesh: str | os.PathLike[str] | SurfaceTarget | None = None,
    subjects_dir: str | os.PathLike[str] | None = None,
    jobs: int | None = None,
    scheduler: Any = None,
    batch_size: int | None = None,
    progress: bool | None = None,
) -> FeatureReport:
    """Resample the catalog's maps onto one grid and mask into a named feature set.

    (Long only by its parameter list: the body is the phases, each a function below.)

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
        description (:func:`mapstore.surface.mesh_from_description`: GIFTI surfaces per
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
        :data:`mapstore.surface.DEFAULT_PROJECTION`: five depths between the white and pial
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
    _check_options(method, stat, p_sided, background, batch_size)
    jobs = resolve_jobs(jobs)
    if progress is None:
        progress = sys.stderr.isatty()
    target = _resolve_grid(grid, mesh)
    cat = Catalog(store)
    cat.require_catalog()
    default_settings = (grid == "MNI152-2mm" and str(mask) == "brain" and method == "linear"
                        and stat == "native" and not zero_as_missing and background == "auto" and not model_maps)
    name = _set_name(name, default_settings, target, mask, method, stat)
    surface = isinstance(target, _MESHED)
    proj = None
    if isinstance(target, SurfaceTarget):
        method = "nearest-vertex"
    volumes_in: bool | str = volumes
    if surface:
        proj = check_projection(projection) if volumes else {"volumes": "left out"}
        lacking = missing_meshes(target, proj) if volumes and isinstance(target, SurfaceTarget) else []
        if lacking:
            volumes_in = (f"volume maps (the mesh {target.name} has no {' and no '.join(lacking)} surface to project "
                          "them onto: add it to the mesh description)")
            proj = {"volumes": "left out"}
        if volumes and isinstance(target, GrayordinateTarget) and target.mesh is not None \
                and missing_meshes(target.mesh, proj):
            raise ParameterError(f"mesh {target.mesh.name}: no {' and no '.join(missing_meshes(target.mesh, proj))} "
                                 "surface to project volume maps onto; add it to the mesh description, or pass "
                                 "volumes=False (--no-volumes)")
    elif projection is not None:
        raise ParameterError("projection applies to surface and grayordinate sets only")
    store_path = cat.path
    set_dir = store_path / "features" / name
    run = dict(jobs=jobs, scheduler=scheduler, progress=progress)
    with write_lock(store_path):
        head = read_head(store_path)
        kinds = ("contrast", "model") if model_maps else ("contrast",)
        rows_sel, left_out = _select_maps(Catalog(store_path), where, kinds, stat, surface, volumes_in)
        _attach_registrations(rows_sel, subjects_dir)
        batch_n = batch_size or max(4, min(64, len(rows_sel) // (jobs * 4) + 1))
        common = dict(grid=target, method=method, stat=stat, p_sided=p_sided, zero_as_missing=zero_as_missing,
                      background=background, projection=proj)
        mk, coverage_problems = _resolve_mask(mask, target, rows_sel, set_dir, batch_n, common, run)
        spec = _set_spec(name, target, mk, method, stat, p_sided, zero_as_missing, background, kinds, where, proj)
        existing = head.features.get(name)
        old_rows = _previous_rows(store_path, name, existing, spec)
        spec["sketch"] = _sketch_of(store_path, existing, mk.n_voxels)
        spec["subjects_dir"] = os.path.abspath(subjects_dir) if subjects_dir is not None else None
        _write_set_files(set_dir, spec, mk, fresh=not existing)
        kept, todo, dropped = _plan_rows(rows_sel, spec, old_rows, batch_n, set_dir, mk, common)
        built = _run_batches(todo, run, store_path, set_dir, name)
        new_rows, problems = built.rows, coverage_problems + built.problems
        rows_table, entry = _write_tables(store_path, name, kept, built, problems, dropped, existing)
        head.features[name] = dataclasses.replace(entry, n_rows=rows_table.num_rows, spec_id=spec["spec_id"],
                                                  catalog=head.catalog)
        if head.default_features is None or name == DEFAULT_SET:
            head.default_features = name
        commit_head(store_path, head, {"event": "features", "set": name, "built": len(new_rows),
                                       "rows": rows_table.num_rows})
        _collect_feature_garbage(store_path, set_dir, entry.rows, existing.rows if existing else None)

    report = FeatureReport(name=name, n_voxels=mk.n_voxels, grid=target.name, mask=mk.name,
                           built=len(new_rows), skipped=kept.num_rows, dropped=dropped, failed=len(problems),
                           seconds=time.perf_counter() - t0, paths=built.paths, problems=problems, left_out=left_out,
                           unit=UNITS[spec.get("geometry", "volume")])
    if rows_table.num_rows == 0 and problems:
        reasons = Counter(p["reason"] for p in problems).most_common(3)
        raise FeatureError(f"feature set {name!r}: every selected map failed ({len(problems)}); most common "
                           "reasons: " + "; ".join(f"{r} (x{n})" for r, n in reasons) +
                           f". The failures are recorded: mapstore sql --store {store_path} "
                           "\"SELECT * FROM feature_problems\"", report=report)
    return report


def _check_options(method: str, stat: str, p_sided: str, background: str, batch_size: int | None) -> None:
    if method not in METHODS:
        raise ParameterError(f"method must be one of {list(METHODS)}, got {method!r}")
    if stat not in ("native", "z"):
        raise ParameterError(f"stat must be 'native' or 'z', got {stat!r}")
    if p_sided not in ("one", "two"):
        raise ParameterError(f"p_sided must be 'one' or 'two', got {p_sided!r}")
    if background not in ("auto", "keep"):
        raise ParameterError(f"background must be 'auto' or 'keep', got {background!r}")
    if batch_size is not None:
        positive_int("batch_size", batch_size)


def _set_name(name: str | None, default_settings: bool, target: TargetGrid, mask: Any, method: str,
              stat: str) -> str:
    if name is None and isinstance(target, GrayordinateTarget):
        name = f"grayordinates-{Path(target.template).name.split('.')[0]}-{stat}"
    if name is None and isinstance(target, SurfaceTarget):
        name = f"{target.name}-{'cortex' if str(mask) == 'brain' else Path(str(mask)).name}-{stat}"
    if name is None:
        name = DEFAULT_SET if default_settings else \
            f"{target.name}-{Path(str(mask)).name if not isinstance(mask, np.ndarray) else 'array'}-{method}-{stat}"
    return "".join(c if c.isalnum() or c in "-_.:" else "_" for c in name).replace(":", "_")


def _resolve_mask(mask: Any, target: TargetGrid, rows_sel: list[dict[str, Any]], set_dir: Path, batch_n: int,
                  common: dict[str, Any], run: dict[str, Any]) -> tuple[Mask, list[dict[str, Any]]]:
    """The set's mask; a coverage mask (``intersection``, ``coverage:F``) reads every selected map once."""
    mk = _make_mask(mask, target)
    if not isinstance(mk, float):
        return mk, []
    items = [_item(r, "", common.get("projection")) for r in rows_sel]
    batches = [_Batch(str(set_dir), "", items[i:i + batch_n], coverage_only=True, **common)
               for i in range(0, len(items), batch_n)]
    counts = np.zeros(target.n_voxels, dtype=np.int64)
    n_ok = 0
    problems: list[dict[str, Any]] = []
    for res in run_units(_run_batch, batches, desc="coverage", weight=_n_items, unit="map", **run):
        counts += res["counts"]
        n_ok += res["n"]
        problems += res["problems"]
    if n_ok == 0:
        raise FeatureError("no selected map could be read to compute a coverage mask")
    need = int(np.ceil(mk * n_ok - 1e-9))
    label = "intersection" if mk == 1.0 else f"coverage>={mk:g}"
    # within the brain (the cortex): fields of view reach far outside it
    base = _make_mask("brain", target)
    inside = base.to_volume().reshape(-1)  # type: ignore[union-attr]
    return mask_from_array(target, ((counts >= max(need, 1)) & inside).reshape(target.shape),
                           f"{base.name}&{label}"), problems  # type: ignore[union-attr]


def _set_spec(name: str, target: TargetGrid | SurfaceTarget, mk: Mask, method: str, stat: str, p_sided: str,
              zero_as_missing: bool, background: str, kinds: tuple[str, ...], where: str | None,
              projection: dict[str, Any] | None = None) -> dict[str, Any]:
    """``set.json``: everything a row's value depends on, and its id."""
    spec = {
        "name": name, "grid": target.to_json(), "grid_id": target.grid_id,
        "mask": {"name": mk.name, "n_voxels": mk.n_voxels, "sha256": mk.sha256},
        "mask_sha256": mk.sha256, "method": method, "stat": stat, "p_sided": p_sided,
        "zero_as_missing": zero_as_missing, "background": background, "kinds": list(kinds), "where": where,
        "versions": _library_versions(),
    }
    if isinstance(target, _MESHED):
        from importlib.metadata import version

        spec["geometry"] = "surface" if isinstance(target, SurfaceTarget) else "grayordinates"
        spec["projection"] = projection
        spec["versions"]["nilearn"] = version("nilearn")  # the mesh and vol_to_surf are nilearn's
    spec["spec_id"] = _spec_id(spec)
    return spec


def _sketch_of(store_path: Path, existing: FeatureEntry | None, n_voxels: int) -> str:
    """A set keeps the sketch directions it was made with (its rows' sketches must compare)."""
    if existing:
        return FeatureSetSpec.read(store_path / existing.dir).sketch
    return sketch_kind(n_voxels)


def _previous_rows(store_path: Path, name: str, existing: FeatureEntry | None, spec: dict[str, Any]) -> pa.Table:
    """The set's current rows; a set of this name with other settings is refused."""
    if not existing:
        return ROWS_SCHEMA.empty_table()
    old = FeatureSetSpec.read(store_path / existing.dir)
    if old.spec_id != spec["spec_id"]:
        raise FeatureError(f"feature set {name!r} exists with other settings (grid "
                           f"{old.grid['name']}, mask {old.mask['name']}, method "
                           f"{old.method}, stat {old.stat}); choose another name")
    return conform(pq.read_table(store_path / existing.rows), ROWS_SCHEMA)


def _write_set_files(set_dir: Path, spec: dict[str, Any], mk: Mask, fresh: bool) -> None:
    (set_dir / "shards").mkdir(parents=True, exist_ok=True)
    if fresh or not (set_dir / "mask.npy").exists():
        tmp = set_dir / f".mask.{uuid.uuid4().hex}.npy"
        np.save(tmp, mk.indices)
        os.replace(tmp, set_dir / "mask.npy")
    write_json_atomic(set_dir / "set.json", spec)


def _plan_rows(rows_sel: list[dict[str, Any]], spec: dict[str, Any], old_rows: pa.Table, batch_n: int,
               set_dir: Path, mk: Mask, common: dict[str, Any]) -> tuple[pa.Table, list[_Batch], int]:
    """Rows kept as they are, batches of maps to build (one dataset each), and how many rows go."""
    wanted: dict[str, _Item] = {}
    dataset_of: dict[str, str] = {}
    for r in rows_sel:
        more = f"{r.get('sha256_r') or ''}|{r.get('model_mask_sha256_r') or ''}|{r.get('geometry')}"
        if r.get("geometry") not in (None, "volume"):  # the space chooses the resampling path
            more += f"|{r.get('space') or ''}"
        if r.get("native"):  # an fsnative map: its subject's registration
            more += "|" + "|".join(f.sha256 for f in r["native"].values())
        wanted[r["map_id"]] = _item(r, feature_key(r["sha256"], spec, r["dof"], r["model_mask_sha256"], more),
                                    common.get("projection"))
        dataset_of[r["map_id"]] = r["dataset"]
    # keyed by map too: byte-identical copies of a file share a feature key, not a row
    have = {mk_: i for i, mk_ in enumerate(zip(old_rows["map_id"].to_pylist(),
                                               old_rows["feature_key"].to_pylist()))}
    keep_idx = [have[(m, it.key)] for m, it in wanted.items() if (m, it.key) in have]
    todo = [it for m, it in wanted.items() if (m, it.key) not in have]
    kept = old_rows.take(pa.array(sorted(keep_idx), pa.int64())) if keep_idx else old_rows.slice(0, 0)
    seed = Sketcher.for_set(mk.sha256, mk.n_voxels).seed
    batches = [_Batch(str(set_dir), f"shard-{file_slug(ds)}-{new_snapshot_id()}-{i:05d}.npy", items,
                      sketch_seed=seed, sketch=spec.get("sketch", "count"), **common)
               for ds, items, i in _per_dataset(todo, dataset_of, batch_n)]
    return kept, batches, old_rows.num_rows - kept.num_rows


@dataclass
class _Built:
    rows: list[dict[str, Any]]
    problems: list[dict[str, Any]]
    paths: dict[str, int]
    created: list[Path]  # what this run wrote, removed if the disk fills
    snap: str  # names this run's rows, problems and copies tables


def _run_batches(batches: list[_Batch], run: dict[str, Any], store_path: Path, set_dir: Path, name: str) -> _Built:
    snap = new_snapshot_id()
    built = _Built([], [], {}, [set_dir / "shards" / b.shard for b in batches] +
                   [set_dir / f"{kind}-{snap}.parquet" for kind in ("rows", "problems", "copies")], snap)
    try:
        for res in run_units(_run_batch, batches, desc=f"features {name}", weight=_n_items, unit="map", **run):
            built.rows += res["rows"]
            built.problems += res["problems"]
            for r in res["rows"]:
                built.paths[r["resample_path"]] = built.paths.get(r["resample_path"], 0) + 1
    except OSError as exc:
        _raise_if_full(exc, store_path, built.created)
        raise
    return built


def _write_tables(store_path: Path, name: str, kept: pa.Table, built: _Built, problems: list[dict[str, Any]],
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
        write_parquet_atomic(pa.Table.from_pylist(problems, schema=FPROBLEMS_SCHEMA), store_path / rel["problems"])
        # copies among all the set's rows, from the sketches (new shards are in place already)
        if copies is None and not new_rows and not dropped and existing and existing.copies and \
                (store_path / existing.copies).exists():
            copies = pq.read_table(store_path / existing.copies)  # same rows: same pairs
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
                    "and run the command again") from None


def _item(r: dict[str, Any], key: str, projection: dict[str, Any] | None = None) -> _Item:
    root = r["root"]

    def at(rel: str | None) -> str | None:
        return os.path.join(root, rel) if rel else None

    it = _Item(r["map_id"], at(r["relpath"]), r["sha256"], r["stat"], r["dof"], key, at(r.get("model_mask")),
               r.get("model_mask_sha256"), r.get("geometry") or "volume", r.get("hemi"), space=r.get("space"),
               native=r.get("native"), native_missing=r.get("native_missing"))
    if it.geometry == "surface":
        if r.get("hemi") == "R":  # an unpaired right hemisphere
            it.path_r, it.sha256_r, it.mask_path_r, it.mask_sha256_r = it.path, it.sha256, it.mask_path, it.mask_sha256
            it.path = it.sha256 = it.mask_path = it.mask_sha256 = None
        else:
            it.path_r, it.sha256_r = at(r.get("relpath_r")), r.get("sha256_r")
            it.mask_path_r, it.mask_sha256_r = at(r.get("model_mask_r")), r.get("model_mask_sha256_r")
    return it


def _collect_feature_garbage(store: Path, set_dir: Path, current: str, previous: str | None) -> None:
    """Delete shards and rows tables that neither the current, the previous, nor a live reader's uses."""
    keep_tables = {Path(current).name} | ({Path(previous).name} if previous else set())
    for lease in leased_files(store):
        entry = (lease.get("features") or {}).get(set_dir.name) or {}
        if entry.get("rows"):
            keep_tables.add(Path(entry["rows"]).name)
    keep_tables = {t for t in keep_tables if (set_dir / t).exists()}
    used: set[str] = set()
    for t in keep_tables:
        used |= set(pq.read_table(set_dir / t, columns=["shard"])["shard"].to_pylist())
    for p in set_dir.glob("rows-*.parquet"):
        if p.name not in keep_tables:
            p.unlink(missing_ok=True)
            for kind in ("problems-", "copies-"):
                (set_dir / p.name.replace("rows-", kind)).unlink(missing_ok=True)
    for p in (set_dir / "shards").glob("shard-*.npy"):
        if p.name not in used:
            p.unlink(missing_ok=True)
    for p in (set_dir / "shards").glob("*.tmp"):
        if time.time() - p.stat().st_mtime > 3600:  # left by a crashed run
            p.unlink(missing_ok=True)


class FeatureSet:
    """A feature set opened for reading: rows linked to maps, and their vectors.

    Obtained from :meth:`mapstore.Store.features`.
    """

    def __init__(self, store_path: Path, name: str, entry: FeatureEntry) -> None:
        self.name = name
        self.path = store_path / entry.dir
        self._copies_path = store_path / entry.copies if entry.copies else None
        self._rows_path = store_path / entry.rows
        try:
            self.spec: dict[str, Any] = FeatureSetSpec.read(self.path).to_json()
            self._rows_file = pq.ParquetFile(self._rows_path)  # the footer only: columns are read when needed
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise FeatureError(f"{self.path}: feature set {name!r} is unreadable ({exc})") from None
        self.geometry: str = self.spec.get("geometry") or "volume"
        if self.geometry == "surface":
            self.grid: Any = surface_from_spec(self.spec["grid"])
        elif self.geometry == "grayordinates":
            self.grid = gray_from_spec(self.spec["grid"])
        elif self.geometry == "parcels":
            p = self.spec["parcels"]
            self.grid = ParcelGrid(p["atlas_name"], len(p["labels"]), p["atlas_sha256"])
        else:
            self.grid = grid_from_spec(self.spec["grid"]["shape"],
                                       np.reshape(self.spec["grid"]["affine"], (4, 4)), self.spec["grid"]["name"])
        self._indices: np.ndarray | None = None
        self._shards: dict[str, np.ndarray] = {}
        self._columns: dict[str, pa.ChunkedArray | None] = {}
        self._rows: pa.Table | None = None
        self._pos_map: dict[str, int] | None = None

    @property
    def rows(self) -> pa.Table:
        """The whole rows table (every column; prefer the methods, which read only what they need)."""
        if self._rows is None:
            self._rows = self._rows_file.read()
        return self._rows

    def _column(self, name: str) -> pa.ChunkedArray | None:
        """One column of the rows table (None when the set predates it), read once."""
        if name not in self._columns:
            if self._rows is not None:
                self._columns[name] = self._rows[name] if name in self._rows.column_names else None
            elif name in self._rows_file.schema_arrow.names:
                try:
                    self._columns[name] = self._rows_file.read(columns=[name])[name]
                except (OSError, pa.ArrowException) as exc:
                    raise FeatureError(f"{self._rows_path}: unreadable ({exc}); rebuild with 'mapstore "
                                       f"features --name {self.name}'") from None
            else:
                self._columns[name] = None
        return self._columns[name]

    @property
    def _pos(self) -> dict[str, int]:
        if self._pos_map is None:
            self._pos_map = {m: i for i, m in enumerate(self._column("map_id").to_pylist())}
        return self._pos_map

    def __len__(self) -> int:
        return self._rows_file.metadata.num_rows

    def __repr__(self) -> str:
        return (f"FeatureSet({self.name!r}, rows={len(self)}, voxels={self.n_voxels}, "
                f"grid={self.grid.name}, mask={self.spec['mask']['name']})")

    @property
    def n_voxels(self) -> int:
        """Features per row (voxels, vertices, grayordinates or parcels: see ``unit``)."""
        return int(self.spec["mask"]["n_voxels"])

    @property
    def unit(self) -> str:
        return UNITS.get(self.geometry, "voxels")

    @property
    def map_ids(self) -> list[str]:
        return self._column("map_id").to_pylist()

    @property
    def mask_indices(self) -> np.ndarray:
        if self._indices is None:
            self._indices = np.load(self.path / "mask.npy")
        return self._indices

    def _shard(self, name: str) -> np.ndarray:
        if name not in self._shards:
            try:
                self._shards[name] = np.load(self.path / "shards" / name, mmap_mode="r")
            except OSError as exc:
                raise FeatureError(f"{self.path / 'shards' / name}: shard unreadable ({exc}); rebuild with "
                                   f"'mapstore features --name {self.name}'") from None
        return self._shards[name]

    def _read_rows(self, shard: str, rows: np.ndarray, out: np.ndarray, dest: np.ndarray) -> None:
        """Read sorted ``rows`` of a shard into ``out[dest]`` with reads straight into ``out``.

        Reading into the result (rather than copying through numpy) lets the kernel fill
        fresh pages as it copies, several times faster than faulting them in from Python.
        """
        arr = self._shard(shard)  # validates the header; gives shape and data offset
        if arr.dtype != np.float32 or arr.ndim != 2 or arr.shape[1] != self.n_voxels:
            raise FeatureError(f"{self.path / 'shards' / shard}: shard has shape {arr.shape} {arr.dtype}, "
                               f"expected (*, {self.n_voxels}) float32; rebuild the feature set")
        offset = arr.offset
        row_bytes = self.n_voxels * 4
        with open(self.path / "shards" / shard, "rb", buffering=0) as fh:
            i = 0
            while i < len(rows):
                j = i + 1  # extend while both the shard rows and their destinations run on
                while j < len(rows) and rows[j] == rows[j - 1] + 1 and dest[j] == dest[j - 1] + 1:
                    j += 1
                fh.seek(offset + int(rows[i]) * row_bytes)
                view = memoryview(out[dest[i]:dest[i] + (j - i)]).cast("B")
                if fh.readinto(view) != len(view):
                    raise FeatureError(f"{self.path / 'shards' / shard}: shard is truncated; rebuild the "
                                       "feature set")
                i = j

    def matrix(self, map_ids=None) -> np.ndarray:
        """An (n_maps, n_voxels) float32 array of the given maps' rows, in the given order.

        Reads only the requested rows from the shards, straight into the result.
        """
        if map_ids is None:
            map_ids = self.map_ids
        map_ids = list(map_ids)
        return self._fill(map_ids, np.empty((len(map_ids), self.n_voxels), dtype=np.float32))

    def locate(self, map_ids) -> tuple[np.ndarray, np.ndarray]:
        """(shard, row) of each map's row (reads the set's map_id, shard and row columns once)."""
        map_ids = list(map_ids)
        missing = [m for m in map_ids if m not in self._pos]
        if missing:
            raise FeatureError(f"{len(missing)} map(s) have no row in feature set {self.name!r} (first: "
                               f"{missing[0]}); build it with 'mapstore features --name {self.name}' or "
                               "select maps that have rows")
        pos = np.array([self._pos[m] for m in map_ids], dtype=np.int64)
        shard_col = self._column("shard").to_numpy()[pos] if len(pos) else np.array([])
        row_col = self._column("row").to_numpy()[pos] if len(pos) else np.array([], dtype=np.int64)
        return shard_col, row_col

    def _fill(self, map_ids: list[str], out: np.ndarray) -> np.ndarray:
        return self.read_at(*self.locate(map_ids), out)

    def read_at(self, shards, rows, out: np.ndarray) -> np.ndarray:
        """Read the rows at (``shards[i]``, ``rows[i]``) into ``out[i]``: no lookup by map id.

        A selection knows where its rows are (its query joined the ``features`` view), so
        reading X from a set of a million rows never loads the set's rows table.
        """
        shard_col = np.asarray(shards, dtype=object)
        row_col = np.asarray(rows, dtype=np.int64)
        for shard in dict.fromkeys(shard_col):
            sel = np.flatnonzero(shard_col == shard)
            order = np.argsort(row_col[sel], kind="stable")
            self._read_rows(shard, row_col[sel][order], out, sel[order])
        return out

    def read_into(self, map_ids, out: np.ndarray) -> np.ndarray:
        """Read the rows of ``map_ids`` into ``out[:len(map_ids)]`` (a reusable float32 buffer)."""
        map_ids = list(map_ids)
        if out.dtype != np.float32 or out.ndim != 2 or out.shape[1] != self.n_voxels or len(out) < len(map_ids):
            raise FeatureError(f"buffer must be float32 of shape (>= {len(map_ids)}, {self.n_voxels})")
        return self._fill(map_ids, out[: len(map_ids)])

    def row_hashes(self, map_ids) -> list[str]:
        """SHA-256 of each row's float32 bytes, recorded when the row was built."""
        map_ids = list(map_ids)
        hashes = self._column("row_sha256")
        col = hashes.to_pylist() if hashes is not None else [None] * len(self)
        out = [col[self._pos[m]] for m in map_ids]
        todo = [i for i, h in enumerate(out) if h is None]  # rows built before hashes were recorded
        for i, row in zip(todo, self.matrix([map_ids[i] for i in todo])):
            out[i] = hashlib.sha256(row.tobytes()).hexdigest()
        return out

    def copies(self) -> pa.Table | None:
        """Pairs of this set's rows that are copies (``feature_copies``), or None for older sets."""
        if self._copies_path is None:
            return None
        try:
            return pq.read_table(self._copies_path)
        except (OSError, pa.ArrowException) as exc:
            raise FeatureError(f"{self._copies_path}: unreadable ({exc}); rebuild with 'mapstore features "
                               f"--name {self.name}'") from None

    def sketches(self, map_ids) -> np.ndarray:
        """(n, SKETCH_BITS / 8) uint8 sign sketches of rows (:mod:`mapstore.copies`), recorded at build time."""
        map_ids = list(map_ids)
        sketches = self._column("sketch")
        col = sketches.to_pylist() if sketches is not None else [None] * len(self)
        got = [col[self._pos[m]] for m in map_ids]
        out = np.zeros((len(map_ids), SKETCH_BITS // 8), dtype=np.uint8)
        todo = [i for i, g in enumerate(got) if g is None]  # rows built before sketches were recorded
        for i, g in enumerate(got):
            if g is not None and len(g) == out.shape[1]:
                out[i] = np.frombuffer(g, dtype=np.uint8)
            elif g is not None:
                todo.append(i)  # a sketch of another size (an earlier version): made again
        if todo:
            sk = Sketcher.for_set(self.spec["mask"]["sha256"], self.n_voxels, self.spec.get("sketch", "count"))
            for k in range(0, len(todo), 64):
                part = todo[k:k + 64]
                out[part] = sk.sketch(self.matrix([map_ids[i] for i in part]))
        return out

    def coverage(self, map_ids=None) -> np.ndarray:
        """Fraction of mask voxels with a finite value, per map."""
        cov = self._column("coverage").to_numpy()
        if map_ids is None:
            return cov
        return np.array([cov[self._pos[m]] for m in map_ids])

    @property
    def base(self) -> tuple[str, Any]:
        """(geometry, grid or mesh) the rows can be drawn on: a parcel set's are its source set's."""
        if self.geometry != "parcels":
            return self.geometry, self.grid
        p = self.spec["parcels"]
        if p["source_geometry"] == "surface":
            return "surface", surface_from_spec(p["source_grid"])
        if p["source_geometry"] == "grayordinates":
            return "grayordinates", gray_from_spec(p["source_grid"])
        return "volume", grid_from_spec(p["source_grid"]["shape"], np.reshape(p["source_grid"]["affine"], (4, 4)),
                                        p["source_grid"]["name"])

    def on_base(self, vector: np.ndarray) -> np.ndarray:
        """A row as values over its base grid or mesh (volume-shaped, or both hemispheres' vertices)."""
        if self.geometry != "parcels":
            return self.unmask(vector)
        img = self._paint(vector)
        if self.base[0] == "grayordinates":
            return np.asarray(img.get_fdata()).reshape(-1)
        if hasattr(img, "mesh"):
            return np.concatenate([np.asarray(img.data.parts["left"]), np.asarray(img.data.parts["right"])])
        return np.asarray(img.dataobj)

    def _paint(self, vector: np.ndarray):
        """A parcel row painted back onto the source set's grid or mesh (NaN outside every parcel)."""
        import scipy.sparse as sp

        p = self.spec["parcels"]
        v = np.asarray(vector, dtype=np.float32).reshape(-1)
        if v.size != self.n_voxels:
            raise FeatureError(f"vector has {v.size} values, parcel set {self.name!r} has {self.n_voxels} parcels")
        try:
            weights = sp.load_npz(self.path / "weights.npz")
            src_mask = np.load(self.path / "source_mask.npy")
        except OSError as exc:
            raise FeatureError(f"{self.path}: the parcel set's atlas files are unreadable ({exc}); rebuild it "
                               "with mapstore.build_parcels") from None
        values = paint(v, weights, p["kind"])
        if p["source_geometry"] in ("surface", "grayordinates"):
            mesh = surface_from_spec(p["source_grid"]) if p["source_geometry"] == "surface" else \
                gray_from_spec(p["source_grid"])
            full = np.full(mesh.n_vertices, np.nan, dtype=np.float32)
            full[src_mask] = values
            return to_surface_image(full, mesh) if p["source_geometry"] == "surface" else to_cifti_image(full, mesh)
        import nibabel as nib

        grid = grid_from_spec(p["source_grid"]["shape"], np.reshape(p["source_grid"]["affine"], (4, 4)),
                              p["source_grid"]["name"])
        full = np.full(grid.n_voxels, np.nan, dtype=np.float32)
        full[src_mask] = values
        img = nib.Nifti1Image(full.reshape(grid.shape), grid.affine_array)
        img.header.set_xyzt_units("mm")
        return img

    def unmask(self, vector: np.ndarray) -> np.ndarray:
        """A grid-shaped float32 volume from a mask-length vector (NaN outside the mask)."""
        v = np.asarray(vector, dtype=np.float32).reshape(-1)
        if v.size != self.n_voxels:
            raise FeatureError(f"vector has {v.size} values, feature set {self.name!r} has "
                               f"{self.n_voxels} mask voxels")
        vol = np.full(self.grid.n_voxels, np.nan, dtype=np.float32)
        vol[self.mask_indices] = v
        return vol.reshape(self.grid.shape)

    def to_image(self, vector: np.ndarray):
        """An image of a row (or of a decoder's coefficients): NIfTI (nibabel) on a volume set's grid,
        a nilearn ``SurfaceImage`` on a surface set's mesh (NaN outside the mask: the medial wall)."""
        import nibabel as nib

        if isinstance(self.grid, SurfaceTarget):
            return to_surface_image(self.unmask(vector), self.grid)
        if isinstance(self.grid, GrayordinateTarget):
            return to_cifti_image(self.unmask(vector), self.grid)
        if isinstance(self.grid, ParcelGrid):
            return self._paint(vector)
        img = nib.Nifti1Image(self.unmask(vector), self.grid.affine_array)
        img.header.set_xyzt_units("mm")
        return img
