"""One error tree for mapstore.

Every error the tool raises on purpose derives from :class:`MapstoreError`, so the
CLI can turn it into a clean message with no traceback.  Leaves also inherit the
matching builtin (a missing store is a ``FileNotFoundError``), so callers can catch
either.  Messages name the file or store concerned and, where one exists, the remedy.

Exit codes by kind: 2 when the command line is wrong (an option or value the command does not
take, a path it names that is not there, an output it names where mapstore never writes); 1 for
anything else (a file's content, the store's state, the machine); 3 when ``check`` or ``verify``
found what they look for.
"""

from __future__ import annotations

__all__ = [
    "MapstoreError",
    "OutputPlaceError",
    "PoolError",
    "ParameterError",
    "DataFileError",
    "HeaderError",
    "StoreNotFound",
    "NoDatasetsFound",
    "NoCatalog",
    "StoreBusy",
    "StoreCorrupt",
    "UnseenClassError",
    "UnknownGrid",
    "StoreUnwritable",
    "StaleSnapshot",
    "StoreClosed",
    "StoreFull",
    "SchedulerError",
    "QueryError",
    "RulesError",
    "VocabularyError",
    "GridError",
    "FeatureError",
    "ConversionError",
    "LeakageError",
    "ExportError",
]


class MapstoreError(Exception):
    """Root of every error mapstore raises on purpose."""

    exit_code = 1


class ParameterError(MapstoreError, ValueError):
    """A public function or CLI option received a value it does not accept."""

    exit_code = 2


class DataFileError(MapstoreError, ValueError):
    """A data file (a mesh, a CIFTI template, an atlas) is damaged or not of the kind expected.

    Unlike :class:`ParameterError` (a usage error, exit 2) the command was right and the file
    is not: exit 1, the message names the file and what would make it usable.
    """


class HeaderError(MapstoreError, ValueError):
    """A file is not a readable NIfTI-1/NIfTI-2 image header."""

    def __init__(self, path: str, code: str, reason: str, remedy: str = "") -> None:
        self.path = str(path)
        self.code = code
        self.reason = reason
        self.remedy = remedy
        text = f"{self.path}: {reason}"
        if remedy:
            text += f" ({remedy})"
        super().__init__(text)


class StoreNotFound(MapstoreError, FileNotFoundError):
    """No mapstore store exists at the given path (a usage error, exit 2: the path named is wrong)."""

    exit_code = 2


class NoCatalog(StoreNotFound):
    """The store exists but nothing has been indexed into it yet."""

    exit_code = 1


class NoDatasetsFound(MapstoreError, FileNotFoundError):
    """No BIDS derivative dataset was found under the folders given to index."""


class StoreBusy(MapstoreError, BlockingIOError):
    """Another process is writing to the store."""


class StoreCorrupt(MapstoreError, OSError):
    """The store's files are inconsistent (a file is missing or unreadable)."""


class StoreFull(MapstoreError, OSError):
    """The store's device is full; the write was undone and the store serves its previous state."""


class StoreClosed(MapstoreError, ValueError):
    """A store opened for reading was closed; open it again."""


class StaleSnapshot(MapstoreError, FileNotFoundError):
    """A reader's snapshot was collected after the store moved on (reopen the store)."""


class StoreUnwritable(MapstoreError, PermissionError):
    """The store folder cannot be created or written."""


class QueryError(MapstoreError, ValueError):
    """An SQL query or selection could not be run."""


class RulesError(MapstoreError, ValueError):
    """A legacy-name rules file or a metadata mapping file is invalid."""


class VocabularyError(MapstoreError, ValueError):
    """A concept vocabulary file is invalid."""


class GridError(MapstoreError, ValueError):
    """A target grid or mask is invalid or cannot be built."""


class UnknownGrid(ParameterError, GridError):
    """A grid name that is not a built-in grid: a usage error (exit 2), as an unknown mask is."""


class SchedulerError(MapstoreError, ConnectionError):
    """A Dask scheduler was given but cannot be used (not installed, or not reachable)."""


class FeatureError(MapstoreError, ValueError):
    """A feature set could not be built or read.

    ``report`` holds the :class:`~mapstore.features.FeatureReport` when a build ran but
    produced nothing usable (every selected map failed).
    """

    def __init__(self, message: str, report=None, code: str | None = None, remedy: str | None = None) -> None:
        super().__init__(message)
        self.report = report
        self.code, self.remedy = code, remedy  # a map's problem: its code and what to do, when known


class ConversionError(MapstoreError, ValueError):
    """A statistic could not be converted (for example t to z without degrees of freedom)."""


class UnseenClassError(MapstoreError, ValueError):
    """A split's test side holds a class its training side never saw (no model can score it)."""


class LeakageError(MapstoreError, ValueError):
    """A split would put one subject or one identical map on both sides."""


class ExportError(MapstoreError, OSError):
    """An export could not be written or verified."""


class OutputPlaceError(ExportError):
    """An output would land where mapstore never writes: a source dataset, a store, or a folder it did
    not write (with overwrite).  A usage error (exit 2): the output named is wrong."""

    exit_code = 2


class PoolError(MapstoreError, ValueError):
    """Maps that cannot be pooled as asked (a stat the method cannot take, an empty result); the message
    names why and the option that changes it."""
