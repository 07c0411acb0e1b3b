"""Resampling a native-space volume onto a template grid (or projecting it onto a template mesh) through
its registration, in one pass.

Each target voxel's position (template millimetres) goes through the registration's steps
(nitransforms reads the ITK/ANTs and FSL files the pipelines leave, affine and nonlinear, and maps
points the way resamplers pull: template point to source point); the source's inverse affine
gives a position in the source's voxels, and the set's interpolation reads the value there.  One
interpolation, NaN outside the source's field of view and wherever a NaN source voxel has weight.
nitransforms is chosen because it reads every format a BIDS pipeline writes (ITK ``.h5``/``.txt``/
``.mat``, FSL, AFNI, LTA) into one RAS+ convention and maps points without resampling images.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import FeatureError
from ._protocol import BatchContext, SourceMap

__all__ = ["registration_of", "registration_key", "map_points", "pull_coordinates", "sample"]

_ORDER = {"nearest": 0, "linear": 1, "cubic": 3}


def registration_of(item: SourceMap) -> dict[str, Any]:
    """The map's registration, or a FeatureError saying why it has none (never a silent fallback)."""
    reg = item.registration or {"missing": "in a native space and no registration was recorded; index again"}
    if "missing" in reg:
        raise FeatureError(f"{reg['missing']}; a native-space map is never resampled as if it were in the "
                           "template", code="no-registration",
                           remedy="give the folder holding the registration to 'mapstore index --transforms DIR' "
                                  "(or the map written in template space), then build again")
    return reg


def _load_step(step: dict[str, Any]):
    import nitransforms as nt
    from nitransforms.manip import TransformChain

    path = step["path"]
    try:
        if step["format"] == "fsl":
            return nt.linear.load(path, fmt="fsl", reference=step["reference"], moving=step["moving"])
        if path.endswith(".h5"):
            return TransformChain.from_filename(path, fmt="itk")
        return nt.linear.load(path, fmt="itk")
    except Exception as exc:  # nitransforms raises many kinds for a damaged or foreign file
        raise FeatureError(f"{path}: cannot read the registration ({type(exc).__name__}: {exc})") from exc


def registration_key(reg: dict[str, Any]) -> tuple[str, ...]:
    """What identifies a registration: its steps' file hashes."""
    return tuple(s["sha256"] for s in reg["steps"])


def map_points(reg: dict[str, Any], pts: np.ndarray) -> np.ndarray:
    """Template millimetres (n, 3) to the map's own millimetres, through every step of the registration."""
    pts = np.asarray(pts, dtype=np.float64)
    for step in reg["steps"]:
        pts = np.asarray(_load_step(step).map(pts), dtype=np.float64)
    return pts


def pull_coordinates(reg: dict[str, Any], grid, src_affine: np.ndarray, ctx: BatchContext) -> np.ndarray:
    """Source voxel coordinates (3, n) of every voxel of ``grid`` through the registration (cached per batch)."""
    key = (registration_key(reg), grid.grid_id, np.asarray(src_affine).tobytes())
    hit = ctx.pulled.get(key)
    if hit is not None:
        return hit
    ijk = np.indices(grid.shape, dtype=np.float64).reshape(3, -1)
    aff = grid.affine_array
    pts = map_points(reg, (aff[:3, :3] @ ijk + aff[:3, 3:4]).T)  # template millimetres, then the map's
    inv = np.linalg.inv(np.asarray(src_affine, dtype=np.float64))
    vox = inv[:3, :3] @ pts.T + inv[:3, 3:4]
    ctx.pulled[key] = vox
    return vox


def sample(data: np.ndarray, vox: np.ndarray, shape: tuple[int, ...], method: str) -> np.ndarray:
    """Values of ``data`` at voxel coordinates ``vox`` (3, n), NaN outside it or where NaNs have weight."""
    from scipy import ndimage

    order = _ORDER[method]
    nan = ~np.isfinite(data)
    clean = np.where(nan, 0.0, data).astype(np.float64)
    out = ndimage.map_coordinates(clean, vox, order=order, mode="constant", cval=0.0, prefilter=order > 1)
    lo, hi = (-0.5, 0.5) if order == 0 else (0.0, 0.0)
    inside = np.ones(vox.shape[1], dtype=bool)
    for a in range(3):
        inside &= (vox[a] >= lo - 1e-6) & (vox[a] <= data.shape[a] - 1 + hi + 1e-6)
    if nan.any():
        ind = ndimage.binary_dilation(nan, iterations=1) if order == 3 else nan
        reach = ndimage.map_coordinates(ind.astype(np.float64), vox, order=min(order, 1), mode="constant",
                                        cval=0.0, prefilter=False)
        out[reach > 1e-7] = np.nan
    out = out.astype(np.float32)
    out[~inside] = np.nan
    return out.reshape(shape)
