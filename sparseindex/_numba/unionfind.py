"""Grouping kernels: exact copies, union–find components, the greedy first-representative rule.

Kernels only (arrays in, arrays out, no validation); :mod:`sparseindex.near_duplicates`
validates and calls them.

* Exact copies: rows are hashed (splitmix64 fold of their words or set-bit
  indices), sorted by hash, and rows of one hash compared, so a hash collision
  never merges two different codes.
* Components: union–find with path halving, the smaller index always the
  root (Tarjan, "Efficiency of a good but not linear set union algorithm",
  JACM 1975), so a component's root is its smallest member.
* First representatives: codes in index order; each joins the earlier
  representative of greatest overlap at or above the threshold (ties to
  the smaller index), else becomes a representative itself.

Both grouping rules run on *distinct* codes ("uniques", numbered in order of
first occurrence) and expand to every copy, so a batch holding a code a
hundred thousand times costs nothing quadratic.
"""

from __future__ import annotations

import numpy as np

from .config import kernel
from .kernels import row_hash, rows_equal

__all__ = ["row_hashes", "exact_copy_owners", "component_roots", "greedy_first"]


@kernel
def row_hashes(table):
    """A 64-bit hash of every row of a row table (``kernels.row_hash``).

    Equal rows hash alike; callers still compare rows, so a collision
    never merges two different codes. O(rows · words or set bits).

    Examples
    --------
    >>> from sparseindex.codes import packed_table
    >>> h = row_hashes(packed_table(np.array([[1, 2], [1, 2], [3, 0]], dtype=np.uint64)))
    >>> bool(h[0] == h[1]), bool(h[0] == h[2])
    (True, False)
    """
    words, indptr, _ = table
    n = words.shape[0] if indptr.shape[0] == 0 else indptr.shape[0] - 1
    out = np.empty(n, dtype=np.uint64)
    for r in range(n):
        out[r] = row_hash(table, r)
    return out


@kernel
def exact_copy_owners(order, later, table):
    """``owner[r]``: the smallest row equal to row r (r itself if none), rows of a row table.

    ``order`` sorts the rows by hash *stably*, so inside a run of one hash
    the rows come in index order and the first of each distinct code is
    its smallest row; ``later[t]`` counts the positions after ``t`` in its
    run (``banding.run_pair_counts`` of the sorted hashes).

    Examples
    --------
    >>> from sparseindex._numba.banding import run_pair_counts
    >>> from sparseindex.codes import packed_table
    >>> table = packed_table(np.array([[5], [7], [5], [5]], dtype=np.uint64))
    >>> h = row_hashes(table)
    >>> order = np.argsort(h, kind="stable")
    >>> exact_copy_owners(order, run_pair_counts(h[order]), table).tolist()
    [0, 1, 0, 0]
    """
    n = order.shape[0]
    owner = np.empty(n, dtype=np.int64)
    p = 0
    while p < n:
        q = p + later[p] + 1
        for t in range(p, q):
            r = order[t]
            owner[r] = r
            for s in range(p, t):
                h = order[s]
                if owner[h] != h:
                    continue
                if rows_equal(table, h, r):
                    owner[r] = h
                    break
        p = q
    return owner


@kernel
def _find(parent, x):
    while parent[x] != x:
        parent[x] = parent[parent[x]]  # path halving
        x = parent[x]
    return x


@kernel
def component_roots(count, lo, hi):
    """Root (smallest member) of every element's component under the pairs ``(lo[t], hi[t])``.

    Union–find with path halving, the smaller root always kept (Tarjan
    1975): O((count + pairs) · α(count)).

    Examples
    --------
    >>> component_roots(5, np.array([3, 1]), np.array([4, 3])).tolist()
    [0, 1, 2, 1, 1]
    """
    parent = np.arange(count, dtype=np.int64)
    for t in range(lo.shape[0]):
        a = _find(parent, lo[t])
        b = _find(parent, hi[t])
        if a < b:
            parent[b] = a
        elif b < a:
            parent[a] = b
    for x in range(count):
        parent[x] = _find(parent, x)
    return parent


@kernel
def greedy_first(uid, first, weight, nbr_indptr, nbr, nbr_overlap):
    """Labels of the first-representative rule over every code, copies included.

    ``uid[i]``: code i's unique (-1 for a code too light to match anything);
    ``first[u]``: the smallest code index of unique u; ``weight[u]``: its
    set bits; unique u's verified neighbours are ``nbr[nbr_indptr[u]:
    nbr_indptr[u + 1]]`` with their overlaps. Only the first copy of a
    unique can become a representative (a later copy always has that
    first copy's representative, or the first copy itself, to join), so
    ``rep[u]`` is the first copy's index once it is one.

    Examples
    --------
    Three distinct codes, 0 and 1 matching, 1 and 2 matching (each overlap
    3): code 1 joins 0, and code 2 stays alone because 1 is no
    representative.

    >>> uid, first, weight = np.array([0, 1, 2]), np.array([0, 1, 2]), np.array([4, 4, 4])
    >>> indptr, nbr, overlap = np.array([0, 1, 3, 4]), np.array([1, 0, 2, 1]), np.array([3, 3, 3, 3])
    >>> greedy_first(uid, first, weight, indptr, nbr, overlap).tolist()
    [0, 0, 2]
    """
    n = uid.shape[0]
    labels = np.empty(n, dtype=np.int64)
    rep = np.full(first.shape[0], -1, dtype=np.int64)
    for i in range(n):
        u = uid[i]
        if u < 0:
            labels[i] = i
            continue
        best = -1
        best_overlap = -1
        if i != first[u] and rep[u] >= 0:
            best = rep[u]
            best_overlap = weight[u]
        for t in range(nbr_indptr[u], nbr_indptr[u + 1]):
            r = rep[nbr[t]]
            if r < 0:
                continue
            z = nbr_overlap[t]
            if z > best_overlap or (z == best_overlap and r < best):
                best = r
                best_overlap = z
        if best >= 0:
            labels[i] = best
        else:
            labels[i] = i
            rep[u] = i
    return labels
