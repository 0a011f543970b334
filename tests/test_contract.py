"""One store contract, checked on every store: ``Store`` (rows packed, and rows as indices) and a 2-shard ``ShardedStore``.

Each test runs against both and compares with the set-based reference in
``tests/naive.py`` (hits, overlaps, nearest, the find-or-add rule), so a
refactoring that moves behaviour between the stores cannot change what
either answers. ``ShardedStore`` runs on an in-process Dask cluster here;
``tests/test_cluster.py`` covers worker processes, faults and files.
"""

from __future__ import annotations

import numpy as np
import pytest

from sparseindex import Codes, Store

from tests import naive

BITS, WEIGHT, THRESHOLD = 200, 12, 5
KINDS = ["store", "sparse rows", "sharded"]


class SparseRowsStore(Store):
    """A Store that keeps its rows as sorted indices even at this narrow width (the layout wide stores use)."""

    _row_layout = "sparse"


@pytest.fixture(scope="module")
def client():
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None)
    client = distributed.Client(cluster)
    yield client
    client.close()
    cluster.close()


@pytest.fixture(params=KINDS)
def make(request):
    """A factory of empty stores of the parametrised kind (same arguments as ``Store``)."""
    made = []

    def new(**kwargs):
        if request.param == "store":
            store = Store(BITS, **kwargs)
        elif request.param == "sparse rows":
            store = SparseRowsStore(BITS, **kwargs)
            assert store.row_layout == "sparse"
        else:
            from sparseindex.cluster import ShardedStore

            store = ShardedStore(request.getfixturevalue("client"), 2, BITS, **kwargs)
        made.append(store)
        return store

    yield new
    for store in made:
        if hasattr(store, "close"):
            store.close()


def filled(make, rng, count=120):
    store = make(threshold=THRESHOLD, seed=3)
    ref = naive.NaiveStore(THRESHOLD)
    codes = [naive.random_code(rng, BITS, WEIGHT) for _ in range(count)]
    ids = store.add(codes)
    assert ids.tolist() == ref.add(codes)
    return store, ref, codes


def queries_for(rng, codes, n=40):
    near = [naive.noisy_copy(rng, codes[int(rng.integers(len(codes)))], BITS, 4) for _ in range(n)]
    far = [naive.random_code(rng, BITS, WEIGHT) for _ in range(n // 4)]
    return near + far


def assert_answers(store, ref, queries, min_overlap=0):
    if isinstance(store, Store):
        store._check(deep=True)  # the invariants of whichever row layout it keeps
    batch = store.query_many(queries, min_overlap=min_overlap)
    for q, many in zip(queries, batch):
        want = ref.query(q, min_overlap)
        assert naive.hits_as_pairs(store.query(q, min_overlap=min_overlap)) == want   # reference: naive sets
        assert naive.hits_as_pairs(many) == want
        assert naive.hits_as_pairs(store.nearest(q, 5)) == ref.nearest(q, 5)


def test_add_query_nearest(make):
    rng = np.random.default_rng(1)
    store, ref, codes = filled(make, rng)
    assert len(store) == 120 and store.next_id == 120 and store.ids().tolist() == list(range(120))
    assert_answers(store, ref, queries_for(rng, codes))
    assert_answers(store, ref, queries_for(rng, codes), min_overlap=9)


def test_remove_compact_and_get(make):
    rng = np.random.default_rng(2)
    store, ref, codes = filled(make, rng)
    gone = sorted(rng.choice(120, 30, replace=False).tolist())
    store.remove(gone)
    ref.remove(gone)
    queries = queries_for(rng, codes)
    assert_answers(store, ref, queries)
    store.compact()
    assert_answers(store, ref, queries)
    kept = [i for i in range(120) if i not in gone][:10]
    assert [list(map(int, c)) for c in store.get(kept).to_indices()] == [codes[i] for i in kept]
    assert all(i in store for i in kept) and not any(i in store for i in gone)
    more = [naive.random_code(rng, BITS, WEIGHT) for _ in range(15)]
    assert store.add(more).tolist() == ref.add(more) == list(range(120, 135))   # ids never reused
    assert_answers(store, ref, queries)
    with pytest.raises(KeyError, match="never stored"):
        store.get([500])


def test_find_matches_and_find_or_add(make):
    rng = np.random.default_rng(3)
    store, ref, codes = filled(make, rng)
    batch = queries_for(rng, codes, 30)
    matches = store.find_matches(batch, min_overlap=8)
    for q, hits in zip(batch, matches):
        want = [(i, ov) for i, ov in ref.nearest(q, len(ref.codes)) if ov >= 8]
        assert naive.hits_as_pairs(hits) == want                                  # reference: naive sets
    stored = dict(ref.codes)
    ids, is_new = store.find_or_add(batch, min_overlap=8)
    want_ids, want_new = naive.naive_find_or_add(stored, batch, 8, store.next_id - int(is_new.sum()))
    assert ids.tolist() == want_ids and is_new.tolist() == want_new               # reference: naive rule
    assert is_new.any() and (~is_new).any()


def test_health_and_measurement(make):
    rng = np.random.default_rng(4)
    store, _, _ = filled(make, rng, 300)
    store.watch(false_hit=0.2)
    h = store.health()
    assert h.items == 300 and h.status in ("healthy", "filling", "saturated")
    assert h.limit == pytest.approx(h.limit_uniform) or h.limit_basis == "usage"
    m = store.measure_false_hits(500, seed=5)
    assert m.queries == 500 and 0 <= m.low <= m.rate <= m.high <= 1
    assert store.health().measurement == m


@pytest.mark.parametrize("call, error, text", [
    (lambda s: s.add([[1, 2, BITS]]), ValueError, "out of range|outside"),
    (lambda s: s.add([[1, 1, 2, 3, 4, 5]]), ValueError, "duplicate"),
    (lambda s: s.query("x"), TypeError, "'x'"),
    (lambda s: s.nearest([1, 2, 3], k=-1), ValueError, "k=-1"),
    (lambda s: s.remove([10**6]), KeyError, "never stored"),
])
def test_bad_input_changes_nothing(make, call, error, text):
    rng = np.random.default_rng(5)
    store, ref, codes = filled(make, rng, 40)
    with pytest.raises(error, match=text):
        call(store)
    assert len(store) == 40 and store.next_id == 40
    assert_answers(store, ref, queries_for(rng, codes, 8))


def test_both_stores_give_the_same_answers_with_sampled_detectors(client):
    """With sampled detectors there is no set-based reference; the two stores must agree."""
    from sparseindex.cluster import ShardedStore

    rng = np.random.default_rng(6)
    codes = Codes.random(400, BITS, WEIGHT, seed=7)
    single = Store(BITS, threshold=4, sample_size=8, detectors=2, seed=9)
    with ShardedStore(client, 2, BITS, threshold=4, sample_size=8, detectors=2, seed=9) as sharded:
        assert np.array_equal(single.add(codes), sharded.add(codes))
        queries = queries_for(rng, codes.to_indices(), 60)
        a, b = single.query_many(queries), sharded.query_many(queries)
        assert np.array_equal(a.indptr, b.indptr) and np.array_equal(a.ids, b.ids)
        assert np.array_equal(a.overlaps, b.overlaps)
