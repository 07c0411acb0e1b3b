"""Helpers shared by the benchmark scripts."""

from __future__ import annotations

import gzip
import json
import shutil
import subprocess
import sys
import time
from pathlib import Path


def floor(files: list[Path]) -> float:
    """Seconds to read and (if gzipped) inflate every file once, in one process."""
    t0 = time.perf_counter()
    for f in files:
        data = f.read_bytes()
        if data[:2] == b"\x1f\x8b":
            gzip.decompress(data)
    return time.perf_counter() - t0


def pybids_stat_config(folder: Path) -> str:
    """A pybids config file adding the statistical-derivative entities (contrast, stat)."""
    cfg = folder / "statmaps-config.json"
    cfg.write_text(json.dumps({"name": "statmaps", "entities": [
        {"name": "contrast", "pattern": r"[_/\\]+contrast-([a-zA-Z0-9+]+)"},
        {"name": "stat", "pattern": r"[_/\\]+stat-([a-zA-Z0-9+]+)"}]}))
    return str(cfg)


def bench_dataset(root: Path, name: str, dof: int) -> Path:
    """An empty derivative dataset with a top-level t-map sidecar."""
    ds = root / name
    ds.mkdir(parents=True, exist_ok=True)
    (ds / "dataset_description.json").write_text(json.dumps({
        "Name": name, "BIDSVersion": "1.9.0", "DatasetType": "derivative", "GeneratedBy": [{"Name": "bench"}]}))
    (ds / "task-go_statmap.json").write_text(json.dumps({"DegreesOfFreedom": dof}))
    return ds


def whole_commands(commands: list[list[str]], store: Path, baseline: str | None, rounds: int,
                   each: list[float] | None = None) -> tuple[float, float | None]:
    """What users run, timed: ``mapstore`` ``commands`` one after the other on a fresh ``store`` and the
    ``baseline`` script, each in fresh processes (start-up and imports included); the minimum of
    ``rounds`` interleaved rounds of each.  ``each`` (a list) receives each command's minimum."""
    ours, theirs = [], []
    per: list[list[float]] = [[] for _ in commands]
    for _ in range(rounds):
        shutil.rmtree(store, ignore_errors=True)
        t = time.perf_counter()
        for k, cmd in enumerate(commands):
            started = time.perf_counter()
            subprocess.run([sys.executable, "-m", "mapstore.cli", *cmd], check=True, capture_output=True)
            per[k].append(time.perf_counter() - started)
        ours.append(time.perf_counter() - t)
        if baseline is not None:
            t = time.perf_counter()
            subprocess.run([sys.executable, "-c", baseline], check=True, capture_output=True)
            theirs.append(time.perf_counter() - t)
    if each is not None:
        each[:] = [min(times) for times in per]
    return min(ours), (min(theirs) if theirs else None)


def command_seconds(command: list[str], rounds: int) -> float:
    """The minimum over ``rounds`` of one ``mapstore`` command as a fresh process."""
    times = []
    for _ in range(rounds):
        t = time.perf_counter()
        subprocess.run([sys.executable, "-m", "mapstore.cli", *command], check=True, capture_output=True)
        times.append(time.perf_counter() - t)
    return min(times)


def script_calling(module: str, function: str, *args: str) -> str:
    """A one-line script that calls ``function`` of a benchmark ``module`` with path arguments."""
    return (f"import sys, warnings; warnings.filterwarnings('ignore'); "
            f"sys.path.insert(0, {str(Path(__file__).resolve().parent)!r}); from pathlib import Path; "
            f"from {module} import {function}; {function}({', '.join(f'Path({a!r})' for a in args)})")
