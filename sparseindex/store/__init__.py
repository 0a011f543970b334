"""The single-process store and its parts: rows, detector bank, guard, file format, the contract and ``Store``."""

from ..validation import ids_below
from .hits import BatchHits, Hits
from .single import Store, restore_pickled

# Pickles name the function that rebuilds a store by its module and name;
# it has always been ``sparseindex.store._restore_pickled``.
_restore_pickled = restore_pickled
_restore_pickled.__module__, _restore_pickled.__qualname__ = __name__, "_restore_pickled"

__all__ = ["Store", "Hits", "BatchHits", "ids_below"]
