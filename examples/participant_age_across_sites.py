"""
A participant variable across sites
===================================

Predict a participant variable (age) from maps, leave-one-site-out (run `mapstore demo DIR` first).

Participant metadata is personal data under the studies' ethics approval: keep its exports where that
approval allows. Run it as::

    python examples/participant_age_across_sites.py DIR/store
"""

import sys

import numpy as np
from sklearn.linear_model import RidgeCV

import mapstore

store = mapstore.open(sys.argv[1])
# one map per subject (no subject counts twice), age stays numeric, sites held out one at a time
sel = store.select(y_from="age", per_subject="one", group_by="site", stat=["t", "z"])
print(f"{len(sel)} subjects at {len(set(sel.groups))} sites; y is {sel.y.dtype}; dropped: {sel.dropped}")
X = sel.X / np.linalg.norm(sel.X, axis=1, keepdims=True)
w = sel.weights("study")  # each study counts the same in training, whatever its size
for train, test in sel.splits():
    model = RidgeCV(alphas=np.logspace(-1, 4, 11)).fit(X[train], sel.y[train], sample_weight=w[train])
    mae = np.abs(model.predict(X[test]) - sel.y[test]).mean()
    base = np.abs(np.average(sel.y[train], weights=w[train]) - sel.y[test]).mean()
    print(f"held-out site {sel.groups[test][0]:14s} MAE {mae:5.1f} years (predicting the training mean: {base:5.1f})")
print("(the demo's invented maps carry no age signal: a model that finds none predicts the mean, as here)")
