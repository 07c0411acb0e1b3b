"""The public face of a store: ``mapstore.open(DIR)`` returns a :class:`Store`."""

from __future__ import annotations

import os
from pathlib import Path

import pyarrow as pa

from .errors import FeatureError
from .features import FeatureSet
from .store import Catalog

__all__ = ["Store", "open_store"]


class Store:
    """A mapstore store opened for reading.

    Parameters
    ----------
    path : path
        The store folder written by :func:`mapstore.index`.

    Examples
    --------
    >>> import mapstore
    >>> store = mapstore.open("my-store")                       # doctest: +SKIP
    >>> store.sql("SELECT stat, count(*) FROM maps GROUP BY stat").to_pandas()  # doctest: +SKIP
    """

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.catalog = Catalog(path)
        self.path: Path = self.catalog.path

    def __repr__(self) -> str:
        return f"Store({str(self.path)!r}, maps={self.catalog.table('maps').num_rows})"

    def sql(self, query: str) -> pa.Table:
        """Run one read-only SQL query over the catalog views; returns an Arrow table.

        Views: ``maps``, ``datasets``, ``participants``, ``problems``, ``labels``.
        Call ``.to_pandas()`` on the result for a DataFrame.
        """
        return self.catalog.sql(query)

    def table(self, name: str) -> pa.Table:
        """A whole catalog table as Arrow (``maps``, ``datasets``, ``participants``, ...)."""
        return self.catalog.table(name)

    def feature_sets(self) -> list[str]:
        """Names of the feature sets in the store (``SELECT * FROM feature_sets`` for details)."""
        return sorted(self.catalog.head.features)

    def features(self, name: str | None = None) -> FeatureSet:
        """A feature set by name; with no name, the default (or only) set."""
        head = self.catalog.head
        if name is None:
            name = head.default_features
            if name is None:
                raise FeatureError(f"{self.path}: no feature set yet; run 'mapstore features --store "
                                   f"{self.path}'")
        if name not in head.features:
            raise FeatureError(f"{self.path}: no feature set {name!r}; sets: {self.feature_sets() or 'none'}")
        return FeatureSet(self.path, name, head.features[name])

    def to_image(self, vector, name: str | None = None):
        """A NIfTI image (nibabel) of a feature vector or decoder coefficients on a set's grid."""
        return self.features(name).to_image(vector)


def open_store(path: str | os.PathLike[str]) -> Store:
    """Open a store for reading (see :class:`Store`)."""
    return Store(path)
