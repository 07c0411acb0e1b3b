"""The import contract in pyproject.toml ([tool.importlinter]) holds: stages import one way."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


def test_import_layers_contract():
    exe = shutil.which("lint-imports") or str(Path(sys.executable).with_name("lint-imports"))
    if not Path(exe).exists():
        pytest.fail("lint-imports is missing: pip install '.[test]' installs import-linter")
    out = subprocess.run([exe, "--config", str(REPO / "pyproject.toml")], cwd=REPO, capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "1 kept, 0 broken" in out.stdout
