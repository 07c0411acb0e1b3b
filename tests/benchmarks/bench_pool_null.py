"""How often each pooling method calls a voxel significant when no study has an effect.

    python tests/benchmarks/bench_pool_null.py [--voxels 20000 --sims 20]

Null studies as labs have them: k studies (5 to 20) of n subjects each (6 to 30), each subject's effect
map N(0, 1) at every voxel (no effect anywhere; the voxels independent, so each is a trial).  Each study's
map is its subjects' one-sample test (``one_sample``, as ``pool`` computes it), then the studies are
combined by each method (``combine``).  Reported per method and design: the false-positive rate at
one-sided alpha 0.05 and 0.001 over every voxel of every simulation, with its binomial 99% interval, and
the share of simulations in which any voxel survives FDR q = 0.05 (under the global null, FDR control
is family-wise control: the nominal rate is q).  A method holds its level when the interval covers the
nominal rate.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from mapstore.analyses import combine, fdr_threshold, one_sample  # noqa: E402

METHODS = ("stouffer", "random", "random-hksj", "fixed")
DESIGNS = ((5, 6), (5, 9), (10, 8), (20, 6), (5, 30), (20, 30))


def simulate(k: int, n: int, voxels: int, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
    """One null consortium: per method, the pooled z (voxels,)."""
    z, e, v = [], [], []
    for _ in range(k):
        sizes = n + int(rng.integers(0, 3))  # studies differ a little in size
        mean, var, _, zs, _ = one_sample(rng.standard_normal((sizes, voxels)), 2)
        z.append(zs)
        e.append(mean)
        v.append(var)
    zz, ee, vv = np.array(z), np.array(e), np.array(v)
    return {m: combine(zz, effect=ee, variance=vv, method=m)["z"] for m in METHODS}


def rates(k: int, n: int, voxels: int, sims: int, seed: int = 7) -> dict[str, dict[str, float]]:
    from scipy import stats

    rng = np.random.default_rng(seed)
    hits = {m: np.zeros(2) for m in METHODS}
    fwe = {m: 0 for m in METHODS}
    for _ in range(sims):
        got = simulate(k, n, voxels, rng)
        for m, z in got.items():
            hits[m] += [np.sum(z > stats.norm.isf(0.05)), np.sum(z > stats.norm.isf(0.001))]
            fwe[m] += int(np.isfinite(fdr_threshold(z, 0.05)))
    total = voxels * sims
    out = {}
    for m in METHODS:
        r05, r001 = hits[m] / total
        lo, hi = stats.binom.interval(0.99, total, 0.05)
        out[m] = {"rate_05": float(r05), "rate_001": float(r001), "fdr_any": fwe[m] / sims,
                  "holds_05": bool(lo / total <= r05 <= hi / total)}
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--voxels", type=int, default=20000)
    ap.add_argument("--sims", type=int, default=20)
    ap.add_argument("--designs", default=",".join(f"{k}x{n}" for k, n in DESIGNS))
    args = ap.parse_args(argv)
    print(f"{'design':>9s}  {'method':12s} {'p<.05':>7s} {'p<.001':>8s} {'FDR any':>8s}  holds .05")
    for design in args.designs.split(","):
        k, n = (int(x) for x in design.split("x"))
        for m, r in rates(k, n, args.voxels, args.sims).items():
            print(f"{k:>3d} x {n:<3d}  {m:12s} {r['rate_05']:7.4f} {r['rate_001']:8.5f} {r['fdr_any']:8.2f}  "
                  f"{'yes' if r['holds_05'] else 'NO'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
