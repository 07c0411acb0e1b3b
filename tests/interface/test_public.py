"""The public surface is what it says: every name in a public module's ``__all__`` resolves, and no
package reaches into another package's private (``_name``) modules."""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[2] / "mapstore"
PUBLIC = ["mapstore", "mapstore.errors", "mapstore.schemas", "mapstore.demo", "mapstore.check", "mapstore.features",
          "mapstore.formats", "mapstore.indexing", "mapstore.labels", "mapstore.select", "mapstore.store",
          "mapstore.targets"]


@pytest.mark.parametrize("name", PUBLIC)
def test_every_name_in_all_resolves(name):
    mod = importlib.import_module(name)
    assert mod.__all__, name
    missing = [n for n in mod.__all__ if not hasattr(mod, n)]
    assert not missing, f"{name}.__all__ names {missing}"
    namespace: dict = {}
    exec(f"from {name} import *", namespace)  # noqa: S102  (the star import a user may write)
    assert set(mod.__all__) <= set(namespace)


def test_no_package_imports_another_packages_private_modules():
    """``from ..store._store import x`` from outside ``store/`` is refused: go through the package."""
    bad = []
    for f in PACKAGE.rglob("*.py"):
        rel = f.relative_to(PACKAGE)
        own = rel.parts[0] if len(rel.parts) > 1 else None
        for node in ast.walk(ast.parse(f.read_text())):
            if not isinstance(node, ast.ImportFrom):
                continue
            if node.level == 0:
                parts = (node.module or "").split(".")
                if parts[0] != "mapstore":
                    continue
                parts = parts[1:]
            else:
                base = list(rel.parts[:-1])[: len(rel.parts) - node.level]
                parts = base + (node.module.split(".") if node.module else [])
            if len(parts) >= 2 and parts[1].startswith("_") and parts[0] != own:
                bad.append(f"{rel}:{node.lineno} imports {'.'.join(parts)}")
    assert not bad, bad
