"""Selections and splits: no subject or identical map on both sides; folds equal scikit-learn's."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.model_selection import GroupKFold, GroupShuffleSplit, LeaveOneGroupOut

from mapstore.errors import LeakageError, ParameterError
from mapstore.select._splits import assign_folds, check_leakage, parse_scheme


@st.composite
def catalogs(draw):
    """Random catalogs: studies with subjects, maps per subject, some files copied across studies."""
    n_studies = draw(st.integers(2, 6))
    rows = []
    for s in range(n_studies):
        for sub in range(draw(st.integers(1, 4))):
            for m in range(draw(st.integers(1, 3))):
                rows.append({"study": f"s{s}", "site": f"s{s}-site{sub % 2}", "participant": f"s{s}/sub-{sub}",
                             "sha256": f"{s}-{sub}-{m}"})
    copies = draw(st.lists(st.tuples(st.integers(0, len(rows) - 1), st.integers(0, len(rows) - 1)), max_size=3))
    for a, b in copies:
        rows[b] = dict(rows[b], sha256=rows[a]["sha256"])
    return rows


SCHEMES = ["leave-one-group-out", "group-kfold:2", "group-kfold:3", "holdout:0.3"]


@settings(max_examples=60, deadline=None)
@given(catalogs(), st.sampled_from(SCHEMES), st.sampled_from(["study", "site", "participant"]),
       st.integers(0, 5))
def test_no_subject_or_file_on_both_sides(rows, scheme, group_by, seed):
    groups = np.array([r[group_by] for r in rows], dtype=object)
    parts = np.array([r["participant"] for r in rows], dtype=object)
    shas = np.array([r["sha256"] for r in rows], dtype=object)
    ids = np.array([str(i) for i in range(len(rows))], dtype=object)
    try:
        splits = assign_folds(groups, scheme, seed)
    except ParameterError:
        assert len(set(groups)) < max(2, int(scheme.split(":")[1]) if "kfold" in scheme else 2)
        return
    try:
        check_leakage(splits, parts, shas, ids)
    except LeakageError as exc:
        # only an identical file copied into another group can leak here (participants nest in
        # studies, sites and themselves); the message names the offending maps
        leaked = any(set(shas[tr]) & set(shas[te]) for tr, te in splits)
        assert leaked and "sha256" in str(exc) and "test map ids" in str(exc)
        return
    for tr, te in splits:
        assert not set(parts[tr]) & set(parts[te])
        assert not set(shas[tr]) & set(shas[te])
        assert not set(groups[tr]) & set(groups[te])
        assert len(tr) + len(te) == len(rows) or scheme.startswith("holdout")


def test_leave_one_group_out_by_its_definition():
    # reference: the definition of leave-one-group-out (each group is the test set exactly once,
    # the training set is every other sample; groups in sorted order, as scikit-learn documents),
    # worked by hand on five maps of three studies
    groups = np.array(["beta", "alpha", "beta", "gamma", "alpha"], dtype=object)
    got = [(tr.tolist(), te.tolist()) for tr, te in assign_folds(groups, "leave-one-group-out")]
    assert got == [([0, 2, 3], [1, 4]), ([1, 3, 4], [0, 2]), ([0, 1, 2, 4], [3])]


def test_group_kfold_and_holdout_by_their_definitions():
    # reference: the definitions of grouped k-fold (every sample in exactly one test fold, no
    # group split across folds) and of a grouped holdout (whole groups on one side), hand-checked
    groups = np.array(list("aabbbccddeef"), dtype=object)
    splits = assign_folds(groups, "group-kfold:3")
    assert len(splits) == 3
    tests = np.concatenate([te for _, te in splits])
    assert sorted(tests.tolist()) == list(range(len(groups)))  # a partition of the samples
    for tr, te in splits:
        assert sorted(np.concatenate([tr, te]).tolist()) == list(range(len(groups)))
        assert not set(groups[tr]) & set(groups[te])
    (tr, te), = assign_folds(groups, "holdout:0.3", seed=1)
    assert not set(groups[tr]) & set(groups[te]) and len(tr) and len(te)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(0, 7), min_size=4, max_size=60), st.integers(0, 9))
def test_fold_assignment_is_the_scikit_learn_splitters(group_ints, seed):
    # consistency test: assign_folds delegates to these splitters; this pins the delegation
    # (parameters, ordering, seeds), not the splitting itself
    groups = np.array([f"g{g}" for g in group_ints], dtype=object)
    n_groups = len(set(group_ints))
    dummy = np.zeros((len(groups), 1))
    cases = [("leave-one-group-out", LeaveOneGroupOut()),
             ("holdout:0.25", GroupShuffleSplit(n_splits=1, test_size=0.25, random_state=seed))]
    if n_groups >= 3:
        cases.append(("group-kfold:3", GroupKFold(n_splits=3)))
    for scheme, ref in cases:
        if n_groups < 2:
            with pytest.raises(ParameterError):
                assign_folds(groups, scheme, seed)
            continue
        ours = assign_folds(groups, scheme, seed)
        theirs = list(ref.split(dummy, groups=groups))
        assert len(ours) == len(theirs)
        for (a, b), (c, d) in zip(ours, theirs):
            np.testing.assert_array_equal(a, c)
            np.testing.assert_array_equal(b, d)


def test_parse_scheme_errors():
    for bad in ("group-kfold:1", "group-kfold:x", "holdout:1.5", "random", "holdout:"):
        with pytest.raises(ParameterError):
            parse_scheme(bad)
    with pytest.raises(ParameterError, match="needs at least 5 groups"):
        assign_folds(np.array(["a", "b", "c"]), "group-kfold:5")


def test_subject_leak_is_refused_then_allowed():
    groups = np.array(["siteA", "siteA", "siteB", "siteB"], dtype=object)
    parts = np.array(["s/sub-1", "s/sub-2", "s/sub-1", "s/sub-3"], dtype=object)  # sub-1 scanned at both sites
    shas = np.array(["a", "b", "c", "d"], dtype=object)
    ids = np.array(["m0", "m1", "m2", "m3"], dtype=object)
    splits = assign_folds(groups, "leave-one-group-out")
    with pytest.raises(LeakageError, match="s/sub-1") as err:
        check_leakage(splits, parts, shas, ids)
    assert "m0" in str(err.value) or "m2" in str(err.value)
    with pytest.warns(UserWarning, match="leaky split accepted"):
        assert check_leakage(splits, parts, shas, ids, allow_leak=True)
