"""
An encoding model scored per voxel
==================================

An encoding model: maps predicted from their concepts, scored per voxel on held-out studies
(run `mapstore demo DIR` first)::

    python examples/encoding_model.py DIR/store

The R^2 image is written into ``DIR/example-outputs`` (beside the store, never into it).
"""

import sys
from pathlib import Path

import numpy as np

import mapstore
from mapstore.analyses import encoding_scores

store = mapstore.open(sys.argv[1])
sel = store.select(concepts=["visual-motion", "hand-movement", "listening", "reading"], y_from="concepts",
                   stat=["t", "z"])
scores = encoding_scores(sel)  # concept indicators in, maps out; RidgeCV; leave-one-study-out
print(scores.summary())
top = np.argsort(-np.nan_to_num(scores.r2, nan=-np.inf))[:5]
print("best-predicted columns (R^2):", ", ".join(f"{scores.r2[j]:.2f}" for j in top))
out = Path(sys.argv[1]).absolute().parent / "example-outputs"
out.mkdir(exist_ok=True)
scores.to_image("r2").to_filename(out / "encoding-r2.nii.gz")
print(f"wrote {out / 'encoding-r2.nii.gz'}")
