"""Near-duplicate benchmark: ``sparseindex.near_duplicates`` over a size ladder, beside a brute-force peer.

At each size N the data are random codes (2048 bits, 40 set bits) of which
10% are planted near-duplicates: a copy of a random code with ``k`` of its
bits swapped for others, ``k`` uniform in 0..8, so it overlaps its source by
at least 32 (``sparseindex.near_duplicates.planted_duplicates``). With
``min_overlap=32`` the script times

* ``label_near_duplicates(mode="components", method="auto")`` (banding at these sizes) and
  ``mode="first"`` on the same data;
* the exact index, ``method="index"``, up to ``--index-max`` codes;
* the peer: brute-force all-pairs overlaps with a scipy.sparse product
  ``X[chunk] @ X.T`` thresholded at ``>= 32``, then
  ``scipy.sparse.csgraph.connected_components``, up to ``--peer-max`` codes
  (chunked so it fits in memory; its time grows as N²).

Beside them it counts (without running it) the candidate pairs prefix
filtering (Bayardo, Ma & Srikant, WWW 2007) would have to verify on the same
data, the measurement behind choosing banding. It reports the planted duplicates' recall (a copy and its source share a
label in mode components), precision (every code that mode first merged
overlaps its representative by >= 32, checked with numpy popcounts; where
the peer ran, every banding group lies in one exact component), the fitted
growth exponent of the time, and checks that the exact index's labels equal
the peer's. It exits non-zero when a check fails.

Run from the project root::

    PYTHONPATH=. python benchmarks/bench_near_duplicates.py --out benchmarks/results_near_duplicates.md
    PYTHONPATH=. python benchmarks/bench_near_duplicates.py --quick          # CI smoke run, seconds
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import _common as common
else:  # imported as benchmarks.bench_near_duplicates
    from . import _common as common


def parse_args(argv):
    p = argparse.ArgumentParser(description="Benchmark sparseindex.near_duplicates against a brute-force scipy.sparse peer.")
    p.add_argument("--sizes", default="1e4,3e4,1e5,3e5,1e6",
                   help="comma-separated batch sizes N (default 1e4,3e4,1e5,3e5,1e6)")
    p.add_argument("--fit-min", type=float, default=1e5, dest="fit_min",
                   help="fit the growth exponent over sizes from this N up (default 1e5)")
    p.add_argument("--quick", action="store_true", help="CI smoke run: N = 3,000 and 10,000, one repeat")
    p.add_argument("--bits", type=int, default=2048, help="code width (default 2048)")
    p.add_argument("--weight", type=int, default=40, help="set bits per code (default 40)")
    p.add_argument("--min-overlap", type=int, default=32, dest="min_overlap", help="match threshold (default 32)")
    p.add_argument("--fraction", type=float, default=0.1, help="share of planted near-duplicates (default 0.1)")
    p.add_argument("--max-changed", type=int, default=8, dest="max_changed",
                   help="most bits a near-duplicate swaps (default 8)")
    p.add_argument("--recall", type=float, default=0.99, help="the labelling's recall target (default 0.99)")
    p.add_argument("--repeats", type=int, default=3, help="timed repeats below 10^6 codes (default 3; 1 at 10^6+)")
    p.add_argument("--peer-max", type=float, default=1e5, dest="peer_max",
                   help="largest N the brute-force peer runs at (default 1e5)")
    p.add_argument("--index-max", type=float, default=1e5, dest="index_max",
                   help="largest N the exact index method runs at (default 1e5)")
    p.add_argument("--seed", type=int, default=2024, help="data and min-hash seed (default 2024)")
    p.add_argument("--out", help="also write the Markdown report to this file")
    p.add_argument("--json", help="also write every number to this JSON file")
    args = p.parse_args(argv)
    if args.quick:
        args.sizes, args.repeats, args.peer_max, args.index_max, args.fit_min = "3e3,1e4", 1, 1e4, 1e4, 0
    args.sizes = [int(float(s)) for s in args.sizes.split(",")]
    return args


# -- the peer ------------------------------------------------------------------


def peer_pairs(codes, m):
    """Brute force: every pair i < j with overlap >= m via X[chunk] @ X.T (scipy.sparse)."""
    x = codes.to_scipy().astype(np.int32).tocsr()
    xt = x.T.tocsr()
    n = x.shape[0]
    chunk_rows = max(256, int(5e7 / max(1, n)))  # about 5e7 products held at once
    lo, hi = [], []
    for c0 in range(0, n, chunk_rows):
        prod = x[c0 : c0 + chunk_rows] @ xt
        prod.data[prod.data < m] = 0
        prod.eliminate_zeros()
        prod = prod.tocoo()
        rows = prod.row.astype(np.int64) + c0
        keep = prod.col > rows
        lo.append(rows[keep])
        hi.append(prod.col[keep].astype(np.int64))
    return np.concatenate(lo), np.concatenate(hi)


def peer_components(codes, m):
    """Brute-force components labelled by their smallest index (scipy.sparse.csgraph)."""
    import scipy.sparse as sp
    from scipy.sparse.csgraph import connected_components

    n = len(codes)
    lo, hi = peer_pairs(codes, m)
    graph = sp.coo_matrix((np.ones(lo.shape[0]), (lo, hi)), shape=(n, n))
    _, comp = connected_components(graph, directed=False)
    smallest = np.full(comp.max() + 1, n)
    np.minimum.at(smallest, comp, np.arange(n))
    return smallest[comp], lo.shape[0]


# -- checks ----------------------------------------------------------------------


def planted_recall(labels, source):
    dup = np.flatnonzero(source >= 0)
    return float(np.mean(labels[dup] == labels[source[dup]]))


def first_precision(codes, labels, m):
    """Share of merges in mode first whose code overlaps its representative by >= m (numpy popcount)."""
    merged = np.flatnonzero(labels != np.arange(labels.shape[0]))
    if merged.size == 0:
        return 1.0, 0
    w = codes.words
    ov = np.zeros(merged.size, dtype=np.int64)
    for c0 in range(0, merged.size, 1 << 16):
        part = merged[c0 : c0 + (1 << 16)]
        ov[c0 : c0 + part.size] = np.bitwise_count(w[part] & w[labels[part]]).sum(axis=1)
    return float(np.mean(ov >= m)), int(merged.size)


def prefix_filter_candidates(codes, m):
    """Candidate pairs prefix filtering would verify on these codes (counted, not run).

    Prefix filtering (Bayardo, Ma & Srikant, WWW 2007) orders the bits
    rarest first and pairs two codes when their first ``|A| - m + 1`` bits
    in that order share one: ``sum over bits of C(p_b, 2)`` candidates,
    ``p_b`` the codes whose prefix holds bit b.
    """
    from sparseindex._numba import kernels as _kernels
    indptr, flat = _kernels.unpack_indices(codes.words, codes.weights.astype(np.int64))
    usage = np.bincount(flat, minlength=codes.bits)
    rank = np.empty(codes.bits, dtype=np.int64)
    rank[np.argsort(usage, kind="stable")] = np.arange(codes.bits)
    row = np.repeat(np.arange(len(codes)), np.diff(indptr))
    order = np.lexsort((rank[flat], row))
    position = np.arange(flat.shape[0]) - indptr[row]
    prefix = np.maximum(codes.weights - m + 1, 0)
    keep = position < prefix[row]
    p = np.bincount(flat[order][keep], minlength=codes.bits).astype(np.float64)
    return float((p * (p - 1) / 2).sum())


def growth_exponent(sizes, seconds):
    """Least-squares slope of log(time) against log(N)."""
    if len(sizes) < 2:
        return float("nan")
    return float(np.polyfit(np.log(sizes), np.log(seconds), 1)[0])


# -- one size ---------------------------------------------------------------------


def bench_size(n, args, log):
    from sparseindex import label_near_duplicates
    from sparseindex.near_duplicates import planted_duplicates

    m = args.min_overlap
    t0 = time.perf_counter()
    codes, source, changed = planted_duplicates(n, args.bits, args.weight, fraction=args.fraction,
                                                max_changed=args.max_changed, seed=args.seed + n)
    log(f"N={n:,}: data made in {time.perf_counter() - t0:.1f} s")
    repeats = 1 if n >= 10**6 else args.repeats
    row = {"n": n, "repeats": repeats}

    def timed(**kw):
        samples, result = [], None
        for _ in range(repeats):
            holder = {}
            samples.append(common.time_once(lambda: holder.setdefault(
                "r", label_near_duplicates(codes, min_overlap=m, recall=args.recall, seed=args.seed, return_summary=True, **kw))))
            result = holder["r"]
        return common.Timing(samples), result

    t_comp, (labels_c, summary_c) = timed(mode="components", method="auto")
    row["components"] = t_comp.as_dict()
    row["summary"] = summary_c.to_dict()
    row["recall_planted"] = planted_recall(labels_c, source)
    row["prefix_filter_candidates"] = prefix_filter_candidates(codes, m)
    log(f"  components ({summary_c.method}): {common.fmt_timing(t_comp)}, planted recall "
        f"{row['recall_planted']:.5f}")
    t_first, (labels_f, summary_f) = timed(mode="first", method="auto")
    row["first"] = t_first.as_dict()
    row["precision_first"], row["merged_first"] = first_precision(codes, labels_f, m)
    log(f"  first: {common.fmt_timing(t_first)}, precision {row['precision_first']}")
    row["checks"] = {"recall_planted >= 0.99": row["recall_planted"] >= 0.99,
                     "precision_first == 1": row["precision_first"] == 1.0}
    if n <= args.index_max:
        t_index, (labels_i, summary_i) = timed(mode="components", method="index")
        row["index"] = t_index.as_dict()
        log(f"  index: {common.fmt_timing(t_index)}")
    if n <= args.peer_max:
        t0 = time.perf_counter()
        peer_labels, peer_pair_count = peer_components(codes, m)
        row["peer"] = {"seconds": time.perf_counter() - t0, "pairs": int(peer_pair_count)}
        log(f"  peer (scipy.sparse all pairs): {row['peer']['seconds']:.2f} s, {peer_pair_count:,} pairs")
        row["checks"]["auto's groups inside exact components"] = bool(np.array_equal(peer_labels[labels_c],
                                                                                     peer_labels))
        row["pairs_found_share"] = summary_c.matched_pairs / max(1, summary_i.matched_pairs) if "index" in row \
            else None
        row["labels_equal_peer"] = bool(np.array_equal(labels_c, peer_labels))
        if "index" in row:
            row["checks"]["index labels == peer labels"] = bool(np.array_equal(labels_i, peer_labels))
    return row


# -- report ------------------------------------------------------------------------


def report(rows, args, record, compile_s):
    s = rows[-1]["summary"]
    out = [
        "# sparseindex near-duplicates benchmark",
        "",
        f"Random codes of {args.bits} bits with {args.weight} set bits, {args.fraction:.0%} of them planted "
        f"near-duplicates (a random code's copy with 0..{args.max_changed} bits swapped, overlap >= "
        f"{args.weight - args.max_changed} with its source), shuffled. `label_near_duplicates(codes, min_overlap="
        f"{args.min_overlap}, recall={args.recall})`; times are median (min–max) over the repeats "
        "(one run at 10^6 codes), after the kernels were compiled or loaded from numba's cache "
        f"({compile_s:.1f} s).",
        "",
        common.machine_markdown(record, []),
        "",
        "## Time and quality",
        "",
    ]
    table = []
    for r in rows:
        su = r["summary"]
        peer = r.get("peer")
        idx = r.get("index")
        comp_med = r["components"]["median_s"]
        table.append([
            f"{r['n']:,}",
            f"{su['method']} {su['bands']}×{su['rows']}" if su["method"] == "banding" else su["method"],
            _timing(r["components"]),
            _timing(r["first"]),
            f"{r['recall_planted']:.5f}",
            f"{r['precision_first']:.3g} ({r['merged_first']:,} merges)",
            f"{su['predicted_recall']:.4f}",
            f"{su['candidates_verified']:,}",
            f"{r['prefix_filter_candidates']:.3g}",
            _timing(idx) if idx else "—",
            common.fmt_seconds(peer["seconds"]) if peer else "—",
            common.fmt_ratio(peer["seconds"] / comp_med) if peer else "—",
        ])
    out.append(common.markdown_table(
        ["N", "method (auto)", "components", "first", "planted recall", "precision (first)",
         "predicted recall, hardest pair", "candidates verified", "prefix filtering would verify",
         "exact index", "scipy.sparse all pairs", "peer / components"], table))
    fit = [r for r in rows if r["n"] >= args.fit_min]
    sizes = [r["n"] for r in fit]
    exp_c = growth_exponent(sizes, [r["components"]["median_s"] for r in fit])
    exp_f = growth_exponent(sizes, [r["first"]["median_s"] for r in fit])
    peer_rows = [r for r in rows if "peer" in r]
    peer_sizes = [r["n"] for r in peer_rows]
    exp_p = growth_exponent(peer_sizes, [r["peer"]["seconds"] for r in peer_rows])
    out += [
        "",
        f"Fitted growth exponent (least squares of log time on log N over N = "
        f"{', '.join(f'{n:,}' for n in sizes)}): components **{exp_c:.2f}**, first **{exp_f:.2f}**"
        + (f"; the brute-force peer {exp_p:.2f} over N = {', '.join(f'{n:,}' for n in peer_sizes)}"
           if len(peer_rows) >= 2 else "")
        + ".",
        "",
        "## Checks",
        "",
    ]
    for r in rows:
        checks = ", ".join(f"{k}: {'ok' if v else 'FAILED'}" for k, v in r["checks"].items())
        extra = ""
        if "labels_equal_peer" in r:
            extra = (f"; auto ({r['summary']['method']}) labels identical to the peer's: "
                     f"{'yes' if r['labels_equal_peer'] else 'no'}")
            if r.get("pairs_found_share") is not None:
                extra += f", matching pairs found {r['pairs_found_share']:.5f} of the exact ones"
        out.append(f"- N = {r['n']:,}: {checks}{extra}")
    out += [
        "",
        f"Largest run (N = {s['codes']:,}): {s['reason']}; stage times "
        + ", ".join(f"{k} {v:.2f} s" for k, v in s["seconds"].items()) + ".",
        "",
    ]
    return "\n".join(out)


def _timing(d):
    return f"{common.fmt_seconds(d['median_s'])} ({common.fmt_seconds(d['min_s'])}–{common.fmt_seconds(d['max_s'])})"


def main(argv=None):
    args = parse_args(argv)
    from sparseindex import Codes, label_near_duplicates

    def log(msg):
        print(msg, file=sys.stderr, flush=True)

    t0 = time.perf_counter()
    warm = Codes.random(2000, args.bits, args.weight, seed=1)
    for method in ("banding", "index"):
        for mode in ("first", "components"):
            label_near_duplicates(warm, min_overlap=args.min_overlap, method=method, mode=mode, seed=1)
    compile_s = time.perf_counter() - t0
    rows = [bench_size(n, args, log) for n in args.sizes]
    record = common.machine_record()
    text = report(rows, args, record, compile_s)
    print(text)
    if args.out:
        with open(args.out, "w", encoding="utf-8") as f:
            f.write(text)
    if args.json:
        with open(args.json, "w", encoding="utf-8") as f:
            json.dump({"machine": record, "compile_s": compile_s, "rows": rows}, f, indent=2)
    failed = [(r["n"], k) for r in rows for k, v in r["checks"].items() if not v]
    if failed:
        log(f"FAILED checks: {failed}")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
