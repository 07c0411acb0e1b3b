"""
An encoding model scored per voxel
==================================

An encoding model: maps predicted from their concepts, scored per voxel on held-out studies
(run `mapstore demo DIR` first)::

    python examples/encoding_model.py DIR/store
"""

import sys

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
scores.to_image("r2").to_filename("encoding-r2.nii.gz")
print("wrote encoding-r2.nii.gz")
