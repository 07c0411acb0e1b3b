"""The default pooling method holds its nominal false-positive rate on simulated null studies; the
methods that do not are measured as not holding it (so the check can fail).  Full size:
tests/benchmarks/bench_pool_null.py, figures in BENCHMARKS.md.  HKSJ against statsmodels."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from scipy import stats

import mapstore
from mapstore.analyses import DEFAULT_METHOD, combine, pool

from ..conftest import make_derivative, write_json, write_map

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
from bench_pool_null import rates  # noqa: E402


def test_the_default_holds_its_level_on_null_studies_and_random_effects_do_not():
    got = rates(5, 8, voxels=20000, sims=4, seed=3)  # 80,000 null voxel tests per method
    assert DEFAULT_METHOD == "stouffer" and got["stouffer"]["holds_05"], got["stouffer"]
    assert not got["random"]["holds_05"] and got["random"]["rate_001"] > 0.002  # anti-conservative
    assert not got["fixed"]["holds_05"]


def test_pool_on_a_null_store_calls_about_alpha_of_its_voxels(tmp_path):
    """The whole path (index, features, select, pool's study maps, the default method) on null maps."""
    rng = np.random.default_rng(5)
    shape, aff = (20, 20, 20), np.diag([4.0, 4.0, 4.0, 1.0])
    for s in range(5):
        ds = make_derivative(tmp_path / "src" / f"null{s}", f"null{s}")
        for i in range(6 + s % 3):
            write_map(ds / f"sub-{i:02d}" / f"sub-{i:02d}_task-x_contrast-a_stat-effect_statmap.nii.gz",
                      rng.standard_normal(shape).astype(np.float32), aff)
    store = tmp_path / "store"
    mapstore.index([tmp_path / "src"], store, progress=False, jobs=1)
    grid = write_json(tmp_path / "grid.json", {"shape": list(shape), "affine": aff.tolist()})
    mask = write_map(tmp_path / "mask.nii.gz", np.ones(shape, np.uint8), aff)
    mapstore.build_features(store, grid=str(grid), mask=str(mask), progress=False, jobs=1)
    res = pool(mapstore.open(store).select(missing="keep", group_by="study"))
    z = res.z[np.isfinite(res.z)]
    assert z.size == 8000 and res.method == "stouffer"
    lo, hi = stats.binom.interval(0.999, z.size, 0.05)
    assert lo <= np.sum(z > stats.norm.isf(0.05)) <= hi


def test_hksj_equals_statsmodels():
    """statsmodels' combine_effects (DerSimonian-Laird) gives var_hksj_re; the estimate over its root is
    Student t with k - 1 degrees of freedom."""
    from statsmodels.stats.meta_analysis import combine_effects

    rng = np.random.default_rng(8)
    e = rng.normal(0.3, 0.4, size=(6, 30))
    v = rng.uniform(0.01, 0.1, size=(6, 30))
    got = combine(effect=e, variance=v, method="random-hksj")
    for j in range(e.shape[1]):
        ref = combine_effects(e[:, j], v[:, j], method_re="dl")
        # DerSimonian-Laird truncates tau^2 at 0 (then the weights are fixed effects'); statsmodels weights
        # with the untruncated estimate, so where it is below 0 the fixed-effects HKSJ is the reference
        mean, var = (ref.mean_effect_fe, ref.var_hksj_fe) if ref.tau2 <= 0 else (ref.mean_effect_re, ref.var_hksj_re)
        want = stats.norm.isf(stats.t.sf(mean / np.sqrt(var), 5))
        np.testing.assert_allclose([got["effect"][j], got["variance"][j], got["z"][j]], [mean, var, want], rtol=1e-9)
