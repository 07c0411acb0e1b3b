"""Statistic conversions: t to z and p to z, accurate far into the tails.

A t value becomes the z value with the same tail probability:
z = Phi^-1(1 - sf_t(|t|; dof)) with the sign of t, computed from log sf so that
large |t| gives large finite z instead of overflowing.
"""

from __future__ import annotations

import numpy as np

from ..errors import ConversionError

__all__ = ["t_to_z", "p_to_z", "f_to_z", "logp_to_z", "convert"]


def _t_logsf(t: np.ndarray, dof: float) -> np.ndarray:
    """log P(T > t) for t >= 0, with an asymptotic form where the direct one underflows."""
    from scipy import special, stats

    with np.errstate(divide="ignore"):
        out = stats.t.logsf(t, dof)
    bad = ~np.isfinite(out) & np.isfinite(t)
    if bad.any():
        # sf(t) ~ C * dof^((dof-1)/2) * t^(-dof) for large t, C = G((v+1)/2) / (sqrt(v pi) G(v/2))
        v = float(dof)
        log_c = special.gammaln((v + 1) / 2) - special.gammaln(v / 2) - 0.5 * np.log(v * np.pi)
        out[bad] = log_c + 0.5 * (v - 1) * np.log(v) - v * np.log(t[bad])
    return out


def t_to_z(t, dof: float) -> np.ndarray:
    """z values with the same one-sided tail probability as Student t values.

    Parameters
    ----------
    t : array-like
    dof : float
        Degrees of freedom (> 0).

    Returns
    -------
    ndarray of float64; NaN stays NaN, +-inf stays +-inf.

    Examples
    --------
    >>> float(t_to_z(2.228, dof=10).round(2))   # two-sided p = 0.05 at 10 DOF
    1.96
    >>> bool(abs(t_to_z(40.0, dof=20) - 9.296) < 1e-3)
    True
    """
    from scipy import special

    if dof is None or not np.isfinite(dof) or dof <= 0:
        raise ConversionError(f"t to z needs positive degrees of freedom, got {dof!r}")
    t = np.asarray(t, dtype=np.float64)
    a = np.abs(t)
    z = -special.ndtri_exp(_t_logsf(a, dof))  # Phi(-z) = sf  =>  z = -Phi^-1(sf)
    z = np.where(np.isinf(a), np.inf, z)
    return np.copysign(z, t)


def f_to_z(f, df1: float, df2: float) -> np.ndarray:
    """z values with the same upper tail probability as F(df1, df2) values (what nilearn writes as an
    F contrast's z map: z = Phi^-1(1 - p)), from log sf so that large F gives large finite z.

    Examples
    --------
    >>> float(f_to_z(4.10, 2, 30).round(2))   # p = 0.0267 (scipy.stats.f.sf(4.10, 2, 30))
    1.93
    """
    from scipy import special, stats

    for name, d in (("df1", df1), ("df2", df2)):
        if d is None or not np.isfinite(d) or d <= 0:
            raise ConversionError(f"F to z needs positive {name}, got {d!r}")
    f = np.asarray(f, dtype=np.float64)
    if np.any(f < 0):
        raise ConversionError("F values must be >= 0; is this really an F map?")
    with np.errstate(divide="ignore"):
        logsf = stats.f.logsf(f, df1, df2)
    # p = 0 in float64 (F far in the tail): the smallest positive double, as for p maps
    logsf = np.maximum(logsf, np.log(np.finfo(np.float64).tiny))
    z = -special.ndtri_exp(logsf)
    return np.where(np.isinf(f), np.inf, z)


def p_to_z(p, sided: str = "one") -> np.ndarray:
    """z values for p values: one-sided z = Phi^-1(1 - p), two-sided z = Phi^-1(1 - p/2) (>= 0).

    p = 0 is taken as the smallest positive double (z ~ 37.5) and p = 1 as 1 - 2^-53, so no
    value is infinite.

    Examples
    --------
    >>> [round(float(z), 3) for z in p_to_z([0.05, 0.01], "two")]
    [1.96, 2.576]
    """
    from scipy import special

    if sided not in ("one", "two"):
        raise ConversionError(f"sided must be 'one' or 'two', got {sided!r}")
    p = np.asarray(p, dtype=np.float64)
    if np.any((p < 0) | (p > 1)):
        raise ConversionError("p values must lie in [0, 1]; is this really a p map?")
    q = np.clip(p, np.finfo(np.float64).tiny, 1.0 - np.finfo(np.float64).epsneg)
    if sided == "two":
        q = q / 2
    return -special.ndtri(q)


def logp_to_z(v, sided: str = "two") -> np.ndarray:
    """z values for signed -log10 p values (FreeSurfer's ``sig``: -log10 p carrying the effect's sign).

    p = 10^-abs(v); z = sign(v) Phi^-1(1 - p/2) for two-sided p (FreeSurfer's t tests, from memory),
    sign(v) Phi^-1(1 - p) for one-sided p.

    Examples
    --------
    >>> [round(float(z), 3) for z in logp_to_z([-np.log10(0.05), np.log10(0.01)], "two")]
    [1.96, -2.576]
    """
    v = np.asarray(v, dtype=np.float64)
    with np.errstate(over="ignore"):
        p = np.power(10.0, -np.abs(v))
    return np.copysign(p_to_z(p, sided), v)


_DOF_SOURCES = ("no DegreesOfFreedom in its JSON sidecars, no t-test intent_p1 in its header, no design matrix "
                "(*_design.tsv whose entities match the map's, any session and run) beside it or in a folder "
                "above, no {T_[df]} in its header description, no DOF file named by a name rule")


def convert(values: np.ndarray, stat: str, to: str, *, dof: float | None = None,
            sided: str = "one", where: str = "", dof1: float | None = None) -> tuple[np.ndarray, str]:
    """Convert a map's values to ``to`` ("native" or "z"); returns values and what was done."""
    if to == "native" or stat == to:
        return values, "none"
    if to != "z":
        raise ConversionError(f"cannot convert to {to!r}; choose 'native' or 'z'")
    if stat == "t":
        if dof is None or not np.isfinite(dof):
            raise ConversionError(f"{where}: t to z needs degrees of freedom, and none was found ({_DOF_SOURCES}); "
                                  "add DegreesOfFreedom to the map's JSON sidecar, or build this feature set with "
                                  "the native stat")
        return t_to_z(values, dof).astype(np.float32), f"t->z(dof={dof:g})"
    if stat == "p":
        v = np.asarray(values)
        bad = (v < 0) | (v > 1)
        if np.any(bad):
            raise ConversionError(f"{where}: {int(np.count_nonzero(bad))} value(s) outside [0, 1] (from "
                                  f"{float(np.nanmin(v)):g} to {float(np.nanmax(v)):g}); this is not a p map "
                                  "(a 1 - p or log p map?): rename it or leave it out of z sets")
        return p_to_z(v, sided).astype(np.float32), f"p->z({sided}-sided)"
    if stat == "F":
        if dof is None or not np.isfinite(dof):
            raise ConversionError(f"{where}: F to z needs the denominator degrees of freedom, and none was found "
                                  f"({_DOF_SOURCES}); add DegreesOfFreedom to the map's JSON sidecar")
        if dof1 is None:
            raise ConversionError(f"{where}: F to z needs the numerator degrees of freedom (the F contrast's rank), "
                                  "read from the effect map beside it (same name with stat-effect, one volume per "
                                  "contrast row), which is not there")
        return f_to_z(values, dof1, dof).astype(np.float32), f"F->z(df1={dof1:g},df2={dof:g})"
    if stat == "logp":
        return logp_to_z(values, sided).astype(np.float32), f"logp->z({sided}-sided)"
    raise ConversionError(f"{where}: a {stat!r} map cannot be converted to z (only t, F, p and signed -log10 p "
                          "maps can); "
                          "select t, F, z or p maps for a z feature set")
