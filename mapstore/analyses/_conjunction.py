"""Where pooling and decoding agree: the columns a pooled map (the studies' marginal association with a
concept) and a decoder's weights (the conditional association) both point to, with one sign.

The pooled map passes where Benjamini-Hochberg at ``q`` keeps its two-sided p; the weights pass by a
stated rule (the ``top`` fraction by absolute value, or absolute value at least ``min_weight``); a column
is in the conjunction where both pass and their signs agree.  The two are put on one column set first:
the columns both were computed on, in the feature set they share.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._version import __version__
from ..errors import ParameterError
from ..select import Selection
from ._pooled import PooledMaps, fdr_threshold

__all__ = ["Conjunction", "conjunction"]


@dataclass
class Conjunction:
    """The conjunction over the common columns (``columns``: positions in the feature set's mask)."""

    columns: np.ndarray
    z: np.ndarray
    weights: np.ndarray
    agree: np.ndarray  # bool: both pass and their signs agree
    z_threshold: float  # |z| the pooled map needed (inf: none passed)
    weight_threshold: float  # |weight| the weights needed
    selection: Selection = field(repr=False)
    provenance: dict[str, Any] = field(default_factory=dict)

    @property
    def sign(self) -> np.ndarray:
        """+1 / -1 where the conjunction holds, 0 elsewhere."""
        return np.where(self.agree, np.sign(self.z), 0.0)

    def to_image(self):
        """The signed conjunction as an image of the feature set (NaN outside the common columns)."""
        fs = self.selection.feature_set
        row = np.full(fs.n_voxels, np.nan, dtype=np.float32)
        row[self.columns] = self.sign.astype(np.float32)
        return fs.to_image(row)

    def table(self):
        """One row per column of the conjunction: its position in the mask, grid millimetres where the set
        has them, the pooled z and the weight."""
        import pandas as pd

        fs = self.selection.feature_set
        idx = np.flatnonzero(self.agree)
        cols = self.columns[idx]
        out = pd.DataFrame({"column": cols, "z": self.z[idx], "weight": self.weights[idx],
                            "sign": np.sign(self.z[idx]).astype(int)})
        mm = fs.target.millimetres(fs.mask_indices[cols])
        if mm is not None:
            out["x_mm"], out["y_mm"], out["z_mm"] = mm[:, 0], mm[:, 1], mm[:, 2]
        return out.sort_values("z", key=np.abs, ascending=False).reset_index(drop=True)


def conjunction(pooled: PooledMaps, weights: np.ndarray, decoder: Selection, *, q: float = 0.05,
                top: float | None = 0.05, min_weight: float | None = None) -> Conjunction:
    """The columns where a pooled map and a decoder's weights both pass and agree in sign.

    Parameters
    ----------
    pooled : PooledMaps
        What :func:`~mapstore.analyses.pool` returned.
    weights : array of shape (n_columns,)
        The decoder's weights over ``decoder``'s columns (``decoder.voxels``), one concept's (a linear
        model's ``coef_[k]``).
    decoder : Selection
        The selection the decoder was trained on, of the pooled map's feature set.
    q : float, default=0.05
        Benjamini-Hochberg false discovery rate on the pooled map's two-sided p.
    top : float or None, default=0.05
        The weights pass in their largest ``top`` fraction by absolute value ...
    min_weight : float, optional
        ... or, given instead, where their absolute value is at least this.
    """
    if pooled.selection is None:
        raise ParameterError("the pooled result has no selection; pool a Selection")
    fs_p, fs_d = pooled.selection.feature_set, decoder.feature_set
    if fs_p.name != fs_d.name or getattr(fs_p.spec, "spec_id", None) != getattr(fs_d.spec, "spec_id", None):
        raise ParameterError(f"the pooled map is of feature set {fs_p.name!r} and the decoder of {fs_d.name!r}; "
                             "a conjunction needs one column set: pool and decode on one feature set")
    w = np.asarray(weights, dtype=np.float64).reshape(-1)
    if w.shape[0] != len(decoder.voxels):
        raise ParameterError(f"weights has {w.shape[0]} values, the decoder's selection {len(decoder.voxels)} "
                             "columns; give one weight per column of X")
    if (top is None) == (min_weight is None):
        raise ParameterError("give one weight rule: top (a fraction) or min_weight (an absolute value)")
    if top is not None and not 0 < top <= 1:
        raise ParameterError(f"top must be in (0, 1], got {top!r}")
    cols, ip, idd = np.intersect1d(np.asarray(pooled.selection.voxels), np.asarray(decoder.voxels),
                                   return_indices=True)
    z = np.asarray(pooled.z, dtype=np.float64)[ip]
    ww = w[idd]
    finite = np.isfinite(z) & np.isfinite(ww)
    # BH on two-sided p at q is BH on one-sided p of |z| at q / 2
    z_thr = fdr_threshold(np.abs(z[finite]), q / 2) if finite.any() else float("inf")
    if top is not None:
        w_thr = float(np.quantile(np.abs(ww[finite]), 1 - top)) if finite.any() else float("inf")
        rule = f"the top {top:g} of absolute weights"
    else:
        w_thr, rule = float(min_weight), f"absolute weight >= {min_weight:g}"  # type: ignore[arg-type]
    agree = finite & (np.abs(z) >= z_thr) & (np.abs(ww) >= w_thr) & (np.sign(z) == np.sign(ww)) & (z != 0)
    prov = {"q": q, "z_threshold": z_thr if np.isfinite(z_thr) else None, "weight_rule": rule,
            "weight_threshold": w_thr, "n_common": int(len(cols)), "n_agree": int(agree.sum()),
            "pooled": {k: pooled.provenance.get(k) for k in ("method", "store", "feature_set", "maps", "query")},
            "decoder": {"store": str(decoder.store.path) if decoder.store is not None else None,
                        "feature_set": fs_d.name, "maps": decoder.map_ids, "query": decoder.query},
            "versions": {"mapstore": __version__}, "created": time.strftime("%Y-%m-%dT%H:%M:%S")}
    return Conjunction(cols, z, ww, agree, z_thr, w_thr, decoder, prov)
