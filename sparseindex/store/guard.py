"""Who may touch a store when: a readers–writer lock, one mutation at a time, and the read-only rule.

Queries hold it shared, so they run side by side (their kernels release the
GIL); the short commit step of a mutation holds it exclusively. A writer
that is waiting blocks new readers, so a stream of queries cannot starve
it. A thread that already reads may read again (nested reads never wait),
and the thread that holds the lock exclusively may read too.

Examples
--------
>>> lock = ReadWriteLock()
>>> with lock.reading():
...     with lock.reading():
...         lock.readers
2
>>> with lock.writing():
...     lock.readers
0
"""

from __future__ import annotations

import threading
from contextlib import contextmanager

from ..errors import ReadOnlyStoreError

__all__ = ["ReadWriteLock", "Guard"]


class ReadWriteLock:
    """Many readers or one writer, writer-preferring, reads re-entrant per thread.

    Examples
    --------
    >>> lock = ReadWriteLock()
    >>> with lock.reading():
    ...     lock.writing().__enter__()
    Traceback (most recent call last):
    ...
    RuntimeError: a thread that holds the read lock cannot take the write lock
    """

    def __init__(self):
        self._cond = threading.Condition(threading.Lock())
        self._readers = 0
        self._writing = False
        self._writers_waiting = 0
        self._depth = threading.local()
        self._owner = None  # the thread holding the lock exclusively

    @property
    def readers(self) -> int:
        """Read holds right now (nested holds count once each).

        Examples
        --------
        >>> lock = ReadWriteLock()
        >>> with lock.reading():
        ...     lock.readers
        1
        >>> lock.readers
        0
        """
        return self._readers

    @contextmanager
    def reading(self):
        """Hold the lock shared for the ``with`` block; waits while a writer holds or waits.

        A thread that already reads enters at once (reads nest).

        Examples
        --------
        >>> import threading
        >>> lock, seen = ReadWriteLock(), []
        >>> with lock.reading():
        ...     t = threading.Thread(target=lambda: seen.append(lock.readers))
        ...     with lock.reading():   # nested in this thread
        ...         pass
        ...     t.start(); t.join()
        >>> seen
        [1]
        """
        depth = getattr(self._depth, "n", 0)
        with self._cond:
            if depth == 0 and self._owner != threading.get_ident():
                while self._writing or self._writers_waiting:
                    self._cond.wait()
            self._readers += 1
        self._depth.n = depth + 1
        try:
            yield
        finally:
            self._depth.n = depth
            with self._cond:
                self._readers -= 1
                if self._readers == 0:
                    self._cond.notify_all()

    @contextmanager
    def writing(self):
        """Hold the lock alone for the ``with`` block; waits until every reader has left.

        Examples
        --------
        >>> import threading
        >>> lock, order = ReadWriteLock(), []
        >>> def reader():
        ...     with lock.reading():
        ...         order.append("read")
        >>> with lock.writing():
        ...     t = threading.Thread(target=reader); t.start()
        ...     order.append("write")
        >>> t.join(); order
        ['write', 'read']
        """
        if getattr(self._depth, "n", 0):
            raise RuntimeError("a thread that holds the read lock cannot take the write lock")
        with self._cond:
            self._writers_waiting += 1
            try:
                while self._writing or self._readers:
                    self._cond.wait()
            finally:
                self._writers_waiting -= 1
            self._writing = True
            self._owner = threading.get_ident()
        try:
            yield
        finally:
            with self._cond:
                self._writing = False
                self._owner = None
                self._cond.notify_all()


class Guard:
    """The concurrency rules of one store: shared reads, one mutation at a time, and read-only refusal.

    ``reading()`` is held by queries; ``mutating(what)`` by a mutation for
    its whole run (queries go on: only its commit takes ``writing()``), or
    with ``exclusive=True`` for a mutation that holds queries back
    throughout. ``read_only`` is None or the reason the store refuses
    changes.

    Examples
    --------
    >>> guard = Guard("store")
    >>> guard.read_only = "memory-mapped"
    >>> with guard.mutating("add"):
    ...     pass
    Traceback (most recent call last):
    ...
    sparseindex.errors.ReadOnlyStoreError: add: this store is read-only (memory-mapped); load it with writable=True to change it
    """

    def __init__(self, kind: str):
        self.kind = kind
        self.lock = ReadWriteLock()
        self.writer = threading.Lock()
        self.read_only = None

    def reading(self):
        return self.lock.reading()

    def writing(self):
        return self.lock.writing()

    @contextmanager
    def mutating(self, what: str, *, exclusive: bool = False):
        if self.read_only is not None:
            raise ReadOnlyStoreError(
                f"{what}: this {self.kind} is read-only ({self.read_only}); load it with writable=True to change it"
            )
        with self.writer:
            if exclusive:
                with self.lock.writing():
                    yield
            else:
                yield
