"""What a map's neighbours say: JSON sidecars (by the BIDS inheritance principle: every JSON file in the
map's folder or a parent folder whose entities are a subset of the map's and whose suffix matches
applies, the deeper overriding the shallower), the model's own files, participants.tsv and the user's
origins file.
"""

from __future__ import annotations

import csv
import fnmatch
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..errors import RulesError
from ..formats import MAX_DEPTH, nesting_depth
from ..formats import check_user_doc, load_user_file
from ..store import Problem

from ._datasets import DatasetInfo
from ._names import SIDECAR_LIMIT, EntityParser, _given_file, is_regular

__all__ = ['MetadataOverrides', 'ModelFiles', 'PARTICIPANTS_COLUMNS', 'PARTICIPANTS_LIMIT', 'SidecarResolver', 'read_participants']


# what a dataset's own files may hold before they are reported and skipped (far above real ones)


PARTICIPANTS_LIMIT = 64 << 20  # bytes of participants.tsv


PARTICIPANTS_COLUMNS = 2_000


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
