"""The index stage: find derivative datasets, walk them, name their maps (BIDS entities, name rules,
presets), resolve sidecars and participants, read headers and hashes into the catalog's parts."""

from __future__ import annotations

from ._crawl import IndexReport, index, map_id_for
from ._names import builtin_rules
from ..store import inside, lies_within

__all__ = [
    "builtin_rules",
    "index",
    "IndexReport",
    "inside",
    "lies_within",
    "map_id_for",
]
