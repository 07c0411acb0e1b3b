"""The kinds of target, and the one place that turns what a user names (a grid name, an image, a
JSON spec or mesh description, a CIFTI template) into a target."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import DataFileError, ParameterError
from ._grayordinates import GrayordinateTarget, grayordinate_target
from ._parcels import ParcelGrid
from ._protocol import Mask, Target, coverage_fraction, mask_from_array
from ._surface import SurfaceTarget, builtin_surface, mesh_from_description
from ._volume import TargetGrid, builtin_grid, grid_from_image, grid_from_spec

__all__ = ["KINDS", "target_of_set", "resolve_target", "resolve_mask", "image_target"]

# a set.json's "geometry" -> its kind
KINDS: dict[str, type[Target]] = {"volume": TargetGrid, "surface": SurfaceTarget,
                                  "grayordinates": GrayordinateTarget, "parcels": ParcelGrid}


def target_of_set(spec: dict[str, Any], folder: str | os.PathLike[str] | None = None) -> Target:
    """The target of a feature set from its ``set.json``."""
    kind = spec.get("geometry")
    if kind not in KINDS:
        raise DataFileError(f"a feature set's set.json names no known kind of target ({kind!r}; known: "
                            f"{sorted(KINDS)}); rebuild the set")
    return KINDS[kind].from_set(spec, folder, target_of_set)


def _cifti_template(grid: Any) -> str | None:
    if isinstance(grid, str) and grid.startswith("cifti:"):
        return grid[len("cifti:"):]
    if isinstance(grid, str) and grid.endswith((".dscalar.nii", ".dtseries.nii")):
        return grid
    return None


def resolve_target(grid: Any, mesh: Any = None) -> Target:
    """The target a user names: a :class:`Target`, a built-in name (``MNI152-2mm``, ``fsaverage5``), a
    reference image, a JSON grid spec or mesh description, or a CIFTI-2 template (``cifti:PATH``);
    ``mesh`` gives a grayordinate template's cortex mesh."""
    if mesh is not None:
        if not (isinstance(grid, GrayordinateTarget) or _cifti_template(grid)):
            raise ParameterError("mesh applies to grayordinate sets (a CIFTI template as grid); a surface set's "
                                 "mesh is its grid: pass the mesh description as grid")
        surf = mesh if isinstance(mesh, SurfaceTarget) else mesh_from_description(mesh)
        if isinstance(grid, GrayordinateTarget):
            return grayordinate_target(grid.template, surf)
        return grayordinate_target(str(_cifti_template(grid)), surf)
    if isinstance(grid, Target):
        return grid
    if isinstance(grid, str) and builtin_surface(grid):
        return builtin_surface(grid)  # type: ignore[return-value]
    if _cifti_template(grid):
        return grayordinate_target(str(_cifti_template(grid)))
    if isinstance(grid, dict):
        return grid_from_spec(grid["shape"], grid["affine"], grid.get("name", "custom"))
    if not isinstance(grid, str):
        raise ParameterError(f"grid must be a built-in name, an image path, a JSON spec path or a "
                             f"TargetGrid, got {type(grid).__name__}")
    if grid.endswith(".json"):
        want = '{"shape": [x, y, z], "affine": [[...4x4...]]}'
        try:
            doc = json.loads(Path(grid).read_text())
        except (OSError, ValueError) as exc:
            raise ParameterError(f"grid spec {grid}: cannot read ({exc}); expected JSON {want}") from exc
        if isinstance(doc, dict) and "hemispheres" in doc:  # a mesh description: a surface set on the user's mesh
            return mesh_from_description(grid)
        missing = [k for k in ("shape", "affine") if not isinstance(doc, dict) or k not in doc]
        if missing:
            raise ParameterError(f"grid spec {grid}: no {' and no '.join(missing)}; expected JSON {want}")
        try:
            return grid_from_spec(doc["shape"], doc["affine"], doc.get("name", Path(grid).stem))
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"grid spec {grid}: {exc}; expected JSON {want}") from exc
    if grid.endswith((".nii", ".nii.gz")):
        return grid_from_image(grid)
    return builtin_grid(grid)


def resolve_mask(mask: str | os.PathLike[str] | np.ndarray, target: Target) -> Mask | float:
    """A Mask, or a coverage fraction (float) when the mask comes from the maps themselves
    (``intersection``: 1.0, ``coverage:F``: F)."""
    if isinstance(mask, np.ndarray):
        return mask_from_array(target, mask, "array")
    frac = coverage_fraction(str(mask))
    return frac if frac is not None else target.named_mask(str(mask))


def image_target(img: Any) -> Target:
    """The target an image lives on: a nilearn ``SurfaceImage``'s mesh pair, or a NIfTI image's grid."""
    if hasattr(img, "mesh"):
        return SurfaceTarget("image", int(np.asarray(img.data.parts["left"]).shape[0]),
                             int(np.asarray(img.data.parts["right"]).shape[0]), "")
    return grid_from_spec(img.shape[:3], img.affine, "image")
