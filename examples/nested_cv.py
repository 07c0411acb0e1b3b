"""
Nested cross-validation with checked folds
==========================================

Nested cross-validation: the regularisation chosen on inner folds grouped by subject, scored on held-out
studies; scikit-learn's metadata routing passes the groups down, and every fold is checked against the
store's leakage rules (run `mapstore demo DIR` first)::

    python examples/nested_cv.py DIR/store
"""

import sys

import numpy as np
import sklearn
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import GridSearchCV, GroupKFold, cross_val_score

import mapstore

sklearn.set_config(enable_metadata_routing=True)
store = mapstore.open(sys.argv[1])
sel = store.select(concepts=["visual-motion", "hand-movement", "listening", "reading"], y_from="concept",
                   stat=["t", "z"], group_by="study")
X = sel.X / np.linalg.norm(sel.X, axis=1, keepdims=True)
subjects = sel.meta["participant"].to_numpy()
outer = sel.splits()  # leave-one-study-out, checked
inner = GroupKFold(n_splits=3)
for train, _ in outer:  # the inner folds each outer training side will see, checked the same way
    folds = [(train[a], train[b]) for a, b in inner.split(X[train], groups=subjects[train])]
    mapstore.check_folds(sel, folds)
print(f"{len(outer)} outer folds and their inner folds pass the leakage and unseen-class checks")
# with routing on, the search passes `groups` on to its inner GroupKFold
search = GridSearchCV(LogisticRegression(max_iter=500), {"C": [0.1, 1.0, 10.0]}, cv=inner)
scores = cross_val_score(search, X, sel.y, cv=outer, params={"groups": subjects})
for (_, test), s in zip(outer, scores):
    print(f"held-out {sel.groups[test][0]:12s} accuracy {s:.2f}")
print(f"mean {scores.mean():.2f}")
