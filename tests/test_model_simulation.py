"""Monte-Carlo checks of the analytic model (reference: simulation).

Each check draws random codes, detectors and queries with numpy and applies
the detector rule literally -- a detector samples ``sample_size`` of a stored
code's set bits and fires when at least ``threshold`` of them are set in the
query; a code is hit when any detector of its bank fires -- with no
hypergeometric formula involved.  The observed count must lie within 3
standard deviations of the binomial count the model predicts, on small
widths where the rates are 1e-3 .. 1e-1.  Seeded, so the outcome is fixed.

The same checks against the real Store are added alongside the store.
"""

import math

import numpy as np
import pytest

from sparseindex import model

CHUNK = 20_000


def random_subsets(rng, rows, universe, size):
    """Boolean masks (rows x universe) of uniformly random `size`-subsets."""
    if size == 0:
        return np.zeros((rows, universe), dtype=bool)
    u = rng.random((rows, universe))
    kth = np.partition(u, size - 1, axis=1)[:, size - 1]
    return u <= kth[:, None]


def within_3_sigma(count, trials, p):
    sigma = math.sqrt(trials * p * (1 - p))
    return abs(count - trials * p) <= 3 * sigma, (count, trials * p, sigma)


def simulate_code_hits(rng, n, a, q, s, theta, D, trials):
    """Unrelated random queries against one stored code with D detectors."""
    hits = 0
    for start in range(0, trials, CHUNK):
        t = min(CHUNK, trials - start)
        # the stored code is positions 0..a-1 (any fixed code will do: the
        # query is a uniformly random q-subset of all n positions)
        query = random_subsets(rng, t, n, q)
        in_query = query[:, :a]
        fired = np.zeros(t, dtype=bool)
        for _ in range(D):
            sample = random_subsets(rng, t, a, s)               # detector
            fired |= (sample & in_query).sum(axis=1) >= theta
        hits += int(fired.sum())
    return hits


FALSE_HIT_CASES = [
    # n, a, q, s, theta, D, trials
    (128, 16, 16, 8, 4, 1, 60_000),
    (128, 16, 16, 8, 4, 3, 40_000),
    (256, 20, 20, 10, 4, 2, 60_000),
    (96, 12, 12, 12, 5, 1, 60_000),
    (512, 32, 32, 8, 3, 6, 20_000),
    (64, 8, 16, 4, 3, 2, 20_000),      # queries heavier than the codes
    (200, 24, 12, 12, 3, 2, 40_000),   # queries lighter than the codes
]


@pytest.mark.parametrize("n,a,q,s,theta,D,trials", FALSE_HIT_CASES)
def test_false_hit_per_code_by_simulation(n, a, q, s, theta, D, trials):
    # Reference: Monte-Carlo simulation of the detector rule (numpy).
    p = model.false_hit_per_code(n, a, s, theta, D, query_weight=q)
    assert 1e-3 <= p <= 1e-1
    rng = np.random.default_rng([n, a, q, s, theta, D])
    ok, info = within_3_sigma(simulate_code_hits(rng, n, a, q, s, theta, D, trials),
                              trials, p)
    assert ok, info


def test_detector_false_hit_by_simulation():
    # Reference: simulation; one detector of s fixed positions, random query.
    n, s, theta, q, trials = 150, 10, 4, 20, 60_000
    p = model.detector_false_hit(n, s, theta, q)
    assert 1e-3 <= p <= 1e-1
    rng = np.random.default_rng(7)
    count = 0
    for start in range(0, trials, CHUNK):
        t = min(CHUNK, trials - start)
        query = random_subsets(rng, t, n, q)
        count += int((query[:, :s].sum(axis=1) >= theta).sum())
    ok, info = within_3_sigma(count, trials, p)
    assert ok, info


RECALL_CASES = [
    # a, s, theta, D, noise, n, trials
    (20, 10, 5, 1, 0.4, 200, 40_000),
    (20, 10, 5, 3, 0.5, 200, 40_000),
    (30, 12, 6, 2, 0.5, 300, 40_000),
    (40, 8, 4, 4, 0.6, 400, 40_000),
    (24, 6, 3, 2, 0.6, 240, 40_000),
]


@pytest.mark.parametrize("a,s,theta,D,noise,n,trials", RECALL_CASES)
def test_recall_by_simulation(a, s, theta, D, noise, n, trials):
    # Reference: simulation of noisy copies -- drop k random set bits of the
    # stored code, add k random bits outside it -- and of the detector rule.
    k = model.lost_bits(a, noise)
    miss = model.recall(a, s, theta, D, noise, complement=True)
    assert 1e-3 <= miss <= 0.4
    rng = np.random.default_rng([a, s, theta, D, k])
    missed = 0
    for start in range(0, trials, CHUNK):
        t = min(CHUNK, trials - start)
        # stored code = positions 0..a-1; the copy keeps a-k of them and
        # gains k of the positions a..n-1
        kept = random_subsets(rng, t, a, a - k)
        gained = random_subsets(rng, t, n - a, k)
        copy = np.concatenate([kept, gained], axis=1)
        assert np.all(copy.sum(axis=1) == a)
        fired = np.zeros(t, dtype=bool)
        for _ in range(D):
            sample = random_subsets(rng, t, a, s)
            fired |= (sample & copy[:, :a]).sum(axis=1) >= theta
        missed += int((~fired).sum())
    ok, info = within_3_sigma(missed, trials, miss)
    assert ok, info


@pytest.mark.parametrize("n,s,theta,lost", [(200, 20, 15, 20), (100, 10, 6, 20),
                                            (500, 30, 25, 40)])
def test_detector_failure_by_simulation(n, s, theta, lost):
    # Reference: simulation -- kill `lost` random positions; the detector
    # fails when more than s - theta of its positions are dead.
    p = model.detector_failure(n, s, theta, lost)
    assert 1e-3 <= p <= 1e-1
    rng = np.random.default_rng([n, s, theta, lost])
    trials, count = 60_000, 0
    for start in range(0, trials, CHUNK):
        t = min(CHUNK, trials - start)
        dead = random_subsets(rng, t, n, lost)
        detector = random_subsets(rng, t, n, s)
        count += int(((dead & detector).sum(axis=1) > s - theta).sum())
    ok, info = within_3_sigma(count, trials, p)
    assert ok, info


@pytest.mark.parametrize("items", [5, 20])
def test_store_false_hit_by_simulation(items):
    # Reference: simulation of a store of `items` random codes, each with its
    # own bank; an unrelated query counts when it hits any code.
    n, a, s, theta, D = 128, 12, 6, 3, 2
    p = model.store_false_hit(model.false_hit_per_code(n, a, s, theta, D), items)
    assert 1e-3 <= p <= 0.4
    rng = np.random.default_rng(items)
    trials, count = 20_000, 0
    for start in range(0, trials, 5_000):
        t = min(5_000, trials - start)
        query = random_subsets(rng, t, n, a)
        any_hit = np.zeros(t, dtype=bool)
        for _ in range(items):
            code = random_subsets(rng, t, n, a)
            idx = np.argsort(~code, axis=1, kind="stable")[:, :a]
            in_query = np.take_along_axis(query, idx, axis=1)
            for _ in range(D):
                sample = random_subsets(rng, t, a, s)
                any_hit |= (sample & in_query).sum(axis=1) >= theta
        count += int(any_hit.sum())
    ok, info = within_3_sigma(count, trials, p)
    assert ok, info


@pytest.mark.slow
@pytest.mark.parametrize("n,a,q,s,theta,D,trials", [(1024, 32, 32, 16, 5, 4, 300_000),
                                                    (2048, 40, 40, 20, 4, 3, 200_000)])
def test_false_hit_by_long_simulation(n, a, q, s, theta, D, trials):
    # Reference: simulation, rarer events (1e-4 .. 1e-3) with more trials.
    p = model.false_hit_per_code(n, a, s, theta, D, query_weight=q)
    assert 1e-4 <= p <= 1e-2
    rng = np.random.default_rng([n, s, theta, D])
    ok, info = within_3_sigma(simulate_code_hits(rng, n, a, q, s, theta, D, trials),
                              trials, p)
    assert ok, info
