"""Mutated headers, gzip streams, sidecars and participants.tsv: never a traceback, never a bad row."""

from __future__ import annotations

import pytest

import gzip
import tempfile
from pathlib import Path

import nibabel as nib
import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import mapstore
from mapstore.errors import MapstoreError

from ..conftest import make_derivative

pytestmark = pytest.mark.slow  # CI runs it; pytest -m 'not slow' skips it


def _valid(version: int) -> bytes:
    """A small valid NIfTI-1 or NIfTI-2 image, as nibabel writes it (the mutation starts from here)."""
    data = np.arange(4 * 5 * 6, dtype=np.float32).reshape(4, 5, 6)
    aff = np.diag([2.0, 2.0, 2.0, 1.0])
    aff[:3, 3] = [-4, -5, -6]
    img = (nib.Nifti1Image if version == 1 else nib.Nifti2Image)(data, aff)
    return img.to_bytes()


BASES = {1: _valid(1), 2: _valid(2)}
NAME = "sub-01/sub-01_task-go_contrast-a_stat-t_statmap.nii"


def _run(root: Path, payload: bytes, gz: bool, sidecar: bytes, participants: bytes) -> None:
    ds = make_derivative(root / "d")
    f = ds / (NAME + (".gz" if gz else ""))
    f.parent.mkdir(parents=True, exist_ok=True)
    f.write_bytes(payload)
    (ds / "task-go_statmap.json").write_bytes(sidecar)
    (ds / "participants.tsv").write_bytes(participants)
    store = root / "store"
    try:
        mapstore.index([ds], store, jobs=1, progress=False)
    except MapstoreError:
        return  # a clean refusal is fine
    st_ = mapstore.open(store)
    for m in st_.sql("SELECT shape, affine, voxel_size, dtype FROM maps").to_pylist():
        # a row only from a header that says what a map needs
        assert len(m["shape"]) >= 3 and all(s >= 1 for s in m["shape"][:3])
        assert len(m["affine"]) == 16 and np.all(np.isfinite(m["affine"]))
        assert abs(np.linalg.det(np.reshape(m["affine"], (4, 4))[:3, :3])) > 0
        assert all(v > 0 for v in m["voxel_size"]) and m["dtype"]
    try:
        mapstore.build_features(store, grid="MNI152-3mm", jobs=1, progress=False)
    except MapstoreError:
        pass
    st_.check(pictures=False)
    st_.close()


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(version=st.sampled_from([1, 2]), gz=st.booleans(),
       edits=st.lists(st.tuples(st.integers(0, 543), st.integers(0, 255)), min_size=1, max_size=6),
       cut=st.one_of(st.none(), st.integers(0, 800)),
       sidecar=st.sampled_from([b'{"DegreesOfFreedom": 20}', b'{"DegreesOfFreedom": "x"}', b"{", b"[]",
                                b'{"DegreesOfFreedom": 1e999}', b"\xff\xfe", b""]),
       participants=st.sampled_from([b"participant_id\tsite\nsub-01\ta\n", b"\x00\x01", b"site\nx\n", b"",
                                     b"participant_id\nsub-01\tx\ty\n", b"participant_id\tage\nsub-01\t\xff\n"]))
def test_mutated_inputs_never_crash(version, gz, edits, cut, sidecar, participants):
    raw = bytearray(BASES[version])
    for pos, val in edits:  # header bytes (NIfTI-1 348 + 4, NIfTI-2 540 + 4)
        if pos < len(raw):
            raw[pos] = val
    payload = bytes(raw)
    if gz:
        payload = gzip.compress(payload)
        if cut is not None:  # a cut or damaged gzip stream
            payload = payload[:cut] if cut < len(payload) else payload[:-4] + b"\0\0\0\0"
    elif cut is not None:
        payload = payload[:cut]
    with tempfile.TemporaryDirectory() as tmp:
        _run(Path(tmp), payload, gz, sidecar, participants)
