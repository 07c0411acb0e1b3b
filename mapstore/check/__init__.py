"""Consistency findings over a store and the report people read."""

from __future__ import annotations

from ._check import CheckReport, check_store, report_json


__all__ = [
    "check_store",
    "CheckReport",
    "report_json",
]
