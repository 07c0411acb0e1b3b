"""A lab's root as GLM software leaves it, outside and inside BIDS (invented names and values).

Each writer's layout is made from the format's description, from memory unless a source is named:
FEAT first and higher level (``design.fsf``, ``design.con``, ``design.fts``, ``stats/``), SPM first and
second level (``SPM.mat`` as MATLAB v5 through scipy and v7.3 through h5py, NIfTI pairs), AFNI buckets
(``.HEAD`` attributes and a raw ``.BRIK``; nibabel's own AFNI reader is the outside check of the
bytes), FreeSurfer's ``mri_glmfit`` folders (MGH through nibabel's writer), a grayordinate
pipeline's FEAT on CIFTI (one-timepoint dense series and merged dense scalars through nibabel's
CIFTI-2 writer), BIDS Stats Models ``node-`` folders with their model file, and a workflow engine's
bare ``results/`` folder.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np

AFF = np.array([[-3.0, 0, 0, 27], [0, 3, 0, -36], [0, 0, 3, -18], [0, 0, 0, 1]])
SHAPE = (10, 12, 9)


def vol(rng: np.random.Generator, positive: bool = False) -> np.ndarray:
    v = rng.normal(size=SHAPE).astype(np.float32)
    return np.abs(v) + 0.1 if positive else v


def save(img, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(img, str(path))
    return path


def feat_first_level(feat: Path, contrasts: list[str], rng, ftests: list[list[int]] = ()) -> None:
    """<name>.feat: design.fsf (level 1), design.con, design.fts, stats/ with every kind FEAT writes."""
    feat.mkdir(parents=True)
    (feat / "design.fsf").write_text("set fmri(level) 1\nset fmri(npts) 120\n")
    lines = [f"/ContrastName{i + 1}\t{c}" for i, c in enumerate(contrasts)]
    (feat / "design.con").write_text("\n".join(lines + ["/NumWaves\t2", f"/NumContrasts\t{len(contrasts)}",
                                                        "/Matrix", "1 0", "0 1"]) + "\n")
    if ftests:
        rows = [" ".join("1" if j in f else "0" for j in range(1, len(contrasts) + 1)) for f in ftests]
        (feat / "design.fts").write_text(f"/NumWaves\t{len(contrasts)}\n/NumContrasts\t{len(ftests)}\n\n/Matrix\n"
                                         + "\n".join(rows) + "\n")
    (feat / "stats").mkdir()
    (feat / "stats" / "dof").write_text("116\n")
    mask = np.ones(SHAPE, np.uint8)
    save(nib.Nifti1Image(mask, AFF), feat / "mask.nii.gz")
    save(nib.Nifti1Image(vol(rng), AFF), feat / "example_func.nii.gz")
    for i in range(1, len(contrasts) + 1):
        for kind in ("cope", "varcope", "tstat", "zstat", "pe"):
            save(nib.Nifti1Image(vol(rng, kind == "varcope"), AFF), feat / "stats" / f"{kind}{i}.nii.gz")
    for i in range(1, len(ftests) + 1):
        for kind in ("fstat", "zfstat"):
            save(nib.Nifti1Image(vol(rng, True), AFF), feat / "stats" / f"{kind}{i}.nii.gz")
    for name in ("sigmasquareds", "threshac1"):
        save(nib.Nifti1Image(vol(rng, True), AFF), feat / "stats" / f"{name}.nii.gz")


def feat_higher_level(gfeat: Path, inputs: list[str], n_lower: int, higher: list[str], rng) -> None:
    """<name>.gfeat: design.fsf listing the lower-level inputs as the lab's machine had them (absolute
    paths that no longer exist here), one cope<N>.feat per lower-level contrast, each with its own
    design.con of the higher-level contrasts."""
    gfeat.mkdir(parents=True)
    fsf = ["set fmri(level) 2", f"set fmri(multiple) {len(inputs)}"]
    fsf += [f'set feat_files({i + 1}) "{p}"' for i, p in enumerate(inputs)]
    (gfeat / "design.fsf").write_text("\n".join(fsf) + "\n")
    for n in range(1, n_lower + 1):
        cope = gfeat / f"cope{n}.feat"
        (cope / "stats").mkdir(parents=True)
        (cope / "design.con").write_text("\n".join(f"/ContrastName{k + 1}\t{h}" for k, h in enumerate(higher)) + "\n")
        (cope / "stats" / "dof").write_text(f"{len(inputs) - 1}\n")
        save(nib.Nifti1Image(np.ones(SHAPE, np.uint8), AFF), cope / "mask.nii.gz")
        for k in range(1, len(higher) + 1):
            for kind in ("cope", "tstat", "zstat"):
                save(nib.Nifti1Image(vol(rng), AFF), cope / "stats" / f"{kind}{k}.nii.gz")


def spm_mat_v5(path: Path, contrasts: list[tuple[str, str]], regressors: list[str], erdf: float,
               inputs: list[str]) -> None:
    from scipy.io import savemat

    xcon = np.zeros((1, len(contrasts)), dtype=[("name", object), ("STAT", object)])
    for i, c in enumerate(contrasts):
        xcon[0, i] = c
    savemat(path, {"SPM": {"xCon": xcon, "xX": {"erdf": erdf, "name": np.array(regressors, dtype=object)},
                           "xY": {"P": np.array(inputs, dtype=object)}, "swd": str(path.parent)}})


def spm_mat_v73(path: Path, contrasts: list[str], erdf: float, inputs: list[str]) -> None:
    """MATLAB v7.3: HDF5 behind a 512-byte header; struct fields are groups, a struct array's field a
    dataset of object references, chars uint16 codes stored transposed (MATLAB's layout, from memory)."""
    import h5py

    with h5py.File(path, "w", userblock_size=512) as f:
        refs = f.create_group("#refs#")
        spm = f.create_group("SPM")

        def strings(group, name, values):
            out = []
            for i, v in enumerate(values):
                d = refs.create_dataset(f"{name}{i}", data=np.array([[ord(c)] for c in v], np.uint16))
                d.attrs["MATLAB_class"] = np.bytes_("char")
                out.append(d.ref)
            ds = group.create_dataset(name, data=np.array(out, dtype=h5py.ref_dtype).reshape(-1, 1))
            ds.attrs["MATLAB_class"] = np.bytes_("cell")

        xcon = spm.create_group("xCon")
        strings(xcon, "name", contrasts)
        xx = spm.create_group("xX")
        xx.create_dataset("erdf", data=np.array([[erdf]]))
        xy = spm.create_group("xY")
        strings(xy, "P", inputs)
    head = b"MATLAB 7.3 MAT-file, Platform: GLNXA64, Created on: Sat Dec  5 10:00:00 2026 HDF5 schema 1.00 ."
    with open(path, "r+b") as fh:
        fh.write(head.ljust(116, b" ") + b"\x00" * 8 + b"\x00\x02IM")


def spm_folder(folder: Path, contrasts: list[str], rng, *, pairs: bool = False, v73: bool = False,
               inputs: list[str] | None = None, erdf: float = 40.0) -> None:
    """con/spmT/beta/ResMS/RPV/mask, NIfTI or NIfTI pairs (older SPM), with SPM.mat beside them."""
    folder.mkdir(parents=True)
    ext = ".img" if pairs else ".nii"
    image = nib.Nifti1Pair if pairs else nib.Nifti1Image
    for i, c in enumerate(contrasts):
        n = f"{i + 1:04d}"
        save(image(vol(rng), AFF), folder / f"con_{n}{ext}")
        t = image(vol(rng), AFF)
        t.header["descrip"] = f"SPM{{T_[{erdf:.1f}]}} - contrast {i + 1}: {c}".encode()[:79]
        save(t, folder / f"spmT_{n}{ext}")
    regressors = [f"Sn(1) {c}*bf(1)" for c in contrasts] + ["Sn(1) constant"]
    for i in range(len(regressors)):
        save(image(vol(rng), AFF), folder / f"beta_{i + 1:04d}{ext}")
    save(image(vol(rng, True), AFF), folder / f"ResMS{ext}")
    save(image(vol(rng, True), AFF), folder / f"RPV{ext}")
    save(image(np.ones(SHAPE, np.uint8), AFF), folder / f"mask{ext}")
    inputs = inputs if inputs is not None else [f"/lab/raw/run{r}.nii,{k}" for r in (1, 2) for k in (1, 2)]
    if v73:
        spm_mat_v73(folder / "SPM.mat", contrasts, erdf, inputs)
    else:
        spm_mat_v5(folder / "SPM.mat", [(c, "T") for c in contrasts], regressors, erdf, inputs)


def _attr(kind: str, name: str, values) -> str:
    if kind == "string":
        text = "'" + values + "~"
        return f"\ntype = string-attribute\nname = {name}\ncount = {len(text) - 1}\n{text}\n"
    vals = " ".join(str(v) for v in values)
    return f"\ntype = {kind}-attribute\nname = {name}\ncount = {len(values)}\n {vals}\n"


def afni_bucket(head: Path, bricks: list[tuple[str, np.ndarray, tuple]]) -> None:
    """An AFNI bucket: .HEAD attributes (from memory of AFNI's README.attributes) and a .BRIK of float32
    sub-bricks, x fastest, little-endian.  ``bricks``: (label, values, (statcode, *params)) per brick."""
    nx, ny, nz = SHAPE
    aux: list[float] = []
    for i, (_, _, stat) in enumerate(bricks):
        if stat:
            aux += [i, stat[0], len(stat) - 1, *stat[1:]]
    text = _attr("string", "TYPESTRING", "3DIM_HEAD_FUNC")
    text += _attr("integer", "SCENE_DATA", [2, 11, 1, -999, -999, -999, -999, -999])
    text += _attr("integer", "ORIENT_SPECIFIC", [1, 2, 4])  # R-L, A-P, I-S: x grows to the left (LPS)
    text += _attr("float", "ORIGIN", [27.0, 36.0, -18.0])
    text += _attr("float", "DELTA", [-3.0, -3.0, 3.0])
    text += _attr("float", "IJK_TO_DICOM_REAL", [-3.0, 0, 0, 27.0, 0, -3.0, 0, 36.0, 0, 0, 3.0, -18.0])
    text += _attr("integer", "DATASET_RANK", [3, len(bricks), 0, 0, 0, 0, 0, 0])
    text += _attr("integer", "DATASET_DIMENSIONS", [nx, ny, nz, 0, 0])
    text += _attr("integer", "BRICK_TYPES", [3] * len(bricks))
    text += _attr("float", "BRICK_FLOAT_FACS", [0.0] * len(bricks))
    text += _attr("string", "BYTEORDER_STRING", "LSB_FIRST")
    text += _attr("string", "BRICK_LABS", "~".join(b[0] for b in bricks))
    if aux:
        text += _attr("float", "BRICK_STATAUX", aux)
    head.parent.mkdir(parents=True, exist_ok=True)
    head.write_text(text)
    data = b"".join(np.asarray(v, "<f4").ravel(order="F").tobytes() for _, v, _ in bricks)
    head.with_suffix(".BRIK").write_bytes(data)


def cifti_axis(n: int = 40):
    mask = np.zeros(n, bool)
    mask[:] = True
    return nib.cifti2.BrainModelAxis.from_mask(mask, name="CortexLeft")


def cifti_series(path: Path, values: np.ndarray) -> Path:
    ax = cifti_axis(values.shape[-1])
    series = nib.cifti2.SeriesAxis(start=0, step=1, size=values.shape[0])
    img = nib.Cifti2Image(values.astype(np.float32), header=(series, ax))
    img.nifti_header.set_intent("ConnDenseSeries")
    return save(img, path)


def cifti_scalars(path: Path, values: np.ndarray, names: list[str]) -> Path:
    ax = cifti_axis(values.shape[-1])
    img = nib.Cifti2Image(values.astype(np.float32), header=(nib.cifti2.ScalarAxis(names), ax))
    img.nifti_header.set_intent("ConnDenseScalar")
    return save(img, path)


def bids_derivative(root: Path, name: str) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    (root / "dataset_description.json").write_text(json.dumps(
        {"Name": name, "BIDSVersion": "1.9.0", "DatasetType": "derivative", "GeneratedBy": [{"Name": "hand"}]}))
    return root


def lab_tree(base: Path, seed: int = 3) -> dict[str, Path]:
    """Every layout in one root; returns the notable paths."""
    rng = np.random.default_rng(seed)
    lab = base / "lab"
    out: dict[str, Path] = {"lab": lab}
    # a BIDS derivative beside the rest (so the plain folders are not the root's only content)
    bids = bids_derivative(lab / "tides-glm", "tides")
    for sub in ("01", "02"):
        save(nib.Nifti1Image(vol(rng), AFF), bids / f"sub-{sub}" / f"sub-{sub}_task-tide_contrast-ebb_stat-t_statmap.nii.gz")
    save(nib.Nifti1Image(vol(rng), AFF), bids / "sub-03" / "sub-03_task-tide_contrast-ebb_stat-z_statmap.NII.GZ")
    save(nib.Nifti1Image(vol(rng), AFF), bids / "sub-01" / "sub-01_task-tide_desc-flood_stat-t_statmap.nii.gz")
    twice = vol(rng)
    save(nib.Nifti1Image(twice, AFF), bids / "sub-02" / "sub-02_task-tide_contrast-flood_stat-t_statmap.nii")
    save(nib.Nifti1Image(twice, AFF), bids / "sub-02" / "sub-02_task-tide_contrast-flood_stat-t_statmap.nii.gz")
    save(nib.Nifti1Image(vol(rng), AFF), bids / "group" / "task-tide_contrast-ebb_stat-t_statmap.nii.gz")
    # BIDS Stats Models runner: node folders, levels from the model file
    bsm = bids_derivative(lab / "swell-bsm", "swell")
    (bsm / "model-swell_smdl.json").write_text(json.dumps({"Name": "swell", "BIDSModelVersion": "1.0.0", "Nodes": [
        {"Level": "Run", "Name": "perRun"}, {"Level": "Subject", "Name": "perPerson"},
        {"Level": "Dataset", "Name": "everyone"}]}))
    save(nib.Nifti1Image(vol(rng), AFF), bsm / "node-perRun" / "sub-01" / "sub-01_task-swell_run-1_contrast-crest_stat-t_statmap.nii.gz")
    save(nib.Nifti1Image(vol(rng), AFF), bsm / "node-perPerson" / "sub-01" / "sub-01_task-swell_contrast-crest_stat-t_statmap.nii.gz")
    save(nib.Nifti1Image(vol(rng), AFF), bsm / "node-everyone" / "task-swell_contrast-crest_stat-t_statmap.nii.gz")
    # FEAT: first level per subject, a higher level across them (inputs named by the lab machine's paths)
    for s in ("07", "08"):
        feat_first_level(lab / f"subj{s}" / "run1.feat", ["shells", "stones"], rng, ftests=[[1, 2]])
    feat_higher_level(lab / "group" / "beach.gfeat", ["/mnt/oldlab/subj07/run1.feat", "/mnt/oldlab/subj08/run1.feat"],
                      2, ["group mean", "older > younger"], rng)
    # SPM: subjects in folders named by number (NIfTI, MATLAB v5), an older subject in NIfTI pairs with a
    # v7.3 SPM.mat, and a second-level design over contrast images
    spm_folder(lab / "spm" / "11", ["gulls", "terns"], rng)
    spm_folder(lab / "spm" / "12", ["gulls", "terns"], rng, pairs=True, v73=True)
    spm_folder(lab / "spm" / "gulls_model", ["gulls"], rng,
               inputs=["/mnt/oldlab/spm/11/con_0001.nii,1", "/mnt/oldlab/spm/12/con_0001.img,1"], erdf=1.0)
    # AFNI: a bucket whose header says what each sub-brick is
    afni_bucket(lab / "afni" / "subj21" / "stats.subj21+tlrc.HEAD", [
        ("kelp#0_Coef", vol(rng), ()), ("kelp#0_Tstat", vol(rng), (3, 150.0)),
        ("kelp_vs_sand_GLT#0_Coef", vol(rng), ()), ("kelp_vs_sand_GLT#0_Tstat", vol(rng), (3, 150.0)),
        ("Full_Fstat", vol(rng, True), (4, 2.0, 150.0))])
    # FreeSurfer mri_glmfit on volumes, and a surface overlay beside it
    glm = lab / "fs" / "drift.glmdir"
    for stat in ("sig", "gamma", "gammavar"):
        save(nib.MGHImage(vol(rng, stat == "gammavar"), AFF), glm / "current" / f"{stat}.mgh")
    (glm / "dof.dat").write_text("38\n")
    save(nib.MGHImage(np.ones(SHAPE, np.float32), AFF), glm / "mask.mgh")
    save(nib.MGHImage(rng.normal(size=(10242, 1, 1)).astype(np.float32), np.eye(4)),
         lab / "fs" / "lh.thick.glmdir" / "age" / "sig.mgh")
    # a grayordinate pipeline: FEAT on CIFTI data, one-timepoint series and merged scalars
    for subj in ("9001", "9002"):
        feat = lab / "hcp" / subj / "MNINonLinear" / "Results" / "tfMRI_TIDE" / "tfMRI_TIDE_hp200_s2_level2.feat"
        (feat / "GrayordinatesStats").mkdir(parents=True)
        (feat / "design.con").write_text("/ContrastName1\t3TIDE-0TIDE\n/ContrastName2\tWAVE-AVG\n")
        (feat / "GrayordinatesStats" / "dof").write_text("300\n")
        for k in (1, 2):
            for kind in ("cope", "zstat"):
                cifti_series(feat / "GrayordinatesStats" / f"{kind}{k}.dtseries.nii", rng.normal(size=(1, 40)))
    cifti_scalars(lab / "hcp" / "9001" / "MNINonLinear" / "Results" / "tfMRI_TIDE" /
                  "sub-9001_task-tide_stat-z_statmap.dscalar.nii", rng.normal(size=(2, 40)), ["3TIDE-0TIDE", "WAVE-AVG"])
    # a workflow engine's results folder
    for k in (1, 2):
        save(nib.Nifti1Image(vol(rng), AFF), lab / "pipeline" / "results" / f"cope{k}.nii.gz")
    out.update(bids=bids, bsm=bsm, afni=lab / "afni" / "subj21" / "stats.subj21+tlrc.HEAD", glm=glm)
    return out
