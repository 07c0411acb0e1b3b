"""Name rules: BIDS entities from file names (pybids' patterns plus the statistical-derivative entities), the
user's and the presets' rules for other names, and what a name that no rule takes looks like.
"""

from __future__ import annotations

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
from ..formats import DATA_EXTENSIONS, FOREIGN_EXTENSIONS, safe_regex
from ..statkinds import COMPANION_WORDS, STAT_KINDS, kind_for_word, known_stats, stat_kind
from ..formats import check_user_doc, load_user_file
from ..store import Problem
from ._layouts import h5_field_strings, h5_struct, is_matlab_hdf5


__all__ = ['ALNUM', 'COMPANION_SUFFIXES', 'DATA_HALVES', 'EXTRA_ENTITIES', 'EntityParser', 'LABEL', 'MAP_EXTENSIONS', 'NameRules', 'OTHER_IMAGE_EXTENSIONS', 'STAT_SUFFIX', 'builtin_rules', 'fill_template', 'label_problems', 'name_ending', 'name_form', 'split_map_name', 'suggested_rule', 'is_regular', 'unicode_labels']


STAT_SUFFIX = "statmap"
SIDECAR_LIMIT = 16 << 20  # bytes of a JSON sidecar


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


def is_regular(path: str | os.PathLike[str]) -> bool:
    """True for a regular file (symlinks followed); never opens the path."""
    try:
        return stat.S_ISREG(os.stat(path).st_mode)
    except OSError:
        return False


def _given_file(path: str | os.PathLike[str], error: type[Exception]) -> dict[str, Any]:
    """A user file as the store keeps it for rebuilds: its name, hash and parsed content (JSON-able)."""
    f = load_user_file(path, error)
    data = Path(path).read_bytes()
    return {"file": Path(path).name, "sha256": hashlib.sha256(data).hexdigest(),
            "content": json.loads(json.dumps(f.doc, default=str))}
