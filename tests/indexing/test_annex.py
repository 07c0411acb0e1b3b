"""Datasets as consortia share them: DataLad datasets whose content lives in git-annex, cloned from a
local path (never the network), indexed from their keys without content, with only the maps fetched.

Outside references: real git-annex (the Debian package) and DataLad (PyPI) make, clone, fetch and drop
the datasets; ``hashlib`` hashes the origin's files; ``git annex whereis`` says where content is.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

import mapstore

from ..conftest import write_json

MAPS = [f"sub-0{s}/func/sub-0{s}_task-x_contrast-a_stat-t_statmap.nii.gz" for s in (1, 2)]
SERIES = [f"sub-0{s}/func/sub-0{s}_task-x_desc-preproc_bold.nii.gz" for s in (1, 2)]


def _tools():
    if shutil.which("git-annex") is None:
        if os.environ.get("CI"):
            pytest.fail("git-annex is missing: install the Debian package git-annex")
        pytest.skip("git-annex is not installed")
    return pytest.importorskip("datalad.api")


@pytest.fixture(scope="module")
def origin(tmp_path_factory):
    """A consortium superdataset holding one study's derivative dataset as a subdataset: t maps with
    sidecars, and preprocessed series (the gigabytes users never want fetched), under SHA256E keys."""
    dl = _tools()
    import nibabel as nib

    base = tmp_path_factory.mktemp("annex")
    env = {"GIT_AUTHOR_NAME": "t", "GIT_AUTHOR_EMAIL": "t@t.invalid", "GIT_COMMITTER_NAME": "t",
           "GIT_COMMITTER_EMAIL": "t@t.invalid"}
    os.environ.update({k: os.environ.get(k, v) for k, v in env.items()})
    sup = dl.create(str(base / "consortium"), cfg_proc="text2git", result_renderer="disabled")
    study = base / "consortium" / "study"
    dl.create(str(study), dataset=sup.path, cfg_proc="text2git", result_renderer="disabled")
    with open(study / ".gitattributes", "a") as fh:
        fh.write("* annex.backend=SHA256E\n")
    write_json(study / "dataset_description.json", {"Name": "study", "BIDSVersion": "1.9.0",
                                                    "DatasetType": "derivative", "GeneratedBy": [{"Name": "t"}]})
    rng = np.random.default_rng(0)
    aff = np.diag([4.0, 4.0, 4.0, 1.0])
    aff[:3, 3] = [-90, -126, -72]
    for m, b in zip(MAPS, SERIES):
        (study / m).parent.mkdir(parents=True, exist_ok=True)
        nib.save(nib.Nifti1Image(rng.normal(size=(46, 55, 46)).astype(np.float32), aff), str(study / m))
        write_json(study / m.replace(".nii.gz", ".json"), {"DegreesOfFreedom": 20})
        nib.save(nib.Nifti1Image(rng.normal(size=(20, 20, 20, 40)).astype(np.float32), aff), str(study / b))
    dl.save(dataset=str(study), recursive=True, message="maps and series", result_renderer="disabled")
    dl.save(dataset=sup.path, message="the study", result_renderer="disabled")
    return base / "consortium"


def _clone(origin, where, install_study: bool = True):
    dl = _tools()
    dl.clone(source=str(origin), path=str(where), result_renderer="disabled")
    if install_study:
        dl.get(str(where / "study"), dataset=str(where), get_data=False, result_renderer="disabled")
    return where


def _whereis_here(repo) -> dict[str, bool]:
    """Per annexed file, whether this clone holds its content (git annex whereis)."""
    out = subprocess.run(["git", "-C", str(repo), "annex", "whereis", "--json"], capture_output=True, text=True,
                         check=True).stdout
    here = subprocess.run(["git", "-C", str(repo), "config", "annex.uuid"], capture_output=True, text=True,
                          check=True).stdout.strip()
    return {d["file"]: any(w["uuid"] == here for w in d["whereis"]) for d in map(json.loads, out.splitlines())}


def test_index_without_content_takes_sha256_and_size_from_the_keys(origin, tmp_path):
    clone = _clone(origin, tmp_path / "clone")
    assert not os.path.exists(clone / "study" / MAPS[0])  # a link into the annex, content not here
    rep = mapstore.index([clone / "study"], tmp_path / "store", progress=False, jobs=1)
    assert rep.n_maps == 2 and rep.n_not_present == 2 and rep.n_problems == 0
    assert "not present: 2 annexed map(s)" in rep.summary()
    rows = {r["relpath"]: r for r in mapstore.open(tmp_path / "store").sql(
        "SELECT relpath, content, sha256, nbytes, annex_key, shape, dof FROM maps").to_pylist()}
    assert sorted(rows) == MAPS  # the series are not maps
    for m in MAPS:
        data = (origin / "study" / m).read_bytes()
        r = rows[m]
        assert r["content"] == "not-present" and r["shape"] is None and r["dof"] == 20.0
        assert r["sha256"] == hashlib.sha256(data).hexdigest() and r["nbytes"] == len(data)
        assert r["annex_key"].startswith(f"SHA256E-s{len(data)}--")


def test_fetch_gets_only_the_maps_and_equals_a_full_copy(origin, tmp_path):
    clone = _clone(origin, tmp_path / "clone", install_study=False)  # the subdataset not even installed
    with pytest.raises(mapstore.errors.NoDatasetsFound, match="1 subdataset.s. not installed .*--fetch"):
        mapstore.index([clone], tmp_path / "lazy", progress=False, jobs=1)
    rep = mapstore.index([clone], tmp_path / "store", progress=False, jobs=1, fetch=True)
    assert rep.n_maps == 2 and rep.n_not_present == 0 and rep.n_problems == 0
    here = _whereis_here(clone / "study")
    assert all(here[m] for m in MAPS) and not any(here[b] for b in SERIES), here
    # the same catalog facts and features as a fully present copy (the origin)
    mapstore.index([origin / "study"], tmp_path / "full", progress=False, jobs=1)
    cols = "SELECT relpath, sha256, nbytes, shape, affine, dof FROM maps ORDER BY relpath"
    assert mapstore.open(tmp_path / "store").sql(cols).to_pylist() == mapstore.open(tmp_path / "full").sql(cols).to_pylist()
    for s in ("store", "full"):
        mapstore.build_features(tmp_path / s, grid="MNI152-3mm", progress=False, jobs=1)
    a, b = (mapstore.open(tmp_path / s).features().matrix() for s in ("store", "full"))
    np.testing.assert_array_equal(a, b)


def test_dropped_content_leaves_rows_valid_and_verify_says_fetch_to_check(origin, tmp_path):
    clone = _clone(origin, tmp_path / "clone")
    store = tmp_path / "store"
    mapstore.index([clone / "study"], store, progress=False, jobs=1, fetch=True)
    mapstore.build_features(store, grid="MNI152-3mm", progress=False, jobs=1)
    st = mapstore.open(store)
    out = st.export(tmp_path / "x", st.select(group_by="subject", missing="keep"), scheme="group-kfold:2").out
    st.close()
    subprocess.run(["git", "-C", str(clone / "study"), "annex", "drop", "--force", *MAPS], check=True,
                   capture_output=True)
    rep = mapstore.index([clone / "study"], store, progress=False, jobs=1)
    assert rep.n_not_present == 2 and rep.n_unchanged == 2  # the keys name the content read before
    again = mapstore.build_features(store, grid="MNI152-3mm", progress=False, jobs=1)
    assert again.n_built == 0 and again.n_unchanged == 2
    # the manifest names each source's content by its key too: what a colleague fetches
    sources = json.loads((Path(out) / "manifest.json").read_text())["sources"]
    assert {s["relpath"]: s["annex_key"].split("--")[1].split(".")[0] == s["sha256"] for s in sources} == \
        {m: True for m in MAPS}
    ver = mapstore.select.verify(out)
    assert ver.ok and len(ver.not_present) == 2 and "fetch them to check" in ver.summary()
    assert "change" not in ver.summary().split("checked")[1]


def test_content_that_is_not_what_its_key_names_is_refused(origin, tmp_path):
    clone = _clone(origin, tmp_path / "clone")
    subprocess.run(["git", "-C", str(clone / "study"), "annex", "get", MAPS[0]], check=True, capture_output=True)
    obj = os.path.realpath(clone / "study" / MAPS[0])
    os.chmod(os.path.dirname(obj), 0o755)
    os.chmod(obj, 0o644)
    with open(obj, "r+b") as fh:  # a byte of the stored content changed behind git-annex's back
        fh.seek(400)
        b = fh.read(1)
        fh.seek(400)
        fh.write(bytes([b[0] ^ 0xFF]))
    rep = mapstore.index([clone / "study"], tmp_path / "store", progress=False, jobs=1)
    assert rep.problem_codes.get("annex-content-mismatch") == 1
    rows = mapstore.open(tmp_path / "store").sql("SELECT relpath, content FROM maps").to_pylist()
    assert rows == [{"relpath": MAPS[1], "content": "not-present"}]


def test_unlocked_files_of_an_adjusted_branch_are_read_from_their_pointers(origin, tmp_path):
    clone = _clone(origin, tmp_path / "clone")
    subprocess.run(["git", "-C", str(clone / "study"), "annex", "adjust", "--unlock"], check=True,
                   capture_output=True)
    f = clone / "study" / MAPS[0]
    assert not f.is_symlink() and f.read_bytes().startswith(b"/annex/objects/")  # a pointer, not content
    rep = mapstore.index([clone / "study"], tmp_path / "store", progress=False, jobs=1)
    assert rep.n_maps == 2 and rep.n_not_present == 2
    sha = {r["relpath"]: r["sha256"] for r in mapstore.open(tmp_path / "store").sql(
        "SELECT relpath, sha256 FROM maps").to_pylist()}
    assert sha[MAPS[0]] == hashlib.sha256((origin / "study" / MAPS[0]).read_bytes()).hexdigest()
    rep = mapstore.index([clone / "study"], tmp_path / "store", progress=False, jobs=1, fetch=True)
    assert rep.n_not_present == 0 and rep.n_maps == 2 and rep.n_problems == 0


def test_a_rebuild_names_the_maps_to_fetch_or_fetches_just_them(origin, tmp_path):
    """A colleague exports from a full copy; on a fresh clone, rebuild names what to fetch, then with
    fetch=True gets just those maps (the series stay absent) and remakes X row for row."""
    from mapstore._rebuild import rebuild

    store = tmp_path / "theirs"
    mapstore.index([origin / "study"], store, progress=False, jobs=1)
    mapstore.build_features(store, grid="MNI152-3mm", progress=False, jobs=1)
    st = mapstore.open(store)
    out = st.export(tmp_path / "x", st.select(group_by="subject", missing="keep"), scheme="group-kfold:2").out
    st.close()
    clone = _clone(origin, tmp_path / "clone")
    with pytest.raises(mapstore.errors.ExportError, match="2 source map.s. .* not fetched .*--fetch"):
        rebuild(out, [clone / "study"], tmp_path / "again")
    rep = rebuild(out, [clone / "study"], tmp_path / "again2", fetch=True)
    assert rep.ok, rep.summary()
    here = _whereis_here(clone / "study")
    assert all(here[m] for m in MAPS) and not any(here[b] for b in SERIES), here
