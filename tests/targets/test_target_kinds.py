"""A new kind of target is one module plus one entry in KINDS.

The kind below lives only in this file: one position per axial slice of a map, the slice's mean.  It
goes through index -> features -> export -> pool -> rebuild with no other file of mapstore changed,
so no stage may ask which kind of target it holds.  Its values are checked against numpy's mean of
the slices nibabel reads (a consistency check of the plumbing, not a reference for any method).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

import jsonschema
import nibabel as nib
import numpy as np
import pyarrow.parquet as pq
import pytest

import mapstore
from mapstore.analyses import pool, write_pooled
from mapstore.schemas import all_schemas
from mapstore.targets import KINDS, BatchContext, BuildSettings, Mask, RowValues, SourceMap, Target, mask_from_array

from ..conftest import make_derivative, write_map

SHAPE = (6, 7, 9)
PEAK_SLICE = 5


@dataclass(frozen=True)
class SlabTarget(Target):
    """One position per axial slice of a map: the slice's mean."""

    kind: ClassVar[str] = "slabs"
    unit: ClassVar[str] = "slabs"
    name: str
    n_slices: int

    @property
    def shape(self) -> tuple[int]:  # type: ignore[override]
        return (self.n_slices,)

    @property
    def grid_id(self) -> str:
        return hashlib.sha256(f"slabs|{self.name}|{self.n_slices}".encode()).hexdigest()[:16]

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "shape": [self.n_slices], "affine": None, "grid_id": self.grid_id}

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> "SlabTarget":
        return cls(str(doc["name"]), int(doc["shape"][0]))

    def named_mask(self, mask: str) -> Mask:
        return mask_from_array(self, np.ones(self.n_slices, bool), f"{self.name}-all")

    def values(self, item: SourceMap, settings: BuildSettings, ctx: BatchContext, region: Any = None,
               indices: np.ndarray | None = None) -> RowValues:
        data = np.asarray(nib.load(item.path).dataobj, dtype=np.float32)
        row = data.reshape(-1, data.shape[2]).mean(axis=0)
        return RowValues(row if indices is None else row[indices], "none", "slab-mean", "", 0)

    def image(self, full: np.ndarray):
        return nib.Nifti1Image(np.asarray(full, np.float32).reshape(1, 1, -1), np.eye(4))

    def views(self, full: np.ndarray) -> np.ndarray:
        return np.asarray(full, dtype=np.float64).reshape(1, -1)

    def background(self) -> np.ndarray:
        return np.zeros((1, self.n_slices))

    @classmethod
    def rebuild_arguments(cls, grid: Any, mask: Any, settings: dict[str, Any]) -> dict[str, Any]:
        return {"grid": cls.from_json(grid), "mask": "all"}


@pytest.fixture
def slab_kind(monkeypatch):
    monkeypatch.setitem(KINDS, "slabs", SlabTarget)
    return SlabTarget("slabs9", SHAPE[2])


def _tree(base: Path) -> list[Path]:
    """Three invented studies of four subjects; every map is larger in one axial slice."""
    rng = np.random.default_rng(11)
    roots = []
    for s in range(3):
        ds = make_derivative(base / f"study{s}", f"study{s}")
        for i in range(4):
            data = rng.normal(0, 1.0, size=SHAPE).astype(np.float32)
            data[:, :, PEAK_SLICE] += 3.0
            write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-x_contrast-a_stat-effect_statmap.nii.gz", data,
                      np.diag([3.0, 3.0, 3.0, 1.0]))
        roots.append(ds)
    return roots


def test_a_kind_defined_outside_mapstore_goes_through_the_whole_job(slab_kind, tmp_path):
    roots = _tree(tmp_path / "data")
    store = tmp_path / "store"
    mapstore.index(roots, store, progress=False, jobs=1)
    mapstore.build_features(store, "slabs", grid=slab_kind, mask="all", progress=False, jobs=1)
    st = mapstore.open(store)
    fs = st.features("slabs")
    assert fs.target == slab_kind and fs.unit == "slabs" and fs.n_voxels == SHAPE[2]
    spec = json.loads((fs.path / "set.json").read_text())
    assert spec["geometry"] == "slabs" and "kind" not in spec["grid"]  # the kind is stored once
    jsonschema.validate(spec, all_schemas()["feature-set.schema.json"])  # the schema's kinds come from KINDS

    sel = st.select(features="slabs", stat=["effect"])
    where = {r["dataset"]: r["root"] for r in st.sql("SELECT dataset, root FROM datasets").to_pylist()}
    assert len(sel) == 12
    for ds, path, row in zip(sel.meta["dataset"], sel.meta["relpath"], sel.X):
        want = np.asarray(nib.load(str(Path(where[ds]) / path)).dataobj, np.float32).mean(axis=(0, 1))
        np.testing.assert_allclose(row, want, rtol=1e-5, atol=1e-6)

    rep = st.export(tmp_path / "out", sel)
    cols = pq.read_table(Path(rep.out) / "columns.parquet").column_names
    assert cols == ["column", "grid_index"]  # the kind says nothing more about its positions
    assert (Path(rep.out) / "mask.nii.gz").exists()
    assert mapstore.verify(Path(rep.out) / "manifest.json").ok

    res = pool(sel)
    assert res.peaks(1)[0]["position"] == [PEAK_SLICE]
    prov = write_pooled(res, tmp_path / "pooled")
    assert "pooled_stat-z.nii.gz" in prov.files
    assert nib.load(str(tmp_path / "pooled" / "pooled_stat-z.nii.gz")).shape == (1, 1, SHAPE[2])

    again = mapstore.rebuild(Path(rep.out) / "manifest.json", roots, tmp_path / "rebuilt")
    assert again.ok, again.summary()


def test_a_kind_that_cannot_be_rebuilt_says_so_in_one_line(slab_kind, tmp_path, monkeypatch):
    monkeypatch.setattr(SlabTarget, "rebuild_arguments", classmethod(Target.rebuild_arguments.__func__))
    roots = _tree(tmp_path / "data")
    store = tmp_path / "store"
    mapstore.index(roots, store, progress=False, jobs=1)
    mapstore.build_features(store, "slabs", grid=slab_kind, mask="all", progress=False, jobs=1)
    st = mapstore.open(store)
    rep = st.export(tmp_path / "out", st.select(features="slabs", stat=["effect"]))
    with pytest.raises(mapstore.MapstoreError, match="a slabs set cannot be rebuilt from a manifest alone"):
        mapstore.rebuild(Path(rep.out) / "manifest.json", roots, tmp_path / "rebuilt")
