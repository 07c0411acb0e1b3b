"""The benchmark scripts still run (at a tiny size): a refactor must not break them unseen.

A consistency test: it checks that the scripts run to the end and print their figures, not the figures.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow
BENCH = Path(__file__).resolve().parents[1] / "benchmarks"


@pytest.mark.parametrize("script, args, expect", [
    ("bench_copies.py", ["--rows", "2000", "--naive", "500", "--copies", "20"], "recall"),
    ("bench_index.py", ["--maps", "200", "--rounds", "1"], "ratio whole command / baseline speed"),
    ("bench_native.py", ["--maps", "2"], "registered / nitransforms"),
    ("bench_stream.py", ["--rows", "600"], "ratio zarr / npy throughput"),
    ("bench_pool.py", ["--maps", "30"], "pool_maps random"),
    ("bench_pool_null.py", ["--voxels", "2000", "--sims", "2", "--designs", "5x6"], "holds .05"),
    ("bench_lookup.py", ["--rows", "600", "--subset", "300", "--queries", "3"], "ratio transform / alone"),
])
def test_benchmark_script_runs(script, args, expect):
    out = subprocess.run([sys.executable, str(BENCH / script), *args], capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    assert expect in out.stdout
