"""What a map's place says about it: its level, its subject, and the names its writer kept elsewhere.

A map's *level* is whom it summarises: one ``run``, one ``session``, one ``subject`` (the three are
one person's), a ``group`` of people, or ``unknown`` (no subject and no sign of a group model).
It comes from, first found:

1. what the user said (a name rule's ``entities: {level: ...}``, an origins file's ``level``);
2. the writer's layout: a FEAT higher-level folder (``.gfeat``: ``subject`` when its inputs are one
   person's runs, else ``group``), an SPM folder whose ``SPM.mat`` lists contrast images as its
   inputs (a second-level design), a BIDS Stats Models ``node-<name>/`` folder (the node's
   ``Level`` in a ``*_smdl.json`` model file, else its name), a folder named like a group analysis
   (``group``, ``second_level``, ...), a FEAT first-level folder (``run``);
3. the entities: ``run`` -> run, ``ses`` -> session, ``sub`` -> subject; no subject -> unknown.

Layout facts are facts of the trade, from memory of each program's outputs (FEAT: ``design.fsf``
``set feat_files(i) "..."`` and ``set fmri(level) N``, ``design.con`` ``/ContrastNameN``; SPM:
``SPM.mat`` ``SPM.xCon(i).name``/``.STAT``, ``SPM.xX.erdf``, ``SPM.xX.name``, ``SPM.xY.P``).
"""

from __future__ import annotations

import json
import os
import re
from dataclasses import dataclass, field
from typing import Any

from ..statkinds import LEVELS, kind_for_word
from ..store import Problem

__all__ = ["LayoutFacts", "LayoutReader", "level_from_entities", "subject_from_path", "GROUP_FOLDERS", "read_spm_mat",
           "h5_field_strings", "h5_struct", "is_matlab_hdf5"]

# folder names that say "a group model's outputs" (common practice; compared lower-case without - and _)
GROUP_FOLDERS = {"group", "groups", "grouplevel", "secondlevel", "2ndlevel", "level2", "higherlevel",
                 "dataset", "datasetlevel", "population", "randomeffects", "rfx"}
_SUBJECT_DIR = re.compile(r"^(?:sub|subj|subject|participant|s)[-_]?(\d+[A-Za-z0-9]*)$", re.IGNORECASE)
_RUN_IN_NAME = re.compile(r"(?:^|[-_.])run[-_]?(\d+)(?:[-_.]|$)", re.IGNORECASE)
_STAT_FILE = re.compile(r"^([A-Za-z]+?)_?(\d+)$")
_MAX_TEXT = 4 << 20  # a design file larger than this is not a design file


@dataclass
class LayoutFacts:
    """What the layout adds to a map's row."""

    level: str | None = None
    n_inputs: int | None = None
    group_contrast: str | None = None
    dof: float | None = None
    dof_source: str | None = None
    dof_numerator: float | None = None  # an F-test's rank (FEAT: the contrasts design.fts puts in it)
    entities: dict[str, str] = field(default_factory=dict)  # set on the map (contrast, sub, run)
    problems: list[Problem] = field(default_factory=list)


def level_from_entities(entities: dict[str, Any]) -> str:
    """run, session or subject from the entities; unknown without a subject.

    >>> level_from_entities({"sub": "01", "run": "2"}), level_from_entities({"sub": "01"}), level_from_entities({})
    ('run', 'subject', 'unknown')
    """
    if not entities.get("sub"):
        return "unknown"
    if entities.get("run"):
        return "run"
    if entities.get("ses"):
        return "session"
    return "subject"


def subject_from_path(relpath: str, digit_folders: set[str] | frozenset[str] = frozenset()) -> str | None:
    """The subject label a non-BIDS path names by a folder (``subj07``, ``sub07``, ``s07``,
    ``subject_07``), or a folder of digits among sibling folders of digits (``digit_folders``).

    >>> subject_from_path("subj07/run1.feat/stats/cope1.nii.gz"), subject_from_path("group/x.nii")
    ('07', None)
    """
    parts = relpath.split("/")[:-1]
    for p in parts:
        m = _SUBJECT_DIR.match(p)
        if m:
            return m.group(1)
    for i, p in enumerate(parts):
        if p.isdigit() and "/".join(parts[:i + 1]) in digit_folders:
            return p
    return None


def _norm(name: str) -> str:
    return name.lower().replace("-", "").replace("_", "")


def _level_word(name: str) -> str | None:
    n = _norm(name)
    if n in GROUP_FOLDERS or n.startswith(("dataset", "group")):
        return "group"
    for word, level in (("run", "run"), ("session", "session"), ("subject", "subject")):
        if word in n:
            return level
    return None


def _read_text(path: str) -> str | None:
    try:
        if os.path.getsize(path) > _MAX_TEXT:
            return None
        with open(path, encoding="utf-8", errors="replace") as fh:
            return fh.read()
    except OSError:
        return None


def _con_names(text: str | None) -> dict[int, str]:
    out = {}
    for m in re.finditer(r"^/ContrastName(\d+)[ \t]+(.+?)[ \t]*$", text or "", re.M):
        out[int(m.group(1))] = m.group(2)
    return out


class LayoutReader:
    """Reads the writers' files around a dataset's maps, once per folder."""

    def __init__(self, root: str, dataset: str, model_files: dict[str, list[str]] | None = None,
                 index_root: str | None = None) -> None:
        self.root, self.dataset = root, dataset
        self.index_root = index_root or root  # design files may name inputs anywhere below it, never outside
        self._cache: dict[str, Any] = {}
        self._nodes = self._node_levels(model_files or {})

    # --- BIDS Stats Models -------------------------------------------------------------------
    def _node_levels(self, listing: dict[str, list[str]]) -> dict[str, str]:
        """Node name -> level, from the ``*_smdl.json`` model files the walk listed."""
        out: dict[str, str] = {}
        for folder, names in listing.items():
            for n in names:
                if not n.endswith("smdl.json"):
                    continue
                text = _read_text(os.path.join(self.root, folder, n))
                try:
                    doc = json.loads(text or "")
                except ValueError:
                    continue
                nodes = doc.get("Nodes") if isinstance(doc, dict) else None
                for node in nodes if isinstance(nodes, list) else ():
                    if isinstance(node, dict) and isinstance(node.get("Name"), str):
                        level = _level_word(str(node.get("Level", "")))
                        if level:
                            out[node["Name"]] = level
        return out

    # --- the whole -----------------------------------------------------------------------------
    def facts(self, relpath: str, entities: dict[str, str], given: str | None = None,
              digit_folders: set[str] | frozenset[str] = frozenset()) -> LayoutFacts:
        """The layout's facts about one map; ``entities`` are the map's (not changed here)."""
        parts = relpath.split("/")
        out = LayoutFacts()
        if not entities.get("sub"):
            sub = subject_from_path(relpath, digit_folders)
            if sub:
                out.entities["sub"] = sub
        feat, spm, node, group_folder = self._folder(parts[:-1])
        if feat is not None:
            self._feat(parts, feat, entities, out)
        elif spm:
            self._spm(parts, entities, out)
        layout = out.level  # what a writer's own files said (FEAT, SPM)
        if layout is None:
            # a node folder's level; a folder named like a group analysis, for maps named for no subject
            layout = node or ("group" if group_folder and not entities.get("sub") else None)
        if given:
            out.level = given
        else:
            out.level = layout or level_from_entities({**entities, **out.entities})
        assert out.level in LEVELS
        return out

    def _folder(self, parts: list[str]) -> tuple[int | None, bool, str | None, bool]:
        """What a map's folder says, read once per folder: the last .feat step, an SPM.mat beside it, the
        level of a node- folder, a folder named like a group analysis."""
        key = "/".join(parts)
        hit = self._cache.get("folder:" + key)
        if hit is None:
            feat = next((i for i in range(len(parts) - 1, -1, -1) if parts[i].endswith(".feat")), None)
            spm = feat is None and os.path.isfile(os.path.join(self.root, *parts, "SPM.mat"))
            node, group = None, False
            for p in parts:
                if p.startswith("node-"):
                    node = self._nodes.get(p[5:]) or _level_word(p[5:]) or node
                elif _norm(p) in GROUP_FOLDERS:
                    group = True
            hit = self._cache["folder:" + key] = (feat, spm, node, group)
        return hit

    # --- FEAT ----------------------------------------------------------------------------------
    def _feat(self, parts: list[str], i: int, entities: dict[str, str], out: LayoutFacts) -> None:
        feat_rel = "/".join(parts[:i + 1])
        name = parts[-1].split(".")[0]
        m = _STAT_FILE.match(name)
        word, number = (m.group(1), int(m.group(2))) if m else (name, None)
        kind = kind_for_word(word)
        if word.lower() in ("fstat", "zfstat") and number is not None:
            out.entities["contrast"] = f"ftest{number}"
            rows = self._fts(feat_rel)
            if 1 <= number <= len(rows) and rows[number - 1]:
                out.dof_numerator = float(rows[number - 1])
        elif kind is not None and kind.role == "model":
            if kind.label == "beta" and number is not None:
                out.entities["contrast"] = f"pe{number}"
        gfeat = i > 0 and parts[i - 1].endswith(".gfeat")
        if not gfeat:
            fsf = self._fsf(feat_rel)
            level = fsf.get("level")
            if level == "1":
                out.level = "run"  # a first-level FEAT analysis models one run
            elif level is not None:
                self._higher(feat_rel, fsf, out)
            run = _RUN_IN_NAME.search(parts[i][:-5])
            if run and not entities.get("run") and out.level == "run":
                out.entities["run"] = run.group(1)
            return
        gfeat_rel = "/".join(parts[:i])
        lower = re.fullmatch(r"cope(\d+)\.feat", parts[i])
        fsf = self._fsf(gfeat_rel)
        self._higher(gfeat_rel, fsf, out)
        if kind is not None and kind.role == "contrast" and number is not None and "contrast" not in out.entities:
            higher = _con_names(_read_text(os.path.join(self.root, feat_rel, "design.con"))) or \
                _con_names(_read_text(os.path.join(self.root, gfeat_rel, "design.con")))
            out.group_contrast = higher.get(number, f"contrast{number}")
        if lower is not None and "contrast" not in out.entities:
            n = int(lower.group(1))
            names = self._lower_names(gfeat_rel, fsf)
            if n in names:
                out.entities["contrast"] = names[n]
            else:
                out.entities["contrast"] = f"cope{n}"
                out.problems.append(Problem(os.path.join(self.root, *parts), "contrast-name-not-found",
                                            f"lower-level contrast {n}: no design.con of the inputs that "
                                            f"{gfeat_rel}/design.fsf lists was found; named cope{n}",
                                            "keep the first-level .feat folders the design.fsf names (or their "
                                            "design.con) beside the .gfeat", "warning", self.dataset))

    def _fts(self, rel: str) -> list[int]:
        """Per F-test of a FEAT design, how many contrasts it holds (the 1s of its design.fts row)."""
        key = "fts:" + rel
        if key not in self._cache:
            text = _read_text(os.path.join(self.root, rel, "design.fts")) or ""
            rows: list[int] = []
            if "/Matrix" in text:
                for line in text.split("/Matrix", 1)[1].splitlines():
                    vals = line.split()
                    if vals:
                        rows.append(sum(1 for v in vals if v.strip() not in ("0", "0.0", "0.000000e+00")))
            self._cache[key] = rows
        return self._cache[key]

    def _fsf(self, rel: str) -> dict[str, Any]:
        key = "fsf:" + rel
        if key not in self._cache:
            text = _read_text(os.path.join(self.root, rel, "design.fsf")) or ""
            level = re.search(r"^set fmri\(level\)\s+(\d+)", text, re.M)
            inputs = [m.group(2) for m in re.finditer(r'^set feat_files\((\d+)\)\s+"?([^"\n]*)"?', text, re.M)]
            self._cache[key] = {"level": level.group(1) if level else None, "inputs": inputs}
        return self._cache[key]

    def _higher(self, rel: str, fsf: dict[str, Any], out: LayoutFacts) -> None:
        """A higher-level model: one person's runs (subject) or several people (group)."""
        inputs = fsf["inputs"]
        subjects = {subject_from_path(p.strip("/") + "/x") for p in inputs}
        if inputs and len(subjects) == 1 and None not in subjects:
            out.level = "subject"
            out.entities.setdefault("sub", next(iter(subjects)))  # type: ignore[arg-type]
        else:
            out.level = "group"
        out.n_inputs = len(inputs) or None

    def _lower_names(self, gfeat_rel: str, fsf: dict[str, Any]) -> dict[int, str]:
        """Contrast names of the lower level: the design.con of the first input found."""
        key = "lower:" + gfeat_rel
        if key not in self._cache:
            names: dict[int, str] = {}
            for p in fsf["inputs"]:
                for cand in self._candidates(p, gfeat_rel):
                    names = _con_names(_read_text(os.path.join(cand, "design.con")))
                    if names:
                        break
                if names:
                    break
            self._cache[key] = names
        return self._cache[key]

    def _candidates(self, path: str, near: str) -> list[str]:
        """Where an input that design.fsf names may be now: as written, or the same trailing folders
        under the dataset root or beside the higher-level folder (the data moved since)."""
        parts = [p for p in path.replace("\\", "/").split("/") if p and p != "."]
        out = [path] if os.path.isabs(path) else []
        base = os.path.dirname(os.path.join(self.root, near))
        for k in range(len(parts)):
            tail = parts[k:]
            out += [os.path.join(self.root, *tail), os.path.join(base, *tail), os.path.join(self.index_root, *tail)]
        root = os.path.realpath(self.index_root)
        # only folders under the root the user named are read: a design file does not send the walk elsewhere
        return [c for c in out if os.path.realpath(c).startswith(root + os.sep) and os.path.isdir(c)]

    # --- SPM -----------------------------------------------------------------------------------
    def _spm(self, parts: list[str], entities: dict[str, str], out: LayoutFacts) -> None:
        folder = "/".join(parts[:-1])
        mat = self._spm_mat(folder)
        if mat.get("problem"):
            out.problems.append(Problem(os.path.join(self.root, folder, "SPM.mat"), "spm-mat-unreadable",
                                        mat["problem"], "save SPM.mat again (MATLAB -v7 or -v7.3)", "warning",
                                        self.dataset))
            return
        name = parts[-1].split(".")[0]
        m = re.fullmatch(r"([A-Za-z]+)_(\d{4})", name)
        if m:
            word, n = m.group(1), int(m.group(2))
            kind = kind_for_word(word)
            names = mat.get("regressors" if kind is not None and kind.label == "beta" else "contrasts") or []
            if "contrast_number" in entities:
                pass  # a name rule named it already (the preset reads SPM.xCon)
            elif 1 <= n <= len(names) and names[n - 1]:
                out.entities["contrast"] = str(names[n - 1]).strip()
                out.entities["contrast_number"] = m.group(2)
        if mat.get("erdf"):
            out.dof, out.dof_source = float(mat["erdf"]), "spm-mat"
        inputs = mat.get("inputs") or []
        if any(re.search(r"(?:^|[/\\])(?:con|ess|beta|spmT|spmF)_\d{4}", p) for p in inputs):
            subjects = {subject_from_path(p.replace("\\", "/").strip("/")) for p in inputs}
            if len(subjects) == 1 and None not in subjects:
                out.level = "subject"
            else:
                out.level = "group"
            out.n_inputs = len(inputs)

    def _spm_mat(self, folder: str) -> dict[str, Any]:
        key = "spm:" + folder
        if key not in self._cache:
            self._cache[key] = read_spm_mat(os.path.join(self.root, folder, "SPM.mat"))
        return self._cache[key]


_MAX_MAT = 512 << 20


def read_spm_mat(path: str) -> dict[str, Any]:
    """Contrast names, regressor names, residual DOF and input files of an ``SPM.mat``, MATLAB v5 (scipy)
    or v7.3 (HDF5, h5py); ``{"problem": why}`` when it cannot be read."""
    try:
        if os.path.getsize(path) > _MAX_MAT:
            return {"problem": f"SPM.mat is larger than {_MAX_MAT >> 20} MB; not read"}
    except OSError as exc:
        return {"problem": f"cannot read SPM.mat ({exc.strerror})"}
    try:
        if is_matlab_hdf5(path):
            return _spm_h5(path)
        return _spm_v5(path)
    except Exception as exc:  # noqa: BLE001  # a damaged MATLAB file raises many kinds of error
        if isinstance(exc, (KeyboardInterrupt, MemoryError)):
            raise
        return {"problem": f"cannot read SPM.mat ({type(exc).__name__}: {exc})"[:300]}


def _strings(node: Any) -> list[str]:
    import numpy as np

    if node is None:
        return []
    if isinstance(node, str):
        return [node]
    arr = np.asarray(node, dtype=object).reshape(-1) if not isinstance(node, (list, tuple)) else list(node)
    return [str(x).strip() if x is not None else "" for x in arr]


def _spm_v5(path: str) -> dict[str, Any]:
    from scipy.io import loadmat

    doc = loadmat(path, simplify_cells=True)
    spm = doc.get("SPM") or {}
    xcon = spm.get("xCon")
    items = xcon if isinstance(xcon, (list, tuple)) else [xcon] if isinstance(xcon, dict) else list(xcon or [])
    xx = spm.get("xX") or {}
    xy = spm.get("xY") or {}
    erdf = xx.get("erdf") if isinstance(xx, dict) else None
    return {"contrasts": [it.get("name") if isinstance(it, dict) else None for it in items],
            "regressors": _strings(xx.get("name") if isinstance(xx, dict) else None),
            "erdf": float(erdf) if erdf is not None and float(erdf) > 0 else None,
            "inputs": _strings(xy.get("P") if isinstance(xy, dict) else None)}


def _h5_text(f: Any, obj: Any) -> str:
    import numpy as np

    arr = np.asarray(obj[()])
    if arr.dtype.kind in "ui":  # MATLAB chars: uint16 codes, stored transposed
        return "".join(chr(int(c)) for c in arr.T.reshape(-1) if int(c))
    if arr.dtype.kind == "f" and arr.size:
        return str(arr.reshape(-1)[0])
    return str(arr)


def h5_field_strings(f: Any, group: Any, name: str) -> list[str]:
    """The strings of one field of a MATLAB v7.3 struct (array): a dataset of references to char
    arrays, a cell array, or a char matrix (one string per row)."""
    import h5py
    import numpy as np

    if group is None or not hasattr(group, "keys") or name not in group:
        return []
    ds = group[name]
    if ds.dtype == h5py.ref_dtype:
        return [_h5_text(f, f[r]) for r in np.asarray(ds[()]).reshape(-1)]
    arr = np.asarray(ds[()])
    if arr.ndim == 2 and arr.dtype.kind in "ui" and min(arr.shape) > 1:  # a char matrix, one string per row
        return ["".join(chr(int(c)) for c in row if int(c)).strip() for row in arr.T]
    return [_h5_text(f, ds)]


def h5_struct(f: Any, dotted: str) -> Any:
    """The group of a struct path (``SPM.xCon``) in a MATLAB v7.3 file, or None."""
    node = f
    for part in dotted.split("."):
        if not hasattr(node, "keys") or part not in node:
            return None
        node = node[part]
    return node


def is_matlab_hdf5(path: str) -> bool:
    try:
        with open(path, "rb") as fh:
            head = fh.read(520)
    except OSError:
        return False
    return b"MATLAB 7.3" in head[:128] or head[512:520] == b"\x89HDF\r\n\x1a\n"


def _spm_h5(path: str) -> dict[str, Any]:
    """MATLAB v7.3: an HDF5 file (MATLAB's layout, from memory: a struct array's field is a dataset of
    references, a char array uint16 codes)."""
    import h5py
    import numpy as np

    with h5py.File(path, "r") as f:
        xx = h5_struct(f, "SPM.xX")
        erdf = None
        if xx is not None and "erdf" in xx:
            erdf = float(np.asarray(xx["erdf"][()]).reshape(-1)[0])
        return {"contrasts": h5_field_strings(f, h5_struct(f, "SPM.xCon"), "name"),
                "regressors": h5_field_strings(f, xx, "name"),
                "erdf": erdf if erdf and erdf > 0 else None,
                "inputs": h5_field_strings(f, h5_struct(f, "SPM.xY"), "P")}
