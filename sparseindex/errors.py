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

__all__ = ["StoreFormatError", "ReadOnlyStoreError", "FormatVersionWarning", "SaturationWarning", "PlanError"]


class StoreFormatError(ValueError):
    """A store file (or pickle) is truncated, corrupt, hostile or of an unknown major version.

    ``section`` names the part of the file that is wrong (``"preamble"``,
    ``"header"``, ``"words"``, ``"postings"``, ...); the message says what.
    Loading raises it before any of the file's data reaches a kernel, and a
    failed load changes nothing.

    Examples
    --------
    >>> err = StoreFormatError("postings", "CRC32 mismatch", path="depot.sidx")
    >>> str(err)
    "depot.sidx: section 'postings': CRC32 mismatch"
    >>> import pickle
    >>> pickle.loads(pickle.dumps(err)).section
    'postings'
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
    """A store opened read-only (memory-mapped by default) was asked to change.

    Examples
    --------
    >>> issubclass(ReadOnlyStoreError, RuntimeError)
    True
    >>> raise ReadOnlyStoreError("add: this store is read-only")
    Traceback (most recent call last):
    ...
    sparseindex.errors.ReadOnlyStoreError: add: this store is read-only
    """


class FormatVersionWarning(UserWarning):
    """A store file was written by a newer minor format version; unknown fields were ignored.

    Examples
    --------
    >>> import warnings
    >>> with warnings.catch_warnings(record=True) as seen:
    ...     warnings.simplefilter("always")
    ...     warnings.warn("format 1.3 is newer than 1.0", FormatVersionWarning)
    >>> seen[0].category.__name__, issubclass(FormatVersionWarning, UserWarning)
    ('FormatVersionWarning', True)
    """


class SaturationWarning(UserWarning):
    """An ``add`` took the store past its limit (the codes at which the false-hit target is reached).

    Examples
    --------
    >>> import warnings
    >>> from sparseindex import Codes, Store
    >>> store = Store(64, threshold=2, seed=0)
    >>> store.watch(false_hit=0.05)
    >>> with warnings.catch_warnings(record=True) as seen:
    ...     warnings.simplefilter("always")
    ...     for k in range(40):
    ...         _ = store.add(Codes.random(1, 64, 4, seed=k))
    >>> any(w.category is SaturationWarning for w in seen)
    True
    """


class PlanError(ValueError):
    """No configuration meets the requested targets.

    Raised by :func:`sparseindex.plan`; the message names the target
    that cannot be met and the best values that can be reached. A
    ``ValueError``, so callers that catch bad arguments catch it too.

    Examples
    --------
    >>> from sparseindex import plan
    >>> try:
    ...     plan(1536, 30, false_hit=1e-9, capacity=10**6, noise=0.95)
    ... except PlanError as exc:
    ...     print(isinstance(exc, ValueError), str(exc)[:60])
    True false_hit=1e-09 at capacity=1,000,000 cannot be met together
    """
