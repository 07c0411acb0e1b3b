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
from typing import Any, ClassVar

import numpy as np

from ..errors import DataFileError, FeatureError, GridError, ParameterError
from ._convert import convert
from ._protocol import BatchContext, BuildSettings, Mask, RowValues, SourceMap, mask_from_array
from ._surface import (
    DEFAULT_PROJECTION,
    SURFACE_TARGETS,
    MeshedTarget,
    SurfaceTarget,
    builtin_surface,
    missing_meshes,
    project_source,
    read_surface_values,
    sulcal_depth,
    surface_from_spec,
    surface_views,
    vertex_index,
)
from ._volume import grid_from_spec, mni152_template, resample, slice_views

__all__ = ["GrayordinateTarget", "grayordinate_target", "target_from_spec", "axis_keys", "match",
           "cortex_positions", "voxel_positions", "to_cifti_image", "grayordinate_views"]

_CORTEX = {"CIFTI_STRUCTURE_CORTEX_LEFT": "L", "CIFTI_STRUCTURE_CORTEX_RIGHT": "R"}
_VOXEL_BASE = 1 << 40  # voxel keys live above every structure/vertex key


@dataclass(frozen=True)
class GrayordinateTarget(MeshedTarget):
    """The brain models of a CIFTI-2 template file (read from its header; its values are unused)."""

    kind: ClassVar[str] = "grayordinates"
    unit: ClassVar[str] = "grayordinates"
    picture_caption: ClassVar[str] = ("the cortex: left lateral, left medial, right lateral, right medial; below, "
                                      "the template's voxels: axial, coronal, sagittal through their centre")
    background_name: ClassVar[str] = "sulcal depth and the MNI152 template"

    template: str
    sha256: str
    n_grayordinates: int
    grid_key: str  # header.brain_models_key of the axis
    structures: tuple[str, ...]
    mesh: SurfaceTarget | None = None  # the cortex's surfaces, to project volumes (a mesh description)

    @property
    def shape(self) -> tuple[int]:  # type: ignore[override]
        return (self.n_grayordinates,)

    @property
    def name(self) -> str:  # type: ignore[override]
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
        return {"name": self.name, "shape": [self.n_grayordinates], "affine": None,
                "grid_id": self.grid_id, "grid_key": self.grid_key, "template": self.template, "template_sha256": self.sha256,
                "structures": list(self.structures),
                "order": "the template's brain-model axis: its structures in file order",
                "mesh": self.mesh.to_json() if self.mesh else None}

    def axis(self):
        """The template's brain-model axis (nibabel), read from its header."""
        import nibabel as nib

        return nib.load(self.template).header.get_axis(1)

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> "GrayordinateTarget":
        return target_from_spec(doc)

    def default_name(self, mask: Any, method: str, stat: str, default_settings: bool) -> str:
        return f"grayordinates-{os.path.basename(self.template).split('.')[0]}-{stat}"

    def named_mask(self, mask: str) -> Mask:
        if mask in ("brain", "all"):
            return mask_from_array(self, np.ones(self.n_grayordinates, bool), "all-grayordinates")
        raise ParameterError(f"a grayordinate set's mask must be 'all' (the default), 'intersection', "
                             f"'coverage:FRACTION' or a boolean array of {self.n_grayordinates}; got {mask!r}")

    def prepare(self, settings: BuildSettings, volumes: bool) -> tuple[BuildSettings, bool | str]:
        settings, volumes_in = super().prepare(settings, volumes)
        lacking = missing_meshes(self.mesh, settings.projection or {}) if volumes and self.mesh is not None else []
        if lacking:
            raise ParameterError(f"mesh {self.mesh.name}: no {' and no '.join(lacking)} "  # type: ignore[union-attr]
                                 "surface to project volume maps onto; add it to the mesh description, or pass "
                                 "volumes=False (--no-volumes)")
        return settings, volumes_in

    def _cortex_mesh(self, ctx: BatchContext) -> SurfaceTarget | None:
        """The cortex's mesh, found once per batch (it reads the template's header)."""
        if not ctx.cortex_mesh_known:
            ctx.cortex_mesh, ctx.cortex_mesh_known = self.cortex_mesh(), True
        return ctx.cortex_mesh

    def values(self, item: SourceMap, settings: BuildSettings, ctx: BatchContext, region: Any = None,
               indices: np.ndarray | None = None) -> RowValues:
        """One row in the template's brain-model order.

        CIFTI-2 maps are matched by structure and vertex (voxels by position, on the same volume);
        GIFTI hemispheres fill the cortex; volume maps fill the voxels (sampled at the template's voxel
        centres) and, where the cortex's mesh is known, the vertices through ``vol_to_surf``.
        """
        import nibabel as nib

        from ._registered import pull_coordinates, registration_of, sample
        from ._sources import hemispheres, native_sphere, source_volume

        if ctx.axis is None:
            ctx.axis = self.axis()
        axis = ctx.axis
        out = np.full(self.n_grayordinates, np.nan, dtype=np.float32)
        missing: list[str] = []
        clipped = 0
        if item.geometry == "grayordinates":
            path = str(item.path)
            vals = read_surface_values(path, item.sha256, item.map_index).astype(np.float64)
            if settings.zero_as_missing:
                vals[vals == 0] = np.nan
            vals, conversion = convert(vals, item.stat, settings.stat, dof=item.dof, dof1=item.dof_numerator, sided=settings.p_sided,
                                       where=path)
            t_pos, s_pos = match(nib.load(path).header.get_axis(1), axis)  # type: ignore[attr-defined]
            out[t_pos] = vals[s_pos]
            how = "cifti"
            if t_pos.size < out.size:
                missing.append("not-in-source")
        elif item.geometry == "surface":
            halves = hemispheres(item, settings)
            conversion, clipped, missing = halves.conversion, halves.p_clipped, halves.missing
            cortex = cortex_positions(axis)
            mesh = self._cortex_mesh(ctx) or SurfaceTarget(
                "template-cortex", cortex["L"][2] if "L" in cortex else 0, cortex["R"][2] if "R" in cortex else 0,
                item.space or "")  # no mesh given: the template's cortex is taken to be on the map's own mesh
            for hemi, (pos, vertex, _) in cortex.items():
                if hemi in halves.values:
                    hv = halves.values[hemi]
                    idx, _ = vertex_index(item.space, hv.size, hemi, mesh, ctx, native_sphere(item, hemi))
                    out[pos] = (hv if idx is None else hv[idx])[vertex]
            how = "surface-cortex"
            missing.append("volume-structures")
        else:
            # a native-space map goes through its registration (refused, before reading, without one)
            reg = registration_of(item) if item.space_kind == "native" else None
            src = source_volume(item, settings, ctx, native_ok=reg is not None)
            conversion, clipped = src.conversion, src.p_clipped
            missing = [] if src.missing_from == "none" else [src.missing_from]
            vox, flat, vshape, vaff = voxel_positions(axis)
            vol = np.asarray(src.values, dtype=np.float32)
            if vox.size:
                vgrid = grid_from_spec(vshape, vaff)
                res = resample(vol, src.facts.affine_array, vgrid, settings.method) if reg is None else \
                    sample(vol, pull_coordinates(reg, vgrid, src.facts.affine_array, ctx), vgrid.shape, settings.method)
                out[vox] = res.reshape(-1)[flat]
            cortex = cortex_positions(axis)
            how = "voxels" if reg is None else "registered+voxels"
            mesh = self._cortex_mesh(ctx)
            if cortex and mesh is not None:
                proj = project_source(src, reg, mesh, settings.projection or DEFAULT_PROJECTION, ctx)
                for hemi, (pos, vertex, _) in cortex.items():
                    out[pos] = proj[mesh.part(hemi)][vertex]
                how += "+vol_to_surf"
            elif cortex:
                missing.append("no-cortex-mesh")
        return RowValues(out if indices is None else out[indices], conversion, how, "+".join(missing) or "none",
                         clipped)

    image_suffix: ClassVar[str] = ".dscalar.nii"

    def image(self, full: np.ndarray):
        return to_cifti_image(full, self)

    def caveats(self) -> list[tuple[str, str, str, str]]:
        if self.mesh is None and self.cortex_mesh() is not None:
            return [("info", "cortex-mesh-assumed",
                     "the CIFTI template's cortex has 10,242 vertices per hemisphere and no mesh was given: volume "
                     "maps were projected onto nilearn's fsaverage5 (fsLR-10k has the same count)",
                     "if the template is not on fsaverage5, rebuild the set with --mesh (a mesh description)")]
        return []

    def views(self, full: np.ndarray) -> np.ndarray:
        return grayordinate_views(self, full)

    def background(self) -> np.ndarray:
        return grayordinate_views(self, None)


def grayordinate_target(path: str, mesh: SurfaceTarget | None = None) -> GrayordinateTarget:
    """A target from a CIFTI-2 file's brain models (``.dscalar.nii``, ``.dtseries.nii``, ...).

    ``mesh`` (see :func:`mapstore.targets.mesh_from_description`) gives the cortex's surfaces,
    whose vertex counts must be the template's.
    """
    import nibabel as nib

    from ..formats import brain_models_key

    if not os.path.isfile(path):
        raise ParameterError(f"CIFTI template {path!r}: no such file")
    try:
        axis = nib.load(path).header.get_axis(1)  # type: ignore[attr-defined]
    except Exception as exc:  # nibabel raises several types for a file that is not CIFTI-2
        raise DataFileError(f"CIFTI template {path}: not a readable CIFTI-2 file ({exc})") from exc
    if not isinstance(axis, nib.cifti2.BrainModelAxis):
        raise DataFileError(f"CIFTI template {path}: its second axis is not brain models (a parcellated file?)")
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
                        "models") from exc
    img = nib.Cifti2Image(v, header=(nib.cifti2.ScalarAxis([name]), axis))
    img.nifti_header.set_intent("ConnDenseScalar")
    return img


def grayordinate_views(target, values: np.ndarray | None) -> np.ndarray:
    """A grayordinate row: the cortex on its mesh (when known) above slices through the template's voxels.

    ``values`` None draws the background: sulcal depth on the cortex, the MNI152 template around
    the voxels, each scaled to 0..1.
    """
    axis = target.axis()
    tiles = []
    mesh, cortex = target.cortex_mesh(), cortex_positions(axis)
    if cortex and mesh is not None:
        if values is None:
            sulc = sulcal_depth(mesh)
            full = -sulc if sulc is not None else np.zeros(mesh.n_vertices)  # gyri light, sulci dark
        else:
            full = np.full(mesh.n_vertices, np.nan)
            for hemi, (pos, vertex, _) in cortex.items():
                full[mesh.part(hemi)][vertex] = values[pos]
        tiles.append(surface_views(full, mesh))
    vox, flat, vshape, vaff = voxel_positions(axis)
    if vox.size:
        centre = tuple(int(round(float(np.mean(i)))) for i in np.unravel_index(flat, vshape))
        if values is None:
            vol = np.asarray(mni152_template(grid_from_spec(vshape, vaff)), dtype=np.float64)
        else:
            vol = np.full(int(np.prod(vshape)), np.nan)
            vol[flat] = values[vox]
        tiles.append(slice_views(vol.reshape(vshape), vaff, scale=1, centre=centre))  # type: ignore[arg-type]
    if values is None:  # two backgrounds of different units: each to 0..1
        tiles = [(t - lo) / (hi - lo if hi > lo else 1.0)
                 for t in tiles for lo, hi in [np.nanpercentile(t, [2, 99.5])]]
    if not tiles:
        return np.full((8, 8), np.nan)
    width = max(t.shape[1] for t in tiles)
    return np.concatenate([np.pad(t, ((0, 4), (0, width - t.shape[1])), constant_values=np.nan) for t in tiles],
                          axis=0)
