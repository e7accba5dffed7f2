"""The package's version (a leaf: every module may import it)."""

__version__ = "0.1.0"
