"""JSON Schemas of the catalog tables and of every file mapstore reads or writes.

The files in the top-level ``schemas/`` folder (shipped in the wheel as ``mapstore/_schemas``; ``mapstore schema NAME`` prints
one) are generated from this module (``python -m mapstore.schemas``); a test keeps them in sync,
and the loaders of user files (vocabulary, name rules, origins) validate against them.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

from .labels import json_schemas as _label_schemas
from .select import json_schemas as _export_schemas
from .store import (
    DATASETS_SCHEMA,
    FPROBLEMS_SCHEMA,
    MAPS_SCHEMA,
    PARTICIPANTS_SCHEMA,
    PROBLEMS_SCHEMA,
    ROWS_SCHEMA,
    SCHEMA_BASE,
    arrow_to_json_schema,
)

__all__ = ["all_schemas", "write_all"]



MAPS_DOCS = {
    "map_id": "stable id: hash of the dataset key and relpath (never of row order)",
    "dataset": "dataset key: raw dataset name / derivative name, or the derivative name alone",
    "relpath": "path of the map relative to its derivative dataset root (posix)",
    "participant": "study-qualified subject, '<study>/sub-<label>'",
    "entities": "every parsed BIDS entity, JSON object",
    "named_by": "'bids' for statmap file names, 'rule:<n>' when a name rule matched",
    "sha256": "SHA-256 of the file's bytes as stored",
    "mtime_ns": "modification time in ns since the epoch, at index time",
    "affine": "voxel-to-world affine, 16 values, row-major (sform, else qform, else pixdim)",
    "affine_source": "which header form gave the affine: sform, qform or pixdim",
    "voxel_size": "voxel size in mm from the affine's column norms",
    "orientation": "axis codes such as RAS or LAS",
    "grid_id": "volumes: fingerprint of the spatial shape and affine (to 1e-4 mm); surfaces: of the vertex "
               "layout with space, den and hemi; CIFTI-2: of the brain models",
    "hemi": "hemisphere of a GIFTI map (BIDS hemi entity, else the file's AnatomicalStructurePrimary)",
    "den": "mesh density label (BIDS den entity, e.g. 32k or 91k)",
    "geometry": "volume (NIfTI), surface (GIFTI, one hemisphere per file) or grayordinates (CIFTI-2 dense scalars)",
    "n_vertices": "values per map of a surface file: vertices (GIFTI) or grayordinates (CIFTI-2)",
    "structures": "GIFTI AnatomicalStructurePrimary, or the CIFTI-2 brain structures, comma-separated",
    "linked_map": "map_id of the other hemisphere's file of the same map (names equal but for hemi-L/R)",
    "dof_numerator": "an F map's numerator degrees of freedom: its contrast's rank, the volumes of the effect map "
                     "beside it (dof is the denominator's)",
    "space_kind": "template (space- names a template), native (a subject's own space: T1w, bold, any other "
                  "space-, a FEAT first-level stats/ folder) or unstated (no space-: taken as the template's)",
    "registration": "a native volume's registration to a template, JSON: {\"to\": space, \"steps\": [{\"path\", "
                    "\"sha256\", \"format\"}, ...]} with the template side first; {\"missing\": reason} when "
                    "none was found",
    "dof": "degrees of freedom, first found of: sidecar DegreesOfFreedom, intent_p1 of a t-test header, "
           "the design matrices beside the map (rows - rank), a header description {T_[df]}, a DOF file",
    "dof_source": "where dof came from: sidecar, header, design, descrip, dof-file",
    "map_kind": "contrast (a contrast's map) or model (a stat without a contrast, or of one regressor: "
                "residuals, fit, parameter estimates)",
    "level": "whom the map summarises: run, session, subject (the three are one person's), group, or unknown (no "
             "subject, no sign of a group model); from a name rule or origins, the writer's layout, the entities",
    "n_inputs": "a group (or higher-level) map's count of inputs where its writer says (FEAT design.fsf, SPM.mat, "
                "the design matrix beside it)",
    "group_contrast": "a higher-level model's own contrast (FEAT .gfeat: the group mean, a difference); the "
                      "lower-level contrast is in contrast",
    "descrip": "the header's description field",
    "model_mask": "the model's own mask beside the map (path relative to the dataset root)",
    "model_mask_sha256": "SHA-256 of the model's mask file",
    "metadata": "merged sidecar metadata (BIDS inheritance), JSON object",
    "sidecars": "sidecar files used, shallowest first",
}


# "x-messages" (an annotation JSON Schema ignores): mapstore's message for a failed keyword
_X = "x-messages"
_MSG_NOTE = ("x-messages: the message mapstore prints when the keyword named fails; {extra} and "
             "{allowed} are the unknown and the allowed keys")


def _rules_schema() -> dict[str, Any]:
    top = "expected an object with a 'rules' list (see 'mapstore schema name-rules')"
    string_map = {"type": "object", "additionalProperties": {"type": "string"}}
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": SCHEMA_BASE + "name-rules.schema.json",
        "$comment": _MSG_NOTE,
        "title": "mapstore name rules",
        "description": "Rules naming statistic maps whose file names do not follow the BIDS statmap "
                       "convention. The first rule that matches a path (relative to its dataset "
                       "root, full match) sets its entities; every map needs contrast and stat.",
        "type": "object",
        "required": ["rules"],
        "additionalProperties": False,
        _X: {"type": top, "required": top, "additionalProperties": top},
        "properties": {"rules": {"type": "array", _X: {"type": top}, "items": {
            "type": "object",
            "additionalProperties": False,
            "oneOf": [{"required": ["regex"]}, {"required": ["template"]}],
            _X: {"type": "expected an object", "oneOf": "give exactly one of 'regex' or 'template'",
                 "additionalProperties": "unknown key(s) {extra}; allowed: {allowed}"},
            "properties": {
                "regex": {"type": "string", "description": "Python regular expression; named groups "
                                                          "set entities"},
                "template": {"type": "string", "description": "path with {entity} placeholders, * (one "
                                                             "folder level) and ** (any depth)"},
                "entities": {"type": "object", "description": "fixed entity values",
                             "additionalProperties": {"type": "string", _X: {
                                 "type": "'entities' must map entity names to strings"}},
                             _X: {"type": "'entities' must map entity names to strings"}},
                "datasets": {"oneOf": [{"type": "string"}, {"type": "array", "items": {"type": "string"}}],
                             "description": "glob patterns over dataset keys (default: all)"},
                "translate": {"type": "object", "additionalProperties": string_map,
                              "description": "per entity, captured text -> BIDS label",
                              _X: {"type": "'translate' must map entity names to {captured: value} objects"}},
                "contrast_names": {
                    "type": "object", "required": ["file"], "additionalProperties": False,
                    "oneOf": [{"required": ["line"]}, {"required": ["matlab"]}],
                    "properties": {"file": {"type": "string"}, "line": {"type": "string"},
                                   "matlab": {"type": "string"}, "field": {"type": "string"}},
                    "description": "where contrast names are: a text file read with a line regex (a "
                                   "group (?P<name>...)), or a MATLAB struct array (file, matlab, field)",
                    _X: {k: "'contrast_names' needs 'file' and one of 'line' (a regex) or 'matlab' (a struct "
                            "array path such as SPM.xCon)" for k in ("type", "required", "oneOf")}},
                "dof_file": {"type": "string", "description": "path template of a text file holding the DOF",
                             _X: {"type": "'dof_file' must be a path template (a string)"}},
                "mask": {"type": "string", "description": "path template of the model's mask",
                         _X: {"type": "'mask' must be a path template (a string)"}},
            }}}},
    }


def _origins_schema() -> dict[str, Any]:
    def entry(keys: tuple[str, ...]) -> dict[str, Any]:
        return {"type": "object", "additionalProperties": False,
                "properties": {k: {"type": "string"} for k in keys},
                _X: {"type": "must be an object", "additionalProperties": "unknown key(s) {extra}; allowed: {allowed}"}}

    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": SCHEMA_BASE + "origins.schema.json",
        "$comment": _MSG_NOTE,
        "title": "mapstore origins mapping",
        "description": "Sets study, site, lab and level (run, session, subject, group) per dataset (keys are dataset keys or globs) and per "
                       "study-qualified subject ('<dataset key>/sub-<label>'); overrides what BIDS "
                       "metadata says.",
        "type": "object",
        "additionalProperties": False,
        _X: {"type": "expected an object with 'datasets' and/or 'subjects'",
             "additionalProperties": "unknown top-level key(s) {extra}; allowed: {allowed}"},
        "properties": {"datasets": {"type": ["object", "null"],
                                    "additionalProperties": entry(("study", "site", "lab", "level")),
                                    _X: {"type": "'datasets' must be an object"}},
                       "subjects": {"type": ["object", "null"],
                                    "additionalProperties": entry(("study", "site", "lab", "participant", "level")),
                                    _X: {"type": "'subjects' must be an object"}}},
    }


def _head_schema() -> dict[str, Any]:
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": SCHEMA_BASE + "store-head.schema.json",
        "title": "mapstore store HEAD",
        "description": "The one pointer a store's writers replace atomically: the current catalog "
                       "snapshot, feature sets and labels, and a short history of writes.",
        "type": "object",
        "properties": {
            "catalog": {"type": ["string", "null"]},
            "features": {"type": "object"},
            "default_features": {"type": ["string", "null"]},
            "labels": {"type": ["object", "null"]},
            "history": {"type": "array", "items": {"type": "object"}},
        },
    }


def all_schemas() -> dict[str, dict[str, Any]]:
    """Every schema by file name (long because the schemas are written out here as literals)."""
    from .targets import KINDS, METHODS, REDUCERS

    kinds = list(KINDS)  # the kinds of target, as registered
    out = {
        "maps.schema.json": arrow_to_json_schema("maps", MAPS_SCHEMA, "One statistic map.", MAPS_DOCS),
        "datasets.schema.json": arrow_to_json_schema("datasets", DATASETS_SCHEMA,
                                                     "One derivative dataset."),
        "problems.schema.json": arrow_to_json_schema(
            "problems", PROBLEMS_SCHEMA,
            "One file or folder that could not be used (level 'error') or was used with a caveat "
            "(level 'warning'); code is stable, remedy says what to do."),
        "name-rules.schema.json": _rules_schema(),
        "origins.schema.json": _origins_schema(),
        "store-head.schema.json": _head_schema(),
    }
    out["feature-rows.schema.json"] = arrow_to_json_schema(
        "feature-rows", ROWS_SCHEMA, "One row of a feature set (features/<set>/rows-*.parquet, the "
        "'features' view adds feature_set): where a map's vector lives and how it was made.",
        {"feature_key": "hash of source sha256, grid, mask, method, stat conversion (and DOF), mapstore version",
         "shard": "file under features/<set>/shards/", "row": "row index in the shard",
         "coverage": "fraction of mask voxels with a finite value",
         "row_sha256": "SHA-256 of the row's float32 bytes", "vmin": "smallest finite value",
         "vmax": "largest finite value", "vmean": "mean of the finite values",
         "missing_from": "what made voxels missing before resampling: model-mask, zero-background, zeros, none",
         "p_clipped": "p = 0 voxels inside the model's mask taken as the smallest positive p (z sets)",
         "sketch": "1,024 sign bits (128 bytes) of the row's sparse random projections, for the copy scan",
         "source_key": "parcel sets: the feature_key of the source set's row the parcel values come from"})
    out["feature-problems.schema.json"] = arrow_to_json_schema(
        "feature-problems", FPROBLEMS_SCHEMA, "A map that could not be turned into a feature row.")
    participants = arrow_to_json_schema(
        "participants", PARTICIPANTS_SCHEMA,
        "One row of participants.tsv, with the dataset key and the study-qualified participant id; "
        "every other column of the file follows (numbers when all values are numbers, else text).")
    participants["additionalProperties"] = {"type": ["string", "number", "integer", "null"]}
    out["participants.schema.json"] = participants
    out["feature-set.schema.json"] = {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": SCHEMA_BASE + "feature-set.schema.json",
        "title": "mapstore feature set description (features/<set>/set.json)",
        "type": "object",
        "required": ["name", "grid", "grid_id", "mask", "mask_sha256", "method", "stat", "p_sided",
                     "zero_as_missing", "spec_id", "versions"],
        "properties": {
            "name": {"type": "string"},
            "grid": {"type": "object", "required": ["name", "shape", "grid_id"],
                     "properties": {"name": {"type": "string"},
                                    "kind": {"enum": kinds, "description": "older sets only: the kind is "
                                                                            "'geometry'"},
                                    "shape": {"type": "array", "items": {"type": "integer"}, "minItems": 1,
                                              "maxItems": 3},
                                    "affine": {"type": ["array", "null"], "items": {"type": "number"},
                                               "minItems": 16, "maxItems": 16},
                                    "hemispheres": {"type": "object"},
                                    "grid_id": {"type": "string"}}},
            "geometry": {"enum": kinds, "description": "the kind of target the rows live on"},
            "sketch": {"enum": ["count", "gauss"],
                       "description": "sketch directions of the rows: sparse count sketch, or dense Gaussian "
                                      "(sets of fewer than 2,048 features)"},
            "subjects_dir": {"type": ["string", "null"],
                             "description": "FreeSurfer subjects folder whose sphere.reg files took fsnative maps "
                                            "onto the mesh"},
            "projection": {"type": ["object", "null"]},
            "parcels": {"type": ["object", "null"]},
            "grid_id": {"type": "string"},
            "mask": {"type": "object", "required": ["name", "n_voxels", "sha256"]},
            "mask_sha256": {"type": "string"},
            "method": {"enum": [*METHODS, "nearest-vertex", *REDUCERS]},
            "stat": {"enum": ["native", "z"]},
            "p_sided": {"enum": ["one", "two"]},
            "zero_as_missing": {"type": "boolean"},
            "background": {"enum": ["auto", "keep"]},
            "kinds": {"type": "array", "items": {"enum": ["contrast", "model"]}},
            "where": {"type": ["string", "null"]},
            "spec_id": {"type": "string"},
            "versions": {"type": "object", "additionalProperties": {"type": "string"}},
        },
    }
    part = {"type": "object", "required": ["dataset", "unit", "maps", "rows"], "additionalProperties": False,
            "properties": {"dataset": {"type": "string"}, "unit": {"type": "string"},
                           "maps": {"type": "string"}, "rows": {"type": "integer"},
                           "problems": {"type": ["string", "null"]}, "digest": {"type": ["string", "null"]},
                           "schema": {"type": "string"}}}
    out["catalog-parts.schema.json"] = {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": SCHEMA_BASE + "catalog-parts.schema.json",
        "title": "mapstore catalog snapshot parts (catalog/<snapshot>/parts.json)",
        "description": "The Parquet parts the maps table of one snapshot is made of, in dataset order: one "
                       "or more per dataset (unit: the dataset key and a hash of the top-level folders it "
                       "covers), with the unit's problems and a digest of every input its rows were made from.",
        "type": "object", "required": ["format", "parts"],
        "properties": {"format": {"const": 2}, "parts": {"type": "array", "items": part}},
    }
    out["store-marker.schema.json"] = {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": SCHEMA_BASE + "store-marker.schema.json",
        "title": "mapstore store marker (store.json)",
        "type": "object", "required": ["format", "version"],
        "properties": {"format": {"const": "mapstore-store"}, "version": {"type": "integer"}},
    }
    for stage_schemas in (_label_schemas, _export_schemas):  # stages with file formats of their own
        out.update(stage_schemas())
    return out


SHIPPED = Path(__file__).resolve().parents[1] / "schemas"  # the checkout's folder


def write_all(folder: str | Path = SHIPPED) -> list[Path]:
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for name, doc in sorted(all_schemas().items()):
        p = folder / name
        p.write_text(json.dumps(doc, indent=2, sort_keys=True) + "\n")
        written.append(p)
    return written


if __name__ == "__main__":  # pragma: no cover
    for p in write_all(sys.argv[1] if len(sys.argv) > 1 else SHIPPED):
        print(p)
