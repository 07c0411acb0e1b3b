"""Docstrings point at what exists: every ``mapstore.*`` name a docstring or comment cites (Sphinx roles
such as :func:`mapstore.x.y` and literals such as ``mapstore.x``) resolves to a module or an attribute."""

from __future__ import annotations

import importlib
import re
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[2] / "mapstore"
CITED = re.compile(r"(?::[a-z]+:`~?|``)(mapstore(?:\.[A-Za-z_][A-Za-z0-9_]*)+)(?:\(\))?(?:`|``)")


def _resolves(dotted: str) -> bool:
    parts = dotted.split(".")
    for cut in range(len(parts), 0, -1):  # the longest importable module, then attributes
        try:
            obj = importlib.import_module(".".join(parts[:cut]))
        except ImportError:
            continue
        for name in parts[cut:]:
            if not hasattr(obj, name):
                # a dataclass field or an instance attribute set in __init__ is named in the annotations
                if name in getattr(obj, "__annotations__", {}) or name in _init_attributes(obj):
                    obj = None
                    continue
                return False
            obj = getattr(obj, name)
        return True
    return False


def _init_attributes(cls) -> set[str]:
    import inspect

    try:
        src = inspect.getsource(cls.__init__)
    except (TypeError, OSError, AttributeError):
        return set()
    return set(re.findall(r"self\.([A-Za-z_]\w*)\s*[:=]", src))


def test_every_cited_name_exists():
    missing = []
    for path in sorted(PACKAGE.rglob("*.py")):
        for lineno, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            for dotted in CITED.findall(line):
                if not _resolves(dotted):
                    missing.append(f"{path.relative_to(PACKAGE.parent)}:{lineno} cites {dotted}")
    assert not missing, "\n".join(missing)


def test_the_check_finds_a_name_that_is_gone():
    assert _resolves("mapstore.select.Selection") and _resolves("mapstore.targets.KINDS")
    assert not _resolves("mapstore.copies.NEAR_COPY_R") and not _resolves("mapstore.query.Selection")
