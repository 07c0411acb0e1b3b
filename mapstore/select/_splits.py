"""Leakage-free splits: schemes that yield (train, test) index pairs for scikit-learn's ``cv=``, and the
checks every split passes (no participant or identical map on both sides, every test class seen in
training)."""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from ..errors import LeakageError, ParameterError, UnseenClassError

__all__ = ["SCHEMES", "parse_scheme", "assign_folds", "check_classes", "fold_vector", "copy_groups", "check_leakage"]

_KFOLD_KINDS = ("group-kfold", "stratified-group-kfold", "within-study-group-kfold")
SCHEMES = ("leave-one-group-out", "group-kfold:K", "repeated-group-kfold:K:R", "stratified-group-kfold:K",
           "within-study-group-kfold:K", "holdout:FRACTION")


def parse_scheme(scheme: str) -> tuple[str, Any]:
    """A split scheme's name -> (kind, parameter).

    ``leave-one-group-out``; ``group-kfold:K`` (K folds of whole groups); ``stratified-group-kfold:K``
    (whole groups, class shares kept as far as the groups allow); ``within-study-group-kfold:K``
    (every study's groups, e.g. its subjects, dealt into K folds within that study, so each fold
    holds out part of every study); ``repeated-group-kfold:K:R`` (R shuffled group k-folds, K R
    splits); ``holdout:FRACTION``.

    Examples
    --------
    >>> parse_scheme("group-kfold:5")
    ('group-kfold', 5)
    >>> parse_scheme("holdout:0.2")
    ('holdout', 0.2)
    """
    if not isinstance(scheme, str):
        raise ParameterError(f"scheme must be a string, got {type(scheme).__name__}")
    if scheme in ("leave-one-group-out", "logo"):
        return "leave-one-group-out", None
    kind, _, arg = scheme.partition(":")
    if kind == "repeated-group-kfold":
        k_text, _, r_text = arg.partition(":")
        try:
            k, r = int(k_text), int(r_text)
        except ValueError:
            k = r = 0
        if k < 2 or r < 1:
            raise ParameterError(f"scheme {scheme!r}: repeated-group-kfold needs K >= 2 and R >= 1, e.g. "
                                 "repeated-group-kfold:5:10")
        return kind, (k, r)
    if kind in _KFOLD_KINDS:
        try:
            k = int(arg)
        except ValueError:
            k = 0
        if k < 2:
            raise ParameterError(f"scheme {scheme!r}: {kind} needs K >= 2, e.g. {kind}:5")
        return kind, k
    if kind == "holdout":
        try:
            f = float(arg)
        except ValueError:
            f = -1.0
        if not 0 < f < 1:
            raise ParameterError(f"scheme {scheme!r}: holdout needs a test fraction in (0, 1), e.g. holdout:0.2")
        return kind, f
    raise ParameterError(f"unknown scheme {scheme!r}; use one of {', '.join(SCHEMES)}")


def assign_folds(groups: np.ndarray, scheme: str, seed: int = 0, y: np.ndarray | None = None,
                 studies: np.ndarray | None = None) -> list[tuple[np.ndarray, np.ndarray]]:
    """Train/test index pairs for ``groups`` under a scheme, as scikit-learn's splitters make them.

    ``leave-one-group-out`` is ``LeaveOneGroupOut``, ``group-kfold:K`` is ``GroupKFold(K)``,
    ``stratified-group-kfold:K`` is ``StratifiedGroupKFold(K, shuffle=True, random_state=seed)`` on
    ``y``, ``within-study-group-kfold:K`` is ``GroupKFold(K)`` run within each study of ``studies``
    (fold k's test side joins every study's k-th fold), and ``holdout:F`` is
    ``GroupShuffleSplit(n_splits=1, test_size=F, random_state=seed)``.

    Examples
    --------
    >>> import numpy as np
    >>> [test.tolist() for _, test in assign_folds(np.array(["a", "a", "b", "c"]), "leave-one-group-out")]
    [[0, 1], [2], [3]]
    """
    # imported here: scikit-learn takes ~0.5 s to import, and only splitting needs it
    from sklearn.model_selection import GroupKFold, GroupShuffleSplit, LeaveOneGroupOut, StratifiedGroupKFold

    kind, arg = parse_scheme(scheme)
    groups = np.asarray(groups)
    n_groups = len(np.unique(groups))
    dummy = np.zeros((len(groups), 1))
    if kind == "repeated-group-kfold":
        k, r = arg
        if k > n_groups:
            raise ParameterError(f"repeated-group-kfold:{k}:{r} needs at least {k} groups, the selection has "
                                 f"{n_groups}")
        return [(np.asarray(tr), np.asarray(te)) for rep in range(r)
                for tr, te in GroupKFold(n_splits=k, shuffle=True, random_state=seed + rep).split(dummy,
                                                                                                  groups=groups)]
    if kind == "within-study-group-kfold":
        if studies is None:
            raise ParameterError("within-study-group-kfold needs each map's study")
        return _within_studies(groups, np.asarray(studies), int(arg))  # type: ignore[arg-type]
    if kind == "stratified-group-kfold":
        if y is None or np.asarray(y).ndim != 1:
            raise ParameterError("stratified-group-kfold needs one class per map (target 'contrast', 'concept', "
                                 "'study-contrast' or a column); a multi-label target has no single class")
        if arg > n_groups:
            raise ParameterError(f"stratified-group-kfold:{arg} needs at least {arg} groups, the selection has "
                                 f"{n_groups}")
        sgk = StratifiedGroupKFold(n_splits=int(arg), shuffle=True, random_state=seed)  # type: ignore[arg-type]
        return [(np.asarray(tr), np.asarray(te)) for tr, te in sgk.split(dummy, np.asarray(y, dtype=str), groups)]
    if kind == "leave-one-group-out":
        if n_groups < 2:
            raise ParameterError(f"leave-one-group-out needs at least 2 groups, the selection has {n_groups}")
        splitter = LeaveOneGroupOut()
    elif kind == "group-kfold":
        if arg > n_groups:
            raise ParameterError(f"group-kfold:{arg} needs at least {arg} groups, the selection has {n_groups}; "
                                 f"use group-kfold:{max(2, n_groups)} or group by something finer")
        splitter = GroupKFold(n_splits=arg)
    else:
        if n_groups < 2:
            raise ParameterError(f"holdout needs at least 2 groups, the selection has {n_groups}")
        splitter = GroupShuffleSplit(n_splits=1, test_size=arg, random_state=seed)
    return [(np.asarray(tr), np.asarray(te)) for tr, te in splitter.split(dummy, groups=groups)]


def _within_studies(groups: np.ndarray, studies: np.ndarray, k: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """K folds whose test sides hold part of every study: GroupKFold(K) within each study, fold by fold."""
    from sklearn.model_selection import GroupKFold

    test: list[list[np.ndarray]] = [[] for _ in range(k)]
    for study in np.unique(studies.astype(str)):
        idx = np.flatnonzero(studies.astype(str) == study)
        g = groups[idx]
        if len(np.unique(g)) < k:
            raise ParameterError(f"within-study-group-kfold:{k}: study {study!r} has {len(np.unique(g))} group(s); "
                                 f"each study needs at least {k} (use a smaller K, or leave that study out)")
        for f, (_, te) in enumerate(GroupKFold(n_splits=k).split(np.zeros((len(idx), 1)), groups=g)):
            test[f].append(idx[te])
    out = []
    for parts in test:
        te = np.sort(np.concatenate(parts))
        out.append((np.setdiff1d(np.arange(len(groups)), te), te))
    return out


def check_classes(splits, y: np.ndarray | None = None, Y: np.ndarray | None = None,
                  concepts: list[str] | None = None, allow_unseen: bool = False) -> list[str]:
    """Refuse splits whose test side holds a class its training side never saw (no model can score on it).

    ``y`` holds one class per map (a numeric ``y`` is a regression target: not checked), ``Y`` a 0/1
    matrix over ``concepts``.  Raises :class:`~mapstore.errors.UnseenClassError` naming the split and
    the classes, unless ``allow_unseen`` (then a warning); returns the problems found.

    Examples
    --------
    >>> import numpy as np
    >>> splits = [(np.array([0, 1]), np.array([2, 3]))]
    >>> check_classes(splits, np.array(["a", "b", "a", "b"], dtype=object))
    []
    """
    problems: list[str] = []
    if y is not None and np.asarray(y).dtype.kind not in "OUS":
        return problems  # a numeric target
    for i, (tr, te) in enumerate(splits):
        if y is not None:
            seen = set(np.asarray(y, dtype=object)[tr].tolist())
            unseen = sorted({str(v) for v in np.asarray(y, dtype=object)[te].tolist()} - {str(v) for v in seen})
        elif Y is not None:
            names = concepts or [str(c) for c in range(Y.shape[1])]
            trained = Y[tr].sum(axis=0) > 0
            unseen = [names[c] for c in np.flatnonzero((Y[te].sum(axis=0) > 0) & ~trained)]
        else:
            unseen = []
        if unseen:
            listed = ", ".join(unseen[:5]) + (f" and {len(unseen) - 5} more" if len(unseen) > 5 else "")
            problems.append(f"split {i}: {len(unseen)} class(es) in test that training never saw: {listed}")
    if problems and not allow_unseen:
        raise UnseenClassError(
            "no model can score these test maps:\n  " + "\n  ".join(problems[:10]) +
            "\nuse a target the groups share (y_from='concept' from labels, which studies have in common; "
            "y_from='study-contrast' with scheme='within-study-group-kfold:K' for each study's own names), group "
            "by something finer (group_by='subject'), or pass allow_unseen=True (--allow-unseen) to accept it "
            "(recorded in the export's manifest)")
    if problems:
        warnings.warn("split with unseen test classes accepted (allow_unseen): " + "; ".join(problems[:3]),
                      stacklevel=3)
    return problems


def fold_vector(splits, n: int) -> np.ndarray:
    """Per item: index of the split whose test side holds it (-1 if none: holdout's train side)."""
    fold = np.full(n, -1, dtype=np.int64)
    for i, (_, te) in enumerate(splits):
        fold[te] = i
    return fold


def copy_groups(n: int, copies: list[tuple[int, int, str, float]]) -> list[tuple[np.ndarray, str, float]]:
    """Groups of positions joined by copy pairs (connected components, linear in the pairs): each group's
    members, ``identical`` when every pair in it is, and its strongest absolute r."""
    parent = list(range(n))

    def find(x: int) -> int:
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for a, b, _, _ in copies:
        parent[find(a)] = find(b)
    kind: dict[int, str] = {}
    strength: dict[int, float] = {}
    for a, _, k, r in copies:
        root = find(a)
        kind[root] = "identical" if kind.get(root, "identical") == "identical" and k == "identical" else "near"
        strength[root] = r if abs(r) >= abs(strength.get(root, 0.0)) else strength[root]
    members: dict[int, list[int]] = {}
    for x in range(n):
        root = find(x)
        if root in kind:
            members.setdefault(root, []).append(x)
    return [(np.array(m), kind[root], strength[root]) for root, m in members.items()]


def check_leakage(splits, participants: np.ndarray, sha256: np.ndarray, map_ids: np.ndarray,
                  allow_leak: bool = False, copies: list[tuple[int, int, str, float]] | None = None) -> list[str]:
    """Refuse splits that put one participant, one identical file or two copies of a map on both sides.

    ``copies`` are (i, j, kind, r) pairs of positions whose feature rows are identical or
    near-copies (see :mod:`mapstore.features._copies`); maps joined by them form a group, and a group with
    members on both sides of a split leaks (copies need not be listed pair by pair: a star is enough).
    """
    problems: list[str] = []
    groups = copy_groups(len(map_ids), copies or [])
    for i, (tr, te) in enumerate(splits):
        for what, col in (("subject", participants), ("identical map (sha256)", sha256)):
            # a map without a subject (a group map) is nobody's: never one shared person
            tr_set = {v for v in col[tr] if isinstance(v, str)}
            both = sorted({v for v in col[te] if isinstance(v, str)} & tr_set)
            if both:
                ids = [str(map_ids[j]) for j in te if col[j] in both][:5]
                problems.append(f"split {i}: {len(both)} {what}(s) on both sides, e.g. {both[0]} "
                                f"(test map ids {', '.join(ids)})")
        if groups:
            side = np.zeros(len(map_ids), dtype=np.int8)
            side[tr], side[te] = 1, 2
            across = [(members, k, r) for members, k, r in groups if {1, 2} <= set(side[members].tolist())]
            if across:
                members, k, r = max(across, key=lambda g: abs(g[2]))
                a = members[side[members] == 1][0]
                b = members[side[members] == 2][0]
                what = "identical feature rows" if k == "identical" else f"near-copies (r = {r:+.3f})"
                problems.append(f"split {i}: {len(across)} group(s) of copies on both sides, e.g. {map_ids[a]} and "
                                f"{map_ids[b]}: {what}")
    if problems and not allow_leak:
        raise LeakageError("the split leaks:\n  " + "\n  ".join(problems[:10]) +
                           "\ngroup by a coarser unit (study or subject), drop duplicated maps (SELECT * FROM "
                           "feature_copies lists them), or pass allow_leak=True (--allow-leak) to accept it")
    if problems:
        warnings.warn("leaky split accepted (allow_leak): " + "; ".join(problems[:3]), stacklevel=3)
    return problems
