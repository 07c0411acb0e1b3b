"""The package version (its own module, so that stage modules need not import the package root)."""

__version__ = "0.1.0"
