"""The labels stage: concept vocabularies, their validation, and the labels table."""

from __future__ import annotations

from ._vocabulary import (
    LabelReport,
    apply_vocabulary,
    json_schemas,
    label_store,
    load_vocabulary,
    refresh_labels,
)


__all__ = [
    "json_schemas",
    "apply_vocabulary",
    "label_store",
    "LabelReport",
    "load_vocabulary",
    "refresh_labels",
]
