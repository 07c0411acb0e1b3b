"""Volume formats other than single-file NIfTI, read through nibabel.

ANALYZE 7.5 and NIfTI pairs (``.hdr`` + ``.img``: SPM's older outputs), AFNI (``.HEAD`` +
``.BRIK[.gz]``: buckets of sub-bricks, each a map), FreeSurfer MGH (``.mgh``/``.mgz``) and MINC 1
and 2 (``.mnc``).  A two-file format is one map file (the header) whose content is both files: its
SHA-256 is that of the header's bytes followed by the data file's (``digest_map``), so a change to
either shows.  nibabel reads the header without the voxels; values are read through its array
proxy (with the format's own scaling).

AFNI writes what each sub-brick is into the header (facts of the trade, from memory of AFNI's
header attributes): ``BRICK_LABS`` (labels, ``~``-separated; nibabel's ``get_volume_labels``) and
``BRICK_STATAUX`` (runs of: brick index, statistic code, number of parameters, parameters), whose
codes are NIfTI's intent codes (3 t with its DOF, 4 F with two DOFs, 5 z, 2 correlation).
"""

from __future__ import annotations

import hashlib
import math
import os
import re
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import HeaderError
from ._hashing import BLOCK, FileDigest
from ._header import HeaderFacts

__all__ = ["FOREIGN_EXTENSIONS", "DATA_EXTENSIONS", "foreign_format", "data_file", "digest_map",
           "ForeignFacts", "read_foreign_header", "read_foreign_volume", "afni_brick", "afni_extension"]

# the header files of the formats read here (lower case), and the data halves of the two-file ones
FOREIGN_EXTENSIONS = (".hdr", ".head", ".mgh", ".mgz", ".mnc")
DATA_EXTENSIONS = {".hdr": (".img", ".img.gz"), ".head": (".brik", ".brik.gz")}
_FORMAT = {".hdr": "pair", ".head": "afni", ".mgh": "mgh", ".mgz": "mgh", ".mnc": "minc"}
# a header file is small; a larger one is not a header
_HEADER_LIMIT = 16 << 20


def _ext(path: str) -> str | None:
    low = path.lower()
    return next((e for e in FOREIGN_EXTENSIONS if low.endswith(e)), None)


def foreign_format(path: str) -> str | None:
    """``pair`` (ANALYZE or NIfTI pair), ``afni``, ``mgh``, ``minc``, or None, from the file name.

    >>> foreign_format("con_0001.hdr"), foreign_format("stats.s07+tlrc.HEAD"), foreign_format("x.nii.gz")
    ('pair', 'afni', None)
    """
    ext = _ext(path)
    return _FORMAT.get(ext) if ext else None


def data_file(path: str) -> str | None:
    """The data half of a two-file format's header (``.img`` beside ``.hdr``, ``.BRIK[.gz]`` beside
    ``.HEAD``), in the case the folder has it; None when there is none (or the format has one file)."""
    ext = _ext(path)
    if ext not in DATA_EXTENSIONS:
        return None
    stem = path[:-len(ext)]
    folder = os.path.dirname(path) or "."
    try:
        names = {n.lower(): n for n in os.listdir(folder) if n.lower().startswith(os.path.basename(stem).lower())}
    except OSError:
        return None
    for d in DATA_EXTENSIONS[ext]:
        hit = names.get((os.path.basename(stem) + d).lower())
        if hit is not None:
            return os.path.join(folder, hit)
    return None


def digest_map(path: str, head_bytes: int = 4096, progress=None) -> FileDigest:
    """SHA-256 of a map's content as stored: a two-file format's header bytes, then its data file's."""
    h = hashlib.sha256()
    n = 0
    head = b""
    for p in [path] + ([d] if (d := data_file(path)) else []):
        with open(p, "rb", buffering=0) as fh:
            while True:
                chunk = fh.read(BLOCK)
                if not chunk:
                    break
                if not head:
                    head = chunk[:head_bytes]
                h.update(chunk)
                n += len(chunk)
                if progress is not None:
                    progress()
    return FileDigest(h.hexdigest(), n, head)


@dataclass(frozen=True)
class ForeignFacts:
    """A foreign file's header facts, the format, and per map (AFNI sub-brick) its name and statistic."""

    facts: HeaderFacts
    file_format: str
    map_names: tuple[str, ...] = ()
    # per map: (stat code as a NIfTI intent code, its parameters), AFNI's BRICK_STATAUX
    statistics: tuple[tuple[int, tuple[float, ...]], ...] = field(default_factory=tuple)
    surface_vertices: int | None = None  # an MGH surface overlay: (n_vertices, 1, 1)


def _load(path: str):
    import nibabel as nib

    try:
        if os.path.getsize(path) > _HEADER_LIMIT and foreign_format(path) in ("pair", "afni"):
            raise HeaderError(path, "bad-header", "a header file larger than 16 MB", "re-create the file")
        return nib.load(path)
    except HeaderError:
        raise
    except FileNotFoundError as exc:
        raise HeaderError(path, "missing-data-file", f"a file of the image is missing ({exc.filename or exc})",
                          "keep the header and data files of the map side by side (.hdr with .img, .HEAD with "
                          ".BRIK)") from exc
    except Exception as exc:  # nibabel's readers raise many unrelated types on damaged files
        if isinstance(exc, (KeyboardInterrupt, MemoryError)):
            raise
        raise HeaderError(path, "unreadable-format", f"nibabel cannot read it ({type(exc).__name__}: {exc})"[:300],
                          "re-create the file, or convert it to NIfTI (.nii.gz)") from exc


def _statistics(header) -> tuple[tuple[int, tuple[float, ...]], ...] | None:
    """AFNI's BRICK_STATAUX per brick: (code, params); None when the header has none."""
    info = getattr(header, "info", None)
    aux = info.get("BRICK_STATAUX") if isinstance(info, dict) else None
    if aux is None:
        return None
    n = header.get_data_shape()[3] if len(header.get_data_shape()) > 3 else 1
    return stataux(list(np.atleast_1d(np.asarray(aux, dtype=np.float64))), n)


def stataux(vals: list[float], n: int) -> tuple[tuple[int, tuple[float, ...]], ...]:
    """BRICK_STATAUX's runs (brick, code, number of params, params...) as (code, params) per brick."""
    out: list[tuple[int, tuple[float, ...]]] = [(0, ())] * n
    i = 0
    while i + 2 < len(vals):
        idx, code, npar = int(vals[i]), int(vals[i + 1]), int(vals[i + 2])
        params = tuple(float(v) for v in vals[i + 3:i + 3 + max(0, npar)])
        if 0 <= idx < n:
            out[idx] = (code, params)
        i += 3 + max(0, npar)
    return tuple(out)


def read_foreign_header(path: str) -> ForeignFacts:
    """Header facts of a foreign-format map (no voxel read)."""
    fmt = foreign_format(path)
    if fmt is None:
        raise HeaderError(path, "not-a-map-format", "not an ANALYZE/NIfTI pair, AFNI, MGH or MINC file",
                          "index NIfTI, GIFTI or CIFTI-2 maps")
    img = _load(path)
    hdr = img.header
    shape = tuple(int(s) for s in img.shape)
    kind = type(img).__name__
    file_format = {"Nifti1Pair": "nifti1-pair", "Nifti2Pair": "nifti2-pair", "AFNIImage": "afni",
                   "MGHImage": "mgh", "Minc1Image": "minc1", "Minc2Image": "minc2"}.get(kind, "analyze")
    if fmt == "pair" and data_file(path) is None:
        raise HeaderError(path, "missing-data-file", "the .img file with the voxels is not beside this header",
                          "keep con_NNNN.img beside con_NNNN.hdr")
    if fmt == "afni" and data_file(path) is None:
        raise HeaderError(path, "missing-data-file", "the .BRIK file with the voxels is not beside this header",
                          "keep the .BRIK (or .BRIK.gz) beside the .HEAD")
    if fmt == "minc" and len(shape) > 3:
        raise HeaderError(path, "too-many-dimensions", f"a {len(shape)}-D MINC image of shape {shape}: a "
                          "statistic map is 3-D", "save one 3-D map per file")
    vertices = None
    if fmt == "mgh" and len(shape) >= 3 and shape[1] == 1 and shape[2] == 1 and shape[0] > 1:
        vertices = shape[0]  # a surface overlay: one value per vertex
    raw_dtype = np.dtype(img.get_data_dtype())
    dtype = str(raw_dtype.newbyteorder("="))
    order = {"=": "<" if np.little_endian else ">", "|": "<"}.get(raw_dtype.byteorder, raw_dtype.byteorder)
    affine = np.asarray(img.affine, dtype=np.float64)
    if not np.all(np.isfinite(affine)) or abs(np.linalg.det(affine[:3, :3])) < 1e-12:
        raise HeaderError(path, "bad-affine", "the voxel-to-world matrix is singular or not finite",
                          "re-create the file with a valid orientation")
    descrip = ""
    intent = 0
    if fmt == "pair":
        try:
            descrip = hdr["descrip"].item().decode("latin-1").split("\x00")[0].strip()
        except (KeyError, ValueError, AttributeError):
            descrip = ""
        try:
            intent = int(hdr["intent_code"])
        except (KeyError, ValueError, TypeError):
            intent = 0
    names: tuple[str, ...] = ()
    stats: tuple[tuple[int, tuple[float, ...]], ...] = ()
    if fmt == "afni":
        names = tuple(str(x) for x in hdr.get_volume_labels())
        stats = _statistics(hdr) or ()
    zooms = np.sqrt((affine[:3, :3] ** 2).sum(axis=0))
    facts = HeaderFacts(
        nifti_version=None, endianness=order, shape=shape, dtype=dtype, bitpix=np.dtype(dtype).itemsize * 8,
        vox_offset=0, scl_slope=1.0, scl_inter=0.0, intent_code=intent, intent_name="",
        intent_p1=float("nan"), qform_code=0, sform_code=0, affine_source="nibabel",
        affine=tuple(float(v) for v in affine.reshape(-1)), qform_affine=None, sform_affine=None,
        voxel_size=(float(zooms[0]), float(zooms[1]), float(zooms[2])), xyzt_units=0, descrip=descrip)
    return ForeignFacts(facts, file_format, names, stats, vertices)


def read_foreign_volume(path: str, map_index: int | None = None, dtype=np.float32
                        ) -> tuple[np.ndarray, HeaderFacts]:
    """One 3-D map of a foreign-format file (sub-brick ``map_index`` of an AFNI bucket), scaled."""
    info = read_foreign_header(path)
    img = _load(path)
    shape = info.facts.shape
    n = math.prod(shape[3:]) if len(shape) > 3 else 1
    if map_index is None and n > 1:
        raise HeaderError(path, "several-volumes", f"has {n} volumes; a statistic map must be one 3-D volume",
                          "index it as a bucket of maps (AFNI), or split it")
    k = map_index or 0
    if not 0 <= k < n:
        raise HeaderError(path, "no-such-map", f"has {n} volume(s), not a volume {k}", "index again")
    proxy = img.dataobj
    vol = np.asarray(proxy[..., k] if len(shape) > 3 else proxy, dtype=np.float64)
    vol = vol.reshape(shape[:3]) if vol.ndim != 3 else vol
    return vol.astype(dtype, copy=False), info.facts


_ATR = re.compile(r'atr_name\s*=\s*"(?P<name>BRICK_LABS|BRICK_STATAUX)"\s*>\s*(?P<value>[^<]*)<')


def afni_extension(path: str, n_maps: int) -> tuple[tuple[str, ...], tuple] | None:
    """Sub-brick labels and statistics from the AFNI extension (code 4: an XML of AFNI's attributes) of a
    NIfTI file AFNI wrote, or None when it has none."""
    import nibabel as nib

    try:
        img: Any = nib.load(path)
        exts = [e for e in img.header.extensions if e.get_code() == 4]
    except Exception:  # noqa: BLE001  # a damaged extension is no extension
        return None
    if not exts:
        return None
    raw = exts[0].get_content()
    text = raw.decode("utf-8", "replace") if isinstance(raw, bytes) else str(raw)
    found = {m.group("name"): m.group("value").strip() for m in _ATR.finditer(text[:1 << 20])}
    names = tuple(found.get("BRICK_LABS", "").strip('"').split("~")) if "BRICK_LABS" in found else ()
    try:
        aux = [float(v) for v in found.get("BRICK_STATAUX", "").split()]
    except ValueError:
        aux = []
    return names[:n_maps] + ("",) * max(0, n_maps - len(names)), stataux(aux, n_maps) if aux else ()


_AFNI_LABEL = re.compile(r"^(?P<name>.+?)(?:_GLT)?(?:#\d+)?_(?P<word>[A-Za-z^0-9]+)$")


def afni_brick(label: str, code: int, params: tuple[float, ...]) -> dict[str, Any]:
    """What one AFNI sub-brick is: ``contrast``, the statistic's word (``Coef``, ``Tstat``, ...) and, from
    its statistic code (a NIfTI intent code), ``intent`` with ``dof`` and ``dof_numerator``.

    >>> afni_brick("faces#0_Tstat", 3, (120.0,))
    {'contrast': 'faces', 'word': 'Tstat', 'intent': 3, 'dof': 120.0}
    >>> afni_brick("faces_vs_houses_GLT_Fstat", 4, (2.0, 118.0))
    {'contrast': 'faces_vs_houses', 'word': 'Fstat', 'intent': 4, 'dof': 118.0, 'dof_numerator': 2.0}
    """
    out: dict[str, Any] = {}
    m = _AFNI_LABEL.match(label or "")
    if m:
        out["contrast"], out["word"] = m.group("name"), m.group("word")
    elif label and not label.startswith("#"):
        out["contrast"] = label
    if code:
        out["intent"] = code
        if code == 3 and params:
            out["dof"] = params[0]
        elif code == 4 and len(params) >= 2:
            out["dof"], out["dof_numerator"] = params[1], params[0]
        elif code == 6 and params:
            out["dof"] = params[0]
    return out
