"""Fixtures shared by the tests and the docstring examples: a small invented demo tree, its store, and a
labelled store with a feature set that the public entry points' examples run on."""

from __future__ import annotations

from pathlib import Path

import pytest

# the docstring examples that read a store: they find its path as ``store_path``
STORE_EXAMPLES = ("mapstore._api.Store", "mapstore.analyses._pooled.pool")


@pytest.fixture(scope="session")
def demo_tree(tmp_path_factory) -> Path:
    from mapstore.demo import make_demo

    root = tmp_path_factory.mktemp("demo") / "data"
    make_demo(root, scale=0.25)
    return root


def _indexed_demo(demo_tree: Path, store: Path) -> Path:
    import mapstore

    mapstore.index([demo_tree], store, rules=demo_tree / "name-rules.json",
                   origins=demo_tree / "origins.json", progress=False)
    return store


@pytest.fixture(scope="session")
def demo_store(demo_tree, tmp_path_factory) -> Path:
    return _indexed_demo(demo_tree, tmp_path_factory.mktemp("demostore") / "store")


@pytest.fixture(scope="session")
def example_store(demo_tree, tmp_path_factory) -> Path:
    """The demo indexed, resampled onto MNI152 3 mm and labelled with its concepts."""
    import mapstore

    store = _indexed_demo(demo_tree, tmp_path_factory.mktemp("examplestore") / "store")
    mapstore.build_features(store, grid="MNI152-3mm", progress=False)
    mapstore.label(store, demo_tree / "concepts.json")
    return store


@pytest.fixture(autouse=True)
def _store_for_examples(request, doctest_namespace):
    """A docstring example of a store-reading entry point gets ``store_path`` (built once, when first asked)."""
    name = getattr(request.node, "name", "")
    if request.node.__class__.__name__ == "DoctestItem" and name.startswith(STORE_EXAMPLES):
        doctest_namespace["store_path"] = str(request.getfixturevalue("example_store"))
