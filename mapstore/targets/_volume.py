"""Target grids, masks, voxel reading and pure resampling of arrays.

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
"""

from __future__ import annotations

import gzip
import hashlib
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from ..errors import GridError, HeaderError, ParameterError, UnknownGrid
from ._protocol import BatchContext, BuildSettings, Mask, Panel, RowValues, SourceMap, Target, mask_from_array
from ..formats import (REAL_SCALAR_DTYPES, HeaderFacts, digest_map, foreign_format, grid_fingerprint, header_prefix,
                       parse_header, read_foreign_volume, read_header)

__all__ = [
    "TargetGrid",
    "builtin_grid",
    "BUILTIN_GRIDS",
    "grid_from_image",
    "grid_from_spec",
    "Mask",
    "mni152_brain_mask",
    "mni152_template",
    "mask_from_image",
    "mask_from_array",
    "read_volume",
    "gunzip",
    "crop_grid",
    "slice_views",
    "resample",
    "METHODS",
]

METHODS = ("linear", "nearest", "cubic")
_ORDER = {"nearest": 0, "linear": 1, "cubic": 3}
BUILTIN_GRIDS = {"MNI152-2mm": 2, "MNI152-3mm": 3, "MNI152-1mm": 1}
_MAX_GRID = 512 ** 3  # voxels of a declared grid: far above any real template (MNI152 1 mm: 7.2 million)


@dataclass(frozen=True)
class TargetGrid(Target):
    """A voxel grid: spatial shape and voxel-to-world affine (mm)."""

    kind: ClassVar[str] = "volume"
    unit: ClassVar[str] = "voxels"
    picture_caption: ClassVar[str] = "axial, coronal, sagittal through the grid centre"
    background_name: ClassVar[str] = "MNI152 template"

    shape: tuple[int, int, int]
    affine: tuple[float, ...]  # 16 values, row-major
    name: str = "custom"

    @property
    def affine_array(self) -> np.ndarray:
        return np.array(self.affine, dtype=np.float64).reshape(4, 4)

    @property
    def grid_id(self) -> str:
        return grid_fingerprint(self.shape, self.affine_array)

    @property
    def n_voxels(self) -> int:
        return int(np.prod(self.shape))

    def to_json(self) -> dict:
        return {"name": self.name, "shape": list(self.shape), "affine": list(self.affine),
                "grid_id": self.grid_id}

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> "TargetGrid":
        return grid_from_spec(doc["shape"], np.reshape(doc["affine"], (4, 4)), doc.get("name", "custom"))

    def default_name(self, mask: Any, method: str, stat: str, default_settings: bool) -> str:
        if default_settings:
            return "default"
        return super().default_name(mask, method, stat, default_settings)

    def named_mask(self, mask: str) -> Mask:
        if mask in ("brain", "MNI152-brain"):
            return mni152_brain_mask(self)
        if os.path.exists(mask):
            return mask_from_image(mask, self)
        raise ParameterError(f"mask must be 'brain', 'intersection', 'coverage:FRACTION' or a mask file; got "
                             f"{mask!r} (no such file)")

    def crop(self, indices: np.ndarray) -> tuple["TargetGrid", np.ndarray]:
        return crop_grid(self, indices)  # resample the mask's bounding box only

    def values(self, item: SourceMap, settings: BuildSettings, ctx: BatchContext, region: Any = None,
               indices: np.ndarray | None = None) -> RowValues:
        from ._registered import pull_coordinates, registration_of, sample
        from ._sources import source_volume

        grid = region or self
        if item.space_kind == "native":
            reg = registration_of(item)  # before reading the map: a refusal costs nothing
            src = source_volume(item, settings, ctx, native_ok=True)
            vox = pull_coordinates(reg, grid, src.facts.affine_array, ctx)
            out, path = sample(np.asarray(src.values, dtype=np.float32), vox, grid.shape, settings.method), \
                "registered"
        else:
            src = source_volume(item, settings, ctx)
            out, path = resample(np.asarray(src.values, dtype=np.float32), src.facts.affine_array, grid,
                                 settings.method, return_path=True)
        flat = out.reshape(-1)
        vec = flat if indices is None else flat[indices]
        return RowValues(np.asarray(vec, dtype=np.float32), src.conversion, path, src.missing_from, src.p_clipped)

    def image(self, full: np.ndarray):
        import nibabel as nib

        img = nib.Nifti1Image(np.asarray(full, dtype=np.float32).reshape(self.shape), self.affine_array)
        img.header.set_xyzt_units("mm")
        return img

    def views(self, full: np.ndarray) -> np.ndarray:
        return slice_views(np.asarray(full).reshape(self.shape), self.affine_array)

    def flags_image(self, flags: np.ndarray):
        import nibabel as nib

        return nib.Nifti1Image(np.asarray(flags, dtype=np.uint8).reshape(self.shape), self.affine_array)

    def image_values(self, img) -> np.ndarray:
        return np.asarray(img.dataobj).reshape(-1)

    def samples_image(self, x: np.ndarray, mask_img):
        import nibabel as nib

        m = self.image_values(mask_img) > 0
        data = np.zeros((m.size, len(x)), dtype=np.float32)
        data[m] = np.asarray(x, dtype=np.float32).T
        return nib.Nifti1Image(data.reshape(tuple(self.shape) + (len(x),)), self.affine_array)

    def write_labels(self, folder: Any, labels: np.ndarray, n_labels: int, mask_img) -> None:
        import nibabel as nib

        nib.save(nib.Nifti1Image(np.asarray(labels).reshape(self.shape), self.affine_array),
                 os.path.join(folder, "labels.nii.gz"))

    def background(self) -> np.ndarray:
        return slice_views(mni152_template(self), self.affine_array)

    def write_mask(self, folder: Any, flags: np.ndarray, stem: str = "mask") -> list[str]:
        import nibabel as nib

        name = f"{stem}.nii.gz"
        data = (np.nan_to_num(np.asarray(flags, dtype=np.float32)) > 0).astype(np.uint8).reshape(self.shape)
        nib.save(nib.Nifti1Image(data, self.affine_array), os.path.join(os.fspath(folder), name))
        return [name]

    def position_columns(self, flat: np.ndarray) -> dict[str, np.ndarray]:
        ijk = np.stack(np.unravel_index(np.asarray(flat, dtype=np.int64), self.shape)).astype(np.int64)
        mm = self.millimetres(flat)
        return {"i": ijk[0], "j": ijk[1], "k": ijk[2], "x_mm": mm[:, 0], "y_mm": mm[:, 1], "z_mm": mm[:, 2]}

    def position(self, flat: int) -> list[int]:
        return [int(c) for c in np.unravel_index(int(flat), self.shape)]

    def millimetres(self, flat: np.ndarray) -> np.ndarray:
        ijk = np.stack(np.unravel_index(np.asarray(flat, dtype=np.int64), self.shape)).astype(np.float64)
        aff = self.affine_array
        return (aff[:3, :3] @ ijk + aff[:3, 3:4]).T

    def local_maxima(self, full: np.ndarray) -> np.ndarray:
        from scipy import ndimage

        vol = np.asarray(full, dtype=np.float64).reshape(self.shape)
        filled = np.nan_to_num(vol, nan=-np.inf)
        local = filled == ndimage.maximum_filter(filled, size=3, mode="constant", cval=-np.inf)
        return np.flatnonzero((local & np.isfinite(vol)).reshape(-1))

    @classmethod
    def rebuild_arguments(cls, grid: Any, mask: Any, settings: dict[str, Any]) -> dict[str, Any]:
        name = grid.get("name") if isinstance(grid, dict) else None
        if not isinstance(grid, dict):
            raise ParameterError("the manifest's grid is not an object; export again")
        if name in BUILTIN_GRIDS:
            grid_arg: Any = name
        else:
            shape, affine = grid.get("shape"), grid.get("affine")
            if not (isinstance(shape, list) and len(shape) == 3 and all(
                    isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in shape)):
                raise ParameterError(f"the manifest's grid shape {shape!r} is not three positive whole numbers")
            if shape[0] * shape[1] * shape[2] > _MAX_GRID:
                raise ParameterError(f"the manifest's grid {shape} has more than {_MAX_GRID:,} voxels; no template "
                                     "is that large")
            flat = affine if isinstance(affine, list) and len(affine) == 16 else \
                [v for row in affine for v in row] if isinstance(affine, list) and len(affine) == 4 and all(
                    isinstance(r, list) and len(r) == 4 for r in affine) else None
            if flat is None or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in flat):
                raise ParameterError("the manifest's grid affine is not 16 numbers")
            grid_arg = {"shape": shape, "affine": [flat[i:i + 4] for i in range(0, 16, 4)]}
        mask_name = mask.get("name") if isinstance(mask, dict) else None
        if mask_name != "MNI152-brain":
            raise ParameterError(f"the export's feature set used mask {mask_name!r}: only the built-in brain mask can "
                                 "be rebuilt from a manifest")
        return {"grid": grid_arg, "mask": "brain"}

    def peak(self, full: np.ndarray) -> tuple[int, int, int] | None:
        v = np.abs(np.asarray(full, dtype=np.float64).reshape(self.shape))
        if not np.isfinite(v).any():
            return None
        return tuple(int(i) for i in np.unravel_index(np.nanargmax(v), self.shape))  # type: ignore[return-value]

    def panels(self, full: np.ndarray, focus: Any = None) -> list[Panel]:
        return slice_panels(np.asarray(full).reshape(self.shape), self.affine_array, focus)

    def background_panels(self, focus: Any = None) -> list[np.ndarray]:
        return [p.values for p in slice_panels(mni152_template(self), self.affine_array, focus)]


def grid_from_spec(shape, affine, name: str = "custom") -> TargetGrid:
    """A grid from an explicit shape (3 ints) and a 4x4 affine."""
    shape = tuple(int(s) for s in shape)
    aff = np.asarray(affine, dtype=np.float64)
    if len(shape) != 3 or any(s < 1 for s in shape):
        raise GridError(f"grid shape must be 3 positive integers, got {shape}")
    if aff.shape != (4, 4) or not np.all(np.isfinite(aff)) or abs(np.linalg.det(aff[:3, :3])) < 1e-12:
        raise GridError(f"grid affine must be a finite, invertible 4x4 matrix, got {aff.tolist()}")
    return TargetGrid(shape, tuple(float(x) for x in aff.ravel()), name)


def _cache_dir() -> Path:
    base = os.environ.get("MAPSTORE_CACHE") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.expanduser("~/.cache"), "mapstore")
    return Path(base)


def _mni152(resolution: int) -> tuple[tuple[int, int, int], np.ndarray, np.ndarray]:
    """Shape, affine and brain mask of nilearn's MNI152 template at a resolution.

    Importing nilearn.datasets and resampling its template costs ~1.7 s, so the result is
    cached per nilearn version in the user's cache folder (MAPSTORE_CACHE overrides it);
    a cache that cannot be written is simply skipped.
    """
    import importlib.metadata

    version = importlib.metadata.version("nilearn")
    f = _cache_dir() / f"mni152-{resolution}mm-nilearn{version}.npz"
    try:
        with np.load(f) as z:
            return tuple(int(x) for x in z["shape"]), z["affine"], z["mask"]  # type: ignore[return-value]
    except (OSError, KeyError, ValueError):
        pass
    from nilearn.datasets import load_mni152_brain_mask, load_mni152_template

    tpl = load_mni152_template(resolution=resolution)
    mimg = load_mni152_brain_mask(resolution=resolution)
    if mimg.shape[:3] != tpl.shape[:3] or not np.allclose(mimg.affine, tpl.affine, atol=1e-4):
        raise GridError("nilearn's MNI152 brain mask and template grids differ; mapstore expects them equal")
    shape, affine, mask = tuple(tpl.shape[:3]), np.asarray(tpl.affine, float), np.asarray(mimg.dataobj) > 0
    try:
        f.parent.mkdir(parents=True, exist_ok=True)
        tmp = f.with_name(f".{f.name}.{os.getpid()}.npz")
        np.savez(tmp, shape=np.array(shape), affine=affine, mask=mask)
        os.replace(tmp, f)
    except OSError:
        pass
    return shape, affine, mask


def mni152_template(grid: TargetGrid) -> np.ndarray:
    """nilearn's MNI152 T1 template on a grid (linear), for picture backgrounds; cached per machine."""
    import importlib.metadata

    version = importlib.metadata.version("nilearn")
    f = _cache_dir() / f"mni152-template-2mm-nilearn{version}.npz"
    try:
        with np.load(f) as z:
            data, affine = z["data"], z["affine"]
    except (OSError, KeyError, ValueError):
        from nilearn.datasets import load_mni152_template

        tpl = load_mni152_template(resolution=2)
        data, affine = np.asarray(tpl.dataobj, dtype=np.float32), np.asarray(tpl.affine, float)
        try:
            f.parent.mkdir(parents=True, exist_ok=True)
            tmp = f.with_name(f".{f.name}.{os.getpid()}.npz")
            np.savez(tmp, data=data, affine=affine)
            os.replace(tmp, f)
        except OSError:
            pass
    return np.nan_to_num(resample(data, affine, grid, "linear"), nan=0.0)


def builtin_grid(name: str) -> TargetGrid:
    """A grid of the MNI152 template nilearn ships, at 1, 2 or 3 mm (``MNI152-2mm``, ...)."""
    if name not in BUILTIN_GRIDS:
        raise UnknownGrid(f"unknown built-in grid {name!r}; choose one of {sorted(BUILTIN_GRIDS)} or give "
                        "a reference image path")
    shape, affine, _ = _mni152(BUILTIN_GRIDS[name])
    return grid_from_spec(shape, affine, name)


def grid_from_image(path: str | os.PathLike[str]) -> TargetGrid:
    """The grid of a reference image (its header only is read)."""
    facts = read_header(str(path))
    return grid_from_spec(facts.spatial_shape, facts.affine_array, f"image:{Path(path).name}")


def mni152_brain_mask(grid: TargetGrid) -> Mask:
    """nilearn's MNI152 brain mask, on the grid (resampled by nearest neighbour if needed)."""
    res = BUILTIN_GRIDS.get(grid.name, 2)
    shape, affine, mask = _mni152(res)
    data = mask.astype(np.float32)
    if shape != grid.shape or not np.allclose(affine, grid.affine_array, atol=1e-4):
        data = resample(data, affine, grid, "nearest")
        data = np.nan_to_num(data, nan=0.0)
    return mask_from_array(grid, data > 0.5, "MNI152-brain")


def mask_from_image(path: str | os.PathLike[str], grid: TargetGrid) -> Mask:
    """A mask file (non-zero voxels), resampled onto the grid by nearest neighbour if needed."""
    try:
        data, facts = read_volume(str(path))
    except GridError as exc:
        raise GridError(f"mask file {path}: {exc}") from exc
    if facts.spatial_shape != grid.shape or not np.allclose(facts.affine_array, grid.affine_array, atol=1e-4):
        data = resample(data, facts.affine_array, grid, "nearest")
    data = np.nan_to_num(data, nan=0.0)
    return mask_from_array(grid, data != 0, f"file:{Path(path).name}")


def gunzip(raw: bytes, limit: int | None = None) -> bytes:
    """Inflate a (possibly multi-member) gzip stream, with zlib-ng when it is installed; with ``limit``, at
    most that many bytes (a stream that inflates to more than its header promises is never held whole).

    zlib-ng inflates NIfTI float maps about 1.5x faster than the standard zlib here.
    """
    try:
        from zlib_ng import zlib_ng as z
    except ImportError:  # pragma: no cover - zlib-ng is a dependency
        import zlib as z  # type: ignore[no-redef]
    if limit is None:
        try:
            from zlib_ng import gzip_ng
        except ImportError:  # pragma: no cover
            return gzip.decompress(raw)
        return gzip_ng.decompress(raw)
    out = bytearray()
    data = raw
    while data and len(out) < limit:
        d = z.decompressobj(16 + z.MAX_WBITS)
        try:
            out += d.decompress(data, limit - len(out))
        except z.error as exc:  # type: ignore[misc]  # zlib's own error class: a corrupt stream is a ValueError to the caller
            raise ValueError(str(exc)) from exc
        if not d.eof:
            break  # the limit reached, or the stream cut short (the length check says which)
        data = d.unused_data
    return bytes(out)


def read_volume(path: str, expect_sha256: str | None = None, dtype=np.float32, map_index: int | None = None
                ) -> tuple[np.ndarray, HeaderFacts]:
    """Read a 3-D NIfTI volume as scaled float32 (or ``dtype``), optionally checking the file's SHA-256.

    The file is read once; its bytes are hashed, inflated if gzipped, and viewed
    with the header's dtype, byte order and Fortran (x-fastest) layout.  Other formats (ANALYZE and
    NIfTI pairs, AFNI, MGH, MINC) are read through nibabel; ``map_index`` picks an AFNI sub-brick.
    """
    if foreign_format(path):
        return _read_foreign(path, expect_sha256, dtype, map_index)
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except FileNotFoundError as exc:
        raise GridError(f"{path}: file is gone since it was indexed; re-run 'mapstore index'") from exc
    except OSError as exc:
        raise GridError(f"{path}: cannot read ({exc.strerror})") from exc
    if expect_sha256 is not None:
        got = hashlib.sha256(raw).hexdigest()
        if got != expect_sha256:
            raise GridError(f"{path}: content changed since it was indexed (sha256 {got[:12]}... != "
                            f"{expect_sha256[:12]}...); re-run 'mapstore index'")
    try:
        facts = parse_header(path, header_prefix(path, raw[:4096]))
        # inflate only what the header says the map holds (plus a byte): never a bomb's whole stream
        body = gunzip(raw, facts.vox_offset + facts.data_nbytes + 1) if raw[:2] == b"\x1f\x8b" else raw
    except HeaderError as exc:
        raise GridError(str(exc)) from exc
    except (OSError, EOFError, ValueError) as exc:
        raise GridError(f"{path}: gzip stream is corrupt ({exc}); re-create the file") from exc
    if facts.n_volumes != 1 and map_index is None:
        raise GridError(f"{path}: has {facts.n_volumes} volumes; a statistic map must be one 3-D volume "
                        "(split it, or keep only the map you need)")
    k = map_index or 0  # a sub-brick of an AFNI bucket written as NIfTI: volumes follow each other
    if not 0 <= k < facts.n_volumes:
        raise GridError(f"{path}: has {facts.n_volumes} volume(s), not a volume {k}; re-run 'mapstore index'")
    if facts.dtype not in REAL_SCALAR_DTYPES:
        raise GridError(f"{path}: voxel type {facts.dtype} is not a real scalar; save the map as float32")
    dt = np.dtype(facts.dtype).newbyteorder(facts.endianness)  # type: ignore[arg-type]
    count = math.prod(facts.spatial_shape)  # Python ints: a damaged header's dims must not wrap around
    start = facts.vox_offset + k * count * dt.itemsize
    need = start + count * dt.itemsize
    if len(body) < need:
        raise GridError(f"{path}: data is truncated ({len(body)} bytes, header needs {need}); re-create the file")
    arr = np.frombuffer(body, dtype=dt, count=count, offset=start)
    vol = arr.reshape(facts.spatial_shape, order="F").astype(dtype)
    slope, inter = facts.scl_slope, facts.scl_inter
    # nifti1.h: scaling applies when scl_slope is non-zero (and finite)
    if np.isfinite(slope) and slope != 0 and (slope != 1 or inter != 0):
        with np.errstate(over="ignore", invalid="ignore"):  # a wild slope gives inf, as the header says
            vol = vol * vol.dtype.type(slope) + vol.dtype.type(inter if np.isfinite(inter) else 0)
    return vol, facts


def _read_foreign(path: str, expect_sha256: str | None, dtype, map_index: int | None
                  ) -> tuple[np.ndarray, HeaderFacts]:
    try:
        if expect_sha256 is not None:
            got = digest_map(path).sha256
            if got != expect_sha256:
                raise GridError(f"{path}: content changed since it was indexed (sha256 {got[:12]}... != "
                                f"{expect_sha256[:12]}...); re-run 'mapstore index'")
        return read_foreign_volume(path, map_index, dtype)
    except FileNotFoundError as exc:
        raise GridError(f"{path}: file is gone since it was indexed; re-run 'mapstore index'") from exc
    except HeaderError as exc:
        raise GridError(str(exc)) from exc
    except OSError as exc:
        raise GridError(f"{path}: cannot read ({exc.strerror})") from exc


def _target_to_source(src_affine: np.ndarray, grid: TargetGrid) -> np.ndarray:
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


def resample(data: np.ndarray, src_affine: np.ndarray, grid: TargetGrid, method: str = "linear",
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
    if method not in _ORDER:
        raise GridError(f"method must be one of {list(METHODS)}, got {method!r}")
    data = np.asarray(data)
    if data.ndim != 3:
        raise GridError(f"expected a 3-D volume, got shape {data.shape}")
    m = _target_to_source(src_affine, grid)
    out, path = _resample(data, m, grid, method)
    return (out, path) if return_path else out


def _plan(m: np.ndarray, src_shape: tuple[int, ...], grid: TargetGrid, method: str):
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


def _resample(data: np.ndarray, m: np.ndarray, grid: TargetGrid, method: str):
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


def crop_grid(grid: TargetGrid, indices: np.ndarray) -> tuple[TargetGrid, np.ndarray]:
    """The bounding box of flat ``indices`` as a grid of its own, and the indices within it.

    Resampling onto the box and then gathering gives the same values as resampling onto
    the whole grid, for less work.
    """
    ijk = np.array(np.unravel_index(indices, grid.shape))
    lo, hi = ijk.min(axis=1), ijk.max(axis=1) + 1
    shift = np.eye(4)
    shift[:3, 3] = lo
    box = TargetGrid(tuple(int(x) for x in hi - lo), tuple(float(x) for x in (grid.affine_array @ shift).ravel()),  # type: ignore[arg-type]
                     grid.name + ":box")
    local = np.ravel_multi_index(tuple(ijk - lo[:, None]), box.shape)
    return box, local.astype(np.int64)


def slice_panels(vol: np.ndarray, affine: np.ndarray, focus: tuple[int, int, int] | None = None) -> list[Panel]:
    """Axial, coronal and sagittal slices through voxel ``focus`` (the grid centre if None), RAS-up and
    reading left to right (L to R; P to A), each labelled with its plane's millimetre coordinate."""
    c = list(tuple(s // 2 for s in vol.shape) if focus is None else focus)
    mm = affine[:3, :3] @ np.array(c, dtype=np.float64) + affine[:3, 3]
    ras = vol
    for ax in range(3):  # flip axes whose affine direction is negative (as slice_views)
        if affine[ax, ax] < 0:
            ras = np.flip(ras, axis=ax)
            c[ax] = ras.shape[ax] - 1 - c[ax]
    cx, cy, cz = c
    return [Panel(ras[:, :, cz].T[::-1], f"axial z = {mm[2]:.0f} mm", "L", "R"),
            Panel(ras[:, cy, :].T[::-1], f"coronal y = {mm[1]:.0f} mm", "L", "R"),
            Panel(ras[cx, :, :].T[::-1], f"sagittal x = {mm[0]:.0f} mm", "P", "A")]


def slice_views(vol: np.ndarray, affine: np.ndarray, scale: int = 2,
                centre: tuple[int, int, int] | None = None) -> np.ndarray:
    """Axial, coronal and sagittal slices through the grid centre (or voxel ``centre``), side by side, RAS-up."""
    ras = vol
    centre = tuple(s // 2 for s in vol.shape) if centre is None else centre  # type: ignore[assignment]
    # flip axes whose affine direction is negative, so pictures read left-right, posterior-anterior
    c = list(centre)  # type: ignore[arg-type]
    for ax in range(3):
        if affine[ax, ax] < 0:
            ras = np.flip(ras, axis=ax)
            c[ax] = ras.shape[ax] - 1 - c[ax]
    cx, cy, cz = c
    views = [ras[:, :, cz].T[::-1], ras[:, cy, :].T[::-1], ras[cx, :, :].T[::-1]]
    height = max(v.shape[0] for v in views)
    padded = [np.pad(v, ((0, height - v.shape[0]), (0, 2)), constant_values=np.nan) for v in views]
    img = np.concatenate(padded, axis=1)
    return np.kron(img, np.ones((scale, scale)))
