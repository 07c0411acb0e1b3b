"""Helpers shared by the benchmark scripts."""

from __future__ import annotations

import gzip
import json
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
