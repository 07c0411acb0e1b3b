"""The public face of a store: ``mapstore.open(DIR)`` returns a :class:`Store`."""

from __future__ import annotations

import os
from pathlib import Path

import pyarrow as pa

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


def open_store(path: str | os.PathLike[str]) -> Store:
    """Open a store for reading (see :class:`Store`)."""
    return Store(path)
