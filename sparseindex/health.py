"""How full a store is: limit, headroom, bit usage, measurements and alerts.

:meth:`Store.health` returns a :class:`Health`; :meth:`Store.measure_false_hits` runs
random unrelated queries and returns a :class:`FalseHitMeasurement`. This module
reads the store (its running per-bit usage counts, weight histogram and
serving counters) and the model; it never changes the store's codes.

Two figures for the model's limit (the stored codes at which the false-hit
target is reached) are reported:

* **uniform** — the hypergeometric model (``model.false_hit_per_code``)
  for queries of the store's nominal weight with uniformly random bits;
* **usage** — the usage-aware model (``model.usage_false_hits``): queries
  whose bits follow the store's measured per-bit frequencies, evaluated
  exactly on the detector samples of a random sample of stored codes, with
  a standard error. It is computed once the store holds enough codes for the
  frequencies to mean something (on average ``USAGE_MIN_COUNT`` codes per
  bit) and refreshed after ``refresh_fraction`` of the store has changed.

Measured frequencies carry binomial sampling noise (a bit used by a
fraction f of N codes is measured with variance f(1-f)/N), which the
usage-aware model would mistake for skew and so overstate false hits of a
perfectly uniform store. The frequencies are therefore shrunk toward their
mean by the positive-part James–Stein factor λ = max(0, 1 − noise variance
/ observed variance) (James & Stein 1961; the empirical-Bayes reading of
Efron & Morris, JASA 1973): λ ≈ 0 for uniform data, ≈ 1 for real skew.
Measurements with ``source="usage"`` draw from the same shrunk frequencies.

The *operative* limit is the uniform one unless the usage-aware per-code
chance is higher by more than three standard errors and by more than 10% —
measurably and materially worse data lowers the limit; sampling noise
alone never moves it (so the status does not flap).

Status: ``"healthy"`` below ``warn_fraction`` of the operative limit,
``"filling"`` from there up to the limit, ``"saturated"`` past it, and
``"unknown"`` when the store has no false-hit target.
"""

from __future__ import annotations

import dataclasses
import json
import math
import time
import warnings

import numpy as np

from . import model, validation
from .codes import MAX_EXPANDED_BYTES, Codes
from .errors import SaturationWarning

__all__ = ["Health", "FalseHitMeasurement", "StoreStats", "HealthMemo", "Watch", "STATUSES", "compute",
           "measure_false_hits"]

STATUSES = ("healthy", "filling", "saturated")
UNKNOWN = "unknown"
#: Mean set-bit count per bit below which measured usage is too noisy to use.
USAGE_MIN_COUNT = 30
#: Stored codes whose detector samples the usage-aware estimate evaluates.
USAGE_SAMPLE = 256
#: The relative excess over the uniform chance the usage-aware one must have to count
#: (smaller differences do not matter).
USAGE_MARGIN = 0.10
#: A status moves back down (saturated -> filling -> healthy) only once the store is
#: this fraction below the line it crossed, so a noisy estimate cannot make it flap.
STATUS_HYSTERESIS = 0.05


def _finite(x):
    return None if x is None or (isinstance(x, float) and not math.isfinite(x)) else x


@dataclasses.dataclass(frozen=True)
class FalseHitMeasurement:
    """What a measurement of random unrelated queries found.

    Every hit of a measurement query is a false hit by construction (the queries
    are random). ``rate`` is the fraction of queries with at least one hit,
    with the exact Clopper–Pearson 95% interval ``[low, high]`` (Clopper &
    Pearson, Biometrika 1934); ``upper`` is the one-sided 95% upper bound,
    the figure to quote when nothing was hit. ``predicted_rate`` is the
    model's chance of at least one false hit per query (independence across
    codes assumed) and ``predicted_hits`` its expected false hits per query
    (exact by linearity), from the model matching ``source``.

    Examples
    --------
    >>> from sparseindex import Codes, Store
    >>> store = Store(256, threshold=3, seed=1); _ = store.add(Codes.random(2_000, 256, 8, seed=1))
    >>> r = store.measure_false_hits(1_000, seed=3)      # a crowded little store: most random queries hit
    >>> r.queries, r.queries_hit, r.low <= r.rate <= r.high, round(r.predicted_rate, 3)
    (1000, 883, True, 0.878)
    """

    source: str
    queries: int
    query_weight: int
    items: int
    queries_hit: int
    hits: int
    rate: float
    low: float
    high: float
    upper: float
    hits_per_query: float
    predicted_rate: float | None
    predicted_hits: float | None
    seed: int
    seconds: float

    def to_dict(self) -> dict:
        """Plain values (JSON-ready).

        Examples
        --------
        >>> from sparseindex import Codes, Store
        >>> store = Store(256, threshold=3, seed=1); _ = store.add(Codes.random(500, 256, 8, seed=1))
        >>> d = store.measure_false_hits(200, seed=3).to_dict()
        >>> d["queries"], d["source"], sorted(d)[:3]
        (200, 'uniform', ['high', 'hits', 'hits_per_query'])
        """
        return dataclasses.asdict(self)

    def __str__(self) -> str:
        if self.queries_hit:
            seen = f"{self.rate:.3g} per query (95% CI {self.low:.3g}–{self.high:.3g})"
        else:
            seen = f"no hits: < {self.upper:.3g} per query (95% upper bound)"
        pred = "" if self.predicted_rate is None else f"; model {self.predicted_rate:.3g}"
        return (f"measurement of {self.queries:,} {self.source} queries ({self.query_weight} bits) on "
                f"{self.items:,} codes: {seen}{pred}; {self.hits:,} false hits in all")


@dataclasses.dataclass(frozen=True)
class Health:
    """A store's fill level and what the models predict for it.

    Capacities and headroom are in codes; chances are per unrelated query.
    Fields are None where they do not apply (no target, an empty store,
    too few codes to measure usage). ``docs/health.md`` explains every field.

    Examples
    --------
    >>> from sparseindex import Codes, Store
    >>> store = Store.for_target(1536, 30, false_hit=1e-6, capacity=50_000, seed=1)
    >>> _ = store.add(Codes.random(1_000, 1536, 30, seed=2))
    >>> h = store.health()
    >>> h.status, h.items, h.limit, h.headroom_codes
    ('healthy', 1000, 1939219, 1938219.0)
    >>> print(str(h).splitlines()[0])
    status: HEALTHY  (1,000 codes stored, 0 removed awaiting compact)
    """

    status: str
    items: int
    removed_pending: int
    bits: int
    threshold: int
    sample_size: int | None
    detectors: int
    query_weight: int | None
    planned_weight: int | None
    target_false_hit: float | None
    target_capacity: int | None
    target_noise: float | None
    target_recall: float | None
    warn_fraction: float
    limit: float | None
    limit_basis: str
    limit_uniform: float | None
    limit_usage: float | None
    headroom_codes: float | None
    headroom_fraction: float | None
    fill_fraction: float | None
    false_hit_now: float | None
    false_hit_now_uniform: float | None
    false_hit_now_usage: float | None
    false_hit_at_limit: float | None
    per_code_uniform: float | None
    per_code_usage: float | None
    per_code_usage_stderr: float | None
    usage_codes_sampled: int
    usage_changes_since: int | None
    usage_shrinkage: float | None
    effective_bits: float | None
    hottest_bit_load_ratio: float | None
    unused_bits: int
    weight_min: int | None
    weight_mean: float | None
    weight_max: int | None
    weight_offset: float | None
    measurement: FalseHitMeasurement | None
    queries_total: int
    hits_total: int
    codes_added_total: int
    codes_removed_total: int
    memory_bytes: int
    seconds: float

    def to_dict(self) -> dict:
        """Plain values (JSON-ready); infinities become None, the measurement a dict.

        Examples
        --------
        >>> from sparseindex import Codes, Store
        >>> store = Store(64, threshold=2, seed=0); _ = store.add(Codes.random(10, 64, 4, seed=1))
        >>> d = store.health().to_dict()
        >>> d["status"], d["items"], d["limit"], d["measurement"]
        ('unknown', 10, None, None)
        """
        out = {}
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if isinstance(value, FalseHitMeasurement):
                value = value.to_dict()
            elif isinstance(value, float) and not math.isfinite(value):
                value = None
            out[f.name] = value
        return out

    def to_json(self, **kwargs) -> str:
        """The report as JSON (``to_dict``; keyword arguments go to ``json.dumps``).

        Examples
        --------
        >>> import json
        >>> from sparseindex import Codes, Store
        >>> store = Store(64, threshold=2, seed=0); _ = store.add(Codes.random(10, 64, 4, seed=1))
        >>> json.loads(store.health().to_json())["items"]
        10
        """
        return json.dumps(self.to_dict(), allow_nan=False, **kwargs)

    def __str__(self) -> str:
        return _text(self)

    def to_openmetrics(self, prefix: str = "sparseindex") -> str:
        """The OpenMetrics text exposition of this report, ending in ``# EOF``.

        ``prefix`` starts every metric family name (letters, digits, ``_``).

        Examples
        --------
        >>> from sparseindex import Codes, Store
        >>> store = Store.for_target(1536, 30, false_hit=1e-6, capacity=50_000, seed=1)
        >>> _ = store.add(Codes.random(1_000, 1536, 30, seed=2))
        >>> text = store.health().to_openmetrics(prefix="depot")
        >>> [line for line in text.splitlines() if line.startswith("depot_items")], text.splitlines()[-1]
        (['depot_items 1000'], '# EOF')
        """
        return _openmetrics(self, prefix)


# ---------------------------------------------------------------------------
# computing
# ---------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class StoreStats:
    """A store's figures at one moment, everything :func:`compute` needs.

    ``Store.stats()`` takes it under the store's read lock (copies, no
    model work); a sharded store's is the field-wise sum of its shards'
    with the whole store's own counters. ``usage`` holds the live codes'
    set-bit counts: of bit ``b`` at ``usage[b]`` when ``usage_bits`` is None
    (narrow stores), else of bit ``usage_bits[i]`` at ``usage[i]`` (wide
    stores count only the bits in use; :meth:`per_bit_usage` expands them),
    ``weight_hist[w]`` the live codes of weight
    ``w``; ``served`` the counters ``queries``, ``hits``, ``added`` and
    ``removed``; ``watch_false_hit``/``watch_warn_fraction`` what
    :meth:`Store.watch` set (None without a watch).
    """

    bits: int
    threshold: int
    sample_size: int | None
    detectors: int
    seed: int
    plan: object
    items: int
    removed_pending: int
    usage_bits: np.ndarray | None
    usage: np.ndarray
    weight_hist: np.ndarray
    memory_bytes: int
    served: dict
    measurement: "FalseHitMeasurement | None"
    watch_false_hit: float | None
    watch_warn_fraction: float | None

    def per_bit_usage(self) -> np.ndarray:
        """The set-bit count of every bit (``bits`` long); ``ValueError`` above ``MAX_EXPANDED_BYTES``."""
        if self.usage_bits is None:
            return self.usage
        if 8 * self.bits > MAX_EXPANDED_BYTES:
            raise ValueError(f"a per-bit table of {self.bits:,} bits would take {8 * self.bits:,} bytes, over "
                             f"MAX_EXPANDED_BYTES={MAX_EXPANDED_BYTES:,}; use usage_bits and usage")
        dense = np.zeros(self.bits, dtype=np.int64)
        dense[self.usage_bits] = self.usage
        return dense

    @property
    def churn(self) -> int:
        """Codes added plus codes removed since the store was made or loaded."""
        return self.served["added"] + self.served["removed"]


class HealthMemo:
    """A store's memo of its model figures (they change only with the data); the store owns one."""

    def __init__(self):
        self.uniform = {}
        self.usage = None  # (churn at estimate, items, query_weight, (UsageFalseHits, shrinkage))
        self.last = None  # (limit_basis, status) of the last report: the hysteresis of both


def summed_usage(parts) -> tuple:
    """``(usage_bits, usage)`` of several :class:`StoreStats` added together (a sharded store's)."""
    if all(p.usage_bits is None for p in parts):
        return None, summed_counts([p.usage for p in parts])
    bits = [np.arange(p.usage.shape[0]) if p.usage_bits is None else p.usage_bits for p in parts]
    used = np.unique(np.concatenate(bits)).astype(np.int64)
    total = np.zeros(used.shape[0], dtype=np.int64)
    for b, p in zip(bits, parts):
        total[np.searchsorted(used, b)] += p.usage
    return used, total


def summed_counts(arrays) -> np.ndarray:
    """Arrays of counts added position by position, the shorter ones zero-padded."""
    out = np.zeros(max((a.shape[0] for a in arrays), default=0), dtype=np.int64)
    for a in arrays:
        out[: a.shape[0]] += a
    return out


def _weights(hist: np.ndarray):
    live = int(hist.sum())
    if live == 0:
        return None, None, None
    used = np.flatnonzero(hist)
    mean = float((np.arange(hist.shape[0]) * hist).sum() / live)
    return int(used[0]), mean, int(used[-1])


def _nominal_weight(stats, mean_weight):
    """Query weight the models assume: the plan's ``weight``, else the mean stored weight."""
    if stats.plan is not None:
        return int(stats.plan.weight)
    if mean_weight is None:
        return None
    return min(stats.bits, max(stats.threshold, int(round(mean_weight))))


def _uniform(stats, memo, q, target):
    """(per-code chance, limit) under the uniform model; memoised."""
    key = (q, target)
    if key not in memo.uniform:
        sample_size = q if stats.sample_size is None else min(stats.sample_size, q)
        threshold = min(stats.threshold, sample_size)
        per_code = float(model.false_hit_per_code(stats.bits, q, sample_size, threshold, stats.detectors, q))
        memo.uniform[key] = (per_code, None if target is None else model.code_limit(per_code, target))
    return memo.uniform[key]


def usage_frequencies(usage: np.ndarray, items: int):
    """Per-bit usage frequencies with the sampling noise shrunk out; ``(f, λ)``.

    Examples
    --------
    >>> f, lam = usage_frequencies(np.array([50, 50, 50, 50]), 100)
    >>> f.tolist(), lam
    ([0.5, 0.5, 0.5, 0.5], 0.0)
    >>> f, lam = usage_frequencies(np.array([90, 10, 90, 10]), 100)
    >>> round(lam, 4), np.round(f, 4).tolist()
    (0.9944, [0.8978, 0.1022, 0.8978, 0.1022])
    """
    f = usage.astype(np.float64) / items
    mean = float(f.mean())
    observed = float(f.var())
    noise = float((f * (1.0 - f)).mean()) / items
    lam = max(0.0, 1.0 - noise / observed) if observed > 0 else 0.0
    return np.clip(mean + lam * (f - mean), 0.0, 1.0), lam


def _usage_estimate(stats, samples, memo, q, refresh_fraction, force):
    """The usage-aware estimate (memoised until the store changes enough), or None."""
    items, usage = stats.items, stats.usage
    if items == 0 or q is None or usage.sum() < USAGE_MIN_COUNT * stats.bits:
        return None
    churn = stats.churn
    if memo.usage is not None and not force:
        then, then_items, then_q, estimate = memo.usage
        if then_q == q and abs(churn - then) < max(1, refresh_fraction * max(items, then_items)):
            return churn - then, estimate
    # the codes are chosen by the store's contents (its size), never by its history, so a
    # reloaded store evaluates the same codes as the process that saved it
    codes = samples(USAGE_SAMPLE, seed=items)
    freqs, lam = usage_frequencies(stats.per_bit_usage(), items)
    p = model.usage_bernoulli(freqs, q)
    estimate = model.usage_false_hits(p, codes, stats.threshold, q, items)
    memo.usage = (churn, items, q, (estimate, lam))
    return 0, (estimate, lam)


def compute(stats: StoreStats, samples, memo: HealthMemo, *, false_hit=None, warn_fraction=None, refresh=False,
            refresh_fraction=0.05) -> Health:
    """The :class:`Health` of a store from its :class:`StoreStats` (call :meth:`Store.health`).

    A function of its arguments and the memo only: ``samples(count,
    seed=...)`` returns the detector samples of ``count`` live codes chosen
    by ``seed`` (``Store.detector_samples``), asked for only when the
    usage-aware estimate is (re)made. No store lock is held here, so a
    writer never waits on a report.

    Examples
    --------
    >>> from sparseindex import Codes, Store
    >>> store = Store(256, threshold=4, seed=0); _ = store.add(Codes.random(100, 256, 8, seed=1))
    >>> memo = HealthMemo()
    >>> h = compute(store.stats(), store.detector_samples, memo, false_hit=0.01)
    >>> h.status, h.limit, compute(store.stats(), store.detector_samples, memo).status   # no target: unknown
    ('healthy', 377, 'unknown')
    """
    started = time.perf_counter()
    target = false_hit
    if target is None:
        target = stats.watch_false_hit
    if target is None and stats.plan is not None:
        target = stats.plan.target_false_hit
    warn = warn_fraction if warn_fraction is not None else (stats.watch_warn_fraction or 0.8)
    q = _nominal_weight(stats, _weights(stats.weight_hist)[1])
    per_uniform = cap_uniform = None
    if q is not None:
        per_uniform, cap_uniform = _uniform(stats, memo, q, target)
    est = _usage_estimate(stats, samples, memo, q, refresh_fraction, refresh)
    report = derive(
        bits=stats.bits, threshold=stats.threshold, sample_size=stats.sample_size, detectors=stats.detectors,
        plan=stats.plan, target=target, warn=warn, usage=stats.usage, hist=stats.weight_hist, items=stats.items,
        removed_pending=stats.removed_pending, q=q, per_uniform=per_uniform, cap_uniform=cap_uniform, estimate=est,
        measurement=stats.measurement, served=stats.served, memory=stats.memory_bytes, started=started,
        last=memo.last,
    )
    memo.last = (report.limit_basis, report.status)
    return report


def derive(*, bits, threshold, sample_size, detectors, plan, target, warn, usage, hist, items, removed_pending, q,
           per_uniform, cap_uniform, estimate, measurement, served, memory, started, last=None) -> Health:
    """A :class:`Health` from gathered inputs; one store or many shards alike.

    ``usage`` and ``hist`` are the live codes' per-bit counts and weight
    histogram, ``per_uniform``/``cap_uniform`` the uniform model's figures
    for query weight ``q``, ``estimate`` None or ``(changes since,
    (UsageFalseHits, shrinkage))``; ``last`` the ``(limit_basis, status)`` of
    the previous report, or None.

    The usage-aware estimate becomes the basis when the low end of its
    bootstrap interval exceeds the uniform chance by ``USAGE_MARGIN``, and
    stays it until the high end no longer does (a band, not a coin toss on
    one noisy mean); the status moves down only ``STATUS_HYSTERESIS`` below
    the line it crossed.
    """
    w_min, w_mean, w_max = _weights(hist)
    per_usage = se_usage = cap_usage = None
    sampled, since, lam = 0, None, None
    if estimate is not None:
        since, (e, lam) = estimate
        per_usage, se_usage, sampled = e.per_code, e.per_code_stderr, e.codes_sampled
        if target is not None:
            cap_usage = model.code_limit(min(1.0, per_usage), target) if per_usage > 0 else math.inf
    basis = "uniform"
    per_op, cap = per_uniform, cap_uniform
    if per_usage is not None and per_uniform is not None:
        bound = e.per_code_high if last is not None and last[0] == "usage" else e.per_code_low
        if math.isnan(bound):
            bound = per_usage
        if bound > (1 + USAGE_MARGIN) * per_uniform:
            basis, per_op, cap = "usage", per_usage, cap_usage
    status, headroom, headroom_frac, fill = UNKNOWN, None, None, None
    if target is not None and items == 0:
        status = "healthy"  # nothing stored yet: no weight to size the model with, no false hit possible
    if cap is not None:
        status = classify(items, cap, warn)
        if last is not None and last[1] in STATUSES and STATUSES.index(status) < STATUSES.index(last[1]):
            # down only once clearly below the line crossed; otherwise keep the level
            slack = items / (1 - STATUS_HYSTERESIS)
            status = max(status, classify(slack, cap, warn), key=STATUSES.index)
        headroom = max(0.0, float(cap) - items) if math.isfinite(cap) else math.inf
        headroom_frac = headroom / cap if cap and math.isfinite(cap) else (1.0 if cap else 0.0)
        fill = items / cap if cap and math.isfinite(cap) else (0.0 if cap else math.inf)
    now_u = None if per_uniform is None else float(model.store_false_hit(per_uniform, items))
    now_s = None if per_usage is None else float(model.store_false_hit(min(1.0, per_usage), items))
    at_cap = None
    if cap is not None and math.isfinite(cap):
        at_cap = float(model.store_false_hit(min(1.0, per_op), int(cap)))
    total = float(usage.sum())
    return Health(
        status=status, items=items, removed_pending=removed_pending, bits=bits,
        threshold=threshold, sample_size=sample_size, detectors=detectors, query_weight=q,
        planned_weight=None if plan is None else int(plan.weight),
        target_false_hit=target, target_capacity=None if plan is None else int(plan.target_capacity),
        target_noise=None if plan is None else float(plan.noise),
        target_recall=None if plan is None else float(plan.target_recall),
        warn_fraction=float(warn), limit=cap, limit_basis=basis, limit_uniform=cap_uniform,
        limit_usage=cap_usage, headroom_codes=headroom, headroom_fraction=headroom_frac, fill_fraction=fill,
        false_hit_now=now_s if basis == "usage" else now_u, false_hit_now_uniform=now_u,
        false_hit_now_usage=now_s, false_hit_at_limit=at_cap, per_code_uniform=per_uniform,
        per_code_usage=per_usage, per_code_usage_stderr=se_usage, usage_codes_sampled=sampled,
        usage_changes_since=since, usage_shrinkage=lam,
        # Hill's effective number of order 2 (inverse Simpson): (sum u)^2 / sum u^2
        effective_bits=None if total == 0 else total * total / float((usage.astype(np.float64) ** 2).sum()),
        hottest_bit_load_ratio=None if total == 0 else float(usage.max()) / (total / bits),
        unused_bits=int(bits - np.count_nonzero(usage)),
        weight_min=w_min, weight_mean=w_mean, weight_max=w_max,
        weight_offset=None if (plan is None or w_mean is None) else w_mean - plan.weight,
        measurement=measurement, queries_total=served["queries"], hits_total=served["hits"],
        codes_added_total=served["added"], codes_removed_total=served["removed"], memory_bytes=memory,
        seconds=time.perf_counter() - started,
    )


def classify(items, limit, warn_fraction) -> str:
    """Status level of ``items`` codes against the model's ``limit``.

    Examples
    --------
    >>> classify(10, 100, 0.8), classify(80, 100, 0.8), classify(101, 100, 0.8)
    ('healthy', 'filling', 'saturated')
    """
    if items > limit:
        return "saturated"
    if items >= warn_fraction * limit:
        return "filling"
    return "healthy"


# ---------------------------------------------------------------------------
# probing
# ---------------------------------------------------------------------------


def check_measurement(queries, source) -> None:
    """``TypeError`` / ``ValueError`` for a measurement request that cannot run, before any work."""
    validation.integer("queries", queries, minimum=1, what="measure_false_hits")
    validation.choice("source", source, ("uniform", "usage"), what="measure_false_hits")


def measure_false_hits(report: Health, usage: np.ndarray, count_hits, queries=10_000, *, source="uniform",
                       seed=None, batch=2048) -> FalseHitMeasurement:
    """Random unrelated queries through ``count_hits``: the measured false-hit rate.

    ``report`` is the store's current :class:`Health`, ``usage`` its bit
    usage per bit (``StoreStats.per_bit_usage()``; needed for ``source="usage"``
    only), ``count_hits(codes)`` the number of hits
    of each query of a batch, not counted as served (the store supplies
    it). Queries go ``batch`` at a time. O(queries · query cost).

    Examples
    --------
    >>> from sparseindex import Codes, Store
    >>> store = Store(256, threshold=3, seed=1); _ = store.add(Codes.random(500, 256, 8, seed=1))
    >>> r = store.measure_false_hits(300, seed=4)
    >>> r.queries, r.source, store.health().queries_total
    (300, 'uniform', 0)
    """
    check_measurement(queries, source)
    seed = validation.seed("seed", seed, what="measure_false_hits")
    started = time.perf_counter()
    q, items = report.query_weight, report.items
    if q is None or items == 0:
        raise ValueError("measure_false_hits: the store is empty; there is nothing to measure")
    if source == "uniform":
        unrelated = Codes.random(int(queries), report.bits, q, seed=seed)
        predicted = report.per_code_uniform
    else:
        if not usage.any():
            raise ValueError("measure_false_hits: no bit is in use; a usage measurement needs stored codes")
        p = model.usage_bernoulli(usage_frequencies(usage, items)[0], q)
        unrelated = Codes.from_indices(model.sample_usage_queries(p, q, int(queries), seed=seed), bits=report.bits)
        predicted = report.per_code_usage
    queries_hit, hits = 0, 0
    for a in range(0, int(queries), batch):
        counts = count_hits(unrelated[a : a + batch])
        queries_hit += int(np.count_nonzero(counts))
        hits += int(counts.sum())
    n = int(queries)
    low, high = model.clopper_pearson(queries_hit, n)
    upper = model.clopper_pearson_upper(queries_hit, n)
    return FalseHitMeasurement(
        source=source, queries=n, query_weight=q, items=items, queries_hit=queries_hit, hits=hits,
        rate=queries_hit / n, low=float(low), high=float(high), upper=float(upper), hits_per_query=hits / n,
        predicted_rate=None if predicted is None else float(model.store_false_hit(min(1.0, predicted), items)),
        predicted_hits=None if predicted is None else float(items * predicted),
        seed=int(seed), seconds=time.perf_counter() - started,
    )


# ---------------------------------------------------------------------------
# alerts
# ---------------------------------------------------------------------------


class Watch:
    """Status alerts of one store: a callback per change, a warning past the limit.

    The store calls :meth:`changed` after each committed mutation.
    """

    def __init__(self, callback, warn_fraction, false_hit):
        self.callback = callback
        self.warn_fraction = warn_fraction
        self.false_hit = false_hit
        self.status = None
        self._limit = None  # from the last full report, valid until the model refreshes
        self._churn_at = 0
        self._items_at = 0

    def changed(self, items: int, churn: int, report, refresh_fraction=0.05) -> None:
        """Re-evaluate after a change to ``items`` live codes; ``report()`` makes the full :class:`Health`."""
        # Fast path for streams of small adds: the limit only moves when
        # the usage-aware estimate refreshes, so until then the status is
        # items against the last limit; a full report only on a change.
        fresh = abs(churn - self._churn_at) < max(1, refresh_fraction * max(items, self._items_at))
        if self._limit is not None and fresh and classify(items, self._limit, self.warn_fraction) == self.status:
            return
        health = report()
        if not fresh or self._limit is None:
            self._churn_at, self._items_at = churn, items
        self._limit = health.limit
        previous, current = self.status, health.status
        self.status = current
        if previous is None or previous == current:
            return
        if current == "saturated":
            warnings.warn(
                f"the store now holds {health.items:,} codes, past its limit of {_count(health.limit)} "
                f"at the false-hit target {health.target_false_hit:g} per query "
                f"(predicted now: {health.false_hit_now:.3g})",
                SaturationWarning,
                stacklevel=4,
            )
        if self.callback is not None:
            try:
                self.callback(previous, current, health)
            except Exception as exc:  # an alert hook must not break ingestion
                warnings.warn(f"on_status callback raised {exc!r}", RuntimeWarning, stacklevel=4)


# ---------------------------------------------------------------------------
# output
# ---------------------------------------------------------------------------


def _count(x) -> str:
    if x is None:
        return "n/a"
    if isinstance(x, float) and not math.isfinite(x):
        return "unbounded"
    return f"{int(x):,}"


def _chance(x) -> str:
    return "n/a" if x is None else f"{x:.3g}"


def _text(h: Health) -> str:
    lines = [f"status: {h.status.upper()}  ({h.items:,} codes stored, {h.removed_pending:,} removed awaiting compact)"]
    if h.target_false_hit is not None:
        lines.append(
            f"limit at {h.target_false_hit:g} false hits per query: {_count(h.limit)} codes "
            f"({h.limit_basis} model; uniform {_count(h.limit_uniform)}, "
            f"usage-aware {_count(h.limit_usage)})"
        )
        if h.fill_fraction is not None:
            lines.append(
                f"headroom: {_count(h.headroom_codes)} codes ({100 * h.headroom_fraction:.1f}% left; "
                f"warning at {100 * h.warn_fraction:.0f}% full)"
            )
    else:
        lines.append("limit: no false-hit target (create with for_target or call watch(false_hit=...))")
    lines.append(
        f"false hit per unrelated query now: {_chance(h.false_hit_now)} (uniform {_chance(h.false_hit_now_uniform)}, "
        f"usage-aware {_chance(h.false_hit_now_usage)}"
        + (f" from {h.usage_codes_sampled} sampled codes" if h.usage_codes_sampled else "")
        + f"); at the limit {_chance(h.false_hit_at_limit)}"
    )
    if h.effective_bits is not None:
        lines.append(
            f"bit usage: {h.effective_bits:,.0f} of {h.bits:,} bits effectively in use, hottest bit "
            f"{h.hottest_bit_load_ratio:.2f}x the mean load, {h.unused_bits:,} bits unused"
        )
    if h.weight_mean is not None:
        planned = "" if h.planned_weight is None else f"; planned {h.planned_weight} ({h.weight_offset:+.2f})"
        lines.append(
            f"code weight: {h.weight_min}..{h.weight_max} set bits, mean {h.weight_mean:.2f}{planned}"
        )
    if h.measurement is not None:
        lines.append(str(h.measurement))
    lines.append(
        f"served: {h.queries_total:,} queries, {h.hits_total:,} hits, {h.codes_added_total:,} codes added, "
        f"{h.codes_removed_total:,} removed; memory {h.memory_bytes / 2**20:,.1f} MiB"
    )
    lines.append("hits are probabilistic evidence, not proof of identity: verify before acting on one.")
    return "\n".join(lines)


def _om_value(x) -> str:
    if isinstance(x, float):
        if math.isinf(x):
            return "+Inf" if x > 0 else "-Inf"
        return repr(x)
    return str(int(x))


def _labels(labels: dict) -> str:
    if not labels:
        return ""
    parts = []
    for k, v in labels.items():
        v = str(v).replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')
        parts.append(f'{k}="{v}"')
    return "{" + ",".join(parts) + "}"


def metric_table(h: Health, prefix: str = "sparseindex"):
    """``[(family, type, unit, help, [(sample name, labels, value)])]`` for a report.

    The one list both the OpenMetrics text and the tests read; families
    whose value does not apply (None) are left out.

    Examples
    --------
    >>> from sparseindex import Codes, Store
    >>> store = Store(64, threshold=2, seed=0); _ = store.add(Codes.random(10, 64, 4, seed=1))
    >>> [family for family, kind, *_ in metric_table(store.health()) if kind == "counter"]
    ['sparseindex_queries', 'sparseindex_hits', 'sparseindex_codes_added', 'sparseindex_codes_removed']
    """
    p = prefix
    fams = []

    def gauge(name, unit, text, samples):
        samples = [(n, lab, v) for n, lab, v in samples if v is not None]
        if samples:
            fams.append((f"{p}_{name}", "gauge", unit, text, [(f"{p}_{n}", lab, v) for n, lab, v in samples]))

    def counter(name, text, value):
        fams.append((f"{p}_{name}", "counter", "", text, [(f"{p}_{name}_total", {}, value)]))

    fams.append((f"{p}_store", "info", "", "Store parameters.", [(f"{p}_store_info", {
        "bits": h.bits, "threshold": h.threshold, "sample_size": "all" if h.sample_size is None else h.sample_size,
        "detectors": h.detectors, "limit_basis": h.limit_basis}, 1)]))
    fams.append((f"{p}_status", "stateset", "", "Fill status against the false-hit target.",
                 [(f"{p}_status", {f"{p}_status": s}, int(h.status == s)) for s in STATUSES + (UNKNOWN,)]))
    gauge("items", "", "Codes stored (removed ones excluded).", [("items", {}, h.items)])
    gauge("removed_pending", "", "Removed codes whose space compact has not reclaimed.",
          [("removed_pending", {}, h.removed_pending)])
    gauge("limit_codes", "codes", "Codes the store can hold at its false-hit target.",
          [("limit_codes", {"model": "operative"}, h.limit),
           ("limit_codes", {"model": "uniform"}, h.limit_uniform),
           ("limit_codes", {"model": "usage"}, h.limit_usage)])
    gauge("headroom_codes", "codes", "Codes that can still be added before the limit.",
          [("headroom_codes", {}, h.headroom_codes)])
    gauge("headroom_ratio", "ratio", "Headroom as a fraction of the limit.", [("headroom_ratio", {}, h.headroom_fraction)])
    gauge("fill_ratio", "ratio", "Items divided by the limit.", [("fill_ratio", {}, h.fill_fraction)])
    gauge("target_false_hit_ratio", "ratio", "Target chance of a false hit per unrelated query.",
          [("target_false_hit_ratio", {}, h.target_false_hit)])
    gauge("false_hit_ratio", "ratio", "Predicted chance of a false hit per unrelated query.",
          [("false_hit_ratio", {"model": "operative", "at": "now"}, h.false_hit_now),
           ("false_hit_ratio", {"model": "uniform", "at": "now"}, h.false_hit_now_uniform),
           ("false_hit_ratio", {"model": "usage", "at": "now"}, h.false_hit_now_usage),
           ("false_hit_ratio", {"model": "operative", "at": "limit"}, h.false_hit_at_limit)])
    gauge("effective_bits", "bits", "Effective number of bits in use (inverse Simpson index).",
          [("effective_bits", {}, h.effective_bits)])
    gauge("unused_bits", "bits", "Bits no stored code sets.", [("unused_bits", {}, h.unused_bits)])
    gauge("hottest_bit_load_ratio", "ratio", "Load of the most used bit divided by the mean load.",
          [("hottest_bit_load_ratio", {}, h.hottest_bit_load_ratio)])
    gauge("code_weight_bits", "bits", "Set bits per stored code.",
          [("code_weight_bits", {"stat": "min"}, h.weight_min), ("code_weight_bits", {"stat": "mean"}, h.weight_mean),
           ("code_weight_bits", {"stat": "max"}, h.weight_max)])
    gauge("planned_weight_bits", "bits", "Set bits per code the plan assumed.",
          [("planned_weight_bits", {}, h.planned_weight)])
    gauge("memory_bytes", "bytes", "Memory held by codes, postings and bookkeeping.",
          [("memory_bytes", {}, h.memory_bytes)])
    if h.measurement is not None:
        pr = h.measurement
        gauge("measured_false_hit_ratio", "ratio", "False-hit rate per query a measurement observed, with its 95% interval.",
              [("measured_false_hit_ratio", {"source": pr.source, "value": "observed"}, pr.rate),
               ("measured_false_hit_ratio", {"source": pr.source, "value": "low"}, pr.low),
               ("measured_false_hit_ratio", {"source": pr.source, "value": "high"}, pr.high),
               ("measured_false_hit_ratio", {"source": pr.source, "value": "upper"}, pr.upper),
               ("measured_false_hit_ratio", {"source": pr.source, "value": "predicted"}, pr.predicted_rate)])
        gauge("measured_queries", "", "Queries the latest measurement ran.", [("measured_queries", {"source": pr.source}, pr.queries)])
    counter("queries", "Queries answered.", h.queries_total)
    counter("hits", "Hits returned.", h.hits_total)
    counter("codes_added", "Codes added.", h.codes_added_total)
    counter("codes_removed", "Codes removed.", h.codes_removed_total)
    return fams


def _openmetrics(h: Health, prefix: str) -> str:
    if not isinstance(prefix, str) or not prefix or not all(c.isalnum() or c == "_" for c in prefix) \
            or prefix[0].isdigit():
        raise ValueError(f"prefix={prefix!r} must be a metric name: letters, digits and '_', not starting with a digit")
    out = []
    for family, kind, unit, text, samples in metric_table(h, prefix):
        out.append(f"# TYPE {family} {kind}")
        if unit:
            out.append(f"# UNIT {family} {unit}")
        out.append(f"# HELP {family} {text}")
        for name, labels, value in samples:
            out.append(f"{name}{_labels(labels)} {_om_value(value)}")
    out.append("# EOF")
    return "\n".join(out) + "\n"
