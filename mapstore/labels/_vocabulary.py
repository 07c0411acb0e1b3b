"""Concept vocabularies and the rules that label maps with concepts.

A vocabulary file (YAML or JSON; its schema: ``mapstore schema vocabulary``)::

    vocabulary: my-concepts            # a name
    version: "3"
    inherit_broader: false             # label maps with broader concepts too
    concepts:
      perception: {description: ...}
      visual-motion: {broader: [perception]}
    rules:
      - task: driftdots                # exact name
        contrast: "coherent*"          # glob (contains * ? or [)
        concepts: [visual-motion]
      - dataset: "inkwell*"
        contrast: {regex: "^words.*"}  # regular expression (full match)
        concepts: [reading]

Every rule that matches a map adds its concepts (several per map are fine).
Rule fields ``dataset``, ``study``, ``task``, ``contrast`` and ``stat`` take one
pattern or a list of patterns (any may match); a rule needs at least one of them.
"""

from __future__ import annotations

import fnmatch
import hashlib
import os
import re
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from ..formats import check_user_doc, format_key_path, load_user_file, plural, safe_regex
from ..errors import VocabularyError
from ..store import LABELS_SCHEMA, LabelsEntry, arrow_to_json_schema
from ..store import (
    Catalog,
    commit_head,
    leased_files,
    new_snapshot_id,
    read_head,
    write_json_atomic,
    write_lock,
    write_parquet_atomic,
)

__all__ = ["Vocabulary", "LabelReport", "load_vocabulary", "apply_vocabulary", "label_store",
           "refresh_labels", "LABELS_SCHEMA", "json_schemas"]

RULE_FIELDS = ("dataset", "study", "task", "contrast", "stat")


@dataclass(frozen=True)
class _Pattern:
    text: str
    kind: str  # exact | glob | regex
    rx: re.Pattern[str] | None = None

    def match(self, value: str | None) -> bool:
        if value is None:
            return False
        if self.kind == "exact":
            return value == self.text
        if self.kind == "glob":
            return fnmatch.fnmatchcase(value, self.text)
        return self.rx.fullmatch(value) is not None


@dataclass
class Vocabulary:
    """A parsed, validated vocabulary."""

    name: str
    version: str | None
    concepts: dict[str, dict[str, Any]]
    rules: list[dict[str, Any]]
    inherit_broader: bool
    sha256: str
    source: str
    document: dict[str, Any] = field(repr=False, default_factory=dict)

    def broader_closure(self, concept: str) -> list[str]:
        """All broader concepts of ``concept``, nearest first."""
        out: list[str] = []
        todo = list(self.concepts[concept].get("broader", []))
        while todo:
            c = todo.pop(0)
            if c not in out:
                out.append(c)
                todo += self.concepts[c].get("broader", [])
        return out


def load_vocabulary(path: str | os.PathLike[str]) -> Vocabulary:
    """Read and validate a vocabulary file.

    The structure is checked against the shipped ``vocabulary.schema.json``; what a schema
    cannot say (broader concepts that exist, no cycles, rules naming defined concepts,
    regular expressions that compile) is checked here.

    Raises
    ------
    VocabularyError
        Naming the file, the key (and line, for YAML), what is wrong and what is allowed.
    """
    f = load_user_file(path, VocabularyError, "vocabulary file")
    check_user_doc(f, "vocabulary", VocabularyError)
    p, doc = f.path, f.doc

    def fail(path_: tuple, msg: str) -> None:
        line = f.lines.get(path_)
        where = f" (line {line})" if line else ""
        raise VocabularyError(f"{p}: {format_key_path(path_)}{where}: {msg}")

    clean = _check_concepts(doc["concepts"], fail)
    compiled = _check_rules(doc["rules"], clean, fail)
    return Vocabulary(
        name=str(doc.get("vocabulary") or p.stem), version=None if doc.get("version") is None else str(doc["version"]),
        concepts=clean, rules=compiled, inherit_broader=doc.get("inherit_broader", False),
        sha256=hashlib.sha256(f.raw).hexdigest(), source=str(p), document=doc,
    )


def _check_concepts(concepts: dict[str, Any], fail) -> dict[str, dict[str, Any]]:
    """The concepts with their broader lists; unknown broader concepts and cycles are refused."""
    clean: dict[str, dict[str, Any]] = {}
    for name, spec in concepts.items():
        spec = spec or {}
        broader = spec.get("broader", [])
        clean[name] = {**spec, "broader": [broader] if isinstance(broader, str) else list(broader)}
    for name, spec in clean.items():
        for i, b in enumerate(spec["broader"]):
            if b not in clean:
                fail(("concepts", name, "broader", i), f"unknown concept {b!r}; define it under 'concepts'")
    state: dict[str, int] = {}  # 1: on the current path, 2: done
    for start in clean:  # depth first without recursion: a chain of thousands of broader links is fine
        if state.get(start):
            continue
        path, stack = [start], [iter(clean[start]["broader"])]
        state[start] = 1
        while stack:
            nxt = next(stack[-1], None)
            if nxt is None:
                state[path.pop()] = 2
                stack.pop()
            elif state.get(nxt) == 1:
                trail = path[path.index(nxt):] + [nxt]
                fail(("concepts", nxt, "broader"), "broader concepts form a cycle: " + " -> ".join(trail[:20])
                     + (" -> ..." if len(trail) > 20 else ""))
            elif not state.get(nxt):
                state[nxt] = 1
                path.append(nxt)
                stack.append(iter(clean[nxt]["broader"]))
    return clean


def _check_rules(rules: list[dict[str, Any]], clean: dict[str, dict[str, Any]], fail) -> list[dict[str, Any]]:
    """The rules compiled to patterns per match field; concepts they name must be defined."""
    compiled = []
    for i, rule in enumerate(rules):
        where = ("rules", i)
        cs = rule["concepts"]
        cs = [cs] if isinstance(cs, str) else cs
        for j, c in enumerate(cs):
            if c not in clean:
                near = [k for k in clean if k.lower().startswith(str(c)[:3].lower())][:3]
                hint = f"; did you mean {', '.join(near)}?" if near else ""
                fail(where + ("concepts", j), f"unknown concept {c!r}{hint}")
        match: dict[str, list[_Pattern]] = {}
        for k in RULE_FIELDS:
            if k not in rule:
                continue
            listed = isinstance(rule[k], list)
            vals = rule[k] if listed else [rule[k]]
            pats = []
            for j, v in enumerate(vals):
                at = where + ((k, j) if listed else (k,))
                pats.append(_pattern(v, lambda msg, at=at: fail(at, msg)))
            match[k] = pats
        compiled.append({"match": match, "concepts": list(cs), "index": i})
    return compiled


def _pattern(v: Any, fail) -> _Pattern:
    if isinstance(v, dict):
        if set(v) != {"regex"} or not isinstance(v["regex"], str):
            fail("a pattern object must be {regex: '...'}")
        try:
            return _Pattern(v["regex"], "regex", safe_regex(v["regex"], "pattern", ValueError))
        except ValueError as exc:
            why = str(exc).split(": ", 1)[1]
            fail(f"invalid regular expression {v['regex']!r} ({why[len('invalid regex ('):-1]})"
                 if why.startswith("invalid regex (") else why)
    if not isinstance(v, (str, int)):
        fail(f"expected a name, a glob or {{regex: ...}}, got {type(v).__name__}")
    s = str(v)
    return _Pattern(s, "glob" if any(ch in s for ch in "*?[") else "exact")


@dataclass
class LabelReport:
    """What applying a vocabulary did."""

    vocabulary: str
    sha256: str
    n_maps: int
    n_labelled: int
    n_labels: int
    unmatched_contrasts: list[dict[str, Any]]
    unused_rules: list[int]
    per_concept: dict[str, int]

    def summary(self) -> str:
        lines = [f"vocabulary {self.vocabulary!r} (sha256 {self.sha256[:12]}): {self.n_labelled} of {self.n_maps} "
                 f"maps labelled, {self.n_labels} labels",
                 "per concept: " + ", ".join(f"{k} {v}" for k, v in sorted(self.per_concept.items()))]
        if self.unmatched_contrasts:
            lines.append(f"{len(self.unmatched_contrasts)} contrast(s) no rule matched:")
            for u in self.unmatched_contrasts[:10]:
                lines.append(f"  {u['dataset']}: task {u['task']}, contrast {u['contrast']} ({plural(u['maps'], 'map')})")
            if len(self.unmatched_contrasts) > 10:
                lines.append("  ...")
        if self.unused_rules:
            lines.append(f"rules that matched nothing: {', '.join(f'rules[{i}]' for i in self.unused_rules)}")
        return "\n".join(lines)


def apply_vocabulary(vocab: Vocabulary, maps: pa.Table, inherit_broader: bool | None = None
                     ) -> tuple[pa.Table, LabelReport]:
    """Label the contrast maps of a catalog table; returns the labels table and a report.

    Model maps (a stat without a contrast: residuals, fit) describe a model, not a condition,
    and are not labelled.
    """
    inherit = vocab.inherit_broader if inherit_broader is None else inherit_broader
    if "map_kind" in maps.column_names:
        import pyarrow.compute as pc

        maps = maps.filter(pc.fill_null(pc.not_equal(maps["map_kind"], "model"), True))
    cols = {k: maps[k].to_pylist() for k in ("map_id", "dataset", "study", "task", "contrast", "stat")}
    # rules look at a handful of columns: decide once per distinct combination
    combos: dict[tuple, list[int]] = {}
    for i, key in enumerate(zip(cols["dataset"], cols["study"], cols["task"], cols["contrast"], cols["stat"])):
        combos.setdefault(key, []).append(i)
    used = [False] * len(vocab.rules)
    out = {"map_id": [], "concept": [], "direct": [], "rule": []}  # type: ignore[var-annotated]
    unmatched = []
    labelled = set()
    for (dataset, study, task, contrast, stat), rows in combos.items():
        values = {"dataset": dataset, "study": study, "task": task, "contrast": contrast, "stat": stat}
        hits: dict[str, tuple[bool, int]] = {}
        for r, rule in enumerate(vocab.rules):
            if all(any(p.match(values[k]) for p in pats) for k, pats in rule["match"].items()):
                used[r] = True
                for c in rule["concepts"]:
                    if c not in hits or not hits[c][0]:
                        hits[c] = (True, rule["index"])
                    if inherit:
                        for b in vocab.broader_closure(c):
                            hits.setdefault(b, (False, rule["index"]))
        if not hits:
            unmatched.append({"dataset": dataset, "task": task, "contrast": contrast, "stat": stat,
                              "maps": len(rows)})
            continue
        for i in rows:
            labelled.add(i)
            for c, (direct, r) in sorted(hits.items()):
                out["map_id"].append(cols["map_id"][i])
                out["concept"].append(c)
                out["direct"].append(direct)
                out["rule"].append(r)
    # the report counts contrasts, not contrast x stat
    merged: dict[tuple, dict[str, Any]] = {}
    for u in unmatched:
        k = (u["dataset"], u["task"], u["contrast"])
        if k in merged:
            merged[k]["maps"] += u["maps"]
        else:
            merged[k] = {"dataset": u["dataset"], "task": u["task"], "contrast": u["contrast"], "maps": u["maps"]}
    table = pa.table({**{k: pa.array(v) for k, v in out.items() if k != "rule"},
                      "rule": pa.array(out["rule"], pa.int32()),
                      "vocabulary_sha256": pa.array([vocab.sha256] * len(out["map_id"]), pa.string())},
                     schema=LABELS_SCHEMA)
    per: dict[str, int] = {}
    for c in out["concept"]:
        per[c] = per.get(c, 0) + 1
    report = LabelReport(vocab.name, vocab.sha256, maps.num_rows, len(labelled), table.num_rows,
                         sorted(merged.values(), key=lambda u: (u["dataset"], str(u["task"]), str(u["contrast"]))),
                         [i for i, u in enumerate(used) if not u], per)
    return table, report


def json_schemas() -> dict[str, dict[str, Any]]:
    table = arrow_to_json_schema("labels", LABELS_SCHEMA, "One concept of one map (the 'labels' view).",
                                 {"direct": "assigned by a rule (false: inherited from a narrower concept)",
                                  "rule": "index of the rule in the vocabulary",
                                  "vocabulary_sha256": "SHA-256 of the vocabulary file as given"})
    pattern = {"oneOf": [{"type": "string"}, {"type": "integer"},
                         {"type": "object", "required": ["regex"], "additionalProperties": False,
                          "properties": {"regex": {"type": "string"}}}],
               "x-messages": {"oneOf": "expected a name, a glob or {regex: ...}"}}
    patterns = {"oneOf": [pattern, {"type": "array", "items": pattern, "minItems": 1}],
                "x-messages": {"oneOf": "expected a name, a glob or {regex: ...}, or a list of them"}}
    names = {"oneOf": [{"type": "string"}, {"type": "array", "items": {"type": "string"}, "minItems": 1}]}
    concepts_msg = "expected a non-empty object of concept names"
    rules_msg = "expected a non-empty list of rules"
    return {"labels.schema.json": table, "vocabulary.schema.json": {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": "https://mapstore.invalid/schemas/vocabulary.schema.json",
        "$comment": "x-messages: the message mapstore prints when the keyword named fails",
        "title": "mapstore concept vocabulary",
        "description": "Concepts (with optional broader concepts) and rules assigning them to maps by "
                       "dataset, study, task, contrast and stat. A pattern is an exact name, a glob "
                       "(with * ? or [) or {regex: ...} (full match).",
        "type": "object",
        "required": ["concepts", "rules"],
        "additionalProperties": False,
        "x-messages": {"type": "expected an object with 'concepts' and 'rules'"},
        "properties": {
            "vocabulary": {"type": "string"},
            "version": {"type": ["string", "number"]},
            "description": {"type": "string"},
            "inherit_broader": {"type": "boolean", "x-messages": {"type": "expected true or false"}},
            "concepts": {
                "type": "object", "minProperties": 1,
                "x-messages": {"type": concepts_msg, "minProperties": concepts_msg, "required": concepts_msg},
                "propertyNames": {"pattern": "^[A-Za-z0-9][A-Za-z0-9 _.:/+-]*$", "x-messages": {
                    "pattern": "concept names are letters, digits and - _ . : / + (starting with a letter or digit)"}},
                "additionalProperties": {
                    "type": ["object", "null"], "additionalProperties": False,
                    "x-messages": {"type": "expected an object (broader, description, label)"},
                    "properties": {"broader": {**names, "x-messages": {
                                       "oneOf": "expected a concept name or a list of them"}},
                                   "description": {"type": "string"}, "label": {"type": "string"}}}},
            "rules": {"type": "array", "minItems": 1,
                      "x-messages": {"type": rules_msg, "minItems": rules_msg, "required": rules_msg},
                      "items": {
                          "type": "object", "required": ["concepts"], "additionalProperties": False,
                          "anyOf": [{"required": [k]} for k in RULE_FIELDS],
                          "x-messages": {"type": "expected an object with match fields and 'concepts'",
                                         "anyOf": f"a rule must match on at least one of {', '.join(RULE_FIELDS)}"},
                          "properties": {**{k: patterns for k in RULE_FIELDS},
                                         "concepts": {**names, "x-messages": {
                                             "oneOf": "expected a concept name or a non-empty list of them",
                                             "required": "expected a concept name or a non-empty list of them"}},
                                         "note": {"type": "string"}}}},
        },
    }}


def label_store(store: str | os.PathLike[str], vocabulary: str | os.PathLike[str],
                inherit_broader: bool | None = None) -> LabelReport:
    """Apply a vocabulary to a store's catalog and publish the ``labels`` table.

    The vocabulary file is copied into the store, so the labels stay reproducible
    (and are re-derived for a newer catalog) even if the file changes later.
    """
    cat = Catalog(store)
    cat.require_catalog()  # the store first: a vocabulary cannot help an empty store
    vocab = load_vocabulary(vocabulary)
    with write_lock(cat.path):
        head = read_head(cat.path)
        cat = Catalog(cat.path)
        table, report = apply_vocabulary(vocab, _label_columns(cat), inherit_broader)
        snap = new_snapshot_id()
        folder = cat.path / "labels"
        folder.mkdir(exist_ok=True)
        rel = f"labels/labels-{snap}.parquet"
        write_parquet_atomic(table, cat.path / rel)
        copy = folder / f"vocabulary-{vocab.sha256[:16]}.json"
        if not copy.exists():  # written atomically: a crash must not leave half a vocabulary behind
            write_json_atomic(copy, vocab.document)
        old = head.labels
        head.labels = LabelsEntry(
            table=rel, vocabulary=vocab.name, version=vocab.version, sha256=vocab.sha256, source=vocab.source,
            copy=str(copy.relative_to(cat.path)),
            inherit_broader=vocab.inherit_broader if inherit_broader is None else inherit_broader,
            catalog=head.catalog, concepts=sorted(vocab.concepts))
        commit_head(cat.path, head, {"event": "labels", "vocabulary": vocab.name, "sha256": vocab.sha256,
                                     "labels": table.num_rows})
        if old and old.table and old.table != rel and \
                old.table not in {d.get("labels") for d in leased_files(cat.path)}:
            (cat.path / old.table).unlink(missing_ok=True)
    return report


def _label_columns(cat: Catalog) -> pa.Table:
    return cat.sql(f"SELECT map_id, map_kind, {', '.join(RULE_FIELDS)} FROM maps")


def refresh_labels(cat: Catalog, entry: LabelsEntry) -> pa.Table:
    """Labels for the current catalog from the stored vocabulary copy (when the catalog is newer)."""
    doc_path = cat.path / entry.copy
    vocab = load_vocabulary(doc_path)
    vocab.sha256 = entry.sha256  # the hash of the file as the user gave it
    table, _ = apply_vocabulary(vocab, _label_columns(cat), entry.inherit_broader)
    return table
