"""A built wheel ships what the package reads at run time: the JSON Schemas (from the top-level
schemas/ folder) and the name-rule presets, so 'mapstore schema' works from an installed wheel."""

from __future__ import annotations

import json
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]


@pytest.mark.slow
def test_schemas_and_presets_work_from_a_built_wheel(tmp_path):
    out = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w",
                          str(tmp_path / "dist"), str(REPO)], capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stdout + out.stderr
    wheel = next((tmp_path / "dist").glob("mapstore-*.whl"))
    site = tmp_path / "site"
    with zipfile.ZipFile(wheel) as z:
        names = z.namelist()
        z.extractall(site)
    shipped = sorted(n.split("/")[-1] for n in names if n.startswith("mapstore/_schemas/"))
    assert shipped == sorted(p.name for p in (REPO / "schemas").glob("*.schema.json"))
    assert any(n.startswith("mapstore/indexing/presets/") for n in names)
    # every package of the checkout is in the wheel (a new stage folder must be listed in pyproject.toml)
    packages = sorted(str(p.parent.relative_to(REPO)) for p in (REPO / "mapstore").rglob("__init__.py"))
    missing = [p for p in packages if f"{p}/__init__.py" not in names]
    assert not missing, f"packages left out of the wheel: {missing}"
    # the unpacked wheel alone on the path (not the checkout): the CLI prints a schema, rules load a preset
    code = ("import sys; sys.path.insert(0, sys.argv[1]); import mapstore; assert mapstore.__file__.startswith("
            "sys.argv[1]), mapstore.__file__; from mapstore.cli import main; from mapstore.indexing import "
            "builtin_rules; assert 'spm' in builtin_rules(); sys.exit(main(['schema', 'vocabulary']))")
    run = subprocess.run([sys.executable, "-c", code, str(site)], capture_output=True, text=True, timeout=300,
                         cwd=tmp_path)
    assert run.returncode == 0, run.stdout + run.stderr
    assert json.loads(run.stdout)["title"] == json.loads((REPO / "schemas" / "vocabulary.schema.json").read_text())["title"]
