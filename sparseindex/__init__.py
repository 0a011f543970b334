"""sparseindex: a content-addressable store for sparse binary codes."""

__version__ = "0.1.0"
