"""The index stage: find derivative datasets, walk them, name their maps (BIDS entities, name rules,
presets), resolve sidecars and participants, read headers and hashes into the catalog's parts."""

from __future__ import annotations

from ._annex import POINTER_MAX, AnnexKey, annex_key_of, fetch_files, parse_key, pointer_key
from ._crawl import IndexReport, index, map_id_for
from ._names import builtin_rules
from ..store import inside, lies_within

__all__ = [
    "AnnexKey",
    "annex_key_of",
    "builtin_rules",
    "fetch_files",
    "index",
    "IndexReport",
    "inside",
    "lies_within",
    "map_id_for",
    "parse_key",
    "pointer_key",
    "POINTER_MAX",
]
