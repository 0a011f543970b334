"""The scan kernel against a plain count: every detector at or over the threshold, once.

``_kernels._scan_range`` counts postings with no test in its loop and
collects a block's fired detectors afterwards, a chunk of
``FIRE_CHUNK`` counters at a time with a tail for the rest. The reference
here is ``numpy.bincount`` over the same postings: obviously correct, and
slow enough not to share a shortcut with the kernel. Block sizes straddle
the chunk size, so both the chunked sweep and the tail are exercised.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sparseindex._numba import kernels as _kernels
CHUNK = _kernels.FIRE_CHUNK


def _random_blocks(rng, sizes, bits, density):
    """Postings for blocks of the given sizes: per (block, bit) an ascending run of distinct offsets."""
    runs, indptr, position = [], np.zeros((len(sizes), bits + 1), dtype=np.int64), 0
    for k, size in enumerate(sizes):
        for b in range(bits):
            indptr[k, b] = position
            take = rng.random(size) < density
            run = np.flatnonzero(take).astype(np.uint16)
            runs.append(run)
            position += run.shape[0]
        indptr[k, bits] = position
    post = np.concatenate(runs) if runs else np.zeros(0, np.uint16)
    block_lo = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    block_hi = (block_lo + np.asarray(sizes)).astype(np.int64)
    return post, indptr, block_lo, block_hi


def _reference(q_bits, post, indptr, block_lo, block_hi, k0, k1, threshold):
    fired = []
    for k in range(k0, k1):
        size = int(block_hi[k] - block_lo[k])
        runs = [post[indptr[k, b] : indptr[k, b + 1]] for b in q_bits]
        counts = np.bincount(np.concatenate(runs).astype(np.int64), minlength=size) if runs else np.zeros(size)
        fired.extend((block_lo[k] + np.flatnonzero(counts >= threshold)).tolist())
    return fired


def _scan(q_bits, post, indptr, block_lo, block_hi, k0, k1, threshold, room, span):
    counters = np.zeros(span, dtype=np.uint8)
    fired = np.full(room + 3, -7, dtype=np.int64)  # sentinels past the room must survive
    n = _kernels._scan_range(q_bits, post, indptr, block_lo, block_hi, k0, k1, counters, threshold, fired, 1, room)
    assert not counters.any(), "counters must be zero again on exit"
    assert fired[0] == -7 and np.all(fired[1 + room :] == -7), "nothing written outside fired[base:base + room]"
    return n, fired[1 : 1 + min(n, room)].tolist()


@pytest.mark.parametrize("sizes", [[1], [CHUNK - 1], [CHUNK], [CHUNK + 1], [3 * CHUNK + 17, CHUNK, 5], [2**16]])
@pytest.mark.parametrize("threshold", [1, 2, 4])
def test_fired_detectors_equal_a_bincount(sizes, threshold):
    rng = np.random.default_rng(len(sizes) * 100 + sizes[0] + threshold)
    bits = 12
    post, indptr, lo, hi = _random_blocks(rng, sizes, bits, density=0.15)
    q_bits = np.sort(rng.choice(bits, size=7, replace=False)).astype(np.int64)
    want = _reference(q_bits, post, indptr, lo, hi, 0, len(sizes), threshold)
    n, got = _scan(q_bits, post, indptr, lo, hi, 0, len(sizes), threshold, room=len(want) + 5, span=max(sizes))
    assert n == len(want)
    assert got == want  # ascending within each block, blocks in order


def test_a_full_room_records_the_first_and_counts_them_all():
    rng = np.random.default_rng(5)
    sizes = [2 * CHUNK + 300, 700]
    post, indptr, lo, hi = _random_blocks(rng, sizes, 6, density=0.5)
    q_bits = np.arange(6, dtype=np.int64)
    want = _reference(q_bits, post, indptr, lo, hi, 0, 2, 3)
    assert len(want) > 20
    n, got = _scan(q_bits, post, indptr, lo, hi, 0, 2, 3, room=10, span=max(sizes))
    assert n == len(want) and got == want[:10]


@settings(max_examples=40, deadline=None)
@given(
    sizes=st.lists(st.integers(1, 3 * CHUNK), min_size=1, max_size=4),
    density=st.floats(0.01, 0.6),
    n_query=st.integers(0, 8),
    threshold=st.integers(1, 6),
    seed=st.integers(0, 2**32 - 1),
    data=st.data(),
)
def test_any_block_range_matches_the_reference(sizes, density, n_query, threshold, seed, data):
    rng = np.random.default_rng(seed)
    bits = 8
    post, indptr, lo, hi = _random_blocks(rng, sizes, bits, density)
    q_bits = np.sort(rng.choice(bits, size=n_query, replace=False)).astype(np.int64)
    k0 = data.draw(st.integers(0, len(sizes)), label="k0")
    k1 = data.draw(st.integers(k0, len(sizes)), label="k1")
    want = _reference(q_bits, post, indptr, lo, hi, k0, k1, threshold)
    n, got = _scan(q_bits, post, indptr, lo, hi, k0, k1, threshold, room=len(want), span=max(sizes))
    assert n == len(want) and got == want
