"""One error rule at every public entry point: wrong type TypeError, wrong value ValueError, the value quoted.

The rule is bitarray's and Python's own (``range("3")`` is a TypeError,
``range(-1, 0, 0)`` a ValueError). Each row calls one entry point with one
bad argument and names the exception and a piece of the message that must
quote the offending value. After every refused call the store is unchanged
(checked against a copy of its ids and a query). A sharded store shares
these checks through ``StoreBase``; ``test_contract.py`` runs it.
"""

import numpy as np
import pytest

import sparseindex as si
from sparseindex import Codes, Store, model, plan


def fresh_store():
    store = Store(64, threshold=2, seed=1)
    store.add([[1, 2, 3], [4, 5, 6]])
    return store


STORE_CALLS = [
    # (description, call on a store, exception, quoted text)
    ("add: a str batch", lambda s: s.add("abc"), TypeError, "'abc'"),
    ("add: a bit out of range", lambda s: s.add([[99]]), ValueError, "bit index 99"),
    ("add: ids of strings", lambda s: s.add([[1, 2]], ids=["a"]), TypeError, "['a']"),
    ("add: negative id", lambda s: s.add([[1, 2]], ids=[-1]), ValueError, "ids[0]=-1"),
    ("add: too light", lambda s: s.add([[1]]), ValueError, "row 0 has 1 set bits"),
    ("query: an int", lambda s: s.query(5), TypeError, "5 (int)"),
    ("query: min_overlap str", lambda s: s.query([1, 2], min_overlap="a"), TypeError, "min_overlap='a'"),
    ("query: min_overlap negative", lambda s: s.query([1, 2], min_overlap=-1), ValueError, "min_overlap=-1"),
    ("query_many: min_overlap float", lambda s: s.query_many([[1, 2]], min_overlap=1.5), TypeError, "min_overlap=1.5"),
    ("nearest: k str", lambda s: s.nearest([1, 2], k="a"), TypeError, "k='a'"),
    ("nearest: k negative", lambda s: s.nearest([1, 2], k=-1), ValueError, "k=-1"),
    ("find_matches: min_overlap 0", lambda s: s.find_matches([[1, 2]], min_overlap=0), ValueError, "min_overlap=0"),
    ("find_or_add: min_overlap str", lambda s: s.find_or_add([[1, 2]], min_overlap="x"), TypeError,
     "min_overlap='x'"),
    ("remove: a str id", lambda s: s.remove(["a"]), TypeError, "'a'"),
    ("remove: never stored", lambda s: s.remove([7]), KeyError, "id 7"),
    ("get: a float id", lambda s: s.get(1.5), TypeError, "1.5"),
    ("health: false_hit str", lambda s: s.health(false_hit="x"), TypeError, "false_hit='x'"),
    ("health: false_hit 0", lambda s: s.health(false_hit=0), ValueError, "false_hit=0"),
    ("health: warn_fraction 2", lambda s: s.health(warn_fraction=2), ValueError, "warn_fraction=2"),
    ("health: refresh str", lambda s: s.health(refresh="y"), TypeError, "refresh='y'"),
    ("measure: queries str", lambda s: s.measure_false_hits("x"), TypeError, "queries='x'"),
    ("measure: queries 0", lambda s: s.measure_false_hits(0), ValueError, "queries=0"),
    ("measure: source int", lambda s: s.measure_false_hits(10, source=3), TypeError, "source=3"),
    ("measure: source unknown", lambda s: s.measure_false_hits(10, source="z"), ValueError, "source='z'"),
    ("measure: seed str", lambda s: s.measure_false_hits(10, seed="z"), TypeError, "seed='z'"),
    ("measure: seed negative", lambda s: s.measure_false_hits(10, seed=-2), ValueError, "seed=-2"),
    ("watch: callback not callable", lambda s: s.watch(3, false_hit=0.1), TypeError, "on_status=3"),
    ("watch: false_hit 5", lambda s: s.watch(None, false_hit=5), ValueError, "false_hit=5"),
    ("detector_samples: count str", lambda s: s.detector_samples("a", seed=1), TypeError, "count='a'"),
    ("detector_samples: seed negative", lambda s: s.detector_samples(3, seed=-1), ValueError, "seed=-1"),
    ("save: path int", lambda s: s.save(3), TypeError, "path=3"),
]


@pytest.mark.parametrize("what,call,error,quoted", STORE_CALLS, ids=[row[0] for row in STORE_CALLS])
def test_store_entry_points_follow_the_rule_and_change_nothing(what, call, error, quoted):
    store = fresh_store()
    before = (store.ids().tolist(), store.next_id, store.query([1, 2, 3]).ids.tolist())
    with pytest.raises(error) as caught:
        call(store)
    assert quoted in str(caught.value), f"{what}: {caught.value}"
    assert (store.ids().tolist(), store.next_id, store.query([1, 2, 3]).ids.tolist()) == before
    store._check()


FUNCTION_CALLS = [
    ("Store: bits str", lambda: Store("x", threshold=1), TypeError, "bits='x'"),
    ("Store: bits 0", lambda: Store(0, threshold=1), ValueError, "bits=0"),
    ("Store: threshold float", lambda: Store(64, threshold=1.5), TypeError, "threshold=1.5"),
    ("Store: threshold over sample", lambda: Store(64, threshold=3, sample_size=2), ValueError, "threshold=3"),
    ("Store: detectors 0", lambda: Store(64, threshold=1, detectors=0), ValueError, "detectors=0"),
    ("Store: seed str", lambda: Store(64, threshold=1, seed="a"), TypeError, "seed='a'"),
    ("Store: seed negative", lambda: Store(64, threshold=1, seed=-1), ValueError, "seed=-1"),
    ("Store: seed 2**64", lambda: Store(64, threshold=1, seed=2**64), ValueError, "seed=18446744073709551616"),
    ("for_target: false_hit str", lambda: Store.for_target(64, 4, false_hit="x", capacity=10), TypeError,
     "false_hit='x'"),
    ("for_target: false_hit 2", lambda: Store.for_target(64, 4, false_hit=2, capacity=10), ValueError,
     "false_hit=2"),
    ("plan: bits str", lambda: plan("x", 4, false_hit=1e-3, capacity=10), TypeError, "bits='x'"),
    ("plan: capacity 0", lambda: plan(64, 4, false_hit=1e-3, capacity=0), ValueError, "capacity=0"),
    ("plan: noise 1", lambda: plan(64, 4, false_hit=1e-3, capacity=10, noise=1), ValueError, "noise=1"),
    ("load: path int", lambda: Store.load(3), TypeError, "path=3"),
    ("load: mmap str", lambda: Store.load("x.sidx", mmap="y"), TypeError, "mmap='y'"),
    ("load: writable int", lambda: Store.load("x.sidx", writable=2), TypeError, "writable=2"),
    ("Codes.from_indices: bits str", lambda: Codes.from_indices([[1]], "a"), TypeError, "bits='a'"),
    ("Codes.from_indices: duplicate", lambda: Codes.from_indices([[1, 1]], 8), ValueError, "duplicate bit index 1"),
    ("Codes.random: count str", lambda: Codes.random("a", 64, 3), TypeError, "count='a'"),
    ("Codes.random: weight over bits", lambda: Codes.random(3, 64, 100), ValueError, "weight=100"),
    ("model: bits str", lambda: model.false_hit_per_code("x", 4, 4, 2, 1, 4), TypeError, "bits='x'"),
    ("model: bits 0", lambda: model.false_hit_per_code(0, 4, 4, 2, 1, 4), ValueError, "bits=0"),
    ("model: per_code str", lambda: model.code_limit("x", 1e-3), TypeError, "per_code='x'"),
    ("model: noise 2", lambda: model.recall(30, 4, 2, 1, noise=2), ValueError, "noise=2"),
    ("model: hits str", lambda: model.clopper_pearson("a", 3), TypeError, "hits='a'"),
    ("model: hits over trials", lambda: model.clopper_pearson(4, 3), ValueError, "hits=4"),
    ("model: p of strings", lambda: model.usage_false_hits(np.array(["a"]), [np.zeros((1, 1), int)], 1, 1, 1),
     TypeError, "dtype"),
    ("label: min_overlap str", lambda: si.label_near_duplicates([[1, 2]], min_overlap="a", bits=8), TypeError,
     "min_overlap='a'"),
    ("label: bits str", lambda: si.label_near_duplicates([[1, 2]], min_overlap=1, bits="a"), TypeError, "bits='a'"),
    ("label: mode unknown", lambda: si.label_near_duplicates([[1, 2]], min_overlap=1, bits=8, mode="x"), ValueError,
     "mode='x'"),
    ("label: mode int", lambda: si.label_near_duplicates([[1, 2]], min_overlap=1, bits=8, mode=3), TypeError,
     "mode=3"),
]


@pytest.mark.parametrize("what,call,error,quoted", FUNCTION_CALLS, ids=[row[0] for row in FUNCTION_CALLS])
def test_other_entry_points_follow_the_rule(what, call, error, quoted):
    with pytest.raises(error) as caught:
        call()
    assert quoted in str(caught.value), f"{what}: {caught.value}"
