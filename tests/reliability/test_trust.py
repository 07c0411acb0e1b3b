"""Trust boundaries: a read-only query cannot write, a shared store cannot reach outside itself, damage is
a message, and sources are never written to, whatever the spelling of their path.

The stores are built from invented maps; the attacks are crafted by hand, as a colleague's shared copy
of a store or a careless path could hold them.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import shutil
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import mapstore
from mapstore.cli import main
from mapstore.errors import MapstoreError, StoreCorrupt

from ..conftest import make_derivative, noise_maps, write_json


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    base = tmp_path_factory.mktemp("trust")
    ds = make_derivative(base / "study", "larch")
    noise_maps(ds, range(1, 5))
    store = base / "store"
    mapstore.index([ds], store, progress=False, jobs=1)
    mapstore.build_features(store, "default", grid="MNI152-3mm", progress=False, jobs=1)
    vocab = write_json(base / "vocab.json", {"vocabulary": "v", "version": "1", "concepts": {"a": {}},
                                             "rules": [{"contrast": "a", "concepts": ["a"]}]})
    mapstore.label(store, vocab)
    return base, ds, store


def _bytes(folder: Path) -> dict[str, str]:
    """Every file under ``folder`` and its hash (readers' leases aside: they come and go)."""
    out = {}
    for root, _, files in os.walk(folder):
        if ".readers" in root:
            continue
        for f in files:
            p = os.path.join(root, f)
            out[p] = hashlib.sha256(Path(p).read_bytes()).hexdigest()
    return out


def _copy(built, tmp_path) -> Path:
    store = tmp_path / "store"
    shutil.copytree(built[2], store, symlinks=True)
    return store


def test_sql_cannot_write_anywhere(built, tmp_path, monkeypatch):
    store = _copy(built, tmp_path)
    monkeypatch.chdir(tmp_path)
    before = _bytes(tmp_path)
    s = mapstore.open(store)
    head = store / "HEAD"
    attempts = [
        f"COPY (SELECT 'x') TO '{head}' (FORMAT csv)",
        f"EXPLAIN ANALYZE COPY (SELECT 'x') TO '{head}' (FORMAT csv)",
        f"/* a comment */ explain analyse copy (select 1) to '{store}/x.csv'",
        f"EXPLAIN (ANALYZE) COPY (SELECT 1) TO '{store}/y.csv'",
        "EXPLAIN ANALYZE COPY (SELECT 1) TO 'in-cwd.csv'",
        f"-- note\nEXPLAIN\nANALYZE\nCOPY (SELECT 1) TO '{store}/z.csv'",
        f"SELECT * FROM query('COPY (SELECT 1) TO ''{store}/q.csv''')",
        "ATTACH 'x.db' AS x", "CREATE TABLE t AS SELECT 1", "INSTALL httpfs", "LOAD httpfs",
        "SET threads = 1", "RESET allowed_directories", "SET lock_configuration = false", "PRAGMA enable_profiling",
        "SELECT 1; COPY (SELECT 1) TO 'two.csv'", "CALL pragma_version()", "EXPORT DATABASE 'exported'",
        "CHECKPOINT", "VACUUM", "DETACH memory", "USE memory", "SELECT * FROM read_csv('/etc/hostname')",
    ]
    for q in attempts:
        with pytest.raises(MapstoreError):
            s.sql(q)
    assert _bytes(tmp_path) == before  # not a byte changed or added, in the store or the working folder
    assert s.sql("EXPLAIN SELECT count(*) FROM maps").num_rows >= 1  # reading is still allowed
    assert s.sql("EXPLAIN ANALYZE SELECT count(*) FROM maps").num_rows >= 1
    assert s.sql("SELECT count(*) AS n FROM maps")["n"][0].as_py() == 4


TYPES = ["MAP {'a': 1}", "INTERVAL 3 DAY", "union_value(n := 1)", "['ab'::BLOB]", "'ab'::BLOB",
         "{'x': 1, 'y': [1, 2]}", "1.5::DECIMAL(10, 2)", "170141183460469231731687303715884105727::HUGEINT",
         "gen_random_uuid()", "TIME '10:00'", "now()", "[1, 2]::INTEGER[2]", "'a'::ENUM('a', 'b')", "NULL",
         "'inf'::DOUBLE", "BIT '101'", "[INTERVAL 1 DAY]", "1::UBIGINT"]


@pytest.mark.parametrize("fmt", ["table", "csv", "json", "parquet"])
def test_every_duckdb_type_prints_or_is_refused_in_one_line(built, tmp_path, capsys, fmt):
    store = built[2]
    for expr in TYPES:
        out = tmp_path / f"o.{fmt}"
        code = main(["sql", "--store", str(store), "--format", fmt, "--out", str(out), f"SELECT {expr} AS v"])
        err = capsys.readouterr().err
        assert "Traceback" not in err, (expr, err)
        if code == 0:
            assert out.exists()
        else:  # Parquet cannot hold intervals and unions: a usage error naming the column and the remedy
            assert code == 2 and fmt == "parquet" and "CAST" in err and len(err.strip().splitlines()) == 1, \
                (expr, code, err)


def _edit_head(store: Path, change) -> None:
    doc = json.loads((store / "HEAD").read_text())
    change(doc)
    (store / "HEAD").write_text(json.dumps(doc))


def _victim(tmp_path: Path) -> Path:
    v = tmp_path / "victim" / "x.parquet"
    v.parent.mkdir()
    pq.write_table(pa.table({"map_id": ["outside"], "concept": ["secret"]}), v)
    return v


CRAFTED = {
    "labels table absolute": lambda doc, v, s: doc["labels"].update(table=str(v)),
    "labels table relative": lambda doc, v, s: doc["labels"].update(table="../victim/x.parquet"),
    "labels copy outside": lambda doc, v, s: doc["labels"].update(copy="../victim/x.parquet"),
    "feature rows absolute": lambda doc, v, s: doc["features"]["default"].update(rows=str(v)),
    "feature dir outside": lambda doc, v, s: doc["features"]["default"].update(dir="../victim"),
    "catalog outside": lambda doc, v, s: doc.update(catalog="../victim"),
    "wrong type": lambda doc, v, s: doc["features"]["default"].update(n_rows="abc"),
    "huge number": lambda doc, v, s: doc["features"]["default"].update(n_rows=10 ** 30),
    "not an object": lambda doc, v, s: doc.update(features=["x"]),
}


@pytest.mark.parametrize("attack", sorted(CRAFTED))
def test_a_crafted_head_is_refused_before_any_file_is_touched(built, tmp_path, capsys, attack):
    store = _copy(built, tmp_path)
    victim = _victim(tmp_path)
    _edit_head(store, lambda doc: CRAFTED[attack](doc, victim, store))
    before = _bytes(victim.parent)
    with pytest.raises(StoreCorrupt):
        mapstore.open(store)
    for argv in (["sql", "--store", str(store), "SELECT count(*) FROM labels"],
                 ["labels", "--store", str(store), "--vocab", str(built[0] / "vocab.json")],
                 ["index", str(built[1]), "--store", str(store)],
                 ["export", "--store", str(store), "--out", str(tmp_path / "out")]):
        code = main(argv)
        err = capsys.readouterr().err.strip()
        assert code == 1 and "Traceback" not in err and len(err.splitlines()) == 1, (argv, err)
        assert "store" in err
    assert _bytes(victim.parent) == before  # never read into an answer, never deleted


def test_symlinks_fifos_and_devices_in_a_store_are_refused(built, tmp_path):
    store = _copy(built, tmp_path)
    victim = _victim(tmp_path)
    fs_dir = store / "features" / "default"
    shard = next((fs_dir / "shards").iterdir())
    # a shard that is a FIFO would hang a reader: refused before it is opened
    shard.unlink()
    os.mkfifo(shard)
    s = mapstore.open(store)
    with pytest.raises(StoreCorrupt, match="FIFO"):
        s.features().matrix()
    # a rows table symlinked outside the store
    head = json.loads((store / "HEAD").read_text())
    rows = store / head["features"]["default"]["rows"]
    rows.unlink()
    rows.symlink_to(victim)
    with pytest.raises(StoreCorrupt, match="outside the store"):
        mapstore.open(store)
    # a labels copy that is /dev/zero (read until memory runs out)
    store2 = _copy(built, tmp_path / "b")
    head = json.loads((store2 / "HEAD").read_text())
    copy = store2 / head["labels"]["copy"]
    copy.unlink()
    copy.symlink_to("/dev/zero")
    with pytest.raises(StoreCorrupt):
        mapstore.open(store2)


def test_damaged_records_are_messages(built, tmp_path):
    store = _copy(built, tmp_path)
    # a lease with a pid that is not a number is ignored, not a crash
    (store / ".readers").mkdir(exist_ok=True)
    (store / ".readers" / "123-0123456789ab.json").write_text(json.dumps({"pid": "abc", "host": os.uname()[1],
                                                                          "start": "1"}))
    (store / ".readers" / "124-0123456789ab.json").write_text("[1, 2]")
    from mapstore.store._store import leased_files

    assert leased_files(store) == []
    # a rows table naming a row far past its shard
    head = json.loads((store / "HEAD").read_text())
    rows_path = store / head["features"]["default"]["rows"]
    t = pq.read_table(rows_path)
    t = t.set_column(t.schema.get_field_index("row"), "row", pa.array([10 ** 15] * t.num_rows, pa.int64()))
    pq.write_table(t, rows_path)
    with pytest.raises(StoreCorrupt, match="row"):
        mapstore.open(store).features().matrix()
    # a shard name with a folder part
    t = t.set_column(t.schema.get_field_index("shard"), "shard", pa.array(["../../HEAD"] * t.num_rows))
    pq.write_table(t, rows_path)
    with pytest.raises(StoreCorrupt):
        mapstore.open(store).features().matrix()


def test_verify_refuses_a_manifest_naming_fifos_devices_and_outside_files(built, tmp_path):
    from mapstore.errors import ExportError
    from mapstore.select._export import verify

    s = mapstore.open(built[2])
    out = tmp_path / "out"
    s.export(out, s.select(group_by="subject"))
    man = json.loads((out / "manifest.json").read_text())
    fifo = tmp_path / "fifo"
    os.mkfifo(fifo)
    man["sources"][0]["path"] = str(fifo)
    man["sources"][1]["path"] = "/dev/zero"
    (out / "manifest.json").write_text(json.dumps(man))
    rep = verify(out)
    assert not rep.ok and sum("not a regular file" in c for c in rep.changes) == 2
    man["files"]["../../etc/hostname"] = "0" * 64
    (out / "manifest.json").write_text(json.dumps(man))
    with pytest.raises(ExportError, match="not a file of the export folder"):
        verify(out)
    del man["files"]["../../etc/hostname"]
    man["sources"][2]["sha256"] = 5
    (out / "manifest.json").write_text(json.dumps(man))
    with pytest.raises(ExportError, match="malformed"):
        verify(out)


def test_sources_are_refused_as_outputs_by_any_spelling(built, tmp_path, capsys):
    base, ds, store = built
    alias = tmp_path / "alias"
    alias.symlink_to(ds)
    spellings = [ds / "sub-01" / ".." / "out", alias / "out", Path(os.path.relpath(ds, Path.cwd())) / "out"]
    for out in spellings:
        code = main(["export", "--store", str(store), "--out", str(out)])
        err = capsys.readouterr().err
        assert code == 2 and "inside the source dataset" in err, (out, err)
        code = main(["index", str(ds), "--store", str(out)])
        err = capsys.readouterr().err
        assert code == 2 and "lies inside the dataset" in err, (out, err)
    assert not (ds / "out").exists()
    # a dataset indexed through a symlink: its real path is refused too
    store2 = tmp_path / "store2"
    mapstore.index([alias], store2, progress=False, jobs=1)
    mapstore.build_features(store2, grid="MNI152-3mm", progress=False, jobs=1)
    code = main(["export", "--store", str(store2), "--out", str(ds / "real-out")])
    assert code == 2 and "inside the source dataset" in capsys.readouterr().err
    assert not (ds / "real-out").exists()


def _create(path: str, barrier) -> str:
    from mapstore.store import ensure_store

    barrier.wait()
    try:
        ensure_store(path)
        return "ok"
    except Exception as exc:  # noqa: BLE001 - reported to the test
        return f"{type(exc).__name__}: {exc}"


def test_two_runs_creating_one_store_at_once_both_succeed(tmp_path):
    ctx = multiprocessing.get_context("fork")
    failures = []
    with ctx.Manager() as manager, ctx.Pool(2) as pool:
        barrier = manager.Barrier(2)  # both runs start creating at the same moment
        for i in range(60):
            path = str(tmp_path / f"s{i}")
            got = pool.starmap(_create, [(path, barrier), (path, barrier)])
            failures += [g for g in got if g != "ok"]
    assert failures == []


def test_a_non_ascii_label_is_kept_whole(tmp_path):
    ds = make_derivative(tmp_path / "d", "rowan")
    noise_maps(ds, [1])
    src = next(ds.rglob("*.nii.gz"))
    src.rename(src.with_name("sub-01_task-lesen_contrast-wörterÄ_stat-t_statmap.nii.gz"))
    mapstore.index([ds], tmp_path / "store", progress=False, jobs=1)
    got = mapstore.open(tmp_path / "store").sql("SELECT task, contrast FROM maps").to_pylist()
    assert got == [{"task": "lesen", "contrast": "wörterÄ"}]


def _store_files(store: Path) -> list[Path]:
    head = json.loads((store / "HEAD").read_text())
    fs = store / head["features"]["default"]["dir"]
    parts = json.loads((store / head["catalog"] / "parts.json").read_text())["parts"]
    return [store / "HEAD", store / "store.json", store / head["catalog"] / "parts.json",
            store / parts[0]["maps"], store / head["catalog"] / "datasets.parquet", store / head["labels"]["table"],
            store / head["labels"]["copy"], fs / "set.json", fs / "mask.npy", store / head["features"]["default"]["rows"],
            next((fs / "shards").iterdir())]


def _read_everything(store: Path) -> None:
    s = mapstore.open(store)
    for view in ("maps", "datasets", "labels", "features", "problems", "participants"):
        s.sql(f"SELECT * FROM {view}")
    fs = s.features("default")
    fs.matrix()
    fs.unmask(fs.matrix()[0])
    s.select(features="default").X


DAMAGE = {
    "truncated": lambda b: b[: len(b) // 2],
    "empty": lambda b: b"",
    "garbage": lambda b: bytes(np.random.default_rng(len(b)).integers(0, 256, max(len(b), 64), dtype=np.uint8)),
    "wrong json types": lambda b: json.dumps({"catalog": 5, "features": "x", "parts": {"a": 1}, "version": "2",
                                              "format": ["x"], "name": 3, "mask": []}).encode(),
}


@pytest.mark.parametrize("damage", sorted(DAMAGE))
def test_a_damaged_store_file_is_a_message_never_a_traceback(built, tmp_path, damage):
    """Each file of a store damaged in turn: every reader raises mapstore's own error (or still works)."""
    import signal

    for k, f in enumerate(_store_files(built[2])):
        store = _copy(built, tmp_path / f"{damage}-{k}")
        target = store / f.relative_to(built[2])
        target.write_bytes(DAMAGE[damage](target.read_bytes()))
        signal.alarm(60)  # a hang fails the test instead of stalling CI
        try:
            _read_everything(store)
        except MapstoreError:
            pass
        except Exception as exc:  # noqa: BLE001 - the point of the test
            pytest.fail(f"{target.name} {damage}: {type(exc).__name__}: {exc}")
        finally:
            signal.alarm(0)


_IDENTICAL_RUN = """
import sys
import mapstore
store = sys.argv[2]
mapstore.index([sys.argv[1]], store, progress=False, jobs=1)
rep = mapstore.build_features(store, "flat", grid=sys.argv[3], mask="intersection", progress=False, jobs=1)
n = mapstore.open(store).sql("SELECT count(*) AS n FROM feature_copies")["n"][0].as_py()
# VmHWM: this process image's peak (ru_maxrss would carry the forking parent's peak across exec)
peak = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM:"))
print(rep.n_built, n, peak // 1024)
"""


def test_thousands_of_identical_maps_cost_linear_memory(tmp_path):
    """3,000 byte-identical maps: one group of copies (2,999 pairs, not 4.5 million), and the build's
    peak memory stays far below what listing every pair takes (measured in a fresh process)."""
    import subprocess
    import sys

    import nibabel as nib

    ds = make_derivative(tmp_path / "same", "aspen")
    aff = np.diag([4.0, 4.0, 4.0, 1.0])
    data = np.random.default_rng(0).normal(size=(8, 8, 8)).astype(np.float32)
    img = nib.Nifti1Image(data, aff)
    for i in range(3000):
        (ds / f"sub-{i:04d}").mkdir()
        nib.save(img, str(ds / f"sub-{i:04d}" / f"sub-{i:04d}_task-x_contrast-a_stat-t_statmap.nii"))
    grid = write_json(tmp_path / "grid.json", {"shape": [8, 8, 8], "affine": aff.tolist()})
    out = subprocess.run([sys.executable, "-c", _IDENTICAL_RUN, str(ds), str(tmp_path / "store"), str(grid)],
                         capture_output=True, text=True, timeout=900)
    assert out.returncode == 0, out.stderr[-2000:]
    built, pairs, peak_mb = map(int, out.stdout.split())
    assert built == 3000 and pairs == 2999
    assert peak_mb < 900, peak_mb  # every pair listed took 2.4 GB here


def test_a_full_disk_names_the_output_in_one_line(built, tmp_path, capsys):
    import subprocess

    from ..store.test_store import _mount_tmpfs

    mnt = tmp_path / "tiny"
    if not _mount_tmpfs(mnt, "1m"):
        pytest.skip("needs root and a tmpfs mount (CI runs as root)")
    try:
        (mnt / "filler").write_bytes(b"\0" * (1024 * 1024 - 8192))
        out = mnt / "maps.csv"
        code = main(["sql", "--store", str(built[2]), "--format", "csv", "--out", str(out),
                     "SELECT *, repeat('x', 5000) AS pad FROM maps"])
        err = capsys.readouterr().err.strip()
        assert code == 1 and len(err.splitlines()) == 1 and str(out) in err and "Traceback" not in err, err
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def test_a_damaged_shard_is_rebuilt_by_the_next_features_run(built, tmp_path):
    store = _copy(built, tmp_path)
    before = mapstore.open(store).features("default").matrix()
    shard = next((store / "features" / "default" / "shards").iterdir())
    shard.write_bytes(shard.read_bytes()[: shard.stat().st_size // 2])
    with pytest.raises(MapstoreError):
        mapstore.open(store).features("default").matrix()
    rep = mapstore.build_features(store, "default", grid="MNI152-3mm", progress=False, jobs=1)
    assert rep.n_built == 4 and rep.n_problems == 0
    np.testing.assert_array_equal(mapstore.open(store).features("default").matrix(), before)


def test_index_repairs_a_damaged_catalog_part(built, tmp_path):
    store = _copy(built, tmp_path)
    head = json.loads((store / "HEAD").read_text())
    part = json.loads((store / head["catalog"] / "parts.json").read_text())["parts"][0]["maps"]
    (store / part).write_bytes(b"garbage")
    with pytest.raises(StoreCorrupt, match="damaged"):
        mapstore.open(store).sql("SELECT count(*) FROM maps")
    mapstore.index([built[1]], store, progress=False, jobs=1)
    assert mapstore.open(store).sql("SELECT count(*) AS n FROM maps")["n"][0].as_py() == 4


def test_a_query_reads_only_the_views_it_names(built, tmp_path):
    """A damaged feature rows table fails the queries over feature sets, in one message naming it, and no
    others: a count over maps needs only the catalog's files (and opening all of them costs time)."""
    store = _copy(built, tmp_path)
    head = json.loads((store / "HEAD").read_text())
    rows = store / head["features"]["default"]["rows"]
    rows.write_bytes(b"garbage")
    s = mapstore.open(store)
    assert s.sql("SELECT count(*) AS n FROM maps WHERE stat = 't'")["n"][0].as_py() == 4
    assert s.sql("SELECT count(*) AS n FROM map_families")["n"][0].as_py() == 4
    with pytest.raises(StoreCorrupt, match=rows.name):
        s.sql("SELECT count(*) FROM features")
    # listing the database makes every view, so the listing is whole (or names the damaged file)
    with pytest.raises(StoreCorrupt, match=rows.name):
        mapstore.open(store).sql("SHOW TABLES")
    names = mapstore.open(built[2]).sql("SHOW TABLES")["name"].to_pylist()
    assert {"maps", "map_families", "features", "feature_sets", "labels", "participants"} <= set(names)
