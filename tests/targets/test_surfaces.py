"""Surface and grayordinate maps: indexing GIFTI and CIFTI-2 files, and surface feature sets.

References: nibabel's own GIFTI and CIFTI-2 classes write the files and read them back (reference
library); nilearn's bundled fsaverage5 gives the mesh and its vertex counts; nilearn's
``save_glm_to_bids`` writes the surface GLM outputs that are indexed.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pyarrow.parquet as pq
import pytest
from nibabel.gifti import GiftiDataArray, GiftiImage

import mapstore
from mapstore.errors import HeaderError
from mapstore.formats._header import FSAVERAGE_VERTICES, GIFTI_INTENTS, expected_vertices, read_surface_header

from ..conftest import write_map
from ..glm_writers import write_surface_first_level, write_surface_second_level

N5 = 10242


def gifti(path: Path, arrays: list[np.ndarray], intent: str = "NIFTI_INTENT_TTEST", structure: str | None = None
          ) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    img = GiftiImage(darrays=[GiftiDataArray(np.asarray(a, np.float32), intent=intent,
                                             datatype="NIFTI_TYPE_FLOAT32") for a in arrays])
    if structure:
        img.meta["AnatomicalStructurePrimary"] = structure
    nib.save(img, str(path))
    return path


def brain_models(n_left: int = N5, n_right: int = N5, voxels: bool = True):
    ax = nib.cifti2.BrainModelAxis.from_mask(np.ones(n_left, bool), name="CortexLeft") + \
        nib.cifti2.BrainModelAxis.from_mask(np.ones(n_right, bool), name="CortexRight")
    if voxels:
        vm = np.zeros((91, 109, 91), bool)
        vm[40:44, 50:53, 30:33] = True
        ax = ax + nib.cifti2.BrainModelAxis.from_mask(vm, name="thalamus_left",
                                                       affine=np.array([[-2.0, 0, 0, 90], [0, 2, 0, -126],
                                                                        [0, 0, 2, -72], [0, 0, 0, 1]]))
    return ax


def cifti(path: Path, data: np.ndarray, axis) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    data = np.atleast_2d(np.asarray(data, np.float32))
    img = nib.Cifti2Image(data, header=(nib.cifti2.ScalarAxis([f"m{i}" for i in range(len(data))]), axis))
    img.nifti_header.set_intent("ConnDenseScalar")
    nib.save(img, str(path))
    return path


def test_fsaverage5_vertex_counts_match_nilearn():
    # nilearn's bundled fsaverage5 (reference data): 10242 vertices per hemisphere, icosahedron order 5
    from nilearn.datasets import load_fsaverage

    mesh = load_fsaverage("fsaverage5")["pial"]
    assert mesh.parts["left"].n_vertices == mesh.parts["right"].n_vertices == FSAVERAGE_VERTICES["fsaverage5"]
    assert expected_vertices("fsaverage5", None) == N5
    assert expected_vertices(None, "10242") == N5  # nilearn's writer: den is the vertex count
    # 10 * 4**k + 2 vertices for icosahedron order k (common practice)
    assert all(FSAVERAGE_VERTICES[f"fsaverage{k}"] == 10 * 4 ** k + 2 for k in range(3, 8))


def test_gifti_intent_names_match_nibabel():
    # nibabel.nifti1.intent_codes (reference library) maps the nifti1.h macro names to codes
    codes = nib.nifti1.intent_codes
    for name, code in GIFTI_INTENTS.items():
        assert codes.code[name] == code, name


def test_gifti_header_facts_match_nibabel(tmp_path, rng):
    one = gifti(tmp_path / "a.func.gii", [rng.normal(size=N5)], structure="CortexLeft")
    three = gifti(tmp_path / "b.shape.gii", [rng.normal(size=642) for _ in range(3)], intent="NIFTI_INTENT_ZSCORE")
    for path in (one, three):
        ref = nib.load(str(path))  # nibabel decodes the arrays: the reference for the facts
        facts = read_surface_header(str(path))
        assert facts.n_vertices == ref.darrays[0].data.shape[0]
        assert facts.n_volumes == len(ref.darrays)
        assert facts.dtype == str(ref.darrays[0].data.dtype)
        assert facts.intent_code == nib.nifti1.intent_codes.code[ref.darrays[0].intent]
    assert read_surface_header(str(one)).structure == "CortexLeft"


def test_gifti_values_are_not_decoded(tmp_path, rng):
    # a well-formed file whose encoded values are garbage: its facts read, nibabel's decoding fails
    path = gifti(tmp_path / "a.func.gii", [rng.normal(size=N5)])
    text = path.read_text()
    start = text.index("<Data>") + 6
    path.write_text(text[:start] + "!!not base64!!" + text[text.index("</Data>"):])
    assert read_surface_header(str(path)).n_vertices == N5
    with pytest.raises(Exception):
        nib.load(str(path)).darrays[0].data


def test_bad_surface_files_name_the_file_and_the_remedy(tmp_path, rng):
    from nilearn.datasets import load_fsaverage

    mesh = load_fsaverage("fsaverage5")["pial"].parts["left"]
    surf = tmp_path / "mesh.gii"
    nib.save(GiftiImage(darrays=[GiftiDataArray(mesh.coordinates.astype(np.float32), intent="NIFTI_INTENT_POINTSET"),
                                 GiftiDataArray(mesh.faces.astype(np.int32), intent="NIFTI_INTENT_TRIANGLE")]),
             str(surf))
    cut = gifti(tmp_path / "cut.func.gii", [rng.normal(size=N5)])
    cut.write_bytes(cut.read_bytes()[:300])
    vol = tmp_path / "x.dscalar.nii"
    nib.save(nib.Nifti1Image(np.zeros((2, 2, 2), np.float32), np.eye(4)), str(vol))
    for path, code in ((surf, "no-surface-data"), (cut, "bad-gifti"), (vol, "not-cifti")):
        with pytest.raises(HeaderError) as err:
            read_surface_header(str(path))
        assert err.value.code == code and str(path) in str(err.value) and err.value.remedy


def test_cifti_header_facts_match_nibabel(tmp_path, rng):
    ax = brain_models()
    a = cifti(tmp_path / "a.dscalar.nii", rng.normal(size=(2, len(ax))), ax)
    b = cifti(tmp_path / "b.dscalar.nii", rng.normal(size=(1, len(ax))), ax)
    other = brain_models(voxels=False)
    c = cifti(tmp_path / "c.dscalar.nii", rng.normal(size=(1, len(other))), other)
    ref = nib.load(str(a))  # nibabel's CIFTI-2 axes (reference library)
    fa, fb, fc = (read_surface_header(str(p)) for p in (a, b, c))
    assert (fa.n_volumes, fa.n_vertices) == ref.shape
    assert fa.structure.split(",") == [str(s[0]).replace("CIFTI_STRUCTURE_", "")
                                       for s in ref.header.get_axis(1).iter_structures()]
    assert fa.intent_code == 3006 and not fa.warnings
    assert fa.geometry_key == fb.geometry_key != fc.geometry_key


@pytest.fixture(scope="module")
def surface_study(tmp_path_factory) -> tuple[Path, dict[str, float]]:
    """nilearn's own surface GLM outputs for two subjects, plus a CIFTI-2 map and a volume map beside them."""
    root = tmp_path_factory.mktemp("surf") / "lateral-glm"
    dofs = write_surface_first_level(root, ["01", "02"])
    desc = json.loads((root / "dataset_description.json").read_text())
    desc["Name"] = "lateral"
    (root / "dataset_description.json").write_text(json.dumps(desc))
    ax = brain_models()
    cifti(root / "sub-01" / "sub-01_task-viewing_space-fsaverage5_den-10k_contrast-faces_stat-z_statmap.dscalar.nii",
          np.random.default_rng(3).normal(size=(1, len(ax))), ax)
    return root, dofs


def test_nilearn_surface_outputs_are_indexed_with_linked_hemispheres(surface_study, tmp_path):
    root, dofs = surface_study
    store = tmp_path / "store"
    mapstore.index([root], store, progress=False)
    s = mapstore.open(store)
    assert s.sql("SELECT count(*) AS n FROM problems WHERE level = 'error'").to_pylist()[0]["n"] == 0
    rows = s.sql("SELECT * FROM maps WHERE geometry = 'surface' AND map_kind = 'contrast' ORDER BY relpath"
                 ).to_pylist()
    # nilearn writes 5 maps (effect, p, t, variance, z) per hemisphere and contrast
    assert len(rows) == 2 * 2 * 5
    by_id = {r["map_id"]: r for r in rows}
    for r in rows:
        other = by_id[r["linked_map"]]
        assert other["linked_map"] == r["map_id"] and {r["hemi"], other["hemi"]} == {"L", "R"}
        assert other["relpath"] == r["relpath"].replace(f"hemi-{r['hemi']}", f"hemi-{other['hemi']}")
        assert r["n_vertices"] == N5 and r["den"] == "10242" and r["shape"] == [N5]
        assert r["model_mask"].endswith(f"hemi-{r['hemi']}_den-10242_mask.gii")
        assert r["dof"] == dofs[f"sub-{r['sub']}"] and r["dof_source"] == "design"
        assert r["affine"] is None and not r["header_warnings"]
    assert len({(r["grid_id"], r["hemi"]) for r in rows}) == 2  # one mesh per hemisphere
    # model maps: nilearn writes residuals with one data array per scan
    resid = s.sql("SELECT n_volumes, n_vertices FROM maps WHERE stat = 'errorts'").to_pylist()
    assert len(resid) == 4 and all(r == {"n_volumes": 40, "n_vertices": N5} for r in resid)
    (grey,) = s.sql("SELECT * FROM maps WHERE geometry = 'grayordinates'").to_pylist()
    assert grey["n_vertices"] == len(brain_models()) and grey["structures"].startswith("CORTEX_LEFT,CORTEX_RIGHT")
    assert grey["den"] == "10k" and grey["hemi"] is None


def test_unpaired_hemisphere_is_reported_and_volume_sets_leave_surfaces_out(surface_study, tmp_path):
    import shutil

    root = tmp_path / "copy"
    shutil.copytree(surface_study[0], root)
    for p in root.glob("sub-02/*hemi-R*_stat-t_statmap.gii"):
        p.unlink()
    write_map(root / "sub-02" / "sub-02_task-viewing_space-MNI152NLin2009cAsym_contrast-faces_stat-t_statmap.nii.gz",
              np.ones((91, 109, 91), np.float32), np.array([[-2.0, 0, 0, 90], [0, 2, 0, -126], [0, 0, 2, -72],
                                                           [0, 0, 0, 1]]))
    store = tmp_path / "store"
    mapstore.index([root], store, progress=False)
    s = mapstore.open(store)
    findings = s.check(pictures=False).findings
    found = [f for f in findings if f.code == "unpaired-hemisphere"]
    assert len(found) == 1 and "1 hemi-L map(s)" in found[0].message
    # the volume checks see the one volume map only: no mixed grids, no field of view outside the brain
    assert {f.code for f in findings if f.check in ("grid", "space")} <= {"multi-volume", "surface-space"}
    rep = mapstore.build_features(store, progress=False, jobs=1)
    assert rep.n_built == 1
    assert rep.left_out["surface maps (a volume set takes volume maps only)"] == 2 * (5 + 2) * 2 - 1  # (5 contrast + 2 model maps) x 2 hemispheres x 2 subjects, one removed
    assert rep.left_out["grayordinates maps (a volume set takes volume maps only)"] == 1


MNI2 = np.array([[-2.0, 0, 0, 90], [0, 2, 0, -126], [0, 0, 2, -72], [0, 0, 0, 1]])


def smooth_volume(seed: int) -> np.ndarray:
    """A smooth random field on the MNI 2 mm grid, no zeros (no background)."""
    from scipy import ndimage

    r = np.random.default_rng(seed).normal(size=(91, 109, 91))
    return (ndimage.gaussian_filter(r, 4) * 50 + 3).astype(np.float32)


@pytest.fixture(scope="module")
def pooled(surface_study, tmp_path_factory):
    """The nilearn surface study, a volume study, an fsaverage4 pair and an unpaired hemisphere: one store."""
    base = tmp_path_factory.mktemp("pooled")
    vol = base / "volumetric"
    (vol / "dataset_description.json").parent.mkdir(parents=True)
    (vol / "dataset_description.json").write_text(json.dumps({"Name": "volumetric", "BIDSVersion": "1.9.0",
                                                              "DatasetType": "derivative"}))
    v1 = smooth_volume(1)
    v2 = smooth_volume(2)
    v2[:, :40] = np.nan  # a posterior part missing
    for sub, data in (("01", v1), ("02", v2)):
        write_map(vol / f"sub-{sub}" / f"sub-{sub}_task-viewing_space-MNI152NLin2009cAsym_contrast-faces_stat-t_"
                  "statmap.nii.gz", data, MNI2)
    coarse = base / "coarse"
    (coarse / "dataset_description.json").parent.mkdir(parents=True)
    (coarse / "dataset_description.json").write_text(json.dumps({"Name": "coarse", "BIDSVersion": "1.9.0",
                                                                 "DatasetType": "derivative"}))
    rng = np.random.default_rng(9)
    field4 = {h: rng.normal(size=2562) for h in "LR"}
    for h in "LR":
        gifti(coarse / "sub-01" / f"sub-01_task-viewing_hemi-{h}_space-fsaverage4_contrast-faces_stat-t_statmap"
              ".func.gii", [field4[h]])
    field6 = rng.normal(size=40962)
    gifti(coarse / "sub-02" / "sub-02_task-viewing_hemi-L_space-fsaverage6_contrast-faces_stat-t_statmap.func.gii",
          [field6])
    store = base / "store"
    mapstore.index([surface_study[0], vol, coarse], store, progress=False)
    rep = mapstore.build_features(store, grid="fsaverage5", progress=False, jobs=2)
    return {"store": store, "vol": vol, "coarse": coarse, "v": (v1, v2), "field4": field4, "field6": field6,
            "report": rep, "surface": surface_study[0]}


def _row(store, relpath_like: str):
    s = mapstore.open(store)
    fs = s.features("fsaverage5-cortex-native")
    (mid,) = [r["map_id"] for r in s.sql(f"SELECT map_id FROM maps WHERE relpath LIKE '{relpath_like}'").to_pylist()]
    full = np.full(fs.target.n_vertices, np.nan, np.float32)
    full[fs.mask_indices] = fs.matrix([mid])[0]
    return fs, mid, full


def test_surface_set_joins_hemispheres_left_then_right(pooled):
    from nilearn.datasets import load_fsaverage

    assert pooled["report"].n_problems == 0, pooled["report"].problems
    fs, mid, full = _row(pooled["store"], "%sub-01_task-viewing_hemi-L_den-10242_contrast-facesminusplaces_stat-z%")
    assert fs.target.kind == "surface" and full.size == 2 * N5
    root = pooled["surface"] / "sub-01"
    # nibabel reads the two files nilearn wrote (reference): the row is left's values, then right's
    ref = np.concatenate([nib.load(str(root / f"sub-01_task-viewing_hemi-{h}_den-10242_contrast-facesminusplaces_"
                                              "stat-z_statmap.gii")).darrays[0].data for h in "LR"])
    keep = fs.mask_indices
    np.testing.assert_array_equal(full[keep], ref[keep].astype(np.float32))
    # the medial wall is missing: not in the mask, NaN in the image
    assert fs.n_voxels < 2 * N5 and np.isnan(np.delete(full, keep)).all()
    img = fs.to_image(fs.matrix([mid])[0])
    mesh = load_fsaverage("fsaverage5")["pial"]
    assert img.mesh.parts["left"].n_vertices == mesh.parts["left"].n_vertices == N5
    np.testing.assert_array_equal(np.asarray(img.data.parts["right"]), full[N5:])


def test_volume_map_row_equals_vol_to_surf_by_hand(pooled):
    from nilearn.datasets import load_fsaverage
    from nilearn.surface import vol_to_surf

    fsa = load_fsaverage("fsaverage5")
    fs = mapstore.open(pooled["store"]).features("fsaverage5-cortex-native")
    proj = fs.spec.projection
    for sub, data in zip(("01", "02"), pooled["v"]):
        _, _, full = _row(pooled["store"], f"sub-{sub}/%space-MNI152%")
        img = nib.Nifti1Image(np.nan_to_num(data, nan=0.0), MNI2)
        mask = None if np.isfinite(data).all() else nib.Nifti1Image(np.isfinite(data).astype(np.uint8), MNI2)
        # nilearn's vol_to_surf called by hand with the parameters the set records (reference library)
        ref = np.concatenate([vol_to_surf(img, fsa["pial"].parts[p], inner_mesh=fsa["white_matter"].parts[p],
                                          kind=proj["kind"], interpolation=proj["interpolation"],
                                          depth=proj["depth"], mask_img=mask) for p in ("left", "right")])
        keep = fs.mask_indices
        np.testing.assert_allclose(full[keep], ref[keep], rtol=1e-5, atol=1e-4, equal_nan=True)
        if sub == "02":
            assert np.isnan(full[keep]).any() and np.isfinite(full[keep]).any()


def test_densities_resample_by_nearest_vertex_on_the_sphere(pooled):
    from nilearn.datasets import load_fsaverage
    from scipy.spatial import cKDTree

    sphere = load_fsaverage("fsaverage5")["sphere"]
    _, _, full = _row(pooled["store"], "%hemi-L_space-fsaverage4%")
    for h, part, sl in (("L", "left", slice(0, N5)), ("R", "right", slice(N5, 2 * N5))):
        xyz = np.asarray(sphere.parts[part].coordinates)
        # scipy's KD-tree nearest neighbour on nilearn's fsaverage5 sphere; fsaverage4 is its first 2562 vertices
        _, idx = cKDTree(xyz[:2562]).query(xyz)
        want = pooled["field4"][h][idx].astype(np.float32)
        got = full[sl]
        ok = np.isfinite(got)
        np.testing.assert_array_equal(got[ok], want[ok])
    # a finer density is subsampled (the coarser mesh's vertices come first); an unpaired left hemisphere
    fs, mid, full6 = _row(pooled["store"], "%hemi-L_space-fsaverage6%")
    ok = np.isfinite(full6[:N5])
    np.testing.assert_array_equal(full6[:N5][ok], pooled["field6"][:N5][ok].astype(np.float32))
    assert np.isnan(full6[N5:]).all()
    s = mapstore.open(pooled["store"])
    (row,) = s.sql(f"SELECT coverage, missing_from, resample_path FROM features WHERE map_id = '{mid}'").to_pylist()
    assert row["missing_from"] == "no-hemi-R" and 0.45 < row["coverage"] < 0.55
    assert row["resample_path"] == "nested-vertex:40962"  # the subsampling path


def test_surface_selection_export_and_leakage_guard(pooled, tmp_path):
    s = mapstore.open(pooled["store"])
    sel = s.select(features="fsaverage5-cortex-native", stat=["t", "z"], group_by="study", missing="zero")
    # hemisphere pairs are one map each: no right-hemisphere file counted as missing a row
    assert "no feature row" not in sel.dropped
    assert set(sel.meta["study"]) == {"lateral", "volumetric", "coarse"}
    assert sel.X.shape == (len(sel), s.features("fsaverage5-cortex-native").n_voxels)
    img = sel.to_image(sel.X[0])
    assert img.shape == (2 * N5,)
    with pytest.warns(UserWarning, match="unseen test classes"):  # each study's own contrast names
        splits = sel.splits("leave-one-group-out", allow_unseen=True)
    for train, test in splits:
        assert not set(sel.meta["participant"].iloc[train]) & set(sel.meta["participant"].iloc[test])
    with pytest.warns(UserWarning, match="unseen test classes"):
        rep = s.export(tmp_path / "out", sel, allow_unseen=True)
    from mapstore.select._export import verify

    assert verify(Path(rep.out) / "manifest.json").ok
    man = json.loads((Path(rep.out) / "manifest.json").read_text())
    assert man["feature_settings"]["geometry"] == "surface"
    # the surface set is remade from the manifest alone, row for row
    again = mapstore.rebuild(Path(rep.out) / "manifest.json", [pooled["surface"], pooled["vol"], pooled["coarse"]],
                             tmp_path / "again")
    assert again.ok, again.summary()
    # X's columns say where they are without mapstore: hemisphere and vertex, and a mask per hemisphere
    # that nibabel reads with the mesh's vertex count
    cols = pq.read_table(Path(rep.out) / "columns.parquet").to_pandas()
    assert set(cols["hemi"]) == {"L", "R"} and cols["vertex"].between(0, N5 - 1).all()
    flat = np.where(cols["hemi"] == "R", cols["vertex"] + N5, cols["vertex"])
    np.testing.assert_array_equal(flat, cols["grid_index"])
    for hemi in ("L", "R"):
        gii = nib.load(str(Path(rep.out) / f"mask_hemi-{hemi}.func.gii"))
        inside = np.flatnonzero(gii.darrays[0].data > 0)
        np.testing.assert_array_equal(inside, np.sort(cols.loc[cols["hemi"] == hemi, "vertex"].to_numpy()))
    assert s.check("fsaverage5-cortex-native").count("error") == 0


def test_surface_parcels_equal_nilearn_surface_labels_masker(pooled):
    from nilearn.datasets import load_fsaverage
    from nilearn.maskers import SurfaceLabelsMasker
    from nilearn.surface import SurfaceImage

    fsa = load_fsaverage("fsaverage5")
    # invented parcels: sphere octants, numbered per hemisphere (1..8 left, 11..18 right)
    labels = []
    for part, offset in (("left", 1), ("right", 11)):
        xyz = np.asarray(fsa["sphere"].parts[part].coordinates)
        labels.append(offset + (xyz[:, 0] > 0) * 4 + (xyz[:, 1] > 0) * 2 + (xyz[:, 2] > 0))
    labels = np.concatenate(labels).astype(np.int64)
    rep = mapstore.build_parcels(pooled["store"], labels, source="fsaverage5-cortex-native", name="octants")
    assert rep.n_features == 16
    s = mapstore.open(pooled["store"])
    fs, src = s.features("octants"), s.features("fsaverage5-cortex-native")
    cortex = np.zeros(2 * N5, bool)
    cortex[src.mask_indices] = True
    masker = SurfaceLabelsMasker(
        labels_img=SurfaceImage(mesh=fsa["pial"], data={"left": labels[:N5], "right": labels[N5:]}),
        mask_img=SurfaceImage(mesh=fsa["pial"], data={"left": cortex[:N5], "right": cortex[N5:]}))
    ids = s.sql("SELECT map_id FROM features WHERE feature_set = 'octants' AND coverage = 1 AND map_id IN "
                "(SELECT map_id FROM features WHERE feature_set = 'fsaverage5-cortex-native' AND coverage = 1)"
                ).column(0).to_pylist()
    assert ids
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for mid in ids[:3]:
            ref = np.ravel(masker.fit_transform(src.to_image(src.matrix([mid])[0])))
            np.testing.assert_allclose(fs.matrix([mid])[0], ref, rtol=1e-5, atol=1e-5)
    img = fs.to_image(fs.matrix([ids[0]])[0])  # painted back onto the mesh
    assert img.shape == (2 * N5,)


def test_grayordinate_set_pools_cifti_gifti_and_volume_maps(pooled, tmp_path):
    from nilearn.datasets import load_fsaverage
    from nilearn.surface import vol_to_surf

    ax = brain_models()
    template = cifti(tmp_path / "template.dscalar.nii", np.zeros((1, len(ax))), ax)
    rep = mapstore.build_features(pooled["store"], grid=str(template), name="grey", progress=False, jobs=1)
    assert rep.n_problems == 0
    s = mapstore.open(pooled["store"])
    fs = s.features("grey")
    assert fs.target.kind == "grayordinates" and fs.n_voxels == len(ax)

    def row(like):
        (mid,) = s.sql(f"SELECT map_id FROM maps WHERE relpath ILIKE '{like}'").column(0).to_pylist()
        return fs.matrix([mid])[0]

    # a CIFTI-2 map on the template's brain models: its values as nibabel reads them (reference)
    cfile = next(pooled["surface"].glob("sub-01/*den-10k*.dscalar.nii"))
    np.testing.assert_array_equal(row("%den-10k%"), nib.load(str(cfile)).get_fdata(dtype=np.float32)[0])
    cortex_l = slice(0, N5)
    vox = ~ax.surface_mask
    # a volume map: voxels sampled at the template's voxel centres (the MNI 2 mm grid: the values
    # themselves), cortex by vol_to_surf on fsaverage5 (nilearn, by hand)
    v1 = pooled["v"][0]
    got = row("sub-01/%space-MNI152%")
    np.testing.assert_allclose(got[vox], v1[tuple(ax.voxel[vox].T)], rtol=1e-5)
    fsa = load_fsaverage("fsaverage5")
    proj = fs.spec.projection
    ref = vol_to_surf(nib.Nifti1Image(v1, MNI2), fsa["pial"].parts["left"],
                      inner_mesh=fsa["white_matter"].parts["left"], kind=proj["kind"],
                      interpolation=proj["interpolation"], depth=proj["depth"])
    np.testing.assert_allclose(got[cortex_l], ref, rtol=1e-5, atol=1e-4)
    # a GIFTI pair fills the cortex only
    g = row("%sub-01_task-viewing_hemi-L_den-10242_contrast-facesminusplaces_stat-z%")
    left = nib.load(str(pooled["surface"] / "sub-01" / "sub-01_task-viewing_hemi-L_den-10242_contrast-"
                        "facesminusplaces_stat-z_statmap.gii")).darrays[0].data
    np.testing.assert_array_equal(g[cortex_l], left.astype(np.float32))
    assert np.isnan(g[vox]).all()
    img = fs.to_image(g)  # a CIFTI-2 image on the template's brain models
    assert isinstance(img, nib.Cifti2Image) and img.header.get_axis(1) == ax
    sel = s.select(features="grey", missing="zero", stat=["t", "z"])
    assert "no feature row" not in sel.dropped and sel.X.shape[1] == len(ax)
    assert s.check("grey").count("error") == 0


def test_grayordinates_match_by_structure_and_vertex():
    from mapstore.targets._grayordinates import match

    full, cortex_only = brain_models(), brain_models(voxels=False)
    t_pos, s_pos = match(cortex_only, full)
    assert len(t_pos) == 2 * N5 and (np.asarray(full.name)[t_pos] == np.asarray(cortex_only.name)[s_pos]).all()
    assert (full.vertex[t_pos] == cortex_only.vertex[s_pos]).all()


def test_gifti_values_decode_as_nibabel_reads_them(tmp_path, rng):
    from mapstore.targets._surface import read_surface_values

    vals = rng.normal(size=N5)
    for enc in ("GZipBase64Binary", "Base64Binary", "ASCII"):
        for dtype, endian in (("NIFTI_TYPE_FLOAT32", "LittleEndian"), ("NIFTI_TYPE_FLOAT32", "BigEndian"),
                              ("NIFTI_TYPE_INT32", "LittleEndian")):
            arr = (vals * 100).astype(np.float32 if dtype == "NIFTI_TYPE_FLOAT32" else np.int32)
            da = GiftiDataArray(arr, intent="NIFTI_INTENT_ZSCORE", datatype=dtype, encoding=enc, endian=endian)
            path = tmp_path / f"{enc}-{dtype}-{endian}.func.gii"
            nib.save(GiftiImage(darrays=[da]), str(path))
            # nibabel decodes the same file (reference)
            np.testing.assert_array_equal(read_surface_values(str(path)),
                                          nib.load(str(path)).darrays[0].data.astype(np.float32))


def test_cortex_mask_read_directly_equals_nilearn_loader():
    # nilearn's public loader of its bundled fsaverage5 thickness (reference) gives the same medial wall
    from nilearn.datasets import load_fsaverage_data

    from mapstore.targets._surface import MEDIAL_WALL_THICKNESS, builtin_surface, cortex_mask

    img = load_fsaverage_data(mesh="fsaverage5", mesh_type="pial", data_type="thickness")
    ref = np.concatenate([np.abs(np.asarray(img.data.parts[p])) >= MEDIAL_WALL_THICKNESS for p in ("left", "right")])
    got = cortex_mask(builtin_surface("fsaverage5"))
    np.testing.assert_array_equal(got, ref)
    assert 0.9 < got.mean() < 0.99  # the medial wall is a few percent of the vertices


def test_an_fsaverage_map_named_by_vertex_count_is_on_the_named_mesh(tmp_path, rng):
    # nilearn names fsaverage5 maps den-10242 without a space; others write space-fsaverage5: one mesh
    root = tmp_path / "ds"
    (root / "dataset_description.json").parent.mkdir(parents=True)
    (root / "dataset_description.json").write_text(json.dumps({"Name": "two", "BIDSVersion": "1.9.0",
                                                               "DatasetType": "derivative"}))
    gifti(root / "sub-01" / "sub-01_task-a_hemi-L_den-10242_contrast-x_stat-t_statmap.gii", [rng.normal(size=N5)])
    gifti(root / "sub-02" / "sub-02_task-a_hemi-L_space-fsaverage5_contrast-x_stat-t_statmap.func.gii",
          [rng.normal(size=N5)])
    mapstore.index([root], tmp_path / "s", progress=False)
    s = mapstore.open(tmp_path / "s")
    assert len(set(s.sql("SELECT grid_id FROM maps").column(0).to_pylist())) == 1
    assert not [f for f in s.check(pictures=False).findings if f.code == "several-meshes"]


@pytest.mark.parametrize("shape,affine,depth", [
    ((91, 109, 91), MNI2, [0.0, 0.25, 0.5, 0.75, 1.0]),
    # oblique 4 mm grid; and a field of view that cuts the brain (samples outside the volume)
    ((40, 48, 38), np.array([[4.0, 0.3, 0, -78], [0, 3.9, 0.2, -110], [0.1, 0, 4, -60], [0, 0, 0, 1]]), [0.5]),
    ((30, 30, 30), np.array([[3.0, 0, 0, -40], [0, 3, 0, -60], [0, 0, 3, -30], [0, 0, 0, 1]]), [0.0, 0.3, 1.0]),
])
def test_projection_operator_equals_vol_to_surf(shape, affine, depth):
    """The cached sparse sampling equals nilearn's vol_to_surf (reference library), masked or not."""
    from nilearn.datasets import load_fsaverage
    from nilearn.surface import vol_to_surf
    from scipy import ndimage

    from mapstore.targets import BatchContext
    from mapstore.targets._surface import builtin_surface, check_projection, project_volume

    fsa = load_fsaverage("fsaverage5")
    target = builtin_surface("fsaverage5")
    rng = np.random.default_rng(len(depth))
    vol = (ndimage.gaussian_filter(rng.normal(size=shape), 2) * 30).astype(np.float32)
    cache = BatchContext()
    for kind in ("depth", "line"):  # line: not the matrix, vol_to_surf itself
        p = check_projection({"kind": kind, "depth": depth} if kind == "depth" else {"kind": "line", "radius": 2})
        for masked in (False, True):
            v = vol.copy()
            if masked:
                v[:, :shape[1] // 2] = np.nan
                v[v > 0.5] = np.nan
            got = project_volume(v, affine, target, p, fsa, cache)
            fin = np.isfinite(v)
            img = nib.Nifti1Image(np.where(fin, v, 0).astype(np.float32), affine)
            mask = None if fin.all() else nib.Nifti1Image(fin.astype(np.uint8), affine)
            kw = {"kind": "depth", "depth": depth} if kind == "depth" else {"kind": "line", "radius": 2}
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                ref = np.concatenate([vol_to_surf(img, fsa["pial"].parts[part], mask_img=mask,
                                                  inner_mesh=fsa["white_matter"].parts[part] if kind == "depth" else None,
                                                  interpolation="linear", **kw) for part in ("left", "right")])
            np.testing.assert_array_equal(np.isnan(got), np.isnan(ref))
            np.testing.assert_allclose(got[np.isfinite(ref)], ref[np.isfinite(ref)], rtol=1e-5, atol=1e-5)
    assert len(cache.operators) == 2  # one per hemisphere: built once, used for both masks


def test_nilearn_surface_second_level_outputs(surface_study, tmp_path):
    """nilearn's SecondLevelModel on the first-level surface effect maps, saved by save_glm_to_bids."""
    first, _ = surface_study
    group = tmp_path / "group-glm"
    dof = write_surface_second_level(first, group, ["01", "02"], "facesminusplaces")
    store = tmp_path / "store"
    mapstore.index([group], store, progress=False)
    s = mapstore.open(store)
    rows = s.sql("SELECT * FROM maps WHERE map_kind = 'contrast' ORDER BY relpath").to_pylist()
    # nilearn writes effect, p, t, variance and z per hemisphere for the group contrast
    assert sorted({r["stat"] for r in rows}) == ["effect", "p", "t", "variance", "z"] and len(rows) == 10
    for r in rows:
        assert r["sub"] is None and r["hemi"] in ("L", "R") and r["linked_map"] is not None
        assert r["dof"] == dof and r["dof_source"] == "design"  # n maps - rank of the intercept-only design
        assert r["model_mask"].endswith(f"hemi-{r['hemi']}_den-10242_mask.gii")
    rep = mapstore.build_features(store, grid="fsaverage5", progress=False, jobs=1)
    assert rep.n_problems == 0 and rep.n_built == 5
    fs = mapstore.open(store).features(rep.name)
    (zl,) = [r for r in rows if r["stat"] == "z" and r["hemi"] == "L"]
    full = np.full(2 * N5, np.nan, np.float32)
    full[fs.mask_indices] = fs.matrix([zl["map_id"]])[0]
    left = nib.load(str(group / zl["relpath"])).darrays[0].data
    mask = nib.load(str(group / zl["model_mask"])).darrays[0].data != 0
    ok = np.isfinite(full[:N5])
    assert (ok <= mask).all()  # the model's mask applies
    np.testing.assert_array_equal(full[:N5][ok], left[ok].astype(np.float32))
    # the two halves of one map are not "duplicate files", even when byte-identical (constant R squared)
    report = mapstore.open(store).check(pictures=False)
    assert not [f for f in report.findings if f.code == "duplicate-file"]
