"""Copies of one map across a feature set: identical rows and near-copies, found from sketches.

A consortium holds the same map several times: a subject reprocessed by two pipelines, a
public dataset folded into a lab's own, a contrast saved as ``A-B`` and as ``B-A``, a map
re-saved in another format or on another grid.  On both sides of a split such copies leak.

Each feature row carries a 1,024-bit *sketch* made when it is built: the row is centred
over its finite voxels (missing voxels count 0), projected on 1,024 sparse random
directions (each voxel feeds 3 of them with a random sign, a count sketch), and the signs of
the projections are kept.  A set of fewer than ``DENSE_BELOW`` features (an ROI, parcels)
uses dense Gaussian directions instead: sparse ones would leave most bits fed by no feature,
constant over every row, and make every pair a candidate.  Two rows whose signs disagree on a fraction h of the bits have
an angle of about pi * h (sign random projections), so the sketch estimates their
correlation; a sign-flipped copy disagrees on nearly every bit.  Candidates come from
banding (51 bands of 20 bits; a band and its complement hash alike, so sign flips meet),
are kept when the whole sketch says |r| >= ``ESTIMATE_FLOOR``, and only those pairs are
read from the shards to compute the exact correlation on the voxels both rows cover.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from ..store import COPIES_SCHEMA

__all__ = ["Sketcher", "SKETCH_BITS", "find_copies", "COPIES_SCHEMA", "NEAR_COPY_R", "pair_correlation",
           "sketch_kind", "most_similar"]

SKETCH_BITS = 1024
_BAND = 20
_N_BANDS = SKETCH_BITS // _BAND  # 51 bands (1,020 bits); the last 4 bits count only in the estimate
_FEEDS = 3  # projections each voxel feeds
ESTIMATE_FLOOR = 0.8  # sketch estimate below which a candidate is not read (r = 0.9 estimates 0.9 +- 0.03)
STORE_FLOOR = 0.9  # pairs stored in the copies table
# default refusal threshold for near-copies across a split, from a measurement (exact r on common
# voxels, MNI152 2 mm brain mask; DEVELOPERS.md): independent maps of one concept in different studies
# reach |r| 0.225 in the demo (7,232 pairs) and 0.041 in the nilearn outputs of the tests; a group map
# against its own subjects' maps 0.598; planted copies: re-smoothed 0.998, re-gridded 1.000, rescaled
# and sign-flipped |r| 1
NEAR_COPY_R = 0.9
_MAX_GROUP = 256  # rows sharing one band value beyond which that band value is skipped
# below this many features a set's sketch directions are dense Gaussian (Charikar's sign random
# projections, the textbook form); above it the sparse count sketch is as good and far cheaper
# (measured: 1,000 random rows of 47 or 100 features gave every pair as a candidate with count
# sketches, of 300 features 5,434 pairs; of 1,000 features 25)
DENSE_BELOW = 2048


def sketch_kind(n_voxels: int) -> str:
    """The sketch directions a new set of ``n_voxels`` features uses: ``gauss`` or ``count``."""
    return "gauss" if n_voxels < DENSE_BELOW else "count"



@dataclass
class Sketcher:
    """Sign sketches of rows of one feature set (the projection follows from ``seed``)."""

    seed: int
    n_voxels: int
    kind: str = "count"  # count (sparse, 3 directions per voxel) or gauss (dense)
    _proj: object = None

    @classmethod
    def for_set(cls, mask_sha256: str, n_voxels: int, kind: str = "count") -> "Sketcher":
        return cls(int(mask_sha256[:15], 16), int(n_voxels), kind)

    def _projection(self):
        if self._proj is None and self.kind == "gauss":
            rng = np.random.default_rng(self.seed)
            self._proj = rng.standard_normal((SKETCH_BITS, self.n_voxels)).astype(np.float32)
        elif self._proj is None:
            from scipy import sparse

            rng = np.random.default_rng(self.seed)
            rows = rng.integers(0, SKETCH_BITS, size=(_FEEDS, self.n_voxels))
            signs = rng.integers(0, 2, size=(_FEEDS, self.n_voxels)).astype(np.float32) * 2 - 1
            cols = np.tile(np.arange(self.n_voxels), _FEEDS)
            self._proj = sparse.csr_matrix((signs.ravel(), (rows.ravel(), cols)),
                                           shape=(SKETCH_BITS, self.n_voxels), dtype=np.float32)
        return self._proj

    def sketch(self, rows: np.ndarray) -> np.ndarray:
        """(n, 128) uint8 packed sign bits of (n, n_voxels) float32 rows (NaN = missing)."""
        x = np.array(rows, dtype=np.float32, copy=True, ndmin=2)
        finite = np.isfinite(x)
        n_fin = finite.sum(axis=1, keepdims=True)
        x[~finite] = 0
        mean = x.sum(axis=1, keepdims=True) / np.maximum(n_fin, 1)
        x -= mean
        x[~finite] = 0
        proj = np.asarray(self._projection() @ x.T).T  # (n, SKETCH_BITS)
        return np.packbits(proj > 0, axis=1)


_POPCOUNT = np.array([bin(i).count("1") for i in range(256)], dtype=np.uint16)


def _estimate(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Sketch estimate of the correlation between packed sketches, pair by pair."""
    h = _POPCOUNT[np.bitwise_xor(a, b)].sum(axis=1)  # differing bits, byte by byte
    return np.cos(np.pi * h / SKETCH_BITS)


def _band_keys(bits: np.ndarray, band: int) -> np.ndarray:
    """Values of one band of unpacked sketches, a band and its complement mapped to one key."""
    keys = bits[:, band * _BAND:(band + 1) * _BAND].astype(np.int64) @ (1 << np.arange(_BAND, dtype=np.int64))
    return np.minimum(keys, ((1 << _BAND) - 1) - keys)  # sign flips complement every bit: they meet


def _candidates(sketches: np.ndarray) -> np.ndarray:
    """Pairs (i < j) sharing at least one band key, as an (m, 2) int64 array."""
    n = len(sketches)
    bits = np.unpackbits(sketches, axis=1)
    found: list[np.ndarray] = []
    for b in range(_N_BANDS):
        col = _band_keys(bits, b)
        order = np.argsort(col, kind="stable")
        sorted_keys = col[order]
        bounds = np.concatenate([[0], np.flatnonzero(np.diff(sorted_keys)) + 1, [n]])
        sizes = np.diff(bounds)
        for s, size in zip(bounds[:-1][sizes > 1], sizes[sizes > 1]):
            if size > _MAX_GROUP:
                continue
            members = np.sort(order[s:s + size])
            ii, jj = np.triu_indices(size, 1)
            found.append(members[ii] * n + members[jj])
    if not found:
        return np.empty((0, 2), dtype=np.int64)
    flat = np.unique(np.concatenate(found))
    return np.stack([flat // n, flat % n], axis=1)


# fewest common values for two rows to be compared at all (fewer say nothing about being copies)
MIN_COMMON = 10


def pair_correlation(a: np.ndarray, b: np.ndarray) -> tuple[float, int]:
    """Pearson correlation of two rows on the voxels both have a value for, and that count."""
    both = np.isfinite(a) & np.isfinite(b)
    n = int(both.sum())
    if n < 3:
        return float("nan"), n
    x = a[both].astype(np.float64)
    y = b[both].astype(np.float64)
    x -= x.mean()
    y -= y.mean()
    den = np.sqrt((x * x).sum() * (y * y).sum())
    return (float((x * y).sum() / den) if den > 0 else float("nan")), n


def find_copies(fs, map_ids: list[str] | None = None, *, floor: float = STORE_FLOOR) -> pa.Table:
    """Identical rows and near-copies (|r| >= ``floor``) among a feature set's rows.

    Parameters
    ----------
    fs : mapstore.features.FeatureSet
    map_ids : list of str, optional
        Rows to compare (default: all).
    floor : float, default=0.9

    Returns
    -------
    pyarrow.Table with ``COPIES_SCHEMA``: map_a < map_b, kind ``identical`` (same float32 row)
    or ``near``, r (signed: a sign-flipped copy has r close to -1), n_common voxels.
    """
    ids = list(fs.map_ids if map_ids is None else map_ids)
    if len(ids) >= 2:  # rows with too few values to correlate are no one's copies (an empty row is not a copy)
        ids = [m for m, n in zip(ids, fs.n_values(ids)) if n >= MIN_COMMON]
    if len(ids) < 2:
        return COPIES_SCHEMA.empty_table()
    hashes = fs.row_hashes(ids)
    out: dict[tuple[str, str], tuple[str, float, int]] = {}
    by_hash: dict[str, list[str]] = {}
    for m, h in zip(ids, hashes):
        by_hash.setdefault(h, []).append(m)
    # identical rows: one star per group (its first map to each other), so k copies cost k - 1 pairs,
    # not k^2 / 2; near-copies are looked for among one row per group
    for members in by_hash.values():
        first, *rest = sorted(members)
        for m in rest:
            out[(first, m)] = ("identical", 1.0, fs.n_voxels)
    ids = [min(members) for members in by_hash.values()]
    if len(ids) < 2:
        return _copies_table(out)
    sketches = fs.sketches(ids)
    pairs = _candidates(sketches)
    if len(pairs):
        est = np.concatenate([np.abs(_estimate(sketches[p[:, 0]], sketches[p[:, 1]]))
                              for p in np.array_split(pairs, max(1, len(pairs) // 100_000))])
        pairs = pairs[est >= min(ESTIMATE_FLOOR, floor - 0.1)]
    # exact r on the candidates, reading each involved row once per block of pairs
    for start in range(0, len(pairs), 512):
        block = pairs[start:start + 512]
        need = np.unique(block)
        rows = fs.matrix([ids[k] for k in need])
        where = {int(k): i for i, k in enumerate(need)}
        for i, j in block:
            a, b = sorted((ids[i], ids[j]))
            if (a, b) in out:
                continue
            r, n = pair_correlation(rows[where[int(i)]], rows[where[int(j)]])
            if n >= MIN_COMMON and np.isfinite(r) and abs(r) >= floor:
                out[(a, b)] = ("near", r, n)
    return _copies_table(out)


def _copies_table(out: dict[tuple[str, str], tuple[str, float, int]]) -> pa.Table:
    rows_out = [{"map_a": a, "map_b": b, "kind": k, "r": r, "n_common": n} for (a, b), (k, r, n) in sorted(out.items())]
    return pa.Table.from_pylist(rows_out, schema=COPIES_SCHEMA)


def most_similar(fs, vector: np.ndarray, k: int = 10, *, absolute: bool = False, exclude: str | None = None,
                 shortlist: int | None = None, map_ids: list[str] | None = None) -> list[tuple[str, float, int]]:
    """The ``k`` rows of a feature set most correlated with ``vector`` (NaN-aware: on the voxels both
    have), as (map_id, r, n_common), best first.

    The stored sign sketches shortlist candidates (``shortlist`` rows, default ``max(50 k, 500)``,
    by estimated correlation); the shortlist is ranked by the exact correlation.  ``absolute`` ranks
    by |r| (a sign-flipped map counts as similar); ``exclude`` leaves one map out (the query itself);
    ``map_ids`` limits the search to those rows.
    """
    v = np.asarray(vector, dtype=np.float32).reshape(-1)
    if v.size != fs.n_voxels:
        raise ValueError(f"vector has {v.size} values, the set has {fs.n_voxels}")
    ids = [m for m in (fs.map_ids if map_ids is None else map_ids) if m != exclude]
    if not ids or int(np.isfinite(v).sum()) < MIN_COMMON:
        return []
    sk = Sketcher.for_set(fs.spec.mask["sha256"], fs.n_voxels, fs.spec.sketch)
    est = _estimate(fs.sketches(ids), sk.sketch(v[None, :]))
    score = np.abs(est) if absolute else est
    m = min(len(ids), shortlist or max(50 * k, 500))
    cand = np.argpartition(-score, m - 1)[:m] if m < len(ids) else np.arange(len(ids))
    out = []
    for start in range(0, len(cand), 512):
        part = cand[start:start + 512]
        rows = fs.matrix([ids[i] for i in part])
        for i, row in zip(part, rows):
            r, n = pair_correlation(v, row)
            if n >= MIN_COMMON and np.isfinite(r):
                out.append((ids[i], r, n))
    out.sort(key=lambda t: (-(abs(t[1]) if absolute else t[1]), t[0]))
    return out[:k]
