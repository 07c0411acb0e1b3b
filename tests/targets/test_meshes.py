"""Surface sets on a mesh the user describes (GIFTI surfaces per hemisphere), and grayordinate
sets whose template cortex is on such a mesh.

References: nilearn's bundled fsaverage5 surfaces (open data a package ships) are the geometry;
nibabel writes and reads the GIFTI files; nilearn's ``vol_to_surf`` projects volumes by hand; scipy's
KD-tree gives nearest vertices.  The described mesh is fsaverage5 with its vertices renumbered by a
known permutation and its sphere scaled: a mesh of "another space" whose true correspondence to
fsaverage5 is the permutation itself, so every resampled row has an answer known independently of
mapstore.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from nibabel.gifti import GiftiDataArray, GiftiImage

import mapstore
from mapstore.errors import DataFileError, ParameterError

from ..conftest import write_map
from .test_surfaces import MNI2, N5, brain_models, cifti, gifti, smooth_volume

PARTS = (("L", "left"), ("R", "right"))


def surf_gii(path: Path, coords: np.ndarray, faces: np.ndarray) -> str:
    img = GiftiImage(darrays=[GiftiDataArray(np.asarray(coords, np.float32), intent="NIFTI_INTENT_POINTSET",
                                             datatype="NIFTI_TYPE_FLOAT32"),
                              GiftiDataArray(np.asarray(faces, np.int32), intent="NIFTI_INTENT_TRIANGLE",
                                             datatype="NIFTI_TYPE_INT32")])
    nib.save(img, str(path))
    return path.name


@pytest.fixture(scope="module")
def described(tmp_path_factory):
    """fsaverage5 renumbered (space 'perm'): surfaces, cortex, and fsaverage's sphere registered to it."""
    from nilearn.datasets import load_fsaverage

    from mapstore.targets._surface import builtin_surface, cortex_mask

    base = tmp_path_factory.mktemp("mesh")
    fsa = load_fsaverage("fsaverage5")
    rng = np.random.default_rng(5)
    perm = {h: rng.permutation(N5) for h in "LR"}  # described vertex j is fsaverage5 vertex perm[j]
    cortex = cortex_mask(builtin_surface("fsaverage5"))
    hemis: dict[str, dict[str, str]] = {}
    registered: dict[str, str] = {}
    for h, part in PARTS:
        p = perm[h]
        inv = np.argsort(p)
        entry = {}
        for kind in ("pial", "white_matter", "sphere", "inflated"):
            mesh = fsa[kind].parts[part]
            xyz = np.asarray(mesh.coordinates)[p]
            if kind == "sphere":
                xyz = xyz * 0.5  # a sphere of radius 50: nearest vertex is by angle, not distance
            entry[kind] = surf_gii(base / f"{h}.{kind}.surf.gii", xyz, inv[np.asarray(mesh.faces)])
        half = cortex[:N5] if h == "L" else cortex[N5:]
        entry["cortex"] = gifti(base / f"{h}.cortex.shape.gii", [half[p].astype(np.float32)],
                                intent="NIFTI_INTENT_SHAPE").name
        hemis[h] = entry
        # fsaverage's own sphere in the described mesh's coordinates: the renumbering moved no point
        registered[h] = surf_gii(base / f"{h}.fsaverage-reg.surf.gii", fsa["sphere"].parts[part].coordinates,
                                 fsa["sphere"].parts[part].faces)
    desc = base / "perm.json"
    desc.write_text(json.dumps({"name": "perm5", "space": "perm", "hemispheres": hemis,
                                "registered_spheres": {"fsaverage": registered}}))
    return {"desc": desc, "perm": perm, "base": base, "fsa": fsa, "hemis": hemis}


@pytest.fixture(scope="module")
def maps(tmp_path_factory):
    """A volume map, an fsaverage5 pair, an fsaverage4 pair, a pair on the described space, one on fsLR."""
    base = tmp_path_factory.mktemp("mapsets")
    rng = np.random.default_rng(8)
    root = base / "study"
    root.mkdir()
    (root / "dataset_description.json").write_text(json.dumps({"Name": "study", "BIDSVersion": "1.9.0",
                                                               "DatasetType": "derivative"}))
    vol = smooth_volume(4)
    write_map(root / "sub-01" / "sub-01_task-look_space-MNI152NLin2009cAsym_contrast-a_stat-t_statmap.nii.gz",
              vol, MNI2)
    fields = {"fsaverage5": {h: rng.normal(size=N5) for h in "LR"},
              "fsaverage4": {h: rng.normal(size=2562) for h in "LR"},
              "perm": {h: rng.normal(size=N5) for h in "LR"},
              "fsLR": {h: rng.normal(size=N5) for h in "LR"}}
    for sub, space in (("02", "fsaverage5"), ("03", "fsaverage4"), ("04", "perm"), ("05", "fsLR")):
        for h in "LR":
            gifti(root / f"sub-{sub}" / f"sub-{sub}_task-look_hemi-{h}_space-{space}_contrast-a_stat-t_statmap"
                  ".func.gii", [fields[space][h]])
    store = base / "store"
    mapstore.index([root], store, progress=False)
    return {"store": store, "vol": vol, "fields": fields}


def _full(fs, store, like: str) -> np.ndarray:
    s = mapstore.open(store)
    (mid,) = s.sql(f"SELECT map_id FROM maps WHERE relpath LIKE '{like}' AND coalesce(hemi, 'L') = 'L'"
                   ).column(0).to_pylist()
    full = np.full(fs.target.n_vertices, np.nan, np.float32)
    full[fs.mask_indices] = fs.matrix([mid])[0]
    return full


@pytest.fixture(scope="module")
def perm_set(described, maps):
    rep = mapstore.build_features(maps["store"], grid=str(described["desc"]), name="perm", progress=False, jobs=1)
    return rep, mapstore.open(maps["store"]).features("perm")


def test_description_gives_the_mesh_and_its_cortex(described, perm_set):
    rep, fs = perm_set
    p = described["perm"]
    assert fs.target.kind == "surface" and fs.target.name == "perm5" and fs.target.space == "perm"
    assert fs.target.n_vertices == 2 * N5 and rep.unit == "vertices"
    # the cortex files are the mask (the builtin medial wall, renumbered)
    from mapstore.targets._surface import builtin_surface, cortex_mask

    wall = cortex_mask(builtin_surface("fsaverage5"))
    want = np.concatenate([wall[:N5][p["L"]], wall[N5:][p["R"]]])
    np.testing.assert_array_equal(fs.mask_indices, np.flatnonzero(want))
    # to_image: a nilearn SurfaceImage on the described pial surface (nibabel reads it back)
    img = fs.to_image(np.arange(fs.n_voxels, dtype=np.float32))
    pial_l = nib.load(str(described["base"] / "L.pial.surf.gii")).darrays[0].data
    np.testing.assert_allclose(np.asarray(img.mesh.parts["left"].coordinates), pial_l)


def test_maps_of_other_spaces_resample_through_the_registered_sphere(described, maps, perm_set):
    from scipy.spatial import cKDTree

    rep, fs = perm_set
    p, f = described["perm"], maps["fields"]
    # failed: the fsLR pair only (no fsLR sphere registered to the described space)
    assert [pr.reason for pr in rep.problems if "fsLR" in pr.path] and rep.n_problems == 1
    assert "registered_spheres" in rep.problems[0].reason
    ok = np.zeros(2 * N5, bool)
    ok[fs.mask_indices] = True
    for like, want in (
            # fsaverage5 -> described: vertex j takes fsaverage5 vertex perm[j] (the known answer)
            ("%space-fsaverage5%", np.concatenate([f["fsaverage5"]["L"][p["L"]], f["fsaverage5"]["R"][p["R"]]])),
            # on the described space already: vertex for vertex
            ("%space-perm%", np.concatenate([f["perm"]["L"], f["perm"]["R"]]))):
        got = _full(fs, maps["store"], like)
        np.testing.assert_array_equal(got[ok], want.astype(np.float32)[ok])
    # fsaverage4 (the first 2562 fsaverage vertices): scipy's KD-tree by angle on the registered sphere
    got = _full(fs, maps["store"], "%space-fsaverage4%")
    for h, part, sl in (("L", "left", slice(0, N5)), ("R", "right", slice(N5, 2 * N5))):
        reg = np.asarray(described["fsa"]["sphere"].parts[part].coordinates)
        unit = reg / np.linalg.norm(reg, axis=1, keepdims=True)
        _, idx = cKDTree(unit[:2562]).query(unit[p[h]])
        np.testing.assert_array_equal(got[sl][ok[sl]], f["fsaverage4"][h][idx].astype(np.float32)[ok[sl]])
    s = mapstore.open(maps["store"])
    paths = {r["space"]: r["resample_path"] for r in s.sql(
        "SELECT m.space, f.resample_path FROM features f JOIN maps m USING (map_id) WHERE f.feature_set = 'perm'"
    ).to_pylist()}
    assert paths["fsaverage5"] == paths["fsaverage4"] == "nearest-vertex:fsaverage"
    assert paths["perm"] == "surface" and paths["MNI152NLin2009cAsym"] == "vol_to_surf"


def test_volume_projects_onto_the_described_surfaces(described, maps, perm_set):
    from nilearn.surface import PolyMesh, vol_to_surf

    _, fs = perm_set
    got = _full(fs, maps["store"], "%space-MNI152%")
    proj = fs.spec.projection
    img = nib.Nifti1Image(maps["vol"], MNI2)
    ok = np.zeros(2 * N5, bool)
    ok[fs.mask_indices] = True
    for h, part, sl in (("L", "left", slice(0, N5)), ("R", "right", slice(N5, 2 * N5))):
        mesh = {k: PolyMesh(**{part: str(described["base"] / f"{h}.{k}.surf.gii")}).parts[part]
                for k in ("pial", "white_matter")}
        # nilearn's vol_to_surf on the described files, by hand
        ref = vol_to_surf(img, mesh["pial"], inner_mesh=mesh["white_matter"], kind=proj["kind"],
                          interpolation=proj["interpolation"], depth=proj["depth"])
        np.testing.assert_allclose(got[sl][ok[sl]], ref[ok[sl]], rtol=1e-5, atol=1e-4)
        # and the same surfaces as nilearn's fsaverage5, renumbered
        fsa = described["fsa"]
        ref5 = vol_to_surf(img, fsa["pial"].parts[part], inner_mesh=fsa["white_matter"].parts[part],
                           kind=proj["kind"], interpolation=proj["interpolation"], depth=proj["depth"])
        np.testing.assert_allclose(got[sl][ok[sl]], ref5[described["perm"][h]][ok[sl]], rtol=1e-4, atol=1e-3)


def test_pictures_and_check_run_on_a_described_mesh(described, maps, perm_set):
    s = mapstore.open(maps["store"])
    report = s.check("perm", pictures=True)
    assert report.titles["coverage"].startswith("coverage over")


def test_description_errors_name_the_file(described, tmp_path, maps):
    from mapstore.targets._surface import mesh_from_description

    doc = json.loads(described["desc"].read_text())
    base = described["base"]

    def write(d) -> Path:
        path = base / f"bad-{abs(hash(json.dumps(d, sort_keys=True)))}.json"
        path.write_text(json.dumps(d))
        return path

    nospace = dict(doc)
    del nospace["space"]
    with pytest.raises(ParameterError, match="no 'space'"):
        mesh_from_description(write(nospace))
    gone = json.loads(json.dumps(doc))
    gone["hemispheres"]["R"]["pial"] = "R.nothere.surf.gii"
    with pytest.raises(ParameterError, match="R.pial .*R.nothere.surf.gii: cannot read"):
        mesh_from_description(write(gone))
    mixed = json.loads(json.dumps(doc))
    surf_gii(base / "small.surf.gii", np.eye(3), np.array([[0, 1, 2]]))
    mixed["hemispheres"]["L"]["inflated"] = "small.surf.gii"
    with pytest.raises(ParameterError, match="hemisphere L mixes meshes: .*small.surf.gii"):
        mesh_from_description(write(mixed))
    notmesh = json.loads(json.dumps(doc))
    notmesh["hemispheres"]["L"]["pial"] = doc["hemispheres"]["L"]["cortex"]
    with pytest.raises(DataFileError, match="POINTSET"):  # a damaged file, not a usage error (exit 1)
        mesh_from_description(write(notmesh))
    # no white surface: the volume maps are left out, with the reason
    nowhite = json.loads(json.dumps(doc))
    for h in "LR":
        del nowhite["hemispheres"][h]["white_matter"]
    copy = base / "L.pial.copy.surf.gii"
    copy.write_bytes((base / "L.pial.surf.gii").read_bytes())
    nowhite["hemispheres"]["L"]["pial"] = copy.name
    rep = mapstore.build_features(maps["store"], grid=str(write(nowhite)), name="nowhite", progress=False,
                                  jobs=1, where="m.space <> 'fsLR'")
    assert rep.n_problems == 0 and any("no white_matter surface" in k for k in rep.left_out)
    # a mesh file changed after the set was built on it: refused, naming the file
    fs = mapstore.open(maps["store"]).features("nowhite")
    fs.to_image(np.zeros(fs.n_voxels, np.float32))
    xyz = nib.load(str(copy)).darrays[0].data
    surf_gii(copy, xyz + 1.0, nib.load(str(copy)).darrays[1].data)
    with pytest.raises(mapstore.errors.GridError, match="L.pial.copy.surf.gii: the mesh file changed"):
        fs.to_image(np.zeros(fs.n_voxels, np.float32))


def test_grayordinate_template_on_a_described_mesh(described, maps, tmp_path):
    from nilearn.surface import vol_to_surf

    ax = brain_models()
    template = cifti(tmp_path / "perm-template.dscalar.nii", np.zeros((1, len(ax))), ax)
    rep = mapstore.build_features(maps["store"], grid=str(template), mesh=str(described["desc"]), name="grey-perm",
                                  progress=False, jobs=1, where="m.space IN ('MNI152NLin2009cAsym', 'fsaverage5')")
    assert rep.n_problems == 0, rep.problems
    s = mapstore.open(maps["store"])
    fs = s.features("grey-perm")
    assert fs.target.mesh is not None and fs.target.mesh.space == "perm"
    (mid,) = s.sql("SELECT map_id FROM maps WHERE relpath LIKE '%space-MNI152%'").column(0).to_pylist()
    got = fs.matrix([mid])[0]
    proj = fs.spec.projection
    fsa = described["fsa"]
    img = nib.Nifti1Image(maps["vol"], MNI2)
    ref = vol_to_surf(img, fsa["pial"].parts["left"], inner_mesh=fsa["white_matter"].parts["left"],
                      kind=proj["kind"], interpolation=proj["interpolation"], depth=proj["depth"])
    # the template's cortex is the described (renumbered) mesh: fsaverage5's projection, renumbered
    np.testing.assert_allclose(got[:N5], ref[described["perm"]["L"]], rtol=1e-4, atol=1e-3)
    # a GIFTI fsaverage5 pair reaches the template's cortex through the registered sphere
    (gid,) = s.sql("SELECT map_id FROM maps WHERE relpath LIKE '%space-fsaverage5%' AND hemi = 'L'"
                   ).column(0).to_pylist()
    np.testing.assert_array_equal(fs.matrix([gid])[0][:N5],
                                  maps["fields"]["fsaverage5"]["L"][described["perm"]["L"]].astype(np.float32))
    # a mesh whose vertex counts are not the template's is refused
    # with a few subcortical voxels, so that the map has values where the unknown cortex has none
    ax_small = brain_models(2562, 2562)
    small = cifti(tmp_path / "small.dscalar.nii", np.zeros((1, len(ax_small))), ax_small)
    with pytest.raises(ParameterError, match="vertices per hemisphere"):
        mapstore.build_features(maps["store"], grid=str(small), mesh=str(described["desc"]), progress=False)
    with pytest.raises(ParameterError, match="mesh applies to grayordinate sets"):
        mapstore.build_features(maps["store"], grid="fsaverage5", mesh=str(described["desc"]), progress=False)


def test_grayordinate_sets_have_pictures(described, maps, tmp_path):
    from mapstore.targets._grayordinates import grayordinate_views as _grayordinate_views

    ax = brain_models()
    template = cifti(tmp_path / "pic-template.dscalar.nii", np.zeros((1, len(ax))), ax)
    mapstore.build_features(maps["store"], grid=str(template), mesh=str(described["desc"]), name="grey-pic",
                            progress=False, jobs=1, where="m.space IN ('MNI152NLin2009cAsym', 'fsaverage5')")
    s = mapstore.open(maps["store"])
    report = s.check("grey-pic", pictures=True)
    assert "the cortex" in report.titles["coverage"] and "voxels" in report.titles["coverage"]
    png = report.pictures["coverage"]
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
    # the cortex's four views above, the voxels' three slices below: a row that is 1 on the voxels
    # and NaN on the cortex draws only below the cortex views
    fs = s.features("grey-pic")
    row = np.where(ax.surface_mask, np.nan, 1.0)
    pic = _grayordinate_views(fs.target, row)
    cortex_rows = 110 + 4  # surface_views height, then the gap
    assert np.isnan(pic[:cortex_rows]).all() and np.nansum(pic[cortex_rows:]) > 0
    bg = _grayordinate_views(fs.target, None)
    assert bg.shape == pic.shape and np.isfinite(bg[:cortex_rows]).any()


def test_cli_takes_a_mesh_description_and_a_template_mesh(described, maps, tmp_path):
    from click.testing import CliRunner

    from mapstore.cli import cli

    r = CliRunner().invoke(cli, ["features", "--store", str(maps["store"]), "--grid", str(described["desc"]),
                                 "--name", "cli-perm", "--no-volumes", "--jobs", "1", "--where", "m.space <> 'fsLR'"])
    assert r.exit_code == 0, r.output
    assert "grid perm5" in r.output and "vertices" in r.output and "nearest-vertex:fsaverage" in r.output
    ax = brain_models(voxels=False)
    template = cifti(tmp_path / "cli-template.dscalar.nii", np.zeros((1, len(ax))), ax)
    r = CliRunner().invoke(cli, ["features", "--store", str(maps["store"]), "--grid", str(template), "--mesh",
                                 str(described["desc"]), "--name", "cli-grey", "--jobs", "1",
                                 "--where", "m.space = 'MNI152NLin2009cAsym'"])
    assert r.exit_code == 0, r.output
    assert "voxels+vol_to_surf x1" in r.output


def test_freesurfer_surfaces_label_and_morph_files_describe_a_mesh(maps, tmp_path):
    """A FreeSurfer subject folder's files (written with nibabel.freesurfer) as the mesh: lh.pial etc.,
    lh.cortex.label, lh.sulc.  References: nibabel's FreeSurfer readers, nilearn's vol_to_surf on the
    same files (nilearn reads FreeSurfer geometry itself), scipy's KD-tree."""
    from nibabel.freesurfer import read_label, write_geometry, write_morph_data
    from nilearn.datasets import load_fsaverage
    from nilearn.surface import vol_to_surf
    from scipy.spatial import cKDTree

    from mapstore.targets._surface import builtin_surface, cortex_mask

    fsa = load_fsaverage("fsaverage5")
    wall = cortex_mask(builtin_surface("fsaverage5"))
    surf = tmp_path / "surf"
    surf.mkdir()
    hemis = {}
    for h, part, fs_name in (("L", "left", "lh"), ("R", "right", "rh")):
        entry = {}
        for kind, fname in (("pial", "pial"), ("white_matter", "white"), ("sphere", "sphere")):
            mesh = fsa[kind].parts[part]
            write_geometry(str(surf / f"{fs_name}.{fname}"), np.asarray(mesh.coordinates), np.asarray(mesh.faces))
            entry[kind] = f"surf/{fs_name}.{fname}"
        half = wall[:N5] if h == "L" else wall[N5:]
        idx = np.flatnonzero(half)
        # FreeSurfer's ASCII label format (common practice): a comment line, the count, then
        # "vertex x y z value" per line
        with open(surf / f"{fs_name}.cortex.label", "w") as fh:
            fh.write(f"#!ascii label, from subject fsaverage5\n{idx.size}\n")
            for v in idx:
                fh.write(f"{v} 0.0 0.0 0.0 0.0\n")
        np.testing.assert_array_equal(read_label(str(surf / f"{fs_name}.cortex.label")), idx)  # nibabel reads it
        with open(surf / f"{fs_name}.sulc", "wb") as fh:
            write_morph_data(fh, np.linspace(-1, 1, N5).astype(np.float32))
        entry["cortex"], entry["sulcal"] = f"surf/{fs_name}.cortex.label", f"surf/{fs_name}.sulc"
        hemis[h] = entry
    desc = tmp_path / "fs5.json"
    desc.write_text(json.dumps({"name": "fs5-freesurfer", "space": "fsaverage", "hemispheres": hemis}))
    rep = mapstore.build_features(maps["store"], grid=str(desc), name="fs5", progress=False, jobs=1,
                                  where="m.space <> 'fsLR' AND m.space <> 'perm'")
    assert rep.n_problems == 0, rep.problems
    fs = mapstore.open(maps["store"]).features("fs5")
    np.testing.assert_array_equal(fs.mask_indices, np.flatnonzero(wall))  # the labels are the mask
    from mapstore.targets._surface import sulcal_depth

    np.testing.assert_allclose(sulcal_depth(fs.target)[:N5], np.linspace(-1, 1, N5), atol=1e-6)
    ok = np.zeros(2 * N5, bool)
    ok[fs.mask_indices] = True
    # fsaverage4 maps: nearest vertex on the FreeSurfer sphere (scipy's KD-tree, plain distances)
    got = _full(fs, maps["store"], "%space-fsaverage4%")
    xyz = np.asarray(fsa["sphere"].parts["left"].coordinates)
    _, idx4 = cKDTree(xyz[:2562]).query(xyz)
    np.testing.assert_array_equal(got[:N5][ok[:N5]], maps["fields"]["fsaverage4"]["L"][idx4].astype(np.float32)[ok[:N5]])
    # a volume: nilearn's vol_to_surf on the FreeSurfer files themselves
    got = _full(fs, maps["store"], "%space-MNI152%")
    proj = fs.spec.projection
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = vol_to_surf(nib.Nifti1Image(maps["vol"], MNI2), str(surf / "lh.pial"), inner_mesh=str(surf / "lh.white"),
                          kind=proj["kind"], interpolation=proj["interpolation"], depth=proj["depth"])
    np.testing.assert_allclose(got[:N5][ok[:N5]], ref[ok[:N5]], rtol=1e-5, atol=1e-4)


def test_cli_describes_a_freesurfer_subject_folder(tmp_path):
    from click.testing import CliRunner
    from nibabel.freesurfer import write_geometry
    from nilearn.datasets import load_fsaverage

    from mapstore.cli import cli
    from mapstore.targets._surface import mesh_from_description

    fsa = load_fsaverage("fsaverage5")
    subject = tmp_path / "subjects" / "fsaverage5"
    (subject / "surf").mkdir(parents=True)
    for part, fs in (("left", "lh"), ("right", "rh")):
        for kind, stem in (("pial", "pial"), ("white_matter", "white"), ("sphere", "sphere")):
            mesh = fsa[kind].parts[part]
            write_geometry(str(subject / "surf" / f"{fs}.{stem}"), np.asarray(mesh.coordinates),
                           np.asarray(mesh.faces))
    out = tmp_path / "fs5.json"
    r = CliRunner().invoke(cli, ["mesh", str(subject), "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert "space fsaverage5" in r.output and "10,242 + 10,242" in r.output and "not given" in r.output
    t = mesh_from_description(out)
    assert t.kinds() == ["pial", "sphere", "white_matter"] and t.family == "fsaverage"
    from mapstore.cli import main

    assert main(["mesh", str(tmp_path), "--out", str(tmp_path / "x.json")]) == 2  # a parameter error, one line
    # a folder whose surfaces disagree: refused, and no description is left behind
    write_geometry(str(subject / "surf" / "lh.white"), np.eye(3), np.array([[0, 1, 2]]))
    bad = tmp_path / "bad.json"
    assert main(["mesh", str(subject), "--out", str(bad)]) == 2 and not bad.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]


def test_check_says_when_a_template_cortex_mesh_was_assumed_or_unknown(maps, tmp_path):
    ax = brain_models(voxels=False)
    template = cifti(tmp_path / "plain.dscalar.nii", np.zeros((1, len(ax))), ax)
    mapstore.build_features(maps["store"], grid=str(template), name="grey-assumed", progress=False, jobs=1,
                            where="m.space = 'MNI152NLin2009cAsym'")
    codes = [f.code for f in mapstore.open(maps["store"]).check("grey-assumed", pictures=False).findings]
    assert "cortex-mesh-assumed" in codes and "no-cortex-mesh" not in codes
    # with a few subcortical voxels, so that the map has values where the unknown cortex has none
    ax_small = brain_models(2562, 2562)
    small = cifti(tmp_path / "small.dscalar.nii", np.zeros((1, len(ax_small))), ax_small)
    rep = mapstore.build_features(maps["store"], grid=str(small), name="grey-unknown", progress=False, jobs=1,
                                  where="m.space = 'MNI152NLin2009cAsym'")
    assert rep.n_built == 1
    found = {f.code: f for f in mapstore.open(maps["store"]).check("grey-unknown", pictures=False).findings}
    assert "no-cortex-mesh" in found and "--mesh" in found["no-cortex-mesh"].remedy
    assert "cortex-mesh-assumed" not in found


@pytest.mark.slow
def test_a_described_mesh_set_on_a_dask_cluster_equals_the_local_build(described, maps, perm_set):
    distributed = pytest.importorskip("distributed")
    _, local = perm_set
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        rep = mapstore.build_features(maps["store"], grid=str(described["desc"]), name="perm-dask",
                                      scheduler=client, batch_size=2, progress=False)
    assert rep.n_problems == 1  # the fsLR pair, as locally
    fs = mapstore.open(maps["store"]).features("perm-dask")
    ids = local.map_ids
    assert fs.map_ids == ids
    np.testing.assert_array_equal(fs.matrix(ids), local.matrix(ids))


def test_fsnative_maps_go_onto_fsaverage_through_each_subjects_sphere_reg(tmp_path):
    """fsnative GIFTI pairs (a subject's own mesh), with FreeSurfer sphere.reg files written by nibabel.

    sub-07's mesh is fsaverage5 renumbered (its sphere.reg puts native vertex j at fsaverage5
    vertex perm[j]): the right answer is the permutation.  sub-08's mesh has 2,562 vertices: scipy's
    KD-tree by angle (reference library).  sub-09 has no registration: its row fails, naming the file.
    """
    from nibabel.freesurfer import write_geometry
    from nilearn.datasets import load_fsaverage
    from scipy.spatial import cKDTree

    fsa = load_fsaverage("fsaverage5")["sphere"]
    rng = np.random.default_rng(21)
    root, subjects = tmp_path / "study", tmp_path / "freesurfer"
    root.mkdir()
    (root / "dataset_description.json").write_text(json.dumps({"Name": "native", "BIDSVersion": "1.9.0",
                                                               "DatasetType": "derivative"}))
    perm = {h: rng.permutation(N5) for h in "LR"}
    values, regs = {}, {}
    for sub, n in (("07", N5), ("08", 2562), ("09", N5)):
        values[sub] = {h: rng.normal(size=n) for h in "LR"}
        for h, part, fs in (("L", "left", "lh"), ("R", "right", "rh")):
            gifti(root / f"sub-{sub}" / f"sub-{sub}_task-look_hemi-{h}_space-fsnative_contrast-a_stat-t_statmap"
                  ".func.gii", [values[sub][h]])
            xyz = np.asarray(fsa.parts[part].coordinates)
            faces = np.asarray(fsa.parts[part].faces)
            if sub == "07":
                reg, tri = xyz[perm[h]], np.argsort(perm[h])[faces]
            else:  # 2,562 points near fsaverage4's, turned by 2 degrees about z
                a = np.deg2rad(2.0)
                rot = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])
                reg, tri = xyz[:2562] @ rot.T, faces[(faces < 2562).all(axis=1)]
            regs[(sub, h)] = reg
            if sub != "09":
                (subjects / f"sub-{sub}" / "surf").mkdir(parents=True, exist_ok=True)
                write_geometry(str(subjects / f"sub-{sub}" / "surf" / f"{fs}.sphere.reg"), reg, tri)
    store = tmp_path / "store"
    mapstore.index([root], store, progress=False)
    rep = mapstore.build_features(store, grid="fsaverage5", mask="all", subjects_dir=subjects, progress=False,
                                  jobs=1)
    assert rep.n_built == 2 and rep.n_problems == 1
    assert "sub-09/surf/lh.sphere.reg" in rep.problems[0].reason
    s = mapstore.open(store)
    fs = s.features(rep.name)

    def row(sub):
        (mid,) = s.sql(f"SELECT map_id FROM maps WHERE sub = '{sub}' AND hemi = 'L'").column(0).to_pylist()
        return fs.matrix([mid])[0]

    want7 = np.concatenate([values["07"][h][np.argsort(perm[h])] for h in "LR"])
    np.testing.assert_array_equal(row("07"), want7.astype(np.float32))
    got8 = row("08")
    for h, part, sl in (("L", "left", slice(0, N5)), ("R", "right", slice(N5, 2 * N5))):
        reg = regs[("08", h)]
        target = np.asarray(fsa.parts[part].coordinates)
        _, idx = cKDTree(reg / np.linalg.norm(reg, axis=1, keepdims=True)).query(
            target / np.linalg.norm(target, axis=1, keepdims=True))
        np.testing.assert_array_equal(got8[sl], values["08"][h][idx].astype(np.float32))
    assert fs.spec.subjects_dir == str(subjects)
    # the registration is part of each row's key: a changed sphere.reg rebuilds that subject's row only
    write_geometry(str(subjects / "sub-07" / "surf" / "lh.sphere.reg"), regs[("07", "L")] * 1.5,
                   np.argsort(perm["L"])[np.asarray(fsa.parts["left"].faces)])
    rep2 = mapstore.build_features(store, grid="fsaverage5", mask="all", subjects_dir=subjects, progress=False,
                                   jobs=1)
    assert rep2.n_built == 1 and rep2.n_unchanged == 1
    # without the subjects folder the rows fail with the remedy
    from mapstore.errors import FeatureError

    with pytest.raises(FeatureError, match="every selected map failed .*pass subjects_dir"):
        mapstore.build_features(store, grid="fsaverage5", mask="all", name="no-reg", progress=False, jobs=1)
