"""label_near_duplicates: labels against references outside the library.

* Brute-force all-pairs overlaps from a **scipy.sparse product** on 20,000
  codes with planted near-duplicate groups (chains included);
* ``mode="components"`` against **scipy.sparse.csgraph.connected_components**
  of that exact pair list;
* ``mode="first"`` against the naive greedy loop below (plain Python);
* banding's measured recall against its predicted S-curve value, within 3 sigma;
* hypothesis properties: idempotence, permutation behaviour, exactness.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.sparse.csgraph import connected_components

import sparseindex
from sparseindex import Codes, NearDuplicateSummary, label_near_duplicates
from sparseindex.near_duplicates import banding as _banding
from sparseindex.near_duplicates import EXACT_BUDGET_SECONDS, planted_duplicates

# ---------------------------------------------------------------------------
# references
# ---------------------------------------------------------------------------


def exact_pairs(codes: Codes, m: int, chunk: int = 4000):
    """Reference: every pair i < j with overlap >= m, by a scipy.sparse product (chunked)."""
    x = codes.to_scipy().astype(np.int32).tocsr()
    xt = x.T.tocsc()
    lo, hi, ov = [], [], []
    for c0 in range(0, x.shape[0], chunk):
        prod = (x[c0 : c0 + chunk] @ xt).tocoo()
        rows = prod.row + c0
        keep = (prod.data >= m) & (prod.col > rows)
        lo.append(rows[keep])
        hi.append(prod.col[keep])
        ov.append(prod.data[keep])
    return np.concatenate(lo), np.concatenate(hi), np.concatenate(ov)


def reference_components(n, lo, hi):
    """Reference: scipy.sparse.csgraph connected components, labelled by their smallest index."""
    graph = sp.coo_matrix((np.ones(lo.shape[0]), (lo, hi)), shape=(n, n))
    _, comp = connected_components(graph, directed=False)
    smallest = np.full(comp.max() + 1, n)
    np.minimum.at(smallest, comp, np.arange(n))
    return smallest[comp]


def naive_first(n, lo, hi, ov):
    """Reference: the greedy rule written plainly over a pair list.

    For each code in order, its representative is the earlier representative
    with the greatest overlap (ties to the smallest index); with none, it is
    its own representative.
    """
    neighbours = [dict() for _ in range(n)]
    for a, b, z in zip(lo.tolist(), hi.tolist(), ov.tolist()):
        neighbours[b][a] = z  # only earlier codes matter to b
    labels = list(range(n))
    is_rep = [False] * n
    for i in range(n):
        best = None
        for j, z in neighbours[i].items():
            if is_rep[j] and (best is None or z > best[0] or (z == best[0] and j < best[1])):
                best = (z, j)
        if best is None:
            is_rep[i] = True
        else:
            labels[i] = best[1]
    return np.array(labels, dtype=np.int64)


def overlap(codes: Codes, i: int, j: int) -> int:
    return len(set(codes[i].tolist()) & set(codes[j].tolist()))


def same_partition(a, b) -> bool:
    """True when two labelings group the codes identically (up to relabelling)."""
    pairs = set(zip(a.tolist(), b.tolist()))
    return len(pairs) == len(set(a.tolist())) == len(set(b.tolist()))


# ---------------------------------------------------------------------------
# 20,000 codes with planted groups, against scipy.sparse brute force
# ---------------------------------------------------------------------------

N_PLANTED, BITS, WEIGHT, MIN_OVERLAP = 20_000, 4096, 32, 24


@pytest.fixture(scope="module")
def planted():
    codes, source, changed = planted_duplicates(
        N_PLANTED, BITS, WEIGHT, fraction=0.15, max_changed=WEIGHT - MIN_OVERLAP, chain=0.3, seed=2024)
    lo, hi, ov = exact_pairs(codes, MIN_OVERLAP)
    return codes, source, changed, (lo, hi, ov)


def test_planted_data_has_what_the_checks_need(planted):
    codes, source, changed, (lo, hi, ov) = planted
    assert len(codes) == N_PLANTED and int((source >= 0).sum()) == 3000
    # every planted copy overlaps its source by WEIGHT - changed (scipy product reference)
    dup = np.flatnonzero(source >= 0)
    pairs = {(min(a, b), max(a, b)): z for a, b, z in zip(lo.tolist(), hi.tolist(), ov.tolist())}
    assert all(pairs.get((min(i, s), max(i, s))) == WEIGHT - k
               for i, s, k in zip(dup.tolist(), source[dup].tolist(), changed[dup].tolist()) if k < WEIGHT)
    # chains make components differ from first representatives, and exact copies exist
    assert reference_components(N_PLANTED, lo, hi).tolist() != naive_first(N_PLANTED, lo, hi, ov).tolist()
    assert int((changed[dup] == 0).sum()) > 100


def test_components_equal_scipy_connected_components(planted):
    codes, _, _, (lo, hi, ov) = planted
    labels, summary = label_near_duplicates(codes, min_overlap=MIN_OVERLAP, mode="components", method="index",
                             return_summary=True)
    want = reference_components(N_PLANTED, lo, hi)
    assert np.array_equal(labels, want)
    sizes = np.bincount(want)
    assert summary.groups == int((sizes > 0).sum())
    assert summary.duplicates == N_PLANTED - summary.groups
    assert summary.largest_group == int(sizes.max())
    assert summary.predicted_recall == 1.0 and summary.method == "index"


def test_first_equals_naive_greedy_loop(planted):
    codes, _, _, (lo, hi, ov) = planted
    labels = label_near_duplicates(codes, min_overlap=MIN_OVERLAP, mode="first", method="index")
    assert np.array_equal(labels, naive_first(N_PLANTED, lo, hi, ov))


def test_banding_at_tiny_miss_rate_equals_the_exact_answer(planted):
    codes, _, _, (lo, hi, ov) = planted
    for mode, want in (("components", reference_components(N_PLANTED, lo, hi)),
                       ("first", naive_first(N_PLANTED, lo, hi, ov))):
        labels, summary = label_near_duplicates(codes, min_overlap=MIN_OVERLAP, mode=mode, method="banding",
                                 recall=1 - 1e-9, seed=7, return_summary=True)
        assert summary.method == "banding" and summary.predicted_recall >= 1 - 1e-9
        assert np.array_equal(labels, want), mode


def test_banding_first_is_the_greedy_rule_over_the_pairs_it_verified(planted):
    # a weak banding misses pairs; what it returns must still be the greedy
    # rule applied to exactly the verified pairs (naive loop as reference)
    codes, _, _, (lo, hi, ov) = planted
    labels, summary = label_near_duplicates(codes, min_overlap=MIN_OVERLAP, mode="first", bands=(3, 4), seed=5,
                             return_summary=True)
    # rebuild the verified pairs: banding runs on distinct codes (first copies), copies join their first
    _, first, inverse = np.unique(codes.words, axis=0, return_index=True, return_inverse=True)
    inverse = inverse.reshape(-1)
    order = np.argsort(first)
    rank = np.empty_like(order)
    rank[order] = np.arange(order.shape[0])
    uid = rank[inverse]
    heads = np.sort(first)
    u_lo, u_hi, _, _ = _banding.candidate_pairs(codes[heads], min_overlap=MIN_OVERLAP, bands=3, rows=4, seed=5)
    found = set(zip(u_lo.tolist(), u_hi.tolist()))
    keep = np.array([(uid[a] == uid[b]) or ((min(uid[a], uid[b]), max(uid[a], uid[b])) in found)
                     for a, b in zip(lo.tolist(), hi.tolist())])
    assert 0 < keep.sum() < keep.shape[0]  # some pairs were missed
    assert summary.matched_pairs == len(found)
    assert np.array_equal(labels, naive_first(N_PLANTED, lo[keep], hi[keep], ov[keep]))


def test_banding_default_recall_finds_the_planted_duplicates(planted):
    codes, source, _, (lo, hi, ov) = planted
    labels, summary = label_near_duplicates(codes, min_overlap=MIN_OVERLAP, mode="components", method="banding", seed=3,
                             return_summary=True)
    exact = reference_components(N_PLANTED, lo, hi)
    # precision 1: every banding group lies inside one exact group
    assert np.array_equal(exact[labels], exact)
    dup = np.flatnonzero(source >= 0)
    assert np.mean(labels[dup] == labels[source[dup]]) >= 0.99
    assert summary.worst_jaccard == pytest.approx(MIN_OVERLAP / (2 * WEIGHT - MIN_OVERLAP))
    assert summary.predicted_recall == pytest.approx(
        _banding.s_curve(summary.worst_jaccard, summary.bands, summary.rows))


def test_measured_recall_at_the_hardest_pairs_within_3_sigma_of_the_prediction():
    # pairs at exactly the worst-case Jaccard (40-bit codes, overlap 32): the
    # automatic bands promise recall >= 0.99 there; simulation within 3 sigma
    rng = np.random.default_rng(31)
    n_pairs, w, m = 3000, 40, 32
    rows = []
    for _ in range(n_pairs):
        pick = rng.choice(8192, size=2 * w - m, replace=False)
        rows += [pick[:w], np.concatenate([pick[:m], pick[w:]])]
    codes = Codes.from_indices(rows, 8192)
    labels, summary = label_near_duplicates(codes, min_overlap=m, mode="components", method="banding", seed=8,
                             return_summary=True)
    found = int(np.sum(labels[0::2] == labels[1::2]))
    p = summary.predicted_recall
    assert p >= 0.99
    assert abs(found - n_pairs * p) <= 3 * math.sqrt(n_pairs * p * (1 - p)) + 0.5


# ---------------------------------------------------------------------------
# method choice, exact copies, light codes, summary
# ---------------------------------------------------------------------------


def test_auto_picks_index_when_small_and_banding_when_large_at_high_threshold():
    small = Codes.random(2000, bits=2048, weight=40, seed=1)
    _, s = label_near_duplicates(small, min_overlap=32, return_summary=True, seed=1)
    assert s.method == "index" and "exact budget" in s.reason
    assert s.predicted_seconds["index"] <= EXACT_BUDGET_SECONDS
    large = Codes.random(60_000, bits=2048, weight=40, seed=2)
    _, s = label_near_duplicates(large, min_overlap=32, return_summary=True, seed=1)
    assert s.method == "banding" and "banding predicted" in s.reason
    assert s.predicted_seconds["banding"] < s.predicted_seconds["index"]
    assert s.predicted_recall >= 0.99 and s.bands * s.rows <= _banding.MAX_HASHES


def test_auto_picks_index_at_a_low_threshold():
    codes = Codes.random(3000, bits=2048, weight=40, seed=3)
    _, s = label_near_duplicates(codes, min_overlap=4, recall=0.9999, return_summary=True, seed=1)
    assert s.method == "index" and s.worst_jaccard == pytest.approx(4 / 76)
    _, s = label_near_duplicates(codes, min_overlap=4, recall=1.0, return_summary=True)
    assert s.method == "index" and "recall=1" in s.reason


def test_many_exact_copies_cost_nothing_quadratic():
    base = Codes.random(500, bits=1024, weight=30, seed=4)
    codes = Codes.concat([base, base[np.zeros(4000, dtype=np.int64)], base[:3]])
    for method in ("banding", "index"):
        labels, s = label_near_duplicates(codes, min_overlap=20, mode="first", method=method, return_summary=True, seed=2)
        assert np.all(labels[500:4500] == 0) and np.array_equal(labels[4500:], [0, 1, 2])
        assert s.exact_copies == 4003 and s.distinct_codes == 500 and s.largest_group == 4002
        assert s.candidates_verified < 100_000  # verifying the 4001 copies pairwise would be 8e6 pairs


def test_codes_lighter_than_min_overlap_stay_alone_even_when_identical():
    rows = [[1, 2], [1, 2], [1, 2, 3, 4], [1, 2, 3, 4], [5]]
    for mode in ("first", "components"):
        labels, s = label_near_duplicates(rows, min_overlap=3, bits=8, mode=mode, return_summary=True)
        assert labels.tolist() == [0, 1, 2, 2, 4]
        assert s.light_codes == 3 and s.exact_copies == 1


def test_first_prefers_greatest_overlap_then_smallest_index():
    rows = [[0, 1, 2, 3], [10, 11, 12, 13], [0, 1, 2, 10, 11, 12, 13], [0, 1, 2, 3, 10]]
    # code 2 overlaps 0 by 3 and 1 by 4 -> joins 1; code 3 overlaps 0 by 4, 1 by 1
    assert label_near_duplicates(rows, min_overlap=3, bits=16).tolist() == [0, 1, 1, 0]
    # code 2 ties 0 and 1 at 2 -> smallest index
    rows = [[0, 1, 9], [5, 6, 8], [0, 1, 5, 6]]
    assert label_near_duplicates(rows, min_overlap=2, bits=16).tolist() == [0, 1, 0]
    # components join them all through code 2
    assert label_near_duplicates(rows, min_overlap=2, bits=16, mode="components").tolist() == [0, 0, 0]


def test_summary_report_and_dict():
    codes, _, _ = planted_duplicates(3000, 1024, 30, fraction=0.2, seed=5)
    labels, s = label_near_duplicates(codes, min_overlap=24, method="banding", seed=9, return_summary=True)
    assert isinstance(s, NearDuplicateSummary)
    text = str(s)
    for needle in ("3,000 codes", "method: banding", f"bands: {s.bands} of {s.rows} rows", "seed 9",
                   f"groups: {s.groups:,}", "largest group", "candidates verified"):
        assert needle in text
    d = s.to_dict()
    assert d["groups"] == len(set(labels.tolist())) and d["seed"] == 9 and "total" in d["seconds"]


def test_inputs_of_every_form_give_the_same_labels():
    codes, _, _ = planted_duplicates(400, 128, 12, fraction=0.3, max_changed=3, seed=6)
    want = label_near_duplicates(codes, min_overlap=9)
    assert np.array_equal(label_near_duplicates(codes.to_dense(), min_overlap=9), want)
    assert np.array_equal(label_near_duplicates(codes.to_scipy(), min_overlap=9), want)
    assert np.array_equal(label_near_duplicates([r.tolist() for r in codes], min_overlap=9, bits=128), want)
    assert np.array_equal(label_near_duplicates(codes.to_bitarrays(), min_overlap=9), want)


def test_empty_and_single_batches():
    labels, s = label_near_duplicates(Codes.from_indices([], bits=16), min_overlap=2, return_summary=True)
    assert labels.shape == (0,) and s.groups == 0 and s.largest_group == 0
    for method in ("auto", "banding", "index"):
        labels, s = label_near_duplicates([[1, 2, 3]], min_overlap=2, bits=16, method=method, return_summary=True)
        assert labels.tolist() == [0] and s.groups == 1 and s.worst_jaccard is None
        assert "1 code of 16 bits" in str(s)


def test_progress_callable_hears_each_stage():
    codes = Codes.random(3000, bits=512, weight=20, seed=7)
    heard = []
    label_near_duplicates(codes, min_overlap=15, method="banding", bands=(4, 2), seed=1,
           progress=lambda stage, done, total: heard.append((stage, done, total)))
    stages = [h[0] for h in heard]
    assert stages[0] == "signatures" and stages[-1] == "bands"
    assert heard[-1] == ("bands", 4, 4) and all(0 < d <= t for _, d, t in heard)
    heard.clear()
    label_near_duplicates(codes, min_overlap=15, method="index", progress=lambda *a: heard.append(a))
    assert heard[-1] == ("index", 3000, 3000)


def test_progress_bars_go_to_stderr(capsys):
    from sparseindex.near_duplicates import TqdmProgress

    codes = Codes.random(2000, bits=512, weight=20, seed=8)
    want = label_near_duplicates(codes, min_overlap=15, method="index")
    assert np.array_equal(label_near_duplicates(codes, min_overlap=15, method="index", progress=True), want)
    assert capsys.readouterr().out == ""
    bar = TqdmProgress(delay=0.0)  # no delay: the bar shows however short the run
    label_near_duplicates(codes, min_overlap=15, method="banding", bands=(2, 2), seed=1, progress=bar)
    bar.close()
    err = capsys.readouterr().err
    assert "signatures" in err and "bands" in err


@pytest.mark.parametrize("kwargs,error,message", [
    (dict(min_overlap=0), ValueError, r"min_overlap=0 must be >= 1"),
    (dict(min_overlap=-2), ValueError, r"min_overlap=-2 must be >= 1"),
    (dict(min_overlap=2.5), TypeError, r"min_overlap=2.5 must be an integer"),
    (dict(min_overlap=True), TypeError, r"min_overlap=True must be an integer"),
    (dict(min_overlap=65), ValueError, r"min_overlap=65 exceeds bits=64"),
    (dict(min_overlap=3, mode="all"), ValueError, r"mode='all' must be one of 'first', 'components'"),
    (dict(min_overlap=3, method="fast"), ValueError, r"method='fast' must be one of"),
    (dict(min_overlap=3, recall=0.0), ValueError, r"recall=0.0 must be a number in \(0, 1\]"),
    (dict(min_overlap=3, recall=1.5), ValueError, r"recall=1.5 must be a number in \(0, 1\]"),
    (dict(min_overlap=3, recall=float("nan")), ValueError, r"recall=nan must be finite"),
    (dict(min_overlap=3, recall="high"), TypeError, r"recall='high' must be a number"),
    (dict(min_overlap=3, bands=(0, 3)), ValueError, r"bands=\(0, 3\): bands=0 must be >= 1"),
    (dict(min_overlap=3, bands="ab"), TypeError, r"bands='ab' must be a pair"),
    (dict(min_overlap=3, bands=(1, 2, 3)), ValueError, r"bands=\(1, 2, 3\) must be a pair"),
    (dict(min_overlap=3, bands=5), TypeError, r"bands=5 must be a pair"),
    (dict(min_overlap=3, bands=(2, 2), method="index"), ValueError, r"goes with method='banding'"),
    (dict(min_overlap=3, seed=-1), ValueError, r"seed=-1 must be >= 0"),
    (dict(min_overlap=3, seed=2**64), ValueError, r"seed=18446744073709551616 must be <= 18446744073709551615"),
    (dict(min_overlap=3, seed="x"), TypeError, r"seed='x' must be an integer"),
    (dict(min_overlap=3, progress="yes"), TypeError, r"progress='yes' must be True, False or a callable"),
    (dict(min_overlap=3, return_summary="yes"), TypeError, r"return_summary='yes' must be True or False"),
    (dict(min_overlap=3, method="banding", recall=1.0), ValueError, r"recall=1 cannot be promised by banding"),
])
def test_bad_arguments_raise_quoting_the_value(kwargs, error, message):
    codes = Codes.random(50, bits=64, weight=12, seed=1)
    with pytest.raises(error, match=message):
        label_near_duplicates(codes, **kwargs)


def test_banding_out_of_reach_says_so():
    # hardest pair: overlap 1 between two 30-bit codes, Jaccard 1/59; recall 1 - 1e-9 needs 1,212 bands
    codes = Codes.random(50, bits=64, weight=30, seed=1)
    with pytest.raises(ValueError, match=r"no banding within 1024 min-hashes per code reaches recall=0.999999999 "
                                         r"at the hardest pair's Jaccard 0.01695"):
        label_near_duplicates(codes, min_overlap=1, method="banding", recall=1 - 1e-9)
    _, s = label_near_duplicates(codes, min_overlap=1, recall=1 - 1e-9, return_summary=True)
    assert s.method == "index" and "no banding within 1024" in s.reason


def test_bad_inputs_name_the_row_or_the_form():
    with pytest.raises(TypeError, match=r"cannot tell the code width of a list; pass bits="):
        label_near_duplicates([[1, 2]], min_overlap=1)
    with pytest.raises(TypeError, match=r"integer matrices are ambiguous"):
        label_near_duplicates(np.array([[1, 2]]), min_overlap=1, bits=8)
    with pytest.raises(ValueError, match=r"row 1: bit index 9 is out of range for bits=8"):
        label_near_duplicates([[1, 2], [3, 9]], min_overlap=1, bits=8)
    with pytest.raises(ValueError, match=r"bits=0 must be >= 1"):
        label_near_duplicates([[1]], min_overlap=1, bits=0)


# ---------------------------------------------------------------------------
# properties
# ---------------------------------------------------------------------------


@st.composite
def small_batches(draw):
    """Small batches rich in near-duplicates: random rows, copies with a few bits flipped."""
    seed = draw(st.integers(0, 2**32 - 1))
    n = draw(st.integers(1, 40))
    bits = draw(st.sampled_from([16, 40, 70]))
    rng = np.random.default_rng(seed)
    dense = rng.random((n, bits)) < draw(st.sampled_from([0.2, 0.4]))
    for i in range(1, n):
        if rng.random() < 0.6:
            j = int(rng.integers(0, i))
            dense[i] = dense[j] ^ (rng.random(bits) < 0.05)
    m = draw(st.integers(1, max(1, bits // 4)))
    return Codes.from_dense(dense), m, seed


@settings(max_examples=60)
@given(small_batches(), st.sampled_from(["first", "components"]))
def test_deduping_the_representatives_again_merges_nothing(batch, mode):
    codes, m, _ = batch
    labels = label_near_duplicates(codes, min_overlap=m, mode=mode, method="index")
    reps = np.unique(labels)
    again = label_near_duplicates(codes[reps], min_overlap=m, mode=mode, method="index")
    assert np.array_equal(again, np.arange(reps.shape[0]))


@settings(max_examples=60)
@given(small_batches(), st.randoms(use_true_random=False), st.sampled_from(["index", "banding"]))
def test_components_are_invariant_under_permutation(batch, rnd, method):
    codes, m, seed = batch
    perm = np.array(rnd.sample(range(len(codes)), len(codes)), dtype=np.int64)
    kw = dict(min_overlap=m, mode="components", method=method, seed=seed)
    if method == "banding":
        kw["bands"] = (4, 2)  # fixed bands: candidates depend on content and seed only
    labels = label_near_duplicates(codes, **kw)
    permuted = label_near_duplicates(codes[perm], **kw)
    assert same_partition(labels[perm], permuted)
    # labels are the smallest index of each component
    assert np.all(permuted <= np.arange(len(codes)))
    assert np.array_equal(permuted[permuted], permuted)


@settings(max_examples=60)
@given(small_batches(), st.sampled_from(["index", "banding"]))
def test_every_reported_match_is_exact(batch, method):
    # reference: overlaps from Python sets (first) and the scipy.sparse product (components)
    codes, m, seed = batch
    n = len(codes)
    first = label_near_duplicates(codes, min_overlap=m, mode="first", method=method, seed=seed, bands=(3, 2) if method == "banding"
                   else None)
    for i in range(n):
        r = int(first[i])
        assert r <= i and first[r] == r
        if r != i:
            assert overlap(codes, i, r) >= m
    comp = label_near_duplicates(codes, min_overlap=m, mode="components", method=method, seed=seed,
                  bands=(3, 2) if method == "banding" else None)
    lo, hi, _ = exact_pairs(codes, m)
    exact = reference_components(n, lo, hi) if n else comp
    assert np.array_equal(exact[comp], exact)  # each group inside one exact component
    if method == "index":
        assert np.array_equal(comp, exact)
    # every member of a merged group matches some other member exactly
    for g in np.unique(comp):
        members = np.flatnonzero(comp == g)
        if members.shape[0] > 1:
            for i in members.tolist():
                assert any(overlap(codes, i, j) >= m for j in members.tolist() if j != i)
