"""Consistency checks find planted faults; pictures decode with an independent PNG reader."""

from __future__ import annotations

import shutil
import warnings

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.check._check import png_bytes
from mapstore.cli import main

from ..conftest import make_derivative, write_json, write_map


def _faulty_store(tmp_path):
    aff = np.diag([4.0, 4, 4, 1])
    aff[:3, 3] = [-80, -112, -60]
    shape = (41, 48, 40)
    rng = np.random.default_rng(0)
    a = make_derivative(tmp_path / "src" / "alpha", name="alpha")
    (a / "participants.tsv").write_text("participant_id\tsite\nsub-01\tS1\n")
    write_json(a / "task-go_statmap.json", {"DegreesOfFreedom": 20})
    f = a / "sub-01" / "func"
    write_map(f / "sub-01_task-go_space-MNI152Lin_contrast-a_stat-t_statmap.nii.gz",
              rng.standard_normal(shape).astype(np.float32), aff)
    write_map(f / "sub-01_task-go_space-MNI152Lin_contrast-a_stat-p_statmap.nii.gz",
              (rng.random(shape) * 5).astype(np.float32), aff)                      # p > 1
    write_map(f / "sub-01_task-go_space-MNI152Lin_contrast-a_stat-variance_statmap.nii.gz",
              -np.ones(shape, np.float32), aff)                                      # negative, constant
    far = aff.copy()
    far[:3, 3] = [5000, 5000, 5000]
    write_map(f / "sub-01_task-go_space-MNI152Lin_contrast-far_stat-t_statmap.nii.gz",
              rng.standard_normal(shape).astype(np.float32), far)                    # outside MNI
    g = a / "sub-02" / "func"                                                        # not in participants
    img = nib.Nifti1Image(rng.standard_normal(shape).astype(np.float32), aff)
    img.header["intent_code"] = 5                                                    # z intent, t name
    g.mkdir(parents=True)
    nib.save(img, str(g / "sub-02_task-go_space-MNI152NLin2009cAsym_contrast-a_stat-t_statmap.nii.gz"))
    b = make_derivative(tmp_path / "src" / "beta", name="beta")
    (b / "sub-01").mkdir(parents=True)
    shutil.copy(f / "sub-01_task-go_space-MNI152Lin_contrast-a_stat-t_statmap.nii.gz",
                b / "sub-01" / "sub-01_task-stop_contrast-a_stat-t_statmap.nii.gz")  # duplicate, no DOF, no space
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False)
    mapstore.build_features(store, grid="MNI152-3mm", jobs=1, progress=False)
    return store


def test_check_finds_planted_faults(tmp_path):
    store = _faulty_store(tmp_path)
    report = mapstore.open(store).check(min_coverage=0.5)
    codes = {(f.level, f.code) for f in report.findings}
    expected = {
        ("error", "p-out-of-range"), ("error", "negative-variance"), ("error", "constant-map"),
        ("error", "outside-mni-brain"), ("error", "no-coverage"), ("warning", "intent-disagrees"),
        ("warning", "t-without-dof"), ("warning", "duplicate-file"), ("warning", "several-spaces"),
        ("warning", "no-space-entity"), ("warning", "subject-not-in-participants"),
    }
    assert expected <= codes, expected - codes
    assert report.fails("error") and report.worst() == "error"
    dup = next(f for f in report.findings if f.code == "duplicate-file")
    assert "alpha" in dup.message and "beta" in dup.message and dup.remedy
    # a finding about one map links the map's file on the page
    neg = next(f for f in report.findings if f.code == "negative-variance")
    page = report.write_html(tmp_path / "r.html").read_text()
    uri = (tmp_path / "src").resolve().as_uri()
    assert report.files[neg.subject].endswith("stat-variance_statmap.nii.gz")
    assert f"<a href='{uri}" in page and f">{neg.subject}</a>" in page
    assert report.tables["grids"].num_rows == 2


def test_clean_demo_store_has_no_errors_beyond_planted_files(demo_store, tmp_path):
    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    mapstore.build_features(store, grid="MNI152-3mm", jobs=2, progress=False)
    report = mapstore.open(store).check()
    errors = {f.code for f in report.findings if f.level == "error"}
    assert errors == {"dangling-symlink", "truncated-header"}
    out = report.write_html(tmp_path / "r.html")
    text = out.read_text()
    assert "coverage per study" in text
    # every study is a labelled row of the per-study coverage, with a colour bar saying what colours mean
    studies = {r["study"] for r in mapstore.open(store).sql("SELECT DISTINCT m.study FROM maps m JOIN features f "
                                                           "USING (map_id)").to_pylist()}
    assert all(f"<th class='rowname'>{s} (" in text for s in studies), studies
    assert "fraction of the maps with a value" in text and "class='ticks'" in text
    assert "axial z = " in text and "<span class='mark left'>L</span>" in text
    # the axial view's top is anterior; the coronal and sagittal views' top is superior
    assert "<span class='mark top'>A</span>" in text and "<span class='mark bottom'>P</span>" in text
    assert "<span class='mark top'>S</span>" in text and "<span class='mark bottom'>I</span>" in text


def test_png_decodes_with_pillow(rng):
    # reference: Pillow's PNG decoder reads back exactly the pixels we encoded
    PIL = pytest.importorskip("PIL.Image")
    import io

    rgb = rng.integers(0, 256, (17, 23, 3), dtype=np.uint8)
    img = PIL.open(io.BytesIO(png_bytes(rgb)))
    assert img.size == (23, 17) and img.mode == "RGB"
    np.testing.assert_array_equal(np.asarray(img), rgb)


def test_check_cli_exit_codes(tmp_path, capsys):
    store = _faulty_store(tmp_path)
    assert main(["check", "--store", str(store)]) == 3  # findings: 3, a failure to run: 1
    assert "p-out-of-range" in capsys.readouterr().out
    assert main(["check", "--store", str(store), "--fail-on", "never", "--format", "json",
                 "--html", str(tmp_path / "c.html")]) == 0
    assert (tmp_path / "c.html").exists()


@pytest.fixture(scope="module")
def labelled_three(demo_store, demo_tree, tmp_path_factory):
    store = tmp_path_factory.mktemp("concepts") / "store"
    shutil.copytree(demo_store, store)
    mapstore.build_features(store, grid="MNI152-3mm", name="three", progress=False)
    mapstore.label(store, demo_tree / "concepts.json")
    return store


def test_concepts_agree_across_the_demo_studies(labelled_three):
    from mapstore.features._copies import pair_correlation

    # the quarter-size demo has ~4 maps per study and concept, so its study means are noisy: its
    # concepts agree at r 0.09-0.13 (0.30-0.35 in the full demo); a concept mixing unlike contrasts at -0.03
    st = mapstore.open(labelled_three)
    rep = st.check(features="three", min_agreement=0.05)
    assert not [f for f in rep.findings if f.code == "low-concept-agreement"]
    summary = rep.tables["concept-agreement"].to_pylist()
    assert {r["concept"] for r in summary} == {"arithmetic", "hand-movement", "listening", "reading", "visual-motion"}
    assert all(r["mean_cross_study_r"] >= 0.05 for r in summary)
    # one cell of the study x study table, recomputed with numpy from the rows
    cell = rep.tables["concept-agreement-pairs"].to_pylist()[0]
    fs = st.features("three")
    ids = {s: [r["map_id"] for r in st.sql(
        f"SELECT l.map_id FROM labels l JOIN maps m USING (map_id) WHERE l.direct AND l.concept = "
        f"'{cell['concept']}' AND m.study = '{s}' ORDER BY l.map_id").to_pylist()] for s in (cell["study_a"], cell["study_b"])}
    means = []
    for s in (cell["study_a"], cell["study_b"]):
        x = fs.matrix(ids[s]).astype(np.float64)
        x = (x - np.nanmean(x, 1, keepdims=True)) / np.nanstd(x, 1, keepdims=True)
        with np.errstate(invalid="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # voxels no map of the study covers
            means.append(np.nanmean(x, 0))
    both = np.isfinite(means[0]) & np.isfinite(means[1])
    assert abs(np.corrcoef(means[0][both], means[1][both])[0, 1] - cell["r_of_means"]) < 1e-3
    assert abs(pair_correlation(means[0], means[1])[0] - cell["r_of_means"]) < 1e-3
    pics = [k for k in rep.pictures if k == "concept:reading"]
    assert rep.titles[pics[0]].startswith("concept 'reading'")
    from PIL import Image
    import io

    img = Image.open(io.BytesIO(rep.pictures[pics[0]]))
    assert img.size[0] > 100 and img.mode == "RGB"


def test_a_concept_the_studies_disagree_on_is_flagged(labelled_three, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(labelled_three, store)
    vocab = write_json(tmp_path / "mixed.json", {
        "vocabulary": "mixed", "version": "1", "concepts": {"mixed": {"description": "unlike things"}},
        "rules": [{"study": "inkwell", "contrast": "wordsVsConsonants", "concepts": ["mixed"]},
                  {"study": "tidepool", "contrast": "rippleMotion", "concepts": ["mixed"]}]})
    mapstore.label(store, vocab)
    rep = mapstore.open(store).check(features="three", pictures=False, min_agreement=0.05)
    low = [f for f in rep.findings if f.code == "low-concept-agreement"]
    assert len(low) == 1 and low[0].subject == "mixed" and low[0].level == "warning"
    assert low[0].message.startswith("concept 'mixed': the mean maps of its 2 studies correlate at r = ")
