"""Conversions in and out of Codes, and their error messages."""

import re

import numpy as np
import pytest
import scipy.sparse as sp
from bitarray import bitarray
from hypothesis import given
from hypothesis import strategies as st

from sparseindex import Codes
from sparseindex.codes import as_code, as_codes, packed_words

WIDTHS = [1, 7, 63, 64, 65, 127, 128, 200, 2048]


@st.composite
def index_rows(draw, max_bits=300, max_rows=6):
    bits = draw(st.integers(1, max_bits))
    rows = draw(st.lists(st.sets(st.integers(0, bits - 1), max_size=min(bits, 40)), max_size=max_rows))
    return bits, [sorted(r) for r in rows]


def padding_is_zero(codes: Codes) -> bool:
    tail = codes.bits % 64
    return tail == 0 or len(codes) == 0 or not np.any(codes.words[:, -1] >> np.uint64(tail))


@given(index_rows())
def test_every_form_round_trips(case):
    bits, rows = case
    codes = Codes.from_indices(rows, bits)
    assert padding_is_zero(codes)
    assert [r.tolist() for r in codes.to_indices()] == rows
    assert codes.weights.tolist() == [len(r) for r in rows]
    dense = codes.to_dense()
    assert dense.shape == (len(rows), bits)
    # dense reference built with plain numpy indexing
    ref = np.zeros((len(rows), bits), dtype=bool)
    for i, r in enumerate(rows):
        ref[i, r] = True
    assert np.array_equal(dense, ref)
    assert Codes.from_dense(dense) == codes
    for order in ("little", "big"):
        assert Codes.from_packed(codes.to_packed(bitorder=order), bits, bitorder=order) == codes
        assert Codes.from_packed(codes.to_packed(bitorder=order, dtype=np.uint64), bits, bitorder=order) == codes
    # numpy.packbits is the outside reference for the byte layouts
    if rows:
        assert np.array_equal(codes.to_packed(bitorder="big"), np.packbits(ref, axis=1, bitorder="big"))
        assert np.array_equal(codes.to_packed(bitorder="little"), np.packbits(ref, axis=1, bitorder="little"))
        assert Codes.from_bitarrays(codes.to_bitarrays()) == codes
        assert Codes.from_bitarrays(codes.to_bitarrays(endian="little")) == codes
        for ba, r in zip(codes.to_bitarrays(), rows):
            assert len(ba) == bits and [i for i, v in enumerate(ba) if v] == r
    assert Codes.from_scipy(codes.to_scipy()) == codes
    assert Codes.from_scipy(sp.csr_matrix(ref.astype(np.int8))) == codes


@pytest.mark.parametrize("bits", WIDTHS)
def test_matrix_input_converts_without_loop_and_matches_lists(bits):
    rng = np.random.default_rng(bits)
    weight = min(bits, 5)
    rows = np.stack([rng.choice(bits, weight, replace=False) for _ in range(20)])
    a = Codes.from_indices(rows, bits)
    b = Codes.from_indices([list(r) for r in rows], bits)
    assert a == b and padding_is_zero(a)
    assert a.to_indices()[3].tolist() == sorted(rows[3].tolist())


def test_random_codes_have_exact_weight_and_are_reproducible():
    a = Codes.random(500, 300, 17, seed=5)
    assert a.weights.tolist() == [17] * 500 and padding_is_zero(a)
    assert a == Codes.random(500, 300, 17, seed=5)
    assert a != Codes.random(500, 300, 17, seed=6)
    # every bit gets used about equally: 500*17/300 = 28.3 expected per bit
    usage = a.to_dense().sum(axis=0)
    assert usage.min() > 5 and usage.max() < 60


def test_slicing_and_indexing():
    codes = Codes.from_indices([[1], [2, 3], [4, 5, 6]], bits=10)
    assert codes[1].tolist() == [2, 3]
    assert codes[-1].tolist() == [4, 5, 6]
    assert len(codes[1:]) == 2 and codes[1:].weights.tolist() == [2, 3]
    assert codes[np.array([2, 0])].to_indices()[1].tolist() == [1]
    assert len(codes[np.array([True, False, True])]) == 2
    with pytest.raises(IndexError, match="code index 3 out of range for 3 codes"):
        codes[3]
    assert "rows=3, bits=10" in repr(codes)
    assert len(Codes.concat([codes, codes])) == 6


def test_sets_and_ranges_are_rows():
    assert Codes.from_indices([{3, 1}, range(2)], bits=8).to_indices()[0].tolist() == [1, 3]


def test_constructor_copies_callers_buffer():
    words = np.array([[0b11]], dtype=np.uint64)
    codes = Codes(words, bits=8)
    words[0, 0] = 0
    assert codes[0].tolist() == [0, 1]


@pytest.mark.parametrize(
    "rows, message",
    [
        ([[0, 8]], "row 0: bit index 8 is out of range for bits=8 (valid 0..7)"),
        ([[1], [-1]], "row 1: bit index -1 is out of range for bits=8 (valid 0..7)"),
        ([[1], [2], [3, 3]], "row 2: duplicate bit index 3"),
        ([[1.0, 2.5]], "row 0: bit index 2.5 is not an integer"),
        ([[1], [float("nan")]], "row 1: bit index nan is not a finite integer"),
        ([[1], [2, float("inf")]], "row 1: bit index inf is not a finite integer"),
    ],
)
def test_bad_index_rows_are_rejected_with_row_and_value(rows, message):
    with pytest.raises(ValueError, match=message.replace("(", r"\(").replace(")", r"\)")):
        Codes.from_indices(rows, bits=8)


def test_bad_entries_in_matrix_and_types():
    with pytest.raises(ValueError, match="row 1: bit index 9 is out of range"):
        Codes.from_indices(np.array([[1, 2], [3, 9]]), bits=8)
    with pytest.raises(ValueError, match="row 0: duplicate bit index 2"):
        Codes.from_indices(np.array([[2, 2], [3, 4]]), bits=8)
    with pytest.raises(TypeError, match="row 1: bit index 'x' is not an integer"):
        Codes.from_indices([[1], [2, "x"]], bits=8)
    with pytest.raises(TypeError, match="row 0: expected a sequence of bit indices, got int 5"):
        Codes.from_indices([5], bits=8)
    with pytest.raises(ValueError, match="bits=0 must be >= 1"):
        Codes.from_indices([[1]], bits=0)
    with pytest.raises(TypeError, match="bits=2.0 must be an integer"):
        Codes.from_indices([[1]], bits=2.0)


def test_packed_and_dense_errors():
    with pytest.raises(ValueError, match="row 0: padding bits above bits=3 are set"):
        Codes.from_packed(np.array([[0b1001]], dtype=np.uint8), bits=3)
    with pytest.raises(ValueError, match="need 2 bytes, got 1"):
        Codes.from_packed(np.zeros((1, 1), dtype=np.uint8), bits=9)
    with pytest.raises(TypeError, match="packed codes must be uint8 or uint64, got dtype int32"):
        Codes.from_packed(np.zeros((1, 1), dtype=np.int32), bits=9)
    with pytest.raises(TypeError, match="from_dense takes a bool array, got dtype int64"):
        Codes.from_dense(np.zeros((2, 3), dtype=np.int64))
    with pytest.raises(ValueError, match="row 1: value 2 at bit index 0 is not 0 or 1"):
        Codes.from_scipy(sp.csr_matrix(np.array([[1, 0], [2, 0]])))
    with pytest.raises(ValueError, match="row 1: bitarray has length 3, expected 4 like row 0"):
        Codes.from_bitarrays([bitarray("0000"), bitarray("000")])


def test_store_input_forms():
    bits = 16
    rows = [[1, 2, 3], [4, 5]]
    ref = Codes.from_indices(rows, bits)
    dense = ref.to_dense()
    forms = [ref, rows, tuple(rows), dense, ref.to_scipy(), sp.csr_matrix(dense), ref.to_bitarrays()]
    for form in forms:
        assert as_codes(form, bits) == ref
    for single in ([1, 2, 3], np.array([1, 2, 3]), {1, 2, 3}, dense[0], ref.to_bitarrays()[0], ref[0:1]):
        assert as_code(single, bits) == ref[0:1]


def test_ambiguous_and_wrong_forms_raise_type_error_naming_the_routes():
    with pytest.raises(TypeError, match="from_packed"):
        as_codes(np.zeros((2, 2), dtype=np.uint8), 16)
    with pytest.raises(TypeError, match="Codes.from_indices"):
        as_codes(np.zeros((2, 2), dtype=np.int64), 16)
    with pytest.raises(TypeError, match="accepted"):
        as_codes("0101", 16)
    with pytest.raises(TypeError, match="not a single code"):
        as_code(np.zeros((2, 2), dtype=np.int64), 16)
    with pytest.raises(ValueError, match="dense array has width 8, expected bits=16"):
        as_codes(np.zeros((2, 8), dtype=bool), 16)
    with pytest.raises(ValueError, match="dense array has width 8, expected bits=16"):
        as_code(np.zeros(8, dtype=bool), 16)
    with pytest.raises(ValueError, match="codes have bits=8, expected bits=16"):
        as_codes(Codes.from_indices([[1]], 8), 16)


@given(
    values=st.lists(st.integers(-3, 70), max_size=12),
    as_tuple=st.booleans(),
)
def test_plain_int_queries_take_the_fast_path_to_the_same_code(values, as_tuple):
    """as_code's fast path for lists of ints agrees with the general path, errors included (reference: from_indices)."""
    _assert_fast_path_matches_general(tuple(values) if as_tuple else list(values))


def _assert_fast_path_matches_general(obj):
    """as_code(obj) equals from_indices([obj]); where that raises, the fast path declines and the error is the same."""
    from sparseindex.codes import _plain_ints_code

    try:
        want = Codes.from_indices([obj], 64)
    except (ValueError, TypeError) as e:
        assert _plain_ints_code(obj, 64) is None
        with pytest.raises(type(e), match=re.escape(str(e))):
            as_code(obj, 64)
        return
    got = as_code(obj, 64)
    assert np.array_equal(packed_words(got), packed_words(want)) and got.weights.tolist() == want.weights.tolist()


def test_plain_int_fast_path_refuses_bools_and_numpy_ints():
    from sparseindex.codes import _plain_ints_code

    assert _plain_ints_code([True, 2], 64) is None
    assert _plain_ints_code([np.int64(1), 2], 64) is None
    assert _plain_ints_code((1, 2), 64) is not None
    assert _plain_ints_code([2**70], 64) is None  # too big for int64: the general path reports it
    assert _plain_ints_code(np.array([True, False]), 64) is None  # a dense code, not indices
    assert _plain_ints_code(np.array([1.0, 2.0]), 64) is None
    assert _plain_ints_code(np.array([[1, 2]]), 64) is None
    assert _plain_ints_code(np.array([2**63 + 1], dtype=np.uint64), 64) is None
    assert _plain_ints_code(np.array([1, 2], dtype=np.uint16), 64) is not None


@given(
    values=st.lists(st.integers(-3, 70), max_size=12),
    dtype=st.sampled_from(["int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64"]),
    step=st.sampled_from([1, 2]),
)
def test_integer_array_queries_take_the_fast_path_to_the_same_code(values, dtype, step):
    """as_code's fast path for 1-D integer arrays (strided too) agrees with the general path, errors included (reference: from_indices)."""
    if np.dtype(dtype).kind == "u":
        values = [v for v in values if v >= 0]
    _assert_fast_path_matches_general(np.repeat(np.array(values, dtype=dtype), step)[::step])  # step 2: a strided view
