"""Pooled-map statistics: study-level maps from subjects' maps, and their combination across studies,
voxel by voxel, NaN-aware (a voxel a study did not measure is left out of that voxel's combination).

Methods (published names; formulas as in the meta-analysis literature, e.g. Borenstein et al.,
*Introduction to Meta-Analysis*, 2009, chapters 11-16, from memory):

- ``stouffer``: z = sum(z_i) / sqrt(k); ``stouffer-weighted``: weights sqrt(n_i), z = sum(w z) / sqrt(sum w^2)
- ``fisher``: X^2 = -2 sum log p_i with 2k degrees of freedom (p_i one-sided, from z_i)
- ``fixed``: inverse-variance weights w_i = 1/v_i; estimate sum(w e) / sum(w), variance 1/sum(w)
- ``random``: DerSimonian-Laird tau^2 = max(0, (Q - (k - 1)) / (sum w - sum w^2 / sum w)), weights
  1/(v_i + tau^2); I^2 = max(0, (Q - (k - 1)) / Q)
- ``random-hksj``: DerSimonian-Laird weights, the variance of the estimate by Hartung-Knapp-Sidik-Jonkman
  (sum w (e - mu)^2 / ((k - 1) sum w)), the estimate over its standard error referred to Student t with
  k - 1 degrees of freedom (then given as the z of the same p)
- ``random-reml``: tau^2 by restricted maximum likelihood (Viechtbauer, 2005, from memory), iterated from
  the DerSimonian-Laird value; I^2 = tau^2 / (tau^2 + s^2), s^2 the typical within-study variance
  (k - 1) sum w / ((sum w)^2 - sum w^2) (Higgins & Thompson, 2002), which equals the Q form above for
  DerSimonian-Laird's tau^2

Everything works on blocks of voxels, so memory is bounded by the block, not by the maps.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from ..formats import digest_map, foreign_format
from ..store import check_output, output_folder
from .._version import __version__
from ..errors import ParameterError, PoolError
from ..select import Selection, map_levels
from ._record import PooledRecord, PooledSource
from .._params import FDR_Q, MIN_STUDIES, MIN_SUBJECTS, POOL_METHOD, declared
from ..statkinds import POOL_DEFAULT, POOL_METHODS, POOLABLE

__all__ = ["StudyMaps", "PooledMaps", "one_sample", "study_maps", "variance_maps", "combine", "pool", "pool_maps", "fdr_threshold",
           "write_pooled", "verify_pooled", "METHODS"]

METHODS = POOL_METHODS
_EFFECT_METHODS = ("fixed", "random", "random-hksj", "random-reml")
# the default: the one whose false-positive rate on simulated null studies holds its nominal level
# (tests/analyses/test_pool_null.py; tests/benchmarks/bench_pool_null.py; BENCHMARKS.md)
DEFAULT_METHOD = POOL_DEFAULT
# the most extreme z a method carries: the z of the smallest positive double as a one-sided p (p = 0
# written by a tool, a z of +-inf) -- the value p_to_z gives p = 0
Z_CAP = 37.5

_BLOCK = 8192  # voxels combined at a time


@dataclass
class StudyMaps:
    """One map per study (rows) over the selection's columns: the one-sample test of its subjects' maps."""

    studies: list[str]
    effect: np.ndarray  # mean of the subjects' values
    variance: np.ndarray  # of that mean (s^2 / n)
    t: np.ndarray
    z: np.ndarray  # t converted with n - 1 DOF, voxel by voxel
    n: np.ndarray  # subjects with a value, per voxel (NaN in the others where n < min_subjects)
    n_subjects: np.ndarray  # per study
    # what was left out or changed, by reason: per reason, per study and voxel, how many subjects' values
    left_out: dict[str, np.ndarray] = field(default_factory=dict)


@dataclass
class PooledMaps:
    """Studies combined voxel by voxel; arrays over the selection's columns (NaN where no study measured)."""

    method: str
    z: np.ndarray
    p: np.ndarray  # one-sided, from z
    n_studies: np.ndarray
    effect: np.ndarray | None = None  # fixed and random effects
    variance: np.ndarray | None = None
    tau2: np.ndarray | None = None
    i2: np.ndarray | None = None
    q: np.ndarray | None = None
    studies: list[str] = field(default_factory=list)
    selection: Selection | None = field(default=None, repr=False)
    provenance: dict[str, Any] = field(default_factory=dict)

    def to_image(self, which: str = "z"):
        """One of the maps (``z``, ``p``, ``effect``, ``variance``, ``tau2``, ``i2``, ``n_studies``) as an image."""
        values = getattr(self, which, None)
        if values is None or self.selection is None:
            raise ParameterError(f"no {which!r} map (method {self.method!r})")
        return self.selection.to_image(np.asarray(values, dtype=np.float32))

    def fdr(self, q: float = 0.05) -> float:
        """The z threshold that keeps the false discovery rate at ``q`` (Benjamini-Hochberg, one-sided),
        counting only the voxels actually tested; inf when nothing survives."""
        return fdr_threshold(self.z, q)

    def peaks(self, k: int = 10, threshold: float | None = None) -> list[dict[str, Any]]:
        """The ``k`` highest local maxima of z (26-neighbourhood on a volume grid; the highest values
        elsewhere) at or above ``threshold``: position, millimetres where the grid has them, value, and the
        studies that had a value there."""
        if self.selection is None:
            return []
        fs = self.selection.feature_set
        row = np.full(fs.n_voxels, np.nan, dtype=np.float32)
        row[self.selection.voxels] = self.z
        target = fs.target
        full = fs.unmask(row).reshape(-1)
        thr = -np.inf if threshold is None else threshold
        cand = target.local_maxima(full)
        cand = cand[full[cand] >= thr]
        top = cand[np.argsort(-full[cand], kind="stable")[:k]]
        mm = target.millimetres(top)
        flat_of = {int(c): j for j, c in enumerate(fs.mask_indices[self.selection.voxels])}
        out = []
        for i, flat in enumerate(top):
            peak: dict[str, Any] = {"position": target.position(int(flat)), "index": int(flat), "z": float(full[flat])}
            if mm is not None:
                peak["mm"] = [round(float(c), 2) for c in mm[i]]
            j = flat_of.get(int(flat))
            peak["n_studies"] = int(self.n_studies[j]) if j is not None else 0
            out.append(peak)
        return out


def _t_to_z(t: np.ndarray, dof: np.ndarray) -> np.ndarray:
    """z with the same one-sided p as t with ``dof`` (both tails kept exact far out)."""
    from scipy import stats

    with np.errstate(invalid="ignore"):
        z = np.where(t >= 0, stats.norm.isf(stats.t.sf(t, dof)), stats.norm.ppf(stats.t.cdf(t, dof)))
    return z


def one_sample(X: np.ndarray, min_subjects: int = 2) -> tuple[np.ndarray, ...]:
    """The one-sample test of the rows of ``X`` (subjects x voxels) at every voxel, NaN-aware: mean, its
    variance (s^2 / n), t, the z of the same one-sided p (n - 1 DOF) and n; z is 0 where n < min_subjects.

    >>> import numpy as np
    >>> mean, var, t, z, n = one_sample(np.array([[1.0], [2.0], [3.0]]))
    >>> float(mean[0]), round(float(t[0]), 6), int(n[0])  # mean 2, s = 1, t = 2 / (1 / sqrt 3)
    (2.0, 3.464102, 3)
    """
    n = np.isfinite(X).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, np.nansum(X, axis=0) / np.maximum(n, 1), np.nan)
        sd = np.sqrt(np.nansum((X - mean) ** 2, axis=0) / np.maximum(n - 1, 1))
        var = sd ** 2 / np.maximum(n, 1)
        t = mean / np.sqrt(var)
    z = _t_to_z(np.where(n >= min_subjects, t, 0.0), np.maximum(n - 1, 1))
    return mean, var, t, z, n


def study_maps(sel: Selection, *, min_subjects: int = 3, variance: Selection | None = None,
               capped: bool = True) -> StudyMaps:
    """Per study, the one-sample t of its maps at every voxel (the maps of one study are its subjects'
    maps of one contrast, or of one concept), NaN where fewer than ``min_subjects`` have a value.

    The maps are read once, study by study.  Equal to nilearn's ``SecondLevelModel`` one-sample t on the
    same maps where every map has a value.

    With ``variance`` (each subject's variance map, a row per row of ``sel``: see :func:`variance_maps`),
    a study's map is instead the DerSimonian-Laird random-effects combination of its subjects' effects,
    each weighted by its own variance plus the between-subject variance; ``t`` and ``z`` are then the
    effect over its standard error.

    A subject's infinite value (a p written as 0 or 1, then made z) is kept at +-Z_CAP when ``capped``
    (z and t maps), else left out; either way it is counted in ``left_out``, as are the voxels where a
    study has fewer than ``min_subjects`` values.
    """
    if not isinstance(min_subjects, int) or min_subjects < 2:
        raise ParameterError(f"min_subjects must be an integer >= 2, got {min_subjects!r}")
    if variance is not None and len(variance) != len(sel):
        raise ParameterError(f"variance has {len(variance)} maps for {len(sel)} effect maps; give one per map")
    studies = sorted({str(s) for s in sel.studies})
    ncol = len(sel.voxels)
    out = {k: np.full((len(studies), ncol), np.nan) for k in ("effect", "variance", "t", "z", "n")}
    counts = np.zeros(len(studies), dtype=np.int64)
    inf_reason = f"infinite value (kept at +-{Z_CAP:g})" if capped else "infinite value (left out)"
    left = {inf_reason: np.zeros((len(studies), ncol), np.int64),
            "study below min_subjects": np.zeros((len(studies), ncol), np.int64)}
    for s, study in enumerate(studies):
        idx = np.flatnonzero(sel.studies.astype(str) == study)
        sub = sel.subset(idx)
        if sel.missing == "zero":
            sub = _with_missing(sub, "keep")
        X = sub.X.astype(np.float64)
        inf = np.isinf(X)
        if inf.any():
            left[inf_reason][s] = inf.sum(axis=0)
            X = np.where(inf, np.copysign(Z_CAP, X), X) if capped else np.where(inf, np.nan, X)
        counts[s] = len(idx)
        if variance is None:
            mean, var, t, z, n = one_sample(X, min_subjects)
        else:
            V = _with_missing(variance.subset(idx), "keep").with_columns(sel.voxels).X.astype(np.float64)
            got = _combine_blocks(lambda cols: combine(effect=X[:, cols], variance=V[:, cols], method="random"),
                                  ncol)
            mean, var, z, n = got["effect"], got["variance"], got["z"], got["n_studies"]
            t = z
        ok = n >= min_subjects
        left["study below min_subjects"][s] = np.where(ok, 0, n)
        for key, val in (("effect", mean), ("variance", var), ("t", t), ("z", z), ("n", n)):
            out[key][s] = np.where(ok, val, np.nan)
    return StudyMaps(studies, out["effect"], out["variance"], out["t"], out["z"], out["n"], counts, left)


def variance_maps(sel: Selection) -> Selection:
    """The variance map of each of ``sel``'s effect maps (the one of its map family: the same file name
    with ``stat-variance``), row for row, with ``sel``'s columns; a clear error names the first effect
    map that has none."""
    if sel.store is None:
        raise ParameterError("variance maps are found through the store: give a selection made by Store.select")
    stats_ = set(sel.meta["stat"].astype(str))
    if stats_ != {"effect"}:
        raise ParameterError(f"weighting by variance needs effect maps; the selection also holds "
                             f"{sorted(stats_ - {'effect'})} (select stat=['effect'])")
    ids = ", ".join("'" + str(m).replace("'", "''") + "'" for m in sel.map_ids)
    pairs = sel.store.sql("SELECT e.map_id AS effect, min(v.map_id) AS variance FROM map_families e "
                          "JOIN map_families v ON v.family = e.family AND v.stat = 'variance' "
                          f"WHERE e.map_id IN ({ids}) GROUP BY e.map_id").to_pylist()
    of = {p["effect"]: p["variance"] for p in pairs}
    lacking = [i for i, m in enumerate(sel.map_ids) if m not in of]
    if lacking:
        row = sel.meta.iloc[lacking[0]]
        raise ParameterError(f"{row['dataset']}:{row['relpath']}: no variance map beside it (the same name with "
                             f"stat-variance; {len(lacking)} effect maps lack one); index the variance maps, or "
                             "pool without weighting by variance")
    var_ids = [of[m] for m in sel.map_ids]
    got = sel.store.select("map_id IN (" + ", ".join("'" + v.replace("'", "''") + "'" for v in var_ids) + ")",
                           features=sel.feature_set.name, stat=["variance"], missing="keep", one_stat=False,
                           per_subject="map", level="any")
    pos = {m: i for i, m in enumerate(got.map_ids)}
    missing_rows = [v for v in var_ids if v not in pos]
    if missing_rows:
        raise ParameterError(f"{len(missing_rows)} variance maps have no row in feature set "
                             f"{sel.feature_set.name!r}; run 'mapstore features --features {sel.feature_set.name}'")
    return got.subset(np.array([pos[v] for v in var_ids], dtype=np.int64)).with_columns(sel.voxels)


def _with_missing(sel: Selection, policy: str) -> Selection:
    import dataclasses

    return dataclasses.replace(sel, missing=policy, _X=None)


def _term(w: np.ndarray, e: np.ndarray, v: np.ndarray, powers: tuple[int, int, int]) -> np.ndarray:
    """Column sums of w^a e^b v^c over rows (one pass: BLAS for a plain sum, einsum for products)."""
    a, b, c = powers
    ops = [w] * a + [e] * b + [v] * c
    if len(ops) == 1:
        return np.ones(len(w), dtype=w.dtype) @ ops[0]
    while len(ops) > 3:  # einsum leaves its fast loop beyond three operands (~7x slower)
        ops = [ops[0] * ops[1]] + ops[2:]
    return np.einsum(",".join(["ij"] * len(ops)) + "->j", *ops)


# the column sums each step of fixed and random effects needs (powers of w, e - shift and v)
_MOMENTS = ((1, 0, 0), (1, 1, 0), (1, 2, 0), (2, 0, 0))  # fixed weights: sum w, w e, w e^2, w^2
_WEIGHTS = ((1, 0, 0), (1, 1, 0))  # random weights: sum w, w e
_REML = ((1, 0, 0), (1, 1, 0), (2, 0, 0), (2, 1, 0), (2, 2, 0))  # + w^2, w^2 e, w^2 e^2


def _masked_sums(e: np.ndarray, v: np.ndarray, tau: np.ndarray, terms) -> tuple[np.ndarray, np.ndarray]:
    """(studies measured, column sums of ``terms`` with w = 1 / (v + tau)) in float64, a row counting
    where its effect and variance are finite and the variance positive."""
    e, v = np.asarray(e, dtype=np.float64), np.asarray(v, dtype=np.float64)
    ok = np.isfinite(e) & np.isfinite(v) & (v > 0)
    e0, v0 = np.where(ok, e, 0.0), np.where(ok, v, 1.0)
    w = np.where(ok, 1.0 / (v0 + tau), 0.0)
    return ok.sum(axis=0), np.stack([_term(w, e0, v0, t) for t in terms])


def _effects(sums, shift: np.ndarray, method: str, max_iter: int = 100,
             tol: float = 1e-10) -> dict[str, np.ndarray]:
    """Fixed or random effects from column sums: ``sums(tau, terms)`` gives (studies measured, sums) for
    effects less ``shift`` (the shift keeps Q's difference of sums away from cancellation; Q does not
    depend on it).

    ``random`` estimates tau^2 by DerSimonian-Laird; ``random-reml`` by restricted maximum likelihood,
    iterating tau^2 <- sum w^2 ((e - mu)^2 - v) / sum w^2 + 1 / sum w (the Fisher scoring step of the
    REML likelihood), w = 1 / (v + tau^2), from the DerSimonian-Laird value until it moves by less than
    ``tol`` (relative), truncated at 0.
    """
    zero = np.zeros(len(shift))
    k, (s1, s2, s3, s4) = sums(zero, _MOMENTS)
    info: dict[str, Any] = {}
    with np.errstate(invalid="ignore", divide="ignore"):
        q = np.maximum(0.0, s3 - s2 ** 2 / s1)
        typical = (k - 1) * s1 / (s1 ** 2 - s4)  # the typical within-study variance (Higgins & Thompson)
        if method == "fixed":
            est, var, tau2 = s2 / s1, 1.0 / s1, zero
        else:
            tau2 = np.where(k > 1, np.maximum(0.0, (q - (k - 1)) / (s1 - s4 / s1)), 0.0)
            if method == "random-reml":
                passes = 0
                while True:
                    passes += 1
                    sw, swe, sw2, sw2e, sw2e2 = sums(tau2, _REML)[1]
                    sw2v = sw - tau2 * sw2  # w^2 v = w - tau^2 w^2, as w = 1 / (v + tau^2)
                    est, var = swe / sw, 1.0 / sw
                    dev = sw2e2 - 2 * est * sw2e + est ** 2 * sw2
                    new = np.where(k > 1, np.maximum(0.0, (dev - sw2v) / sw2 + 1.0 / sw), 0.0)
                    moving = np.abs(np.nan_to_num(new - tau2)) > tol * (1.0 + tau2)
                    if not moving.any() or passes >= max_iter:
                        break
                    tau2 = new
                info["reml_passes"] = passes
                info["reml_unconverged"] = int(moving.sum())
            elif method == "random-hksj":
                sw, swe, swe2 = sums(tau2, ((1, 0, 0), (1, 1, 0), (1, 2, 0)))[1]
                est = swe / sw
                spread = np.maximum(0.0, swe2 - swe ** 2 / sw)  # sum w (e - mu)^2
                var = np.where(k > 1, spread / (np.maximum(k - 1, 1) * sw), np.nan)
            else:
                sw, swe = sums(tau2, _WEIGHTS)[1]
                est, var = swe / sw, 1.0 / sw
        i2 = np.where(k > 1, tau2 / (tau2 + typical), np.nan) if method == "random-reml" else \
            np.where((k > 1) & (q > 0), np.maximum(0.0, (q - (k - 1)) / q), np.where(k > 1, 0.0, np.nan))
        est = est + shift
        z = est / np.sqrt(var)
        if method == "random-hksj":  # Student t with k - 1 DOF, given as the z of the same p
            z = np.where(k > 1, _t_to_z(np.nan_to_num(z, nan=0.0), np.maximum(k - 1, 1)), np.nan)
            z = np.where(np.isfinite(var) & (var > 0), z, np.nan)
    none = k == 0
    out = {"z": np.where(none, np.nan, z), "effect": np.where(none, np.nan, est),
           "variance": np.where(none, np.nan, var), "tau2": np.where(none, np.nan, tau2), "i2": i2,
           "q": np.where(none, np.nan, q)}
    out.update({key: np.asarray(val) for key, val in info.items()})
    out["n_studies"] = k
    return out


@declared(method=POOL_METHOD)
def combine(z: np.ndarray | None = None, *, effect: np.ndarray | None = None, variance: np.ndarray | None = None,
            n: np.ndarray | None = None, method: str = "random") -> dict[str, np.ndarray]:
    """Combine study maps (rows: studies, columns: voxels) voxel by voxel, NaN-aware.

    ``stouffer`` and ``fisher`` take ``z``; ``stouffer-weighted`` takes ``z`` and ``n`` (sample sizes,
    a row per study or a value per study and voxel); ``fixed``, ``random`` and ``random-reml`` take
    ``effect`` and ``variance``.  Returns arrays per voxel: ``z``, ``p`` (one-sided), ``n_studies``, and
    for fixed and random effects ``effect``, ``variance``, ``q``, ``tau2`` and ``i2``.

    Examples
    --------
    >>> import numpy as np
    >>> from mapstore.analyses import combine
    >>> got = combine(effect=np.array([[0.2], [0.5], [0.3]]), variance=np.array([[0.01], [0.02], [0.01]]),
    ...               method="fixed")
    >>> round(float(got["effect"][0]), 4), int(got["n_studies"][0])  # weights 100, 50, 100
    (0.3, 3)
    """
    from scipy import stats

    if method in _EFFECT_METHODS:
        if effect is None or variance is None:
            raise ParameterError(f"method {method!r} needs effect and variance maps")
        e, v = np.atleast_2d(np.asarray(effect, dtype=np.float64)), np.atleast_2d(np.asarray(variance, dtype=np.float64))
        if e.shape != v.shape:
            raise ParameterError(f"effect {e.shape} and variance {v.shape} differ in shape")
        left = {"zero variance": (v == 0) & np.isfinite(e), "negative variance": (v < 0) & np.isfinite(e),
                "infinite effect or variance": (np.isinf(e) | np.isinf(v))}
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # voxels no study measured
            shift = np.nan_to_num(np.nanmedian(np.where(np.isfinite(v) & (v > 0), e, np.nan), axis=0))
        out = _effects(lambda tau, terms: _masked_sums(e - shift, v, tau, terms), shift, method)
        for reason, where in left.items():
            out["left_out:" + reason] = where.sum(axis=0)
        k = out["n_studies"]
    else:
        if z is None:
            raise ParameterError(f"method {method!r} needs z maps")
        zs = np.atleast_2d(np.asarray(z, dtype=np.float64))
        capped = np.isinf(zs)  # p written as 0 or 1: kept, as the most extreme z the method carries
        zs = np.where(capped, np.copysign(Z_CAP, zs), zs)
        ok = np.isfinite(zs)
        k = ok.sum(axis=0)
        z0 = np.where(ok, zs, 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            if method == "stouffer":
                zz = z0.sum(axis=0) / np.sqrt(k)
            elif method == "stouffer-weighted":
                if n is None:
                    raise ParameterError("stouffer-weighted needs the studies' sample sizes (n)")
                nn = np.asarray(n, dtype=np.float64)
                nn = np.broadcast_to(nn.reshape(-1, 1) if nn.ndim == 1 else nn, zs.shape)
                wt = np.where(ok, np.sqrt(np.where(np.isfinite(nn), nn, 0.0)), 0.0)
                zz = (wt * z0).sum(axis=0) / np.sqrt((wt ** 2).sum(axis=0))
            else:  # fisher
                zz = _fisher_z(np.where(ok, stats.norm.logsf(z0), 0.0).sum(axis=0), k)
        out = {"z": np.where(k > 0, zz, np.nan), f"capped:infinite z (kept at +-{Z_CAP:g})": capped.sum(axis=0)}
    out["p"] = np.where(np.isfinite(out["z"]), stats.norm.sf(out["z"]), np.nan)
    out["n_studies"] = k.astype(np.int64)
    return out


def _fisher_z(sum_logp: np.ndarray, k: np.ndarray) -> np.ndarray:
    """z of Fisher's X^2 = -2 sum log p with 2k degrees of freedom, kept finite far out."""
    from scipy import stats

    chi = -2.0 * sum_logp
    with np.errstate(invalid="ignore", divide="ignore"):
        zz = stats.norm.isf(stats.chi2.sf(chi, 2 * k))
        big = np.isinf(zz)  # p below double precision: z from -log p (the normal tail's asymptote)
        if big.any():
            lp = -stats.chi2.logsf(chi[big], 2 * k[big])
            zz[big] = np.sqrt(np.maximum(0.0, 2 * lp - np.log(4 * np.pi * lp)))
    return zz


def fdr_threshold(z: np.ndarray, q: float = 0.05) -> float:
    """Benjamini-Hochberg on one-sided p of the finite z values: the smallest z kept (inf: none)."""
    from scipy import stats

    if not 0 < q < 1:
        raise ParameterError(f"q must be in (0, 1), got {q!r}")
    zz = np.asarray(z, dtype=np.float64)
    zz = zz[np.isfinite(zz)]
    if zz.size == 0:
        return float("inf")
    p = np.sort(stats.norm.sf(zz))
    m = p.size
    below = np.flatnonzero(p <= q * np.arange(1, m + 1) / m)
    if below.size == 0:
        return float("inf")
    return float(stats.norm.isf(p[below[-1]]))


@declared(method=POOL_METHOD, min_subjects=MIN_SUBJECTS, min_studies=MIN_STUDIES)
def pool(sel: Selection, method: str = DEFAULT_METHOD, *, min_subjects: int = 3, min_studies: int = 2,
         leave_one_out: bool = False, use_variance: bool = False) -> PooledMaps:
    """Do the studies of a selection agree, and where?  Study-level one-sample maps of the selection's
    maps (per study: its subjects' maps), combined across studies with ``method`` (see :data:`METHODS`).

    The default, Stouffer's method on each study's one-sample z, is the method whose false-positive rate
    on simulated null studies holds its nominal level (random effects on studies of a few subjects each
    do not: see the user guide).  A selection of group-level maps (``level="group"``, one per study)
    pools them directly: their z (a t through its DOF), or with ``use_variance`` their effects weighted
    by their variance maps.

    Voxels where fewer than ``min_studies`` studies have a value are NaN.  What was left out, and why, is
    counted (``provenance["left_out"]``): subjects' infinite values (kept at +-Z_CAP for z and t maps),
    studies below ``min_subjects`` at a voxel, zero or negative variances, voxels below ``min_studies``.
    A stat the method cannot take (p, F, random effects on t or z) and an empty result are a
    :class:`~mapstore.errors.PoolError` naming the option that changes it.  ``leave_one_out`` adds, per
    study, how much leaving it out moves the combined z.

    Examples
    --------
    Do the demo's reading studies agree, and where?  (Its studies have two subjects each at this size.)

    >>> import mapstore
    >>> from mapstore.analyses import pool
    >>> sel = mapstore.open(store_path).select(concepts=["reading"], stat=["t", "z"], missing="keep")
    >>> res = pool(sel, min_subjects=2)
    >>> res.method, res.studies
    ('stouffer', ['emberlight', 'inkwell', 'slatecount'])
    >>> top = res.peaks(1)[0]
    >>> top["mm"], top["n_studies"]
    ([-47.0, 13.0, 21.0], 3)
    """
    levels = set(map_levels(sel.meta)) if len(sel) else set()
    group = levels == {"group"}
    if "group" in levels and not group:
        raise PoolError("the selection mixes group maps with subjects' maps; pool one level (level='subject', the "
                        "default, or level='group': one group map per study)")
    native = _check_stats(sel, method, use_variance, group)
    variance = variance_maps(sel) if use_variance else None
    sm = _group_maps(sel, native, variance) if group else \
        study_maps(sel, min_subjects=min_subjects, variance=variance, capped=native != {"effect"})
    res = _combine_study_maps(sm, method)
    few = res["n_studies"] < min_studies
    below = few & (res["n_studies"] > 0)
    for key in ("z", "p", "effect", "variance", "tau2", "i2", "q"):
        if key in res:
            res[key] = np.where(few, np.nan, res[key])
    if not np.isfinite(res["z"]).any():
        most = int(res["n_studies"].max()) if res["n_studies"].size else 0
        raise PoolError(f"nothing to pool: {len(sm.studies)} study(ies) ({', '.join(sm.studies) or 'none'}), at most "
                        f"{most} with a value at any voxel, fewer than min_studies={min_studies}; select maps of "
                        "more studies (--stat, --concept, --level), or lower --min-studies"
                        + ("" if group else f" or --min-subjects ({min_subjects})"))
    left = _left_out(sm, res, below)
    prov = {"method": method, "min_subjects": min_subjects, "min_studies": min_studies,
            "study_maps": "the studies' group maps" if group else
            "random effects of subjects' effect and variance maps" if use_variance else
            "one-sample t of subjects' maps",
            "store": str(sel.store.path) if sel.store is not None else None,
            "studies": {s: int(n) for s, n in zip(sm.studies, sm.n_subjects)}, "query": sel.query,
            "feature_set": sel.feature_set.name, "maps": sel.map_ids, "left_out": left,
            "row_sha256": sel.meta["feature_row_sha256"].tolist() if "feature_row_sha256" in sel.meta else [],
            "versions": {"mapstore": __version__, "numpy": np.__version__},
            "created": time.strftime("%Y-%m-%dT%H:%M:%S"),
            **{key: int(val) for key, val in res.items() if key.startswith("reml_")}}
    if variance is not None:  # their files are sources too: verify checks them
        prov["variance_sources"] = _sources(variance)
    if leave_one_out:
        loo = {}
        for s, study in enumerate(sm.studies):
            keep = [i for i in range(len(sm.studies)) if i != s]
            part = StudyMaps([sm.studies[i] for i in keep], sm.effect[keep], sm.variance[keep], sm.t[keep],
                             sm.z[keep], sm.n[keep], sm.n_subjects[keep])
            z2 = _combine_study_maps(part, method)["z"]
            both = np.isfinite(z2) & np.isfinite(res["z"])
            loo[study] = {"max_abs_change": float(np.max(np.abs(z2[both] - res["z"][both]))) if both.any() else None,
                          "r": float(np.corrcoef(z2[both], res["z"][both])[0, 1]) if both.sum() > 2 else None}
        prov["leave_one_out"] = loo
    return PooledMaps(method, res["z"], res["p"], res["n_studies"], res.get("effect"), res.get("variance"),
                      res.get("tau2"), res.get("i2"), res.get("q"), sm.studies, sel, prov)


def _check_stats(sel: Selection, method: str, use_variance: bool, group: bool) -> set[str]:
    """What the selection's values are ({'z'} for a z feature set, else its maps' stats), refused when the
    method cannot take them."""
    converted = sel.feature_set.spec.stat == "z"
    stats = {"z"} if converted else {str(s) for s in sel.meta["stat"]}
    bad = sorted(stats - set(POOLABLE))
    if bad:
        raise PoolError(f"pool takes z, t or effect maps, not {', '.join(bad)} maps: a p, F or -log10 p map pools "
                        "once it is z (build a z feature set, 'mapstore features --stat z' with --p-sided one or two "
                        "as the writer computed p), or choose --stat z/t/effect")
    by_study = sel.meta.groupby("study")["stat"].nunique() if not converted else None
    if by_study is not None and (by_study > 1).any():
        study = by_study[by_study > 1].index[0]
        raise PoolError(f"study {study!r} has maps of several stats ({', '.join(sorted(stats))}); a study's maps "
                        "must be one stat: choose one with --stat")
    if method in _EFFECT_METHODS and stats != {"effect"}:
        raise PoolError(f"{method} combines effects with their variances; the selection holds "
                        f"{'z values (a z feature set)' if converted else ', '.join(sorted(stats)) + ' maps'}: pool "
                        "t or z maps with stouffer (the default), or select effect maps (--stat effect)")
    if group and stats == {"effect"} and not use_variance:
        raise PoolError("group effect maps pool with their variance maps (--use-variance), or pool the groups' t "
                        "or z maps")
    return stats


def _group_maps(sel: Selection, stats: set[str], variance: Selection | None) -> StudyMaps:
    """One group map per study, as its study map: z (t through its DOF), or effect with its variance."""
    studies = sorted({str(s) for s in sel.studies})
    per = sel.meta.groupby("study").size()
    if (per > 1).any():
        study = per[per > 1].index[0]
        raise PoolError(f"study {study!r} has {int(per[study])} group maps of this selection; pool one per study "
                        "(narrow it with --where or --concept)")
    order = [int(np.flatnonzero(sel.studies.astype(str) == s)[0]) for s in studies]
    X = _with_missing(sel, "keep").X.astype(np.float64)[order]
    inf = np.isinf(X)
    capped = stats != {"effect"}
    X = np.where(inf, np.copysign(Z_CAP, X), X) if capped else np.where(inf, np.nan, X)
    n_inputs = sel.meta["n_inputs"].to_numpy(np.float64)[order] if "n_inputs" in sel.meta else \
        np.full(len(order), np.nan)
    n = np.broadcast_to(n_inputs[:, None], X.shape).copy()
    if variance is not None:
        V = _with_missing(variance, "keep").with_columns(sel.voxels).X.astype(np.float64)[order]
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.where(V > 0, X / np.sqrt(V), np.nan)
        return StudyMaps(studies, X, V, z, z, n, np.nan_to_num(n_inputs).astype(np.int64),
                         {"infinite value (left out)": inf.astype(np.int64)})
    if stats == {"t"} and sel.feature_set.spec.stat != "z":
        dof = sel.meta["dof"].to_numpy(np.float64)[order]
        if not np.all(np.isfinite(dof) & (dof > 0)):
            raise PoolError("a group t map without degrees of freedom cannot become z; add DegreesOfFreedom to its "
                            "sidecar, or pool a z feature set")
        z = _t_to_z(X, dof[:, None])
    else:
        z = X
    return StudyMaps(studies, np.full_like(X, np.nan), np.full_like(X, np.nan), X, z, n,
                     np.nan_to_num(n_inputs).astype(np.int64), {f"infinite value (kept at +-{Z_CAP:g})":
                                                               inf.astype(np.int64)})


def _left_out(sm: StudyMaps, res: dict[str, np.ndarray], below: np.ndarray) -> dict[str, dict[str, int]]:
    """Per reason, how many values (a subject's or a study's at a voxel) were left out or kept at a cap,
    and at how many voxels."""
    out: dict[str, dict[str, int]] = {}
    for reason, counts in sm.left_out.items():
        if counts.any():
            out[f"subjects: {reason}"] = {"values": int(counts.sum()), "voxels": int((counts > 0).any(axis=0).sum())}
    for key, counts in res.items():
        if key.startswith(("left_out:", "capped:")) and np.asarray(counts).any():
            out["studies: " + key.split(":", 1)[1]] = {"values": int(counts.sum()), "voxels": int((counts > 0).sum())}
    if below.any():
        out["voxels below min_studies"] = {"values": int(res["n_studies"][below].sum()), "voxels": int(below.sum())}
    if int(res.get("reml_unconverged", 0)):
        out["studies: REML did not converge"] = {"values": 0, "voxels": int(res["reml_unconverged"])}
    return out


def _combine_study_maps(sm: StudyMaps, method: str) -> dict[str, np.ndarray]:
    """combine() over blocks of voxels (memory bounded by the block)."""
    return _combine_blocks(lambda cols: combine(sm.z[:, cols], effect=sm.effect[:, cols],
                                                variance=sm.variance[:, cols], n=sm.n[:, cols], method=method),
                           sm.z.shape[1])


def _combine_blocks(run: Callable[[slice], dict[str, np.ndarray]], ncol: int) -> dict[str, np.ndarray]:
    """``run`` over blocks of ``_BLOCK`` voxels, the results joined."""
    parts: dict[str, list[np.ndarray]] = {}
    for start in range(0, ncol, _BLOCK):
        got = run(slice(start, start + _BLOCK))
        for key, val in got.items():
            parts.setdefault(key, []).append(val)
    # per voxel: joined; REML's pass count: the most any block took; voxels still moving: summed
    return {key: np.concatenate(vals) if np.ndim(vals[0]) else np.asarray(max(vals) if key == "reml_passes"
                                                                          else sum(vals))
            for key, vals in parts.items()}


@declared(fdr_q=FDR_Q)
def write_pooled(result: PooledMaps, out, fdr_q: float = 0.05, *, overwrite: bool = False) -> PooledRecord:
    """Images of every map the method made, a table of peaks and the provenance, written to folder ``out``.

    The folder appears whole or not at all (written beside its place, then renamed); it may not lie in
    a source dataset or a store, and ``overwrite`` replaces only a folder mapstore wrote."""
    sel = result.selection
    roots = sel.store.sql("SELECT root FROM datasets")["root"].to_pylist() if sel is not None and \
        sel.store is not None else []
    stores = [str(sel.store.path)] if sel is not None and sel.store is not None else []
    place = check_output(out, sources=roots, stores=stores, overwrite=overwrite)
    with output_folder(place, "pooled") as folder:
        return _write_pooled(result, folder, fdr_q)


def _cell(v: Any) -> str:
    """A coordinate as text: millimetres to 0.01, indices and names as they are."""
    return f"{float(v):.2f}" if isinstance(v, (float, np.floating)) else str(v)


def _write_pooled(result: PooledMaps, folder, fdr_q: float) -> PooledRecord:
    written: list[str] = []
    for key in ("z", "p", "effect", "variance", "tau2", "i2", "n_studies"):
        if getattr(result, key) is None:
            continue
        written += _write_map(result, key, folder)
    thr = result.fdr(fdr_q)
    peaks = result.peaks(20, threshold=thr if np.isfinite(thr) else None)
    # one column per coordinate, as the target says where a position is (i, j, k and x, y, z in mm on a
    # grid; hemisphere and vertex on a mesh): any table reader splits nothing
    target = result.selection.feature_set.target if result.selection is not None else None
    where = target.position_columns(np.array([p["index"] for p in peaks], dtype=np.int64)) if target and peaks else {}
    names = list(where) or ["position"]
    with open(folder / "peaks.tsv", "w", encoding="utf-8") as fh:
        fh.write("\t".join(["z", "n_studies", *names]) + "\n")
        for i, p in enumerate(peaks):
            cells = [_cell(where[c][i]) for c in names] if where else [str(p["index"])]
            fh.write("\t".join([f"{p['z']:.4f}", str(p["n_studies"]), *cells]) + "\n")
    from ..formats import sha256_file

    files = written + ["peaks.tsv"]
    record = PooledRecord(
        result.provenance.get("method", result.method), dict(result.provenance),
        fdr={"q": fdr_q, "z_threshold": thr if np.isfinite(thr) else None, "n_tested": int(np.isfinite(result.z).sum())},
        files=files, file_sha256={f: sha256_file(str(folder / f)) for f in files},
        sources=_sources(result.selection) if result.selection is not None else [],
        variance_sources=result.provenance.get("variance_sources") or [])
    record.write(folder)
    return record


_INTENTS = {"z": ("NIFTI_INTENT_ZSCORE",), "p": ("NIFTI_INTENT_PVAL",)}


def _write_map(result: PooledMaps, key: str, folder) -> list[str]:
    """One pooled map as image file(s) on the set's target (its intent code where the format has one)."""
    sel = result.selection
    if sel is None:
        raise PoolError("pooled maps without their selection cannot be written as images")
    fs = sel.feature_set
    row = np.full(fs.n_voxels, np.nan, dtype=np.float32)
    row[sel.voxels] = np.asarray(getattr(result, key), dtype=np.float32)
    return fs.target.write_image(fs.unmask(row), folder, f"pooled_stat-{key}", _INTENTS.get(key))


def _sources(sel: Selection) -> list[PooledSource]:
    """Each map's source file (path, sha256) and the store row it was read from (row hash)."""
    if sel.store is None:
        return []
    import os

    roots = {r["dataset"]: r["root"] for r in sel.store.sql("SELECT dataset, root FROM datasets").to_pylist()}
    rows = sel.meta.get("feature_row_sha256")
    return [PooledSource(m.map_id, os.path.join(roots.get(m.dataset, ""), m.relpath), m.sha256,
                         None if rows is None else rows.iloc[i])
            for i, m in enumerate(sel.meta.itertuples(index=False))]


def verify_pooled(folder) -> list[str]:
    """What changed since ``write_pooled`` wrote ``folder``: its files and the source maps."""
    import os
    from pathlib import Path

    from ..formats import sha256_file

    folder = Path(os.fspath(folder))
    record = PooledRecord.read(folder)
    changes = []
    base = os.path.realpath(folder)
    for name, sha in record.file_sha256.items():
        p = folder / name
        if "/" in name or "\\" in name or name in ("", ".", "..") or not p.is_file():
            changes.append(f"output file missing: {name}")
        elif not os.path.realpath(p).startswith(base + os.sep):
            changes.append(f"output file leads out of the folder (a symbolic link): {name}")
        elif sha256_file(str(p)) != sha:
            changes.append(f"output file changed: {name}")
    hashed: dict[str, str] = {}
    for s in record.sources + record.variance_sources:
        p = Path(s.path)
        if not p.is_file():
            changes.append(f"source missing: {p}")
            continue
        key = os.path.realpath(p)
        if key not in hashed and s.sha256:
            hashed[key] = digest_map(str(p)).sha256 if foreign_format(str(p)) else sha256_file(str(p))
        if s.sha256 and hashed[key] != s.sha256:
            changes.append(f"source changed: {p}")
    return changes


def _ahead(items):
    """The items of an iterator, the next one read in a thread while the caller works on this one (file
    reads and numpy's arithmetic release the GIL, so reading and combining overlap)."""
    from concurrent.futures import ThreadPoolExecutor

    it = iter(items)
    with ThreadPoolExecutor(1) as pool_:
        fut = pool_.submit(next, it, None)
        while True:
            item = fut.result()
            if item is None:
                return
            fut = pool_.submit(next, it, None)
            yield item


def _streamed_sums(sel: Selection, variance: Selection, rows: int, shift: np.ndarray) -> Callable:
    """``sums(tau, terms)`` for :func:`_effects` over given effect and variance maps read in blocks: float32
    column sums where every map of the block is measured, float64 over the measured maps elsewhere.

    The first pass (tau = 0: w = 1 / v) finds, per block, the columns where some map is not measured
    (w not finite and positive, or a sum not finite); later passes reuse them."""
    ncol = len(shift)
    s32 = shift.astype(np.float32)
    unmeasured: list[np.ndarray] = []  # per block: its columns where a map is not measured

    def sums(tau: np.ndarray, terms) -> tuple[np.ndarray, np.ndarray]:
        first = not unmeasured
        if first and tau.any():
            raise ValueError("the first pass over the maps has tau = 0")
        total = np.zeros((len(terms), ncol))
        k = np.zeros(ncol, dtype=np.int64)
        t32 = tau.astype(np.float32)
        buf = np.empty((rows, ncol), dtype=np.float32)
        blocks = ((idx, e, v) for (idx, e, _), (_, v, _) in zip(sel.blocks(rows, reuse=True),
                                                                 variance.blocks(rows, reuse=True)))
        for b, (idx, e, v) in enumerate(_ahead(blocks)):
            n, w = len(idx), buf[:len(idx)]
            e -= s32
            if first:
                np.reciprocal(v, out=w)
            else:
                np.add(v, t32, out=w)
                np.reciprocal(w, out=w)
            got = np.stack([_term(w, e, v, t) for t in terms])
            if first:
                with np.errstate(invalid="ignore"):
                    unmeasured.append(np.flatnonzero(~(w.min(axis=0) > 0) | ~np.isfinite(got).all(axis=0)))
            bad = unmeasured[b]
            got[:, bad] = 0.0
            total += got
            k += n
            if bad.size:
                kb, sb = _masked_sums(e[:, bad], v[:, bad], tau[bad], terms)
                k[bad] += kb - n
                total[:, bad] += sb
        return k, total

    return sums


@declared(method=POOL_METHOD)
def pool_maps(sel: Selection, method: str = "stouffer", *, variance: Selection | None = None,
              n: np.ndarray | None = None, rows: int | None = None) -> PooledMaps:
    """Combine given study-level maps (one row of ``sel`` per study: z maps for ``stouffer``,
    ``stouffer-weighted`` and ``fisher``; effect maps for ``fixed``, ``random`` and ``random-reml``, with
    ``variance``, a selection of their variance maps in the same order) voxel by voxel, streaming the rows
    in blocks of ``rows`` (default: about 16 MB of float32 per block): memory holds a few per-voxel sums
    and two blocks, whatever the number of maps (random effects read the maps twice, tau^2 first;
    ``random-reml`` once more per iteration).  Equal to :func:`combine` on the stacked maps.
    """
    from threadpoolctl import threadpool_limits

    # one BLAS thread: its spinning threads would take the cores the reading thread needs
    with threadpool_limits(limits=1, user_api="blas"):
        return _pool_maps(sel, method, variance, n, rows)


def _pool_maps(sel: Selection, method: str, variance: Selection | None, n: np.ndarray | None,
               rows: int | None) -> PooledMaps:
    from scipy import stats

    rows = rows or max(4, (16 << 20) // (4 * max(1, len(sel.voxels))))
    ncol = len(sel.voxels)
    info: dict[str, Any] = {}
    if method in _EFFECT_METHODS:
        if variance is None or len(variance) != len(sel):
            raise ParameterError(f"method {method!r} needs the variance maps of the same studies (variance=...)")
        variance = variance.with_columns(sel.voxels)
        first = next(sel.blocks(rows))[1]  # a shift near the effects: Q's sums stay apart from cancellation
        with np.errstate(invalid="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            shift = np.nan_to_num(np.nanmedian(first, axis=0).astype(np.float64))
        res = _effects(_streamed_sums(sel, variance, rows, shift), shift, method)
        k = res.pop("n_studies")
        info = {key: res.pop(key).item() for key in [key for key in res if key.startswith("reml_")]}
    else:
        weights = None
        if method == "stouffer-weighted":
            if n is None or len(n) != len(sel):
                raise ParameterError("stouffer-weighted needs each study's sample size (n=..., one per row)")
            weights = np.sqrt(np.asarray(n, dtype=np.float64))
        k = np.zeros(ncol, dtype=np.int64)
        s1, s2 = np.zeros(ncol), np.zeros(ncol)
        capped = np.zeros(ncol, dtype=np.int64)
        for idx, zb, _ in _ahead(sel.blocks(rows, reuse=True)):
            inf = np.isinf(zb)
            if inf.any():  # kept at the most extreme z the method carries, as combine() keeps them
                capped += inf.sum(axis=0)
                zb = np.where(inf, np.copysign(np.float32(Z_CAP), zb), zb)
            if method == "fisher":
                ok = np.isfinite(zb)
                k += ok.sum(axis=0)
                s1 += np.where(ok, stats.norm.logsf(np.where(ok, zb, 0.0).astype(np.float64)), 0.0).sum(axis=0)
                continue
            w = np.ones(len(idx)) if weights is None else weights[idx]
            got = w.astype(np.float32) @ zb
            bad = ~np.isfinite(got)
            got[bad] = 0.0
            s1 += got
            s2 += np.where(bad, 0.0, float((w ** 2).sum()))
            k += len(idx) * ~bad
            if bad.any():
                sub = zb[:, bad].astype(np.float64)
                ok = np.isfinite(sub)
                k[bad] += ok.sum(axis=0)
                s1[bad] += w @ np.where(ok, sub, 0.0)
                s2[bad] += (w ** 2) @ ok
        with np.errstate(invalid="ignore", divide="ignore"):
            z = _fisher_z(s1, k) if method == "fisher" else s1 / np.sqrt(s2)
        res = {"z": np.where(k > 0, z, np.nan)}
        if capped.any():
            info["left_out"] = {f"studies: infinite z (kept at +-{Z_CAP:g})": {
                "values": int(capped.sum()), "voxels": int((capped > 0).sum())}}
    res["p"] = np.where(np.isfinite(res["z"]), stats.norm.sf(res["z"]), np.nan)
    studies = [str(s) for s in sel.studies]
    prov = {"method": method, "given_maps": sel.map_ids, "feature_set": sel.feature_set.name, "query": sel.query,
            "versions": {"mapstore": __version__, "numpy": np.__version__},
            "created": time.strftime("%Y-%m-%dT%H:%M:%S"), **info}
    return PooledMaps(method, res["z"], res["p"], k.astype(np.int64), res.get("effect"), res.get("variance"),
                      res.get("tau2"), res.get("i2"), res.get("q"), studies, sel, prov)
