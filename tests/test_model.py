"""Tests of sparseindex.model against references outside the project.

Each check names its reference in a comment:

* scipy.stats.hypergeom (reference library; used here only, never in the
  model itself),
* exact rational arithmetic with math.comb and fractions.Fraction (Python
  standard library),
* the published Table 1 of Ahmad & Hawkins (arXiv:1601.00720, 2016),
* facts of the trade (common practice, no published source).
"""

import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.stats import hypergeom

from sparseindex import model
from sparseindex.model import hypergeometric
from sparseindex.model import (
    PlanError,
    code_limit,
    detector_failure,
    detector_false_hit,
    false_hit_per_code,
    lost_bits,
    recall,
    store_false_hit,
)

WIDTHS = [64, 100, 256, 1000, 2048, 10_000, 65_536, 100_000]


# ---------------------------------------------------------------------------
# Exact references: math.comb + fractions.Fraction (Python standard library)
# ---------------------------------------------------------------------------

def exact_hyp_sf(N, K, d, theta):
    """P[Hyp(N, K, d) >= theta] as a Fraction."""
    top = sum(math.comb(K, j) * math.comb(N - K, d - j)
              for j in range(max(theta, 0), min(K, d) + 1))
    return Fraction(top, math.comb(N, d))


def exact_mixture(n, a, q, s, theta, D):
    """The full mixture over the overlap, in exact rationals."""
    total = Fraction(0)
    for z in range(0, min(a, q) + 1):
        w = Fraction(math.comb(a, z) * math.comb(n - a, q - z), math.comb(n, q))
        if w == 0:
            continue
        t = exact_hyp_sf(a, z, s, theta)
        total += w * (1 - (1 - t) ** D)
    return total


def exact_log(fr):
    """Natural log of a positive Fraction of huge integers (math.log of ints)."""
    return math.log(fr.numerator) - math.log(fr.denominator)


def rel(value, ref):
    return abs(value - ref) / abs(ref)


# ---------------------------------------------------------------------------
# scipy.stats.hypergeom grid (reference library)
# ---------------------------------------------------------------------------

def _grid(n, rng):
    """(s, theta, q) triples covering small, middle and large values."""
    caps = sorted({1, 2, 3, 5, 8, 13, 40, 100, 300, 1000, 2000, n // 3, n // 2, n})
    caps = [c for c in caps if 1 <= c <= n]
    out = []
    for s in caps:
        for q in sorted({0, 1, s, max(1, n // 50), n // 10, n // 2, n - 1, n}):
            if not 0 <= q <= n:
                continue
            for theta in sorted({1, 2, max(1, s // 4), max(1, s // 2), s - 1, s}):
                if 1 <= theta <= s:
                    out.append((s, theta, q))
        # random points too
        for _ in range(6):
            q = int(rng.integers(0, n + 1))
            theta = int(rng.integers(1, s + 1))
            out.append((s, theta, q))
    return np.array(out, dtype=np.int64)


@pytest.mark.parametrize("n", WIDTHS)
def test_detector_false_hit_matches_scipy_sf(n):
    # Reference: scipy.stats.hypergeom.sf (Boost's hypergeometric), relative
    # error <= 1e-9 wherever the value exceeds 1e-300.
    rng = np.random.default_rng(1000 + n)
    g = _grid(n, rng)
    s, theta, q = g[:, 0], g[:, 1], g[:, 2]
    ours = detector_false_hit(n, s, theta, q)         # vectorised call
    ref = hypergeom.sf(theta - 1, n, s, q)
    big = ref > 1e-300
    assert big.sum() > 20
    err = np.abs(ours[big] - ref[big]) / ref[big]
    assert err.max() <= 1e-9, g[big][np.argmax(err)]
    # where the reference is exactly 0, so is the model (or it is < 1e-300)
    assert np.all(ours[ref == 0] < 1e-300)


@pytest.mark.parametrize("n", WIDTHS)
def test_log_tails_match_scipy_logsf(n):
    # Reference: scipy.stats.hypergeom.logsf, including tails far below the
    # smallest double.  scipy's own log tail sums log-gamma differences, good
    # to about 1e-9 in the log at n = 1e5, hence the tolerance.
    rng = np.random.default_rng(2000 + n)
    g = _grid(n, rng)
    s, theta, q = g[:, 0], g[:, 1], g[:, 2]
    ref = hypergeom.logsf(theta - 1, n, s, q)
    keep = np.isfinite(ref)
    ours = detector_false_hit(n, s[keep], theta[keep], q[keep], log=True)
    tol = 1e-9 * np.maximum(1.0, np.abs(ref[keep]))
    assert np.all(np.abs(ours - ref[keep]) <= tol)


@pytest.mark.parametrize("n", [100, 2048, 100_000])
def test_detector_failure_matches_scipy(n):
    # Reference: scipy.stats.hypergeom.sf -- fails when more than s - theta
    # of the s sampled positions are among the `lost` dead ones.
    rng = np.random.default_rng(n)
    s = rng.integers(1, min(n, 400) + 1, size=200)
    theta = np.array([rng.integers(1, x + 1) for x in s])
    lost = rng.integers(0, n + 1, size=200)
    lost[:50] = rng.integers(0, max(2, n // 50), size=50)
    ours = detector_failure(n, s, theta, lost)
    ref = hypergeom.sf(s - theta, n, lost, s)
    big = ref > 1e-300
    assert np.all(np.abs(ours[big] - ref[big]) <= 1e-9 * ref[big])


@pytest.mark.parametrize("a", [10, 40, 300, 2000])
def test_recall_one_detector_matches_scipy(a):
    # Reference: scipy.stats.hypergeom.sf / cdf for the kept sampled bits
    # Hyp(a, a - k, s); the miss chance against the cdf (lower tail).
    rng = np.random.default_rng(a)
    s = rng.integers(1, a + 1, size=100)
    theta = np.array([rng.integers(1, x + 1) for x in s])
    noise = rng.uniform(0, 0.95, size=100)
    k = np.ceil(noise * a - 1e-9)
    ours = recall(a, s, theta, 1, noise)
    ref = hypergeom.sf(theta - 1, a, a - k, s)
    big = ref > 1e-300
    assert np.all(np.abs(ours[big] - ref[big]) <= 1e-9 * ref[big])
    miss = recall(a, s, theta, 1, noise, complement=True)
    ref_miss = hypergeom.cdf(theta - 1, a, a - k, s)
    big = ref_miss > 1e-300
    assert np.all(np.abs(miss[big] - ref_miss[big]) <= 1e-9 * ref_miss[big])


# ---------------------------------------------------------------------------
# Exact rational arithmetic (math.comb + fractions.Fraction)
# ---------------------------------------------------------------------------

MIXTURE_CASES = [
    # n, a, q, s, theta, D
    (64, 8, 8, 4, 2, 2),
    (64, 8, 8, 8, 3, 1),
    (64, 8, 20, 5, 4, 3),
    (100, 10, 10, 10, 5, 1),
    (100, 10, 6, 7, 3, 4),
    (200, 20, 20, 10, 5, 3),
    (256, 16, 16, 16, 16, 1),
    (256, 16, 30, 12, 6, 8),
    (500, 30, 25, 12, 6, 8),
    (2048, 40, 40, 20, 10, 4),
    (2048, 40, 40, 40, 12, 2),
    (1000, 50, 200, 25, 10, 5),
    (60, 30, 30, 15, 9, 3),      # dense: half the bits set
    (40, 40, 40, 10, 10, 2),     # every bit set: always fires
    (128, 20, 0, 5, 1, 2),       # empty query: never fires
]


@pytest.mark.parametrize("n,a,q,s,theta,D", MIXTURE_CASES)
def test_false_hit_per_code_matches_exact_mixture(n, a, q, s, theta, D):
    # Reference: exact rational arithmetic (math.comb + fractions.Fraction)
    # of the full mixture over the overlap, to 1e-12 relative.
    ref = exact_mixture(n, a, q, s, theta, D)
    ours = false_hit_per_code(n, a, s, theta, D, query_weight=q)
    if ref == 0:
        assert ours == 0.0
    else:
        assert rel(ours, float(ref)) <= 1e-12


@pytest.mark.parametrize("n,a,q,s,theta,D", MIXTURE_CASES[:10])
def test_mixture_path_with_one_detector_matches_exact(n, a, q, s, theta, D):
    # Reference: exact rationals; exercises the mixture code itself with
    # D = 1 (the public function takes the shorter equal sum for D = 1).
    ref = exact_mixture(n, a, q, s, theta, 1)
    ours = float(np.exp(hypergeometric.log_mixture(n, a, q, s, theta, 1))[0])
    assert rel(ours, float(ref)) <= 1e-12


RECALL_CASES = [
    # a, s, theta, D, noise
    (10, 5, 3, 1, 0.3),
    (10, 5, 3, 4, 0.3),
    (20, 10, 4, 2, 0.5),
    (40, 20, 10, 4, 0.5),
    (40, 20, 12, 3, 0.25),
    (40, 40, 20, 1, 0.4),
    (60, 12, 2, 8, 0.8),
    (100, 30, 9, 5, 0.6),
    (30, 10, 3, 2, 0.1),      # 0.1 * 30 -> exactly 3 bits lost
    (25, 25, 25, 1, 0.0),     # no noise: always recalled
]


@pytest.mark.parametrize("a,s,theta,D,noise", RECALL_CASES)
def test_recall_matches_exact(a, s, theta, D, noise):
    # Reference: exact rational arithmetic (math.comb + fractions.Fraction):
    # r1 = P[Hyp(a, a-k, s) >= theta], r = 1 - (1 - r1)^D; also the miss.
    k = math.ceil(Fraction(noise).limit_denominator(1000) * a)
    r1 = exact_hyp_sf(a, a - k, s, theta)
    miss = (1 - r1) ** D
    assert lost_bits(a, noise) == k
    assert rel(recall(a, s, theta, D, noise), float(1 - miss)) <= 1e-12
    got = recall(a, s, theta, D, noise, complement=True)
    if miss == 0:
        assert got == 0.0
    else:
        assert rel(got, float(miss)) <= 1e-12


@pytest.mark.parametrize("n,s,theta,q", [
    (100_000, 40, 40, 2000),       # C(2000,40)/C(100000,40) ~ 1e-68
    (100_000, 300, 200, 2000),     # ~ 1e-263
    (65_536, 1000, 900, 5000),     # ~ 1e-904, below any double
    (10 ** 6, 2000, 100, 2000),    # width one million
    (10 ** 6, 64, 30, 20_000),
])
def test_deep_tails_match_exact_integers(n, s, theta, q):
    # Reference: exact integer arithmetic (math.comb), logs taken of the big
    # integers; tails down to 1e-900, in log space.
    ref = exact_log(exact_hyp_sf(n, s, q, theta))
    ours = detector_false_hit(n, s, theta, q, log=True)
    assert abs(ours - ref) <= 1e-12 * max(1.0, abs(ref))


@pytest.mark.parametrize("n,a,q,s,theta,D", [
    (2048, 200, 200, 100, 90, 3),
    (4096, 300, 250, 150, 140, 8),
    (1000, 100, 100, 100, 100, 2),
])
def test_deep_mixture_matches_exact_in_log_space(n, a, q, s, theta, D):
    # Reference: exact rational arithmetic of the full mixture, where the
    # chance is far below 1e-100; compared in log space.
    ref = exact_log(exact_mixture(n, a, q, s, theta, D))
    assert ref < math.log(1e-80)
    ours = false_hit_per_code(n, a, s, theta, D, query_weight=q, log=True)
    assert abs(ours - ref) <= 1e-12 * abs(ref)


def test_store_false_hit_and_code_limit_exact():
    # Reference: exact rational arithmetic for 1 - (1 - p)^M.
    for p, M in [(Fraction(1, 10**6), 1000), (Fraction(1, 3), 5),
                 (Fraction(1, 10**20), 10**5), (Fraction(7, 10**9), 123_456)]:
        if M < 10**4:
            ref = 1 - (1 - p) ** M
        else:
            # binomial series sum_j (-1)^(j+1) C(M, j) p^j, exact rationals;
            # with M p < 1e-3 eight terms leave less than 1e-24 relative.
            ref = sum((-1) ** (j + 1) * math.comb(M, j) * p ** j for j in range(1, 9))
        assert rel(store_false_hit(float(p), M), float(ref)) <= 1e-12
    # code_limit: exact largest M with 1 - (1-p)^M <= F, checked by Fraction
    for p, F in [(Fraction(1, 10), Fraction(1, 2)), (Fraction(1, 1000), Fraction(1, 100)),
                 (Fraction(3, 100), Fraction(1, 5))]:
        M = code_limit(float(p), float(F))
        assert 1 - (1 - p) ** M <= F < 1 - (1 - p) ** (M + 1)


# ---------------------------------------------------------------------------
# Published table: Ahmad & Hawkins (2016), Table 1
# ---------------------------------------------------------------------------

# Ahmad & Hawkins, "How do neurons operate on sparse distributed
# representations? A mathematical theory of sparsity, neurons and weight
# dendrites", arXiv:1601.00720 (2016), Table 1: chance that a random pattern
# of `a` weight cells out of n matches a dendritic sample_size of s synapses at
# threshold theta.  These are the values as reproduced from that table in
# public notes; each was confirmed by exact integer arithmetic (below).
AHMAD_HAWKINS_TABLE_1 = [
    # n, a, s, theta, published value
    (100_000, 2000, 6, 6, 6.3531e-11),
    (100_000, 2000, 8, 8, 2.5251e-14),
    (100_000, 2000, 10, 10, 1.00163e-17),
    (100_000, 2000, 12, 6, 5.2939e-8),     # s = 2 theta
    (100_000, 2000, 16, 8, 2.8172e-10),
    (100_000, 2000, 20, 10, 1.54193e-12),
    (100_000, 2000, 24, 12, 8.5869e-15),
    (10_000, 300, 24, 12, 8.37585e-13),
]


@pytest.mark.parametrize("n,a,s,theta,published", AHMAD_HAWKINS_TABLE_1)
def test_published_table_ahmad_hawkins_2016(n, a, s, theta, published):
    # Reference: Ahmad & Hawkins 2016, Table 1 (arXiv:1601.00720), to 1e-4.
    ours = detector_false_hit(n, s, theta, a)
    assert rel(ours, published) <= 1e-4
    # the same number as a one-detector store code queried by a random code
    assert false_hit_per_code(n, a, s, theta, 1) == ours
    # and the exact integer value confirms the reproduced table entry
    assert rel(float(exact_hyp_sf(n, s, a, theta)), published) <= 1e-4


# ---------------------------------------------------------------------------
# Facts of the trade (common practice, no published source)
# ---------------------------------------------------------------------------

def test_fact_random_code_rarely_fires_a_detector():
    # Common practice, no published source: 2,000-bit codes with 40 set bits,
    # detectors of 20 sampled bits and threshold 12 -- a random code fires a
    # detector with a chance below 1e-11.
    assert detector_false_hit(2000, 20, 12, 40) < 1e-11
    assert false_hit_per_code(2000, 40, 20, 12, 1) < 1e-11


def test_fact_dead_bits_rarely_disable_a_detector():
    # Common practice, no published source: losing 1% of the bit positions
    # at random disables such a detector with a chance below 1e-12.
    assert detector_failure(2000, 20, 12, 20) < 1e-12


def test_fact_number_of_distinct_codes():
    # Common practice, no published source: about 2,000 bits with 40 set
    # give of the order of 10^84 distinct codes.  The model agrees: a random
    # code equals a given one with chance 1 / C(2000, 40).
    assert 84 <= round(math.log10(math.comb(2000, 40))) <= 84
    log10_match = detector_false_hit(2000, 40, 40, 40, log=True) / math.log(10)
    assert abs(log10_match + math.log10(math.comb(2000, 40))) < 1e-9


# ---------------------------------------------------------------------------
# Behaviour: identities, vectorisation, no cancellation
# ---------------------------------------------------------------------------

def test_sample_size_none_means_all_bits_and_query_defaults_to_weight():
    assert false_hit_per_code(500, 20, None, 8, 1) == detector_false_hit(500, 20, 8, 20)
    assert false_hit_per_code(500, 20, 10, 4, 3, query_weight=None) == \
        false_hit_per_code(500, 20, 10, 4, 3, query_weight=20)
    assert recall(20, None, 15, 1, 0.2) == recall(20, 20, 15, 1, 0.2)


def test_vectorised_equals_scalar():
    s = np.array([[5, 10, 20], [8, 16, 40]])
    th = np.array([3, 5, 7])
    v = false_hit_per_code(2048, 40, s, th, np.array([[1], [3]]))
    assert v.shape == (2, 3)
    for i in range(2):
        for j in range(3):
            assert v[i, j] == pytest.approx(
                false_hit_per_code(2048, 40, int(s[i, j]), int(th[j]), [1, 3][i]),
                rel=1e-13)
    r = recall(40, s, th, 2, np.array([[0.1], [0.5]]))
    assert r.shape == (2, 3)
    assert isinstance(recall(40, 20, 5), float)
    assert isinstance(code_limit(1e-12, 1e-6), int)
    assert code_limit(np.array([1e-12, 0.0]), 1e-6).dtype == np.float64


def test_log_outputs_agree_and_stay_finite_far_below_doubles():
    v = false_hit_per_code(10**6, 2000, 200, 150, 4, log=True)
    assert np.isfinite(v) and v < -745           # below the smallest double
    assert false_hit_per_code(10**6, 2000, 200, 150, 4) == 0.0
    lv = false_hit_per_code(2048, 40, 20, 8, 3, log=True)
    assert lv == pytest.approx(math.log(false_hit_per_code(2048, 40, 20, 8, 3)), rel=1e-14)
    lr = recall(40, 20, 10, 4, 0.5, log=True)
    assert lr == pytest.approx(math.log(recall(40, 20, 10, 4, 0.5)), rel=1e-13)


def test_no_cancellation_in_complements():
    # 1 - (1 - x)^M with x = 1e-20 would round to 0 by subtraction.
    assert store_false_hit(1e-20, 10) == pytest.approx(1e-19, rel=1e-15)
    assert store_false_hit(-2000.0, 10**6, log=True) == pytest.approx(
        -2000.0 + math.log(10**6), rel=1e-15)
    # recall rounds to 1, the miss chance stays exact (exact rationals)
    assert recall(40, 20, 5, 8, 0.5) == 1.0
    miss = recall(40, 20, 5, 8, 0.5, complement=True)
    ref = (1 - exact_hyp_sf(40, 20, 20, 5)) ** 8
    assert 0 < miss < 1e-25
    assert rel(miss, float(ref)) <= 1e-12
    # a bank of 8 detectors with tiny t: 1-(1-t)^8 ~ 8t
    assert code_limit(1e-300, 0.5) == pytest.approx(math.log(2) / 1e-300, rel=1e-12)
    assert code_limit(-1000.0, 0.5, log=True) == math.inf


def test_mixture_lies_between_one_detector_and_union_bound():
    for args in [(2048, 40, 20, 10), (1000, 50, 25, 10), (10**5, 2000, 30, 10)]:
        p1 = detector_false_hit(args[0], args[2], args[3], args[1])
        for D in (2, 3, 8):
            p = false_hit_per_code(*args, D)
            assert p1 <= p <= D * p1 * (1 + 1e-12)


# ---------------------------------------------------------------------------
# Input checks: ValueError quoting the value
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("call,message", [
    (lambda: detector_false_hit(2048, 20, 0, 40), r"threshold=0 must be >= 1"),
    (lambda: detector_false_hit(2048, 20, 21, 40), r"threshold=21 must be <= sample_size=20"),
    (lambda: detector_false_hit(0, 1, 1, 0), r"bits=0 must be >= 1"),
    (lambda: detector_false_hit(2048, 20, 5, 3000), r"query_weight=3000 must be <= bits=2048"),
    (lambda: detector_false_hit(2048, 20, 5, -1), r"query_weight=-1 must be >= 0"),
    (lambda: detector_false_hit(2048, 2.5, 1, 40), r"sample_size=2.5 must be an integer"),
    (lambda: detector_false_hit(2048, float("nan"), 1, 40), r"sample_size=nan must be an integer"),
    (lambda: false_hit_per_code(100, 200, 10, 5), r"weight=200 must be <= bits=100"),
    (lambda: false_hit_per_code(100, 0, 10, 5), r"weight=0 must be >= 1"),
    (lambda: false_hit_per_code(100, 20, 30, 5), r"sample_size=30 must be <= weight=20"),
    (lambda: false_hit_per_code(100, 20, 10, 5, 0), r"detectors=0 must be >= 1"),
    (lambda: false_hit_per_code(100, 20, [10, 12], [5, 13]),
     r"threshold=13 must be <= sample_size=12"),
    (lambda: recall(40, 20, 5, 1, 1.0), r"noise=1.0 must be < 1"),
    (lambda: recall(40, 20, 5, 1, -0.1), r"noise=-0.1 must be >= 0"),
    (lambda: recall(40, 20, 5, 1, float("nan")), r"noise=nan must be a number"),
    (lambda: detector_failure(100, 10, 5, 101), r"lost=101 must be <= bits=100"),
    (lambda: store_false_hit(1.5, 10), r"per_code=1.5 must be <= 1"),
    (lambda: store_false_hit(-0.5, 10), r"per_code=-0.5 must be >= 0"),
    (lambda: store_false_hit(0.1, -3), r"items=-3 must be >= 0"),
    (lambda: store_false_hit(0.5, 3, log=True), r"per_code=0.5 must be <= 0"),
    (lambda: code_limit(1e-9, 0.0), r"false_hit=0.0 must be > 0"),
    (lambda: code_limit(1e-9, 1.0), r"false_hit=1.0 must be < 1"),
])
def test_bad_input_raises_value_error_quoting_the_value(call, message):
    with pytest.raises(ValueError, match=message):
        call()


@pytest.mark.parametrize("call, message", [
    (lambda: detector_false_hit(2048, True, 1, 40), r"sample_size=True must be an integer"),
    (lambda: detector_false_hit(2048, "20", 1, 40), r"sample_size='20' must be an integer"),
])
def test_a_wrong_type_raises_type_error_quoting_the_value(call, message):
    with pytest.raises(TypeError, match=message):
        call()


def test_plan_error_is_a_value_error():
    assert issubclass(PlanError, ValueError)


# ---------------------------------------------------------------------------
# Properties (hypothesis, seeded through the profile's derandomize)
# ---------------------------------------------------------------------------

small_code = st.integers(min_value=2, max_value=60).flatmap(
    lambda a: st.tuples(st.integers(min_value=a, max_value=4 * a + 200),
                        st.just(a), st.integers(min_value=1, max_value=a)))


@settings(max_examples=60, deadline=None, derandomize=True)
@given(small_code, st.integers(min_value=1, max_value=5), st.data())
def test_monotone_in_threshold_and_detectors(code, D, data):
    n, a, s = code
    theta = data.draw(st.integers(min_value=1, max_value=s))
    noise = data.draw(st.floats(min_value=0.0, max_value=0.9))
    p = false_hit_per_code(n, a, s, theta, D)
    r = recall(a, s, theta, D, noise)
    if theta < s:
        # false hits and recall both fall as the threshold rises
        assert false_hit_per_code(n, a, s, theta + 1, D) <= p * (1 + 1e-12)
        assert recall(a, s, theta + 1, D, noise) <= r + 1e-15
    # and both rise with the detector count
    assert false_hit_per_code(n, a, s, theta, D + 1) >= p * (1 - 1e-12)
    assert recall(a, s, theta, D + 1, noise) >= r - 1e-15


@settings(max_examples=60, deadline=None, derandomize=True)
@given(small_code, st.integers(min_value=1, max_value=4), st.data())
def test_recall_monotone_in_noise(code, D, data):
    _, a, s = code
    theta = data.draw(st.integers(min_value=1, max_value=s))
    lo = data.draw(st.floats(min_value=0.0, max_value=0.95))
    hi = data.draw(st.floats(min_value=lo, max_value=0.99))
    assert recall(a, s, theta, D, hi) <= recall(a, s, theta, D, lo) + 1e-15
    m_hi = recall(a, s, theta, D, hi, complement=True)
    m_lo = recall(a, s, theta, D, lo, complement=True)
    assert m_hi >= m_lo * (1 - 1e-12)


@settings(max_examples=80, deadline=None, derandomize=True)
@given(st.floats(min_value=1e-30, max_value=0.5),
       st.floats(min_value=1e-12, max_value=0.9),
       st.integers(min_value=0, max_value=10**9))
def test_store_false_hit_and_code_limit_properties(p, F, items):
    # grows with the number of items, is at most M p
    f = store_false_hit(p, items)
    assert f <= store_false_hit(p, items + 1)
    assert f <= items * p * (1 + 1e-12)
    # the limit is the largest count within the target, by store_false_hit
    m = code_limit(p, F)
    assert store_false_hit(p, m) <= F
    if m < 2**52:
        assert store_false_hit(p, m + 1) > F
    # the limit grows with the target and shrinks with the per-code chance
    assert code_limit(p, min(0.99, F * 2)) >= m
    assert code_limit(min(1.0, p * 2), F) <= m
