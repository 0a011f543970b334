"""Tests of the usage-aware (conditional Poisson) model in sparseindex.model.

Each check names its reference beside it:

* scipy.stats.hypergeom (reference library): with uniform bit usage the
  usage query is a uniformly random q-subset, so a detector fires with the
  hypergeometric tail;
* brute-force enumeration of every q-subset with fractions.Fraction (Python
  standard library): the exact law of the conditional Poisson query on
  widths of at most 12 bits;
* simulation, seeded: rejection sampling straight from the definition
  (independent Bernoulli bits, kept when exactly q are set) and the
  library's sampler, judged by scipy.stats.chisquare and k-sigma bounds;
* scipy.stats.beta and scipy.stats.binom (reference library), closed forms
  and a textbook value for the Clopper-Pearson interval.
"""

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
from scipy.stats import beta, binom, chisquare, hypergeom

from sparseindex import Codes
from sparseindex.model import (
    UsageFalseHits,
    clopper_pearson,
    clopper_pearson_upper,
    code_fire_probability,
    detector_fire_probability,
    false_hit_per_code,
    inclusion_probabilities,
    sample_usage_queries,
    usage_bernoulli,
    usage_false_hits,
)


# ---------------------------------------------------------------------------
# Exact reference: enumerate every q-subset (fractions.Fraction)
# ---------------------------------------------------------------------------

def exact_query_law(p, q):
    """{subset: exact probability} of Bernoulli(p) bits given q set bits."""
    fp = [Fraction(float(x)) for x in p]          # the doubles, exactly
    weights = {}
    for subset in itertools.combinations(range(len(fp)), q):
        inside = set(subset)
        w = Fraction(1)
        for i, x in enumerate(fp):
            w *= x if i in inside else 1 - x
        if w:
            weights[subset] = w
    total = sum(weights.values())
    return {s: w / total for s, w in weights.items()}


def exact_fire(law, detectors, threshold):
    """Exact chance that some detector in `detectors` has >= threshold set bits."""
    sets = [set(int(b) for b in d) for d in detectors]
    return sum((pr for s, pr in law.items()
                if any(len(d.intersection(s)) >= threshold for d in sets)), Fraction(0))


def rel_err(value, exact):
    exact = float(exact)
    return abs(value - exact) / exact if exact else abs(value)


def zipf(bits, weight, exponent):
    f = 1.0 / np.arange(1, bits + 1) ** exponent
    return f / f.sum() * weight


# ---------------------------------------------------------------------------
# (a) Uniform usage reduces to the hypergeometric tail (scipy.stats.hypergeom)
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("n, s, theta, q", [
    (64, 8, 3, 8),
    (256, 16, 6, 20),
    (1000, 20, 10, 40),
    (2048, 20, 10, 40),
    (2048, 40, 20, 40),
    (2048, 30, 4, 100),
    (4096, 24, 24, 60),
])
def test_uniform_usage_matches_scipy_hypergeom(n, s, theta, q):
    rng = np.random.default_rng(n + s + theta + q)
    detectors = np.array([rng.choice(n, s, replace=False) for _ in range(3)])
    # Any common p gives the same conditional law (only the odds matter);
    # 0.3 is deliberately not q/n.
    for level in (0.3, q / n):
        p = np.full(n, level)
        got = detector_fire_probability(p, detectors, theta, q)
        ref = hypergeom.sf(theta - 1, n, s, q)                    # scipy.stats
        assert np.all(np.abs(got / ref - 1) <= 1e-10), (got, ref)
        quiet = detector_fire_probability(p, detectors, theta, q, complement=True)
        ref_quiet = hypergeom.cdf(theta - 1, n, s, q)              # scipy.stats
        assert np.all(np.abs(quiet / ref_quiet - 1) <= 1e-10)
        logs = detector_fire_probability(p, detectors, theta, q, log=True)
        assert np.all(np.abs(logs - hypergeom.logsf(theta - 1, n, s, q)) <= 1e-9)


def test_unused_bits_leave_a_smaller_uniform_universe():
    # Bits with p = 0 are never set: a uniform q-subset of the used bits,
    # i.e. Hyp(used, s, q) when the detector samples used bits only.
    rng = np.random.default_rng(5)
    n, used, s, theta, q = 600, 400, 12, 4, 30
    p = np.zeros(n)
    on = rng.choice(n, used, replace=False)
    p[on] = 0.2
    det = rng.choice(on, s, replace=False)
    got = detector_fire_probability(p, det, theta, q)
    assert rel_err(got, hypergeom.sf(theta - 1, used, s, q)) <= 1e-10  # scipy.stats


def test_uniform_frequencies_give_uniform_bernoulli_parameters():
    # With uniform frequencies the targets are q/n everywhere and the first
    # iterate is already exact; the result is the representative summing to q.
    p = usage_bernoulli(np.full(500, 0.07), 35)
    assert np.allclose(p, 35 / 500, rtol=1e-13, atol=0)
    assert np.allclose(inclusion_probabilities(p, 35), 35 / 500, rtol=1e-12, atol=0)


def test_aggregate_one_detector_equals_hypergeometric_exactly():
    rng = np.random.default_rng(11)
    n, s, theta, q = 512, 10, 4, 24
    codes = [rng.choice(n, (1, s), replace=False) for _ in range(40)]
    est = usage_false_hits(np.full(n, 0.1), codes, theta, q, items=10**6)
    ref = 10**6 * hypergeom.sf(theta - 1, n, s, q)                 # scipy.stats
    assert abs(est.expected / ref - 1) <= 1e-10
    assert est.stderr <= 1e-9 * est.expected
    assert (est.codes_sampled, est.items, est.bounded_codes) == (40, 10**6, 0)


def test_aggregate_several_detectors_agrees_with_mixture_within_its_error():
    # With uniform usage, the mean over codes whose detectors are random
    # s-subsets of random a-subsets estimates false_hit_per_code (the
    # hypergeometric mixture, itself checked against scipy in test_model.py);
    # it must agree within 3 of its own stated standard errors.
    rng = np.random.default_rng(12)
    n, a, s, theta, D, q = 256, 16, 8, 4, 3, 16
    codes = []
    for _ in range(400):
        code = rng.choice(n, a, replace=False)
        codes.append(np.array([rng.choice(code, s, replace=False) for _ in range(D)]))
    est = usage_false_hits(np.full(n, q / n), codes, theta, q, items=10**7)
    ref = false_hit_per_code(n, a, s, theta, detectors=D)
    print(f"sampled mean {est.per_code:.5e} +- {est.per_code_stderr:.2e}, mixture {ref:.5e}")
    assert est.bounded_codes == 0
    assert abs(est.per_code - ref) <= 3 * est.per_code_stderr


# ---------------------------------------------------------------------------
# (b) Poisson-binomial programmes against brute-force enumeration (Fraction)
# ---------------------------------------------------------------------------

TINY = [
    # bits, q, seed
    (6, 2, 0),
    (9, 4, 1),
    (12, 5, 2),
    (12, 9, 3),
]


@pytest.mark.parametrize("n, q, seed", TINY)
def test_detector_and_inclusion_match_enumeration(n, q, seed):
    rng = np.random.default_rng(seed)
    p = rng.uniform(0.02, 0.98, n)
    law = exact_query_law(p, q)                                    # Fraction
    for s in range(1, min(n, 6) + 1):
        det = np.sort(rng.choice(n, s, replace=False))
        for theta in range(1, s + 1):
            ref = exact_fire(law, [det], theta)
            got = detector_fire_probability(p, det, theta, q)
            quiet = detector_fire_probability(p, det, theta, q, complement=True)
            assert rel_err(got, ref) <= 1e-12, (s, theta, got, float(ref))
            assert rel_err(quiet, 1 - ref) <= 1e-12
    pi = inclusion_probabilities(p, q)
    for i in range(n):
        ref = sum((pr for sub, pr in law.items() if i in sub), Fraction(0))
        assert rel_err(pi[i], ref) <= 1e-12


@pytest.mark.parametrize("n, q, D, theta, seed", [
    (8, 3, 2, 2, 4),
    (10, 4, 3, 2, 5),
    (12, 6, 3, 3, 6),
    (12, 5, 4, 2, 7),
])
def test_code_union_matches_enumeration(n, q, D, theta, seed):
    rng = np.random.default_rng(seed)
    p = rng.uniform(0.05, 0.95, n)
    code = rng.choice(n, 6, replace=False)
    bank = np.array([np.sort(rng.choice(code, 4, replace=False)) for _ in range(D)])
    law = exact_query_law(p, q)                                    # Fraction
    ref = exact_fire(law, bank, theta)
    got = code_fire_probability(p, bank, theta, q)
    assert rel_err(got, ref) <= 1e-12, (got, float(ref))
    assert rel_err(code_fire_probability(p, bank, theta, q, complement=True), 1 - ref) <= 1e-12
    est = usage_false_hits(p, [bank], theta, q, items=1)
    assert rel_err(est.per_code, ref) <= 1e-12 and est.stderr == 0.0


def test_never_and_always_set_bits_match_enumeration():
    p = np.array([0.0, 1.0, 0.3, 0.6, 0.0, 1.0, 0.45, 0.2, 0.9, 0.5])
    law = exact_query_law(p, 5)                                    # Fraction
    assert all(1 in s and 5 in s and 0 not in s and 4 not in s for s in law)
    for det, theta in [([0, 1, 2], 2), ([2, 3, 6, 7], 2), ([4, 8, 9], 1), ([1, 5], 2)]:
        ref = exact_fire(law, [det], theta)
        assert rel_err(detector_fire_probability(p, det, theta, 5), ref) <= 1e-12
    pi = inclusion_probabilities(p, 5)
    assert pi[0] == 0.0 and pi[4] == 0.0 and pi[1] == 1.0 and pi[5] == 1.0
    assert abs(pi.sum() - 5) <= 1e-12


def capped_targets_reference(f, q):
    """q f / sum f with entries above 1 fixed at 1 and the rest rescaled."""
    f = [Fraction(float(x)) for x in f]
    fixed = set()
    while True:
        rest = [i for i in range(len(f)) if i not in fixed and f[i] > 0]
        share = q - len(fixed)
        total = sum(f[i] for i in rest)
        pi = [Fraction(1) if i in fixed else (share * f[i] / total if i in rest else Fraction(0))
              for i in range(len(f))]
        over = [i for i in rest if pi[i] >= 1]
        if not over:
            return pi
        fixed.update(over)


@pytest.mark.parametrize("f, q", [
    ([5, 3, 2, 2, 1, 1, 1, 0.5, 0.25, 0.25], 3),
    ([9, 1, 1, 1, 1, 1, 1, 0, 1, 1, 1, 1], 4),       # one capped bit, one unused
    ([1.0, 0.9, 0.8, 0.1, 0.1, 0.05, 0.05], 3),
])
def test_usage_bernoulli_reaches_target_inclusion(f, q):
    p = usage_bernoulli(f, q)
    law = exact_query_law(p, q)                                    # Fraction
    target = capped_targets_reference(f, q)
    for i in range(len(f)):
        got = sum((pr for sub, pr in law.items() if i in sub), Fraction(0))
        assert abs(float(got) - float(target[i])) <= 1e-9, (i, float(got), float(target[i]))
    assert abs(p.sum() - q) <= 1e-9


# ---------------------------------------------------------------------------
# (c) The sampler (seeded simulation; scipy.stats.chisquare)
# ---------------------------------------------------------------------------

def subset_counts(rows):
    counts = {}
    for r in map(tuple, rows.tolist()):
        counts[r] = counts.get(r, 0) + 1
    return counts


def test_uniform_sampler_gives_uniform_subsets():
    rows = sample_usage_queries(np.full(7, 0.25), 3, 35_000, seed=21)
    counts = subset_counts(rows)
    cells = list(itertools.combinations(range(7), 3))
    assert set(counts) <= set(cells)
    observed = [counts.get(c, 0) for c in cells]
    res = chisquare(observed)                                      # scipy.stats
    assert res.pvalue > 1e-3, res


def test_sampler_matches_exact_law_chisquare():
    rng = np.random.default_rng(22)
    p = rng.uniform(0.05, 0.9, 8)
    p[2], p[6] = 0.0, 1.0
    law = exact_query_law(p, 3)                                    # Fraction
    rows = sample_usage_queries(p, 3, 40_000, seed=23)
    counts = subset_counts(rows)
    assert set(counts) <= set(law)             # never bit 2, always bit 6
    cells = sorted(law)
    observed = np.array([counts.get(c, 0) for c in cells])
    expected = np.array([float(law[c]) for c in cells]) * rows.shape[0]
    res = chisquare(observed, expected * observed.sum() / expected.sum())  # scipy.stats
    assert res.pvalue > 1e-3, res


def test_sampler_inclusion_and_fire_frequencies_within_sigma():
    n, q, count = 64, 8, 20_000
    p = usage_bernoulli(zipf(n, q, 1.2), q)
    rows = sample_usage_queries(p, q, count, seed=24)
    assert rows.shape == (count, q) and np.all(np.diff(rows, axis=1) > 0)
    freq = np.bincount(rows.ravel(), minlength=n)
    pi = inclusion_probabilities(p, q)
    sigma = np.sqrt(count * pi * (1 - pi))
    z = np.where(sigma > 0, (freq - count * pi) / np.where(sigma > 0, sigma, 1), 0)
    # 64 bits at once: 3 sigma per bit would fail 16% of correct runs, so
    # the bound is the Sidak-adjusted 0.1% two-sided level for 64 cells.
    assert np.max(np.abs(z)) <= 4.4, (np.argmax(np.abs(z)), z.max(), z.min())
    dense = Codes.from_indices(rows, bits=n).to_dense()
    rng = np.random.default_rng(25)
    dets = np.array([rng.choice(n, 6, replace=False) for _ in range(4)])
    model_rate = detector_fire_probability(p, dets, 2, q)
    for det, rate in zip(dets, model_rate):
        fired = int((dense[:, det].sum(axis=1) >= 2).sum())
        sd = math.sqrt(count * rate * (1 - rate))
        assert abs(fired - count * rate) <= 3 * sd, (fired, count * rate, sd)


def test_sampler_is_reproducible_and_packs_into_codes():
    p = usage_bernoulli(zipf(300, 20, 1.0), 20)
    a = sample_usage_queries(p, 20, 50, seed=7)
    b = sample_usage_queries(p, 20, 50, seed=np.random.default_rng(7))
    assert np.array_equal(a, b)
    codes = Codes.from_indices(a, bits=300)
    assert codes.weights.tolist() == [20] * 50
    assert sample_usage_queries(p, 20, 0, seed=1).shape == (0, 20)


# ---------------------------------------------------------------------------
# (d) A Zipf-skewed store: usage-aware prediction against simulation
# ---------------------------------------------------------------------------

def rejection_queries(rng, p, q, wanted):
    """Bernoulli(p) rows kept when exactly q bits are set: the definition."""
    out = []
    got = 0
    while got < wanted:
        draws = rng.random((40_000, p.size)) < p
        keep = draws[draws.sum(axis=1) == q]
        out.append(keep)
        got += keep.shape[0]
    return np.concatenate(out)[:wanted]


@pytest.mark.parametrize("detectors, theta", [(1, 6), (2, 6)])
def test_zipf_store_prediction_matches_simulation_not_uniform_model(detectors, theta):
    n, a, s, m = 256, 16, 8, 300
    f = zipf(n, a, 1.1)                        # Zipf law, exponent 1.1 >= 1
    p = usage_bernoulli(f, a)
    rng = np.random.default_rng(30 + detectors)
    stored = sample_usage_queries(p, a, m, seed=31)      # codes follow the usage
    banks = [np.array([np.sort(rng.choice(code, s, replace=False)) for _ in range(detectors)])
             for code in stored]
    est = usage_false_hits(p, banks, theta, a, items=m)
    assert est.bounded_codes == 0 and est.stderr == 0.0
    # Simulation reference: rejection sampling of the query from its definition.
    queries = rejection_queries(np.random.default_rng(32), p, a, 20_000).astype(np.float32)
    hit = np.zeros((queries.shape[0], m), dtype=bool)
    for d in range(detectors):
        member = np.zeros((n, m), dtype=np.float32)
        for j, bank in enumerate(banks):
            member[bank[d], j] = 1.0
        hit |= (queries @ member) >= theta
    per_query = hit.sum(axis=1)
    observed = per_query.mean() / m
    se = per_query.std(ddof=1) / math.sqrt(per_query.size) / m
    uniform = false_hit_per_code(n, a, s, theta, detectors=detectors)  # hypergeometric
    print(f"D={detectors}: simulated {observed:.4e} +- {se:.1e}, usage-aware "
          f"{est.per_code:.4e}, uniform hypergeometric {uniform:.4e}")
    assert abs(observed - est.per_code) <= 3 * se
    assert est.per_code > 2 * uniform and observed > 2 * uniform


# ---------------------------------------------------------------------------
# Store-level aggregate: bounds and sampling error
# ---------------------------------------------------------------------------

def test_aggregate_falls_back_to_union_bound_when_too_large():
    rng = np.random.default_rng(40)
    n, q, theta = 128, 12, 2
    p = usage_bernoulli(zipf(n, q, 1.0), q)
    banks = [np.array([rng.choice(n, 5, replace=False) for _ in range(3)]) for _ in range(6)]
    exact = usage_false_hits(p, banks, theta, q, items=6)
    bounded = usage_false_hits(p, banks, theta, q, items=6, exact_limit=10)
    assert exact.bounded_codes == 0 and bounded.bounded_codes == 6
    sums = [min(1.0, float(detector_fire_probability(p, b, theta, q).sum())) for b in banks]
    assert abs(bounded.per_code - np.mean(sums)) <= 1e-12
    assert bounded.per_code >= exact.per_code
    one = [code_fire_probability(p, b, theta, q) for b in banks]
    assert abs(exact.per_code - np.mean(one)) <= 1e-15
    with pytest.raises(ValueError, match="exact_limit=10"):
        code_fire_probability(p, banks[0], theta, q, exact_limit=10)


def test_aggregate_standard_error_is_the_finite_population_formula():
    rng = np.random.default_rng(41)
    n, q, theta = 200, 10, 2
    p = usage_bernoulli(zipf(n, q, 1.0), q)
    banks = [rng.choice(n, (1, 6), replace=False) for _ in range(30)]
    values = np.array([code_fire_probability(p, b, theta, q) for b in banks])
    est = usage_false_hits(p, banks, theta, q, items=1000)
    # textbook simple-random-sampling variance (1 - m/N) S^2 / m
    se = math.sqrt((1 - 30 / 1000) * values.var(ddof=1) / 30)
    assert isinstance(est, UsageFalseHits)
    assert abs(est.per_code_stderr - se) <= 1e-12 * se
    assert abs(est.expected - 1000 * values.mean()) <= 1e-9
    assert math.isnan(usage_false_hits(p, banks[:1], theta, q, items=5).stderr)


# ---------------------------------------------------------------------------
# (e) Clopper-Pearson (scipy.stats.beta, scipy.stats.binom, closed forms)
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("x, n", [(0, 1), (0, 50), (1, 50), (7, 50), (25, 50),
                                  (49, 50), (50, 50), (3, 100_000), (120, 10_000)])
@pytest.mark.parametrize("conf", [0.9, 0.95, 0.99])
def test_clopper_pearson_against_scipy(x, n, conf):
    low, high = clopper_pearson(x, n, conf)
    alpha = 1 - conf
    # scipy.stats.beta quantiles
    ref_low = 0.0 if x == 0 else beta.ppf(alpha / 2, x, n - x + 1)
    ref_high = 1.0 if x == n else beta.ppf(1 - alpha / 2, x + 1, n - x)
    assert abs(low - ref_low) <= 1e-14 and abs(high - ref_high) <= 1e-14
    # the defining property, by scipy.stats.binom tails
    if x > 0:
        assert abs(binom.sf(x - 1, n, low) / (alpha / 2) - 1) <= 1e-7
    if x < n:
        assert abs(binom.cdf(x, n, high) / (alpha / 2) - 1) <= 1e-7
        up = clopper_pearson_upper(x, n, conf)
        assert abs(binom.cdf(x, n, up) / alpha - 1) <= 1e-7
    # closed forms: Beta(1, n) and Beta(n, 1) quantiles
    if x == 0:
        assert abs(high - (1 - (alpha / 2) ** (1 / n))) <= 1e-12
        assert abs(clopper_pearson_upper(0, n, conf) - (1 - alpha ** (1 / n))) <= 1e-12
    if x == n:
        assert abs(low - (alpha / 2) ** (1 / n)) <= 1e-12 and high == 1.0


def test_clopper_pearson_textbook_values():
    # 5 successes in 10 trials: the 95% exact interval 0.187 .. 0.813, a
    # value frequently tabulated in textbooks (quoted from memory).
    low, high = clopper_pearson(5, 10)
    assert round(low, 3) == 0.187 and round(high, 3) == 0.813
    # The "rule of three" (Hanley & Lippman-Hand, JAMA 1983): with no event
    # in n trials the one-sided 95% upper bound is about 3/n.
    assert abs(clopper_pearson_upper(0, 10_000) * 10_000 - 3) <= 0.01


# ---------------------------------------------------------------------------
# (f) Bad input: ValueError quoting the offending value
# ---------------------------------------------------------------------------

P8 = np.full(8, 0.25)

BAD = [
    (lambda: detector_fire_probability([0.1, 1.5, 0.2], [0], 1, 1), r"p\[1\]=1\.5 must be a probability"),
    (lambda: detector_fire_probability([0.1, np.nan], [0], 1, 1), r"p\[1\]=nan"),
    (lambda: detector_fire_probability(0.5, [0], 1, 1), r"1-D array .* got 0\.5"),
    (lambda: detector_fire_probability(P8, [0, 9], 1, 2), r"bit index 9, out of range for 8 bits"),
    (lambda: detector_fire_probability(P8, [0, -1], 1, 2), r"bit index -1"),
    (lambda: detector_fire_probability(P8, [1.5, 2], 1, 2), r"bit index 1\.5, not an integer"),
    (lambda: detector_fire_probability(P8, [[0, 1], [3, 3]], 1, 2), r"detector 1 repeats bit index 3"),
    (lambda: detector_fire_probability(P8, [0, 1], 3, 2), r"threshold=3 exceeds the 2 sampled bits"),
    (lambda: detector_fire_probability(P8, [0, 1], 0, 2), r"threshold=0 must be >= 1"),
    (lambda: detector_fire_probability(P8, [0, 1], 1, 9), r"query_weight=9 is impossible"),
    (lambda: detector_fire_probability(P8, [0, 1], 1, -2), r"query_weight=-2 must be >= 0"),
    (lambda: detector_fire_probability(P8, [0, 1], 1, 2.5), r"query_weight=2\.5 must be a whole number"),
    (lambda: detector_fire_probability([1, 1, 1, 0.5], [0], 1, 2), r"query_weight=2 is impossible: 3 bits"),
    (lambda: usage_bernoulli([1, -2, 3], 1), r"frequencies\[1\]=-2\.0 must be finite"),
    (lambda: usage_bernoulli([0, 0, 0], 1), r"all zero"),
    (lambda: usage_bernoulli([1, 0, 1], 3), r"query_weight=3 is impossible: only 2"),
    (lambda: sample_usage_queries(P8, 2, -1), r"count=-1 must be >= 0"),
    (lambda: usage_false_hits(P8, [], 1, 2, items=3), r"codes must be a non-empty"),
    (lambda: usage_false_hits(P8, [np.array([[0, 1]])] * 4, 1, 2, items=3),
     r"items=3 is smaller than the 4 sampled codes"),
    (lambda: usage_false_hits(P8, [np.array([0, 1])], 1, 2, items=3), r"codes\[0\] must be a 2-D"),
    (lambda: usage_false_hits(P8, [np.array([[0, 1]])], 1, 2, items=0), r"items=0 must be >= 1"),
    (lambda: clopper_pearson(11, 10), r"hits=11 must be <= trials=10"),
    (lambda: clopper_pearson(1, 0), r"trials=0 must be >= 1"),
    (lambda: clopper_pearson(1, 10, 1.5), r"confidence=1\.5 must be between 0 and 1"),
    (lambda: clopper_pearson_upper(-1, 10), r"hits=-1 must be >= 0"),
]


@pytest.mark.parametrize("call, message", BAD)
def test_bad_input_raises_value_error_quoting_the_value(call, message):
    with pytest.raises(ValueError, match=message):
        call()
