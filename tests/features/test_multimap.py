"""Files of several maps: a CIFTI-2 dense-scalar file and GIFTI metric files written by Connectome
Workbench's ``wb_command`` (``-cifti-merge``, ``-metric-merge``) give one catalog row and one feature
row per map.

References: the merged files are written by ``wb_command`` (the writer itself); each row's values are
compared with nibabel's reading of the same file (``Cifti2Image`` / ``GiftiImage``), map names with
what ``wb_command -file-information`` prints.  The map values and names are invented.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import mapstore

from ..conftest import make_derivative

N5 = 10242  # fsaverage5 vertices per hemisphere (nilearn's mesh)


def _wb() -> str:
    wb = shutil.which("wb_command")
    if wb is None:
        if os.environ.get("CI"):
            pytest.fail("wb_command is missing: install the Debian package connectome-workbench")
        pytest.skip("wb_command (Debian package connectome-workbench) is not installed")
    return wb


def brain_models():
    ax = nib.cifti2.BrainModelAxis.from_mask(np.ones(60, bool), name="CortexLeft") + \
        nib.cifti2.BrainModelAxis.from_mask(np.ones(50, bool), name="CortexRight")
    vm = np.zeros((91, 109, 91), bool)
    vm[40:43, 50:53, 30:32] = True
    return ax + nib.cifti2.BrainModelAxis.from_mask(vm, name="thalamus_left", affine=np.array(
        [[-2.0, 0, 0, 90], [0, 2, 0, -126], [0, 0, 2, -72], [0, 0, 0, 1]]))


def one_cifti(path: Path, values: np.ndarray, name: str, axis) -> Path:
    img = nib.Cifti2Image(values[None].astype(np.float32), header=(nib.cifti2.ScalarAxis([name]), axis))
    img.nifti_header.set_intent("ConnDenseScalar")
    nib.save(img, str(path))
    return path


def one_gifti(path: Path, values: np.ndarray, name: str, structure: str) -> Path:
    arr = nib.gifti.GiftiDataArray(values.astype(np.float32), intent="NIFTI_INTENT_TTEST",
                                   datatype="NIFTI_TYPE_FLOAT32", meta={"Name": name})
    img = nib.gifti.GiftiImage(darrays=[arr])
    img.meta["AnatomicalStructurePrimary"] = structure
    nib.save(img, str(path))
    return path


def merge(wb: str, kind: str, out: Path, parts: list[Path]) -> Path:
    flag = {"cifti": "-cifti", "metric": "-metric"}[kind]
    args = [wb, f"-{kind}-merge", str(out)]
    for p in parts:
        args += [flag, str(p)]
    subprocess.run(args, check=True, capture_output=True)
    return out


@pytest.fixture(scope="module")
def merged(tmp_path_factory):
    wb = _wb()
    tmp = tmp_path_factory.mktemp("multimap")
    parts = tmp / "parts"
    parts.mkdir()
    rng = np.random.default_rng(7)
    ax = brain_models()
    ds = make_derivative(tmp / "study", "merged maps")
    (ds / "sub-01").mkdir()
    (ds / "group").mkdir()
    # one subject's contrasts in one file; the file name has no contrast, the map names are contrasts
    names = ["faces", "houses", "tools"]
    singles = [one_cifti(parts / f"c{i}.dscalar.nii", rng.normal(size=len(ax)) + i, n, ax)
               for i, n in enumerate(names)]
    contrasts = merge(wb, "cifti", ds / "sub-01" / "sub-01_task-viewing_space-fsLR_stat-t_statmap.dscalar.nii",
                      singles)
    # stacked subjects: one contrast, one map per subject, named by the subject
    subs = [one_cifti(parts / f"s{i}.dscalar.nii", rng.normal(size=len(ax)), f"sub-0{i}", ax) for i in (2, 3, 4)]
    stacked = merge(wb, "cifti", ds / "group" / "task-viewing_space-fsLR_contrast-faces_stat-t_statmap.dscalar.nii",
                    subs)
    # a GIFTI pair of two maps per hemisphere (metric files merged by Workbench)
    hemis = {}
    for hemi, structure in (("L", "CortexLeft"), ("R", "CortexRight")):
        arrays = [one_gifti(parts / f"{hemi}{i}.func.gii", rng.normal(size=N5) + 3 * i, n, structure)
                  for i, n in enumerate(["faces", "houses"])]
        hemis[hemi] = merge(wb, "metric", ds / "sub-01" /
                            f"sub-01_task-viewing_hemi-{hemi}_space-fsaverage5_stat-t_statmap.func.gii", arrays)
    template = one_cifti(tmp / "template.dscalar.nii", np.zeros(len(ax)), "template", ax)
    store = tmp / "store"
    rep = mapstore.index([tmp / "study"], store=store, progress=False, jobs=1)
    return {"wb": wb, "store": store, "contrasts": contrasts, "stacked": stacked, "hemis": hemis,
            "template": template, "ax": ax, "rep": rep}


def _maps(store, like: str):
    return mapstore.open(store).sql(
        "SELECT map_id, map_index, map_name, contrast, sub, participant, map_kind, stat, n_volumes, linked_map "
        f"FROM maps WHERE relpath LIKE '{like}' ORDER BY map_index").to_pylist()


def test_one_catalog_row_per_map_named_as_workbench_reads_them(merged):
    info = subprocess.run([merged["wb"], "-file-information", str(merged["contrasts"])], check=True,
                          capture_output=True, text=True).stdout
    assert "Number of Maps:           3" in info
    rows = _maps(merged["store"], "sub-01/%dscalar.nii")
    assert [r["map_index"] for r in rows] == [0, 1, 2]
    assert [r["map_name"] for r in rows] == ["faces", "houses", "tools"]
    for r in rows:
        assert r["map_name"] in info  # the names wb_command prints
        assert r["contrast"] == r["map_name"] and r["map_kind"] == "contrast" and r["stat"] == "t"
        assert r["sub"] == "01" and r["n_volumes"] == 3
    assert len({r["map_id"] for r in rows}) == 3
    # stacked subjects keep their names, and the subject each name gives
    stacked = _maps(merged["store"], "group/%")
    assert [r["map_name"] for r in stacked] == ["sub-02", "sub-03", "sub-04"]
    assert [r["sub"] for r in stacked] == ["02", "03", "04"]
    assert {r["contrast"] for r in stacked} == {"faces"}
    assert len({r["participant"] for r in stacked}) == 3
    # GIFTI: the maps of the two hemispheres' files are paired map by map
    left = _maps(merged["store"], "%hemi-L%")
    right = _maps(merged["store"], "%hemi-R%")
    assert [r["contrast"] for r in left] == ["faces", "houses"]
    assert [r["linked_map"] for r in left] == [r["map_id"] for r in right]
    assert merged["rep"].n_problems == 0


def test_each_cifti_map_is_a_feature_row_equal_to_nibabel(merged, tmp_path):
    store = merged["store"]
    rep = mapstore.build_features(store, "grey", grid=str(merged["template"]), where="m.geometry = 'grayordinates'",
                                  progress=False, jobs=1)
    assert rep.n_problems == 0, rep.problem_codes
    s = mapstore.open(store)
    fs = s.features("grey")
    for path, like in ((merged["contrasts"], "sub-01/%dscalar.nii"), (merged["stacked"], "group/%")):
        ref = nib.load(str(path)).get_fdata(dtype=np.float32)  # nibabel: maps x grayordinates
        rows = _maps(store, like)
        got = fs.matrix([r["map_id"] for r in rows])
        assert got.shape == ref.shape
        np.testing.assert_array_equal(got, ref)
        # painted back: a CIFTI-2 image on the template's brain models, the same values
        img = fs.to_image(got[1])
        assert isinstance(img, nib.Cifti2Image) and img.header.get_axis(1) == merged["ax"]
        np.testing.assert_array_equal(np.asarray(img.get_fdata())[0], ref[1])
    # maps of one file are different maps: no "identical file" leakage across subjects, no duplicate finding
    sel = s.select(features="grey", where="relpath LIKE 'group/%'", group_by="subject")
    assert len(sel.splits()) == 3
    out = s.export(tmp_path / "out", sel).out
    from mapstore.select._export import verify

    assert verify(Path(out) / "manifest.json").ok
    man = json.loads((Path(out) / "manifest.json").read_text())
    assert sorted(src["map_index"] for src in man["sources"]) == [0, 1, 2]
    report = s.check("grey")
    assert not [f for f in report.findings if f.code in ("duplicate-file", "multi-volume")]


def test_each_gifti_map_pair_is_a_surface_row_equal_to_nibabel(merged):
    store = merged["store"]
    rep = mapstore.build_features(store, "fsa5", grid="fsaverage5", where="m.geometry = 'surface'",
                                  progress=False, jobs=1)
    assert rep.n_problems == 0, rep.problem_codes
    fs = mapstore.open(store).features("fsa5")
    left = _maps(store, "%hemi-L%")
    got = fs.matrix([r["map_id"] for r in left])
    for i in range(2):
        want = np.concatenate([nib.load(str(merged["hemis"][h])).darrays[i].data for h in ("L", "R")])
        np.testing.assert_array_equal(got[i], want[fs.mask_indices].astype(np.float32))


def test_reindex_keeps_the_maps_of_unchanged_files(merged, tmp_path):
    before = _maps(merged["store"], "%")
    rep = mapstore.index([Path(merged["contrasts"]).parents[1]], store=merged["store"], progress=False, jobs=1)
    assert rep.n_new == rep.n_changed == 0
    assert _maps(merged["store"], "%") == before
