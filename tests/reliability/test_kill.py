"""Kill at any point: SIGKILL index, features, labels and export at >= 10 points each, reopen, resume.

A test hook (``MAPSTORE_TEST_KILL_COUNTER`` / ``MAPSTORE_TEST_KILL_AFTER``, see
``mapstore.store.checkpoint``) kills the process at the N-th checkpoint: before and after every
atomic write and rename, and after every shard or export block.  After each kill the store must
open (or be absent), and a resumed run must give what an uninterrupted run gives.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys

import numpy as np
import pytest

import mapstore
from mapstore.errors import StoreNotFound

from ..conftest import make_derivative, noise_maps, write_json

pytestmark = pytest.mark.slow  # CI runs it; pytest -m 'not slow' skips it

EXPORT_FILES = ("X.npy", "y.npy", "groups.npy", "voxels.npy", "meta.parquet")


def _cli(args, tmp, kill_after=None):
    env = dict(os.environ)
    env.pop("MAPSTORE_TEST_KILL_COUNTER", None)
    counter = tmp / "counter"
    if kill_after is not None:
        counter.unlink(missing_ok=True)
        env["MAPSTORE_TEST_KILL_COUNTER"] = str(counter)
        env["MAPSTORE_TEST_KILL_AFTER"] = str(kill_after)
    out = subprocess.run([sys.executable, "-m", "mapstore.cli", *args], env=env, capture_output=True, text=True,
                         timeout=300)
    steps = counter.stat().st_size if counter.exists() else 0
    return out, steps


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("kill")
    ds = make_derivative(tmp / "src" / "alpha", name="alpha")
    write_json(ds / "task-go_statmap.json", {"DegreesOfFreedom": 25})
    noise_maps(ds, range(6), tasks=("stop", "go"), seed=3)
    vocab = write_json(tmp / "v.json", {"vocabulary": "v", "version": "1", "concepts": {"go": {}, "stop": {}},
                                        "rules": [{"task": "go", "concepts": ["go"]},
                                                  {"task": "stop", "concepts": ["stop"]}]})
    return {"tmp": tmp, "ds": ds, "vocab": vocab, "tree": _tree(tmp / "src")}


def _tree(root):
    """Every path under ``root`` with its bytes and mtime: a write into a source changes it."""
    return {str(p.relative_to(root)): (p.read_bytes() if p.is_file() else None, p.lstat().st_mtime_ns)
            for p in sorted(root.rglob("*"))}


def _stage_args(stage, w, store, out=None):
    return {"index": ["index", str(w["ds"]), "--store", str(store), "--jobs", "1"],
            "features": ["features", "--store", str(store), "--grid", "MNI152-3mm", "--jobs", "1"],
            "labels": ["labels", "--store", str(store), "--vocab", str(w["vocab"])],
            "export": ["export", "--store", str(store), "--out", str(out), "--concept", "go", "--concept", "stop",
                       "--group-by", "subject", "--scheme", "stratified-group-kfold:2", "--overwrite"]}[stage]


def _base(stage, w, dest):
    """A store with every stage before ``stage`` done (empty for index)."""
    order = ["index", "features", "labels", "export"]
    if stage == "index":
        return
    for prev in order[:order.index(stage)]:
        out, _ = _cli(_stage_args(prev, w, dest), w["tmp"])
        assert out.returncode == 0, out.stderr


def _state(stage, store, out):
    if stage == "export":
        return {f: (out / f).read_bytes() for f in EXPORT_FILES}
    st = mapstore.open(store)
    try:
        state = {"maps": st.sql("SELECT * EXCLUDE (map_id) FROM maps ORDER BY dataset, relpath").to_pylist()}
        if stage in ("features", "labels"):
            fs = st.features()
            state["rows"] = st.sql("SELECT map_id, feature_key, row_sha256, coverage FROM features "
                                   "ORDER BY map_id").to_pylist()
            state["X"] = fs.matrix(fs.map_ids).tobytes()
        if stage == "labels":
            state["labels"] = st.sql("SELECT map_id, concept, direct FROM labels ORDER BY ALL").to_pylist()
        return state
    finally:
        st.close()


def _consistent(store):
    """The store opens and answers, or holds nothing yet."""
    try:
        st = mapstore.open(store)
    except StoreNotFound:
        return
    st.sql("SELECT count(*) FROM maps")
    for name in st.feature_sets():
        fs = st.features(name)
        fs.matrix(fs.map_ids)
    st.sql("SELECT count(*) FROM labels")
    st.close()


@pytest.mark.parametrize("stage", ["index", "features", "labels", "export"])
def test_kill_at_any_point_then_resume(world, stage):
    w = world
    ref = w["tmp"] / f"ref-{stage}"
    _base(stage, w, ref / "base")  # the stages before this one, done once
    if (ref / "base").exists():
        shutil.copytree(ref / "base", ref / "store")
    out, total = _cli(_stage_args(stage, w, ref / "store", ref / "out"), w["tmp"], kill_after=0)
    assert out.returncode == 0, out.stderr
    want = _state(stage, ref / "store", ref / "out")
    points = sorted({int(k) for k in np.linspace(1, total, min(total, 10))})
    assert len(points) >= 10, (stage, total)
    killed = 0
    for n in points:
        run = w["tmp"] / f"{stage}-{n}"
        if (ref / "base").exists():
            shutil.copytree(ref / "base", run / "store")
        out, _ = _cli(_stage_args(stage, w, run / "store", run / "out"), w["tmp"], kill_after=n)
        assert out.returncode in (-signal.SIGKILL, 0), out.stderr
        killed += out.returncode == -signal.SIGKILL
        _consistent(run / "store")
        out, _ = _cli(_stage_args(stage, w, run / "store", run / "out"), w["tmp"])  # resume
        assert out.returncode == 0, (n, out.stderr)
        assert _state(stage, run / "store", run / "out") == want, (stage, n)
        shutil.rmtree(run)
    assert killed >= 10
    assert _tree(w["tmp"] / "src") == w["tree"]  # nothing written into the source dataset
