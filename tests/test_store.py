"""The Store against the naive set model and against scipy.sparse."""

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given
from hypothesis import strategies as st

from sparseindex import Codes, Store
from tests.naive import NaiveStore, hits_as_pairs, noisy_copy, random_code

jit_only = pytest.mark.jit_only  # too slow as plain Python (NUMBA_DISABLE_JIT=1)


class SmallBlockStore(Store):
    """Blocks of 7 detectors, so small stores cross many block boundaries."""

    _block_span = 7


def random_rows(rng, count, bits, lo, hi):
    return [random_code(rng, bits, int(rng.integers(lo, hi + 1))) for _ in range(count)]


# -- parameters and bad input ------------------------------------------------


@pytest.mark.parametrize(
    "kwargs, error, message",
    [
        (dict(bits=0, threshold=1), ValueError, "bits=0 must be >= 1"),
        (dict(bits=8, threshold=0), ValueError, "threshold=0 must be >= 1"),
        (dict(bits=8, threshold=3, sample_size=2), ValueError, "threshold=3 must be <= sample_size=2"),
        (dict(bits=8, threshold=1, sample_size=0), ValueError, "sample_size=0 must be >= 1"),
        (dict(bits=8, threshold=1, detectors=0), ValueError, "detectors=0 must be >= 1"),
        (dict(bits=8, threshold=9), ValueError, "threshold=9 must be <= bits=8"),
        (dict(bits=8, threshold=1, seed=-1), ValueError, "seed=-1 must be >= 0"),
        (dict(bits=8.0, threshold=1), TypeError, "bits=8.0 must be an integer"),
        (dict(bits=8, threshold=True), TypeError, "threshold=True must be an integer"),
    ],
)
def test_bad_parameters(kwargs, error, message):
    with pytest.raises(error, match=message):
        Store(**kwargs)


BAD_BATCHES = [
    ([[1, 2, 3], [4, 5, 64]], ValueError, "row 1: bit index 64 is out of range for bits=64"),
    ([[1, 2, 3], [-4, 5, 6]], ValueError, "row 1: bit index -4 is out of range"),
    ([[1, 2, 3], [4, 5, float("nan")]], ValueError, "row 1: bit index nan is not a finite integer"),
    ([[1, 2, 3], [4, 5, 6.5]], ValueError, "row 1: bit index 6.5 is not an integer"),
    ([[1, 2, 3], [4, 5, 5]], ValueError, "row 1: duplicate bit index 5"),
    ([[1, 2, 3], [4, 5]], ValueError, "row 1 has 2 set bits, fewer than threshold=3"),
    (np.zeros((2, 32), dtype=bool), ValueError, "dense array has width 32, expected bits=64"),
    (np.zeros((2, 8), dtype=np.uint8), TypeError, "from_packed"),
]


@pytest.mark.parametrize("batch, error, message", BAD_BATCHES)
def test_a_bad_row_adds_nothing(batch, error, message):
    store = Store(bits=64, threshold=3, seed=0)
    store.add([[10, 11, 12, 13]])
    before = (len(store), store.next_id, store.postings_count)
    with pytest.raises(error, match=message):
        store.add(batch)
    assert (len(store), store.next_id, store.postings_count) == before
    store._check()
    assert store.query([10, 11, 12]).ids.tolist() == [0]


def test_bad_queries_and_arguments():
    store = Store(bits=64, threshold=2, seed=0)
    store.add([[1, 2, 3]])
    with pytest.raises(ValueError, match="row 0: bit index 70 is out of range for bits=64"):
        store.query([1, 70])
    with pytest.raises(ValueError, match="min_overlap=-1 must be >= 0"):
        store.query([1, 2], min_overlap=-1)
    with pytest.raises(ValueError, match="k=-2 must be >= 0"):
        store.nearest([1, 2], k=-2)
    with pytest.raises(TypeError, match="not a single code"):
        store.query(np.zeros((1, 64), dtype=np.int64))
    with pytest.raises(KeyError, match="id 5 was never stored"):
        store.get([5])
    with pytest.raises(TypeError, match="id 1.5 is not an integer"):
        store.remove([1.5])


def test_remove_semantics_and_messages():
    store = Store(bits=32, threshold=2, seed=0)
    store.add([[1, 2, 3], [1, 2, 4], [1, 2, 5]])
    with pytest.raises(KeyError, match="remove: id 1 appears more than once in one call"):
        store.remove([1, 1])
    assert len(store) == 3
    with pytest.raises(KeyError, match="id 9 was never stored"):
        store.remove([0, 9])
    assert len(store) == 3 and 0 in store  # nothing removed by a failed call
    store.remove([1])
    with pytest.raises(KeyError, match="remove: id 1 was removed"):
        store.remove(1)
    assert store.query([1, 2]).ids.tolist() == [0, 2]
    store.compact()
    store._check()
    assert store.query([1, 2]).ids.tolist() == [0, 2]
    assert store.get([2]).to_indices()[0].tolist() == [1, 2, 5]
    with pytest.raises(KeyError, match="id 1 was removed"):
        store.get([1])
    assert store.add([[7, 8, 9]]).tolist() == [3]  # ids are never reused
    assert store.ids().tolist() == [0, 2, 3]
    assert 1 not in store and 3 in store and "x" not in store


# -- the matching rule --------------------------------------------------------


@pytest.mark.parametrize("store_class", [Store, SmallBlockStore])
@pytest.mark.parametrize("threshold", [1, 3, 6])
def test_full_codes_hit_exactly_at_threshold(store_class, threshold):
    """sample_size=None, one detector: hits are exactly {overlap >= threshold} (naive sets)."""
    rng = np.random.default_rng(threshold)
    bits = 100
    store = store_class(bits, threshold=threshold, seed=3)
    naive = NaiveStore(threshold)
    for _ in range(4):  # several adds: several blocks and merges
        rows = random_rows(rng, int(rng.integers(1, 30)), bits, threshold, threshold + 8)
        assert store.add(rows).tolist() == naive.add(rows)
        store._check()
    queries = random_rows(rng, 40, bits, 0, 20) + [naive.codes[i] for i in range(5)]
    for q in queries:
        assert hits_as_pairs(store.query(q)) == naive.query(q)
        assert hits_as_pairs(store.query(q, min_overlap=threshold + 2)) == naive.query(q, threshold + 2)
    batch = store.query_many(queries)
    assert len(batch) == len(queries)
    for i, q in enumerate(queries):
        assert hits_as_pairs(batch[i]) == naive.query(q)


@pytest.mark.parametrize("sample_size, detectors", [(3, 1), (4, 3), (6, 2)])
def test_subsampled_detectors_follow_the_rule_exactly(sample_size, detectors):
    """Hits equal the naive rule applied to the store's own inspectable samples."""
    rng = np.random.default_rng(sample_size * 10 + detectors)
    bits, threshold = 60, 2
    store = SmallBlockStore(bits, threshold=threshold, sample_size=sample_size, detectors=detectors, seed=11)
    rows = random_rows(rng, 50, bits, 2, 12)  # some lighter than sample_size
    ids = store.add(rows)
    samples = [[set(s.tolist()) for s in store.detector_bits(int(i))] for i in ids]
    naive = NaiveStore(threshold)
    naive.add(rows, samples)
    for i, row in zip(ids, rows):
        sample = store.detector_bits(int(i))
        assert sample.shape == (detectors, min(sample_size, len(row)))
        for s in sample:
            assert set(s.tolist()) <= set(row) and len(set(s.tolist())) == s.size
            assert np.all(np.diff(s) > 0)
    store._check()
    queries = random_rows(rng, 60, bits, 0, 25)
    for q in queries:
        assert hits_as_pairs(store.query(q)) == naive.query(q)
    for i, h in enumerate(store.query_many(queries)):
        assert hits_as_pairs(h) == naive.query(queries[i])


def test_samples_depend_only_on_seed_and_id():
    codes = Codes.random(40, bits=200, weight=30, seed=4)
    whole = Store(200, threshold=2, sample_size=5, detectors=3, seed=99)
    whole.add(codes)
    pieces = SmallBlockStore(200, threshold=2, sample_size=5, detectors=3, seed=99)
    for a, b in [(0, 1), (1, 17), (17, 40)]:
        pieces.add(codes[a:b])
    other_seed = Store(200, threshold=2, sample_size=5, detectors=3, seed=100)
    other_seed.add(codes)
    same = [np.array_equal(whole.detector_bits(i), pieces.detector_bits(i)) for i in range(40)]
    differ = [not np.array_equal(whole.detector_bits(i), other_seed.detector_bits(i)) for i in range(40)]
    assert all(same) and sum(differ) >= 38
    q = codes[3]
    assert whole.query(q) == pieces.query(q)


def test_samples_are_uniform_over_the_code():
    """Each set bit is sampled with chance s/a (chi-square test, scipy.stats reference)."""
    from scipy.stats import chisquare

    code = list(range(0, 200, 10))  # 20 bits
    store = Store(200, threshold=1, sample_size=5, detectors=1, seed=1)
    store.add([code] * 2000)
    counts = np.zeros(200)
    for i in range(2000):
        counts[store.detector_bits(i)[0]] += 1
    observed = counts[code]
    assert observed.sum() == 2000 * 5
    assert chisquare(observed).pvalue > 1e-4


@jit_only
def test_hits_equal_scipy_sparse_product_on_100k_codes():
    """Reference: scipy.sparse product Q @ S.T gives every overlap (general-purpose library)."""
    bits, weight, threshold, n_codes = 2048, 40, 20, 100_000
    codes = Codes.random(n_codes, bits, weight, seed=21)
    store = Store(bits, threshold=threshold, seed=5)
    store.add(codes[:60_000])
    store.add(codes[60_000:])  # a second batch: appended blocks
    rng = np.random.default_rng(8)
    sources = rng.choice(n_codes, 40, replace=False)
    queries = [noisy_copy(rng, codes[int(i)].tolist(), bits, int(rng.integers(5, 25))) for i in sources]
    queries += [random_code(rng, bits, 700) for _ in range(10)]  # dense queries: many chance hits
    q_codes = Codes.from_indices(queries, bits)
    overlaps = (q_codes.to_scipy().astype(np.int32) @ codes.to_scipy().astype(np.int32).T).toarray()
    batch = store.query_many(q_codes)
    for i in range(len(queries)):
        want_ids = np.flatnonzero(overlaps[i] >= threshold)
        want_ov = overlaps[i][want_ids]
        order = np.lexsort((want_ids, -want_ov))
        single = store.query(queries[i])
        assert single.ids.tolist() == want_ids[order].tolist()
        assert single.overlaps.tolist() == want_ov[order].tolist()
        assert batch[i] == single
    assert sum(len(h) for h in batch) > 5_000


# -- nearest, get, batching --------------------------------------------------


@pytest.mark.parametrize("k", [0, 1, 3, 10, 100])
def test_nearest_is_exact_even_without_firing(k):
    rng = np.random.default_rng(k)
    bits = 80
    store = Store(bits, threshold=15, seed=0)  # threshold high: detectors rarely fire
    naive = NaiveStore(15)
    rows = random_rows(rng, 60, bits, 15, 25)
    store.add(rows)
    naive.add(rows)
    store.remove([3, 7])
    naive.remove([3, 7])
    for q in random_rows(rng, 20, bits, 1, 12):
        assert hits_as_pairs(store.nearest(q, k)) == naive.nearest(q, k)


def test_empty_store_and_empty_batches():
    store = Store(bits=16, threshold=2, seed=0)
    assert len(store.query([1, 2])) == 0
    assert len(store.nearest([1, 2], 5)) == 0
    assert len(store.query_many([[1, 2], [3]])) == 2
    assert store.add([]).tolist() == []
    store.add([[1, 2]])
    assert len(store.query_many(Codes.from_indices([], 16))) == 0
    assert "items=1" in repr(store)


def test_batch_with_many_hits_per_query_resumes_correctly():
    """A query with far more hits than the batch kernel's first slab still returns all of them."""
    store = SmallBlockStore(bits=32, threshold=1, seed=0)
    store.add([[i % 32, (i + 1) % 32] for i in range(3000)])
    queries = [list(range(32))] + [[5]] * 50
    batch = store.query_many(queries)
    assert len(batch[0]) == 3000
    for i, q in enumerate(queries):
        assert batch[i] == store.query(q)


def test_weights_above_255_use_wider_counters():
    store = Store(bits=1024, threshold=300, seed=0)
    store.add([list(range(400)), list(range(500, 1000))])
    assert store.query(list(range(350))).ids.tolist() == [0]
    assert store.query(list(range(600, 1000))).overlaps.tolist() == [400]


def test_single_query_with_more_hits_than_the_first_room_rescans_correctly():
    """Over 4,096 fired detectors per chunk: the scan runs again with room for all (serial and parallel paths)."""
    store = SmallBlockStore(bits=32, threshold=1, seed=0)
    rows = [[i % 32, (i + 1) % 32] for i in range(10_000)]
    store.add(rows)
    want = sorted(i for i, r in enumerate(rows) if 5 in r)
    assert sorted(store.query([5]).ids.tolist()) == want
    everything = store.query(list(range(32)))
    assert len(everything) == 10_000 and set(everything.overlaps.tolist()) == {2}
    assert store.query_many([list(range(32))])[0] == everything


def test_parallel_and_serial_single_queries_agree_and_leave_the_kept_counters_zero(monkeypatch):
    """The parallel path keeps its counter rows between calls; every query must leave them zeroed."""
    from sparseindex.store import bank as bank
    rng = np.random.default_rng(11)
    store = SmallBlockStore(bits=64, threshold=3, seed=0)
    store.add([np.sort(rng.choice(64, size=int(rng.integers(3, 9)), replace=False)).tolist() for _ in range(600)])
    queries = [np.sort(rng.choice(64, size=int(rng.integers(1, 20)), replace=False)).tolist() for _ in range(40)]
    parallel = [store.query(q) for q in queries]
    if bank.thread_count() > 1 and bank.PARALLEL_SINGLE_QUERY:
        assert bank._CHUNK_COUNTERS, "the parallel path was not taken"
    for rows in bank._CHUNK_COUNTERS.values():
        assert not rows.any()
    monkeypatch.setattr(bank, "PARALLEL_SINGLE_QUERY", False)
    assert [store.query(q) for q in queries] == parallel
