"""Walk BIDS derivative datasets: find datasets, statistic maps, entities, sidecars.

Nothing here opens a NIfTI file.  Entities are parsed with the patterns of pybids'
bundled configuration (read once from the installed package), extended with the
statistical-derivative entities it lacks (``contrast``, ``stat``).  Sidecar
metadata follows the BIDS inheritance principle: every JSON file in the map's
folder or a parent folder whose entities are a subset of the map's and whose
suffix matches applies, the deeper (more specific) overriding the shallower.
"""

from __future__ import annotations

import csv
import errno
import fnmatch
import hashlib
import json
import os
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

from ..errors import RulesError
from ..formats import DATA_EXTENSIONS, FOREIGN_EXTENSIONS, MAX_DEPTH, data_file, nesting_depth, safe_regex
from ..statkinds import COMPANION_WORDS, STAT_KINDS, kind_for_word, known_stats, stat_kind
from ..formats import check_user_doc, load_user_file
from ..store import Problem, inside, lies_within
from ._layouts import h5_field_strings, h5_struct, is_matlab_hdf5, subject_from_path

__all__ = [
    "Problem",
    "DatasetInfo",
    "MapFile",
    "EntityParser",
    "NameRules",
    "builtin_rules",
    "MetadataOverrides",
    "find_datasets",
    "walk_dataset",
    "inside",
    "lies_within",
    "top_folders",
    "SidecarResolver",
    "read_participants",
    "ModelFiles",
    "label_problems",
    "STAT_SUFFIX",
    "MAP_EXTENSIONS",
    "split_map_name",
]

STAT_SUFFIX = "statmap"
# file extensions of statistic maps, lower case (names are compared without regard to case): volumes,
# GIFTI per hemisphere, CIFTI-2 dense scalars and one-timepoint dense series (longest first)
# (ANALYZE and NIfTI pairs, AFNI, FreeSurfer and MINC files are read through nibabel: formats._foreign)
MAP_EXTENSIONS = (".dscalar.nii", ".dtseries.nii", ".func.gii", ".shape.gii", ".gii", ".nii.gz", ".nii") + \
    FOREIGN_EXTENSIONS
# image files not read as maps: each is reported, never dropped silently.  The data half of a two-file
# format (.img beside .hdr, .BRIK beside .HEAD) belongs to its header's map; alone it is reported.
OTHER_IMAGE_EXTENSIONS = (".mnc.gz",)
DATA_HALVES = {d: h for h, ds in DATA_EXTENSIONS.items() for d in ds}
# files a GLM writer leaves beside its maps: the model's mask and its design matrix
COMPANION_SUFFIXES = ("_mask.nii.gz", "_mask.nii", "_mask.gii", "_design.tsv")
# Entities of the statistical-derivatives convention that pybids' bundled config lacks.
# BIDS labels are alphanumeric: mapstore reads letters and digits in Unicode's sense (Python's str.isalnum:
# ``contrast-wörter`` is the label ``wörter``), where pybids' patterns say ASCII [a-zA-Z0-9]
ALNUM = r"[^\W_]"
LABEL = r"(?:[^\W_]|\+)+"  # a label as the patterns read it (with BIDS' ``+`` joins)


def unicode_labels(pattern: str) -> str:
    """An entity pattern with its ASCII alphanumeric classes widened to Unicode letters and digits."""
    return pattern.replace("[a-zA-Z0-9+]+", LABEL).replace("[a-zA-Z0-9]+", ALNUM + "+")


EXTRA_ENTITIES = {
    "contrast": r"[_/\\]+contrast-(" + LABEL + ")",
    "stat": r"[_/\\]+stat-(" + LABEL + ")",
}
SKIP_DIRS = {"derivatives", "sourcedata", "code", "stimuli", "log", "logs"}
# what a dataset's own files may hold before they are reported and skipped (far above real ones)
SIDECAR_LIMIT = 16 << 20  # bytes of a JSON sidecar
PARTICIPANTS_LIMIT = 64 << 20  # bytes of participants.tsv
PARTICIPANTS_COLUMNS = 2_000


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


def split_map_name(name: str) -> tuple[str, str] | None:
    """(stem, extension) of a file name in a statistic-map format, else None.

    >>> split_map_name("sub-01_hemi-L_space-fsaverage5_stat-t_statmap.func.gii")
    ('sub-01_hemi-L_space-fsaverage5_stat-t_statmap', '.func.gii')
    """
    low = name.lower()
    for ext in MAP_EXTENSIONS:
        if low.endswith(ext):
            return name[:-len(ext)], name[-len(ext):]
    return None


def _short_key(pattern: str) -> str | None:
    m = re.search(r"([a-zA-Z]+)-\(", pattern)
    return m.group(1) if m else None


class EntityParser:
    """Entity patterns from pybids' bundled config, compiled once.

    Keys in the result are the BIDS entity keys as written in file names
    (``sub``, ``ses``, ``task``, ``run``, ``contrast``, ``stat``, ...), plus
    ``suffix``, ``extension`` and ``datatype``.
    """

    def __init__(self) -> None:
        self.patterns: list[tuple[str, str, re.Pattern[str]]] = []
        for long_name, pattern in self._config_patterns():
            key = {"suffix": "suffix", "extension": "extension", "datatype": "datatype"}.get(
                long_name) or _short_key(pattern)
            if key is None:
                continue
            self.patterns.append((long_name, key, re.compile(unicode_labels(pattern))))
        for key, pattern in EXTRA_ENTITIES.items():
            self.patterns.append((key, key, re.compile(pattern)))
        self.long_to_short = {ln: k for ln, k, _ in self.patterns}
        self._fast = [(None if key in ("suffix", "extension", "datatype") else f"{key}-", key, rx)
                      for _, key, rx in self.patterns]
        # split() with two groups gives [text, key, value, text, key, value, ..., text]
        self._varying = re.compile(r"(?<=[_/\\])(contrast|stat)-(" + LABEL + ")")
        self._cache: dict[str, dict[str, str]] = {}

    @staticmethod
    def _config_patterns() -> list[tuple[str, str]]:
        # locate pybids' bundled config without importing pybids (its import pulls in
        # pandas and SQLAlchemy, a third of a second we do not need)
        import importlib.util

        spec = importlib.util.find_spec("bids")
        if spec is None or not spec.submodule_search_locations:
            raise ImportError("mapstore needs pybids (pip install pybids) for its entity definitions")
        base = Path(list(spec.submodule_search_locations)[0]) / "layout" / "config"
        out: list[tuple[str, str]] = []
        for name in ("bids.json", "derivatives.json"):
            cfg = json.loads((base / name).read_text())
            for ent in cfg["entities"]:
                if ent["name"] in ("scans", "fmap", "from", "to", "mode"):
                    continue  # file-kind markers and transform entities, not map entities
                out.append((ent["name"], ent["pattern"]))
        return out

    def parse(self, relpath: str) -> dict[str, str]:
        """Entities of a path relative to its dataset root (posix separators).

        Files of one folder usually differ only in their contrast and stat labels, so the
        other entities are parsed once per "name with those two labels blanked" and cached.
        """
        parts = self._varying.split("/" + relpath)
        if len(parts) == 1:
            return self._parse(relpath)
        key = "".join(parts[0::3]) + "|" + "".join(parts[1::3])
        base = self._cache.get(key)
        if base is None:
            base = self._parse(relpath)
            for k in ("contrast", "stat"):
                base.pop(k, None)
            if len(self._cache) < 100_000:
                self._cache[key] = base
        out = dict(base)
        for k, v in zip(parts[1::3], parts[2::3]):
            out.setdefault(k, v)  # first occurrence wins, as in a regex search
        return out

    def _parse(self, relpath: str) -> dict[str, str]:
        probe = "/" + relpath
        out: dict[str, str] = {}
        for token, key, rx in self._fast:
            # a key-value entity can only match where its "key-" text occurs
            if token is None or token in probe:
                m = rx.search(probe)
                if m:
                    out[key] = m.group(1)
        return out




def builtin_rules() -> dict[str, Path]:
    """Name-rule presets shipped with mapstore, by name (``--rules fsl-feat``)."""
    base = Path(__file__).parent / "presets"
    return {p.stem: p for p in sorted(base.glob("*.yaml"))}


@dataclass
class NameRules:
    """User rules that name statistic maps whose file names are not BIDS statmap names.

    A rules file (JSON or YAML) holds ``rules``: a list of objects, each with either
    ``regex`` (a Python regular expression with named groups) or ``template`` (a
    path with ``{entity}`` placeholders and ``*`` wildcards), matched against the
    path relative to the dataset root, and optional:

    * ``entities``: fixed entity values; ``datasets``: globs over dataset keys;
    * ``translate``: per entity, captured value -> entity value (``{stat: {zstat: z}}``);
    * ``contrast_names``: where the captured contrast number finds its name, either
      ``{file: TEMPLATE, line: REGEX}`` (a text file; the regex holds ``{contrast}`` and a
      group ``name``) or ``{file: TEMPLATE, matlab: "SPM.xCon", field: "name"}`` (the
      number-th element of a struct array in a MATLAB file, read with scipy.io.loadmat);
    * ``dof_file``: a text file holding the map's degrees of freedom;
    * ``mask``: the model's mask image.

    TEMPLATEs are paths relative to the dataset root with ``{group}`` placeholders filled
    from the match.  Groups whose names start with ``_`` are helpers, not entities.
    Built-in presets (:func:`builtin_rules`) are given by name instead of a path.
    """

    rules: list[dict[str, Any]] = field(default_factory=list)
    source: str | None = None
    _names: dict[str, Any] = field(default_factory=dict, repr=False)  # contrast-name files, read once
    # what was given, as a rebuild needs it again: {"preset": name} or {"file", "sha256", "content"}
    given: list[dict[str, Any]] = field(default_factory=list, repr=False)

    @classmethod
    def load(cls, paths: str | os.PathLike[str] | Iterable[str | os.PathLike[str]] | None) -> "NameRules":
        """Rules from files or preset names (one, or several whose rules are tried in order)."""
        if paths is None:
            return cls()
        if isinstance(paths, (str, os.PathLike)):
            paths = [paths]
        out = cls()
        sources = []
        for path in paths:
            presets = builtin_rules()
            if not os.path.exists(path) and str(path) in presets:
                out.given.append({"preset": str(path)})
                path = presets[str(path)]
            elif not os.path.exists(path) and os.sep not in str(path) and "." not in str(path):
                raise RulesError(f"{path}: no such rules file or built-in preset; presets: "
                                 f"{', '.join(presets)}")
            else:
                out.given.append(_given_file(path, RulesError))
            out.rules += cls._load_one(path)
            sources.append(str(path))
        out.source = ", ".join(sources)
        return out

    @staticmethod
    def _load_one(path: str | os.PathLike[str]) -> list[dict[str, Any]]:
        f = load_user_file(path, RulesError)
        check_user_doc(f, "name-rules", RulesError)  # the structure; what a schema cannot say follows
        compiled = []
        for i, rule in enumerate(f.doc["rules"]):
            where = f"{path}: rules[{i}]"
            if "regex" in rule:
                rx = safe_regex(rule["regex"], where, RulesError)
            else:
                rx = _template_regex(rule["template"], where)
            fixed = rule.get("entities", {})
            names = set(rx.groupindex) | set(fixed)
            if "stat" not in names:
                raise RulesError(f"{where}: the rule never sets 'stat'; every map needs a stat "
                                 "(capture it or fix it in 'entities')")
            translate = rule.get("translate", {})
            names_spec = rule.get("contrast_names")
            if names_spec is not None and "line" in names_spec and "(?P<name>" not in names_spec["line"]:
                raise RulesError(f"{where}: contrast_names.line needs a group (?P<name>...)")
            if names_spec is not None and "line" in names_spec:
                safe_regex(names_spec["line"].replace("{contrast}", "1"), f"{where}: contrast_names.line", RulesError,
                           re.M)
            for key in ("mask", "dof_file"):
                if rule.get(key) is not None:
                    _check_template(rule[key], f"{where}: {key}")
            if names_spec is not None:
                _check_template(names_spec["file"], f"{where}: contrast_names.file")
            datasets = rule.get("datasets", ["*"])
            if isinstance(datasets, str):
                datasets = [datasets]
            compiled.append({"rx": rx, "entities": dict(fixed), "datasets": list(datasets),
                             "translate": translate, "contrast_names": names_spec,
                             "dof_file": rule.get("dof_file"), "mask": rule.get("mask"), "where": where})
        return compiled

    def match(self, dataset_key: str, relpath: str) -> tuple[int, dict[str, str]] | None:
        hit = self.match_full(dataset_key, relpath)
        return None if hit is None else (hit[0], hit[1])

    def match_full(self, dataset_key: str, relpath: str
                   ) -> tuple[int, dict[str, str], dict[str, str]] | None:
        """(rule index, entities, all captured groups) of the first rule matching a path."""
        for i, rule in enumerate(self.rules):
            if not any(fnmatch.fnmatchcase(dataset_key, g) for g in rule["datasets"]):
                continue
            m = rule["rx"].fullmatch(relpath)
            if m:
                groups = {k: v for k, v in m.groupdict().items() if v is not None}
                ents = {k: v for k, v in groups.items() if not k.startswith("_")}
                for k, table in rule["translate"].items():
                    if k in ents and ents[k] in table:
                        ents[k] = table[ents[k]]
                ents.update(rule["entities"])
                return i, ents, groups
        return None

    def extras(self, root: str, index: int, groups: dict[str, str], entities: dict[str, str],
               path: str, dataset: str) -> tuple[dict[str, str], list[Problem]]:
        """The rule's companions of one map: contrast name (set in ``entities``), mask, DOF file."""
        rule = self.rules[index]
        out: dict[str, str] = {}
        problems: list[Problem] = []

        def fill(template: str) -> str:
            return fill_template(template, groups, rule["where"])

        for key in ("mask", "dof_file"):
            if rule[key]:
                rel = fill(rule[key])
                if is_regular(os.path.join(root, rel)):
                    out[key] = rel
        spec = rule["contrast_names"]
        if spec and "contrast" in entities:
            number = entities["contrast"]
            rel = fill(spec["file"])
            name, why = self._contrast_name(os.path.join(root, rel), spec, number)
            if name:
                entities["contrast"] = name
                entities["contrast_number"] = number
            else:
                problems.append(Problem(path, "contrast-name-not-found", f"contrast {number}: {why}; the "
                                        "number is used as the contrast label", "keep the model's contrast "
                                        "file beside its maps", "warning", dataset))
        return out, problems

    def _contrast_name(self, path: str, spec: dict[str, Any], number: str) -> tuple[str | None, str]:
        key = path + "|" + spec.get("matlab", "") + "|" + spec.get("field", "")
        if key not in self._names:
            self._names[key] = _read_names_file(path, spec)
        table, why = self._names[key]
        if why:
            return None, why
        try:
            n = int(number)
        except ValueError:
            return None, f"{number!r} is not a contrast number"
        if "line" in spec:
            rx = re.compile(spec["line"].replace("{contrast}", str(n)), re.M)
            m = rx.search(table)
            return (m.group("name").strip(), "") if m else (None, f"no line for it in {path}")
        if 1 <= n <= len(table) and table[n - 1]:
            return str(table[n - 1]).strip(), ""
        return None, f"{path} lists {len(table)} contrast(s)"


def _read_names_file(path: str, spec: dict[str, Any]) -> tuple[Any, str]:
    """The text of a contrast-name file or the names of a MATLAB struct array, and why not."""
    if os.path.exists(path) and not is_regular(path):
        return None, f"{path} is not a regular file (not opened)"
    if "line" in spec:
        try:
            with open(path, encoding="utf-8", errors="replace") as fh:
                return fh.read(), ""
        except OSError as exc:
            return None, f"cannot read {path} ({exc.strerror})"
    if is_matlab_hdf5(path):
        return _read_names_h5(path, spec)
    try:
        from scipy.io import loadmat

        doc = loadmat(path, simplify_cells=True)
    except FileNotFoundError:
        return None, f"{path} is missing"
    except (OSError, ValueError, TypeError, NotImplementedError) as exc:
        return None, f"cannot read {path} ({exc})"
    node: Any = doc
    for part in spec["matlab"].split("."):
        node = node.get(part) if isinstance(node, dict) else None
        if node is None:
            return None, f"{path} has no {spec['matlab']}"
    items = list(node) if isinstance(node, (list, tuple)) or hasattr(node, "tolist") else [node]
    field_ = spec.get("field", "name")
    return [it.get(field_) if isinstance(it, dict) else None for it in items], ""


def _read_names_h5(path: str, spec: dict[str, Any]) -> tuple[Any, str]:
    """The names of a struct array in a MATLAB v7.3 (HDF5) file."""
    import h5py

    try:
        with h5py.File(path, "r") as f:
            group = h5_struct(f, spec["matlab"])
            if group is None:
                return None, f"{path} has no {spec['matlab']}"
            return h5_field_strings(f, group, spec.get("field", "name")), ""
    except (OSError, ValueError, KeyError, TypeError) as exc:
        return None, f"cannot read {path} as MATLAB v7.3 ({exc})"


def _check_template(template: str, where: str) -> None:
    """A companion's path template: relative, no ``..`` step, ``{group}`` fields only (checked at load)."""
    import string

    if template.startswith(("/", "\\", "~")) or ".." in re.split(r"[/\\]", template):
        raise RulesError(f"{where}: {template!r} must be a path inside the dataset (relative, no '..')")
    try:
        fields = list(string.Formatter().parse(template))
    except ValueError as exc:
        raise RulesError(f"{where}: {template!r} is not a path template ({exc})") from exc
    for _, name, spec, conv in fields:
        if name is not None and (not name.isidentifier() or spec or conv):
            raise RulesError(f"{where}: {template!r} may hold only {{group}} fields (a group name of the regex), "
                             f"not {{{name}{'!' + conv if conv else ''}{':' + spec if spec else ''}}}")


def fill_template(template: str, groups: dict[str, str], where: str) -> str:
    """A path template filled with a match's groups: named fields only (no attribute or index access, no
    format spec), the result a relative path that stays inside the dataset.

    >>> fill_template("{_model}/design.con", {"_model": "sub-01/a.feat"}, "rule")
    'sub-01/a.feat/design.con'
    """
    import string

    out = []
    for text, name, spec, conv in string.Formatter().parse(template):
        out.append(text)
        if name is None:
            continue
        if not name.isidentifier() or spec or conv:
            raise RulesError(f"{where}: template {template!r} may hold only {{group}} fields")
        if name not in groups:
            raise RulesError(f"{where}: template {template!r} names a group the regex does not have ({name!r})")
        out.append(groups[name])
    rel = os.path.normpath("".join(out)).replace(os.sep, "/")
    if os.path.isabs(rel) or rel == ".." or rel.startswith("../"):
        raise RulesError(f"{where}: template {template!r} leads outside the dataset ({rel})")
    return rel


def _template_regex(template: str, where: str) -> re.Pattern[str]:
    parts = re.split(r"(\{[a-zA-Z]+\}|\*\*|\*)", template)
    out = []
    for p in parts:
        if p.startswith("{") and p.endswith("}"):
            out.append(f"(?P<{p[1:-1]}>{LABEL})")
        elif p == "**":
            out.append(".*")
        elif p == "*":
            out.append("[^/]*")
        else:
            out.append(re.escape(p))
    try:
        return re.compile("".join(out))
    except re.error as exc:
        raise RulesError(f"{where}: invalid template ({exc})") from exc


@dataclass
class MetadataOverrides:
    """User mapping of datasets (and dataset-qualified subjects) to study, site and lab.

    File format (JSON or YAML)::

        datasets:
          "<dataset key or glob>": {study: ..., site: ..., lab: ...}
        subjects:
          "<dataset key>/sub-<label>": {site: ..., lab: ..., participant: "<study>/sub-<label>"}

    ``participant`` declares that a subject is a person already known under another
    study's id (the leakage guard then keeps both on one side of every split).
    """

    datasets: dict[str, dict[str, str]] = field(default_factory=dict)
    subjects: dict[str, dict[str, str]] = field(default_factory=dict)
    source: str | None = None
    given: dict[str, Any] | None = field(default=None, repr=False)  # {"file", "sha256", "content"}

    @classmethod
    def load(cls, path: str | os.PathLike[str] | None) -> "MetadataOverrides":
        if path is None:
            return cls()
        f = load_user_file(path, RulesError)
        check_user_doc(f, "origins", RulesError)
        out = cls(source=str(path), given=_given_file(path, RulesError))
        for section in ("datasets", "subjects"):
            for key, val in (f.doc.get(section) or {}).items():
                getattr(out, section)[str(key)] = {k: str(v) for k, v in val.items()}
        return out

    def apply(self, dataset_key: str, sub: str | None, values: dict[str, Any]) -> dict[str, Any]:
        out = dict(values)
        for pattern, over in self.datasets.items():
            if fnmatch.fnmatchcase(dataset_key, pattern):
                out.update(over)
        if sub is not None:
            over = self.subjects.get(f"{dataset_key}/sub-{sub}")
            if over:
                out.update(over)
        return out


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


def _written_twice(ds: DatasetInfo, maps: list[MapFile]) -> list[Problem]:
    """A map saved both as .nii and .nii.gz (or in two cases of one name): both are kept, and said."""
    by_stem: dict[str, list[MapFile]] = {}
    for m in maps:
        ext = m.entities.get("extension") or ""
        by_stem.setdefault(m.relpath[:len(m.relpath) - len(ext)].lower(), []).append(m)
    out = []
    for group in by_stem.values():
        if len(group) > 1:
            names = ", ".join(os.path.basename(m.relpath) for m in group)
            out.append(Problem(group[0].path, "map-written-twice", f"one map written {len(group)} times in "
                               f"different formats ({names}); each is a catalog row",
                               "keep one of the files (selections keep one stat and one map per subject and "
                               "contrast, so a decoder is not fed both)", "warning", ds.key))
    return out


def walk_dataset(ds: DatasetInfo, parser: EntityParser, rules: NameRules,
                 top: Iterable[str] | None = None, root_maps: bool = True, fingerprint: Any = None,
                 skip_folders: Iterable[str] | None = None
                 ) -> tuple[list[MapFile], dict[str, list[str]], list[Problem]]:
    """List the statistic maps and JSON sidecars of one dataset (or of part of it).

    Returns the maps, a mapping of folder (relative, posix, "" for the root) to
    the JSON file names in it, and problems (dangling links, names that look
    like statistic maps but lack entities).  ``top`` limits the walk to some
    top-level folders and ``root_maps`` says whether maps lying in the root
    count; root-level sidecars are always collected, as inheritance needs them.
    ``fingerprint`` (a hashlib object) is fed the path, size and mtime of every map, sidecar
    and model file found: equal digests mean the walk found the same files unchanged.
    ``skip_folders`` (relative paths) are not entered: datasets of their own nested in this one.
    """
    w = _Walk(ds, parser, rules, root_maps, fingerprint)
    only = None if top is None else set(top)
    skip = set(skip_folders or ())
    stack = [""]
    seen: set[tuple[int, int]] = set()  # folders by device and inode: a symlink loop is walked once
    while stack:
        rel = stack.pop()
        folder = os.path.join(ds.root, rel) if rel else ds.root
        try:
            st = os.stat(folder)
            if (st.st_dev, st.st_ino) in seen:
                w.problems.append(Problem(folder, "symlink-loop", "a folder reached again through a symbolic "
                                          "link (a loop, or a second path to the same folder); walked once",
                                          "remove the link, or nothing to do if the folder is meant to be "
                                          "reachable twice", "warning", ds.key))
                continue
            seen.add((st.st_dev, st.st_ino))
            entries = list(os.scandir(folder))
        except OSError as exc:
            w.problems.append(Problem(folder, "unreadable-folder", f"cannot list folder ({exc.strerror})",
                                      "check permissions", "error", ds.key))
            continue
        lowered = {e.name.lower() for e in entries}
        digits = [e.name for e in entries if e.name.isdigit() and _is_dir(e)]
        if len(digits) >= 2:  # folders named by subject number, side by side
            w.digit_dirs.update(f"{rel}/{d}" if rel else d for d in digits)
        for e in entries:
            name = e.name
            if name.startswith("."):
                continue
            relpath = f"{rel}/{name}" if rel else name
            is_dir = _is_dir(e)
            low = name.lower()
            if is_dir and low.endswith(MAP_EXTENSIONS) and "_stat-" in name:
                w.problems.append(Problem(e.path, "not-a-regular-file", "a folder named like a statistic map; it "
                                          "was not opened", "rename the folder, or put the map file itself here",
                                          "error", ds.key))
            elif is_dir:
                if relpath in skip:
                    continue
                if rel or (name not in SKIP_DIRS and (only is None or name in only)):
                    stack.append(relpath)
            elif low.endswith(".json") or low.endswith(COMPANION_SUFFIXES):
                w.companion(e, rel, relpath)
            elif low.endswith(MAP_EXTENSIONS) and (rel or root_maps):
                w.map(e, relpath)
            elif low.endswith(OTHER_IMAGE_EXTENSIONS) and (rel or root_maps):
                w.other_image(e, relpath)
            elif (half := next((d for d in DATA_HALVES if low.endswith(d)), None)) and (rel or root_maps):
                if low[:-len(half)] + DATA_HALVES[half] not in lowered:
                    w.other_image(e, relpath, half)  # a data file without its header
    w.maps.sort(key=lambda m: m.relpath)
    w.problems.extend(_written_twice(ds, w.maps))
    for ending, (n, example, ents) in sorted(w.unmatched.items()):
        w.problems.append(unmatched_problem(ds, ending, n, example, ents))
    for ending, (n, example) in sorted(w.other.items()):
        if ending in DATA_HALVES:
            w.problems.append(Problem(example, "data-without-header", f"{n} data file(s) (*{ending}) with no "
                                      f"{DATA_HALVES[ending]} header beside them: the voxels without what they "
                                      "are; passed over", f"put the {DATA_HALVES[ending]} header back beside each",
                                      "warning", ds.key, count=n))
        else:
            w.problems.append(Problem(example, "unread-format", f"{n} image file(s) in a format not read as maps "
                                      f"(*{ending}, a compressed MINC file); passed over", "uncompress it (gunzip) "
                                      "and index again", "warning", ds.key, count=n))
    if fingerprint is not None:
        fingerprint.update("".join(f"{m.relpath}\0{m.nbytes}\0{m.mtime_ns}\n" for m in w.maps).encode())
    return w.maps, w.jsons, w.problems


def name_form(stem: str) -> tuple[str, str]:
    """How a file name that is not a BIDS statmap name carries its statistic: ``(form, word)``.

    Forms: ``numbered`` (SPM's ``con_0001``), ``counted`` (FEAT's ``cope1``), ``bare`` (``ResMS``,
    ``sigmasquareds``) and ``suffix`` (``faces_zmap``, ``sub-01_effect_size``; known words of several
    parts are kept whole).

    >>> [name_form(s) for s in ("con_0001", "cope12", "ResMS", "faces_effect_size", "sub-01_r_square")]
    [('numbered', 'con'), ('counted', 'cope'), ('bare', 'ResMS'), ('suffix', 'effect_size'), ('suffix', 'r_square')]
    """
    low = stem.lower()
    for w in _LONG_WORDS:
        if low.endswith("_" + w) or low == w:
            return ("bare" if low == w else "suffix"), stem[-len(w):]
    tokens = stem.split("_")
    if len(tokens) >= 2 and tokens[-1].isdigit() and tokens[-2].isalpha():
        return "numbered", tokens[-2]
    m = re.fullmatch(r"([A-Za-z]+?)([0-9]+)", tokens[-1])
    if len(tokens) == 1 and m:
        return "counted", m.group(1)
    if len(tokens) == 1:
        return "bare", stem
    return "suffix", tokens[-1]


_LONG_WORDS = sorted({w.lower() for k in STAT_KINDS for w in k.words if "_" in w} |
                     {w.lower() for w in COMPANION_WORDS if "_" in w}, key=len, reverse=True)
_FORM_ENDING = {"numbered": "{w}_<N>", "counted": "{w}<N>", "bare": "{w}", "suffix": "_{w}"}
# a token that names a BIDS entity is not a contrast
_NOT_CONTRAST = r"(?!(?:sub|ses|task|acq|run|rec|space|res|den|hemi|desc|dir|echo|contrast|stat)-)"


def name_ending(stem: str, ext: str) -> str:
    """The key passed-over files are counted under: what their names share (``cope<N>.nii.gz``)."""
    form, word = name_form(stem)
    return _FORM_ENDING[form].format(w=word) + ext


def suggested_rule(stem: str, ext: str, entities: dict[str, str] | None = None) -> tuple[str | None, str]:
    """A name rule (JSON, one line) that takes files named like this one, and what it takes them as.

    The stat comes from the table of statistic kinds (the writer's word); the contrast from the number
    (``cope3``, ``con_0003``) or the name part before the word; ``(None, why)`` for a word no kind knows.
    """
    form, word = name_form(stem)
    kind = kind_for_word(word)
    if kind is None:
        if word.lower() in (w.lower() for w in COMPANION_WORDS):
            return None, f"a file a model leaves beside its maps ({word}), not a statistic map"
        return None, (f"the word {word!r} names no statistic mapstore knows; if these are statistic maps, write "
                      "a name rule that sets stat (entities: {stat: LABEL}, LABEL one of "
                      f"{', '.join(known_stats())})")
    label = kind.label
    if label == "beta" and entities and entities.get("contrast"):
        label = "effect"  # a "beta" named for a contrast is the contrast's estimate
    numbered = form in ("numbered", "counted")
    by_number = numbered and (kind.role == "contrast" or label in ("effect", "beta"))
    by_name = form == "suffix" and (kind.role == "contrast" or label == "effect")
    by_folder = form == "bare" and kind.role == "contrast"  # FreeSurfer's <glmdir>/<contrast>/sig.mgh
    number = r"(?P<contrast>[0-9]+)" if by_number else r"[0-9]*"
    w = f"(?P<stat>{re.escape(word)})"
    bare = f"(?P<contrast>[^/]+)/{w}" if by_folder else f"(?:[^/]*_)?{w}"
    body = {"numbered": f"{w}_{number}", "counted": f"{w}{number}", "bare": bare,
            "suffix": "(?:[^/]*?_)??" + (f"(?:{_NOT_CONTRAST}(?P<contrast>[^/_]+)_)?" if by_name else "") + w}[form]
    rule = json.dumps({"rules": [{"regex": r"(?:.*/)?" + body + re.escape(ext),
                                  "translate": {"stat": {word: label}}}]})
    role = "contrast" if kind.role == "contrast" or label == "effect" else "model"
    what = f"{label} maps ({(stat_kind(label) or kind).description}; {role} maps)"
    if by_number:
        what += ", the contrast (or regressor) from the number in the name"
    elif by_name:
        what += ", the contrast from the name part before the word, or the file's contrast- entity"
    elif by_folder:
        what += ", the contrast from the folder the file is in"
    return rule, what


def unmatched_problem(ds: DatasetInfo, ending: str, n: int, example: str,
                      entities: dict[str, str] | None = None) -> Problem:
    """One ``info`` row per kind of image file no naming took (nothing a dataset holds goes unsaid)."""
    name = os.path.basename(example)
    stem, ext = split_map_name(name) or (name, "")
    rule, what = suggested_rule(stem, ext, entities)
    if rule is None:
        remedy = f"{what}; otherwise nothing to do" if "no statistic" in what else f"{what}: nothing to do"
    else:
        remedy = (f"if they are statistic maps, rename them ..._stat-<label>_statmap, or index with a name-rules "
                  f"file (--rules) such as {rule}; it takes them as {what}; otherwise nothing to do")
    return Problem(example, "unmatched-images",
                   f"{n} image file(s) named like this one (*{ending}) are neither BIDS statistic maps "
                   "(..._stat-<label>_statmap) nor taken by a name rule; they were passed over",
                   remedy, "info", ds.key, count=n)


class _Walk:
    """What :func:`walk_dataset` collects, entry by entry."""

    def __init__(self, ds: DatasetInfo, parser: EntityParser, rules: NameRules, root_maps: bool,
                 fingerprint: Any) -> None:
        self.ds, self.parser, self.rules, self.fingerprint = ds, parser, rules, fingerprint
        self.maps: list[MapFile] = []
        self.jsons: dict[str, list[str]] = {}
        self.problems: list[Problem] = []
        self.unmatched: dict[str, list[Any]] = {}  # by name ending (_beta.nii.gz): [count, first path, entities]
        self.other: dict[str, list[Any]] = {}  # image files of formats not read, by extension: [count, first path]
        self.digit_dirs: set[str] = set()  # folders named by a number beside others so named (subject numbers)

    def other_image(self, e: os.DirEntry, relpath: str, ext: str | None = None) -> None:
        ext = ext or next(x for x in OTHER_IMAGE_EXTENSIONS if e.name.lower().endswith(x))
        seen = self.other.setdefault(ext, [0, e.path])
        seen[0] += 1

    def companion(self, e: os.DirEntry, rel: str, relpath: str) -> None:
        """A sidecar or a model file (mask, design): listed for inheritance and model lookups."""
        try:
            st = _stat_entry(e)
        except _NotRegular as exc:
            self.problems.append(Problem(e.path, "not-a-regular-file", f"a {exc}, not a regular file; it was "
                                         "not opened (opening it could block)", "replace it with the file itself",
                                         "warning", self.ds.key))
            return
        except OSError:
            return  # a dangling or looping link to a sidecar: nothing to read
        self.jsons.setdefault(rel, []).append(e.name)
        if self.fingerprint is not None:
            self.fingerprint.update(f"{relpath}\0{st.st_size}\0{st.st_mtime_ns}\n".encode())

    def map(self, e: os.DirEntry, relpath: str) -> None:
        """A NIfTI, GIFTI or CIFTI file: a statistic map by its BIDS name or by a name rule, or nothing."""
        ds, name = self.ds, e.name
        stem, ext = split_map_name(name)  # type: ignore[misc]  # the walk passes map extensions only
        is_statmap = stem.endswith("_" + STAT_SUFFIX)
        hit = None
        if not is_statmap:
            hit = self.rules.match_full(ds.key, relpath) if self.rules.rules else None
            if hit is None and ext.lower() == ".head":  # an AFNI bucket says what each sub-brick is
                hit = (-1, {}, {})
            if hit is None:
                ending = name_ending(stem, ext)
                seen = self.unmatched.setdefault(ending, [0, e.path, None])
                if seen[0] == 0:
                    seen[2] = self.parser.parse(relpath)
                seen[0] += 1
                return
        st = self._stat(e)
        if st is None:
            return
        size, mtime = st.st_size, st.st_mtime_ns
        if ext.lower() in DATA_EXTENSIONS:  # a two-file format: its size and time are both files'
            half = data_file(e.path)
            try:
                dst = os.stat(half) if half else None
            except OSError:
                dst = None
            if dst is not None:
                size, mtime = size + dst.st_size, max(mtime, dst.st_mtime_ns)
        if is_statmap:
            ents = self.parser.parse(relpath)
            self.problems.extend(_fix_labels(stem, ents, e.path, ds.key))
            if "stat" not in ents:
                self.problems.append(Problem(e.path, "missing-entity", "statmap file name lacks stat",
                                             f"name it ..._stat-<label>_statmap{ext} (with contrast-<label> "
                                             "for a contrast's map), or add a rule in a name-rules file",
                                             "error", ds.key))
                return
            ents["extension"] = ext.lower()
            self._subject(ents, relpath)
            kind = stat_kind(ents["stat"])
            if "contrast" not in ents and ents.get("desc") and kind is not None and kind.role == "contrast":
                ents["contrast"] = ents["desc"]
                self.problems.append(Problem(e.path, "contrast-from-desc", f"a {ents['stat']} map with no contrast- "
                                             f"entity: its desc-{ents['desc']} is taken as the contrast",
                                             f"name it with contrast-{ents['desc']} to say so", "info", ds.key))
            self.maps.append(MapFile(ds, relpath, e.path, ents, size, mtime, "bids"))
            return
        idx, ents, groups = hit
        base = self.parser.parse(relpath)
        base.update(ents)
        base["suffix"] = STAT_SUFFIX
        base["extension"] = ext.lower()
        self._subject(base, relpath)
        if idx < 0:  # an AFNI bucket no rule names: its header says what it holds
            base.pop("stat", None)
            self.maps.append(MapFile(ds, relpath, e.path, base, size, mtime, "afni"))
            return
        extras, probs = self.rules.extras(ds.root, idx, groups, base, e.path, ds.key)
        self.problems.extend(probs)
        self.maps.append(MapFile(ds, relpath, e.path, base, size, mtime, f"rule:{idx}", extras))

    def _subject(self, ents: dict[str, str], relpath: str) -> None:
        """A subject named by a folder outside BIDS (``subj07/``, ``s07/``, a number among numbers)."""
        if "sub" not in ents:
            # a folder of maps outside BIDS may itself be the subject's (subj07/ indexed as a dataset)
            sub = subject_from_path(relpath, self.digit_dirs)
            if sub is None and self.ds.dataset_type == "folder":
                sub = subject_from_path(f"{os.path.basename(self.ds.root)}/{relpath}")
            if sub:
                ents["sub"] = sub

    def _stat(self, e: os.DirEntry) -> os.stat_result | None:
        """The map's stat; only a regular file passes (anything else becomes a problem, unopened)."""
        key = self.ds.key
        try:
            return _stat_entry(e)
        except _NotRegular as exc:
            self.problems.append(Problem(e.path, "not-a-regular-file", f"a {exc} named like a statistic map; it was "
                                         "not opened (opening it could block the crawl)", "replace it with the map "
                                         "file itself, or remove it", "error", key))
        except FileNotFoundError:
            self.problems.append(Problem(e.path, "dangling-symlink",
                                         "symbolic link to a file that is not there (an unfetched annexed file?)",
                                         "fetch the file content (for example 'datalad get' or "
                                         "'git annex get' on it), then index again", "error", key))
        except OSError as exc:
            if exc.errno == errno.ELOOP:
                self.problems.append(Problem(e.path, "symlink-loop", "symbolic links that point at each other "
                                             "in a loop", "point the link at the map file", "error", key))
            else:
                self.problems.append(Problem(e.path, "unreadable", f"cannot stat file ({exc.strerror})",
                                             "check permissions", "error", key))
        return None


_KINDS = ((stat.S_ISFIFO, "named pipe (FIFO)"), (stat.S_ISSOCK, "socket"), (stat.S_ISCHR, "character device"),
          (stat.S_ISBLK, "block device"), (stat.S_ISDIR, "folder"))


def _kind(mode: int) -> str:
    return next((name for test, name in _KINDS if test(mode)), "special file")


def _stat_entry(entry: os.DirEntry) -> os.stat_result:
    """The entry's stat (through symlinks); only regular files pass, as opening anything else can block."""
    st = entry.stat()
    if not stat.S_ISREG(st.st_mode):
        raise _NotRegular(_kind(st.st_mode))
    return st


class _NotRegular(OSError):
    """A path that is not a regular file (a FIFO, a socket, a device or a folder)."""


def is_regular(path: str | os.PathLike[str]) -> bool:
    """True for a regular file (symlinks followed); never opens the path."""
    try:
        return stat.S_ISREG(os.stat(path).st_mode)
    except OSError:
        return False


_ENTITY_PART = re.compile(r"^(" + ALNUM + r"+)-(.*)$")
_CLEAN_STEM = re.compile(r"(?:" + ALNUM + r"+-" + LABEL + "_)*" + ALNUM + "+")


def label_problems(stem: str) -> list[tuple[str, str, str]]:
    """Labels of a BIDS file name that hold a character BIDS forbids in a label.

    Returns ``(kind, key, whole_label)`` with kind ``hyphen`` (``contrast-a-b``: the label
    is ``a-b``) or ``underscore`` (``contrast-a_b``: ``b`` has no key, so it belongs to the
    label before it).  The suffix (the last part) is not a key-value pair and is skipped.

    Examples
    --------
    >>> label_problems("sub-01_contrast-sentences-words_stat-t_statmap")
    [('hyphen', 'contrast', 'sentences-words')]
    >>> label_problems("sub-01_contrast-faces_houses_stat-t_statmap")
    [('underscore', 'contrast', 'faces_houses')]
    """
    if _CLEAN_STEM.fullmatch(stem):
        return []  # the usual case, in one regex call
    entries: list[list[str]] = []  # [kind, key, label]; kind "" while the label is clean
    for part in stem.split("_")[:-1]:
        m = _ENTITY_PART.match(part)
        if m is None:
            if entries:  # a part with no key continues the label before it
                entries[-1][2] += "_" + part
                entries[-1][0] = "underscore"
            continue
        entries.append(["hyphen" if "-" in m.group(2) else "", m.group(1), m.group(2)])
    return [(k, key, label) for k, key, label in entries if k]


def _fix_labels(stem: str, ents: dict[str, str], path: str, dataset: str) -> list[Problem]:
    """Keep forbidden labels whole (never cut at the hyphen or underscore) and say so."""
    out = []
    for kind, key, label in label_problems(stem):
        if key in ents:
            ents[key] = label
        char = "a hyphen" if kind == "hyphen" else "an underscore"
        clean = re.sub(r"[-_]+(.)", lambda m: m.group(1).upper(), label)
        out.append(Problem(path, "label-not-alphanumeric",
                           f"{key} label {label!r} holds {char}, which BIDS forbids inside a label; read "
                           f"as {key} {label!r} (whole), not cut at the {kind}",
                           f"rename the file with {key}-{clean}", "warning", dataset))
    return out


class SidecarResolver:
    """Metadata of a data file by the BIDS inheritance principle, with parsed files cached."""

    def __init__(self, ds: DatasetInfo, jsons: dict[str, list[str]], parser: EntityParser) -> None:
        self.ds = ds
        self.parser = parser
        self.problems: list[Problem] = []
        self._content: dict[str, dict[str, Any] | None] = {}
        self._index: dict[str, list[tuple[str, str | None, dict[str, str]]]] = {}
        self._chains: dict[str, tuple] = {}
        self._merged: dict[tuple[str, ...], tuple[dict[str, Any], list[str], str]] = {}
        for folder, names in jsons.items():
            items = []
            for n in names:
                if not n.endswith(".json"):
                    continue
                if not folder and n in ("dataset_description.json", "participants.json"):
                    continue
                relpath = f"{folder}/{n}" if folder else n
                ents = parser.parse(relpath)
                suffix = ents.pop("suffix", None)
                for k in ("extension", "datatype"):
                    ents.pop(k, None)
                items.append((relpath, suffix, ents))
            self._index[folder] = items

    def _load(self, relpath: str) -> dict[str, Any] | None:
        if relpath not in self._content:
            path = os.path.join(self.ds.root, relpath)
            try:
                if os.path.getsize(path) > SIDECAR_LIMIT:
                    self._content[relpath] = None
                    self.problems.append(Problem(path, "sidecar-too-large", f"{os.path.getsize(path):,} bytes, "
                                                 f"more than the {SIDECAR_LIMIT >> 20} MiB a sidecar may hold; "
                                                 "it was not read", "keep metadata in sidecars (large data belongs "
                                                 "in files of its own)", "warning", self.ds.key))
                    return None
                with open(path, "rb") as fh:
                    doc = json.loads(fh.read(SIDECAR_LIMIT + 1))
                if not isinstance(doc, dict):
                    raise ValueError("top level is not an object")
                if nesting_depth(doc) > MAX_DEPTH:
                    raise ValueError(f"nested deeper than {MAX_DEPTH} levels")
                self._content[relpath] = doc
            except RecursionError:
                self._content[relpath] = None
                self.problems.append(Problem(path, "bad-sidecar", f"nested deeper than {MAX_DEPTH} levels; its "
                                             "metadata was ignored", "write a flat JSON object", "warning",
                                             self.ds.key))
            except (ValueError, OSError) as exc:
                self._content[relpath] = None
                self.problems.append(Problem(path, "bad-sidecar", f"cannot parse JSON sidecar ({exc})",
                                             "fix the JSON syntax; its metadata was ignored",
                                             "warning", self.ds.key))
        return self._content[relpath]

    def _chain(self, folder: str):
        """Candidate sidecars for files in ``folder``: root first, each level by specificity.

        Returned as (generic, entity, buckets): with many candidates (a sidecar per map in a
        flat folder), those carrying the most discriminating entity are bucketed by its value,
        so a file looks only at the sidecars that can apply to it.
        """
        plan = self._chains.get(folder)
        if plan is None:
            levels = [""]
            parts = folder.split("/") if folder else []
            for i in range(len(parts)):
                levels.append("/".join(parts[: i + 1]))
            chain = []
            for level in levels:
                chain += sorted(self._index.get(level, ()), key=lambda c: (len(c[2]), c[0]))
            ranked = [(i,) + c for i, c in enumerate(chain)]
            plan = (ranked, None, {})
            if len(ranked) > 32:
                values: dict[str, set[str]] = {}
                for _, _, _, ents in ranked:
                    for k, v in ents.items():
                        values.setdefault(k, set()).add(v)
                best = max(values, key=lambda k: len(values[k]), default=None)
                if best is not None and len(values[best]) > 1:
                    buckets: dict[str, list] = {}
                    generic = []
                    for c in ranked:
                        if best in c[3]:
                            buckets.setdefault(c[3][best], []).append(c)
                        else:
                            generic.append(c)
                    plan = (generic, best, buckets)
            self._chains[folder] = plan
        return plan

    def resolve_full(self, relpath: str, entities: dict[str, str]
                     ) -> tuple[dict[str, Any], list[str], str]:
        """Merged metadata (shared, do not modify), sidecars used, and the metadata as JSON."""
        suffix = entities.get("suffix")
        folder = relpath.rsplit("/", 1)[0] if "/" in relpath else ""
        generic, best, buckets = self._chain(folder)
        cands = generic
        if best is not None:
            extra = buckets.get(entities.get(best), ())
            if extra:
                cands = sorted(generic + extra)  # back into chain order
        used = [rp for _, rp, suf, ents in cands
                if suf == suffix and all(entities.get(k) == v for k, v in ents.items())]
        key = tuple(used)
        hit = self._merged.get(key)
        if hit is None:
            merged: dict[str, Any] = {}
            for rp in used:
                doc = self._load(rp)
                if doc is not None:
                    merged.update(doc)
            hit = (merged, [rp for rp in used if self._content.get(rp) is not None],
                   json.dumps(merged, sort_keys=True, default=str))
            self._merged[key] = hit
        return hit

    def resolve(self, relpath: str, entities: dict[str, str]) -> tuple[dict[str, Any], list[str]]:
        """Merged metadata for a data file and the sidecars used, shallowest first."""
        merged, used, _ = self.resolve_full(relpath, entities)
        return dict(merged), list(used)


class ModelFiles:
    """The files a map's model left beside it: its mask and its design matrices.

    nilearn's writer puts ``<prefix>_mask.nii.gz`` and ``<prefix>_design.tsv`` next to the
    maps of a model, where ``<prefix>`` holds the model's entities (sub, ses, task, ...);
    a BIDS ``_mask`` with matching entities is read the same way.  A candidate applies to a
    map when its entities are a subset of the map's (``ses`` and ``run`` aside for designs: a
    model fit on several sessions and runs writes one design per run, and names its maps
    without them); the deepest folder, then the most specific candidates win.
    """

    def __init__(self, ds: DatasetInfo, listing: dict[str, list[str]], parser: EntityParser) -> None:
        self.ds = ds
        self._cands: dict[str, list[tuple[str, str, dict[str, str]]]] = {}
        for folder, names in listing.items():
            for n in names:
                kind = "mask" if n.endswith(("_mask.nii.gz", "_mask.nii")) else \
                    "surface-mask" if n.endswith("_mask.gii") else "design" if n.endswith("_design.tsv") else None
                if kind is None:
                    continue
                rel = f"{folder}/{n}" if folder else n
                ents = {k: v for k, v in parser.parse(rel).items()
                        if k not in ("suffix", "extension", "datatype")}
                self._cands.setdefault(folder, []).append((kind, rel, ents))
        self._dof: dict[tuple[str, ...], tuple[float | None, str | None]] = {}

    def _find(self, kind: str, relpath: str, entities: dict[str, str]) -> list[str]:
        if not self._cands:
            return []
        folder = relpath.rsplit("/", 1)[0] if "/" in relpath else ""
        parts = folder.split("/") if folder else []
        for depth in range(len(parts), -1, -1):
            level = "/".join(parts[:depth])
            hits = []
            for k, rel, ents in self._cands.get(level, ()):
                if k != kind:
                    continue
                own = dict(ents)
                if kind == "design":  # a model over sessions and runs: one design per run, the map names neither
                    if any(own.get(k) is not None and entities.get(k) not in (None, own[k]) for k in ("ses", "run")):
                        continue
                    own.pop("ses", None)
                    own.pop("run", None)
                if all(entities.get(key) == v for key, v in own.items()):
                    hits.append((len(own), rel))
            if hits:
                best = max(n for n, _ in hits)
                return sorted(rel for n, rel in hits if n == best)
        return []

    def mask_for(self, relpath: str, entities: dict[str, str], surface: bool = False) -> str | None:
        """Relative path of the model's mask for a map (``_mask.gii`` of its hemisphere for a surface map)."""
        found = self._find("surface-mask" if surface else "mask", relpath, entities)
        return found[0] if found else None

    def design_rows(self, relpath: str, entities: dict[str, str]) -> int | None:
        """Rows of the design matrix beside a map (a group model's inputs: one row per map it pooled)."""
        designs = self._find("design", relpath, entities)
        if len(designs) != 1:
            return None
        try:
            with open(os.path.join(self.ds.root, designs[0]), encoding="utf-8") as fh:
                n = sum(1 for line in fh if line.strip()) - 1
        except (OSError, UnicodeDecodeError):
            return None
        return n if n > 0 else None

    def design_dof(self, relpath: str, entities: dict[str, str]) -> tuple[float | None, str | None, str | None]:
        """Residual degrees of freedom from the design matrices beside a map.

        DOF = rows - rank(X), summed over the runs of a fixed-effects model: the ordinary
        least-squares convention, and what nilearn computes (``RegressionResults.df_residuals``;
        its fixed-effects contrasts add the runs' DOF).  Returns (dof, designs used, problem).
        """
        designs = tuple(self._find("design", relpath, entities))
        if not designs:
            return None, None, None
        hit = self._dof.get(designs)
        if hit is None:
            total, why = 0.0, None
            for rel in designs:
                path = os.path.join(self.ds.root, rel)
                try:
                    import numpy as np

                    x = np.loadtxt(path, delimiter="\t", skiprows=1, ndmin=2, dtype=np.float64)
                    if x.size == 0 or not np.all(np.isfinite(x)):
                        raise ValueError("empty, or a value that is not a finite number")
                    total += x.shape[0] - int(np.linalg.matrix_rank(x))
                except (OSError, ValueError) as exc:
                    why = f"{path}: cannot read the design matrix ({exc})"
                    break
            hit = (None, why) if why else (total if total > 0 else None, None)
            self._dof[designs] = hit
        return hit[0], ",".join(designs), hit[1]


def read_participants(ds: DatasetInfo) -> tuple[list[dict[str, Any]], str | None, list[Problem]]:
    """Rows of participants.tsv, 'n/a' as None.

    Looked up in the dataset, then its raw dataset (the one enclosing it, or the one its
    ``SourceDatasets`` names), then the other datasets ``SourceDatasets`` names.
    """
    candidates = [Path(ds.root) / "participants.tsv"]
    for other in [ds.raw_root, *ds.source_roots]:
        if other and Path(other) / "participants.tsv" not in candidates:
            candidates.append(Path(other) / "participants.tsv")
    for f in candidates:
        if not f.exists():
            continue
        if not is_regular(f):
            return [], str(f), [Problem(str(f), "not-a-regular-file", "participants.tsv is not a regular file; it "
                                        "was not opened", "replace it with the TSV file itself", "warning", ds.key)]
        try:
            size = f.stat().st_size
            if size > PARTICIPANTS_LIMIT:
                return [], str(f), [Problem(str(f), "participants-too-large", f"{size:,} bytes, more than the "
                                            f"{PARTICIPANTS_LIMIT >> 20} MiB a participants table may hold; it was "
                                            "not read", "keep one row per participant and the columns you use",
                                            "warning", ds.key)]
            with open(f, newline="", encoding="utf-8") as fh:
                reader = csv.DictReader(fh, delimiter="\t")
                if reader.fieldnames and len(reader.fieldnames) > PARTICIPANTS_COLUMNS:
                    return [], str(f), [Problem(str(f), "participants-too-wide", f"{len(reader.fieldnames):,} "
                                                f"columns, more than the {PARTICIPANTS_COLUMNS:,} a participants "
                                                "table may have; it was not read", "keep the columns you use "
                                                "(phenotypes belong in phenotype/ files)", "warning", ds.key)]
                if not reader.fieldnames or "participant_id" not in reader.fieldnames:
                    return [], str(f), [Problem(str(f), "bad-participants",
                                                "participants.tsv has no participant_id column",
                                                "add a participant_id column (sub-<label>)",
                                                "warning", ds.key)]
                rows = []
                for row in reader:
                    clean = {k.strip(): (None if v is None or v.strip() in ("", "n/a") else v.strip())
                             for k, v in row.items() if k is not None}
                    rows.append(clean)
                return rows, str(f), []
        except (OSError, UnicodeDecodeError, csv.Error) as exc:
            return [], str(f), [Problem(str(f), "bad-participants", f"cannot read participants.tsv ({exc})",
                                        "save it as UTF-8, tab-separated", "warning", ds.key)]
    return [], None, []




def _given_file(path: str | os.PathLike[str], error: type[Exception]) -> dict[str, Any]:
    """A user file as the store keeps it for rebuilds: its name, hash and parsed content (JSON-able)."""
    f = load_user_file(path, error)
    data = Path(path).read_bytes()
    return {"file": Path(path).name, "sha256": hashlib.sha256(data).hexdigest(),
            "content": json.loads(json.dumps(f.doc, default=str))}
