"""Decode concepts across studies from a mapstore store (run `mapstore demo DIR` first).

    python examples/decode_across_studies.py DIR/store
"""

import sys

import numpy as np
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import FunctionTransformer, StandardScaler

import mapstore

store = mapstore.open(sys.argv[1])
sel = store.select(concepts=["visual-motion", "hand-movement", "listening", "reading", "arithmetic"],
                   target="concept", stat=["t", "z"], group_by="study", min_coverage=0.5)
print(f"{len(sel)} maps, {sel.X.shape[1]} voxels, dropped: {sel.dropped or 'none'}")

# missing voxels (outside a map's field of view) count as no effect; each map is z-scored
prep = FunctionTransformer(lambda a: StandardScaler().fit_transform(np.nan_to_num(a).T).T)
model = make_pipeline(prep, LogisticRegression(max_iter=300, C=0.01))
scores = cross_val_score(model, sel.X, sel.y, cv=sel.splits("leave-one-group-out"))
for study, s in zip(sorted(set(sel.groups)), scores):
    print(f"held-out {study:12s} accuracy {s:.2f}")

# the coefficients of a model trained on everything, as a brain image for nilearn plotting
model.fit(sel.X, sel.y)
coef = model[-1].coef_[list(model[-1].classes_).index("reading")]
img = store.to_image(coef)
img.to_filename("reading-weights.nii.gz")
print("wrote reading-weights.nii.gz")
