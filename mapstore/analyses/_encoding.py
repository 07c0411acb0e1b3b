"""Encoding models: maps predicted from descriptors of their conditions, scored per voxel out of fold.

An encoding model turns a decoder around: the descriptors of a map's condition (its concepts, or a
user's table of stimulus features per task and contrast) are the inputs, the map's voxels the outputs.
Scores are computed on held-out folds only (the selection's leakage-checked splits), per voxel: R^2
(1 - residual / total sum of squares, as scikit-learn's ``r2_score`` per output) and the Pearson
correlation of prediction and map.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import ParameterError
from ..select import Selection

__all__ = ["EncodingScores", "concept_descriptors", "encoding_scores"]

_KEYS = ("dataset", "study", "task", "contrast")


@dataclass
class EncodingScores:
    """Out-of-fold scores of an encoding model, one value per column of the selection's ``X``."""

    r2: np.ndarray
    r: np.ndarray
    predictions: np.ndarray  # (n_maps, n_columns), each row predicted by a model that never saw it
    descriptors: list[str]
    n_splits: int
    selection: Selection = field(repr=False)

    def to_image(self, which: str = "r2"):
        """The per-voxel ``r2`` or ``r`` painted back on the feature set's grid or mesh."""
        if which not in ("r2", "r"):
            raise ParameterError(f"which must be 'r2' or 'r', got {which!r}")
        return self.selection.to_image(getattr(self, which))

    def summary(self) -> str:
        finite = np.isfinite(self.r2)
        best = float(np.nanmax(self.r2)) if finite.any() else float("nan")
        return (f"encoding model on {len(self.descriptors)} descriptor(s), {self.n_splits} split(s): median R^2 "
                f"{float(np.nanmedian(self.r2)):.3f}, best {best:.3f}; median r {float(np.nanmedian(self.r)):.3f} "
                f"over {int(finite.sum()):,} columns")


def concept_descriptors(sel: Selection) -> tuple[np.ndarray, list[str]]:
    """0/1 indicators of each map's concepts (the labels), and the concept names."""
    names = sorted({c for cs in sel.meta["concepts"] for c in cs})
    D = np.zeros((len(sel), len(names)), dtype=np.float64)
    at = {c: i for i, c in enumerate(names)}
    for row, cs in enumerate(sel.meta["concepts"]):
        for c in cs:
            D[row, at[c]] = 1.0
    return D, names


def _table_descriptors(sel: Selection, table) -> tuple[np.ndarray, list[str]]:
    """Descriptors from a user's table keyed by some of dataset / study / task / contrast."""
    import pandas as pd

    if not isinstance(table, pd.DataFrame):
        raise ParameterError("descriptors must be a pandas DataFrame keyed by dataset, study, task or contrast")
    keys = [k for k in _KEYS if k in table.columns]
    if not keys:
        raise ParameterError(f"the descriptors table needs a key column among {list(_KEYS)}")
    values = [c for c in table.columns if c not in keys]
    if table.duplicated(keys).any():
        raise ParameterError(f"the descriptors table has several rows for one key ({', '.join(keys)})")
    merged = sel.meta[keys].merge(table, on=keys, how="left")
    missing = merged[values].isna().any(axis=1)
    if missing.any():
        ex = sel.meta.loc[missing.to_numpy(), keys].drop_duplicates().head(3).to_dict("records")
        raise ParameterError(f"{int(missing.sum())} selected map(s) have no descriptors (e.g. {ex}); add their "
                             "rows to the table or narrow the selection")
    return merged[values].to_numpy(np.float64), list(values)


def encoding_scores(sel: Selection, descriptors: Any = None, *, model: Any = None, splits=None,
                    scheme: str = "leave-one-group-out", seed: int = 0) -> EncodingScores:
    """Predict each map from its descriptors and score every voxel on held-out maps.

    Parameters
    ----------
    sel : Selection
        The maps (``sel.X``: the outputs).
    descriptors : pandas.DataFrame, optional
        Inputs per map, keyed by some of dataset/study/task/contrast; default: the maps' concept
        indicators (:func:`concept_descriptors`).
    model : scikit-learn regressor, optional
        Default ``RidgeCV`` over alphas 10^-2 .. 10^4 (multi-output).
    splits : list of (train, test), optional
        Default ``sel.splits(scheme, seed)`` (the store's leakage rules; test classes unseen in
        training are allowed: the outputs are maps, not classes).

    Returns
    -------
    EncodingScores
    """
    from sklearn.linear_model import RidgeCV
    from sklearn.model_selection import cross_val_predict

    D, names = concept_descriptors(sel) if descriptors is None else _table_descriptors(sel, descriptors)
    if D.shape[1] == 0:
        raise ParameterError("no descriptors: the selected maps carry no concepts (run 'mapstore labels') and no "
                             "table was given")
    if splits is None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # unseen classes do not matter here: maps are the outputs
            splits = sel.splits(scheme, seed, allow_unseen=True)
    else:
        sel.check(splits, allow_unseen=True)
    X = np.asarray(sel.X, dtype=np.float64)
    if not np.isfinite(X).all():
        raise ParameterError("X has missing values: select with missing='common' or 'zero'")
    model = model if model is not None else RidgeCV(alphas=np.logspace(-2, 4, 13))
    tested = np.zeros(len(sel), dtype=bool)
    for _, te in splits:
        tested[te] = True
    if not tested.all():
        raise ParameterError("every map must be in one test side: use a scheme whose folds cover the selection "
                             "(leave-one-group-out, group-kfold:K)")
    P = cross_val_predict(model, D, X, cv=splits)
    resid = ((X - P) ** 2).sum(axis=0)
    total = ((X - X.mean(axis=0)) ** 2).sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = np.where(total > 0, 1.0 - resid / total, np.nan)
        xc, pc = X - X.mean(axis=0), P - P.mean(axis=0)
        r = (xc * pc).sum(axis=0) / np.sqrt((xc ** 2).sum(axis=0) * (pc ** 2).sum(axis=0))
    return EncodingScores(r2.astype(np.float32), r.astype(np.float32), P.astype(np.float32), names, len(splits), sel)
