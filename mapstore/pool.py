"""A local process pool that forks safely from a long-lived Python process."""

from __future__ import annotations

import contextlib
import gc
import sys
from concurrent.futures import ProcessPoolExecutor
from typing import Iterator


@contextlib.contextmanager
def process_pool(workers: int) -> Iterator[ProcessPoolExecutor]:
    """A ``ProcessPoolExecutor`` of forked workers (on Linux), closed on exit.

    Forked workers inherit the parent's heap.  Garbage left there (a notebook's old DuckDB
    connections, say) would be collected in the child, where destructors of objects that
    own threads crash the worker; so the parent collects first and freezes what is left
    for the pool's lifetime (``gc.freeze``: the children never collect inherited objects).
    """
    import multiprocessing

    ctx = multiprocessing.get_context("fork") if sys.platform == "linux" else None
    gc.collect()
    gc.freeze()
    try:
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            yield pool
    finally:
        gc.unfreeze()
