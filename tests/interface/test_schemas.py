"""The shipped schemas (the top-level schemas/ folder) match what the package generates, and validate real files."""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import pyarrow.parquet as pq

from mapstore.schemas import all_schemas

REPO = Path(__file__).resolve().parents[2]


def test_schema_files_in_sync():
    generated = all_schemas()
    on_disk = {p.name: json.loads(p.read_text()) for p in (REPO / "schemas").glob("*.json")}
    assert on_disk == generated, "run: python -m mapstore.schemas"


def test_schemas_are_valid_and_validate_demo_files(demo_store, demo_tree):
    schemas = all_schemas()
    for doc in schemas.values():
        jsonschema.Draft202012Validator.check_schema(doc)
    head = json.loads((demo_store / "HEAD").read_text())
    jsonschema.validate(head, schemas["store-head.schema.json"])
    jsonschema.validate(json.loads((demo_tree / "name-rules.json").read_text()), schemas["name-rules.schema.json"])
    jsonschema.validate(json.loads((demo_tree / "origins.json").read_text()), schemas["origins.schema.json"])
    parts = json.loads((demo_store / head["catalog"] / "parts.json").read_text())
    jsonschema.validate(parts, schemas["catalog-parts.schema.json"])
    for table in ("maps", "datasets", "problems"):
        f = demo_store / (parts["parts"][0]["maps"] if table == "maps" else f"{head['catalog']}/{table}.parquet")
        rows = pq.read_table(f).to_pylist()
        for row in rows[:50]:
            jsonschema.validate(row, schemas[f"{table}.schema.json"])


def test_feature_and_label_files_validate(demo_store, demo_tree, tmp_path):
    import shutil

    import mapstore

    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    mapstore.build_features(store, grid="MNI152-3mm", name="three", jobs=2, progress=False)
    mapstore.label(store, demo_tree / "concepts.json")
    schemas = all_schemas()
    head = json.loads((store / "HEAD").read_text())
    entry = head["features"]["three"]
    jsonschema.validate(json.loads((store / entry["dir"] / "set.json").read_text()),
                        schemas["feature-set.schema.json"])
    for row in pq.read_table(store / entry["rows"]).to_pylist()[:20]:
        jsonschema.validate(row, schemas["feature-rows.schema.json"])
    for row in pq.read_table(store / head["labels"]["table"]).to_pylist()[:20]:
        jsonschema.validate(row, schemas["labels.schema.json"])
    for row in pq.read_table(store / head["catalog"] / "participants.parquet").to_pylist():
        jsonschema.validate(row, schemas["participants.schema.json"])
    jsonschema.validate(json.loads((store / "store.json").read_text()), schemas["store-marker.schema.json"])
