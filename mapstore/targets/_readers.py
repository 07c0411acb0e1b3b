"""A map's values as its file holds them: volumes (NIfTI, gzip read with a size limit, and the formats
nibabel reads) and per-vertex values (GIFTI, CIFTI-2 dense scalars, FreeSurfer MGH), each checked
against the hash the catalog recorded."""

from __future__ import annotations

import gzip
import hashlib
import math
from typing import Any

import numpy as np

from ..errors import GridError, HeaderError
from ..formats import (REAL_SCALAR_DTYPES, HeaderFacts, digest_map, foreign_format, header_prefix, parse_header,
                       read_foreign_volume)

__all__ = ["cifti_cortex", "gunzip", "read_surface_values", "read_volume"]


def gunzip(raw: bytes, limit: int | None = None) -> bytes:
    """Inflate a (possibly multi-member) gzip stream, with zlib-ng when it is installed; with ``limit``, at
    most that many bytes (a stream that inflates to more than its header promises is never held whole).

    zlib-ng inflates NIfTI float maps about 1.5x faster than the standard zlib here.
    """
    try:
        from zlib_ng import zlib_ng as z
    except ImportError:  # pragma: no cover - zlib-ng is a dependency
        import zlib as z  # type: ignore[no-redef]
    if limit is None:
        try:
            from zlib_ng import gzip_ng
        except ImportError:  # pragma: no cover
            return gzip.decompress(raw)
        return gzip_ng.decompress(raw)
    out = bytearray()
    data = raw
    while data and len(out) < limit:
        d = z.decompressobj(16 + z.MAX_WBITS)
        try:
            out += d.decompress(data, limit - len(out))
        except z.error as exc:  # type: ignore[misc]  # zlib's own error class: a corrupt stream is a ValueError to the caller
            raise ValueError(str(exc)) from exc
        if not d.eof:
            break  # the limit reached, or the stream cut short (the length check says which)
        data = d.unused_data
    return bytes(out)


class _Digest:
    """The SHA-256 of a file's bytes, computed in a thread beside other work when the bytes are many."""

    _THREAD_FROM = 1 << 20  # below a MiB a thread costs more than it saves

    def __init__(self, data: bytes) -> None:
        self._hash = hashlib.sha256()
        self._thread = None
        if len(data) < self._THREAD_FROM:
            self._hash.update(data)
        else:
            import threading

            self._thread = threading.Thread(target=self._hash.update, args=(data,), daemon=True)
            self._thread.start()

    def hexdigest(self) -> str:
        if self._thread is not None:
            self._thread.join()
            self._thread = None
        return self._hash.hexdigest()


def read_volume(path: str, expect_sha256: str | None = None, dtype=np.float32, map_index: int | None = None
                ) -> tuple[np.ndarray, HeaderFacts]:
    """Read a 3-D NIfTI volume as scaled float32 (or ``dtype``), optionally checking the file's SHA-256.

    The file is read once; its bytes are hashed, inflated if gzipped, and viewed
    with the header's dtype, byte order and Fortran (x-fastest) layout.  Other formats (ANALYZE and
    NIfTI pairs, AFNI, MGH, MINC) are read through nibabel; ``map_index`` picks an AFNI sub-brick.
    """
    if foreign_format(path):
        return _read_foreign(path, expect_sha256, dtype, map_index)
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except FileNotFoundError as exc:
        raise GridError(f"{path}: file is gone since it was indexed; re-run 'mapstore index'") from exc
    except OSError as exc:
        raise GridError(f"{path}: cannot read ({exc.strerror})") from exc
    # the hash runs beside the inflate (both release the GIL); a changed file is refused either way
    hashing = _Digest(raw) if expect_sha256 is not None else None
    try:
        facts = parse_header(path, header_prefix(path, raw[:4096]))
        # inflate only what the header says the map holds (plus a byte): never a bomb's whole stream
        body = gunzip(raw, facts.vox_offset + facts.data_nbytes + 1) if raw[:2] == b"\x1f\x8b" else raw
    except HeaderError as exc:
        error: GridError | None = GridError(str(exc))
    except (OSError, EOFError, ValueError) as exc:
        error = GridError(f"{path}: gzip stream is corrupt ({exc}); re-create the file")
    else:
        error = None
    if hashing is not None and hashing.hexdigest() != expect_sha256:
        raise GridError(f"{path}: content changed since it was indexed (sha256 {hashing.hexdigest()[:12]}... != "
                        f"{expect_sha256[:12]}...); re-run 'mapstore index'")
    if error is not None:
        raise error
    if facts.n_volumes != 1 and map_index is None:
        raise GridError(f"{path}: has {facts.n_volumes} volumes; a statistic map must be one 3-D volume "
                        "(split it, or keep only the map you need)")
    k = map_index or 0  # a sub-brick of an AFNI bucket written as NIfTI: volumes follow each other
    if not 0 <= k < facts.n_volumes:
        raise GridError(f"{path}: has {facts.n_volumes} volume(s), not a volume {k}; re-run 'mapstore index'")
    if facts.dtype not in REAL_SCALAR_DTYPES:
        raise GridError(f"{path}: voxel type {facts.dtype} is not a real scalar; save the map as float32")
    dt = np.dtype(facts.dtype).newbyteorder(facts.endianness)  # type: ignore[arg-type]
    count = math.prod(facts.spatial_shape)  # Python ints: a damaged header's dims must not wrap around
    start = facts.vox_offset + k * count * dt.itemsize
    need = start + count * dt.itemsize
    if len(body) < need:
        raise GridError(f"{path}: data is truncated ({len(body)} bytes, header needs {need}); re-create the file")
    arr = np.frombuffer(body, dtype=dt, count=count, offset=start)
    vol = arr.reshape(facts.spatial_shape, order="F").astype(dtype)
    slope, inter = facts.scl_slope, facts.scl_inter
    # nifti1.h: scaling applies when scl_slope is non-zero (and finite)
    if np.isfinite(slope) and slope != 0 and (slope != 1 or inter != 0):
        with np.errstate(over="ignore", invalid="ignore"):  # a wild slope gives inf, as the header says
            vol = vol * vol.dtype.type(slope) + vol.dtype.type(inter if np.isfinite(inter) else 0)
    return vol, facts


def _read_foreign(path: str, expect_sha256: str | None, dtype, map_index: int | None
                  ) -> tuple[np.ndarray, HeaderFacts]:
    try:
        if expect_sha256 is not None:
            got = digest_map(path).sha256
            if got != expect_sha256:
                raise GridError(f"{path}: content changed since it was indexed (sha256 {got[:12]}... != "
                                f"{expect_sha256[:12]}...); re-run 'mapstore index'")
        return read_foreign_volume(path, map_index, dtype)
    except FileNotFoundError as exc:
        raise GridError(f"{path}: file is gone since it was indexed; re-run 'mapstore index'") from exc
    except HeaderError as exc:
        raise GridError(str(exc)) from exc
    except OSError as exc:
        raise GridError(f"{path}: cannot read ({exc.strerror})") from exc


def read_surface_values(path: str, expect_sha256: str | None = None, map_index: int | None = None
                        ) -> np.ndarray:
    """The values of one map of a GIFTI file (vertices,) or CIFTI-2 file (grayordinates,), float32.

    ``map_index`` picks a map of a file of several (a CIFTI scalar row, a GIFTI data array or column);
    without it the file must hold one map.  The bytes read are the bytes hashed: a file changed since
    it was indexed is refused.
    """
    import nibabel as nib

    if foreign_format(path) == "mgh":  # a FreeSurfer surface overlay: (vertices, 1, 1)
        return _mgh_values(path, expect_sha256)
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise GridError(f"{path}: cannot read ({exc.strerror}); check the file") from exc
    if expect_sha256 is not None and hashlib.sha256(raw).hexdigest() != expect_sha256:
        raise GridError(f"{path}: the file changed since it was indexed; re-run 'mapstore index'")
    try:
        if path.endswith(".nii"):
            img = nib.Cifti2Image.from_bytes(raw)
            if map_index is not None:  # only that row is decoded
                return _pick_map(path, img.dataobj, map_index, "maps")
            data = np.asarray(img.get_fdata(dtype=np.float32))
            if data.shape[0] != 1:
                raise GridError(f"{path}: holds {data.shape[0]} maps; a feature row takes one")
            return data[0]
        fast = _gifti_one_array(raw) if map_index is None else None
        if fast is not None:
            return fast
        img = nib.GiftiImage.from_bytes(raw)  # type: ignore[assignment]
        arrays = [a.data for a in img.darrays if a.intent not in (1008, 1009)]  # type: ignore[attr-defined]
    except GridError:
        raise
    except Exception as exc:  # nibabel's XML and base64 decoders raise several types
        raise GridError(f"{path}: the values cannot be decoded ({type(exc).__name__}: {exc}); re-create "
                        "the file") from exc
    if map_index is not None:
        if len(arrays) == 1 and np.asarray(arrays[0]).ndim == 2:  # one array of vertices x maps
            return _pick_map(path, np.asarray(arrays[0]).T, map_index, "columns")
        return _pick_map(path, np.asarray(arrays), map_index, "data arrays")
    if len(arrays) != 1 or np.asarray(arrays[0]).ndim != 1:
        raise GridError(f"{path}: holds {len(arrays)} data arrays; a feature row takes a file with one map")
    return np.asarray(arrays[0], dtype=np.float32)


def _mgh_values(path: str, expect_sha256: str | None) -> np.ndarray:
    import nibabel as nib

    try:
        if expect_sha256 is not None and digest_map(path).sha256 != expect_sha256:
            raise GridError(f"{path}: the file changed since it was indexed; re-run 'mapstore index'")
        img: Any = nib.load(path)
        return np.asarray(img.dataobj, dtype=np.float32).reshape(-1)
    except GridError:
        raise
    except Exception as exc:  # nibabel's MGH reader raises several types on a damaged file
        raise GridError(f"{path}: the values cannot be read ({type(exc).__name__}: {exc})") from exc


def _pick_map(path: str, maps: Any, index: int, what: str) -> np.ndarray:
    """Map ``index`` of an array of maps x values, float32."""
    if not 0 <= index < maps.shape[0]:
        raise GridError(f"{path}: holds {maps.shape[0]} {what}, not map {index}; re-run 'mapstore index'")
    return np.asarray(maps[index], dtype=np.float32)


_GIFTI_TYPES = {"NIFTI_TYPE_FLOAT32": "f4", "NIFTI_TYPE_FLOAT64": "f8", "NIFTI_TYPE_INT32": "i4",
                "NIFTI_TYPE_INT16": "i2", "NIFTI_TYPE_UINT8": "u1", "NIFTI_TYPE_INT8": "i1"}


def _gifti_one_array(raw: bytes) -> np.ndarray | None:
    """The values of a GIFTI file with one 1-D base64 data array, decoded without an XML parse.

    GIFTI 1.0 (section 2.3.4): ``Base64Binary`` is the array's bytes in base64,
    ``GZipBase64Binary`` the same after zlib compression, in the ``Endian`` byte order.  Anything
    else (several arrays, ASCII, external files, 2-D arrays) returns None: nibabel reads it.
    """
    import base64
    import re
    import zlib

    if raw.count(b"<DataArray") != 1:
        return None
    tag = re.search(rb"<DataArray\b([^>]*)>", raw)
    start, stop = raw.find(b"<Data>"), raw.find(b"</Data>")
    if tag is None or start < 0 or stop < start:
        return None
    attrs = dict(re.findall(rb'(\w+)="([^"]*)"', tag.group(1)))
    enc, kind = attrs.get(b"Encoding"), _GIFTI_TYPES.get(attrs.get(b"DataType", b"").decode())
    if enc not in (b"Base64Binary", b"GZipBase64Binary") or kind is None or attrs.get(b"Dimensionality") != b"1" \
            or attrs.get(b"Intent") in (b"NIFTI_INTENT_POINTSET", b"NIFTI_INTENT_TRIANGLE"):
        return None
    try:
        data = base64.b64decode(raw[start + 6:stop])
        if enc == b"GZipBase64Binary":
            data = zlib.decompress(data)
        order = ">" if attrs.get(b"Endian") == b"BigEndian" else "<"
        values = np.frombuffer(data, dtype=order + kind)
    except (ValueError, zlib.error):
        return None  # let nibabel say what is wrong
    if values.size != int(attrs.get(b"Dim0", b"-1")):
        return None
    return values.astype(np.float32)


def cifti_cortex(path: str, values: np.ndarray) -> dict[str, np.ndarray]:
    """The cortex of a CIFTI-2 map as full hemispheres ({'L': (n,), 'R': (n,)}, NaN where not modelled)."""
    import nibabel as nib

    img = nib.load(path)
    axis = img.header.get_axis(1)  # type: ignore[attr-defined]
    out = {}
    for name, sl, bm in axis.iter_structures():
        hemi = {"CIFTI_STRUCTURE_CORTEX_LEFT": "L", "CIFTI_STRUCTURE_CORTEX_RIGHT": "R"}.get(str(name))
        if hemi is None:
            continue
        full = np.full(int(axis.nvertices[str(name)]), np.nan, dtype=np.float32)
        full[bm.vertex] = values[sl]
        out[hemi] = full
    if not out:
        raise GridError(f"{path}: no cortex in its brain models (CORTEX_LEFT/RIGHT); a surface set takes "
                        "the cortex")
    return out
