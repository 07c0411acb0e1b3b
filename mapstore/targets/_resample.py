"""Pure resampling of arrays between voxel grids.

Resampling keeps "not measured" apart from "no effect": target voxels outside a
map's field of view are NaN, never 0, and a NaN in the source reaches only the
target voxels whose interpolation gives it a non-zero weight.

Paths, fastest first:

* ``same``: the source grid is the target grid (a copy);
* ``reindex``: the grids differ only by axis flips/permutations and an integer
  voxel shift (e.g. LAS vs RAS at the same spacing): exact, by indexing;
* ``separable``: axis-aligned grids (permutation x scaling + shift) with linear or
  nearest interpolation: three sparse 1-D interpolations, exactly trilinear;
* ``general``: anything else, and cubic: ``scipy.ndimage.affine_transform``.

A grid here is anything with ``shape`` (three axes) and ``affine_array`` (4x4, voxel to mm):
a target grid, or :class:`GridLike` for a map's own grid.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from .._params import RESAMPLE_METHOD, RESAMPLE_METHODS
from ..errors import GridError

__all__ = ["GridLike", "METHODS", "resample"]


class GridLike(NamedTuple):
    """A voxel grid as resampling needs it: its shape and voxel-to-mm affine."""

    shape: tuple[int, ...]
    affine_array: np.ndarray


METHODS = RESAMPLE_METHODS


_ORDER = {"nearest": 0, "linear": 1, "cubic": 3}


def _target_to_source(src_affine: np.ndarray, grid: Any) -> np.ndarray:
    return np.linalg.inv(np.asarray(src_affine, dtype=np.float64)) @ grid.affine_array


def _axis_aligned(m: np.ndarray, tol: float = 1e-6) -> np.ndarray | None:
    """perm[t] = source axis fed by target axis t, if each row/column has one non-zero."""
    r = m[:3, :3]
    nz = np.abs(r) > tol
    if not (nz.sum(axis=0) == 1).all() or not (nz.sum(axis=1) == 1).all():
        return None
    return np.argmax(nz, axis=0)  # for target axis t (column), the source axis (row)


def _weights_1d(coord: np.ndarray, n: int, method: str):
    """Sparse (len(coord) x n) interpolation matrix along one axis, and the in-FOV flags."""
    from scipy import sparse

    eps = 1e-6
    m = coord.size
    # snap near-integer coordinates so a grid-aligned sample gives no weight (and no NaN) to its
    # neighbour through rounding error
    near = np.round(coord)
    coord = np.where(np.abs(coord - near) < 1e-9, near, coord)
    if method == "nearest":
        valid = (coord >= -0.5 - eps) & (coord < n - 0.5 + eps)
        idx = np.clip(np.floor(coord + 0.5).astype(np.int64), 0, n - 1)
        rows = np.arange(m)[valid]
        w = sparse.csr_matrix((np.ones(rows.size), (rows, idx[valid])), shape=(m, n))
        return w, valid
    valid = (coord >= -eps) & (coord <= n - 1 + eps)
    c = np.clip(coord, 0, n - 1)
    i0 = np.floor(c).astype(np.int64)
    i0 = np.minimum(i0, n - 1)
    f = c - i0
    i1 = np.minimum(i0 + 1, n - 1)
    rows = np.arange(m)
    data = np.concatenate([1.0 - f, f])
    cols = np.concatenate([i0, i1])
    rr = np.concatenate([rows, rows])
    keep = (data != 0) & np.concatenate([valid, valid])
    w = sparse.csr_matrix((data[keep], (rr[keep], cols[keep])), shape=(m, n))
    w.sum_duplicates()
    w.eliminate_zeros()
    return w, valid


def resample(data: np.ndarray, src_affine: np.ndarray, grid: Any, method: str = "linear",
             return_path: bool = False):
    """Resample a 3-D array (voxel-to-world ``src_affine``) onto ``grid``.

    Parameters
    ----------
    data : ndarray of shape (X, Y, Z)
        Source values; NaN marks voxels without a value.
    src_affine : ndarray of shape (4, 4)
    grid : TargetGrid
    method : {"linear", "nearest", "cubic"}, default="linear"
    return_path : bool, default=False
        Also return which path was taken (``same``, ``reindex``, ``separable``, ``general``).

    Returns
    -------
    ndarray of shape ``grid.shape``, float32, NaN outside the source's field of view.
    """
    RESAMPLE_METHOD.check("method", method, "resample")
    data = np.asarray(data)
    if data.ndim != 3:
        raise GridError(f"expected a 3-D volume, got shape {data.shape}")
    m = _target_to_source(src_affine, grid)
    out, path = _resample(data, m, grid, method)
    return (out, path) if return_path else out


def _plan(m: np.ndarray, src_shape: tuple[int, ...], grid: Any, method: str):
    """The resampling path for a target-to-source voxel matrix, with its axis parameters."""
    perm = _axis_aligned(m)
    if perm is None:
        return "general", None, None, None
    scale = m[perm, np.arange(3)]
    offset = m[perm, 3]
    if np.allclose(np.abs(scale), 1.0, atol=1e-6) and np.allclose(offset, np.round(offset), atol=1e-5):
        if (perm == np.arange(3)).all() and (scale > 0).all() and np.allclose(offset, 0, atol=1e-5) \
                and tuple(src_shape) == grid.shape:
            return "same", perm, scale, offset
        return "reindex", perm, np.round(scale).astype(int), np.round(offset).astype(int)
    if method in ("linear", "nearest"):
        return "separable", perm, scale, offset
    return "general", None, None, None


def _resample(data: np.ndarray, m: np.ndarray, grid: Any, method: str):
    path, perm, scale, offset = _plan(m, data.shape, grid, method)
    if path == "same":
        return data.astype(np.float32, copy=True), path
    if path == "reindex":
        return _reindex(data, perm, scale, offset, grid), path
    if path == "separable":
        return _separable(data, perm, scale, offset, grid, method), path
    return _general(data, m, grid, method), path


def _reindex(data, perm, sign, offset, grid):
    src = np.transpose(data, perm)  # src axis t now fed by target axis t
    out = np.full(grid.shape, np.nan, dtype=np.float32)
    tgt_sl, src_sl = [], []
    for t in range(3):
        n_t, n_s, sg, off = grid.shape[t], src.shape[t], int(sign[t]), int(offset[t])
        # target i reads source sg * i + off; keep the i for which that lies in [0, n_s)
        lo, hi = ((-off, n_s - off) if sg > 0 else (off - n_s + 1, off + 1))
        lo, hi = max(lo, 0), min(hi, n_t)
        if lo >= hi:
            return out
        tgt_sl.append(slice(lo, hi))
        first, last = sg * lo + off, sg * (hi - 1) + off
        src_sl.append(slice(first, last + 1, 1) if sg > 0 else slice(first, (last - 1) if last > 0 else None, -1))
    out[tuple(tgt_sl)] = src[tuple(src_sl)]
    return out


def _separable(data, perm, scale, offset, grid, method):
    """Three sparse 1-D interpolations in float32, each on a C-contiguous 2-D view.

    Sparse products touch only stored (non-zero) weights, so a NaN reaches exactly the
    targets that give it weight.
    """
    x = np.ascontiguousarray(np.transpose(data, perm), dtype=np.float32)
    ws, valid = [], []
    for t in range(3):
        coord = scale[t] * np.arange(grid.shape[t]) + offset[t]
        w, v = _weights_1d(coord, x.shape[t], method)
        ws.append(w.astype(np.float32))
        valid.append(v)
    n0, n1, n2 = x.shape
    m0, m1 = ws[0].shape[0], ws[1].shape[0]
    x = (ws[0] @ x.reshape(n0, -1)).reshape(m0, n1, n2)                      # axis 0
    x = np.ascontiguousarray(x.transpose(0, 2, 1)).reshape(-1, n1)            # (m0 * n2, n1)
    x = np.asarray(x @ ws[1].T.tocsc()).reshape(m0, n2, m1)                   # axis 1
    x = np.ascontiguousarray(x.transpose(0, 2, 1)).reshape(-1, n2)            # (m0 * m1, n2)
    out = np.asarray(x @ ws[2].T.tocsc(), dtype=np.float32).reshape(m0, m1, -1)  # axis 2
    out[~(valid[0][:, None, None] & valid[1][None, :, None] & valid[2][None, None, :])] = np.nan
    return out


def _general(data, m, grid, method):
    from scipy import ndimage

    order = _ORDER[method]
    nan = ~np.isfinite(data)
    clean = np.where(nan, 0.0, data).astype(np.float64)
    mat, off = m[:3, :3], m[:3, 3]
    out = ndimage.affine_transform(clean, mat, off, output_shape=grid.shape, order=order,
                                   mode="constant", cval=0.0, prefilter=order > 1)
    # field of view, from the source coordinates of every target voxel
    ii = [np.arange(s, dtype=np.float64) for s in grid.shape]
    inside = np.ones(grid.shape, dtype=bool)
    lo, hi = (-0.5, 0.5) if order == 0 else (0.0, 0.0)
    for a in range(3):
        c = (mat[a, 0] * ii[0][:, None, None] + mat[a, 1] * ii[1][None, :, None]
             + mat[a, 2] * ii[2][None, None, :] + off[a])
        inside &= (c >= lo - 1e-6) & (c <= data.shape[a] - 1 + hi + 1e-6)
    if nan.any():
        ind = nan.astype(np.float64)
        if order == 3:
            # the cubic B-spline kernel reaches two voxels out: widen the NaN region by its support
            ind = ndimage.binary_dilation(nan, iterations=1).astype(np.float64)
        reach = ndimage.affine_transform(ind, mat, off, output_shape=grid.shape, order=min(order, 1),
                                         mode="constant", cval=0.0, prefilter=False)
        out[reach > 1e-7] = np.nan
    out = out.astype(np.float32)
    out[~inside] = np.nan
    return out
