"""Surface targets: the fsaverage mesh nilearn ships or a mesh the user describes, and the
values of surface maps on it.

A surface feature set's row joins both hemispheres: the left hemisphere's vertices
``0 .. n_left - 1`` first, then the right's (nilearn's ``SurfaceImage`` part order).  This
module gives the meshes and the cortex mask of a target, resamples between meshes (fsaverage
densities, or another space through a sphere registered to the target's), reads GIFTI and
CIFTI-2 values, and projects volumes onto the mesh with nilearn's ``vol_to_surf``.

A user mesh is a JSON *mesh description* (paths relative to it)::

    {"name": "fsLR-32k", "space": "fsLR",
     "hemispheres": {"L": {"sphere": "L.sphere.surf.gii", "pial": "L.pial.surf.gii",
                           "white_matter": "L.white.surf.gii", "inflated": "L.inflated.surf.gii",
                           "cortex": "L.cortex.shape.gii", "sulcal": "L.sulc.shape.gii"},
                     "R": {...}},
     "registered_spheres": {"fsaverage": {"L": "fsaverage-in-fsLR.L.sphere.surf.gii", "R": ...}}}

Each hemisphere names surfaces, GIFTI or FreeSurfer (``lh.pial``; any names: ``sphere``
resamples, ``pial`` and ``white_matter`` project volumes, ``inflated`` draws) and per-vertex data
(``cortex``: non-zero on cortex, or a FreeSurfer ``.label``; ``sulcal``: a picture's background,
GIFTI or FreeSurfer morph data such as ``lh.sulc``).  ``registered_spheres`` gives, per source space,
that space's sphere deformed into this mesh's sphere coordinates: maps on it are resampled by
nearest vertex.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import warnings
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from ..errors import FeatureError, ParameterError
from ._readers import cifti_cortex, read_surface_values
from ._protocol import BatchContext, BuildSettings, Mask, Panel, RowValues, SourceMap, Target, mask_from_array
from ._registered import map_points, registration_key
from ..formats import (DATA_KINDS, MeshFile, mesh_file, read_mesh, read_vertex_data,
                       write_mesh_description)

__all__ = [
    "MeshedTarget",
    "SurfaceTarget",
    "SURFACE_TARGETS",
    "DEFAULT_PROJECTION",
    "MeshFile",
    "builtin_surface",
    "surface_from_spec",
    "mesh_from_description",
    "write_mesh_description",
    "describe_freesurfer",
    "space_family",
    "vertex_index",
    "fsaverage_meshes",
    "cortex_mask",
    "read_surface_values",
    "project_source",
    "project_volume",
    "missing_meshes",
    "check_projection",
    "cifti_cortex",
    "to_surface_image",
    "surface_views",
    "sulcal_depth",
]

# the mesh nilearn bundles (a target needs its meshes: the pial and white surfaces to project volumes,
# the sphere to resample densities, the triangles to draw)
SURFACE_TARGETS = {"fsaverage5": 10242}
# the fsaverage family nests: an order-k icosahedron's vertices are the first 10 * 4**k + 2 of every
# finer order (FreeSurfer's ico subdivision, common practice)
FSAVERAGE_ORDERS = {10 * 4 ** k + 2: k for k in range(3, 8)}
PARTS = (("L", "left"), ("R", "right"))
# nilearn's vol_to_surf between the white and pial surfaces, five depths (the values are recorded in
# the feature key: changing any of them makes new rows)
DEFAULT_PROJECTION: dict[str, Any] = {"function": "nilearn.surface.vol_to_surf", "outer": "pial",
                                      "inner": "white_matter", "kind": "depth", "interpolation": "linear",
                                      "depth": [0.0, 0.25, 0.5, 0.75, 1.0]}
# mean cortical thickness (mm) below which a vertex of the fsaverage mean subject is medial wall
MEDIAL_WALL_THICKNESS = 0.01


# what a picture is drawn on, best first
_DRAW_ON = ("inflated", "very_inflated", "midthickness", "pial", "white_matter", "sphere")


class MeshedTarget(Target):
    """What surface and grayordinate targets share: volume maps are projected onto a mesh, and a
    hemisphere pair of GIFTI files is one map."""

    def prepare(self, settings: BuildSettings, volumes: bool) -> tuple[BuildSettings, bool | str]:
        proj = check_projection(settings.projection) if volumes else {"volumes": "left out"}
        return dataclasses.replace(settings, projection=proj), volumes

    def spec_fields(self, settings: BuildSettings) -> dict[str, Any]:
        from importlib.metadata import version

        # the mesh and vol_to_surf are nilearn's
        return {"geometry": self.kind, "projection": settings.projection, "versions": {"nilearn": version("nilearn")}}

    def second_halves(self, alias: str) -> str | None:
        return f"{alias}.geometry = 'surface' AND {alias}.hemi = 'R' AND {alias}.linked_map IS NOT NULL"

    def leaves_out(self, geometry: str, volumes: bool | str) -> str | None:
        if geometry == "volume" and volumes is not True:
            return volumes if isinstance(volumes, str) else \
                "volume maps (projecting volumes onto the mesh was turned off)"
        return None

    def base_mask(self) -> Mask:
        return self.named_mask("brain")


@dataclass(frozen=True)
class SurfaceTarget(MeshedTarget):
    """A target mesh pair: ``n_left`` + ``n_right`` vertices.

    With no ``files`` it is nilearn's bundled fsaverage5; else a mesh the user described
    (:func:`mesh_from_description`), whose files' hashes are part of its grid id.
    """

    kind: ClassVar[str] = "surface"
    unit: ClassVar[str] = "vertices"
    picture_caption: ClassVar[str] = "left lateral, left medial, right lateral, right medial"
    background_name: ClassVar[str] = "sulcal depth"

    name: str
    n_left: int
    n_right: int
    space: str = "fsaverage"
    files: tuple[MeshFile, ...] = ()
    registered: tuple[MeshFile, ...] = ()

    @property
    def n_vertices(self) -> int:
        return self.n_left + self.n_right

    @property
    def shape(self) -> tuple[int]:  # type: ignore[override]
        return (self.n_vertices,)

    @property
    def builtin(self) -> bool:
        return not self.files

    @property
    def family(self) -> str | None:
        return space_family(self.space, self.n_left)

    @property
    def grid_id(self) -> str:
        text = f"surface|{self.name}|{self.n_left}|{self.n_right}"
        if self.files:  # a described mesh: its geometry is its files
            text += "|" + self.space + "|" + "|".join(f"{f.hemi}:{f.kind}:{f.sha256}"
                                                      for f in sorted(self.files + self.registered,
                                                                      key=lambda f: (f.hemi, f.kind)))
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def to_json(self) -> dict[str, Any]:
        doc: dict[str, Any] = {
            "name": self.name, "shape": [self.n_vertices], "affine": None,
            "grid_id": self.grid_id, "hemispheres": {"L": self.n_left, "R": self.n_right},
            "order": f"left hemisphere vertices 0..{self.n_left - 1}, then right hemisphere vertices"}
        if self.files:
            doc["space"] = self.space
            doc["files"] = [dataclasses.asdict(f) for f in self.files]
            doc["registered_spheres"] = [dataclasses.asdict(f) for f in self.registered]
        return doc

    def part(self, hemi: str) -> slice:
        return slice(0, self.n_left) if hemi == "L" else slice(self.n_left, self.n_vertices)

    def file(self, hemi: str, kind: str) -> MeshFile | None:
        return next((f for f in self.files if f.hemi == hemi and f.kind == kind), None)

    def kinds(self) -> list[str]:
        """The surfaces (not data) both hemispheres have."""
        if not self.files:
            return ["pial", "white_matter", "sphere", "inflated"]
        have = [{f.kind for f in self.files if f.hemi == h and f.kind not in DATA_KINDS} for h in ("L", "R")]
        return sorted(have[0] & have[1])

    def meshes(self) -> dict[str, Any]:
        """The target's surfaces as nilearn ``PolyMesh`` objects by kind (``pial``, ``sphere``, ...)."""
        if not self.files:
            return fsaverage_meshes()
        from nilearn.surface import InMemoryMesh, PolyMesh

        out = {}
        for kind in self.kinds():
            parts = {}
            for hemi, part in PARTS:
                coords, faces = read_mesh(self.file(hemi, kind))  # type: ignore[arg-type]
                parts[part] = InMemoryMesh(coords, faces)
            out[kind] = PolyMesh(**parts)
        return out

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> "SurfaceTarget":
        return surface_from_spec(doc)

    image_suffix: ClassVar[str] = ".func.gii"

    def write_image(self, full: np.ndarray, folder: Any, stem: str, intent: tuple[str, ...] | None = None) -> list[str]:
        """One GIFTI file per hemisphere (``stem_hemi-L.func.gii``), named by its cortex structure."""
        import nibabel as nib

        v = np.asarray(full, dtype=np.float32).reshape(-1)
        names = []
        for hemi, structure in (("L", "CortexLeft"), ("R", "CortexRight")):
            arr = nib.gifti.GiftiDataArray(np.ascontiguousarray(v[self.part(hemi)]),
                                           intent=intent[0] if intent else "NIFTI_INTENT_NONE",
                                           datatype="NIFTI_TYPE_FLOAT32")
            img = nib.gifti.GiftiImage(darrays=[arr], meta=nib.gifti.GiftiMetaData(
                {"AnatomicalStructurePrimary": structure}))
            name = f"{stem}_hemi-{hemi}{self.image_suffix}"
            nib.save(img, os.path.join(os.fspath(folder), name))
            names.append(name)
        return names

    def position_columns(self, flat: np.ndarray) -> dict[str, np.ndarray]:
        flat = np.asarray(flat, dtype=np.int64)
        right = flat >= self.n_left
        return {"hemi": np.where(right, "R", "L"), "vertex": np.where(right, flat - self.n_left, flat)}

    @classmethod
    def rebuild_arguments(cls, grid: Any, mask: Any, settings: dict[str, Any]) -> dict[str, Any]:
        name = grid.get("name") if isinstance(grid, dict) else None
        if not isinstance(name, str) or builtin_surface(name) is None or grid.get("files"):
            return super().rebuild_arguments(grid, mask, settings)
        mask_name = mask.get("name") if isinstance(mask, dict) else None
        if mask_name not in (f"{name}-cortex", f"{name}-all"):
            raise ParameterError(f"the export's feature set used mask {mask_name!r}: only the mesh's cortex or all "
                                 "of it can be rebuilt from a manifest")
        proj = settings.get("projection")
        # the recorded method (nearest-vertex) is what prepare() makes of any asked-for method
        out: dict[str, Any] = {"grid": name, "mask": mask_name.rsplit("-", 1)[1], "method": "linear"}
        if isinstance(proj, dict) and proj.get("volumes") != "left out":
            out["projection"] = proj
        else:
            out["volumes"] = False
        return out

    def default_name(self, mask: Any, method: str, stat: str, default_settings: bool) -> str:
        return f"{self.name}-{'cortex' if str(mask) == 'brain' else os.path.basename(str(mask))}-{stat}"

    def named_mask(self, mask: str) -> Mask:
        if mask in ("brain", "cortex"):
            cortex = cortex_mask(self)
            if cortex is not None:
                return mask_from_array(self, cortex, f"{self.name}-cortex")
            if mask == "cortex":
                raise ParameterError(f"mesh {self.name}: its description gives no 'cortex' files; add them (non-zero "
                                     "on cortex) or use mask='all'")
            return mask_from_array(self, np.ones(self.n_vertices, bool), f"{self.name}-all")
        if mask == "all":
            return mask_from_array(self, np.ones(self.n_vertices, bool), f"{self.name}-all")
        raise ParameterError(f"a surface set's mask must be 'cortex' (the default), 'all', 'intersection', "
                             f"'coverage:FRACTION' or a boolean array of {self.n_vertices} vertices (left, "
                             f"then right); got {mask!r}")

    def prepare(self, settings: BuildSettings, volumes: bool) -> tuple[BuildSettings, bool | str]:
        settings, volumes_in = super().prepare(dataclasses.replace(settings, method="nearest-vertex"), volumes)
        lacking = missing_meshes(self, settings.projection or {}) if volumes else []
        if lacking:
            volumes_in = (f"volume maps (the mesh {self.name} has no {' and no '.join(lacking)} surface to project "
                          "them onto: add it to the mesh description)")
            settings = dataclasses.replace(settings, projection={"volumes": "left out"})
        return settings, volumes_in

    def values(self, item: SourceMap, settings: BuildSettings, ctx: BatchContext, region: Any = None,
               indices: np.ndarray | None = None) -> RowValues:
        """Both hemispheres on this mesh (left, then right)."""
        from ._registered import registration_of
        from ._sources import hemispheres, native_sphere, source_volume

        out = np.full(self.n_vertices, np.nan, dtype=np.float32)
        if item.geometry == "volume":
            reg = registration_of(item) if item.space_kind == "native" else None  # refused before reading
            src = source_volume(item, settings, ctx, native_ok=reg is not None)
            out[:] = project_source(src, reg, self, settings.projection or DEFAULT_PROJECTION, ctx)
            return RowValues(out if indices is None else out[indices], src.conversion,
                             "registered+vol_to_surf" if reg is not None else "vol_to_surf", src.missing_from, 0)
        halves = hemispheres(item, settings)
        paths = set()
        for hemi, vals in halves.values.items():
            idx, path = vertex_index(item.space, vals.size, hemi, self, ctx, native_sphere(item, hemi))
            paths.add(path)
            out[self.part(hemi)] = vals if idx is None else vals[idx]
        return RowValues(out if indices is None else out[indices], halves.conversion,
                         "+".join(sorted(paths)) or "none", "+".join(halves.missing) or "none", halves.p_clipped)

    def image(self, full: np.ndarray):
        return to_surface_image(full, self)

    def views(self, full: np.ndarray) -> np.ndarray:
        return surface_views(full, self)

    def flags_image(self, flags: np.ndarray):
        from nilearn.surface import SurfaceImage

        meshes = self.meshes()
        mesh = meshes["pial"] if "pial" in meshes else meshes[sorted(meshes)[0]]
        f = np.asarray(flags).reshape(-1) > 0
        return SurfaceImage(mesh=mesh, data={part: f[self.part(h)] for h, part in PARTS})

    def image_values(self, img) -> np.ndarray:
        return np.concatenate([np.asarray(img.data.parts[part]).reshape(-1) for _, part in PARTS])

    def samples_image(self, x: np.ndarray, mask_img):
        from nilearn.surface import SurfaceImage

        m = self.image_values(mask_img) > 0
        data = np.zeros((m.size, len(x)), dtype=np.float32)
        data[m] = np.asarray(x, dtype=np.float32).T
        return SurfaceImage(mesh=mask_img.mesh, data={"left": data[:self.n_left], "right": data[self.n_left:]})

    def write_labels(self, folder: Any, labels: np.ndarray, n_labels: int, mask_img) -> None:
        for h, part in PARTS:
            write_label_gifti(os.path.join(folder, f"labels_hemi-{h}.label.gii"), np.asarray(labels)[self.part(h)],
                              n_labels, part)

    def background(self) -> np.ndarray:
        sulc = sulcal_depth(self)
        return -surface_views(sulc if sulc is not None else np.zeros(self.n_vertices), self)  # gyri light

    def panels(self, full: np.ndarray, focus: Any = None) -> list[Panel]:
        return self.panels_of([full], focus)[0]

    def panels_of(self, fulls: list[np.ndarray], focus: Any = None) -> list[list[Panel]]:
        layout = surface_layout(self, _PANEL_HEIGHT)  # one projection for every row
        return [[Panel(t, name) for t, name in zip(surface_tiles(full, self, layout=layout), _VIEW_NAMES)]
                for full in fulls]

    def background_panels(self, focus: Any = None) -> list[np.ndarray]:
        """Sulcal depth in two tones (gyri light, sulci darker): a quiet background, no dot noise."""
        sulc = sulcal_depth(self)
        flat = np.zeros(self.n_vertices) if sulc is None else np.where(np.nan_to_num(sulc) > 0, -1.0, 0.0)
        return surface_tiles(flat, self, height=_PANEL_HEIGHT)

    def vertex_data(self, kind: str) -> np.ndarray | None:
        """Per-vertex data of a described mesh over both hemispheres (``cortex``, ``sulcal``), or None."""
        files = [self.file(h, kind) for h in ("L", "R")]
        if not self.files or None in files:
            return None
        return np.concatenate([read_vertex_data(f, n_vertices=self.n_left if f.hemi == "L" else self.n_right)
                               for f in files])  # type: ignore[union-attr]


def builtin_surface(name: str) -> SurfaceTarget | None:
    """The built-in surface target of this name (``fsaverage5``), else None."""
    n = SURFACE_TARGETS.get(name)
    return SurfaceTarget(name, n, n) if n else None


def surface_from_spec(doc: dict[str, Any]) -> SurfaceTarget:
    h = doc.get("hemispheres") or {}
    return SurfaceTarget(doc["name"], int(h["L"]), int(h["R"]), doc.get("space", "fsaverage"),
                         tuple(MeshFile(**f) for f in doc.get("files") or ()),
                         tuple(MeshFile(**f) for f in doc.get("registered_spheres") or ()))


def space_family(space: str | None, n_vertices: int) -> str | None:
    """The mesh family a map's ``space`` names: ``fsaverage`` for every fsaverage density (and for a
    map named only by an fsaverage vertex count, as nilearn names them), else the space itself."""
    if space and space.lower().startswith("fsaverage"):
        return "fsaverage"
    if not space and n_vertices in FSAVERAGE_ORDERS:
        return "fsaverage"
    return space or None


_DESCRIPTION = ('{"name": ..., "space": "fsLR", "hemispheres": {"L": {"sphere": "L.sphere.surf.gii", '
                '"pial": ..., "white_matter": ..., "cortex": ...}, "R": {...}}}')


def mesh_from_description(path: str | os.PathLike[str]) -> SurfaceTarget:
    """A target from a JSON mesh description (see the module docstring); every file is read and hashed.

    Raises ParameterError naming the description or the file, with what to fix.
    """
    import json

    path = os.fspath(path)
    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except (OSError, ValueError) as exc:
        raise ParameterError(f"mesh description {path}: cannot read ({exc}); expected JSON {_DESCRIPTION}") from exc
    if not isinstance(doc, dict) or not isinstance(doc.get("hemispheres"), dict) \
            or set(doc["hemispheres"]) != {"L", "R"}:
        raise ParameterError(f"mesh description {path}: 'hemispheres' must name files for L and R; expected "
                             f"{_DESCRIPTION}")
    space = doc.get("space")
    if not isinstance(space, str) or not space:
        raise ParameterError(f"mesh description {path}: no 'space' (the mesh's space, e.g. fsLR or fsaverage6: "
                             "maps of that space go onto it vertex for vertex)")
    base = os.path.dirname(os.path.abspath(path))
    files: list[MeshFile] = []
    counts: dict[str, int] = {}
    for hemi in ("L", "R"):
        entry = doc["hemispheres"][hemi]
        if not isinstance(entry, dict) or not entry:
            raise ParameterError(f"mesh description {path}: hemisphere {hemi} must map kinds to files (GIFTI or "
                                 "FreeSurfer)")
        # surfaces first: a FreeSurfer label names vertices, and needs the count they give
        for kind, rel in sorted(entry.items(), key=lambda kv: (kv[0] in DATA_KINDS, kv[0])):
            f, n = mesh_file(path, base, hemi, kind, rel, data=kind in DATA_KINDS, n_vertices=counts.get(hemi))
            if counts.setdefault(hemi, n) != n:
                first = next(g.path for g in files if g.hemi == hemi)
                raise ParameterError(f"{path}: hemisphere {hemi} mixes meshes: {f.path} has {n} vertices, {first} "
                                     f"{counts[hemi]}; a description's files are of one mesh")
            files.append(f)
    target = SurfaceTarget(str(doc.get("name") or os.path.basename(path).split(".")[0]), counts["L"], counts["R"],
                           space, tuple(files))
    if not target.kinds():
        raise ParameterError(f"mesh description {path}: no surface (sphere, pial, ...) given for both hemispheres")
    registered: list[MeshFile] = []
    for src_space, pair in sorted((doc.get("registered_spheres") or {}).items()):
        if not isinstance(pair, dict) or set(pair) != {"L", "R"}:
            raise ParameterError(f"mesh description {path}: registered_spheres[{src_space!r}] must give L and R files")
        for hemi in ("L", "R"):
            f, _ = mesh_file(path, base, hemi, src_space, pair[hemi], data=False)
            registered.append(f)
    if registered and target.file("L", "sphere") is None:
        raise ParameterError(f"mesh description {path}: registered spheres need the mesh's own 'sphere' for both "
                             "hemispheres")
    return dataclasses.replace(target, registered=tuple(registered))


# FreeSurfer subject layout (common practice): surfaces in surf/, the cortex label in label/
_FS_SURFACES = {"pial": "pial", "white_matter": "white", "sphere": "sphere", "inflated": "inflated",
                "midthickness": "midthickness"}
_FS_DATA = {"sulcal": "surf/{h}.sulc", "cortex": "label/{h}.cortex.label"}


def describe_freesurfer(subject_dir: str | os.PathLike[str], out: str | os.PathLike[str], *,
                        space: str | None = None, name: str | None = None) -> str:
    """Write a mesh description of a FreeSurfer subject folder (``$SUBJECTS_DIR/fsaverage6``, ...).

    Takes ``surf/{lh,rh}.{pial,white,sphere,inflated}`` (those present; ``white`` as
    ``white_matter``), ``surf/?h.sulc`` and ``label/?h.cortex.label``; ``space`` defaults to the
    folder's name.  The description is checked by reading it back; returns its path.
    """
    import json

    subject = os.path.abspath(os.fspath(subject_dir))
    if not os.path.isdir(os.path.join(subject, "surf")):
        raise ParameterError(f"{subject}: no surf/ folder; give a FreeSurfer subject folder (e.g. "
                             "$SUBJECTS_DIR/fsaverage6)")
    hemis: dict[str, dict[str, str]] = {}
    for hemi, fs in (("L", "lh"), ("R", "rh")):
        entry = {kind: os.path.join(subject, "surf", f"{fs}.{stem}") for kind, stem in _FS_SURFACES.items()}
        entry.update({kind: os.path.join(subject, rel.format(h=fs)) for kind, rel in _FS_DATA.items()})
        hemis[hemi] = {k: p for k, p in entry.items() if os.path.isfile(p)}
    both = set(hemis["L"]) & set(hemis["R"])
    hemis = {h: {k: p for k, p in e.items() if k in both} for h, e in hemis.items()}
    if not both - set(DATA_KINDS):
        raise ParameterError(f"{subject}/surf: no lh./rh. pial, white, sphere or inflated surface found")
    label = os.path.basename(subject.rstrip(os.sep))
    doc = {"name": name or label, "space": space or label, "hemispheres": hemis}
    out = os.fspath(out)
    tmp = os.path.join(os.path.dirname(os.path.abspath(out)), f".{os.path.basename(out)}.{os.getpid()}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(doc, fh, indent=1)
    try:
        mesh_from_description(tmp)  # every file readable, one vertex count per hemisphere
        os.replace(tmp, out)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return out


def fsaverage_meshes() -> dict[str, Any]:
    """nilearn's bundled fsaverage5 meshes (``pial``, ``white_matter``, ``sphere``; PolyMesh each)."""
    from nilearn.datasets import load_fsaverage

    return load_fsaverage("fsaverage5")


def cortex_mask(target: SurfaceTarget) -> np.ndarray | None:
    """Booleans over the target's vertices: True on cortex, False on the medial wall (None: not known).

    On the built-in fsaverage5 the medial wall is where the mean cortical thickness of nilearn's
    bundled fsaverage5 is (numerically) zero: vertices outside the cortex label of the subjects
    averaged into fsaverage.  This is the wall's core, an approximation; pass a mask of your own
    for an exact one.  A described mesh gives its ``cortex`` files (non-zero on cortex), or none.
    """
    if not target.builtin:
        data = target.vertex_data("cortex")
        return None if data is None else np.nan_to_num(data) != 0
    out = []
    for hemi, part in PARTS:
        n = target.n_left if hemi == "L" else target.n_right
        thick = _bundled_values(f"thick_{part}.gii.gz")
        if thick is None:  # not where nilearn keeps it: through its public loader (slower to import)
            from nilearn.datasets import load_fsaverage_data

            img = load_fsaverage_data(mesh="fsaverage5", mesh_type="pial", data_type="thickness")
            thick = np.asarray(img.data.parts[part]).reshape(-1)
        out.append(np.abs(thick[:n]) >= MEDIAL_WALL_THICKNESS)
    return np.concatenate(out)


def _bundled_values(name: str) -> np.ndarray | None:
    """A data file of nilearn's bundled fsaverage5, read with nibabel without importing nilearn
    (its import costs seconds per process); None when the file is not there."""
    import importlib.util

    import nibabel as nib

    spec = importlib.util.find_spec("nilearn")
    if spec is None or not spec.submodule_search_locations:
        return None
    path = os.path.join(list(spec.submodule_search_locations)[0], "datasets", "data", "fsaverage5", name)
    if not os.path.isfile(path):
        return None
    return np.asarray(nib.load(path).darrays[0].data).reshape(-1)  # type: ignore[attr-defined]


def vertex_index(space: str | None, n_source: int, hemi: str, target: SurfaceTarget,
                 ctx: BatchContext | None = None, native: MeshFile | None = None
                 ) -> tuple[np.ndarray | None, str]:
    """For each target vertex of hemisphere ``hemi``, the source vertex that gives its value.

    Returns (index or None for the same mesh, the resampling path's name).  Between fsaverage
    densities a finer source is subsampled (the target's vertices are its first ones), a coarser
    one is resampled to the nearest vertex on the target's sphere.  A source of another space
    needs that space's sphere registered to the target's (``registered_spheres`` of a mesh
    description): nearest vertex on the sphere, the usual method between spherically registered
    meshes (common practice, e.g. FreeSurfer's ``mri_surf2surf`` nearest-neighbour mapping; from
    memory).  A map on a subject's own mesh (``fsnative``) goes onto an fsaverage target through
    that subject's ``sphere.reg`` (``native``: FreeSurfer's registration of the subject's sphere to
    fsaverage's), nearest vertex by angle.  ``ctx`` keeps spheres and indices between the maps of
    a batch.
    """
    ctx = BatchContext() if ctx is None else ctx
    n_target = target.n_left if hemi == "L" else target.n_right
    fam_s, fam_t = space_family(space, n_source), target.family
    key = (target.grid_id, fam_s, n_source, hemi, native.sha256 if native else "")
    if key in ctx.vertex_indices:
        return ctx.vertex_indices[key]
    if fam_s is not None and fam_s.startswith("fsnative"):
        if fam_t != "fsaverage":
            raise FeatureError(f"a map on a subject's own mesh ({space}) goes onto fsaverage meshes only (through "
                               f"its sphere.reg); the target {target.name} is {target.space}")
        if native is None:
            raise FeatureError(f"a map on a subject's own mesh ({space}) needs that subject's FreeSurfer "
                               "registration: pass subjects_dir (--subjects-dir, the folder of the FreeSurfer "
                               "subjects, e.g. sourcedata/freesurfer)")
        src = read_mesh(native)[0]
        if len(src) != n_source:
            raise FeatureError(f"{native.path}: {len(src)} vertices, the map {n_source}; give the registration of "
                               "the subject whose mesh the map is on")
        out: tuple[np.ndarray | None, str] = (_nearest(src, _sphere(target, hemi, ctx)), "nearest-vertex:sphere.reg")
    elif n_source == n_target and fam_s in (fam_t, None):
        out = (None, "surface")
    elif fam_s == fam_t == "fsaverage":
        if n_source not in FSAVERAGE_ORDERS or n_target not in FSAVERAGE_ORDERS:
            raise FeatureError(f"a map with {n_source} vertices per hemisphere is not on an fsaverage density "
                               f"({', '.join(str(n) for n in sorted(FSAVERAGE_ORDERS))}); resample it to fsaverage "
                               "first")
        if n_source > n_target:
            out = (np.arange(n_target), f"nested-vertex:{n_source}")
        else:
            sphere = _sphere(target, hemi, ctx)
            # one sphere: plain distances (its vertices' radii differ by 1e-4, which breaks near-ties)
            out = (_nearest(sphere[:n_source], sphere, unit=False), f"nearest-vertex:{n_source}")
    else:
        reg = next((f for f in target.registered if f.hemi == hemi and f.kind == fam_s), None) if fam_s else None
        if reg is None:
            have = sorted({f.kind for f in target.registered})
            raise FeatureError(f"a map on {space or 'an unnamed mesh'} ({n_source} vertices) cannot go onto "
                               f"{target.name} (space {target.space}, {n_target} vertices): no sphere of "
                               f"{fam_s or 'its space'} registered to {target.space} "
                               f"(registered spheres: {have or 'none'}); add one to the mesh description's "
                               "'registered_spheres', or name the map's space")
        src = ctx.registered.get((reg.sha256, hemi))
        if src is None:
            src = ctx.registered[(reg.sha256, hemi)] = read_mesh(reg)[0]
        if len(src) != n_source:
            if not (fam_s == "fsaverage" and n_source in FSAVERAGE_ORDERS and len(src) in FSAVERAGE_ORDERS):
                raise FeatureError(f"{reg.path}: the registered {fam_s} sphere has {len(src)} vertices, the map "
                                   f"{n_source}; give the sphere of the map's own mesh")
            # fsaverage densities nest: a coarser map's vertices are the sphere's first ones, and the
            # sphere's vertices are a finer map's first ones (same numbers)
            src = src[:n_source]
        out = (_nearest(src, _sphere(target, hemi, ctx)), f"nearest-vertex:{fam_s}")
    ctx.vertex_indices[key] = out
    return out


def _sphere(target: SurfaceTarget, hemi: str, ctx: BatchContext) -> np.ndarray:
    key = (target.grid_id, hemi)
    if key not in ctx.spheres:
        if target.builtin:
            xyz = np.asarray(fsaverage_meshes()["sphere"].parts[dict(PARTS)[hemi]].coordinates, dtype=np.float64)
        else:
            f = target.file(hemi, "sphere")
            if f is None:
                raise FeatureError(f"resampling onto {target.name} needs its sphere: add 'sphere' files to the "
                                   "mesh description")
            xyz = read_mesh(f)[0]
        n = target.n_left if hemi == "L" else target.n_right
        if len(xyz) < n:
            raise FeatureError(f"resampling to {n} vertices needs that mesh's sphere, which mapstore does "
                               "not ship (nilearn bundles fsaverage5); describe the mesh in a JSON file")
        ctx.spheres[key] = xyz[:n]
    return ctx.spheres[key]


def _nearest(source: np.ndarray, target: np.ndarray, unit: bool = True) -> np.ndarray:
    """For each target point, the nearest source point: at the smallest angle when ``unit`` (two
    spheres of any radius, both centred at 0)."""
    from scipy.spatial import cKDTree

    def norm(a: np.ndarray) -> np.ndarray:
        return a / np.maximum(np.linalg.norm(a, axis=1, keepdims=True), 1e-12) if unit else a

    _, idx = cKDTree(norm(source)).query(norm(target))
    return idx.astype(np.int64)


def check_projection(projection: dict[str, Any] | None) -> dict[str, Any]:
    """The projection parameters with defaults filled in, validated."""
    p = dict(DEFAULT_PROJECTION)
    if projection:
        unknown = set(projection) - set(DEFAULT_PROJECTION) - {"radius", "n_samples"}
        if unknown:
            raise ParameterError(f"projection: unknown key(s) {sorted(unknown)}; allowed: "
                                 f"{sorted(set(DEFAULT_PROJECTION) | {'radius', 'n_samples'})}")
        p.update(projection)
    if p["kind"] not in ("depth", "line", "ball", "auto"):
        raise ParameterError(f"projection kind must be depth, line, ball or auto, got {p['kind']!r}")
    if p["interpolation"] not in ("linear", "nearest_most_frequent"):
        raise ParameterError(f"projection interpolation must be linear or nearest_most_frequent (vol_to_surf's), got "
                             f"{p['interpolation']!r}")
    if p["kind"] != "depth":
        p.pop("depth", None)
        p.pop("inner", None)
    return p


def project_source(src: Any, reg: dict[str, Any] | None, target: SurfaceTarget, projection: dict[str, Any],
                   ctx: BatchContext) -> np.ndarray:
    """A source volume (``_sources.SourceVolume``) onto the target mesh.  A native-space map (``reg``, its
    registration) is projected with the mesh's points taken through the registration into the map's own
    millimetres: the map is sampled once, where each template point lies in it."""
    meshes = ctx.surfaces(target)
    tag: tuple[str, ...] = ()
    if reg is not None:
        meshes = _registered_meshes(meshes, reg, [projection["outer"], projection.get("inner")], target, ctx)
        tag = registration_key(reg)
    return project_volume(np.asarray(src.values, dtype=np.float32), src.facts.affine_array, target, projection,
                          meshes, ctx, tag)


def _registered_meshes(meshes: dict[str, Any], reg: dict[str, Any], names: list[str | None], target: SurfaceTarget,
                       ctx: BatchContext) -> dict[str, Any]:
    """``meshes`` with the named surfaces' vertices mapped through the registration (cached per batch)."""
    from nilearn.surface import InMemoryMesh, PolyMesh

    out = dict(meshes)
    for name in names:
        if name is None or name not in meshes:
            continue
        key = ("mesh", registration_key(reg), target.grid_id, name)
        if key not in ctx.pulled:
            parts = {part: InMemoryMesh(map_points(reg, np.asarray(m.coordinates, dtype=np.float64)),
                                        np.asarray(m.faces))
                     for part, m in meshes[name].parts.items()}
            ctx.pulled[key] = PolyMesh(**parts)
        out[name] = ctx.pulled[key]
    return out


def project_volume(vol: np.ndarray, affine: np.ndarray, target: SurfaceTarget, projection: dict[str, Any],
                   meshes: dict[str, Any], ctx: BatchContext | None = None, tag: tuple[str, ...] = ()) -> np.ndarray:
    """A volume's values on the target mesh as ``nilearn.surface.vol_to_surf`` gives them, both hemispheres.

    Missing voxels (NaN) act as ``vol_to_surf``'s ``mask_img``: a vertex takes the mean of the
    samples inside the map's data, and is NaN where none is.  The default sampling (``kind``
    depth, linear interpolation) runs as a sparse matrix built once per grid and mesh (kept in
    ``ctx`` between the maps of a batch); other kinds call ``vol_to_surf``.
    """
    lacking = missing_meshes(target, projection, meshes)
    if lacking:
        raise FeatureError(f"projecting a volume onto {target.name} needs its {' and '.join(lacking)} surface(s); "
                           "add them to the mesh description, or leave volumes out")
    finite = np.isfinite(vol)
    filled = np.where(finite, vol, 0).astype(np.float32)
    out = np.empty(target.n_vertices, dtype=np.float32)
    fast = projection["kind"] == "depth" and projection["interpolation"] == "linear" and min(vol.shape) >= 2
    for hemi, part in PARTS:
        outer = meshes[projection["outer"]].parts[part]
        inner = meshes[projection["inner"]].parts[part] if "inner" in projection else None
        if fast and inner is not None:
            op = _depth_operator(outer, inner, projection["depth"], affine, vol.shape, hemi, target, ctx, tag)
            vals = op.apply(filled, None if finite.all() else finite)
        else:
            vals = _vol_to_surf(filled, finite, affine, outer, inner, projection)
        out[target.part(hemi)] = np.asarray(vals, dtype=np.float32)
    return out


def _vol_to_surf(filled: np.ndarray, finite: np.ndarray, affine: np.ndarray, outer, inner,
                 projection: dict[str, Any]) -> np.ndarray:
    import nibabel as nib
    from nilearn.surface import vol_to_surf

    img = nib.Nifti1Image(filled, affine)
    mask = None if finite.all() else nib.Nifti1Image(finite.astype(np.uint8), affine)
    kw = {k: v for k, v in projection.items() if k in ("kind", "interpolation", "depth", "radius", "n_samples")}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return vol_to_surf(img, outer, inner_mesh=inner, mask_img=mask, **kw)


@dataclass(frozen=True)
class _DepthOperator:
    """Trilinear sampling at fixed depths between two surfaces, as one sparse matrix.

    ``vol_to_surf`` (kind depth, linear) samples each vertex at points between its pial and white
    positions, drops samples outside the volume or in a masked voxel (the voxel holding the
    point), interpolates the rest trilinearly and averages them; interpolation at fixed points
    is linear in the voxel values, so it is a (samples x voxels) matrix.
    """

    weights: Any  # scipy.sparse.csr_matrix (n_vertices * n_points, n_voxels)
    inside: np.ndarray  # samples inside the volume
    voxel: np.ndarray  # flat index of the voxel holding each inside sample (the mask test)
    n_points: int

    def apply(self, filled: np.ndarray, finite: np.ndarray | None) -> np.ndarray:
        samples = self.weights @ filled.reshape(-1).astype(np.float64)
        keep = self.inside.copy()
        if finite is not None:
            keep[self.inside] = finite.reshape(-1)[self.voxel]
        samples[~keep] = np.nan
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # a vertex with no sample left: NaN
            return np.nanmean(samples.reshape(-1, self.n_points), axis=1)


def _depth_operator(outer, inner, depth, affine: np.ndarray, shape: tuple[int, ...], hemi: str,
                    target: SurfaceTarget, ctx: BatchContext | None, tag: tuple[str, ...] = ()) -> _DepthOperator:
    import scipy.sparse as sp

    # ``tag``: the registration the meshes went through (one operator per subject's registration)
    key = (target.grid_id, hemi, _json_key(depth), np.asarray(affine).tobytes(), tuple(shape), tag)
    if ctx is not None and key in ctx.operators:
        return ctx.operators[key]
    out_xyz, in_xyz = np.asarray(outer.coordinates, np.float64), np.asarray(inner.coordinates, np.float64)
    steps = np.asarray(depth, dtype=np.float64)[:, None, None]
    loc = np.swapaxes(out_xyz + steps * (in_xyz - out_xyz), 0, 1).reshape(-1, 3)  # vertex-major, as nilearn
    inv = np.linalg.inv(np.asarray(affine, dtype=np.float64))
    vox = loc @ inv[:3, :3].T + inv[:3, 3]
    dims = np.asarray(shape[:3])
    inside = (vox >= 0).all(axis=1) & (vox < dims).all(axis=1)
    v = vox[inside]
    voxel = np.ravel_multi_index(tuple(np.floor(v).astype(np.int64).T), tuple(dims))
    # the cell of each point (the last cell for points past the last voxel centre: linear
    # extrapolation, as scipy's RegularGridInterpolator with fill_value=None)
    base = np.clip(np.floor(v).astype(np.int64), 0, dims - 2)
    t = v - base
    rows = np.flatnonzero(inside)
    r, c, w = [], [], []
    for corner in range(8):
        bits = np.array([(corner >> k) & 1 for k in range(3)])
        weight = np.prod(np.where(bits, t, 1 - t), axis=1)
        r.append(rows)
        c.append(np.ravel_multi_index(tuple((base + bits).T), tuple(dims)))
        w.append(weight)
    weights = sp.csr_matrix((np.concatenate(w), (np.concatenate(r), np.concatenate(c))),
                            shape=(len(loc), int(np.prod(dims))))
    op = _DepthOperator(weights, inside, voxel, len(steps))
    if ctx is not None:
        ctx.operators[key] = op
    return op


def _json_key(value: Any) -> str:
    import json

    return json.dumps(value, sort_keys=True)


def missing_meshes(target: SurfaceTarget, projection: dict[str, Any], meshes: dict[str, Any] | None = None
                   ) -> list[str]:
    """The surfaces a projection names (``outer``, ``inner``) that the target does not have."""
    have = set(meshes) if meshes is not None else set(target.kinds())
    return [projection[k] for k in ("outer", "inner") if k in projection and projection[k] not in have]


def to_surface_image(values: np.ndarray, target: SurfaceTarget, meshes: dict[str, Any] | None = None):
    """A nilearn ``SurfaceImage`` of a row on the target's pial mesh (a described mesh's first surface
    if it has no pial)."""
    from nilearn.surface import SurfaceImage

    v = np.asarray(values, dtype=np.float32).reshape(-1)
    if v.size != target.n_vertices:
        raise FeatureError(f"vector has {v.size} values, the {target.name} mesh pair has {target.n_vertices}")
    meshes = target.meshes() if meshes is None else meshes
    mesh = meshes["pial"] if "pial" in meshes else meshes[sorted(meshes)[0]]
    return SurfaceImage(mesh=mesh, data={part: v[target.part(hemi)] for hemi, part in PARTS})


_VIEW_NAMES = ("left lateral", "left medial", "right lateral", "right medial")
# barycentric points of a triangle (corners, edge thirds, centre): where a face is drawn
_BARY = np.array([(i, j, 3 - i - j) for i in range(4) for j in range(4 - i)], dtype=np.float64) / 3
_PANEL_HEIGHT = 240  # the report's surface views (the one-picture views stay 110 rows high)


def surface_views(values: np.ndarray, target: SurfaceTarget, height: int = 110,
                  meshes: dict[str, Any] | None = None) -> np.ndarray:
    """Lateral and medial views of both hemispheres side by side, as a 2-D array (NaN: no value)."""
    tiles = surface_tiles(values, target, height, meshes)
    gap = np.full((height, 4), np.nan)
    return np.concatenate([part for t in tiles for part in (t, gap)][:-1], axis=1)


def surface_tiles(values: np.ndarray, target: SurfaceTarget, height: int = 110,
                  meshes: dict[str, Any] | None = None, layout: list | None = None) -> list[np.ndarray]:
    """The four views (left lateral, left medial, right lateral, right medial), each a 2-D array; give
    ``layout`` (:func:`surface_layout`) to draw many rows on one projection."""
    v = np.asarray(values, dtype=np.float64).reshape(-1)
    tiles = []
    for shape, pixels, vertices in (layout if layout is not None else surface_layout(target, height, meshes)):
        tile = np.full(shape, np.nan)
        tile.flat[pixels] = v[vertices]
        tiles.append(tile)
    return tiles


def surface_layout(target: SurfaceTarget, height: int = 110,
                   meshes: dict[str, Any] | None = None) -> list[tuple[tuple[int, int], np.ndarray, np.ndarray]]:
    """Per view, the picture's shape, its drawn pixels and the vertex (over both hemispheres) each shows.

    Vertices of the inflated mesh (nilearn's fsaverage5, or the best surface a described mesh has:
    inflated, midthickness, pial, ...) are projected onto the view's plane; where the mesh has faces,
    points spread over each triangle carry its nearest corner, so the surface is drawn without gaps
    (nothing behind it, the other side or the medial wall, shows through). A depth buffer keeps, per
    pixel, the point nearest the viewer (no shading, no library).
    """
    meshes = target.meshes() if meshes is None else meshes
    inflated = meshes[next(k for k in _DRAW_ON + tuple(sorted(meshes)) if k in meshes)]
    out = []
    # (hemisphere, axis sign of the viewer along x, sign of y across the picture)
    for hemi, part, view_x, across in (("L", "left", -1, -1), ("L", "left", 1, 1),
                                       ("R", "right", 1, 1), ("R", "right", -1, -1)):
        xyz = np.asarray(inflated.parts[part].coordinates, dtype=np.float64)
        n = min(target.part(hemi).stop - target.part(hemi).start, len(xyz))
        xyz = xyz[:n]
        vertex = np.arange(n)
        faces = getattr(inflated.parts[part], "faces", None)
        if faces is not None and len(faces):
            faces = np.asarray(faces, dtype=np.int64)
            faces = faces[(faces < n).all(axis=1)]
            xyz, vertex = (_BARY @ xyz[faces]).reshape(-1, 3), faces[:, _BARY.argmax(axis=1)].reshape(-1)
            r = max(1, round(height / 220))
        else:  # vertices only: squares that close the gaps between them, growing with the picture
            r = (2 if max(target.n_left, target.n_right) <= 20000 else 1) * max(1, round(height / 110))
        h = np.array([across * xyz[:, 1], -xyz[:, 2]]).T  # picture columns, rows (up is +z)
        lo, hi = h.min(axis=0), h.max(axis=0)
        scale = (height - 2 * r - 1) / max(hi[1] - lo[1], 1e-6)  # a margin of r: the squares stay inside
        width = int(np.ceil((hi[0] - lo[0]) * scale)) + 2 * r + 1
        pix = np.round((h - lo) * scale).astype(np.int64) + r
        offsets = [(dr, dc) for dr in range(-r, r + 1) for dc in range(-r, r + 1)]
        flat = np.concatenate([(pix[:, 1] + dr) * width + pix[:, 0] + dc for dr, dc in offsets])
        order = np.argsort(view_x * xyz[:, 0], kind="stable")  # far first: rank grows toward the viewer
        rank = np.empty(len(order), dtype=np.int64)
        rank[order] = np.arange(len(order))
        best = np.full(height * width, -1, dtype=np.int64)
        np.maximum.at(best, flat, np.tile(rank, len(offsets)))  # per pixel, the nearest point covering it
        pixels = np.flatnonzero(best >= 0)
        out.append(((height, width), pixels, vertex[order[best[pixels]]] + target.part(hemi).start))
    return out


def sulcal_depth(target: SurfaceTarget) -> np.ndarray | None:
    """Sulcal depth over both hemispheres, a background for pictures: nilearn's bundled fsaverage5's,
    or a described mesh's ``sulcal`` files (None if it has none)."""
    if not target.builtin:
        return target.vertex_data("sulcal")
    from nilearn.datasets import load_fsaverage_data

    img = load_fsaverage_data(mesh="fsaverage5", mesh_type="inflated", data_type="sulcal")
    return np.concatenate([np.asarray(img.data.parts[part]).reshape(-1)[:(target.n_left if h == "L" else
                                                                           target.n_right)]
                           for h, part in PARTS])


def write_label_gifti(path: str | os.PathLike[str], labels: np.ndarray, n_parcels: int, part: str) -> None:
    """A GIFTI label file (GIFTI 1.0: a NIFTI_INTENT_LABEL int32 array and its label table)."""
    import nibabel as nib
    from nibabel.gifti import GiftiDataArray, GiftiImage, GiftiLabel, GiftiLabelTable

    table = GiftiLabelTable()
    for k in range(n_parcels + 1):
        lab = GiftiLabel(key=k, red=0.0, green=0.0, blue=0.0, alpha=0.0 if k == 0 else 1.0)
        lab.label = "outside" if k == 0 else f"parcel-{k}"  # type: ignore[attr-defined]
        table.labels.append(lab)
    img = GiftiImage(labeltable=table, darrays=[GiftiDataArray(np.asarray(labels, np.int32), intent="NIFTI_INTENT_LABEL",
                                                               datatype="NIFTI_TYPE_INT32")])
    img.meta["AnatomicalStructurePrimary"] = "CortexLeft" if part == "left" else "CortexRight"
    nib.save(img, str(path))
