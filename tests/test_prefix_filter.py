"""Prefix filtering in the scan: the plan against scipy, the answers against the naive model.

When every detector samples its whole code, a query may skip its longest
postings lists and lower the scan threshold (kernel ``_prefix_plan``); the
exact overlap check then restores the answer. These tests force the plan to
each extreme (``verify_cost`` 0: lower as far as allowed; infinity: never)
and compare every answer with the naive set model, and check the plan's
expected-candidate arithmetic against ``scipy.stats.poisson_binom``.
"""

import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given
from hypothesis import strategies as st

from sparseindex import Codes, Store
from sparseindex._numba import kernels as _kernels
from tests.naive import NaiveStore, hits_as_pairs, noisy_copy, random_code

COSTS = [0.0, 256.0, math.inf]


class SmallBlockStore(Store):
    _block_span = 9


def _rows(rng, count, bits, lo, hi):
    return [random_code(rng, bits, int(rng.integers(lo, hi + 1))) for _ in range(count)]


def _with_cost(store, cost):
    store._bank.verify_cost = cost
    return store


@pytest.mark.parametrize("cost", COSTS)
@pytest.mark.parametrize("store_class", [Store, SmallBlockStore])
@pytest.mark.parametrize("threshold, sample_size", [(3, None), (6, None), (4, 20)])
def test_answers_equal_the_naive_model_at_every_plan(cost, store_class, threshold, sample_size):
    """sample_size=None, or a sample_size no code exceeds: detectors are whole codes, so the plan may lower."""
    rng = np.random.default_rng(threshold * 7 + (sample_size or 0))
    bits = 90
    store = _with_cost(store_class(bits, threshold=threshold, sample_size=sample_size, seed=4), cost)
    naive = NaiveStore(threshold)
    for _ in range(3):
        rows = _rows(rng, int(rng.integers(20, 60)), bits, threshold, 18)
        store.add(rows)
        naive.add(rows)
    store.remove([1, 5, 8])
    naive.remove([1, 5, 8])
    assert store._bank.whole_codes
    queries = _rows(rng, 40, bits, 0, 30) + [noisy_copy(rng, naive.codes[i], bits, 3) for i in (0, 2, 9)]
    for q in queries:
        assert hits_as_pairs(store.query(q)) == naive.query(q)
        assert hits_as_pairs(store.query(q, min_overlap=threshold + 2)) == naive.query(q, threshold + 2)
    for i, h in enumerate(store.query_many(queries)):
        assert hits_as_pairs(h) == naive.query(queries[i])
    store.compact()
    assert store._bank.verify_cost == cost  # a compaction keeps the setting
    for q in queries[:10]:
        assert hits_as_pairs(store.query(q)) == naive.query(q)


def test_sampled_detectors_never_lower_the_threshold():
    """A code heavier than its sample_size: the plan must scan every bit at the full threshold."""
    store = Store(64, threshold=2, sample_size=3, seed=1)
    store.add([[1, 2, 3, 4, 5]])
    assert not store._bank.whole_codes
    q_bits = np.array([1, 2, 3, 4, 5, 9], dtype=np.int64)
    bits, thr = _kernels._prefix_plan(q_bits, store._bank._bit_postings, 1, 2, False, 0.0)
    assert bits.tolist() == q_bits.tolist() and thr == 2


def _plan_by_hand(lengths, n_detectors, threshold, verify_cost):
    """The plan's rule spelled out with scipy.stats.poisson_binom (reference library)."""
    q = len(lengths)
    order = np.argsort(lengths, kind="stable")
    best = (math.inf, q)
    for m in range(q + 1):
        need = threshold - (q - m)
        if need < 1:
            continue
        p = np.minimum(1.0, np.asarray(lengths, dtype=float)[order[:m]] / n_detectors)
        tail = scipy.stats.poisson_binom.sf(need - 1, p) if m else 0.0  # no bits: no count reaches need >= 1
        cost = float(np.sum(np.asarray(lengths)[order[:m]])) + verify_cost * n_detectors * tail
        if cost < best[0] * (1 - 1e-9):
            best = (cost, m)
    return best[1]


@given(
    lengths=st.lists(st.integers(0, 5_000), min_size=1, max_size=30),
    threshold=st.integers(1, 12),
    verify_cost=st.sampled_from([1.0, 16.0, 256.0, 4096.0]),
)
def test_plan_minimises_the_stated_cost(lengths, threshold, verify_cost):
    n_detectors = 10_000
    q_bits = np.arange(len(lengths), dtype=np.int64) * 3
    bit_postings = np.zeros(3 * len(lengths), dtype=np.int64)
    bit_postings[q_bits] = lengths
    bits, thr = _kernels._prefix_plan(q_bits, bit_postings, n_detectors, threshold, True, verify_cost)
    m = bits.shape[0]
    assert thr == threshold - (len(lengths) - m) and thr >= 1
    assert np.all(np.diff(bits) > 0) and set(bits.tolist()) <= set(q_bits.tolist())
    # the scanned bits are the m shortest lists
    assert sorted(bit_postings[bits].tolist()) == sorted(lengths)[:m]
    want = _plan_by_hand(lengths, n_detectors, threshold, verify_cost)
    cost = lambda k: sum(sorted(lengths)[:k]) + verify_cost * n_detectors * (  # noqa: E731
        scipy.stats.poisson_binom.sf(threshold - (len(lengths) - k) - 1,
                                     np.minimum(1.0, np.sort(lengths)[:k] / n_detectors)) if k else 0.0)
    assert math.isclose(cost(m), cost(want), rel_tol=1e-6, abs_tol=1e-6)


def test_a_query_lighter_than_the_threshold_scans_nothing():
    store = Store(128, threshold=5, seed=0)
    store.add([[1, 2, 3, 4, 5, 6]])
    bits, thr = _kernels._prefix_plan(np.array([1, 2, 3], dtype=np.int64), store._bank._bit_postings, 1, 5, True,
                                      256.0)
    assert bits.shape[0] == 0 and thr == 2
    assert len(store.query([1, 2, 3, 4])) == 0


@pytest.mark.jit_only
def test_expected_candidates_match_a_count_on_random_codes():
    """The plan's Poisson-binomial estimate against the candidates actually counted (simulation)."""
    bits, weight, threshold, n = 2048, 40, 20, 200_000
    codes = Codes.random(n, bits, weight, seed=2)
    store = Store(bits, threshold=threshold, seed=3)
    store.add(codes)
    bank = store._bank
    queries = Codes.random(30, bits, weight, seed=9)
    indptr, q_all = queries.to_csr()
    predicted = observed = 0.0
    for i in range(30):
        q_bits = q_all[indptr[i] : indptr[i + 1]]
        chosen, thr = _kernels._prefix_plan(q_bits, bank._bit_postings, n, threshold, True, 16.0)
        count = np.zeros(n, dtype=np.int64)
        for b in chosen:
            count[bank.postings_of(int(b))] += 1
        observed += np.sum(count >= thr)
        p = bank._bit_postings[chosen] / n
        predicted += n * scipy.stats.poisson_binom.sf(thr - 1, p)
    print(f"candidates over 30 queries: predicted {predicted:.1f}, counted {observed:.0f}")
    # fixed-weight codes make bits slightly negatively dependent, so the
    # independent-bits estimate may run a little high, never far off
    assert 0.5 * predicted <= observed + 3 * math.sqrt(predicted) and observed <= 1.5 * predicted + 10
