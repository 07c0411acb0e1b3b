"""Files of a described mesh: GIFTI or FreeSurfer surfaces and per-vertex data, read, hashed and checked.

A mesh description (:func:`mapstore.targets.mesh_from_description`) names these files; this module
reads one file at a time and says what is wrong with it, naming the file.  Formats are told apart
by their first bytes: GIFTI XML, a FreeSurfer triangle surface (``lh.pial``), FreeSurfer morph data
(``lh.sulc``), or a FreeSurfer ASCII label (``lh.cortex.label``).
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import DataFileError, GridError, ParameterError

__all__ = ["MeshFile", "DATA_KINDS", "mesh_file", "read_mesh", "read_vertex_data", "write_mesh_description"]

PARTS = (("L", "left"), ("R", "right"))
# per-vertex data a mesh description may give beside its surfaces
DATA_KINDS = ("cortex", "sulcal")


@dataclass(frozen=True)
class MeshFile:
    """One file of a described mesh: a hemisphere's surface, its per-vertex data, or a registered
    sphere of another space (``kind`` is then that space)."""

    hemi: str
    kind: str
    path: str
    sha256: str


def mesh_file(desc: str, base: str, hemi: str, kind: str, rel: Any, data: bool,
              n_vertices: int | None = None) -> tuple[MeshFile, int]:
    """Read and hash one file a description ``desc`` names (``rel``, relative to ``base``); returns it
    and its vertex count (of a label: ``n_vertices``, the hemisphere's)."""
    if not isinstance(rel, str):
        raise ParameterError(f"mesh description {desc}: {hemi}.{kind} must be a file path, got {rel!r}")
    full = os.path.normpath(os.path.join(base, rel))
    try:
        with open(full, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise ParameterError(f"mesh description {desc}: {hemi}.{kind} {full}: cannot read ({exc.strerror})") from exc
    f = MeshFile(hemi, kind, full, hashlib.sha256(raw).hexdigest())
    if data:
        return f, read_vertex_data(f, raw, n_vertices).size
    return f, len(_parse_mesh(f, raw)[0])


def read_mesh(f: MeshFile) -> tuple[np.ndarray, np.ndarray]:
    """(coordinates, triangles) of a described mesh's surface, refused if the file changed."""
    return _parse_mesh(f, _read_checked(f))


def _read_checked(f: MeshFile) -> bytes:
    try:
        with open(f.path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise GridError(f"{f.path}: the mesh file is unreadable ({exc.strerror}); the set was built on it, "
                        "restore it or rebuild the set") from exc
    if hashlib.sha256(raw).hexdigest() != f.sha256:
        raise GridError(f"{f.path}: the mesh file changed since the set was built on it; rebuild the set")
    return raw


# FreeSurfer binary files start with a 3-byte magic number (nibabel.freesurfer.io): triangle
# surfaces 0xFFFFFE, "new" curvature (morph data) files 0xFFFFFF
_FS_TRIANGLES, _FS_MORPH = b"\xff\xff\xfe", b"\xff\xff\xff"


def _is_gifti(raw: bytes) -> bool:
    return b"<GIFTI" in raw[:4096]


def _parse_mesh(f: MeshFile, raw: bytes) -> tuple[np.ndarray, np.ndarray]:
    """(coordinates, triangles) of a GIFTI surface or a FreeSurfer triangle file (``lh.pial``, ...)."""
    import nibabel as nib

    if raw[:3] == _FS_TRIANGLES:
        try:
            xyz, tri = nib.freesurfer.read_geometry(f.path)  # the bytes were just read and hashed
        except Exception as exc:  # nibabel raises several types for a cut or damaged file
            raise DataFileError(f"{f.path}: not a readable FreeSurfer surface ({type(exc).__name__}: {exc})") from exc
        coords_list, faces_list = [xyz], [tri]
    elif _is_gifti(raw):
        try:
            img = nib.GiftiImage.from_bytes(raw)
            coords_list = [a.data for a in img.get_arrays_from_intent("NIFTI_INTENT_POINTSET")]
            faces_list = [a.data for a in img.get_arrays_from_intent("NIFTI_INTENT_TRIANGLE")]
        except Exception as exc:  # nibabel's XML and base64 decoders raise several types
            raise DataFileError(f"{f.path}: not a readable GIFTI surface ({type(exc).__name__}: {exc})") from exc
    else:
        raise DataFileError(f"{f.path}: the {f.kind} surface is neither GIFTI (.surf.gii) nor a FreeSurfer surface "
                             "file (lh.pial, lh.sphere.reg, ...)")
    if len(coords_list) != 1 or len(faces_list) != 1:
        raise DataFileError(f"{f.path}: a {f.kind} surface needs one POINTSET and one TRIANGLE array (a .surf.gii "
                             f"file); it has {len(coords_list)} and {len(faces_list)}")
    xyz, tri = np.asarray(coords_list[0], dtype=np.float64), np.asarray(faces_list[0], dtype=np.int64)
    if xyz.ndim != 2 or xyz.shape[1] != 3 or tri.ndim != 2 or tri.shape[1] != 3 or \
            (tri.size and (tri.min() < 0 or tri.max() >= len(xyz))):
        raise DataFileError(f"{f.path}: the surface's arrays are not N x 3 coordinates and M x 3 vertex numbers")
    return xyz, tri


def read_vertex_data(f: MeshFile, raw: bytes | None = None, n_vertices: int | None = None) -> np.ndarray:
    """Per-vertex values: a one-array GIFTI file, FreeSurfer morph data (``lh.sulc``) or a FreeSurfer
    label (``lh.cortex.label``: 1 on its vertices, 0 elsewhere; needs the hemisphere's vertex count)."""
    import io

    import nibabel as nib

    raw = _read_checked(f) if raw is None else raw
    if raw.startswith(b"#!ascii label"):
        if n_vertices is None:
            raise DataFileError(f"{f.path}: a label names vertices; give the hemisphere's surfaces beside it")
        try:
            idx = np.loadtxt(io.BytesIO(raw), dtype=np.int64, skiprows=2, usecols=[0], ndmin=1)
        except ValueError as exc:
            raise DataFileError(f"{f.path}: not a readable FreeSurfer label ({exc})") from exc
        if idx.size and (idx.min() < 0 or idx.max() >= n_vertices):
            raise DataFileError(f"{f.path}: the label names vertex {int(idx.max())}, the mesh has {n_vertices}")
        out = np.zeros(n_vertices)
        out[idx] = 1.0
        return out
    if raw[:3] == _FS_MORPH:
        try:
            return np.asarray(nib.freesurfer.read_morph_data(f.path), dtype=np.float64).reshape(-1)
        except Exception as exc:  # nibabel raises several types for a cut or damaged file
            raise DataFileError(f"{f.path}: not a readable FreeSurfer morph file ({type(exc).__name__}: {exc})"
                                 ) from exc
    try:
        arrays = [a.data for a in nib.GiftiImage.from_bytes(raw).darrays if a.intent not in (1008, 1009)]
    except Exception as exc:  # nibabel's XML and base64 decoders raise several types
        raise DataFileError(f"{f.path}: {f.kind} data is neither GIFTI nor FreeSurfer morph data or a label "
                             f"({type(exc).__name__}: {exc})") from exc
    if len(arrays) != 1:
        raise DataFileError(f"{f.path}: {f.kind} data must be one array of values per vertex; it has {len(arrays)}")
    return np.asarray(arrays[0], dtype=np.float64).reshape(-1)


def write_mesh_description(folder: str | os.PathLike[str], meshes: dict[str, Any], *, space: str, name: str,
                           cortex: np.ndarray | None = None, sulcal: np.ndarray | None = None) -> str:
    """Write nilearn meshes (``{"pial": PolyMesh, ...}``) as GIFTI surfaces and a mesh description.

    ``cortex`` and ``sulcal`` are per-vertex arrays over both hemispheres (left, then right).
    Returns the description's path (``FOLDER/<name>.json``), usable as a feature set's grid.
    """
    import json

    import nibabel as nib
    from nibabel.gifti import GiftiDataArray, GiftiImage

    folder = os.fspath(folder)
    os.makedirs(folder, exist_ok=True)
    hemis: dict[str, dict[str, str]] = {"L": {}, "R": {}}
    n_left = None
    for kind, poly in sorted(meshes.items()):
        for hemi, part in PARTS:
            mesh = poly.parts[part]
            n_left = len(mesh.coordinates) if hemi == "L" else n_left
            img = GiftiImage(darrays=[
                GiftiDataArray(np.asarray(mesh.coordinates, np.float32), intent="NIFTI_INTENT_POINTSET",
                               datatype="NIFTI_TYPE_FLOAT32"),
                GiftiDataArray(np.asarray(mesh.faces, np.int32), intent="NIFTI_INTENT_TRIANGLE",
                               datatype="NIFTI_TYPE_INT32")])
            fname = f"{name}_hemi-{hemi}_{kind}.surf.gii"
            nib.save(img, os.path.join(folder, fname))
            hemis[hemi][kind] = fname
    for kind, values in (("cortex", cortex), ("sulcal", sulcal)):
        if values is None:
            continue
        v = np.asarray(values, dtype=np.float32).reshape(-1)
        for hemi, part in PARTS:
            half = v[:n_left] if hemi == "L" else v[n_left:]
            fname = f"{name}_hemi-{hemi}_{kind}.shape.gii"
            nib.save(GiftiImage(darrays=[GiftiDataArray(half, intent="NIFTI_INTENT_SHAPE",
                                                        datatype="NIFTI_TYPE_FLOAT32")]), os.path.join(folder, fname))
            hemis[hemi][kind] = fname
    path = os.path.join(folder, f"{name}.json")
    with open(path, "w", encoding="utf-8") as fh:
        json.dump({"name": name, "space": space, "hemispheres": hemis}, fh, indent=1)
    return path
