"""The argument every example of the gallery takes: the store to run on (a module of its own so that
Sphinx can pickle the configuration that names it)."""

from __future__ import annotations

import os


class StoreArgument:
    """``[store]`` from ``MAPSTORE_GALLERY_STORE``."""

    def __repr__(self) -> str:  # a stable repr: Sphinx compares configurations between builds by it
        return "StoreArgument"

    def __call__(self, gallery_conf, script_vars) -> list[str]:
        return [os.environ["MAPSTORE_GALLERY_STORE"]]
