"""Store.find_or_add against the naive one-at-a-time rule of tests/naive.py.

The configurations include samples smaller than the codes (sample_size <
weight), where the detectors alone cannot guarantee every match and the
store must scan the codes they do not cover; removed codes, compaction and
many postings blocks.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sparseindex import Codes, ReadOnlyStoreError, Store
from tests.naive import naive_find_or_add, noisy_copy, random_code


class SmallBlockStore(Store):
    _block_span = 7


def live_codes(store):
    ids = store.ids()
    return {int(i): set(store.get([int(i)]).to_indices()[0].tolist()) for i in ids}


def planted_batch(rng, stored, bits, weight, n, lose):
    """Near-copies of stored codes and of each other, plus fresh codes."""
    batch = []
    for _ in range(n):
        kind = rng.integers(3)
        if kind == 0 and stored:
            batch.append(noisy_copy(rng, sorted(stored[rng.choice(list(stored))]), bits, int(rng.integers(0, lose + 1))))
        elif kind == 1 and batch:
            batch.append(noisy_copy(rng, batch[int(rng.integers(len(batch)))], bits, int(rng.integers(0, lose + 1))))
        else:
            batch.append(random_code(rng, bits, weight))
    return batch


@pytest.mark.parametrize(
    "cls, params, min_overlap",
    [
        (Store, dict(threshold=3, sample_size=None, detectors=1), 8),   # detectors cover every match
        (Store, dict(threshold=3, sample_size=5, detectors=2), 8),      # 8 < 3 + 12 - 5: scan needed
        (SmallBlockStore, dict(threshold=2, sample_size=6, detectors=3), 10),
        (Store, dict(threshold=4, sample_size=10, detectors=1), 11),    # 11 >= 4 + 12 - 10: covered
    ],
)
def test_matches_the_naive_rule(cls, params, min_overlap):
    rng = np.random.default_rng(1)
    bits, weight = 96, 12
    store = cls(bits, seed=3, **params)
    store.add([random_code(rng, bits, weight) for _ in range(150)])
    store.remove(list(range(0, 150, 7)))
    if cls is SmallBlockStore:
        store.compact()
    stored = live_codes(store)
    for round_ in range(3):
        batch = planted_batch(rng, stored, bits, weight, 60, lose=4)
        want_ids, want_new = naive_find_or_add(stored, batch, min_overlap, store.next_id)
        ids, is_new = store.find_or_add(batch, min_overlap=min_overlap)
        assert ids.tolist() == want_ids and is_new.tolist() == want_new, round_
        assert live_codes(store) == stored
        store._check(deep=True)
    assert sum(want_new) < len(batch)  # the planted copies really matched


code = st.sets(st.integers(0, 39), min_size=3, max_size=12).map(sorted)


@settings(max_examples=60)
@given(
    stored=st.lists(code, max_size=12),
    batch=st.lists(code, min_size=1, max_size=12),
    min_overlap=st.integers(1, 6),
    sample_size=st.sampled_from([None, 3, 5]),
    detectors=st.integers(1, 2),
    seed=st.integers(0, 2**32),
)
def test_property_every_answer_is_the_naive_one(stored, batch, min_overlap, sample_size, detectors, seed):
    store = SmallBlockStore(40, threshold=2 if sample_size != 3 else 2, sample_size=sample_size, detectors=detectors, seed=seed)
    if stored:
        store.add(stored)
    reference = live_codes(store)
    want_ids, want_new = naive_find_or_add(reference, batch, min_overlap, store.next_id)
    ids, is_new = store.find_or_add(batch, min_overlap=min_overlap)
    assert ids.tolist() == want_ids and is_new.tolist() == want_new
    assert live_codes(store) == reference
    for i, new, c in zip(ids.tolist(), is_new.tolist(), batch):  # exactness of every match
        got = set(store.get([i]).to_indices()[0].tolist())
        assert got == set(c) if new else len(got & set(c)) >= min_overlap


def test_bad_batches_add_nothing(tmp_path):
    store = Store(64, threshold=3, seed=1)
    store.add([[1, 2, 3, 4]])
    with pytest.raises(ValueError, match="row 1 has 2 set bits, fewer than threshold=3"):
        store.find_or_add([[5, 6, 7], [8, 9]], min_overlap=2)
    with pytest.raises(ValueError, match="row 0"):
        store.find_or_add([[70, 1, 2]], min_overlap=2)
    with pytest.raises(ValueError, match="min_overlap=0"):
        store.find_or_add([[5, 6, 7]], min_overlap=0)
    assert len(store) == 1 and store.next_id == 1
    store.save(tmp_path / "s")
    with pytest.raises(ReadOnlyStoreError, match="find_or_add"):
        Store.load(tmp_path / "s", mmap=True).find_or_add([[1, 2, 3]], min_overlap=2)


def test_large_batch_against_planted_copies():
    """10,000 codes in, then 2,000 near-copies and 2,000 new: every copy found."""
    bits, weight = 2048, 40
    store = Store.for_target(bits, weight, false_hit=1e-6, capacity=100_000, noise=0.25, seed=4)
    base = Codes.random(10_000, bits, weight, seed=4)
    store.add(base)
    rng = np.random.default_rng(5)
    rows = base.to_indices()
    copies = [noisy_copy(rng, rows[i], bits, 6) for i in rng.choice(10_000, 2_000, replace=False)]
    fresh = Codes.random(2_000, bits, weight, seed=6).to_indices()
    batch = copies + [list(r) for r in fresh]
    ids, is_new = store.find_or_add(batch, min_overlap=30)
    assert not is_new[:2_000].any() and is_new[2_000:].all()
    assert np.array_equal(ids[2_000:], np.arange(10_000, 12_000))


def test_same_rule_as_label_near_duplicates_first():
    """find_or_add on an empty store labels a batch exactly as label_near_duplicates(mode="first")."""
    from sparseindex import label_near_duplicates
    from sparseindex.near_duplicates import planted_duplicates

    codes, _, _ = planted_duplicates(3_000, 512, 16, fraction=0.2, max_changed=4, seed=7)
    labels = label_near_duplicates(codes, min_overlap=12, mode="first", method="index")
    store = Store(512, threshold=3, sample_size=8, detectors=2, seed=8)
    ids, is_new = store.find_or_add(codes, min_overlap=12)
    reps = np.flatnonzero(labels == np.arange(len(labels)))
    assert np.array_equal(np.flatnonzero(is_new), reps)
    rep_id = np.full(len(labels), -1)
    rep_id[reps] = np.arange(reps.size)
    assert np.array_equal(ids, rep_id[labels])
    assert reps.size < len(labels)


def test_find_matches_is_complete_where_detectors_are_not():
    rng = np.random.default_rng(9)
    store = SmallBlockStore(96, threshold=3, sample_size=4, detectors=1, seed=10)
    codes = [random_code(rng, 96, 14) for _ in range(200)]
    store.add(codes)
    queries = [noisy_copy(rng, codes[i], 96, 5) for i in range(0, 200, 4)]
    got = store.find_matches(queries, min_overlap=7)
    for i, q in enumerate(queries):  # naive: every stored code, every overlap
        want = sorted(((j, len(set(q) & set(c))) for j, c in enumerate(codes) if len(set(q) & set(c)) >= 7),
                      key=lambda h: (-h[1], h[0]))
        assert list(zip(got[i].ids.tolist(), got[i].overlaps.tolist())) == want
    detected = store.query_many(queries, min_overlap=7)
    assert detected.ids.shape[0] < got.ids.shape[0]  # the detectors alone miss some here


def test_add_with_given_ids_samples_as_the_id_says(tmp_path):
    rng = np.random.default_rng(11)
    codes = [random_code(rng, 128, 10) for _ in range(30)]
    whole = Store(128, threshold=3, sample_size=5, detectors=2, seed=12)
    whole.add(codes)
    shard = Store(128, threshold=3, sample_size=5, detectors=2, seed=12)
    mine = list(range(1, 30, 3))
    assert shard.add([codes[i] for i in mine], ids=mine).tolist() == mine
    assert shard.next_id == 29 and shard.ids().tolist() == mine
    for i in mine:
        assert np.array_equal(shard.detector_bits(i), whole.detector_bits(i))
    q = codes[4]
    assert shard.query(q).ids.tolist() == [i for i in whole.query(q).ids.tolist() if i in mine]
    shard._check(deep=True)
    shard.save(tmp_path / "shard")
    assert Store.load(tmp_path / "shard").ids().tolist() == mine
    with pytest.raises(ValueError, match="ids\\[0\\]=5 is below next_id=29"):
        shard.add([codes[0]], ids=[5])
    with pytest.raises(ValueError, match="ids\\[1\\]=40 follows 41"):
        shard.add([codes[0], codes[1]], ids=[41, 40])
    with pytest.raises(ValueError, match="1-D sequence of 2 ids"):
        shard.add([codes[0], codes[1]], ids=[50])
    assert len(shard) == len(mine)
