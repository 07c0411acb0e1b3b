"""A source map's values on its own grid or mesh, before any resampling: the missing region
(the model's mask, a zero background, zeros on request) made NaN and the statistic converted.

A statistic transform (t or p to z) is not linear, so it does not commute with interpolation:
every target converts on the source's own positions, here, before resampling.
"""

from __future__ import annotations

import os
from typing import Any, NamedTuple

import numpy as np

from ..statkinds import convertible_to_z
from ..errors import FeatureError, GridError, ParameterError
from ..formats import HeaderFacts, MeshFile, mesh_file
from ._convert import convert
from ._protocol import BatchContext, BuildSettings, SourceMap
from ._readers import cifti_cortex, read_surface_values, read_volume
from ._resample import GridLike, resample

__all__ = ["SourceVolume", "Hemispheres", "zero_background", "source_volume", "hemispheres", "native_sphere",
           "attach_registrations"]


class SourceVolume(NamedTuple):
    """A volume map's values on its own grid, missing region NaN, statistic converted."""

    values: np.ndarray
    facts: HeaderFacts
    conversion: str
    missing_from: str
    p_clipped: int


class Hemispheres(NamedTuple):
    """A surface map's hemispheres on its own mesh, masked and converted."""

    values: dict[str, np.ndarray]  # by hemisphere, L and R (either may be absent)
    conversion: str
    p_clipped: int
    missing: list[str]  # what made values missing

# kinds converted to z on the source grid, in float64 (p close to 1 needs it)
_CONVERTED = tuple(k for k in convertible_to_z() if k != "z")


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


def _model_mask(path: str, sha256: str, facts: HeaderFacts, cache: dict[str, np.ndarray]) -> np.ndarray:
    """The model's mask on a map's grid (nearest neighbour if its grid differs), as booleans."""
    key = f"{sha256}|{facts.grid_id}"
    hit = cache.get(key)
    if hit is None:
        try:
            data, mfacts = read_volume(path, expect_sha256=sha256)
        except GridError as exc:
            raise FeatureError(f"the model's mask of this map is unusable: {exc}") from exc
        if mfacts.grid_id != facts.grid_id:
            data = resample(data, mfacts.affine_array, GridLike(tuple(facts.spatial_shape), facts.affine_array),
                            "nearest")
        hit = cache[key] = np.nan_to_num(data, nan=0.0) != 0
    return hit



def source_volume(item: SourceMap, settings: BuildSettings, ctx: BatchContext, native_ok: bool = False
                  ) -> SourceVolume:
    """A volume map's values on its own grid: missing region as NaN, statistic converted.

    A native-space map is refused unless the caller resamples it through its registration
    (``native_ok``): projecting it as if it were in the template would put values in the wrong place.
    """
    if item.space_kind == "native" and not native_ok:
        raise FeatureError("a volume map in a native space: this kind of feature set cannot take it through "
                           "its registration; build a volume, surface or grayordinate feature set for it, or give "
                           "the map in template space")
    converting = settings.stat == "z" and item.stat in _CONVERTED
    # p close to 1 (z < -5) is not representable in float32: convert from the file's precision
    vol, facts = read_volume(str(item.path), expect_sha256=item.sha256,
                             dtype=np.float64 if converting else np.float32, map_index=item.map_index)
    missing_from = "none"
    if item.mask_path and item.mask_sha256:
        vol[~_model_mask(item.mask_path, item.mask_sha256, facts, ctx.model_masks)] = np.nan
        missing_from = "model-mask"
    elif settings.background == "auto":
        bg = zero_background(vol)
        if bg is not None:
            vol[bg] = np.nan
            missing_from = "zero-background"
    if settings.zero_as_missing:
        vol[vol == 0] = np.nan
        missing_from = "zeros" if missing_from == "none" else missing_from + "+zeros"
    clipped = 0
    if settings.stat == "z" and item.stat == "p":
        clipped = int(np.count_nonzero(vol == 0))  # p = 0 where the model has data: clipped, reported
    vol, conversion = convert(vol, item.stat, settings.stat, dof=item.dof, dof1=item.dof_numerator, sided=settings.p_sided,
                              where=item.where)
    return SourceVolume(vol, facts, conversion, missing_from, clipped)


def native_sphere(item: SourceMap, hemi: str) -> MeshFile | None:
    """The subject's registration sphere of an fsnative map's hemisphere (None: not an fsnative map)."""
    if item.native_missing:
        raise FeatureError(item.native_missing)
    return (item.native or {}).get(hemi)


_FS_HEMI = {"L": "lh", "R": "rh"}


def attach_registrations(rows: list[dict[str, Any]], subjects_dir: str | os.PathLike[str] | None) -> None:
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


def hemispheres(item: SourceMap, settings: BuildSettings) -> Hemispheres:
    """A surface map's hemispheres (GIFTI pair, or a CIFTI file's cortex), masked and converted."""
    sources: dict[str, tuple[np.ndarray, tuple[str, str | None] | None]] = {}
    if item.geometry == "grayordinates":
        path = str(item.path)
        for h, v in cifti_cortex(path, read_surface_values(path, item.sha256, item.map_index)).items():
            sources[h] = (v, None)
    else:
        for hemi, p, sha, mpath, msha in (("L", item.path, item.sha256, item.mask_path, item.mask_sha256),
                                          ("R", item.path_r, item.sha256_r, item.mask_path_r, item.mask_sha256_r)):
            if p is not None:
                sources[hemi] = (read_surface_values(p, sha, item.map_index), (mpath, msha) if mpath else None)
    missing = ["model-mask"] if any(m for _, m in sources.values()) else []
    conversion, clipped, out = "none", 0, {}
    for hemi in ("L", "R"):
        if hemi not in sources:
            missing.append(f"no-hemi-{hemi}")
            continue
        vals, model_mask = sources[hemi]
        vals = vals.astype(np.float64 if settings.stat == "z" and item.stat in _CONVERTED else np.float32)
        if model_mask is not None:
            mvals = read_surface_values(*model_mask)
            if mvals.shape != vals.shape:
                raise FeatureError(f"{model_mask[0]}: the model's mask has {mvals.size} vertices, the map "
                                   f"{vals.size}")
            vals[~(np.nan_to_num(mvals) != 0)] = np.nan
        if settings.zero_as_missing:
            vals[vals == 0] = np.nan
        if settings.stat == "z" and item.stat == "p":
            clipped += int(np.count_nonzero(vals == 0))
        vals, conversion = convert(vals, item.stat, settings.stat, dof=item.dof, dof1=item.dof_numerator, sided=settings.p_sided,
                                   where=item.where)
        out[hemi] = np.asarray(vals, dtype=np.float32)
    if settings.zero_as_missing:
        missing.append("zeros")
    return Hemispheres(out, conversion, clipped, missing)
