"""The real Store's false-hit and recall rates against scipy.stats.hypergeom.

Reference: scipy.stats.hypergeom (general-purpose library). Parameters are
chosen so the rates are near 1e-2 (false hits) and 0.3-0.5 (recall), where
the counts are large; every check is within 3 sigma of the binomial count.

Why the binomial variance holds for the false-hit count over (code, query)
pairs: by symmetry the chance that a pair hits is the same whatever the
query (or the code and its samples) is, so events of pairs that share a
query or a code are still independent, pairwise, and variances add.
"""

import math

import numpy as np
import pytest
from scipy.stats import hypergeom

from sparseindex import Codes, Store

pytestmark = pytest.mark.jit_only


def reference_false_hit_per_code(bits, weight, query_weight, sample_size, threshold, detectors):
    """Mixture over the overlap z ~ Hyp(bits, weight, q); per detector Hyp(weight, z, sample_size) >= threshold."""
    z = np.arange(0, min(weight, query_weight) + 1)
    p_overlap = hypergeom.pmf(z, bits, weight, query_weight)
    p_detector = hypergeom.sf(threshold - 1, weight, z, sample_size)
    p_any = 1.0 - (1.0 - p_detector) ** detectors
    return float(np.sum(p_overlap * p_any))


def reference_recall(weight, sample_size, threshold, detectors, lost):
    r1 = hypergeom.sf(threshold - 1, weight, weight - lost, sample_size)
    return 1.0 - (1.0 - r1) ** detectors


def within_3_sigma(count, trials, p):
    sigma = math.sqrt(trials * p * (1 - p))
    return abs(count - trials * p) <= 3 * sigma, f"observed {count}, expected {trials * p:.1f} +- {3 * sigma:.1f}"


@pytest.mark.parametrize("sample_size, threshold, detectors", [(8, 3, 1), (8, 3, 2)])
def test_false_hit_rate_of_random_queries(sample_size, threshold, detectors):
    bits, weight = 256, 16
    store = Store(bits, threshold=threshold, sample_size=sample_size, detectors=detectors, seed=17)
    store.add(Codes.random(4000, bits, weight, seed=1))
    queries = Codes.random(500, bits, weight, seed=2)
    hits = store.query_many(queries)
    p = reference_false_hit_per_code(bits, weight, weight, sample_size, threshold, detectors)
    ok, msg = within_3_sigma(len(hits.ids), 4000 * 500, p)
    assert ok, msg


@pytest.mark.parametrize("sample_size, threshold, detectors", [(8, 3, 1), (8, 3, 2)])
def test_recall_of_noisy_copies(sample_size, threshold, detectors):
    """A copy that lost 12 of 16 bits (replaced from outside the code) hits its source with rate r."""
    bits, weight, lost, n = 256, 16, 12, 6000
    codes = Codes.random(n, bits, weight, seed=3)
    store = Store(bits, threshold=threshold, sample_size=sample_size, detectors=detectors, seed=19)
    store.add(codes)
    rng = np.random.default_rng(4)
    dense = codes.to_dense()
    noisy = dense.copy()
    for i in range(n):
        on = np.flatnonzero(dense[i])
        off = np.flatnonzero(~dense[i])
        noisy[i, rng.choice(on, lost, replace=False)] = False
        noisy[i, rng.choice(off, lost, replace=False)] = True
    batch = store.query_many(noisy)
    recalled = sum(int(i in set(batch[i].ids.tolist())) for i in range(n))
    p = reference_recall(weight, sample_size, threshold, detectors, lost)
    ok, msg = within_3_sigma(recalled, n, p)
    assert ok, msg


def test_store_built_for_a_target_meets_the_model():
    """A store from Store.for_target, run on small widths, against the project's own model.

    The model (sparseindex.model) is itself checked against scipy.stats and
    exact rationals in tests/test_model.py; here the real Store must agree
    with it within 3 sigma for false hits of random queries and for recall
    of noisy copies.
    """
    from sparseindex import SaturationWarning, model

    bits, weight, noise = 256, 16, 0.25
    store = Store.for_target(bits, weight, false_hit=0.5, capacity=300, noise=noise, recall=0.9, seed=23)
    chosen = store.plan
    assert chosen.recall >= 0.9 and chosen.false_hit_per_query <= 0.5
    codes = Codes.random(3000, bits, weight, seed=24)
    with pytest.warns(SaturationWarning):  # 3,000 codes is past this plan's limit, on purpose
        store.add(codes)
    queries = Codes.random(2000, bits, weight, seed=25)
    p_code = model.false_hit_per_code(bits, weight, chosen.sample_size, chosen.threshold, chosen.detectors)
    ok, msg = within_3_sigma(len(store.query_many(queries).ids), 3000 * 2000, p_code)
    assert ok, msg
    lost = math.ceil(noise * weight)
    rng = np.random.default_rng(26)
    dense = codes.to_dense()
    for i in range(len(codes)):
        on, off = np.flatnonzero(dense[i]), np.flatnonzero(~dense[i])
        dense[i, rng.choice(on, lost, replace=False)] = False
        dense[i, rng.choice(off, lost, replace=False)] = True
    batch = store.query_many(dense)
    recalled = sum(int(i in set(batch[i].ids.tolist())) for i in range(len(codes)))
    r = model.recall(weight, chosen.sample_size, chosen.threshold, chosen.detectors, noise=noise)
    ok, msg = within_3_sigma(recalled, len(codes), r)
    assert ok, msg
