"""Surface targets: the fsaverage mesh nilearn ships, the values of surface maps on it.

A surface feature set's row joins both hemispheres: the left hemisphere's vertices
``0 .. n_left - 1`` first, then the right's (nilearn's ``SurfaceImage`` part order).  This
module gives the meshes and the cortex mask of a target, resamples between fsaverage
densities, reads GIFTI and CIFTI-2 values, and projects volumes onto the mesh with nilearn's
``vol_to_surf``.
"""

from __future__ import annotations

import hashlib
import os
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import FeatureError, GridError, ParameterError

__all__ = [
    "SurfaceTarget",
    "SURFACE_TARGETS",
    "DEFAULT_PROJECTION",
    "builtin_surface",
    "surface_from_spec",
    "fsaverage_meshes",
    "cortex_mask",
    "density_index",
    "read_surface_values",
    "project_volume",
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


@dataclass(frozen=True)
class SurfaceTarget:
    """A target mesh pair: ``n_left`` + ``n_right`` vertices of a named fsaverage density."""

    name: str
    n_left: int
    n_right: int

    @property
    def n_vertices(self) -> int:
        return self.n_left + self.n_right

    # the volume grid's names, so code that reports a set's size reads either kind
    n_voxels = n_vertices

    @property
    def shape(self) -> tuple[int]:
        return (self.n_vertices,)

    @property
    def grid_id(self) -> str:
        return hashlib.sha256(f"surface|{self.name}|{self.n_left}|{self.n_right}".encode()).hexdigest()[:16]

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "kind": "surface", "shape": [self.n_vertices], "affine": None,
                "grid_id": self.grid_id, "hemispheres": {"L": self.n_left, "R": self.n_right},
                "order": f"left hemisphere vertices 0..{self.n_left - 1}, then right hemisphere vertices"}

    def part(self, hemi: str) -> slice:
        return slice(0, self.n_left) if hemi == "L" else slice(self.n_left, self.n_vertices)


def builtin_surface(name: str) -> SurfaceTarget | None:
    """The built-in surface target of this name (``fsaverage5``), else None."""
    n = SURFACE_TARGETS.get(name)
    return SurfaceTarget(name, n, n) if n else None


def surface_from_spec(doc: dict[str, Any]) -> SurfaceTarget:
    h = doc.get("hemispheres") or {}
    return SurfaceTarget(doc["name"], int(h["L"]), int(h["R"]))


def fsaverage_meshes() -> dict[str, Any]:
    """nilearn's bundled fsaverage5 meshes (``pial``, ``white_matter``, ``sphere``; PolyMesh each)."""
    from nilearn.datasets import load_fsaverage

    return load_fsaverage("fsaverage5")


def cortex_mask(target: SurfaceTarget) -> np.ndarray:
    """Booleans over the target's vertices: True on cortex, False on the medial wall.

    The medial wall is where the mean cortical thickness of nilearn's bundled fsaverage5 is
    (numerically) zero: vertices outside the cortex label of the subjects averaged into
    fsaverage.  This is the wall's core, an approximation; pass a mask of your own for an
    exact one.
    """
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
    return np.asarray(nib.load(path).darrays[0].data).reshape(-1)


def density_index(n_source: int, n_target: int, hemi: str, meshes: dict[str, Any] | None = None
                  ) -> np.ndarray | None:
    """For each target vertex, the source vertex that gives its value (None: the same mesh).

    Between fsaverage densities: a finer source is subsampled (the target's vertices are its
    first ones), a coarser one is resampled to the nearest vertex on the sphere, the usual
    method between spherically registered meshes (common practice, e.g. FreeSurfer's
    ``mri_surf2surf`` nearest-neighbour mapping; from memory).
    """
    if n_source == n_target:
        return None
    if n_source not in FSAVERAGE_ORDERS or n_target not in FSAVERAGE_ORDERS:
        raise FeatureError(f"a map with {n_source} vertices per hemisphere is not on an fsaverage density "
                           f"({', '.join(str(n) for n in sorted(FSAVERAGE_ORDERS))}); resample it to fsaverage "
                           "first")
    if n_source > n_target:
        return np.arange(n_target)
    from scipy.spatial import cKDTree

    meshes = meshes or fsaverage_meshes()
    sphere = np.asarray(meshes["sphere"].parts[dict(PARTS)[hemi]].coordinates, dtype=np.float64)
    if n_target > len(sphere):
        raise FeatureError(f"resampling to {n_target} vertices needs that mesh's sphere, which mapstore does "
                           "not ship (nilearn bundles fsaverage5)")
    _, idx = cKDTree(sphere[:n_source]).query(sphere[:n_target])
    return idx.astype(np.int64)


def read_surface_values(path: str, expect_sha256: str | None = None) -> np.ndarray:
    """The values of a one-map GIFTI file (vertices,) or CIFTI-2 file (grayordinates,), float32.

    The bytes read are the bytes hashed: a file changed since it was indexed is refused.
    """
    import nibabel as nib

    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise GridError(f"{path}: cannot read ({exc.strerror}); check the file") from None
    if expect_sha256 is not None and hashlib.sha256(raw).hexdigest() != expect_sha256:
        raise GridError(f"{path}: the file changed since it was indexed; re-run 'mapstore index'")
    try:
        if path.endswith(".nii"):
            img = nib.Cifti2Image.from_bytes(raw)
            data = np.asarray(img.get_fdata(dtype=np.float32))
            if data.shape[0] != 1:
                raise GridError(f"{path}: holds {data.shape[0]} maps; a feature row takes one")
            return data[0]
        fast = _gifti_one_array(raw)
        if fast is not None:
            return fast
        img = nib.GiftiImage.from_bytes(raw)
        arrays = [a.data for a in img.darrays if a.intent not in (1008, 1009)]
    except GridError:
        raise
    except Exception as exc:  # nibabel's XML and base64 decoders raise several types
        raise GridError(f"{path}: the values cannot be decoded ({type(exc).__name__}: {exc}); re-create "
                        "the file") from None
    if len(arrays) != 1 or np.asarray(arrays[0]).ndim != 1:
        raise GridError(f"{path}: holds {len(arrays)} data arrays; a feature row takes a file with one map")
    return np.asarray(arrays[0], dtype=np.float32)


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
    axis = img.header.get_axis(1)
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
    if p["interpolation"] not in ("linear", "nearest", "nearest_most_frequent"):
        raise ParameterError(f"projection interpolation must be linear or nearest, got {p['interpolation']!r}")
    if p["kind"] != "depth":
        p.pop("depth", None)
        p.pop("inner", None)
    return p


def project_volume(vol: np.ndarray, affine: np.ndarray, target: SurfaceTarget, projection: dict[str, Any],
                   meshes: dict[str, Any]) -> np.ndarray:
    """A volume's values on the target mesh by ``nilearn.surface.vol_to_surf``, both hemispheres.

    Missing voxels (NaN) go to ``vol_to_surf`` as its ``mask_img``: a vertex takes the mean of
    the samples inside the map's data, and is NaN where none is.
    """
    import nibabel as nib
    from nilearn.surface import vol_to_surf

    finite = np.isfinite(vol)
    img = nib.Nifti1Image(np.where(finite, vol, 0).astype(np.float32), affine)
    mask = None if finite.all() else nib.Nifti1Image(finite.astype(np.uint8), affine)
    kw = {k: v for k, v in projection.items() if k in ("kind", "interpolation", "depth", "radius", "n_samples")}
    out = np.empty(target.n_vertices, dtype=np.float32)
    for hemi, part in PARTS:
        outer = meshes[projection["outer"]].parts[part]
        inner = meshes[projection["inner"]].parts[part] if "inner" in projection else None
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            vals = vol_to_surf(img, outer, inner_mesh=inner, mask_img=mask, **kw)
        out[target.part(hemi)] = np.asarray(vals, dtype=np.float32)
    return out


def to_surface_image(values: np.ndarray, target: SurfaceTarget):
    """A nilearn ``SurfaceImage`` of a row on the target's pial mesh."""
    from nilearn.surface import SurfaceImage

    v = np.asarray(values, dtype=np.float32).reshape(-1)
    if v.size != target.n_vertices:
        raise FeatureError(f"vector has {v.size} values, the {target.name} mesh pair has {target.n_vertices}")
    return SurfaceImage(mesh=fsaverage_meshes()["pial"], data={part: v[target.part(hemi)] for hemi, part in PARTS})


def surface_views(values: np.ndarray, target: SurfaceTarget, height: int = 110) -> np.ndarray:
    """Lateral and medial views of both hemispheres side by side, as a 2-D array (NaN: no value).

    Vertices of nilearn's inflated fsaverage5 are drawn as small squares, far ones first, so the
    visible side of the surface ends on top (a painter's projection: no shading, no library).
    """
    v = np.asarray(values, dtype=np.float64).reshape(-1)
    inflated = fsaverage_meshes()["inflated"]
    tiles = []
    # (hemisphere, axis sign of the viewer along x, sign of y across the picture)
    for hemi, part, view_x, across in (("L", "left", -1, -1), ("L", "left", 1, 1),
                                       ("R", "right", 1, 1), ("R", "right", -1, -1)):
        xyz = np.asarray(inflated.parts[part].coordinates, dtype=np.float64)
        vals = v[target.part(hemi)]
        n = min(len(vals), len(xyz))
        xyz, vals = xyz[:n], vals[:n]
        h = np.array([across * xyz[:, 1], -xyz[:, 2]]).T  # picture columns, rows (up is +z)
        lo, hi = h.min(axis=0), h.max(axis=0)
        scale = (height - 5) / max(hi[1] - lo[1], 1e-6)
        width = int(np.ceil((hi[0] - lo[0]) * scale)) + 5
        pix = np.round((h - lo) * scale).astype(int) + 2
        tile = np.full((height, width), np.nan)
        order = np.argsort(view_x * xyz[:, 0])  # far from the viewer first
        for dr in (-2, -1, 0, 1, 2):
            for dc in (-2, -1, 0, 1, 2):
                tile[pix[order, 1] + dr, pix[order, 0] + dc] = vals[order]
        tiles.append(tile)
        tiles.append(np.full((height, 4), np.nan))
    return np.concatenate(tiles[:-1], axis=1)


def sulcal_depth(target: SurfaceTarget) -> np.ndarray:
    """nilearn's bundled fsaverage5 sulcal depth, both hemispheres (a background for pictures)."""
    from nilearn.datasets import load_fsaverage_data

    img = load_fsaverage_data(mesh="fsaverage5", mesh_type="inflated", data_type="sulcal")
    return np.concatenate([np.asarray(img.data.parts[part]).reshape(-1)[:(target.n_left if h == "L" else
                                                                           target.n_right)]
                           for h, part in PARTS])
