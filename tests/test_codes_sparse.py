"""Wide batches held as sorted set-bit indices: the same codes as the packed form, memory that follows the set bits.

References: a set-of-indices model of each code (plain Python), scipy.sparse
for the matrix round trips, and the packed form itself (``Codes`` below
``PACKED_MAX_BITS`` is always packed, so the two forms are compared on the
same rows). Peak memory is measured with the standard library's
``tracemalloc``.
"""

import tracemalloc

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from sparseindex import Codes, Store
from sparseindex._numba import kernels
from sparseindex.codes import MAX_EXPANDED_BYTES, PACKED_MAX_BITS, as_code, index_dtype, packed_words

WIDTHS = [1, 63, 64, 65, 4096, 4097, 65_536, 65_537, 2**20 + 3]


@st.composite
def batches(draw):
    bits = draw(st.sampled_from(WIDTHS))
    n = draw(st.integers(0, 12))
    top = bits if bits <= 4097 else 3000  # up to dense at narrow widths, a few thousand at wide ones
    rows = [draw(st.sets(st.integers(0, bits - 1), max_size=min(top, 60))) for _ in range(n)]
    if n and bits <= 4097 and draw(st.booleans()):
        rows[0] = set(range(0, bits, max(1, bits // 3000)))  # a dense row
    return bits, rows


@settings(max_examples=120, deadline=None)
@given(batches(), st.data())
def test_both_forms_hold_the_same_codes(batch, data):
    bits, rows = batch
    codes = Codes.from_indices([sorted(r, reverse=True) for r in rows], bits)   # any order in
    want = [sorted(r) for r in rows]
    assert [a.tolist() for a in codes.to_indices()] == want
    assert codes.weights.tolist() == [len(r) for r in rows]
    if bits <= PACKED_MAX_BITS:
        assert codes.layout == "packed"
    # the other form, made on request, is the same codes
    if len(codes) == 0 or 8 * len(codes) * ((bits + 63) // 64) < 64 << 20:
        repacked = Codes(packed_words(codes), bits)
        assert repacked == codes and [a.tolist() for a in repacked.to_indices()] == want
    # scipy.sparse round trip
    m = codes.to_scipy()
    assert m.shape == (len(rows), bits) and m.nnz == sum(map(len, rows))
    assert Codes.from_scipy(m) == codes
    # slices, integer arrays and masks pick the same rows as the list model
    if rows:
        pick = data.draw(st.lists(st.integers(-len(rows), len(rows) - 1), max_size=6))
        assert [a.tolist() for a in codes[np.array(pick, dtype=np.int64)].to_indices()] == [want[i] for i in pick]
        assert [a.tolist() for a in codes[1::2].to_indices()] == want[1::2]
        mask = np.arange(len(rows)) % 3 == 0
        assert [a.tolist() for a in codes[mask].to_indices()] == [w for w, k in zip(want, mask) if k]
        assert codes[len(rows) - 1].tolist() == want[-1]
        joined = Codes.concat([codes, codes[:1]])
        assert [a.tolist() for a in joined.to_indices()] == want + want[:1]


def test_wide_sparse_batches_use_the_narrowest_index_type_and_say_so():
    for bits, dtype in [(5_000, np.uint16), (2**20, np.uint32), (2**32, np.uint32)]:
        codes = Codes.from_indices([[0, bits - 1], [7]], bits)
        assert codes.layout == "sparse" and index_dtype(bits) == dtype
        assert codes.nbytes == 8 * 3 + 3 * np.dtype(dtype).itemsize + 8 * 2   # pointers + indices + weights
        assert "sparse" in repr(codes)
    dense = Codes.from_indices([list(range(0, 5_000, 2))], 5_000)   # 2,500 of 5,000 bits: packed is smaller
    assert dense.layout == "packed"
    with pytest.raises(ValueError, match=r"bits=8589934592 is wider than the 4,294,967,296 bits"):
        Codes.from_indices([[0]], 2**33)   # one width range everywhere: 2**32 at most


def test_random_draws_the_same_codes_in_either_form():
    # reference: the packed kernel the narrow form has always used
    for bits, weight in [(8_192, 40), (2**20, 300), (5_000, 0)]:
        got = Codes.random(200, bits, weight, seed=11)
        assert got.layout == "sparse"
        words = kernels.random_words(200, bits, weight, np.uint64(11))
        want = kernels.unpack_indices(words, kernels.row_weights(words))
        assert all(np.array_equal(a, b) for a, b in zip(got.to_csr(), want))


def _peak(fn):
    tracemalloc.start()
    try:
        result = fn()
        return result, tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_wide_input_forms_cost_memory_in_proportion_to_the_set_bits():
    bits, n, weight = 2**20, 2_000, 300
    rng = np.random.default_rng(5)
    cols = np.concatenate([rng.choice(bits, weight, replace=False) for _ in range(n)])
    matrix = sp.csr_matrix((np.ones(n * weight, dtype=np.int8), cols, np.arange(0, n * weight + 1, weight)),
                           shape=(n, bits))
    packed_bytes = n * bits // 8                         # 262 MB if anything packed the batch
    codes, peak = _peak(lambda: Codes.from_scipy(matrix))
    assert codes.layout == "sparse" and peak < 40 * n * weight, (peak, packed_bytes)
    rows = [cols[i * weight:(i + 1) * weight] for i in range(n)]
    again, peak = _peak(lambda: Codes.from_indices(rows, bits))
    assert again == codes and peak < 40 * n * weight
    back, peak = _peak(codes.to_scipy)
    assert (back != matrix.astype(bool)).nnz == 0 and peak < 40 * n * weight
    query, peak = _peak(lambda: as_code(rows[0].tolist(), bits))
    assert query.layout == "sparse" and peak < 100_000  # no width-sized row for one wide query


def test_expanding_a_huge_batch_is_refused_with_the_reason():
    codes = Codes.random(10_000, 2**20, 30, seed=1)            # dense form: 10 GB
    for call in (codes.to_dense, codes.to_packed, lambda: codes.words):
        with pytest.raises(ValueError, match="MAX_EXPANDED_BYTES"):
            call()
    assert 10_000 * 2**20 > MAX_EXPANDED_BYTES
    small = codes[:3]
    assert small.to_dense().sum(axis=1).tolist() == [30, 30, 30]


def test_bad_wide_rows_are_named():
    with pytest.raises(ValueError, match=r"row 1: duplicate bit index 70000"):
        Codes.from_indices([[1, 2], [70_000, 5, 70_000]], 2**20)
    with pytest.raises(ValueError, match=r"row 0: bit index 1048576 is out of range"):
        Codes.from_indices([[2**20]], 2**20)
    dup = sp.csr_matrix((np.ones(2), np.array([9, 9]), np.array([0, 2])), shape=(1, 2**20))
    with pytest.raises(ValueError, match="duplicate entry at bit index 9"):
        Codes.from_scipy(dup)


def test_a_store_answers_a_wide_sparse_batch_as_its_packed_twin():
    bits = 65_536
    codes = Codes.random(300, bits, 50, seed=2)
    assert codes.layout == "sparse"
    twin = Codes(packed_words(codes), bits)      # packed words in, kept sparse too: same codes
    a, b = Store(bits, threshold=20, sample_size=40, seed=3), Store(bits, threshold=20, sample_size=40, seed=3)
    a.add(codes)
    b.add(Codes.from_dense(twin.to_dense()))
    for q in codes[:20].to_indices():
        assert list(a.query(q)) == list(b.query(q))
        assert list(a.nearest(q, 3)) == list(b.nearest(q, 3))
