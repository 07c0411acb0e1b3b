"""What maps are resampled onto: the target protocol (:class:`Target`) and its kinds (volume grid,
surface mesh, grayordinates, parcels), each with its masks, resampling paths, images and pictures.

A new kind of target is one module here with a subclass of :class:`Target`, added to ``KINDS``.
"""

from __future__ import annotations

from ._convert import convert, p_to_z, t_to_z
from ._grayordinates import GrayordinateTarget, grayordinate_target
from ._kinds import KINDS, image_target, resolve_mask, resolve_target, target_of_set
from ._parcels import REDUCERS, Atlas, ParcelGrid, load_atlas, paint, reduce_rows
from ._protocol import (
    BatchContext,
    BuildSettings,
    Mask,
    Panel,
    RowValues,
    SourceMap,
    Target,
    coverage_fraction,
    mask_from_array,
)
from ._sources import attach_registrations, zero_background
from ._surface import (
    DEFAULT_PROJECTION,
    MeshedTarget,
    SurfaceTarget,
    builtin_surface,
    cortex_mask,
    describe_freesurfer,
    mesh_from_description,
    read_surface_values,
    space_family,
    sulcal_depth,
    vertex_index,
    write_mesh_description,
)
from ._volume import (
    BUILTIN_GRIDS,
    METHODS,
    TargetGrid,
    builtin_grid,
    grid_from_image,
    grid_from_spec,
    mask_from_image,
    mni152_brain_mask,
    read_volume,
    resample,
)

__all__ = [
    "Atlas",
    "attach_registrations",
    "BatchContext",
    "BuildSettings",
    "builtin_grid",
    "BUILTIN_GRIDS",
    "builtin_surface",
    "convert",
    "cortex_mask",
    "coverage_fraction",
    "DEFAULT_PROJECTION",
    "describe_freesurfer",
    "grayordinate_target",
    "image_target",
    "GrayordinateTarget",
    "grid_from_image",
    "grid_from_spec",
    "KINDS",
    "load_atlas",
    "Mask",
    "mask_from_array",
    "mask_from_image",
    "mesh_from_description",
    "MeshedTarget",
    "METHODS",
    "mni152_brain_mask",
    "p_to_z",
    "paint",
    "Panel",
    "ParcelGrid",
    "read_surface_values",
    "read_volume",
    "reduce_rows",
    "REDUCERS",
    "resample",
    "resolve_mask",
    "resolve_target",
    "RowValues",
    "SourceMap",
    "space_family",
    "sulcal_depth",
    "SurfaceTarget",
    "t_to_z",
    "Target",
    "target_of_set",
    "TargetGrid",
    "vertex_index",
    "write_mesh_description",
    "zero_background",
]
