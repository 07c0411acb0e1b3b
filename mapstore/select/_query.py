"""Selections over the catalog: which maps, their targets and groups (the splits are in ``_splits``).

A :class:`Selection` holds the rows chosen by SQL (pushed down into DuckDB) and
gives decoders what they need: ``X`` (read from the feature set only when
asked), ``y`` (or a multi-label ``Y``), ``groups`` and ``splits()``, which plug
into scikit-learn's ``cv=`` unchanged.
"""

from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._params import MIN_COVERAGE, MIN_VOXELS, MISSING, MISSING_POLICIES, PER_SUBJECT_RULE, declared
from ..statkinds import LEVEL_CHOICES, LEVELS, STAT_PREFERENCE, SUBJECT_LEVELS
from ..errors import ParameterError, QueryError
from ..features import NEAR_COPY_R, STORE_FLOOR, find_copies
from ..labels import load_vocabulary
from ._splits import assign_folds, check_classes, check_leakage, copy_groups, fold_vector
from ..formats import plural

__all__ = ["Selection", "select", "GROUP_COLUMNS", "MISSING_POLICIES", "check_folds", "align_columns"]

# what X does with voxels some selected map has no value for (NaN in the feature set)

GROUP_COLUMNS = {"study": "study", "site": "site", "lab": "lab", "subject": "participant",
                 "participant": "participant", "dataset": "dataset"}
Y_FROM = ("contrast", "study-contrast", "concept", "concepts")


@dataclass
class Selection:
    """Maps chosen from a store, ready for a decoder.

    Attributes
    ----------
    meta : pandas.DataFrame
        One row per map (map_id, dataset, study, site, lab, participant, task, contrast, stat,
        concepts, coverage, sha256, feature_key, ...), in the order of ``X``'s rows.
    y : ndarray
        Target per map (a class name), or None when ``y_from="concepts"``.
    Y : ndarray of uint8, shape (n_maps, n_concepts)
        Multi-label indicators when ``y_from="concepts"`` (columns: ``concepts``).
    groups : ndarray
        Group label per map (``group_by``).
    dropped : dict
        How many maps were left out, and why.
    """

    store: Any
    feature_set: Any
    meta: Any
    y: np.ndarray | None
    Y: np.ndarray | None
    concepts: list[str]
    groups: np.ndarray
    group_by: str
    y_from: str  # what y is made from: contrast, study-contrast, concept, concepts or a column
    query: dict[str, Any]
    dropped: dict[str, int] = field(default_factory=dict)
    missing: str = "common"
    min_voxels: int | None = None
    _X: np.ndarray | None = field(default=None, repr=False)
    _voxels: np.ndarray | None = field(default=None, repr=False)

    def __len__(self) -> int:
        return len(self.meta)

    @property
    def target(self) -> str:
        """Deprecated: :attr:`y_from`."""

        warnings.warn("Selection.target is now Selection.y_from; target goes in the next release", DeprecationWarning,
                      stacklevel=2)
        return self.y_from

    def _repr_html_(self) -> str:
        from ..formats import html_table

        by = self.meta.groupby("study").agg(maps=("map_id", "size"), subjects=("participant", "nunique"))
        return html_table(repr(self), ["study", "maps", "subjects"],
                          [[s, int(r.maps), int(r.subjects)] for s, r in by.iterrows()])

    def __repr__(self) -> str:
        studies = self.meta["study"].nunique() if "study" in self.meta else 0
        target = f"y: {len(set(map(str, self.y)))} classes" if self.y is not None and self.y.dtype.kind == "O" \
            else "y: numeric" if self.y is not None else f"Y: {len(self.concepts)} concepts"
        cols = f"{len(self._voxels):,} columns" if self._voxels is not None else "columns not read yet"
        return (f"Selection({plural(len(self), 'map')} of {plural(studies, 'study', 'studies')}, feature set {self.feature_set.name!r}, {cols}, "
                f"y from {self.y_from!r} ({target}), groups by {self.group_by!r}, missing={self.missing!r})")

    @property
    def map_ids(self) -> list[str]:
        return self.meta["map_id"].tolist()

    def read_rows(self, start: int, out: np.ndarray) -> np.ndarray:
        """Store rows ``start .. start + len(out)`` of the selection into ``out`` (where the
        selection's query found them: no lookup in the feature set's rows table)."""
        stop = min(start + len(out), len(self))
        return self.feature_set.read_at(self.meta["feature_shard"].to_numpy(object)[start:stop],
                                        self.meta["feature_row"].to_numpy()[start:stop], out[:stop - start])

    @property
    def voxels(self) -> np.ndarray:
        """Columns of ``X``: positions in the feature set's mask vector (see ``missing``).

        ``common`` keeps the voxels finite in every selected map (found in one streamed
        pass over the rows); ``zero`` and ``keep`` keep every mask voxel.
        """
        if self._voxels is None:
            fs = self.feature_set
            if self.missing != "common" or bool((self.meta["coverage"] >= 1.0).all()):
                self._voxels = np.arange(fs.n_voxels)  # every row covers the whole mask: nothing to read
            else:
                finite = np.ones(fs.n_voxels, dtype=bool)
                buf = np.empty((min(64, max(len(self), 1)), fs.n_voxels), dtype=np.float32)
                for i in range(0, len(self), len(buf)):
                    finite &= np.isfinite(self.read_rows(i, buf)).all(axis=0)
                self._voxels = np.flatnonzero(finite)
                self._refuse_if_too_few()
        return self._voxels

    def _refuse_if_too_few(self) -> None:
        fs = self.feature_set
        need = self.min_voxels if self.min_voxels is not None else max(1, int(np.ceil(0.01 * fs.n_voxels)))
        kept = len(self._voxels)
        if kept >= need:
            return
        worst = self.meta.sort_values("coverage").head(5)
        names = ", ".join(f"{r.dataset}:{r.relpath} ({r.coverage:.0%})" for r in worst.itertuples())
        self._voxels = None
        raise QueryError(f"only {kept:,} of the feature set's {fs.n_voxels:,} voxels have a value in every one of "
                         f"the {len(self)} selected maps (need {need:,}); the maps covering least: {names}. Drop "
                         "them (min_coverage=..., --min-coverage), select fewer studies, or choose missing='zero' "
                         "or missing='keep' with an imputer in your pipeline")

    @property
    def missing_report(self) -> dict[str, Any]:
        """The missing-value policy and what it did to the columns."""
        n = self.feature_set.n_voxels
        kept = len(self.voxels)
        why = {"common": "voxels without a value in at least one selected map were dropped",
               "zero": "missing values are 0 in X", "keep": "missing values are NaN in X"}[self.missing]
        return {"policy": self.missing, "mask_voxels": n, "kept_voxels": kept, "dropped_voxels": n - kept,
                "reason": why}

    @property
    def X(self) -> np.ndarray:
        """(n_maps, n_voxels) float32, read from the feature set's shards on first use.

        Columns follow ``missing``: with ``common`` (the default) only voxels with a value in
        every selected map (``voxels``), so any decoder takes X as it is; ``zero`` fills
        missing values with 0; ``keep`` leaves them NaN.  Nothing is imputed from the data:
        an imputer fitted on all maps would see the test folds.
        """
        if self._X is None:
            out = np.empty((len(self), len(self.voxels)), dtype=np.float32)
            self._X = self._fill(out)
        return self._X

    _BLOCK = 64  # rows read at a time when X keeps some of the mask's columns

    def _fill(self, out: np.ndarray, start: int = 0) -> np.ndarray:
        """Rows ``start ..`` of X read into ``out`` (n rows x X's columns): straight into it when X keeps
        every mask voxel, else through a small buffer, so the peak is X's own size plus one block."""
        voxels = self.voxels  # every mask voxel for zero and keep, unless the columns were fixed
        n_vox = self.feature_set.n_voxels
        if len(voxels) == n_vox:
            self.read_rows(start, out)
        else:
            buf = np.empty((min(self._BLOCK, max(len(out), 1)), n_vox), dtype=np.float32)
            for i in range(0, len(out), len(buf)):
                got = self.read_rows(start + i, buf[:min(len(buf), len(out) - i)])
                np.take(got, voxels, axis=1, out=out[i:i + len(got)])
        if self.missing == "zero":
            np.nan_to_num(out, nan=0.0, copy=False)
        return out

    def blocks(self, rows: int = 256, reuse: bool = False):
        """X in blocks of ``rows`` maps, as (indices, X block, y block): for learners that learn from
        part of the data at a time (scikit-learn's ``partial_fit``), with X's columns and missing-value
        policy; no more than one block is in memory.  ``y block`` is the block's ``y`` (or ``Y``).

        ``reuse=True`` reads into two buffers in turn (faster: no fresh memory per block): a block is
        then overwritten two blocks later, so copy what must outlive that."""
        if not isinstance(rows, int) or isinstance(rows, bool) or rows < 1:
            raise ParameterError(f"rows must be a positive integer, got {rows!r}")
        target = self.y if self.y is not None else self.Y
        buffers: list[np.ndarray] = []
        for b, start in enumerate(range(0, len(self), rows)):
            idx = np.arange(start, min(len(self), start + rows))
            if not reuse:
                buf = np.empty((len(idx), len(self.voxels)), dtype=np.float32)
            else:
                if len(buffers) < 2:
                    buffers.append(np.empty((min(rows, len(self)), len(self.voxels)), dtype=np.float32))
                buf = buffers[b % 2][:len(idx)]
            yield idx, self._fill(buf, start), None if target is None else target[idx]

    def to_memmap(self, path) -> np.ndarray:
        """X written block by block to ``path`` (a ``.npy`` file) and opened memory-mapped: for a selection
        larger than memory (the file holds X's float32 bytes; numpy reads pages as they are used)."""
        import os

        path = os.fspath(path)
        out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(len(self), len(self.voxels)))
        for idx, block, _ in self.blocks():
            out[idx[0]:idx[-1] + 1] = block
        out.flush()
        del out
        return np.load(path, mmap_mode="r")

    def to_dask(self, chunk_rows: int = 256):
        """X as a lazy ``dask.array`` (chunks of ``chunk_rows`` maps x every column), read from the shards
        when computed: on a ``distributed`` cluster the workers must see the store at the same path."""
        try:
            import dask
            import dask.array as da
        except ImportError as exc:
            raise ParameterError("to_dask needs Dask: pip install 'mapstore[dask]'") from exc
        if not isinstance(chunk_rows, int) or isinstance(chunk_rows, bool) or chunk_rows < 1:
            raise ParameterError(f"chunk_rows must be a positive integer, got {chunk_rows!r}")
        fs = self.feature_set
        shards = self.meta["feature_shard"].to_numpy(object)
        rows = self.meta["feature_row"].to_numpy()
        voxels = self.voxels
        parts = []
        for start in range(0, len(self), chunk_rows):
            stop = min(len(self), start + chunk_rows)
            task = dask.delayed(_read_block, pure=True)(str(fs.store_path), fs.name, fs.entry,
                                                        shards[start:stop], rows[start:stop], voxels, self.missing)
            parts.append(da.from_delayed(task, shape=(stop - start, len(voxels)), dtype=np.float32))
        return da.concatenate(parts, axis=0)

    def to_image(self, vector):
        """An image of a row of ``X`` or of a decoder's weights (one per column of ``X``).

        Values go back to their voxels on the feature set's grid (a NIfTI image), or to their
        vertices on a surface set's mesh (a nilearn ``SurfaceImage``); everything else is NaN.
        """
        v = np.asarray(vector, dtype=np.float32).reshape(-1)
        voxels = self.voxels
        if v.size != len(voxels):
            raise ParameterError(f"vector has {v.size} values, X has {len(voxels)} columns")
        full = np.full(self.feature_set.n_voxels, np.nan, dtype=np.float32)
        full[voxels] = v
        return self.feature_set.to_image(full)

    def splits(self, scheme: str = "leave-one-group-out", seed: int = 0,
               allow_leak: bool = False, near_copy_r: float | None = None,
               allow_unseen: bool = False) -> list[tuple[np.ndarray, np.ndarray]]:
        """Train/test index pairs grouped by ``group_by``; pass them as ``cv=`` to scikit-learn.

        ``scheme`` is one of :data:`SCHEMES` (see :func:`parse_scheme`).  Raises
        :class:`~mapstore.errors.LeakageError` if a participant, an identical file, an identical
        feature row or a near-copy (absolute r >= ``near_copy_r`` on the voxels both maps cover; default
        :data:`mapstore.features.NEAR_COPY_R`) would sit on both sides of a split, unless
        ``allow_leak`` (then a warning); and :class:`~mapstore.errors.UnseenClassError` if a test
        side holds a class its training side never saw, unless ``allow_unseen``.
        """
        out = assign_folds(self.groups, scheme, seed, y=self.y, studies=self.studies)
        self.check(out, allow_leak=allow_leak, near_copy_r=near_copy_r, allow_unseen=allow_unseen)
        return out

    def check(self, splits, allow_leak: bool = False, near_copy_r: float | None = None,
              allow_unseen: bool = False) -> dict[str, list[str]]:
        """Check any folds (a list of (train, test) index pairs, or a scikit-learn splitter, given
        ``X``-free: ``split(X, y, groups)`` is called with this selection's y and groups) against the
        store's rules: no participant, identical map or copy on both sides, no unseen test class.
        Returns the problems accepted under ``allow_leak`` / ``allow_unseen``."""
        pairs = _as_pairs(splits, self)
        leaks = check_leakage(pairs, self.meta["participant"].to_numpy(object), self._content_ids(),
                              self.meta["map_id"].to_numpy(object), allow_leak, self.copy_pairs(near_copy_r))
        unseen = check_classes(pairs, self.y, self.Y, self.concepts, allow_unseen)
        return {"leaks": leaks, "unseen": unseen}

    def weights(self, by: str = "study") -> np.ndarray:
        """Sample weights giving each study (or subject, or any group column) the same total weight,
        summing to the number of maps: a study of many maps does not outweigh a small one.

        Examples
        --------
        >>> import numpy as np
        >>> g = np.array(["a", "a", "a", "b"])
        >>> (len(g) / 2 / np.unique(g, return_counts=True)[1][np.unique(g, return_inverse=True)[1]]).tolist()
        [0.6666666666666666, 0.6666666666666666, 0.6666666666666666, 2.0]
        """
        col = GROUP_COLUMNS.get(by, by)
        if col not in self.meta.columns:
            raise ParameterError(f"weights by {by!r}: not a unit or column of the selection")
        keys = self.meta[col].fillna(self.meta["map_id"]).astype(str).to_numpy()
        _, inverse, counts = np.unique(keys, return_inverse=True, return_counts=True)
        return len(keys) / len(counts) / counts[inverse]

    @property
    def studies(self) -> np.ndarray:
        """The study of each map (the task vector of a multitask model: one head per study)."""
        return self.meta["study"].to_numpy(object)

    def transform(self, image, stat: str | None = None, **options) -> np.ndarray:
        """A new map on this selection's columns (see :meth:`FeatureSet.transform`), so a decoder fitted
        on ``X`` predicts it: ``model.predict(sel.transform(img, stat='t', dof=90)[None])``.  With
        ``missing='zero'`` its missing values are 0; otherwise they stay NaN (the map may cover less)."""
        v = self.feature_set.transform(image, stat, **options)[self.voxels]
        return np.nan_to_num(v, nan=0.0) if self.missing == "zero" else v

    def subset(self, indices) -> "Selection":
        """The maps at ``indices`` (positions in this selection), with this selection's columns."""
        idx = np.asarray(indices, dtype=np.int64)
        if idx.ndim != 1 or (idx.size and (idx.min() < 0 or idx.max() >= len(self))):
            raise ParameterError(f"indices must be positions 0 .. {len(self) - 1}")
        return dataclasses.replace(
            self, meta=self.meta.iloc[idx].reset_index(drop=True), y=None if self.y is None else self.y[idx],
            Y=None if self.Y is None else self.Y[idx], groups=self.groups[idx], _X=None, _voxels=self.voxels)

    def with_columns(self, voxels: np.ndarray) -> "Selection":
        """This selection with ``X``'s columns fixed to ``voxels`` (positions in the feature set's mask),
        as :func:`align_columns` gives several selections one column set."""
        v = np.asarray(voxels, dtype=np.int64)
        if v.ndim != 1 or (v.size and (v.min() < 0 or v.max() >= self.feature_set.n_voxels)):
            raise ParameterError(f"voxels must be positions in the feature set's mask (0 .. "
                                 f"{self.feature_set.n_voxels - 1})")
        return dataclasses.replace(self, _X=None, _voxels=v)

    def _content_ids(self) -> np.ndarray:
        """Per row, what makes two maps the same content: the file's hash, and the map's position in a
        file of several maps (two maps of one CIFTI file are different maps)."""
        sha = self.meta["sha256"].to_numpy(object)
        if "map_index" not in self.meta.columns:
            return sha
        index = self.meta["map_index"].to_numpy(object)
        return np.array([s if i is None or i != i else f"{s}#{int(i)}" for s, i in zip(sha, index)], dtype=object)

    def copy_pairs(self, near_copy_r: float | None = None) -> list[tuple[int, int, str, float]]:
        """Positions (i, j, kind, r) of selected maps whose rows are identical or absolute r >= ``near_copy_r``."""
        thr = NEAR_COPY_R if near_copy_r is None else near_copy_r
        if not 0 < thr <= 1:
            raise ParameterError(f"near_copy_r must be in (0, 1], got {thr!r}")
        ids = self.map_ids
        table = self.feature_set.copies() if thr >= STORE_FLOOR else None
        if table is None:  # no stored pairs, or a threshold below the stored pairs' floor
            table = find_copies(self.feature_set, ids, floor=thr)
        # groups over every stored pair (two selected maps may be joined through one that is not
        # selected), then each group's selected maps as a star from its first
        kept = [r for r in table.to_pylist() if r["kind"] == "identical" or abs(r["r"]) >= thr]
        names = sorted({x for r in kept for x in (r["map_a"], r["map_b"])})
        at = {m: i for i, m in enumerate(names)}
        pos = {m: i for i, m in enumerate(ids)}
        out = []
        for members, kind, r in copy_groups(len(names), [(at[c["map_a"]], at[c["map_b"]], c["kind"], c["r"])
                                                         for c in kept]):
            chosen = sorted(pos[names[k]] for k in members if names[k] in pos)
            out += [(chosen[0], j, kind, r) for j in chosen[1:]]
        return out

    def folds(self, scheme: str = "leave-one-group-out", seed: int = 0, allow_leak: bool = False,
              near_copy_r: float | None = None) -> np.ndarray:
        """Per map: index of the split where it is in the test set (-1 if never: holdout train)."""
        return fold_vector(self.splits(scheme, seed, allow_leak, near_copy_r), len(self))



def _read_block(store: str, name: str, entry, shards, rows, voxels, missing: str) -> np.ndarray:
    """Rows of one chunk of X, read from the shards (run on a Dask worker: nothing but paths travels)."""
    from pathlib import Path

    from ..features import FeatureSet

    fs = FeatureSet(Path(store), name, entry)
    full = fs.read_at(shards, rows, np.empty((len(rows), fs.n_voxels), dtype=np.float32))
    out = full if len(voxels) == fs.n_voxels else np.ascontiguousarray(full[:, voxels])
    return np.nan_to_num(out, nan=0.0, copy=False) if missing == "zero" else out


def _as_pairs(splits, sel: "Selection") -> list[tuple[np.ndarray, np.ndarray]]:
    """(train, test) index arrays from a list of pairs or a scikit-learn splitter (``split(X, y, groups)``)."""
    if hasattr(splits, "split"):
        y = sel.y if sel.y is not None else (sel.Y if sel.Y is not None else None)
        try:
            got = splits.split(np.zeros((len(sel), 1)), None if y is None else np.asarray(y, dtype=str)
                               if np.asarray(y).ndim == 1 and np.asarray(y).dtype.kind == "O" else y, sel.groups)
            splits = list(got)
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"the splitter could not split the selection: {exc}") from exc
    out = []
    for k, pair in enumerate(splits):
        try:
            tr, te = pair
            tr, te = np.asarray(tr, dtype=np.int64), np.asarray(te, dtype=np.int64)
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"split {k} is not a (train indices, test indices) pair") from exc
        if tr.size and (tr.min() < 0 or tr.max() >= len(sel)) or te.size and (te.min() < 0 or te.max() >= len(sel)):
            raise ParameterError(f"split {k} has indices outside 0 .. {len(sel) - 1}")
        out.append((tr, te))
    return out


def check_folds(selection: "Selection", splits, *, allow_leak: bool = False, near_copy_r: float | None = None,
                allow_unseen: bool = False) -> dict[str, list[str]]:
    """Check folds built by hand (index pairs, or any scikit-learn splitter, an outer or inner loop of a
    nested cross-validation alike) against the store's rules; see :meth:`Selection.check`."""
    return selection.check(splits, allow_leak=allow_leak, near_copy_r=near_copy_r, allow_unseen=allow_unseen)


def align_columns(*selections: "Selection") -> list["Selection"]:
    """The selections with one column set: the voxels every one of them keeps (all of one feature set), so
    per-study models and a shared representation line up column by column."""
    if not selections:
        return []
    names = {s.feature_set.name for s in selections}
    if len(names) != 1:
        raise ParameterError(f"selections of different feature sets ({sorted(names)}) have no columns in common")
    common = selections[0].voxels
    for s in selections[1:]:
        common = np.intersect1d(common, s.voxels)
    if common.size == 0:
        raise QueryError("the selections share no voxel; select maps that cover a common part of the mask")
    return [s.with_columns(common) for s in selections]


def _labels(cat, with_broader: bool):
    """The labels table as a DataFrame: direct labels, plus broader concepts when asked."""
    import pandas as pd

    lab = cat.sql("SELECT map_id, concept, direct FROM labels").to_pandas()
    if not with_broader:
        return lab[lab["direct"]]
    entry = cat.head.labels
    if not entry or not entry.copy:
        return lab
    vocab = load_vocabulary(cat.path / entry.copy)
    extra = [(m, b) for m, c in zip(lab["map_id"], lab["concept"]) if c in vocab.concepts
             for b in vocab.broader_closure(c)]
    if extra:
        lab = pd.concat([lab, pd.DataFrame(extra, columns=["map_id", "concept"]).assign(direct=False)])
    return lab.drop_duplicates(["map_id", "concept"])


def _present_values(cat, feature_set: str) -> str:
    """What the feature set holds, so an empty selection can say what would match."""
    q = ("SELECT list(DISTINCT m.task ORDER BY m.task) FILTER (WHERE m.task IS NOT NULL) AS task, "
         "list(DISTINCT m.stat ORDER BY m.stat) AS stat, count(DISTINCT m.contrast) AS n_contrasts, "
         "count(*) AS n FROM maps m JOIN features f ON f.map_id = m.map_id "
         f"AND f.feature_set = '{feature_set}'")
    r = cat.sql(q).to_pylist()[0]
    return (f"Feature set {feature_set!r} holds {r['n']} map(s): task {', '.join(r['task'] or []) or '(none)'}; "
            f"stat {', '.join(r['stat'] or []) or '(none)'}; {r['n_contrasts']} contrast(s)")


def _sql_list(values) -> str:
    return ", ".join("'" + str(v).replace("'", "''") + "'" for v in values)


# one stat per contrast: the first of these a contrast has (z and t carry the same evidence)
STAT_ORDER = STAT_PREFERENCE


def _one_per(df, per_subject: str, one_stat: bool):
    """Rows kept so that no subject or contrast counts twice, and how many went (by reason).

    ``one_stat``: of one subject's maps of one contrast (same task, session, run), the stat first in
    :data:`STAT_ORDER`.  ``per_subject="contrast"``: of one subject's maps of one contrast, the
    subject-level map (no ``ses``/``run``) where the writer left one, else the first session and run
    in order (a pooled subject-level map outranks a single run's preferred stat).  ``"one"``: one map per subject in all (the first by task, contrast and the rules
    above), for a participant target.  ``"map"``: every map.
    """
    import pandas as pd

    dropped: dict[str, int] = {}
    if df.empty:
        return df, dropped
    has_sub = df["participant"].notna()
    rank = df["stat"].map({s: i for i, s in enumerate(STAT_ORDER)}).fillna(len(STAT_ORDER))
    level = (df["ses"].notna().astype(int) + df["run"].notna().astype(int))  # 0: the subject-level map
    # a map without a subject belongs to its model: its dataset and folder (a group model's t and z are
    # one contrast's two stats, as a subject's are)
    model = df["dataset"].astype(str) + "|" + df["relpath"].astype(str).str.rsplit("/", n=1).str[0]
    work = df.assign(_rank=rank, _level=level, _ses=df["ses"].fillna(""), _run=df["run"].fillna(""),
                     _key=df["participant"].fillna(model))
    keep = pd.Series(True, index=df.index)
    if one_stat:
        cols = ["_key", "task", "contrast", "_ses", "_run", "space", "desc"]
        order = work.sort_values(cols + ["_rank", "map_id"], na_position="last")
        first = ~order.duplicated(subset=[c for c in cols if c in order.columns], keep="first")
        gone = ~first.reindex(df.index)
        if gone.any():
            dropped["another stat of the same contrast (kept: " + "/".join(STAT_ORDER) + " first)"] = int(gone.sum())
        keep &= ~gone
    if per_subject in ("contrast", "one"):
        rest = work[keep]
        cols = (["_key", "task", "contrast", "space"] + ([] if one_stat else ["stat"])
                if per_subject == "contrast" else ["_key"])
        order = rest.sort_values(cols + ["_level", "_ses", "_run", "_rank", "task", "contrast", "map_id"],
                                 na_position="last")
        first = ~order.duplicated(subset=cols, keep="first")
        gone = (~first.reindex(rest.index)) & has_sub[rest.index]
        if gone.any():
            why = ("another session or run of the same subject's contrast (kept: the subject-level map, else the "
                   "first session and run)" if per_subject == "contrast" else "another map of the same subject")
            dropped[why] = int(gone.sum())
        keep[rest.index[gone.to_numpy()]] = False
    return df[keep].reset_index(drop=True), dropped


@declared(missing=MISSING, min_voxels=MIN_VOXELS, min_coverage=MIN_COVERAGE, per_subject=PER_SUBJECT_RULE)
def select(store, where: str | None = None, *, concepts: list[str] | None = None, task: list[str] | None = None,
           stat: list[str] | None = None, features: str | None = None, min_coverage: float | None = None,
           y_from: str = "contrast", group_by: str = "study", with_broader: bool = False,
           missing: str = "common", min_voxels: int | None = None, one_stat: bool = True,
           per_subject: str = "contrast", level: str | list[str] = "subject", target: str | None = None) -> Selection:
    """Choose maps and build a :class:`Selection` (see :meth:`mapstore.Store.select`)."""
    if target is not None:
        import warnings

        warnings.warn("select(target=...) is now select(y_from=...); target goes in the next release",
                      DeprecationWarning, stacklevel=3)
        y_from = target
    _check_select_options(group_by, concepts=concepts, task=task, stat=stat)
    levels = resolve_levels(level)
    fs = store.features(features)
    cat = store.catalog
    lab = _labels(cat, with_broader)
    q, base_q = _selection_sql(cat, fs.name, where, task, stat, _concept_ids(lab, concepts, with_broader),
                               fs.target.second_halves("c"))
    try:
        df = cat.sql(q).to_pandas()
        n_matching = cat.sql(base_q).column(0)[0].as_py()
    except QueryError as exc:
        raise QueryError(f"selection {where!r}: {exc}") from exc
    dropped = {}
    if n_matching > len(df):
        dropped["no feature row"] = int(n_matching - len(df))
    df, by_level = _take_levels(df, levels)
    dropped.update(by_level)
    if min_coverage is not None:
        low = df["coverage"] < min_coverage
        if low.any():
            dropped[f"coverage < {min_coverage:g}"] = int(low.sum())
        df = df[~low].reset_index(drop=True)
    df, once = _one_per(df, per_subject, one_stat)
    dropped.update(once)
    if df.empty:
        raise QueryError(f"the selection is empty (dropped: {dropped or 'none'}); loosen the filters. "
                         + _present_values(cat, fs.name))
    lab = lab[lab.map_id.isin(set(df.map_id))]
    by_map = lab.groupby("map_id")["concept"].apply(lambda s: sorted(set(s))).to_dict()
    df["concepts"] = [by_map.get(m, []) for m in df.map_id]
    y, Y, concept_list = _targets(df, y_from, concepts)
    groups = _groups(df, group_by)
    query = {"where": where, "concepts": concepts, "task": task, "stat": stat, "features": fs.name,
             "min_coverage": min_coverage, "y_from": y_from, "group_by": group_by, "with_broader": with_broader,
             "missing": missing, "min_voxels": min_voxels, "one_stat": one_stat, "per_subject": per_subject,
             "level": level if isinstance(level, str) else list(level), "sql": q}
    return Selection(store, fs, df, y, Y, concept_list, groups, group_by, y_from, query, dropped, missing,
                     min_voxels)


def resolve_levels(level: str | list[str] | tuple[str, ...]) -> tuple[str, ...]:
    """The map levels a ``level=`` choice takes: ``"subject"`` (the default) is one person's maps (run,
    session and subject level), ``"any"`` every level, else the levels named.

    >>> resolve_levels("subject"), resolve_levels(["group"])
    (('run', 'session', 'subject'), ('group',))
    """
    names = [level] if isinstance(level, str) else list(level) if isinstance(level, (list, tuple)) else None
    if not names or any(n not in LEVEL_CHOICES for n in names):
        raise ParameterError(f"level must be one of {list(LEVEL_CHOICES)} or a list of {list(LEVELS)}, got {level!r}")
    out: list[str] = []
    for n in names:
        for lv in SUBJECT_LEVELS if n == "subject" else LEVELS if n == "any" else (n,):
            if lv not in out:
                out.append(lv)
    return tuple(out)


def map_levels(df) -> "Any":
    """Each row's level; a catalog written before levels were recorded: subject when it names one."""
    import pandas as pd

    derived = pd.Series(np.where(df["sub"].notna(), "subject", "unknown"), index=df.index)
    return df["level"].fillna(derived) if "level" in df.columns else derived


def _take_levels(df, levels: tuple[str, ...]):
    """The rows of the levels asked for, and what went, by level (with the choice that takes them)."""
    if df.empty:
        return df, {}
    lv = map_levels(df)
    keep = lv.isin(levels).to_numpy()
    dropped = {}
    for name, n in lv[~keep].value_counts().sort_index().items():
        dropped[f"level {name} (take them with level={name!r} or level='any')"] = int(n)
    return df[keep].reset_index(drop=True), dropped


def _check_select_options(group_by: str, **lists: list[str] | None) -> None:
    if not isinstance(group_by, str) or not group_by:
        raise ParameterError(f"group_by must be a unit ({', '.join(sorted(GROUP_COLUMNS))}), a column or "
                             f"metadata:KEY, got {group_by!r}")
    for name, val in lists.items():
        if val is not None and (isinstance(val, str) or not all(isinstance(v, str) for v in val)):
            raise ParameterError(f"{name} must be a list of strings, got {val!r}")


def _concept_ids(lab, concepts: list[str] | None, with_broader: bool) -> list[str] | None:
    """Ids of the maps labelled with one of ``concepts`` (None: no concept filter)."""
    if not concepts:
        return None
    known = set(lab["concept"])
    if not known:
        raise QueryError("the store has no labels; run 'mapstore labels --store DIR --vocab FILE' first")
    unknown = sorted(set(concepts) - known)
    if unknown:
        raise QueryError(f"concept(s) {unknown} label no map; labelled concepts: {sorted(known)}"
                         + ("" if with_broader else " (broader concepts count with with_broader=True)"))
    return sorted(set(lab.loc[lab["concept"].isin(concepts), "map_id"]))


def _selection_sql(cat, feature_set: str, where: str | None, task: list[str] | None, stat: list[str] | None,
                   ids: list[str] | None, second_halves: str | None = None) -> tuple[str, str]:
    """The query of the selected maps with their feature rows, and the count of maps matching at all.

    In a surface set a hemisphere pair is one row, under its left file's map_id: the right file of a
    pair (``second_halves``, an SQL condition over ``c``) is not counted as a map without a row.
    """
    maps_cols = set(cat.sql("DESCRIBE maps")["column_name"].to_pylist())
    p_cols = [c for c in cat.sql("DESCRIBE participants")["column_name"].to_pylist()
              if c not in maps_cols and c != "participant_id"]
    p_sel = "".join(f', p."{c}"' for c in p_cols)
    conds = []
    if where:
        conds.append(f"({where})")
    if task:
        conds.append(f"task IN ({_sql_list(task)})")
    if stat:
        # stat labels are matched case-insensitively: a user's T is nilearn's t, f is F
        conds.append(f"lower(stat) IN ({_sql_list(v.lower() for v in stat)})")
    if ids is not None:
        conds.append(f"map_id IN ({_sql_list(ids)})")
    # the WHERE predicate sees maps, participants' extra columns, and `concepts` (direct labels)
    inner = (f"SELECT m.*{p_sel}, coalesce(l.concepts, []) AS concepts FROM maps m LEFT JOIN participants p "
             "ON p.dataset = m.dataset AND p.sub = m.sub LEFT JOIN (SELECT map_id, list(concept ORDER BY concept) "
             "AS concepts FROM labels WHERE direct GROUP BY map_id) l ON l.map_id = m.map_id")
    chosen = f"SELECT * FROM ({inner}) AS m" + (" WHERE " + " AND ".join(conds) if conds else "")
    # the set's rows are filtered by the selected ids first (a semi join built on the selection), so
    # a million-row rows table is streamed, never held in a hash table
    q = (f"WITH s AS MATERIALIZED ({chosen}), f AS (SELECT map_id, coverage, feature_key, conversion, shard, "
         f"\"row\", row_sha256 FROM features WHERE feature_set = '{feature_set}' AND map_id IN (SELECT map_id FROM s)) "
         "SELECT s.*, f.coverage, f.feature_key, f.conversion, f.shard AS feature_shard, f.\"row\" AS feature_row, "
         "f.row_sha256 AS feature_row_sha256 FROM s JOIN f ON f.map_id = s.map_id ORDER BY s.map_id")
    count = f"SELECT count(*) FROM ({chosen})"
    if second_halves:
        count += f" AS c WHERE NOT ({second_halves})"
    return q, count


def _targets(df, y_from: str, concepts: list[str] | None):
    """``y`` (one label per map) or ``Y`` (multi-label indicators, with their concept list)."""
    import pandas as pd

    y = Y = None
    concept_list: list[str] = []
    if y_from == "contrast":
        y = df["contrast"].to_numpy(object)
    elif y_from == "study-contrast":  # each study's contrast names kept apart from another's
        y = np.array([f"{s}/{c}" for s, c in zip(df["study"], df["contrast"])], dtype=object)
    elif y_from == "concept":
        keep = set(concepts) if concepts else None
        chosen = [[c for c in cs if keep is None or c in keep] for cs in df["concepts"]]
        bad = [(m, c) for m, c in zip(df.map_id, chosen) if len(c) != 1]
        if bad:
            ex = ", ".join(f"{m} {c or '(none)'}" for m, c in bad[:5])
            raise QueryError(f"y_from 'concept' needs exactly one concept per map; {len(bad)} map(s) have "
                             f"none or several (e.g. {ex}); choose concepts=[...] that do not overlap, or use "
                             "y_from='concepts' for a multi-label indicator matrix")
        y = np.array([c[0] for c in chosen], dtype=object)
    elif y_from == "concepts":
        concept_list = sorted(set(concepts) if concepts else {c for cs in df["concepts"] for c in cs})
        idx = {c: i for i, c in enumerate(concept_list)}
        Y = np.zeros((len(df), len(concept_list)), dtype=np.uint8)
        for r, cs in enumerate(df["concepts"]):
            for c in cs:
                if c in idx:
                    Y[r, idx[c]] = 1
    elif y_from in df.columns:
        if pd.isna(df[y_from]).any():
            raise QueryError(f"y_from column {y_from!r} is empty for {int(pd.isna(df[y_from]).sum())} map(s)")
        col = df[y_from]
        # a numeric column (age, a score) stays numeric: a regression target
        y = col.to_numpy(np.float64) if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col) \
            else col.to_numpy(object)
    else:
        raise ParameterError(f"y_from must be one of {list(Y_FROM)} or a column of maps, got {y_from!r}")
    return y, Y, concept_list


def _groups(df, group_by: str) -> np.ndarray:
    """Group per map: a named unit (study, site, lab, subject, dataset), a maps or participants column,
    or ``metadata:KEY``, a field of the maps' sidecar metadata (a scanner model: ``metadata:ManufacturersModelName``)."""
    import json

    import pandas as pd

    if group_by.startswith("metadata:"):
        key = group_by.split(":", 1)[1]
        vals = [json.loads(m).get(key) if isinstance(m, str) and m else None for m in df["metadata"]]
        df = df.assign(_group=pd.Series([None if v is None else str(v) for v in vals], dtype=object))
        gcol = "_group"
    else:
        gcol = GROUP_COLUMNS.get(group_by, group_by)
    if gcol not in df.columns:
        raise ParameterError(f"group_by {group_by!r} is not a unit ({', '.join(sorted(GROUP_COLUMNS))}), a column "
                             "of maps or participants, or metadata:KEY")
    if df[gcol].isna().any():
        n = int(df[gcol].isna().sum())
        raise QueryError(f"{n} selected map(s) have no {group_by} (e.g. {df.loc[df[gcol].isna(), 'map_id'].iloc[0]}); "
                         f"set it with an origins file ('mapstore index --origins'), or group by study")
    return df[gcol].to_numpy(object)
