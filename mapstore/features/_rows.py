"""Rows of a feature set, a batch at a time: each map's values from the target, written as one
new shard file (or, for a coverage mask, counted).

A batch is the unit a worker runs: at most a few dozen maps of one dataset, one shard.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import time
import uuid
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import MapstoreError
from ..store import Problem, checkpoint
from ..targets import BatchContext, BuildSettings, SourceMap, Target
from ._copies import Sketcher

__all__ = ["Batch", "BatchResult", "run_batch", "write_shard", "feature_problem"]


@dataclass
class Batch:
    """Maps a worker turns into one shard (``coverage_only``: into coverage counts)."""

    set_dir: str
    shard: str
    items: list[SourceMap]
    target: Target
    settings: BuildSettings
    coverage_only: bool = False
    sketch_seed: int = 0
    sketch: str = "count"  # the set's sketch directions (copies.sketch_kind)

    def __len__(self) -> int:
        return len(self.items)


@dataclass
class BatchResult:
    """What a batch made: rows for the rows table, problems, and (coverage batches) counts."""

    rows: list[dict[str, Any]] = field(default_factory=list)
    problems: list[Problem] = field(default_factory=list)
    counts: np.ndarray | None = None
    n: int = 0  # maps counted (coverage batches)


def feature_problem(it: SourceMap, exc: Exception) -> Problem:
    code = type(exc).__name__.replace("Error", "").lower() or "error"
    reason = str(exc)
    path = it.where
    if reason.startswith(path + ": "):
        reason = reason[len(path) + 2:]  # the row names the file already
    remedy = "re-run 'mapstore index' if the file changed" if "index" in reason else \
        "fix or exclude the map (see the reason)"
    code = getattr(exc, "code", None) or code
    remedy = getattr(exc, "remedy", None) or remedy
    return Problem(path, code, reason, remedy, stage="features", map_id=it.map_id)


def _coverage(b: Batch) -> BatchResult:
    out = BatchResult(counts=np.zeros(b.target.n_positions, dtype=np.int32))
    ctx = BatchContext()
    for it in b.items:
        try:
            vec = b.target.values(it, b.settings, ctx).values
        except MapstoreError as exc:
            out.problems.append(feature_problem(it, exc))
            continue
        out.counts += np.isfinite(vec)  # type: ignore[operator]
        out.n += 1
    return out


def run_batch(b: Batch) -> BatchResult:
    """Resample a batch of maps into one new shard file (or, for coverage masks, count coverage)."""
    if b.coverage_only:
        return _coverage(b)
    indices = np.load(os.path.join(b.set_dir, "mask.npy"))
    region, local = b.target.crop(indices)
    shard_path = os.path.join(b.set_dir, "shards", b.shard)
    # built in memory and written with write(): a full disk is then an OSError (ENOSPC), where
    # writing through a memory map would kill the process with SIGBUS
    arr = np.empty((len(b.items), indices.size), dtype=np.float32)
    out = BatchResult()
    now = time.strftime("%Y-%m-%dT%H:%M:%S")
    ctx = BatchContext()
    sketcher = Sketcher(b.sketch_seed, indices.size, b.sketch)
    stat_out = b.settings.stat
    for i, it in enumerate(b.items):
        try:
            row = b.target.values(it, b.settings, ctx, region, local)
        except MapstoreError as exc:
            arr[i] = np.nan
            out.problems.append(feature_problem(it, exc))
            continue
        vec = row.values
        finite = np.isfinite(vec)
        if not finite.any():
            arr[i] = np.nan
            out.problems.append(Problem(it.where, "no-value-in-mask", "the map has no value inside the feature "
                                        "set's mask (its field of view or its own mask misses it)",
                                        "check the map's space and field of view; a map of another part of the "
                                        "brain belongs in a feature set with another mask", stage="features",
                                        map_id=it.map_id))
            continue
        arr[i] = vec
        vals = vec[finite]
        out.rows.append({"map_id": it.map_id, "feature_key": it.key, "sha256": it.sha256, "shard": b.shard,
                         "row": i, "coverage": float(finite.mean()), "stat_in": it.stat,
                         "stat_out": it.stat if stat_out == "native" else stat_out, "conversion": row.conversion,
                         "resample_path": row.path, "built_at": now,
                         "row_sha256": hashlib.sha256(vec.tobytes()).hexdigest(),
                         "vmin": float(vals.min()) if vals.size else None,
                         "vmax": float(vals.max()) if vals.size else None,
                         "vmean": float(vals.mean(dtype=np.float64)) if vals.size else None,
                         "missing_from": row.missing_from, "p_clipped": row.p_clipped})
    if out.rows:  # every row's sketch in one product with the set's projection (built once a batch)
        sketches = sketcher.sketch(arr[[r["row"] for r in out.rows]])
        for r, sk in zip(out.rows, sketches):
            r["sketch"] = sk.tobytes()
    write_shard(shard_path, arr)
    return out


def write_shard(shard_path: str, arr: np.ndarray) -> None:
    """Write a float32 (rows x features) shard: a new file, then one atomic rename."""
    tmp = shard_path + f".{uuid.uuid4().hex}.tmp"
    try:
        with open(tmp, "wb", buffering=0) as fh:
            np.lib.format.write_array_header_1_0(fh, {"descr": "<f4", "fortran_order": False, "shape": arr.shape})
            view = memoryview(np.ascontiguousarray(arr, dtype=np.float32)).cast("B")  # type: ignore[arg-type]
            while view:  # plain writes: a full disk raises ENOSPC (numpy's tofile loses the errno)
                view = view[fh.write(view):]
            os.fsync(fh.fileno())
        checkpoint()
        os.replace(tmp, shard_path)
        checkpoint()
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
