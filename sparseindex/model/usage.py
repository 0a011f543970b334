"""The usage-aware model: conditional Poisson queries over measured bit usage.

The derivation is in ``docs/model.md``, section "Non-uniform bit usage".
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from .checks import check_count, fmt, real_param, short
from .._numba.usage import cps_suffix_table, cps_inclusion, cps_draw, union_fire


# -- input checks for the usage-aware functions ------------------------------

def _per_bit(value, name, what):
    """Return ``value`` as a non-empty 1-D float64 array, or raise."""
    if isinstance(value, (bool, np.bool_)) or np.ndim(value) != 1:
        raise ValueError(f"{name} must be a 1-D array of {what}, got {short(value)}")
    arr = np.asarray(value)
    if arr.dtype == np.bool_ or arr.dtype.kind not in "iuf":
        raise TypeError(f"{name} must hold numbers, got dtype {arr.dtype}")
    if arr.size == 0:
        raise ValueError(f"{name} must not be empty (one entry per bit)")
    return arr.astype(np.float64)


def _check_probabilities(p):
    """Return ``p`` as a 1-D float64 array of probabilities, or raise."""
    arr = _per_bit(p, "p", "per-bit probabilities")
    bad = np.flatnonzero(~(arr >= 0.0) | ~(arr <= 1.0))
    if bad.size:
        i = int(bad[0])
        raise ValueError(f"p[{i}]={fmt(arr[i])} must be a probability in [0, 1]")
    return arr


def _check_query_weight(query_weight, p):
    q = check_count("query_weight", query_weight)
    forced = int(np.count_nonzero(p == 1.0))
    possible = int(np.count_nonzero(p > 0.0))
    if q > possible:
        raise ValueError(f"query_weight={q} is impossible: only {possible} of the "
                         f"{p.size} bits have p > 0")
    if q < forced:
        raise ValueError(f"query_weight={q} is impossible: {forced} bits have "
                         "p == 1 and are always set")
    return q


def _bit_rows(rows, bits, what):
    """Flatten detector samples to (indptr, flat int64); check every entry.

    ``rows`` is a 1-D index array (one detector), a 2-D array (one detector
    a row) or a sequence of 1-D index sequences.  Returns ``(indptr, flat,
    single)`` with ``single`` True for one 1-D detector.
    """
    if isinstance(rows, np.ndarray) and rows.ndim in (1, 2):
        single = rows.ndim == 1
        mat = rows.reshape(1, -1) if single else rows
        pieces = None
        lengths = np.full(mat.shape[0], mat.shape[1], dtype=np.int64)
        flat = mat.reshape(-1)
    elif isinstance(rows, (list, tuple)) and rows and all(
            np.ndim(r) == 0 for r in rows):
        return _bit_rows(np.asarray(rows), bits, what)
    elif isinstance(rows, (list, tuple)):
        single = False
        pieces = [np.asarray(r) for r in rows]
        for k, r in enumerate(pieces):
            if r.ndim != 1:
                raise ValueError(f"{what}: detector {k} must be a 1-D index "
                                 f"sequence, got shape {r.shape}")
        lengths = np.array([r.size for r in pieces], dtype=np.int64)
        flat = (np.concatenate(pieces) if pieces else np.zeros(0, dtype=np.int64))
    else:
        raise ValueError(f"{what} must be an index array or a sequence of index "
                         f"arrays, got {short(rows)}")
    if lengths.size == 0:
        raise ValueError(f"{what} must hold at least one detector")
    indptr = np.zeros(lengths.size + 1, dtype=np.int64)
    np.cumsum(lengths, out=indptr[1:])
    if flat.size and (flat.dtype == np.bool_ or flat.dtype.kind not in "iuf"):
        raise ValueError(f"{what}: bit indices must be integers, got dtype {flat.dtype}")
    det = np.repeat(np.arange(lengths.size), lengths)
    if flat.size and flat.dtype.kind == "f":
        bad = np.flatnonzero(~np.isfinite(flat) | (flat != np.floor(flat)))
        if bad.size:
            i = int(bad[0])
            raise ValueError(f"{what}: detector {int(det[i])} has bit index "
                             f"{fmt(flat[i])}, not an integer")
    bad = np.flatnonzero((flat < 0) | (flat >= bits))
    if bad.size:
        i = int(bad[0])
        raise ValueError(f"{what}: detector {int(det[i])} has bit index "
                         f"{fmt(flat[i])}, out of range for {bits} bits "
                         f"(valid 0..{bits - 1})")
    flat = flat.astype(np.int64)
    order = np.lexsort((flat, det))
    sf, sd = flat[order], det[order]
    dup = np.flatnonzero((sf[1:] == sf[:-1]) & (sd[1:] == sd[:-1]))
    if dup.size:
        i = int(dup[0])
        raise ValueError(f"{what}: detector {int(sd[i])} repeats bit index {int(sf[i])}")
    return indptr, flat, single


def _check_thresholds(threshold, indptr, what):
    theta = check_count("threshold", threshold, minimum=1)
    sizes = np.diff(indptr)
    short = np.flatnonzero(sizes < theta)
    if short.size:
        k = int(short[0])
        raise ValueError(f"threshold={theta} exceeds the {int(sizes[k])} sampled "
                         f"bits of {what} {k}: it could never fire")
    return theta


def _logit(p):
    with np.errstate(divide="ignore"):
        return np.log(p) - np.log1p(-p)


def _expit_pair(x):
    """(1 / (1 + e^-x), 1 / (1 + e^x)), each without cancellation."""
    with np.errstate(over="ignore"):
        pos = x >= 0
        e = np.exp(np.where(pos, -x, x))      # in (0, 1]
        big = 1.0 / (1.0 + e)
        small = e / (1.0 + e)
    return np.where(pos, big, small), np.where(pos, small, big)


def _centre(logodds, q):
    """Bernoulli pair (p, 1 - p) with the given odds up to a common factor
    and sum(p) == q (the representative used by every computation).

    Bits with log-odds -inf stay at p = 0, +inf at p = 1.  The shift is
    found by a safeguarded Newton iteration; its precision does not affect
    the conditional law, only how well the tables are scaled.
    """
    x = np.asarray(logodds, dtype=np.float64)
    pt = np.where(x == np.inf, 1.0, 0.0)
    qt = 1.0 - pt
    free = np.isfinite(x)
    need = q - int(np.count_nonzero(x == np.inf))
    nfree = int(np.count_nonzero(free))
    if need == 0 or nfree == 0:
        return pt, qt
    if need == nfree:
        pt[free] = 1.0
        qt[free] = 0.0
        return pt, qt
    xf = x[free]
    base = math.log(need / (nfree - need))
    lo, hi = base - float(xf.max()), base - float(xf.min())
    t = base - float(np.median(xf))
    t = min(max(t, lo), hi)
    for _ in range(200):
        a, b = _expit_pair(xf + t)
        g = float(a.sum()) - need
        if abs(g) <= 1e-9 * need:
            break
        if g > 0:
            hi = t
        else:
            lo = t
        slope = float((a * b).sum())
        step = t - g / slope if slope > 0 else 0.5 * (lo + hi)
        t = step if lo < step < hi else 0.5 * (lo + hi)
    a, b = _expit_pair(xf + t)
    pt[free] = a
    qt[free] = b
    return pt, qt


def _centred(p, q):
    """The centred Bernoulli pair for validated probabilities ``p``."""
    return _centre(_logit(p), q)


def _fire_masses(pt, qt, code_ptr, det_ptr, flat, q, theta):
    fires, quiet = union_fire(pt, qt, code_ptr, det_ptr, flat, int(q), int(theta))
    return fires, quiet


def _ratio(part, other, log):
    """part / (part + other), or its log, from two non-negative masses."""
    with np.errstate(divide="ignore", invalid="ignore"):
        if log:
            return np.log(part) - np.log(part + other)
        return part / (part + other)


# -- public usage-aware model ------------------------------------------------

def inclusion_probabilities(p, query_weight):
    """Chance that each bit is set in a conditional-Poisson query.

    The query sets independent Bernoulli(``p[i]``) bits and is conditioned on
    exactly ``query_weight`` set bits.  Bit i is then set with chance
    ``pi_i = p_i P[S_-i = q - 1] / P[S = q]`` (S_-i: the count over the other
    bits); the values sum to ``query_weight``.

    Parameters
    ----------
    p : array_like, shape (bits,)
        Bernoulli parameters, ``0 <= p[i] <= 1``.  Only the odds matter, up
        to one common factor.
    query_weight : int
        Set bits of the query q.

    Returns
    -------
    ndarray, shape (bits,)

    Notes
    -----
    Forward and backward Poisson-binomial tables (kernels
    ``cps_suffix_table`` and ``cps_inclusion``), O(bits * q) time and
    ``8 (bits + 1)(q + 1)`` bytes.  Each probability is a ratio of two sums
    of positive terms, so none is formed by subtraction.

    Examples
    --------
    >>> inclusion_probabilities([0.5, 0.5, 0.5, 0.5], 2).tolist()
    [0.5, 0.5, 0.5, 0.5]
    >>> inclusion_probabilities([0.1, 0.5, 0.9], 1).round(6).tolist()  # odds 1/9 : 1 : 9
    [0.010989, 0.098901, 0.89011]
    """
    p = _check_probabilities(p)
    q = _check_query_weight(query_weight, p)
    pt, qt = _centred(p, q)
    on, off = cps_inclusion(pt, qt, cps_suffix_table(pt, qt, q), q)
    with np.errstate(invalid="ignore"):
        return np.where(on + off > 0, on / (on + off), 0.0)


def _capped_targets(f, q):
    """Inclusion targets q f / sum f, capped at 1 with the rest rescaled."""
    pi = np.zeros(f.size)
    capped = np.zeros(f.size, dtype=bool)
    while True:
        free = ~capped & (f > 0)
        share = q - int(np.count_nonzero(capped))
        pi[free] = share * f[free] / f[free].sum() if share > 0 else 0.0
        over = free & (pi >= 1.0)
        if not np.any(over):
            break
        capped |= over
        pi[capped] = 1.0
    return pi


def usage_bernoulli(frequencies, query_weight, *, tol=1e-10, max_iter=200):
    """Bernoulli parameters of the usage query for measured bit frequencies.

    Returns ``p`` such that the conditional-Poisson query of weight
    ``query_weight`` built on ``p`` (independent Bernoulli(p_i) bits given
    exactly q set bits) sets bit i with chance proportional to its
    frequency: ``pi_i = q f_i / sum(f)``.  Where that exceeds 1 the bit is
    always set (``pi_i = 1``) and the other targets are rescaled to keep the
    sum q.  Bits with ``f_i = 0`` are never set.

    Parameters
    ----------
    frequencies : array_like, shape (bits,)
        Per-bit usage: the fraction of stored codes with bit i set, or raw
        counts (only proportions matter).  Non-negative, not all zero.
    query_weight : int
        Set bits of the query q; at most the number of used bits.
    tol : float, optional
        Stop when every log-odds of the achieved inclusion probability is
        within ``tol`` of its target.
    max_iter : int, optional
        Iteration limit; RuntimeError beyond it.

    Returns
    -------
    ndarray, shape (bits,)
        The Bernoulli parameters, scaled so that ``p.sum() == query_weight``
        (the odds are unique up to a common factor; this picks one).

    Notes
    -----
    Chen, Dempster & Liu (Biometrika 81, 1994) show that the conditional
    Poisson design is the maximum-entropy fixed-size design and that it
    reaches any inclusion probabilities 0 < pi_i < 1 summing to q, with odds
    unique up to a common factor.  The odds are found here by the fixed-point
    iteration ``logit p <- logit p + logit pi - logit pi(p)``, each step one
    call of :func:`inclusion_probabilities`' kernels (O(bits * q)).  With
    uniform frequencies the first step is already exact: every p_i = q/bits.

    Examples
    --------
    >>> usage_bernoulli([1, 1, 1, 1], 2).tolist()
    [0.5, 0.5, 0.5, 0.5]
    >>> p = usage_bernoulli([4, 2, 1, 1], 2)
    >>> inclusion_probabilities(p, 2).round(9).tolist()
    [1.0, 0.5, 0.25, 0.25]
    """
    f = _check_frequencies(frequencies)
    q = check_count("query_weight", query_weight)
    used = int(np.count_nonzero(f > 0))
    if q > used:
        raise ValueError(f"query_weight={q} is impossible: only {used} of the "
                         f"{f.size} bits are used (frequency > 0)")
    tol = float(real_param("tol", tol))
    if not tol > 0:
        raise ValueError(f"tol={tol!r} must be > 0")
    max_iter = check_count("max_iter", max_iter, minimum=1)
    pi = _capped_targets(f, q)
    free = (pi > 0) & (pi < 1)
    target = _logit(pi)
    x = target.copy()
    for _ in range(max_iter):
        pt, qt = _centre(x, q)
        if not np.any(free):
            return pt
        on, off = cps_inclusion(pt, qt, cps_suffix_table(pt, qt, q), q)
        achieved = np.log(on[free]) - np.log(off[free])
        gap = target[free] - achieved
        if float(np.max(np.abs(gap))) <= tol:
            return pt
        x[free] = x[free] + gap
    raise RuntimeError(f"usage_bernoulli did not converge in max_iter={max_iter} "
                       f"steps (largest log-odds gap {float(np.max(np.abs(gap))):.3g})")


def _check_frequencies(frequencies):
    """Return per-bit usage as a float64 array (finite, >= 0, not all 0)."""
    f = _per_bit(frequencies, "frequencies", "per-bit usage")
    bad = np.flatnonzero(~np.isfinite(f) | (f < 0))
    if bad.size:
        i = int(bad[0])
        raise ValueError(f"frequencies[{i}]={fmt(f[i])} must be finite and >= 0")
    if not np.any(f > 0):
        raise ValueError("frequencies are all zero: no bit is used")
    return f


def detector_fire_probability(p, sampled_bits, threshold, query_weight, *,
                              log=False, complement=False):
    """Chance that a detector fires for a conditional-Poisson query.

    The query sets independent Bernoulli(``p[i]``) bits conditioned on
    exactly ``query_weight`` set bits; the detector fires when at least
    ``threshold`` of its ``sampled_bits`` are set:
    ``P[T >= threshold | S = q]`` with T the count over the sampled bits and
    S the count over all bits.

    Parameters
    ----------
    p : array_like, shape (bits,)
        Per-bit Bernoulli parameters (e.g. from :func:`usage_bernoulli`).
    sampled_bits : array_like
        One detector's distinct bit indices (1-D), or several detectors: a
        2-D array with one detector a row, or a sequence of index arrays.
    threshold : int
        Firing threshold, ``1 <= threshold <=`` every detector's sample size.
    query_weight : int
        Set bits of the query q.
    log : bool, optional
        Return the natural logarithm.
    complement : bool, optional
        Return ``P[T < threshold | S = q]`` instead, computed directly.

    Returns
    -------
    float for one 1-D detector, else ndarray of one value per detector.

    Notes
    -----
    Exact Poisson-binomial dynamic programming (kernel ``union_fire``):
    ``P[T = t, S = q] = P[T = t] P[R = q - t]`` with R the count over the
    other bits, whose distribution (truncated at q) is convolved directly
    over those bits rather than deconvolved from the all-bits distribution,
    so every number is a sum of positive terms.  The chance and its
    complement are both ratios of such sums.  O(bits * q) per detector.
    Results below about 1e-300 underflow to 0 (the hypergeometric functions
    reach further for uniform bits).

    With all ``p`` equal the query is a uniformly random q-subset and the
    value equals ``detector_false_hit(bits, len(sampled_bits), threshold,
    q)``.

    Examples
    --------
    >>> from sparseindex.model import detector_false_hit
    >>> p = np.full(1536, 30 / 1536)
    >>> f"{detector_fire_probability(p, np.arange(20), 10, 30):.6e}"
    '2.516507e-13'
    >>> f"{detector_false_hit(1536, 20, 10, 30):.6e}"
    '2.516507e-13'
    >>> hot = p.copy(); hot[:20] = 0.5   # the detector samples busy bits
    >>> f"{detector_fire_probability(hot, np.arange(20), 10, 30):.4f}"
    '0.3016'
    """
    p = _check_probabilities(p)
    q = _check_query_weight(query_weight, p)
    indptr, flat, single = _bit_rows(sampled_bits, p.size, "sampled_bits")
    theta = _check_thresholds(threshold, indptr, "detector")
    pt, qt = _centred(p, q)
    code_ptr = np.arange(indptr.size, dtype=np.int64)
    fires, quiet = _fire_masses(pt, qt, code_ptr, indptr, flat, q, theta)
    out = _ratio(quiet, fires, log) if complement else _ratio(fires, quiet, log)
    return float(out[0]) if single else out


def _union_work(code_ptr, det_ptr, theta):
    """Cells the exact joint programme updates per code (an upper bound)."""
    nd = np.diff(code_ptr)
    sampled = np.diff(det_ptr[code_ptr])
    with np.errstate(over="ignore"):
        states = np.power(float(theta), nd.astype(np.float64))
    return states * (sampled + 1.0) * sampled, nd


def code_fire_probability(p, detector_bits, threshold, query_weight, *,
                          log=False, complement=False, exact_limit=1 << 24):
    """Chance that at least one detector of one stored code fires.

    All detectors of a code see the same query, so their events are
    dependent; this computes the union exactly by a joint dynamic programme
    over the code's sampled bits.

    Parameters
    ----------
    p : array_like, shape (bits,)
        Per-bit Bernoulli parameters of the query.
    detector_bits : array_like
        The code's detector samples, shape (detectors, sample) as
        ``Store.detector_bits(id)`` returns, or a sequence of index arrays.
    threshold : int
        Firing threshold.
    query_weight : int
        Set bits of the query q.
    log, complement : bool, optional
        As in :func:`detector_fire_probability`.
    exact_limit : int, optional
        Refuse (ValueError) when the joint programme would update more than
        this many cells; :func:`usage_false_hits` then falls back to a bound.

    Returns
    -------
    float

    Notes
    -----
    The programme tracks each detector's count below ``threshold``
    (``threshold**detectors`` states plus one absorbing "fired" state) and
    the number of set bits among the union U of the samples, then joins the
    Poisson-binomial count of the bits outside U (kernel ``union_fire``).
    Cost O(bits * q + threshold**D * |U| * min(|U|, q)).

    Examples
    --------
    >>> p = np.full(64, 8 / 64)
    >>> bank = np.array([[0, 1, 2, 3], [2, 3, 4, 5]])
    >>> both = code_fire_probability(p, bank, 2, 8)
    >>> one = detector_fire_probability(p, bank, 2, 8)
    >>> bool(one.max() < both < one.sum())
    True
    """
    p = _check_probabilities(p)
    q = _check_query_weight(query_weight, p)
    indptr, flat, _ = _bit_rows(detector_bits, p.size, "detector_bits")
    theta = _check_thresholds(threshold, indptr, "detector")
    code_ptr = np.array([0, indptr.size - 1], dtype=np.int64)
    limit = check_count("exact_limit", exact_limit, minimum=1)
    work, nd = _union_work(code_ptr, indptr, theta)
    if nd[0] > 62 or work[0] > limit:
        raise ValueError(f"the exact union of {int(nd[0])} detectors at "
                         f"threshold={theta} needs about {work[0]:.3g} cell "
                         f"updates, above exact_limit={limit}")
    pt, qt = _centred(p, q)
    fires, quiet = _fire_masses(pt, qt, code_ptr, indptr, flat, q, theta)
    out = _ratio(quiet, fires, log) if complement else _ratio(fires, quiet, log)
    return float(out[0])


def sample_usage_queries(p, query_weight, count, *, seed=None):
    """Draw exact conditional-Poisson queries.

    Each query sets independent Bernoulli(``p[i]``) bits conditioned on
    exactly ``query_weight`` set bits.

    Parameters
    ----------
    p : array_like, shape (bits,)
        Per-bit Bernoulli parameters (e.g. from :func:`usage_bernoulli`).
    query_weight : int
        Set bits per query q.
    count : int
        Number of queries.
    seed : int, numpy.random.Generator or None, optional
        Randomness (``numpy.random.default_rng(seed)``).

    Returns
    -------
    ndarray of int64, shape (count, query_weight)
        Sorted bit indices, one query a row:
        ``Codes.from_indices(result, bits=len(p))`` packs them.

    Notes
    -----
    Sequential method (see Chen & Liu, Statistica Sinica 7, 1997): with r
    bits still to place among bits l..n-1, bit l is set with chance
    ``p_l B[l+1, r-1] / B[l, r]``, B the suffix Poisson-binomial table
    (kernel ``cps_draw``).  One uniform number per set bit locates the next
    set bit by inverting its distribution.  O(bits * q) once for the table,
    then O(bits) per query.

    Examples
    --------
    >>> rows = sample_usage_queries(np.full(100, 0.05), 5, 3, seed=1)
    >>> rows.shape, bool(np.all(np.diff(rows, axis=1) > 0))
    ((3, 5), True)
    """
    p = _check_probabilities(p)
    q = _check_query_weight(query_weight, p)
    count = check_count("count", count)
    rng = np.random.default_rng(seed)
    pt, qt = _centred(p, q)
    table = cps_suffix_table(pt, qt, q)
    out = np.empty((count, q), dtype=np.int64)
    chunk = 4096
    for start in range(0, count, chunk):
        stop = min(count, start + chunk)
        uniforms = 1.0 - rng.random((stop - start, q))   # in (0, 1]
        out[start:stop] = cps_draw(pt, qt, table, q, uniforms)
    return out


@dataclasses.dataclass(frozen=True)
class UsageFalseHits:
    """Expected false hits per unrelated query, estimated from sampled codes.

    Attributes
    ----------
    expected : float
        ``items * per_code``: expected number of stored codes hit by one
        unrelated usage query.
    stderr : float
        Standard error of ``expected`` from sampling the codes.
    per_code : float
        Mean over the sampled codes of P[at least one detector fires].
    per_code_stderr : float
        Its standard error (sample standard deviation / sqrt(m), with the
        finite-population factor sqrt(1 - m / items)); NaN when m = 1 < items.
    codes_sampled : int
        m, the number of codes evaluated.
    items : int
        N, the number of stored codes the estimate is scaled to.
    bounded_codes : int
        Sampled codes whose union was too large to compute exactly and was
        replaced by the upper bound ``min(1, sum of detector chances)``; 0
        means every value is exact (then the estimate is unbiased, otherwise
        it errs high).
    per_code_low, per_code_high : float
        A 95% interval for ``per_code`` by the percentile bootstrap of the
        sample mean (Efron, "Bootstrap methods: another look at the
        jackknife", Ann. Statist. 1979; ``BOOTSTRAP_RESAMPLES`` resamples, a
        fixed seed, so a function of the sampled values only). Per-code
        chances spread over orders of magnitude, where mean ± 3 standard
        errors can reach below zero; the bootstrap bounds stay inside the
        values' range. Both equal ``per_code`` when every code was evaluated.

    Examples
    --------
    Two stored codes of 6 bits each, one detector over all six (threshold
    3), queries of 8 bits drawn evenly from 256:

    >>> p = usage_bernoulli(np.full(256, 8 / 256), 8)
    >>> codes = [np.array([[0, 1, 2, 3, 4, 5]]), np.array([[10, 11, 12, 13, 14, 15]])]
    >>> e = usage_false_hits(p, codes, 3, 8, items=100)
    >>> e.codes_sampled, e.items, e.bounded_codes, f"{e.per_code:.3g}", f"{e.expected:.3g}"
    (2, 100, 0, '0.000387', '0.0387')
    """

    expected: float
    stderr: float
    per_code: float
    per_code_stderr: float
    codes_sampled: int
    items: int
    bounded_codes: int
    per_code_low: float = math.nan
    per_code_high: float = math.nan


def _codes_csr(codes, bits):
    """(code_ptr, det_ptr, flat) for a sequence of per-code detector arrays."""
    if isinstance(codes, np.ndarray) and codes.ndim == 3:
        codes = list(codes)
    if not isinstance(codes, (list, tuple)) or not codes:
        raise ValueError("codes must be a non-empty sequence of per-code detector "
                         f"arrays (detectors, sample), got {short(codes)}")
    rows = []
    code_ptr = np.zeros(len(codes) + 1, dtype=np.int64)
    for k, code in enumerate(codes):
        arr = code if isinstance(code, (list, tuple)) else np.asarray(code)
        if isinstance(arr, np.ndarray) and arr.ndim == 2:
            rows.extend(arr)
            code_ptr[k + 1] = code_ptr[k] + arr.shape[0]
        elif isinstance(arr, (list, tuple)) and arr and all(np.ndim(r) == 1 for r in arr):
            rows.extend(np.asarray(r) for r in arr)
            code_ptr[k + 1] = code_ptr[k] + len(arr)
        else:
            raise ValueError(f"codes[{k}] must be a 2-D array (detectors, sample), "
                             f"got {short(code)}")
        if code_ptr[k + 1] == code_ptr[k]:
            raise ValueError(f"codes[{k}] has no detectors")
    det_ptr, flat, _ = _bit_rows(rows, bits, "codes")
    return code_ptr, det_ptr, flat


def _per_code_chances(p, q, code_ptr, det_ptr, flat, theta, exact):
    """Each sampled code's chance that a detector fires: exact where ``exact``, else the union bound."""
    m = code_ptr.size - 1
    pt, qt = _centred(p, q)
    values = np.empty(m)
    if np.all(exact):
        fires, quiet = _fire_masses(pt, qt, code_ptr, det_ptr, flat, q, theta)
        values[:] = _ratio(fires, quiet, False)
    elif np.any(exact):
        sel = np.flatnonzero(exact)
        sub_ptr, sub_det, sub_flat = _sub_codes(code_ptr, det_ptr, flat, sel)
        fires, quiet = _fire_masses(pt, qt, sub_ptr, sub_det, sub_flat, q, theta)
        values[sel] = _ratio(fires, quiet, False)
    if not np.all(exact):
        sel = np.flatnonzero(~exact)
        sub_ptr, sub_det, sub_flat = _sub_codes(code_ptr, det_ptr, flat, sel)
        singles = np.arange(sub_det.size, dtype=np.int64)
        fires, quiet = _fire_masses(pt, qt, singles, sub_det, sub_flat, q, theta)
        each = _ratio(fires, quiet, False)
        sums = np.add.reduceat(each, sub_ptr[:-1])
        values[sel] = np.minimum(1.0, sums)
    return values


def usage_false_hits(p, codes, threshold, query_weight, items, *,
                     exact_limit=1 << 20):
    """Estimate the expected false hits per unrelated query of a whole store.

    For each of m sampled stored codes, the chance that at least one of its
    detectors fires for a conditional-Poisson query on ``p`` (see
    :func:`code_fire_probability`); their mean times ``items`` is the
    expected number of false hits per query, with a standard error from the
    spread over the sample.

    Parameters
    ----------
    p : array_like, shape (bits,)
        Per-bit Bernoulli parameters of the query (e.g. from
        :func:`usage_bernoulli`).
    codes : sequence of array_like
        Detector samples of m stored codes, each of shape (detectors,
        sample) as ``Store.detector_bits(id)`` returns, drawn as a simple
        random sample without replacement of the stored codes.
    threshold : int
        Firing threshold of the store.
    query_weight : int
        Set bits of the query q.
    items : int
        N, the number of stored codes, ``>= m``.
    exact_limit : int, optional
        Largest joint programme (cells updated) computed exactly per code;
        larger codes use the upper bound ``min(1, sum_d P[detector d
        fires])`` and are counted in ``bounded_codes``.

    Returns
    -------
    UsageFalseHits

    Notes
    -----
    The mean per-code chance of a simple random sample is unbiased for the
    store's mean, with variance ``(1 - m/N) S^2 / m`` (S^2 the sample
    variance); with all N codes passed the standard error is 0.  The
    expected count is exact by linearity even though hits on different
    codes are dependent through the shared query, and it bounds the chance
    of at least one false hit from above.  Cost O(m * bits * q) plus the
    joint programmes.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> codes = [rng.choice(256, size=(1, 8), replace=False) for _ in range(50)]
    >>> est = usage_false_hits(np.full(256, 16 / 256), codes, 3, 16, items=10_000)
    >>> f"{est.expected:.4f}", est.stderr < 1e-9, est.codes_sampled
    ('93.2187', True, 50)
    >>> from sparseindex.model import detector_false_hit
    >>> f"{10_000 * detector_false_hit(256, 8, 3, 16):.4f}"  # uniform bits
    '93.2187'
    """
    p = _check_probabilities(p)
    q = _check_query_weight(query_weight, p)
    items = check_count("items", items, minimum=1)
    code_ptr, det_ptr, flat = _codes_csr(codes, p.size)
    m = code_ptr.size - 1
    if m > items:
        raise ValueError(f"items={items} is smaller than the {m} sampled codes")
    theta = _check_thresholds(threshold, det_ptr, "detector")
    limit = check_count("exact_limit", exact_limit, minimum=1)
    work, nd = _union_work(code_ptr, det_ptr, theta)
    exact = (work <= limit) & (nd <= 62)
    values = _per_code_chances(p, q, code_ptr, det_ptr, flat, theta, exact)
    mean = float(values.mean())
    if m == items:
        se = 0.0
    elif m == 1:
        se = math.nan
    else:
        se = math.sqrt(max(0.0, 1.0 - m / items) * float(values.var(ddof=1)) / m)
    low, high = (mean, mean) if m == items else _bootstrap_interval(values)
    return UsageFalseHits(expected=items * mean, stderr=items * se, per_code=mean,
                          per_code_stderr=se, codes_sampled=m, items=items,
                          bounded_codes=int(np.count_nonzero(~exact)), per_code_low=low, per_code_high=high)


#: Resamples of the percentile bootstrap behind ``UsageFalseHits.per_code_low/high``.
BOOTSTRAP_RESAMPLES = 2000


def _bootstrap_interval(values: np.ndarray, level: float = 0.95):
    """The percentile bootstrap interval of the mean of ``values`` (seeded: a function of the values)."""
    rng = np.random.default_rng(0)
    picks = rng.integers(0, values.shape[0], size=(BOOTSTRAP_RESAMPLES, values.shape[0]))
    means = values[picks].mean(axis=1)
    tail = (1.0 - level) / 2.0
    return float(np.quantile(means, tail)), float(np.quantile(means, 1.0 - tail))


def _sub_codes(code_ptr, det_ptr, flat, sel):
    """The CSR triple restricted to the codes ``sel`` (in order)."""
    dets = [np.arange(code_ptr[c], code_ptr[c + 1]) for c in sel]
    nd = np.array([d.size for d in dets], dtype=np.int64)
    dets = np.concatenate(dets)
    lengths = det_ptr[dets + 1] - det_ptr[dets]
    sub_ptr = np.zeros(sel.size + 1, dtype=np.int64)
    np.cumsum(nd, out=sub_ptr[1:])
    sub_det = np.zeros(dets.size + 1, dtype=np.int64)
    np.cumsum(lengths, out=sub_det[1:])
    take = np.concatenate([np.arange(det_ptr[d], det_ptr[d + 1]) for d in dets])
    return sub_ptr, sub_det, flat[take]
