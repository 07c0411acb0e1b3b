"""The features stage: feature sets built from the catalog onto a target, read back by row, scanned for
copies, reduced to parcels."""

from __future__ import annotations

from ._build import DEFAULT_SET, FeatureReport, build_features, feature_key, spec_id, write_tables
from ._copies import (NEAR_COPY_R, SKETCH_BITS, STORE_FLOOR, Sketcher, find_copies, most_similar, pair_correlation,
                      sketch_kind)
from ._reader import FeatureSet
from ._rows import Batch, BatchResult, run_batch, write_shard


def __getattr__(name: str):
    # parcel sets import scikit-learn: loaded on first use, not with the package
    if name in ("ParcelReducer", "build_parcels", "fit_parcellation"):
        from . import _parcels

        return getattr(_parcels, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = [
    "Batch",
    "BatchResult",
    "build_features",
    "build_parcels",
    "DEFAULT_SET",
    "feature_key",
    "FeatureReport",
    "FeatureSet",
    "find_copies",
    "most_similar",
    "fit_parcellation",
    "NEAR_COPY_R",
    "pair_correlation",
    "ParcelReducer",
    "run_batch",
    "Sketcher",
    "SKETCH_BITS",
    "sketch_kind",
    "spec_id",
    "STORE_FLOOR",
    "write_shard",
    "write_tables",
]
