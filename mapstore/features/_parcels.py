"""Parcel sets and data-driven parcellations: fewer, coarser features for cross-study decoders.

``build_parcels`` reduces every row of a source feature set (volume or surface) to one value
per parcel of an atlas (:func:`mapstore.targets.load_atlas`) into a new feature set of its own::

    features/<name>/set.json      "geometry": "parcels", "parcels": atlas, reducer, source set
    features/<name>/weights.npz   the atlas on the source mask (features x parcels, sparse)
    features/<name>/source_mask.npy   the source set's mask, to paint parcel values back
    features/<name>/shards, rows-<snap>.parquet   as every set

A parcel row's ``feature_key`` hashes the source row's key with the atlas and the reducer, and
``source_key`` keeps the source row's key: provenance runs parcel row -> source row -> file.

``fit_parcellation`` fits nilearn's ``Parcellations`` (Ward, k-means, ...) on a selection and
stores the labels image with its provenance; ``ParcelReducer`` is the scikit-learn transformer
that fits a parcellation inside each training fold (fitting it on every map would let the test
maps shape the features).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import shutil
import time
import uuid
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.validation import check_is_fitted, validate_data

from .._version import __version__
from ..targets import Atlas, ParcelGrid, image_target, load_atlas, reduce_rows
from ._copies import Sketcher
from ..errors import FeatureError, ParameterError
from ._reader import FeatureSet
from ._rows import write_shard
from ._build import (
    DEFAULT_SET,
    FeatureReport,
    Built,
    library_versions,
    sketch_of,
    spec_id,
    write_tables,
)
from ..store import (
    read_parquet,
    collect_feature_garbage,
    ROWS_SCHEMA,
    Catalog,
    commit_head,
    conform,
    new_snapshot_id,
    read_head,
    replace_dir,
    write_lock,
)
from ..store import FeatureSetSpec

__all__ = ["build_parcels", "fit_parcellation", "ParcelReducer", "stored_atlas"]

_BLOCK = 512  # source rows read and reduced at a time (and rows per parcel shard)
_PARTS = (("L", "left"), ("R", "right"))


def stored_atlas(store: str | os.PathLike[str], name: str) -> Path | dict[str, Path]:
    """The labels of a parcellation stored by :func:`fit_parcellation`: a NIfTI image's path, or
    ``{"left": path, "right": path}`` GIFTI labels for a surface parcellation."""
    path = Path(store) / "atlases" / name / "labels.nii.gz"
    pair = {part: Path(store) / "atlases" / name / f"labels_hemi-{h}.label.gii" for h, part in _PARTS}
    if all(p.exists() for p in pair.values()):
        return pair
    if not path.exists():
        have = sorted(p.name for p in (Path(store) / "atlases").glob("*")) if (Path(store) / "atlases").exists() else []
        raise ParameterError(f"{Path(store)}: no stored parcellation {name!r}; stored: {have or 'none'} "
                             "(mapstore.fit_parcellation makes one)")
    return path


def build_parcels(store: str | os.PathLike[str], atlas: Any, *, source: str | None = None, name: str | None = None,
                  progress: bool | None = None) -> FeatureReport:
    """Reduce a feature set to parcel values over an atlas, into a new feature set.

    Parameters
    ----------
    store : path
    atlas : path, dict, ndarray or str
        A label image or a 4-D probabilistic atlas (NIfTI) for a volume set; ``{"left": path,
        "right": path}`` GIFTI labels or an integer array over both hemispheres for a surface
        set; ``"store:<name>"`` for a parcellation stored by :func:`fit_parcellation`.
    source : str, optional
        The source feature set (default: the store's default set).
    name : str, optional
        Name of the parcel set (default ``<source>-<atlas>``).

    Returns
    -------
    FeatureReport
    """
    t0 = time.perf_counter()
    store_path = Catalog(store).path
    with write_lock(store_path):
        head = read_head(store_path)
        src_name = source or head.default_features
        if src_name is None or src_name not in head.features:
            raise FeatureError(f"{store_path}: no source feature set {src_name!r}; sets: {sorted(head.features)}; "
                               "build one with 'mapstore features' first")
        fs = FeatureSet(store_path, src_name, head.features[src_name])
        if not fs.target.parcels_from:
            raise ParameterError(f"feature set {src_name!r} is a parcel set already; give its voxel or surface set")
        given = atlas
        if isinstance(atlas, str) and atlas.startswith("store:"):
            found = stored_atlas(store_path, atlas[len("store:"):])
            atlas = {k: str(v) for k, v in found.items()} if isinstance(found, dict) else str(found)
        at = load_atlas(atlas, fs.target, fs.mask_indices, fs.target.kind,
                        name=given[len("store:"):] if isinstance(given, str) and given.startswith("store:") else None)
        name = _safe(name or f"{src_name}-{at.name}")
        if name == src_name or name == DEFAULT_SET:
            raise ParameterError(f"choose a parcel set name other than {name!r}")
        spec = _parcel_spec(name, fs, at, head.features[src_name].spec_id)
        set_dir = store_path / "features" / name
        existing = head.features.get(name)
        old = _previous(store_path, name, existing, spec)
        spec.sketch = sketch_of(store_path, existing, at.n_parcels)
        _write_set_files(set_dir, spec, at, fs)
        built, kept, dropped = _reduce(fs, at, spec, old, set_dir)
        rows_table, entry = write_tables(store_path, name, kept, built, [], dropped, existing,
                                          copies=_source_copies(fs))
        head = read_head(store_path)
        head.features[name] = dataclasses.replace(entry, n_rows=rows_table.num_rows, spec_id=spec.spec_id,
                                                  catalog=head.catalog)
        commit_head(store_path, head, {"event": "parcels", "set": name, "source": src_name,
                                       "built": len(built.rows), "rows": rows_table.num_rows})
        collect_feature_garbage(store_path, set_dir, entry.rows, existing.rows if existing else None)
    return FeatureReport(name=name, n_features=at.n_parcels, grid=f"parcels of {at.name}", mask="all parcels",
                         n_built=len(built.rows), n_unchanged=kept.num_rows, n_removed=dropped, n_problems=0,
                         seconds=time.perf_counter() - t0, paths={f"parcels:{at.reducer}": len(built.rows)},
                         unit="parcels")


def _source_copies(fs: FeatureSet) -> pa.Table:
    """The source set's copies: whether two maps are copies is judged on their voxels (or vertices).

    A few dozen parcel means of two different maps can correlate above the near-copy threshold
    where their voxels do not, so the parcel set's own rows would make a poor copy test.
    """
    from ._copies import find_copies

    table = fs.copies()
    return table if table is not None else find_copies(fs)


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in name)


def _parcel_spec(name: str, fs: FeatureSet, at: Atlas, source_spec_id: str | None) -> FeatureSetSpec:
    grid = ParcelGrid(at.name, at.n_parcels, at.sha256)
    mask_sha = hashlib.sha256(f"{grid.grid_id}|all".encode()).hexdigest()
    src = fs.spec
    spec = FeatureSetSpec(
        name=name, grid=grid.to_json(), grid_id=grid.grid_id,
        mask={"name": "all parcels", "n_voxels": at.n_parcels, "sha256": mask_sha}, mask_sha256=mask_sha,
        method=at.reducer, stat=src.stat, p_sided=src.p_sided, zero_as_missing=src.zero_as_missing,
        background=src.background, kinds=list(src.kinds), where=src.where, versions=library_versions(),
        geometry=grid.kind,
        parcels={"atlas": at.source, "atlas_name": at.name, "atlas_sha256": at.sha256, "kind": at.kind,
                 "reducer": at.reducer, "labels": at.labels, "source_set": fs.name,
                 "source_spec_id": source_spec_id or src.spec_id, "source_geometry": fs.target.kind,
                 "source_grid": src.grid, "source_mask_sha256": src.mask_sha256})
    spec.spec_id = spec_id(spec, projection={"parcels": at.sha256, "source": spec.parcels["source_spec_id"],
                                             "reducer": at.reducer})
    return spec


def _previous(store_path: Path, name: str, existing, spec: FeatureSetSpec) -> pa.Table:
    if not existing:
        return ROWS_SCHEMA.empty_table()
    old = FeatureSetSpec.read(store_path / existing.dir)
    if old.spec_id != spec.spec_id:
        raise FeatureError(f"feature set {name!r} exists with other settings (atlas, reducer or source set); "
                           "choose another name")
    return conform(read_parquet(store_path / existing.rows), ROWS_SCHEMA)


def _write_set_files(set_dir: Path, spec: FeatureSetSpec, at: Atlas, fs: FeatureSet) -> None:
    import scipy.sparse as sp

    (set_dir / "shards").mkdir(parents=True, exist_ok=True)
    for fname, save in (("mask.npy", lambda p: np.save(p, np.arange(at.n_parcels, dtype=np.int64))),
                        ("source_mask.npy", lambda p: np.save(p, fs.mask_indices)),
                        ("weights.npz", lambda p: sp.save_npz(p, at.weights.tocsc()))):
        tmp = set_dir / f".{uuid.uuid4().hex}.{fname}"
        save(tmp)
        os.replace(tmp, set_dir / fname)
    spec.write(set_dir)


def parcel_key(source_key: str, spec: FeatureSetSpec) -> str:
    p = spec.parcels or {}
    text = "|".join([source_key, p["atlas_sha256"], p["reducer"], p["source_mask_sha256"], __version__])
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def _reduce(fs: FeatureSet, at: Atlas, spec: FeatureSetSpec, old: pa.Table, set_dir: Path
            ) -> tuple[Built, pa.Table, int]:
    """Reduce the source rows whose parcel row is missing or stale, a block at a time."""
    src = fs.rows.select(["map_id", "feature_key", "sha256", "shard", "row", "stat_in", "stat_out", "conversion",
                          "missing_from", "p_clipped"]).to_pylist()
    have = {(m, k): i for i, (m, k) in enumerate(zip(old["map_id"].to_pylist(), old["feature_key"].to_pylist()))}
    keep_idx, todo = [], []
    for r in src:
        key = parcel_key(r["feature_key"], spec)
        if (r["map_id"], key) in have:
            keep_idx.append(have[(r["map_id"], key)])
        else:
            todo.append((r, key))
    kept = old.take(pa.array(sorted(keep_idx), pa.int64())) if keep_idx else old.slice(0, 0)
    snap = new_snapshot_id()
    built = Built([], [], {}, [], snap)
    sketcher = Sketcher.for_set(spec.mask_sha256, at.n_parcels, spec.sketch)
    now = time.strftime("%Y-%m-%dT%H:%M:%S")
    buf = np.empty((min(_BLOCK, max(len(todo), 1)), fs.n_voxels), dtype=np.float32)
    for k in range(0, len(todo), _BLOCK):
        part = todo[k:k + _BLOCK]
        x = fs.read_at([r["shard"] for r, _ in part], [r["row"] for r, _ in part], buf[:len(part)])
        vals = reduce_rows(x, at)
        shard = f"shard-parcels-{snap}-{k // _BLOCK:05d}.npy"
        path = set_dir / "shards" / shard
        built.created.append(path)
        write_shard(str(path), vals)
        sketches = sketcher.sketch(vals)
        for i, ((r, key), vec) in enumerate(zip(part, vals)):
            fin = vec[np.isfinite(vec)]
            built.rows.append({
                "map_id": r["map_id"], "feature_key": key, "sha256": r["sha256"], "shard": shard, "row": i,
                "coverage": float(fin.size / vec.size), "stat_in": r["stat_in"], "stat_out": r["stat_out"],
                "conversion": r["conversion"], "resample_path": f"parcels:{at.reducer}", "built_at": now,
                "row_sha256": hashlib.sha256(vec.tobytes()).hexdigest(),
                "vmin": float(fin.min()) if fin.size else None, "vmax": float(fin.max()) if fin.size else None,
                "vmean": float(fin.mean(dtype=np.float64)) if fin.size else None,
                "missing_from": r["missing_from"], "p_clipped": r["p_clipped"], "sketch": sketches[i].tobytes(),
                "source_key": r["feature_key"]})
    built.paths = {f"parcels:{at.reducer}": len(built.rows)}
    return built, kept, old.num_rows - kept.num_rows


# --- data-driven parcellations --------------------------------------------------------------

def _columns_image(fs: FeatureSet, voxels: np.ndarray):
    """A mask image of X's columns (``voxels``: positions in the set's mask) on the set's target: a NIfTI
    image for a volume set, a nilearn ``SurfaceImage`` of booleans for a surface set."""
    full = np.zeros(fs.target.n_positions, dtype=np.uint8)
    full[fs.mask_indices[np.asarray(voxels)]] = 1
    return fs.target.flags_image(full)


class ParcelReducer(TransformerMixin, BaseEstimator):
    """A scikit-learn transformer: fit a parcellation on the training rows, give parcel means.

    Put it first in a pipeline and pass the selection's ``splits`` as ``cv``: each fold fits its
    own parcellation on its training maps only (``fit``), and reduces both sides with it
    (``transform``).  Fitting one parcellation on all maps would let the test maps shape the
    features.

    Parameters
    ----------
    mask_img : Nifti1Image or SurfaceImage or None, default=None
        X's columns on the grid (a volume set) or mesh (a surface set):
        ``ParcelReducer.for_selection(sel, ...)`` builds it.  With a mask, nilearn
        ``Parcellations`` groups spatially neighbouring columns.  Without one, columns are
        grouped by Ward clustering of their profiles across rows (scikit-learn
        ``FeatureAgglomeration``), with no spatial constraint.
    n_parcels : int, default=100
        Parcels asked for; without a mask, at most X's number of columns.
    method : {"ward", "kmeans", "complete", "average", "rena", "hierarchical_kmeans"}, default="ward"
        nilearn ``Parcellations`` method (used with a mask).
    random_state : int, default=0
    max_rows : int, optional
        Fit on at most this many rows, drawn at random (``random_state``) without replacement, when X
        has more: for an X larger than memory given memory-mapped (``Selection.to_memmap``), only the
        drawn rows are read.  ``transform`` then reads X in blocks of rows.

    Attributes
    ----------
    labels_ : ndarray of shape (n_features,)
        Parcel of each column of X (0-based).
    n_features_in_ : int
        Columns of X seen in ``fit``.
    fit_rows_ : list of str
        SHA-256 of each row ``fit`` saw (what the leakage test checks).
    fit_sample_ : ndarray or None
        The rows ``fit`` drew (``max_rows``), or None when it saw every row.

    Examples
    --------
    >>> import numpy as np
    >>> from mapstore import ParcelReducer
    >>> X = np.random.default_rng(0).normal(size=(6, 10))
    >>> ParcelReducer(n_parcels=3).fit_transform(X).shape
    (6, 3)
    """

    _methods = ("ward", "kmeans", "complete", "average", "rena", "hierarchical_kmeans")

    def __init__(self, mask_img=None, n_parcels: int = 100, method: str = "ward", random_state: int = 0,
                 max_rows: int | None = None) -> None:
        self.mask_img = mask_img
        self.n_parcels = n_parcels
        self.method = method
        self.random_state = random_state
        self.max_rows = max_rows

    @classmethod
    def for_selection(cls, sel, n_parcels: int = 100, method: str = "ward", random_state: int = 0
                      ) -> "ParcelReducer":
        return cls(_columns_image(sel.feature_set, sel.voxels), n_parcels, method, random_state)

    def _check_params(self) -> None:
        if isinstance(self.n_parcels, bool) or not isinstance(self.n_parcels, (int, np.integer)) \
                or self.n_parcels < 1:
            raise ParameterError(f"n_parcels must be a positive integer, got {self.n_parcels!r}")
        if self.method not in self._methods:
            raise ParameterError(f"method must be one of {', '.join(self._methods)}; got {self.method!r}")
        if self.mask_img is not None and self.n_parcels < 2:
            raise ParameterError(f"n_parcels must be >= 2 with a mask, got {self.n_parcels!r}")
        if self.max_rows is not None and (isinstance(self.max_rows, bool) or
                                          not isinstance(self.max_rows, (int, np.integer)) or self.max_rows < 2):
            raise ParameterError(f"max_rows must be an integer >= 2 or None, got {self.max_rows!r}")

    def fit(self, X, y=None) -> "ParcelReducer":
        self._check_params()
        self.fit_sample_ = None
        if self.max_rows is not None and isinstance(X, np.ndarray) and X.ndim == 2 and len(X) > self.max_rows:
            rng = np.random.default_rng(self.random_state)
            self.fit_sample_ = np.sort(rng.choice(len(X), int(self.max_rows), replace=False))
            X = X[self.fit_sample_]  # a memory-mapped X: only these rows are read
        x = _finite(validate_data(self, X, dtype=np.float64, ensure_all_finite=False))
        if self.mask_img is not None:
            n_cols = int((image_target(self.mask_img).image_values(self.mask_img) > 0).sum())
            if x.shape[1] != n_cols:
                raise ParameterError(f"X must have {n_cols} columns (the mask's voxels or vertices), "
                                     f"got shape {x.shape}")
        self.fit_rows_ = [hashlib.sha256(r.astype(np.float32).tobytes()).hexdigest() for r in x]
        if self.mask_img is not None:
            self.labels_ = fit_labels(x.astype(np.float32), self.mask_img, self.n_parcels, self.method,
                                      self.random_state)
        else:
            self.labels_ = _profile_labels(x, int(self.n_parcels))
        return self

    _BLOCK = 1024  # rows of an ndarray X converted and reduced at a time

    def transform(self, X) -> np.ndarray:
        check_is_fitted(self, "labels_")  # scikit-learn's NotFittedError, as every estimator raises
        if isinstance(X, np.ndarray) and X.ndim == 2 and len(X) > self._BLOCK:  # a large (memory-mapped) X
            return np.concatenate([self.transform(X[i:i + self._BLOCK]) for i in range(0, len(X), self._BLOCK)])
        x = _finite(validate_data(self, X, dtype=np.float64, ensure_all_finite=False, reset=False))
        k = int(self.labels_.max()) + 1
        counts = np.bincount(self.labels_, minlength=k).astype(np.float64)
        sums = np.zeros((len(x), k))
        for j in range(k):  # one column sum per parcel: X's columns are grouped by label
            sums[:, j] = x[:, self.labels_ == j].sum(axis=1)
        return sums / np.where(counts > 0, counts, 1)


def _study_sample(studies: np.ndarray, n: int, seed: int) -> np.ndarray:
    """``n`` row positions drawn without replacement, each study keeping its share (at least one row)."""
    rng = np.random.default_rng(seed)
    keys = np.asarray(studies).astype(str)
    names, counts = np.unique(keys, return_counts=True)
    quota = np.maximum(1, np.floor(counts / counts.sum() * n)).astype(int)
    picked = [rng.choice(np.flatnonzero(keys == s), min(q, c), replace=False) for s, q, c in zip(names, quota, counts)]
    return np.sort(np.concatenate(picked))


def _finite(x: np.ndarray) -> np.ndarray:
    if not np.isfinite(x).all():
        raise ParameterError("X has NaN or infinite values; select with missing='common' (the default) or 'zero'")
    return x


def _profile_labels(x: np.ndarray, n_parcels: int) -> np.ndarray:
    """0-based labels of X's columns by Ward clustering of their profiles (no spatial constraint)."""
    from sklearn.cluster import FeatureAgglomeration

    k = min(n_parcels, x.shape[1])
    if k == x.shape[1]:  # as many parcels as columns: each column its own
        return np.arange(k, dtype=np.int64)
    agg = FeatureAgglomeration(n_clusters=k).fit(x)
    _, lab = np.unique(agg.labels_, return_inverse=True)
    return lab.reshape(-1).astype(np.int64)


def fit_labels(x: np.ndarray, mask_img, n_parcels: int, method: str, random_state: int) -> np.ndarray:
    """nilearn ``Parcellations`` fitted on rows ``x`` (over ``mask_img``'s voxels): 0-based label per column."""
    from nilearn.regions import Parcellations

    p = Parcellations(method=method, n_parcels=int(n_parcels), mask=mask_img, smoothing_fwhm=None,
                      standardize=False, random_state=random_state)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        p.fit(image_target(mask_img).samples_image(x, mask_img))
    # a label is one parcel over both hemispheres of a surface (nilearn numbers them across the two)
    on = image_target(mask_img)
    lab = on.image_values(p.labels_img_)[on.image_values(mask_img) > 0].astype(np.int64)
    _, lab = np.unique(lab, return_inverse=True)  # 0-based, no gaps
    return lab.reshape(-1)


def fit_parcellation(sel, name: str, *, n_parcels: int = 100, method: str = "ward", random_state: int = 0,
                     max_rows: int | None = None) -> Path | dict[str, Path]:
    """Fit nilearn ``Parcellations`` on a selection's maps and store its labels with provenance.

    The result lives in ``STORE/atlases/<name>/``: ``labels.nii.gz`` for a volume set, or
    ``labels_hemi-L.label.gii`` and ``labels_hemi-R.label.gii`` (GIFTI label files) for a surface
    set, and ``atlas.json`` (the feature set, the maps and their row hashes, the method, nilearn's
    version); the return value is the labels' path (a ``{"left": ..., "right": ...}`` pair for a
    surface set).  Build a parcel set from it with ``build_parcels(store, "store:<name>")``.  For decoding, fitting it on every map
    lets the test maps shape the parcels: use :class:`ParcelReducer` in the pipeline instead.
    ``max_rows`` fits on that many maps drawn at random (``random_state``), in proportion to each study's
    share, when the selection has more (only those rows are read); ``atlas.json`` lists the maps used.
    """
    import nilearn

    name = _safe(name)
    store_path = Path(sel.store.path)
    mask_img = _columns_image(sel.feature_set, sel.voxels)
    if max_rows is not None and len(sel) > max_rows:
        sel = sel.subset(_study_sample(sel.studies, int(max_rows), random_state))
    x = sel.X
    labels = fit_labels(x, mask_img, n_parcels, method, random_state)
    inside = sel.feature_set.target.image_values(mask_img) > 0
    flat = np.zeros(inside.size, dtype=np.int32)
    flat[inside] = labels + 1  # 0: outside the mask
    prov = {"name": name, "method": method, "n_parcels": int(labels.max()) + 1, "n_parcels_asked": int(n_parcels),
            "random_state": random_state, "feature_set": sel.feature_set.name,
            "geometry": sel.feature_set.target.kind, "grid": sel.feature_set.target.to_json(),
            "feature_set_spec_id": sel.feature_set.spec.spec_id, "query": sel.query,
            "maps": sel.map_ids, "row_sha256": sel.meta["feature_row_sha256"].tolist(),
            "versions": {"mapstore": __version__, "nilearn": nilearn.__version__},
            "created": time.strftime("%Y-%m-%dT%H:%M:%S"),
            "caution": "fitted on every map of the selection: decoding with it on these maps leaks the test maps "
                       "into the features; use ParcelReducer inside each fold"}
    final = store_path / "atlases" / name
    tmp = store_path / "atlases" / f".{name}.{uuid.uuid4().hex}"
    tmp.mkdir(parents=True)
    try:
        sel.feature_set.target.write_labels(tmp, flat, int(labels.max()) + 1, mask_img)
        (tmp / "atlas.json").write_text(json.dumps(prov, indent=1, default=str))
        replace_dir(tmp, final)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    found = stored_atlas(store_path, name)
    return found
