"""A deterministic, invented consortium of statistic-map derivatives for the demo.

Five invented labs (one with two sites) ran seven invented studies, one of them on the cortical
surface (GIFTI per hemisphere on fsaverage5).  Every contrast
evokes one invented "concept" at a fixed place in MNI space, on top of smooth
noise, so a decoder trained on some studies predicts the others above chance.
Grids differ on purpose: 2 mm LAS 91x109x91, 3 mm RAS 61x73x61, 2 mm RAS on
another (cut) bounding box, and 1.5 mm RAS.  Nothing here comes from real data.
"""

from __future__ import annotations

import hashlib
import json
import os
import resource
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ._params import DEMO_SCALE, declared

__all__ = ["CONCEPTS", "STUDIES", "SURFACE_STUDIES", "GRIDS", "make_demo", "run_demo", "demo_decoder", "DemoSummary",
           "demo_vocabulary", "demo_rules"]

# invented concepts and the MNI coordinates (mm) where the demo puts their activity
CONCEPTS: dict[str, list[tuple[float, float, float]]] = {
    "visual-motion": [(44, -68, 2), (-44, -70, 2)],
    "hand-movement": [(-38, -22, 56), (4, -8, 60)],
    "listening": [(54, -20, 6), (-52, -22, 6)],
    "reading": [(-46, -56, -12), (-48, 14, 20)],
    "arithmetic": [(32, -60, 48), (-30, -62, 46)],
}


@dataclass(frozen=True)
class Grid:
    name: str
    shape: tuple[int, int, int]
    affine: tuple[tuple[float, ...], ...]

    @property
    def matrix(self) -> np.ndarray:
        return np.array(self.affine, dtype=np.float64)


GRIDS = {
    "las2": Grid("las2", (91, 109, 91), ((-2, 0, 0, 90), (0, 2, 0, -126), (0, 0, 2, -72), (0, 0, 0, 1))),
    "ras3": Grid("ras3", (61, 73, 61), ((3, 0, 0, -90), (0, 3, 0, -126), (0, 0, 3, -72), (0, 0, 0, 1))),
    "ras2cut": Grid("ras2cut", (95, 113, 56), ((2, 0, 0, -94), (0, 2, 0, -130), (0, 0, 2, -50), (0, 0, 0, 1))),
    "ras15": Grid("ras15", (105, 129, 97), ((1.5, 0, 0, -78), (0, 1.5, 0, -114), (0, 0, 1.5, -60), (0, 0, 0, 1))),
}


@dataclass(frozen=True)
class Study:
    name: str
    lab: str
    sites: tuple[str, ...]
    task: str
    contrasts: dict[str, str]  # contrast label -> concept
    stats: tuple[str, ...]
    grid: str
    n_subjects: int = 8
    sessions: tuple[str, ...] = ()
    runs: tuple[str, ...] = ()
    nested_in_raw: bool = False
    gzip: bool = True
    legacy_names: bool = False
    nan_outside: bool = True


STUDIES: tuple[Study, ...] = (
    Study("glowtrack", "Lantern Lab", ("lantern-north", "lantern-south"), "driftdots",
          {"coherentMotion": "visual-motion", "buttonPress": "hand-movement"},
          ("t", "effect"), "las2", n_subjects=10, sessions=("1", "2"), nested_in_raw=True, gzip=False),
    Study("inkwell", "Lantern Lab", ("lantern-north",), "glyphread",
          {"wordsVsConsonants": "reading", "sumsVsWords": "arithmetic", "tonesVsWords": "listening"},
          ("t", "z"), "las2", gzip=False, nan_outside=False),
    Study("gravelbeat", "Quarry Lab", ("quarry-main",), "tapsync",
          {"tapVsRest": "hand-movement", "metronome": "listening"},
          ("t",), "ras3", runs=("1", "2"), nested_in_raw=True),
    Study("slatecount", "Quarry Lab", ("quarry-main",), "quickadd",
          {"addVsRead": "arithmetic", "readDigits": "reading", "flowField": "visual-motion"},
          ("t", "z"), "ras2cut", gzip=False),
    Study("tidepool", "Meridian Lab", ("meridian-east",), "wavewatch",
          {"rippleMotion": "visual-motion", "oceanSounds": "listening", "gripSqueeze": "hand-movement"},
          ("t",), "ras15"),
    Study("emberlight", "Fernhill Lab", ("fernhill-campus",), "storytime",
          {"sentenceRead": "reading", "storyListen": "listening", "mentalSum": "arithmetic",
           "fistClench": "hand-movement"},
          ("t", "effect", "variance"), "ras3", legacy_names=True, nan_outside=False),
)


@dataclass(frozen=True)
class SurfaceStudy:
    """A study whose models ran on the cortical surface: GIFTI t maps per hemisphere on fsaverage5."""

    name: str
    lab: str
    sites: tuple[str, ...]
    task: str
    contrasts: dict[str, str]
    n_subjects: int = 8


SURFACE_STUDIES: tuple[SurfaceStudy, ...] = (
    SurfaceStudy("driftwood", "Cove Lab", ("cove-harbour",), "shoreline",
                 {"driftingDots": "visual-motion", "bellTones": "listening", "thumbTap": "hand-movement"}),
)

_STAT_INTENT = {"t": 3, "z": 5, "effect": 1001, "variance": 0}
_LEGACY_STAT = {"t": "t", "effect": "beta", "variance": "variance"}


@dataclass
class DemoSummary:
    root: str
    studies: int
    labs: int
    maps: int
    planted_problems: list[str]
    vocabulary: str
    rules: str
    overrides: str


def _rng(*parts: object) -> np.random.Generator:
    seed = int.from_bytes(hashlib.sha256("|".join(map(str, parts)).encode()).digest()[:8], "little")
    return np.random.default_rng(seed)


def _axes(grid: Grid) -> list[np.ndarray]:
    a = grid.matrix
    return [a[i, i] * np.arange(grid.shape[i]) + a[i, 3] for i in range(3)]


def _smooth_noise(rng: np.random.Generator, shape: tuple[int, int, int]) -> np.ndarray:
    from scipy import ndimage

    coarse = rng.standard_normal(tuple(max(2, s // 5) for s in shape)).astype(np.float32)
    zoom = [s / c for s, c in zip(shape, coarse.shape)]
    out = ndimage.zoom(coarse, zoom, order=1, grid_mode=False)
    return out[: shape[0], : shape[1], : shape[2]]


def _blob(axes: list[np.ndarray], centre: tuple[float, float, float], sigma: float) -> np.ndarray:
    g = [np.exp(-((ax - c) ** 2) / (2 * sigma**2)).astype(np.float32) for ax, c in zip(axes, centre)]
    return g[0][:, None, None] * g[1][None, :, None] * g[2][None, None, :]


def _brain(axes: list[np.ndarray]) -> np.ndarray:
    x, y, z = axes
    r = ((x / 70.0) ** 2)[:, None, None] + (((y + 18) / 92.0) ** 2)[None, :, None] + \
        (((z - 8) / 64.0) ** 2)[None, None, :]
    return r <= 1.0


def _map_volume(study: Study, sub: str, concept: str, grid: Grid, stat: str, key: str,
                brain: np.ndarray, axes: list[np.ndarray], dof: float = 180.0) -> np.ndarray:
    """One stat of one subject's contrast: its t, z, effect and variance maps are one model's (z is the t
    through its DOF, effect / sqrt(variance) is the t), as a GLM writes them."""
    rng = _rng(study.name, sub, key)
    subj = _rng(study.name, sub)
    signal = np.zeros(grid.shape, dtype=np.float32)
    amp = 3.0 + 0.5 * subj.standard_normal()
    for centre in CONCEPTS[concept]:
        jitter = subj.normal(0, 3.0, 3)
        signal += _blob(axes, tuple(np.add(centre, jitter)), 7.0)
    noise = _smooth_noise(rng, grid.shape) * 1.2
    t = amp * signal + noise
    variance = 0.5 + 0.2 * np.abs(_smooth_noise(_rng(study.name, sub, key, "variance"), grid.shape))
    if stat == "t":
        vol = t
    elif stat == "z":
        from .targets import t_to_z

        vol = t_to_z(t, dof)
    elif stat == "effect":
        vol = t * np.sqrt(variance)
    elif stat == "variance":
        vol = variance
    else:  # pragma: no cover - STUDIES lists known stats only
        raise ValueError(stat)
    fill = np.nan if study.nan_outside else 0.0
    return np.where(brain, vol, fill).astype(np.float32)


def _save(vol: np.ndarray, grid: Grid, path: Path, stat: str, dof: int, int16: bool) -> None:
    import nibabel as nib

    aff = grid.matrix
    if int16:
        img = nib.Nifti1Image(vol, aff)
        img.set_data_dtype(np.int16)  # nibabel picks scl_slope/inter on save
    else:
        img = nib.Nifti1Image(vol, aff)
    img.header.set_xyzt_units("mm")
    img.set_sform(aff, code=4)  # 4 = MNI152 (nifti1.h)
    img.set_qform(aff, code=4)
    img.header["intent_code"] = _STAT_INTENT[stat]
    if stat == "t":
        img.header["intent_p1"] = dof
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(img, str(path))


def _write_json(path: Path, doc: object) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(doc, indent=2, sort_keys=True) + "\n")


def demo_vocabulary() -> dict:
    """The demo's concept vocabulary: invented concepts, a small hierarchy, and rules."""
    rules = []
    for study in (*STUDIES, *SURFACE_STUDIES):
        for contrast, concept in study.contrasts.items():  # type: ignore[attr-defined]
            rules.append({"task": study.task, "contrast": contrast, "concepts": [concept]})  # type: ignore[attr-defined]
    return {
        "vocabulary": "mapstore-demo-concepts",
        "version": "1",
        "concepts": {
            "perception": {"description": "taking in the world through the senses"},
            "action": {"description": "producing movement"},
            "symbolic": {"description": "working with symbols"},
            "visual-motion": {"broader": ["perception"], "description": "seeing things move"},
            "listening": {"broader": ["perception"], "description": "hearing sounds or speech"},
            "hand-movement": {"broader": ["action"], "description": "moving the fingers or hand"},
            "reading": {"broader": ["symbolic"], "description": "reading words or digits"},
            "arithmetic": {"broader": ["symbolic"], "description": "adding numbers in one's head"},
        },
        "rules": rules,
    }


def demo_rules() -> dict:
    """Name rules for the one demo study that uses legacy (non-BIDS) statistic file names."""
    return {"rules": [{
        "datasets": ["emberlight*"],
        "regex": r"sub-(?P<sub>[0-9]+)/glm/(?P<contrast>[A-Za-z]+)_beta\.nii\.gz",
        "entities": {"task": "storytime", "stat": "effect", "space": "MNI152Lin"},
    }, {
        "datasets": ["emberlight*"],
        "template": "sub-{sub}/glm/{contrast}_{stat}.nii.gz",
        "entities": {"task": "storytime", "space": "MNI152Lin"},
    }]}


def _write_study(root: Path, study, scale: float) -> int:
    """One invented study: its dataset (nested in a raw one, or not), participants, sidecars, maps."""
    grid = GRIDS[study.grid]
    axes = _axes(grid)
    brain = _brain(axes)
    if study.nested_in_raw:
        raw = root / study.name
        _write_json(raw / "dataset_description.json", {
            "Name": study.name, "BIDSVersion": "1.9.0", "DatasetType": "raw",
            "Authors": [f"{study.lab} members"]})
        ds = raw / "derivatives" / "firstlevel"
        ptsv = raw / "participants.tsv"
    else:
        ds = root / study.name
        ptsv = ds / "participants.tsv"
    desc = {"Name": study.name if not study.nested_in_raw else f"{study.name} first-level models",
            "BIDSVersion": "1.9.0", "DatasetType": "derivative",
            "GeneratedBy": [{"Name": "demo-glm", "Version": "0.3",
                             "Description": "invented first-level models"}]}
    if study.nested_in_raw:
        desc["SourceDatasets"] = [{"URL": "../.."}]
    _write_json(ds / "dataset_description.json", desc)
    n_sub = max(2, round(study.n_subjects * scale))
    subjects = [f"{i + 1:02d}" for i in range(n_sub)]
    prng = _rng(study.name, "participants")
    lines = ["participant_id\tsite\tage\tsex"]
    for i, sub in enumerate(subjects):
        site = study.sites[i % len(study.sites)]
        lines.append(f"sub-{sub}\t{site}\t{int(prng.integers(19, 41))}\t{'FM'[int(prng.integers(0, 2))]}")
    ptsv.parent.mkdir(parents=True, exist_ok=True)
    ptsv.write_text("\n".join(lines) + "\n")
    dof = 140 if study.runs else 180
    if not study.legacy_names:
        _write_json(ds / f"task-{study.task}_statmap.json", {
            "DegreesOfFreedom": dof, "InstitutionName": study.lab,
            "Description": f"first-level contrasts of the {study.task} task"})
    n_maps = 0
    for sub in subjects:
        if not study.legacy_names and sub == subjects[1]:
            # one subject lost a run: a subject-level sidecar overrides the dataset one
            _write_json(ds / f"sub-{sub}" / f"sub-{sub}_task-{study.task}_statmap.json",
                        {"DegreesOfFreedom": dof - 40})
        for ses in study.sessions or (None,):
            for run in study.runs or (None,):
                for contrast, concept in study.contrasts.items():
                    for stat in study.stats:
                        key = (ses, run, contrast)  # one model per contrast: its stats share its noise
                        own = dof - 40 if not study.legacy_names and sub == subjects[1] else dof
                        vol = _map_volume(study, sub, concept, grid, stat, str(key), brain, axes, own)
                        path = _map_path(ds, study, sub, ses, run, contrast, stat)
                        _save(vol, grid, path, stat, dof, int16=(stat == "effect" and study.legacy_names))
                        n_maps += 1
    if study.legacy_names:
        _write_json(ds / "task-storytime_statmap.json", {"InstitutionName": study.lab})
    return n_maps


def _write_surface_study(root: Path, study: SurfaceStudy, scale: float) -> int:
    """One invented surface study: t maps per hemisphere on nilearn's fsaverage5 (GIFTI), with sidecars.

    The concepts sit where the volume studies put them: blobs around the same MNI points,
    evaluated at the pial vertices, on smooth noise sampled from a volume.
    """
    import nibabel as nib
    from nibabel.gifti import GiftiDataArray, GiftiImage
    from nilearn.datasets import load_fsaverage

    pial = load_fsaverage("fsaverage5")["pial"]
    ds = root / study.name
    _write_json(ds / "dataset_description.json", {
        "Name": study.name, "BIDSVersion": "1.9.0", "DatasetType": "derivative",
        "GeneratedBy": [{"Name": "demo-surface-glm", "Version": "0.1",
                         "Description": "invented first-level models on the fsaverage5 surface"}]})
    n_sub = max(2, round(study.n_subjects * scale))
    subjects = [f"{i + 1:02d}" for i in range(n_sub)]
    prng = _rng(study.name, "participants")
    lines = ["participant_id\tsite\tage\tsex"]
    for i, sub in enumerate(subjects):
        lines.append(f"sub-{sub}\t{study.sites[i % len(study.sites)]}\t{int(prng.integers(19, 41))}\t"
                     f"{'FM'[int(prng.integers(0, 2))]}")
    (ds / "participants.tsv").write_text("\n".join(lines) + "\n")
    _write_json(ds / f"task-{study.task}_statmap.json", {"DegreesOfFreedom": 160, "InstitutionName": study.lab,
                                                          "Description": f"surface contrasts of {study.task}"})
    grid = GRIDS["ras3"]
    n_maps = 0
    for sub in subjects:
        subj = _rng(study.name, sub)
        amp = 3.0 + 0.5 * subj.standard_normal()
        for contrast, concept in study.contrasts.items():
            noise = _smooth_noise(_rng(study.name, sub, contrast), grid.shape) * 1.2
            jitters = [subj.normal(0, 3.0, 3) for _ in CONCEPTS[concept]]
            for hemi, part in (("L", "left"), ("R", "right")):
                xyz = np.asarray(pial.parts[part].coordinates, dtype=np.float64)
                signal = np.zeros(len(xyz))
                for centre, jitter in zip(CONCEPTS[concept], jitters):
                    signal += np.exp(-((xyz - np.add(centre, jitter)) ** 2).sum(axis=1) / (2 * 7.0 ** 2))
                ijk = np.round((xyz - grid.matrix[:3, 3]) / np.diag(grid.matrix)[:3]).astype(int)
                ijk = np.clip(ijk, 0, np.array(grid.shape) - 1)
                t = (amp * signal + noise[ijk[:, 0], ijk[:, 1], ijk[:, 2]]).astype(np.float32)
                img = GiftiImage(darrays=[GiftiDataArray(t, intent="NIFTI_INTENT_TTEST",
                                                         datatype="NIFTI_TYPE_FLOAT32")])
                img.meta["AnatomicalStructurePrimary"] = "CortexLeft" if hemi == "L" else "CortexRight"
                path = ds / f"sub-{sub}" / "func" / (f"sub-{sub}_task-{study.task}_hemi-{hemi}_space-fsaverage5_"
                                                     f"contrast-{contrast}_stat-t_statmap.func.gii")
                path.parent.mkdir(parents=True, exist_ok=True)
                nib.save(img, str(path))
                n_maps += 1
    return n_maps


def _map_path(ds: Path, study, sub: str, ses: str | None, run: str | None, contrast: str, stat: str) -> Path:
    if study.legacy_names:
        return ds / f"sub-{sub}" / "glm" / f"{contrast}_{_LEGACY_STAT[stat]}.nii.gz"
    parts = [f"sub-{sub}"]
    folder = ds / f"sub-{sub}"
    if ses:
        parts.append(f"ses-{ses}")
        folder = folder / f"ses-{ses}"
    parts.append(f"task-{study.task}")
    if run:
        parts.append(f"run-{run}")
    parts += ["space-MNI152Lin", f"contrast-{contrast}", f"stat-{stat}", "statmap"]
    return folder / "func" / ("_".join(parts) + (".nii.gz" if study.gzip else ".nii"))


def _plant_problems(root: Path) -> list[str]:
    """Problems real consortia have: an unfetched annexed file, a truncated map."""
    planted = []
    last = sorted((root / "tidepool").glob("sub-*"))[-1].name
    tide = root / "tidepool" / last / "func"
    if tide.is_dir():
        link = tide / f"{last}_task-wavewatch_space-MNI152Lin_contrast-extraRipple_stat-t_statmap.nii.gz"
        if not link.is_symlink():
            os.symlink("../../.git/annex/objects/XX/missing.nii.gz", link)
        planted.append(str(link.relative_to(root)))
    bad = root / "slatecount" / "sub-01" / "func" / "sub-01_task-quickadd_space-MNI152Lin_contrast-broken_stat-t_statmap.nii"
    if bad.parent.is_dir():
        bad.write_bytes(b"\x00" * 100)
        planted.append(str(bad.relative_to(root)))
    return planted


def make_demo(root: str | os.PathLike[str], *, scale: float = 1.0) -> DemoSummary:
    """Write the invented consortium under ``root`` (deterministic; overwrites its own files).

    Parameters
    ----------
    root : path
        Folder to create; it receives one folder per study plus the demo's
        vocabulary, name-rules and overrides files.
    scale : float, default=1.0
        Fraction of subjects per study to write (for quick tests), at least 2.
    """
    import nibabel  # noqa: F401  (fail early with a clear import error)

    root = Path(root).expanduser().absolute()
    root.mkdir(parents=True, exist_ok=True)
    n_maps = sum(_write_study(root, study, scale) for study in STUDIES)
    n_maps += sum(_write_surface_study(root, study, scale) for study in SURFACE_STUDIES)
    planted = _plant_problems(root)
    vocab = root / "concepts.json"
    _write_json(vocab, demo_vocabulary())
    rules = root / "name-rules.json"
    _write_json(rules, demo_rules())
    overrides = root / "origins.json"
    _write_json(overrides, {"datasets": {"emberlight": {"lab": "Fernhill Lab", "site": "fernhill-campus"}}})
    every = (*STUDIES, *SURFACE_STUDIES)
    return DemoSummary(str(root), len(every), len({s.lab for s in every}), n_maps, planted,  # type: ignore[attr-defined]
                       str(vocab), str(rules), str(overrides))


@declared(scale=DEMO_SCALE)
def run_demo(folder: str | os.PathLike[str], *, scale: float = 1.0, say: Callable[[str], Any] = print) -> None:
    """Write the invented consortium into ``folder`` and run the whole job on it (index, features, labels,
    export, cross-study decoding, a surface set, check, pooling), telling ``say`` what it does."""
    from ._api import open_store
    from .analyses import pool, write_pooled
    from .features import build_features
    from .formats import plural, text_table
    from .indexing import index
    from .labels import label_store

    started = time.perf_counter()
    base = Path(folder).absolute()
    data, store = base / "data", base / "store"
    say(f"the demo takes about 3 minutes on two cores and writes about 1 GB into {base}")
    say(f"writing the invented consortium to {data} ...")
    summary = make_demo(data, scale=scale)
    say(f"  {plural(summary.studies, 'study', 'studies')} by {plural(summary.labs, 'lab')}, "
        f"{plural(summary.maps, 'statistic map')}, {plural(len(summary.planted_problems), 'planted problem file')}")
    say(f"indexing into {store} ...")
    report = index([data], store, rules=summary.rules, origins=summary.overrides)
    say(report.summary())
    st = open_store(store)
    say("\nmaps per study, grid and stat:")
    say(text_table(st.sql(
        "SELECT study, lab, count(DISTINCT site) AS sites, count(DISTINCT participant) AS subjects, "
        "string_agg(DISTINCT stat, ',' ORDER BY stat) AS stats, geometry, orientation, "
        "list_first(voxel_size) AS voxel_mm, count(*) AS maps FROM maps "
        "GROUP BY ALL ORDER BY study")))
    say("\nproblems found:")
    say(text_table(st.sql(
        f"SELECT code, level, replace(path, '{data}/', '') AS path, remedy FROM problems ORDER BY code"),
        width=100))
    say("\nresampling every map onto the MNI152 2 mm grid and brain mask ...")
    freport = build_features(store)
    say(freport.summary())
    st = open_store(store)
    say(text_table(st.sql(
        "SELECT m.study, m.orientation, list_first(m.voxel_size) AS voxel_mm, any_value(f.resample_path) AS path, "
        "round(min(f.coverage), 3) AS min_coverage, round(avg(f.coverage), 3) AS mean_coverage, count(*) AS rows "
        "FROM features f JOIN maps m USING (map_id) GROUP BY ALL ORDER BY m.study")))
    say("\nlabelling maps with the demo's concept vocabulary ...")
    say(label_store(store, summary.vocabulary).summary())
    st = open_store(store)
    concepts = ["visual-motion", "hand-movement", "listening", "reading", "arithmetic"]
    sel = st.select(concepts=concepts, y_from="concept", stat=["t", "z"], group_by="study")
    out = base / "export-leave-one-study-out"
    say(f"\nexporting t and z maps of {len(concepts)} concepts, leave-one-study-out, to {out} ...")
    say(st.export(out, sel, scheme="leave-one-group-out", overwrite=True).summary())
    say("\ncross-study decoding (scikit-learn LogisticRegression, trained on the other studies):")
    say(text_table(demo_decoder(out, say=say)))
    say("(chance: 1 / the number of concepts trained on; majority: share of the held-out study's "
        "most common concept)")
    say("\npooling volume and surface studies on fsaverage5 (surface maps as they are, volume t and z maps "
        "projected with nilearn's vol_to_surf) ...")
    sreport = build_features(store, grid="fsaverage5", where="m.stat IN ('t', 'z')")
    say(sreport.summary())
    st = open_store(store)
    ssel = st.select(concepts=concepts, y_from="concept", stat=["t", "z"], group_by="study",
                     features=sreport.name)
    sout = base / "export-surface-leave-one-study-out"
    say(st.export(sout, ssel, scheme="leave-one-group-out", overwrite=True).summary())
    say("\ncross-study decoding on the cortical surface (every study, the surface one included):")
    say(text_table(demo_decoder(sout, say=say)))
    say("\nchecking the store (grids, space, coverage, stat types, metadata) ...")
    report = st.check()  # type: ignore[assignment]
    html_path = report.write_html(base / "check-report.html", command=f"mapstore demo {folder}")  # type: ignore[attr-defined]
    say(report.summary())
    say(f"report with pictures: {html_path}")
    say(f"checking the surface set too (every study drawn on {sreport.grid}, the surface study included) ...")
    shtml = st.check(features=sreport.name).write_html(base / "check-report-surface.html",  # type: ignore[attr-defined]
                                                       command=f"mapstore demo {folder}")
    say(f"report with pictures on the cortical surface: {shtml}")

    pooled = base / "pooled-reading"
    say(f"\ndo the studies agree on 'reading', and where? (each study's t and z maps, one map per study, "
        f"combined by Stouffer's method) -> {pooled}")
    rsel = st.select(concepts=["reading"], stat=["t", "z"], missing="keep")
    fewest = int(rsel.meta.groupby("study")["participant"].nunique().min())
    res = pool(rsel, "stouffer", min_subjects=max(2, min(3, fewest)))  # a small demo has 2 subjects a study
    prov = write_pooled(res, pooled, overwrite=True)
    thr = prov.fdr["z_threshold"]
    say(f"  {plural(len(res.studies), 'study', 'studies')}; FDR 0.05 over {prov.fdr['n_tested']:,} voxels: "
        + (f"z >= {thr:.2f}" if thr is not None else "no voxel survives"))
    for p in res.peaks(3, threshold=thr):
        say(f"  peak z {p['z']:.1f} at {p.get('mm', p['position'])} mm ({plural(p['n_studies'], 'study', 'studies')})")
    say(f"\ntry: mapstore sql --store {store} \"SELECT concept, count(*) FROM labels GROUP BY ALL\"")
    say(f"     mapstore verify {out}")
    say(f"     mapstore verify {pooled}")
    say("\n" + closing_line(base, time.perf_counter() - started))


def closing_line(folder: Path, seconds: float) -> str:
    """How long the run took, what it left on disk and the most memory one of its processes held."""
    size = sum(f.stat().st_size for f in folder.rglob("*") if f.is_file() and not f.is_symlink())
    # ru_maxrss is in KiB on Linux: this process's peak, and the largest of the workers it waited for
    peak = max(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
               resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss) / 1024
    minutes, secs = divmod(round(seconds), 60)
    took = f"{minutes} min {secs} s" if minutes else f"{secs} s"
    written = f"{size / 1e9:.2f} GB" if size >= 1e9 else f"{size / 1e6:,.0f} MB"
    return (f"done in {took}; {written} written under {folder} (delete the folder to free it); "
            f"peak memory of one process {peak:,.0f} MB")


def demo_decoder(export_dir: Path, say: Callable[[str], Any] | None = None):
    """Leave-one-study-out accuracy of a plain logistic regression on an export, per held-out study;
    ``say`` hears about each fold as it is fitted."""
    import numpy as np
    import pyarrow as pa
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import FunctionTransformer, StandardScaler

    X = np.load(export_dir / "X.npy", mmap_mode="r")
    y = np.load(export_dir / "y.npy")
    from .store import read_parquet

    meta = read_parquet(export_dir / "meta.parquet").to_pandas()
    rows = []
    folds = sorted(meta["fold"].unique())
    for k, fold in enumerate(folds, 1):
        test = (meta["fold"] == fold).to_numpy()
        if say is not None:
            say(f"  fitting fold {k}/{len(folds)}: trained on {int((~test).sum())} maps, holding out "
                f"{meta.loc[test, 'study'].iloc[0]} ({int(test.sum())} maps) ...")
        # X holds the voxels every map covers (missing="common"); maps are z-scored one by one
        prep = FunctionTransformer(lambda a: StandardScaler().fit_transform(np.asarray(a).T).T)
        model = make_pipeline(prep, LogisticRegression(max_iter=300, C=0.01))
        model.fit(X[~test], y[~test])
        acc = float((model.predict(X[test]) == y[test]).mean())
        classes, counts = np.unique(y[test], return_counts=True)
        rows.append({"held_out_study": meta.loc[test, "study"].iloc[0], "test_maps": int(test.sum()),
                     "classes": len(classes), "accuracy": round(acc, 3),
                     "chance": round(1.0 / len(np.unique(y[~test])), 3),
                     "majority": round(counts.max() / counts.sum(), 3)})
    return pa.Table.from_pylist(rows)
