"""Header facts against nibabel, nifti_tool and the NIfTI-1 standard."""

from __future__ import annotations

import gzip
import re
import shutil
import subprocess
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from nibabel.affines import voxel_sizes
from nibabel.orientations import aff2axcodes

from mapstore.errors import HeaderError
from mapstore.formats._header import INTENT_NAMES, grid_fingerprint, read_header

from ..conftest import NIBABEL_DATA


def _reference_files(demo_tree: Path) -> list[Path]:
    from nilearn.datasets import load_sample_motor_activation_image

    files = [NIBABEL_DATA / n for n in (
        "example4d.nii.gz",        # NIfTI-1, gzip, 4D
        "example_nifti2.nii.gz",   # NIfTI-2
        "anatomical.nii",          # big-endian NIfTI-1
        "functional.nii",
        "standard.nii.gz",
        "resampled_anat_moved.nii",
    )]
    files.append(Path(load_sample_motor_activation_image()))  # nilearn's bundled sample map
    files += sorted(demo_tree.rglob("*_statmap.nii*"))[:3]
    files += sorted(demo_tree.rglob("*_beta.nii.gz"))[:1]  # int16 with scl_slope
    return [f for f in files if not f.is_symlink() and f.stat().st_size > 1000]


def test_reference_files_exist(demo_tree):
    assert len(_reference_files(demo_tree)) >= 10


def test_header_facts_agree_with_nibabel(demo_tree):
    # reference: nibabel's NIfTI-1/NIfTI-2 header classes on the same files
    for f in _reference_files(demo_tree):
        facts = read_header(str(f))
        img = nib.load(str(f))
        hdr = img.header
        assert facts.shape == img.shape, f
        assert facts.nifti_version == (2 if isinstance(hdr, nib.Nifti2Header) else 1), f
        assert facts.dtype == hdr.get_data_dtype().name, f
        assert facts.endianness == hdr.endianness, f
        np.testing.assert_allclose(facts.affine_array, img.affine, atol=2e-4, err_msg=str(f))
        np.testing.assert_allclose(facts.voxel_size, voxel_sizes(img.affine), atol=1e-5)
        assert facts.orientation == "".join(aff2axcodes(img.affine)), f
        qform, qcode = hdr.get_qform(coded=True)
        sform, scode = hdr.get_sform(coded=True)
        assert facts.qform_code == int(hdr["qform_code"]) and facts.sform_code == int(hdr["sform_code"])
        if qform is not None:
            # nibabel keeps a = sqrt(1 - b^2 - c^2 - d^2) however small it is; nifti1_io (and so
            # nifti_tool, compared to 1e-4 below) sets a = 0 below 1e-7, and so do we.  On the
            # near-180-degree quaternion of example_nifti2.nii.gz that differs by ~1.4e-4 mm.
            np.testing.assert_allclose(np.reshape(facts.qform_affine, (4, 4)), qform, atol=2e-4)
        if sform is not None:
            np.testing.assert_allclose(np.reshape(facts.sform_affine, (4, 4)), sform, atol=1e-5)
        slope, inter = hdr.get_slope_inter()
        if slope is not None:
            assert facts.scl_slope == pytest.approx(slope) and facts.scl_inter == pytest.approx(inter)
        assert facts.intent_code == int(hdr["intent_code"])
        assert facts.vox_offset == img.dataobj.offset  # where nibabel's array proxy reads voxels


def test_intent_names_match_nibabel_table():
    # reference: nibabel's copy of the nifti1.h NIFTI_INTENT_* table
    from nibabel.nifti1 import intent_codes

    for code, name in INTENT_NAMES.items():
        assert code in intent_codes.value_set(), code
        assert name == intent_codes.label[code], (code, name)  # names too, not only codes
    # and no nifti1.h code is missing (nibabel adds FSL's codes 2006-2018 and CIFTI-2's from 3000)
    assert set(INTENT_NAMES) == {c for c in intent_codes.value_set() if c < 2006}


def _nifti_tool(path: Path) -> dict[str, list[str]]:
    out = subprocess.run(["nifti_tool", "-disp_nim", "-infiles", str(path)], capture_output=True,
                         text=True, check=True).stdout
    fields = {}
    for line in out.splitlines():
        m = re.match(r"\s+(\w+)\s+\d+\s+\d+\s+(.*)$", line)
        if m:
            fields[m.group(1)] = m.group(2).split()
    return fields


@pytest.mark.skipif(shutil.which("nifti_tool") is None, reason="nifti_tool (Debian nifti-bin) not installed")
def test_header_facts_agree_with_nifti_tool(demo_tree):
    # reference: nifti_tool from Debian's nifti-bin, an independent C reader of NIfTI-1/2
    for f in _reference_files(demo_tree):
        ref = _nifti_tool(f)
        facts = read_header(str(f))
        ndim = int(ref["ndim"][0])
        assert facts.shape == tuple(int(x) for x in ref["dim"][1: ndim + 1]), f
        assert facts.qform_code == int(ref["qform_code"][0]) and facts.sform_code == int(ref["sform_code"][0])
        assert facts.intent_code == int(ref["intent_code"][0])
        assert facts.endianness == {"1": "<", "2": ">"}[ref["byteorder"][0]], f
        if facts.qform_code > 0:
            np.testing.assert_allclose(facts.qform_affine, [float(x) for x in ref["qto_xyz"]], atol=1e-4)
        if facts.sform_code > 0:
            np.testing.assert_allclose(facts.sform_affine, [float(x) for x in ref["sto_xyz"]], atol=1e-4)


def _two_form_image(tmp_path: Path, qcode: int, scode: int) -> tuple[Path, np.ndarray, np.ndarray]:
    q = np.array([[-2.0, 0, 0, 90], [0, 2, 0, -126], [0, 0, 2, -72], [0, 0, 0, 1]])
    s = np.array([[3.0, 0, 0, -10], [0, 3, 0, -20], [0, 0, 3, -30], [0, 0, 0, 1]])
    img = nib.Nifti1Image(np.zeros((3, 4, 5), np.float32), None)
    img.set_qform(q, code=qcode)
    img.set_sform(s, code=scode)
    f = tmp_path / f"q{qcode}s{scode}.nii"
    nib.save(img, str(f))
    return f, q, s


@pytest.mark.parametrize("qcode, scode, expect", [(1, 2, "sform"), (1, 0, "qform"), (0, 4, "sform"),
                                                   (0, 0, "pixdim")])
def test_sform_qform_precedence(tmp_path, qcode, scode, expect):
    # reference: nifti1.h -- method 3 (sform) when sform_code > 0, method 2 (qform) when
    # qform_code > 0, method 1 (pixdim scaling) otherwise; nibabel's get_best_affine agrees
    # for the coded cases.
    f, q, s = _two_form_image(tmp_path, qcode, scode)
    facts = read_header(str(f))
    assert facts.affine_source == expect
    want = {"sform": s, "qform": q}.get(expect)
    if want is not None:
        np.testing.assert_allclose(facts.affine_array, want, atol=1e-5)
        np.testing.assert_allclose(facts.affine_array, nib.load(str(f)).header.get_best_affine(), atol=1e-5)
    else:
        zooms = nib.load(str(f)).header.get_zooms()
        np.testing.assert_allclose(np.diag(facts.affine_array)[:3], zooms)


def test_singular_sform_falls_back_to_qform(tmp_path):
    f, q, _ = _two_form_image(tmp_path, 1, 2)
    raw = bytearray(f.read_bytes())
    raw[280:328] = b"\x00" * 48  # zero srow_x/y/z, keep sform_code
    f.write_bytes(bytes(raw))
    facts = read_header(str(f))
    assert facts.affine_source == "qform" and facts.warnings
    np.testing.assert_allclose(facts.affine_array, q, atol=1e-5)


def test_reads_only_the_first_block(tmp_path):
    # a .nii.gz whose tail is garbage still gives its header: only the first block is inflated
    src = NIBABEL_DATA / "example4d.nii.gz"
    raw = src.read_bytes()
    f = tmp_path / "tail.nii.gz"
    f.write_bytes(raw[:3000] + b"\x00garbage" * 1000)
    assert read_header(str(f)).shape == (128, 96, 24, 2)


@pytest.mark.parametrize("content, code", [
    (b"", "empty-file"),
    (b"\x5c\x01\x00\x00" + b"\x00" * 50, "truncated-header"),
    (b"hello world" * 50, "not-nifti"),
    (b"\x1f\x8b\x08\x00" + b"\xff" * 400, "bad-gzip"),
])
def test_bad_files_get_precise_codes(tmp_path, content, code):
    f = tmp_path / "bad.nii.gz"
    f.write_bytes(content)
    with pytest.raises(HeaderError) as err:
        read_header(str(f))
    assert err.value.code == code and str(f) in str(err.value) and err.value.remedy


def test_analyze_header_is_not_nifti():
    # nibabel ships an ANALYZE 7.5 header: 348 bytes without the NIfTI magic
    with pytest.raises(HeaderError) as err:
        read_header(str(NIBABEL_DATA / "analyze.hdr"))
    assert err.value.code == "not-nifti"


def test_missing_file(tmp_path):
    with pytest.raises(HeaderError) as err:
        read_header(str(tmp_path / "none.nii"))
    assert err.value.code == "missing-file"


def test_gzip_detected_by_content_not_name(tmp_path):
    f = tmp_path / "mislabelled.nii"
    f.write_bytes(gzip.compress((NIBABEL_DATA / "anatomical.nii").read_bytes()))
    assert read_header(str(f)).shape == (33, 41, 25)


def test_grid_fingerprint():
    a = np.diag([2.0, 2.0, 2.0, 1.0])
    b = a.copy()
    b[0, 3] = 1e-7  # below the 1e-4 mm tolerance
    c = a.copy()
    c[0, 0] = -2.0
    assert grid_fingerprint((3, 4, 5), a) == grid_fingerprint((3, 4, 5), b)
    assert grid_fingerprint((3, 4, 5), a) != grid_fingerprint((3, 4, 5), c)
    assert grid_fingerprint((3, 4, 5), a) != grid_fingerprint((3, 4, 6), a)


def test_dimensions_whose_product_wraps_int64_are_refused(tmp_path):
    # found by the fuzz test: NIfTI-2 dims are int64 (nifti2.h); one damaged byte made a shape whose
    # voxel count wrapped around in int64 to the file's real size, and the reshape crashed
    path = tmp_path / "x.nii"
    nib.save(nib.Nifti2Image(np.arange(120, dtype=np.float32).reshape(4, 5, 6), np.eye(4)), str(path))
    raw = bytearray(path.read_bytes())
    raw[39] = 6  # the top byte of dim[2]
    path.write_bytes(bytes(raw))
    with pytest.raises(HeaderError) as err:
        read_header(str(path))
    assert err.value.code == "bad-dim" and str(path) in str(err.value)
