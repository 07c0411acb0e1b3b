"""Datasets: BIDS derivative datasets found under the index roots (with their raw sources), and plain
folders of GLM outputs that lie in no dataset.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

from ..formats import MAX_DEPTH, nesting_depth
from ..store import Problem

from ._names import DATA_HALVES, MAP_EXTENSIONS, OTHER_IMAGE_EXTENSIONS, SIDECAR_LIMIT, is_regular

__all__ = ['DatasetInfo', 'MapFile', 'SKIP_DIRS', 'find_datasets', 'top_folders']


SKIP_DIRS = {"derivatives", "sourcedata", "code", "stimuli", "log", "logs"}


@dataclass
class DatasetInfo:
    """One derivative dataset found under an index root."""

    root: str  # absolute path
    key: str  # stable identity, used in map ids
    name: str
    dataset_type: str | None
    generated_by: list[dict[str, Any]]
    bids_version: str | None
    raw_root: str | None
    raw_name: str | None
    description: dict[str, Any]
    source_roots: list[str] = field(default_factory=list)  # local datasets named by SourceDatasets
    exclude: list[str] = field(default_factory=list)  # folders (relative) that are datasets of their own
    index_root: str | None = None  # the root the user named that holds it (what a design file may point into)

    @property
    def study(self) -> str:
        return self.raw_name or self.name


@dataclass
class MapFile:
    """A statistic map found on disk, before its header or bytes are read."""

    dataset: DatasetInfo
    relpath: str  # posix, relative to the dataset root
    path: str  # absolute
    entities: dict[str, str]
    nbytes: int
    mtime_ns: int
    named_by: str  # "bids" or "rule:<n>"
    extras: dict[str, str] = field(default_factory=dict)  # from a name rule: mask, dof_file (relpaths)
    annex: Any = None  # the git-annex key (an AnnexKey) of an annexed file
    present: bool = True  # False: an annexed file whose content is not fetched (size from the key)


def _slug(text: str) -> str:
    s = re.sub(r"[^A-Za-z0-9._-]+", "-", text.strip()).strip("-")
    return s or "unnamed"


def _read_description(root: Path) -> tuple[dict[str, Any] | None, Problem | None]:
    f = root / "dataset_description.json"
    if not f.exists():
        return None, None
    if not is_regular(f):
        return {}, Problem(str(f), "not-a-regular-file", "dataset_description.json is not a regular file; it was "
                           "not opened", "replace it with the JSON file itself", "warning")
    try:
        if f.stat().st_size > SIDECAR_LIMIT:
            raise ValueError(f"larger than {SIDECAR_LIMIT >> 20} MiB; not read")
        doc = json.loads(f.read_text(encoding="utf-8"))
        if not isinstance(doc, dict):
            raise ValueError("top level is not an object")
        if nesting_depth(doc) > MAX_DEPTH:
            raise ValueError(f"nested deeper than {MAX_DEPTH} levels")
        return doc, None
    except RecursionError:
        return {}, Problem(str(f), "bad-dataset-description", f"nested deeper than {MAX_DEPTH} levels",
                           "write dataset_description.json as a flat JSON object", "warning")
    except (ValueError, OSError) as exc:
        return {}, Problem(str(f), "bad-dataset-description", f"cannot parse JSON ({exc})",
                           "fix the JSON syntax of dataset_description.json", "warning")


def _looks_like_dataset(path: Path) -> bool:
    try:
        return any(e.name.startswith("sub-") and e.is_dir() for e in os.scandir(path))
    except OSError:
        return False


def _local_sources(root: Path, desc: dict[str, Any]) -> list[tuple[Path, dict]]:
    """The local datasets named by ``SourceDatasets`` (a relative path or a file: URL), in order."""
    sources = desc.get("SourceDatasets")
    if not isinstance(sources, list):
        return []
    found = []
    for src in sources:
        url = src.get("URL") if isinstance(src, dict) else src if isinstance(src, str) else None
        if not isinstance(url, str) or not url.strip():
            continue
        url = url.strip()
        if url.startswith("file://"):
            cand = Path(url[len("file://"):])
        elif "://" in url or url.startswith(("doi:", "bids:")):
            continue  # remote: nothing local to read
        else:
            cand = root / url
        cand = Path(os.path.normpath(cand))
        if (cand / "dataset_description.json").is_file():
            sdesc, _ = _read_description(cand)
            found.append((cand, sdesc or {}))
    return found


def _source_raw(root: Path, desc: dict[str, Any]) -> tuple[Path, dict] | None:
    """The first local dataset named by ``SourceDatasets``."""
    found = _local_sources(root, desc)
    return found[0] if found else None


def _enclosing_raw(root: Path) -> tuple[Path, dict] | None:
    """The raw dataset whose ``derivatives/`` folder holds ``root`` (at any depth), if any."""
    for parent in root.parents:
        if parent.name == "derivatives" and (parent.parent / "dataset_description.json").is_file():
            desc, _ = _read_description(parent.parent)
            if desc is not None and desc.get("DatasetType") != "derivative":
                return parent.parent, desc
    return None


def _make_dataset(root: Path, desc: dict[str, Any] | None, raw: tuple[Path, dict] | None,
                  problems: list[Problem] | None = None) -> DatasetInfo:
    described = desc is not None
    desc = desc or {}
    generated = desc.get("GeneratedBy")
    if not generated and isinstance(desc.get("PipelineDescription"), dict):
        generated = [desc["PipelineDescription"]]  # older BIDS derivative descriptions
    if isinstance(generated, dict):
        generated = [generated]
    name = str(desc.get("Name") or "").strip() or root.name
    if described and not str(desc.get("Name") or "").strip() and problems is not None:
        problems.append(Problem(str(root / "dataset_description.json"), "no-dataset-name",
                                f"dataset_description.json has no Name; the dataset is named after its "
                                f"folder, {root.name!r}",
                                "add a \"Name\" to dataset_description.json (the key of its maps follows it)",
                                "warning"))
    if raw is None:
        raw = _enclosing_raw(root)
    local = _local_sources(root, desc)
    sources = [str(p) for p, _ in local]
    if local and raw is None and local[0][1].get("DatasetType") != "derivative":
        raw = local[0]
    raw_name = None
    if raw is not None:
        raw_name = str(raw[1].get("Name") or raw[0].name)
        key = f"{_slug(raw_name)}/{_slug(name)}"
    else:
        key = _slug(name)
    return DatasetInfo(
        root=str(root), key=key, name=name,
        dataset_type=desc.get("DatasetType"),
        generated_by=list(generated or []),
        bids_version=desc.get("BIDSVersion"),
        raw_root=str(raw[0]) if raw else None, raw_name=raw_name,
        description=desc, source_roots=sources,
    )


def find_datasets(roots: Iterable[str | os.PathLike[str]], max_depth: int = 4
                  ) -> tuple[list[DatasetInfo], list[Problem]]:
    """Find every derivative dataset under the given roots.

    A root may be a derivative dataset, a raw dataset holding ``derivatives/``
    (nested derivative datasets are found too), or a folder of such datasets.
    Dataset keys are made unique: two different folders with the same names get
    a short hash of their path appended, with a warning.
    """
    finder = _DatasetFinder(max_depth)
    for root in roots:
        p = Path(root).expanduser().absolute()
        if not p.exists():
            finder.problems.append(Problem(str(p), "missing-root", "the folder to index does not exist",
                                           "check the path"))
            continue
        if not p.is_dir():
            finder.problems.append(Problem(str(p), "root-not-folder", "expected a folder, got a file",
                                           "give the dataset folder, not a file in it"))
            continue
        before = len(finder.found)
        finder.visit(p, 0, None)
        finder.plain(p, p, 0)
        for ds in finder.found[before:]:
            ds.index_root = str(p)
        if len(finder.found) == before and not any(pr.path.startswith(str(p)) for pr in finder.problems):
            finder.problems.append(Problem(str(p), "no-datasets", "no BIDS derivative dataset and no image file "
                                           "found", "point at a derivative dataset, a raw dataset with derivatives/, "
                                           "a folder of GLM outputs, or a folder holding them"))
    found = finder.found
    # a raw dataset without derivatives/ is expected when a derivative names it in SourceDatasets
    sourced = {str(Path(r).resolve()) for ds in found for r in ds.source_roots}
    problems = [p for p in finder.problems
                if not (p.code == "no-derivatives" and str(Path(p.path).resolve()) in sourced)]
    return found, problems + _unique_keys(found)


def _unique_keys(found: list[DatasetInfo]) -> list[Problem]:
    """Give datasets that share a key a short hash of their path (a warning each)."""
    counts: dict[str, int] = {}
    for ds in found:
        counts[ds.key] = counts.get(ds.key, 0) + 1
    problems = []
    for ds in found:
        if counts[ds.key] > 1:
            old = ds.key
            ds.key = f"{old}~{hashlib.sha256(ds.root.encode()).hexdigest()[:6]}"
            problems.append(Problem(ds.root, "dataset-name-clash",
                                    f"several datasets are named {old!r}; this one is keyed {ds.key!r}",
                                    "give each dataset a distinct Name in dataset_description.json",
                                    "warning", ds.key))
    return problems


class _DatasetFinder:
    """The walk of :func:`find_datasets`: raw datasets, their derivatives, folders of datasets."""

    def __init__(self, max_depth: int) -> None:
        self.max_depth = max_depth
        self.found: list[DatasetInfo] = []
        self.problems: list[Problem] = []
        self.seen: set[str] = set()

    def visit(self, path: Path, depth: int, raw: tuple[Path, dict] | None) -> None:
        real = str(path.resolve())
        if real in self.seen:
            return
        desc, prob = _read_description(path)
        if prob:
            self.problems.append(prob)
        if desc is not None:
            self.seen.add(real)
            dtype = desc.get("DatasetType")
            is_raw = dtype == "raw" or (dtype is None and (path / "derivatives").is_dir() and raw is None)
            if is_raw and raw is None:
                self._raw(path, desc)
            else:
                self._derivative(path, desc, dtype, raw)
            return
        if _looks_like_dataset(path):
            self.seen.add(real)
            self.problems.append(Problem(str(path), "missing-dataset-description",
                                         "folder holds sub-* folders but no dataset_description.json; "
                                         "indexed under its folder name",
                                         "add dataset_description.json with DatasetType \"derivative\" "
                                         "and GeneratedBy", "warning"))
            self.found.append(_make_dataset(path, None, raw, self.problems))
            return
        if depth >= self.max_depth:
            return
        try:
            children = sorted(p for p in path.iterdir() if p.is_dir() and not p.name.startswith("."))
        except OSError as exc:
            self.problems.append(Problem(str(path), "unreadable-folder", f"cannot list folder ({exc.strerror})",
                                         "check permissions"))
            return
        for child in children:
            self.visit(child, depth + 1, raw)

    def plain(self, path: Path, root: Path, depth: int) -> None:
        """Folders outside every BIDS dataset that hold image files become datasets of their own (named by
        their path under the index root; the study is the folder's name, which origins can change).

        A folder with no BIDS dataset below it is one dataset; a folder with some is walked into, and its
        own loose files are one dataset that leaves its sub-folders to the others.
        """
        taken = {Path(s) for s in self.seen}
        real = Path(os.path.realpath(path))
        if real in taken or any(t in real.parents for t in taken) or depth > _PLAIN_DEPTH:
            return
        below = [t for t in taken if real in t.parents]
        if not below:
            if _has_images(path):
                self.seen.add(str(real))
                self.found.append(_plain_dataset(path, root))
            return
        try:
            children = sorted(c for c in path.iterdir() if c.is_dir() and not c.name.startswith("."))
        except OSError:
            return
        if _has_images(path, depth=0):
            ds = _plain_dataset(path, root)
            ds.exclude = [c.name for c in children]
            self.found.append(ds)
        for child in children:
            self.plain(child, root, depth + 1)

    def _raw(self, path: Path, desc: dict[str, Any]) -> None:
        deriv = path / "derivatives"
        if not deriv.is_dir():
            self.problems.append(Problem(str(path), "no-derivatives", "raw BIDS dataset with no derivatives/ folder",
                                         "index the derivative dataset that holds the statistic maps", "warning"))
            return
        for child in sorted(deriv.iterdir()):
            if child.is_dir() and not child.name.startswith("."):
                self.visit(child, 0, (path, desc))

    def _derivative(self, path: Path, desc: dict[str, Any], dtype: Any, raw: tuple[Path, dict] | None) -> None:
        if dtype not in (None, "derivative"):
            self.problems.append(Problem(str(path / "dataset_description.json"), "unexpected-dataset-type",
                                         f"DatasetType is {dtype!r}, expected 'derivative'",
                                         "set DatasetType to \"derivative\"", "warning"))
        elif dtype is None:
            self.problems.append(Problem(str(path / "dataset_description.json"), "no-dataset-type",
                                         "dataset_description.json has no DatasetType",
                                         "add \"DatasetType\": \"derivative\" and GeneratedBy", "warning"))
        self.found.append(_make_dataset(path, desc, raw, self.problems))
        # derivative datasets may nest further derivatives
        deriv = path / "derivatives"
        if deriv.is_dir():
            for child in sorted(deriv.iterdir()):
                if child.is_dir():
                    self.visit(child, 0, raw)


_PLAIN_DEPTH = 8  # how deep below an index root a folder of GLM outputs is looked for


_SCAN_ENTRIES = 200_000  # how many entries a look for image files reads before it stops


def _is_image_name(name: str) -> bool:
    low = name.lower()
    return low.endswith(MAP_EXTENSIONS) or low.endswith(OTHER_IMAGE_EXTENSIONS) or \
        any(low.endswith(d) for d in DATA_HALVES)


def _has_images(path: Path, depth: int = 12) -> bool:
    """Whether a folder (or, with depth > 0, a folder below it) holds an image file; bounded, loops skipped."""
    stack, seen, n = [(path, 0)], set(), 0
    while stack:
        folder, d = stack.pop()
        try:
            st = os.stat(folder)
            if (st.st_dev, st.st_ino) in seen:
                continue
            seen.add((st.st_dev, st.st_ino))
            entries = list(os.scandir(folder))
        except OSError:
            continue
        for e in entries:
            n += 1
            if n > _SCAN_ENTRIES or e.name.startswith("."):
                continue
            if _is_dir(e):
                if d < depth:
                    stack.append((Path(e.path), d + 1))
            elif _is_image_name(e.name):
                return True
    return False


def _plain_dataset(path: Path, root: Path) -> DatasetInfo:
    """A folder of maps outside BIDS: keyed by its path under the index root, its study the folder name."""
    rel = path.relative_to(root) if path != root else Path()
    parts = [root.name, *rel.parts]
    name = path.name or "root"
    return DatasetInfo(root=str(path), key="/".join(_slug(p) for p in parts), name=name, dataset_type="folder",
                       generated_by=[], bids_version=None, raw_root=None, raw_name=None, description={})


def top_folders(ds: DatasetInfo) -> list[str]:
    """The dataset's top-level folders that a walk descends into."""
    try:
        return sorted(e.name for e in os.scandir(ds.root)
                      if e.is_dir() and not e.name.startswith(".") and e.name not in SKIP_DIRS
                      and e.name not in ds.exclude)
    except OSError:
        return []


def _is_dir(e: os.DirEntry) -> bool:
    try:
        return e.is_dir()
    except OSError:
        return False
