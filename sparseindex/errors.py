"""Exceptions and warnings the library raises on purpose.

Everything a file can do wrong raises :class:`StoreFormatError` (a
``ValueError``); operating-system failures (missing file, full disk, a
failed ``fsync``) stay ``OSError``.

Examples
--------
>>> err = StoreFormatError("header", "missing key 'bits'")
>>> isinstance(err, ValueError), err.section
(True, 'header')
>>> str(err)
"section 'header': missing key 'bits'"
"""

from __future__ import annotations

__all__ = ["StoreFormatError", "ReadOnlyStoreError", "FormatVersionWarning", "CapacityWarning"]


class StoreFormatError(ValueError):
    """A store file (or pickle) is truncated, corrupt, hostile or of an unknown major version.

    ``section`` names the part of the file that is wrong (``"preamble"``,
    ``"header"``, ``"words"``, ``"postings"``, ...); the message says what.
    Loading raises it before any of the file's data reaches a kernel, and a
    failed load changes nothing.
    """

    def __init__(self, section: str, problem: str, path=None):
        self.section = section
        self.problem = problem
        self.path = None if path is None else str(path)
        where = f"{self.path}: " if self.path else ""
        super().__init__(f"{where}section {section!r}: {problem}")

    def __reduce__(self):
        return (type(self), (self.section, self.problem, self.path))


class ReadOnlyStoreError(RuntimeError):
    """A store opened read-only (memory-mapped by default) was asked to change."""


class FormatVersionWarning(UserWarning):
    """A store file was written by a newer minor format version; unknown fields were ignored."""


class CapacityWarning(UserWarning):
    """An ``add`` took the store past its capacity at the false-hit target."""
