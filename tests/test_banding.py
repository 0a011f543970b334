"""Banded min-wise hashing: the S-curve, the band choice, signatures, candidate recall.

References named beside each check:

* the published table of Leskovec, Rajaraman & Ullman, *Mining of Massive
  Datasets*, §3.4 (b = 20 bands of r = 5 rows);
* simulation counts against the analytic probabilities, within 3 sigma;
* a scipy.sparse product for exact overlaps, numpy's ``unique`` for exact
  copies, ``scipy.sparse.csgraph.connected_components`` for union–find;
* brute force over the (bands, rows) grid for the band choice.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.sparse.csgraph import connected_components

from sparseindex import Codes
from sparseindex.codes import packed_table
from sparseindex.near_duplicates import banding as _banding
from sparseindex._numba import unionfind as _unionfind
from sparseindex.near_duplicates.banding import (
    MAX_HASHES,
    MAX_ROWS,
    bands_for_recall,
    banding_seconds,
    candidate_pairs,
    choose_bands,
    jaccard_floor,
    s_curve,
)

# ---------------------------------------------------------------------------
# analytic side
# ---------------------------------------------------------------------------

# Mining of Massive Datasets (Leskovec, Rajaraman, Ullman), §3.4, the table of
# 1 - (1 - s^r)^b for b = 20, r = 5, as printed (3 decimals; 4 for 0.8).
MMDS_TABLE = [(0.2, "0.006"), (0.3, "0.047"), (0.4, "0.186"), (0.5, "0.470"),
              (0.6, "0.802"), (0.7, "0.975"), (0.8, "0.9996")]


@pytest.mark.parametrize("s,printed", MMDS_TABLE)
def test_s_curve_matches_the_published_table(s, printed):
    # reference: MMDS §3.4; equal to the table's printed precision
    decimals = len(printed.split(".")[1])
    assert round(s_curve(s, bands=20, rows=5), decimals) == float(printed)


def test_s_curve_ends_and_vector_form():
    assert s_curve(0.0, 20, 5) == 0.0
    assert s_curve(1.0, 20, 5) == 1.0
    got = s_curve(np.array([0.2, 0.8]), 20, 5)
    assert isinstance(got, np.ndarray) and got.shape == (2,)
    # keeps digits far from 0.5: 1 - (1 - 1e-10)^3 = 3e-10 to many digits (exact rational reference)
    assert s_curve(1e-2, 3, 5) == pytest.approx(3e-10, rel=1e-9)


@given(st.floats(0.01, 0.99), st.integers(1, 40), st.integers(1, 12))
def test_s_curve_rises_in_similarity_and_bands_falls_in_rows(s, b, r):
    p = s_curve(s, b, r)
    assert 0.0 <= p <= 1.0
    assert s_curve(min(1.0, s + 0.01), b, r) >= p
    assert s_curve(s, b + 1, r) >= p
    assert s_curve(s, b, r + 1) <= p


@given(st.integers(1, 60), st.integers(0, 60), st.integers(0, 60))
def test_jaccard_floor_is_the_least_jaccard_of_any_feasible_overlap(m, wa, wb):
    # reference: enumerate every overlap z with m <= z <= min(wa, wb) (plain arithmetic)
    feasible = [z / (wa + wb - z) for z in range(m, min(wa, wb) + 1)]
    got = jaccard_floor(m, wa, wb)
    if feasible:
        assert got == pytest.approx(min(feasible))
    else:
        assert got == 0.0


@given(st.floats(0.05, 0.95), st.integers(1, 10), st.floats(0.5, 0.999999))
def test_bands_for_recall_is_the_fewest_that_reach_the_target(s, r, recall):
    b = bands_for_recall(s, r, recall)
    assert b is not None and b >= 1
    assert s_curve(s, b, r) >= recall
    if b > 1:
        assert s_curve(s, b - 1, r) < recall


def test_bands_for_recall_impossible_cases():
    assert bands_for_recall(0.0, 3, 0.9) is None
    assert bands_for_recall(0.5, 3, 1.0) is None
    assert bands_for_recall(1.0, 3, 1.0) == 1


MOMENTS = [1.0e-2, 2.2e-4, 6.3e-6, 2.1e-7, 8.5e-9, 4.0e-10, 2e-11, 1e-12]


@pytest.mark.parametrize("worst,recall,codes", [(2 / 3, 0.99, 10**6), (0.8, 0.999, 10**5), (0.5, 0.9, 10**4)])
def test_choose_bands_is_the_cheapest_on_the_whole_grid(worst, recall, codes):
    # reference: brute force over every (bands, rows) with bands * rows <= MAX_HASHES
    kw = dict(codes=codes, set_bits=40 * codes, threads=2)
    got = choose_bands(worst, recall, moments=MOMENTS, **kw)
    best = None
    for r in range(1, min(MAX_ROWS, len(MOMENTS)) + 1):
        for b in range(1, MAX_HASHES // r + 1):
            if s_curve(worst, b, r) < recall:
                continue
            secs = banding_seconds(b, r, moment=MOMENTS[r - 1], **kw)[1]
            if best is None or secs < best[0]:
                best = (secs, b, r)
    assert (got.bands, got.rows) == best[1:]
    assert got.recall >= recall and got.seconds == pytest.approx(best[0])


def test_choose_bands_none_when_out_of_reach():
    # 1 - (1 - 0.005)^b >= 0.9999 needs b = 1,838 > MAX_HASHES even at one row per band
    assert choose_bands(0.005, 0.9999, codes=1000, set_bits=40000, moments=MOMENTS, threads=1) is None


def test_similarity_moments_equal_direct_means_over_all_pairs():
    # reference: exact overlaps from a scipy.sparse product, every pair
    codes = Codes.random(60, bits=128, weight=12, seed=3)
    x = codes.to_scipy().astype(np.int64)
    ov = (x @ x.T).toarray()
    lo, hi = np.triu_indices(60, 1)
    w = codes.weights
    j = ov[lo, hi] / (w[lo] + w[hi] - ov[lo, hi])
    got = _banding.similarity_moments(codes, max_rows=4)
    assert got == pytest.approx([np.mean(j**r) for r in range(1, 5)])


def test_similarity_moments_sample_is_seeded_and_close():
    codes = Codes.random(3000, bits=256, weight=20, seed=4)
    a = _banding.similarity_moments(codes, max_rows=2, samples=50_000, seed=1)
    b = _banding.similarity_moments(codes, max_rows=2, samples=50_000, seed=1)
    full = _banding.similarity_moments(codes, max_rows=2, samples=10**7)
    assert np.array_equal(a, b)
    assert a[0] == pytest.approx(full[0], rel=0.03)


def test_index_seconds_counts_pairs_per_bit():
    # reference: column sums of the dense matrix (numpy)
    codes = Codes.random(500, bits=200, weight=15, seed=5)
    usage = codes.to_dense().sum(axis=0)
    assert np.array_equal(_banding.bit_usage(codes), usage[usage > 0])
    c = _banding.COST
    want = c["posting"] * (usage.astype(float) ** 2).sum() / 2 / 2 + c["add"] * usage.sum()
    assert _banding.index_seconds(codes, threads=2) == pytest.approx(want)


# ---------------------------------------------------------------------------
# signatures and candidates
# ---------------------------------------------------------------------------


def _pairs_with_overlap(n_pairs, bits, weight, overlap, seed):
    """Rows 2t and 2t+1 share exactly ``overlap`` of their ``weight`` bits; unrelated otherwise."""
    rng = np.random.default_rng(seed)
    rows = []
    for _ in range(n_pairs):
        pick = rng.choice(bits, size=2 * weight - overlap, replace=False)
        shared, a_only, b_only = np.split(pick, [overlap, weight])
        rows.append(np.concatenate([shared, a_only]))
        rows.append(np.concatenate([shared, b_only]))
    return Codes.from_indices(rows, bits)


@pytest.mark.parametrize("weight,overlap,bands,rows", [(40, 30, 4, 5), (35, 30, 3, 6), (40, 32, 14, 3)])
def test_candidate_recall_on_planted_pairs_within_3_sigma(weight, overlap, bands, rows):
    # reference: simulation count against the analytic S-curve (MMDS §3.4), within 3 sigma
    n_pairs = 3000
    codes = _pairs_with_overlap(n_pairs, 4096, weight, overlap, seed=overlap * 7 + bands)
    lo, hi, ov, _ = candidate_pairs(codes, min_overlap=overlap, bands=bands, rows=rows, seed=11)
    planted = (lo % 2 == 0) & (hi == lo + 1)
    assert np.all(ov[planted] == overlap)
    found = int(planted.sum())
    j = overlap / (2 * weight - overlap)
    p = s_curve(j, bands, rows)
    sigma = math.sqrt(n_pairs * p * (1 - p))
    assert abs(found - n_pairs * p) <= 3 * sigma, (found, n_pairs * p, sigma)


def test_one_min_hash_agrees_with_chance_jaccard_within_3_sigma():
    # reference: Broder 1997, P[min-hash agrees] = J; simulation within 3 sigma
    n_pairs, hashes = 500, 40
    codes = _pairs_with_overlap(n_pairs, 2048, 30, 20, seed=9)  # J = 20 / 40
    keys = _banding.band_keys(codes, bands=hashes, rows=1, seed=5)
    agree = int((keys[:, 0::2] == keys[:, 1::2]).sum())
    trials = n_pairs * hashes
    sigma = math.sqrt(trials * 0.25)
    assert abs(agree - trials * 0.5) <= 3 * sigma


def _exact_pairs(codes, m):
    """Reference: all pairs with overlap >= m from a scipy.sparse product."""
    x = codes.to_scipy().astype(np.int32)
    prod = sp.triu(x @ x.T, k=1).tocoo()
    keep = prod.data >= m
    return {(int(a), int(b)): int(z) for a, b, z in zip(prod.row[keep], prod.col[keep], prod.data[keep])}


@settings(max_examples=40)
@given(st.integers(0, 2**32), st.integers(2, 40), st.integers(1, 6), st.integers(1, 5), st.integers(1, 8))
def test_every_candidate_returned_is_exact(seed, n, m, bands, rows):
    # reference: scipy.sparse product overlaps; nothing returned that is not a true pair
    rng = np.random.default_rng(seed)
    base = rng.random((n, 24)) < 0.35
    base[1::2] = base[::2][: base[1::2].shape[0]] ^ (rng.random((n // 2, 24)) < 0.1)
    codes = Codes.from_dense(base)
    lo, hi, ov, checked = candidate_pairs(codes, min_overlap=m, bands=bands, rows=rows, seed=seed)
    exact = _exact_pairs(codes, m)
    got = {(int(a), int(b)): int(z) for a, b, z in zip(lo, hi, ov)}
    assert len(got) == lo.shape[0]  # distinct
    assert all(exact.get(k) == z for k, z in got.items())
    assert np.all(lo < hi) and checked >= len(got)
    # identical codes always share every key, so their pair is always found
    for a in range(n):
        for b in range(a + 1, n):
            if np.array_equal(base[a], base[b]) and base[a].sum() >= m:
                assert (a, b) in got


@given(st.integers(0, 2**32), st.permutations(range(12)))
def test_band_keys_depend_on_the_code_not_its_position(seed, perm):
    codes = Codes.random(12, bits=300, weight=10, seed=seed % 1000)
    keys = _banding.band_keys(codes, bands=5, rows=2, seed=seed)
    shuffled = codes[np.array(perm)]
    keys2 = _banding.band_keys(shuffled, bands=5, rows=2, seed=seed)
    assert np.array_equal(keys[:, perm], keys2)


def test_candidates_verified_in_chunks_match_one_chunk(monkeypatch):
    codes = _pairs_with_overlap(400, 512, 20, 18, seed=2)
    one = candidate_pairs(codes, min_overlap=18, bands=6, rows=2, seed=3)
    monkeypatch.setattr(_banding, "VERIFY_CHUNK", 7)
    monkeypatch.setattr(_banding, "SIGNATURE_CHUNK", 33)
    many = candidate_pairs(codes, min_overlap=18, bands=6, rows=2, seed=3)
    for a, b in zip(one[:3], many[:3]):
        assert np.array_equal(a, b)
    assert one[3] == many[3]


def test_hash_salts_are_seeded():
    assert np.array_equal(_banding.hash_salts(3, 8), _banding.hash_salts(3, 8))
    assert not np.array_equal(_banding.hash_salts(3, 8), _banding.hash_salts(4, 8))
    assert len(set(_banding.hash_salts(0, 1000).tolist())) == 1000


# ---------------------------------------------------------------------------
# grouping kernels
# ---------------------------------------------------------------------------


@given(st.integers(0, 2**32), st.integers(1, 60))
def test_exact_copy_owners_match_numpy_unique(seed, n):
    # reference: numpy.unique over rows (first occurrence of each distinct row)
    rng = np.random.default_rng(seed)
    pool = rng.integers(0, 2**63, size=(max(1, n // 3), 3), dtype=np.uint64)
    words = np.ascontiguousarray(pool[rng.integers(0, pool.shape[0], size=n)])
    hashes = _unionfind.row_hashes(packed_table(words))
    if seed % 2:  # force hash collisions: rows must still be told apart by their words
        hashes = hashes % np.uint64(2)
    order = np.argsort(hashes, kind="stable")
    owner = _unionfind.exact_copy_owners(order, _banding.run_pair_counts(hashes[order]), packed_table(words))
    _, first, inverse = np.unique(words, axis=0, return_index=True, return_inverse=True)
    assert np.array_equal(owner, first[inverse.reshape(-1)])


@given(st.integers(0, 2**32), st.integers(1, 80), st.integers(0, 120))
def test_component_roots_match_scipy_connected_components(seed, n, m):
    # reference: scipy.sparse.csgraph.connected_components
    rng = np.random.default_rng(seed)
    lo = rng.integers(0, n, size=m)
    hi = rng.integers(0, n, size=m)
    roots = _unionfind.component_roots(n, lo, hi)
    graph = sp.coo_matrix((np.ones(m), (lo, hi)), shape=(n, n))
    _, comp = connected_components(graph, directed=False)
    smallest = np.full(comp.max() + 1, n)
    np.minimum.at(smallest, comp, np.arange(n))
    assert np.array_equal(roots, smallest[comp])
