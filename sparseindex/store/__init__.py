"""The single-process store: rows, detector bank, guard, file format and the ``Store`` facade."""

from .single import BatchHits, Hits, Store, _restore_pickled, ids_below

# Pickles name the function that rebuilds a store by its module and name;
# it has always been ``sparseindex.store._restore_pickled``.
_restore_pickled.__module__ = __name__

__all__ = ["Store", "Hits", "BatchHits", "ids_below"]
