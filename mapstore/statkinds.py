"""The kinds of statistic a map can hold: one table that every stage reads.

Each :class:`StatKind` says, for one catalog ``stat`` label, the words GLM writers put in their
file names for it, the NIfTI intent codes that declare it, what it needs to become z, the range
its values must lie in, and whether it is a contrast's map or a map of the model as a whole.
Adding a kind is one entry in :data:`STAT_KINDS`.

Writer words are facts of the trade (common practice, from memory of each program's outputs):
FSL FEAT (``cope``, ``varcope``, ``tstat``, ``zstat``, ``fstat``, ``zfstat``, ``pe``,
``sigmasquareds``, ``threshac``), SPM (``con``, ``spmT``, ``spmF``, ``beta``, ``ResMS``, ``RPV``,
``ess``), FreeSurfer ``mri_glmfit``/FS-FAST (``gamma``, ``gammavar``, ``sig``, ``ces``,
``cesvar``), AFNI bucket labels (``Coef``, ``Tstat``, ``Fstat``), nilearn's writer
(``effect_size``, ``effect_variance``, ``z_score``, ``p_value``, ``stat``, ``r_square``).
Intent codes are nifti1.h's (``tests`` check them against nibabel's table).

Examples
--------
>>> stat_kind("t").to_z, stat_kind("t").needs
('t', ('dof',))
>>> kind_for_word("zfstat").label, kind_for_word("varcope").label, kind_for_word("ResMS").label
('z', 'variance', 'residvar')
>>> kind_for_word("gamma").label, stat_kind("rsquared").role
('effect', 'model')
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["StatKind", "STAT_KINDS", "stat_kind", "kind_for_word", "kinds_for_intent", "known_stats",
           "convertible_to_z", "contrast_stats", "STAT_PREFERENCE", "COMPANION_WORDS", "LEVELS", "SUBJECT_LEVELS", "LEVEL_CHOICES",
           "POOL_METHODS", "POOL_DEFAULT", "POOLABLE"]


@dataclass(frozen=True)
class StatKind:
    """One kind of statistic.

    Attributes
    ----------
    label : str
        The catalog's ``stat`` label (a BIDS statistical-derivatives label where one exists).
    words : tuple of str
        Names writers give it in file names and labels, matched without regard to case.
    intents : tuple of int
        NIfTI intent codes that declare it (nifti1.h).
    to_z : str or None
        How it becomes z: ``"t"``, ``"F"``, ``"p"``, ``"logp"`` (signed -log10 p), ``"same"`` (it
        is z), or None (it cannot).
    needs : tuple of str
        What the conversion needs: ``dof`` (residual DOF), ``dof_numerator`` (F's df1),
        ``sidedness`` (p values).
    low, high : float
        The range valid values lie in (inclusive).
    role : str
        ``"contrast"`` (a contrast's map: decoders and pooling take it) or ``"model"`` (a map of
        the model as a whole, or of one regressor: residual variance, R^2, a parameter estimate).
    """

    label: str
    words: tuple[str, ...]
    intents: tuple[int, ...] = ()
    to_z: str | None = None
    needs: tuple[str, ...] = ()
    low: float = -math.inf
    high: float = math.inf
    role: str = "contrast"
    description: str = ""


_INF = math.inf
STAT_KINDS: tuple[StatKind, ...] = (
    StatKind("z", ("z", "zstat", "zmap", "z_score", "zscore", "zfstat", "zf", "z_stat"), (5,), "same",
             description="standard normal deviate"),
    StatKind("t", ("t", "tstat", "spmT", "tmap", "t_stat", "tvalue"), (3,), "t", ("dof",),
             description="Student t"),
    StatKind("F", ("F", "fstat", "spmF", "fmap", "f_stat", "fvalue"), (4,), "F", ("dof", "dof_numerator"), 0.0,
             description="F ratio"),
    StatKind("p", ("p", "pval", "pvalue", "p_value", "pmap"), (22,), "p", ("sidedness",), 0.0, 1.0,
             description="p value"),
    StatKind("logp", ("logp", "sig", "log10p", "neglog10p", "mlog10p"), (24,), "logp", ("sidedness",),
             description="signed -log10 p (sign of the effect)"),
    StatKind("chi2", ("chi2", "chisq", "chi_square"), (6,), None, ("dof",), 0.0, description="chi-squared"),
    StatKind("r", ("r", "correlation", "corr"), (2,), None, (), -1.0, 1.0, description="correlation"),
    StatKind("effect", ("effect", "cope", "con", "ces", "gamma", "effect_size", "estimate", "coef", "contrast_estimate"),
             (1001,), description="contrast estimate (effect size)"),
    StatKind("variance", ("variance", "varcope", "cesvar", "gammavar", "effect_variance", "var", "varcon"), (),
             None, (), 0.0, description="variance of the contrast estimate"),
    StatKind("std", ("std", "se", "stderr", "sd", "sem", "standard_error"), (), None, (), 0.0,
             description="standard error of the contrast estimate"),
    StatKind("ess", ("ess",), (), None, (), 0.0, description="extra sum of squares of an F contrast"),
    StatKind("beta", ("beta", "pe", "parameter_estimate"), (), role="model",
             description="estimate of one regressor (a parameter, not a contrast)"),
    StatKind("residvar", ("residvar", "sigmasquareds", "ResMS", "residual_variance", "sigma2",
                          "rvar"), (), None, (), 0.0, role="model", description="residual variance"),
    StatKind("errorts", ("errorts", "res4d", "residuals"), (2001,), role="model",
             description="residual time series"),
    StatKind("rsquared", ("rsquared", "r_square", "r2", "rsq", "r_squared"), (), None, (), 0.0, 1.0, role="model",
             description="coefficient of determination"),
    StatKind("logl", ("logl", "loglik", "log_likelihood", "loglikelihood"), (), role="model",
             description="log likelihood"),
    StatKind("rpv", ("rpv",), (), None, (), 0.0, role="model", description="resels per voxel (smoothness)"),
    StatKind("threshac", ("threshac", "threshac1"), (), role="model",
             description="autocorrelation estimate"),
)

# of one subject's maps of one contrast, the stat kept first (z and t carry the same evidence)
STAT_PREFERENCE = ("z", "t", "F", "logp", "p", "effect", "variance", "std")
# words of files a model leaves beside its maps that are not statistic maps (common practice)
COMPANION_WORDS = ("mask", "brainmask", "example_func", "mean_func", "filtered_func_data", "design", "bg_image",
                   "standard", "highres", "anat", "smoothness", "qc", "xfm", "warp", "dseg", "probseg",
                   "boldref", "bold", "T1w", "T2w", "aseg")
# the levels of a map: whom it summarises; the first three are one subject's
LEVELS = ("run", "session", "subject", "group", "unknown")
SUBJECT_LEVELS = ("run", "session", "subject")
# how study maps are combined (analyses.combine), the default, and the stats a study's one-sample test
# takes: declared here, where the CLI reads its choices without loading the numeric libraries
POOL_METHODS = ("stouffer", "stouffer-weighted", "fisher", "fixed", "random", "random-hksj", "random-reml")
POOL_DEFAULT = "stouffer"
POOLABLE = ("z", "t", "effect")
# what a ``level=`` choice may name: "subject" is one person's maps (the three above), "any" every level
LEVEL_CHOICES = ("subject", "any") + LEVELS

_BY_LABEL = {k.label: k for k in STAT_KINDS}
_BY_WORD = {w.lower(): k for k in STAT_KINDS for w in k.words}


def stat_kind(label: str | None) -> StatKind | None:
    """The kind of a catalog ``stat`` label (``None`` for a label no entry knows)."""
    if label is None:
        return None
    return _BY_LABEL.get(label) or _BY_LABEL.get(label.lower()) or (
        _BY_LABEL["F"] if label.lower() == "f" else None)


def kind_for_word(word: str | None) -> StatKind | None:
    """The kind a writer's word names (``cope``, ``spmT``, ``sigmasquareds`` ...), case aside."""
    if not word:
        return None
    return _BY_WORD.get(word.lower())


def kinds_for_intent(code: int | None) -> tuple[str, ...]:
    """The stat labels a NIfTI intent code declares (empty for none or an unrelated code)."""
    if code is None:
        return ()
    return tuple(k.label for k in STAT_KINDS if code in k.intents)


def known_stats() -> tuple[str, ...]:
    return tuple(_BY_LABEL)


def convertible_to_z() -> tuple[str, ...]:
    """Labels of the kinds that become z (z itself included)."""
    return tuple(k.label for k in STAT_KINDS if k.to_z is not None)


def contrast_stats() -> tuple[str, ...]:
    return tuple(k.label for k in STAT_KINDS if k.role == "contrast")
