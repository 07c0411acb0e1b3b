"""The target protocol: what every kind of target (volume grid, surface mesh, grayordinates,
parcels) gives the feature build, the reader, selections and ``check``.

A target is the space a feature set's rows live in before masking: ``n_positions`` positions
(voxels, vertices, grayordinates, parcels) in a fixed order.  The build asks it which catalog
maps it takes, how a batch of them becomes rows of values (its resampling paths), and its
masks; the reader asks it for images; ``check`` asks it for pictures.  Nothing outside this
package asks which kind it holds.  A new kind of target is one module with a subclass of
:class:`Target`, registered in :data:`KINDS` (``targets/__init__.py``).
"""

from __future__ import annotations

import abc
import hashlib
import json
import os
from dataclasses import dataclass, field
from typing import Any, ClassVar, NamedTuple

import numpy as np

from ..errors import GridError, ParameterError

__all__ = ["Target", "SourceMap", "BuildSettings", "BatchContext", "RowValues", "Mask", "mask_from_array",
           "coverage_fraction"]


@dataclass
class SourceMap:
    """One catalog map as a feature row's source (a hemisphere pair is one source)."""

    map_id: str
    path: str | None
    sha256: str | None
    stat: str
    dof: float | None
    key: str
    mask_path: str | None = None  # the model's own mask
    mask_sha256: str | None = None
    geometry: str = "volume"  # of the file: volume, surface (a hemisphere pair) or grayordinates
    hemi: str | None = None  # surface: the hemisphere of path
    path_r: str | None = None  # surface: the right hemisphere's file (path is then the left's)
    sha256_r: str | None = None
    mask_path_r: str | None = None
    mask_sha256_r: str | None = None
    space: str | None = None  # surface: the map's space entity (chooses the resampling path)
    native: dict[str, Any] | None = None  # fsnative maps: the subject's sphere.reg per hemisphere (MeshFile)
    native_missing: str | None = None  # fsnative maps: why there is no registration
    space_kind: str | None = None  # template, native or unstated
    registration: dict[str, Any] | None = None  # a native volume's transforms to a template, template side first
    dof_numerator: float | None = None  # an F map's contrast rank
    map_index: int | None = None  # the map's position in a file of several maps (CIFTI scalars, GIFTI arrays)

    @property
    def where(self) -> str:
        """The file a message names."""
        return self.path or self.path_r or ""

    @classmethod
    def from_row(cls, r: dict[str, Any], key: str) -> "SourceMap":
        """A catalog row (with its dataset's ``root``, and a pair's right file as ``*_r`` columns)."""
        root = r["root"]

        def at(rel: str | None) -> str | None:
            return os.path.join(root, rel) if rel else None

        it = cls(r["map_id"], at(r["relpath"]), r["sha256"], r["stat"], r["dof"], key, at(r.get("model_mask")),
                 r.get("model_mask_sha256"), r.get("geometry") or "volume", r.get("hemi"), space=r.get("space"),
                 native=r.get("native"), native_missing=r.get("native_missing"), space_kind=r.get("space_kind"),
                 registration=json.loads(r["registration"]) if r.get("registration") else None,
                 dof_numerator=r.get("dof_numerator"), map_index=r.get("map_index"))
        if it.geometry == "surface":
            if r.get("hemi") == "R":  # an unpaired right hemisphere
                it.path_r, it.sha256_r, it.mask_path_r, it.mask_sha256_r = (it.path, it.sha256, it.mask_path,
                                                                            it.mask_sha256)
                it.path = it.sha256 = it.mask_path = it.mask_sha256 = None
            else:
                it.path_r, it.sha256_r = at(r.get("relpath_r")), r.get("sha256_r")
                it.mask_path_r, it.mask_sha256_r = at(r.get("model_mask_r")), r.get("model_mask_sha256_r")
        return it

    @staticmethod
    def key_sources(r: dict[str, Any]) -> str:
        """What besides the file's hash a row's feature key depends on: a pair's other file and mask, the
        file geometry, a surface's space (it picks the resampling path), an fsnative map's registration."""
        more = f"{r.get('sha256_r') or ''}|{r.get('model_mask_sha256_r') or ''}|{r.get('geometry')}"
        if r.get("geometry") not in (None, "volume"):
            more += f"|{r.get('space') or ''}"
        if r.get("native"):
            more += "|" + "|".join(f.sha256 for f in r["native"].values())
        return more + SourceMap.registration_key(r)

    @staticmethod
    def registration_key(r: dict[str, Any]) -> str:
        """A native-space volume's registration as it enters the feature key (``""`` for other maps): a
        changed registration (or a new one) rebuilds the row, whatever the target."""
        if r.get("space_kind") != "native":
            return ""
        reg = json.loads(r["registration"]) if r.get("registration") else {}
        return "|native:" + ",".join(f"{s['sha256']}/{s.get('reference_sha256') or ''}/"
                                     f"{s.get('moving_sha256') or ''}" for s in reg.get("steps", []))


@dataclass(frozen=True)
class BuildSettings:
    """The options that make a row's values: they travel together from the build to every batch."""

    method: str = "linear"
    stat: str = "native"
    p_sided: str = "one"
    zero_as_missing: bool = False
    background: str = "auto"
    projection: dict[str, Any] | None = None  # meshed targets: how volume maps are projected


@dataclass
class BatchContext:
    """What the maps of one batch share, each kind in its own field (built once, used by every row)."""

    model_masks: dict[str, np.ndarray] = field(default_factory=dict)  # a model's mask on a map's grid
    vertex_indices: dict[tuple, tuple[np.ndarray | None, str]] = field(default_factory=dict)
    spheres: dict[tuple, np.ndarray] = field(default_factory=dict)  # a target's sphere per hemisphere
    registered: dict[tuple, np.ndarray] = field(default_factory=dict)  # registered spheres' coordinates
    pulled: dict[tuple, np.ndarray] = field(default_factory=dict)  # a registration's source voxel coordinates
    operators: dict[tuple, Any] = field(default_factory=dict)  # projection operators per grid and mesh
    meshes: dict[str, dict[str, Any]] = field(default_factory=dict)  # a mesh's surfaces, by grid id
    axis: Any = None  # a grayordinate template's brain-model axis
    cortex_mesh: Any = None  # a grayordinate template's cortex mesh, once found
    cortex_mesh_known: bool = False

    def surfaces(self, target: Any) -> dict[str, Any]:
        """A mesh's surfaces (nilearn PolyMesh by kind), read once per batch."""
        key = target.grid_id
        if key not in self.meshes:
            self.meshes[key] = target.meshes()
        return self.meshes[key]


class RowValues(NamedTuple):
    """One row as a target made it, with how."""

    values: np.ndarray  # float32, the mask's positions (or every position when no mask was given)
    conversion: str  # the statistic conversion (``none``, ``t->z``, ...)
    path: str  # the resampling path (``same``, ``separable``, ``nested-vertex:40962``, ...)
    missing_from: str  # what made values missing (``model-mask``, ``zero-background``, ``no-hemi-R``, ...)
    p_clipped: int  # p = 0 values clipped before p -> z


@dataclass(frozen=True)
class Mask:
    """A boolean mask over a target's positions, with the flat (C-order) indices of its members."""

    grid: Any  # the Target
    indices: np.ndarray  # int64, flat C-order indices into grid.shape
    name: str

    @property
    def n_voxels(self) -> int:
        return int(self.indices.size)

    @property
    def sha256(self) -> str:
        h = hashlib.sha256(self.grid.grid_id.encode())
        h.update(np.ascontiguousarray(self.indices, dtype=np.int64).tobytes())
        return h.hexdigest()

    def to_volume(self) -> np.ndarray:
        vol = np.zeros(self.grid.n_positions, dtype=bool)
        vol[self.indices] = True
        return vol.reshape(self.grid.shape)


def mask_from_array(grid: Any, volume: np.ndarray, name: str) -> Mask:
    vol = np.asarray(volume)
    if vol.shape[:len(grid.shape)] != tuple(grid.shape):
        raise GridError(f"mask {name!r} has shape {vol.shape}, the grid has {tuple(grid.shape)}")
    idx = np.flatnonzero(vol.reshape(grid.shape) > 0)
    if idx.size == 0:
        raise GridError(f"mask {name!r} is empty (no voxel above 0); give a mask with brain voxels")
    return Mask(grid, idx.astype(np.int64), name)


def coverage_fraction(mask: str) -> float | None:
    """``intersection`` -> 1.0, ``coverage:F`` -> F, anything else None (a mask the target names)."""
    if mask == "intersection":
        return 1.0
    if not mask.startswith("coverage:"):
        return None
    try:
        frac = float(mask.split(":", 1)[1])
    except ValueError:
        frac = -1.0
    if not 0 < frac <= 1:
        raise ParameterError(f"mask {mask!r}: the coverage fraction must be in (0, 1], e.g. coverage:0.9")
    return frac


@dataclass(frozen=True)
class Panel:
    """One drawn view of a row: a 2-D picture (NaN: no value), what it shows (``axial z = 12 mm``, ``left
    lateral``) and the marks at its edges (``L``/``R``, ``P``/``A`` at the sides; ``A``/``P``, ``S``/``I`` at
    the top and bottom)."""

    values: np.ndarray
    label: str
    left: str = ""
    right: str = ""
    top: str = ""
    bottom: str = ""


class Target(abc.ABC):
    """A space feature rows live in: ``n_positions`` positions in a fixed order.

    Kinds set ``kind`` (the set's ``geometry`` in ``set.json``) and ``unit`` (what a position is).
    """

    kind: ClassVar[str]
    unit: ClassVar[str]
    parcels_from: ClassVar[bool] = True  # a parcel set can be made from a set on this target
    # every kind has these, as dataclass fields or properties
    name: str
    shape: tuple[int, ...]  # the positions' shape (a volume's three axes; one axis for the others)

    # -- identity ------------------------------------------------------------------------------
    @property
    @abc.abstractmethod
    def grid_id(self) -> str:
        """A hash of the geometry: feature keys and mask hashes depend on it."""

    @property
    def n_positions(self) -> int:
        return int(np.prod(self.shape))

    @abc.abstractmethod
    def to_json(self) -> dict[str, Any]:
        """The ``grid`` entry of ``set.json`` (``from_json`` reads it back)."""

    @classmethod
    @abc.abstractmethod
    def from_json(cls, doc: dict[str, Any]) -> "Target":
        """The target a ``to_json`` document describes."""

    @classmethod
    def from_set(cls, spec: dict[str, Any], folder: Any = None, of_set: Any = None) -> "Target":
        """The target of a feature set, from its ``set.json`` (and its folder, for kinds with files there);
        ``of_set`` reads another set's target (a kind built over a source set needs it)."""
        return cls.from_json(spec["grid"])

    # -- building ------------------------------------------------------------------------------
    def default_name(self, mask: Any, method: str, stat: str, default_settings: bool) -> str:
        """A feature set's name when the user gives none."""
        mask_name = "array" if isinstance(mask, np.ndarray) else str(mask).rstrip("/").split("/")[-1]
        return f"{self.name}-{mask_name}-{method}-{stat}"

    def named_mask(self, mask: str) -> Mask:
        """A mask the target knows by name (``brain``, ``cortex``, ``all``) or a mask file."""
        raise ParameterError(f"mask must be 'all', 'intersection', 'coverage:FRACTION' or a boolean array of "
                             f"{self.n_positions}; got {mask!r}")

    def base_mask(self) -> Mask:
        """The mask a coverage mask (``intersection``, ``coverage:F``) stays within."""
        return self.named_mask("brain")

    def prepare(self, settings: BuildSettings, volumes: bool) -> tuple[BuildSettings, bool | str]:
        """The settings this target builds with, and whether it takes volume maps (a reason if not)."""
        if settings.projection is not None:
            raise ParameterError("projection applies to surface and grayordinate sets only")
        return settings, volumes

    def spec_fields(self, settings: BuildSettings) -> dict[str, Any]:
        """What ``set.json`` records beside the grid: the kind, and how volumes are projected."""
        return {"geometry": self.kind}

    def second_halves(self, alias: str) -> str | None:
        """An SQL condition over the catalog's maps (as ``alias``) true for a file served as the second
        half of another map's row (a hemisphere pair's right file); None: every file is a map of its own."""
        return None

    def leaves_out(self, geometry: str, volumes: bool | str) -> str | None:
        """Why a catalog map of this file geometry is left out of a set on this target (None: taken)."""
        if geometry != "volume":
            return f"{geometry} maps (a volume set takes volume maps only)"
        return None

    def crop(self, indices: np.ndarray) -> tuple[Any, np.ndarray]:
        """The part of the target a batch resamples onto, and the mask's indices within it."""
        return None, indices

    @abc.abstractmethod
    def values(self, item: SourceMap, settings: BuildSettings, ctx: BatchContext, region: Any = None,
               indices: np.ndarray | None = None) -> RowValues:
        """One source map's row on this target (at ``indices`` of ``region`` when given)."""

    # -- reading -------------------------------------------------------------------------------
    def full(self, values: np.ndarray, indices: np.ndarray) -> np.ndarray:
        """A mask-length vector over every position (NaN outside the mask), in ``shape``."""
        v = np.asarray(values, dtype=np.float32).reshape(-1)
        out = np.full(self.n_positions, np.nan, dtype=np.float32)
        out[indices] = v
        return out.reshape(self.shape)

    @abc.abstractmethod
    def image(self, full: np.ndarray):
        """An image of values over every position: NIfTI, nilearn ``SurfaceImage`` or CIFTI-2."""

    image_suffix: ClassVar[str] = ".nii.gz"  # the file an :meth:`image` is written to

    def write_image(self, full: np.ndarray, folder: Any, stem: str, intent: tuple[str, ...] | None = None) -> list[str]:
        """Write values over every position as image file(s) ``stem`` + suffix in ``folder``; the names
        written.  ``intent`` (a NIfTI intent name and its parameters, e.g. ``("NIFTI_INTENT_ZSCORE",)``) is set where the
        format has one."""
        img = self.image(full)
        if intent is not None and hasattr(img.header, "set_intent"):
            img.header.set_intent(intent[0], tuple(intent[1:]))
        name = f"{stem}{self.image_suffix}"
        img.to_filename(os.path.join(os.fspath(folder), name))
        return [name]

    def write_mask(self, folder: Any, flags: np.ndarray, stem: str = "mask") -> list[str]:
        """Write booleans over every position as a mask image in ``folder`` (1 inside, 0 outside)."""
        return self.write_image(np.asarray(flags, dtype=np.float32).reshape(self.shape), folder, stem)

    # -- describing positions (export columns, peak tables) -----------------------------------------
    def position_columns(self, flat: np.ndarray) -> dict[str, np.ndarray]:
        """Columns that say where each position (flat index) is, beside the index itself: a volume's i, j,
        k and millimetres, a mesh's hemisphere and vertex. The default: none."""
        return {}

    def position(self, flat: int) -> list[int]:
        """A position as the target's own coordinates (a volume's i, j, k; else the index)."""
        return [int(flat)]

    def millimetres(self, flat: np.ndarray) -> np.ndarray | None:
        """(n, 3) world coordinates in mm of positions, where the target has them (None: it has not)."""
        return None

    def local_maxima(self, full: np.ndarray) -> np.ndarray:
        """Flat indices of the positions a peak table may list: a volume's local maxima (26 neighbours);
        by default every position with a value."""
        return np.flatnonzero(np.isfinite(np.asarray(full).reshape(-1)))

    # -- rebuilding from a shared manifest ------------------------------------------------------
    @classmethod
    def rebuild_arguments(cls, grid: Any, mask: Any, settings: dict[str, Any]) -> dict[str, Any]:
        """The feature-build arguments (``grid``, ``mask``, and any the kind records differently from how
        it is asked for, e.g. a surface's ``method``) that remake a set from an export manifest's records: ``grid`` (the set's ``grid`` document), ``mask`` (its mask
        record) and ``settings`` (its ``set.json``), all untrusted.  The default refuses in one line."""
        raise ParameterError(f"a {cls.kind} set cannot be rebuilt from a manifest alone (it depends on files on "
                             "the machine that built it); build the set yourself and export again")

    def base(self) -> "Target":
        """The target rows are drawn on (a parcel set's: its source set's)."""
        return self

    def on_base(self, full: np.ndarray) -> np.ndarray:
        """Values over every position as values over the base's positions."""
        return full

    # -- data-driven parcellations (nilearn's Parcellations fits volume or surface images) ------------
    def _no_parcellation(self) -> ParameterError:
        return ParameterError(f"a {self.kind} set cannot be parcellated from the data; data-driven parcellations "
                              "take a volume or a surface set (nilearn's Parcellations fits one or the other)")

    def flags_image(self, flags: np.ndarray):
        """An image of booleans over every position (a mask image for nilearn)."""
        raise self._no_parcellation()

    def image_values(self, img) -> np.ndarray:
        """The values of an image on this target (``flags_image``'s, nilearn's), flat over every position."""
        raise self._no_parcellation()

    def samples_image(self, x: np.ndarray, mask_img):
        """Rows ``x`` (rows x in-mask positions) as one image with a sample per row, zero outside the mask."""
        raise self._no_parcellation()

    def write_labels(self, folder: Any, labels: np.ndarray, n_labels: int, mask_img) -> None:
        """Write integer labels over every position (0: none) as an atlas in ``folder``."""
        raise self._no_parcellation()

    def caveats(self) -> list[tuple[str, str, str, str]]:
        """What ``check`` should say about this target: (level, code, message, remedy) each."""
        return []

    # -- pictures --------------------------------------------------------------------------------
    picture_caption: ClassVar[str] = ""
    background_name: ClassVar[str] = ""

    @abc.abstractmethod
    def views(self, full: np.ndarray) -> np.ndarray:
        """Values over every position as a 2-D picture (NaN: no value)."""

    @abc.abstractmethod
    def background(self) -> np.ndarray:
        """The picture's background, the shape of ``views`` (any scale: pictures stretch it)."""

    def peak(self, full: np.ndarray) -> Any:
        """Where the report's pictures of ``full`` look (a volume: the voxel of largest absolute value);
        None: the kind's fixed views."""
        return None

    def panels(self, full: np.ndarray, focus: Any = None) -> list[Panel]:
        """``full`` drawn as labelled panels through ``focus`` (see :meth:`peak`): by default one panel,
        the kind's ``views``."""
        return [Panel(self.views(full), self.picture_caption)]

    def panels_of(self, fulls: list[np.ndarray], focus: Any = None) -> list[list[Panel]]:
        """:meth:`panels` of several rows (a kind may share work between them)."""
        return [self.panels(full, focus) for full in fulls]

    def background_panels(self, focus: Any = None) -> list[np.ndarray]:
        """The backgrounds of :meth:`panels`, panel by panel."""
        return [self.background()]
