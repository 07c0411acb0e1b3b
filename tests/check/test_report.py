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
    assert int(facts["page-width"]) <= 1400, facts  # readable at 1,400 px: nothing runs off to the side
    # labels on the pictures (ticks, ranges, marks) are readable: 11 px or more as the browser draws them
    assert int(facts["smallest-label-px"]) >= 11, facts
    # every slice carries its A/P or S/I marks above and below the picture, as drawn
    assert int(facts["marked-panels"]) >= 3 and facts["marks-around"] == facts["marked-panels"], facts
    # each concept's agreement figures stand beside its study x study matrix, not pages away
    assert int(facts["besides"]) >= 1 and facts["beside-ok"] == facts["besides"], facts
    assert text.count("<img") >= 3 and "id='finding-1'" in text
    # the pictures say what they show: rows named by study, planes in millimetres with L/R marks, colour
    # bars with their range and unit; per-study value histograms; each concept's agreement as a matrix
    st = mapstore.open(store)
    reading = [r["study"] for r in st.sql("SELECT DISTINCT m.study FROM labels l JOIN maps m USING (map_id) "
                                          "WHERE l.concept = 'reading' ORDER BY 1").to_pylist()]
    concept = text[text.index("id='concept:reading'"):]
    concept = concept[:concept.index("</section>")]
    assert [s for s in re.findall(r"<th class='rowname'>([^<]+)</th>", concept)] == reading
    assert re.search(r"axial z = -?\d+ mm", concept) and re.search(r"sagittal x = -?\d+ mm", concept)
    assert "<span class='mark left'>L</span>" in concept and "<span class='mark right'>R</span>" in concept
    assert "SD units" in concept and len(re.findall(r"<div class='ticks'>(<span>[^<]+</span>){3}</div>", concept)) == 1
    assert "id='values-by-study'" in text and text.count("<svg") >= len(reading)
    assert "id='agreement:reading'" in text and "class='matrix'" in text
    agreement = text[text.index("id='agreement:reading'"):]
    assert "concept &#x27;reading&#x27; across its studies" in agreement[:agreement.index("</section>")]
    # coverage is drawn at half strength: the template shows through (the colours are not the ramp's own)
    assert "so its anatomy shows through" in text


def test_slices_are_labelled_in_millimetres_and_read_left_to_right():
    """A value planted in the left hemisphere (negative x, by nibabel's apply_affine of the grid) shows in
    the left half of the axial and coronal panels, marked L there; the plane labels are the focus voxel's
    millimetres."""
    import nibabel as nib
    import numpy as np

    from mapstore.targets import builtin_grid

    grid = builtin_grid("MNI152-3mm")
    vol = np.zeros(grid.shape)
    aff = grid.affine_array
    ijk = np.array(nib.affines.apply_affine(np.linalg.inv(aff), [-40.0, -20.0, 30.0])).round().astype(int)
    vol[tuple(ijk)] = 5.0
    focus = grid.peak(vol.reshape(-1))
    assert tuple(focus) == tuple(ijk)
    axial, coronal, sagittal = grid.panels(vol.reshape(-1), focus)
    x, y, z = nib.affines.apply_affine(aff, ijk)
    assert axial.label == f"axial z = {z:.0f} mm" and coronal.label == f"coronal y = {y:.0f} mm"
    assert sagittal.label == f"sagittal x = {x:.0f} mm" and (axial.left, axial.right) == ("L", "R")
    for panel in (axial, coronal):
        col = np.argwhere(panel.values == 5.0)[0][1]
        assert col < panel.values.shape[1] / 2  # left hemisphere on the left of the picture
    row, col = np.argwhere(sagittal.values == 5.0)[0]
    assert col < sagittal.values.shape[1] / 2 and (sagittal.left, sagittal.right) == ("P", "A")  # y < 0: posterior


def test_a_lateral_surface_view_shows_no_medial_wall():
    """Drawn with a depth buffer over the mesh's faces, the lateral views of fsaverage5 show none of the
    medial wall (outside nilearn's cortex mask), the medial views a solid patch of it."""
    import numpy as np

    from mapstore.targets import builtin_surface, cortex_mask

    target = builtin_surface("fsaverage5")
    inside = np.where(cortex_mask(target), 1.0, np.nan)
    surface = [np.isfinite(p.values) for p in target.panels(np.zeros(target.n_vertices))]  # where it is drawn
    wall = {p.label: float(np.mean(np.isnan(p.values[on]))) for p, on in zip(target.panels(inside), surface)}
    assert set(wall) == {"left lateral", "left medial", "right lateral", "right medial"}
    assert wall["left lateral"] == 0 and wall["right lateral"] == 0, wall
    assert wall["left medial"] > 0.03 and wall["right medial"] > 0.03, wall


def test_histograms_span_every_value_or_say_how_many_lie_beyond():
    """A t map spanning -3.4..4.2 is drawn over -3.4..4.2 (not its middle 99%); a study with a few
    values a thousand times larger clips the shared range to the middle 99% and counts what lies beyond."""
    import numpy as np

    from mapstore.check._figures import histogram_ranges, histograms_html

    rng = np.random.default_rng(0)
    t = np.clip(rng.normal(size=4000), -3.4, 4.2)
    t[:2] = [-3.4, 4.2]
    lo, hi, clipped = histogram_ranges({("a", "t"): t})["t"]
    assert (lo, hi, clipped) == (-3.4, 4.2, False)
    page = histograms_html({("a", "t"): t})
    assert ">-3.4<" in page and ">4.2<" in page and "above the range" not in page
    wild = np.r_[rng.normal(size=3997), 1e3, 2e3, -5e3]
    lo, hi, clipped = histogram_ranges({("a", "t"): t, ("b", "t"): wild})["t"]
    assert clipped and -5 < lo < -2 and 2 < hi < 5
    page = histograms_html({("a", "t"): t, ("b", "t"): wild})
    assert "middle 99% of values" in page and "class='beyond'" in page
    below, above = int((wild < lo).sum()), int((wild > hi).sum())
    assert f"{below:,} below, {above:,} above the range" in page
