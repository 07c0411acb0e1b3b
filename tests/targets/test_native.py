"""Native-space volume maps reach the template through their registration, or are refused.

References: a known affine between an invented subject space and the template (so the right
answer at every template voxel is known), written as a transform file by nitransforms (ITK) or as
a FLIRT matrix by hand; nitransforms' own resampling of the same map (``nitransforms.resampling.apply``).
A naive resampling that ignores the registration must fail the same checks.  The maps are invented.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.targets import builtin_grid

from ..conftest import make_derivative, write_json

pytest.importorskip("nitransforms")

GRID = "MNI152-3mm"
TEMPLATE = "MNI152NLin2009cAsym"


def _rotation(deg: float, shift) -> np.ndarray:
    t = np.deg2rad(deg)
    a = np.eye(4)
    a[:3, :3] = [[np.cos(t), -np.sin(t), 0], [np.sin(t), np.cos(t), 0], [0, 0, 1]]
    a[:3, 3] = shift
    return a


# subject (native) millimetres = KNOWN @ template millimetres
KNOWN = _rotation(15.0, [10.0, -12.0, 6.0])
NATIVE_AFFINE = np.array([[2.0, 0, 0, -100.0], [0, 2.0, 0, -130.0], [0, 0, 2.0, -80.0], [0, 0, 0, 1]])
NATIVE_SHAPE = (100, 120, 90)


def field_mm(p: np.ndarray) -> np.ndarray:
    """The invented effect at template millimetres ``p`` (n, 3): smooth, so interpolation is near exact."""
    return np.sin(p[:, 0] / 12.0) * np.cos(p[:, 1] / 15.0) + p[:, 2] / 40.0


def native_image(known: np.ndarray = KNOWN) -> nib.Nifti1Image:
    """The field as sampled on the subject's own grid (template point = inv(known) @ subject point)."""
    ijk = np.indices(NATIVE_SHAPE).reshape(3, -1)
    native_mm = NATIVE_AFFINE[:3, :3] @ ijk + NATIVE_AFFINE[:3, 3:4]
    template_mm = np.linalg.inv(known)[:3, :3] @ native_mm + np.linalg.inv(known)[:3, 3:4]
    data = field_mm(template_mm.T).reshape(NATIVE_SHAPE).astype(np.float32)
    return nib.Nifti1Image(data, NATIVE_AFFINE)


def template_answer() -> np.ndarray:
    g = builtin_grid(GRID)
    ijk = np.indices(g.shape).reshape(3, -1)
    mm = g.affine_array[:3, :3] @ ijk + g.affine_array[:3, 3:4]
    return field_mm(mm.T).reshape(g.shape)


def write_itk(path: Path, known_ref_to_moving: np.ndarray) -> Path:
    import nitransforms as nt

    path.parent.mkdir(parents=True, exist_ok=True)
    nt.linear.Affine(known_ref_to_moving).to_filename(str(path), fmt="itk")
    return path


def _name(sub: str, space: str) -> str:
    return f"sub-{sub}/func/sub-{sub}_task-tap_space-{space}_contrast-tap_stat-effect_statmap.nii.gz"


@pytest.fixture(scope="module")
def native_store(tmp_path_factory):
    base = tmp_path_factory.mktemp("native")
    prep = base / "prep"  # the preprocessing derivative the model's dataset names in SourceDatasets
    write_json(prep / "dataset_description.json", {"Name": "prep", "BIDSVersion": "1.9.0",
                                                   "DatasetType": "derivative"})
    write_itk(prep / "sub-01" / "anat" / f"sub-01_from-T1w_to-{TEMPLATE}_mode-image_xfm.txt", KNOWN)
    glm = make_derivative(base / "glm", "pine")
    desc = json.loads((glm / "dataset_description.json").read_text())
    write_json(glm / "dataset_description.json", {**desc, "SourceDatasets": [{"URL": "../prep"}]})
    img = native_image()
    for sub, space in (("01", "T1w"), ("02", "T1w")):
        (glm / _name(sub, space)).parent.mkdir(parents=True, exist_ok=True)
        nib.save(img, str(glm / _name(sub, space)))
    # sub-03: a map in its functional space; boldref -> T1w beside it, T1w -> template in a folder given by hand
    bold_to_t1 = _rotation(-5.0, [2.0, 3.0, -4.0])  # boldref mm = bold_to_t1 @ T1w mm
    (glm / _name("03", "boldref")).parent.mkdir(parents=True, exist_ok=True)
    nib.save(native_image(bold_to_t1 @ KNOWN), str(glm / _name("03", "boldref")))
    write_itk(glm / "sub-03" / "func" / "sub-03_task-tap_from-boldref_to-T1w_mode-image_xfm.txt", bold_to_t1)
    given = base / "given"
    write_itk(given / f"sub-03_from-T1w_to-{TEMPLATE}_mode-image_xfm.txt", KNOWN)
    store = base / "store"
    rep = mapstore.index([glm], store, transforms=[given], progress=False, jobs=1)
    built = mapstore.build_features(store, grid=GRID, progress=False, jobs=1)
    return base, store, rep, built


def _row(store: Path, sub: str) -> np.ndarray:
    s = mapstore.open(store)
    fs = s.features()
    mid = s.sql(f"SELECT map_id FROM maps WHERE sub = '{sub}'")["map_id"][0].as_py()
    return fs.unmask(fs.matrix([mid])[0]).reshape(builtin_grid(GRID).shape)


def test_a_registered_native_map_lands_on_the_known_answer(native_store):
    _, store, _, built = native_store
    assert built.paths.get("registered") == 2, built.summary()
    want = template_answer()
    for sub in ("01", "03"):  # one transform file (found in the source dataset), and a chain of two
        got = _row(store, sub)
        ok = np.isfinite(got)
        assert ok.sum() > 20000
        assert np.abs(got[ok] - want[ok]).max() < 0.02  # 2 mm source voxels, linear interpolation
        assert np.corrcoef(got[ok], want[ok])[0, 1] > 0.999


def test_the_row_equals_nitransforms_resampling_and_the_naive_one_fails(native_store):
    import nitransforms as nt
    from nitransforms.resampling import apply
    from nilearn.image import resample_to_img

    base, store, _, _ = native_store
    g = builtin_grid(GRID)
    ref = nib.Nifti1Image(np.zeros(g.shape, np.float32), g.affine_array)
    src = nib.load(str(base / "glm" / _name("01", "T1w")))
    xfm = nt.linear.load(str(base / "prep" / "sub-01" / "anat" / f"sub-01_from-T1w_to-{TEMPLATE}_mode-image_xfm.txt"),
                         fmt="itk")
    theirs = np.asarray(apply(xfm, src, reference=ref, order=1, cval=np.nan).dataobj)
    ours = _row(store, "01")
    common = np.isfinite(ours) & np.isfinite(theirs)
    assert common.sum() > 20000
    assert np.corrcoef(ours[common], theirs[common])[0, 1] >= 0.99
    np.testing.assert_allclose(ours[common], theirs[common], atol=1e-3)
    # resampling the file by its own affine, as if it were in the template, fails the same check
    naive = resample_to_img(src, ref, interpolation="linear", force_resample=True, copy_header=True).get_fdata()
    both = common & (naive != 0)
    assert np.corrcoef(ours[both], naive[both])[0, 1] < 0.99


def test_a_native_map_without_registration_is_refused_with_its_reason(native_store):
    _, store, rep, built = native_store
    refused = [p for p in built.problems if "sub-02" in p.path]
    assert len(refused) == 1 and "native space 'T1w'" in refused[0].reason
    assert "sub-02_*from-T1w_to-<template>" in refused[0].reason and refused[0].code == "no-registration"
    assert "--transforms" in refused[0].remedy
    s = mapstore.open(store)
    kinds = {r["sub"]: r["space_kind"] for r in s.sql("SELECT sub, space_kind FROM maps").to_pylist()}
    assert kinds == {"01": "native", "02": "native", "03": "native"}
    regs = {r["sub"]: json.loads(r["registration"]) for r in s.sql("SELECT sub, registration FROM maps").to_pylist()}
    assert [Path(st["path"]).name for st in regs["03"]["steps"]] == [
        f"sub-03_from-T1w_to-{TEMPLATE}_mode-image_xfm.txt", "sub-03_task-tap_from-boldref_to-T1w_mode-image_xfm.txt"]
    assert "missing" in regs["02"]
    assert rep.problem_codes.get("no-registration") == 1
    found = [f for f in mapstore.open(store).check().findings if f.code == "native-no-registration"]
    assert len(found) == 1 and found[0].level == "error" and "--transforms" in found[0].remedy


def test_a_changed_registration_rebuilds_the_row(native_store, tmp_path):
    import shutil

    base, _, _, _ = native_store
    work = tmp_path / "w"
    shutil.copytree(base, work, ignore=shutil.ignore_patterns("store"))
    store = work / "store"
    mapstore.index([work / "glm"], store, transforms=[work / "given"], progress=False, jobs=1)
    mapstore.build_features(store, grid=GRID, progress=False, jobs=1)
    write_itk(work / "prep" / "sub-01" / "anat" / f"sub-01_from-T1w_to-{TEMPLATE}_mode-image_xfm.txt",
              _rotation(14.0, [10.0, -12.0, 6.0]))
    mapstore.index([work / "glm"], store, transforms=[work / "given"], progress=False, jobs=1)
    again = mapstore.build_features(store, grid=GRID, progress=False, jobs=1)
    assert again.n_built == 1 and again.n_unchanged == 1  # sub-01 only (sub-02 is still refused)


def _flirt_matrix(func: nib.Nifti1Image, std: nib.Nifti1Image, func_to_std_mm: np.ndarray) -> np.ndarray:
    """FLIRT's matrix: the moving image's scaled-voxel coordinates to the reference's (x flipped for an image
    whose affine has a positive determinant); from memory of FSL's FLIRT documentation."""
    def fsl(img):
        zooms = np.sqrt((img.affine[:3, :3] ** 2).sum(axis=0))
        m = np.diag([*zooms, 1.0])
        if np.linalg.det(img.affine) > 0:
            flip = np.eye(4)
            flip[0, 0], flip[0, 3] = -1, (img.shape[0] - 1) * zooms[0]
            m = flip @ m
        return m
    return fsl(std) @ np.linalg.inv(std.affine) @ func_to_std_mm @ func.affine @ np.linalg.inv(fsl(func))


def test_a_feat_first_level_map_goes_through_its_flirt_matrix(tmp_path):
    root = make_derivative(tmp_path / "feat", "oak")
    feat = root / "sub-01" / "tap.feat"
    (feat / "stats").mkdir(parents=True)
    (feat / "design.fsf").write_text("set fmri(level) 1\n")
    (feat / "design.con").write_text("/ContrastName1\ttap\n")
    func = native_image()
    nib.save(func, str(feat / "stats" / "cope1.nii.gz"))
    (feat / "reg").mkdir()
    nib.save(func, str(feat / "reg" / "example_func.nii.gz"))
    g = builtin_grid(GRID)
    std = nib.Nifti1Image(np.zeros(g.shape, np.float32), g.affine_array)
    nib.save(std, str(feat / "reg" / "standard.nii.gz"))
    mat = _flirt_matrix(func, std, np.linalg.inv(KNOWN))
    np.savetxt(feat / "reg" / "example_func2standard.mat", mat, fmt="%.10f")
    # a second analysis without its registration: refused
    other = root / "sub-02" / "tap.feat"
    (other / "stats").mkdir(parents=True)
    (other / "design.fsf").write_text("set fmri(level) 1\n")
    (other / "design.con").write_text("/ContrastName1\ttap\n")
    nib.save(func, str(other / "stats" / "cope1.nii.gz"))
    store = tmp_path / "store"
    mapstore.index([root], store, rules="fsl-feat", progress=False, jobs=1)
    assert mapstore.open(store).sql("SELECT count(*) n FROM maps WHERE space_kind = 'native'")["n"][0].as_py() == 2
    built = mapstore.build_features(store, grid=GRID, progress=False, jobs=1)
    assert built.n_built == 1 and built.n_problems == 1
    assert "example_func2standard.mat" in built.problems[0].reason
    got = _row(store, "01")
    want = template_answer()
    ok = np.isfinite(got)
    assert ok.sum() > 20000 and np.abs(got[ok] - want[ok]).max() < 0.02


def test_space_kinds(tmp_path):
    """Common practice: template names by family prefix (BIDS template identifiers); FEAT first level is native."""
    from mapstore.indexing._spaces import space_kind

    assert space_kind("MNI152NLin2009cAsym", str(tmp_path), "x.nii.gz") == "template"
    assert space_kind("MNI152NLin6Asym", str(tmp_path), "x.nii.gz") == "template"
    assert space_kind("T1w", str(tmp_path), "x.nii.gz") == "native"
    assert space_kind(None, str(tmp_path), "sub-01/x.nii.gz") == "unstated"
    for feat, level in (("a/run1.feat", 1), ("a/group.gfeat/cope1.feat", 1)):
        (tmp_path / feat).mkdir(parents=True)
        (tmp_path / feat / "design.fsf").write_text(f"set fmri(level) {level}\n")
    assert space_kind(None, str(tmp_path), "a/run1.feat/stats/cope1.nii.gz") == "native"
    # a higher-level (gfeat) cope's stats are in standard space, whatever its design says
    assert space_kind(None, str(tmp_path), "a/group.gfeat/cope1.feat/stats/cope1.nii.gz") == "unstated"


def _lps(a: np.ndarray) -> np.ndarray:
    """An RAS+ affine in ITK's LPS convention (x and y negated on both sides)."""
    flip = np.diag([-1.0, -1.0, 1.0, 1.0])
    return flip @ a @ flip


def test_an_itk_composite_with_a_displacement_field_as_simpleitk_maps_it(tmp_path):
    """An affine plus a nonlinear displacement field in one ITK HDF5 composite (the kind fMRIPrep leaves),
    written by SimpleITK (ITK's own transform writer); the reference is SimpleITK's ``TransformPoint``
    of each template point, where the subject map's value is known exactly."""
    sitk = pytest.importorskip("SimpleITK")
    from nilearn.image import resample_to_img

    aff = sitk.AffineTransform(3)
    aff.SetMatrix(_lps(KNOWN)[:3, :3].ravel().tolist())
    aff.SetTranslation(_lps(KNOWN)[:3, 3].tolist())
    size, origin, spacing = (51, 60, 50), (-100.0, -100.0, -80.0), 4.0  # covers the template, in LPS mm
    zz, yy, xx = np.meshgrid(*[origin[i] + spacing * np.arange(size[i]) for i in (2, 1, 0)], indexing="ij")
    field = np.stack([3 * np.sin(yy / 30), 2 * np.cos(xx / 25), np.full_like(xx, 1.5)], -1)  # mm, invented
    fimg = sitk.GetImageFromArray(field, isVector=True)
    fimg.SetOrigin(origin)
    fimg.SetSpacing((spacing,) * 3)
    composite = sitk.CompositeTransform(3)
    composite.AddTransform(aff)
    composite.AddTransform(sitk.DisplacementFieldTransform(fimg))
    prep = tmp_path / "prep"
    write_json(prep / "dataset_description.json", {"Name": "prep", "BIDSVersion": "1.9.0",
                                                   "DatasetType": "derivative"})
    (prep / "sub-01" / "anat").mkdir(parents=True)
    sitk.WriteTransform(composite, str(prep / "sub-01" / "anat" / f"sub-01_from-T1w_to-{TEMPLATE}_mode-image_xfm.h5"))
    # the subject's map: a smooth function of the subject's own millimetres
    ijk = np.indices(NATIVE_SHAPE).reshape(3, -1)
    native_mm = (NATIVE_AFFINE[:3, :3] @ ijk + NATIVE_AFFINE[:3, 3:4]).T
    src = nib.Nifti1Image(field_mm(native_mm).reshape(NATIVE_SHAPE).astype(np.float32), NATIVE_AFFINE)
    glm = make_derivative(tmp_path / "glm", "elm")
    (glm / _name("01", "T1w")).parent.mkdir(parents=True)
    nib.save(src, str(glm / _name("01", "T1w")))
    store = tmp_path / "store"
    mapstore.index([glm], store, transforms=[prep], progress=False, jobs=1)
    built = mapstore.build_features(store, grid=GRID, progress=False, jobs=1)
    assert built.paths.get("registered") == 1, built.summary()
    got = _row(store, "01")
    # the known answer at sampled template voxels: the value at SimpleITK's mapped point
    g = builtin_grid(GRID)
    rng = np.random.default_rng(3)
    vox = np.argwhere(np.isfinite(got))[rng.choice(int(np.isfinite(got).sum()), 3000, replace=False)]
    pts = (g.affine_array[:3, :3] @ vox.T + g.affine_array[:3, 3:4]).T
    flip = np.array([-1.0, -1.0, 1.0])
    mapped = np.array([np.array(composite.TransformPoint(tuple(float(c) for c in p * flip))) * flip for p in pts])
    want = field_mm(mapped)
    ours = got[tuple(vox.T)]
    assert np.abs(ours - want).max() < 0.03  # 2 mm source voxels, linear interpolation
    assert np.corrcoef(ours, want)[0, 1] > 0.999
    # the affine alone (the displacement field dropped) fails the same check, and so does no registration
    affine_only = field_mm(pts @ KNOWN[:3, :3].T + KNOWN[:3, 3])
    assert np.abs(affine_only - want).max() > 0.1
    ref = nib.Nifti1Image(np.zeros(g.shape, np.float32), g.affine_array)
    naive = resample_to_img(src, ref, interpolation="linear", force_resample=True, copy_header=True).get_fdata()
    assert np.abs(naive[tuple(vox.T)] - want).max() > 0.1


def test_a_registered_native_map_projects_onto_the_surface_as_nilearn_on_moved_meshes(native_store, tmp_path):
    """Onto fsaverage5 a native map is sampled once where each template point lies in it: the row equals
    nilearn's ``vol_to_surf`` of the native image with the fsaverage5 pial and white surfaces moved into
    the subject's millimetres by the known affine; projecting it as if it were in the template does not."""
    import shutil

    from nilearn.datasets import load_fsaverage
    from nilearn.surface import InMemoryMesh, vol_to_surf

    base, store, _, _ = native_store
    store2 = tmp_path / "s"
    shutil.copytree(store, store2)
    built = mapstore.build_features(store2, grid="fsaverage5", name="surf", progress=False, jobs=1)
    assert built.paths.get("registered+vol_to_surf") == 2, built.summary()  # sub-01 (one file), sub-03 (a chain)
    refused = [p for p in built.problems if "sub-02" in p.path]  # no registration: refused, not guessed
    assert len(refused) == 1 and "registration" in refused[0].reason
    s = mapstore.open(store2)
    fs = s.features("surf")
    proj = fs.spec.projection
    fsa = load_fsaverage("fsaverage5")
    img = native_image()

    def moved(mesh, a):  # the mesh's points in the subject's millimetres: a @ template millimetres
        xyz = np.asarray(mesh.coordinates, dtype=np.float64)
        return InMemoryMesh(xyz @ a[:3, :3].T + a[:3, 3], np.asarray(mesh.faces))

    def nilearn_rows(a):
        return np.concatenate([vol_to_surf(img, moved(fsa["pial"].parts[p], a),
                                           inner_mesh=moved(fsa["white_matter"].parts[p], a), kind=proj["kind"],
                                           interpolation=proj["interpolation"], depth=proj["depth"])
                               for p in ("left", "right")])

    mid = s.sql("SELECT map_id FROM maps WHERE sub = '01'")["map_id"][0].as_py()
    ours = fs.unmask(fs.matrix([mid])[0])
    keep = fs.mask_indices
    ref = nilearn_rows(KNOWN)
    both = np.isfinite(ours[keep]) & np.isfinite(ref[keep])
    assert both.sum() > 15000
    np.testing.assert_allclose(ours[keep][both], ref[keep][both], rtol=1e-4, atol=1e-4)
    naive = nilearn_rows(np.eye(4))  # the native image projected as if it were in the template
    assert np.corrcoef(ours[keep][both], naive[keep][both])[0, 1] < 0.99


def test_a_registered_native_map_fills_grayordinates_voxels_and_cortex(native_store, tmp_path):
    """A CIFTI template's voxels get the known field (the registration applied) and its cortex the
    surface set's projection of the same map."""
    import shutil

    from .test_surfaces import MNI2, brain_models, cifti

    base, store, _, _ = native_store
    store2 = tmp_path / "s"
    shutil.copytree(store, store2)
    ax = brain_models()
    template = cifti(tmp_path / "template.dscalar.nii", np.zeros((1, len(ax))), ax)
    grey = mapstore.build_features(store2, grid=str(template), name="grey", progress=False, jobs=1)
    assert grey.paths.get("registered+voxels+vol_to_surf") == 2, grey.summary()
    surf = mapstore.build_features(store2, grid="fsaverage5", name="surf", progress=False, jobs=1)
    assert surf.n_built == 2
    s = mapstore.open(store2)
    mid = s.sql("SELECT map_id FROM maps WHERE sub = '01'")["map_id"][0].as_py()
    g, f = s.features("grey"), s.features("surf")
    row = g.unmask(g.matrix([mid])[0])
    vox = ax.volume_mask
    mm = nib.affines.apply_affine(MNI2, ax.voxel[vox])
    assert np.abs(row[vox] - field_mm(mm)).max() < 0.02  # the known answer at the template's voxels
    cortex = f.unmask(f.matrix([mid])[0])  # NaN on the medial wall (the surface set's cortex mask)
    on = np.isfinite(cortex)
    assert on.sum() > 15000
    np.testing.assert_allclose(row[ax.surface_mask][on], cortex[on], rtol=1e-6, atol=1e-6)
