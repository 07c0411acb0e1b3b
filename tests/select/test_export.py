"""Selections from a labelled store, export round trips, manifest and verify."""

from __future__ import annotations

import json
import shutil

import jsonschema
import numpy as np
import pyarrow.parquet as pq
import pytest

import mapstore
from mapstore.cli import main
from mapstore.errors import ExportError, LeakageError, QueryError
from mapstore.schemas import all_schemas


@pytest.fixture(scope="module")
def labelled_store(demo_store, demo_tree, tmp_path_factory):
    store = tmp_path_factory.mktemp("lab") / "store"
    shutil.copytree(demo_store, store)
    mapstore.build_features(store, jobs=2, progress=False)
    mapstore.label(store, demo_tree / "concepts.json")
    return store


def test_default_target_is_contrast_and_works_without_labels(demo_store, tmp_path):
    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    mapstore.build_features(store, grid="MNI152-3mm", name="three", jobs=2, progress=False)
    sel = mapstore.open(store).select(features="three", stat=["t"])
    assert set(sel.y) == set(sel.meta.contrast) and len(sel) == (sel.meta.stat == "t").sum()


def test_select_where_targets_groups(labelled_store):
    st = mapstore.open(labelled_store)
    sel = st.select("stat = 't' AND age >= 30", concepts=["reading", "listening"], y_from="concept")
    everyone = st.select("stat = 't'", concepts=["reading", "listening"], y_from="concept")
    assert set(sel.y) == {"reading", "listening"}
    assert 0 < len(sel) < len(everyone) and (sel.meta.age >= 30).all()  # the participants' column filters
    assert (sel.meta.stat == "t").all()
    assert sel.X.shape == (len(sel), len(sel.voxels)) and np.isfinite(sel.X).all()
    multi = st.select(concepts=["reading", "listening", "visual-motion"], y_from="concepts")
    assert multi.Y.shape == (len(multi), 3) and multi.concepts == ["listening", "reading", "visual-motion"]
    assert (multi.Y.sum(axis=1) >= 1).all()
    broad = st.select(concepts=["perception"], with_broader=True, y_from="concepts")
    assert "perception" in broad.concepts and broad.Y[:, broad.concepts.index("perception")].all()
    by_sql = st.select("list_contains(concepts, 'reading') AND stat = 't'")
    assert len(by_sql) == len(st.select(concepts=["reading"], stat=["t"]))
    subj = st.select(group_by="subject")
    # subjects are study-qualified: sub-01 of two studies are two groups
    assert len(set(subj.groups)) == subj.meta.participant.nunique() > subj.meta["sub"].nunique()


def test_coverage_threshold_reports_dropped(labelled_store):
    st = mapstore.open(labelled_store)
    sel = st.select(min_coverage=0.9)
    assert sel.dropped and list(sel.dropped.values())[0] > 0
    assert (sel.meta.coverage >= 0.9).all()


def test_concept_target_refuses_overlaps(labelled_store):
    st = mapstore.open(labelled_store)
    with pytest.raises(QueryError, match="exactly one concept"):
        st.select(concepts=["perception", "listening"], with_broader=True, y_from="concept")
    with pytest.raises(QueryError, match="label no map"):
        st.select(concepts=["juggling"])


def test_splits_plug_into_scikit_learn(labelled_store):
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import cross_val_score

    st = mapstore.open(labelled_store)
    sel = st.select(concepts=["reading", "hand-movement"], y_from="concept", stat=["t", "z"])
    X = np.nan_to_num(sel.X[:, ::50])
    scores = cross_val_score(LogisticRegression(max_iter=200), X, sel.y, cv=sel.splits("group-kfold:2"))
    assert len(scores) == 2


def test_export_round_trip_and_verify(labelled_store, tmp_path):
    st = mapstore.open(labelled_store)
    sel = st.select(concepts=["reading", "listening", "arithmetic"], y_from="concept")
    out = tmp_path / "exp"
    rep = st.export(out, sel, scheme="leave-one-group-out", seed=3)
    assert rep.n_maps == len(sel) and rep.n_splits == sel.meta.study.nunique()
    X = np.load(out / "X.npy", mmap_mode="r")
    np.testing.assert_array_equal(X, st.features().matrix(sel.map_ids)[:, sel.voxels])
    cols = np.load(out / "voxels.npy")
    np.testing.assert_array_equal(cols, st.features().mask_indices[sel.voxels])
    meta = pq.read_table(out / "meta.parquet").to_pandas()
    assert list(meta.map_id) == sel.map_ids
    assert list(np.load(out / "y.npy")) == list(sel.y) and list(np.load(out / "groups.npy")) == list(sel.groups)
    # fold = index of the held-out study
    for f, part in meta.groupby("fold"):
        assert part.study.nunique() == 1
    man = json.loads((out / "manifest.json").read_text())
    jsonschema.validate(man, all_schemas()["export-manifest.schema.json"])
    assert man["seed"] == 3 and man["vocabulary"]["sha256"] and len(man["sources"]) == len(sel)
    assert man["feature_settings"]["mask"]["sha256"] and man["feature_settings"]["grid_id"]
    assert mapstore.verify(out).ok
    # a manifest of the earlier form (the label kind as 'target', the set as 'feature_set') still reads
    old = {k: v for k, v in man.items() if k not in ("y_from", "feature_settings")}
    old["target"] = man["y_from"]
    old["feature_set"] = {k: man["feature_settings"][k] for k in ("name", "spec_id", "grid", "grid_id", "mask")}
    (out / "manifest.json").write_text(json.dumps(old))
    _, read = mapstore.select.read_manifest(out)
    assert read.y_from == man["y_from"] and read.set_spec_id == man["feature_settings"]["spec_id"]
    assert mapstore.verify(out).ok
    (out / "manifest.json").write_text(json.dumps(man))

    # a modified source file is caught
    src = man["sources"][0]["path"]
    data = bytearray(open(src, "rb").read())
    data[-1] ^= 0xFF
    backup = open(src, "rb").read()
    open(src, "wb").write(bytes(data))
    try:
        rep = mapstore.verify(out / "manifest.json")
        assert not rep.ok and any("source changed" in c and src in c for c in rep.changes)
    finally:
        open(src, "wb").write(backup)
    assert mapstore.verify(out).ok

    # a modified store row is caught
    fs = st.features()
    row = fs.rows.to_pylist()[fs.map_ids.index(man["sources"][1]["map_id"])]
    shard = np.load(fs.path / "shards" / row["shard"], mmap_mode="r+")
    keep = shard[row["row"]].copy()
    shard[row["row"], 0] = 123.0
    shard.flush()
    try:
        rep = mapstore.verify(out)
        assert any(c.startswith("store row changed") and man["sources"][1]["map_id"] in c for c in rep.changes)
    finally:
        shard[row["row"]] = keep
        shard.flush()
    # and the CLI exits 1 on a change, 0 when all matches
    assert main(["verify", str(out)]) == 0


def test_export_refuses_to_overwrite_and_parquet_format(labelled_store, tmp_path):
    st = mapstore.open(labelled_store)
    sel = st.select(stat=["z"])
    out = tmp_path / "p"
    # each study's own contrast names: a held-out study's are unseen in training, accepted and recorded
    with pytest.warns(UserWarning, match="unseen test classes"):
        st.export(out, sel, scheme="holdout:0.3", fmt="parquet", allow_unseen=True)
    assert json.loads((out / "manifest.json").read_text())["unseen"]
    t = pq.read_table(out / "table.parquet")
    assert t.num_rows == len(sel) and set(t.column("y").to_pylist()) == set(sel.y)
    x0 = np.asarray(t.column("X")[0].values)  # named as X.npy and the Zarr array
    np.testing.assert_array_equal(x0, st.features().matrix(sel.map_ids[:1])[0][sel.voxels])
    assert set(t.column("split").to_pylist()) == {"train", "test"}
    assert mapstore.verify(out).ok
    # a multi-label target keeps its indicator matrix in the parquet layout too
    multi = st.select(concepts=["reading", "listening", "visual-motion"], y_from="concepts")
    st.export(tmp_path / "pm", multi, fmt="parquet")
    tm = pq.read_table(tmp_path / "pm" / "table.parquet")
    np.testing.assert_array_equal(np.array(tm.column("Y").to_pylist(), dtype=np.uint8), multi.Y)
    assert json.loads((tmp_path / "pm" / "concepts.json").read_text()) == multi.concepts
    with pytest.raises(ExportError, match="not empty"):
        st.export(out, sel)
    root = st.sql("SELECT root FROM datasets LIMIT 1")["root"][0].as_py()
    with pytest.raises(ExportError, match="source dataset"):
        st.export(f"{root}/derivatives/export", sel)


def test_export_cli(labelled_store, tmp_path):
    out = tmp_path / "cli"
    rc = main(["export", "--store", str(labelled_store), "--out", str(out), "--concept", "reading",
               "--concept", "listening", "--group-by", "site", "--scheme", "group-kfold:2"])
    assert rc == 0 and (out / "manifest.json").exists()
    assert main(["export", "--store", str(labelled_store), "--out", str(tmp_path / "x"),
                 "--scheme", "bogus"]) == 2


def test_origins_mapping_one_person_in_two_studies_is_a_leak(demo_tree, tmp_path):
    import yaml

    origins = tmp_path / "origins.yaml"
    origins.write_text(yaml.safe_dump({"datasets": {"emberlight": {"lab": "Fernhill Lab"}},
                                       "subjects": {"inkwell/sub-01": {"participant": "glowtrack/sub-02"}}}))
    store = tmp_path / "store"
    mapstore.index([demo_tree], store, rules=demo_tree / "name-rules.json", origins=origins, progress=False)
    mapstore.build_features(store, grid="MNI152-3mm", jobs=2, progress=False)
    st = mapstore.open(store)
    sel = st.select(features=st.feature_sets()[0], group_by="study")
    with pytest.raises(LeakageError, match="glowtrack/sub-02"):
        sel.splits("leave-one-group-out")
    with pytest.warns(UserWarning):
        rep = st.export(tmp_path / "out", sel, allow_leak=True, allow_unseen=True)
    assert rep.leaks and json.loads((tmp_path / "out" / "manifest.json").read_text())["allow_leak"]


def test_missing_policies_against_numpy(labelled_store):
    st = mapstore.open(labelled_store)
    full = st.features().matrix(st.select(concepts=["reading", "listening"], y_from="concept",
                                          missing="keep").map_ids)
    assert np.isnan(full).any()  # the demo has partial fields of view
    common = st.select(concepts=["reading", "listening"], y_from="concept")
    # reference: numpy on the same rows
    want = np.flatnonzero(np.isfinite(full).all(axis=0))
    np.testing.assert_array_equal(common.voxels, want)
    np.testing.assert_array_equal(common.X, full[:, want])
    rep = common.missing_report
    assert rep == {"policy": "common", "mask_voxels": full.shape[1], "kept_voxels": want.size,
                   "dropped_voxels": full.shape[1] - want.size,
                   "reason": "voxels without a value in at least one selected map were dropped"}
    zero = st.select(concepts=["reading", "listening"], y_from="concept", missing="zero")
    np.testing.assert_array_equal(zero.X, np.nan_to_num(full))
    keep = st.select(concepts=["reading", "listening"], y_from="concept", missing="keep")
    np.testing.assert_array_equal(np.isnan(keep.X), np.isnan(full))
    # a row (or decoder weights) goes back onto the grid: values at their voxels, NaN elsewhere
    img = common.to_image(common.X[0])
    fs = st.features()
    vol = np.asarray(img.dataobj).reshape(-1)
    np.testing.assert_array_equal(vol[fs.mask_indices[want]], common.X[0])
    assert np.isnan(np.delete(vol, fs.mask_indices[want])).all()
    np.testing.assert_array_equal(img.affine, fs.target.affine_array)
    with pytest.raises(mapstore.MapstoreError, match="missing must be one of"):
        st.select(missing="impute")


def test_too_few_common_voxels_is_refused_naming_the_maps(labelled_store):
    st = mapstore.open(labelled_store)
    sel = st.select(concepts=["reading", "listening"], y_from="concept", min_voxels=10 ** 6)
    with pytest.raises(QueryError) as err:
        sel.X
    msg = str(err.value)
    worst = sel.meta.sort_values("coverage").iloc[0]
    assert msg.startswith(f"only {len(np.flatnonzero(np.isfinite(st.features().matrix(sel.map_ids)).all(0))):,} of "
                          f"the feature set's {st.features().n_voxels:,} voxels have a value in every one of the "
                          f"{len(sel)} selected maps (need 1,000,000); the maps covering least: "
                          f"{worst.dataset}:{worst.relpath} ({worst.coverage:.0%})")
    assert msg.endswith("or missing='keep' with an imputer in your pipeline")


def test_export_records_the_policy_and_verify_catches_changed_rows(labelled_store, tmp_path):
    st = mapstore.open(labelled_store)
    multi = st.select(concepts=["reading", "listening", "visual-motion"], y_from="concepts")
    for fmt in ("npy", "parquet"):
        out = tmp_path / fmt
        rep = st.export(out, multi, fmt=fmt)
        man = json.loads((out / "manifest.json").read_text())
        assert man["missing"]["policy"] == "common" and man["missing"]["kept_voxels"] == len(multi.voxels)
        assert man["shape"] == [len(multi), len(multi.voxels)] and rep.n_features == len(multi.voxels)
        assert "mask voxels dropped" in rep.summary()
        assert mapstore.verify(out).ok
        if fmt == "npy":
            np.testing.assert_array_equal(np.load(out / "Y.npy"), multi.Y)
            X = np.load(out / "X.npy", mmap_mode="r+")
            X[2, 5] += 1.0
            X.flush()
            del X
        else:
            t = pq.read_table(out / "table.parquet")
            np.testing.assert_array_equal(np.array(t.column("Y").to_pylist(), dtype=np.uint8), multi.Y)
            x = np.array(t.column("X").to_pylist(), dtype=np.float32)
            x[2, 5] += 1.0
            import pyarrow as pa

            flat = pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1), pa.float32()), x.shape[1])
            pq.write_table(t.set_column(t.column_names.index("X"), "X", flat), out / "table.parquet")
        changes = mapstore.verify(out).changes
        assert changes == [f"exported row changed: {'X.npy' if fmt == 'npy' else 'table.parquet'} row 2"
                           + (f" ({multi.map_ids[2]})" if fmt == "npy" else "")]
