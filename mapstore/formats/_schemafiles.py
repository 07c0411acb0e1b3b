"""Where the JSON Schemas of mapstore's file formats live.

They are kept in the project's top-level ``schemas/`` folder; a built wheel ships them inside the
package as ``mapstore/_schemas/`` (``[tool.setuptools] package-dir`` maps one to the other).
"""

from __future__ import annotations

from pathlib import Path

from ..errors import ParameterError

__all__ = ["schema_dir", "schema_names", "schema_text"]


def schema_dir() -> Path:
    """The folder holding ``NAME.schema.json``: the installed package's copy, else the checkout's."""
    package = Path(__file__).resolve().parents[1]
    for folder in (package / "_schemas", package.parent / "schemas"):
        if folder.is_dir() and any(folder.glob("*.schema.json")):
            return folder
    raise FileNotFoundError(f"{package}: the JSON Schemas are missing (neither _schemas/ in the package nor "
                            "schemas/ beside it); reinstall mapstore")


def schema_names() -> list[str]:
    return sorted(p.name[: -len(".schema.json")] for p in schema_dir().glob("*.schema.json"))


def schema_text(name: str) -> str:
    """The text of one schema (``vocabulary``, ``name-rules``, ...)."""
    path = schema_dir() / f"{name}.schema.json"
    if not path.is_file():
        raise ParameterError(f"no schema {name!r}; schemas: {', '.join(schema_names())}")
    return path.read_text()
