"""The analytic false-hit and recall model for detector banks.

Every stored code owns a bank of ``detectors``; each detector samples
``segment`` of the code's set bits and fires on a query that has at least
``threshold`` of them set.  The chances that matter for sizing a store are
hypergeometric tail sums, and this module computes them exactly in log space:

* :func:`detector_false_hit` -- one detector against a random query;
* :func:`false_hit_per_code` -- one stored code (its whole bank) against a
  random query, as the mixture over the query's overlap with the code;
* :func:`recall` -- a copy of a stored code that lost some of its set bits;
* :func:`detector_failure` -- a detector after bit positions die at random;
* :func:`store_false_hit` and :func:`capacity` -- a store of many codes.

All functions accept numpy arrays for any parameter (they broadcast) and then
return arrays; with scalar arguments they return Python numbers.  Pass
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

import math
import numbers

import numpy as np

__all__ = [
    "PlanError",
    "capacity",
    "detector_failure",
    "detector_false_hit",
    "false_hit_per_code",
    "lost_bits",
    "recall",
    "store_false_hit",
]


class PlanError(ValueError):
    """No configuration meets the requested targets.

    Raised by :func:`sparseindex.planner.plan`; the message names the target
    that cannot be met and the best values that can be reached.
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


def _check_bits_active(bits, active):
    _need(bits >= 1, "bits={bits} must be >= 1", bits=bits)
    _need(active >= 1, "active={active} must be >= 1", active=active)
    _need(active <= bits, "active={active} must be <= bits={bits}",
          active=active, bits=bits)


def _check_segment_threshold(segment, threshold, limit, limit_name):
    _need(segment >= 1, "segment={segment} must be >= 1", segment=segment)
    _need(segment <= limit, "segment={segment} must be <= " + limit_name
          + "={limit}", segment=segment, limit=limit)
    _need(threshold >= 1, "threshold={threshold} must be >= 1",
          threshold=threshold)
    _need(threshold <= segment,
          "threshold={threshold} must be <= segment={segment}",
          threshold=threshold, segment=segment)


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

def lost_bits(active, noise):
    """Number of set bits a noisy copy lacks: ``ceil(noise * active)``.

    Products within 1e-9 of an integer count as that integer, so that for
    example ``noise=0.1`` with ``active=30`` loses 3 bits, not 4.

    Parameters
    ----------
    active : int or array_like
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
    scalar = _is_scalar(active, noise)
    a = _int_param("active", active)
    rho = _real_param("noise", noise)
    _need(a >= 1, "active={active} must be >= 1", active=a)
    _check_noise(rho)
    k = np.ceil(rho * a - 1e-9)
    k = np.clip(k, 0, a)
    return int(k) if scalar else k.astype(np.int64)


def detector_false_hit(bits, segment, threshold, query_active, *, log=False):
    """Chance that one detector fires on an unrelated random query.

    The query is a uniformly random set of ``query_active`` of the ``bits``
    positions; the detector fires when at least ``threshold`` of its
    ``segment`` sampled positions are among them:
    ``P[Hyp(bits, segment, query_active) >= threshold]``.

    Parameters
    ----------
    bits : int or array_like
        Code width n, ``>= 1``.
    segment : int or array_like
        Sampled bits per detector s, ``1 <= segment <= bits``.
    threshold : int or array_like
        Firing threshold, ``1 <= threshold <= segment``.
    query_active : int or array_like
        Set bits of the query q, ``0 <= query_active <= bits``.
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
    scalar = _is_scalar(bits, segment, threshold, query_active)
    n = _int_param("bits", bits)
    s = _int_param("segment", segment)
    th = _int_param("threshold", threshold)
    q = _int_param("query_active", query_active)
    _need(n >= 1, "bits={bits} must be >= 1", bits=n)
    _check_segment_threshold(s, th, n, "bits")
    _need(q >= 0, "query_active={q} must be >= 0", q=q)
    _need(q <= n, "query_active={q} must be <= bits={n}", q=q, n=n)
    shape = np.broadcast_shapes(n.shape, s.shape, th.shape, q.shape)
    lv = _log_upper_tail(n, s, q, th).reshape(shape)
    return _out(lv if log else np.exp(lv), scalar)


def false_hit_per_code(bits, active, segment, threshold, detectors=1,
                       query_active=None, *, log=False):
    """Chance that one stored code is hit by an unrelated random query.

    The stored code has ``active`` set bits and ``detectors`` detectors, each
    sampling ``segment`` of them independently.  With the query's overlap
    Z ~ Hyp(bits, active, query_active) with the code, the detectors fire
    independently given Z = z, each with t(z) = P[Hyp(active, z, segment) >=
    threshold], so the chance is the mixture
    ``sum_z P[Z = z] * (1 - (1 - t(z))**detectors)``.

    Parameters
    ----------
    bits : int or array_like
        Code width n.
    active : int or array_like
        Set bits of the stored code a, ``1 <= active <= bits``.
    segment : int, array_like or None
        Sampled bits per detector; ``None`` means all ``active`` bits.
    threshold : int or array_like
        Firing threshold, ``1 <= threshold <= segment``.
    detectors : int or array_like, optional
        Detectors per code D, ``>= 1``.
    query_active : int, array_like or None, optional
        Set bits of the query; ``None`` means ``active``.
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
    >>> f"{false_hit_per_code(2048, 40, 20, 10, detectors=4):.4e}"
    '1.5622e-12'
    >>> false_hit_per_code(2048, 40, 20, 10) == detector_false_hit(2048, 20, 10, 40)
    True
    """
    if segment is None:
        segment = active
    if query_active is None:
        query_active = active
    scalar = _is_scalar(bits, active, segment, threshold, detectors, query_active)
    n = _int_param("bits", bits)
    a = _int_param("active", active)
    s = _int_param("segment", segment)
    th = _int_param("threshold", threshold)
    D = _int_param("detectors", detectors)
    q = _int_param("query_active", query_active)
    _check_bits_active(n, a)
    _check_segment_threshold(s, th, a, "active")
    _check_detectors(D)
    _need(q >= 0, "query_active={q} must be >= 0", q=q)
    _need(q <= n, "query_active={q} must be <= bits={n}", q=q, n=n)
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


def recall(active, segment, threshold, detectors=1, noise=0.0, *,
           log=False, complement=False):
    """Chance that a noisy copy of a stored code is still recalled.

    The copy lacks k = ``lost_bits(active, noise)`` of the code's set bits
    (replaced by bits outside the code, which no detector samples).  One
    detector keeps Hyp(active, active - k, segment) of its sampled bits and
    fires when that is at least ``threshold``; the bank recalls the code when
    any of its independent detectors fires: ``1 - (1 - r1)**detectors``.

    Parameters
    ----------
    active : int or array_like
        Set bits of the stored code.
    segment : int, array_like or None
        Sampled bits per detector; ``None`` means all ``active`` bits.
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
    if segment is None:
        segment = active
    scalar = _is_scalar(active, segment, threshold, detectors, noise)
    a = _int_param("active", active)
    s = _int_param("segment", segment)
    th = _int_param("threshold", threshold)
    D = _int_param("detectors", detectors)
    rho = _real_param("noise", noise)
    _need(a >= 1, "active={active} must be >= 1", active=a)
    _check_segment_threshold(s, th, a, "active")
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


def detector_failure(bits, segment, threshold, lost, *, log=False):
    """Chance that a detector can no longer fire after bit positions die.

    ``lost`` of the ``bits`` positions die at random (they never read as
    set).  The detector fails when more than ``segment - threshold`` of its
    sampled positions are among them: ``P[Hyp(bits, lost, segment) >=
    segment - threshold + 1]``.

    Parameters
    ----------
    bits : int or array_like
        Code width n.
    segment : int or array_like
        Sampled bits per detector, ``1 <= segment <= bits``.
    threshold : int or array_like
        Firing threshold, ``1 <= threshold <= segment``.
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
    scalar = _is_scalar(bits, segment, threshold, lost)
    n = _int_param("bits", bits)
    s = _int_param("segment", segment)
    th = _int_param("threshold", threshold)
    m = _int_param("lost", lost)
    _need(n >= 1, "bits={bits} must be >= 1", bits=n)
    _check_segment_threshold(s, th, n, "bits")
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


def capacity(per_code, false_hit, *, log=False):
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
        the capacity exceeds the float range); a float64 array otherwise.

    Examples
    --------
    >>> capacity(1e-15, 1e-9)
    1000000
    >>> capacity(0.5, 0.75), capacity(0.0, 0.1)
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
    if scalar:
        m = float(M.reshape(()))
        return int(m) if math.isfinite(m) else math.inf
    return M
