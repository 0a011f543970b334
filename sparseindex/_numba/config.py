"""All numba options in one place, and the deployment fallbacks they need.

Kernels are decorated with :func:`kernel` (serial, releases the GIL) or
:func:`parallel_kernel` (``prange`` loops). Nothing else in the package
passes numba options.

Two facts of deployment are handled here rather than in every module:

* ``cache=True`` raises ``RuntimeError`` at decoration time when numba finds
  no writable cache location (read-only site-packages and no writable home).
  We then point numba at a private folder under the system temporary
  directory and, if even that fails, compile without a cache. No kernel
  call fails for that reason.
* numba itself is imported on the first kernel call, not by ``import
  sparseindex`` (see "numba on first use" below).
* With numba's ``workqueue`` threading layer, two Python threads entering
  ``parallel=True`` code at once abort the process. Every call into a
  parallel kernel goes through :data:`PARALLEL_LOCK`, which serialises
  parallel sections (each of them already uses every core).
"""

from __future__ import annotations

import functools
import os
import sys
import tempfile
import threading


def _env_flag(name: str) -> bool:
    """numba's reading of an integer switch such as ``NUMBA_DISABLE_JIT`` (unset or 0: off)."""
    try:
        return int(os.environ.get(name, "0") or "0") != 0
    except ValueError:
        return False


#: ``NUMBA_DISABLE_JIT=1`` runs every kernel as plain Python (for coverage
#: and stepping through a failing kernel). Read from the environment, as
#: numba does, so that the check needs no numba import.
DISABLE_JIT: bool = _env_flag("NUMBA_DISABLE_JIT")

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


#: ``numba.prange`` once kernels are compiled; plain ``range`` before (and
#: as plain Python). Kernel modules import it from here, never from numba.
prange = range


def _fallback_cache_dir() -> str | None:
    path = os.path.join(tempfile.gettempdir(), f"sparseindex-numba-{os.getuid() if hasattr(os, 'getuid') else 'user'}")
    try:
        os.makedirs(path, exist_ok=True)
        with tempfile.TemporaryFile(dir=path):
            pass
    except OSError:
        return None
    return path


def _njit(numba, func, options: dict):
    global cache_mode
    if DISABLE_JIT:
        return func
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


# -- numba on first use ------------------------------------------------------
#
# Importing numba takes about a quarter of a second, most of ``import
# sparseindex``. Kernels are therefore wrapped in a :class:`_Deferred` at
# decoration; the first call of any of them imports numba, runs the
# registered set-up hooks (intrinsics), makes every dispatcher and puts it
# in place of its wrapper in every sparseindex module — before anything
# compiles, so a kernel that calls another sees the dispatcher.

_numba = None
_deferred: list["_Deferred"] = []
_first_use_hooks: list = []
_first_use_lock = threading.Lock()


class _Deferred:
    """A kernel whose numba dispatcher is made on first use (see above)."""

    def __init__(self, func, options: dict):
        functools.update_wrapper(self, func)
        self.py_func = func
        self.options = options
        self.dispatcher = None

    def __call__(self, *args):
        if self.dispatcher is None:
            numba_module()
        return self.dispatcher(*args)

    def __repr__(self):
        return f"<kernel {self.__qualname__} (compiled on first use)>"


def on_first_use(hook) -> None:
    """Run ``hook(numba)`` when numba is first imported (before any dispatcher is made)."""
    if _numba is not None:
        hook(_numba)
    else:
        _first_use_hooks.append(hook)


def numba_module():
    """numba, imported (and every deferred kernel made) on the first call."""
    global _numba, prange
    if _numba is not None:
        return _numba
    with _first_use_lock:
        if _numba is None:
            import numba

            for hook in _first_use_hooks:
                hook(numba)
            for k in _deferred:
                k.dispatcher = _njit(numba, k.py_func, k.options)
            prange = numba.prange
            for name, module in list(sys.modules.items()):
                if module is None or not (name == "sparseindex" or name.startswith("sparseindex.")):
                    continue
                namespace = vars(module)
                for key, value in list(namespace.items()):
                    if isinstance(value, _Deferred):
                        namespace[key] = value.dispatcher
                if namespace.get("prange") is range:
                    namespace["prange"] = numba.prange
            _numba = numba
    return _numba


def _decorate(func, options: dict):
    if DISABLE_JIT:
        return func
    if _numba is not None:  # a module imported after the first compile
        return _njit(_numba, func, options)
    deferred = _Deferred(func, options)
    _deferred.append(deferred)
    return deferred


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
    return 1 if DISABLE_JIT else int(numba_module().get_num_threads())
