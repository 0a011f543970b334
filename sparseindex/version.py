"""The library version, at the bottom of the layers so that any module may record it (file headers, manifests)."""

__version__ = "0.1.0"
