"""mapstore: pool brain statistic maps from many BIDS derivative datasets.

Index them into a Parquet + DuckDB catalog, resample them once onto a common grid,
label them with concepts, and draw leakage-free train/test matrices.
"""

from __future__ import annotations

from ._version import __version__

# Public names are loaded on first use (PEP 562): `import mapstore` and the CLI's help stay fast; each
# name comes from the stage that defines it.
_HOME = {
    "Store": "._api", "open": "._api",
    "IndexReport": ".indexing", "index": ".indexing",
    "MapstoreError": ".errors",
    "ExportReport": ".select", "VerifyReport": ".select", "verify": ".select", "Selection": ".select",
    "align_columns": ".select", "check_folds": ".select",
    "FeatureReport": ".features", "FeatureSet": ".features", "build_features": ".features",
    "build_parcels": ".features", "fit_parcellation": ".features", "ParcelReducer": ".features",
    "LabelReport": ".labels", "label": ".labels", "load_vocabulary": ".labels",
    "HeaderFacts": ".formats", "read_header": ".formats",
    "rebuild": "._rebuild", "RebuildReport": "._rebuild",
}
_RENAMED = {"open": "open_store", "label": "label_store"}


def __getattr__(name: str):
    home = _HOME.get(name)
    if home is None:
        raise AttributeError(f"module 'mapstore' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(home, __name__), _RENAMED.get(name, name))
    globals()[name] = value  # once loaded, an ordinary attribute
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_HOME))


__all__ = [
    "__version__",
    "rebuild",
    "RebuildReport",
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
