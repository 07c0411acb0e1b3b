"""Writes that a crash leaves whole or absent (a temporary file renamed into place, synced), and the
checkpoints where a test may kill the process to prove it."""

from __future__ import annotations

import contextlib
import json
import os
import uuid
from pathlib import Path
from typing import Any

__all__ = ["checkpoint", "write_json_atomic"]


def _fsync_dir(path: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def checkpoint() -> None:
    """A point where a crash must leave the store consistent; a test hook can kill the process here.

    With ``MAPSTORE_TEST_KILL_COUNTER=FILE`` and ``MAPSTORE_TEST_KILL_AFTER=N`` set, every
    checkpoint (in any process) adds a byte to FILE and the N-th one sends this process SIGKILL.
    Unset, it costs one environment lookup.
    """
    counter = os.environ.get("MAPSTORE_TEST_KILL_COUNTER")
    if not counter:
        return
    with open(counter, "ab") as fh:
        fh.write(b".")
    if os.path.getsize(counter) >= int(os.environ.get("MAPSTORE_TEST_KILL_AFTER", "0") or 0) > 0:
        import signal

        os.kill(os.getpid(), signal.SIGKILL)


def write_json_atomic(path: Path, doc: Any) -> None:
    """Write ``doc`` as JSON at ``path``: the old file or the new one, never a part."""
    checkpoint()
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex}.tmp")
    with open(tmp, "w") as fh:
        json.dump(doc, fh, indent=1, sort_keys=True, default=str)
        fh.flush()
        os.fsync(fh.fileno())
    checkpoint()
    os.replace(tmp, path)
    _fsync_dir(path.parent)
    checkpoint()
