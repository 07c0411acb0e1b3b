"""Volume targets: grids (built-in MNI152 or the user's), their masks, pictures and the path of a volume
map onto them (read by ``_readers``, resampled by ``_resample``, converted by ``_sources``)."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from ..errors import GridError, ParameterError, UnknownGrid
from ._readers import gunzip, read_volume
from ._resample import METHODS, resample
from ._protocol import BatchContext, BuildSettings, Mask, Panel, RowValues, SourceMap, Target, mask_from_array
from ..formats import (grid_fingerprint, read_header)

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
    # rows reversed: an axial slice's top row is its most anterior, the others' their most superior
    return [Panel(ras[:, :, cz].T[::-1], f"axial z = {mm[2]:.0f} mm", "L", "R", "A", "P"),
            Panel(ras[:, cy, :].T[::-1], f"coronal y = {mm[1]:.0f} mm", "L", "R", "S", "I"),
            Panel(ras[cx, :, :].T[::-1], f"sagittal x = {mm[0]:.0f} mm", "P", "A", "S", "I")]


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
