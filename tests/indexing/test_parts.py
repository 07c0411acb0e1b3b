"""The partitioned catalog: parts per unit of work, reused while their files are unchanged.

A re-index rewrites the parts of what changed only, and the result always equals a fresh
index of the same tree (the consistency checked here); index on a Dask cluster equals a
local run, also when a worker is lost mid-run.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pytest

import mapstore
import mapstore.indexing._crawl as catalog

from ..conftest import make_derivative, write_json, write_map


def _parts(store):
    head = json.loads((store / "HEAD").read_text())
    return json.loads((store / head["catalog"] / "parts.json").read_text())["parts"]


def _rows(store):
    st = mapstore.open(store)
    try:
        return st.sql("SELECT * EXCLUDE (mtime_ns) FROM maps ORDER BY dataset, relpath").to_pylist()
    finally:
        st.close()


def _tree(tmp_path, n_sub=4):
    root = tmp_path / "src"
    for name in ("alpha", "beta", "gamma"):
        ds = make_derivative(root / name, name=name)
        write_json(ds / "task-go_statmap.json", {"DegreesOfFreedom": 20})
        (ds / "participants.tsv").write_text("participant_id\tage\n" +
                                             "".join(f"sub-{i:02d}\t{20 + i}\n" for i in range(n_sub)))
        for i in range(n_sub):
            for c in ("a", "b"):
                write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-go_contrast-{c}_stat-t_statmap.nii.gz",
                          np.full((4, 5, 6), i + (c == "b"), np.float32))
    return root


def _fresh(tmp_path, root, tag):
    store = tmp_path / f"fresh-{tag}"
    mapstore.index([root], store, jobs=1, progress=False)
    return _rows(store)


def test_reindex_rewrites_only_the_changed_dataset(tmp_path):
    root = _tree(tmp_path)
    store = tmp_path / "store"
    mapstore.index([root], store, jobs=1, progress=False)
    first = {p["dataset"]: p["maps"] for p in _parts(store)}
    assert sorted(first) == ["alpha", "beta", "gamma"]
    warm = mapstore.index([root], store, jobs=1, progress=False)
    assert warm.n_unchanged == 24 and warm.n_new == warm.n_changed == 0
    assert {p["dataset"]: p["maps"] for p in _parts(store)} == first  # nothing rewritten

    # a changed map in beta: beta's part only
    write_map(root / "beta" / "sub-01" / "sub-01_task-go_contrast-a_stat-t_statmap.nii.gz",
              np.full((4, 5, 6), 9.0, np.float32))
    r = mapstore.index([root], store, jobs=1, progress=False)
    assert (r.n_changed, r.n_unchanged) == (1, 23)
    now = {p["dataset"]: p["maps"] for p in _parts(store)}
    assert now["alpha"] == first["alpha"] and now["gamma"] == first["gamma"] and now["beta"] != first["beta"]
    assert _rows(store) == _fresh(tmp_path, root, "a")
    # the old part is collected once neither HEAD nor the previous snapshot uses it
    mapstore.index([root], store, jobs=1, progress=False)
    mapstore.index([root], store, jobs=1, progress=False)
    assert not (store / first["beta"]).exists()
    assert all((store / p).exists() for p in now.values())


@pytest.mark.parametrize("change", ["sidecar", "participants", "new-map", "removed-map"])
def test_what_a_part_depends_on(tmp_path, change):
    root = _tree(tmp_path)
    store = tmp_path / "store"
    mapstore.index([root], store, jobs=1, progress=False)
    first = {p["dataset"]: p["maps"] for p in _parts(store)}
    gamma = root / "gamma"
    if change == "sidecar":  # metadata of maps whose own files did not change
        write_json(gamma / "task-go_statmap.json", {"DegreesOfFreedom": 33})
    elif change == "participants":
        (gamma / "participants.tsv").write_text("participant_id\tage\tsite\n" +
                                                "".join(f"sub-{i:02d}\t{20 + i}\tnorth\n" for i in range(4)))
    elif change == "new-map":
        write_map(gamma / "sub-03" / "sub-03_task-go_contrast-c_stat-t_statmap.nii.gz")
    else:
        (gamma / "sub-03" / "sub-03_task-go_contrast-b_stat-t_statmap.nii.gz").unlink()
    r = mapstore.index([root], store, jobs=1, progress=False)
    now = {p["dataset"]: p["maps"] for p in _parts(store)}
    assert now["gamma"] != first["gamma"] and now["alpha"] == first["alpha"]
    assert _rows(store) == _fresh(tmp_path, root, change)
    if change == "removed-map":
        assert r.n_removed == 1
    if change == "sidecar":
        assert {m["dof"] for m in _rows(store) if m["dataset"] == "gamma"} == {33.0}


def test_units_of_top_folders_write_their_own_parts(tmp_path, monkeypatch):
    root = _tree(tmp_path, n_sub=5)
    monkeypatch.setattr(catalog, "_TOPS_PER_UNIT", 2)  # 5 subjects -> 3 parts per dataset
    store = tmp_path / "store"
    mapstore.index([root], store, jobs=1, progress=False)
    parts = _parts(store)
    assert len(parts) == 9 and sum(p["rows"] for p in parts) == 30
    write_map(root / "alpha" / "sub-04" / "sub-04_task-go_contrast-a_stat-t_statmap.nii.gz",
              np.full((4, 5, 6), 7.0, np.float32))
    mapstore.index([root], store, jobs=1, progress=False)
    changed = [a["unit"] for a, b in zip(parts, _parts(store)) if a["maps"] != b["maps"]]
    assert len(changed) == 1 and changed[0].startswith("alpha|")
    monkeypatch.undo()
    assert _rows(store) == _fresh(tmp_path, root, "units")


def test_a_unit_with_a_read_problem_is_crawled_again(tmp_path):
    root = _tree(tmp_path)
    bad = root / "alpha" / "sub-00" / "sub-00_task-go_contrast-z_stat-t_statmap.nii.gz"
    bad.write_bytes(b"\x1f\x8b not really gzip")
    store = tmp_path / "store"
    mapstore.index([root], store, jobs=1, progress=False)
    alpha = [p for p in _parts(store) if p["dataset"] == "alpha"][0]
    assert alpha["digest"] is None and alpha["problems"]
    again = mapstore.index([root], store, jobs=1, progress=False)
    assert again.n_problems == 1


def test_a_snapshot_that_lost_its_parts_list_is_named_as_corrupt(tmp_path):
    root = _tree(tmp_path)
    store = tmp_path / "store"
    mapstore.index([root], store, jobs=1, progress=False)
    head = json.loads((store / "HEAD").read_text())
    (store / head["catalog"] / "parts.json").unlink()
    with pytest.raises(mapstore.errors.StoreCorrupt, match=r"parts\.json.*re-run 'mapstore index'"):
        _rows(store)


@pytest.mark.slow
def test_index_on_a_dask_cluster_equals_a_local_run_even_when_a_worker_dies(tmp_path, monkeypatch):
    distributed = pytest.importorskip("distributed")
    root = _tree(tmp_path)
    want = _fresh(tmp_path, root, "local")
    flag = tmp_path / "died"
    monkeypatch.setenv("MAPSTORE_TEST_DIE_ONCE", str(flag))  # workers inherit it: the first unit kills its worker
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        store = tmp_path / "dask"
        r = mapstore.index([root], store, scheduler=client, progress=False)
        assert flag.exists()  # a worker was lost after writing a part
        assert r.n_maps == 24
        from mapstore.cli import main

        monkeypatch.delenv("MAPSTORE_TEST_DIE_ONCE")
        assert main(["index", str(root), "--store", str(tmp_path / "addr"), "--dask",
                     cluster.scheduler_address]) == 0
    assert _rows(store) == want
    assert _rows(tmp_path / "addr") == want
    # the lost worker's part was left behind and is collected: only listed parts remain
    listed = {os.path.basename(p["maps"]) for p in _parts(store)} | \
        {os.path.basename(p["problems"]) for p in _parts(store) if p["problems"]}
    assert {f.name for f in (store / "catalog" / "parts").iterdir()} == listed


def test_a_deleted_part_is_written_again_not_kept(tmp_path):
    # someone removed a part file by hand: the store reports it, and a re-index rebuilds that part
    root = _tree(tmp_path)
    store = tmp_path / "store"
    mapstore.index([root], store, jobs=1, progress=False)
    want = _rows(store)
    beta = [p for p in _parts(store) if p["dataset"] == "beta"][0]
    (store / beta["maps"]).unlink()
    from mapstore.errors import StoreCorrupt

    with pytest.raises(StoreCorrupt, match="re-run 'mapstore index'"):
        _rows(store)
    r = mapstore.index([root], store, jobs=1, progress=False)
    assert r.n_changed == 0 and r.n_new == 8  # beta's maps read again (their previous rows are gone)
    assert _rows(store) == want
