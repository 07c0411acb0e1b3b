"""Where an output may go, and how it gets there: one rule for every command that writes a folder or a
file (export, pool, rebuild, check's report, the demo).

An output may not be, contain or lie inside a source dataset or a store, however either is spelled
(``..`` steps, symlinks, another mount of the same folder: compared by real path and by device and
inode of every existing ancestor).  A folder output is written beside its place under a temporary name
that says whose it is, then renamed into place whole (:func:`output_folder`): an interrupted run leaves
the old result or nothing, and the next run removes what a dead run left.  ``overwrite`` replaces only
a folder mapstore wrote (it holds :data:`OUTPUT_MARKER`), never a store or a source.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import uuid
from pathlib import Path
from typing import Iterable, Iterator

from ..errors import OutputPlaceError

__all__ = ["OUTPUT_MARKER", "inside", "lies_within", "check_output", "output_folder", "write_file_atomic",
           "is_store", "remove_leftovers"]

OUTPUT_MARKER = ".mapstore-output.json"
_STORE_MARKER = "store.json"
_TMP = re.compile(r"^\.(?P<name>.+)\.(?P<pid>\d+)-[0-9a-f]{8}\.partial$")


def inside(path: str | os.PathLike[str], folder: str | os.PathLike[str]) -> bool:
    """True when ``path`` is ``folder`` or lies under it (both absolute; no file is touched)."""
    p, f = Path(path), Path(folder)
    return p == f or f in p.parents


def lies_within(path: str | os.PathLike[str], folder: str | os.PathLike[str]) -> bool:
    """True when writing ``path`` would write into ``folder``, however either is spelled: ``..`` steps
    and symlinks are resolved as the kernel would, and each existing ancestor of the path is compared
    with the folder by device and inode (a bind mount or another alias of the same folder).
    """
    real = Path(os.path.realpath(path))
    real_folder = Path(os.path.realpath(folder))
    if inside(real, real_folder) or inside(os.path.abspath(path), os.path.abspath(folder)):
        return True
    try:
        st = os.stat(folder)
    except OSError:
        return False
    for a in (real, *real.parents):
        try:
            sa = os.stat(a)
        except OSError:
            continue
        if (sa.st_dev, sa.st_ino) == (st.st_dev, st.st_ino):
            return True
    return False


def is_store(path: Path) -> bool:
    """A mapstore store: a folder holding the store marker."""
    try:
        marker = path / _STORE_MARKER
        return marker.is_file() and marker.stat().st_size < 4096 and "mapstore-store" in marker.read_text()
    except (OSError, UnicodeDecodeError):
        return False


def _enclosing_store(path: Path) -> Path | None:
    for a in (path, *path.parents):
        if is_store(a):
            return a
    return None


def check_output(out: str | os.PathLike[str], *, sources: Iterable[str] = (), stores: Iterable[str] = (),
                 overwrite: bool = False, folder: bool = True, what: str = "--out") -> Path:
    """``out`` made absolute, once it is known to be a place an output may go; else OutputPlaceError.

    ``sources`` are the dataset roots the output was made from; ``stores`` the stores it was read from
    (any store that encloses ``out`` is refused too, named or not).  A folder output that exists and is
    not empty is replaced only with ``overwrite`` and only if mapstore wrote it.
    """
    path = Path(out).expanduser().absolute()
    real = Path(os.path.realpath(path))
    for kind, places in (("source dataset", sources), ("store", stores)):
        for place in places:
            if not place:
                continue
            if lies_within(path, place):
                raise OutputPlaceError(f"{path}: {what} lies inside the {kind} {place}; mapstore never writes "
                                       f"into a {kind}: choose a folder elsewhere")
            if lies_within(place, path):
                raise OutputPlaceError(f"{path}: {what} holds the {kind} {place}; writing there could replace it: "
                                       "choose a folder elsewhere")
    store = _enclosing_store(real) or _enclosing_store(path)
    if store is not None:
        raise OutputPlaceError(f"{path}: {what} lies inside the store {store}; mapstore never writes into a "
                               "store: choose a folder elsewhere")
    if not folder:
        if path.is_dir():
            raise OutputPlaceError(f"{path}: {what} is a folder; give a file name")
        return path
    if path.exists() and not path.is_dir():
        raise OutputPlaceError(f"{path}: {what} is a file, not a folder; choose a folder")
    if path.is_dir() and any(path.iterdir()):
        if not overwrite:
            raise OutputPlaceError(f"{path}: {what} exists and is not empty; choose a new folder or pass "
                                   "--overwrite (overwrite=True) to replace a folder mapstore wrote")
        if not (path / OUTPUT_MARKER).is_file():
            raise OutputPlaceError(f"{path}: {what} exists and mapstore did not write it (no {OUTPUT_MARKER}); "
                                   "--overwrite replaces only mapstore's own outputs: choose a new folder")
    return path


def remove_leftovers(out: Path) -> list[str]:
    """Remove what interrupted runs of dead processes left beside ``out``; returns the names removed."""
    gone: list[str] = []
    try:
        names = os.listdir(out.parent)
    except OSError:
        return gone
    for n in names:
        m = _TMP.match(n)
        if m is None or m.group("name") != out.name:
            continue
        if _alive(int(m.group("pid"))):
            continue
        shutil.rmtree(out.parent / n, ignore_errors=True)
        gone.append(n)
    return gone


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@contextlib.contextmanager
def output_folder(out: Path, kind: str) -> Iterator[Path]:
    """A temporary folder beside ``out`` to write into; renamed into place whole when the block ends
    without an error, removed when it raises."""
    from ._store import checkpoint, replace_dir

    out.parent.mkdir(parents=True, exist_ok=True)
    remove_leftovers(out)
    tmp = out.parent / f".{out.name}.{os.getpid()}-{uuid.uuid4().hex[:8]}.partial"
    tmp.mkdir()
    try:
        (tmp / OUTPUT_MARKER).write_text(json.dumps({"written_by": "mapstore", "kind": kind}))
        checkpoint()
        yield tmp
        replace_dir(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_file_atomic(path: Path, data: bytes) -> None:
    """Write a file beside its place and rename it there (a reader sees the old file or the new one)."""
    tmp = path.parent / f".{path.name}.{os.getpid()}-{uuid.uuid4().hex[:8]}.partial"
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
