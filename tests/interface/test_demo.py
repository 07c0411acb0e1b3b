"""The invented demo consortium: deterministic, shaped as documented, decodable across studies."""

from __future__ import annotations

import pytest

import hashlib
import json
import shutil

import nibabel as nib
import numpy as np

import mapstore
from mapstore.demo import GRIDS, STUDIES, make_demo


def _digest(root):
    h = {}
    for p in sorted(root.rglob("*")):
        if p.is_file() and not p.is_symlink():
            h[str(p.relative_to(root))] = hashlib.sha256(p.read_bytes()).hexdigest()
    return h


def test_demo_is_deterministic(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    make_demo(a, scale=0.2)
    make_demo(b, scale=0.2)
    assert _digest(a) == _digest(b)


def test_demo_shape(demo_tree):
    assert len(STUDIES) >= 6 and len({s.lab for s in STUDIES}) >= 4
    assert any(len(s.sites) >= 2 for s in STUDIES)
    assert all(s.n_subjects >= 8 for s in STUDIES)
    assert any(s.sessions for s in STUDIES) and any(s.runs for s in STUDIES)
    assert all(2 <= len(s.contrasts) <= 4 for s in STUDIES)
    assert {st for s in STUDIES for st in s.stats} == {"t", "z", "effect", "variance"}
    shapes = {(g.shape, round(abs(g.matrix[0, 0]), 2), "L" if g.matrix[0, 0] < 0 else "R") for g in GRIDS.values()}
    assert ((91, 109, 91), 2.0, "L") in shapes and ((61, 73, 61), 3.0, "R") in shapes
    assert any(v == 1.5 for _, v, _ in shapes)
    desc = json.loads((demo_tree / "glowtrack" / "derivatives" / "firstlevel" / "dataset_description.json").read_text())
    assert desc["DatasetType"] == "derivative" and desc["GeneratedBy"]
    t_map = next(demo_tree.rglob("*stat-t_statmap.nii*"))
    assert nib.load(t_map).shape in {g.shape for g in GRIDS.values()}


@pytest.mark.slow
def test_a_decoder_trained_on_some_studies_predicts_the_others(demo_store, demo_tree, tmp_path):
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import FunctionTransformer, StandardScaler

    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    mapstore.build_features(store, "three", grid="MNI152-3mm", jobs=2, progress=False)
    mapstore.label(store, demo_tree / "concepts.json")
    st = mapstore.open(store)
    # the quarter-size demo has few subjects per study: every stat and run is kept (a subject's maps
    # stay on one side of every split, so this adds no leak, only training maps)
    sel = st.select(concepts=["visual-motion", "hand-movement", "listening", "reading", "arithmetic"],
                    y_from="concept", stat=["t", "z"], features="three", missing="zero", one_stat=False,
                    per_subject="map")
    # missing voxels as 0 ("no effect"), every voxel kept; maps z-scored one by one
    prep = FunctionTransformer(lambda a: StandardScaler().fit_transform(np.asarray(a).T).T)
    model = make_pipeline(prep, LogisticRegression(max_iter=300, C=0.01))
    scores = cross_val_score(model, sel.X, sel.y, cv=sel.splits("leave-one-group-out"))
    chance = 1 / len(set(sel.y))
    assert len(scores) == 6 and scores.mean() > 2 * chance and scores.min() > chance


def test_surface_study_pools_with_the_volume_studies(demo_store, demo_tree, tmp_path):
    from mapstore.demo import demo_decoder

    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    mapstore.label(store, demo_tree / "concepts.json")
    rep = mapstore.build_features(store, grid="fsaverage5", where="m.stat IN ('t', 'z')", jobs=2, progress=False)
    assert rep.n_problems == 0 and rep.paths.get("surface") and rep.paths.get("vol_to_surf")
    st = mapstore.open(store)
    sel = st.select(concepts=["visual-motion", "hand-movement", "listening", "reading", "arithmetic"],
                    y_from="concept", stat=["t", "z"], group_by="study", features=rep.name, missing="zero")
    st.export(tmp_path / "x", sel)
    said: list[str] = []
    table = demo_decoder(tmp_path / "x", say=said.append).to_pylist()
    by_study = {r["held_out_study"]: r for r in table}
    # a line as each fold starts: the demo's longest steps are never silent
    assert [line.split(":")[0].strip() for line in said] == [f"fitting fold {k}/7" for k in range(1, 8)]
    assert "driftwood" in by_study and len(by_study) == 7  # the surface study is one of the held-out studies
    assert by_study["driftwood"]["accuracy"] > by_study["driftwood"]["chance"]
    mean = sum(r["accuracy"] for r in table) / len(table)
    assert mean > 2 * sum(r["chance"] for r in table) / len(table)


def test_a_subjects_t_z_and_effect_maps_are_one_model_s(demo_tree):
    """z is the t through its DOF (scipy's t and normal distributions, the reference); effect / sqrt(variance)
    is the t, as one GLM writes them."""
    import nibabel as nib
    import numpy as np
    from scipy import stats

    func = demo_tree / "inkwell" / "sub-01" / "func"
    stem = "sub-01_task-glyphread_space-MNI152Lin_contrast-wordsVsConsonants_stat-{}_statmap.nii"
    t, z = (np.asarray(nib.load(str(func / stem.format(s))).dataobj, np.float64) for s in ("t", "z"))
    dof = json.loads((demo_tree / "inkwell" / "task-glyphread_statmap.json").read_text())["DegreesOfFreedom"]
    ok = np.isfinite(t) & (np.abs(t) < 6)
    np.testing.assert_allclose(z[ok], stats.norm.isf(stats.t.sf(t[ok], dof)), atol=1e-4)
    glm = next((demo_tree / "emberlight").rglob("sub-01/glm"))
    t2, e2, v2 = (np.asarray(nib.load(str(next(glm.glob(f"sentenceRead_{s}.nii.gz")))).dataobj, np.float64)
                  for s in ("t", "beta", "variance"))
    inside = v2 > 0
    assert np.corrcoef(t2[inside], (e2 / np.sqrt(v2))[inside])[0, 1] > 0.999  # the effect is stored as int16


def test_the_closing_line_says_time_disk_and_memory(tmp_path):
    from mapstore.demo import closing_line

    (tmp_path / "a").write_bytes(b"x" * 3_000_000)
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "b").write_bytes(b"x" * 1_000_000)
    line = closing_line(tmp_path, 125.4)
    assert line.startswith("done in 2 min 5 s; 4 MB written under ")
    peak = int(line.rsplit("process ", 1)[1].split()[0].replace(",", ""))
    assert 20 < peak < 100_000  # MB: this test process holds numpy at least
