"""mapstore: pool brain statistic maps from many BIDS derivative datasets.

Index them into a Parquet + DuckDB catalog, resample them once onto a common grid,
label them with concepts, and draw leakage-free train/test matrices.
"""

from __future__ import annotations

from ._version import __version__

from .api import Store, open_store as open  # noqa: A001  (mapstore.open mirrors the builtin on purpose)
from .catalog import IndexReport, index
from .errors import MapstoreError
from .export import ExportReport, VerifyReport, verify
from .features import FeatureReport, FeatureSet, build_features
from .labels import LabelReport, label_store as label, load_vocabulary
from .query import Selection
from .header import HeaderFacts, read_header

_LAZY = {"build_parcels": "parcels", "fit_parcellation": "parcels", "ParcelReducer": "parcels"}


def __getattr__(name: str):
    # parcels imports scikit-learn: loaded on first use, not with the package
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'mapstore' has no attribute {name!r}")


__all__ = sorted([
    "build_parcels",
    "fit_parcellation",
    "ParcelReducer",
    "ExportReport",
    "LabelReport",
    "Selection",
    "VerifyReport",
    "label",
    "load_vocabulary",
    "verify",
    "FeatureReport",
    "FeatureSet",
    "HeaderFacts",
    "IndexReport",
    "MapstoreError",
    "Store",
    "__version__",
    "build_features",
    "index",
    "open",
    "read_header",
])
