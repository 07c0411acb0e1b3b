"""mapstore: pool brain statistic maps from many BIDS derivative datasets.

Index them into a Parquet + DuckDB catalog, resample them once onto a common grid,
label them with concepts, and draw leakage-free train/test matrices.
"""

from __future__ import annotations

from ._version import __version__

from ._api import Store, open_store as open  # noqa: A001  (mirrors the builtin on purpose)
from .indexing import IndexReport, index
from .errors import MapstoreError
from .select import ExportReport, VerifyReport, verify
from .features import FeatureReport, FeatureSet, build_features
from .labels import LabelReport, label_store as label, load_vocabulary
from .select import Selection, align_columns, check_folds
from .formats import HeaderFacts, read_header

_LAZY = ("build_parcels", "fit_parcellation", "ParcelReducer")


def __getattr__(name: str):
    # parcel sets import scikit-learn: loaded on first use, not with the package
    if name in _LAZY:
        from . import features

        return getattr(features, name)
    raise AttributeError(f"module 'mapstore' has no attribute {name!r}")


__all__ = [
    "__version__",
    "align_columns",
    "check_folds",
    "build_features",
    "build_parcels",
    "ExportReport",
    "FeatureReport",
    "FeatureSet",
    "fit_parcellation",
    "HeaderFacts",
    "index",
    "IndexReport",
    "label",
    "LabelReport",
    "load_vocabulary",
    "MapstoreError",
    "open",
    "ParcelReducer",
    "read_header",
    "Selection",
    "Store",
    "verify",
    "VerifyReport",
]
