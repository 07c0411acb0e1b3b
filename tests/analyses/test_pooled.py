"""Pooled-map statistics against the reference libraries and a published worked example.

References: scipy's ``combine_pvalues`` (Stouffer, weighted Stouffer, Fisher); statsmodels'
``combine_effects`` (fixed and DerSimonian-Laird random effects) and ``multipletests`` (fdr_bh);
nilearn's ``SecondLevelModel`` (one-sample t); the BCG vaccine trials (Colditz et al., 1994, 13 trials),
whose DerSimonian-Laird results on the log risk ratio are, from memory of metafor's documentation:
estimate -0.7141, standard error 0.1787, tau^2 0.3088, I^2 92.12 %, Q 152.23; and by restricted maximum
likelihood (metafor's default, also from memory): estimate -0.7145, standard error 0.1798, tau^2 0.3132,
I^2 92.22 %.  The REML tau^2 is also checked against scipy's bounded minimiser of the restricted
log-likelihood written out (Viechtbauer, 2005).  Simulated studies with a known shared effect at a known
voxel are invented.
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.analyses import combine, fdr_threshold, pool, study_maps, write_pooled
from mapstore.errors import ParameterError

from ..conftest import make_derivative, write_json, write_map

BCG = np.array([[4, 119, 11, 128], [6, 300, 29, 274], [3, 228, 11, 209], [62, 13536, 248, 12619],
                [33, 5036, 47, 5761], [180, 1361, 372, 1079], [8, 2537, 10, 619], [505, 87886, 499, 87892],
                [29, 7470, 45, 7232], [17, 1699, 65, 1600], [186, 50448, 141, 27197], [5, 2493, 3, 2338],
                [27, 16886, 29, 17825]], dtype=float)


def _bcg(method: str) -> dict:
    """The BCG trials' log risk ratios and their variances (common practice), combined by ``method``."""
    a, b, c, d = BCG.T
    yi = np.log((a / (a + b)) / (c / (c + d)))
    vi = 1 / a - 1 / (a + b) + 1 / c - 1 / (c + d)
    return combine(effect=yi[:, None], variance=vi[:, None], method=method)


def test_random_effects_reproduce_the_bcg_worked_example():
    got = _bcg("random")
    assert abs(got["effect"][0] - -0.7141) < 5e-4 and abs(np.sqrt(got["variance"][0]) - 0.1787) < 5e-4
    assert abs(got["tau2"][0] - 0.3088) < 5e-4 and abs(got["i2"][0] - 0.9212) < 5e-4
    assert abs(got["q"][0] - 152.23) < 0.01


def test_reml_reproduces_the_bcg_worked_example():
    got = _bcg("random-reml")
    assert abs(got["effect"][0] - -0.7145) < 5e-4 and abs(np.sqrt(got["variance"][0]) - 0.1798) < 5e-4
    assert abs(got["tau2"][0] - 0.3132) < 5e-4 and abs(got["i2"][0] - 0.9222) < 5e-4
    # the DerSimonian-Laird value is not the REML one: the test tells the two estimators apart
    assert abs(_bcg("random")["tau2"][0] - 0.3132) > 3e-3


def test_reml_tau2_maximises_the_restricted_likelihood_found_by_scipy(rng):
    from scipy.optimize import minimize_scalar

    k, v = 9, 40
    effect = rng.normal(0.4, 0.6, size=(k, v))
    variance = rng.uniform(0.05, 0.5, size=(k, v))
    effect[1, :8] = np.nan
    variance[4, 5:9] = np.nan
    got = combine(effect=effect, variance=variance, method="random-reml")
    for j in range(v):
        ok = np.isfinite(effect[:, j]) & np.isfinite(variance[:, j])
        y, s2 = effect[ok, j], variance[ok, j]

        def neg_restricted_loglik(tau2):
            w = 1 / (s2 + tau2)
            mu = (w * y).sum() / w.sum()
            return 0.5 * (np.log(s2 + tau2).sum() + np.log(w.sum()) + (w * (y - mu) ** 2).sum())

        ref = minimize_scalar(neg_restricted_loglik, bounds=(0, 50), method="bounded",
                              options={"xatol": 1e-12}).x
        if neg_restricted_loglik(0.0) <= neg_restricted_loglik(ref):
            ref = 0.0  # the maximum sits on the boundary
        assert got["tau2"][j] == pytest.approx(ref, abs=1e-6), j
        w = 1 / (s2 + got["tau2"][j])
        assert got["effect"][j] == pytest.approx((w * y).sum() / w.sum(), rel=1e-9)
        assert got["variance"][j] == pytest.approx(1 / w.sum(), rel=1e-9)
        assert got["n_studies"][j] == ok.sum()


def test_fixed_and_random_effects_equal_statsmodels_voxel_by_voxel(rng):
    from statsmodels.stats.meta_analysis import combine_effects

    k, v = 7, 60
    effect = rng.normal(0.3, 0.5, size=(k, v))
    variance = rng.uniform(0.02, 0.3, size=(k, v))
    effect[2, :10] = np.nan  # a study that did not measure these voxels
    for method, fe in (("fixed", True), ("random", False)):
        got = combine(effect=effect, variance=variance, method=method)
        for j in range(v):
            ok = np.isfinite(effect[:, j])
            ref = combine_effects(effect[ok, j], variance[ok, j], method_re="dl")
            # DerSimonian-Laird truncates tau^2 at 0 (random effects are then fixed effects); statsmodels
            # reports the untruncated moment estimate (and I^2 below 0) and weights with it
            fixed_here = fe or ref.tau2 <= 0
            mean, var = (ref.mean_effect_fe, ref.var_eff_w_fe) if fixed_here else (ref.mean_effect_re,
                                                                                   ref.var_eff_w_re)
            assert got["effect"][j] == pytest.approx(mean, rel=1e-9, abs=1e-12)
            assert got["variance"][j] == pytest.approx(var, rel=1e-9)
            assert got["q"][j] == pytest.approx(ref.q, rel=1e-9)
            assert got["i2"][j] == pytest.approx(max(0.0, ref.i2), rel=1e-9, abs=1e-12)  # statsmodels: unclamped
            assert got["tau2"][j] == pytest.approx(0.0 if fixed_here else ref.tau2, rel=1e-9, abs=1e-12)
            assert got["n_studies"][j] == ok.sum()


def test_stouffer_and_fisher_equal_scipy(rng):
    from scipy import stats

    k, v = 6, 80
    z = rng.normal(0.8, 1.2, size=(k, v))
    z[0, :5] = np.nan
    n = rng.integers(10, 60, size=k)
    for method, ref_method in (("stouffer", "stouffer"), ("stouffer-weighted", "stouffer"), ("fisher", "fisher")):
        got = combine(z, n=n, method=method)
        for j in range(v):
            ok = np.isfinite(z[:, j])
            p = stats.norm.sf(z[ok, j])
            kw = {"weights": np.sqrt(n[ok])} if method == "stouffer-weighted" else {}
            ref = stats.combine_pvalues(p, method=ref_method, **kw).pvalue
            assert got["p"][j] == pytest.approx(ref, rel=1e-7, abs=1e-300)


def test_fdr_equals_benjamini_hochberg_of_statsmodels(rng):
    from scipy import stats
    from statsmodels.stats.multitest import multipletests

    z = np.concatenate([rng.normal(0, 1, 900), rng.normal(3.5, 1, 100), [np.nan] * 50])
    thr = fdr_threshold(z, 0.05)
    finite = z[np.isfinite(z)]
    reject = multipletests(stats.norm.sf(finite), alpha=0.05, method="fdr_bh")[0]
    np.testing.assert_array_equal(finite >= thr, reject)  # counted over the voxels tested (NaN left out)


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """Four invented studies of ten subjects; every subject's map carries one shared effect at a known
    voxel (a Gaussian blob) plus noise; the fourth study's sign is flipped in a second store."""
    base = tmp_path_factory.mktemp("pooled")
    aff = np.diag([4.0, 4.0, 4.0, 1.0])
    aff[:3, 3] = [-80, -112, -60]
    shape = (41, 48, 40)
    peak = (20, 30, 22)
    ijk = np.indices(shape).reshape(3, -1).T
    blob = np.exp(-((ijk - peak) ** 2).sum(axis=1) / (2 * 2.0 ** 2)).reshape(shape)
    rng = np.random.default_rng(5)
    stores = {}
    for flip in (False, True):
        roots = []
        for s in range(4):
            ds = make_derivative(base / f"flip{int(flip)}" / f"study{s}", f"study{s}")
            sign = -1.0 if flip and s == 3 else 1.0
            for i in range(10):
                data = (sign * 2.0 * blob + rng.normal(0, 1.0, size=shape)).astype(np.float32)
                write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-x_contrast-a_stat-effect_statmap.nii.gz", data, aff)
                write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-x_contrast-a_stat-variance_statmap.nii.gz",
                          rng.uniform(0.5, 2.0, size=shape).astype(np.float32), aff)
            roots.append(ds)
        store = base / f"store{int(flip)}"
        mapstore.index(roots, store, progress=False, jobs=1)
        grid = write_json(base / "grid.json", {"shape": list(shape), "affine": aff.tolist()})
        mapstore.build_features(store, "own", grid=str(grid), progress=False, jobs=1)
        stores[flip] = store
    return stores, peak, aff


def test_the_pooled_map_peaks_at_the_shared_effect_and_a_flipped_study_raises_i2(shared, tmp_path):
    stores, peak, aff = shared
    sel = mapstore.open(stores[False]).select(features="own", y_from="concepts", stat=["effect"])
    # Stouffer on the studies' z maps: inverse-variance weights from ten subjects' variances are heavy-tailed
    # (a study whose variance is small by chance dominates a voxel), z is not
    top = pool(sel, "stouffer").peaks(1)[0]
    assert np.abs(np.array(top["position"]) - peak).max() <= 1
    assert top["n_studies"] == 4
    res = pool(sel, "random", leave_one_out=True)
    flipped = pool(mapstore.open(stores[True]).select(features="own", y_from="concepts", stat=["effect"]), "random")
    j = _column_of(sel, peak)
    assert flipped.i2[j] > res.i2[j] + 0.3
    assert set(res.provenance["leave_one_out"]) == {f"study{s}" for s in range(4)}
    prov = write_pooled(res, tmp_path / "out")
    assert (tmp_path / "out" / "pooled_stat-z.nii.gz").exists() and (tmp_path / "out" / "peaks.tsv").exists()
    assert json.loads((tmp_path / "out" / "pooled.json").read_text())["fdr"]["n_tested"] == prov.fdr["n_tested"]
    img = nib.load(str(tmp_path / "out" / "pooled_stat-z.nii.gz"))
    np.testing.assert_allclose(img.affine, aff)
    # the images say what they hold: nibabel reads the NIfTI-1 intent codes (z score 5, p value 22)
    assert img.header.get_intent()[0] == "z score"
    assert nib.load(str(tmp_path / "out" / "pooled_stat-p.nii.gz")).header.get_intent()[0] == "p value"


def _column_of(sel, ijk) -> int:
    fs = sel.feature_set
    flat = int(np.ravel_multi_index(ijk, fs.target.shape))
    return int(np.flatnonzero(fs.mask_indices[sel.voxels] == flat)[0])


def test_study_maps_equal_nilearn_second_level_one_sample_t(shared):
    from nilearn.glm.second_level import SecondLevelModel
    import pandas as pd

    stores, _, aff = shared
    sel = mapstore.open(stores[False]).select(features="own", y_from="concepts", stat=["effect"],
                                              where="study = 'study1'")
    sm = study_maps(sel)
    fs = sel.feature_set
    imgs = [sel.to_image(row) for row in sel.X]
    mask = sel.to_image(np.ones(len(sel.voxels), dtype=np.float32))
    mask = nib.Nifti1Image((np.nan_to_num(mask.get_fdata()) > 0).astype(np.uint8), mask.affine)
    model = SecondLevelModel(mask_img=mask).fit(imgs, design_matrix=pd.DataFrame({"intercept": [1] * len(imgs)}))
    t_img = model.compute_contrast("intercept", output_type="stat")
    ref = t_img.get_fdata().reshape(-1)[fs.mask_indices[sel.voxels]]
    np.testing.assert_allclose(sm.t[0], ref, rtol=1e-4, atol=1e-4)
    assert sm.n_subjects.tolist() == [10]


def test_the_pool_command_writes_maps_and_peaks(shared, tmp_path, capsys):
    from mapstore.cli import main

    stores, peak, _ = shared
    out = tmp_path / "cli"
    code = main(["pool", "--store", str(stores[False]), "--features", "own", "--out", str(out),
                 "--method", "stouffer", "--leave-one-out"])
    text = capsys.readouterr().out
    assert code == 0 and "pooled 40 maps of 4 studies (stouffer)" in text and "peak z" in text
    assert {p.name for p in out.iterdir()} >= {"pooled_stat-z.nii.gz", "pooled_stat-p.nii.gz", "peaks.tsv",
                                               "pooled.json"}
    import pandas as pd

    peaks = pd.read_csv(out / "peaks.tsv", sep="\t")  # a plain table: one column per coordinate
    assert list(peaks.columns) == ["z", "n_studies", "i", "j", "k", "x_mm", "y_mm", "z_mm"]
    assert np.abs(peaks.loc[0, ["i", "j", "k"]].to_numpy(int) - peak).max() <= 1
    # the millimetres are the grid's affine applied to i, j, k (nibabel's apply_affine)
    import nibabel as nib

    aff = nib.load(str(out / "pooled_stat-z.nii.gz")).affine
    np.testing.assert_allclose(peaks[["x_mm", "y_mm", "z_mm"]].to_numpy(),
                               nib.affines.apply_affine(aff, peaks[["i", "j", "k"]].to_numpy()), atol=0.006)


def test_streaming_combination_of_given_maps_equals_combine(shared):
    from mapstore.analyses import pool_maps

    stores, _, _ = shared
    st = mapstore.open(stores[True])
    eff = st.select(features="own", y_from="concepts", stat=["effect"])
    var = st.select(features="own", y_from="concepts", stat=["variance"])
    eff = eff.subset(np.argsort(eff.meta["participant"].to_numpy(), kind="stable"))
    var = var.subset(np.argsort(var.meta["participant"].to_numpy(), kind="stable"))
    assert list(eff.meta["participant"]) == list(var.meta["participant"])
    E = eff.X.astype(np.float64)
    V = var.with_columns(eff.voxels).X.astype(np.float64)
    n = np.arange(10, 10 + len(eff))
    for method in ("stouffer", "stouffer-weighted", "fisher", "fixed", "random", "random-reml"):
        got = pool_maps(eff, method, variance=var, n=n, rows=7)  # blocks of 7 maps: the sums carry over
        want = combine(E, effect=E, variance=V, n=n, method=method)
        for key in ("z", "effect", "variance", "tau2", "i2", "q"):
            if key in want:
                # float32 maps, products in float32 summed in float64: equal to float64 throughout within 1e-5
                np.testing.assert_allclose(getattr(got, key), want[key], rtol=1e-5, atol=1e-6, err_msg=(method, key))


def test_verify_finds_a_changed_pooled_output_or_source(shared, tmp_path, capsys):
    import shutil

    from mapstore.cli import main

    stores, _, _ = shared
    out = tmp_path / "v"
    assert main(["pool", "--store", str(stores[False]), "--features", "own", "--out", str(out)]) == 0
    assert main(["verify", str(out)]) == 0
    (out / "peaks.tsv").write_text("edited\\n")
    assert main(["verify", str(out)]) == 3
    assert "output file changed: peaks.tsv" in capsys.readouterr().out
    shutil.rmtree(out)


def test_map_families_pair_each_effect_with_its_variance(shared):
    stores, _, _ = shared
    st = mapstore.open(stores[True])
    pairs = st.sql("SELECT e.map_id AS effect, v.map_id AS variance, e.relpath AS e_path, v.relpath AS v_path "
                   "FROM map_families e JOIN map_families v USING (family) "
                   "WHERE e.stat = 'effect' AND v.stat = 'variance'").to_pylist()
    assert len(pairs) == 40  # every subject's effect map has exactly its own variance map
    for p in pairs:
        assert p["e_path"].replace("stat-effect", "stat-variance") == p["v_path"]


def test_streaming_leaves_out_what_a_map_did_not_measure(tmp_path):
    """Maps with holes (NaN), zero, negative and infinite variances, and an infinite effect: the streamed
    combination counts a map only where combine() does, block by block."""
    from mapstore.analyses import pool_maps, variance_maps

    rng = np.random.default_rng(11)
    shape, aff = (8, 9, 10), np.diag([3.0, 3.0, 3.0, 1.0])
    ds = make_derivative(tmp_path / "holes", "holes")
    for i in range(9):
        e = rng.normal(0.5, 1.0, size=shape).astype(np.float32)
        v = rng.uniform(0.2, 1.5, size=shape).astype(np.float32)
        e[i % 4:i % 4 + 2, :, :3] = np.nan  # each map misses a different slab
        if i == 2:
            v[3:5, 3:5, :] = 0.0
        if i == 5:
            v[:2, 6:, 6:] = -1.0
        if i == 7:
            v[5:, :2, 4:6] = np.inf
            e[6, 6, 6] = np.inf
        write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-x_contrast-a_stat-effect_statmap.nii.gz", e, aff)
        write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-x_contrast-a_stat-variance_statmap.nii.gz", v, aff)
    lone = "sub-09/sub-09_task-x_contrast-a_stat-effect_statmap.nii.gz"  # an effect map with no variance map
    write_map(ds / lone, rng.normal(size=shape).astype(np.float32), aff)
    store = tmp_path / "store"
    mapstore.index([ds], store, progress=False, jobs=1)
    grid = write_json(tmp_path / "grid.json", {"shape": list(shape), "affine": aff.tolist()})
    mapstore.build_features(store, "own", grid=str(grid), progress=False, jobs=1)
    st = mapstore.open(store)
    with pytest.raises(ParameterError, match=f"{lone}: no variance map beside it"):
        variance_maps(st.select(features="own", stat=["effect"], missing="keep"))
    eff = st.select(features="own", stat=["effect"], missing="keep", where="sub <> '09'")
    var = st.select(features="own", stat=["variance"], missing="keep")
    eff = eff.subset(np.argsort(eff.meta["participant"].to_numpy(), kind="stable"))
    var = var.subset(np.argsort(var.meta["participant"].to_numpy(), kind="stable"))
    E, V = eff.X.astype(np.float64), var.with_columns(eff.voxels).X.astype(np.float64)
    assert np.isnan(E).any() and (V <= 0).any() and np.isinf(V).any()  # the holes reached the store
    for method in ("stouffer", "fixed", "random", "random-reml"):
        for rows in (2, 4, None):
            got = pool_maps(eff, method, variance=var, rows=rows)
            want = combine(E, effect=E, variance=V, method=method)
            np.testing.assert_array_equal(got.n_studies, want["n_studies"], err_msg=(method, rows))
            for key in ("z", "effect", "tau2"):
                if key in want:
                    np.testing.assert_allclose(getattr(got, key), want[key], rtol=2e-5, atol=2e-6,
                                               err_msg=(method, rows, key))


def test_weighting_subjects_by_their_variance_equals_statsmodels_per_study(shared, tmp_path, capsys):
    from statsmodels.stats.meta_analysis import combine_effects

    from mapstore.analyses import variance_maps
    from mapstore.cli import main

    stores, peak, _ = shared
    sel = mapstore.open(stores[False]).select(features="own", y_from="concepts", stat=["effect"], missing="keep")
    var = variance_maps(sel)
    for a, b in zip(sel.meta.itertuples(), var.meta.itertuples()):
        assert a.relpath.replace("stat-effect", "stat-variance") == b.relpath
    sm = study_maps(sel, variance=var)
    E, V = sel.X.astype(np.float64), var.X.astype(np.float64)
    j = _column_of(sel, peak)
    for s, study in enumerate(sm.studies):
        rows = sel.studies.astype(str) == study
        ref = combine_effects(E[rows, j], V[rows, j], method_re="dl")
        mean, v = (ref.mean_effect_re, ref.var_eff_w_re) if ref.tau2 > 0 else (ref.mean_effect_fe, ref.var_eff_w_fe)
        assert sm.effect[s, j] == pytest.approx(mean, rel=1e-5)
        assert sm.variance[s, j] == pytest.approx(v, rel=1e-5)
    res = pool(sel, "random-reml", use_variance=True)
    assert np.abs(np.array(res.peaks(1)[0]["position"]) - peak).max() <= 1
    assert "random effects" in res.provenance["study_maps"] and res.provenance["reml_unconverged"] == 0
    out = tmp_path / "weighted"
    assert main(["pool", "--store", str(stores[False]), "--features", "own", "--out", str(out), "--method",
                 "random-reml", "--use-variance"]) == 0
    assert "(random-reml)" in capsys.readouterr().out
    kept = json.loads((out / "pooled.json").read_text())["variance_sources"]  # verify checks these files too
    assert len(kept) == 40 and all("stat-variance" in v["path"] for v in kept)
    assert main(["verify", str(out)]) == 0
    # variance maps are not what pool takes: one line saying what is, exit 1
    code = main(["pool", "--store", str(stores[False]), "--features", "own", "--out", str(tmp_path / "no"),
                 "--stat", "variance", "--use-variance"])
    err = capsys.readouterr().err
    assert code == 1 and "pool takes z, t or effect maps, not variance" in err and len(err.strip().splitlines()) == 1


def test_an_infinite_z_is_kept_at_the_cap_never_dropped():
    """Reference: Stouffer by hand with p = 0 or 1 taken as the smallest positive double (z = +-37.5, what
    p_to_z gives p = 0); dropping the contrary study would make the result more significant."""
    from scipy import stats

    from mapstore.analyses import Z_CAP

    z = np.array([[3.0], [3.0], [-np.inf]])
    got = combine(z, method="stouffer")
    want = (3.0 + 3.0 - Z_CAP) / np.sqrt(3)
    assert got["z"][0] == pytest.approx(want) and got["n_studies"][0] == 3
    assert Z_CAP == pytest.approx(stats.norm.isf(np.finfo(np.float64).tiny), abs=0.05)
    assert got["capped:infinite z (kept at +-37.5)"][0] == 1


def test_what_pool_cannot_take_is_refused_in_one_line(shared, tmp_path, capsys):
    from mapstore.cli import main
    from mapstore.errors import PoolError

    stores, _, _ = shared
    st = mapstore.open(stores[False])
    with pytest.raises(PoolError, match="not variance maps"):
        pool(st.select(features="own", stat=["variance"]))
    with pytest.raises(PoolError, match="lower --min-studies"):
        pool(st.select(features="own", stat=["effect"], where="study = 'study1'"))
    code = main(["pool", "--store", str(stores[False]), "--features", "own", "--out", str(tmp_path / "one"),
                 "--stat", "effect", "--where", "study = 'study1'"])
    err = capsys.readouterr().err
    assert code == 1 and "nothing to pool" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "one").exists()


def test_pooled_json_is_strict_json_and_counts_what_was_left_out(shared, tmp_path):
    stores, _, _ = shared
    sel = mapstore.open(stores[False]).select(features="own", stat=["effect"], missing="keep")
    res = pool(sel, min_subjects=10)  # voxels where a study has fewer than ten subjects' values: left out
    write_pooled(res, tmp_path / "strict")
    text = (tmp_path / "strict" / "pooled.json").read_text()

    def refuse(word):
        raise AssertionError(f"not strict JSON: {word}")

    doc = json.loads(text, parse_constant=refuse)
    assert doc["method"] == "stouffer" and isinstance(doc["left_out"], dict)


def test_group_maps_pool_as_study_maps(tmp_path, rng):
    """One group z map per study (level group), pooled directly: Stouffer by hand (scipy's
    combine_pvalues on the voxels' one-sided p, the reference)."""
    from scipy import stats

    shape, aff = (6, 7, 8), np.diag([4.0, 4.0, 4.0, 1.0])
    maps = []
    for s in range(3):
        ds = make_derivative(tmp_path / "src" / f"g{s}", f"g{s}")
        z = rng.normal(1.0, 1.0, size=shape).astype(np.float32)
        maps.append(z)
        write_map(ds / "group" / "task-x_contrast-a_stat-z_statmap.nii.gz", z, aff)
        for i in range(4):  # and subjects' maps beside, which a group pool leaves out
            write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-x_contrast-a_stat-z_statmap.nii.gz",
                      rng.normal(size=shape).astype(np.float32), aff)
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False, jobs=1)
    grid = write_json(tmp_path / "grid.json", {"shape": list(shape), "affine": aff.tolist()})
    mask = write_map(tmp_path / "mask.nii.gz", np.ones(shape, np.uint8), aff)
    mapstore.build_features(store, grid=str(grid), mask=str(mask), progress=False, jobs=1)
    st = mapstore.open(store)
    sel = st.select(level="group", missing="keep")
    assert len(sel) == 3 and sel.dropped["level subject (take them with level='subject' or level='any')"] == 12
    res = pool(sel)
    assert res.provenance["study_maps"] == "the studies' group maps"
    got = sel.feature_set.unmask(np.where(np.isfinite(res.z), res.z, np.nan).astype(np.float32)).reshape(shape) \
        if len(sel.voxels) == sel.feature_set.n_voxels else None
    flat = np.array([m.reshape(-1, order="C") for m in maps])
    want = np.array([stats.combine_pvalues(stats.norm.sf(flat[:, j]), method="stouffer")[0]
                     for j in range(flat.shape[1])])
    np.testing.assert_allclose(np.asarray(got).reshape(-1), want, atol=1e-4)
    with pytest.raises(mapstore.MapstoreError, match="mixes group maps"):
        pool(st.select(level="any", missing="keep"))
    # random effects need effects with variances: on z maps, refused with the reason
    with pytest.raises(mapstore.MapstoreError, match="random combines effects with their variances"):
        pool(st.select(missing="keep"), "random")


def test_where_pooling_and_decoding_agree_equals_the_hand_computation(shared, rng):
    """Reference: statsmodels' Benjamini-Hochberg on the pooled map's two-sided p, numpy's quantile for
    the top 5% of absolute weights, the signs compared by hand, on the columns both share."""
    from statsmodels.stats.multitest import multipletests

    from mapstore.analyses import conjunction

    stores, peak, _ = shared
    st = mapstore.open(stores[False])
    pooled = pool(st.select(features="own", stat=["effect"], missing="keep"))
    dec = st.select(features="own", stat=["effect"], where="study <> 'study3'")  # common columns only
    weights = rng.normal(size=len(dec.voxels))
    j = int(np.flatnonzero(dec.voxels == pooled.selection.voxels[_column_of(pooled.selection, peak)])[0])
    weights[j] = 10.0  # the decoder leans on the shared effect's voxel
    got = conjunction(pooled, weights, dec)
    common = np.intersect1d(pooled.selection.voxels, dec.voxels)
    z = pooled.z[np.searchsorted(pooled.selection.voxels, common)]
    w = weights[np.searchsorted(dec.voxels, common)]
    ok = np.isfinite(z)
    p2 = 2 * stats_norm_sf(np.abs(z[ok]))
    keep = np.zeros(len(common), bool)
    keep[np.flatnonzero(ok)] = multipletests(p2, alpha=0.05, method="fdr_bh")[0]
    want = keep & (np.abs(w) >= np.quantile(np.abs(w[ok]), 0.95)) & (np.sign(z) == np.sign(w))
    np.testing.assert_array_equal(got.columns, common)
    np.testing.assert_array_equal(got.agree, want)
    assert want[np.searchsorted(common, dec.voxels[j])]  # the shared effect's voxel is in it
    table = got.table()
    assert len(table) == want.sum() and {"z", "weight", "x_mm"} <= set(table.columns)
    img = got.to_image()
    assert np.nansum(np.abs(img.get_fdata())) == want.sum()
    assert got.provenance["pooled"]["method"] == "stouffer" and got.provenance["decoder"]["maps"] == dec.map_ids


def stats_norm_sf(x):
    from scipy import stats

    return stats.norm.sf(x)
