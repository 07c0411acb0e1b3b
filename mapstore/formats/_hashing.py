"""Content hashes, streamed: a file is read once, in blocks, never held whole."""

from __future__ import annotations

import contextlib
import hashlib
import os
import signal
import threading
import time
from dataclasses import dataclass
from typing import Iterator

__all__ = ["FileDigest", "digest_file", "sha256_file", "ReadDeadline", "ReadTimeout"]

# test hook: a read of this exact path blocks (as on a stalled network or FUSE mount)
_STALL_ENV = "MAPSTORE_TEST_STALL_READ"

BLOCK = 1 << 20
# the first read is small: asking for 1 MiB makes Python allocate (and the kernel map) a 1 MiB
# buffer for every file, which costs more than reading a small map (measured: 22 vs 6 us a file)
FIRST = 1 << 16


@dataclass(frozen=True)
class FileDigest:
    """SHA-256 of a file's bytes as stored, its size, and its first raw bytes.

    The first bytes come along so the header stage can parse them without a
    second open of the file.
    """

    sha256: str
    nbytes: int
    head: bytes


def digest_file(path: str, head_bytes: int = 4096, progress=None) -> FileDigest:
    """Hash a file in one streamed pass and keep its first ``head_bytes`` bytes.

    ``progress`` (optional) is called after every block read: a read deadline restarts there,
    so a large file read slowly but steadily is not taken for a stalled one.
    """
    h = hashlib.sha256()
    n = 0
    want = max(head_bytes, FIRST)
    if os.environ.get(_STALL_ENV) == path:
        time.sleep(10 ** 7)
    with open(path, "rb", buffering=0) as fh:
        first = fh.read(want)
        h.update(first)
        n += len(first)
        if len(first) == want:  # a short first read means end of file (regular files)
            buf = bytearray(BLOCK)  # reused: no fresh 1 MiB object per block
            view = memoryview(buf)
            while True:
                got = fh.readinto(buf)
                if not got:
                    break
                if progress is not None:
                    progress()
                h.update(view[:got])
                n += got
    return FileDigest(h.hexdigest(), n, first[:head_bytes])


def sha256_file(path: str) -> str:
    """Hex SHA-256 of a file's bytes."""
    return digest_file(path, 0).sha256




class ReadTimeout(Exception):
    """A read made no progress before its deadline (raised by :class:`ReadDeadline`)."""


class ReadDeadline:
    """Deadlines for reads in this process's main thread, by ``SIGALRM``.

    A read that makes no progress for ``seconds`` (a stalled network or FUSE mount, a file
    fetched on access) is interrupted and :class:`ReadTimeout` raised in its place, so one such
    file cannot stall a crawl; each block read restarts the deadline (``progress``).  A read
    the kernel will not interrupt (an uninterruptible wait on some hard network mounts) is not
    covered.  Installed once per unit of work (``with ReadDeadline(s) as
    dl``), armed per file (``with dl.armed(): ...``): two ``setitimer`` calls a file.  Outside
    the main thread (where signals cannot be delivered) it does nothing.
    """

    def __init__(self, seconds: float | None) -> None:
        self.seconds = seconds
        self._active = bool(seconds) and hasattr(signal, "setitimer") and \
            threading.current_thread() is threading.main_thread()
        self._old = None

    def __enter__(self) -> "ReadDeadline":
        if self._active:
            self._old = signal.signal(signal.SIGALRM, self._fire)  # type: ignore[assignment]
        return self

    def __exit__(self, *exc) -> None:
        if self._active:
            signal.setitimer(signal.ITIMER_REAL, 0)
            signal.signal(signal.SIGALRM, self._old or signal.SIG_DFL)

    @staticmethod
    def _fire(signum, frame) -> None:
        raise ReadTimeout()

    def progress(self) -> None:
        """The armed read made progress: restart its deadline."""
        if self._active:
            signal.setitimer(signal.ITIMER_REAL, self.seconds)

    @contextlib.contextmanager
    def armed(self) -> Iterator[None]:
        if not self._active:
            yield
            return
        signal.setitimer(signal.ITIMER_REAL, self.seconds)
        try:
            yield
        finally:
            signal.setitimer(signal.ITIMER_REAL, 0)
