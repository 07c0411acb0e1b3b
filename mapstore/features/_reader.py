"""A feature set opened for reading: its rows, linked to maps, read straight from the shards."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import FeatureError, StoreCorrupt
from ..store import FeatureEntry, FeatureSetSpec, plain_name, read_parquet, regular_file, store_file
from ..targets import Target, target_of_set
from ._copies import SKETCH_BITS, Sketcher

__all__ = ["FeatureSet"]


class FeatureSet:
    """A feature set opened for reading: rows linked to maps, and their vectors.

    Obtained from :meth:`mapstore.Store.features`.
    """

    def __init__(self, store_path: Path, name: str, entry: FeatureEntry) -> None:
        self.name = name
        self.store_path, self.entry = Path(store_path), entry  # what a worker needs to open the set again
        # HEAD's paths are proven inside the store when it is read; again here for a record built by hand
        self.path = store_file(store_path, entry.dir, f"feature set {name!r} dir", folder=True)
        self._copies_path = store_file(store_path, entry.copies, f"feature set {name!r} copies") \
            if entry.copies else None
        self._rows_path = store_file(store_path, entry.rows, f"feature set {name!r} rows")
        try:
            self.spec: FeatureSetSpec = FeatureSetSpec.read(self.path)
            self._rows_file = pq.ParquetFile(self._rows_path)  # the footer only: columns are read when needed
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise FeatureError(f"{self.path}: feature set {name!r} is unreadable ({exc})") from exc
        self.target: Target = target_of_set(self.spec.to_json(), self.path)
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
        """One column of the rows table (None when the table has no such column), read once."""
        if name not in self._columns:
            if self._rows is not None:
                self._columns[name] = self._rows[name] if name in self._rows.column_names else None
            elif name in self._rows_file.schema_arrow.names:
                try:
                    self._columns[name] = self._rows_file.read(columns=[name])[name]
                except (OSError, pa.ArrowException) as exc:
                    raise FeatureError(f"{self._rows_path}: unreadable ({exc}); rebuild with 'mapstore "
                                       f"features --name {self.name}'") from exc
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
                f"grid={self.target.name}, mask={self.spec.mask['name']})")

    def _repr_html_(self) -> str:
        from ..formats import html_table

        spec = self.spec
        return html_table(f"feature set {self.name!r}", ["rows", self.unit, "grid", "mask", "method", "stat"],
                          [[len(self), self.n_voxels, self.target.name, spec.mask["name"], spec.method, spec.stat]])

    @property
    def n_voxels(self) -> int:
        """Features per row (voxels, vertices, grayordinates or parcels: see ``unit``)."""
        return int(self.spec.mask["n_voxels"])

    @property
    def unit(self) -> str:
        """What a row's values are: voxels, vertices, grayordinates or parcels."""
        return self.target.unit

    @property
    def map_ids(self) -> list[str]:
        return self._column("map_id").to_pylist()

    @property
    def mask_indices(self) -> np.ndarray:
        if self._indices is None:
            f = self.path / "mask.npy"
            try:
                idx = np.load(regular_file(f, f"feature set {self.name!r} mask"), allow_pickle=False)
            except (OSError, ValueError, EOFError) as exc:
                if isinstance(exc, StoreCorrupt):
                    raise
                raise StoreCorrupt(f"{f}: the set's mask is unreadable ({exc}); rebuild it with 'mapstore "
                                   f"features --name {self.name}'") from exc
            if idx.ndim != 1 or idx.dtype.kind not in "iu" or idx.size != self.n_voxels:
                raise StoreCorrupt(f"{f}: the set's mask holds {idx.size} {idx.dtype} values, not "
                                   f"{self.n_voxels} indices; rebuild it with 'mapstore features --name {self.name}'")
            self._indices = idx
        return self._indices

    def _shard(self, name: str) -> np.ndarray:
        if name not in self._shards:
            f = self.path / "shards" / plain_name(name, f"feature set {self.name!r} rows table shard")
            try:
                regular_file(f, f"feature set {self.name!r} shard")
                self._shards[name] = np.load(f, mmap_mode="r", allow_pickle=False)
            except StoreCorrupt:
                raise
            except (OSError, ValueError, EOFError) as exc:
                raise FeatureError(f"{self.path / 'shards' / name}: shard unreadable ({exc}); rebuild with "
                                   f"'mapstore features --name {self.name}'") from exc
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
        offset = arr.offset  # type: ignore[attr-defined]
        row_bytes = self.n_voxels * 4
        if len(rows) and (rows[0] < 0 or rows[-1] >= arr.shape[0]):  # rows are sorted
            raise StoreCorrupt(f"{self.path / 'shards' / shard}: the rows table names row {int(rows[-1])} of a "
                               f"shard of {arr.shape[0]}; rebuild the set with 'mapstore features --name "
                               f"{self.name}'")
        with open(self.path / "shards" / shard, "rb", buffering=0) as fh:
            i = 0
            while i < len(rows):
                j = i + 1  # extend while both the shard rows and their destinations run on
                while j < len(rows) and rows[j] == rows[j - 1] + 1 and dest[j] == dest[j - 1] + 1:
                    j += 1
                fh.seek(offset + int(rows[i]) * row_bytes)
                view = memoryview(out[dest[i]:dest[i] + (j - i)]).cast("B")  # type: ignore[arg-type]
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
        todo = [i for i, h in enumerate(out) if h is None]  # rows written without one (synthetic sets)
        for i, row in zip(todo, self.matrix([map_ids[i] for i in todo])):
            out[i] = hashlib.sha256(row.tobytes()).hexdigest()
        return out

    def copies(self) -> pa.Table | None:
        """Pairs of this set's rows that are copies (``feature_copies``), or None when none was stored."""
        if self._copies_path is None:
            return None
        try:
            return read_parquet(self._copies_path)
        except (OSError, pa.ArrowException) as exc:
            raise FeatureError(f"{self._copies_path}: unreadable ({exc}); rebuild with 'mapstore features "
                               f"--name {self.name}'") from exc

    def n_values(self, map_ids) -> np.ndarray:
        """Values (finite entries) of each row, from the coverage recorded at build time."""
        cover = self._column("coverage")
        col = cover.to_numpy(zero_copy_only=False) if cover is not None else np.ones(len(self))
        idx = np.fromiter((self._pos[m] for m in map_ids), dtype=np.int64)
        return np.rint(np.nan_to_num(col[idx].astype(np.float64), nan=1.0) * self.n_voxels).astype(np.int64)

    def sketches(self, map_ids) -> np.ndarray:
        """(n, SKETCH_BITS / 8) uint8 sign sketches of rows (:mod:`mapstore.features._copies`), recorded at build time."""
        map_ids = list(map_ids)
        sketches = self._column("sketch")
        col = sketches.to_pylist() if sketches is not None else [None] * len(self)
        got = [col[self._pos[m]] for m in map_ids]
        out = np.zeros((len(map_ids), SKETCH_BITS // 8), dtype=np.uint8)
        todo = [i for i, g in enumerate(got) if g is None]  # rows written without one (synthetic sets)
        for i, g in enumerate(got):
            if g is not None:
                out[i] = np.frombuffer(g, dtype=np.uint8)
        if todo:
            sk = Sketcher.for_set(self.spec.mask["sha256"], self.n_voxels, self.spec.sketch)
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
    def grid(self) -> Target:
        """Deprecated: the set's :attr:`target`."""
        import warnings

        warnings.warn("FeatureSet.grid is now FeatureSet.target; grid goes in the next release", DeprecationWarning,
                      stacklevel=2)
        return self.target

    @property
    def geometry(self) -> str:
        """Deprecated: the kind of the set's target, ``target.kind``."""
        import warnings

        warnings.warn("FeatureSet.geometry is now FeatureSet.target.kind; geometry goes in the next release",
                      DeprecationWarning, stacklevel=2)
        return self.target.kind

    def base(self) -> Target:
        """The target rows are drawn on (a parcel set's: its source set's)."""
        return self.target.base()

    def unmask(self, vector: np.ndarray) -> np.ndarray:
        """A mask-length vector over every position of the target (NaN outside the mask), in its shape."""
        v = np.asarray(vector, dtype=np.float32).reshape(-1)
        if v.size != self.n_voxels:
            raise FeatureError(f"vector has {v.size} values, feature set {self.name!r} has "
                               f"{self.n_voxels} mask {self.unit}")
        return self.target.full(v, self.mask_indices)

    def on_base(self, vector: np.ndarray) -> np.ndarray:
        """A row as values over its base's positions (volume-shaped, or both hemispheres' vertices)."""
        return self.target.on_base(self.unmask(vector))

    def transform(self, image, stat: str | None = None, *, dof: float | None = None, dof1: float | None = None,
                  mask_img=None, registration=None, space: str | None = None) -> np.ndarray:
        """One new map through exactly this set's rules: the same stat conversion, missing-region rules
        (the model's mask, a zero background, zeros on request), resampling or projection and mask.

        Parameters
        ----------
        image : path, nibabel image, or (left, right) GIFTI paths
            A volume (NIfTI), a CIFTI-2 dense-scalar file, or a surface map's two hemispheres.
        stat : str, optional
            The map's statistic (``t``, ``z``, ``p``, ``F``, ``effect`` ...): needed when the set
            converts to z (``dof`` for t, ``dof`` and ``dof1`` for F).
        mask_img : path or nibabel image, optional
            The model's own mask (missing outside it), as a stored map's model mask.
        registration : list of paths, optional
            A native-space volume's ITK/ANTs transforms to the set's template, template side first
            (``*_from-T1w_to-<template>_mode-image_xfm.h5``, as the store finds them).
        space : str, optional
            A surface map's space entity (``fsaverage5``, ``fsnative`` ...), as its file name would say.

        Returns
        -------
        ndarray, float32, shape (n_voxels,)
            The row the store would hold for this map (NaN where it has no value).
        """
        import tempfile

        from ..targets import BatchContext, BuildSettings, SourceMap

        spec = self.spec
        if spec.stat == "z" and stat is None:
            raise FeatureError(f"feature set {self.name!r} converts maps to z: say the map's stat (stat='t', "
                               "with dof=...)")
        settings = BuildSettings(spec.method, spec.stat, spec.p_sided, spec.zero_as_missing, spec.background,
                                 spec.projection)
        with tempfile.TemporaryDirectory(prefix="mapstore-transform-") as tmp:
            paths = _as_files(image, tmp, "map")
            mask = _as_files(mask_img, tmp, "mask")[0] if mask_img is not None else None
            steps = [{"path": os.fspath(p), "sha256": "", "format": "itk"} for p in registration or []]
            first = paths[0]
            geometry = "grayordinates" if first.endswith(".dscalar.nii") else \
                "surface" if first.endswith(".gii") else "volume"
            item = SourceMap("new", first, None, stat or "unknown", dof, "", mask, None, geometry,
                             "L" if geometry == "surface" else None,
                             paths[1] if geometry == "surface" and len(paths) > 1 else None,
                             space=space, space_kind="native" if steps else "template",
                             registration={"to": "template", "steps": steps} if steps else None,
                             dof_numerator=dof1)
            region, local = self.target.crop(self.mask_indices)
            row = self.target.values(item, settings, BatchContext(), region, local)
        return np.asarray(row.values, dtype=np.float32)

    def to_image(self, vector: np.ndarray):
        """An image of a row (or of a decoder's coefficients): NIfTI (nibabel) on a volume set's grid, a
        nilearn ``SurfaceImage`` on a surface set's mesh (NaN outside the mask: the medial wall), CIFTI-2
        on a grayordinate set's template, a parcel set's painted onto its source set's target."""
        return self.target.image(self.unmask(vector))


def _as_files(image, folder: str, name: str) -> list[str]:
    """Paths of a map given as a path, a (left, right) pair of paths, or a nibabel image (saved to ``folder``)."""
    if isinstance(image, (str, os.PathLike)):
        return [os.fspath(image)]
    if isinstance(image, (tuple, list)):
        return [p for part in image for p in _as_files(part, folder, name)]
    import nibabel as nib

    if isinstance(image, nib.Cifti2Image):
        path = os.path.join(folder, f"{name}.dscalar.nii")
    elif isinstance(image, nib.GiftiImage):
        path = os.path.join(folder, f"{name}-{len(os.listdir(folder))}.func.gii")
    elif isinstance(image, nib.spatialimages.SpatialImage):
        path = os.path.join(folder, f"{name}.nii.gz")
    else:
        raise FeatureError(f"cannot read a map from a {type(image).__name__}: give a path or a nibabel image")
    nib.save(image, path)
    return [path]
