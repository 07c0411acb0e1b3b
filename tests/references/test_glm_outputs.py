"""What GLM software really writes: nilearn's save_glm_to_bids (first and second level), FEAT and SPM
folders.  Index, features (native and z), check: no error, no zero background counted as data."""

from __future__ import annotations

import json
import shutil
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.cli import main
from mapstore.errors import FeatureError, QueryError
from mapstore.targets import zero_background
from mapstore.targets._volume import builtin_grid, mni152_brain_mask, read_volume

from ..conftest import make_derivative, write_json, write_map
from ..glm_writers import fsl_feat_folder, nilearn_outputs, spm_folder

pytestmark = pytest.mark.slow  # CI runs it; pytest -m 'not slow' skips it


@pytest.fixture(scope="module")
def glm(tmp_path_factory):
    base = tmp_path_factory.mktemp("nilearn") / "data"
    out = nilearn_outputs(base)
    store = tmp_path_factory.mktemp("nlstore") / "store"
    report = mapstore.index([base], store, progress=False)
    native = mapstore.build_features(store, progress=False)
    z = mapstore.build_features(store, "z", stat="z", progress=False)
    return {"base": base, "store": store, "index": report, "native": native, "z": z, **out}


def _rows(store, q):
    return mapstore.open(store).sql(q).to_pylist()


def test_index_has_no_error_and_model_maps_are_maps(glm):
    st = mapstore.open(glm["store"])
    assert st.sql("SELECT count(*) FROM problems WHERE level = 'error'").column(0)[0].as_py() == 0
    kinds = {(r["map_kind"], r["stat"]): r["n"] for r in _rows(
        glm["store"], "SELECT map_kind, stat, count(*) n, count(contrast) c FROM maps GROUP BY ALL")}
    # nilearn writes errorts and rsquared with no contrast: 6 + 2 first-level models, 1 group model
    assert kinds[("model", "errorts")] == 9 and kinds[("model", "rsquared")] == 9
    assert _rows(glm["store"], "SELECT count(*) n FROM maps WHERE map_kind = 'model' AND contrast IS NOT NULL"
                 )[0]["n"] == 0
    # the F contrast's effect map is 4-D: one volume per contrast row (nilearn writes (..., 2))
    f_eff = _rows(glm["store"], "SELECT DISTINCT n_volumes FROM maps WHERE contrast = 'effectsofinterest' "
                                "AND stat = 'effect'")
    assert f_eff == [{"n_volumes": 2}]
    # nilearn names no dataset: the folder name, with a warning each
    names = _rows(glm["store"], "SELECT path, reason FROM problems WHERE code = 'no-dataset-name' ORDER BY path")
    assert [r["reason"] for r in names] == [
        "dataset_description.json has no Name; the dataset is named after its folder, 'alpha-group'",
        "dataset_description.json has no Name; the dataset is named after its folder, 'glm'",
        "dataset_description.json has no Name; the dataset is named after its folder, 'beta-glm'"]


def test_participants_through_source_datasets_and_enclosing_raw(glm):
    sites = {(r["dataset"], r["sub"]): r["site"] for r in _rows(
        glm["store"], "SELECT DISTINCT dataset, sub, site FROM maps WHERE sub IS NOT NULL")}
    assert sites[("beta/beta-glm", "01")] == "east"  # beta-glm names ../beta-raw in SourceDatasets
    assert sites[("alpha/glm", "03")] == "south"
    # the raw dataset named as a source is not reported for lacking derivatives/
    assert _rows(glm["store"], "SELECT count(*) n FROM problems WHERE code = 'no-derivatives'")[0]["n"] == 0
    # a derivative indexed on its own still finds the raw dataset that encloses it
    other = glm["base"].parent / "alone"
    mapstore.index([glm["base"] / "alpha" / "derivatives" / "glm"], other, progress=False)
    got = _rows(other, "SELECT DISTINCT dataset, site FROM maps WHERE sub = '01'")
    assert got == [{"dataset": "alpha/glm", "site": "north"}]


def test_dof_from_the_design_matrix(glm):
    # convention: residual DOF = rows - rank(X) of the design matrix (ordinary least squares; nilearn's
    # RegressionResults.df_residuals); the writer computed it from nilearn's own design_matrices_
    want = {**{("alpha/glm", k): v for k, v in glm["alpha"].dof.items()},
            **{("beta/beta-glm", k): v for k, v in glm["beta"].dof.items()}}
    got = _rows(glm["store"], "SELECT DISTINCT dataset, sub, task, dof, dof_source FROM maps WHERE stat = 't' AND "
                              "sub IS NOT NULL")
    assert len(got) == len(want) == 8
    for r in got:
        assert r["dof"] == want[(r["dataset"], f"sub-{r['sub']}_task-{r['task']}")] and r["dof_source"] == "design"
    group = _rows(glm["store"], "SELECT dof FROM maps WHERE stat = 't' AND sub IS NULL")
    assert group == [{"dof": glm["group_dof"]}]  # one-sample model of 3 maps: 2


def test_features_leave_out_model_and_multi_volume_maps(glm):
    native = glm["native"]
    assert native.n_problems == 0
    assert native.left_out == {
        "multi-volume maps (e.g. an F contrast's effect, one volume per contrast row)": 8,
        "model maps (no contrast: residuals, fit; --model-maps takes them)": 18}
    st = mapstore.open(glm["store"])
    assert st.sql("SELECT DISTINCT missing_from FROM features").column(0).to_pylist() == ["model-mask"]


def _mask_coverage_reference(mask_path, grid, brain):
    """Share of the brain mask whose every linear-interpolation neighbour lies in the GLM mask.

    Outside reference: nilearn.image.resample_img (linear) of the mask as a float image; a target
    voxel is covered where the interpolated mask is 1 (all weight from inside the mask).
    """
    from nilearn.image import resample_img

    img = nib.load(mask_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = resample_img(nib.Nifti1Image(np.asarray(img.dataobj, dtype=np.float64), img.affine),
                           target_affine=grid.affine_array, target_shape=grid.shape, interpolation="linear",
                           force_resample=True, copy_header=True)
    vals = res.get_fdata().reshape(-1)[brain.indices]
    return float(np.mean(vals >= 1 - 1e-6))


def test_coverage_is_the_glm_masks_share_of_the_brain(glm):
    grid = builtin_grid("MNI152-2mm")
    brain = mni152_brain_mask(grid)
    rows = _rows(glm["store"], "SELECT f.coverage, d.root || '/' || m.model_mask AS mask, m.dataset FROM features f "
                               "JOIN maps m USING (map_id) JOIN datasets d USING (dataset) WHERE f.feature_set = "
                               "'default'")
    refs: dict[str, float] = {}
    for r in rows:
        if r["mask"] not in refs:
            refs[r["mask"]] = _mask_coverage_reference(r["mask"], grid, brain)
        assert abs(r["coverage"] - refs[r["mask"]]) < 2e-3, r
    beta = [v for k, v in refs.items() if "beta-glm" in k]
    assert beta and max(beta) < 0.7  # the cut field of view: a part of the brain only


def test_z_from_t_and_p_equals_nilearns_z(glm):
    # outside reference: nilearn's own stat-z map of the same contrast, resampled with nilearn's
    # resample_img (linear) onto the same grid; compared where every interpolation neighbour is in the mask
    from nilearn.image import resample_img

    z = glm["z"]
    assert z.n_problems == 0
    st = mapstore.open(glm["store"])
    fs = st.features("z")
    grid = builtin_grid("MNI152-2mm")
    brain = mni152_brain_mask(grid)
    rows = _rows(glm["store"], "SELECT m.map_id, m.stat, m.dof, f.conversion, d.root || '/' || m.relpath AS path "
                               "FROM maps m JOIN features f USING (map_id) JOIN datasets d USING (dataset) WHERE "
                               "f.feature_set = 'z' AND m.stat IN ('t', 'p')")
    assert {r["stat"] for r in rows} == {"t", "p"}
    t_rows = [r for r in rows if r["stat"] == "t"]
    assert len(t_rows) == 17 and all(r["conversion"] == f"t->z(dof={r['dof']:g})" for r in t_rows)
    worst = 0.0
    for r in rows:
        ref_path = r["path"].replace(f"_stat-{r['stat']}_", "_stat-z_")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = resample_img(nib.load(ref_path), target_affine=grid.affine_array, target_shape=grid.shape,
                               interpolation="linear", force_resample=True, copy_header=True)
        want = ref.get_fdata().reshape(-1)[brain.indices]
        got = fs.matrix([r["map_id"]])[0]
        ok = np.isfinite(got)
        assert ok.mean() > 0.4
        worst = max(worst, float(np.abs(got[ok] - want[ok]).max()))
    assert worst < 1e-3, worst


def test_check_finds_no_error(glm, capsys):
    for fs in ("default", "z"):
        rep = mapstore.open(glm["store"]).check(features=fs)
        assert rep.count("error") == 0, rep.summary()
        codes = {f.code for f in rep.findings}
        assert "multi-volume" in codes and "missing-entity" not in codes and "t-without-dof" not in codes
    assert main(["check", "--store", str(glm["store"])]) == 0


def test_zero_background_rule_on_a_known_mask(glm, tmp_path):
    # the same nilearn maps without their mask file: the rule finds the zero background, which is
    # exactly the outside of the mask nilearn was given (each map has data everywhere inside it)
    src = glm["base"] / "beta-glm"
    t_map = sorted(src.glob("sub-01/*_contrast-wordsminusconsonants_stat-t_statmap.nii.gz"))[0]
    vol, _ = read_volume(str(t_map))
    bg = zero_background(vol)
    np.testing.assert_array_equal(bg, ~glm["beta"].mask)
    copy = tmp_path / "beta-nomask"
    shutil.copytree(src, copy)
    for m in copy.glob("sub-*/*_mask.nii.gz"):
        m.unlink()
    store = tmp_path / "store"
    mapstore.index([copy], store, progress=False)
    mapstore.build_features(store, grid="MNI152-3mm", where="m.stat = 't'", progress=False)
    with_bg = _rows(store, "SELECT DISTINCT missing_from FROM features")
    assert with_bg == [{"missing_from": "zero-background"}]
    cov = _rows(store, "SELECT min(coverage) lo, max(coverage) hi FROM features")[0]
    kept = mapstore.build_features(store, "keep", grid="MNI152-3mm", where="m.stat = 't'", background="keep",
                                   progress=False)
    assert kept.n_problems == 0
    full = _rows(store, "SELECT min(coverage) lo FROM features WHERE feature_set = 'keep'")[0]
    assert cov["hi"] < 0.7 and full["lo"] > cov["hi"]  # keeping the zeros counts them as data


def test_p_zero_inside_the_mask_is_clipped_and_p_out_of_range_is_an_error(glm, tmp_path):
    src = glm["base"] / "beta-glm"
    copy = tmp_path / "beta"
    shutil.copytree(src, copy)
    p_map = sorted(copy.glob("sub-01/*_contrast-wordsminusconsonants_stat-p_statmap.nii.gz"))[0]
    img = nib.load(p_map)
    data = np.asarray(img.dataobj).copy()
    inside = np.argwhere(glm["beta"].mask)[len(np.argwhere(glm["beta"].mask)) // 2]
    data[tuple(inside)] = 0.0
    nib.save(nib.Nifti1Image(data, img.affine, img.header), str(p_map))
    bad = sorted(copy.glob("sub-02/*_contrast-wordsminusconsonants_stat-p_statmap.nii.gz"))[0]
    img = nib.load(bad)
    data = np.asarray(img.dataobj).copy()
    data[glm["beta"].mask] += 1.0  # a 1 + p map named p
    nib.save(nib.Nifti1Image(data, img.affine, img.header), str(bad))
    store = tmp_path / "store"
    mapstore.index([copy], store, progress=False)
    r = mapstore.build_features(store, grid="MNI152-3mm", stat="z", where="m.stat = 'p'", progress=False)
    assert r.n_problems == 1 and r.n_built == 5  # the six p maps of beta, one of them bad
    assert r.problems[0].path == str(bad)
    n_bad = int(glm["beta"].mask.sum())
    assert r.problems[0].reason == (f"{n_bad} value(s) outside [0, 1] (from {float(data[glm['beta'].mask].min()):g} "
                                       f"to {float(data.max()):g}); this is not a p map (a 1 - p or log p map?): "
                                       "rename it or leave it out of z sets")
    clipped = _rows(store, "SELECT m.relpath, f.p_clipped FROM features f JOIN maps m USING (map_id) "
                           "WHERE f.p_clipped > 0")
    assert clipped == [{"relpath": str(p_map.relative_to(copy)), "p_clipped": 1}]
    rep = mapstore.open(store).check()
    by_code = {f.code: f for f in rep.findings}
    assert by_code["p-zero-clipped"].level == "warning"
    assert by_code["feature-conversion"].level == "error" and str(bad) in by_code["feature-conversion"].message


def test_features_fail_loudly_when_every_map_fails(tmp_path, capsys):
    ds = make_derivative(tmp_path / "src" / "gamma", name="gamma")
    aff = np.diag([4.0, 4, 4, 1])
    aff[:3, 3] = [-80, -112, -60]
    for sub in ("01", "02"):
        write_map(ds / f"sub-{sub}" / f"sub-{sub}_task-go_contrast-a_stat-t_statmap.nii.gz",
                  np.ones((41, 48, 40), np.float32), aff)
    store = tmp_path / "store"
    mapstore.index([ds], store, progress=False)
    with pytest.raises(FeatureError, match="every selected map failed") as err:
        mapstore.build_features(store, grid="MNI152-3mm", stat="z", progress=False)
    assert err.value.report.n_problems == 2
    assert main(["features", "--store", str(store), "--grid", "MNI152-3mm", "--stat", "z"]) == 1
    out = capsys.readouterr()
    assert "every selected map failed (2)" in out.err and "t to z needs degrees of freedom" in out.err
    # the failures are recorded for check, which reads them
    assert main(["check", "--store", str(store), "--features", "MNI152-3mm-brain-linear-z"]) == 3


def test_bad_dof_value_is_a_warning_naming_the_file(tmp_path):
    ds = make_derivative(tmp_path / "d")
    side = write_json(ds / "task-go_statmap.json", {"DegreesOfFreedom": "seventy"})
    f = write_map(ds / "sub-01" / "sub-01_task-go_contrast-a_stat-t_statmap.nii.gz")
    store = tmp_path / "store"
    mapstore.index([ds], store, progress=False)
    prob = _rows(store, "SELECT * FROM problems WHERE code = 'bad-dof'")
    assert prob[0]["level"] == "warning" and prob[0]["path"] == str(f)
    assert prob[0]["reason"] == f"DegreesOfFreedom 'seventy' (in {side}) is not a positive number; it was ignored"


def test_labels_with_a_hyphen_are_kept_whole_with_a_warning(tmp_path):
    # pybids cuts such a label at the hyphen: parse_file_entities("sub-01_task-a-b_bold.nii.gz")["task"] == "a"
    from bids.layout import parse_file_entities

    assert parse_file_entities("/sub-01_task-a-b_bold.nii.gz")["task"] == "a"
    ds = make_derivative(tmp_path / "d")
    write_map(ds / "sub-01" / "sub-01_task-go_contrast-sentences_stat-t_statmap.nii.gz")
    bad = write_map(ds / "sub-01" / "sub-01_task-go_contrast-sentences-words_stat-t_statmap.nii.gz")
    under = write_map(ds / "sub-01" / "sub-01_task-go_contrast-faces_houses_stat-t_statmap.nii.gz")
    store = tmp_path / "store"
    mapstore.index([ds], store, progress=False)
    assert [r["contrast"] for r in _rows(store, "SELECT contrast FROM maps ORDER BY contrast")] == \
        ["faces_houses", "sentences", "sentences-words"]
    probs = {r["path"]: r for r in _rows(store, "SELECT * FROM problems WHERE code = 'label-not-alphanumeric'")}
    assert probs[str(bad)]["level"] == "warning"
    assert probs[str(bad)]["reason"] == ("contrast label 'sentences-words' holds a hyphen, which BIDS forbids inside "
                                         "a label; read as contrast 'sentences-words' (whole), not cut at the hyphen")
    assert probs[str(bad)]["remedy"] == "rename the file with contrast-sentencesWords"
    assert probs[str(under)]["reason"] == ("contrast label 'faces_houses' holds an underscore, which BIDS forbids "
                                           "inside a label; read as contrast 'faces_houses' (whole), not cut at the "
                                           "underscore")


def test_stat_options_match_case_insensitively_and_empty_selections_say_what_exists(glm):
    st = mapstore.open(glm["store"])
    upper = st.select(stat=["T"], y_from="contrast")
    lower = st.select(stat=["t"], y_from="contrast")
    assert len(upper) == len(lower) == 16  # subjects' maps: the group t map is left out by its level
    assert lower.dropped == {"level group (take them with level='group' or level='any')": 1}
    assert len(st.select(stat=["t"], level="any")) == 17
    assert len(st.select(stat=["f"])) == 8
    with pytest.raises(QueryError) as err:
        st.select(task=["nosuchtask"])
    assert str(err.value) == ("the selection is empty (dropped: none); loosen the filters. Feature set 'default' "
                              "holds 117 map(s): task listening, reading; stat F, effect, p, t, variance, z; "
                              "6 contrast(s)")


def test_fsl_feat_folder_through_the_preset(tmp_path, rng):
    # format from memory of the FEAT user guide (see tests/glm_writers.py)
    ds = make_derivative(tmp_path / "fsl", name="fslstudy")
    fsl_feat_folder(ds / "sub-01" / "task-reading.feat", ["words", "words > consonants"], 187, rng)
    store = tmp_path / "store"
    mapstore.index([ds], store, rules="fsl-feat", progress=False)
    rows = _rows(store, "SELECT sub, task, contrast, stat, dof, dof_source, model_mask FROM maps ORDER BY "
                        "contrast, stat")
    assert [(r["contrast"], r["stat"]) for r in rows] == [
        (c, s) for c in ("words", "words > consonants") for s in ("effect", "t", "variance", "z")]
    assert {(r["sub"], r["task"], r["dof"], r["dof_source"], r["model_mask"]) for r in rows} == {
        ("01", "reading", 187.0, "dof-file", "sub-01/task-reading.feat/mask.nii.gz")}
    r = mapstore.build_features(store, grid="MNI152-3mm", stat="z", progress=False)
    assert r.n_problems == 0 and r.n_built == 4  # t and z maps of two contrasts


def test_spm_folder_through_the_preset(tmp_path, rng):
    # format from memory of SPM's conventions (see tests/glm_writers.py)
    ds = make_derivative(tmp_path / "spm", name="spmstudy")
    spm_folder(ds / "sub-01" / "task-faces", [("faces > houses", "T"), ("effects of interest", "F")], 96.0, rng)
    store = tmp_path / "store"
    mapstore.index([ds], store, rules=["spm"], progress=False)
    rows = {(r["contrast"], r["stat"]): r for r in _rows(store, "SELECT * FROM maps")}
    assert set(rows) == {("faces > houses", "t"), ("faces > houses", "effect"), ("effects of interest", "F"),
                         ("effects of interest", "ess")}
    t = rows[("faces > houses", "t")]
    assert t["dof"] == 96.0 and t["dof_source"] == "descrip" and t["model_mask"] == "sub-01/task-faces/mask.nii"
    assert json.loads(t["entities"])["contrast_number"] == "0001"
    f = rows[("effects of interest", "F")]
    assert (f["dof"], f["dof_numerator"], f["dof_source"]) == (96.0, 2.0, "descrip")
    r = mapstore.build_features(store, grid="MNI152-3mm", progress=False)
    assert r.n_problems == 0 and r.n_built == 4
    # F to z through p with SPM's (df1, df2): scipy's F and normal distributions (reference)
    from scipy import stats

    z = mapstore.build_features(store, "z", grid="MNI152-3mm", stat="z", where="m.stat = 'F'", progress=False)
    assert z.n_problems == 0 and z.n_built == 1
    img = nib.load(str(tmp_path / "spm" / "sub-01" / "task-faces" / "spmF_0002.nii"))
    fvals = np.asarray(img.dataobj, dtype=np.float64)
    want = stats.norm.isf(stats.f.sf(fvals, 2.0, 96.0))
    s = mapstore.open(store)
    fs = s.features("z")
    got = fs.unmask(fs.matrix([f["map_id"]])[0]).reshape(-1)
    # converted on the map's own grid, then resampled: nilearn's resampling of scipy's z map (reference)
    from nilearn.image import resample_to_img

    tmpl = fs.to_image(np.zeros(fs.n_voxels, np.float32))
    ref = resample_to_img(nib.Nifti1Image(np.nan_to_num(want), img.affine), tmpl, interpolation="linear", force_resample=True,
                          copy_header=True).get_fdata().reshape(-1)
    both = np.isfinite(got) & np.isfinite(ref)
    assert both.sum() > 100
    np.testing.assert_allclose(got[both], ref[both], atol=1e-3)


def test_unknown_preset_is_refused_with_the_list(tmp_path):
    ds = make_derivative(tmp_path / "d")
    with pytest.raises(mapstore.MapstoreError) as err:
        mapstore.index([ds], tmp_path / "store", rules="afni", progress=False)
    assert str(err.value) == "afni: no such rules file or built-in preset; presets: freesurfer, fsl-feat, spm"


def test_the_readme_decoding_runs_on_nilearn_outputs(glm, tmp_path):
    # the README's decoding lines, on real nilearn outputs (a cut field of view included): X has no NaN
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import cross_val_score

    store = tmp_path / "store"
    shutil.copytree(glm["store"], store)
    vocab = write_json(tmp_path / "vocab.json", {
        "vocabulary": "glm-test", "version": "1",
        "concepts": {"reading": {"description": "words"}, "listening": {"description": "sounds"}},
        "rules": [{"contrast": "words*", "concepts": ["reading"]}, {"contrast": "tones*", "concepts": ["listening"]}]})
    mapstore.label(store, vocab)
    st = mapstore.open(store)
    sel = st.select("sub IS NOT NULL", concepts=["reading", "listening"], y_from="concept", group_by="subject",
                    stat=["t"])
    assert sel.meta.study.nunique() == 2 and np.isfinite(sel.X).all()
    assert sel.missing_report["dropped_voxels"] > 0  # beta's cut field of view
    scores = cross_val_score(LogisticRegression(max_iter=1000), sel.X, sel.y, cv=sel.splits("leave-one-group-out"))
    assert len(scores) == 5 and np.isfinite(scores).all()
    weights = LogisticRegression(max_iter=1000).fit(sel.X, sel.y).coef_[0]
    img = sel.to_image(weights)
    assert np.isfinite(np.asarray(img.dataobj)).sum() == sel.X.shape[1]


def test_group_maps_beside_subjects_change_no_subject_level_work(glm, tmp_path):
    """nilearn's SecondLevelModel saved by save_glm_to_bids into the first level's own folder (a real
    writer): its maps are level group; a leave-one-study-out export and pool on the tree equal the same
    on the tree without them."""
    from mapstore.analyses import pool

    from ..glm_writers import NilearnStudy, write_second_level

    plain, mixed = tmp_path / "plain", tmp_path / "mixed"
    shutil.copytree(glm["base"], plain, symlinks=True)
    shutil.copytree(glm["base"], mixed, symlinks=True)
    alpha = glm["alpha"]
    here = mixed / "alpha" / "derivatives" / "glm"
    write_second_level(here, NilearnStudy(**{**alpha.__dict__, "root": here}), "reading", "wordsminusconsonants")
    results = {}
    for name, base in (("plain", plain), ("mixed", mixed)):
        store = tmp_path / f"store-{name}"
        mapstore.index([base], store, progress=False)
        mapstore.build_features(store, progress=False)
        st = mapstore.open(store)
        sel = st.select(task=["reading"], stat=["effect"], group_by="study", y_from="contrast")
        out = st.export(tmp_path / f"out-{name}", sel, scheme="leave-one-group-out").out
        res = pool(st.select(task=["reading"], stat=["z"], group_by="study", y_from="contrast", missing="keep"),
                   "stouffer", min_subjects=2)
        results[name] = (sel, out, res)
    st = mapstore.open(tmp_path / "store-mixed")
    groups = st.sql("SELECT level, count(*) AS n FROM maps WHERE relpath LIKE 'group/%' AND dataset LIKE 'alpha/%' "
                    "GROUP BY level").to_pylist()
    assert groups and all(g["level"] == "group" for g in groups)
    (sp, op, rp), (sm, om, rm) = results["plain"], results["mixed"]
    assert len(sp) == len(sm)
    assert sm.dropped.get("level group (take them with level='group' or level='any')", 0) >= 1
    for f in ("X.npy", "y.npy", "groups.npy"):
        a, b = np.load(Path(op) / f, allow_pickle=True), np.load(Path(om) / f, allow_pickle=True)
        assert a.shape == b.shape and (a == b).all(), f
    assert json.loads((Path(op) / "manifest.json").read_text())["splits"] == \
        json.loads((Path(om) / "manifest.json").read_text())["splits"]
    np.testing.assert_array_equal(rp.z, rm.z)
    assert rp.studies == rm.studies
