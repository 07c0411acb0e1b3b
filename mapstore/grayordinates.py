"""Grayordinate targets: the brain models of a CIFTI-2 template, and maps sampled into them.

A grayordinate set's row follows the template's brain-model axis (cortex vertices, then the
subcortical voxels, in the template's order).  CIFTI-2 maps are matched to it by structure and
vertex, or by voxel; GIFTI hemispheres fill the cortex; volume maps fill the voxels (sampled at
the template's voxel centres) and, where the cortex meshes are known (fsaverage5 bundled with
nilearn, or meshes the user gives), the cortex through ``vol_to_surf``.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import FeatureError, GridError, ParameterError
from .surface import SURFACE_TARGETS, SurfaceTarget, builtin_surface, surface_from_spec

__all__ = ["GrayordinateTarget", "grayordinate_target", "axis_keys", "to_cifti_image"]

_CORTEX = {"CIFTI_STRUCTURE_CORTEX_LEFT": "L", "CIFTI_STRUCTURE_CORTEX_RIGHT": "R"}
_VOXEL_BASE = 1 << 40  # voxel keys live above every structure/vertex key


@dataclass(frozen=True)
class GrayordinateTarget:
    """The brain models of a CIFTI-2 template file (read from its header; its values are unused)."""

    template: str
    sha256: str
    n_grayordinates: int
    grid_key: str  # header.brain_models_key of the axis
    structures: tuple[str, ...]
    mesh: SurfaceTarget | None = None  # the cortex's surfaces, to project volumes (a mesh description)

    @property
    def n_voxels(self) -> int:
        return self.n_grayordinates

    @property
    def n_vertices(self) -> int:
        return self.n_grayordinates

    @property
    def shape(self) -> tuple[int]:
        return (self.n_grayordinates,)

    @property
    def name(self) -> str:
        return "cifti:" + os.path.basename(self.template)

    @property
    def grid_id(self) -> str:
        text = f"grayordinates|{self.grid_key}" + (f"|mesh:{self.mesh.grid_id}" if self.mesh else "")
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def cortex_mesh(self) -> SurfaceTarget | None:
        """The surfaces volumes are projected onto for the cortex: the given mesh, or nilearn's
        fsaverage5 when the template's cortex has its vertex count (None: neither)."""
        if self.mesh is not None:
            return self.mesh
        counts = self.cortex_vertices
        if counts and all(n == SURFACE_TARGETS["fsaverage5"] for n in counts.values()):
            return builtin_surface("fsaverage5")
        return None

    @property
    def cortex_vertices(self) -> dict[str, int]:
        return {h: n for h, (_, _, n) in cortex_positions(self.axis()).items()}

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "kind": "grayordinates", "shape": [self.n_grayordinates], "affine": None,
                "grid_id": self.grid_id, "grid_key": self.grid_key, "template": self.template, "template_sha256": self.sha256,
                "structures": list(self.structures),
                "order": "the template's brain-model axis: its structures in file order",
                "mesh": self.mesh.to_json() if self.mesh else None}

    def axis(self):
        """The template's brain-model axis (nibabel), read from its header."""
        import nibabel as nib

        return nib.load(self.template).header.get_axis(1)


def grayordinate_target(path: str, mesh: SurfaceTarget | None = None) -> GrayordinateTarget:
    """A target from a CIFTI-2 file's brain models (``.dscalar.nii``, ``.dtseries.nii``, ...).

    ``mesh`` (see :func:`mapstore.surface.mesh_from_description`) gives the cortex's surfaces,
    whose vertex counts must be the template's.
    """
    import nibabel as nib

    from .header import brain_models_key

    if not os.path.isfile(path):
        raise ParameterError(f"CIFTI template {path!r}: no such file")
    try:
        axis = nib.load(path).header.get_axis(1)
    except Exception as exc:  # nibabel raises several types for a file that is not CIFTI-2
        raise ParameterError(f"CIFTI template {path}: not a readable CIFTI-2 file ({exc})") from None
    if not isinstance(axis, nib.cifti2.BrainModelAxis):
        raise ParameterError(f"CIFTI template {path}: its second axis is not brain models (a parcellated file?)")
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    if mesh is not None:
        have = {h: n for h, (_, _, n) in cortex_positions(axis).items()}
        want = {"L": mesh.n_left, "R": mesh.n_right}
        if not have:
            raise ParameterError(f"CIFTI template {path}: no cortex in its brain models, so a mesh has nothing to "
                                 "fill; leave the mesh out")
        bad = {h: n for h, n in have.items() if want[h] != n}
        if bad:
            raise ParameterError(f"mesh {mesh.name}: {want} vertices per hemisphere, the CIFTI template {path} has "
                                 f"{have}; give the mesh the template's cortex is on")
    return GrayordinateTarget(os.path.abspath(path), h.hexdigest(), len(axis), brain_models_key(axis),
                              tuple(str(s[0]).replace("CIFTI_STRUCTURE_", "") for s in axis.iter_structures()),
                              mesh)


def target_from_spec(doc: dict[str, Any]) -> GrayordinateTarget:
    key = doc.get("grid_key") or doc["grid_id"]
    return GrayordinateTarget(doc["template"], doc["template_sha256"], int(doc["shape"][0]),
                              key, tuple(doc.get("structures") or ()),
                              surface_from_spec(doc["mesh"]) if doc.get("mesh") else None)


def axis_keys(axis) -> np.ndarray:
    """One integer per grayordinate: structure and vertex for surface models, voxel for volume models."""
    names = list(dict.fromkeys(str(n) for n in axis.name))
    code = {n: i for i, n in enumerate(sorted(names))}
    keys = np.empty(len(axis), dtype=np.int64)
    surf = axis.surface_mask
    keys[surf] = np.array([code[str(n)] for n in axis.name[surf]], dtype=np.int64) * (1 << 32) + axis.vertex[surf]
    if (~surf).any():
        shape = axis.volume_shape
        keys[~surf] = _VOXEL_BASE + np.ravel_multi_index(tuple(axis.voxel[~surf].T), shape)
    return keys


def match(source_axis, target_axis) -> tuple[np.ndarray, np.ndarray]:
    """(target positions, source positions) of the grayordinates both axes hold.

    Voxels match only when both volumes share shape and affine (to 1e-4 mm).
    """
    same_volume = (source_axis.volume_shape == target_axis.volume_shape and
                   (source_axis.volume_shape is None or np.allclose(source_axis.affine, target_axis.affine,
                                                                    atol=1e-4)))
    sk, tk = axis_keys(source_axis), axis_keys(target_axis)
    if not same_volume:
        sk = np.where(sk >= _VOXEL_BASE, -1, sk)
    _, t_pos, s_pos = np.intersect1d(tk, sk, assume_unique=True, return_indices=True)
    return t_pos, s_pos


def cortex_positions(axis) -> dict[str, tuple[np.ndarray, np.ndarray, int]]:
    """Per hemisphere: (grayordinate positions, their vertex numbers, vertices of the mesh)."""
    out = {}
    for name, sl, bm in axis.iter_structures():
        hemi = _CORTEX.get(str(name))
        if hemi is not None:
            pos = np.arange(sl.start or 0, sl.stop if sl.stop is not None else len(axis))
            out[hemi] = (pos, np.asarray(bm.vertex), int(axis.nvertices[str(name)]))
    return out


def voxel_positions(axis) -> tuple[np.ndarray, np.ndarray, tuple[int, int, int] | None, np.ndarray | None]:
    """(grayordinate positions, flat voxel indices, volume shape, affine) of the voxel models."""
    vox = np.flatnonzero(~axis.surface_mask)
    if vox.size == 0:
        return vox, vox, None, None
    flat = np.ravel_multi_index(tuple(axis.voxel[vox].T), axis.volume_shape)
    return vox, flat, tuple(axis.volume_shape), np.asarray(axis.affine)


def to_cifti_image(values: np.ndarray, target: GrayordinateTarget, name: str = "map"):
    """A nibabel ``Cifti2Image`` (dense scalars) of a row on the template's brain models."""
    import nibabel as nib

    v = np.asarray(values, dtype=np.float32).reshape(1, -1)
    if v.shape[1] != target.n_grayordinates:
        raise FeatureError(f"vector has {v.shape[1]} values, the template has {target.n_grayordinates} "
                           "grayordinates")
    try:
        axis = target.axis()
    except OSError as exc:
        raise GridError(f"{target.template}: the CIFTI template is gone ({exc}); the image needs its brain "
                        "models") from None
    img = nib.Cifti2Image(v, header=(nib.cifti2.ScalarAxis([name]), axis))
    img.nifti_header.set_intent("ConnDenseScalar")
    return img
