"""Header facts: NIfTI-1 and NIfTI-2 from the first bytes of a file; GIFTI and CIFTI-2 without decoding data.

This stage never touches voxel data: a ``.nii`` needs its first 348 (NIfTI-1) or
540 (NIfTI-2) bytes, a ``.nii.gz`` only enough of its first compressed block to
inflate those bytes.  The layouts below follow the published ``nifti1.h`` and
``nifti2.h`` headers field by field.
"""

from __future__ import annotations

import hashlib
import math
import zlib
from dataclasses import dataclass, field

import numpy as np

from ..errors import HeaderError

__all__ = [
    "HeaderFacts",
    "read_header",
    "parse_header",
    "header_prefix",
    "grid_fingerprint",
    "orientation_code",
    "NIFTI_DTYPES",
    "INTENT_NAMES",
    "SurfaceFacts",
    "read_surface_header",
    "surface_format",
    "surface_grid_id",
    "brain_models_key",
    "expected_vertices",
    "FSAVERAGE_VERTICES",
]

NIFTI1_SIZE = 348
NIFTI2_SIZE = 540
# enough compressed bytes to inflate a NIfTI-2 header plus the extension flag
PREFIX_BYTES = 4096

_N1_FIELDS = [
    ("sizeof_hdr", "i4"), ("data_type", "S10"), ("db_name", "S18"), ("extents", "i4"),
    ("session_error", "i2"), ("regular", "S1"), ("dim_info", "u1"), ("dim", "i2", (8,)),
    ("intent_p1", "f4"), ("intent_p2", "f4"), ("intent_p3", "f4"), ("intent_code", "i2"),
    ("datatype", "i2"), ("bitpix", "i2"), ("slice_start", "i2"), ("pixdim", "f4", (8,)),
    ("vox_offset", "f4"), ("scl_slope", "f4"), ("scl_inter", "f4"), ("slice_end", "i2"),
    ("slice_code", "u1"), ("xyzt_units", "u1"), ("cal_max", "f4"), ("cal_min", "f4"),
    ("slice_duration", "f4"), ("toffset", "f4"), ("glmax", "i4"), ("glmin", "i4"),
    ("descrip", "S80"), ("aux_file", "S24"), ("qform_code", "i2"), ("sform_code", "i2"),
    ("quatern_b", "f4"), ("quatern_c", "f4"), ("quatern_d", "f4"),
    ("qoffset_x", "f4"), ("qoffset_y", "f4"), ("qoffset_z", "f4"),
    ("srow_x", "f4", (4,)), ("srow_y", "f4", (4,)), ("srow_z", "f4", (4,)),
    ("intent_name", "S16"), ("magic", "S4"),
]
_N2_FIELDS = [
    ("sizeof_hdr", "i4"), ("magic", "S8"), ("datatype", "i2"), ("bitpix", "i2"),
    ("dim", "i8", (8,)), ("intent_p1", "f8"), ("intent_p2", "f8"), ("intent_p3", "f8"),
    ("pixdim", "f8", (8,)), ("vox_offset", "i8"), ("scl_slope", "f8"), ("scl_inter", "f8"),
    ("cal_max", "f8"), ("cal_min", "f8"), ("slice_duration", "f8"), ("toffset", "f8"),
    ("slice_start", "i8"), ("slice_end", "i8"), ("descrip", "S80"), ("aux_file", "S24"),
    ("qform_code", "i4"), ("sform_code", "i4"),
    ("quatern_b", "f8"), ("quatern_c", "f8"), ("quatern_d", "f8"),
    ("qoffset_x", "f8"), ("qoffset_y", "f8"), ("qoffset_z", "f8"),
    ("srow_x", "f8", (4,)), ("srow_y", "f8", (4,)), ("srow_z", "f8", (4,)),
    ("slice_code", "i4"), ("xyzt_units", "i4"), ("intent_code", "i4"),
    ("intent_name", "S16"), ("dim_info", "u1"), ("unused_str", "S15"),
]


def _dtypes(fields: list) -> dict[str, np.dtype]:
    little = np.dtype([(f[0], "<" + f[1] if f[1][0] != "S" else f[1], *f[2:]) for f in fields])
    big = little.newbyteorder(">")
    return {"<": little, ">": big}


_N1 = _dtypes(_N1_FIELDS)
_N2 = _dtypes(_N2_FIELDS)
assert _N1["<"].itemsize == NIFTI1_SIZE and _N2["<"].itemsize == NIFTI2_SIZE

# nifti1.h datatype codes -> numpy dtype names
NIFTI_DTYPES: dict[int, str] = {
    2: "uint8", 4: "int16", 8: "int32", 16: "float32", 32: "complex64", 64: "float64",
    128: "rgb24", 256: "int8", 512: "uint16", 768: "uint32", 1024: "int64",
    1280: "uint64", 1536: "float128", 1792: "complex128", 2048: "complex256",
    2304: "rgba32",
}
# the voxel types a statistic map can hold (real scalars), by numpy name
REAL_SCALAR_DTYPES = frozenset({"uint8", "int8", "int16", "uint16", "int32", "uint32", "int64", "uint64",
                                "float32", "float64"})
# nifti1.h NIFTI_INTENT_* codes (names as nibabel's nifti1.intent_codes labels them)
INTENT_NAMES: dict[int, str] = {
    0: "none", 2: "correlation", 3: "t test", 4: "f test", 5: "z score", 6: "chi2",
    7: "beta", 8: "binomial", 9: "gamma", 10: "poisson", 11: "normal",
    12: "non central f test", 13: "non central chi2", 14: "logistic", 15: "laplace",
    16: "uniform", 17: "non central t test", 18: "weibull", 19: "chi", 20: "inverse gaussian",
    21: "extreme value 1", 22: "p value", 23: "log p value", 24: "log10 p value",
    1001: "estimate", 1002: "label", 1003: "neuroname", 1004: "general matrix",
    1005: "symmetric matrix", 1006: "displacement vector", 1007: "vector",
    1008: "pointset", 1009: "triangle", 1010: "quaternion", 1011: "dimensionless",
    2001: "time series", 2002: "node index", 2003: "rgb vector", 2004: "rgba vector",
    2005: "shape",
}


@dataclass(frozen=True)
class HeaderFacts:
    """What the header of one NIfTI file says, with no voxel read.

    ``affine`` is the voxel-to-world matrix chosen as ``nifti1.h`` describes:
    the sform (method 3) when ``sform_code > 0``, else the qform (method 2) when
    ``qform_code > 0``, else pixdim scaling (method 1).
    """

    nifti_version: int | None  # None: another format read through nibabel (formats._foreign)
    endianness: str
    shape: tuple[int, ...]
    dtype: str
    bitpix: int
    vox_offset: int
    scl_slope: float
    scl_inter: float
    intent_code: int
    intent_name: str
    intent_p1: float
    qform_code: int
    sform_code: int
    affine_source: str
    affine: tuple[float, ...]  # 16 values, row-major
    qform_affine: tuple[float, ...] | None
    sform_affine: tuple[float, ...] | None
    voxel_size: tuple[float, float, float]
    xyzt_units: int
    descrip: str
    warnings: tuple[str, ...] = field(default_factory=tuple)
    single_file: bool = True  # magic n+1 / n+2; False for a header whose data is in a separate .img

    @property
    def affine_array(self) -> np.ndarray:
        return np.array(self.affine, dtype=np.float64).reshape(4, 4)

    @property
    def spatial_shape(self) -> tuple[int, int, int]:
        s = tuple(self.shape[:3]) + (1,) * max(0, 3 - len(self.shape))
        return (int(s[0]), int(s[1]), int(s[2]))

    @property
    def n_volumes(self) -> int:
        return math.prod(self.shape[3:]) if len(self.shape) > 3 else 1

    @property
    def orientation(self) -> str:
        return orientation_code(self.affine_array)

    @property
    def grid_id(self) -> str:
        return grid_fingerprint(self.spatial_shape, self.affine_array)

    @property
    def data_nbytes(self) -> int:
        return math.prod(self.shape) * max(self.bitpix, 8) // 8  # Python ints: no int64 wrap-around


def _quaternion_affine(b: float, c: float, d: float, pixdim: np.ndarray,
                       offsets: tuple[float, float, float]) -> np.ndarray:
    # nifti1.h "METHOD 2"; as nifti1_io.c's nifti_quatern_to_mat44 does (from memory of that
    # reference code), a = sqrt(1 - b^2 - c^2 - d^2) unless that is below 1e-7: then (b, c, d)
    # is renormalised and a = 0 (a 180 degree rotation)
    a2 = 1.0 - (b * b + c * c + d * d)
    if a2 < 1e-7:
        norm = math.sqrt(b * b + c * c + d * d)
        b, c, d = b / norm, c / norm, d / norm
        a2 = 0.0
    a = math.sqrt(a2)
    rot = np.array([
        [a * a + b * b - c * c - d * d, 2 * b * c - 2 * a * d, 2 * b * d + 2 * a * c],
        [2 * b * c + 2 * a * d, a * a + c * c - b * b - d * d, 2 * c * d - 2 * a * b],
        [2 * b * d - 2 * a * c, 2 * c * d + 2 * a * b, a * a + d * d - c * c - b * b],
    ])
    qfac = -1.0 if pixdim[0] < 0 else 1.0
    scale = np.array([pixdim[1], pixdim[2], pixdim[3] * qfac], dtype=np.float64)
    out = np.eye(4)
    out[:3, :3] = rot * scale
    out[:3, 3] = offsets
    return out


# no entry of a statistic map's affine comes near a kilometre: larger ones are damaged headers (and
# overflow the voxel-size norms)
_AFFINE_LIMIT_MM = 1e6


def _is_usable(aff: np.ndarray) -> bool:
    m = aff[:3, :3]
    if not (np.all(np.isfinite(aff)) and np.abs(aff).max() < _AFFINE_LIMIT_MM):
        return False
    return bool(abs(np.linalg.det(m)) > 1e-12)


def _text(raw: bytes) -> str:
    return raw.split(b"\x00", 1)[0].decode("latin-1").strip()


def header_prefix(path: str, raw: bytes) -> bytes:
    """Return the uncompressed first bytes of a file given its first raw bytes.

    ``raw`` is the start of the file as stored.  Gzip streams are recognised by
    their magic bytes, not by the file name, so a mislabelled file is read right.
    """
    if raw[:2] == b"\x1f\x8b":
        inflater = zlib.decompressobj(16 + zlib.MAX_WBITS)
        try:
            out = inflater.decompress(raw, NIFTI2_SIZE + 4)
        except zlib.error as exc:
            raise HeaderError(path, "bad-gzip", f"gzip stream is corrupt ({exc})",
                              "re-create or re-download the file") from exc
        return out
    return raw[: NIFTI2_SIZE + 4]


def parse_header(path: str, data: bytes) -> HeaderFacts:
    """Parse the uncompressed first bytes of a NIfTI file into :class:`HeaderFacts`."""
    version, order, hdr, single = _decode(path, data)
    shape = _checked_shape(path, hdr)
    code = int(hdr["datatype"])
    if code not in NIFTI_DTYPES:
        raise HeaderError(path, "bad-datatype", f"unknown NIfTI datatype code {code}",
                          "re-save the image with a standard data type")
    pixdim = np.array(hdr["pixdim"], dtype=np.float64)
    affine, source, q_aff, s_aff, warnings = _best_affine(path, hdr, pixdim)
    vox = tuple(float(np.linalg.norm(affine[:3, j])) for j in range(3))
    intent = int(hdr["intent_code"])

    def tup(a: np.ndarray | None) -> tuple[float, ...] | None:
        return None if a is None else tuple(float(x) for x in a.ravel())

    return HeaderFacts(
        nifti_version=version,
        endianness=order,
        shape=shape,
        dtype=NIFTI_DTYPES[code],
        bitpix=int(hdr["bitpix"]),
        vox_offset=int(hdr["vox_offset"]),
        scl_slope=float(hdr["scl_slope"]),
        scl_inter=float(hdr["scl_inter"]),
        intent_code=intent,
        intent_name=INTENT_NAMES.get(intent, f"code {intent}"),
        intent_p1=float(hdr["intent_p1"]),
        qform_code=int(hdr["qform_code"]),
        sform_code=int(hdr["sform_code"]),
        affine_source=source,
        affine=tup(affine),
        qform_affine=tup(q_aff),
        sform_affine=tup(s_aff),
        voxel_size=(vox[0], vox[1], vox[2]),
        xyzt_units=int(hdr["xyzt_units"]),
        descrip=_text(bytes(hdr["descrip"])),
        warnings=tuple(warnings),
        single_file=single,
    )


def _decode(path: str, data: bytes):
    """(version, byte order, header record, single-file magic) from the first bytes."""
    if len(data) == 0:
        raise HeaderError(path, "empty-file", "file is empty", "re-create the file")
    if len(data) < NIFTI1_SIZE:
        raise HeaderError(path, "truncated-header",
                          f"only {len(data)} header bytes, a NIfTI header needs at least 348",
                          "the file was cut short; re-create or re-download it")
    size_le = int.from_bytes(data[:4], "little")
    size_be = int.from_bytes(data[:4], "big")
    if NIFTI1_SIZE in (size_le, size_be):
        order = "<" if size_le == NIFTI1_SIZE else ">"
        hdr = np.frombuffer(data[:NIFTI1_SIZE], dtype=_N1[order])[0]
        magic = bytes(hdr["magic"])
        if magic not in (b"n+1\x00", b"ni1\x00", b"n+1", b"ni1"):
            raise HeaderError(path, "not-nifti",
                              "348-byte header without the NIfTI-1 magic (an ANALYZE 7.5 image?)",
                              "convert it to NIfTI, for example with nibabel")
        return 1, order, hdr, magic[:3] == b"n+1"
    if NIFTI2_SIZE in (size_le, size_be):
        if len(data) < NIFTI2_SIZE:
            raise HeaderError(path, "truncated-header",
                              f"only {len(data)} header bytes, a NIfTI-2 header needs 540",
                              "the file was cut short; re-create or re-download it")
        order = "<" if size_le == NIFTI2_SIZE else ">"
        hdr = np.frombuffer(data[:NIFTI2_SIZE], dtype=_N2[order])[0]
        magic = bytes(hdr["magic"])[:3]
        if magic not in (b"n+2", b"ni2"):
            raise HeaderError(path, "not-nifti", "540-byte header without the NIfTI-2 magic",
                              "check that the file is a NIfTI-2 image")
        return 2, order, hdr, magic == b"n+2"
    raise HeaderError(path, "not-nifti", "first 4 bytes are neither 348 nor 540 (not a NIfTI header)",
                      "check that the file is a NIfTI image")


def _checked_shape(path: str, hdr) -> tuple[int, ...]:
    dim = [int(x) for x in hdr["dim"]]
    ndim = dim[0]
    if not 1 <= ndim <= 7:
        raise HeaderError(path, "bad-dim", f"dim[0] is {ndim}, NIfTI allows 1 to 7",
                          "the header is damaged; re-create the file")
    shape = tuple(dim[1: ndim + 1])
    if any(s < 1 for s in shape):
        raise HeaderError(path, "bad-dim", f"dimensions {shape} contain a value below 1",
                          "the header is damaged; re-create the file")
    if math.prod(shape) > 1 << 48:  # far beyond any image; products must also fit the catalog's int64 columns
        raise HeaderError(path, "bad-dim", f"dimensions {shape} make {math.prod(shape):.3g} values",
                          "the header is damaged; re-create the file")
    return shape


def _best_affine(path: str, hdr, pixdim: np.ndarray):
    """The voxel-to-world affine by nifti1.h's methods: sform (3), else qform (2), else pixdim (1).

    Returns (affine, source, qform affine, sform affine, warnings).
    """
    warnings: list[str] = []
    qcode, scode = int(hdr["qform_code"]), int(hdr["sform_code"])
    q_aff = _quaternion_affine(float(hdr["quatern_b"]), float(hdr["quatern_c"]),
                               float(hdr["quatern_d"]), pixdim,
                               (float(hdr["qoffset_x"]), float(hdr["qoffset_y"]),
                                float(hdr["qoffset_z"]))) if qcode > 0 else None
    s_aff = None
    if scode > 0:
        s_aff = np.eye(4)
        s_aff[0], s_aff[1], s_aff[2] = hdr["srow_x"], hdr["srow_y"], hdr["srow_z"]
    if s_aff is not None and _is_usable(s_aff):
        return s_aff, "sform", q_aff, s_aff, warnings
    if q_aff is not None and _is_usable(q_aff):
        if s_aff is not None:
            warnings.append("sform_code is set but the sform is singular; used the qform")
        return q_aff, "qform", q_aff, s_aff, warnings
    if s_aff is None and q_aff is None:
        # nifti1.h "METHOD 1" (ANALYZE compatibility): scaling by pixdim only
        affine = np.diag([pixdim[1], pixdim[2], pixdim[3], 1.0])
        warnings.append("neither sform nor qform is set; the affine is pixdim scaling only")
        if not _is_usable(affine):
            raise HeaderError(path, "singular-affine", "no sform or qform and pixdim has zero voxel sizes",
                              "set a valid sform or qform in the header")
        return affine, "pixdim", q_aff, s_aff, warnings
    raise HeaderError(path, "singular-affine", "the voxel-to-world affine is singular or out of range (zero or "
                      "non-finite rows, or entries beyond 1e6 mm)",
                      "fix the sform/qform of the image, for example with nibabel's set_sform")


def read_header(path: str) -> HeaderFacts:
    """Read the header of one NIfTI file, touching only its first bytes.

    Parameters
    ----------
    path : str
        A ``.nii`` or ``.nii.gz`` file (NIfTI-1 or NIfTI-2, either byte order).

    Raises
    ------
    HeaderError
        With a stable ``code`` and a remedy, when the file is not a usable header.
    """
    try:
        with open(path, "rb") as fh:
            raw = fh.read(PREFIX_BYTES)
    except FileNotFoundError as exc:
        raise HeaderError(path, "missing-file", "file does not exist",
                          "check the path; an unfetched annexed file must be fetched first") from exc
    except OSError as exc:
        raise HeaderError(path, "unreadable", f"cannot read the file ({exc.strerror})",
                          "check the file's permissions") from exc
    return parse_header(path, header_prefix(path, raw))


def grid_fingerprint(shape: tuple[int, int, int], affine: np.ndarray) -> str:
    """A short id equal for images on the same voxel grid (shape + affine to 1e-4 mm)."""
    aff = np.round(np.asarray(affine, dtype=np.float64)[:3, :4], 4) + 0.0  # folds -0.0
    text = ",".join(str(int(s)) for s in shape[:3]) + "|" + ",".join(f"{x:.4f}" for x in aff.ravel())
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def orientation_code(affine: np.ndarray) -> str:
    """Axis codes such as ``"RAS"`` or ``"LAS"``: where each voxel axis points in world space.

    Examples
    --------
    >>> orientation_code(np.diag([-2.0, 2.0, 2.0, 1.0]))
    'LAS'
    """
    m = np.asarray(affine, dtype=np.float64)[:3, :3]
    norms = np.linalg.norm(m, axis=0)
    norms[norms == 0] = 1.0
    r = np.abs(m / norms)
    letters = (("L", "R"), ("P", "A"), ("I", "S"))
    out = [""] * 3
    used: set[int] = set()
    # assign the strongest voxel-axis/world-axis pairs first
    for flat in np.argsort(-r, axis=None):
        world, vox = divmod(int(flat), 3)
        if out[vox] or world in used:
            continue
        used.add(world)
        out[vox] = letters[world][1 if m[world, vox] > 0 else 0]
    return "".join(out)


# ---------------------------------------------------------------------------------------------
# Surface formats: GIFTI (one hemisphere per file) and CIFTI-2 dense scalars (grayordinates)

# GIFTI names NIfTI intents and types by their nifti1.h macro names (GIFTI 1.0 standard, section 2.3.4)
GIFTI_INTENTS: dict[str, int] = {
    "NIFTI_INTENT_NONE": 0, "NIFTI_INTENT_CORREL": 2, "NIFTI_INTENT_TTEST": 3, "NIFTI_INTENT_FTEST": 4,
    "NIFTI_INTENT_ZSCORE": 5, "NIFTI_INTENT_CHISQ": 6, "NIFTI_INTENT_BETA": 7, "NIFTI_INTENT_BINOM": 8,
    "NIFTI_INTENT_GAMMA": 9, "NIFTI_INTENT_POISSON": 10, "NIFTI_INTENT_NORMAL": 11, "NIFTI_INTENT_FTEST_NONC": 12,
    "NIFTI_INTENT_CHISQ_NONC": 13, "NIFTI_INTENT_LOGISTIC": 14, "NIFTI_INTENT_LAPLACE": 15,
    "NIFTI_INTENT_UNIFORM": 16, "NIFTI_INTENT_TTEST_NONC": 17, "NIFTI_INTENT_WEIBULL": 18, "NIFTI_INTENT_CHI": 19,
    "NIFTI_INTENT_INVGAUSS": 20, "NIFTI_INTENT_EXTVAL": 21, "NIFTI_INTENT_PVAL": 22, "NIFTI_INTENT_LOGPVAL": 23,
    "NIFTI_INTENT_LOG10PVAL": 24, "NIFTI_INTENT_ESTIMATE": 1001, "NIFTI_INTENT_LABEL": 1002,
    "NIFTI_INTENT_NEURONAME": 1003, "NIFTI_INTENT_GENMATRIX": 1004, "NIFTI_INTENT_SYMMATRIX": 1005,
    "NIFTI_INTENT_DISPVECT": 1006, "NIFTI_INTENT_VECTOR": 1007, "NIFTI_INTENT_POINTSET": 1008,
    "NIFTI_INTENT_TRIANGLE": 1009, "NIFTI_INTENT_QUATERNION": 1010, "NIFTI_INTENT_DIMLESS": 1011,
    "NIFTI_INTENT_TIME_SERIES": 2001, "NIFTI_INTENT_NODE_INDEX": 2002, "NIFTI_INTENT_RGB_VECTOR": 2003,
    "NIFTI_INTENT_RGBA_VECTOR": 2004, "NIFTI_INTENT_SHAPE": 2005,
}
GIFTI_TYPES: dict[str, str] = {
    "NIFTI_TYPE_UINT8": "uint8", "NIFTI_TYPE_INT8": "int8", "NIFTI_TYPE_INT16": "int16",
    "NIFTI_TYPE_UINT16": "uint16", "NIFTI_TYPE_INT32": "int32", "NIFTI_TYPE_UINT32": "uint32",
    "NIFTI_TYPE_INT64": "int64", "NIFTI_TYPE_UINT64": "uint64", "NIFTI_TYPE_FLOAT32": "float32",
    "NIFTI_TYPE_FLOAT64": "float64",
}
# vertices per hemisphere of the FreeSurfer fsaverage family (icosahedron orders 3 to 7) and of the
# HCP fsLR meshes by their BIDS den label (common practice; counts from memory, checked against nilearn's
# bundled fsaverage5 in the tests)
FSAVERAGE_VERTICES = {"fsaverage3": 642, "fsaverage4": 2562, "fsaverage5": 10242, "fsaverage6": 40962,
                      "fsaverage7": 163842, "fsaverage": 163842}
FSLR_VERTICES = {"32k": 32492, "59k": 59292, "164k": 163842}
CIFTI_SCALAR_INTENT = 3006  # NIFTI_INTENT_CONNECTIVITY_DENSE_SCALARS (CIFTI-2 standard, appendix A)
_GEOMETRY_LIMIT = 64 << 20  # a CIFTI header bigger than this is not a header


@dataclass(frozen=True)
class SurfaceFacts:
    """What a GIFTI or CIFTI-2 file says about its data, with no value decoded.

    ``n_vertices`` is the length of one map: the vertices of the hemisphere (GIFTI) or the
    grayordinates (CIFTI-2: cortex vertices plus subcortical voxels); ``n_volumes`` the maps in it.
    ``structure`` is GIFTI's ``AnatomicalStructurePrimary`` or the CIFTI brain structures.
    ``geometry_key`` identifies the vertex/voxel layout (with the space, it makes the grid id).
    """

    format: str  # "gifti" | "cifti"
    n_vertices: int
    n_volumes: int
    dtype: str
    intent_code: int
    intent_name: str
    structure: str | None
    geometry_key: str
    descrip: str = ""
    endianness: str | None = None
    nifti_version: int | None = None
    vox_offset: int | None = None
    bitpix: int | None = None
    scl_slope: float | None = None
    scl_inter: float | None = None
    warnings: tuple[str, ...] = field(default_factory=tuple)
    map_names: tuple[str, ...] = ()  # per map: CIFTI scalar names, or each GIFTI data array's ``Name``

    @property
    def shape(self) -> tuple[int, ...]:
        return (self.n_vertices,) if self.n_volumes == 1 else (self.n_vertices, self.n_volumes)


def surface_format(name: str) -> str | None:
    """``"gifti"``, ``"cifti"`` or None (a volume, or not a map format), from a file name."""
    low = name.lower()
    if low.endswith(".gii"):  # nilearn's writer names its surface maps plain .gii
        return "gifti"
    if low.endswith((".dscalar.nii", ".dtseries.nii")):  # a one-timepoint series is a map too
        return "cifti"
    return None


def read_surface_header(path: str) -> SurfaceFacts:
    """Header facts of a GIFTI (``.func.gii``/``.shape.gii``) or CIFTI-2 dense scalar file.

    GIFTI keeps its values inside the XML, so the whole file is parsed, but no data array is
    decoded: only the ``DataArray`` attributes and the metadata are kept.  A CIFTI-2 file is read up
    to its voxel offset only (NIfTI-2 header and the CIFTI XML extension).
    """
    kind = surface_format(path)
    try:
        if kind == "gifti":
            return _gifti_facts(path)
        if kind == "cifti":
            return _cifti_facts(path)
    except FileNotFoundError as exc:
        raise HeaderError(path, "missing-file", "file does not exist", "check the path") from exc
    except OSError as exc:
        raise HeaderError(path, "unreadable", f"cannot read the file ({exc.strerror})",
                          "check the file's permissions") from exc
    raise HeaderError(path, "not-surface", "not a GIFTI (.gii, .func.gii, .shape.gii) or CIFTI-2 dense scalar "
                      "(.dscalar.nii) file name", "name the file with one of those extensions")


def _gifti_facts(path: str) -> SurfaceFacts:
    import gzip
    import xml.etree.ElementTree as ET

    with open(path, "rb") as fh:
        magic = fh.read(2)
    opener = gzip.open if magic == b"\x1f\x8b" else open
    arrays: list[dict[str, str]] = []
    meta: dict[str, str] = {}
    array_names: dict[int, str] = {}  # data array -> its metadata's Name (a map name, as Workbench writes)
    depth = 0
    name = None
    try:
        with opener(path, "rb") as fh:
            for event, el in ET.iterparse(fh, events=("start", "end")):
                if event == "start":
                    depth += 1
                    if el.tag == "DataArray":
                        arrays.append(dict(el.attrib))
                    continue
                depth -= 1
                if el.tag == "Data":
                    el.clear()  # the encoded values: never decoded, dropped at once
                elif depth in (3, 4) and el.tag in ("Name", "Value"):
                    # GIFTI > MetaData > MD > Name|Value (the file's), one level deeper a data array's
                    if el.tag == "Name":
                        name = (el.text or "").strip()
                    elif name is not None:
                        if depth == 3:
                            meta[name] = (el.text or "").strip()
                        elif name == "Name" and arrays:
                            array_names[len(arrays) - 1] = (el.text or "").strip()
                        name = None
    except ET.ParseError as exc:
        raise HeaderError(path, "bad-gifti", f"not well-formed GIFTI XML ({exc})",
                          "re-create the file, for example with nibabel's GiftiImage") from exc
    except (EOFError, OSError, zlib.error) as exc:
        raise HeaderError(path, "bad-gifti", f"the file is cut short or its compression is corrupt ({exc})",
                          "re-create or re-download the file") from exc
    kept = [i for i, a in enumerate(arrays) if a.get("Intent") not in ("NIFTI_INTENT_POINTSET",
                                                                       "NIFTI_INTENT_TRIANGLE")]
    data = [arrays[i] for i in kept]
    if not data:
        what = "a mesh (coordinates and triangles)" if arrays else "no data array"
        raise HeaderError(path, "no-surface-data", f"the GIFTI file holds {what}, not values per vertex",
                          "index the statistic map (.func.gii or .shape.gii with one value per vertex)")
    warnings: list[str] = []
    n_vertices, n_volumes = _gifti_layout(path, data)
    types = {a.get("DataType", "") for a in data}
    if len(types) > 1:
        warnings.append(f"data arrays of several types ({', '.join(sorted(types))})")
    dtype = GIFTI_TYPES.get(data[0].get("DataType", ""))
    if dtype is None:
        raise HeaderError(path, "bad-datatype", f"GIFTI DataType {data[0].get('DataType')!r} is not a real "
                          "scalar type", "re-save the map as NIFTI_TYPE_FLOAT32")
    if any(a.get("Encoding") == "ExternalFileBinary" for a in data):
        raise HeaderError(path, "external-gifti", "the values are in an external file (ExternalFileBinary)",
                          "re-save the map with its values inside (GZipBase64Binary), for example with nibabel")
    intent = data[0].get("Intent", "NIFTI_INTENT_NONE")
    code = GIFTI_INTENTS.get(intent, -1)
    structure = meta.get("AnatomicalStructurePrimary") or None
    endian = {"LittleEndian": "<", "BigEndian": ">"}.get(data[0].get("Endian", ""), None)
    names = tuple(array_names.get(i, "") for i in kept) if len(data) == n_volumes else ("",) * n_volumes
    return SurfaceFacts("gifti", n_vertices, n_volumes, dtype, code, INTENT_NAMES.get(code, intent), structure,
                        f"gifti|{n_vertices}", meta.get("Description", "") or meta.get("Name", ""), endian,
                        warnings=tuple(warnings), map_names=names)


def _gifti_layout(path: str, data: list[dict[str, str]]) -> tuple[int, int]:
    """(vertices, maps): one array per map, or one 2-D array of vertices x maps."""
    try:
        dims = [(int(a.get("Dimensionality", "1")), int(a.get("Dim0", "0")), int(a.get("Dim1", "1")))
                for a in data]
    except ValueError as exc:
        raise HeaderError(path, "bad-dim", "a DataArray has a non-integer Dim0 or Dim1",
                          "the file is damaged; re-create it") from exc
    n = {d[1] for d in dims}
    if len(n) != 1 or min(n) < 1:
        raise HeaderError(path, "bad-dim", f"data arrays of different or zero lengths ({sorted(n)})",
                          "write one value per vertex in every array")
    if len(dims) == 1 and dims[0][0] == 2:
        return dims[0][1], max(1, dims[0][2])
    return dims[0][1], len(dims)


def _cifti_facts(path: str) -> SurfaceFacts:
    with open(path, "rb") as fh:
        head = fh.read(NIFTI2_SIZE + 4)
        facts = parse_header(path, header_prefix(path, head))
        if facts.nifti_version != 2:
            raise HeaderError(path, "not-cifti", "a .dscalar.nii file with a NIfTI-1 header (CIFTI-2 uses NIfTI-2)",
                              "re-save it as CIFTI-2, for example with nibabel's Cifti2Image")
        if facts.vox_offset > _GEOMETRY_LIMIT:
            raise HeaderError(path, "bad-cifti", f"voxel offset {facts.vox_offset} is implausibly large",
                              "the header is damaged; re-create the file")
        ext = fh.read(max(0, facts.vox_offset - NIFTI2_SIZE - 4))
    xml = _cifti_extension(path, head[NIFTI2_SIZE:NIFTI2_SIZE + 4] + ext, facts.endianness)
    from nibabel.cifti2 import cifti2_axes
    from nibabel.cifti2.parse_cifti2 import Cifti2Extension

    try:
        hdr = Cifti2Extension(code=32, content=xml).get_content()
        rows = cifti2_axes.from_index_mapping(hdr.matrix.get_index_map(0))
        cols = cifti2_axes.from_index_mapping(hdr.matrix.get_index_map(1))
    except Exception as exc:  # nibabel's XML parser raises several unrelated types
        raise HeaderError(path, "bad-cifti", f"the CIFTI-2 XML cannot be read ({type(exc).__name__}: {exc})",
                          "re-create the file, for example with nibabel's Cifti2Image") from exc
    if not isinstance(cols, cifti2_axes.BrainModelAxis):
        raise HeaderError(path, "not-dense", f"the second CIFTI axis is a {type(cols).__name__}, not brain models "
                          "(a parcellated or connectivity file)", "index dense scalar maps (.dscalar.nii)")
    warnings = [w for w in facts.warnings if "pixdim" not in w]  # CIFTI has no voxel affine in its header
    if isinstance(rows, cifti2_axes.SeriesAxis) and len(rows) > 1:
        raise HeaderError(path, "time-series", f"a dense series of {len(rows)} time points, not a statistic map",
                          "index statistic maps (a .dscalar.nii, or a series of one time point)")
    if isinstance(rows, cifti2_axes.SeriesAxis):
        pass  # grayordinate pipelines write a statistic map as a one-timepoint series
    elif facts.intent_code != CIFTI_SCALAR_INTENT:
        warnings.append(f"intent code {facts.intent_code}, not {CIFTI_SCALAR_INTENT} (dense scalars)")
    structures = [str(s[0]).replace("CIFTI_STRUCTURE_", "") for s in cols.iter_structures()]
    return SurfaceFacts("cifti", len(cols), len(rows), facts.dtype, facts.intent_code,
                        "dense scalars" if facts.intent_code == CIFTI_SCALAR_INTENT else f"code {facts.intent_code}",
                        ",".join(structures), brain_models_key(cols), facts.descrip, facts.endianness, 2,
                        facts.vox_offset, facts.bitpix, facts.scl_slope, facts.scl_inter, tuple(warnings),
                        _scalar_names(rows))


def _scalar_names(axis) -> tuple[str, ...]:
    """The map names of a CIFTI-2 scalar axis (another kind of first axis names no maps)."""
    from nibabel.cifti2 import cifti2_axes

    if isinstance(axis, cifti2_axes.ScalarAxis):
        return tuple(str(n) for n in axis.name)
    return ("",) * len(axis)


def _cifti_extension(path: str, ext: bytes, order: str) -> bytes:
    """The CIFTI-2 XML (extension code 32) from the bytes after a NIfTI-2 header (flag bytes first)."""
    if len(ext) < 4 or ext[0] == 0:
        raise HeaderError(path, "not-cifti", "a .dscalar.nii file with no header extension (no CIFTI XML)",
                          "re-save it as CIFTI-2, for example with nibabel's Cifti2Image")
    pos = 4
    little = order == "<"
    while pos + 8 <= len(ext):
        size = int.from_bytes(ext[pos:pos + 4], "little" if little else "big")
        code = int.from_bytes(ext[pos + 4:pos + 8], "little" if little else "big")
        if size < 8 or pos + size > len(ext):
            break
        if code == 32:
            return ext[pos + 8:pos + size].rstrip(b"\x00")
        pos += size
    raise HeaderError(path, "not-cifti", "no CIFTI-2 extension (code 32) before the data",
                      "re-save it as CIFTI-2, for example with nibabel's Cifti2Image")


def brain_models_key(axis) -> str:
    """A short id of a CIFTI brain-model axis: structures, vertex and voxel indices, meshes, volume grid."""
    h = hashlib.sha256()
    for name, sl, _ in axis.iter_structures():
        h.update(str(name).encode())
        h.update(np.ascontiguousarray(axis.vertex[sl], dtype=np.int64).tobytes())
        h.update(np.ascontiguousarray(axis.voxel[sl], dtype=np.int64).tobytes())
    h.update(repr(sorted((str(k), int(v)) for k, v in axis.nvertices.items())).encode())
    if axis.volume_shape is not None:
        h.update(repr(tuple(axis.volume_shape)).encode())
        h.update(np.round(np.asarray(axis.affine, dtype=np.float64), 4).tobytes())
    return "cifti|" + h.hexdigest()[:16]


def surface_grid_id(geometry_key: str, space: str | None, den: str | None, hemi: str | None) -> str:
    """The grid id of a surface map: its vertex layout on a named mesh (space, density, hemisphere)."""
    text = f"{geometry_key}|{space or ''}|{den or ''}|{hemi or ''}"
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def expected_vertices(space: str | None, den: str | None) -> int | None:
    """Vertices per hemisphere a named mesh has (None when the name is not one we know).

    A numeric ``den`` is the vertex count itself (nilearn's writer names fsaverage5 maps ``den-10242``).
    """
    if den and den.isdigit():
        return int(den)
    if space in FSAVERAGE_VERTICES and not den:
        return FSAVERAGE_VERTICES[space]
    if space and space.lower().startswith("fslr") and den in FSLR_VERTICES:
        return FSLR_VERTICES[den]
    return None
