"""Feature sets end to end: provenance, incremental rebuilds, matrices, images, Dask."""

from __future__ import annotations

import os
import shutil

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.errors import FeatureError, ParameterError
from mapstore.targets import zero_background
from mapstore.targets._volume import builtin_grid, mni152_brain_mask, read_volume, resample

from ..conftest import make_derivative, write_json, write_map


@pytest.fixture(scope="module")
def featured_store(demo_store, tmp_path_factory):
    store = tmp_path_factory.mktemp("feat") / "store"
    shutil.copytree(demo_store, store)
    report = mapstore.build_features(store, jobs=2, progress=False)
    assert report.n_problems == 0
    return store


def test_default_set_links_rows_to_maps(featured_store):
    st = mapstore.open(featured_store)
    fs = st.features()
    assert fs.name == "default" and st.feature_sets() == ["default"]
    n_maps = st.sql("SELECT count(*) n FROM maps WHERE geometry = 'volume'")["n"][0].as_py()
    assert fs.rows.num_rows == n_maps
    joined = st.sql("SELECT f.sha256 = m.sha256 AS same FROM features f JOIN maps m USING (map_id)")
    assert all(joined["same"].to_pylist())
    sets = st.sql("SELECT * FROM feature_sets").to_pylist()[0]
    assert sets["grid"] == "MNI152-2mm" and sets["mask"] == "MNI152-brain" and sets["method"] == "linear"
    assert fs.n_voxels == mni152_brain_mask(builtin_grid("MNI152-2mm")).n_voxels


@pytest.mark.filterwarnings("ignore:NaNs or infinite values:RuntimeWarning")
def test_rows_equal_direct_resampling_and_nilearn(featured_store):
    # reference: nilearn.image.resample_img of the same file onto the same grid, then masked
    from nilearn.image import resample_img

    st = mapstore.open(featured_store)
    fs = st.features()
    grid = builtin_grid("MNI152-2mm")
    mask = mni152_brain_mask(grid)
    rows = st.sql("SELECT m.map_id, d.root || '/' || m.relpath AS path, m.study FROM maps m "
                  "JOIN datasets d USING (dataset) WHERE m.geometry = 'volume' ORDER BY m.study, m.map_id").to_pylist()
    picks = {r["study"]: r for r in rows}.values()  # one per study: every grid and path
    X = fs.matrix([r["map_id"] for r in picks])
    for x, r in zip(X, picks):
        vol, facts = read_volume(r["path"])
        bg = zero_background(vol)  # zero-filled demo studies: their background is missing
        if bg is not None:
            vol[bg] = np.nan
        direct = resample(vol, facts.affine_array, grid, "linear").reshape(-1)[mask.indices]
        # the store resamples the mask's bounding box only: same values up to float rounding
        np.testing.assert_array_equal(np.isnan(x), np.isnan(direct))
        np.testing.assert_allclose(x, direct, rtol=1e-6, atol=1e-6)
        img = nib.load(r["path"])
        ref = resample_img(img, target_affine=grid.affine_array, target_shape=grid.shape,
                           interpolation="linear", force_resample=True, copy_header=True)
        ref_vec = ref.get_fdata().reshape(-1)[mask.indices]
        ok = np.isfinite(x) & np.isfinite(ref_vec)
        assert ok.mean() > 0.5
        np.testing.assert_allclose(x[ok], ref_vec[ok], atol=1e-4)


def test_matrix_order_and_subset(featured_store):
    fs = mapstore.open(featured_store).features()
    ids = fs.map_ids
    full = fs.matrix()
    assert full.shape == (len(ids), fs.n_voxels) and full.dtype == np.float32
    pick = [ids[5], ids[0], ids[3], ids[5]]
    np.testing.assert_array_equal(fs.matrix(pick), full[[5, 0, 3, 5]])
    with pytest.raises(FeatureError, match="no row"):
        fs.matrix(["nope"])


def test_to_image_round_trip(featured_store):
    st = mapstore.open(featured_store)
    fs = st.features()
    x = fs.matrix(fs.map_ids[:1])[0]
    img = st.to_image(x)
    assert isinstance(img, nib.Nifti1Image) and img.shape == fs.target.shape
    np.testing.assert_array_equal(img.affine, fs.target.affine_array)
    back = img.get_fdata(dtype=np.float32).reshape(-1)[fs.mask_indices]
    np.testing.assert_array_equal(back, x)
    with pytest.raises(FeatureError, match="mask voxels"):
        st.to_image(np.zeros(3))


def test_warm_rerun_skips_everything(featured_store):
    r = mapstore.build_features(featured_store, jobs=1, progress=False)
    assert r.n_built == 0 and r.n_unchanged == mapstore.open(featured_store).features().rows.num_rows


def test_coverage_column(featured_store):
    st = mapstore.open(featured_store)
    cov = st.sql("SELECT m.study, avg(f.coverage) c FROM features f JOIN maps m USING (map_id) "
                 "GROUP BY ALL").to_pandas().set_index("study")["c"]
    # zero-filled maps: their zero background is missing, as NaN-outside-brain maps' NaN is
    assert 0.5 < cov["inkwell"] < 1.0 and 0.5 < cov["glowtrack"] < 1.0
    kept = mapstore.open(featured_store).sql("SELECT DISTINCT missing_from FROM features f JOIN maps m "
                                             "USING (map_id) WHERE m.study = 'inkwell'").column(0).to_pylist()
    assert kept == ["zero-background"]


def _tree(tmp_path, n=4):
    ds = make_derivative(tmp_path / "src" / "alpha", name="alpha")
    write_json(ds / "task-go_statmap.json", {"DegreesOfFreedom": 25})
    aff = np.diag([4.0, 4, 4, 1])
    aff[:3, 3] = [-80, -112, -60]
    rng = np.random.default_rng(3)
    for i in range(n):
        data = rng.standard_normal((41, 48, 40)).astype(np.float32)
        write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-go_contrast-a_stat-t_statmap.nii.gz", data, aff)
    write_map(ds / "sub-00" / "sub-00_task-go_contrast-a_stat-effect_statmap.nii.gz",
              np.ones((41, 48, 40), np.float32), aff)
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False)
    return ds, store


def test_changed_source_gets_a_new_row(tmp_path):
    ds, store = _tree(tmp_path)
    r1 = mapstore.build_features(store, grid="MNI152-3mm", jobs=1, progress=False)
    fs1 = mapstore.open(store).features(r1.name)
    f = ds / "sub-01" / "sub-01_task-go_contrast-a_stat-t_statmap.nii.gz"
    mid = mapstore.open(store).sql("SELECT map_id FROM maps WHERE relpath LIKE '%sub-01_task%'")["map_id"][0].as_py()
    old_key = fs1.rows.to_pandas().set_index("map_id").loc[mid, "feature_key"]
    aff = nib.load(f).affine
    write_map(f, np.full((41, 48, 40), 7.0, np.float32), aff)
    st_ = os.stat(f)
    os.utime(f, ns=(st_.st_atime_ns, st_.st_mtime_ns + 10**9))
    mapstore.index([tmp_path / "src"], store, progress=False)
    r2 = mapstore.build_features(store, grid="MNI152-3mm", jobs=1, progress=False)
    assert (r2.n_built, r2.n_removed) == (1, 1)
    fs2 = mapstore.open(store).features(r2.name)
    rows = fs2.rows.to_pandas().set_index("map_id")
    assert rows.loc[mid, "feature_key"] != old_key and len(rows) == 5
    x = fs2.matrix([mid])[0]
    assert np.nanmax(x) == 7.0 and np.nanmin(x) == 7.0
    # old shard rows are no longer served; unused shards are collected
    shards = set(rows["shard"])
    on_disk = {p.name for p in (store / "features" / r2.name / "shards").glob("*.npy")}
    assert shards <= on_disk


def test_file_changed_after_index_is_a_feature_problem(tmp_path):
    ds, store = _tree(tmp_path)
    f = ds / "sub-02" / "sub-02_task-go_contrast-a_stat-t_statmap.nii.gz"
    write_map(f, np.zeros((41, 48, 40), np.float32), nib.load(f).affine)
    r = mapstore.build_features(store, grid="MNI152-3mm", jobs=1, progress=False)
    assert r.n_problems == 1 and r.n_built == 4
    probs = mapstore.open(store).sql("SELECT * FROM feature_problems").to_pylist()
    assert "changed since it was indexed" in probs[0]["reason"] and probs[0]["path"] == str(f)


def test_z_set_converts_t_and_leaves_out_effect(tmp_path):
    ds, store = _tree(tmp_path)
    r = mapstore.build_features(store, "zset", grid="MNI152-3mm", stat="z", jobs=1, progress=False)
    assert r.n_built == 4 and r.n_problems == 0
    assert r.left_out == {"maps with no z equivalent (only t, F, p and z maps go into a z set)": 1}
    assert "left out 1 maps with no z equivalent" in r.summary()
    fs = mapstore.open(store).features("zset")
    assert set(fs.rows["conversion"].to_pylist()) == {"t->z(dof=25)"}
    # the z values are the source t values mapped through the t(25) -> normal transform, then
    # resampled: the transform is not linear, so it runs before interpolation
    from mapstore.targets._convert import t_to_z

    st = mapstore.open(store)
    paths = dict(zip(*st.sql("SELECT m.map_id, d.root || '/' || m.relpath FROM maps m JOIN datasets d "
                             "USING (dataset)").to_pydict().values()))
    grid = builtin_grid("MNI152-3mm")
    brain = mni152_brain_mask(grid)
    z = fs.matrix(fs.map_ids)
    for row, mid in zip(z, fs.map_ids):
        vol, facts = read_volume(paths[mid])
        want = resample(t_to_z(vol, 25).astype(np.float32), facts.affine_array, grid).reshape(-1)[brain.indices]
        np.testing.assert_array_equal(np.isnan(row), np.isnan(want))
        ok = np.isfinite(row)
        np.testing.assert_allclose(row[ok], want[ok], rtol=1e-5, atol=1e-5)
        after = t_to_z(resample(vol, facts.affine_array, grid).reshape(-1)[brain.indices], 25)
        assert np.abs(after[ok] - row[ok]).max() > 1e-3  # converting after resampling differs


def test_coverage_masks(tmp_path):
    ds, store = _tree(tmp_path)
    r = mapstore.build_features(store, "inter", grid="MNI152-3mm", mask="intersection", jobs=1, progress=False)
    fs = mapstore.open(store).features("inter")
    assert r.mask == "MNI152-brain&intersection" and np.isfinite(fs.matrix()).all()
    # within the brain mask only
    brain = mni152_brain_mask(builtin_grid("MNI152-3mm"))
    assert set(fs.mask_indices.tolist()) <= set(brain.indices.tolist())
    r2 = mapstore.build_features(store, "cov", grid="MNI152-3mm", mask="coverage:0.5", jobs=1, progress=False)
    assert r2.n_features >= r.n_features
    with pytest.raises(ParameterError, match="coverage fraction"):
        mapstore.build_features(store, "bad", mask="coverage:2", progress=False)


def test_same_name_other_settings_refused(tmp_path):
    ds, store = _tree(tmp_path)
    mapstore.build_features(store, "s", grid="MNI152-3mm", jobs=1, progress=False)
    with pytest.raises(FeatureError, match="other settings"):
        mapstore.build_features(store, "s", grid="MNI152-3mm", method="nearest", jobs=1, progress=False)


def test_reference_image_grid_and_mask_file(tmp_path):
    ds, store = _tree(tmp_path)
    ref = ds / "sub-00" / "sub-00_task-go_contrast-a_stat-t_statmap.nii.gz"
    mask = np.zeros((41, 48, 40), np.uint8)
    mask[10:30, 10:30, 10:30] = 1
    mpath = tmp_path / "mask.nii.gz"
    nib.save(nib.Nifti1Image(mask, nib.load(ref).affine), str(mpath))
    r = mapstore.build_features(store, "native", grid=str(ref), mask=str(mpath), jobs=1, progress=False)
    # same grid: no interpolation (the mask's bounding box is an integer shift of it)
    assert r.n_features == 20**3 and set(r.paths) <= {"same", "reindex"}
    fs = mapstore.open(store).features("native")
    mid = mapstore.open(store).sql("SELECT map_id FROM maps WHERE relpath = "
                                   f"'{ref.relative_to(ds).as_posix()}'")["map_id"][0].as_py()
    src = nib.load(ref).get_fdata(dtype=np.float32)
    np.testing.assert_array_equal(fs.matrix([mid])[0], src[10:30, 10:30, 10:30].reshape(-1))


@pytest.mark.slow
def test_dask_local_cluster_matches_local_pool(tmp_path):
    distributed = pytest.importorskip("distributed")
    ds, store = _tree(tmp_path, n=6)
    mapstore.build_features(store, "local", grid="MNI152-3mm", jobs=2, progress=False)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        r = mapstore.build_features(store, "dask", grid="MNI152-3mm", scheduler=client, batch_size=2,
                                    progress=False)
        # the CLI passes the scheduler's address
        from mapstore.cli import main

        assert main(["features", "--store", str(store), "--name", "addr", "--grid", "MNI152-3mm",
                     "--dask", cluster.scheduler_address]) == 0
    assert r.n_built == 7
    st = mapstore.open(store)
    ids = st.features("local").map_ids
    np.testing.assert_array_equal(st.features("local").matrix(ids), st.features("dask").matrix(ids))
    np.testing.assert_array_equal(st.features("local").matrix(ids), st.features("addr").matrix(ids))


def test_crash_mid_build_keeps_the_served_set(tmp_path, monkeypatch):
    ds, store = _tree(tmp_path)
    mapstore.build_features(store, "s", grid="MNI152-3mm", jobs=1, progress=False)
    before = mapstore.open(store).features("s")
    X0 = before.matrix()
    head0 = (store / "HEAD").read_text()
    f = ds / "sub-03" / "sub-03_task-go_contrast-a_stat-t_statmap.nii.gz"
    write_map(f, np.full((41, 48, 40), 3.0, np.float32), nib.load(f).affine)
    mapstore.index([tmp_path / "src"], store, progress=False)
    head1 = (store / "HEAD").read_text()

    import mapstore.targets._volume as feat

    def boom(*args, **kwargs):
        raise RuntimeError("simulated crash")

    monkeypatch.setattr(feat, "resample", boom)
    with pytest.raises(RuntimeError, match="simulated crash"):
        mapstore.build_features(store, "s", grid="MNI152-3mm", jobs=1, progress=False)
    assert (store / "HEAD").read_text() == head1 != head0
    after = mapstore.open(store).features("s")
    np.testing.assert_array_equal(after.matrix(before.map_ids), X0)


def test_identical_copies_keep_one_row_each_across_rebuilds(tmp_path):
    ds, store = _tree(tmp_path)
    src = ds / "sub-00" / "sub-00_task-go_contrast-a_stat-t_statmap.nii.gz"
    other = make_derivative(tmp_path / "src" / "beta", name="beta")
    (other / "sub-00").mkdir(parents=True)
    shutil.copy(src, other / "sub-00" / "sub-00_task-go_contrast-a_stat-t_statmap.nii.gz")
    mapstore.index([tmp_path / "src"], store, progress=False)
    for _ in range(2):
        mapstore.build_features(store, "s", grid="MNI152-3mm", jobs=1, progress=False)
        rows = mapstore.open(store).features("s").rows.to_pandas()
        assert rows.map_id.is_unique and len(rows) == 6


def test_a_selection_reads_its_rows_without_the_rows_table(featured_store):
    # consistency test: X read where the selection's query found the rows equals matrix() by id,
    # and drawing X (and exporting it) never loads the set's rows table or its map_id index
    st = mapstore.open(featured_store)
    sel = st.select(stat=["t"], missing="keep")
    X = sel.X
    fs = sel.feature_set
    assert fs._pos_map is None and fs._rows is None and not fs._columns
    np.testing.assert_array_equal(X, st.features().matrix(sel.map_ids))
    # shards hold one dataset each: a study's rows never share a shard with another study's
    shards = st.sql("SELECT f.shard, count(DISTINCT m.dataset) n FROM features f JOIN maps m USING (map_id) "
                    "GROUP BY ALL").to_pylist()
    assert shards and all(r["n"] == 1 for r in shards)


def test_a_map_with_no_value_inside_the_mask_is_a_problem_not_a_copy(tmp_path):
    """Two maps whose field of view misses the brain mask: each a feature problem; neither is anyone's copy."""
    rng = np.random.default_rng(4)
    far = np.array([[3.0, 0, 0, 400], [0, 3, 0, 400], [0, 0, 3, 400], [0, 0, 0, 1]])  # 400 mm off the brain
    near = np.array([[3.0, 0, 0, -90], [0, 3, 0, -126], [0, 0, 3, -72], [0, 0, 0, 1]])
    roots = []
    for study in ("fir", "yew"):
        root = make_derivative(tmp_path / study, study)
        roots.append(root)
        for sub in ("01", "02"):
            write_map(root / f"sub-{sub}" / f"sub-{sub}_task-go_contrast-a_stat-effect_statmap.nii.gz",
                      rng.normal(size=(61, 73, 61)).astype(np.float32), near)
        write_map(root / "sub-03" / "sub-03_task-go_contrast-a_stat-effect_statmap.nii.gz",
                  rng.normal(size=(20, 20, 20)).astype(np.float32), far)
    store = tmp_path / "store"
    mapstore.index(roots, store, progress=False, jobs=1)
    r = mapstore.build_features(store, grid="MNI152-3mm", progress=False, jobs=1)
    assert r.n_built == 4 and r.problem_codes == {"no-value-in-mask": 2}
    st = mapstore.open(store)
    assert st.features().copies().num_rows == 0
    sel = st.select(group_by="study")
    assert len(sel) == 4 and len(sel.splits("leave-one-group-out")) == 2
