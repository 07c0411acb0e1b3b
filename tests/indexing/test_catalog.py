"""Index runs end to end: Parquet read back with pyarrow and DuckDB directly."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import duckdb
import nibabel as nib
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import mapstore
from mapstore.indexing._crawl import map_id_for
from mapstore.errors import ParameterError, QueryError, StoreBusy, StoreNotFound

from ..conftest import NIBABEL_DATA, make_derivative, write_json, write_map


def _maps_files(store):
    """The maps parts of the current snapshot, from its parts list (plain Parquet files)."""
    head = json.loads((store / "HEAD").read_text())
    parts = json.loads((store / head["catalog"] / "parts.json").read_text())["parts"]
    return [str(store / p["maps"]) for p in parts]


def test_demo_index_contents(demo_store, demo_tree):
    st = mapstore.open(demo_store)
    maps = st.sql("SELECT * FROM maps").to_pandas()
    on_disk = [p for p in demo_tree.rglob("*.nii*") if not p.is_symlink() and p.stat().st_size > 1000]
    surface = list(demo_tree.rglob("*_statmap.func.gii"))
    assert len(maps) == len(on_disk) + len(surface) and len(surface) == (maps.geometry == "surface").sum()
    assert set(maps.stat) == {"t", "z", "effect", "variance"}
    assert maps.map_id.is_unique
    assert maps.study.nunique() == 7 and maps.lab.nunique() == 5
    assert maps[maps.geometry == "surface"].linked_map.notna().all()  # every demo hemisphere has its pair
    maps = maps[maps.geometry == "volume"]
    # the two-site lab
    assert sorted(maps[maps.study == "glowtrack"].site.unique()) == ["lantern-north", "lantern-south"]
    assert maps.grid_id.nunique() == 4
    # subject-level sidecar override (BIDS inheritance): sub-02 has fewer DOF than sub-01
    glow = maps[(maps.study == "glowtrack") & (maps.stat == "t")]
    assert set(glow[glow["sub"] == "02"].dof) == {140.0} and set(glow[glow["sub"] == "01"].dof) == {180.0}
    # legacy names via rules
    ember = maps[maps.study == "emberlight"]
    assert set(ember.named_by) == {"rule:0", "rule:1"} and set(ember.stat) == {"t", "effect", "variance"}
    assert (ember[ember.stat == "effect"].dtype == "int16").all()
    # relpaths are relative to the dataset root
    roots = dict(st.sql("SELECT dataset, root FROM datasets").to_pandas().values)
    for _, row in maps.head(20).iterrows():
        assert (demo_tree / roots[row.dataset] / row.relpath).exists()
        assert not os.path.isabs(row.relpath)


def test_header_columns_agree_with_nibabel(demo_store):
    # reference: nibabel reading the same files
    st = mapstore.open(demo_store)
    rows = st.sql("SELECT m.*, d.root FROM maps m JOIN datasets d USING (dataset) WHERE m.geometry = 'volume' ORDER BY map_id").to_pylist()
    rows = rows[::max(1, len(rows) // 12)]  # a dozen maps spread over the catalog, the same every run
    for r in rows:
        img = nib.load(os.path.join(r["root"], r["relpath"]))
        assert tuple(r["shape"]) == img.shape
        np.testing.assert_allclose(np.reshape(r["affine"], (4, 4)), img.affine, atol=1e-5)
        assert r["dtype"] == img.get_data_dtype().name


def test_catalog_readable_by_pyarrow_and_duckdb_directly(demo_store):
    files = _maps_files(demo_store)
    assert len(files) == 7  # one part per demo dataset
    t = pa.concat_tables([pq.read_table(f) for f in files])
    n = duckdb.connect().execute(f"SELECT count(*) FROM read_parquet({files})").fetchone()[0]
    assert t.num_rows == n == mapstore.open(demo_store).sql("SELECT count(*) n FROM maps")["n"][0].as_py()


def test_problems_table(demo_store):
    probs = mapstore.open(demo_store).sql("SELECT * FROM problems").to_pandas()
    assert set(probs.code) >= {"dangling-symlink", "truncated-header"}
    assert probs.remedy.str.len().min() > 10 and probs.reason.str.len().min() > 5


def test_sql_is_read_only(demo_store):
    st = mapstore.open(demo_store)
    for q in ("DROP VIEW maps", "CREATE TABLE x AS SELECT 1", "COPY maps TO '/tmp/x.csv'",
              "SELECT 1; SELECT 2"):
        with pytest.raises(QueryError):
            st.sql(q)
    with pytest.raises(QueryError, match="Permission"):
        st.sql("SELECT * FROM read_csv('/etc/hostname')")
    with pytest.raises(QueryError, match="views"):
        st.sql("SELECT nope FROM maps")


def test_open_missing_store(tmp_path):
    with pytest.raises(StoreNotFound):
        mapstore.open(tmp_path / "none")
    with pytest.raises(FileNotFoundError):  # leaves inherit the builtin
        mapstore.open(tmp_path / "none")


def _small_tree(tmp_path):
    ds = make_derivative(tmp_path / "src" / "alpha", name="alpha")
    write_json(ds / "task-go_statmap.json", {"DegreesOfFreedom": 30})
    (ds / "participants.tsv").write_text("participant_id\tsite\tage\nsub-01\tS1\t25\nsub-02\tS2\tn/a\n")
    for sub in ("01", "02"):
        for c in ("a", "b"):
            write_map(ds / f"sub-{sub}" / "func" / f"sub-{sub}_task-go_contrast-{c}_stat-t_statmap.nii.gz")
    return ds


def test_incremental_reindex(tmp_path):
    ds = _small_tree(tmp_path)
    store = tmp_path / "store"
    r1 = mapstore.index([tmp_path / "src"], store, progress=False)
    assert (r1.n_new, r1.n_maps) == (4, 4)
    ids1 = mapstore.open(store).sql("SELECT map_id, relpath, sha256 FROM maps ORDER BY relpath").to_pylist()
    r2 = mapstore.index([tmp_path / "src"], store, progress=False)
    assert (r2.n_new, r2.n_changed, r2.n_unchanged, r2.n_removed) == (0, 0, 4, 0)
    ids2 = mapstore.open(store).sql("SELECT map_id, relpath, sha256 FROM maps ORDER BY relpath").to_pylist()
    assert ids1 == ids2
    # change one file's content, remove one, add one
    f = ds / "sub-01" / "func" / "sub-01_task-go_contrast-a_stat-t_statmap.nii.gz"
    write_map(f, data=np.ones((4, 5, 6), np.float32))
    st = os.stat(f)
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    (ds / "sub-02" / "func" / "sub-02_task-go_contrast-b_stat-t_statmap.nii.gz").unlink()
    write_map(ds / "sub-03" / "func" / "sub-03_task-go_contrast-a_stat-t_statmap.nii.gz")
    r3 = mapstore.index([tmp_path / "src"], store, progress=False)
    assert (r3.n_new, r3.n_changed, r3.n_unchanged, r3.n_removed, r3.n_maps) == (1, 1, 2, 1, 4)
    rows = {r["relpath"]: r for r in mapstore.open(store).sql("SELECT * FROM maps").to_pylist()}
    changed = rows[f.relative_to(ds).as_posix()]
    assert changed["sha256"] != next(r for r in ids1 if r["relpath"] == changed["relpath"])["sha256"]
    assert changed["map_id"] == map_id_for("alpha", changed["relpath"])  # id survives the change
    assert rows["sub-01/func/sub-01_task-go_contrast-a_stat-t_statmap.nii.gz"]["site"] == "S1"
    # a new timestamp on the same bytes (a copy, a restore, a touch) is not a change: the file is read
    # again, its content found the same, and the summary says so
    g = ds / "sub-01" / "func" / "sub-01_task-go_contrast-b_stat-t_statmap.nii.gz"
    st = os.stat(g)
    os.utime(g, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    r4 = mapstore.index([tmp_path / "src"], store, progress=False)
    assert (r4.n_new, r4.n_changed, r4.n_unchanged, r4.n_touched, r4.n_removed) == (0, 0, 4, 1, 0)
    assert "unchanged 4 (1 touched: new timestamps, same content)" in r4.summary() and "read 1 file " in r4.summary()


def test_map_ids_survive_moving_the_data(tmp_path):
    _small_tree(tmp_path)
    mapstore.index([tmp_path / "src"], tmp_path / "s1", progress=False)
    shutil.move(tmp_path / "src", tmp_path / "moved")
    mapstore.index([tmp_path / "moved" / "alpha"], tmp_path / "s2", progress=False)
    q = "SELECT map_id, sha256 FROM maps ORDER BY map_id"
    assert mapstore.open(tmp_path / "s1").sql(q) == mapstore.open(tmp_path / "s2").sql(q)


def test_other_roots_kept_unless_pruned(tmp_path):
    _small_tree(tmp_path)
    other = make_derivative(tmp_path / "src2" / "beta", name="beta")
    write_map(other / "sub-01" / "sub-01_task-x_contrast-c_stat-z_statmap.nii")
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False)
    r = mapstore.index([tmp_path / "src2"], store, progress=False)
    assert r.n_maps == 5 and r.n_kept_datasets == 1
    r = mapstore.index([tmp_path / "src2"], store, prune=True, progress=False)
    assert r.n_maps == 1


def test_unreadable_file_does_not_stop_the_crawl(tmp_path):
    ds = _small_tree(tmp_path)
    bad = ds / "sub-01" / "func" / "sub-01_task-go_contrast-z_stat-t_statmap.nii.gz"
    bad.write_bytes(b"\x1f\x8b\x08\x00garbage" * 20)
    short = ds / "sub-01" / "func" / "sub-01_task-go_contrast-y_stat-t_statmap.nii"
    write_map(short)
    short.write_bytes(short.read_bytes()[:400])
    r = mapstore.index([tmp_path / "src"], tmp_path / "store", progress=False)
    assert r.n_maps == 4
    probs = {p["path"]: p for p in mapstore.open(tmp_path / "store").sql("SELECT * FROM problems").to_pylist()}
    assert probs[str(bad)]["code"] == "bad-gzip" and probs[str(short)]["code"] == "truncated-data"


def test_store_inside_dataset_refused(tmp_path):
    ds = _small_tree(tmp_path)
    with pytest.raises(ParameterError, match="outside source datasets"):
        mapstore.index([ds], ds / "store", progress=False)
    assert not (ds / "store").exists()


def test_source_datasets_are_not_written(tmp_path):
    _small_tree(tmp_path)
    before = {p: p.stat().st_mtime_ns for p in (tmp_path / "src").rglob("*")}
    mapstore.index([tmp_path / "src"], tmp_path / "store", progress=False)
    after = {p: p.stat().st_mtime_ns for p in (tmp_path / "src").rglob("*")}
    assert before == after


def test_busy_store_fails_fast_and_keeps_old_snapshot(tmp_path):
    _small_tree(tmp_path)
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False)
    head = (store / "HEAD").read_text()
    # a second process holds the writer lock
    proc = subprocess.Popen([sys.executable, "-c", (
        "import sys, time, pathlib; from mapstore.store._store import write_lock\n"
        f"with write_lock(pathlib.Path({str(store)!r})):\n print('locked', flush=True); time.sleep(30)")],
        stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "locked"
        with pytest.raises(StoreBusy, match="another mapstore process"):
            mapstore.index([tmp_path / "src"], store, progress=False)
    finally:
        proc.kill()
        proc.wait()
    assert (store / "HEAD").read_text() == head
    assert mapstore.open(store).sql("SELECT count(*) n FROM maps")["n"][0].as_py() == 4


def test_nibabel_reference_images_indexed(tmp_path):
    # nibabel's bundled NIfTI-1, NIfTI-2 and big-endian images, named as statistic maps
    ds = make_derivative(tmp_path / "ref", name="ref")
    names = {"example4d.nii.gz": "n1", "example_nifti2.nii.gz": "n2", "anatomical.nii": "be"}
    for src, c in names.items():
        ext = ".nii.gz" if src.endswith(".gz") else ".nii"
        dst = ds / "sub-01" / f"sub-01_task-ref_contrast-{c}_stat-t_statmap{ext}"
        dst.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(NIBABEL_DATA / src, dst)
    from nilearn.datasets import load_sample_motor_activation_image

    shutil.copy(load_sample_motor_activation_image(), ds / "sub-01" / "sub-01_task-ref_contrast-motor_stat-z_statmap.nii.gz")
    mapstore.index([ds], tmp_path / "store", progress=False)
    rows = {r["contrast"]: r for r in mapstore.open(tmp_path / "store").sql("SELECT * FROM maps").to_pylist()}
    assert rows["n1"]["nifti_version"] == 1 and rows["n2"]["nifti_version"] == 2
    assert rows["be"]["endianness"] == ">"
    for c, r in rows.items():
        img = nib.load(os.path.join(ds, r["relpath"]))
        assert tuple(r["shape"]) == img.shape
        np.testing.assert_allclose(np.reshape(r["affine"], (4, 4)), img.affine, atol=2e-4)
    motor = nib.load(load_sample_motor_activation_image())
    assert rows["motor"]["grid_id"] != rows["n1"]["grid_id"] and tuple(rows["motor"]["shape"]) == motor.shape


def test_parallel_index_equals_serial(tmp_path):
    ds = make_derivative(tmp_path / "src" / "many", name="many")
    for i in range(600):
        write_map(ds / f"sub-{i % 30:02d}" / f"sub-{i % 30:02d}_task-t_contrast-c{i}_stat-t_statmap.nii",
                  shape=(3, 3, 3))
    a = mapstore.index([tmp_path / "src"], tmp_path / "a", jobs=1, progress=False)
    b = mapstore.index([tmp_path / "src"], tmp_path / "b", jobs=2, progress=False)
    assert a.n_maps == b.n_maps == 600
    q = "SELECT map_id, sha256, grid_id FROM maps ORDER BY map_id"
    assert mapstore.open(tmp_path / "a").sql(q) == mapstore.open(tmp_path / "b").sql(q)


def test_pair_header_named_nii_is_a_problem(tmp_path):
    # nibabel ships a NIfTI-1 pair header (magic "ni1"): as a .nii its voxels would be missing
    ds = make_derivative(tmp_path / "d", name="d")
    dst = ds / "sub-01" / "sub-01_task-a_contrast-b_stat-t_statmap.nii"
    dst.parent.mkdir(parents=True)
    shutil.copy(NIBABEL_DATA / "nifti1.hdr", dst)
    r = mapstore.index([ds], tmp_path / "store", progress=False)
    assert r.n_maps == 0 and r.problem_codes == {"pair-header": 1, "no-maps": 1}


def test_crash_mid_index_keeps_the_served_catalog(tmp_path, monkeypatch):
    _small_tree(tmp_path)
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False)
    head = (store / "HEAD").read_text()
    before = mapstore.open(store).sql("SELECT * FROM maps ORDER BY map_id")
    import mapstore.indexing._crawl as cat

    def boom(*args, **kwargs):
        raise RuntimeError("simulated crash")

    monkeypatch.setattr(cat, "write_parquet_atomic", boom)
    write_map(tmp_path / "src" / "alpha" / "sub-09" / "func" / "sub-09_task-go_contrast-a_stat-t_statmap.nii.gz")
    with pytest.raises(RuntimeError):
        mapstore.index([tmp_path / "src"], store, jobs=1, progress=False)
    assert (store / "HEAD").read_text() == head
    assert mapstore.open(store).sql("SELECT * FROM maps ORDER BY map_id") == before
    monkeypatch.undo()
    assert mapstore.index([tmp_path / "src"], store, jobs=1, progress=False).n_new == 1  # lock released


def test_sidecar_per_map_in_a_flat_folder(tmp_path):
    # one JSON sidecar per map, many maps in one folder, identical metadata in several
    ds = make_derivative(tmp_path / "flat", name="flat")
    f = ds / "sub-01" / "func"
    for i in range(80):
        stem = f"sub-01_task-t_contrast-c{i}_stat-t_statmap"
        write_map(f / f"{stem}.nii", shape=(2, 2, 2))
        write_json(f / f"{stem}.json", {"DegreesOfFreedom": 10 + i % 3})
    mapstore.index([ds], tmp_path / "store", progress=False)
    rows = mapstore.open(tmp_path / "store").sql("SELECT contrast, dof, sidecars FROM maps").to_pylist()
    assert len(rows) == 80
    for r in rows:
        i = int(r["contrast"][1:])
        assert r["dof"] == 10 + i % 3
        assert r["sidecars"] == [f"sub-01/func/sub-01_task-t_contrast-c{i}_stat-t_statmap.json"]


def test_no_dataset_found_writes_nothing(tmp_path):
    from mapstore.errors import NoDatasetsFound

    (tmp_path / "empty").mkdir()
    for root in (tmp_path / "missing", tmp_path / "empty"):
        with pytest.raises(NoDatasetsFound, match="Nothing was written"):
            mapstore.index([root], tmp_path / "store", progress=False)
    assert not (tmp_path / "store").exists()


def test_special_files_are_reported_not_opened(tmp_path):
    # a FIFO, a socket, a device and a folder named like maps, a looping link, FIFO sidecar and
    # participants.tsv: each would block or fail an open(); the crawl must finish and report them
    import socket

    ds = make_derivative(tmp_path / "d")
    good = write_map(ds / "sub-01" / "sub-01_task-go_contrast-a_stat-t_statmap.nii.gz")
    f = ds / "sub-01"
    os.mkfifo(f / "sub-01_task-go_contrast-fifo_stat-t_statmap.nii.gz")
    sock = socket.socket(socket.AF_UNIX)
    here = os.getcwd()
    os.chdir(f)  # a socket path must be short: bind relative to its folder
    try:
        sock.bind("sub-01_task-go_contrast-sock_stat-t_statmap.nii")
    finally:
        os.chdir(here)
    os.symlink("/dev/zero", f / "sub-01_task-go_contrast-dev_stat-t_statmap.nii")
    (f / "sub-01_task-go_contrast-dir_stat-t_statmap.nii.gz").mkdir()
    os.symlink("loop-b.nii", f / "sub-01_task-go_contrast-loop_stat-t_statmap.nii")
    os.symlink("sub-01_task-go_contrast-loop_stat-t_statmap.nii", f / "loop-b.nii")
    os.mkfifo(f / "sub-01_task-go_statmap.json")
    os.mkfifo(ds / "participants.tsv")
    store = tmp_path / "store"
    code = (f"import mapstore; r = mapstore.index([{str(ds)!r}], {str(store)!r}, jobs=2, progress=False); "
            "print(r.n_maps)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    sock.close()
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "1"
    probs = {Path(r["path"]).name: r for r in mapstore.open(store).sql("SELECT * FROM problems").to_pylist()}
    assert probs["sub-01_task-go_contrast-fifo_stat-t_statmap.nii.gz"]["reason"] == (
        "a named pipe (FIFO) named like a statistic map; it was not opened (opening it could block the crawl)")
    assert probs["sub-01_task-go_contrast-sock_stat-t_statmap.nii"]["reason"].startswith("a socket named like")
    assert probs["sub-01_task-go_contrast-dev_stat-t_statmap.nii"]["reason"].startswith("a character device")
    assert probs["sub-01_task-go_contrast-dir_stat-t_statmap.nii.gz"]["code"] == "not-a-regular-file"
    assert probs["sub-01_task-go_contrast-loop_stat-t_statmap.nii"]["code"] == "symlink-loop"
    assert probs["sub-01_task-go_statmap.json"]["level"] == "warning"
    assert probs["participants.tsv"]["code"] == "not-a-regular-file"
    assert mapstore.open(store).sql("SELECT relpath FROM maps").column(0).to_pylist() == [
        str(good.relative_to(ds))]


@pytest.mark.parametrize("jobs", [1, 2])
def test_a_read_that_stalls_does_not_stall_the_crawl(tmp_path, jobs):
    # test hook: the read of one chosen regular file blocks (as on a stalled network or FUSE mount)
    import time

    ds = make_derivative(tmp_path / "d")
    paths = [write_map(ds / f"sub-0{i}" / f"sub-0{i}_task-go_contrast-a_stat-t_statmap.nii.gz") for i in range(3)]
    store = tmp_path / "store"
    env = {**os.environ, "MAPSTORE_TEST_STALL_READ": str(paths[1])}
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-m", "mapstore.cli", "index", str(ds), "--store", str(store),
                          "--jobs", str(jobs), "--read-timeout", "2"], env=env, capture_output=True, text=True,
                         timeout=120)
    took = time.perf_counter() - t0
    assert out.returncode == 0, out.stderr
    probs = mapstore.open(store).sql("SELECT * FROM problems WHERE code = 'read-timeout'").to_pylist()
    assert [p["path"] for p in probs] == [str(paths[1])]
    assert probs[0]["reason"].startswith("reading the file made no progress for 2 s")
    assert sorted(mapstore.open(store).sql("SELECT sub FROM maps").column(0).to_pylist()) == ["00", "02"]
    assert took < 60


def test_index_takes_origins_under_one_name(tmp_path):
    # ``overrides=`` is origins' earlier name: both at once is a usage error, before anything is read
    from mapstore.errors import ParameterError

    with pytest.raises(ParameterError, match="give origins= only"):
        mapstore.index([tmp_path], tmp_path / "store", origins=tmp_path / "a.yaml", overrides=tmp_path / "b.yaml")
    assert not (tmp_path / "store").exists()


def test_a_warm_run_decides_from_the_listing_before_parsing_a_name(tmp_path, monkeypatch):
    """Nothing changed: the walk's listing (path, size and time of every file) equals the last run's, and the
    parts are kept without a name parsed; a new file anywhere in the dataset makes the walk parse again."""
    from mapstore.indexing import _walk

    ds = _small_tree(tmp_path)
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False, jobs=1)
    parsed = []
    real = _walk._Walk.map
    monkeypatch.setattr(_walk._Walk, "map", lambda self, e, rel: (parsed.append(rel), real(self, e, rel))[1])
    warm = mapstore.index([tmp_path / "src"], store, progress=False, jobs=1)
    assert (warm.n_unchanged, warm.n_new, warm.n_changed) == (4, 0, 0) and parsed == []
    (ds / "sub-01" / "func" / "notes.txt").write_text("a file no rule takes")
    again = mapstore.index([tmp_path / "src"], store, progress=False, jobs=1)
    assert (again.n_unchanged, again.n_new, again.n_changed) == (4, 0, 0) and len(parsed) == 4
