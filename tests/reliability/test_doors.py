"""Every door: outputs never land in a source or a store, files a user or a collaborator hands over are
bounded (size, depth, aliases, time) and refused in one line, hostile trees stay bounded, interrupted
outputs leave the old result or nothing.  The trees and files are invented; each attack is named."""

from __future__ import annotations

import gzip
import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.errors import ExportError, MapstoreError, OutputPlaceError, VocabularyError

from ..conftest import box_4mm, make_derivative, noise_maps, write_json, write_map


def _tree(root: Path) -> dict[str, str]:
    """Every file under root (links not followed) with its hash: what a command must not change."""
    out = {}
    for dirpath, dirs, files in os.walk(root):
        dirs[:] = [d for d in dirs if d != ".readers"]  # readers' leases come and go with every open
        for f in files:
            p = Path(dirpath) / f
            out[str(p.relative_to(root))] = "link" if p.is_symlink() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    base = tmp_path_factory.mktemp("doors")
    ds = make_derivative(base / "src" / "alpha", "alpha")
    noise_maps(ds, range(1, 7), seed=1)
    ds2 = make_derivative(base / "src" / "beta", "beta")
    noise_maps(ds2, range(1, 7), seed=2)
    store = base / "store"
    mapstore.index([base / "src"], store, progress=False, jobs=1)
    mapstore.build_features(store, grid="MNI152-3mm", progress=False, jobs=1)
    (base / "link-into-src").symlink_to(ds)
    return {"base": base, "src": base / "src", "ds": ds, "store": store}


def _placements(small) -> list[Path]:
    ds, store, base = small["ds"], small["store"], small["base"]
    return [ds / "out", ds, ds / "sub-01" / ".." / "x", base / "link-into-src" / "out", store, store / "features",
            store / "new", base / "src"]


def test_no_output_lands_in_a_source_or_a_store(small):
    st = mapstore.open(small["store"])
    sel = st.select(stat=["t"], group_by="study")
    before = (_tree(small["src"]), _tree(small["store"]))
    from mapstore.analyses import pool, write_pooled

    res = pool(st.select(stat=["t"], group_by="study", missing="keep"), "stouffer", min_subjects=2)
    report = st.check(pictures=False)
    for place in _placements(small):
        for overwrite in (False, True):
            with pytest.raises(OutputPlaceError):
                st.export(place, sel, overwrite=overwrite)
            with pytest.raises(OutputPlaceError):
                write_pooled(res, place, overwrite=overwrite)
        if place != small["base"] / "src":  # a report file beside the datasets (not in one) is fine
            with pytest.raises(OutputPlaceError):
                report.write_html(place / "report.html" if place.is_dir() else place)
    st.close()
    assert (_tree(small["src"]), _tree(small["store"])) == before
    # the CLI says it in one line, exit 2 (the output named is wrong)
    out = subprocess.run([sys.executable, "-m", "mapstore.cli", "export", "--store", str(small["store"]), "--out",
                          str(small["store"]), "--overwrite"], capture_output=True, text=True)
    assert out.returncode == 2 and len(out.stderr.strip().splitlines()) == 1 and "store" in out.stderr
    assert (_tree(small["src"]), _tree(small["store"])) == before


def test_overwrite_replaces_only_what_mapstore_wrote(small, tmp_path):
    st = mapstore.open(small["store"])
    sel = st.select(stat=["t"], group_by="study")
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("a user's own file")
    with pytest.raises(OutputPlaceError, match="mapstore did not write it"):
        st.export(mine, sel, overwrite=True)
    assert (mine / "notes.txt").read_text() == "a user's own file"
    out = tmp_path / "exp"
    st.export(out, sel)
    with pytest.raises(OutputPlaceError, match="pass --overwrite"):
        st.export(out, sel)
    st.export(out, sel, overwrite=True, fmt="parquet")
    assert mapstore.verify(out).ok and not (out / "X.npy").exists()  # replaced whole, nothing of the first left


def test_a_second_pool_replaces_the_first_whole_and_leftovers_go(small, tmp_path):
    from mapstore.analyses import pool, verify_pooled, write_pooled

    st = mapstore.open(small["store"])
    sel = st.select(stat=["t"], group_by="study", missing="keep")
    out = tmp_path / "pooled"
    write_pooled(pool(sel, "stouffer", min_subjects=2), out)
    (out / "pooled_stat-left-by-an-older-version.nii.gz").write_bytes(b"x")  # a file the second run did not write
    stale = tmp_path / ".pooled.999999-0123abcd.partial"  # what a killed run (a dead pid) left
    stale.mkdir()
    write_pooled(pool(sel, "fisher", min_subjects=2), out, overwrite=True)
    assert not (out / "pooled_stat-left-by-an-older-version.nii.gz").exists()  # replaced whole
    assert json.loads((out / "pooled.json").read_text())["method"] == "fisher"
    assert not stale.exists() and not [n for n in os.listdir(tmp_path) if n.endswith(".partial")]
    assert not verify_pooled(out)


def _killed(args: list[str], counter: Path, after: int, cwd: Path) -> int:
    env = {**os.environ, "MAPSTORE_TEST_KILL_COUNTER": str(counter), "MAPSTORE_TEST_KILL_AFTER": str(after)}
    counter.unlink(missing_ok=True)
    return subprocess.run([sys.executable, "-m", "mapstore.cli", *args], env=env, cwd=cwd,
                          capture_output=True).returncode


@pytest.mark.slow
def test_pool_killed_at_every_checkpoint_leaves_the_old_result_or_nothing(small, tmp_path):
    out = tmp_path / "pooled"
    args = ["pool", "--store", str(small["store"]), "--out", str(out), "--stat", "t", "--method", "stouffer",
            "--min-subjects", "2"]
    for after in range(1, 8):
        rc = _killed(args, tmp_path / "count", after, tmp_path)
        if out.exists():
            assert rc == 0 or set(os.listdir(out)) >= {"pooled.json", "peaks.tsv"}
            from mapstore.analyses import verify_pooled

            assert not verify_pooled(out)
    rc = subprocess.run([sys.executable, "-m", "mapstore.cli", *args, "--overwrite"], capture_output=True).returncode
    assert rc == 0 and not [n for n in os.listdir(tmp_path) if n.endswith(".partial")]


BOMB = ("a: &a [x, x, x, x, x, x, x, x, x]\nb: &b [*a, *a, *a, *a, *a, *a, *a, *a, *a]\n"
        "c: &c [*b, *b, *b, *b, *b, *b, *b, *b, *b]\nd: &d [*c, *c, *c, *c, *c, *c, *c, *c, *c]\n"
        "e: &e [*d, *d, *d, *d, *d, *d, *d, *d, *d]\nf: &f [*e, *e, *e, *e, *e, *e, *e, *e, *e]\n"
        "g: &g [*f, *f, *f, *f, *f, *f, *f, *f, *f]\nh: &h [*g, *g, *g, *g, *g, *g, *g, *g, *g]\n")
HOSTILE = {
    "alias-bomb.yaml": (BOMB, "aliases are expanded"),
    "deep.json": ("[" * 100_000 + "]" * 100_000, "nested deeper than"),
    "deep.yaml": ("[" * 100_000 + "]" * 100_000, "nested deeper than"),
    "tag.yaml": ("!!python/object/apply:os.system ['echo hi']\n", "could not determine a constructor"),
    "big.json": ("{\"rules\": [" + " " * (9 << 20) + "]}", "MiB a"),
    "backtrack.json": (json.dumps({"rules": [{"regex": "(a+)+$", "entities": {"stat": "t"}}]}), "exponential"),
    "attribute.json": (json.dumps({"rules": [{"regex": "(?P<x>.*)_t\\.nii", "entities": {"stat": "t"},
                                              "mask": "{x.__class__}"}]}), "only {group} fields"),
    "outside.json": (json.dumps({"rules": [{"regex": "(?P<x>.*)_t\\.nii", "entities": {"stat": "t"},
                                            "dof_file": "../../etc/{x}"}]}), "inside the dataset"),
}


@pytest.mark.parametrize("name", sorted(HOSTILE))
def test_hostile_user_files_are_refused_in_one_line_with_bounded_memory(small, tmp_path, name):
    text, said = HOSTILE[name]
    f = tmp_path / name
    f.write_text(text)
    code = ("import sys, mapstore\n"
            "try:\n"
            f"    mapstore.index([{str(small['ds'])!r}], {str(tmp_path / 'store')!r}, rules={str(f)!r}, progress=False)\n"
            "except mapstore.MapstoreError as exc:\n"
            "    print(str(exc)); sys.exit(1)\n"
            "finally:\n"
            "    hwm = [l for l in open('/proc/self/status') if l.startswith('VmHWM')][0].split()[1]\n"
            "    print('peak', hwm, file=sys.stderr)\n")
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert run.returncode == 1, run.stderr[-500:]
    assert len(run.stdout.strip().splitlines()) == 1 and said in run.stdout and str(f) in run.stdout
    peak_kb = int(run.stderr.rsplit("peak", 1)[1])
    assert peak_kb < 1_000_000  # under 1 GB: the fresh process's own peak (VmHWM; ru_maxrss would carry the
    # forking parent's peak across exec)
    assert not (tmp_path / "store" / "HEAD").exists()


def test_a_vocabulary_bomb_and_a_long_broader_chain(tmp_path):
    f = tmp_path / "v.yaml"
    f.write_text(BOMB)
    with pytest.raises(VocabularyError, match="aliases are expanded"):
        mapstore.load_vocabulary(f)
    chain = {"concepts": {f"c{i}": {"broader": [f"c{i + 1}"]} for i in range(5000)} | {"c5000": {}},
             "rules": [{"contrast": "a", "concepts": ["c0"]}]}
    v = mapstore.load_vocabulary(write_json(tmp_path / "chain.json", chain))
    assert len(v.broader_closure("c0")) == 5000
    chain["concepts"]["c5000"] = {"broader": ["c0"]}
    with pytest.raises(VocabularyError, match="cycle"):
        mapstore.load_vocabulary(write_json(tmp_path / "cycle.json", chain))


def test_hostile_trees_stay_bounded(tmp_path):
    ds = make_derivative(tmp_path / "d", "hostile")
    write_map(ds / "sub-01" / "sub-01_task-a_contrast-b_stat-t_statmap.nii.gz")
    (ds / "sub-01" / "loop").symlink_to(ds / "sub-01")  # a folder that holds itself
    cols = "\t".join(["participant_id"] + [f"c{i}" for i in range(3000)])
    (ds / "participants.tsv").write_text(cols + "\nsub-01" + "\t1" * 3000 + "\n")
    (ds / "sub-01" / "sub-01_task-a_contrast-b_stat-t_statmap.json").write_text("[" * 100_000 + "]" * 100_000)
    with open(ds / "task-a_statmap.json", "w") as fh:  # a 17 MiB sidecar, read by no one
        fh.write("{\"x\": \"" + "y" * (17 << 20) + "\"}")
    rep = mapstore.index([ds], tmp_path / "store", progress=False, jobs=1)
    assert rep.n_maps == 1
    codes = {r["code"] for r in mapstore.open(tmp_path / "store").sql("SELECT code FROM problems").to_pylist()}
    assert {"symlink-loop", "participants-too-wide", "bad-sidecar", "sidecar-too-large"} <= codes


def test_a_bomb_in_a_map_is_refused_from_its_header_or_never_inflated_whole(tmp_path):
    ds = make_derivative(tmp_path / "d", "bombs")
    # a header declaring 4,000^3 float32 voxels (256 GB) in a tiny file
    img = nib.Nifti1Image(np.zeros((2, 2, 2), np.float32), np.eye(4))
    img.header.set_data_shape((4000, 4000, 4000))
    raw = img.header.binaryblock + b"\0" * 4 + np.zeros(8, np.float32).tobytes()
    (ds / "sub-01").mkdir(parents=True)
    (ds / "sub-01" / "sub-01_task-a_contrast-big_stat-t_statmap.nii.gz").write_bytes(gzip.compress(raw))
    # a map whose gzip stream goes on far past what its header declares (200 MB of zeros)
    small_map = write_map(tmp_path / "plain.nii", np.ones((41, 48, 40), np.float32), box_4mm())
    payload = small_map.read_bytes() + b"\0" * (200 << 20)
    (ds / "sub-02").mkdir()
    (ds / "sub-02" / "sub-02_task-a_contrast-b_stat-t_statmap.nii.gz").write_bytes(gzip.compress(payload, 9))
    store = tmp_path / "store"
    rep = mapstore.index([ds], store, progress=False, jobs=1)
    got = mapstore.open(store).sql("SELECT code FROM problems WHERE level = 'error'").to_pylist()
    assert rep.n_maps == 1 and got == [{"code": "map-too-large"}]
    import tracemalloc

    from mapstore.targets import read_volume

    tracemalloc.start()
    vol, _ = read_volume(str(ds / "sub-02" / "sub-02_task-a_contrast-b_stat-t_statmap.nii.gz"))
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert vol.shape == (41, 48, 40) and float(vol.mean()) == 1.0 and peak < 50 << 20
    # the limit is the user's to raise
    rep = mapstore.index([ds], store, progress=False, jobs=1, max_map_mb=1 << 20)
    got = mapstore.open(store).sql("SELECT code FROM problems WHERE level = 'error'").to_pylist()
    assert got != [{"code": "map-too-large"}]


def _manifest(small, tmp_path) -> tuple[Path, dict]:
    st = mapstore.open(small["store"])
    out = Path(st.export(tmp_path / "exp", st.select(stat=["t"], group_by="study")).out)
    return out, json.loads((out / "manifest.json").read_text())


CRAFTED = [
    ("sources", None), ("sources", [1, 2]), ("sources", "x"), ("files", {"../../etc/passwd": "x"}),
    ("files", {"a": 1}), ("shape", "big"), ("shape", [1]), ("store", None), ("feature_set", []),
    ("query", None), ("seed", "x"), ("datasets", [1]), ("feature_settings", "x"), ("index_inputs", [1]),
    ("y_from", 3), ("feature_settings", {"grid": {}}),
]


@pytest.mark.parametrize("key, value", CRAFTED, ids=[f"{k}-{i}" for i, (k, _) in enumerate(CRAFTED)])
def test_crafted_manifests_are_refused_in_one_line(small, tmp_path, key, value):
    out, man = _manifest(small, tmp_path)
    man[key] = value
    (out / "manifest.json").write_text(json.dumps(man))
    try:
        mapstore.verify(out)  # a field verify does not read may pass it; never a traceback
    except ExportError as exc:
        assert "\n" not in str(exc) and "manifest" in str(exc)
    with pytest.raises(ExportError) as err:
        mapstore.rebuild(out, [small["src"]], tmp_path / "again")
    assert "\n" not in str(err.value) and "manifest" in str(err.value)
    assert not (tmp_path / "again").exists()


def test_deep_and_large_manifests_are_refused(small, tmp_path):
    out, man = _manifest(small, tmp_path)
    (out / "manifest.json").write_text(json.dumps({**man, "extra": json.loads("[" * 50 + "]" * 50)}))
    with pytest.raises(ExportError, match="nested deeper"):
        mapstore.verify(out)
    (out / "manifest.json").write_text('{"format": "mapstore-export", "x": ' + "[" * 100_000 + "]" * 100_000 + "}")
    with pytest.raises(ExportError, match="nested deeper"):
        mapstore.verify(out)


def test_verify_never_follows_a_link_out_and_hashes_a_file_once(small, tmp_path, monkeypatch):
    out, man = _manifest(small, tmp_path)
    outside = tmp_path / "elsewhere.npy"
    os.replace(out / "X.npy", outside)
    (out / "X.npy").symlink_to(outside)
    rep = mapstore.verify(out)
    assert not rep.ok and any("leads out of the export folder" in c for c in rep.changes)
    # 3,000 entries naming one source file: hashed once
    one = man["sources"][0]
    man["sources"] = [dict(one) for _ in range(3000)]
    (out / "manifest.json").write_text(json.dumps(man))
    import mapstore.select._export as ex

    calls = []
    real = ex.sha256_file
    monkeypatch.setattr(ex, "sha256_file", lambda p: calls.append(p) or real(p))
    mapstore.verify(out)
    assert sum(1 for p in calls if p == one["path"]) == 1


def test_a_rebuild_never_touches_a_store_of_yours(small, tmp_path):
    out, _ = _manifest(small, tmp_path)
    before = _tree(small["store"])
    with pytest.raises(ExportError, match="never changes one of yours"):
        mapstore.rebuild(out, [small["src"]], tmp_path / "again", store=small["store"])
    with pytest.raises(OutputPlaceError, match="inside the store"):
        mapstore.rebuild(out, [small["src"]], tmp_path / "again", store=small["store"] / "sub")
    other = tmp_path / "other-store"
    mapstore.index([small["ds"]], other, progress=False, jobs=1)
    with pytest.raises(ExportError, match="never changes one of yours"):
        mapstore.rebuild(out, [small["src"]], tmp_path / "again", store=other)
    notes = tmp_path / "notes"
    notes.mkdir()
    (notes / "a.txt").write_text("mine")
    with pytest.raises(ExportError, match="never changes one of yours"):
        mapstore.rebuild(out, [small["src"]], tmp_path / "again", store=notes)
    with pytest.raises(OutputPlaceError):
        mapstore.rebuild(out, [small["src"]], small["ds"] / "again")
    assert _tree(small["store"]) == before


def test_a_rebuild_of_an_export_on_a_custom_grid(tmp_path):
    ds = make_derivative(tmp_path / "src" / "gamma", "gamma")
    noise_maps(ds, range(1, 5), seed=3)
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False, jobs=1)
    aff = np.diag([6.0, 6.0, 6.0, 1.0])
    aff[:3, 3] = [-78, -112, -70]
    mapstore.build_features(store, grid={"shape": [27, 32, 27], "affine": aff.tolist()}, progress=False, jobs=1)
    st = mapstore.open(store)
    out = Path(st.export(tmp_path / "exp", st.select(stat=["t"], group_by="subject")).out)
    rep = mapstore.rebuild(out, [tmp_path / "src"], tmp_path / "again", store=tmp_path / "s2")
    assert rep.ok, rep.summary()


def test_crafted_pooled_records_are_refused_or_reported(small, tmp_path):
    from mapstore.analyses import pool, verify_pooled, write_pooled

    st = mapstore.open(small["store"])
    out = tmp_path / "pooled"
    write_pooled(pool(st.select(stat=["t"], group_by="study", missing="keep"), min_subjects=2), out)
    good = json.loads((out / "pooled.json").read_text())
    for crafted in ({**good, "file_sha256": [1, 2]}, {**good, "sources": "x"}, [1],
                    {**good, "x": json.loads("[" * 40 + "]" * 40)}):
        (out / "pooled.json").write_text(json.dumps(crafted))
        with pytest.raises(MapstoreError) as err:
            verify_pooled(out)
        assert "\n" not in str(err.value) and "pooled.json" in str(err.value)
    (out / "pooled.json").write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(MapstoreError):
        verify_pooled(out)
    # an output file that is a link out of the folder is not the folder's
    outside = tmp_path / "elsewhere.tsv"
    os.replace(out / "peaks.tsv", outside)
    (out / "peaks.tsv").symlink_to(outside)
    (out / "pooled.json").write_text(json.dumps(good))
    assert any("leads out of the folder" in c for c in verify_pooled(out))
