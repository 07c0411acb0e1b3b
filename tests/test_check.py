"""Consistency checks find planted faults; pictures decode with an independent PNG reader."""

from __future__ import annotations

import shutil

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.check import png_bytes
from mapstore.cli import main

from .conftest import make_derivative, write_json, write_map


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
    assert text.count("data:image/png;base64,") == 3 and "coverage per study" in text


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
    assert main(["check", "--store", str(store)]) == 1
    assert "p-out-of-range" in capsys.readouterr().out
    assert main(["check", "--store", str(store), "--fail-on", "never", "--format", "json",
                 "--html", str(tmp_path / "c.html")]) == 0
    assert (tmp_path / "c.html").exists()
