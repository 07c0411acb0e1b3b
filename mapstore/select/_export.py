"""Export a selection (X, y, groups, splits, metadata) with a manifest, and verify it later.

Output folder::

    X.npy             float32 (n_maps, n_voxels), memory-mappable   (or table.parquet with --format parquet,
                      or X.zarr with --format zarr: a Zarr v3 array, chunks of 16 rows x every column,
                      compressed, readable by zarr, xarray and Dask); columns as the selection's
                      missing-value policy keeps them
    voxels.npy        flat C-order grid index of each column of X (paints a row back onto the grid)
    columns.parquet   each column's grid index, and where it is (a volume's i, j, k and millimetres, a
                      mesh's hemisphere and vertex, a parcel's name)
    mask.*            X's columns as a mask image on the set's target (mask.nii.gz on a volume grid,
                      mask_hemi-L/R.func.gii on a mesh, mask.dscalar.nii on grayordinates)
    y.npy / Y.npy     targets: class names, or a 0/1 matrix over concepts (with concepts.json)
    groups.npy        group label per row
    meta.parquet      one row per map: ids, entities, origin, concepts, coverage, fold / split
    manifest.json     query, feature set (grid, mask hashes), missing-value policy, every source
                      sha256, store row hash and exported row hash,
                      vocabulary hash, versions, scheme and seed, hashes of the files above

The folder is written under a temporary name and renamed into place at the end.
``verify`` re-hashes the sources, the store's rows and the exported files.
"""

from __future__ import annotations

import hashlib
import json
import os
import warnings
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .._params import EXPORT_FORMAT, EXPORT_FORMATS, NEAR_COPY, SEED, declared
from .._version import __version__
from ..features import NEAR_COPY_R
from ..errors import ExportError, ParameterError
from ..formats import digest_map, foreign_format, sha256_file
from ..features import FeatureSet
from ._manifest import MANIFEST_FORMAT, ExportManifest, ManifestSource, _regular, read_manifest
from ._query import Selection
from ._splits import fold_vector, parse_scheme
from ..indexing import POINTER_MAX, annex_key_of, pointer_key
from ..store import OUTPUT_MARKER, Catalog, check_output, checkpoint, output_folder
from ..formats import plural

__all__ = ["ExportReport", "VerifyReport", "export_selection", "verify", "json_schemas"]

BLOCK_ROWS = 64
DATA_FILES = ("X.npy", "table.parquet", "X.zarr")
FORMATS = EXPORT_FORMATS


@dataclass
class ExportReport:
    out: str
    n_maps: int
    n_features: int  # X's columns (in ``unit``)
    scheme: str
    n_splits: int
    dropped: dict[str, int]
    seconds: float
    leaks: list[str] = field(default_factory=list)
    missing: dict[str, Any] = field(default_factory=dict)
    unit: str = "voxels"  # what X's columns are: voxels, vertices, grayordinates or parcels

    def summary(self) -> str:
        d = ", ".join(f"{v} ({k})" for k, v in self.dropped.items()) or "none"
        m = self.missing
        voxel_line = (f"\nmissing values: {m['policy']}; {m['dropped_voxels']:,} of {m['mask_voxels']:,} mask {self.unit} "
                      f"dropped ({m['reason']})" if m.get("dropped_voxels") else
                      f"\nmissing values: {m['policy']} ({m['reason']})" if m else "")
        return (f"exported {plural(self.n_maps, 'map')} x {self.n_features:,} {self.unit} to {self.out} in {self.seconds:.1f} s\n"
                f"scheme {self.scheme}: {plural(self.n_splits, 'split')}; dropped: {d}"
                + voxel_line
                + (f"\nWARNING: {len(self.leaks)} leak(s) accepted with --allow-leak" if self.leaks else ""))


def _row_hash(row: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(row, dtype=np.float32).tobytes()).hexdigest()


@declared(seed=SEED, fmt=EXPORT_FORMAT, near_copy_r=NEAR_COPY)
def export_selection(sel: Selection, out: str | os.PathLike[str], *, scheme: str = "leave-one-group-out",
                     seed: int = 0, allow_leak: bool = False, fmt: str = "npy", overwrite: bool = False,
                     near_copy_r: float | None = None, allow_unseen: bool = False,
                     participant_columns: list[str] | None = None) -> ExportReport:
    """Write a selection to ``out`` with its manifest (see the module docstring).

    ``participant_columns`` adds those columns of participants.tsv (age, sex, ...) to ``meta``:
    personal data, under the ethics approval of the studies that collected it, so none go out
    unless named; the manifest lists the ones that did.
    """
    t0 = time.perf_counter()
    if fmt == "zarr":
        try:
            import zarr  # noqa: F401
        except ImportError as exc:
            raise ParameterError("the zarr format needs zarr >= 3: pip install 'mapstore[zarr]'") from exc
    kind, _ = parse_scheme(scheme)
    out = _check_out(sel, out, overwrite)
    personal = _participant_columns(sel, participant_columns)
    splits, leaks, unseen = _splits(sel, scheme, seed, allow_leak, near_copy_r, allow_unseen)
    with output_folder(out, "export") as tmp:
        fs = sel.feature_set
        meta_t = _meta_table(sel, fold_vector(splits, len(sel)), kind, personal)
        rows = _Rows(sel)
        checkpoint()
        if fmt == "npy":
            _write_npy(tmp, sel, rows, meta_t)
        elif fmt == "zarr":
            _write_zarr(tmp, sel, rows, meta_t)
        else:
            _write_parquet(tmp, sel, rows, meta_t)
        if sel.concepts:
            (tmp / "concepts.json").write_text(json.dumps(sel.concepts))
        # flat C-order grid index of each column of X: enough to paint a row back onto the grid
        np.save(tmp / "voxels.npy", fs.mask_indices[rows.voxels].astype(np.int64))
        _write_columns(tmp, sel, rows.voxels)
        checkpoint()
        manifest = _manifest(sel, scheme, seed, allow_leak, leaks, splits, rows.row_hashes, rows.x_hashes, fmt)
        manifest.near_copy_r = NEAR_COPY_R if near_copy_r is None else near_copy_r
        manifest.allow_unseen, manifest.unseen = allow_unseen, unseen
        manifest.personal_data = {"columns": personal, "note": PERSONAL_NOTE if personal else None}
        # the data files are checked row by row against row_sha256 instead of hashed whole
        manifest.files = {p.name: sha256_file(str(p)) for p in sorted(tmp.iterdir())
                          if p.name not in DATA_FILES and p.name != OUTPUT_MARKER}
        manifest.write(tmp)
        checkpoint()
    return ExportReport(str(out), len(sel), len(rows.voxels), scheme, len(splits), dict(sel.dropped),
                        time.perf_counter() - t0, leaks, sel.missing_report, fs.unit)


def _check_out(sel: Selection, out: str | os.PathLike[str], overwrite: bool) -> Path:
    roots = sel.store.sql("SELECT root FROM datasets")["root"].to_pylist()
    return check_output(out, sources=roots, stores=[str(sel.store.path)], overwrite=overwrite)


def _splits(sel: Selection, scheme: str, seed: int, allow_leak: bool, near_copy_r: float | None,
            allow_unseen: bool = False):
    """The splits, and the leaks and unseen test classes accepted with ``allow_leak`` / ``allow_unseen``
    (recorded in the manifest, still warned)."""
    import warnings

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        splits = sel.splits(scheme, seed, allow_leak, near_copy_r, allow_unseen=allow_unseen)
    leaks = [str(w.message) for w in caught if "leaky split" in str(w.message)]
    unseen = [str(w.message) for w in caught if "unseen test classes" in str(w.message)]
    for w in caught:
        warnings.warn(w.message, w.category, stacklevel=3)
    return splits, leaks, unseen


PERSONAL_NOTE = ("participant metadata is personal data under the ethics approval of the studies that collected it: "
                 "keep this export where that approval allows")


def _participant_columns(sel: Selection, names: list[str] | None) -> list[str]:
    """The participants columns a user asked to export (named one by one), checked against the selection."""
    if not names:
        return []
    if isinstance(names, str):
        names = [names]
    known = set(sel.store.sql("DESCRIBE participants")["column_name"].to_pylist()) - {
        "dataset", "participant_id", "sub", "participant"}
    unknown = [n for n in names if n not in known or n not in sel.meta.columns]
    if unknown:
        raise ParameterError(f"participant column(s) {unknown} are not in participants.tsv of the selected "
                             f"studies; they have: {sorted(known) or 'none'}")
    return list(dict.fromkeys(names))


def _meta_table(sel: Selection, fold: np.ndarray, kind: str, personal: list[str] | None = None) -> pa.Table:
    meta = sel.meta.copy()
    meta["row"] = np.arange(len(sel))
    meta["group"] = sel.groups
    meta["fold"] = fold
    if kind == "holdout":
        meta["split"] = np.where(fold >= 0, "test", "train")
    keep_cols = [c for c in ("row", "map_id", "dataset", "study", "site", "lab", "participant", "sub", "ses",
                             "run", "task", "contrast", "stat", "space", "concepts", "group", "fold", "split",
                             "coverage", "sha256", "feature_key", "conversion", "relpath") if c in meta.columns]
    keep_cols += [c for c in personal or [] if c not in keep_cols]
    if sel.y is not None:
        meta["y"] = _y_array(sel.y)
        keep_cols.append("y")
    if sel.Y is not None:  # the multi-label indicators, one column per concept (as in concepts.json)
        for j, concept in enumerate(sel.concepts):
            meta[f"Y:{concept}"] = sel.Y[:, j].astype(np.uint8)
            keep_cols.append(f"Y:{concept}")
    return pa.Table.from_pandas(meta[keep_cols], preserve_index=False)


class _Rows:
    """Store rows turned into X rows (the selection's missing-value policy), their hashes recorded."""

    def __init__(self, sel: Selection) -> None:
        self.sel = sel
        self.fs = sel.feature_set
        self.ids = sel.map_ids
        known = sel.meta["feature_row_sha256"].tolist()
        # recorded when the rows were built (the selection's query brought them); older sets: read
        self.row_hashes = known if all(isinstance(h, str) for h in known) else self.fs.row_hashes(self.ids)
        self.voxels = sel.voxels  # X's columns
        self.subset = len(self.voxels) != self.fs.n_voxels
        self.same = not self.subset and (sel.missing != "zero" or sel.meta["coverage"].ge(1.0).all())
        self.x_hashes: list[str] = []

    def buffer(self) -> np.ndarray:
        return np.empty((min(BLOCK_ROWS, max(len(self.ids), 1)), self.fs.n_voxels), dtype=np.float32)

    def shape(self, block: np.ndarray) -> np.ndarray:
        out = np.ascontiguousarray(block[:, self.voxels]) if self.subset else block
        if self.sel.missing == "zero":
            np.nan_to_num(out, copy=False, nan=0.0)
        if self.same:  # X rows are the store rows: their hashes are known
            self.x_hashes.extend(self.row_hashes[len(self.x_hashes):len(self.x_hashes) + len(out)])
        else:
            self.x_hashes.extend(_row_hash(r) for r in out)
        return out


def _write_npy(tmp: Path, sel: Selection, rows: _Rows, meta_t: pa.Table) -> None:
    """X.npy through two reused buffers, reading the next block while the last one is written
    (both system calls release the GIL): no fresh pages for all of X; then y, Y, groups, meta."""
    n = len(rows.ids)
    buf, spare = rows.buffer(), rows.buffer()
    with open(tmp / "X.npy", "wb", buffering=0) as fh, ThreadPoolExecutor(1) as reader:
        np.lib.format.write_array_header_1_0(
            fh, {"descr": np.lib.format.dtype_to_descr(np.dtype(np.float32)), "fortran_order": False,
                 "shape": (n, len(rows.voxels))})
        starts = list(range(0, n, BLOCK_ROWS))
        pending = reader.submit(sel.read_rows, 0, buf) if starts else None
        for k in range(len(starts)):
            block = pending.result()
            if k + 1 < len(starts):
                nxt = starts[k + 1]
                pending = reader.submit(sel.read_rows, nxt, spare)
            checkpoint()
            view = memoryview(rows.shape(block)).cast("B")  # type: ignore[arg-type]
            while view:
                view = view[fh.write(view):]
            buf, spare = spare, buf
    checkpoint()
    _write_side_files(tmp, sel, meta_t)


def _write_columns(tmp: Path, sel: Selection, voxels: np.ndarray) -> None:
    """What each column of X is, readable without mapstore: ``columns.parquet`` (grid index, and where the
    target says so i, j, k and millimetres, hemisphere and vertex, or parcel) and the columns as a mask
    image on the set's target."""
    fs = sel.feature_set
    flat = fs.mask_indices[voxels].astype(np.int64)
    cols: dict[str, Any] = {"column": np.arange(len(flat)), "grid_index": flat, **fs.target.position_columns(flat)}
    pq.write_table(pa.table(cols), tmp / "columns.parquet")
    flags = np.zeros(fs.target.n_positions, dtype=bool)
    flags[flat] = True
    fs.target.write_mask(tmp, flags.reshape(fs.target.shape))


ZARR_CHUNK_ROWS = 16  # a block of BLOCK_ROWS rows is 4 chunks, compressed side by side by zarr's threads


def _write_zarr(tmp: Path, sel: Selection, rows: _Rows, meta_t: pa.Table) -> None:
    """X as a Zarr v3 array (chunks of ZARR_CHUNK_ROWS rows x every column, zstd level 1), written block by
    block: each block's chunks compressed in parallel (zstd releases the GIL) while the next block is read;
    then the same side files as the npy layout."""
    import zarr
    from zarr.codecs import ZstdCodec

    n = len(rows.ids)
    # a group (X and the grid voxel of each column, named dimensions): xarray opens it as a dataset
    group = zarr.open_group(str(tmp / "X.zarr"), mode="w", zarr_format=3)
    group.attrs["mapstore"] = {"rows": "maps, in meta.parquet's order", "columns": "voxel: flat C-order grid index"}
    # zstd at level 1: compressed (any reader of Zarr v3 decodes it) at about the speed of an uncompressed write
    arr = group.create_array("X", shape=(n, len(rows.voxels)), dtype="float32",
                             chunks=(ZARR_CHUNK_ROWS, max(1, len(rows.voxels))), fill_value=np.nan,
                             compressors=[ZstdCodec(level=1)], dimension_names=("map", "column"))
    vox = group.create_array("voxel", shape=(len(rows.voxels),), dtype="int64", dimension_names=("column",))
    vox[:] = sel.feature_set.mask_indices[rows.voxels].astype(np.int64)
    buf, spare = rows.buffer(), rows.buffer()
    starts = list(range(0, n, BLOCK_ROWS))
    with ThreadPoolExecutor(1) as reader:
        pending = reader.submit(sel.read_rows, 0, buf) if starts else None
        for k, start in enumerate(starts):
            block = rows.shape(pending.result())
            if k + 1 < len(starts):
                pending = reader.submit(sel.read_rows, starts[k + 1], spare)
            arr[start:start + len(block)] = block
            buf, spare = spare, buf
            checkpoint()
    # what a reader needs beside X, inside the store, as coordinates of its rows and columns: xarray's
    # X carries them, and nobody has to join files by row order
    coords = ["voxel"]
    for name, values in (("y", sel.y), ("group", sel.groups),
                         ("fold", meta_t["fold"].to_numpy() if "fold" in meta_t.column_names else None)):
        if values is None:
            continue
        values = np.asarray(values)
        if values.dtype.kind in "biuf":
            data, attrs = values.astype(np.float64 if name == "y" else np.int64), {}
        else:  # text (class names, study names) as codes, the names in the attributes
            names, data = np.unique(values.astype(str), return_inverse=True)
            data, attrs = data.astype(np.int32), {"names": names.tolist(), "codes": "index into names"}
        a = group.create_array(name, shape=data.shape, dtype=data.dtype, dimension_names=("map",))
        a[:] = data
        a.attrs.update(attrs)
        coords.append(name)
    if sel.Y is not None:  # multi-label indicators: a data variable (map x concept), concepts named
        Y = group.create_array("Y", shape=sel.Y.shape, dtype="uint8", dimension_names=("map", "concept"))
        Y[:] = np.asarray(sel.Y, dtype=np.uint8)
        Y.attrs["concepts"] = list(sel.concepts)
    arr.attrs["coordinates"] = " ".join(coords)
    with warnings.catch_warnings():  # zarr notes consolidated metadata is an extension of format 3
        warnings.simplefilter("ignore")
        zarr.consolidate_metadata(str(tmp / "X.zarr"))  # one read opens it (xarray warns without)
    _write_side_files(tmp, sel, meta_t)


def _write_side_files(tmp: Path, sel: Selection, meta_t: pa.Table) -> None:
    """y / Y, groups and meta beside X (the npy and zarr layouts)."""
    if sel.y is not None:
        np.save(tmp / "y.npy", _y_array(sel.y))
        checkpoint()
    if sel.Y is not None:
        np.save(tmp / "Y.npy", sel.Y)
        checkpoint()
    np.save(tmp / "groups.npy", np.asarray(sel.groups, dtype=str))
    checkpoint()
    pq.write_table(meta_t, tmp / "meta.parquet")
    checkpoint()


def _y_array(y: np.ndarray) -> np.ndarray:
    """Targets as written: numbers stay float64 (a regression target), class names are text."""
    y = np.asarray(y)
    return y.astype(np.float64) if y.dtype.kind in "biuf" else y.astype(str)


def _write_parquet(tmp: Path, sel: Selection, rows: _Rows, meta_t: pa.Table) -> None:
    """One table.parquet: meta columns, y / Y, and X as a fixed-size list per row (as X.npy, the Zarr X)."""
    buf = rows.buffer()
    writer = None
    try:
        for i in range(0, len(rows.ids), BLOCK_ROWS):
            block = rows.shape(sel.read_rows(i, buf))
            part = meta_t.slice(i, len(block))
            # y is a column of meta already
            if sel.Y is not None:  # multi-label indicators, columns as in concepts.json
                ind = np.ascontiguousarray(sel.Y[i:i + len(block)], dtype=np.uint8).reshape(-1)
                part = part.append_column("Y", pa.FixedSizeListArray.from_arrays(
                    pa.array(ind, pa.uint8()), len(sel.concepts)))
            flat = pa.array(block.reshape(-1), pa.float32())
            part = part.append_column("X", pa.FixedSizeListArray.from_arrays(flat, len(rows.voxels)))
            if writer is None:
                writer = pq.ParquetWriter(tmp / "table.parquet", part.schema, compression="zstd")
            writer.write_table(part, row_group_size=64)
    finally:
        if writer is not None:
            writer.close()


def _manifest(sel: Selection, scheme: str, seed: int, allow_leak: bool, leaks: list[str], splits,
              row_hashes: list[str], x_hashes: list[str], fmt: str) -> ExportManifest:
    import platform

    import duckdb
    import nibabel
    import nilearn
    import scipy
    import sklearn

    store = sel.store
    fs = sel.feature_set
    head = store.catalog.head
    ds = {r["dataset"]: r["root"] for r in store.sql("SELECT dataset, root FROM datasets").to_pylist()}
    # a source in an annexed dataset: its key, what a colleague fetches
    annexed = store.sql("SELECT map_id, annex_key FROM maps WHERE annex_key IS NOT NULL")
    keys = dict(zip(annexed["map_id"].to_pylist(), annexed["annex_key"].to_pylist()))
    sources = []
    for r, h, xh in zip(sel.meta.itertuples(index=False), row_hashes, x_hashes):
        index = getattr(r, "map_index", None)
        sources.append(ManifestSource(
            r.map_id, r.dataset, r.relpath, os.path.join(ds.get(r.dataset, ""), r.relpath), r.sha256,
            r.feature_key, h, xh, getattr(r, "stat", None), _number(getattr(r, "dof", None)),
            # one map of a file of several (NaN in pandas: none)
            int(index) if index is not None and index == index else None, keys.get(r.map_id)))
    return ExportManifest(
        store=str(store.path), feature_settings=fs.spec.to_json(), query=sel.query, y_from=sel.y_from,
        group_by=sel.group_by, scheme=scheme, seed=seed, shape=[len(sel), len(sel.voxels)], sources=sources,
        layout=fmt, created=time.strftime("%Y-%m-%dT%H:%M:%S%z"), mapstore_version=__version__,
        versions={"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
                  "nibabel": nibabel.__version__, "nilearn": nilearn.__version__, "scikit-learn": sklearn.__version__,
                  "duckdb": duckdb.__version__, "pyarrow": pa.__version__},
        # what a rebuild on another machine needs: each dataset's identity, sources relative to its root
        datasets={r["dataset"]: {"name": r["name"], "generated_by": r["generated_by"]}
                  for r in store.sql("SELECT dataset, name, generated_by FROM datasets").to_pylist()
                  if r["dataset"] in set(sel.meta["dataset"])},
        catalog_snapshot=head.catalog, dropped=sel.dropped,
        vocabulary=({k: getattr(head.labels, k) for k in ("vocabulary", "sha256", "version", "inherit_broader")}
                    if head.labels else None),
        vocabulary_content=_vocabulary_content(store),
        # the name rules and origins the catalog was made with (their content): a rebuild needs no other file
        index_inputs=store.catalog.index_inputs(), concepts=sel.concepts, allow_leak=allow_leak, leaks=leaks,
        splits=[{"train": len(tr), "test": len(te), "test_groups": sorted(map(str, set(sel.groups[te])))}
                for tr, te in splits],
        missing={**sel.missing_report, "voxels_file": "voxels.npy"})


def _number(v: Any) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if f == f else None


def _vocabulary_content(store) -> Any:
    """The vocabulary as the labels applied it (the store's copy), so the manifest alone rebuilds the labels."""
    entry = store.catalog.head.labels
    if not entry or not entry.copy:
        return None
    try:
        return json.loads((Path(store.path) / entry.copy).read_text())
    except (OSError, ValueError):
        return None


@dataclass
class VerifyReport:
    """What ``verify`` found: an empty ``changes`` list means everything still matches."""

    manifest: str
    n_sources: int
    n_rows: int
    changes: list[str]
    # sources whose annexed content is not fetched but whose git-annex key names the recorded content:
    # nothing says they changed, and their bytes cannot be checked until they are fetched
    not_present: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.changes

    def summary(self) -> str:
        head = (f"{self.manifest}: {self.n_sources} source files, {self.n_rows} store rows and "
                "the exported files checked")
        absent = ""
        if self.not_present:
            absent = (f"\n{len(self.not_present)} source(s) not present (annexed content not fetched; the key names "
                      "the recorded content): fetch them to check their bytes\n  " + "\n  ".join(self.not_present[:10]))
        if self.ok:
            return (head + "\nall hashes match" + (" (where the content is present)" if absent else "")
                    + ": the export is reproducible from these sources and this store" + absent)
        shown = "\n  ".join(self.changes[:30])
        more = f"\n  ... and {len(self.changes) - 30} more" if len(self.changes) > 30 else ""
        return head + f"\n{len(self.changes)} change(s):\n  {shown}{more}" + absent


def verify(manifest_path: str | os.PathLike[str]) -> VerifyReport:
    """Re-check an export: source file hashes, the store's rows, and the exported files."""
    mpath, man = read_manifest(manifest_path)
    changes: list[str] = []
    folder = mpath.parent
    for name, sha in man.files.items():
        p = folder / name
        if not p.exists():
            changes.append(f"export file missing: {name}")
        elif not _inside_folder(p, folder):
            changes.append(f"export file leads out of the export folder (a symbolic link): {name}")
        elif not _regular(p):
            changes.append(f"export file is not a regular file (a FIFO, device or folder): {name}")
        elif sha256_file(str(p)) != sha:
            changes.append(f"export file changed: {name}")
    hashed: dict[str, str] = {}  # a file that several entries name is hashed once
    not_present: list[str] = []
    for s in man.sources:
        p = Path(s.path)
        key = annex_key_of(str(p)) if p.is_symlink() and not p.exists() else \
            pointer_key(str(p), p.stat().st_size) if p.is_file() and not p.is_symlink() else None
        if key is not None and (not p.exists() or p.stat().st_size <= POINTER_MAX):
            if key.sha256 == s.sha256:
                not_present.append(str(p))
            else:
                changes.append(f"source changed: {p} (not present; its git-annex key {key.key} names other "
                               "content than the export recorded)")
            continue
        if not p.exists():
            changes.append(f"source missing: {p}")
            continue
        if not _regular(p):  # a FIFO would hang the hash, a device never end it
            changes.append(f"source is not a regular file (a FIFO, device or folder): {p}")
            continue
        real = os.path.realpath(p)
        if real not in hashed:
            hashed[real] = digest_map(str(p)).sha256 if foreign_format(str(p)) else sha256_file(str(p))
        got = hashed[real]
        if got != s.sha256:
            changes.append(f"source changed: {p} (sha256 {s.sha256[:12]}... -> {got[:12]}...)")
    n_rows = 0
    try:
        cat = Catalog(man.store)
        name = man.set_name
        if name not in cat.head.features:
            raise ExportError(f"no feature set {name!r} in {cat.path}")
        fs = FeatureSet(cat.path, name, cat.head.features[name])
    except Exception as exc:  # noqa: BLE001 - any failure to open is reported, not raised
        changes.append(f"store or feature set unavailable: {exc}")
        return VerifyReport(str(mpath), len(man.sources), 0, changes, not_present)
    if fs.spec.spec_id != man.set_spec_id:
        changes.append(f"feature set {fs.name!r} now has other settings (spec {fs.spec.spec_id} != "
                       f"{man.set_spec_id})")
    rows = {r["map_id"]: r for r in fs.rows.to_pylist()}
    present = [s for s in man.sources if s.map_id in rows and rows[s.map_id]["feature_key"] == s.feature_key]
    for s in man.sources:
        r = rows.get(s.map_id)
        if r is None:
            changes.append(f"store row gone: {s.map_id} ({s.relpath})")
        elif r["feature_key"] != s.feature_key:
            changes.append(f"store row rebuilt from other inputs: {s.map_id} ({s.relpath})")
    for i in range(0, len(present), BLOCK_ROWS):
        part = present[i:i + BLOCK_ROWS]
        block = fs.matrix([s.map_id for s in part])
        for s, row in zip(part, block):
            n_rows += 1
            if _row_hash(row) != s.row_sha256:
                changes.append(f"store row changed: {s.map_id} ({s.relpath})")
    changes += _check_data_file(folder, man)
    return VerifyReport(str(mpath), len(man.sources), n_rows, changes, not_present)


_BLOCK_LIMIT = 1 << 30  # bytes of one block of exported rows read at once
def _inside_folder(p: Path, folder: Path) -> bool:
    """The path, links followed, stays in the folder (an export file that is a link out is not the export's)."""
    real, base = os.path.realpath(p), os.path.realpath(folder)
    return real.startswith(base + os.sep)


def _check_data_file(folder: Path, man: ExportManifest) -> list[str]:
    """Compare every exported row with the row hash recorded for it."""
    out: list[str] = []
    sources = man.sources
    if man.layout == "parquet":
        f = folder / "table.parquet"
        if not f.exists():
            return ["export file missing: table.parquet"]
        if not _inside_folder(f, folder) or not _regular(f):
            return ["export file leads out of the export folder or is not a regular file: table.parquet"]
        i = 0
        try:
            pf = pq.ParquetFile(f)
            groups = [pf.metadata.row_group(k).total_byte_size for k in range(pf.metadata.num_row_groups)]
        except (OSError, pa.ArrowException) as exc:
            return [f"export file unreadable: table.parquet ({exc})"]
        if groups and max(groups) > _BLOCK_LIMIT * 16:
            return [f"export file changed: table.parquet declares a row group of {max(groups):,} bytes"]
        column = "X" if "X" in pf.schema_arrow.names else "x"  # earlier exports named it x
        for batch in pf.iter_batches(batch_size=BLOCK_ROWS, columns=[column]):
            values = batch.column(0).flatten().to_numpy(zero_copy_only=False).reshape(batch.num_rows, -1)
            for row in values:
                if i >= len(sources) or _row_hash(row) != sources[i].x_hash:
                    out.append(f"exported row changed: table.parquet row {i}")
                i += 1
        if i != len(sources):
            out.append(f"table.parquet has {i} rows, the manifest {len(sources)}")
        return out
    name = "X.zarr" if man.layout == "zarr" else "X.npy"
    f = folder / name
    if not f.exists():
        return [f"export file missing: {name}"]
    if 4 * BLOCK_ROWS * max(1, int(man.shape[1])) > _BLOCK_LIMIT:
        return [f"export file changed: the manifest declares rows of {man.shape[1]:,} values, more than an "
                "export can hold"]
    try:
        if name == "X.zarr":
            import zarr

            X = zarr.open_array(str(f), path="X", mode="r")
        else:
            X = np.load(f, mmap_mode="r")
    except Exception as exc:  # noqa: BLE001 - numpy and zarr raise several kinds for a damaged file
        return [f"export file unreadable: {name} ({exc})"]
    if tuple(X.shape) != tuple(man.shape) or X.dtype != np.float32:
        return [f"export file changed: {name} has shape {X.shape} {X.dtype}, the manifest {man.shape} float32"]
    if not _inside_folder(f, folder) or (name == "X.zarr" and any(
            not _inside_folder(Path(d) / n, folder) for d, _, ns in os.walk(f) for n in ns)):
        return [f"export file leads out of the export folder (a symbolic link): {name}"]
    stored = sum(os.path.getsize(Path(d) / n) for d, _, ns in os.walk(f) for n in ns) if f.is_dir() else \
        os.path.getsize(f)
    if name == "X.npy" and stored < 4 * int(np.prod(man.shape)):
        return [f"export file changed: {name} holds fewer bytes than its shape {man.shape} needs"]
    for start in range(0, len(sources), BLOCK_ROWS):  # one read per block (a Zarr chunk)
        block = np.asarray(X[start:start + BLOCK_ROWS])
        for i, row in enumerate(block, start):
            if i < len(sources) and _row_hash(row) != sources[i].x_hash:
                out.append(f"exported row changed: {name} row {i} ({sources[i].map_id})")
    return out


def json_schemas() -> dict[str, dict[str, Any]]:
    return {"export-manifest.schema.json": {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": "https://mapstore.invalid/schemas/export-manifest.schema.json",
        "title": "mapstore export manifest",
        "description": "Everything needed to reproduce and verify an export: query, feature set, every "
                       "source file's sha256 and row hash, vocabulary hash, versions, scheme and seed.",
        "type": "object",
        "required": ["format", "format_version", "mapstore_version", "store", "query", "feature_settings",
                     "y_from", "group_by", "scheme", "seed", "sources", "files", "shape"],
        "properties": {
            "format": {"const": MANIFEST_FORMAT},
            "format_version": {"type": "integer"},
            "mapstore_version": {"type": "string"},
            "created": {"type": "string"},
            "versions": {"type": "object"},
            "store": {"type": "string"},
            "catalog_snapshot": {"type": ["string", "null"]},
            "query": {"type": "object"},
            "dropped": {"type": "object"},
            "vocabulary": {"type": ["object", "null"]},
            "vocabulary_content": {"type": ["object", "null"]},
            "index_inputs": {"type": ["object", "null"], "properties": {
                "rules": {"type": "array", "items": {"type": "object"}},
                "origins": {"type": ["object", "null"]}}},
            "feature_settings": {"type": "object", "required": ["name", "spec_id", "grid", "grid_id", "mask"],
                                 "description": "the feature set's set.json"},
            "datasets": {"type": "object"},
            "near_copy_r": {"type": ["number", "null"]},
            "y_from": {"type": "string", "description": "what y is made from (older manifests: 'target')"},
            "concepts": {"type": "array", "items": {"type": "string"}},
            "group_by": {"type": "string"},
            "scheme": {"type": "string"},
            "seed": {"type": "integer"},
            "allow_leak": {"type": "boolean"},
            "allow_unseen": {"type": "boolean"},
            "unseen": {"type": "array", "items": {"type": "string"}},
            "personal_data": {"type": "object", "properties": {"columns": {"type": "array", "items": {"type": "string"}}, "note": {"type": ["string", "null"]}}},
            "leaks": {"type": "array", "items": {"type": "string"}},
            "splits": {"type": "array"},
            "shape": {"type": "array", "items": {"type": "integer"}, "minItems": 2, "maxItems": 2},
            "dtype": {"const": "float32"},
            "layout": {"enum": ["npy", "parquet", "zarr"]},
            "files": {"type": "object", "additionalProperties": {"type": "string"}},
            "sources": {"type": "array", "items": {
                "type": "object",
                "required": ["map_id", "dataset", "relpath", "path", "sha256", "feature_key", "row_sha256"],
                "properties": {**{k: {"type": "string"} for k in
                                  ("map_id", "dataset", "relpath", "path", "sha256", "feature_key", "row_sha256",
                                   "x_sha256", "annex_key")}, "map_index": {"type": "integer", "minimum": 0}}}},
            "missing": {"type": "object", "required": ["policy", "mask_voxels", "kept_voxels"],
                        "properties": {"policy": {"enum": ["common", "zero", "keep"]},
                                       "mask_voxels": {"type": "integer"}, "kept_voxels": {"type": "integer"},
                                       "dropped_voxels": {"type": "integer"}, "reason": {"type": "string"},
                                       "voxels_file": {"type": "string"}}},
        },
    }}
