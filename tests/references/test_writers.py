"""Every writer's output is taken with its meaning, or named with a reason and a remedy that works.

References: files the programs wrote as nibabel's wheel ships them (AFNI, FreeSurfer, MINC 1 and 2,
SPM/ANALYZE headers), read back through nibabel's own readers; nibabel's NIfTI intent-code table for
the table of statistic kinds; formats built from their descriptions (from memory) in
``tests/writers_tree.py``.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.statkinds import STAT_KINDS, kind_for_word, stat_kind

from ..writers_tree import AFF, SHAPE, lab_tree, save, vol

NIBABEL_DATA = Path(nib.__file__).parent / "tests" / "data"
PRESETS = ["fsl-feat", "spm", "freesurfer"]


def _rows(store, q):
    return mapstore.open(store).sql(q).to_pylist()


def test_intent_codes_of_the_stat_kinds_are_nifti_s():
    # reference: nibabel's table of nifti1.h intent codes and their names
    want = {"t": "t test", "z": "z score", "F": "f test", "p": "p value", "chi2": "chi2", "r": "correlation",
            "effect": "estimate", "logp": "log10 p value", "errorts": "time series"}
    got = {k.label: [nib.nifti1.intent_codes.label[c] for c in k.intents] for k in STAT_KINDS if k.intents}
    assert got == {k: [v] for k, v in want.items()}
    # every writer word names one kind, whatever its case
    words = [w.lower() for k in STAT_KINDS for w in k.words]
    assert len(words) == len(set(words))
    assert kind_for_word("SPMT").label == "t" and stat_kind("f").label == "F"


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    base = tmp_path_factory.mktemp("writers")
    tree = lab_tree(base)
    store = base / "store"
    rep = mapstore.index([tree["lab"]], store, rules=PRESETS, progress=False, jobs=1)
    return {**tree, "store": store, "report": rep}


def _one(store, relpath_like, **cond):
    extra = "".join(f" AND {k} = '{v}'" for k, v in cond.items())
    rows = _rows(store, f"SELECT * FROM maps WHERE relpath LIKE '{relpath_like}'{extra} ORDER BY map_index")
    assert rows, relpath_like
    return rows


def test_every_image_file_of_the_lab_is_a_map_or_a_reported_line(lab):
    store, root = lab["store"], lab["lab"]
    images = []
    for dirpath, _, files in os.walk(root):
        for f in files:
            low = f.lower()
            if low.endswith((".nii", ".nii.gz", ".gii", ".hdr", ".head", ".mgh", ".mgz", ".mnc")):
                images.append(os.path.join(dirpath, f))
    ds_roots = {r["dataset"]: r["root"] for r in _rows(store, "SELECT dataset, root FROM datasets")}
    as_maps = {os.path.join(ds_roots[r["dataset"]], r["relpath"])
               for r in _rows(store, "SELECT DISTINCT dataset, relpath FROM maps")}
    problems = _rows(store, "SELECT path, code, count, remedy FROM problems")
    by_path = {p["path"]: p for p in problems}
    left = [p for p in images if p not in as_maps]
    # each left-over file is named by a row of its own or counted in a row of files named alike
    counted = {p["path"]: p["count"] for p in problems if p["code"] in ("unmatched-images", "unread-format")}
    named = [p for p in left if p in by_path]
    alike = len(left) - len(named)
    assert alike == sum(n - 1 for n in counted.values()), (left, counted)
    for p in named:
        assert by_path[p]["remedy"], p
    # what the lab has: nothing of the maps the writers wrote is passed over
    assert {os.path.basename(p) for p in left} == {"mask.nii.gz", "example_func.nii.gz", "mask.nii", "mask.hdr",
                                                    "mask.mgh", "cope1.nii.gz", "cope2.nii.gz"}
    overlay = _one(store, "lh.thick.glmdir/age/sig.mgh")[0]
    assert (overlay["geometry"], overlay["hemi"], overlay["n_vertices"], overlay["stat"],
            overlay["contrast"]) == ("surface", "L", 10242, "logp", "age")


def test_upper_case_and_twice_written_maps_are_kept_and_said(lab):
    store = lab["store"]
    z = _one(store, "sub-03/%.NII.GZ")[0]
    assert (z["stat"], z["contrast"], z["extension"]) == ("z", "ebb", ".nii.gz")
    twice = _rows(store, "SELECT reason FROM problems WHERE code = 'map-written-twice'")
    assert len(twice) == 1 and ".nii, " in twice[0]["reason"]
    desc = _one(store, "%desc-flood%")[0]
    assert desc["contrast"] == "flood" and desc["map_kind"] == "contrast"


def test_levels_from_layouts_and_entities(lab):
    store = lab["store"]
    lv = {r["relpath"]: r["level"] for r in _rows(store, "SELECT relpath, level FROM maps")}
    assert lv["group/task-tide_contrast-ebb_stat-t_statmap.nii.gz"] == "group"
    assert lv["sub-01/sub-01_task-tide_contrast-ebb_stat-t_statmap.nii.gz"] == "subject"
    # BIDS Stats Models: the node's Level in the model file (a node name saying nothing of its level)
    assert lv["node-everyone/task-swell_contrast-crest_stat-t_statmap.nii.gz"] == "group"
    assert lv["node-perRun/sub-01/sub-01_task-swell_run-1_contrast-crest_stat-t_statmap.nii.gz"] == "run"
    assert lv["node-perPerson/sub-01/sub-01_task-swell_contrast-crest_stat-t_statmap.nii.gz"] == "subject"
    # FreeSurfer's mri_glmfit fits a stack of subjects; the workflow engine's bare results say nothing
    assert {r["level"] for r in _one(store, "drift.glmdir/%")} == {"group"}


def test_feat_first_and_higher_level_in_full(lab):
    store = lab["store"]
    first = {r["relpath"].split("/")[-1]: r for r in _one(store, "run1.feat/stats/%", dataset="lab/subj07")}
    assert set(first) == {f"{k}{i}.nii.gz" for k in ("cope", "varcope", "tstat", "zstat", "pe") for i in (1, 2)} | {
        "fstat1.nii.gz", "zfstat1.nii.gz", "sigmasquareds.nii.gz", "threshac1.nii.gz"}
    assert (first["cope2.nii.gz"]["contrast"], first["cope2.nii.gz"]["stat"]) == ("stones", "effect")
    assert (first["zfstat1.nii.gz"]["contrast"], first["zfstat1.nii.gz"]["stat"]) == ("ftest1", "z")
    assert first["fstat1.nii.gz"]["dof_numerator"] == 2.0 and first["fstat1.nii.gz"]["dof"] == 116.0
    assert (first["pe1.nii.gz"]["stat"], first["pe1.nii.gz"]["map_kind"]) == ("beta", "model")
    assert {first[f]["stat"] for f in ("sigmasquareds.nii.gz", "threshac1.nii.gz")} == {"residvar", "threshac"}
    assert {(r["sub"], r["run"], r["level"]) for r in first.values()} == {("07", "1", "run")}
    # the higher level: lower-level contrast N from the inputs' design.con, the group's own contrast beside
    higher = _one(store, "beach.gfeat/%")
    got = {(r["relpath"].split("/")[1], r["relpath"].split("/")[-1]): (r["contrast"], r["group_contrast"])
           for r in higher if r["stat"] == "z"}
    assert got == {("cope1.feat", "zstat1.nii.gz"): ("shells", "group mean"),
                   ("cope1.feat", "zstat2.nii.gz"): ("shells", "older > younger"),
                   ("cope2.feat", "zstat1.nii.gz"): ("stones", "group mean"),
                   ("cope2.feat", "zstat2.nii.gz"): ("stones", "older > younger")}
    assert {(r["level"], r["n_inputs"], r["sub"]) for r in higher} == {("group", 2, None)}


def test_spm_first_and_second_level_in_every_generation(lab):
    store = lab["store"]
    for sub, fmt in (("11", "nifti1"), ("12", "nifti1-pair")):
        rows = {r["relpath"].split("/")[-1].split(".")[0]: r for r in _one(store, f"{sub}/%", dataset="lab/spm")}
        assert set(rows) == {"con_0001", "con_0002", "spmT_0001", "spmT_0002", "beta_0001", "beta_0002",
                             "beta_0003", "ResMS", "RPV"}, sub
        assert (rows["con_0002"]["contrast"], rows["con_0002"]["stat"]) == ("terns", "effect")
        assert (rows["spmT_0001"]["dof"], rows["spmT_0001"]["dof_source"]) == (40.0, "descrip")
        assert {rows[k]["stat"] for k in ("ResMS", "RPV")} == {"residvar", "rpv"}
        assert {r["file_format"] for r in rows.values()} == {fmt}
        assert {(r["sub"], r["level"]) for r in rows.values()} == {(sub, "subject")}
    # regressor names from SPM.xX.name (MATLAB v5)
    assert _one(store, "11/beta_0002.nii")[0]["contrast"] == "Sn(1) terns*bf(1)"
    second = _one(store, "gulls_model/%")
    assert {(r["level"], r["n_inputs"]) for r in second} == {("group", 2)}
    assert _one(store, "gulls_model/con_0001.nii")[0]["contrast"] == "gulls"


def test_afni_sub_bricks_are_maps_named_and_typed_by_the_header(lab, tmp_path):
    store = lab["store"]
    rows = _one(store, "%stats.subj21+tlrc.HEAD")
    assert [(r["map_index"], r["contrast"], r["stat"], r["dof"], r["dof_numerator"]) for r in rows] == [
        (0, "kelp", "effect", None, None), (1, "kelp", "t", 150.0, None), (2, "kelp_vs_sand", "effect", None, None),
        (3, "kelp_vs_sand", "t", 150.0, None), (4, "Full", "F", 150.0, 2.0)]
    assert {(r["sub"], r["level"], r["file_format"]) for r in rows} == {("21", "subject", "afni")}
    # each sub-brick's row equals nibabel's reading of that brick (reference), on the map's own grid
    img = nib.load(str(lab["afni"]))
    grid = save(nib.Nifti1Image(np.ones(SHAPE, np.uint8), img.affine), tmp_path / "grid.nii.gz")
    rep = mapstore.build_features(store, "afni", grid=str(grid), mask=str(grid), where="m.file_format = 'afni'",
                                  progress=False)
    assert rep.n_problems == 0 and rep.n_built == 5
    fs = mapstore.open(store).features("afni")
    for r in rows:
        got = fs.unmask(fs.matrix([r["map_id"]])[0]).reshape(SHAPE)
        np.testing.assert_allclose(got, np.asarray(img.dataobj[..., r["map_index"]], np.float32), atol=1e-6)


def test_a_changed_data_file_of_a_pair_is_a_changed_map(tmp_path, rng):
    ds = tmp_path / "old-spm" / "s05"
    ds.mkdir(parents=True)
    img = nib.Nifti1Pair(vol(rng), AFF)
    save(img, ds / "con_0001.img")
    store = tmp_path / "store"
    mapstore.index([tmp_path / "old-spm"], store, rules="spm", progress=False, jobs=1)
    before = _rows(store, "SELECT sha256 FROM maps")[0]["sha256"]
    data = (ds / "con_0001.img").read_bytes()
    (ds / "con_0001.img").write_bytes(data[:-4] + b"\x00\x00\x80\x3f")
    os.utime(ds / "con_0001.img", ns=(1, 2_000_000_000_000_000_000))
    rep = mapstore.index([tmp_path / "old-spm"], store, rules="spm", progress=False, jobs=1)
    assert rep.n_changed == 1 and _rows(store, "SELECT sha256 FROM maps")[0]["sha256"] != before
    os.remove(ds / "con_0001.img")
    rep = mapstore.index([tmp_path / "old-spm"], store, rules="spm", progress=False, jobs=1)
    got = _rows(store, "SELECT code, remedy FROM problems WHERE code = 'missing-data-file'")
    assert rep.n_maps == 0 and got and ".img" in got[0]["remedy"]


@pytest.mark.parametrize("name, fmt", [("minc1_1_scale.mnc", "minc1"), ("minc2_1_scale.mnc", "minc2"),
                                       ("small.mnc", "minc2"), ("test.mgz", "mgh"), ("scaled+tlrc.HEAD", "afni")])
def test_files_the_programs_wrote_read_as_nibabel_reads_them(tmp_path, name, fmt):
    """Reference: nibabel's readers of the files its wheel ships (written by MINC, FreeSurfer, AFNI)."""
    ds = tmp_path / "shipped" / "sub-01"
    ds.mkdir(parents=True)
    stem = name.split(".")[0].split("+")[0].replace("_", "")
    ext = name[name.index("+"):] if "+" in name else name[name.index("."):]
    target = ds / f"sub-01_task-ref_contrast-{stem}_stat-effect_statmap{ext}" if fmt != "afni" else ds / name
    shutil.copy(NIBABEL_DATA / name, target)
    if fmt == "afni":
        shutil.copy(NIBABEL_DATA / name.replace(".HEAD", ".BRIK"), ds / name.replace(".HEAD", ".BRIK"))
        rules = tmp_path / "rules.json"  # the shipped bucket's brick has no statistic code: a rule says it
        rules.write_text(json.dumps({"rules": [{"regex": r".*\+tlrc\.HEAD", "entities": {"stat": "effect",
                                                                                         "contrast": "scaled"}}]}))
    store = tmp_path / "store"
    rep = mapstore.index([tmp_path / "shipped"], store, progress=False, jobs=1,
                         rules=str(rules) if fmt == "afni" else None)
    assert rep.n_maps == 1, mapstore.open(store).sql("SELECT * FROM problems").to_pylist()
    row = _rows(store, "SELECT * FROM maps")[0]
    ref = nib.load(str(NIBABEL_DATA / name))
    assert row["file_format"] == fmt and row["shape"] == list(ref.shape)
    np.testing.assert_allclose(np.array(row["affine"]).reshape(4, 4), ref.affine, atol=1e-4)
    if len(ref.shape) > 3 and ref.shape[3] > 1:
        return  # a 4-D file (two frames): indexed, left out of feature sets as multi-volume maps
    grid = save(nib.Nifti1Image(np.ones(ref.shape[:3], np.uint8), ref.affine), tmp_path / "grid.nii.gz")
    built = mapstore.build_features(store, grid=str(grid), mask=str(grid), progress=False)
    assert built.n_problems == 0 and built.n_built == 1
    fs = mapstore.open(store).features()
    got = fs.unmask(fs.matrix([row["map_id"]])[0]).reshape(ref.shape[:3])
    np.testing.assert_allclose(got, np.asarray(ref.dataobj, np.float64).reshape(ref.shape[:3]), rtol=1e-5, atol=1e-6)


def test_an_analyze_header_shipped_without_its_data_is_named_and_read_once_the_data_is_there(tmp_path):
    """nibabel ships an SPM-written ANALYZE header alone; its .img is raw voxels of the header's shape and
    type (the ANALYZE 7.5 layout, from memory)."""
    ds = tmp_path / "spm99" / "s01"
    ds.mkdir(parents=True)
    shutil.copy(NIBABEL_DATA / "analyze.hdr", ds / "con_0001.hdr")
    store = tmp_path / "store"
    mapstore.index([tmp_path / "spm99"], store, rules="spm", progress=False, jobs=1)
    got = _rows(store, "SELECT code FROM problems WHERE level = 'error'")
    assert got == [{"code": "missing-data-file"}]
    hdr = nib.load(str(NIBABEL_DATA / "analyze.hdr")).header
    data = np.arange(np.prod(hdr.get_data_shape()), dtype=hdr.get_data_dtype()) % 200
    (ds / "con_0001.img").write_bytes(data.tobytes())
    rep = mapstore.index([tmp_path / "spm99"], store, rules="spm", progress=False, jobs=1)
    assert rep.n_maps == 1
    row = _rows(store, "SELECT * FROM maps")[0]
    assert row["file_format"] == "analyze" and (row["sub"], row["stat"]) == ("01", "effect")
    ref = nib.load(str(ds / "con_0001.hdr"))
    np.testing.assert_allclose(np.array(row["affine"]).reshape(4, 4), ref.affine, atol=1e-4)


def test_one_timepoint_series_and_free_text_map_names(lab):
    store = lab["store"]
    series = _one(store, "%GrayordinatesStats/zstat1.dtseries.nii")
    assert {(r["contrast"], r["stat"], r["geometry"], r["dof"]) for r in series} == {("3TIDE-0TIDE", "z",
                                                                                     "grayordinates", 300.0)}
    assert {r["sub"] for r in series} == {"9001", "9002"}
    merged = _one(store, "%sub-9001_task-tide_stat-z_statmap.dscalar.nii")
    assert [(r["map_index"], r["contrast"], r["map_kind"]) for r in merged] == [(0, "3TIDE-0TIDE", "contrast"),
                                                                               (1, "WAVE-AVG", "contrast")]


def test_a_long_series_is_refused_in_one_line(tmp_path, rng):
    from ..writers_tree import bids_derivative, cifti_series

    ds = bids_derivative(tmp_path / "series", "series")
    cifti_series(ds / "sub-01" / "sub-01_task-x_contrast-a_stat-t_statmap.dtseries.nii", rng.normal(size=(5, 40)))
    mapstore.index([ds], tmp_path / "store", progress=False, jobs=1)
    got = _rows(tmp_path / "store", "SELECT code, reason FROM problems WHERE level = 'error'")
    assert got == [{"code": "time-series", "reason": "a dense series of 5 time points, not a statistic map"}]


REMEDY_CASES = [
    # (file, stat it must become, contrast it must get, level)
    ("sub-01/sub-01_task-go_faces_zmap.nii.gz", "z", "faces", "subject"),
    ("sub-01/sub-01_task-go_r_square.nii.gz", "rsquared", None, "subject"),
    ("sub-01/sub-01_task-go_houses_effect_size.nii.gz", "effect", "houses", "subject"),
    ("results/cope3.nii.gz", "effect", "3", "unknown"),
    ("spmish/con_0002.nii", "effect", "0002", "unknown"),
    ("glm/wordsVsTones/sig.mgh", "logp", "wordsVsTones", "unknown"),
    ("sub-02/sub-02_task-go_contrast-a_beta.nii.gz", "effect", "a", "subject"),
]


@pytest.mark.parametrize("rel, stat, contrast, level", REMEDY_CASES)
def test_each_suggested_rule_applied_as_printed_takes_its_files_as_it_says(tmp_path, rng, rel, stat, contrast,
                                                                          level):
    root = tmp_path / "plain"
    path = root / rel
    if rel.endswith(".mgh"):
        save(nib.MGHImage(vol(rng), AFF), path)
    else:
        save(nib.Nifti1Image(vol(rng), AFF), path)
    store = tmp_path / "store"
    rep = mapstore.index([root], store, progress=False, jobs=1)
    assert rep.n_maps == 0 and rep.n_passed_over == 1
    remedy = _rows(store, "SELECT remedy FROM problems WHERE code = 'unmatched-images'")[0]["remedy"]
    rule_text, said = remedy.split("such as ", 1)[1].split("; it takes them as ", 1)
    assert said.startswith(f"{stat} maps")
    (tmp_path / "rule.json").write_text(rule_text)
    rep = mapstore.index([root], store, rules=[str(tmp_path / "rule.json")], progress=False, jobs=1)
    assert rep.n_maps == 1
    row = _rows(store, "SELECT stat, contrast, level, map_kind FROM maps")[0]
    assert (row["stat"], row["contrast"], row["level"]) == (stat, contrast, level)
    assert row["map_kind"] == ("contrast" if contrast else "model")


def test_companion_files_get_no_rule(tmp_path, rng):
    root = tmp_path / "plain"
    save(nib.Nifti1Image(vol(rng), AFF), root / "run1" / "mask.nii.gz")
    save(nib.Nifti1Image(vol(rng), AFF), root / "run1" / "sub-01_foo.nii.gz")
    mapstore.index([root], tmp_path / "store", progress=False, jobs=1)
    got = {r["path"].rsplit("/", 1)[1]: r["remedy"] for r in _rows(
        tmp_path / "store", "SELECT path, remedy FROM problems WHERE code = 'unmatched-images'")}
    assert got["mask.nii.gz"] == "a file a model leaves beside its maps (mask), not a statistic map: nothing to do"
    assert "such as" not in got["sub-01_foo.nii.gz"] and "'foo' names no statistic" in got["sub-01_foo.nii.gz"]


def test_level_from_origins_and_rules(tmp_path, rng):
    root = tmp_path / "plain"
    save(nib.Nifti1Image(vol(rng), AFF), root / "maps" / "faces_zmap.nii.gz")
    origins = tmp_path / "origins.yaml"
    origins.write_text("datasets:\n  'plain':\n    level: group\n    study: seaside\n")
    rule = tmp_path / "rule.json"
    rule.write_text(json.dumps({"rules": [{"regex": r"maps/(?P<contrast>[a-z]+)_zmap\.nii\.gz",
                                           "entities": {"stat": "z"}}]}))
    mapstore.index([root], tmp_path / "store", rules=str(rule), origins=origins, progress=False, jobs=1)
    got = _rows(tmp_path / "store", "SELECT level, study, participant FROM maps")
    assert got == [{"level": "group", "study": "seaside", "participant": None}]
    rule.write_text(json.dumps({"rules": [{"regex": r"maps/(?P<contrast>[a-z]+)_zmap\.nii\.gz",
                                           "entities": {"stat": "z", "level": "everyone"}}]}))
    mapstore.index([root], tmp_path / "store", rules=str(rule), progress=False, jobs=1)
    got = _rows(tmp_path / "store", "SELECT code FROM problems WHERE code = 'bad-level'")
    assert got == [{"code": "bad-level"}]


def test_freesurfer_surface_overlays_go_on_the_mesh_their_vertex_count_names(tmp_path, rng):
    """mri_glmfit on fsaverage5 writes lh./rh. glm folders of (10242, 1, 1) MGH overlays (from memory); the
    pair is one surface row, equal to the values nibabel reads from the two files."""
    root = tmp_path / "fsglm"
    values = {}
    for hemi in ("lh", "rh"):
        values[hemi] = rng.normal(size=10242).astype(np.float32)
        save(nib.MGHImage(values[hemi].reshape(-1, 1, 1), np.eye(4)), root / f"{hemi}.age.glmdir" / "older" / "gamma.mgh")
        (root / f"{hemi}.age.glmdir" / "dof.dat").write_text("57\n")
    store = tmp_path / "store"
    rep = mapstore.index([root], store, rules="freesurfer", progress=False, jobs=1)
    rows = _rows(store, "SELECT map_id, hemi, linked_map, stat, contrast, dof, level FROM maps ORDER BY hemi")
    assert rep.n_maps == 2 and [r["hemi"] for r in rows] == ["L", "R"]
    assert rows[0]["linked_map"] == rows[1]["map_id"] and {r["stat"] for r in rows} == {"effect"}
    assert {(r["contrast"], r["dof"], r["level"]) for r in rows} == {("older", 57.0, "group")}
    built = mapstore.build_features(store, grid="fsaverage5", progress=False, jobs=1)
    assert built.n_problems == 0 and built.n_built == 1
    fs = mapstore.open(store).features()
    got = fs.unmask(fs.matrix([rows[0]["map_id"]])[0])
    want = np.concatenate([values["lh"], values["rh"]])
    kept = np.isfinite(got)
    assert kept.sum() == 20484 - 654  # the fsaverage5 cortex mask leaves out 303 + 351 medial-wall vertices
    np.testing.assert_array_equal(got[kept], want[kept])


def test_a_nifti_bucket_with_afni_s_extension_is_a_map_per_sub_brick(tmp_path, rng):
    """AFNI writes a bucket to NIfTI as (x, y, z, 1, bricks) with its attributes in an extension of code 4:
    an XML of AFNI_atr elements (from memory of AFNI's NIfTI output); written here with nibabel."""
    data = rng.normal(size=SHAPE + (1, 3)).astype(np.float32)
    img = nib.Nifti1Image(data, AFF)
    xml = ('<?xml version="1.0" ?>\n<AFNI_attributes self_idcode="XYZ" ni_form="ni_group" >\n'
           '<AFNI_atr ni_type="String" ni_dimen="1" atr_name="BRICK_LABS" >\n "reef#0_Coef~reef#0_Tstat~Full_Fstat"\n'
           '</AFNI_atr>\n<AFNI_atr ni_type="float" ni_dimen="9" atr_name="BRICK_STATAUX" >\n 1 3 1 88 2 4 2 2 88\n'
           '</AFNI_atr>\n</AFNI_attributes>\n')
    img.header.extensions.append(nib.nifti1.Nifti1Extension(4, xml.encode()))
    path = save(img, tmp_path / "afni-nii" / "s31" / "stats.s31.nii.gz")
    store = tmp_path / "store"
    rep = mapstore.index([tmp_path / "afni-nii"], store, rules=str(_rule(tmp_path)), progress=False, jobs=1)
    rows = _rows(store, "SELECT * FROM maps ORDER BY map_index")
    assert rep.n_maps == 3, mapstore.open(store).sql("SELECT * FROM problems").to_pylist()
    assert [(r["map_index"], r["contrast"], r["stat"], r["dof"], r["dof_numerator"]) for r in rows] == [
        (0, "reef", "effect", None, None), (1, "reef", "t", 88.0, None), (2, "Full", "F", 88.0, 2.0)]
    assert {r["sub"] for r in rows} == {"31"}
    grid = save(nib.Nifti1Image(np.ones(SHAPE, np.uint8), AFF), tmp_path / "grid.nii.gz")
    built = mapstore.build_features(store, grid=str(grid), mask=str(grid), progress=False, jobs=1)
    assert built.n_problems == 0 and built.n_built == 3
    fs = mapstore.open(store).features()
    ref = nib.load(str(path)).get_fdata()  # nibabel's reading (reference)
    for r in rows:
        got = fs.unmask(fs.matrix([r["map_id"]])[0]).reshape(SHAPE)
        np.testing.assert_allclose(got, ref[..., 0, r["map_index"]], atol=1e-6)


def _rule(tmp_path):
    # the file has no BIDS name: a rule takes it (its stat: each brick's own from the extension)
    return save_json(tmp_path / "afni-rule.json", {"rules": [{"regex": r"(?:.*/)?stats\.[a-z0-9]+\.nii\.gz",
                                                             "entities": {"stat": "effect"}}]})


def save_json(path, doc):
    path.write_text(json.dumps(doc))
    return path
