"""One parallel runner for the stages that fan out (index units, feature batches).

Units of work run in this process, on a local pool of forked processes, or on a Dask
cluster; results come back as they finish (or in order), with one progress bar.
"""

from __future__ import annotations

import contextlib
import functools
import gc
import os
import sys
from concurrent.futures import ProcessPoolExecutor, as_completed
from typing import Any, Callable, Iterator, Sequence, TypeVar

from .errors import ParameterError, SchedulerError

__all__ = ["process_pool", "run", "dask_client", "die_once_for_tests"]

T = TypeVar("T")
R = TypeVar("R")


@contextlib.contextmanager
def process_pool(workers: int, preload: Sequence[str] = ()) -> Iterator[ProcessPoolExecutor]:
    """A ``ProcessPoolExecutor`` of forked workers (on Linux), closed on exit.

    ``preload`` names modules the workers will import: the parent imports them before the fork, so
    each is imported once, not once per worker (and again by the parent later).

    Forked workers inherit the parent's heap.  Garbage left there (a notebook's old DuckDB
    connections, say) would be collected in the child, where destructors of objects that
    own threads crash the worker; so the parent collects first and freezes what is left
    for the pool's lifetime (``gc.freeze``: the children never collect inherited objects).
    """
    import multiprocessing

    ctx = multiprocessing.get_context("fork") if sys.platform == "linux" else None
    if ctx is not None:
        import importlib

        for name in preload:
            with contextlib.suppress(ImportError):  # an optional library that is not installed
                importlib.import_module(name)
    gc.collect()
    gc.freeze()
    try:
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            yield pool
    finally:
        gc.unfreeze()


def _recording(fn: Callable[[T], R], path: str, inherited: list[str], unit: T) -> R:
    """Test hook (``MAPSTORE_TEST_WORKER_IMPORTS=FILE``): run ``fn`` in a worker and append to FILE the
    modules the worker imported beyond what it inherited from the fork."""
    try:
        return fn(unit)
    finally:
        new = sorted(set(sys.modules) - set(inherited))
        with open(path, "a", encoding="utf-8") as fh:
            fh.write("\n".join(new) + "\n")


def die_once_for_tests() -> None:
    """Test hook: with ``MAPSTORE_TEST_DIE_ONCE=FILE`` set, the first unit of work to reach this
    point (in any process) SIGKILLs its process, as a cluster worker lost mid-run; FILE marks it done."""
    import os

    flag = os.environ.get("MAPSTORE_TEST_DIE_ONCE")
    if not flag:
        return
    try:
        os.close(os.open(flag, os.O_CREAT | os.O_EXCL))
    except FileExistsError:
        return
    import signal

    os.kill(os.getpid(), signal.SIGKILL)


def dask_client(scheduler: Any):
    """A ``(client, owned)`` pair for a Client or a scheduler address."""
    try:
        from distributed import Client
    except ImportError as exc:
        raise SchedulerError("a Dask scheduler was given but dask.distributed is not installed; "
                             "pip install 'mapstore[dask]'") from exc
    if isinstance(scheduler, Client):
        return scheduler, False
    if isinstance(scheduler, str):
        try:
            return Client(scheduler, timeout=30), True
        except OSError as exc:
            raise SchedulerError(f"cannot reach the Dask scheduler at {scheduler} ({exc})") from exc
    raise ParameterError(f"scheduler must be a dask.distributed Client or an address, got {scheduler!r}")


def run(fn: Callable[[T], R], units: Sequence[T], *, jobs: int = 1, scheduler: Any = None,
        progress: bool = False, desc: str = "", weight: Callable[[T], int] = lambda u: 1,
        ordered: bool = False, unit: str = "item", preload: Sequence[str] = ()) -> Iterator[R]:
    """Run ``fn`` over ``units``; yield the results as they finish (``ordered``: in order).

    ``scheduler`` (a Dask Client or address) sends the units to a cluster; else ``jobs > 1``
    uses a local process pool (of forks of this process, after it imported ``preload``); else they run
    here.  ``weight`` sizes the progress bar's steps.
    On a cluster a unit whose worker dies is run again by Dask, so ``fn`` must be safe to repeat.
    """
    bar = None
    if progress and units:
        from tqdm import tqdm

        bar = tqdm(total=sum(weight(u) for u in units), unit=unit, desc=desc, file=sys.stderr)
    try:
        if scheduler is not None:
            client, owned = dask_client(scheduler)
            try:
                from distributed import as_completed as dask_completed

                futures = client.map(fn, list(units), pure=False)
                order = {f.key: i for i, f in enumerate(futures)}
                done = futures if ordered else dask_completed(futures)
                for fut in done:
                    res = fut.result()
                    if bar:
                        bar.update(weight(units[order[fut.key]]))
                    yield res
            finally:
                if owned:
                    client.close()
        elif jobs > 1 and len(units) > 1:
            with process_pool(min(jobs, len(units)), preload) as pool:
                record = os.environ.get("MAPSTORE_TEST_WORKER_IMPORTS")
                task = functools.partial(_recording, fn, record, sorted(sys.modules)) if record else fn
                futs = [pool.submit(task, u) for u in units]
                index = {f: i for i, f in enumerate(futs)}
                for fut in (futs if ordered else as_completed(futs)):
                    res = fut.result()
                    if bar:
                        bar.update(weight(units[index[fut]]))
                    yield res
        else:
            for u in units:
                res = fn(u)
                if bar:
                    bar.update(weight(u))
                yield res
    finally:
        if bar:
            bar.close()
