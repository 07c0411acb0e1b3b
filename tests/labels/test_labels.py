"""Vocabulary validation, rule matching, the labels table."""

from __future__ import annotations

import json
import shutil

import pyarrow as pa
import pytest

import mapstore
from mapstore.errors import VocabularyError
from mapstore.labels._vocabulary import apply_vocabulary, load_vocabulary


def _maps(rows):
    cols = ("map_id", "dataset", "study", "task", "contrast", "stat")
    return pa.table({c: [r.get(c) for r in rows] for c in cols})


VOCAB = {
    "vocabulary": "t", "version": "1",
    "concepts": {"perception": {}, "vision": {"broader": "perception"}, "motion": {"broader": ["vision"]},
                 "hands": {}},
    "rules": [
        {"task": "dots", "contrast": "move*", "concepts": ["motion"]},
        {"dataset": "b*", "contrast": {"regex": "tap(Left|Right)"}, "concepts": "hands"},
        {"contrast": ["both", "also"], "concepts": ["hands", "vision"]},
        {"task": "never", "concepts": ["hands"]},
    ],
}


def test_rules_exact_glob_regex_and_multilabel(tmp_path):
    f = tmp_path / "v.json"
    f.write_text(json.dumps(VOCAB))
    vocab = load_vocabulary(f)
    maps = _maps([
        {"map_id": "1", "dataset": "a", "study": "a", "task": "dots", "contrast": "moveFast", "stat": "t"},
        {"map_id": "2", "dataset": "b1", "study": "b", "task": "x", "contrast": "tapLeft", "stat": "t"},
        {"map_id": "3", "dataset": "a", "study": "a", "task": "x", "contrast": "tapLeft", "stat": "t"},
        {"map_id": "4", "dataset": "a", "study": "a", "task": "x", "contrast": "both", "stat": "z"},
    ])
    table, report = apply_vocabulary(vocab, maps)
    got = {(r["map_id"], r["concept"], r["direct"]) for r in table.to_pylist()}
    assert got == {("1", "motion", True), ("2", "hands", True), ("4", "hands", True), ("4", "vision", True)}
    assert report.unused_rules == [3]
    assert report.unmatched_contrasts == [{"dataset": "a", "task": "x", "contrast": "tapLeft", "maps": 1}]
    table, _ = apply_vocabulary(vocab, maps, inherit_broader=True)
    got = {(r["map_id"], r["concept"], r["direct"]) for r in table.to_pylist()}
    assert ("1", "vision", False) in got and ("1", "perception", False) in got
    assert ("4", "vision", True) in got  # a direct label stays direct
    assert set(table["vocabulary_sha256"].to_pylist()) == {vocab.sha256}


@pytest.mark.parametrize("mutate, message", [
    (lambda d: d["rules"][0].update(concepts=["motoin"]), "rules[0].concepts[0] (line "),
    (lambda d: d["concepts"]["vision"].update(broader=["nothing"]), "unknown concept 'nothing'"),
    (lambda d: d["concepts"]["perception"].update(broader=["motion"]), "cycle"),
    (lambda d: d["rules"][1].update(contrast={"regex": "("}), "invalid regular expression"),
    (lambda d: d["rules"].append({"concepts": ["hands"]}), "at least one of"),
    (lambda d: d["rules"][0].update(colour="red"), "unknown key"),
    (lambda d: d.update(rules=[]), "non-empty list of rules"),
    (lambda d: d.update(extra=1), "unknown key"),
])
def test_vocabulary_errors_name_file_key_and_line(tmp_path, mutate, message):
    import copy

    import yaml

    doc = copy.deepcopy(VOCAB)
    mutate(doc)
    f = tmp_path / "v.yaml"
    f.write_text(yaml.safe_dump(doc, sort_keys=False))
    with pytest.raises(VocabularyError) as err:
        load_vocabulary(f)
    text = str(err.value)
    assert str(f) in text and (message in text or message.replace(" (line ", "") in text), text
    assert "line" in text or "cycle" in text or "rules" in text


def test_yaml_syntax_error(tmp_path):
    f = tmp_path / "v.yaml"
    f.write_text("concepts:\n  a: {broader: [\n")
    with pytest.raises(VocabularyError, match="not valid YAML at line"):
        load_vocabulary(f)


def test_label_store_and_sql(demo_store, demo_tree, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(demo_store, store)
    report = mapstore.label(store, demo_tree / "concepts.json")
    assert report.n_labelled == report.n_maps and not report.unused_rules
    st = mapstore.open(store)
    n = st.sql("SELECT count(DISTINCT map_id) n FROM labels")["n"][0].as_py()
    assert n == report.n_maps
    sha = st.sql("SELECT DISTINCT vocabulary_sha256 s FROM labels")["s"].to_pylist()
    assert sha == [report.sha256]
    # a re-index keeps labels coherent: they are derived again from the stored vocabulary copy
    mapstore.index([demo_tree], store, rules=demo_tree / "name-rules.json", progress=False)
    st = mapstore.open(store)
    assert st.sql("SELECT count(DISTINCT map_id) n FROM labels")["n"][0].as_py() == report.n_maps
