"""Which space a map is in, and the registration that takes a native-space map to a template.

Every map gets a ``space_kind``: ``template`` (its ``space-`` names a template),
``native`` (a subject's own space: ``T1w``, ``bold``, ``boldref``, any ``space-`` that is not a
template, or a FEAT first-level ``stats/`` folder) or ``unstated`` (no ``space-`` entity: taken
as the template space, which ``check`` says).  A native map's registration is looked up here,
once, and recorded in the catalog as a chain of transform files, template side first: a
template point goes through the chain's steps in order and lands in the map's space (the
"pull" direction every resampler uses).

Registrations the pipelines leave (common practice):
- BIDS-derivative transforms ``sub-<s>[_ses-<x>]_..._from-<A>_to-<B>_mode-image_xfm.{h5,txt,mat}``
  (ITK/ANTs files, as fMRIPrep writes them), in the map's dataset, in the local datasets its
  ``SourceDatasets`` names, or in folders given to ``index(transforms=...)``; chained when no
  single file goes from the map's space to a template (``from-boldref_to-T1w`` then
  ``from-T1w_to-MNI152...``).  An ITK file named ``from-A_to-B`` maps points of B to points of A,
  the direction resampling needs.
- FEAT folders: ``reg/example_func2standard.mat`` (a FLIRT matrix in FSL's scaled-voxel
  coordinates, whose x axis is flipped for images stored with a positive-determinant affine;
  from memory of FSL's FLIRT documentation) with ``reg/example_func`` and ``reg/standard``, the
  images that define those coordinates.  A ``reg/example_func2standard_warp`` (FNIRT) is not
  read yet: such a map is refused rather than registered by its affine part alone.
"""

from __future__ import annotations

import json
import os
import re
from pathlib import Path
from typing import Any, Iterable

from ..formats import digest_file

__all__ = ["TEMPLATE_PREFIXES", "space_kind", "RegistrationFinder", "is_template"]

# template names of BIDS (the specification's list of standard template identifiers) and
# TemplateFlow, matched by prefix so resolutions and cohorts of one family match too
TEMPLATE_PREFIXES = ("MNI152", "MNI305", "MNIColin27", "MNIInfant", "MNIPediatric", "ICBM452", "IXI549Space",
                     "NIHPD", "OASIS30", "Talairach", "UNCInfant", "SUIT", "fsaverage", "fsLR", "onavg", "MNI")
_TRANSFORM = re.compile(r"(?:^|_)from-(?P<src>[A-Za-z0-9]+)_to-(?P<dst>[A-Za-z0-9]+)(?:_mode-(?P<mode>[a-z]+))?"
                        r"(?:_[a-z]+-[A-Za-z0-9]+)*_xfm\.(?P<ext>h5|txt|mat)$")
_XFM_EXT = (".h5", ".txt", ".mat")


def is_template(space: str) -> bool:
    return space.startswith(TEMPLATE_PREFIXES)


def _feat_folder(relpath: str) -> str | None:
    """The ``.feat`` folder of a map in its ``stats/`` folder (relative), else None."""
    m = re.match(r"^(?P<feat>(?:.*/)?[^/]+\.feat)/stats/[^/]+$", relpath)
    return m.group("feat") if m else None


def _feat_level(folder: Path) -> int | None:
    try:
        text = (folder / "design.fsf").read_text(errors="replace")
    except OSError:
        return None
    m = re.search(r"set fmri\(level\)\s+(\d+)", text)
    return int(m.group(1)) if m else None


def space_kind(space: str | None, root: str, relpath: str) -> str:
    """``template``, ``native`` or ``unstated`` (see the module's docstring)."""
    if space:
        return "template" if is_template(space) else "native"
    feat = _feat_folder(relpath)
    if feat is not None and not feat.rsplit("/", 1)[0].endswith(".gfeat"):  # a gfeat cope is in standard space
        folder = Path(root) / feat
        level = _feat_level(folder)
        if level == 1 or (level is None and (folder / "reg").is_dir()):
            return "native"  # a first-level FEAT analysis models the functional images in their own space
    return "unstated"


class RegistrationFinder:
    """Finds and hashes the registration of native maps, once per subject and folder."""

    def __init__(self, root: str, source_roots: Iterable[str], transform_roots: Iterable[str]) -> None:
        self.roots = [root, *source_roots, *transform_roots]
        self._listed: dict[tuple[str, str], list[tuple[str, dict[str, str]]]] = {}
        self._hashes: dict[str, str | None] = {}

    def _sha(self, path: str) -> str | None:
        if path not in self._hashes:
            try:
                self._hashes[path] = digest_file(path).sha256
            except OSError:
                self._hashes[path] = None
        return self._hashes[path]

    def _transforms(self, root: str, sub: str) -> list[tuple[str, dict[str, str]]]:
        """The transform files of subject ``sub`` under ``root`` (its ``sub-`` folder, or lying flat)."""
        key = (root, sub)
        if key not in self._listed:
            found = []
            folders = [os.path.join(root, f"sub-{sub}"), root]
            for i, top in enumerate(folders):
                walker = os.walk(top) if i == 0 else [(top, [], _files(top))]
                for folder, _, names in walker:
                    for n in names:
                        if not n.startswith(f"sub-{sub}_") or not n.endswith(_XFM_EXT):
                            continue
                        m = _TRANSFORM.search(n)
                        if m and (m.group("mode") or "image") == "image":
                            ses = re.search(r"_ses-([A-Za-z0-9]+)", n)
                            found.append((os.path.join(folder, n), {"from": m.group("src"), "to": m.group("dst"),
                                                                    "ses": ses.group(1) if ses else ""}))
            self._listed[key] = sorted(found)
        return self._listed[key]

    def find(self, space: str | None, sub: str | None, ses: str | None, root: str, relpath: str
             ) -> tuple[dict[str, Any] | None, str]:
        """The registration of a native map as a JSON-able record, or None and what was looked for."""
        feat = _feat_folder(relpath)
        if not space and feat is not None:
            return self._feat(Path(root) / feat)
        if not sub:
            return None, f"a map in space {space!r} without a sub- entity: its subject's registration cannot be found"
        edges: dict[str, list[tuple[str, str]]] = {}
        for r in self.roots:
            for path, e in self._transforms(r, sub):
                if e["ses"] and ses and e["ses"] != ses:
                    continue
                edges.setdefault(e["from"], []).append((e["to"], path))
        chain = _shortest_chain(str(space), edges)
        if chain is None:
            looked = ", ".join(dict.fromkeys(self.roots))
            return None, (f"in native space {space!r} and no registration to a template was found (looked for "
                          f"sub-{sub}_*from-{space}_to-<template>_mode-image_xfm.{{h5,txt,mat}}, or a chain through "
                          f"other spaces, under {looked})")
        steps = []
        for path in reversed(chain[1]):  # template side first: the order a template point travels
            sha = self._sha(path)
            if sha is None:
                return None, f"the registration {path} cannot be read"
            steps.append({"path": path, "sha256": sha, "format": "itk"})
        return {"to": chain[0], "steps": steps}, ""

    def _feat(self, folder: Path) -> tuple[dict[str, Any] | None, str]:
        reg = folder / "reg"
        mat = reg / "example_func2standard.mat"
        if any((reg / f"example_func2standard_warp{e}").exists() for e in (".nii.gz", ".nii")):
            return None, (f"{reg}: the FEAT registration has a nonlinear warp (example_func2standard_warp), which "
                          "mapstore does not read yet; give the map as a template-space image (featregapply), or "
                          "its registration as an ITK transform with index(transforms=...)")
        if not mat.is_file():
            return None, (f"a FEAT first-level map (functional space) without {mat}; run FEAT's registration "
                          "(or featregapply), or give the map in template space")
        images = {}
        for name in ("example_func", "standard"):
            hit = next((reg / f"{name}{e}" for e in (".nii.gz", ".nii") if (reg / f"{name}{e}").is_file()), None)
            if hit is None:
                return None, (f"a FEAT first-level map (functional space) and {reg / name}.nii.gz, which the FLIRT "
                              "matrix needs, is missing; run FEAT's registration, or give the map in template space")
            images[name] = str(hit)
        shas = {k: self._sha(v) for k, v in {"path": str(mat), **images}.items()}
        if any(v is None for v in shas.values()):
            return None, f"the FEAT registration in {reg} cannot be read"
        return {"to": "standard", "steps": [{"path": str(mat), "sha256": shas["path"], "format": "fsl",
                                             "reference": images["standard"], "reference_sha256": shas["standard"],
                                             "moving": images["example_func"],
                                             "moving_sha256": shas["example_func"]}]}, ""


def _files(folder: str) -> list[str]:
    try:
        return [e.name for e in os.scandir(folder) if e.is_file()]
    except OSError:
        return []


def _shortest_chain(space: str, edges: dict[str, list[tuple[str, str]]]) -> tuple[str, list[str]] | None:
    """Breadth-first: the fewest transform files from ``space`` to a template (an MNI152 one first)."""
    frontier: list[tuple[str, list[str]]] = [(space, [])]
    seen = {space}
    for _ in range(3):
        nxt = []
        hits = []
        for node, path in frontier:
            for dst, f in sorted(edges.get(node, [])):
                if dst in seen:
                    continue
                if is_template(dst):
                    hits.append((dst, path + [f]))
                nxt.append((dst, path + [f]))
        if hits:
            hits.sort(key=lambda h: (not h[0].startswith("MNI152"), h[0]))
            return hits[0]
        for dst, _ in nxt:
            seen.add(dst)
        frontier = [(d, p) for d, p in nxt if not is_template(d)]
    return None


def registration_json(reg: dict[str, Any] | None) -> str | None:
    return json.dumps(reg, sort_keys=True) if reg else None
