"""Parcel sets (label, probabilistic and surface atlases) and data-driven parcellations.

References: nilearn's maskers on the same inputs -- ``NiftiLabelsMasker`` (strategy "mean"),
``NiftiMapsMasker`` (least squares on the maps) and ``SurfaceLabelsMasker`` -- and nilearn's
``Parcellations`` for the fitted parcellation.  The maps and atlases are invented.
"""

from __future__ import annotations

import json
import warnings

import nibabel as nib
import numpy as np
import pytest

import mapstore
from mapstore.errors import ParameterError

from ..conftest import write_map

MNI2 = np.array([[-2.0, 0, 0, 90], [0, 2, 0, -126], [0, 0, 2, -72], [0, 0, 0, 1]])
SET = "MNI152-3mm-brain-linear-native"


def _field(rng: np.random.Generator, sign: float) -> np.ndarray:
    from scipy import ndimage

    r = ndimage.gaussian_filter(rng.normal(size=(91, 109, 91)), 5) * 80
    r[20:45] += sign * 2.0  # a left-right difference the two contrasts share, opposite in sign
    return (r + 1.0).astype(np.float32)


@pytest.fixture(scope="module")
def voxel_store(tmp_path_factory):
    """Two invented studies x two subjects x two contrasts, on a 3 mm voxel set."""
    base = tmp_path_factory.mktemp("parcels")
    rng = np.random.default_rng(11)
    for study in ("harbor", "meadow"):
        root = base / study
        root.mkdir()
        (root / "dataset_description.json").write_text(json.dumps({"Name": study, "BIDSVersion": "1.9.0",
                                                                   "DatasetType": "derivative"}))
        for sub in ("01", "02"):
            for contrast, sign in (("tools", 1.0), ("animals", -1.0)):
                write_map(root / f"sub-{sub}" / f"sub-{sub}_task-naming_space-MNI152NLin2009cAsym_contrast-"
                          f"{contrast}_stat-effect_statmap.nii.gz", _field(rng, sign), MNI2)
    store = base / "store"
    mapstore.index([base / "harbor", base / "meadow"], store, progress=False)
    mapstore.build_features(store, grid="MNI152-3mm", progress=False, jobs=2)
    return base, store


def _mask_img(fs):
    return nib.Nifti1Image(np.isfinite(fs.unmask(np.ones(fs.n_voxels))).astype(np.uint8), fs.target.affine_array)


def test_label_atlas_means_equal_nilearn_labels_masker(voxel_store):
    from nilearn.maskers import NiftiLabelsMasker

    base, store = voxel_store
    # an invented atlas on another grid (4 mm): 3 x 3 x 3 blocks of the brain box
    shape = (40, 48, 40)
    aff = np.array([[4.0, 0, 0, -80], [0, 4, 0, -114], [0, 0, 4, -70], [0, 0, 0, 1]])
    ijk = np.indices(shape)
    lab = (ijk[0] // 14) * 9 + (ijk[1] // 16) * 3 + (ijk[2] // 14) + 1
    atlas = base / "blocks.nii.gz"
    nib.save(nib.Nifti1Image(lab.astype(np.int16), aff), str(atlas))
    rep = mapstore.build_parcels(store, str(atlas), source=SET, name="blocks")
    assert rep.n_built == 8 and rep.n_features == 27
    s = mapstore.open(store)
    fs, src = s.features("blocks"), s.features(SET)
    masker = NiftiLabelsMasker(labels_img=str(atlas), mask_img=_mask_img(src), strategy="mean")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for mid in fs.map_ids[:3]:
            ref = np.ravel(masker.fit_transform(src.to_image(src.matrix([mid])[0])))
            np.testing.assert_allclose(fs.matrix([mid])[0], ref, rtol=1e-5, atol=1e-5)
    # provenance: each parcel row names the source row it was reduced from
    rows = s.sql("SELECT p.map_id, p.source_key, v.feature_key FROM features p JOIN features v USING (map_id) "
                 f"WHERE p.feature_set = 'blocks' AND v.feature_set = '{SET}'").to_pylist()
    assert len(rows) == 8 and all(r["source_key"] == r["feature_key"] for r in rows)
    # painting back: every voxel of a parcel carries the parcel's value
    vec = fs.matrix([fs.map_ids[0]])[0]
    img = fs.to_image(vec)
    vals = np.asarray(img.dataobj)
    assert vals.shape == src.target.shape
    assert set(np.round(np.unique(vals[np.isfinite(vals)]), 4)) <= set(np.round(vec, 4))
    # a second run keeps every row (same source rows, same atlas)
    again = mapstore.build_parcels(store, str(atlas), source=SET, name="blocks")
    assert again.n_built == 0 and again.n_unchanged == 8


def test_probabilistic_atlas_equals_nilearn_maps_masker(voxel_store):
    from nilearn.maskers import NiftiMapsMasker

    base, store = voxel_store
    s = mapstore.open(store)
    src = s.features(SET)
    # five invented Gaussian blobs on the set's own grid
    ijk = np.indices(src.target.shape).reshape(3, -1).T
    centres = [(20, 30, 25), (40, 30, 25), (30, 50, 30), (30, 20, 35), (30, 40, 15)]
    maps = np.stack([np.exp(-((ijk - np.array(c)) ** 2).sum(axis=1) / (2 * 5.0 ** 2)).reshape(src.target.shape)
                     for c in centres], axis=-1).astype(np.float32)
    atlas = base / "blobs.nii.gz"
    nib.save(nib.Nifti1Image(maps, src.target.affine_array), str(atlas))
    mapstore.build_parcels(store, str(atlas), source=SET, name="blobs")
    fs = mapstore.open(store).features("blobs")
    assert fs.spec.method == "maps-regression" and fs.n_voxels == 5
    masker = NiftiMapsMasker(maps_img=str(atlas), mask_img=_mask_img(src))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for mid in fs.map_ids[:3]:
            ref = np.ravel(masker.fit_transform(src.to_image(src.matrix([mid])[0])))
            np.testing.assert_allclose(fs.matrix([mid])[0], ref, rtol=1e-4, atol=1e-4)


def test_in_fold_parcellation_never_sees_test_maps(voxel_store):
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import cross_validate
    from sklearn.pipeline import make_pipeline

    _, store = voxel_store
    s = mapstore.open(store)
    sel = s.select(features=SET, group_by="study")
    pipe = make_pipeline(mapstore.ParcelReducer.for_selection(sel, n_parcels=12, method="kmeans"),
                         LogisticRegression(max_iter=500))
    splits = sel.splits("leave-one-group-out")
    res = cross_validate(pipe, sel.X, sel.y, cv=splits, return_estimator=True)
    assert len(res["estimator"]) == 2
    for est, (train, test) in zip(res["estimator"], splits):
        reducer = est.steps[0][1]
        seen = set(reducer.fit_rows_)
        test_rows = {__import__("hashlib").sha256(r.tobytes()).hexdigest() for r in np.asarray(sel.X[test], np.float32)}
        assert len(seen) == len(train) and not seen & test_rows  # fitted on the training maps only
        assert reducer.transform(sel.X[test]).shape == (len(test), int(reducer.labels_.max()) + 1)


def test_fitted_parcellation_is_stored_with_provenance_and_makes_a_set(voxel_store):
    from nilearn.regions import Parcellations

    _, store = voxel_store
    s = mapstore.open(store)
    sel = s.select(features=SET, group_by="study")
    path = mapstore.fit_parcellation(sel, "km10", n_parcels=10, method="kmeans")
    prov = json.loads((path.parent / "atlas.json").read_text())
    assert prov["maps"] == sel.map_ids and prov["method"] == "kmeans" and prov["feature_set"] == SET
    lab = np.asarray(nib.load(str(path)).dataobj)
    # nilearn's Parcellations on the same rows and mask (reference library): the same partition
    from mapstore.features._parcels import _columns_image

    mask = _columns_image(sel.feature_set, sel.voxels)
    ref = Parcellations(method="kmeans", n_parcels=10, mask=mask, smoothing_fwhm=None, standardize=False,
                        random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref.fit(sel.feature_set.target.samples_image(sel.X, mask))
    m = np.asarray(mask.dataobj) > 0
    a, b = lab[m], np.asarray(ref.labels_img_.dataobj)[m]
    assert len(set(zip(a.tolist(), b.tolist()))) == len(set(a.tolist())) == len(set(b.tolist()))
    rep = mapstore.build_parcels(store, "store:km10", source=SET)
    assert rep.n_features == len(set(a.tolist()))
    with pytest.raises(ParameterError, match="no stored parcellation 'nope'"):
        mapstore.build_parcels(store, "store:nope", source=SET)


def test_parcel_sets_check_select_and_export(voxel_store, tmp_path):
    from mapstore.select._export import verify

    base, store = voxel_store
    if "blocks" not in mapstore.open(store).feature_sets():
        test_label_atlas_means_equal_nilearn_labels_masker(voxel_store)
    s = mapstore.open(store)
    rep = s.check("blocks")
    assert rep.count("error") == 0 and any("coverage" in k for k in rep.pictures)
    sel = s.select(features="blocks", group_by="study")
    assert sel.X.shape == (8, 27)
    out = s.export(tmp_path / "x", sel)
    assert verify(tmp_path / "x" / "manifest.json").ok and out.n_features == 27
    assert json.loads((tmp_path / "x" / "manifest.json").read_text())["feature_settings"]["geometry"] == "parcels"


@pytest.fixture(scope="module")
def surface_store(tmp_path_factory):
    """Two invented studies x three subjects x two contrasts, GIFTI pairs on fsaverage5 (surface set)."""
    from nilearn.datasets import load_fsaverage

    from ..targets.test_surfaces import gifti

    base = tmp_path_factory.mktemp("surface-parcels")
    sphere = load_fsaverage("fsaverage5")["sphere"]
    rng = np.random.default_rng(12)
    for study in ("reef", "dune"):
        root = base / study
        root.mkdir()
        (root / "dataset_description.json").write_text(json.dumps({"Name": study, "BIDSVersion": "1.9.0",
                                                                   "DatasetType": "derivative"}))
        for sub in ("01", "02", "03"):
            for contrast, sign in (("tools", 1.0), ("animals", -1.0)):
                for h, part in (("L", "left"), ("R", "right")):
                    xyz = np.asarray(sphere.parts[part].coordinates) / 100
                    vals = sign * np.sin(3 * xyz[:, 0]) + np.cos(2 * xyz[:, 2]) * rng.normal() \
                        + 0.3 * rng.normal(size=len(xyz))
                    gifti(root / f"sub-{sub}" / f"sub-{sub}_task-naming_hemi-{h}_space-fsaverage5_contrast-"
                          f"{contrast}_stat-effect_statmap.func.gii", [vals])
    store = base / "store"
    mapstore.index([base / "reef", base / "dune"], store, progress=False)
    mapstore.build_features(store, grid="fsaverage5", name="surf", progress=False, jobs=2)
    return base, store


def test_surface_parcellation_equals_nilearn_and_is_stored_as_gifti_labels(surface_store):
    from nilearn.datasets import load_fsaverage
    from nilearn.regions import Parcellations
    from nilearn.surface import SurfaceImage

    _, store = surface_store
    s = mapstore.open(store)
    sel = s.select(features="surf", group_by="study")
    found = mapstore.fit_parcellation(sel, "surf-ward", n_parcels=20, method="ward")
    assert set(found) == {"left", "right"}
    prov = json.loads((found["left"].parent / "atlas.json").read_text())
    assert prov["geometry"] == "surface" and prov["maps"] == sel.map_ids
    # GIFTI 1.0 label files: one NIFTI_INTENT_LABEL (1002) array and a label table (nibabel reads them)
    imgs = {part: nib.load(str(p)) for part, p in found.items()}
    assert all(img.darrays[0].intent == 1002 and len(img.labeltable.labels) == prov["n_parcels"] + 1
               for img in imgs.values())
    got = np.concatenate([np.asarray(imgs[p].darrays[0].data) for p in ("left", "right")])
    # nilearn's Parcellations on the same rows, mask and mesh, built here by hand (reference library)
    fs = sel.feature_set
    n = fs.target.n_left
    inmask = np.zeros(2 * n, bool)
    inmask[fs.mask_indices[sel.voxels]] = True
    mesh = load_fsaverage("fsaverage5")["pial"]
    data = np.zeros((2 * n, len(sel.X)), np.float32)
    data[inmask] = np.asarray(sel.X, np.float32).T
    ref = Parcellations(method="ward", n_parcels=20, smoothing_fwhm=None, standardize=False, random_state=0,
                        mask=SurfaceImage(mesh=mesh, data={"left": inmask[:n], "right": inmask[n:]}))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref.fit(SurfaceImage(mesh=mesh, data={"left": data[:n], "right": data[n:]}))
    want = np.concatenate([np.asarray(ref.labels_img_.data.parts[p]).reshape(-1) for p in ("left", "right")])
    a, b = got[inmask], want[inmask]
    assert len(set(zip(a.tolist(), b.tolist()))) == len(set(a.tolist())) == len(set(b.tolist()))
    assert (got[~inmask] == 0).all()
    # a parcel set from it, painted back onto the mesh
    rep = mapstore.build_parcels(store, "store:surf-ward", source="surf")
    assert rep.n_features == len(set(a.tolist())) and rep.n_problems == 0
    pset = mapstore.open(store).features(rep.name)
    img = pset.to_image(pset.matrix([pset.map_ids[0]])[0])
    assert isinstance(img, SurfaceImage) and img.shape == (2 * n,)


def test_in_fold_surface_parcellation_never_sees_test_maps(surface_store):
    import hashlib

    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import cross_validate
    from sklearn.pipeline import make_pipeline

    _, store = surface_store
    sel = mapstore.open(store).select(features="surf", group_by="study")
    reducer = mapstore.ParcelReducer.for_selection(sel, n_parcels=15, method="kmeans")
    assert hasattr(reducer.mask_img, "mesh")  # a SurfaceImage mask
    splits = sel.splits("leave-one-group-out")
    res = cross_validate(make_pipeline(reducer, LogisticRegression(max_iter=500)), sel.X, sel.y, cv=splits,
                         return_estimator=True)
    for est, (train, test) in zip(res["estimator"], splits):
        fitted = est.steps[0][1]
        test_rows = {hashlib.sha256(r.tobytes()).hexdigest() for r in np.asarray(sel.X[test], np.float32)}
        assert len(fitted.fit_rows_) == len(train) and not set(fitted.fit_rows_) & test_rows
        assert fitted.transform(sel.X[test]).shape == (len(test), int(fitted.labels_.max()) + 1)
    with pytest.raises(ParameterError, match="columns"):
        reducer.fit(np.zeros((3, 7), np.float32))


def test_parcel_reducer_passes_scikit_learns_estimator_checks():
    """Reference: scikit-learn's ``check_estimator`` (every check it runs on a transformer)."""
    from sklearn.utils.estimator_checks import check_estimator

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = check_estimator(mapstore.ParcelReducer(), on_fail=None)
    failed = [(r["check_name"], repr(r["exception"])) for r in results if r["status"] == "failed"]
    assert len(results) > 30 and failed == []


def test_parcel_reducer_without_a_mask_equals_feature_agglomeration():
    """Reference: scikit-learn ``FeatureAgglomeration`` (Ward, mean pooling) on the same columns."""
    from sklearn.cluster import FeatureAgglomeration

    rng = np.random.default_rng(5)
    base = rng.normal(size=(40, 4))
    x = np.repeat(base, 6, axis=1) + rng.normal(scale=0.05, size=(40, 24))  # 4 groups of 6 alike columns
    ours = mapstore.ParcelReducer(n_parcels=4).fit(x[:30])
    ref = FeatureAgglomeration(n_clusters=4).fit(x[:30])
    # the same partition of the columns (labels may be numbered differently)
    assert len({(a, b) for a, b in zip(ours.labels_, ref.labels_)}) == 4
    got, want = ours.transform(x[30:]), ref.transform(x[30:])
    order = [int(ref.labels_[np.flatnonzero(ours.labels_ == j)[0]]) for j in range(4)]
    np.testing.assert_allclose(got, want[:, order], rtol=1e-12)


def test_parcel_reducer_names_a_bad_parameter():
    with pytest.raises(ParameterError, match="n_parcels must be a positive integer"):
        mapstore.ParcelReducer(n_parcels=0).fit(np.ones((3, 4)))
    with pytest.raises(ParameterError, match="method must be one of"):
        mapstore.ParcelReducer(method="spectral").fit(np.ones((3, 4)))
    with pytest.raises(ParameterError, match="missing='common'"):
        mapstore.ParcelReducer(n_parcels=2).fit(np.array([[1.0, np.nan], [0.0, 1.0]]))
