"""Readers are never broken by writers: a Store opened before any number of writes keeps answering."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys

import numpy as np
import pytest

import mapstore
from mapstore.errors import StaleSnapshot

from ..conftest import make_derivative, noise_maps, write_json, write_map


def _tree(tmp_path):
    ds = make_derivative(tmp_path / "src" / "alpha", name="alpha")
    write_json(ds / "task-go_statmap.json", {"DegreesOfFreedom": 25})
    noise_maps(ds, range(4), seed=5)
    vocab = write_json(tmp_path / "v.json", {"vocabulary": "v", "version": "1", "concepts": {"x": {}, "y": {}},
                                             "rules": [{"contrast": "a", "concepts": ["x"]}]})
    vocab2 = write_json(tmp_path / "v2.json", {"vocabulary": "v", "version": "2", "concepts": {"x": {}, "y": {}},
                                               "rules": [{"contrast": "a", "concepts": ["y"]}]})
    store = tmp_path / "store"
    mapstore.index([ds], store, progress=False)
    mapstore.build_features(store, grid="MNI152-3mm", name="s", progress=False)
    mapstore.label(store, vocab)
    return ds, store, vocab, vocab2


def test_an_open_reader_survives_many_writes(tmp_path):
    ds, store, vocab, vocab2 = _tree(tmp_path)
    reader = mapstore.open(store)
    ids = reader.features("s").map_ids
    want_X = reader.features("s").matrix(ids)
    # the writers move on three times: new maps, rebuilt rows, new labels
    for k in range(3):
        write_map(ds / f"sub-1{k}" / f"sub-1{k}_task-go_contrast-a_stat-t_statmap.nii.gz",
                  np.full((41, 48, 40), float(k), np.float32), np.diag([4.0, 4, 4, 1]))
        f = ds / "sub-00" / "sub-00_task-go_contrast-a_stat-t_statmap.nii.gz"
        write_map(f, np.full((41, 48, 40), 10.0 + k, np.float32), np.diag([4.0, 4, 4, 1]))
        mapstore.index([ds], store, progress=False)
        mapstore.build_features(store, grid="MNI152-3mm", name="s", progress=False)
        mapstore.label(store, vocab2 if k % 2 == 0 else vocab)
    # the old reader still answers from what it opened: 4 maps, its labels, its rows' bytes
    assert reader.sql("SELECT count(*) FROM maps").column(0)[0].as_py() == 4
    assert reader.sql("SELECT DISTINCT concept FROM labels").column(0).to_pylist() == ["x"]
    changed = reader.sql("SELECT map_id FROM maps WHERE sub = '00'").column(0)[0].as_py()
    same = [i for i, m in enumerate(ids) if m != changed]
    np.testing.assert_array_equal(mapstore.open(store).features("s").matrix([ids[i] for i in same]), want_X[same])
    np.testing.assert_array_equal(reader.features("s").matrix(ids), want_X)  # the rebuilt row too, as it was
    fresh = mapstore.open(store)
    assert fresh.sql("SELECT count(*) FROM maps").column(0)[0].as_py() == 7
    assert fresh.sql("SELECT DISTINCT concept FROM labels").column(0).to_pylist() == ["y"]
    # once closed, the next write collects what only that reader held
    old_catalog = reader.catalog.head.catalog
    reader.close()
    fresh.close()
    mapstore.label(store, vocab2)
    mapstore.index([ds], store, progress=False)
    mapstore.index([ds], store, progress=False)
    assert not (store / old_catalog).exists()


def test_a_reader_of_a_process_that_ended_holds_nothing(tmp_path):
    ds, store, vocab, vocab2 = _tree(tmp_path)
    code = f"import mapstore, os; s = mapstore.open({str(store)!r}); os._exit(0)"  # dies without cleanup
    subprocess.run([sys.executable, "-c", code], check=True)
    leases = list((store / ".readers").glob("*.json"))
    assert len(leases) == 1 and json.loads(leases[0].read_text())["catalog"]
    mapstore.label(store, vocab2)
    assert not list((store / ".readers").glob("*.json"))  # the dead process's lease is gone


def test_a_reader_without_a_lease_gets_a_clear_stale_error(tmp_path):
    ds, store, vocab, vocab2 = _tree(tmp_path)
    reader = mapstore.open(store)
    for lease in (store / ".readers").glob("*.json"):
        lease.unlink()  # as on a read-only store, where no lease can be written
    for k in range(2):
        write_map(ds / f"sub-1{k}" / f"sub-1{k}_task-go_contrast-a_stat-t_statmap.nii.gz")
        mapstore.index([ds], store, progress=False)
    with pytest.raises(StaleSnapshot, match=r"the store changed since it was opened .* open it again with "
                                             r"mapstore.open\(\)"):
        reader.sql("SELECT count(*) FROM maps")


def _mount_tmpfs(where, size: str) -> bool:
    import os

    if os.geteuid() != 0:
        return False
    where.mkdir(parents=True, exist_ok=True)
    return subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
                          capture_output=True).returncode == 0


def test_a_full_disk_during_features_is_clear_and_undone(tmp_path):
    from mapstore.errors import StoreFull

    mnt = tmp_path / "small"
    if not _mount_tmpfs(mnt, "12m"):
        pytest.skip("needs root and a tmpfs mount (CI runs as root)")
    try:
        ds, _, _, _ = _tree(tmp_path)
        noise_maps(ds, range(4, 24), seed=9)  # 24 maps x 69,765 voxels x 4 bytes: ~6.7 MB of shards
        store = mnt / "store"
        mapstore.index([ds], store, progress=False)
        mapstore.build_features(store, grid="MNI152-3mm", name="small", where="m.sub < '03'", jobs=1,
                                progress=False)
        head_before = (store / "HEAD").read_text()
        filler = mnt / "filler"
        filler.write_bytes(b"\0" * (8 * 2 ** 20))  # leaves less than the new set needs
        with pytest.raises(StoreFull) as err:
            mapstore.build_features(store, grid="MNI152-3mm", name="big", jobs=1, progress=False)
        assert str(err.value).startswith(f"{store}: no space left on the device (while building features)")
        assert (store / "HEAD").read_text() == head_before  # the previous state is still served
        assert not (store / "features" / "big").exists()  # nothing of the failed run is kept (mask, set.json)
        st = mapstore.open(store)
        assert st.feature_sets() == ["small"] and st.features("small").matrix().shape[0] == 3
        st.close()
        filler.unlink()
        r = mapstore.build_features(store, grid="MNI152-3mm", name="big", jobs=1, progress=False)
        assert r.n_built == 24 and r.n_problems == 0
        clean = tmp_path / "clean"
        mapstore.index([ds], clean, progress=False)
        mapstore.build_features(clean, grid="MNI152-3mm", name="big", jobs=1, progress=False)
        a, b = mapstore.open(store).features("big"), mapstore.open(clean).features("big")
        np.testing.assert_array_equal(a.matrix(a.map_ids), b.matrix(a.map_ids))
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def test_a_read_only_store_can_be_read_and_refuses_writers_in_one_line(tmp_path, capsys):
    from mapstore.cli import main

    ds, store, vocab, vocab2 = _tree(tmp_path)
    ro = tmp_path / "ro"
    ro.mkdir()
    if os.geteuid() != 0 or subprocess.run(["mount", "--bind", str(store), str(ro)], capture_output=True).returncode:
        pytest.skip("needs root to bind-mount the store read-only (CI runs as root)")
    try:
        assert subprocess.run(["mount", "-o", "remount,bind,ro", str(ro)], capture_output=True).returncode == 0
        assert main(["sql", "--store", str(ro), "SELECT count(*) AS n FROM maps"]) == 0
        assert main(["check", "--store", str(ro), "--features", "s"]) in (0, 3)
        out = tmp_path / "mine" / "export"
        out.parent.mkdir()
        assert main(["export", "--store", str(ro), "--features", "s", "--out", str(out), "--group-by", "subject",
                     "--scheme", "group-kfold:2"]) == 0
        assert main(["verify", str(out)]) == 0
        capsys.readouterr()
        for argv in (["index", str(ds), "--store", str(ro)], ["features", "--store", str(ro)],
                     ["labels", "--store", str(ro), "--vocab", str(vocab2)]):
            assert main(argv) == 1
            err = capsys.readouterr().err
            assert err.startswith(f"error: {ro}: this store cannot be written from here (Read-only file system)")
            assert err.count("\n") == 1 and "Traceback" not in err
    finally:
        subprocess.run(["umount", "-l", str(ro)], capture_output=True)


def _folder(path, text):
    path.mkdir()
    (path / "a.txt").write_text(text)
    return path


@pytest.mark.parametrize("swap", [True, False])
def test_replace_dir_leaves_the_new_folder_and_nothing_else(tmp_path, monkeypatch, swap):
    from mapstore.store import _store as st

    if not swap:  # a kernel or file system without RENAME_EXCHANGE: the two-rename path
        monkeypatch.setattr(st, "_exchange", lambda a, b: False)
    out = _folder(tmp_path / "out", "old")
    st.replace_dir(_folder(tmp_path / ".out.n_new.tmp", "new"), out)
    assert (out / "a.txt").read_text() == "new" and sorted(p.name for p in tmp_path.iterdir()) == ["out"]
    st.replace_dir(_folder(tmp_path / ".first.tmp", "first"), tmp_path / "first")  # nothing there before
    assert (tmp_path / "first" / "a.txt").read_text() == "first"


def test_replace_dir_never_leaves_the_folder_missing(tmp_path):
    """A reader polling the folder while it is replaced 200 times always finds it (where the
    file system swaps folders: renameat2 RENAME_EXCHANGE, Linux >= 3.15)."""
    import threading

    from mapstore.store import _store as st

    a, b = _folder(tmp_path / "probe-a", "a"), _folder(tmp_path / "probe-b", "b")
    if not st._exchange(a, b):
        pytest.skip("this file system cannot swap folders")
    assert (a / "a.txt").read_text() == "b"  # swapped
    out = _folder(tmp_path / "out", "0")
    missing, stop = [], threading.Event()

    def poll():
        while not stop.is_set():
            if not os.path.isdir(out):
                missing.append(1)

    t = threading.Thread(target=poll)
    t.start()
    try:
        for i in range(200):
            st.replace_dir(_folder(tmp_path / f".out.{i}.tmp", str(i + 1)), out)
    finally:
        stop.set()
        t.join()
    assert not missing and (out / "a.txt").read_text() == "200"


def test_close_closes_and_refresh_moves_to_the_newest_snapshot(demo_store, demo_tree, tmp_path):
    from mapstore.errors import StoreClosed

    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    st = mapstore.open(store)
    assert st.sql("SELECT count(*) AS n FROM labels").to_pylist()[0]["n"] == 0
    mapstore.label(store, demo_tree / "concepts.json")  # a writer commits while the reader is open
    assert st.sql("SELECT count(*) AS n FROM labels").to_pylist()[0]["n"] == 0  # still its snapshot
    assert st.refresh() is st
    assert st.sql("SELECT count(*) AS n FROM labels").to_pylist()[0]["n"] > 0
    assert len(list((store / ".readers").glob("*.json"))) == 1  # the old snapshot's lease was let go
    st.close()
    assert st.closed and not list((store / ".readers").glob("*.json"))
    with pytest.raises(StoreClosed, match="closed; open it again"):
        st.sql("SELECT 1")
    st.close()  # closing twice is harmless


def test_parts_an_earlier_mapstore_wrote_read_with_the_columns_added_since_as_null(demo_store, tmp_path):
    """A store indexed before a maps column existed answers queries naming it (null) and builds features,
    until the next index writes its parts again."""
    import pyarrow.parquet as pq

    store = tmp_path / "store"
    shutil.copytree(demo_store, store)
    head = json.loads((store / "HEAD").read_text())
    manifest = store / head["catalog"] / "parts.json"
    doc = json.loads(manifest.read_text())
    for part in doc["parts"]:
        part["schema"] = "an-earlier-one"
        f = store / part["maps"]
        t = pq.read_table(f)
        pq.write_table(t.drop_columns(["content", "annex_key"]), f)  # as an earlier version wrote it
    manifest.write_text(json.dumps(doc))
    st = mapstore.open(store)
    rows = st.sql("SELECT count(*) AS n, count(content) AS c, count(level) AS l FROM maps").to_pylist()[0]
    assert rows["n"] > 0 and rows["c"] == 0 and rows["l"] == rows["n"]
    st.close()
    rep = mapstore.build_features(store, grid="MNI152-3mm", progress=False, jobs=1)
    assert rep.n_built > 0
