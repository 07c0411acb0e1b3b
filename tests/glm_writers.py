"""Real GLM outputs for the tests, written by the software that labs use.

``nilearn_outputs`` fits nilearn's ``FirstLevelModel`` and ``SecondLevelModel`` on small
simulated runs and writes them with ``nilearn.glm.save_glm_to_bids``: what the tests index
is that writer's own output, not a copy of it.  The simulated data (studies, tasks,
conditions) are invented; the layouts and files are nilearn's.

``fsl_feat_folder`` and ``spm_folder`` write the native output folders of the two other
common GLM packages, from their published format descriptions as we remember them (the
FEAT user guide's list of ``stats/`` files and the ``design.con`` text format; SPM's
``SPM.mat`` with ``xCon(i).name`` and the ``SPM{T_[df]}`` header description).
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import nibabel as nib
import numpy as np


@dataclass
class NilearnStudy:
    """What was written for one simulated study, so tests can compare against it."""

    root: Path
    name: str
    affine: np.ndarray
    shape: tuple[int, int, int]
    mask: np.ndarray  # the GLM mask given to nilearn, on the study's grid
    subjects: list[str]
    tasks: list[str]
    dof: dict[str, float] = field(default_factory=dict)  # "sub-01_task-x" -> n_scans - rank(X)


def _rotation_x(deg: float) -> np.ndarray:
    a = np.deg2rad(deg)
    r = np.eye(4)
    r[1:3, 1:3] = [[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]]
    return r


def brain_on(affine: np.ndarray, shape) -> np.ndarray:
    """nilearn's MNI152 brain mask on a grid (nearest neighbour), as booleans."""
    from nilearn.datasets import load_mni152_brain_mask
    from nilearn.image import resample_img

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        img = resample_img(load_mni152_brain_mask(resolution=2), target_affine=affine, target_shape=shape,
                           interpolation="nearest", force_resample=True, copy_header=True)
    return np.asarray(img.dataobj) > 0.5


def _events(rng: np.random.Generator, conditions: list[str], n_scans: int, t_r: float):
    import pandas as pd

    onsets = np.arange(6.0, n_scans * t_r - 12, 12.0)
    kinds = [conditions[i % len(conditions)] for i in range(len(onsets))]
    rng.shuffle(kinds)
    return pd.DataFrame({"onset": onsets, "duration": 6.0, "trial_type": kinds})


def write_first_level(root: Path, name: str, *, affine: np.ndarray, shape, subjects: list[str],
                      tasks: dict[str, list[str]], seed: int, n_scans: int = 48,
                      description: dict | None = None) -> NilearnStudy:
    """Fit one FirstLevelModel per subject and task and save it with ``save_glm_to_bids``.

    Each task has two conditions; the contrasts are their difference (a t contrast), the
    first condition alone, and an F contrast over both (a 4-D effect map).
    """
    from nilearn.glm import save_glm_to_bids
    from nilearn.glm.first_level import FirstLevelModel

    rng = np.random.default_rng(seed)
    shape = tuple(shape)
    mask = brain_on(affine, shape)
    mask_img = nib.Nifti1Image(mask.astype(np.uint8), affine)
    study = NilearnStudy(root, name, affine, shape, mask, subjects, list(tasks))
    t_r = 2.0
    for sub in subjects:
        for task, conds in tasks.items():
            events = _events(rng, conds, n_scans, t_r)
            # a BOLD-like series: baseline 100 in the brain, 0 outside (as a skull-stripped run)
            data = rng.normal(0, 1, size=shape + (n_scans,)).astype(np.float32) + 100
            frames = np.arange(n_scans) * t_r
            for k, c in enumerate(conds):
                on = np.zeros(n_scans)
                for o, d in zip(events.onset[events.trial_type == c], events.duration[events.trial_type == c]):
                    on[(frames >= o + 4) & (frames < o + d + 4)] = 1.0
                weight = rng.normal(0, 1, size=shape).astype(np.float32) * (1.0 + k)
                data += weight[..., None] * on[None, None, None, :]
            data[~mask] = 0
            model = FirstLevelModel(t_r=t_r, mask_img=mask_img, minimize_memory=False, smoothing_fwhm=None,
                                    drift_model="cosine", high_pass=0.01)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                model.fit(nib.Nifti1Image(data, affine), events=events)
                n_reg = model.design_matrices_[0].shape[1]
                f = np.zeros((2, n_reg))
                f[0, 0] = f[1, 1] = 1.0
                contrasts = {f"{conds[0]}Minus{conds[1].capitalize()}": f"{conds[0]} - {conds[1]}",
                             conds[0]: conds[0], "effectsOfInterest": f}
                save_glm_to_bids(model, contrasts=contrasts, out_dir=root, prefix=f"sub-{sub}_task-{task}")
            x = np.asarray(model.design_matrices_[0], dtype=np.float64)
            study.dof[f"sub-{sub}_task-{task}"] = float(x.shape[0] - np.linalg.matrix_rank(x))
    if description is not None:
        (root / "dataset_description.json").write_text(json.dumps(description, indent=1))
    return study


def write_second_level(root: Path, first: NilearnStudy, task: str, contrast: str) -> float:
    """A one-sample SecondLevelModel over the first-level effect maps of one contrast; its DOF."""
    import pandas as pd
    from nilearn.glm import save_glm_to_bids
    from nilearn.glm.second_level import SecondLevelModel

    maps = sorted(str(p) for p in first.root.glob(f"sub-*/sub-*_task-{task}_contrast-{contrast}_stat-effect_"
                                                  "statmap.nii.gz"))
    dm = pd.DataFrame({"intercept": np.ones(len(maps))})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = SecondLevelModel(minimize_memory=False).fit(maps, design_matrix=dm)
        save_glm_to_bids(model, contrasts=["intercept"], out_dir=root, prefix=f"task-{task}")
    return float(len(maps) - 1)


def nilearn_outputs(base: Path) -> dict[str, NilearnStudy | float]:
    """Two first-level studies (one on an oblique grid with a cut field of view) and one group model.

    Layout, as a lab would have it::

        base/alpha/                  raw dataset (participants.tsv with site)
        base/alpha/derivatives/glm   nilearn first level, two tasks, three subjects
        base/beta-glm                standalone nilearn derivative, oblique 5 mm grid, cut field of
                                     view; its participants are found through SourceDatasets
        base/beta-raw                the raw dataset beta-glm names
        base/alpha-group             nilearn second level of alpha's reading contrast
    """
    base.mkdir(parents=True, exist_ok=True)
    raw = base / "alpha"
    raw.mkdir()
    (raw / "dataset_description.json").write_text(json.dumps(
        {"Name": "alpha", "BIDSVersion": "1.9.0", "DatasetType": "raw"}))
    (raw / "participants.tsv").write_text("participant_id\tsite\tage\nsub-01\tnorth\t31\n"
                                          "sub-02\tnorth\t27\nsub-03\tsouth\t45\n")
    aff_a = np.array([[6.0, 0, 0, -78], [0, 6, 0, -114], [0, 0, 6, -72], [0, 0, 0, 1]])
    alpha = write_first_level(raw / "derivatives" / "glm", "alpha", affine=aff_a, shape=(27, 32, 27),
                              subjects=["01", "02", "03"],
                              tasks={"reading": ["words", "consonants"], "listening": ["tones", "noise"]},
                              seed=1)
    # oblique (20 degrees about x), 5 mm, field of view cut below z ~ -10 mm
    aff_b = _rotation_x(20.0) @ np.array([[5.0, 0, 0, -80], [0, 5, 0, -110], [0, 0, 5, -10], [0, 0, 0, 1]])
    beta_raw = base / "beta-raw"
    beta_raw.mkdir()
    (beta_raw / "dataset_description.json").write_text(json.dumps(
        {"Name": "beta", "BIDSVersion": "1.9.0", "DatasetType": "raw"}))
    (beta_raw / "participants.tsv").write_text("participant_id\tsite\nsub-01\teast\nsub-02\teast\n")
    beta = write_first_level(base / "beta-glm", "beta", affine=aff_b, shape=(33, 40, 18),
                             subjects=["01", "02"], tasks={"reading": ["words", "consonants"]}, seed=2)
    # nilearn writes no Name; point at the raw dataset as BIDS allows (a relative URL)
    desc = json.loads((beta.root / "dataset_description.json").read_text())
    desc["SourceDatasets"] = [{"URL": "../beta-raw"}]
    (beta.root / "dataset_description.json").write_text(json.dumps(desc, indent=1))
    group_dof = write_second_level(base / "alpha-group", alpha, "reading", "wordsminusconsonants")  # nilearn lowercases dict keys
    return {"alpha": alpha, "beta": beta, "group_dof": group_dof}


# --- the two other common GLM packages' native folders --------------------------------------

def fsl_feat_folder(feat: Path, contrasts: list[str], dof: int, rng: np.random.Generator,
                    shape=(10, 12, 10)) -> Path:
    """A FEAT output folder (from memory of the FEAT user guide).

    ``stats/`` holds ``copeN``, ``varcopeN``, ``tstatN``, ``zstatN`` (N from 1) and a text
    file ``dof``; ``design.con`` lists ``/ContrastNameN<TAB>name`` lines, then ``/NumWaves``,
    ``/NumContrasts`` and ``/Matrix``; ``mask.nii.gz`` is the analysis mask.  Values outside
    the mask are 0.
    """
    stats = feat / "stats"
    stats.mkdir(parents=True)
    aff = np.array([[-4.0, 0, 0, 18], [0, 4, 0, -24], [0, 0, 4, -18], [0, 0, 0, 1]])
    mask = np.zeros(shape, dtype=bool)
    mask[2:-2, 2:-2, 2:-2] = True
    nib.save(nib.Nifti1Image(mask.astype(np.uint8), aff), str(feat / "mask.nii.gz"))
    lines = [f"/ContrastName{i + 1}\t{c}" for i, c in enumerate(contrasts)]
    lines += ["/NumWaves\t3", f"/NumContrasts\t{len(contrasts)}", "/PPheights\t1 1", "", "/Matrix"]
    lines += [" ".join("1" if j == i else "0" for j in range(3)) for i in range(len(contrasts))]
    (feat / "design.con").write_text("\n".join(lines) + "\n")
    (stats / "dof").write_text(f"{dof}\n")
    for i in range(len(contrasts)):
        for kind in ("cope", "varcope", "tstat", "zstat"):
            vol = rng.normal(size=shape).astype(np.float32)
            if kind == "varcope":
                vol = np.abs(vol) + 0.1
            vol[~mask] = 0
            nib.save(nib.Nifti1Image(vol, aff), str(stats / f"{kind}{i + 1}.nii.gz"))
    return feat


def spm_folder(folder: Path, contrasts: list[tuple[str, str]], dof: float, rng: np.random.Generator,
               shape=(10, 12, 10)) -> Path:
    """An SPM first-level folder (from memory of SPM's file conventions).

    ``SPM.mat`` (MATLAB v5, read with ``scipy.io.loadmat``) holds ``SPM.xCon(i).name`` and
    ``.STAT`` ('T' or 'F'); contrast images are ``con_NNNN.nii`` (T contrasts) or
    ``ess_NNNN.nii`` (F), statistic images ``spmT_NNNN.nii`` / ``spmF_NNNN.nii`` whose header
    description reads ``SPM{T_[df]} - contrast N: name``; ``mask.nii`` is the analysis mask;
    float images hold NaN outside it.
    """
    from scipy.io import savemat

    folder.mkdir(parents=True)
    aff = np.array([[-3.0, 0, 0, 15], [0, 3, 0, -18], [0, 0, 3, -15], [0, 0, 0, 1]])
    mask = np.zeros(shape, dtype=bool)
    mask[1:-1, 1:-1, 1:-1] = True
    nib.save(nib.Nifti1Image(mask.astype(np.uint8), aff), str(folder / "mask.nii"))
    xcon = np.zeros((1, len(contrasts)), dtype=[("name", object), ("STAT", object)])
    for i, (name, kind) in enumerate(contrasts):
        xcon[0, i] = (name, kind)
        n = f"{i + 1:04d}"
        stat_img, con_img = (f"spmT_{n}.nii", f"con_{n}.nii") if kind == "T" else (f"spmF_{n}.nii", f"ess_{n}.nii")
        for fname, is_stat in ((stat_img, True), (con_img, False)):
            vol = rng.normal(size=shape).astype(np.float32)
            if is_stat and kind == "F":
                vol = np.abs(vol)
            vol[~mask] = np.nan
            img = nib.Nifti1Image(vol, aff)
            if is_stat:
                df = f"{dof:.1f}" if kind == "T" else f"2.0,{dof:.1f}"  # an F contrast of two rows
                img.header["descrip"] = f"SPM{{{kind}_[{df}]}} - contrast {i + 1}: {name}".encode()[:79]
            nib.save(img, str(folder / fname))
    savemat(folder / "SPM.mat", {"SPM": {"xCon": xcon, "swd": str(folder)}})
    return folder


# --- surface models ---------------------------------------------------------------------------

def write_surface_first_level(root: Path, subjects: list[str], conds: tuple[str, str] = ("faces", "places"),
                              seed: int = 5, n_scans: int = 40, task: str = "viewing",
                              signal: dict[str, np.ndarray] | None = None) -> dict[str, float]:
    """nilearn ``FirstLevelModel`` fits on fsaverage5 surface runs, saved with ``save_glm_to_bids``.

    nilearn's writer names the maps ``<prefix>_hemi-L_den-10242_contrast-..._statmap.gii`` (and a
    ``_mask.gii`` per hemisphere).  ``signal`` (hemisphere -> vertices) is added, scaled by the
    first condition's regressor.  Returns the DOF of each model (``n_scans - rank(X)``).
    """
    from nilearn.datasets import load_fsaverage
    from nilearn.glm import save_glm_to_bids
    from nilearn.glm.first_level import FirstLevelModel
    from nilearn.surface import SurfaceImage

    mesh = load_fsaverage("fsaverage5")["pial"]
    rng = np.random.default_rng(seed)
    t_r = 2.0
    dofs = {}
    for sub in subjects:
        events = _events(rng, list(conds), n_scans, t_r)
        frames = np.arange(n_scans) * t_r
        on = np.zeros(n_scans)
        for o, d in zip(events.onset[events.trial_type == conds[0]], events.duration[events.trial_type == conds[0]]):
            on[(frames >= o + 4) & (frames < o + d + 4)] = 1.0
        data = {}
        for part in ("left", "right"):
            x = rng.normal(0, 1, size=(10242, n_scans)).astype(np.float32) + 100
            if signal is not None:
                x += signal[part][:, None].astype(np.float32) * on[None, :]
            data[part] = x
        model = FirstLevelModel(t_r=t_r, minimize_memory=False, smoothing_fwhm=None, drift_model="cosine",
                                high_pass=0.01)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model.fit(SurfaceImage(mesh=mesh, data=data), events=events)
            save_glm_to_bids(model, contrasts={f"{conds[0]}Minus{conds[1].capitalize()}": f"{conds[0]} - {conds[1]}"},
                             out_dir=root, prefix=f"sub-{sub}_task-{task}")
        x = np.asarray(model.design_matrices_[0], dtype=np.float64)
        dofs[f"sub-{sub}"] = float(x.shape[0] - np.linalg.matrix_rank(x))
    return dofs


def write_surface_second_level(first: Path, out: Path, subjects: list[str], contrast: str,
                               task: str = "viewing") -> float:
    """A one-sample surface ``SecondLevelModel`` over the first-level effect maps (GIFTI pairs written by
    :func:`write_surface_first_level`), saved with ``save_glm_to_bids``; returns its DOF."""
    import nibabel as nib
    import pandas as pd
    from nilearn.datasets import load_fsaverage
    from nilearn.glm import save_glm_to_bids
    from nilearn.glm.second_level import SecondLevelModel
    from nilearn.surface import SurfaceImage

    mesh = load_fsaverage("fsaverage5")["pial"]
    maps = []
    for sub in subjects:
        left = next((first / f"sub-{sub}").glob(f"*hemi-L*contrast-{contrast}_stat-effect_statmap.gii"))
        right = Path(str(left).replace("hemi-L", "hemi-R"))
        maps.append(SurfaceImage(mesh=mesh, data={"left": nib.load(str(left)).darrays[0].data,
                                                  "right": nib.load(str(right)).darrays[0].data}))
    dm = pd.DataFrame({"intercept": np.ones(len(maps))})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = SecondLevelModel(minimize_memory=False).fit(maps, design_matrix=dm)
        save_glm_to_bids(model, contrasts=["intercept"], out_dir=out, prefix=f"task-{task}")
    return float(len(maps) - 1)
