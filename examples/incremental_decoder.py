"""
A decoder that never holds X in memory
======================================

A decoder that never holds X in memory: scikit-learn's SGDClassifier learns block by block
(`partial_fit`), tested on a held-out study; the same selection as a lazy Dask array for a per-voxel
statistic (run `mapstore demo DIR` first)::

    python examples/incremental_decoder.py DIR/store
"""

import sys

import numpy as np
from sklearn.linear_model import SGDClassifier

import mapstore

store = mapstore.open(sys.argv[1])
sel = store.select(concepts=["visual-motion", "hand-movement", "listening", "reading"], y_from="concept",
                   stat=["t", "z"])
classes = np.unique(sel.y)
for train, test in sel.splits()[:3]:
    model = SGDClassifier(loss="log_loss", alpha=1e-3, random_state=0)
    in_train = np.zeros(len(sel), dtype=bool)
    in_train[train] = True
    for epoch in range(5):
        for idx, X, y in sel.blocks(rows=32):  # one block of 32 maps in memory at a time
            keep = in_train[idx]
            if keep.any():
                Xk = X[keep] / np.linalg.norm(X[keep], axis=1, keepdims=True)
                model.partial_fit(Xk, y[keep], classes=classes)
    hits = []
    for idx, X, y in sel.blocks(rows=32):
        keep = ~in_train[idx]
        if keep.any():
            hits += list(model.predict(X[keep] / np.linalg.norm(X[keep], axis=1, keepdims=True)) == y[keep])
    print(f"held-out {sel.groups[test][0]:12s} accuracy {np.mean(hits):.2f} ({len(hits)} maps, chance "
          f"{1 / len(classes):.2f})")

lazy = sel.to_dask(chunk_rows=32)  # nothing is read yet
mean = lazy.mean(axis=0).compute()  # per-voxel mean across maps, block by block
print(f"X as a Dask array {lazy.shape}, {lazy.npartitions} chunks; per-voxel mean ranges "
      f"{mean.min():.2f} .. {mean.max():.2f}")
