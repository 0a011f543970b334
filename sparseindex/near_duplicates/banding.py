"""Banded min-wise hashing of set bits: signatures, band keys, the S-curve, the band choice.

Published methods
-----------------
* Min-wise hashing: Broder, "On the resemblance and containment of
  documents" (1997). For a random permutation of the bit positions, the
  smallest permuted position of code A equals that of code B with
  probability exactly J(A, B) = |A ∩ B| / |A ∪ B|.
* Banding: Leskovec, Rajaraman & Ullman, *Mining of Massive Datasets*,
  ch. 3 (§3.4). ``bands * rows`` min-hashes are cut into ``bands`` groups
  of ``rows``; two codes become a *candidate pair* when all ``rows``
  min-hashes of at least one band agree, which happens with probability
  ``1 - (1 - J**rows) ** bands`` (the S-curve).

Here a "permutation" is the seeded bijective hash
``h_k(x) = mix64(salt_k ^ mix64(x))`` (``mix64`` is the splitmix64
finaliser in ``_kernels``): no two bits of one code ever tie, so the
agreement probability is J as for a true permutation. A band's ``rows``
minima are folded into one 64-bit key; codes that share a key in some band
are candidates. Two different tuples of minima may fold to one key with
probability 2**-64, which can only add a candidate, never lose one.

Every candidate is then verified exactly on the packed codes (AND +
popcount), so what leaves this module is exact: precision is 1 and the only
uncertainty is which true pairs the bands missed, which :func:`s_curve`
predicts.

Kernels here compute only (arrays in, arrays out, no validation); the
wrappers below and :mod:`sparseindex.near_duplicates` validate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .._numba import kernels as _kernels
from .._numba.banding import band_keys_kernel, gather_matches, pair_overlaps, run_pair_counts, verify_positions
from .._numba.config import PARALLEL_LOCK, thread_count
from .._numba.kernels import mix64
from ..codes import Codes, row_table

__all__ = [
    "s_curve",
    "jaccard_floor",
    "bands_for_recall",
    "BandChoice",
    "choose_bands",
    "similarity_moments",
    "hash_salts",
    "band_keys",
    "candidate_pairs",
    "bit_usage",
    "index_seconds",
    "banding_seconds",
    "COST",
]

_GOLDEN = 0x9E3779B97F4A7C15
_MASK64 = 0xFFFFFFFFFFFFFFFF

#: Most min-hashes per code the automatic choice considers (bands * rows).
MAX_HASHES = 1024
#: Most rows per band the automatic choice considers.
MAX_ROWS = 16
#: Codes per signature chunk (bounds temporaries; one progress step each).
SIGNATURE_CHUNK = 1 << 16
#: Candidate pairs verified per kernel call (bounds the overlap buffer).
VERIFY_CHUNK = 1 << 24

#: Cost constants of the work model, seconds per unit of work on one core,
#: fitted with ``benchmarks/bench_near_duplicates.py`` (where and how: DEVELOPERS.md,
#: "Measured choices"); only their ratios matter for the choices made with them.
#: ``hash``: one (set bit, hash function) evaluation of the signatures;
#: ``key``: one band key sorted and scanned (per code and band, 10^6 keys);
#: ``pair``: one candidate pair verified (random rows, AND + popcount);
#: ``posting``: one counter update of the exact index's scan-count;
#: ``add``: one set bit indexed by ``Store.add``.
COST = {
    "hash": 1.3e-9,
    "key": 1.3e-7,
    "pair": 6.0e-8,
    "posting": 2.2e-9,
    "add": 2.5e-8,
}


# ---------------------------------------------------------------------------
# analytic side: S-curve, Jaccard floor, band choice
# ---------------------------------------------------------------------------


def bit_usage(codes: Codes) -> np.ndarray:
    """How many codes set each bit that any of them sets, in bit order (kernel ``bit_usage`` for packed codes).

    Sized by the bits in use, never by the width.

    Examples
    --------
    >>> bit_usage(Codes.from_indices([[0, 1, 2], [1, 2, 3], [9]], bits=16)).tolist()
    [1, 2, 2, 1, 1]
    """
    if codes.layout == "packed":
        none = np.zeros(0, dtype=np.int64)
        with PARALLEL_LOCK:
            counts = _kernels.bit_usage(row_table(codes)[0], none, none.astype(bool))[: codes.bits]
        return counts[counts > 0]
    return np.unique(row_table(codes)[2], return_counts=True)[1].astype(np.int64)


def s_curve(similarity, bands: int, rows: int):
    """Chance that a pair of Jaccard similarity ``s`` becomes a candidate.

    ``1 - (1 - s**rows) ** bands`` (Mining of Massive Datasets, §3.4),
    computed as ``-expm1(bands * log1p(-s**rows))`` so that values near 0
    and near 1 keep their digits. Accepts a scalar or an array.

    Examples
    --------
    >>> round(float(s_curve(0.5, bands=20, rows=5)), 3)
    0.47
    """
    s = np.asarray(similarity, dtype=np.float64)
    p = s**rows
    with np.errstate(divide="ignore"):
        out = -np.expm1(bands * np.log1p(-p))
    out = np.where(p >= 1.0, 1.0, out)
    return float(out) if out.ndim == 0 else out


def jaccard_floor(min_overlap: int, weight_a: int, weight_b: int) -> float:
    """Smallest Jaccard similarity of two codes with overlap >= ``min_overlap``.

    J = z / (|A| + |B| - z) increases with the overlap z, so the floor is
    ``m / (|A| + |B| - m)``; 0 when a code is lighter than ``m`` (no such
    pair exists).

    Examples
    --------
    >>> round(jaccard_floor(32, 40, 40), 4)
    0.6667
    """
    if weight_a < min_overlap or weight_b < min_overlap:
        return 0.0
    return min_overlap / (weight_a + weight_b - min_overlap)


def bands_for_recall(similarity: float, rows: int, recall: float) -> int | None:
    """Fewest bands of ``rows`` rows giving candidate chance >= ``recall`` at ``similarity``.

    None when no finite number does (similarity 0 or recall 1).

    Examples
    --------
    >>> bands_for_recall(2 / 3, rows=3, recall=0.99)
    14
    """
    p = similarity**rows
    if p >= 1.0:
        return 1
    if p <= 0.0 or recall >= 1.0:
        return None
    b = max(1, math.ceil(math.log1p(-recall) / math.log1p(-p)))
    while s_curve(similarity, b, rows) < recall:  # guard the ceil against rounding
        b += 1
    return b


@dataclass(frozen=True)
class BandChoice:
    """Bands chosen for a target, with the work they are predicted to cost.

    ``recall`` is the predicted candidate chance of the hardest true pair
    (at ``worst_jaccard``); ``candidates`` the expected number of candidate
    pairs verified (band collisions summed over bands); ``seconds`` the
    work model's time on this machine's threads.

    Examples
    --------
    >>> c = BandChoice(bands=14, rows=3, worst_jaccard=2 / 3, recall=0.9927, candidates=1.5e9, seconds=49.1)
    >>> c.hashes
    42
    """

    bands: int
    rows: int
    worst_jaccard: float
    recall: float
    candidates: float
    seconds: float

    @property
    def hashes(self) -> int:
        """Min-hashes per code (bands * rows).

        Examples
        --------
        >>> BandChoice(20, 5, 0.5, 0.47, 0.0, 0.0).hashes
        100
        """
        return self.bands * self.rows


def banding_seconds(bands, rows, *, codes, set_bits, moment, threads) -> tuple[float, float]:
    """Work model of banding: (expected candidate pairs, predicted seconds).

    Signatures cost ``set_bits * bands * rows`` hash evaluations (parallel),
    band keys ``codes * bands`` sorted keys, and each band verifies
    ``C(codes, 2) * E[J**rows]`` pairs on average (``moment``: that mean
    over random pairs of the data).

    Examples
    --------
    >>> cand, secs = banding_seconds(14, 3, codes=10**6, set_bits=4 * 10**7, moment=2.2e-4, threads=2)
    >>> f"{cand:.3g} pairs, {secs:.0f} s"
    '1.54e+09 pairs, 49 s'
    """
    pairs = codes * (codes - 1) / 2.0
    candidates = bands * pairs * moment
    seconds = (
        COST["hash"] * set_bits * bands * rows / threads
        + COST["key"] * codes * bands
        + COST["pair"] * candidates / threads
    )
    return candidates, seconds


def choose_bands(worst_jaccard, recall, *, codes, set_bits, moments, threads=None) -> BandChoice | None:
    """The (bands, rows) of least predicted work meeting ``recall`` at ``worst_jaccard``.

    For each ``rows`` in 1..``MAX_ROWS`` the fewest bands reaching the
    target (:func:`bands_for_recall`) are taken, then the pair of least
    :func:`banding_seconds`. ``moments[r - 1]`` is E[J**r] over random pairs
    of the data (:func:`similarity_moments`). None when no choice within
    ``MAX_HASHES`` min-hashes per code reaches the target.

    Examples
    --------
    >>> m = [1.0e-2, 2.2e-4, 6.3e-6, 2.1e-7, 8.5e-9, 4.0e-10]  # random 2048-bit codes of weight 40
    >>> c = choose_bands(2 / 3, 0.99, codes=10**6, set_bits=4 * 10**7, moments=m, threads=2)
    >>> (c.bands, c.rows, c.recall >= 0.99)
    (14, 3, True)
    """
    threads = threads or thread_count()
    best = None
    for rows in range(1, min(MAX_ROWS, len(moments)) + 1):
        bands = bands_for_recall(worst_jaccard, rows, recall)
        if bands is None or bands * rows > MAX_HASHES:
            continue
        candidates, seconds = banding_seconds(
            bands, rows, codes=codes, set_bits=set_bits, moment=moments[rows - 1], threads=threads
        )
        choice = BandChoice(bands, rows, worst_jaccard, s_curve(worst_jaccard, bands, rows), candidates, seconds)
        if best is None or choice.seconds < best.seconds:
            best = choice
    return best


def similarity_moments(codes: Codes, *, max_rows=MAX_ROWS, samples=200_000, seed=0) -> np.ndarray:
    """E[J**r] for r = 1..``max_rows`` over random distinct pairs of rows.

    Every pair when there are at most ``samples`` of them, else a seeded
    sample of ``samples`` pairs. Feeds the expected candidate count of the
    work model. O(samples · words or set bits per code).

    Examples
    --------
    >>> similarity_moments(Codes.from_indices([[0, 1, 2], [1, 2, 3]], bits=4), max_rows=2).tolist()
    [0.5, 0.25]
    """
    n, weights = len(codes), codes.weights
    if n < 2:
        return np.zeros(max_rows)
    total = n * (n - 1) // 2
    if total <= samples:
        lo, hi = np.triu_indices(n, k=1)
    else:
        rng = np.random.default_rng(seed)
        lo = rng.integers(0, n, size=samples)
        hi = rng.integers(0, n - 1, size=samples)
        hi += hi >= lo
    lo = lo.astype(np.int64)
    hi = hi.astype(np.int64)
    ov = pair_overlaps(row_table(codes), lo, hi).astype(np.float64)
    union = weights[lo].astype(np.float64) + weights[hi] - ov
    j = np.divide(ov, union, out=np.zeros_like(ov), where=union > 0)
    powers = j[None, :] ** np.arange(1, max_rows + 1)[:, None]
    return powers.mean(axis=1)


def hash_salts(seed: int, count: int) -> np.ndarray:
    """``count`` uint64 salts of the min-hash functions, from ``seed`` (splitmix64 stream).

    Examples
    --------
    >>> a = hash_salts(7, 3); b = hash_salts(7, 5)
    >>> bool((a == b[:3]).all()), a.dtype.name
    (True, 'uint64')
    """
    out = np.empty(count, dtype=np.uint64)
    state = int(seed) & _MASK64
    for k in range(count):
        state = (state + _GOLDEN) & _MASK64
        out[k] = mix64(np.uint64(state))
    return out



# ---------------------------------------------------------------------------
# wrappers
# ---------------------------------------------------------------------------


def band_keys(codes: Codes, *, bands, rows, seed, progress=None) -> np.ndarray:
    """Band keys of codes, shape (bands, codes), uint64 (kernel ``band_keys_kernel``).

    A code's keys depend only on its set bits, ``seed``, ``bands`` and
    ``rows``, never on its position in the batch. Signatures are computed
    in chunks of ``SIGNATURE_CHUNK`` codes, in parallel over codes; each
    chunk is one ``progress(done, total)`` step. O(set bits · bands · rows).

    Examples
    --------
    >>> k = band_keys(Codes.from_indices([[0, 1, 3], [0, 1, 3], [2]], bits=4), bands=2, rows=2, seed=1)
    >>> k.shape, bool((k[:, 0] == k[:, 1]).all()), bool((k[:, 0] != k[:, 2]).any())
    ((2, 3), True, True)
    """
    n = len(codes)
    salts = hash_salts(seed, bands * rows)
    keys = np.empty((bands, n), dtype=np.uint64)
    for c0 in range(0, n, SIGNATURE_CHUNK):
        c1 = min(n, c0 + SIGNATURE_CHUNK)
        indptr, indices = codes[c0:c1].to_csr()
        with PARALLEL_LOCK:
            keys[:, c0:c1] = band_keys_kernel(indptr, indices, salts, bands, rows)
        if progress is not None:
            progress(c1, n)
    return keys


def _band_matches(keys_j, table, min_overlap):
    """Verified pairs among codes sharing a key in one band; also the candidates checked."""
    order = np.argsort(keys_j, kind="stable")
    counts = run_pair_counts(keys_j[order])
    positions = np.flatnonzero(counts)
    per = counts[positions]
    found = []
    checked = 0
    start = 0
    while start < positions.shape[0]:
        # a chunk of positions whose candidates fit VERIFY_CHUNK (at least one position)
        cum = np.cumsum(per[start:])
        stop = start + max(1, int(np.searchsorted(cum, VERIFY_CHUNK, side="right")))
        pos = positions[start:stop]
        offsets = np.zeros(pos.shape[0], dtype=np.int64)
        np.cumsum(per[start : stop - 1], out=offsets[1:])
        total = int(per[start:stop].sum())
        out = np.empty(total, dtype=np.int64)
        with PARALLEL_LOCK:
            verify_positions(order, pos, offsets, counts, table, out)
        found.append(gather_matches(order, pos, offsets, counts, out, min_overlap))
        checked += total
        start = stop
    return found, checked


def candidate_pairs(codes: Codes, *, min_overlap, bands, rows, seed, progress=None):
    """Every pair of rows that shares a band key and overlaps by >= ``min_overlap``.

    Returns ``(lo, hi, overlap, candidates)``: distinct pairs ``lo < hi``
    (sorted by ``lo``, then ``hi``) with their exact overlaps, and the
    number of candidate pairs verified (a pair colliding in several bands
    is counted in each). A true pair of Jaccard similarity J is returned
    with probability :func:`s_curve` ``(J, bands, rows)``; nothing else is
    ever returned. ``progress(stage, done, total)`` is told of signature
    chunks (stage ``"signatures"``) and bands (``"bands"``).

    Cost: O(set bits · bands · rows) hashing, ``bands`` sorts of the codes,
    one exact overlap per candidate (AND + popcount, or a merge of index rows).

    Examples
    --------
    >>> codes = Codes.from_indices([[0, 1, 2, 3], [0, 1, 2], [4]], bits=8)
    >>> lo, hi, ov, _ = candidate_pairs(codes, min_overlap=3, bands=8, rows=1, seed=0)
    >>> lo.tolist(), hi.tolist(), ov.tolist()
    ([0], [1], [3])
    """
    n = len(codes)
    table = row_table(codes)
    step = None if progress is None else (lambda done, total: progress("signatures", done, total))
    keys = band_keys(codes, bands=bands, rows=rows, seed=seed, progress=step)
    pieces = []
    checked = 0
    for j in range(bands):
        found, c = _band_matches(keys[j], table, min_overlap)
        pieces.extend(found)
        checked += c
        if progress is not None:
            progress("bands", j + 1, bands)
    del keys
    if not pieces:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty.copy(), empty.copy(), checked
    lo = np.concatenate([p[0] for p in pieces])
    hi = np.concatenate([p[1] for p in pieces])
    ov = np.concatenate([p[2] for p in pieces])
    flat, first = np.unique(lo * np.int64(n) + hi, return_index=True)
    return flat // n, flat % n, ov[first], checked


def index_seconds(codes: Codes, *, threads=None) -> float:
    """Work model of the exact index over these rows, in seconds.

    Adding the rows chunk by chunk and querying each chunk against the rows
    stored so far updates, for every bit, one counter per pair of rows that
    both set it: ``sum_b usage_b**2 / 2`` counter updates in all, plus the
    postings built.

    Examples
    --------
    >>> codes = Codes.from_indices([[0, 1, 2], [1, 2, 3]], bits=4)   # bit usage 1, 2, 2, 1
    >>> index_seconds(codes, threads=1) == COST["posting"] * (1 + 4 + 4 + 1) / 2 + COST["add"] * 6
    True
    """
    threads = threads or thread_count()
    usage = bit_usage(codes).astype(np.float64)
    updates = float((usage * usage).sum()) / 2.0
    return COST["posting"] * updates / threads + COST["add"] * float(usage.sum())
