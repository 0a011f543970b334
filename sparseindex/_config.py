"""All numba options in one place, and the deployment fallbacks they need.

Kernels are decorated with :func:`kernel` (serial, releases the GIL) or
:func:`parallel_kernel` (``prange`` loops). Nothing else in the package
passes numba options.

Two facts of deployment are handled here rather than in every module:

* ``cache=True`` raises ``RuntimeError`` at decoration time when numba finds
  no writable cache location (read-only site-packages and no writable home).
  We then point numba at a private folder under the system temporary
  directory and, if even that fails, compile without a cache. ``import
  sparseindex`` never fails for that reason.
* With numba's ``workqueue`` threading layer, two Python threads entering
  ``parallel=True`` code at once abort the process. Every call into a
  parallel kernel goes through :data:`PARALLEL_LOCK`, which serialises
  parallel sections (each of them already uses every core).
"""

from __future__ import annotations

import os
import tempfile
import threading

import numba

#: ``NUMBA_DISABLE_JIT=1`` runs every kernel as plain Python (for coverage
#: and stepping through a failing kernel).
DISABLE_JIT: bool = bool(numba.config.DISABLE_JIT)

#: Set ``SPARSEINDEX_NUMBA_CACHE=0`` to compile without an on-disk cache.
CACHE: bool = os.environ.get("SPARSEINDEX_NUMBA_CACHE", "1") != "0"

NOGIL: bool = True
FASTMATH: bool = False  # integer kernels; nothing to gain, exactness to lose
BOUNDSCHECK: bool = False  # public wrappers validate; kernels trust them

#: Set ``SPARSEINDEX_PARALLEL_QUERY=0`` to scan single queries on one thread.
#: Splitting one query between threads halves its time on an otherwise idle
#: machine, but when other processes keep the cores busy each parallel call
#: can wait a scheduler time slice (milliseconds) for its second thread.
PARALLEL_SINGLE_QUERY: bool = os.environ.get("SPARSEINDEX_PARALLEL_QUERY", "1") != "0"

#: Serialises entry into ``parallel=True`` kernels (see module docstring).
PARALLEL_LOCK = threading.RLock()

#: How the cache was finally configured: "package", "temporary", "off".
cache_mode: str = "package" if CACHE else "off"


def _fallback_cache_dir() -> str | None:
    path = os.path.join(tempfile.gettempdir(), f"sparseindex-numba-{os.getuid() if hasattr(os, 'getuid') else 'user'}")
    try:
        os.makedirs(path, exist_ok=True)
        with tempfile.TemporaryFile(dir=path):
            pass
    except OSError:
        return None
    return path


def _decorate(func, options: dict):
    global cache_mode
    if DISABLE_JIT:
        return numba.njit(**options)(func)
    if cache_mode != "off":
        try:
            return numba.njit(cache=True, **options)(func)
        except RuntimeError:
            # No writable cache location for this file: try a private
            # temporary folder once, then give up on caching.
            if cache_mode == "package" and not numba.config.CACHE_DIR:
                fallback = _fallback_cache_dir()
                if fallback is not None:
                    numba.config.CACHE_DIR = fallback
                    cache_mode = "temporary"
                    try:
                        return numba.njit(cache=True, **options)(func)
                    except RuntimeError:
                        pass
            cache_mode = "off"
    return numba.njit(cache=False, **options)(func)


def kernel(func):
    """Decorate a serial kernel: compiled, GIL released, cached if possible."""
    return _decorate(func, dict(nogil=NOGIL, fastmath=FASTMATH, boundscheck=BOUNDSCHECK))


def inline_kernel(func):
    """Decorate a small helper that kernels call and numba inlines."""
    return _decorate(func, dict(nogil=NOGIL, fastmath=FASTMATH, boundscheck=BOUNDSCHECK, inline="always"))


def parallel_kernel(func):
    """Decorate a ``prange`` kernel. Call it only while holding PARALLEL_LOCK."""
    return _decorate(func, dict(nogil=NOGIL, fastmath=FASTMATH, boundscheck=BOUNDSCHECK, parallel=True))


def thread_count() -> int:
    """Number of threads numba's parallel kernels use."""
    return 1 if DISABLE_JIT else int(numba.get_num_threads())
