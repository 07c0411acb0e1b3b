"""The HTML report as a person sees it: rendered by a real browser (headless Chromium), every picture
loads, and the findings come before the pictures on the page."""

from __future__ import annotations

import os
import re
import shutil
import subprocess

import pytest

import mapstore


def _chromium() -> str:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    if os.environ.get("CI"):
        pytest.fail("headless Chromium is missing: install the Debian package chromium")
    pytest.skip("Chromium is not installed")


@pytest.mark.slow
def test_the_report_renders_with_every_picture_and_findings_first(demo_store, demo_tree, tmp_path):
    browser = _chromium()
    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    mapstore.build_features(store, grid="MNI152-3mm", jobs=2, progress=False)
    mapstore.label(store, demo_tree / "concepts.json")
    report = mapstore.open(store).check()
    page = report.write_html(tmp_path / "report.html", command="mapstore check --store s --html report.html")
    text = page.read_text()
    assert "mapstore " + mapstore.__version__ in text and "mapstore check --store s" in text
    assert re.search(r"\d+ errors?, \d+ warnings?, \d+ notes?", text) and "1 warnings" not in text
    out = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--virtual-time-budget=5000",
                          "--window-size=1400,1000", "--dump-dom", page.as_uri()],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr[-2000:]
    body = re.search(r"<body([^>]*)>", out.stdout).group(1)
    facts = dict(re.findall(r'data-([a-z-]+)="(-?\d+)"', body))
    assert facts.get("broken-images") == "0", body
    assert 0 <= int(facts["findings-top"]) < int(facts["first-picture-top"]), facts
    assert text.count("<img") >= 3 and "id='finding-1'" in text
