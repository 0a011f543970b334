"""Kernels of the usage-aware model: conditional Poisson tables, inclusion chances, draws, bank fire chances.

Arrays in, arrays out; :mod:`sparseindex.model.usage` validates and calls them.
"""

from __future__ import annotations

import numpy as np

from .config import kernel


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
def cps_suffix_table(pt, qt, q):
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
def cps_inclusion(pt, qt, table, q):
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
def cps_draw(pt, qt, table, q, uniforms):
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
def union_fire(pt, qt, code_ptr, det_ptr, flat, q, theta):
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
