"""
Multitask decoding, one head per study
======================================

Multitask decoding: each study's own contrast names, one head per study on a representation shared by
all studies; subjects held out within every study (run `mapstore demo DIR` first)::

    python examples/multitask_studies.py DIR/store
"""

import sys

import numpy as np
from sklearn.decomposition import PCA
from sklearn.linear_model import LogisticRegression

import mapstore

store = mapstore.open(sys.argv[1])
# study-qualified targets ("inkwell/faces" is not "driftwood/faces"), grouped by subject
sel = store.select(y_from="study-contrast", group_by="subject", stat=["t", "z"])
splits = sel.splits("within-study-group-kfold:2")  # every fold holds out half the subjects of every study
print(f"{len(sel)} maps of {len(set(sel.studies))} studies; folds checked: {mapstore.check_folds(sel, splits)}")
X = sel.X / np.linalg.norm(sel.X, axis=1, keepdims=True)
correct = {s: [] for s in sorted(set(sel.studies))}
for train, test in splits:
    shared = PCA(n_components=min(20, len(train) - 1), random_state=0).fit(X[train])  # learned from all studies
    Z = shared.transform(X)
    for study in correct:  # one head per study (the task vector says which)
        tr, te = train[sel.studies[train] == study], test[sel.studies[test] == study]
        if len(set(sel.y[tr])) < 2 or not len(te):
            continue
        head = LogisticRegression(max_iter=500).fit(Z[tr], sel.y[tr])
        correct[study] += list(head.predict(Z[te]) == sel.y[te])
for study, hits in correct.items():
    n_classes = len({y for y, s in zip(sel.y, sel.studies) if s == study})
    print(f"{study:12s} accuracy {np.mean(hits):.2f} over {len(hits)} held-out maps (chance {1 / n_classes:.2f})")
