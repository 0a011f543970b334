"""A readers–writer lock for the Store.

Queries hold it shared, so they run side by side (their kernels release the
GIL); the short commit step of a mutation holds it exclusively. A writer
that is waiting blocks new readers, so a stream of queries cannot starve
it. A thread that already reads may read again (nested reads never wait).

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

__all__ = ["ReadWriteLock"]


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
            if depth == 0:
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
        try:
            yield
        finally:
            with self._cond:
                self._writing = False
                self._cond.notify_all()
