"""Nothing a dataset holds goes unsaid: image files no naming takes are counted and reported, with a
name rule that would take them; a dataset that yields no maps says so.  The files are invented."""

from __future__ import annotations

import json

import mapstore

from ..conftest import make_derivative, write_map


def test_files_no_naming_takes_are_reported_with_a_rule_that_takes_them(tmp_path):
    root = make_derivative(tmp_path / "elm", "elm")
    for s in ("01", "02", "03"):
        for c in ("a", "b"):
            write_map(root / f"sub-{s}" / f"sub-{s}_task-go_contrast-{c}_beta.nii.gz")
    write_map(root / "sub-01" / "sub-01_task-go_desc-fit_rsquared.nii.gz")
    store = tmp_path / "store"
    rep = mapstore.index([root], store, progress=False, jobs=1)
    assert rep.n_maps == 0 and rep.passed_over == {"_beta.nii.gz": 6, "_rsquared.nii.gz": 1}
    assert "passed over 7 image file(s)" in rep.summary()
    st = mapstore.open(store)
    rows = {r["code"]: r for r in st.sql("SELECT * FROM problems").to_pylist()}
    assert rows["no-maps"]["level"] == "warning" and rows["unmatched-images"]["level"] == "info"
    found = [f for f in st.check().findings if f.code == "unmatched-images"]
    assert sorted(f.message.split(" image")[0] for f in found) == ["1", "6"]
    # the rule the remedy suggests takes the files, with their stat
    beta = next(f for f in found if "_beta" in f.message)
    rule = json.loads(beta.remedy.split("such as ", 1)[1].split("; it takes them as", 1)[0])
    (tmp_path / "rule.json").write_text(json.dumps(rule))
    again = mapstore.index([root], store, rules=[str(tmp_path / "rule.json")], progress=False, jobs=1)
    assert again.n_maps == 6 and again.passed_over == {"_rsquared.nii.gz": 1}
    # passed-over files are notes, not problems: nothing failed
    assert again.n_problems == 0 and again.note_codes.get("unmatched-images") and "problems:" not in again.summary()
    got = mapstore.open(store).sql("SELECT DISTINCT stat, contrast FROM maps ORDER BY contrast").to_pylist()
    assert got == [{"stat": "effect", "contrast": "a"}, {"stat": "effect", "contrast": "b"}]


def test_complex_and_five_dimensional_images_are_refused_at_index_from_the_header(tmp_path):
    """Reference: NIfTI-1 datatype codes (complex64 = 32) and dim[0] as nibabel writes them."""
    import nibabel as nib
    import numpy as np

    root = make_derivative(tmp_path / "ash", "ash")
    d = root / "sub-01"
    d.mkdir(parents=True)
    nib.save(nib.Nifti1Image(np.ones((4, 4, 4), np.complex64), np.eye(4)),
             str(d / "sub-01_task-go_contrast-a_stat-effect_statmap.nii.gz"))
    nib.save(nib.Nifti1Image(np.ones((4, 4, 4, 1, 3), np.float32), np.eye(4)),
             str(d / "sub-01_task-go_contrast-b_stat-effect_statmap.nii.gz"))
    nib.save(nib.Nifti1Image(np.ones((4, 4, 4, 1, 1), np.float32), np.eye(4)),  # singleton 5th axis: a 3-D map
             str(d / "sub-01_task-go_contrast-c_stat-effect_statmap.nii.gz"))
    rep = mapstore.index([root], tmp_path / "store", progress=False, jobs=1)
    assert rep.n_maps == 1
    got = {r["code"]: r for r in mapstore.open(tmp_path / "store").sql("SELECT * FROM problems").to_pylist()}
    assert "complex64" in got["not-real-valued"]["reason"] and "contrast-a" in got["not-real-valued"]["path"]
    assert "(4, 4, 4, 1, 3)" in got["too-many-dimensions"]["reason"]
