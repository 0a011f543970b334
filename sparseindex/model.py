"""The analytic false-hit and recall model for detector banks.

Every stored code owns a bank of ``detectors``; each detector samples
``sample_size`` of the code's set bits and fires on a query that has at least
``threshold`` of them set.  The chances that matter for sizing a store are
hypergeometric tail sums, and this module computes them exactly in log space:

* :func:`detector_false_hit` -- one detector against a random query;
* :func:`false_hit_per_code` -- one stored code (its whole bank) against a
  random query, as the mixture over the query's overlap with the code;
* :func:`recall` -- a copy of a stored code that lost some of its set bits;
* :func:`detector_failure` -- a detector after bit positions die at random;
* :func:`store_false_hit` and :func:`code_limit` -- a store of many codes.

Real stores use some bits far more than others.  The usage-aware model
replaces the uniformly random query by a conditional Poisson query
(independent Bernoulli bits given the query's weight; Hajek 1964, Chen,
Dempster & Liu 1994) whose inclusion chances follow the measured usage:

* :func:`usage_bernoulli` -- the Bernoulli parameters for measured usage;
* :func:`inclusion_probabilities` -- each bit's chance to be in the query;
* :func:`detector_fire_probability` and :func:`code_fire_probability` --
  exact Poisson-binomial chances for given detector samples;
* :func:`usage_false_hits` -- expected false hits of a store, estimated from
  a sample of its codes, with a standard error;
* :func:`sample_usage_queries` -- exact random queries of that model;
* :func:`clopper_pearson` and :func:`clopper_pearson_upper` -- exact
  intervals for the false-hit rate a measurement measures.

The hypergeometric functions accept numpy arrays for any parameter (they
broadcast) and then return arrays; with scalar arguments they return Python
numbers.  Pass
``log=True`` to get the natural logarithm of a chance, which stays finite far
below the smallest double (1e-308).

Notes
-----
The probability mass function is evaluated with Loader's saddle-point form
(C. Loader, "Fast and Accurate Computation of Binomial Probabilities", 2000),
which keeps full relative precision for widths of millions of bits where a
difference of log-gamma values would lose up to eight digits.  Tail sums add
positive terms only, over a window around the largest term; log-concavity of
the hypergeometric distribution bounds what lies outside the window, and the
window grows until that bound is below 1e-19 of the sum.  No chance is ever
formed as ``1 - (1 - x)``: ``log1p`` and ``expm1`` carry the small
quantities.  The derivations are in ``docs/model.md``.
"""

from __future__ import annotations

import dataclasses
import math
import numbers

import numpy as np

from ._config import kernel

__all__ = [
    "PlanError",
    "UsageFalseHits",
    "code_limit",
    "clopper_pearson",
    "clopper_pearson_upper",
    "code_fire_probability",
    "detector_failure",
    "detector_false_hit",
    "detector_fire_probability",
    "false_hit_per_code",
    "inclusion_probabilities",
    "lost_bits",
    "recall",
    "sample_usage_queries",
    "store_false_hit",
    "usage_bernoulli",
    "usage_false_hits",
]


class PlanError(ValueError):
    """No configuration meets the requested targets.

    Raised by :func:`sparseindex.planner.plan`; the message names the target
    that cannot be met and the best values that can be reached. A
    ``ValueError``, so callers that catch bad arguments catch it too.

    Examples
    --------
    >>> from sparseindex import plan
    >>> try:
    ...     plan(1536, 30, false_hit=1e-9, capacity=10**6, noise=0.95)
    ... except PlanError as exc:
    ...     print(isinstance(exc, ValueError), str(exc)[:60])
    True false_hit=1e-09 at capacity=1,000,000 cannot be met together
    """


# ---------------------------------------------------------------------------
# Input checks
# ---------------------------------------------------------------------------

def _fmt(value):
    """Format an offending value for an error message."""
    if isinstance(value, np.generic):
        value = value.item()
    return repr(value) if isinstance(value, (float, int)) else str(value)


def _is_scalar(*values):
    return all(np.ndim(v) == 0 for v in values)


def _int_param(name, value, exact=True):
    """Return ``value`` as an int64 array, or raise ValueError.

    With ``exact=False`` (counts such as ``items``) any size is accepted and
    a float64 array returned.
    """
    if isinstance(value, (bool, np.bool_)):
        raise ValueError(f"{name}={value!r} must be an integer, not a bool")
    if isinstance(value, numbers.Integral):
        if not exact:
            return np.asarray(float(value))
        if abs(int(value)) > 2**53:
            raise ValueError(f"{name}={value} is too large (limit 2**53)")
        return np.asarray(int(value), dtype=np.int64)
    arr = np.asarray(value)
    if arr.dtype == np.bool_ or arr.dtype.kind not in "iuf":
        raise ValueError(f"{name}={value!r} must be an integer")
    arr = arr.astype(np.float64)
    bad = ~np.isfinite(arr) | (arr != np.floor(arr))
    if np.any(bad):
        raise ValueError(f"{name}={_fmt(arr[bad].flat[0])} must be an integer")
    if not exact:
        return arr
    if np.any(np.abs(arr) > 2.0**53):
        raise ValueError(f"{name}={_fmt(arr[np.abs(arr) > 2.0**53].flat[0])} "
                         "is too large (limit 2**53)")
    return arr.astype(np.int64)


def _real_param(name, value):
    """Return ``value`` as a float64 array of finite numbers, or raise."""
    if isinstance(value, (bool, np.bool_)):
        raise ValueError(f"{name}={value!r} must be a number, not a bool")
    arr = np.asarray(value)
    if arr.dtype == np.bool_ or arr.dtype.kind not in "iuf":
        raise ValueError(f"{name}={value!r} must be a number")
    arr = arr.astype(np.float64)
    if np.any(np.isnan(arr)):
        raise ValueError(f"{name}=nan must be a number")
    return arr


def _need(ok, text, **named):
    """Raise ValueError(text) for the first element where ``ok`` is False.

    ``text`` is formatted with the named values at that element.
    """
    if np.all(ok):
        return
    arrays = {k: np.asarray(v) for k, v in named.items()}
    shape = np.broadcast_shapes(np.shape(ok), *(a.shape for a in arrays.values()))
    bad = ~np.broadcast_to(ok, shape)
    first = np.unravel_index(int(np.argmax(bad)), shape) if shape else ()
    vals = {k: _fmt(np.broadcast_to(a, shape)[first]) for k, a in arrays.items()}
    raise ValueError(text.format(**vals))


def _check_bits_weight(bits, weight):
    _need(bits >= 1, "bits={bits} must be >= 1", bits=bits)
    _need(weight >= 1, "weight={weight} must be >= 1", weight=weight)
    _need(weight <= bits, "weight={weight} must be <= bits={bits}",
          weight=weight, bits=bits)


def _check_sample_size_threshold(sample_size, threshold, limit, limit_name):
    _need(sample_size >= 1, "sample_size={sample_size} must be >= 1", sample_size=sample_size)
    _need(sample_size <= limit, "sample_size={sample_size} must be <= " + limit_name
          + "={limit}", sample_size=sample_size, limit=limit)
    _need(threshold >= 1, "threshold={threshold} must be >= 1",
          threshold=threshold)
    _need(threshold <= sample_size,
          "threshold={threshold} must be <= sample_size={sample_size}",
          threshold=threshold, sample_size=sample_size)


def _check_detectors(detectors):
    _need(detectors >= 1, "detectors={detectors} must be >= 1",
          detectors=detectors)


def _check_noise(noise):
    _need(noise >= 0, "noise={noise} must be >= 0", noise=noise)
    _need(noise < 1, "noise={noise} must be < 1", noise=noise)


def _out(value, scalar):
    """Return a Python float for scalar calls, an ndarray otherwise."""
    if scalar:
        return float(np.asarray(value).reshape(()))
    return np.asarray(value, dtype=np.float64)


# ---------------------------------------------------------------------------
# Loader's saddle-point form of the binomial and hypergeometric pmf
# ---------------------------------------------------------------------------

_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)
_LOG_2PI = math.log(2.0 * math.pi)


def _stirlerr_exact(n):
    # log(n!) - log(sqrt(2 pi n) (n/e)^n) for a small positive integer n.
    return math.lgamma(n + 1.0) - (n + 0.5) * math.log(n) + n - _HALF_LOG_2PI


# The error term of Stirling's formula for n = 0..15 (0 is never used).
_STIRLERR_SMALL = np.array([0.0] + [_stirlerr_exact(n) for n in range(1, 16)])
_S0, _S1, _S2, _S3, _S4 = 1 / 12, 1 / 360, 1 / 1260, 1 / 1680, 1 / 1188


def _stirlerr(n):
    """Stirling's error term for an array of non-negative integers."""
    n = np.asarray(n, dtype=np.float64)
    out = np.empty(n.shape)
    small = n <= 15
    if np.any(small):
        out[small] = _STIRLERR_SMALL[n[small].astype(np.intp)]
    big = ~small
    if np.any(big):
        nb = n[big]
        nn = nb * nb
        out[big] = (_S0 - (_S1 - (_S2 - (_S3 - _S4 / nn) / nn) / nn) / nn) / nb
    return out


def _bd0(x, m):
    """The deviance term x*log(x/m) + m - x, accurate also when x ~ m."""
    x = np.asarray(x, dtype=np.float64)
    m = np.asarray(m, dtype=np.float64)
    x, m = np.broadcast_arrays(x, m)
    out = np.empty(x.shape)
    d = x - m
    near = np.abs(d) < 0.1 * (x + m)
    if np.any(near):
        xn, dn = x[near], d[near]
        v = dn / (x[near] + m[near])
        s = dn * v
        ej = 2.0 * xn * v
        v2 = v * v
        for j in range(1, 12):
            ej = ej * v2
            s = s + ej / (2 * j + 1)
        out[near] = s
    far = ~near
    if np.any(far):
        xf, mf = x[far], m[far]
        with np.errstate(divide="ignore", invalid="ignore"):
            val = xf * np.log(xf / mf) + mf - xf
        val = np.where(xf == 0, mf, val)
        val = np.where((mf == 0) & (xf > 0), np.inf, val)
        out[far] = val
    return out


def _log_dbinom(x, n, p, q):
    """log of the binomial pmf P[Bin(n, p) = x], with q = 1 - p given."""
    x, n, p, q = np.broadcast_arrays(*(np.asarray(v, dtype=np.float64)
                                       for v in (x, n, p, q)))
    out = np.full(x.shape, -np.inf)
    with np.errstate(divide="ignore", invalid="ignore"):
        zero = (x == 0)
        if np.any(zero):
            nz, pz, qz = n[zero], p[zero], q[zero]
            val = np.where(pz < 0.1, -_bd0(nz, nz * qz) - nz * pz,
                           nz * np.log(qz))
            out[zero] = np.where(nz == 0, 0.0, val)
        full = (x == n) & (x > 0)
        if np.any(full):
            nf, pf, qf = n[full], p[full], q[full]
            out[full] = np.where(qf < 0.1, -_bd0(nf, nf * pf) - nf * qf,
                                 nf * np.log(pf))
        mid = (x > 0) & (x < n)
        if np.any(mid):
            xm, nm, pm, qm = x[mid], n[mid], p[mid], q[mid]
            lc = (_stirlerr(nm) - _stirlerr(xm) - _stirlerr(nm - xm)
                  - _bd0(xm, nm * pm) - _bd0(nm - xm, nm * qm))
            lf = _LOG_2PI + np.log(xm) + np.log1p(-xm / nm)
            out[mid] = lc - 0.5 * lf
    return out


def _log_hyp_pmf(k, N, K, d):
    """log P[X = k] for X ~ Hyp(N, K, d); -inf outside the support.

    N items of which K are marked, d drawn without replacement.  Computed as
    a ratio of three binomial pmfs in Loader's form.  Arrays broadcast.
    """
    k, N, K, d = np.broadcast_arrays(*(np.asarray(v, dtype=np.float64)
                                       for v in (k, N, K, d)))
    out = np.full(k.shape, -np.inf)
    ok = (k >= np.maximum(0.0, d - (N - K))) & (k <= np.minimum(K, d))
    if np.any(ok):
        kk, NN, KK, dd = k[ok], N[ok], K[ok], d[ok]
        p = dd / NN
        q = (NN - dd) / NN
        out[ok] = (_log_dbinom(kk, KK, p, q) + _log_dbinom(dd - kk, NN - KK, p, q)
                   - _log_dbinom(dd, NN, p, q))
    return out


def _hyp_shape(N, K, d):
    """Support bounds, mode and standard deviation of Hyp(N, K, d)."""
    kmin = np.maximum(0.0, d - (N - K))
    kmax = np.minimum(K, d)
    mode = np.clip(np.floor((d + 1.0) * (K + 1.0) / (N + 2.0)), kmin, kmax)
    var = d * (K / N) * ((N - K) / N) * ((N - d) / np.maximum(N - 1.0, 1.0))
    return kmin, kmax, mode, np.sqrt(np.maximum(var, 0.0))


# ---------------------------------------------------------------------------
# Log-space helpers
# ---------------------------------------------------------------------------

def _log1mexp(x):
    """log(1 - exp(x)) for x <= 0, without cancellation."""
    x = np.asarray(x, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(x > -0.6931471805599453, np.log(-np.expm1(x)),
                        np.log1p(-np.exp(x)))


def _log_bank_fires(log_t, log_1mt, detectors):
    """log(1 - (1 - t)^D) from log t and log(1 - t), both exact."""
    log_t = np.asarray(log_t, dtype=np.float64)
    D = np.asarray(detectors, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.exp(log_t)
        # log(1 - t): from log t when t is small, else the separate lower sum.
        l1mt = np.where(t < 0.5, np.log1p(-t), log_1mt)
        general = _log1mexp(D * l1mt)
        # For t < 1e-10: 1-(1-t)^D = D t (1 - (D-1) t / 2 + O(t^2)).
        small = log_t + np.log(D) + np.log1p(-(D - 1.0) * t / 2.0)
    return np.where(t < 1e-10, small, general)


_MARGIN = 45.0  # window sums stop when the rest is below e^-45 of the sum
_CHUNK = 1 << 21  # grid cells evaluated at once


def _window_logsum(lo_bound, hi_bound, peak, half, terms):
    """log of sum_{k=lo_bound}^{hi_bound} f(k), over a window that grows.

    ``terms(grid, rows)`` returns ``(log f, log w)`` on a grid of k values for
    the given rows, where w is a log-concave envelope: f(k) <= w(k) to the
    right of the window, and f(k) <= f(lo) w(k) / w(lo) to its left.  A row
    is accepted once the envelope bounds what lies outside the window by
    e^-45 of the window's sum; otherwise its half-width grows fourfold.
    """
    A = np.asarray(lo_bound, dtype=np.float64).ravel()
    B = np.asarray(hi_bound, dtype=np.float64).ravel()
    peak = np.asarray(peak, dtype=np.float64).ravel()
    half = np.asarray(half, dtype=np.float64).ravel().copy()
    out = np.full(A.shape, -np.inf)
    todo = np.flatnonzero(A <= B)
    while todo.size:
        a_, b_ = A[todo], B[todo]
        pk = np.clip(peak[todo], a_, b_)
        lo = np.maximum(a_, pk - half[todo])
        hi = np.minimum(b_, pk + half[todo])
        length = (hi - lo + 1.0).astype(np.int64)
        order = np.argsort(length, kind="stable")
        accepted = np.zeros(todo.size, dtype=bool)
        rows_per = max(1, _CHUNK // int(length.max()))
        for start in range(0, order.size, rows_per):
            # Rows sorted by window length, so each chunk is nearly rectangular.
            sel = order[start:start + rows_per]
            width = int(length[sel].max())
            offs = np.arange(width, dtype=np.float64)
            grid = lo[sel, None] + offs[None, :]
            valid = grid <= hi[sel, None]
            grid = np.where(valid, grid, lo[sel, None])
            lf, lw = terms(grid, todo[sel])
            lf = np.where(valid, lf, -np.inf)
            lw = np.where(valid, lw, -np.inf)
            top = lf.max(axis=1)
            fin = np.isfinite(top)
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                tot = np.where(fin, top + np.log(np.sum(
                    np.exp(lf - np.where(fin, top, 0.0)[:, None]), axis=1)), -np.inf)
            ok = np.ones(sel.size, dtype=bool)
            rows = np.arange(sel.size)
            n_in = length[sel]
            # Right end: sum_{k>hi} w(k) <= w(hi) r / (1 - r), r = w(hi)/w(hi-1).
            need = hi[sel] < b_[sel]
            if np.any(need):
                last = lw[rows, n_in - 1]
                prev = np.where(n_in >= 2, lw[rows, np.maximum(n_in - 2, 0)], -np.inf)
                with np.errstate(invalid="ignore"):
                    lr = last - prev
                    bound = last + lr - _log1mexp(np.minimum(lr, 0.0))
                    good = (lr < 0) & (bound <= tot - _MARGIN)
                good |= ~np.isfinite(last) & (last < 0)
                ok &= ~need | good
            # Left end: sum_{k<lo} f(k) <= f(lo) r / (1 - r), r = w(lo)/w(lo+1).
            need = lo[sel] > a_[sel]
            if np.any(need):
                first = lf[:, 0]
                nxt = np.where(n_in >= 2, lw[rows, min(1, width - 1)], -np.inf)
                with np.errstate(invalid="ignore"):
                    lr = lw[:, 0] - nxt
                    bound = first + lr - _log1mexp(np.minimum(lr, 0.0))
                    good = (lr < 0) & (bound <= tot - _MARGIN)
                good |= ~np.isfinite(first) & (first < 0)
                ok &= ~need | good
            out[todo[sel[ok]]] = tot[ok]
            accepted[sel[ok]] = True
        half[todo[~accepted]] *= 4.0
        todo = todo[~accepted]
    return out


def _log_upper_tail(N, K, d, theta):
    """log P[X >= theta] for X ~ Hyp(N, K, d); float64 arrays broadcast."""
    N, K, d, theta = (np.ravel(v) for v in np.broadcast_arrays(
        *(np.asarray(v, dtype=np.float64) for v in (N, K, d, theta))))
    kmin, kmax, mode, sd = _hyp_shape(N, K, d)

    def terms(grid, rows):
        lp = _log_hyp_pmf(grid, N[rows, None], K[rows, None], d[rows, None])
        return lp, lp

    lv = _window_logsum(np.maximum(theta, kmin), kmax, mode,
                        np.ceil(30.0 * sd + 60.0), terms)
    return np.minimum(lv, 0.0)


def _log_lower_tail(N, K, d, theta):
    """log P[X < theta] for X ~ Hyp(N, K, d); float64 arrays broadcast."""
    N, K, d, theta = (np.ravel(v) for v in np.broadcast_arrays(
        *(np.asarray(v, dtype=np.float64) for v in (N, K, d, theta))))
    kmin, kmax, mode, sd = _hyp_shape(N, K, d)

    def terms(grid, rows):
        lp = _log_hyp_pmf(grid, N[rows, None], K[rows, None], d[rows, None])
        return lp, lp

    lv = _window_logsum(kmin, np.minimum(theta - 1.0, kmax), mode,
                        np.ceil(30.0 * sd + 60.0), terms)
    return np.minimum(lv, 0.0)


def _log_mixture(n, a, q, s, theta, D):
    """log of sum_z P[Hyp(n,a,q)=z] (1 - (1 - P[Hyp(a,z,s) >= theta])^D).

    Float64 arrays broadcast; returns a flat array.
    """
    n, a, q, s, theta, D = (np.ravel(v) for v in np.broadcast_arrays(
        *(np.asarray(v, dtype=np.float64) for v in (n, a, q, s, theta, D))))
    zmin, zmax, zmode, zsd = _hyp_shape(n, a, q)

    def terms(grid, rows):
        shape = grid.shape
        z = grid.ravel()
        r = np.repeat(rows, shape[1])
        lw = _log_hyp_pmf(z, n[r], a[r], q[r])
        lt = _log_upper_tail(a[r], z, s[r], theta[r])
        l1mt = np.full(z.shape, 0.0)
        big = lt > -0.6931471805599453  # t > 1/2: use the exact lower sum
        if np.any(big):
            rb = r[big]
            l1mt[big] = _log_lower_tail(a[rb], z[big], s[rb], theta[rb])
        lg = _log_bank_fires(lt, l1mt, D[r])
        return (lw + lg).reshape(shape), lw.reshape(shape)

    lv = _window_logsum(np.maximum(theta, zmin), zmax, zmode,
                        np.ceil(30.0 * zsd + 60.0), terms)
    return np.minimum(lv, 0.0)


# ---------------------------------------------------------------------------
# Public model
# ---------------------------------------------------------------------------

def lost_bits(weight, noise):
    """Number of set bits a noisy copy lacks: ``ceil(noise * weight)``.

    Products within 1e-9 of an integer count as that integer, so that for
    example ``noise=0.1`` with ``weight=30`` loses 3 bits, not 4.

    Parameters
    ----------
    weight : int or array_like
        Set bits of the stored code.
    noise : float or array_like
        Fraction of them the copy lacks, ``0 <= noise < 1``.

    Returns
    -------
    int or ndarray

    Examples
    --------
    >>> lost_bits(40, 0.25), lost_bits(30, 0.1), lost_bits(7, 0.5)
    (10, 3, 4)
    """
    scalar = _is_scalar(weight, noise)
    a = _int_param("weight", weight)
    rho = _real_param("noise", noise)
    _need(a >= 1, "weight={weight} must be >= 1", weight=a)
    _check_noise(rho)
    k = np.ceil(rho * a - 1e-9)
    k = np.clip(k, 0, a)
    return int(k) if scalar else k.astype(np.int64)


def detector_false_hit(bits, sample_size, threshold, query_weight, *, log=False):
    """Chance that one detector fires on an unrelated random query.

    The query is a uniformly random set of ``query_weight`` of the ``bits``
    positions; the detector fires when at least ``threshold`` of its
    ``sample_size`` sampled positions are among them:
    ``P[Hyp(bits, sample_size, query_weight) >= threshold]``.

    Parameters
    ----------
    bits : int or array_like
        Code width n, ``>= 1``.
    sample_size : int or array_like
        Sampled bits per detector s, ``1 <= sample_size <= bits``.
    threshold : int or array_like
        Firing threshold, ``1 <= threshold <= sample_size``.
    query_weight : int or array_like
        Set bits of the query q, ``0 <= query_weight <= bits``.
    log : bool, optional
        Return the natural logarithm of the chance.

    Returns
    -------
    float or ndarray

    Notes
    -----
    Exact up to rounding (relative error about 1e-14): a positive sum of pmf
    terms in Loader's form.  Cost grows with the standard deviation of the
    distribution, not with ``bits``.

    Examples
    --------
    >>> f"{detector_false_hit(100_000, 6, 6, 2_000):.4e}"
    '6.3531e-11'
    >>> round(detector_false_hit(10**6, 40, 40, 2000, log=True), 3)
    -248.976
    """
    scalar = _is_scalar(bits, sample_size, threshold, query_weight)
    n = _int_param("bits", bits)
    s = _int_param("sample_size", sample_size)
    th = _int_param("threshold", threshold)
    q = _int_param("query_weight", query_weight)
    _need(n >= 1, "bits={bits} must be >= 1", bits=n)
    _check_sample_size_threshold(s, th, n, "bits")
    _need(q >= 0, "query_weight={q} must be >= 0", q=q)
    _need(q <= n, "query_weight={q} must be <= bits={n}", q=q, n=n)
    shape = np.broadcast_shapes(n.shape, s.shape, th.shape, q.shape)
    lv = _log_upper_tail(n, s, q, th).reshape(shape)
    return _out(lv if log else np.exp(lv), scalar)


def false_hit_per_code(bits, weight, sample_size, threshold, detectors=1,
                       query_weight=None, *, log=False):
    """Chance that one stored code is hit by an unrelated random query.

    The stored code has ``weight`` set bits and ``detectors`` detectors, each
    sampling ``sample_size`` of them independently.  With the query's overlap
    Z ~ Hyp(bits, weight, query_weight) with the code, the detectors fire
    independently given Z = z, each with t(z) = P[Hyp(weight, z, sample_size) >=
    threshold], so the chance is the mixture
    ``sum_z P[Z = z] * (1 - (1 - t(z))**detectors)``.

    Parameters
    ----------
    bits : int or array_like
        Code width n.
    weight : int or array_like
        Set bits of the stored code a, ``1 <= weight <= bits``.
    sample_size : int, array_like or None
        Sampled bits per detector; ``None`` means all ``weight`` bits.
    threshold : int or array_like
        Firing threshold, ``1 <= threshold <= sample_size``.
    detectors : int or array_like, optional
        Detectors per code D, ``>= 1``.
    query_weight : int, array_like or None, optional
        Set bits of the query; ``None`` means ``weight``.
    log : bool, optional
        Return the natural logarithm of the chance.

    Returns
    -------
    float or ndarray

    Notes
    -----
    With one detector the mixture equals :func:`detector_false_hit` exactly
    and that shorter sum is used.  Otherwise the cost is a window of overlaps
    (about 30 standard deviations of Z) times a window of per-detector counts.

    Examples
    --------
    >>> f"{false_hit_per_code(1536, 30, 20, 10, detectors=4):.4e}"
    '9.9028e-13'
    >>> false_hit_per_code(1536, 30, 20, 10) == detector_false_hit(1536, 20, 10, 30)
    True
    """
    if sample_size is None:
        sample_size = weight
    if query_weight is None:
        query_weight = weight
    scalar = _is_scalar(bits, weight, sample_size, threshold, detectors, query_weight)
    n = _int_param("bits", bits)
    a = _int_param("weight", weight)
    s = _int_param("sample_size", sample_size)
    th = _int_param("threshold", threshold)
    D = _int_param("detectors", detectors)
    q = _int_param("query_weight", query_weight)
    _check_bits_weight(n, a)
    _check_sample_size_threshold(s, th, a, "weight")
    _check_detectors(D)
    _need(q >= 0, "query_weight={q} must be >= 0", q=q)
    _need(q <= n, "query_weight={q} must be <= bits={n}", q=q, n=n)
    arrs = np.broadcast_arrays(n, a, s, th, D, q)
    shape = arrs[0].shape
    n, a, s, th, D, q = (x.ravel() for x in arrs)
    lv = np.empty(n.shape)
    one = D == 1
    if np.any(one):
        lv[one] = _log_upper_tail(n[one], s[one], q[one], th[one])
    many = ~one
    if np.any(many):
        lv[many] = _log_mixture(n[many], a[many], q[many], s[many], th[many], D[many])
    lv = lv.reshape(shape)
    return _out(lv if log else np.exp(lv), scalar)


def recall(weight, sample_size, threshold, detectors=1, noise=0.0, *,
           log=False, complement=False):
    """Chance that a noisy copy of a stored code is still recalled.

    The copy lacks k = ``lost_bits(weight, noise)`` of the code's set bits
    (replaced by bits outside the code, which no detector samples).  One
    detector keeps Hyp(weight, weight - k, sample_size) of its sampled bits and
    fires when that is at least ``threshold``; the bank recalls the code when
    any of its independent detectors fires: ``1 - (1 - r1)**detectors``.

    Parameters
    ----------
    weight : int or array_like
        Set bits of the stored code.
    sample_size : int, array_like or None
        Sampled bits per detector; ``None`` means all ``weight`` bits.
    threshold : int or array_like
        Firing threshold.
    detectors : int or array_like, optional
        Detectors per code.
    noise : float or array_like, optional
        Fraction of set bits lost, ``0 <= noise < 1``.
    log : bool, optional
        Return the natural logarithm.
    complement : bool, optional
        Return the miss chance ``1 - recall`` instead, computed directly
        (it stays exact when recall rounds to 1.0).

    Returns
    -------
    float or ndarray

    Examples
    --------
    >>> round(recall(40, 20, 10, detectors=1, noise=0.5), 6)
    0.623814
    >>> f"{recall(40, 20, 10, detectors=4, noise=0.5, complement=True):.3e}"
    '2.003e-02'
    >>> recall(40, 20, 10, noise=0.25)  # 10 lost bits: a 20-bit sample keeps >= 10
    1.0
    """
    if sample_size is None:
        sample_size = weight
    scalar = _is_scalar(weight, sample_size, threshold, detectors, noise)
    a = _int_param("weight", weight)
    s = _int_param("sample_size", sample_size)
    th = _int_param("threshold", threshold)
    D = _int_param("detectors", detectors)
    rho = _real_param("noise", noise)
    _need(a >= 1, "weight={weight} must be >= 1", weight=a)
    _check_sample_size_threshold(s, th, a, "weight")
    _check_detectors(D)
    _check_noise(rho)
    k = np.clip(np.ceil(rho * a - 1e-9), 0, a)
    arrs = np.broadcast_arrays(a, s, th, D, k)
    shape = arrs[0].shape
    a, s, th, D, k = (x.ravel() for x in arrs)
    lmiss1 = _log_lower_tail(a, a - k, s, th)
    with np.errstate(invalid="ignore"):
        lmiss = np.where(np.isneginf(lmiss1), -np.inf, D * lmiss1)
    if complement:
        lv = lmiss
    else:
        # both tails are positive sums; the bank formula picks the exact one
        lv = _log_bank_fires(_log_upper_tail(a, a - k, s, th), lmiss1, D)
    lv = lv.reshape(shape)
    return _out(lv if log else np.exp(lv), scalar)


def detector_failure(bits, sample_size, threshold, lost, *, log=False):
    """Chance that a detector can no longer fire after bit positions die.

    ``lost`` of the ``bits`` positions die at random (they never read as
    set).  The detector fails when more than ``sample_size - threshold`` of its
    sampled positions are among them: ``P[Hyp(bits, lost, sample_size) >=
    sample_size - threshold + 1]``.

    Parameters
    ----------
    bits : int or array_like
        Code width n.
    sample_size : int or array_like
        Sampled bits per detector, ``1 <= sample_size <= bits``.
    threshold : int or array_like
        Firing threshold, ``1 <= threshold <= sample_size``.
    lost : int or array_like
        Dead positions, ``0 <= lost <= bits``.
    log : bool, optional
        Return the natural logarithm.

    Returns
    -------
    float or ndarray

    Examples
    --------
    >>> f"{detector_failure(2000, 20, 12, 20):.3e}"
    '1.927e-14'
    >>> detector_failure(2000, 20, 20, 0)
    0.0
    """
    scalar = _is_scalar(bits, sample_size, threshold, lost)
    n = _int_param("bits", bits)
    s = _int_param("sample_size", sample_size)
    th = _int_param("threshold", threshold)
    m = _int_param("lost", lost)
    _need(n >= 1, "bits={bits} must be >= 1", bits=n)
    _check_sample_size_threshold(s, th, n, "bits")
    _need(m >= 0, "lost={lost} must be >= 0", lost=m)
    _need(m <= n, "lost={lost} must be <= bits={bits}", lost=m, bits=n)
    shape = np.broadcast_shapes(n.shape, s.shape, th.shape, m.shape)
    lv = _log_upper_tail(n, m, s, s - th + 1.0).reshape(shape)
    return _out(lv if log else np.exp(lv), scalar)


def _log_store_false_hit(lp, M):
    """log(1 - (1 - p)^M) from log p (arrays), exact for tiny p."""
    lp = np.asarray(lp, dtype=np.float64)
    M = np.asarray(M, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        p = np.exp(lp)
        # -log(1-p) = p * c with c = -log1p(-p)/p; log c ~ p/2 for tiny p.
        logc = np.where(p > 1e-8, np.log(-np.log1p(-p)) - lp, p / 2.0)
        u = np.log(M) + lp + logc            # log(-M log(1-p))
        y = np.exp(u)
        lv = np.where(u < -20.0, u - y / 2.0, _log1mexp(-y))
    lv = np.where(M == 0, -np.inf, lv)
    lv = np.where(lp >= 0, 0.0, lv)
    return np.where(np.isneginf(lp) & (M > 0), -np.inf, lv)


def _per_code_param(per_code, log):
    lp = _real_param("per_code", per_code)
    if log:
        _need(lp <= 0, "per_code={p} must be <= 0 (a log chance)", p=lp)
    else:
        _need(lp >= 0, "per_code={p} must be >= 0", p=lp)
        _need(lp <= 1, "per_code={p} must be <= 1", p=lp)
        with np.errstate(divide="ignore"):
            lp = np.log(lp)
    return lp


def store_false_hit(per_code, items, *, log=False):
    """Chance of at least one false hit per unrelated query in a store.

    With ``items`` stored codes, each hit independently with chance
    ``per_code``: ``1 - (1 - per_code)**items``, computed as
    ``-expm1(items * log1p(-per_code))``.

    Parameters
    ----------
    per_code : float or array_like
        Per-code false-hit chance (its natural log if ``log=True``).
    items : int or array_like
        Stored codes, ``>= 0``.
    log : bool, optional
        Take ``per_code`` as a natural log and return one.

    Returns
    -------
    float or ndarray

    Notes
    -----
    The expected number of false hits per query is ``items * per_code``;
    this is the chance that there is at least one.

    Examples
    --------
    >>> f"{store_false_hit(1e-15, 10**6):.6e}"
    '1.000000e-09'
    >>> round(store_false_hit(-1000.0, 10**9, log=True), 3)
    -979.277
    """
    scalar = _is_scalar(per_code, items)
    lp = _per_code_param(per_code, log)
    M = _int_param("items", items, exact=False)
    _need(M >= 0, "items={items} must be >= 0", items=np.asarray(items))
    lv = _log_store_false_hit(lp, M)
    return _out(lv if log else np.exp(lv), scalar)


def code_limit(per_code, false_hit, *, log=False):
    """Largest number of stored codes whose store false-hit chance stays at
    or below ``false_hit``.

    ``floor(log1p(-false_hit) / log1p(-per_code))``, then adjusted so that
    :func:`store_false_hit` at the result is ``<= false_hit`` and above it at
    one more code.

    Parameters
    ----------
    per_code : float or array_like
        Per-code false-hit chance (its natural log if ``log=True``).
    false_hit : float or array_like
        Target chance of a false hit per query, ``0 < false_hit < 1``.
    log : bool, optional
        Take ``per_code`` as a natural log.

    Returns
    -------
    int, float or ndarray
        An ``int`` for scalar input (``math.inf`` when ``per_code`` is 0 or
        the limit exceeds the float range); a float64 array otherwise.

    Examples
    --------
    >>> code_limit(1e-15, 1e-9)
    1000000
    >>> code_limit(0.5, 0.75), code_limit(0.0, 0.1)
    (2, inf)
    """
    scalar = _is_scalar(per_code, false_hit)
    lp = _per_code_param(per_code, log)
    F = _real_param("false_hit", false_hit)
    _need(F > 0, "false_hit={F} must be > 0", F=F)
    _need(F < 1, "false_hit={F} must be < 1", F=F)
    lp, F = np.broadcast_arrays(lp, F)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        p = np.exp(lp)
        l1p = np.where(p > 1e-8, np.log1p(-p), -p * (1.0 + p / 2.0))
        # tiny p (even below 1e-308): M = -log1p(-F)/p = exp(log(-log1p(-F)) - lp)
        logM = np.log(-np.log1p(-F)) - lp
        M = np.where(p > 1e-300, np.floor(np.log1p(-F) / l1p), np.floor(np.exp(logM)))
    M = np.where(np.isneginf(lp), np.inf, M)
    M = np.where(lp >= 0, 0.0, M)
    M = np.asarray(M, dtype=np.float64)
    # Settle rounding at the boundary by the model's own store_false_hit,
    # compared as that function reports it (log or not).
    lF = np.log(F)

    def within(m):
        lv = _log_store_false_hit(lp, m)
        return lv <= lF if log else np.exp(lv) <= F

    fix = np.isfinite(M) & (M < 2.0**52)
    if np.any(fix):
        for _ in range(3):
            up = fix & within(M + 1.0)
            down = fix & (M > 0) & ~within(M)
            if not (np.any(up) or np.any(down)):
                break
            M = M + up - down
    # Near 2**52 one code moves the chance by about one rounding step, so the
    # first guess can be off by more than three: bisect what is left. Past
    # 2**52 only the guess's own rounding is settled, in steps of its spacing.
    finite = np.isfinite(M)
    if np.any(finite):
        left = np.flatnonzero((finite & ((fix & within(M + 1.0)) | ((M > 0) & ~within(M)))).reshape(-1))
        if left.size:
            flat_M, flat_lp, flat_F = M.reshape(-1).copy(), lp.reshape(-1), F.reshape(-1)
            for i in left:
                flat_M[i] = _bisect_limit(flat_M[i], lambda m, i=i: bool(
                    (_log_store_false_hit(flat_lp[i], m) <= np.log(flat_F[i])) if log
                    else (np.exp(_log_store_false_hit(flat_lp[i], m)) <= flat_F[i])))
            M = flat_M.reshape(M.shape)
    if scalar:
        m = float(M.reshape(()))
        return int(m) if math.isfinite(m) else math.inf
    return M


def _bisect_limit(guess: float, within) -> float:
    """Largest ``m >= 0`` with ``within(m)`` true, searched outward from ``guess``."""
    unit = max(1.0, float(np.spacing(guess)))
    step = unit
    lo = guess
    while lo > 0 and not within(lo):
        lo, step = max(0.0, guess - step), step * 2
    if not within(lo):
        return 0.0
    step = unit
    hi = lo + unit
    while within(hi):
        lo, hi, step = hi, hi + step, step * 2
    while hi - lo > unit:
        mid = math.floor((lo + hi) / 2 / unit) * unit
        if mid <= lo or mid >= hi:
            break
        lo, hi = (mid, hi) if within(mid) else (lo, mid)
    return lo


# ---------------------------------------------------------------------------
# Usage-aware model: conditional Poisson queries over non-uniform bits
# ---------------------------------------------------------------------------
#
# A query of weight q is a vector of independent Bernoulli(p_i) bits
# conditioned on exactly q set bits (conditional Poisson sampling).  Its law
# depends on p only through the odds w_i = p_i / (1 - p_i) up to one common
# factor, so every computation first moves to the representative whose
# unconditioned Poisson-binomial mean is q (``_centre``): then P[S = q] is
# near the largest mass of S and every dynamic-programming table below holds
# sums of positive terms of moderate size.  The derivation is in
# docs/model.md, section "Non-uniform bit usage".

@kernel
def _cps_suffix_table(pt, qt, q):
    """B[i, k] = P[bits i..n-1 hold k set bits], k = 0..q (Poisson-binomial).

    ``pt`` and ``qt`` are p and 1 - p (each computed directly, so neither
    loses digits near 0 or 1).  O(n q); every entry is a sum of positive
    terms.
    """
    n = pt.size
    table = np.zeros((n + 1, q + 1))
    table[n, 0] = 1.0
    for i in range(n - 1, -1, -1):
        a = pt[i]
        b = qt[i]
        table[i, 0] = b * table[i + 1, 0]
        for k in range(1, q + 1):
            table[i, k] = b * table[i + 1, k] + a * table[i + 1, k - 1]
    return table


@kernel
def _cps_inclusion(pt, qt, table, q):
    """Unnormalised inclusion masses (set, unset) of every bit given S = q.

    ``set[i] = p_i P[S_-i = q - 1]`` and ``unset[i] = (1 - p_i) P[S_-i = q]``
    with S_-i the count over the other bits, from a running prefix
    distribution and the suffix ``table``.  O(n q).
    """
    n = pt.size
    prefix = np.zeros(q + 1)
    prefix[0] = 1.0
    mass_set = np.zeros(n)
    mass_unset = np.zeros(n)
    for i in range(n):
        s1 = 0.0
        for k in range(q):
            s1 += prefix[k] * table[i + 1, q - 1 - k]
        s0 = 0.0
        for k in range(q + 1):
            s0 += prefix[k] * table[i + 1, q - k]
        mass_set[i] = pt[i] * s1
        mass_unset[i] = qt[i] * s0
        for k in range(q, 0, -1):
            prefix[k] = qt[i] * prefix[k] + pt[i] * prefix[k - 1]
        prefix[0] = qt[i] * prefix[0]
    return mass_set, mass_unset


@kernel
def _cps_draw(pt, qt, table, q, uniforms):
    """Exact conditional-Poisson samples, one row of ``q`` sorted bits each.

    Sequential method: with r bits still to place among bits l..n-1, bit l
    is set with chance p_l B[l+1, r-1] / B[l, r].  The next set bit is found
    by inverting its distribution with one uniform in (0, 1] per set bit, so
    a query costs O(n) and ``q`` random numbers.
    """
    n = pt.size
    count = uniforms.shape[0]
    out = np.empty((count, q), dtype=np.int64)
    for j in range(count):
        pos = 0
        r = q
        for k in range(q):
            u = uniforms[j, k]
            survive = 1.0
            while pos < n - 1:
                on = pt[pos] * table[pos + 1, r - 1]
                off = qt[pos] * table[pos + 1, r]
                total = on + off
                if total > 0.0:
                    survive *= off / total
                else:  # unreachable except through underflow: take the bit
                    survive = 0.0
                if survive < u:
                    break
                pos += 1
            out[j, k] = pos
            pos += 1
            r -= 1
    return out


@kernel
def _union_fire(pt, qt, code_ptr, det_ptr, flat, q, theta):
    """Unnormalised (fires, quiet) masses of each code given S = q.

    Code c owns detectors code_ptr[c]..code_ptr[c+1]-1; detector d samples
    bits flat[det_ptr[d]:det_ptr[d+1]] (distinct).  ``fires[c]`` is
    P[some detector has >= theta set bits, S = q] and ``quiet[c]``
    P[no detector does, S = q], both sums of positive terms:

    * the count R over the bits outside the union U of the code's samples
      is a Poisson-binomial computed directly over those bits (O(n q));
    * a joint dynamic programme over the bits of U tracks every detector's
      count below theta (theta**D quiet states, one absorbing "fired"
      state) and the number u of set bits of U (O(theta**D |U| min(|U|, q)));
    * the two are joined at R = q - u.
    """
    n = pt.size
    codes = code_ptr.size - 1
    fires = np.zeros(codes)
    quiet = np.zeros(codes)
    mark = np.zeros(n, dtype=np.int64)
    rest = np.zeros(q + 1)
    for c in range(codes):
        d0 = code_ptr[c]
        d1 = code_ptr[c + 1]
        nd = d1 - d0
        union = np.empty(det_ptr[d1] - det_ptr[d0], dtype=np.int64)
        size = 0
        for d in range(d0, d1):
            for t in range(det_ptr[d], det_ptr[d + 1]):
                b = flat[t]
                if mark[b] == 0:
                    union[size] = b
                    size += 1
                mark[b] |= np.int64(1) << np.int64(d - d0)
        # Count over the bits outside the union, truncated at q.
        rest[:] = 0.0
        rest[0] = 1.0
        top = 0
        for i in range(n):
            if mark[i] != 0 or pt[i] == 0.0:
                continue
            a = pt[i]
            b = qt[i]
            if top < q:
                top += 1
            for k in range(top, 0, -1):
                rest[k] = b * rest[k] + a * rest[k - 1]
            rest[0] = b * rest[0]
        # Joint programme over the union bits.
        nq = 1
        for d in range(nd):
            nq *= theta
        ucap = min(size, q)
        near = np.zeros(nq, dtype=np.int64)  # detectors one bit short of theta
        for s in range(nq):
            rem = s
            for d in range(nd):
                if rem % theta == theta - 1:
                    near[s] |= np.int64(1) << np.int64(d)
                rem //= theta
        cur = np.zeros((nq + 1, ucap + 1))
        nxt = np.zeros((nq + 1, ucap + 1))
        cur[0, 0] = 1.0
        for j in range(size):
            b = union[j]
            member = mark[b]
            step = 0
            power = 1
            for d in range(nd):
                if (member >> np.int64(d)) & 1:
                    step += power
                power *= theta
            a = pt[b]
            nb = qt[b]
            ulim = min(j, ucap)
            for s in range(nq + 1):
                for u in range(ucap + 1):
                    nxt[s, u] = nb * cur[s, u]
            for s in range(nq + 1):
                if s == nq:
                    target = nq
                elif near[s] & member:
                    target = nq
                else:
                    target = s + step
                for u in range(min(ulim, ucap - 1) + 1):
                    nxt[target, u + 1] += a * cur[s, u]
            tmp = cur
            cur = nxt
            nxt = tmp
        f = 0.0
        z = 0.0
        for u in range(ucap + 1):
            r = rest[q - u]
            if r == 0.0:
                continue
            f += cur[nq, u] * r
            zs = 0.0
            for s in range(nq):
                zs += cur[s, u]
            z += zs * r
        fires[c] = f
        quiet[c] = z
        for j in range(size):
            mark[union[j]] = 0
    return fires, quiet


# -- input checks for the usage-aware functions ------------------------------

def _per_bit(value, name, what):
    """Return ``value`` as a non-empty 1-D float64 array, or raise."""
    if isinstance(value, (bool, np.bool_)) or np.ndim(value) != 1:
        raise ValueError(f"{name} must be a 1-D array of {what}, got {_short(value)}")
    arr = np.asarray(value)
    if arr.dtype == np.bool_ or arr.dtype.kind not in "iuf":
        raise ValueError(f"{name} must hold numbers, got dtype {arr.dtype}")
    if arr.size == 0:
        raise ValueError(f"{name} must not be empty (one entry per bit)")
    return arr.astype(np.float64)


def _check_probabilities(p):
    """Return ``p`` as a 1-D float64 array of probabilities, or raise."""
    arr = _per_bit(p, "p", "per-bit probabilities")
    bad = np.flatnonzero(~(arr >= 0.0) | ~(arr <= 1.0))
    if bad.size:
        i = int(bad[0])
        raise ValueError(f"p[{i}]={_fmt(arr[i])} must be a probability in [0, 1]")
    return arr


def _short(value):
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _check_count(name, value, minimum=0):
    """Return ``value`` as a Python int ``>= minimum``, or raise ValueError."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        if isinstance(value, (float, np.floating)) and float(value).is_integer():
            value = int(value)
        else:
            raise ValueError(f"{name}={_short(value)} must be an integer")
    value = int(value)
    if value < minimum:
        raise ValueError(f"{name}={value} must be >= {minimum}")
    return value


def _check_query_weight(query_weight, p):
    q = _check_count("query_weight", query_weight)
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
                         f"arrays, got {_short(rows)}")
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
                             f"{_fmt(flat[i])}, not an integer")
    bad = np.flatnonzero((flat < 0) | (flat >= bits))
    if bad.size:
        i = int(bad[0])
        raise ValueError(f"{what}: detector {int(det[i])} has bit index "
                         f"{_fmt(flat[i])}, out of range for {bits} bits "
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
    theta = _check_count("threshold", threshold, minimum=1)
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
    fires, quiet = _union_fire(pt, qt, code_ptr, det_ptr, flat, int(q), int(theta))
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
    ``_cps_suffix_table`` and ``_cps_inclusion``), O(bits * q) time and
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
    on, off = _cps_inclusion(pt, qt, _cps_suffix_table(pt, qt, q), q)
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
    q = _check_count("query_weight", query_weight)
    used = int(np.count_nonzero(f > 0))
    if q > used:
        raise ValueError(f"query_weight={q} is impossible: only {used} of the "
                         f"{f.size} bits are used (frequency > 0)")
    tol = float(_real_param("tol", tol))
    if not tol > 0:
        raise ValueError(f"tol={tol!r} must be > 0")
    max_iter = _check_count("max_iter", max_iter, minimum=1)
    pi = _capped_targets(f, q)
    free = (pi > 0) & (pi < 1)
    target = _logit(pi)
    x = target.copy()
    for _ in range(max_iter):
        pt, qt = _centre(x, q)
        if not np.any(free):
            return pt
        on, off = _cps_inclusion(pt, qt, _cps_suffix_table(pt, qt, q), q)
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
        raise ValueError(f"frequencies[{i}]={_fmt(f[i])} must be finite and >= 0")
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
    Exact Poisson-binomial dynamic programming (kernel ``_union_fire``):
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
    Poisson-binomial count of the bits outside U (kernel ``_union_fire``).
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
    limit = _check_count("exact_limit", exact_limit, minimum=1)
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
    (kernel ``_cps_draw``).  One uniform number per set bit locates the next
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
    count = _check_count("count", count)
    rng = np.random.default_rng(seed)
    pt, qt = _centred(p, q)
    table = _cps_suffix_table(pt, qt, q)
    out = np.empty((count, q), dtype=np.int64)
    chunk = 4096
    for start in range(0, count, chunk):
        stop = min(count, start + chunk)
        uniforms = 1.0 - rng.random((stop - start, q))   # in (0, 1]
        out[start:stop] = _cps_draw(pt, qt, table, q, uniforms)
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


def _codes_csr(codes, bits):
    """(code_ptr, det_ptr, flat) for a sequence of per-code detector arrays."""
    if isinstance(codes, np.ndarray) and codes.ndim == 3:
        codes = list(codes)
    if not isinstance(codes, (list, tuple)) or not codes:
        raise ValueError("codes must be a non-empty sequence of per-code detector "
                         f"arrays (detectors, sample), got {_short(codes)}")
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
                             f"got {_short(code)}")
        if code_ptr[k + 1] == code_ptr[k]:
            raise ValueError(f"codes[{k}] has no detectors")
    det_ptr, flat, _ = _bit_rows(rows, bits, "codes")
    return code_ptr, det_ptr, flat


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
    >>> f"{10_000 * detector_false_hit(256, 8, 3, 16):.4f}"  # uniform bits
    '93.2187'
    """
    p = _check_probabilities(p)
    q = _check_query_weight(query_weight, p)
    items = _check_count("items", items, minimum=1)
    code_ptr, det_ptr, flat = _codes_csr(codes, p.size)
    m = code_ptr.size - 1
    if m > items:
        raise ValueError(f"items={items} is smaller than the {m} sampled codes")
    theta = _check_thresholds(threshold, det_ptr, "detector")
    limit = _check_count("exact_limit", exact_limit, minimum=1)
    work, nd = _union_work(code_ptr, det_ptr, theta)
    exact = (work <= limit) & (nd <= 62)
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
    mean = float(values.mean())
    if m == items:
        se = 0.0
    elif m == 1:
        se = math.nan
    else:
        se = math.sqrt(max(0.0, 1.0 - m / items) * float(values.var(ddof=1)) / m)
    return UsageFalseHits(expected=items * mean, stderr=items * se, per_code=mean,
                          per_code_stderr=se, codes_sampled=m, items=items,
                          bounded_codes=int(np.count_nonzero(~exact)))


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


# ---------------------------------------------------------------------------
# Exact binomial confidence intervals for measured false-hit rates
# ---------------------------------------------------------------------------

def _check_hits_trials(hits, trials, confidence):
    hits = _check_count("hits", hits)
    trials = _check_count("trials", trials, minimum=1)
    if hits > trials:
        raise ValueError(f"hits={hits} must be <= trials={trials}")
    if isinstance(confidence, (bool, np.bool_)) or not isinstance(
            confidence, (numbers.Real, np.floating)):
        raise ValueError(f"confidence={_short(confidence)} must be a number")
    confidence = float(confidence)
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence={confidence!r} must be between 0 and 1 (exclusive)")
    return hits, trials, confidence


def clopper_pearson(hits, trials, confidence=0.95):
    """Exact two-sided Clopper-Pearson interval for a binomial proportion.

    The interval holds every rate r whose binomial test at level
    ``1 - confidence`` split evenly between the tails keeps ``hits`` out of
    ``trials``: ``low = Beta^-1(alpha/2; x, n - x + 1)`` and
    ``high = Beta^-1(1 - alpha/2; x + 1, n - x)`` (C. J. Clopper and
    E. S. Pearson, "The use of confidence or fiducial limits illustrated in
    the case of the binomial", Biometrika 26, 1934).

    Parameters
    ----------
    hits : int
        Observed successes x (e.g. false hits), ``0 <= hits <= trials``.
    trials : int
        Trials n (e.g. measurement queries), ``>= 1``.
    confidence : float, optional
        Coverage, ``0 < confidence < 1``.

    Returns
    -------
    (float, float)
        ``(low, high)``; ``low = 0`` when ``hits == 0`` (then
        ``high = 1 - (alpha/2)**(1/n)``), ``high = 1`` when ``hits == trials``.

    Notes
    -----
    Quantiles from ``scipy.stats.beta.ppf``.  The coverage is at least
    ``confidence`` for every true rate (the interval is conservative).  For
    a one-sided upper bound, e.g. to report when a measurement sees no hit, use
    :func:`clopper_pearson_upper`.

    Examples
    --------
    >>> [round(x, 4) for x in clopper_pearson(5, 10)]
    [0.1871, 0.8129]
    >>> low, high = clopper_pearson(0, 1000)
    >>> low, round(high, 6)
    (0.0, 0.003682)
    """
    hits, trials, confidence = _check_hits_trials(hits, trials, confidence)
    from scipy.stats import beta

    alpha = 1.0 - confidence
    low = 0.0 if hits == 0 else float(beta.ppf(alpha / 2, hits, trials - hits + 1))
    high = 1.0 if hits == trials else float(beta.ppf(1 - alpha / 2, hits + 1, trials - hits))
    return low, high


def clopper_pearson_upper(hits, trials, confidence=0.95):
    """One-sided exact (Clopper-Pearson) upper confidence bound for a rate.

    The largest rate r with ``P[Bin(trials, r) <= hits] >= 1 - confidence``:
    ``Beta^-1(confidence; x + 1, n - x)``, 1 when ``hits == trials``.  With
    no hit it is ``1 - (1 - confidence)**(1/n)``, about 3/n at 95% (the
    "rule of three", J. A. Hanley and A. Lippman-Hand, JAMA 249, 1983).

    Parameters
    ----------
    hits : int
        Observed successes, ``0 <= hits <= trials``.
    trials : int
        Trials, ``>= 1``.
    confidence : float, optional
        Coverage, ``0 < confidence < 1``.

    Returns
    -------
    float

    Examples
    --------
    >>> round(clopper_pearson_upper(0, 1000), 6)
    0.002991
    >>> round(clopper_pearson_upper(5, 10), 4)
    0.7776
    """
    hits, trials, confidence = _check_hits_trials(hits, trials, confidence)
    if hits == trials:
        return 1.0
    from scipy.stats import beta

    return float(beta.ppf(confidence, hits + 1, trials - hits))
