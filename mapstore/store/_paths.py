"""A store is a closed world: every path a store record names is proven to stay inside the store, and
only regular files are opened, before anything is read, listed, hashed or deleted.

Records (HEAD, ``parts.json``, ``set.json``, a rows table's shard names) may come from a colleague's
copy of a store: they are data, not trusted code.  A record naming an absolute path, a ``..`` step, a
symlink leading out, a FIFO or a device is :class:`~mapstore.errors.StoreCorrupt`, naming the record.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path, PurePosixPath
from typing import Any

from ..errors import StoreCorrupt

__all__ = ["RealPaths", "relative_path", "inside_store", "regular_file", "store_file", "plain_name", "check_types"]

_REMEDY = "the store was damaged or crafted; restore it from a backup, or index the datasets again into a new store"


def relative_path(value: Any, record: str) -> str:
    """``value`` if it is a relative path with no ``..`` step (lexically inside any folder), else StoreCorrupt.

    >>> relative_path("features/default/rows-1.parquet", "HEAD features.default.rows")
    'features/default/rows-1.parquet'
    """
    if not isinstance(value, str) or not value or "\x00" in value or "\\" in value:
        raise StoreCorrupt(f"{record}: {value!r} is not a path inside the store; {_REMEDY}")
    p = PurePosixPath(value)
    if p.is_absolute() or ".." in p.parts or value.startswith("~"):
        raise StoreCorrupt(f"{record}: {value!r} points outside the store; {_REMEDY}")
    return value


def plain_name(value: Any, record: str) -> str:
    """A bare file name (no folder part), as a shard or a lease is named, else StoreCorrupt."""
    relative_path(value, record)
    if "/" in value or value in (".", ".."):
        raise StoreCorrupt(f"{record}: {value!r} is not a file name of the store; {_REMEDY}")
    return value


class RealPaths:
    """Real paths of many files in few folders, one ``realpath`` per folder: a catalog of a hundred
    datasets has a hundred parts side by side, and resolving each one's folders again would cost more
    than the query that reads them."""

    def __init__(self) -> None:
        self._folders: dict[str, str] = {}

    def __call__(self, path: str | os.PathLike[str]) -> str:
        folder, name = os.path.split(os.path.abspath(path))
        real = self._folders.get(folder)
        if real is None:
            real = self._folders[folder] = os.path.realpath(folder)
        try:
            if stat.S_ISLNK(os.lstat(path).st_mode):
                return os.path.realpath(path)  # a link may lead anywhere: follow it all the way
        except FileNotFoundError:
            pass
        return os.path.join(real, name)


def inside_store(store: Path, path: Path, record: str, real_paths: RealPaths | None = None) -> Path:
    """``path`` if its real path (symlinks followed) is inside the store's real path, else StoreCorrupt.
    Pass one ``real_paths`` to many calls to resolve each folder once."""
    real_of = real_paths or os.path.realpath
    root = real_of(store)
    real = real_of(path)
    if real != root and not real.startswith(root.rstrip(os.sep) + os.sep):
        raise StoreCorrupt(f"{record}: {path} leads outside the store (to {real}); {_REMEDY}")
    return path


def regular_file(path: Path, record: str) -> Path:
    """``path`` if it is a regular file (FileNotFoundError passes), else StoreCorrupt: a FIFO would hang a
    reader and a device (``/dev/zero``) would be read until memory runs out."""
    mode = os.stat(path).st_mode
    if not stat.S_ISREG(mode):
        what = "a folder" if stat.S_ISDIR(mode) else "a FIFO" if stat.S_ISFIFO(mode) else \
            "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode) else "a socket" if stat.S_ISSOCK(mode) else \
            "not a regular file"
        raise StoreCorrupt(f"{record}: {path} is {what}, not a file; {_REMEDY}")
    return path


def store_file(store: Path, rel: Any, record: str, must_exist: bool = False, folder: bool = False,
               real_paths: RealPaths | None = None) -> Path:
    """The store file (or ``folder``) a record names, proven inside the store and, when it exists, a
    regular file (a folder)."""
    path = store / relative_path(rel, record)
    inside_store(store, path, record, real_paths)
    try:
        if folder:
            if not stat.S_ISDIR(os.stat(path).st_mode):
                raise StoreCorrupt(f"{record}: {path} is not a folder; {_REMEDY}")
        else:
            regular_file(path, record)
    except FileNotFoundError:
        if must_exist:
            raise
    return path


def check_types(doc: Any, spec: dict[str, tuple[type, ...]], record: str) -> dict[str, Any]:
    """``doc`` if it is a JSON object whose listed keys (when present) have the listed types."""
    if not isinstance(doc, dict):
        raise StoreCorrupt(f"{record}: a {type(doc).__name__}, not a JSON object; {_REMEDY}")
    for key, types in spec.items():
        v = doc.get(key)
        if v is None:
            continue
        if not isinstance(v, types) or (isinstance(v, bool) and bool not in types):
            raise StoreCorrupt(f"{record}.{key}: {type(v).__name__} {str(v)[:40]!r}, expected "
                               f"{' or '.join(t.__name__ for t in types)}; {_REMEDY}")
        if isinstance(v, int) and not isinstance(v, bool) and not 0 <= v < 2 ** 53:
            raise StoreCorrupt(f"{record}.{key}: {v} is out of range; {_REMEDY}")
    return doc
