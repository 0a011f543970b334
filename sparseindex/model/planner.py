"""Choose a store's sample_size, threshold and detector count from its targets.

:func:`plan` answers the sizing question a user actually has -- "codes of
this width and weight, this many of them, queries this noisy, false hits
this rare: how should the detectors be set?" -- with the cheapest
configuration that the analytic model (:mod:`sparseindex.model`) says meets
both targets.

Search
------
Cost is postings per stored code, ``detectors * sample_size``.  For a fixed
sample_size s and detector count D both the false-hit chance and the recall fall
as the threshold rises, so the recall target alone fixes the best threshold:
the largest one whose recall still meets the target.  Any lower threshold
costs the same and only adds false hits.  The planner therefore walks the
pairs (s, D) in order of cost, finds that threshold for every s at once from
one row of cumulative hypergeometric sums, and checks the false-hit target
there.  One detector's false-hit chance p1 brackets the whole bank's,
``p1 <= p_code <= D * p1``, so the exact mixture over the overlap is needed
only for the few pairs that fall inside the bracket.  Whatever is reported
is recomputed with the exact public model functions.
"""

from __future__ import annotations

import dataclasses
import math
import numbers

import numpy as np

from ..errors import PlanError
from .. import validation
from ..validation import quoted
from . import hypergeometric as _model

__all__ = ["Plan", "PlanError", "plan"]

# Decisions closer than this (in natural log) to a target are re-made with
# the exact model functions; the fast row sums are accurate to ~1e-12.
_TOL = 1e-8
_ALTERNATIVES = 3


@dataclasses.dataclass(frozen=True)
class Plan:
    """A detector configuration and what the model predicts for it.

    Attributes
    ----------
    sample_size : int
        Set bits of a stored code that each detector samples (may equal
        ``weight``, meaning all of them).
    threshold : int
        A detector fires when at least this many of its sampled bits are set
        in the query.
    detectors : int
        Detectors per stored code.
    false_hit_per_code : float
        Chance that one stored code is hit by an unrelated random query.
    false_hit_per_query : float
        Chance that an unrelated query returns at least one hit from a store
        of ``target_capacity`` codes.
    recall : float
        Chance that a copy of a stored code lacking ``lost_bits`` of its set
        bits is recalled.
    miss : float
        ``1 - recall``, computed directly (exact when recall rounds to 1).
    limit : int or float
        The model's limit: the largest store whose per-query false-hit
        chance stays within ``target_false_hit`` (``math.inf`` if beyond the
        float range). Compare ``target_capacity``, the count planned for.
    postings_per_code : int
        ``detectors * sample_size``: index entries each stored code adds.
    updates_per_query : float
        Expected counter updates a query of ``weight`` bits makes in a store
        of ``target_capacity`` codes: ``weight * target_capacity * postings / bits``.
    bits, weight, lost_bits : int
        Code width, set bits per code, and ``ceil(noise * weight)``.
    target_false_hit, target_capacity, noise, target_recall, max_detectors
        The request the plan answers.
    alternatives : tuple of Plan
        The next-best configurations, best first (empty on alternatives).

    Examples
    --------
    >>> p = plan(1536, 30, false_hit=1e-6, capacity=50_000)
    >>> p.sample_size, p.threshold, p.detectors, p.postings_per_code, p.limit
    (7, 7, 1, 7, 1939219)
    >>> print(str(p).splitlines()[0])
    sample size 7 of 30 set bits, threshold 7, 1 detector per code (7 postings per code)
    >>> len(p.alternatives), p.alternatives[0].alternatives
    (3, ())
    """

    sample_size: int
    threshold: int
    detectors: int
    false_hit_per_code: float
    false_hit_per_query: float
    recall: float
    miss: float
    limit: int | float
    postings_per_code: int
    updates_per_query: float
    bits: int
    weight: int
    lost_bits: int
    target_false_hit: float
    target_capacity: int
    noise: float
    target_recall: float
    max_detectors: int
    alternatives: tuple = ()

    def to_dict(self):
        """Plain-type dictionary (JSON-ready); alternatives as a list.

        An unbounded ``limit`` becomes ``None``.

        Examples
        --------
        >>> d = plan(1536, 30, false_hit=1e-9, capacity=10**6, noise=0.25).to_dict()
        >>> sorted(d)[:4]
        ['alternatives', 'bits', 'detectors', 'false_hit_per_code']
        """
        out = {}
        for field in dataclasses.fields(self):
            value = getattr(self, field.name)
            if field.name == "alternatives":
                value = [alt.to_dict() for alt in value]
            elif field.name == "limit" and not math.isfinite(value):
                value = None
            out[field.name] = value
        return out

    def __str__(self):
        lines = [
            f"sample size {self.sample_size} of {self.weight} set bits, threshold "
            f"{self.threshold}, {self.detectors} detector"
            f"{'s' if self.detectors != 1 else ''} per code "
            f"({self.postings_per_code} postings per code)",
            f"false hits: {self.false_hit_per_code:.3g} per code, "
            f"{self.false_hit_per_query:.3g} per query with "
            f"{self.target_capacity:,} codes (target {self.target_false_hit:g})",
            f"recall: {_recall_text(self.recall, self.miss)} with "
            f"{self.lost_bits} of {self.weight} set bits lost "
            f"(target {self.target_recall:g})",
            f"limit at the false-hit target: {_count_text(self.limit)} codes",
        ]
        if self.alternatives:
            lines.append("alternatives: " + "; ".join(
                f"s={a.sample_size} t={a.threshold} D={a.detectors} "
                f"({a.postings_per_code} postings, {a.false_hit_per_query:.2g} "
                f"per query)" for a in self.alternatives))
        return "\n".join(lines)


def _recall_text(value, miss):
    """Recall with enough digits to show how close to 1 it is."""
    if miss <= 0:
        return "1"
    if miss < 1e-6:
        return f"1 - {miss:.2g}"
    digits = max(4, int(-math.floor(math.log10(miss))) + 2)
    return f"{value:.{digits}f}"


def _count_text(value):
    if isinstance(value, float) and not math.isfinite(value):
        return "unbounded"
    if value >= 1e15:
        return f"{float(value):.3g}"
    return f"{int(value):,}"


# ---------------------------------------------------------------------------
# Input checks
# ---------------------------------------------------------------------------

def _scalar_int(name, value):
    if isinstance(value, (bool, np.bool_)) or np.ndim(value) != 0 or not isinstance(value, numbers.Real):
        raise TypeError(f"{name}={quoted(value)} must be a single integer")
    if isinstance(value, numbers.Integral):
        return int(value)
    if math.isfinite(value) and float(value).is_integer():
        return int(value)
    raise ValueError(f"{name}={quoted(value)} must be an integer")


def _scalar_real(name, value):
    if isinstance(value, (bool, np.bool_)) or np.ndim(value) != 0 \
            or not isinstance(value, numbers.Real):
        raise TypeError(f"{name}={quoted(value)} must be a number")
    value = float(value)
    if math.isnan(value):
        raise ValueError(f"{name}=nan must be a number")
    return value


# ---------------------------------------------------------------------------
# Fast rows of log pmf values: one row per sample_size size
# ---------------------------------------------------------------------------

def _rows_log_pmf(N, K, segs, width):
    """log P[Hyp(N, K, s) = j] for s in ``segs`` (rows) and j < width.

    One exact anchor per row (Loader's form, at the lower end of the
    support), then cumulative sums of the exact log ratios
    pmf(j+1)/pmf(j) = (K-j)(s-j) / ((j+1)(N-K-s+j+1)); every factor is an
    integer below 2**53, so each ratio is correctly rounded.
    """
    s = np.asarray(segs, dtype=np.float64)[:, None]
    j = np.arange(width, dtype=np.float64)[None, :]
    kmin = np.maximum(0.0, s - (N - K))
    kmax = np.minimum(float(K), s)
    anchor = _model.log_hyp_pmf(kmin, float(N), float(K), s)
    inside = (j >= kmin) & (j < kmax)
    with np.errstate(divide="ignore", invalid="ignore"):
        lr = np.log((K - j) * (s - j)) - np.log((j + 1.0) * (N - K - s + j + 1.0))
    lr = np.where(inside, lr, 0.0)
    steps = np.cumsum(lr, axis=1)
    logp = anchor + np.concatenate([np.zeros((s.shape[0], 1)), steps[:, :-1]], axis=1)
    return np.where((j >= kmin) & (j <= kmax), logp, -np.inf)


class _Search:
    """State of one planning run (the request and memoised exact values)."""

    def __init__(self, n, a, F, M, noise, R, max_d):
        self.n, self.a, self.F, self.M = n, a, F, M
        self.noise, self.R, self.max_d = noise, R, max_d
        self.k = _model.lost_bits(a, noise)
        self.q = a
        self.log_F = math.log(F)
        # per-code limit: 1 - (1 - p)^M <= F  <=>  p <= -expm1(log1p(-F)/M)
        self.lpm = math.log(-math.expm1(math.log1p(-F) / M))
        self.lrl = math.log1p(-R)       # log of the largest allowed miss chance
        self._exact_lp = {}

    # exact model values ------------------------------------------------
    def exact_log_pcode(self, s, th, D):
        key = (s, th, D)
        if key not in self._exact_lp:
            self._exact_lp[key] = _model.false_hit_per_code(
                self.n, self.a, s, th, D, self.q, log=True)
        return self._exact_lp[key]

    def exact_many(self, triples):
        """Exact log p_code for many (s, theta, D), batched."""
        todo = [t for t in triples if t not in self._exact_lp]
        if todo:
            s, th, D = (np.array(v, dtype=np.float64) for v in zip(*todo))
            vals = _model.false_hit_per_code(self.n, self.a, s, th, D, self.q,
                                             log=True)
            for t, v in zip(todo, np.atleast_1d(vals)):
                self._exact_lp[t] = float(v)
        return [self._exact_lp[t] for t in triples]

    def meets_false_hit(self, lp):
        return float(_model.log_store_false_hit(lp, float(self.M))) <= self.log_F

    def exact_log_miss(self, s, th, D):
        return _model.recall(self.a, s, th, D, self.noise, log=True,
                             complement=True)

    def exact_threshold(self, s, D, guess):
        """Largest threshold meeting the recall target, by the exact model."""
        th = max(0, min(s, guess))
        while th >= 1 and self.exact_log_miss(s, th, D) > self.lrl:
            th -= 1
        while th < s and self.exact_log_miss(s, th + 1, D) <= self.lrl:
            th += 1
        return th

    # fast rows ---------------------------------------------------------
    def _miss_columns(self, segs):
        """log P[kept < theta] per sample size (rows) and threshold - 1 (columns), and the column count."""
        a, k = self.a, self.k
        sf = segs.astype(np.float64)
        full = int(segs[-1]) + 1
        # Columns needed: thresholds up to the recall quantile of the most
        # lenient detector count, plus a margin; checked below.
        mean = sf * (a - k) / a
        sd = np.sqrt(sf * ((a - k) / a) * (k / a) * ((a - sf) / max(a - 1, 1)))
        width = int(min(full, np.max(np.ceil(mean + 12.0 * sd)) + 18))
        while True:
            keep = _rows_log_pmf(a, a - k, segs, width)
            with np.errstate(invalid="ignore"):
                miss = np.logaddexp.accumulate(keep, axis=1)
            lenient = self.lrl / self.max_d
            # a row is complete if its thresholds end inside the columns
            ok = (width >= segs) | (miss[:, -1] > lenient)
            if np.all(ok) or width == full:
                return miss, width
            width = full

    def _false_hit_tails(self, segs, width):
        """log P[chance overlap >= theta] per sample size and threshold, and the column count.

        Terms right of the columns are bounded by log-concavity, else the
        whole row is taken.
        """
        n, q = self.n, self.q
        sf = segs.astype(np.float64)
        full = int(segs[-1]) + 1
        fmean = sf * q / n
        fsd = np.sqrt(sf * (q / n) * ((n - q) / n) * ((n - sf) / max(n - 1, 1)))
        fwidth = int(min(full, width + 64 + np.max(np.ceil(12.0 * fsd + fmean))))
        while True:
            false = _rows_log_pmf(n, q, segs, fwidth)
            with np.errstate(invalid="ignore"):
                tail = np.logaddexp.accumulate(false[:, ::-1], axis=1)[:, ::-1]
            if fwidth == full:
                return tail, fwidth
            kmax = np.minimum(q, segs)
            last, prev = false[:, -1], false[:, -2]
            with np.errstate(invalid="ignore"):
                lr = last - prev
                bound = last + lr - _model.log1mexp(np.minimum(lr, 0.0))
            ref = tail[:, min(width, fwidth) - 1]
            good = (kmax < fwidth) | ((lr < 0) & (bound <= ref - 45.0))
            if np.all(good):
                return tail, fwidth
            fwidth = full

    def block(self, s_lo, s_hi, cost_limit):
        """Classify every (s, D) with s in [s_lo, s_hi] and cost <= limit.

        Returns arrays (cost, s, D, theta, log_p1, status) over the pairs
        whose recall target can be met, where theta is the largest threshold
        meeting it and status is 1 (meets the false-hit target too), 0 (needs
        the exact mixture) or -1 (fails it).
        """
        segs = np.arange(s_lo, s_hi + 1)
        miss, width = self._miss_columns(segs)
        tail, fwidth = self._false_hit_tails(segs, width)
        cols = np.arange(width)[None, :]
        below_s = cols < segs[:, None]
        rows = np.arange(segs.size)
        parts = []
        for D in range(1, self.max_d + 1):
            if s_lo * D > cost_limit:
                break
            lim = self.lrl / D
            theta = np.sum((miss <= lim) & below_s, axis=1)
            # recall decisions near the limit: redo exactly
            cur = np.where(theta >= 1, D * miss[rows, np.maximum(theta - 1, 0)], -np.inf)
            nxt = np.where(theta < segs,
                           D * miss[rows, np.minimum(theta, width - 1)], np.inf)
            near = (np.abs(cur - self.lrl) <= _TOL) | (np.abs(nxt - self.lrl) <= _TOL)
            for i in np.flatnonzero(near):
                theta[i] = self.exact_threshold(int(segs[i]), D, int(theta[i]))
            use = (theta >= 1) & (segs * D <= cost_limit)
            if not np.any(use):
                continue
            s_u, th_u = segs[use], theta[use]
            l1 = tail[rows[use], np.minimum(th_u, fwidth - 1)]
            if D == 1:
                status = np.where(l1 < self.lpm, 1, -1)
                for i in np.flatnonzero(np.abs(l1 - self.lpm) <= _TOL):
                    l1[i] = self.exact_log_pcode(int(s_u[i]), int(th_u[i]), 1)
                    status[i] = 1 if self.meets_false_hit(l1[i]) else -1
            else:
                status = np.where(l1 > self.lpm + _TOL, -1,
                                  np.where(l1 + math.log(D) < self.lpm - _TOL, 1, 0))
            parts.append((s_u * D, s_u, np.full(s_u.size, D), th_u, l1, status))
        if not parts:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty, empty, empty, np.zeros(0), empty
        return tuple(np.concatenate(col) for col in zip(*parts))


def _nth_cheapest(costs, count):
    """Cost of the count-th cheapest entry (inf if fewer)."""
    if len(costs) < count:
        return math.inf
    return sorted(costs)[count - 1]


def plan(bits, weight, *, false_hit, capacity, noise=0.0, recall=0.999,
         max_detectors=8):
    """Cheapest detector configuration that meets a false-hit and a recall
    target.

    Parameters
    ----------
    bits : int
        Code width, ``>= 1``.
    weight : int
        Set bits per code (and per query), ``1 <= weight <= bits``.
    false_hit : float
        Largest allowed chance that an unrelated query returns at least one
        hit from a store of ``capacity`` codes, ``0 < false_hit < 1``.
    capacity : int
        Number of stored codes the target must hold for, ``>= 1``.
    noise : float, optional
        Fraction of a stored code's set bits a query may lack (replaced by
        other bits) and still be recalled, ``0 <= noise < 1``.
    recall : float, optional
        Smallest allowed recall of such a query, ``0 < recall < 1``.
    max_detectors : int, optional
        Most detectors per stored code, ``>= 1``.

    Returns
    -------
    Plan
        Fewest postings per code (``detectors * sample_size``); among equal
        costs the lowest false-hit chance.  Carries up to three next-best
        alternatives.

    Raises
    ------
    PlanError
        When no configuration meets both targets; the message names the
        target and the best values reachable.
    ValueError
        On malformed input, quoting the value.

    Notes
    -----
    Work grows with the cost of the answer: rows of ``sample_size + 1``
    cumulative sums for every sample_size up to the chosen cost, so about
    ``cost**2`` operations, at most ``weight**2`` when no plan exists.

    Examples
    --------
    >>> p = plan(1536, 30, false_hit=1e-9, capacity=10**6, noise=0.25)
    >>> (p.sample_size, p.threshold, p.detectors)
    (20, 12, 1)
    >>> p.false_hit_per_query <= 1e-9 and p.recall >= 0.999
    True
    """
    search = _Search(*_checked_targets(bits, weight, false_hit, capacity, noise, recall, max_detectors))
    want = 1 + _ALTERNATIVES
    feasible, cost_bound, seen = _feasible_pairs(search, want)
    if not feasible:
        raise PlanError(_impossible(search, seen))

    ranked = [(cost, s, D, th) for (s, D), (cost, th) in feasible.items()
              if cost <= cost_bound]
    lps = search.exact_many([(s, th, D) for _, s, D, th in ranked])
    order = sorted(zip(ranked, lps), key=lambda e: (e[0][0], e[1], e[0][2]))
    plans = [_make_plan(search, s, th, D, lp) for (_, s, D, th), lp in order[:want]]
    return dataclasses.replace(plans[0], alternatives=tuple(plans[1:]))


def _checked_targets(bits, weight, false_hit, capacity, noise, recall, max_detectors):
    """The planner's arguments as plain numbers, or TypeError / ValueError quoting the bad one."""
    n = _scalar_int("bits", bits)
    if n > validation.MAX_BITS:
        validation.width(n, what="plan")
    a = _scalar_int("weight", weight)
    F = _scalar_real("false_hit", false_hit)
    M = _scalar_int("capacity", capacity)
    rho = _scalar_real("noise", noise)
    R = _scalar_real("recall", recall)
    max_d = _scalar_int("max_detectors", max_detectors)
    if n < 1:
        raise ValueError(f"bits={n} must be >= 1")
    if a < 1:
        raise ValueError(f"weight={a} must be >= 1")
    if a > n:
        raise ValueError(f"weight={a} must be <= bits={n}")
    if not 0 < F < 1:
        raise ValueError(f"false_hit={F!r} must be > 0 and < 1")
    if M < 1:
        raise ValueError(f"capacity={M} must be >= 1")
    if not 0 <= rho < 1:
        raise ValueError(f"noise={rho!r} must be >= 0 and < 1")
    if not 0 < R < 1:
        raise ValueError(f"recall={R!r} must be > 0 and < 1")
    if max_d < 1:
        raise ValueError(f"max_detectors={max_d} must be >= 1")

    return n, a, F, M, rho, R, max_d


def _feasible_pairs(search, want):
    """Every (sample size, detectors) that meets both targets, up to the ``want``-th cheapest cost.

    Returns ``({(s, D): (cost, theta)}, cost bound, rows seen for PlanError)``.
    """
    feasible = {}      # (s, D) -> (cost, theta)
    pending = []       # borderline pairs: (cost, s, D, theta)
    seen = []          # (log p1, s, D, theta): recall met, for PlanError
    cost_bound = math.inf
    a = search.a
    s_lo, size = 1, 16
    while s_lo <= a and s_lo <= cost_bound:
        s_hi = min(a, s_lo + size - 1)
        cost, segs, dets, ths, l1, status = search.block(s_lo, s_hi, cost_bound)
        for i in np.flatnonzero(status == 1):
            feasible[(int(segs[i]), int(dets[i]))] = (int(cost[i]), int(ths[i]))
        for i in np.flatnonzero(status == 0):
            pending.append((int(cost[i]), int(segs[i]), int(dets[i]), int(ths[i])))
        seen.append((l1, segs, dets, ths))
        cost_bound = _nth_cheapest([c for c, _ in feasible.values()], want)
        s_lo, size = s_hi + 1, size * 2

    # Resolve borderline pairs in order of cost, while they can still matter.
    pending.sort()
    i = 0
    while i < len(pending) and pending[i][0] <= cost_bound:
        batch = [p for p in pending[i:i + 16] if p[0] <= cost_bound]
        vals = search.exact_many([(s, th, D) for _, s, D, th in batch])
        for (cost, s, D, th), lp in zip(batch, vals):
            if search.meets_false_hit(lp):
                feasible[(s, D)] = (cost, th)
        cost_bound = _nth_cheapest([c for c, _ in feasible.values()], want)
        i += len(batch)

    return feasible, cost_bound, seen


def _make_plan(search, s, th, D, lp):
    lmiss = search.exact_log_miss(s, th, D)
    cap = _model.code_limit(lp, search.F, log=True)
    return Plan(
        sample_size=int(s), threshold=int(th), detectors=int(D),
        false_hit_per_code=math.exp(lp),
        false_hit_per_query=math.exp(float(_model.log_store_false_hit(
            lp, float(search.M)))),
        recall=-math.expm1(lmiss), miss=math.exp(lmiss),
        limit=cap, postings_per_code=int(s * D),
        updates_per_query=search.q * search.M * s * D / search.n,
        bits=search.n, weight=search.a, lost_bits=int(search.k),
        target_false_hit=search.F, target_capacity=search.M,
        noise=search.noise, target_recall=search.R,
        max_detectors=search.max_d)


def _impossible(search, seen):
    """The PlanError message: which target fails and what is reachable."""
    a, k, R = search.a, search.k, search.R
    l1, segs, dets, ths = (np.concatenate(c) for c in zip(*seen))
    if l1.size == 0:
        return (f"recall={R:g} at noise={search.noise:g} cannot be met: a query "
                f"that lacks {k} of the {a} set bits keeps none of them, so no "
                f"detector can fire")
    # The lowest false-hit chance reachable while the recall target holds.
    # p1 <= p_code <= D p1: visit pairs by their lower bound and stop once it
    # exceeds the best exact value found.
    # Compared per query at the requested capacity, where many chances
    # saturate at 1; at most 64 exact evaluations.
    order = np.lexsort((dets, segs, l1))
    lower = _model.log_store_false_hit(l1[order], float(search.M))
    best = (math.inf, math.inf, None)
    for start in range(0, min(order.size, 64), 8):
        idx = order[start:start + 8]
        if lower[start] >= best[0] - 1e-12:
            break
        trip = [(int(segs[i]), int(ths[i]), int(dets[i])) for i in idx]
        for lp, t in zip(search.exact_many(trip), trip):
            lq = float(_model.log_store_false_hit(lp, float(search.M)))
            best = min(best, (lq, lp, t))
    _, lp, (s, th, D) = best
    plan_ = _make_plan(search, s, th, D, lp)
    if plan_.limit >= 1:
        tail = f"which stays within the target only up to {_count_text(plan_.limit)} codes"
    else:
        tail = "which exceeds the target even with a single stored code"
    return (f"false_hit={search.F:g} at capacity={search.M:,} cannot be met "
            f"together with recall={R:g} at noise={search.noise:g} "
            f"({k} of {a} set bits lost, at most {search.max_d} detectors): the "
            f"lowest reachable is {plan_.false_hit_per_query:.2g} false hits per "
            f"query at that capacity (sample size {s}, threshold {th}, {D} "
            f"detector{'s' if D != 1 else ''}, recall "
            f"{_recall_text(plan_.recall, plan_.miss)}), {tail}")
