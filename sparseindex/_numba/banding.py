"""Kernels of near-duplicate labelling: min-hash band keys, pair runs, candidate verification, bit usage.

Arrays in, arrays out; :mod:`sparseindex.near_duplicates.banding` validates and calls them.
"""

from __future__ import annotations

import numpy as np

from .config import kernel, parallel_kernel, prange
from .kernels import mix64, rows_overlap


@kernel
def pair_overlaps(table, lo, hi):
    """Exact overlap of rows ``lo[t]`` and ``hi[t]`` of a row table (see ``kernels``)."""
    out = np.empty(lo.shape[0], dtype=np.int64)
    for t in range(lo.shape[0]):
        out[t] = rows_overlap(table, lo[t], hi[t])
    return out


@parallel_kernel
def band_keys_kernel(indptr, indices, salts, bands, rows):
    """Band keys of CSR codes: ``keys[j, i]`` folds code i's minima of hashes j*rows .. j*rows+rows-1."""
    n = indptr.shape[0] - 1
    keys = np.empty((bands, n), dtype=np.uint64)
    top = np.uint64(0xFFFFFFFFFFFFFFFF)
    for i in prange(n):
        a = indptr[i]
        w = indptr[i + 1] - a
        mixed = np.empty(w, dtype=np.uint64)
        for t in range(w):
            mixed[t] = mix64(np.uint64(indices[a + t]))
        for j in range(bands):
            key = np.uint64(0)
            for t in range(rows):
                salt = salts[j * rows + t]
                low = top
                for s in range(w):
                    h = mix64(salt ^ mixed[s])
                    if h < low:
                        low = h
                key = mix64(key ^ low)
            keys[j, i] = key
    return keys


@kernel
def run_pair_counts(sorted_keys):
    """For each position of a sorted key array, how many later positions share its key."""
    n = sorted_keys.shape[0]
    counts = np.zeros(n, dtype=np.int64)
    p = 0
    while p < n:
        q = p + 1
        while q < n and sorted_keys[q] == sorted_keys[p]:
            q += 1
        for t in range(p, q):
            counts[t] = q - t - 1
        p = q
    return counts


@parallel_kernel
def verify_positions(order, positions, offsets, counts, table, out):
    """Overlap of every candidate pair of the given sorted positions, into ``out``.

    Position ``p`` pairs ``order[p]`` with ``order[p + 1 .. p + counts[p]]``;
    its overlaps go to ``out[offsets[k] ..]`` where ``positions[k] == p``.
    """
    for k in prange(positions.shape[0]):
        p = positions[k]
        a = order[p]
        base = offsets[k]
        for t in range(counts[p]):
            out[base + t] = rows_overlap(table, a, order[p + 1 + t])
    return out


@kernel
def gather_matches(order, positions, offsets, counts, overlaps, min_overlap):
    """The verified pairs (low row, high row, overlap) with overlap >= min_overlap."""
    found = 0
    for t in range(overlaps.shape[0]):
        if overlaps[t] >= min_overlap:
            found += 1
    lo = np.empty(found, dtype=np.int64)
    hi = np.empty(found, dtype=np.int64)
    ov = np.empty(found, dtype=np.int64)
    f = 0
    for k in range(positions.shape[0]):
        p = positions[k]
        a = order[p]
        base = offsets[k]
        for t in range(counts[p]):
            z = overlaps[base + t]
            if z >= min_overlap:
                b = order[p + 1 + t]
                lo[f] = min(a, b)
                hi[f] = max(a, b)
                ov[f] = z
                f += 1
    return lo, hi, ov


