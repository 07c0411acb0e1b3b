"""
Decode concepts across studies
==============================

Decode concepts across studies from a mapstore store (run `mapstore demo DIR` first)::

    python examples/decode_across_studies.py DIR/store

The weights are written into ``DIR/example-outputs`` (beside the store, never into it), and drawn
there with nilearn when matplotlib is installed (``pip install 'mapstore[plot]'``).
"""

import sys
from pathlib import Path

import numpy as np

from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import FunctionTransformer, StandardScaler

import mapstore

store = mapstore.open(sys.argv[1])
sel = store.select(concepts=["visual-motion", "hand-movement", "listening", "reading", "arithmetic"],
                   y_from="concept", stat=["t", "z"], group_by="study", min_coverage=0.5)
print(f"{len(sel)} maps, {sel.X.shape[1]} voxels, dropped: {sel.dropped or 'none'}")
print(sel.missing_report)  # X keeps the voxels every selected map covers (missing="common")

# each map is z-scored on its own (no statistic is learned across maps, so nothing leaks)
prep = FunctionTransformer(lambda a: StandardScaler().fit_transform(np.asarray(a).T).T)
model = make_pipeline(prep, LogisticRegression(max_iter=300, C=0.01))
scores = cross_val_score(model, sel.X, sel.y, cv=sel.splits("leave-one-group-out"))
for study, s in zip(sorted(set(sel.groups)), scores):
    print(f"held-out {study:12s} accuracy {s:.2f}")

# the coefficients of a model trained on everything, as a brain image for nilearn plotting
model.fit(sel.X, sel.y)
coef = model[-1].coef_[list(model[-1].classes_).index("reading")]
img = sel.to_image(coef)  # back onto the grid; voxels outside X's columns are NaN
out = Path(sys.argv[1]).absolute().parent / "example-outputs"
out.mkdir(exist_ok=True)
img.to_filename(out / "reading-weights.nii.gz")
print(f"wrote {out / 'reading-weights.nii.gz'}")
try:
    from nilearn import plotting

    plotting.plot_stat_map(img, title="weights for 'reading'", output_file=str(out / "reading-weights.png"))
    print(f"drew {out / 'reading-weights.png'}")
except ImportError:
    print("to draw it: pip install 'mapstore[plot]'")
