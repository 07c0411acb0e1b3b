"""The import contract in pyproject.toml ([tool.importlinter]) holds: stages import one way."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]


def test_import_layers_contract():
    exe = shutil.which("lint-imports") or str(Path(sys.executable).with_name("lint-imports"))
    if not Path(exe).exists():
        pytest.fail("lint-imports is missing: pip install '.[test]' installs import-linter")
    out = subprocess.run([exe, "--config", str(REPO / "pyproject.toml")], cwd=REPO, capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "1 kept, 0 broken" in out.stdout


def test_no_package_holds_an_import_circle():
    """Inside each package, modules import one way too: no two modules reach each other (imports inside
    functions count: grimp, import-linter's graph builder, sees them)."""
    import itertools

    import grimp

    graph = grimp.build_graph("mapstore")
    circles = []
    for pkg in sorted(m for m in graph.modules if m.count(".") == 1 and graph.find_children(m)):
        for a, b in itertools.combinations(sorted(graph.find_children(pkg)), 2):
            if graph.chain_exists(a, b) and graph.chain_exists(b, a):
                circles.append(f"{graph.find_shortest_chain(a, b)} and back {graph.find_shortest_chain(b, a)}")
    assert not circles, "\n".join(circles)


def test_every_module_is_in_the_contract():
    """The contract's layers name every top-level module and package, so no import escapes it (a module the
    layers leave out is checked by nothing)."""
    tomllib = pytest.importorskip("tomllib")  # Python 3.11+
    layers = tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["importlinter"]["contracts"][0]["layers"]
    named = {m.strip() for layer in layers for m in layer.split("|")}
    present = {f"mapstore.{p.stem}" for p in (REPO / "mapstore").iterdir()
               if (p.suffix == ".py" and p.stem != "__init__") or (p.is_dir() and (p / "__init__.py").exists())}
    assert present == named, f"left out: {sorted(present - named)}; named but gone: {sorted(named - present)}"
