"""Selections (X, y, groups, leakage-free splits) and exports with a manifest that reproduces them."""

from __future__ import annotations

from ._export import ExportReport, VerifyReport, export_selection, json_schemas, verify
from ._manifest import ExportManifest, ManifestSource, read_manifest
from ._query import Selection, align_columns, check_folds, map_levels, resolve_levels, select
from ._splits import SCHEMES, check_classes, check_leakage


__all__ = [
    "align_columns",
    "check_classes",
    "check_folds",
    "check_leakage",
    "SCHEMES",
    "json_schemas",
    "ManifestSource",
    "map_levels",
    "resolve_levels",
    "read_manifest",
    "export_selection",
    "ExportManifest",
    "ExportReport",
    "select",
    "Selection",
    "verify",
    "VerifyReport",
]
