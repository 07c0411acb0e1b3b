"""The field's cross-study analyses on pooled maps: safe split defaults, multitask splits, participant
targets and groups.

References: scikit-learn's own splitters (``GroupKFold``, ``StratifiedGroupKFold``) for the fold
assignments; pandas' reading of the demo's participants.tsv files and ``json`` of its sidecars for
targets and groups.  The data are the demo's invented consortium.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import mapstore
from mapstore.errors import LeakageError, ParameterError, UnseenClassError


@pytest.fixture(scope="module")
def store(demo_store, demo_tree, tmp_path_factory):
    path = tmp_path_factory.mktemp("flows") / "store"
    shutil.copytree(demo_store, path)
    mapstore.build_features(path, grid="MNI152-3mm", name="default", jobs=2, progress=False)
    mapstore.label(path, demo_tree / "concepts.json")
    return mapstore.open(path)


def test_the_default_split_that_cannot_score_is_refused_naming_the_classes(store, tmp_path):
    # each study names its own contrasts: leave-one-study-out never trains on a test class
    sel = store.select(stat=["t"])
    with pytest.raises(UnseenClassError, match="class\\(es\\) in test that training never saw") as err:
        sel.splits()
    assert "y_from='concept'" in str(err.value) and "allow_unseen=True" in str(err.value)
    with pytest.raises(UnseenClassError):
        store.export(tmp_path / "x", sel)
    assert not (tmp_path / "x").exists()
    # concepts the studies share: no fold has an unseen class
    ok = store.select(concepts=["hand-movement", "listening"], y_from="concept", stat=["t", "z"])
    assert len(ok.splits()) == ok.meta["study"].nunique()
    # a multi-label target: a concept only one study has is unseen when that study is held out
    multi = store.select(y_from="concepts", stat=["t"])
    only = [c for c in multi.concepts
            if multi.meta.loc[multi.Y[:, multi.concepts.index(c)] == 1, "study"].nunique() == 1]
    if only:
        with pytest.raises(UnseenClassError, match=only[0]):
            multi.splits()


def test_within_study_folds_equal_group_kfold_run_in_each_study(store):
    sel = store.select(stat=["t"], y_from="study-contrast", group_by="subject")
    splits = sel.splits("within-study-group-kfold:2")  # each study's own names: seen in every fold
    from sklearn.model_selection import GroupKFold

    assert len(splits) == 2
    for study in sel.meta["study"].unique():
        idx = np.flatnonzero(sel.studies == study)
        ref = [te for _, te in GroupKFold(2).split(np.zeros((len(idx), 1)), groups=sel.groups[idx])]
        for (_, te), want in zip(splits, ref):
            np.testing.assert_array_equal(np.intersect1d(te, idx), idx[want])
    assert all(set(sel.studies[te]) == set(sel.studies) for _, te in splits)  # every study in every test side
    assert all(y.split("/")[0] in set(sel.studies) for y in sel.y)


def test_stratified_group_kfold_equals_scikit_learn(store):
    from sklearn.model_selection import StratifiedGroupKFold

    sel = store.select(concepts=["hand-movement", "listening", "reading"], y_from="concept", group_by="subject",
                       stat=["t", "z"])
    got = sel.splits("stratified-group-kfold:3", seed=4)
    ref = StratifiedGroupKFold(3, shuffle=True, random_state=4).split(np.zeros((len(sel), 1)), sel.y.astype(str),
                                                                      sel.groups)
    for (tr, te), (rtr, rte) in zip(got, ref):
        np.testing.assert_array_equal(te, rte)
        np.testing.assert_array_equal(tr, rtr)


def test_any_folds_are_checked_against_the_stores_rules(store):
    from sklearn.model_selection import GroupKFold, KFold

    sel = store.select(concepts=["hand-movement", "listening"], y_from="concept", stat=["t", "z"],
                       group_by="subject")
    # scikit-learn's plain KFold ignores subjects: a subject lands on both sides
    with pytest.raises(LeakageError, match="subject"):
        mapstore.check_folds(sel, KFold(4, shuffle=True, random_state=0))
    got = mapstore.check_folds(sel, GroupKFold(4))  # grouped by subject: clean
    assert got == {"leaks": [], "unseen": []}
    with pytest.raises(ParameterError, match="outside"):
        mapstore.check_folds(sel, [(np.array([0, 1]), np.array([len(sel)]))])


def test_a_numeric_participant_target_stays_numeric(store, demo_tree, tmp_path):
    sel = store.select(y_from="age", stat=["t"], group_by="site")
    assert sel.y.dtype == np.float64
    # reference: pandas' reading of each study's participants.tsv
    ages = {}
    for d in store.sql("SELECT dataset, participants_file FROM datasets").to_pylist():
        t = pd.read_csv(d["participants_file"], sep="\t", dtype={"participant_id": str})
        ages.update({(d["dataset"], p.removeprefix("sub-")): float(a) for p, a in zip(t.participant_id, t.age)})
    want = [ages[(d, s)] for d, s in zip(sel.meta["dataset"], sel.meta["sub"])]
    np.testing.assert_array_equal(sel.y, want)
    sel.splits()  # a regression target has no classes to be unseen
    out = store.export(tmp_path / "age", sel).out
    y = np.load(f"{out}/y.npy")
    assert y.dtype == np.float64 and np.array_equal(y, sel.y)


def test_group_by_any_column_or_sidecar_field(store, demo_tree):
    sel = store.select(stat=["t"], y_from="concepts", group_by="metadata:InstitutionName")
    want = [json.loads(m).get("InstitutionName") for m in sel.meta["metadata"]]
    assert list(sel.groups) == want
    by_sex = store.select(stat=["t"], y_from="concepts", group_by="sex")  # a participants column
    assert set(by_sex.groups) <= {"F", "M"}
    with pytest.raises(ParameterError, match="not a unit"):
        store.select(stat=["t"], group_by="no_such_column")


def test_selections_share_one_column_set(store):
    a = store.select(stat=["t"], where="study = 'inkwell'", y_from="concepts")
    b = store.select(stat=["t"], where="study = 'emberlight'", y_from="concepts")
    a2, b2 = mapstore.align_columns(a, b)
    assert a2.X.shape[1] == b2.X.shape[1]
    cols = np.intersect1d(a.voxels, b.voxels)
    np.testing.assert_array_equal(a2.X, store.features().matrix(a.map_ids)[:, cols])
    assert np.isfinite(b2.X).all()


def test_no_subject_or_contrast_counts_twice_unless_asked(store):
    every = store.select(stat=["t", "z", "effect"], y_from="concepts", per_subject="map", one_stat=False)
    sel = store.select(stat=["t", "z", "effect"], y_from="concepts")
    m = every.meta
    # reference, by hand with pandas: per subject, task and contrast the subject-level map (no ses/run),
    # else the first session and run; among those, the first stat of z, t, effect
    order = {"z": 0, "t": 1, "effect": 2}
    ref = (m.assign(_r=m["stat"].map(order), _l=m["ses"].notna().astype(int) + m["run"].notna().astype(int),
                    _s=m["ses"].fillna(""), _u=m["run"].fillna(""))
           .sort_values(["participant", "task", "contrast", "_l", "_s", "_u", "_r", "map_id"])
           .groupby(["participant", "task", "contrast"], dropna=False).head(1))
    assert sorted(sel.map_ids) == sorted(ref["map_id"])
    assert sum(sel.dropped.values()) - sel.dropped.get("no feature row", 0) == len(every) - len(sel)
    assert not sel.meta.duplicated(["participant", "task", "contrast"]).any()
    one = store.select(stat=["t", "z"], y_from="age", per_subject="one")
    assert one.meta["participant"].is_unique and len(one) == every.meta["participant"].nunique()


def test_sample_weights_give_each_study_the_same_total(store):
    sel = store.select(concepts=["hand-movement", "listening"], y_from="concept")
    w = sel.weights("study")
    totals = pd.Series(w).groupby(sel.meta["study"].to_numpy()).sum()
    np.testing.assert_allclose(totals.to_numpy(), len(sel) / sel.meta["study"].nunique())
    assert np.isclose(w.sum(), len(sel))


def test_participant_columns_go_out_only_when_named(store, tmp_path):
    import pyarrow.parquet as pq

    sel = store.select(y_from="age", stat=["t"], group_by="site", per_subject="one")
    plain = store.export(tmp_path / "plain", sel).out
    meta = pq.read_table(f"{plain}/meta.parquet").to_pandas()
    assert "age" not in meta.columns and "sex" not in meta.columns
    np.testing.assert_array_equal(meta["y"].to_numpy(), sel.y)  # y beside the other columns
    man = json.loads(open(f"{plain}/manifest.json").read())
    assert man["personal_data"]["columns"] == []
    named = store.export(tmp_path / "named", sel, participant_columns=["sex"]).out
    meta = pq.read_table(f"{named}/meta.parquet").to_pandas()
    assert list(meta["sex"]) == list(sel.meta["sex"])
    man = json.loads(open(f"{named}/manifest.json").read())
    assert man["personal_data"]["columns"] == ["sex"] and "personal data" in man["personal_data"]["note"]
    with pytest.raises(ParameterError, match="not in participants.tsv"):
        store.export(tmp_path / "bad", sel, participant_columns=["height"])


def test_a_new_map_goes_through_the_sets_rules_exactly(store, tmp_path):
    import nibabel as nib

    fs = store.features("default")
    r = store.sql("SELECT m.map_id, d.root || '/' || m.relpath AS path, m.model_mask, d.root AS root, m.dof "
                  "FROM maps m JOIN datasets d USING (dataset) JOIN features f ON f.map_id = m.map_id "
                  "AND f.feature_set = 'default' WHERE m.stat = 't' ORDER BY m.map_id LIMIT 1").to_pylist()[0]
    mask = f"{r['root']}/{r['model_mask']}" if r["model_mask"] else None
    got = fs.transform(r["path"], "t", mask_img=mask)
    np.testing.assert_array_equal(got, fs.matrix([r["map_id"]])[0])  # the stored row, bit for bit
    got = fs.transform(nib.load(r["path"]), "t", mask_img=mask)  # an image in memory
    np.testing.assert_array_equal(got, fs.matrix([r["map_id"]])[0])
    # a z set converts the new map as it converted the stored one (t with its DOF)
    mapstore.build_features(store.path, "z3", grid="MNI152-3mm", stat="z", where=f"m.map_id = '{r['map_id']}'",
                            jobs=1, progress=False)
    zs = mapstore.open(store.path).features("z3")
    np.testing.assert_array_equal(zs.transform(r["path"], "t", dof=r["dof"], mask_img=mask),
                                  zs.matrix([r["map_id"]])[0])
    with pytest.raises(mapstore.MapstoreError, match="say the map's stat"):
        zs.transform(r["path"])
    # on a selection's columns, equal to its row of X: a decoder fitted on X predicts it
    sel = store.select(stat=["t"], y_from="concepts", where=f"map_id = '{r['map_id']}'")
    np.testing.assert_array_equal(sel.transform(r["path"], "t", mask_img=mask), sel.X[0])


def _brute_force(fs, v, exclude=None):
    """NaN-aware Pearson correlation of ``v`` with every row, by numpy's corrcoef (reference)."""
    out = []
    for m, row in zip(fs.map_ids, fs.matrix()):
        if m == exclude:
            continue
        both = np.isfinite(v) & np.isfinite(row)
        if both.sum() >= 10:
            out.append((m, float(np.corrcoef(v[both], row[both])[0, 1])))
    return out


def test_similar_maps_equal_a_brute_force_ranking(store, tmp_path, capsys):
    fs = store.features("default")
    query = fs.map_ids[3]
    got = store.similar(query, k=5)
    ref = sorted(_brute_force(fs, fs.matrix([query])[0], exclude=query), key=lambda t: -t[1])[:5]
    assert list(got["map_id"]) == [m for m, _ in ref]
    np.testing.assert_allclose(got["r"], [r for _, r in ref], atol=1e-5)
    assert {"study", "contrast", "concepts", "coverage"} <= set(got.columns)
    # a new map (a file) ranked with its sign ignored: a sign-flipped copy of a stored map comes first
    import nibabel as nib

    path = store.sql(f"SELECT d.root || '/' || m.relpath AS p FROM maps m JOIN datasets d USING (dataset) "
                     f"WHERE m.map_id = '{query}'")["p"][0].as_py()
    img = nib.load(path)
    flipped = nib.Nifti1Image(-np.asanyarray(img.dataobj, dtype=np.float32), img.affine)
    top = store.similar(flipped, k=3, absolute=True)
    assert top["map_id"].iloc[0] == query and top["r"].iloc[0] < -0.999
    from mapstore.cli import main

    assert main(["similar", "--store", str(store.path), query, "-k", "3", "--format", "csv"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert len(lines) == 4 and lines[1].startswith(f'"{ref[0][0]}"')


def test_encoding_scores_equal_scikit_learn_per_voxel(store):
    from sklearn.linear_model import RidgeCV
    from sklearn.metrics import r2_score

    from mapstore.analyses import concept_descriptors, encoding_scores

    sel = store.select(concepts=["hand-movement", "listening", "reading", "visual-motion"], y_from="concepts",
                       stat=["t", "z"])
    got = encoding_scores(sel)
    # reference: a RidgeCV fitted on each training side by hand, scored by scikit-learn's r2_score
    D, names = concept_descriptors(sel)
    X = sel.X.astype(np.float64)
    P = np.zeros_like(X)
    for tr, te in sel.splits():
        P[te] = RidgeCV(alphas=np.logspace(-2, 4, 13)).fit(D[tr], X[tr]).predict(D[te])
    np.testing.assert_allclose(got.predictions, P, rtol=1e-4, atol=1e-4)
    np.testing.assert_allclose(got.r2, r2_score(X, P, multioutput="raw_values"), rtol=1e-3, atol=1e-4)
    j = int(np.nanargmax(got.r2))
    assert abs(got.r[j] - np.corrcoef(X[:, j], P[:, j])[0, 1]) < 1e-4
    assert names == got.descriptors and got.to_image("r2").shape == store.features().target.shape
    # descriptors from a table keyed by contrast (one invented stimulus feature per contrast)
    import pandas as pd

    table = pd.DataFrame({"contrast": sorted(sel.meta["contrast"].unique())})
    table["loudness"] = np.arange(len(table), dtype=float)
    by_table = encoding_scores(sel, table)
    assert by_table.descriptors == ["loudness"] and by_table.r2.shape == got.r2.shape


def test_repeated_group_kfold_equals_scikit_learn_shuffled_runs(store):
    from sklearn.model_selection import GroupKFold

    sel = store.select(concepts=["hand-movement", "listening"], y_from="concept", group_by="subject")
    got = sel.splits("repeated-group-kfold:3:2", seed=7)
    ref = [te for rep in range(2) for _, te in GroupKFold(3, shuffle=True, random_state=7 + rep).split(
        np.zeros((len(sel), 1)), groups=sel.groups)]
    assert len(got) == 6
    for (_, te), want in zip(got, ref):
        np.testing.assert_array_equal(te, want)


def test_x_streams_in_bounded_memory_and_equals_every_other_route(store, tmp_path):
    import tracemalloc

    sel = store.select(concepts=["hand-movement", "listening", "reading"], y_from="concept")
    assert len(sel.voxels) < store.features().n_voxels  # the common policy drops columns here
    full = store.features().matrix(sel.map_ids)[:, sel.voxels]  # reference: the rows, then the columns
    tracemalloc.start()
    X = sel.X
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    np.testing.assert_array_equal(X, full)
    assert peak <= 1.1 * X.nbytes + 64 * store.features().n_voxels * 4 * 2, (peak, X.nbytes)
    blocks = list(sel.blocks(rows=7))
    np.testing.assert_array_equal(np.concatenate([b for _, b, _ in blocks]), X)
    assert [list(i) for i, _, _ in blocks][1] == list(range(7, 14))
    np.testing.assert_array_equal(np.concatenate([y for _, _, y in blocks]), sel.y)
    mm = sel.to_memmap(tmp_path / "X.npy")
    np.testing.assert_array_equal(np.asarray(mm), X)
    lazy = sel.to_dask(chunk_rows=10)
    assert lazy.shape == X.shape and lazy.chunks[0][0] == 10
    np.testing.assert_array_equal(lazy.compute(scheduler="synchronous"), X)


@pytest.mark.slow
def test_x_on_a_distributed_cluster_equals_numpy(store):
    from dask.distributed import Client, LocalCluster

    sel = store.select(concepts=["hand-movement", "listening", "reading"], y_from="concept")
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        mean = client.compute(sel.to_dask(chunk_rows=16).mean(axis=0)).result()
    np.testing.assert_allclose(mean, sel.X.astype(np.float64).mean(axis=0), rtol=1e-5, atol=1e-6)


def test_a_zarr_export_is_read_by_zarr_and_dask_and_verified(store, tmp_path):
    import dask.array as da
    import zarr

    from mapstore.select._export import verify

    sel = store.select(concepts=["hand-movement", "listening", "reading"], y_from="concept")
    out = store.export(tmp_path / "z", sel, fmt="zarr").out
    import xarray as xr

    arr = zarr.open_array(f"{out}/X.zarr", path="X", mode="r")  # zarr itself, no mapstore
    assert arr.metadata.zarr_format == 3 and arr.chunks[1] == arr.shape[1]
    np.testing.assert_array_equal(arr[:], sel.X)
    np.testing.assert_array_equal(da.from_zarr(f"{out}/X.zarr", component="X").compute(), sel.X)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # consolidated metadata: xarray opens it without a warning
        ds = xr.open_zarr(f"{out}/X.zarr")
    assert ds["X"].dims == ("map", "column")
    np.testing.assert_array_equal(ds["X"].values, sel.X)
    # the columns' voxels and the rows' y, group and fold are coordinates of X, not loose arrays
    assert {"voxel", "y", "group", "fold"} <= set(ds["X"].coords)
    np.testing.assert_array_equal(ds["voxel"].values, np.load(f"{out}/voxels.npy"))
    names = np.array(ds["y"].attrs["names"])
    np.testing.assert_array_equal(names[ds["y"].values], np.load(f"{out}/y.npy"))
    np.testing.assert_array_equal(np.array(ds["group"].attrs["names"])[ds["group"].values], np.load(f"{out}/groups.npy"))
    import pyarrow.parquet as pq

    np.testing.assert_array_equal(ds["fold"].values, pq.read_table(f"{out}/meta.parquet")["fold"].to_numpy())
    assert verify(out).ok
    arr = zarr.open_array(f"{out}/X.zarr", path="X", mode="r+")
    arr[3, 5] = arr[3, 5] + 1  # a changed value is found
    rep = verify(out)
    assert not rep.ok and any("X.zarr row 3" in c for c in rep.changes)


def test_parcels_fit_on_a_sample_of_a_memory_mapped_x(store, tmp_path):
    from sklearn.cluster import FeatureAgglomeration

    from mapstore import ParcelReducer

    sel = store.select(concepts=["hand-movement", "listening", "reading"], y_from="concept")
    mm = sel.to_memmap(tmp_path / "X.npy")
    cols = np.arange(0, mm.shape[1], 50)  # a few hundred columns keep Ward clustering quick
    small = np.ascontiguousarray(mm[:, cols])
    np.save(tmp_path / "small.npy", small)
    big = np.load(tmp_path / "small.npy", mmap_mode="r")
    red = ParcelReducer(n_parcels=8, max_rows=20, random_state=3).fit(big)
    rows = np.sort(np.random.default_rng(3).choice(len(big), 20, replace=False))
    np.testing.assert_array_equal(red.fit_sample_, rows)
    # reference: scikit-learn's FeatureAgglomeration on the drawn rows (the no-mask mode's equal)
    ref = FeatureAgglomeration(n_clusters=8).fit(np.asarray(big[rows], dtype=np.float64))
    assert len(set(zip(red.labels_, ref.labels_))) == 8  # the same partition, up to label names
    red._BLOCK = 7  # transform reads a memory-mapped X in blocks: equal to the whole-array answer
    np.testing.assert_allclose(red.transform(big), ref.transform(np.asarray(big, dtype=np.float64)), rtol=1e-10)


def test_an_export_puts_its_columns_back_on_the_brain_without_mapstore(store, tmp_path):
    import nibabel as nib
    import pyarrow.parquet as pq

    sel = store.select(concepts=["hand-movement", "listening"], y_from="concept")
    out = Path(store.export(tmp_path / "e", sel).out)
    X = np.load(out / "X.npy")
    cols = pq.read_table(out / "columns.parquet").to_pandas()
    mask = nib.load(str(out / "mask.nii.gz"))  # nibabel alone: the columns' voxels on the grid
    assert int(np.asarray(mask.dataobj).sum()) == X.shape[1] == len(cols)
    vol = np.full(mask.shape, np.nan, dtype=np.float32)
    vol[cols["i"], cols["j"], cols["k"]] = X[0]
    np.testing.assert_array_equal(vol, np.asarray(sel.to_image(sel.X[0]).dataobj))
    ijk1 = np.c_[cols[["i", "j", "k"]].to_numpy(), np.ones(len(cols))]
    np.testing.assert_allclose((mask.affine @ ijk1.T)[:3].T, cols[["x_mm", "y_mm", "z_mm"]].to_numpy())


def test_notebook_views_are_short_html_tables(store):
    sel = store.select(concepts=["hand-movement", "listening"], y_from="concept")
    for obj in (store, store.features(), sel, store.check(pictures=False)):
        page = obj._repr_html_()
        assert page.startswith("<table><caption>") and len(page) < 20_000, type(obj)
    assert len(repr(sel)) < 300 and "maps of" in repr(sel)


def test_a_manifest_holds_what_a_rebuild_needs(store, tmp_path, demo_tree):
    sel = store.select(concepts=["hand-movement", "listening"], y_from="concept")
    out = Path(store.export(tmp_path / "m", sel).out)
    man = json.loads((out / "manifest.json").read_text())
    assert {"python", "nilearn", "duckdb", "pyarrow", "numpy"} <= set(man["versions"])
    fs = man["feature_settings"]
    assert {"background", "p_sided", "zero_as_missing", "method", "stat", "kinds"} <= set(fs)
    vocab = json.loads((demo_tree / "concepts.json").read_text())
    assert set(man["vocabulary_content"]["concepts"]) == set(vocab["concepts"])
    assert set(man["datasets"]) == set(sel.meta["dataset"])
    assert all("stat" in s and "dof" in s and not s["relpath"].startswith("/") for s in man["sources"])
    # the name rules and origins the catalog was made with, as given (content, name, hash)
    kept = man["index_inputs"]
    assert kept["origins"]["content"] == json.loads((demo_tree / "origins.json").read_text())
    assert kept["origins"]["sha256"] == hashlib.sha256((demo_tree / "origins.json").read_bytes()).hexdigest()
    assert [r["content"] for r in kept["rules"]] == [json.loads((demo_tree / "name-rules.json").read_text())]


def test_meta_holds_the_targets_and_folds(store, tmp_path):
    import pyarrow.parquet as pq

    sel = store.select(concepts=["hand-movement", "listening", "reading"], y_from="concepts")
    out = Path(store.export(tmp_path / "t", sel).out)
    meta = pq.read_table(out / "meta.parquet").to_pandas()
    Y = np.load(out / "Y.npy")
    for j, concept in enumerate(json.loads((out / "concepts.json").read_text())):
        np.testing.assert_array_equal(meta[f"Y:{concept}"].to_numpy(), Y[:, j])
    assert (meta["fold"] >= 0).all() and len(meta) == len(Y)


@pytest.mark.slow
def test_a_rebuild_from_the_manifest_on_moved_sources_is_byte_identical(demo_store, demo_tree, tmp_path):
    import hashlib

    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    mapstore.build_features(store, "default", grid="MNI152-3mm", jobs=2, progress=False)
    mapstore.label(store, demo_tree / "concepts.json")
    st = mapstore.open(store)
    sel = st.select(concepts=["hand-movement", "listening"], y_from="concept")
    first = Path(st.export(tmp_path / "first", sel).out)
    moved = tmp_path / "elsewhere" / "data"  # the sources on another machine, at another path
    shutil.copytree(demo_tree, moved, symlinks=True)
    for name in ("name-rules.json", "origins.json", "concepts.json"):  # only the manifest keeps them now
        (moved / name).unlink()
    rep = mapstore.rebuild(first, [moved], tmp_path / "again", store=tmp_path / "s2")
    assert not list(tmp_path.glob("*from-manifest*"))  # the kept files are written back elsewhere, then removed
    assert rep.ok, rep.summary()
    digest = [hashlib.sha256((p / "X.npy").read_bytes()).hexdigest() for p in (first, tmp_path / "again")]
    assert digest[0] == digest[1]  # X byte for byte
