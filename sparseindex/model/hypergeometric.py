"""The hypergeometric model: one detector, a bank, recall, a store and its limit.

Tail sums in log space with Loader's saddle-point pmf; the derivations are in
``docs/model.md``.
"""

from __future__ import annotations

import math

import numpy as np

from .checks import (check_bits_weight, check_detectors, check_noise, check_sample_size_threshold, int_param, is_scalar,
                     need, out, real_param)


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


def log_hyp_pmf(k, N, K, d):
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

def log1mexp(x):
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
        general = log1mexp(D * l1mt)
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
                    bound = last + lr - log1mexp(np.minimum(lr, 0.0))
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
                    bound = first + lr - log1mexp(np.minimum(lr, 0.0))
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
        lp = log_hyp_pmf(grid, N[rows, None], K[rows, None], d[rows, None])
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
        lp = log_hyp_pmf(grid, N[rows, None], K[rows, None], d[rows, None])
        return lp, lp

    lv = _window_logsum(kmin, np.minimum(theta - 1.0, kmax), mode,
                        np.ceil(30.0 * sd + 60.0), terms)
    return np.minimum(lv, 0.0)


def log_mixture(n, a, q, s, theta, D):
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
        lw = log_hyp_pmf(z, n[r], a[r], q[r])
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
    scalar = is_scalar(weight, noise)
    a = int_param("weight", weight)
    rho = real_param("noise", noise)
    need(a >= 1, "weight={weight} must be >= 1", weight=a)
    check_noise(rho)
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
    scalar = is_scalar(bits, sample_size, threshold, query_weight)
    n = int_param("bits", bits)
    s = int_param("sample_size", sample_size)
    th = int_param("threshold", threshold)
    q = int_param("query_weight", query_weight)
    need(n >= 1, "bits={bits} must be >= 1", bits=n)
    check_sample_size_threshold(s, th, n, "bits")
    need(q >= 0, "query_weight={q} must be >= 0", q=q)
    need(q <= n, "query_weight={q} must be <= bits={n}", q=q, n=n)
    shape = np.broadcast_shapes(n.shape, s.shape, th.shape, q.shape)
    lv = _log_upper_tail(n, s, q, th).reshape(shape)
    return out(lv if log else np.exp(lv), scalar)


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
    scalar = is_scalar(bits, weight, sample_size, threshold, detectors, query_weight)
    n = int_param("bits", bits)
    a = int_param("weight", weight)
    s = int_param("sample_size", sample_size)
    th = int_param("threshold", threshold)
    D = int_param("detectors", detectors)
    q = int_param("query_weight", query_weight)
    check_bits_weight(n, a)
    check_sample_size_threshold(s, th, a, "weight")
    check_detectors(D)
    need(q >= 0, "query_weight={q} must be >= 0", q=q)
    need(q <= n, "query_weight={q} must be <= bits={n}", q=q, n=n)
    arrs = np.broadcast_arrays(n, a, s, th, D, q)
    shape = arrs[0].shape
    n, a, s, th, D, q = (x.ravel() for x in arrs)
    lv = np.empty(n.shape)
    one = D == 1
    if np.any(one):
        lv[one] = _log_upper_tail(n[one], s[one], q[one], th[one])
    many = ~one
    if np.any(many):
        lv[many] = log_mixture(n[many], a[many], q[many], s[many], th[many], D[many])
    lv = lv.reshape(shape)
    return out(lv if log else np.exp(lv), scalar)


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
    scalar = is_scalar(weight, sample_size, threshold, detectors, noise)
    a = int_param("weight", weight)
    s = int_param("sample_size", sample_size)
    th = int_param("threshold", threshold)
    D = int_param("detectors", detectors)
    rho = real_param("noise", noise)
    need(a >= 1, "weight={weight} must be >= 1", weight=a)
    check_sample_size_threshold(s, th, a, "weight")
    check_detectors(D)
    check_noise(rho)
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
    return out(lv if log else np.exp(lv), scalar)


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
    scalar = is_scalar(bits, sample_size, threshold, lost)
    n = int_param("bits", bits)
    s = int_param("sample_size", sample_size)
    th = int_param("threshold", threshold)
    m = int_param("lost", lost)
    need(n >= 1, "bits={bits} must be >= 1", bits=n)
    check_sample_size_threshold(s, th, n, "bits")
    need(m >= 0, "lost={lost} must be >= 0", lost=m)
    need(m <= n, "lost={lost} must be <= bits={bits}", lost=m, bits=n)
    shape = np.broadcast_shapes(n.shape, s.shape, th.shape, m.shape)
    lv = _log_upper_tail(n, m, s, s - th + 1.0).reshape(shape)
    return out(lv if log else np.exp(lv), scalar)


def log_store_false_hit(lp, M):
    """log(1 - (1 - p)^M) from log p (arrays), exact for tiny p."""
    lp = np.asarray(lp, dtype=np.float64)
    M = np.asarray(M, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        p = np.exp(lp)
        # -log(1-p) = p * c with c = -log1p(-p)/p; log c ~ p/2 for tiny p.
        logc = np.where(p > 1e-8, np.log(-np.log1p(-p)) - lp, p / 2.0)
        u = np.log(M) + lp + logc            # log(-M log(1-p))
        y = np.exp(u)
        lv = np.where(u < -20.0, u - y / 2.0, log1mexp(-y))
    lv = np.where(M == 0, -np.inf, lv)
    lv = np.where(lp >= 0, 0.0, lv)
    return np.where(np.isneginf(lp) & (M > 0), -np.inf, lv)


def _per_code_param(per_code, log):
    lp = real_param("per_code", per_code)
    if log:
        need(lp <= 0, "per_code={p} must be <= 0 (a log chance)", p=lp)
    else:
        need(lp >= 0, "per_code={p} must be >= 0", p=lp)
        need(lp <= 1, "per_code={p} must be <= 1", p=lp)
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
    scalar = is_scalar(per_code, items)
    lp = _per_code_param(per_code, log)
    M = int_param("items", items, exact=False)
    need(M >= 0, "items={items} must be >= 0", items=np.asarray(items))
    lv = log_store_false_hit(lp, M)
    return out(lv if log else np.exp(lv), scalar)


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
    scalar = is_scalar(per_code, false_hit)
    lp = _per_code_param(per_code, log)
    F = real_param("false_hit", false_hit)
    need(F > 0, "false_hit={F} must be > 0", F=F)
    need(F < 1, "false_hit={F} must be < 1", F=F)
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
        lv = log_store_false_hit(lp, m)
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
                    (log_store_false_hit(flat_lp[i], m) <= np.log(flat_F[i])) if log
                    else (np.exp(log_store_false_hit(flat_lp[i], m)) <= flat_F[i])))
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
