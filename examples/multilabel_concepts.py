"""
Multi-label decoding with the concept hierarchy
===============================================

Multi-label decoding with the concept hierarchy, leave-one-study-out (run `mapstore demo DIR` first)::

    python examples/multilabel_concepts.py DIR/store
"""

import sys

import numpy as np
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score
from sklearn.multiclass import OneVsRestClassifier

import mapstore

store = mapstore.open(sys.argv[1])
# every concept a map has, its broader ones included (a reading map is a language map too)
sel = store.select(y_from="concepts", stat=["t", "z"], with_broader=True)
print(f"{len(sel)} maps x {sel.X.shape[1]} voxels, {len(sel.concepts)} concepts: {', '.join(sel.concepts)}")
X = sel.X / np.linalg.norm(sel.X, axis=1, keepdims=True)  # each map scaled on its own: nothing leaks
scores = {c: [] for c in sel.concepts}
for train, test in sel.splits(allow_unseen=True):  # a concept one study alone has is unseen without it
    model = OneVsRestClassifier(LogisticRegression(max_iter=500, C=10.0))
    seen = sel.Y[train].sum(axis=0) > 0
    model.fit(X[train], sel.Y[train][:, seen])
    proba = model.predict_proba(X[test])
    for j, c in enumerate(np.array(sel.concepts)[seen]):
        y = sel.Y[test][:, sel.concepts.index(c)]
        if 0 < y.sum() < len(y):  # an AUC needs both classes in the held-out study
            scores[c].append(roc_auc_score(y, proba[:, j]))
for c, s in scores.items():
    print(f"{c:16s} mean AUC over held-out studies {np.mean(s):.2f} ({len(s)} studies)" if s else
          f"{c:16s} never both present and absent in a held-out study")
