"""Pooled-map statistics: study-level maps from subjects' maps, and their combination across studies,
voxel by voxel, NaN-aware (a voxel a study did not measure is left out of that voxel's combination).

Methods (published names; formulas as in the meta-analysis literature, e.g. Borenstein et al.,
*Introduction to Meta-Analysis*, 2009, chapters 11-16, from memory):

- ``stouffer``: z = sum(z_i) / sqrt(k); ``stouffer-weighted``: weights sqrt(n_i), z = sum(w z) / sqrt(sum w^2)
- ``fisher``: X^2 = -2 sum log p_i with 2k degrees of freedom (p_i one-sided, from z_i)
- ``fixed``: inverse-variance weights w_i = 1/v_i; estimate sum(w e) / sum(w), variance 1/sum(w)
- ``random``: DerSimonian-Laird tau^2 = max(0, (Q - (k - 1)) / (sum w - sum w^2 / sum w)), weights
  1/(v_i + tau^2); I^2 = max(0, (Q - (k - 1)) / Q)

Everything works on blocks of voxels, so memory is bounded by the block, not by the maps.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._version import __version__
from ..errors import ParameterError
from ..select import Selection

__all__ = ["StudyMaps", "PooledMaps", "study_maps", "combine", "pool", "pool_maps", "fdr_threshold", "write_pooled",
           "verify_pooled", "METHODS"]

METHODS = ("stouffer", "stouffer-weighted", "fisher", "fixed", "random")
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
        elsewhere) above ``threshold``: position, millimetres where the grid has them, value, and the
        studies that had a value there."""
        if self.selection is None:
            return []
        fs = self.selection.feature_set
        vol = np.full(fs.n_voxels, np.nan, dtype=np.float32)
        vol[self.selection.voxels] = self.z
        grid = fs.unmask(vol)
        cand: list[tuple[float, tuple[int, ...]]] = []
        thr = -np.inf if threshold is None else threshold
        if grid.ndim == 3:
            from scipy import ndimage

            filled = np.nan_to_num(grid, nan=-np.inf)
            local = (filled == ndimage.maximum_filter(filled, size=3, mode="constant", cval=-np.inf))
            for ijk in np.argwhere(local & np.isfinite(grid) & (grid > thr)):
                cand.append((float(grid[tuple(ijk)]), tuple(int(c) for c in ijk)))
        else:  # a mesh or grayordinates: the highest values
            flat_grid = grid.reshape(-1)
            for i in np.flatnonzero(np.isfinite(flat_grid) & (flat_grid > thr)):
                cand.append((float(flat_grid[i]), (int(i),)))
        cand.sort(key=lambda c: -c[0])
        affine = getattr(fs.grid, "affine_array", None)
        flat_of = {int(c): j for j, c in enumerate(fs.mask_indices[self.selection.voxels])}
        out = []
        for v, pos in cand[:k]:
            flat = int(np.ravel_multi_index(pos, grid.shape)) if len(pos) == 3 else pos[0]
            row: dict[str, Any] = {"position": list(pos), "z": v}
            if affine is not None and len(pos) == 3:
                row["mm"] = [round(float(c), 2) for c in (affine[:3, :3] @ np.array(pos) + affine[:3, 3])]
            j = flat_of.get(flat)
            row["n_studies"] = int(self.n_studies[j]) if j is not None else 0
            out.append(row)
        return out


def _t_to_z(t: np.ndarray, dof: np.ndarray) -> np.ndarray:
    """z with the same one-sided p as t with ``dof`` (both tails kept exact far out)."""
    from scipy import stats

    with np.errstate(invalid="ignore"):
        z = np.where(t >= 0, stats.norm.isf(stats.t.sf(t, dof)), stats.norm.ppf(stats.t.cdf(t, dof)))
    return z


def study_maps(sel: Selection, *, min_subjects: int = 3) -> StudyMaps:
    """Per study, the one-sample t of its maps at every voxel (the maps of one study are its subjects'
    maps of one contrast, or of one concept), NaN where fewer than ``min_subjects`` have a value.

    The maps are read once, study by study.  Equal to nilearn's ``SecondLevelModel`` one-sample t on the
    same maps where every map has a value.
    """
    if not isinstance(min_subjects, int) or min_subjects < 2:
        raise ParameterError(f"min_subjects must be an integer >= 2, got {min_subjects!r}")
    studies = sorted({str(s) for s in sel.studies})
    ncol = len(sel.voxels)
    out = {k: np.full((len(studies), ncol), np.nan) for k in ("effect", "variance", "t", "z", "n")}
    counts = np.zeros(len(studies), dtype=np.int64)
    keep_policy = sel.missing
    for s, study in enumerate(studies):
        idx = np.flatnonzero(sel.studies.astype(str) == study)
        sub = sel.subset(idx)
        if keep_policy == "zero":
            sub = _with_missing(sub, "keep")
        X = sub.X.astype(np.float64)
        counts[s] = len(idx)
        n = np.isfinite(X).sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(n > 0, np.nansum(X, axis=0) / np.maximum(n, 1), np.nan)
            sd = np.sqrt(np.nansum((X - mean) ** 2, axis=0) / np.maximum(n - 1, 1))
            var = sd ** 2 / np.maximum(n, 1)
            t = mean / np.sqrt(var)
        ok = n >= min_subjects
        out["effect"][s] = np.where(ok, mean, np.nan)
        out["variance"][s] = np.where(ok, var, np.nan)
        out["t"][s] = np.where(ok, t, np.nan)
        out["z"][s] = np.where(ok, _t_to_z(np.where(ok, t, 0.0), np.maximum(n - 1, 1)), np.nan)
        out["n"][s] = np.where(ok, n, np.nan)
    return StudyMaps(studies, out["effect"], out["variance"], out["t"], out["z"], out["n"], counts)


def _with_missing(sel: Selection, policy: str) -> Selection:
    import dataclasses

    return dataclasses.replace(sel, missing=policy, _X=None)


def combine(z: np.ndarray | None = None, *, effect: np.ndarray | None = None, variance: np.ndarray | None = None,
            n: np.ndarray | None = None, method: str = "random") -> dict[str, np.ndarray]:
    """Combine study maps (rows: studies, columns: voxels) voxel by voxel, NaN-aware.

    ``stouffer`` and ``fisher`` take ``z``; ``stouffer-weighted`` takes ``z`` and ``n`` (sample sizes,
    a row per study or a value per study and voxel); ``fixed`` and ``random`` take ``effect`` and
    ``variance``.  Returns arrays per voxel: ``z``, ``p`` (one-sided), ``n_studies``, and for fixed and
    random effects ``effect``, ``variance``, ``q``, ``tau2`` and ``i2``.
    """
    from scipy import stats

    if method not in METHODS:
        raise ParameterError(f"method must be one of {list(METHODS)}, got {method!r}")
    if method in ("fixed", "random"):
        if effect is None or variance is None:
            raise ParameterError(f"method {method!r} needs effect and variance maps")
        e, v = np.atleast_2d(np.asarray(effect, dtype=np.float64)), np.atleast_2d(np.asarray(variance, dtype=np.float64))
        if e.shape != v.shape:
            raise ParameterError(f"effect {e.shape} and variance {v.shape} differ in shape")
        ok = np.isfinite(e) & np.isfinite(v) & (v > 0)
        k = ok.sum(axis=0)
        w = np.where(ok, 1.0 / np.where(ok, v, 1.0), 0.0)
        e0 = np.where(ok, e, 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            sw = w.sum(axis=0)
            fe = (w * e0).sum(axis=0) / sw
            q = (w * (e0 - fe) ** 2).sum(axis=0)
            out = {"q": np.where(k > 0, q, np.nan),
                   "i2": np.where((k > 1) & (q > 0), np.maximum(0.0, (q - (k - 1)) / q), np.where(k > 1, 0.0, np.nan))}
            if method == "fixed":
                est, var = fe, 1.0 / sw
                tau2 = np.zeros_like(fe)
            else:
                c = sw - (w ** 2).sum(axis=0) / sw
                tau2 = np.where(k > 1, np.maximum(0.0, (q - (k - 1)) / c), 0.0)
                wr = np.where(ok, 1.0 / (np.where(ok, v, 1.0) + tau2), 0.0)
                est = (wr * e0).sum(axis=0) / wr.sum(axis=0)
                var = 1.0 / wr.sum(axis=0)
            zz = est / np.sqrt(var)
        out.update(effect=np.where(k > 0, est, np.nan), variance=np.where(k > 0, var, np.nan),
                   tau2=np.where(k > 0, tau2, np.nan), z=np.where(k > 0, zz, np.nan))
    else:
        if z is None:
            raise ParameterError(f"method {method!r} needs z maps")
        zs = np.atleast_2d(np.asarray(z, dtype=np.float64))
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
                logp = np.where(ok, stats.norm.logsf(z0), 0.0)
                chi = -2.0 * logp.sum(axis=0)
                zz = stats.norm.isf(stats.chi2.sf(chi, 2 * k))
                big = np.isinf(zz)  # p below double precision: z from -log p (the normal tail's asymptote)
                if big.any():
                    lp = -stats.chi2.logsf(chi[big], 2 * k[big])
                    zz[big] = np.sqrt(np.maximum(0.0, 2 * lp - np.log(4 * np.pi * lp)))
        out = {"z": np.where(k > 0, zz, np.nan)}
    out["p"] = np.where(np.isfinite(out["z"]), stats.norm.sf(out["z"]), np.nan)
    out["n_studies"] = k.astype(np.int64)
    return out


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


def pool(sel: Selection, method: str = "random", *, min_subjects: int = 3, min_studies: int = 2,
         leave_one_out: bool = False) -> PooledMaps:
    """Do the studies of a selection agree, and where?  Study-level one-sample maps of the selection's
    maps (per study: its subjects' maps), combined across studies with ``method`` (see :data:`METHODS`).

    Voxels where fewer than ``min_studies`` studies have a value are NaN.  ``leave_one_out`` adds, per
    study, how much leaving it out moves the combined z (``provenance["leave_one_out"]``: the largest
    change and the correlation of the two maps).
    """
    sm = study_maps(sel, min_subjects=min_subjects)
    res = _combine_study_maps(sm, method)
    few = res["n_studies"] < min_studies
    for key in ("z", "p", "effect", "variance", "tau2", "i2", "q"):
        if key in res:
            res[key] = np.where(few, np.nan, res[key])
    prov = {"method": method, "min_subjects": min_subjects, "min_studies": min_studies,
            "store": str(sel.store.path) if sel.store is not None else None,
            "studies": {s: int(n) for s, n in zip(sm.studies, sm.n_subjects)}, "query": sel.query,
            "feature_set": sel.feature_set.name, "maps": sel.map_ids,
            "row_sha256": sel.meta["feature_row_sha256"].tolist() if "feature_row_sha256" in sel.meta else [],
            "versions": {"mapstore": __version__, "numpy": np.__version__},
            "created": time.strftime("%Y-%m-%dT%H:%M:%S")}
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


def _combine_study_maps(sm: StudyMaps, method: str) -> dict[str, np.ndarray]:
    """combine() over blocks of voxels (memory bounded by the block)."""
    ncol = sm.z.shape[1]
    parts: dict[str, list[np.ndarray]] = {}
    for start in range(0, ncol, _BLOCK):
        cols = slice(start, start + _BLOCK)
        got = combine(sm.z[:, cols], effect=sm.effect[:, cols], variance=sm.variance[:, cols],
                      n=sm.n[:, cols], method=method)
        for key, val in got.items():
            parts.setdefault(key, []).append(val)
    return {key: np.concatenate(vals) for key, vals in parts.items()}


def write_pooled(result: PooledMaps, out, fdr_q: float = 0.05) -> dict[str, Any]:
    """Images of every map the method made, a table of peaks and the provenance, written to folder ``out``."""
    import os
    from pathlib import Path

    folder = Path(os.fspath(out))
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    fs = result.selection.feature_set if result.selection is not None else None
    suffix = ".dscalar.nii" if fs is not None and fs.geometry == "grayordinates" else \
        ".func.gii" if fs is not None and fs.geometry == "surface" else ".nii.gz"
    for key in ("z", "p", "effect", "variance", "tau2", "i2", "n_studies"):
        if getattr(result, key) is None:
            continue
        img = result.to_image(key)
        if suffix == ".func.gii":  # a nilearn SurfaceImage: one GIFTI file per hemisphere
            for hemi, part in (("L", "left"), ("R", "right")):
                import nibabel as nib

                data = np.asarray(img.data.parts[part], dtype=np.float32)
                path = folder / f"pooled_hemi-{hemi}_stat-{key}{suffix}"
                nib.save(nib.gifti.GiftiImage(darrays=[nib.gifti.GiftiDataArray(data)]), str(path))
                written.append(path.name)
        else:
            path = folder / f"pooled_stat-{key}{suffix}"
            img.to_filename(str(path))
            written.append(path.name)
    thr = result.fdr(fdr_q)
    peaks = result.peaks(20, threshold=thr if np.isfinite(thr) else None)
    with open(folder / "peaks.tsv", "w", encoding="utf-8") as fh:
        fh.write("z\tn_studies\tposition\tmm\n")
        for p in peaks:
            fh.write(f"{p['z']:.4f}\t{p['n_studies']}\t{','.join(map(str, p['position']))}\t"
                     f"{','.join(map(str, p.get('mm', [])))}\n")
    from ..formats import sha256_file

    files = written + ["peaks.tsv"]
    prov = dict(result.provenance, fdr={"q": fdr_q, "z_threshold": thr,
                                         "n_tested": int(np.isfinite(result.z).sum())}, files=files,
                file_sha256={f: sha256_file(str(folder / f)) for f in files}, sources=_sources(result))
    (folder / "pooled.json").write_text(json.dumps(prov, indent=1, default=str))
    return prov


def _sources(result: PooledMaps) -> list[dict[str, Any]]:
    """Each pooled map's source file (path, sha256) and the store row it was read from (row hash)."""
    sel = result.selection
    if sel is None or sel.store is None:
        return []
    import os

    roots = {r["dataset"]: r["root"] for r in sel.store.sql("SELECT dataset, root FROM datasets").to_pylist()}
    rows = sel.meta.get("feature_row_sha256")
    return [{"map_id": m.map_id, "path": os.path.join(roots.get(m.dataset, ""), m.relpath), "sha256": m.sha256,
             "row_sha256": None if rows is None else rows.iloc[i]}
            for i, m in enumerate(sel.meta.itertuples(index=False))]


def verify_pooled(folder) -> list[str]:
    """What changed since ``write_pooled`` wrote ``folder``: its files, the source maps, the store's rows."""
    import os
    from pathlib import Path

    from ..formats import sha256_file

    folder = Path(os.fspath(folder))
    try:
        prov = json.loads((folder / "pooled.json").read_text())
    except (OSError, ValueError) as exc:
        raise ParameterError(f"{folder}: no readable pooled.json ({exc}); give a folder 'mapstore pool' wrote") from exc
    changes = []
    for name, sha in (prov.get("file_sha256") or {}).items():
        p = folder / str(name)
        if "/" in str(name) or not p.is_file():
            changes.append(f"output file missing: {name}")
        elif sha256_file(str(p)) != sha:
            changes.append(f"output file changed: {name}")
    for s in prov.get("sources") or []:
        p = Path(str(s.get("path")))
        if not p.is_file():
            changes.append(f"source missing: {p}")
        elif s.get("sha256") and sha256_file(str(p)) != s["sha256"]:
            changes.append(f"source changed: {p}")
    return changes


def pool_maps(sel: Selection, method: str = "stouffer", *, variance: Selection | None = None,
              n: np.ndarray | None = None, rows: int | None = None) -> PooledMaps:
    """Combine given study-level maps (one row of ``sel`` per study: z maps for ``stouffer``,
    ``stouffer-weighted`` and ``fisher``; effect maps for ``fixed`` and ``random``, with ``variance``, a
    selection of their variance maps in the same order) voxel by voxel, streaming the rows in blocks of
    ``rows`` (default: about 32 MB of float64 per block): memory holds a few per-voxel sums and one block,
    whatever the number of maps (random effects read the maps twice: tau^2 first).  Equal to
    :func:`combine` on the stacked maps.
    """
    from scipy import stats

    rows = rows or max(4, (32 << 20) // (8 * max(1, len(sel.voxels))))
    if method not in METHODS:
        raise ParameterError(f"method must be one of {list(METHODS)}, got {method!r}")
    ncol = len(sel.voxels)
    acc = {k: np.zeros(ncol) for k in ("k", "s1", "s2", "s3", "s4")}
    if method in ("fixed", "random"):
        if variance is None or len(variance) != len(sel):
            raise ParameterError(f"method {method!r} needs the variance maps of the same studies (variance=...)")
        variance = variance.with_columns(sel.voxels)

        def pairs():
            """Blocks of (effect, 1 / variance, measured), float32, zero where not measured (in place)."""
            for (idx, e, _), (_, v, _) in zip(sel.blocks(rows), variance.blocks(rows)):
                with np.errstate(invalid="ignore", divide="ignore"):
                    ok = np.isfinite(e) & np.isfinite(v) & (v > 0)
                    np.reciprocal(v, out=v)
                e[~ok] = 0.0
                v[~ok] = 0.0
                yield idx, e, v, ok

        def add(total: np.ndarray, block: np.ndarray) -> None:
            total += np.add.reduce(block, axis=0, dtype=np.float64)

        for _, e, w, ok in pairs():
            acc["k"] += ok.sum(axis=0)
            add(acc["s1"], w)
            we = w * e
            add(acc["s2"], we)
            we *= e
            add(acc["s3"], we)
            np.multiply(w, w, out=we)
            add(acc["s4"], we)
        k = acc["k"]
        with np.errstate(invalid="ignore", divide="ignore"):
            fe = acc["s2"] / acc["s1"]
            q = np.maximum(0.0, acc["s3"] - acc["s2"] ** 2 / acc["s1"])
            i2 = np.where((k > 1) & (q > 0), np.maximum(0.0, (q - (k - 1)) / q), np.where(k > 1, 0.0, np.nan))
            if method == "fixed":
                est, var, tau2 = fe, 1.0 / acc["s1"], np.zeros(ncol)
            else:
                c = acc["s1"] - acc["s4"] / acc["s1"]
                tau2 = np.where(k > 1, np.maximum(0.0, (q - (k - 1)) / c), 0.0)
                sw, swe = np.zeros(ncol), np.zeros(ncol)
                tau32 = tau2.astype(np.float32)
                for _, e, w, ok in pairs():  # second pass: weights 1 / (v + tau^2)
                    with np.errstate(divide="ignore"):
                        wr = np.reciprocal(np.reciprocal(w) + tau32)
                    wr[~ok] = 0.0
                    add(sw, wr)
                    wr *= e
                    add(swe, wr)
                est, var = swe / sw, 1.0 / sw
            z = est / np.sqrt(var)
        none = k == 0
        res = {"z": np.where(none, np.nan, z), "effect": np.where(none, np.nan, est),
               "variance": np.where(none, np.nan, var), "tau2": np.where(none, np.nan, tau2),
               "i2": i2, "q": np.where(none, np.nan, q)}
    else:
        weights = None
        if method == "stouffer-weighted":
            if n is None or len(n) != len(sel):
                raise ParameterError("stouffer-weighted needs each study's sample size (n=..., one per row)")
            weights = np.sqrt(np.asarray(n, dtype=np.float64))
        for idx, zb, _ in sel.blocks(rows):
            ok = np.isfinite(zb)
            acc["k"] += ok.sum(axis=0)
            np.nan_to_num(zb, copy=False, nan=0.0)  # the block is this loop's own: zeroed in place
            if method == "fisher":
                acc["s1"] += np.where(ok, stats.norm.logsf(zb.astype(np.float64)), 0.0).sum(axis=0)
            elif weights is None:
                acc["s1"] += np.add.reduce(zb, axis=0, dtype=np.float64)
            else:
                w = weights[idx]
                acc["s1"] += np.add.reduce(w[:, None] * zb, axis=0, dtype=np.float64)
                acc["s2"] += (ok * (w[:, None] ** 2)).sum(axis=0)
        if method == "stouffer":
            acc["s2"] = acc["k"].copy()
        k = acc["k"]
        with np.errstate(invalid="ignore", divide="ignore"):
            if method == "fisher":
                chi = -2.0 * acc["s1"]
                z = stats.norm.isf(stats.chi2.sf(chi, 2 * k))
            else:
                z = acc["s1"] / np.sqrt(acc["s2"])
        res = {"z": np.where(k > 0, z, np.nan)}
    res["p"] = np.where(np.isfinite(res["z"]), stats.norm.sf(res["z"]), np.nan)
    studies = [str(s) for s in sel.studies]
    prov = {"method": method, "given_maps": sel.map_ids, "feature_set": sel.feature_set.name, "query": sel.query,
            "versions": {"mapstore": __version__, "numpy": np.__version__},
            "created": time.strftime("%Y-%m-%dT%H:%M:%S")}
    return PooledMaps(method, res["z"], res["p"], acc["k"].astype(np.int64), res.get("effect"), res.get("variance"),
                      res.get("tau2"), res.get("i2"), res.get("q"), studies, sel, prov)
