"""Shared helpers: tiny NIfTI writers and derivative folders (the demo tree and store are in the
repository's top-level conftest.py, shared with the docstring examples)."""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest


NIBABEL_DATA = Path(nib.__file__).parent / "tests" / "data"


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261202)


def write_json(path: Path, doc: object) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(doc))
    return path


def write_map(path: Path, data: np.ndarray | None = None, affine: np.ndarray | None = None,
              shape=(4, 5, 6)) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    if data is None:
        data = np.arange(np.prod(shape), dtype=np.float32).reshape(shape)
    img = nib.Nifti1Image(data, np.diag([2.0, 2.0, 2.0, 1.0]) if affine is None else affine)
    nib.save(img, str(path))
    return path


def make_derivative(root: Path, name: str = "study", raw: bool = False) -> Path:
    """A minimal derivative dataset (optionally nested in a raw dataset); returns its root."""
    if raw:
        write_json(root / "dataset_description.json", {"Name": name, "BIDSVersion": "1.9.0",
                                                        "DatasetType": "raw"})
        ds = root / "derivatives" / "glm"
        write_json(ds / "dataset_description.json", {"Name": f"{name} glm", "BIDSVersion": "1.9.0",
                                                      "DatasetType": "derivative",
                                                      "GeneratedBy": [{"Name": "x"}]})
        return ds
    write_json(root / "dataset_description.json", {"Name": name, "BIDSVersion": "1.9.0",
                                                    "DatasetType": "derivative",
                                                    "GeneratedBy": [{"Name": "x"}]})
    return root


def box_4mm() -> np.ndarray:
    """A 4 mm grid of 41 x 48 x 40 voxels that covers the MNI brain (the affine)."""
    aff = np.diag([4.0, 4.0, 4.0, 1.0])
    aff[:3, 3] = [-80, -112, -60]
    return aff


def noise_maps(ds: Path, subjects, tasks=("go",), seed: int = 0) -> list[Path]:
    """t maps of random noise on ``box_4mm``, one per subject, tasks taken in turn."""
    rng = np.random.default_rng(seed)
    out = []
    for k, i in enumerate(subjects):
        task = tasks[k % len(tasks)]
        out.append(write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-{task}_contrast-a_stat-t_statmap.nii.gz",
                             rng.normal(size=(41, 48, 40)).astype(np.float32), box_4mm()))
    return out
