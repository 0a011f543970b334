"""Wide stores: postings indexed by the bits in use (the column map), widths up to 2**32.

References: a set model (Python sets of set bits, obviously correct), the
scipy.sparse product ``S @ q`` for exact overlaps, and stores of the same
codes built with and without the column map / with packed or index rows,
which must answer identically.
"""

from __future__ import annotations


import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sparseindex import Codes, Store, StoreFormatError
from tests.test_persist_sparse import corrupted


def _store(kind, bits, **params):
    """A Store forced to one (row layout, column map) combination."""
    layout, mapped = kind
    cls = type(f"Store_{layout}_{mapped}", (Store,), {"_row_layout": layout, "_column_map": mapped})
    return cls(bits, **params)


KINDS = [("packed", False), ("sparse", False), ("sparse", True), ("packed", True)]


def _random_codes(rng, n, bits, weights):
    rows = [np.sort(rng.choice(bits, size=int(w), replace=False)) if bits < 2**24 else
            np.unique(rng.integers(0, bits, size=int(w))) for w in weights[:n]]
    return Codes.from_indices(rows, bits=bits)


def _answers(store, queries):
    out = []
    for q in queries.to_indices():
        h = store.query(q)
        n = store.nearest(q, 3)
        out.append((h.ids.tolist(), h.overlaps.tolist(), n.ids.tolist(), n.overlaps.tolist()))
    batch = store.query_many(queries)
    out.append([(h.ids.tolist(), h.overlaps.tolist()) for h in batch])
    out.append([(h.ids.tolist(), h.overlaps.tolist()) for h in store.find_matches(queries, min_overlap=2)])
    return out


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    bits=st.sampled_from([1, 7, 64, 300, 4096, 4097, 70_000, 2**20 + 3]),
    n=st.integers(1, 40),
    sample_size=st.sampled_from([None, 3, 8]),
    detectors=st.integers(1, 3),
    seed=st.integers(0, 2**32),
)
def test_every_row_layout_and_column_map_answer_alike(bits, n, sample_size, detectors, seed):
    rng = np.random.default_rng(seed)
    top = bits if bits <= 4096 else 3000  # up to dense at narrow widths, a few thousand at wide ones
    weights = rng.integers(min(2, bits), max(3, min(top, bits)) + 1, size=n)
    weights = np.minimum(weights, bits)
    threshold = int(min(2, weights.min()))
    codes = _random_codes(rng, n, bits, weights)
    noisy = _random_codes(rng, 5, bits, weights)
    queries = Codes.concat([codes[: min(n, 5)], noisy])
    results = []
    for kind in KINDS:
        store = _store(kind, bits, threshold=threshold, sample_size=sample_size, detectors=detectors, seed=seed)
        store.add(codes[: n // 2 + 1])
        store.remove([0])
        store.add(codes[n // 2 + 1 :])
        store._check()
        results.append(_answers(store, queries))
    assert all(r == results[0] for r in results[1:])


def test_overlaps_at_2_20_bits_equal_the_scipy_product():
    """Exact overlaps and `nearest` against scipy.sparse ``S @ q`` (the reference) at 2**20 bits."""
    bits = 2**20
    codes = Codes.random(3_000, bits, 300, seed=31)
    store = Store(bits, threshold=1, seed=5)  # every shared bit fires: the query returns every overlap
    store.add(codes)
    assert store._bank.columns is not None and store.row_layout == "sparse"
    S = codes.to_scipy().tocsr().astype(np.int64)
    rng = np.random.default_rng(3)
    for i in rng.choice(3_000, size=8, replace=False):
        q = codes.to_indices()[i]
        noisy = np.unique(np.concatenate([q[:150], rng.integers(0, bits, 150)]))
        want = np.asarray(S[:, noisy].sum(axis=1)).ravel()
        hits = store.query(noisy)
        got = np.zeros(3_000, dtype=np.int64)
        got[hits.ids] = hits.overlaps
        assert np.array_equal(got, want)
        top = store.nearest(noisy, 10)
        order = np.lexsort((np.arange(3_000), -want))[:10]
        assert top.ids.tolist() == order.tolist() and top.overlaps.tolist() == want[order].tolist()


def test_a_2_32_bit_store_holding_one_code_costs_kilobytes(tmp_path):
    bits = 2**32
    code = [0, 5, 77, 2**31, bits - 1]
    store = Store(bits, threshold=3, seed=1)
    store.add([code])
    assert store.nbytes < 4096, store.nbytes   # per-bit tables would be gigabytes
    assert store.query([0, 77, bits - 1]).ids.tolist() == [0]
    assert store.nearest([5, 9, bits - 1], 1).overlaps.tolist() == [2]
    stats = store.stats()
    assert stats.usage_bits.tolist() == code and stats.usage.tolist() == [1] * 5
    report = store.health()
    assert report.unused_bits == bits - 5 and report.status in ("healthy", "unknown")
    path = tmp_path / "huge.sidx"
    store.save(path)
    assert path.stat().st_size < 8192
    for mmap in (False, True):
        loaded = Store.load(path, mmap=mmap)
        loaded._check()
        assert loaded.query([0, 77, bits - 1]).ids.tolist() == [0]
    assert Store.load(path).get(0).to_indices()[0].tolist() == code


@pytest.mark.parametrize("make", [
    lambda: Store(2**32 + 1, threshold=3),
    lambda: Codes.from_indices([[1]], 2**32 + 1),
    lambda: __import__("sparseindex").plan(2**32 + 1, 300, false_hit=1e-6, capacity=1000),
])
def test_wider_than_2_32_bits_is_a_clear_value_error(make):
    with pytest.raises(ValueError, match=r"bits=4294967297 is wider than the 4,294,967,296 bits"):
        make()


def _mapped_store():
    codes = Codes.random(200, 70_000, 40, seed=8)
    store = Store(70_000, threshold=4, sample_size=10, detectors=2, seed=3)
    store.add(codes)
    return store


def _unsorted(a):
    a[0], a[1] = a[1], a[0]


def _out_of_range(a):
    a[-1] = 70_000


@pytest.mark.parametrize("section,change,message", [
    ("bit_columns", _unsorted, "not strictly ascending"),
    ("bit_columns", _out_of_range, "not strictly ascending inside 0..69999"),
])
def test_hostile_column_maps_are_refused_before_any_kernel_runs(tmp_path, section, change, message):
    bad = tmp_path / "bad.sidx"
    bad.write_bytes(corrupted(_mapped_store(), section, change))
    with pytest.raises(StoreFormatError, match=message) as info:
        Store.load(bad)
    assert info.value.section == section


def test_a_map_that_names_the_wrong_bit_is_refused(tmp_path):
    store = _mapped_store()
    columns = store._bank.columns
    # move one mapped bit to an unused neighbour: still ascending and in range, but its postings now name
    # a bit their codes do not set
    i = int(np.flatnonzero(np.diff(columns) > 1)[0])

    def moved(a):
        a[i] += 1

    bad = tmp_path / "bad.sidx"
    bad.write_bytes(corrupted(store, "bit_columns", moved))
    with pytest.raises(StoreFormatError, match="names a bit that is not set in its code"):
        Store.load(bad)


def test_postings_in_the_spare_column_are_refused(tmp_path):
    store = _mapped_store()

    def spare_takes_the_last_posting(a):
        a[-1, -2] -= 1

    bad = tmp_path / "bad.sidx"
    bad.write_bytes(corrupted(store, "block_indptr", spare_takes_the_last_posting))
    with pytest.raises(StoreFormatError, match="spare column"):
        Store.load(bad)


def test_the_column_map_only_grows_until_compact_rebuilds_it():
    bits = 100_000
    store = Store(bits, threshold=2, seed=4)
    store.add([[1, 2, 3], [10, 20, 30]])
    assert store._bank.columns.tolist() == [1, 2, 3, 10, 20, 30]
    store.add([[2, 50_000, 99_999]])
    assert store._bank.columns.tolist() == [1, 2, 3, 10, 20, 30, 50_000, 99_999]
    store.remove([1])
    assert store.query([10, 20, 30]).ids.tolist() == []
    store.compact()
    assert store._bank.columns.tolist() == [1, 2, 3, 50_000, 99_999]
    store._check()
    assert store.query([2, 3]).ids.tolist() == [0] and store.query([2, 50_000]).ids.tolist() == [2]


@pytest.mark.parametrize("mapped", [False, True])
def test_the_invariant_checker_sees_a_posting_out_of_place(mapped):
    cls = type("Forced", (Store,), {"_column_map": mapped})
    store = cls(70_000, threshold=4, sample_size=10, detectors=2, seed=3)
    store.add(Codes.random(200, 70_000, 40, seed=8))
    store._check()
    post = store._bank._post
    post[0], post[1] = post[1], post[0]   # two postings of one column, now out of order
    with pytest.raises(AssertionError, match="not strictly ascending|differ from the detector samples"):
        store._check()


def test_row_kernels_on_index_rows_match_scipy_and_numpy():
    # references: scipy.sparse S @ S.T for pair overlaps, numpy.unique over dense rows for exact copies
    from sparseindex._numba import banding as banding_kernels
    from sparseindex._numba import unionfind
    from sparseindex.codes import row_table

    base = Codes.random(12, 70_000, 30, seed=5)
    codes = base[np.array([0, 1, 2, 1, 3, 0, 4, 5, 6, 2, 7, 8, 9, 10, 11, 3])]
    assert codes.layout == "sparse"
    table = row_table(codes)
    S = codes.to_scipy().tocsr().astype(np.int64)
    lo, hi = np.triu_indices(len(codes), 1)
    assert np.array_equal(banding_kernels.pair_overlaps(table, lo, hi), (S @ S.T).toarray()[lo, hi])
    hashes = unionfind.row_hashes(table)
    for forced in (False, True):   # forced collisions: rows must still be told apart by their indices
        h = hashes % np.uint64(2) if forced else hashes
        order = np.argsort(h, kind="stable")
        owner = unionfind.exact_copy_owners(order, banding_kernels.run_pair_counts(h[order]), table)
        _, first, inverse = np.unique(codes.to_dense(), axis=0, return_index=True, return_inverse=True)
        assert np.array_equal(owner, first[inverse.reshape(-1)])
