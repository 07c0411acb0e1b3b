"""Sphinx configuration of mapstore's documentation (built with warnings as errors in the tests)."""

from __future__ import annotations

import os
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from mapstore import __version__  # noqa: E402

project = "mapstore"
author = "the mapstore developers"
copyright = "2026, the mapstore developers"
version = release = __version__

extensions = [
    "sphinx.ext.autodoc",
    "sphinx.ext.autosummary",
    "sphinx.ext.intersphinx",
    "sphinx.ext.viewcode",
    "numpydoc",
    "sphinx_click",
    "sphinx_gallery.gen_gallery",
    "myst_parser",
]
source_suffix = {".rst": "restructuredtext", ".md": "markdown"}
exclude_patterns = ["_build", "_schemas.md", "auto_examples/*.ipynb", "auto_examples/*.py", "auto_examples/*.zip",
                    "auto_examples/*.json", "auto_examples/*.md5"]
myst_enable_extensions = ["colon_fence"]
myst_heading_anchors = 3

autodoc_default_options = {"members": True, "undoc-members": False, "show-inheritance": False}
autodoc_typehints = "none"  # the signatures show them; numpydoc sections say the rest
autosummary_generate = False
numpydoc_show_class_members = False
numpydoc_validation_checks: set[str] = set()
default_role = "literal"  # `name` in docstrings is code, as it reads in the terminal

# examples/ as a gallery. Each takes a store; with MAPSTORE_GALLERY_STORE set (the docs test sets it to the
# labelled demo store) the build runs them on it and shows what they print; without it, code only
_GALLERY_STORE = os.environ.get("MAPSTORE_GALLERY_STORE")


sys.path.insert(0, str(Path(__file__).resolve().parent))
from gallery_argv import StoreArgument  # noqa: E402


sphinx_gallery_conf = {
    "examples_dirs": str(ROOT / "examples"),
    "gallery_dirs": "auto_examples",
    "plot_gallery": "True" if _GALLERY_STORE else "False",
    "filename_pattern": r"\.py$" if _GALLERY_STORE else r"^$",
    "reset_argv": StoreArgument(),
    "download_all_examples": False,
    "remove_config_comments": True,
    "show_signature": False,
    "image_scrapers": (),  # the examples print; what they draw they write beside the store
}

intersphinx_mapping = {}  # offline builds: no inventories fetched

html_theme = "furo"
html_title = f"mapstore {version}"
html_static_path = ["_static"]
html_css_files = ["mapstore.css"]  # long code lines wrap instead of running off the page


def _write_schema_page(app) -> None:
    """docs/_schemas.md: every JSON Schema of schemas/, each under its own heading."""
    parts = []
    for path in sorted((ROOT / "schemas").glob("*.schema.json")):
        name = path.name.removesuffix(".schema.json")
        parts.append(f"**{name}** (`mapstore schema {name}`)\n\n```json\n"
                     f"{path.read_text(encoding='utf-8').strip()}\n```\n")
    target = Path(__file__).parent / "_schemas.md"
    text = "\n".join(parts)
    if not target.exists() or target.read_text(encoding="utf-8") != text:
        target.write_text(text, encoding="utf-8")


def setup(app) -> None:
    app.connect("builder-inited", _write_schema_page)
