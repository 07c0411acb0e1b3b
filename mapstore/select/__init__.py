"""Selections (X, y, groups, leakage-free splits) and exports with a manifest that reproduces them."""

from __future__ import annotations

from ._export import ExportReport, VerifyReport, export_selection, json_schemas, verify
from ._query import Selection, select


__all__ = [
    "json_schemas",
    "export_selection",
    "ExportReport",
    "select",
    "Selection",
    "verify",
    "VerifyReport",
]
