"""Query results: :class:`Hits` of one query, :class:`BatchHits` of many, and merging them.

Every result is ordered the same way: overlap descending, then id
ascending, per query. Merging the parts of a sharded answer, or the fired and
the scanned candidates of a complete match, sorts once by that key.
"""

from __future__ import annotations

import numpy as np

from .. import validation

__all__ = ["Hits", "BatchHits", "no_hits", "merge_hits", "batch_of"]


class Hits:
    """The stored codes hit by one query.

    ``ids`` and ``overlaps`` (exact full-code overlap with the query) are
    int64 arrays ordered by overlap descending, then id ascending.
    Iterating yields ``(id, overlap)`` pairs.

    Examples
    --------
    >>> import numpy as np
    >>> h = Hits(np.array([4, 1]), np.array([9, 7]))
    >>> len(h), list(h)
    (2, [(4, 9), (1, 7)])
    """

    __slots__ = ("ids", "overlaps")

    def __init__(self, ids, overlaps):
        self.ids = np.asarray(ids, dtype=np.int64)
        self.overlaps = np.asarray(overlaps, dtype=np.int64)

    def __len__(self) -> int:
        return self.ids.shape[0]

    def __iter__(self):
        return zip(self.ids.tolist(), self.overlaps.tolist())

    def __eq__(self, other):
        if not isinstance(other, Hits):
            return NotImplemented
        return np.array_equal(self.ids, other.ids) and np.array_equal(self.overlaps, other.overlaps)

    __hash__ = None

    def __repr__(self) -> str:
        shown = ", ".join(f"{i}:{o}" for i, o in list(self)[:8])
        more = ", ..." if len(self) > 8 else ""
        return f"Hits({len(self)} [id:overlap] {shown}{more})"


class BatchHits:
    """Hits of many queries in flat CSR arrays.

    Query ``i``'s hits are ``ids[indptr[i]:indptr[i+1]]`` with the matching
    ``overlaps``, ordered as in :class:`Hits`. A million results cost three
    arrays, not a million objects.

    Examples
    --------
    >>> import numpy as np
    >>> b = BatchHits(np.array([0, 2, 2]), np.array([3, 5]), np.array([8, 6]))
    >>> len(b), b[0].ids.tolist(), len(b[1])
    (2, [3, 5], 0)
    """

    __slots__ = ("indptr", "ids", "overlaps")

    def __init__(self, indptr, ids, overlaps):
        self.indptr = np.asarray(indptr, dtype=np.int64)
        self.ids = np.asarray(ids, dtype=np.int64)
        self.overlaps = np.asarray(overlaps, dtype=np.int64)

    def __len__(self) -> int:
        return self.indptr.shape[0] - 1

    def __getitem__(self, i) -> Hits:
        n = len(self)
        if not validation.is_integer(i):
            raise TypeError(f"BatchHits index must be an integer, got {validation.quoted(i)}")
        if not -n <= i < n:
            raise IndexError(f"query index {i} out of range for {n} queries")
        i = int(i) % n
        a, b = self.indptr[i], self.indptr[i + 1]
        return Hits(self.ids[a:b], self.overlaps[a:b])

    def __iter__(self):
        for i in range(len(self)):
            yield self[i]

    @property
    def counts(self) -> np.ndarray:
        """Number of hits of each query.

        Examples
        --------
        >>> BatchHits(np.array([0, 2, 2]), np.array([3, 5]), np.array([8, 6])).counts.tolist()
        [2, 0]
        """
        return np.diff(self.indptr)

    def __repr__(self) -> str:
        return f"BatchHits(queries={len(self)}, hits={self.ids.shape[0]})"



def no_hits(queries: int) -> BatchHits:
    """A BatchHits of ``queries`` queries with no hit."""
    return BatchHits(np.zeros(queries + 1, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64))


def merge_hits(parts) -> Hits:
    """One query's hits from several parts, in the usual order."""
    if len(parts) == 1:
        return parts[0]
    ids = np.concatenate([p.ids for p in parts])
    overlaps = np.concatenate([p.overlaps for p in parts])
    order = np.lexsort((ids, -overlaps))
    return Hits(ids[order], overlaps[order])


def batch_of(queries: int, counts, ids, overlaps, *, unique: bool = False) -> BatchHits:
    """A BatchHits from parts given as lists of (hits per query, ids, overlaps), in the usual order.

    Part ``j`` holds ``counts[j][i]`` hits for query ``i``, grouped by query.
    ``unique`` keeps one of each (query, id) pair that several parts found.

    Examples
    --------
    >>> b = batch_of(2, [np.array([1, 1]), np.array([1, 0])], [np.array([4, 2]), np.array([7])],
    ...              [np.array([3, 5]), np.array([3])])
    >>> b.indptr.tolist(), b.ids.tolist(), b.overlaps.tolist()
    ([0, 2, 3], [4, 7, 2], [3, 3, 5])
    """
    which = np.concatenate([np.repeat(np.arange(queries, dtype=np.int64), c) for c in counts])
    all_ids = np.concatenate(ids).astype(np.int64, copy=False)
    all_ov = np.concatenate(overlaps).astype(np.int64, copy=False)
    order = np.lexsort((all_ids, -all_ov, which))
    which, all_ids, all_ov = which[order], all_ids[order], all_ov[order]
    if unique and which.shape[0] > 1:
        keep = np.ones(which.shape[0], dtype=bool)
        keep[1:] = (which[1:] != which[:-1]) | (all_ids[1:] != all_ids[:-1])
        which, all_ids, all_ov = which[keep], all_ids[keep], all_ov[keep]
    indptr = np.zeros(queries + 1, dtype=np.int64)
    np.cumsum(np.bincount(which, minlength=queries), out=indptr[1:])
    return BatchHits(indptr, all_ids, all_ov)


def merge_batches(queries: int, parts) -> BatchHits:
    """Many BatchHits of the same queries (one per shard) as one."""
    if len(parts) == 1:
        return parts[0]
    return batch_of(queries, [p.counts for p in parts], [p.ids for p in parts], [p.overlaps for p in parts])
