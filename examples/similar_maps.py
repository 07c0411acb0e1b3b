"""
The stored maps most like a given one
=====================================

Which stored maps look like this one? A map of the store, then a new map from a file
(run `mapstore demo DIR` first)::

    python examples/similar_maps.py DIR/store
"""

import sys

import mapstore

store = mapstore.open(sys.argv[1])
fs = store.features()  # the default feature set
first = store.sql("SELECT m.map_id, d.root || '/' || m.relpath AS path FROM maps m JOIN datasets d USING (dataset) "
                  f"JOIN features f ON f.map_id = m.map_id AND f.feature_set = '{fs.name}' "
                  "WHERE m.stat = 't' AND m.model_mask IS NULL ORDER BY m.map_id LIMIT 1").to_pylist()[0]
print(f"maps most similar to {first['map_id']}:")
print(store.similar(first["map_id"], k=5)[["map_id", "r", "study", "contrast", "concepts"]].to_string(index=False))
# a file from outside the store goes through the feature set's own rules first
print("\nthe same map given as a file:")
print(store.similar(first["path"], k=3, stat="t")[["map_id", "r", "study", "contrast"]].to_string(index=False))
