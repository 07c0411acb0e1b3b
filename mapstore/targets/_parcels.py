"""Atlases for parcel sets: parcels as weights over a source set's features, and painting back.

An atlas is read onto a source feature set (its grid or mesh, its mask) as a weight matrix
``W`` of shape (source features, parcels):

* a label image (3-D NIfTI of integers; 0 is background): ``W`` is 1 where a voxel has the
  parcel's label; the reducer is the **mean** over the parcel's voxels that have a value,
  what nilearn's ``NiftiLabelsMasker(strategy="mean")`` computes;
* a probabilistic atlas (4-D NIfTI, one map per parcel): ``W`` holds the maps; the reducer is
  the least-squares fit of the row on the maps over the voxels some map covers
  (**maps-regression**), what nilearn's ``NiftiMapsMasker`` computes;
* surface labels (an array over both hemispheres, or a GIFTI label file per hemisphere): the
  mean, as nilearn's ``SurfaceLabelsMasker``.

Atlas images are resampled onto the source grid with nilearn's ``resample_to_img``
(nearest neighbour for labels, continuous for maps), as nilearn's maskers do.
"""

from __future__ import annotations

import hashlib
import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from ..errors import DataFileError, FeatureError, ParameterError
from ._protocol import BatchContext, BuildSettings, Panel, RowValues, SourceMap, Target

__all__ = ["Atlas", "ParcelGrid", "REDUCERS", "load_atlas", "reduce_rows", "paint"]

REDUCERS = ("mean", "maps-regression")


@dataclass(frozen=True)
class ParcelGrid(Target):
    """The feature space of a parcel set: one feature per parcel of an atlas over a source set.

    Its rows are drawn, and made into images, on the source set's target (``source``), by painting
    each parcel's value over its features (``weights.npz`` and ``source_mask.npy`` in ``folder``).
    """

    kind: ClassVar[str] = "parcels"
    unit: ClassVar[str] = "parcels"
    parcels_from: ClassVar[bool] = False

    name: str
    n_parcels: int
    atlas_sha256: str
    atlas_kind: str = "labels"  # labels | maps | surface-labels
    source: Target | None = None  # the source set's target
    folder: str | None = None  # the parcel set's folder
    labels: tuple[str, ...] = ()  # each parcel's name, in order

    @property
    def shape(self) -> tuple[int]:  # type: ignore[override]
        return (self.n_parcels,)

    @property
    def grid_id(self) -> str:
        return hashlib.sha256(f"parcels|{self.atlas_sha256}|{self.n_parcels}".encode()).hexdigest()[:16]

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "shape": [self.n_parcels], "affine": None,
                "grid_id": self.grid_id}

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> "ParcelGrid":
        raise FeatureError("a parcel set's target is read from its set.json (its atlas and source set)")

    @classmethod
    def from_set(cls, spec: dict[str, Any], folder: str | os.PathLike[str] | None = None,
                 of_set: Any = None) -> "ParcelGrid":
        p = spec["parcels"]
        source = of_set({"geometry": p["source_geometry"], "grid": p["source_grid"]})
        return cls(p["atlas_name"], len(p["labels"]), p["atlas_sha256"], p["kind"], source,
                   os.fspath(folder) if folder is not None else None, tuple(str(n) for n in p["labels"]))

    def values(self, item: SourceMap, settings: BuildSettings, ctx: BatchContext, region: Any = None,
               indices: np.ndarray | None = None) -> RowValues:
        raise FeatureError(f"{self.name!r} is a parcel set, made from a source feature set (mapstore.build_parcels), "
                           "not from maps: transform a map with the source set, then reduce it with the set's "
                           "ParcelReducer")

    def base(self) -> Target:
        if self.source is None:
            raise FeatureError(f"parcel set {self.name!r}: its source set's target is unknown")
        return self.source

    def on_base(self, full: np.ndarray) -> np.ndarray:
        """Each source feature its parcel's value (NaN outside every parcel), over the source's positions."""
        import scipy.sparse as sp

        v = np.asarray(full, dtype=np.float32).reshape(-1)
        if v.size != self.n_parcels:
            raise FeatureError(f"vector has {v.size} values, parcel set {self.name!r} has {self.n_parcels} parcels")
        folder = Path(self.folder or ".")
        try:
            weights = sp.load_npz(folder / "weights.npz")
            src_mask = np.load(folder / "source_mask.npy")
        except OSError as exc:
            raise FeatureError(f"{folder}: the parcel set's atlas files are unreadable ({exc}); rebuild it "
                               "with mapstore.build_parcels") from exc
        return self.base().full(paint(v, weights, self.atlas_kind), src_mask)

    def image(self, full: np.ndarray):
        return self.base().image(self.on_base(full))

    def write_image(self, full: np.ndarray, folder: Any, stem: str, intent: tuple[str, ...] | None = None) -> list[str]:
        return self.base().write_image(self.on_base(full), folder, stem, intent)

    def write_mask(self, folder: Any, flags: np.ndarray, stem: str = "mask") -> list[str]:
        return self.base().write_mask(folder, np.nan_to_num(self.on_base(np.asarray(flags, np.float32))) > 0, stem)

    def position_columns(self, flat: np.ndarray) -> dict[str, np.ndarray]:
        if len(self.labels) != self.n_parcels:
            return {}
        return {"parcel": np.asarray(self.labels, dtype=object)[np.asarray(flat, dtype=np.int64)].astype(str)}

    def views(self, full: np.ndarray) -> np.ndarray:
        return self.base().views(self.on_base(full))

    def background(self) -> np.ndarray:
        return self.base().background()

    def peak(self, full: np.ndarray) -> Any:
        return self.base().peak(self.on_base(full))

    def panels(self, full: np.ndarray, focus: Any = None) -> list[Panel]:
        return self.base().panels(self.on_base(full), focus)

    def panels_of(self, fulls: list[np.ndarray], focus: Any = None) -> list[list[Panel]]:
        return self.base().panels_of([self.on_base(f) for f in fulls], focus)

    def background_panels(self, focus: Any = None) -> list[np.ndarray]:
        return self.base().background_panels(focus)

    @property
    def picture_caption(self) -> str:  # type: ignore[override]
        return self.base().picture_caption

    @property
    def background_name(self) -> str:  # type: ignore[override]
        return self.base().background_name


@dataclass
class Atlas:
    """Parcels over a source set's mask features: ``weights`` (features x parcels) and their names."""

    name: str
    kind: str  # labels | maps | surface-labels
    labels: list[str]
    weights: Any  # scipy.sparse.csc_matrix, (source mask features, parcels)
    sha256: str  # of the atlas as given (file bytes or array)
    source: str

    @property
    def reducer(self) -> str:
        return "maps-regression" if self.kind == "maps" else "mean"

    @property
    def n_parcels(self) -> int:
        return len(self.labels)


def _sha_file(path: str) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def load_atlas(atlas: Any, grid, mask_indices: np.ndarray, geometry: str, name: str | None = None) -> Atlas:
    """Read ``atlas`` onto a source set (its ``grid``, flat ``mask_indices`` and ``geometry``).

    ``atlas`` is a NIfTI path (3-D labels or 4-D maps), a pair of GIFTI label files
    ``{"left": path, "right": path}`` or an integer array over the grid (volume shape, or both
    hemispheres' vertices for a surface set).
    """
    import scipy.sparse as sp

    if isinstance(atlas, np.ndarray):
        labels_flat = np.asarray(atlas).reshape(-1)
        if labels_flat.size != int(np.prod(grid.shape)):
            raise ParameterError(f"atlas array has {labels_flat.size} values, the source set's grid has "
                                 f"{int(np.prod(grid.shape))}")
        sha = hashlib.sha256(np.ascontiguousarray(labels_flat, dtype=np.int64).tobytes()).hexdigest()
        kind = "surface-labels" if geometry == "surface" else "labels"
        return _from_labels(labels_flat, mask_indices, kind, sha, name or "array", "array")
    if isinstance(atlas, dict):
        if geometry != "surface":
            raise ParameterError("a {'left': ..., 'right': ...} atlas takes a surface source set")
        return _surface_labels(atlas, grid, mask_indices, name)
    path = str(atlas)
    if not os.path.isfile(path):
        raise ParameterError(f"atlas {path!r}: no such file; give a label or probabilistic NIfTI image, a "
                             "{'left': ..., 'right': ...} pair of GIFTI label files, or an integer array")
    if geometry == "surface":
        raise ParameterError(f"atlas {path}: a NIfTI atlas takes a volume source set; a surface set takes "
                             "{'left': path, 'right': path} GIFTI labels or an array")
    import nibabel as nib
    from nilearn.image import resample_to_img

    try:
        img = nib.load(path)
        data_shape = img.shape  # type: ignore[attr-defined]
    except Exception as exc:  # nibabel raises several types for a file that is not an image
        raise DataFileError(f"atlas {path}: not a readable NIfTI image ({exc})") from exc
    target = nib.Nifti1Image(np.zeros(grid.shape, np.uint8), grid.affine_array)
    sha = _sha_file(path)
    label = name or Path(path).name.split(".")[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if len(data_shape) == 3 or (len(data_shape) == 4 and data_shape[3] == 1):
            res = resample_to_img(img, target, interpolation="nearest", force_resample=True, copy_header=True)
            data = np.asarray(res.dataobj).reshape(grid.shape)
            if not np.allclose(data, np.round(data)):
                raise DataFileError(f"atlas {path}: a 3-D atlas must hold integer labels; a probabilistic "
                                     "atlas is 4-D (one map per parcel)")
            return _from_labels(np.round(data).astype(np.int64).reshape(-1), mask_indices, "labels", sha, label,
                                path)
        res = resample_to_img(img, target, interpolation="continuous", force_resample=True, copy_header=True)
    maps = np.nan_to_num(np.asarray(res.dataobj, dtype=np.float64)).reshape(-1, data_shape[3])[mask_indices]
    keep = np.flatnonzero(np.abs(maps).sum(axis=0) > 0)
    if keep.size == 0:
        raise FeatureError(f"atlas {path}: no map overlaps the source set's mask")
    return Atlas(label, "maps", [str(k) for k in keep], sp.csc_matrix(maps[:, keep]), sha, path)


def _from_labels(flat: np.ndarray, mask_indices: np.ndarray, kind: str, sha: str, name: str, source: str) -> Atlas:
    import scipy.sparse as sp

    lab = np.asarray(flat, dtype=np.int64)[mask_indices]
    ids = np.unique(lab[lab != 0])
    if ids.size == 0:
        raise FeatureError(f"atlas {source}: no parcel (non-zero label) inside the source set's mask")
    col = np.searchsorted(ids, lab)
    rows = np.flatnonzero(lab != 0)
    w = sp.csc_matrix((np.ones(rows.size), (rows, col[rows])), shape=(lab.size, ids.size))
    return Atlas(name, kind, [str(int(i)) for i in ids], w, sha, source)


def _surface_labels(atlas: dict, grid, mask_indices: np.ndarray, name: str | None) -> Atlas:
    import nibabel as nib

    parts = []
    h = hashlib.sha256()
    for hemi, key in (("L", "left"), ("R", "right")):
        path = atlas.get(key)
        if path is None or not os.path.isfile(str(path)):
            raise ParameterError(f"surface atlas: no {key} file ({path!r}); give {{'left': path, 'right': path}}")
        try:
            data = np.asarray(nib.load(str(path)).darrays[0].data).reshape(-1)  # type: ignore[attr-defined]
        except Exception as exc:
            raise DataFileError(f"surface atlas {path}: not a readable GIFTI file ({exc})") from exc
        n = grid.n_left if hemi == "L" else grid.n_right
        if data.size != n:
            raise ParameterError(f"surface atlas {path}: {data.size} vertices, the set's {hemi} hemisphere has {n}")
        parts.append(data.astype(np.int64))
        h.update(_sha_file(str(path)).encode())
    return _from_labels(np.concatenate(parts), mask_indices, "surface-labels", h.hexdigest(),
                        name or Path(str(atlas["left"])).name.split(".")[0], f"{atlas['left']},{atlas['right']}")


def reduce_rows(x: np.ndarray, atlas: Atlas) -> np.ndarray:
    """Parcel values of rows ``x`` (rows x source mask features, NaN missing), float32.

    ``mean``: the mean over each parcel's features that have a value (NaN where none has).
    ``maps-regression``: least squares of each row on the maps over the features some map covers;
    a row with missing features is fitted on the ones it has (NaN when fewer than the maps).
    """
    w = atlas.weights
    finite = np.isfinite(x)
    if atlas.reducer == "mean":
        # a dense float32 product is BLAS-fast while the weights stay small (features x parcels)
        dense = atlas.n_parcels <= 512
        wd = w.toarray().astype(np.float32) if dense else w
        x0 = np.where(finite, x, np.float32(0)) if not finite.all() else np.asarray(x, dtype=np.float32)
        sums = np.asarray(x0 @ wd, dtype=np.float64) if dense else np.asarray(w.T @ x0.T.astype(np.float64)).T
        counts = np.broadcast_to(np.asarray(w.sum(axis=0), dtype=np.float64).reshape(1, -1), sums.shape)
        partial = ~finite.all(axis=1)
        if partial.any():  # rows with missing features: count what each parcel has
            counts = np.array(counts)
            fp = finite[partial].astype(np.float32)
            counts[partial] = np.asarray(fp @ wd if dense else (w.T @ fp.T).T, dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = np.where(counts > 0, sums / np.where(counts > 0, counts, 1), np.nan)
        return out.astype(np.float32)
    x0 = np.where(finite, x, 0.0).astype(np.float64)
    m = w.toarray()
    support = np.flatnonzero(np.abs(m).sum(axis=1) > 0)
    ms = m[support]
    out = np.full((len(x), m.shape[1]), np.nan)
    full = finite[:, support].all(axis=1)
    if full.any():
        out[full] = np.linalg.lstsq(ms, x0[full][:, support].T, rcond=None)[0].T
    for i in np.flatnonzero(~full):
        ok = finite[i, support]
        if ok.sum() >= ms.shape[1]:
            out[i] = np.linalg.lstsq(ms[ok], x0[i, support][ok], rcond=None)[0]
    return out.astype(np.float32)


def paint(values: np.ndarray, atlas_weights, kind: str) -> np.ndarray:
    """A source-mask vector from parcel values: each feature its parcel's value (labels) or the
    maps weighted by the values (maps-regression: the fitted reconstruction); NaN outside parcels."""
    v = np.asarray(values, dtype=np.float64).reshape(-1)
    w = atlas_weights
    if v.size != w.shape[1]:
        raise FeatureError(f"vector has {v.size} values, the atlas has {w.shape[1]} parcels")
    out = np.asarray(w @ np.nan_to_num(v)).reshape(-1)
    covered = np.asarray(abs(w).sum(axis=1)).reshape(-1) > 0
    if kind != "maps":
        out = out / np.where(covered, np.asarray(w.sum(axis=1)).reshape(-1), 1)
    out[~covered] = np.nan
    return out.astype(np.float32)
