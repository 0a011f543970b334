"""What a prefix-filtered scan costs: postings counted against candidates checked.

A query on whole-code detectors may skip its longest postings lists and
lower its scan threshold (prefix filtering, Chaudhuri, Ganti & Kaushik, ICDE
2006); every detector reaching the lowered count becomes a candidate that
the exact overlap check settles. The kernel chooses how far to go from a
cost model whose one constant, ``bank.VERIFY_COST_POSTINGS``, is what one
candidate costs in postings counted. This script measures that constant:

* one store of N random codes (2048 bits, 40 set, ``threshold=20``,
  ``sample_size=None``), queried one at a time on one thread;
* for each of several ``verify_cost`` settings (infinity = no filtering),
  the time of each query beside the postings it counted and the candidates
  it checked (both recomputed here from the plan and the postings);
* a least-squares fit ``time = t0 + a * postings + v * candidates`` over all
  queries, which prints ``a`` (ns per posting), ``v`` (ns per candidate)
  and ``v / a`` — the measured value for ``VERIFY_COST_POSTINGS``;
* each setting's median time as a ratio to the unfiltered scan of the same
  run. Settings take turns query by query, each on different queries, so
  none is favoured by a warm cache.

Run from the project root::

    PYTHONPATH=. python benchmarks/bench_prefix.py            # N = 10^6
    PYTHONPATH=. python benchmarks/bench_prefix.py --quick    # CI smoke run
"""

from __future__ import annotations

import argparse
import gc
import math
import os
import statistics
import sys
import time

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import _common as common
else:  # imported as benchmarks.bench_prefix
    from . import _common as common

import numba  # noqa: E402

from sparseindex import Codes, Store  # noqa: E402
from sparseindex._numba import kernels as _kernels
from sparseindex.store.bank import VERIFY_COST_POSTINGS  # noqa: E402

BITS, WEIGHT, THRESHOLD = 2048, 40, 20
SETTINGS = [4.0, 16.0, 64.0, 256.0, 1024.0, 4096.0, math.inf]


def parse_args(argv):
    p = argparse.ArgumentParser(description="Measure the cost of a candidate check against a counted posting.")
    p.add_argument("--n", type=float, default=1e6, help="stored codes (default 1e6)")
    p.add_argument("--queries", type=int, default=120, help="queries per setting (default 120)")
    p.add_argument("--quick", action="store_true", help="CI smoke run: 20,000 codes, few queries")
    return p.parse_args(argv)


def _work(bank, q_bits, cost, n_rows):
    """Postings counted and candidates found by the plan for ``cost`` (recomputed, not timed)."""
    chosen, thr = _kernels._prefix_plan(q_bits, bank._bit_postings, n_rows, THRESHOLD, True, cost)
    count = np.zeros(n_rows, dtype=np.int64)
    for b in chosen:
        count[bank.postings_of(int(b))] += 1
    return int(bank._bit_postings[chosen].sum()), int(np.sum(count >= thr))


def run(args):
    n = 20_000 if args.quick else int(args.n)
    n_q = 12 if args.quick else args.queries
    codes = Codes.random(n, BITS, WEIGHT, seed=11)
    store = Store(BITS, threshold=THRESHOLD, seed=5)
    store.add(codes)
    bank = store._bank
    queries = Codes.random(n_q * len(SETTINGS), BITS, WEIGHT, seed=12)
    indptr, q_all = queries.to_csr()
    old_threads = numba.get_num_threads()
    numba.set_num_threads(1)  # the serial kernel: one thread's costs
    gc.disable()  # a collection just before a query slows it several-fold (caches, allocator), a noise here
    try:
        for cost in SETTINGS:  # compile and warm every path
            bank.verify_cost = cost
            store.query(queries[0:1])
        samples = {cost: [] for cost in SETTINGS}
        for i in range(n_q):
            for k, cost in enumerate(SETTINGS):
                j = (i + k * n_q) % len(queries)  # a different query for every setting
                bank.verify_cost = cost
                q = queries[j : j + 1]
                t = time.perf_counter()
                store.query(q)
                samples[cost].append((j, time.perf_counter() - t))
    finally:
        gc.enable()
        numba.set_num_threads(old_threads)
        bank.verify_cost = VERIFY_COST_POSTINGS
    rows, design, times = [], [], []
    for cost in SETTINGS:
        work = [_work(bank, q_all[indptr[j] : indptr[j + 1]], cost, n) for j, _ in samples[cost]]
        ts = [t for _, t in samples[cost]]
        for (posts, cands), t in zip(work, ts):
            design.append([1.0, posts, cands])
            times.append(t)
        rows.append({
            "cost": cost, "median_s": statistics.median(ts),
            "postings": statistics.mean(p for p, _ in work), "candidates": statistics.mean(c for _, c in work),
        })
    (t0, a, v), *_ = np.linalg.lstsq(np.array(design), np.array(times), rcond=None)
    return n, rows, (t0, a, v)


def report(n, rows, fit) -> str:
    t0, a, v = fit
    full = next(r for r in rows if math.isinf(r["cost"]))
    header = ["verify_cost", "postings counted", "candidates", "median query", "÷ unfiltered"]
    body = [
        ["∞ (off)" if math.isinf(r["cost"]) else f"{r['cost']:g}", f"{r['postings']:,.0f}", f"{r['candidates']:,.1f}",
         common.fmt_seconds(r["median_s"]), f"{r['median_s'] / full['median_s']:.2f}"]
        for r in rows
    ]
    lines = [
        f"# Prefix-filtered scan, N = {n:,}, one thread",
        "",
        common.markdown_table(header, body, ["left", "right", "right", "right", "right"]),
        "",
        f"Fit over every query: time = {t0 * 1e6:.1f} µs + {a * 1e9:.3f} ns × postings + {v * 1e9:.1f} ns × candidates.",
        f"One candidate costs {v / a:.0f} postings (VERIFY_COST_POSTINGS = {VERIFY_COST_POSTINGS:g})."
        if a > 0 else "The fit found no cost per posting (too few or too noisy samples).",
    ]
    return "\n".join(lines)


def main(argv=None):
    args = parse_args(sys.argv[1:] if argv is None else argv)
    n, rows, fit = run(args)
    print(common.machine_markdown(common.machine_record(), []))
    print(report(n, rows, fit))
    return 0


if __name__ == "__main__":
    sys.exit(main())
