"""Health benchmark: cost of a report, of a measurement, and of usage counting in add.

At each size N (default 10^6) a store planned with ``Store.for_target(2048,
40, false_hit=1e-9, capacity=2N, noise=0.25)`` is filled with random codes
of 40 set bits, and this process measures:

* ``store.health()``: a scrape-time report with memoised model figures
  (target: under 10 ms at N = 10^6), a report that recomputes the
  usage-aware estimate (``refresh=True``), and rendering it as OpenMetrics;
* ``store.measure_false_hits(10_000)`` with uniform and with usage-drawn queries, as
  queries/s, beside ``query_many`` of the same number of random queries
  (the peer: a measurement is that plus drawing the queries and the interval);
* the cost of keeping per-bit usage counts during ``add``: the bank's
  fused sample-and-index kernel over the same batch with counting on and
  off, interleaved, medians (target: under 5% of add time).

Run from the project root::

    PYTHONPATH=. python benchmarks/bench_health.py --out benchmarks/results_health.md
    PYTHONPATH=. python benchmarks/bench_health.py --quick      # CI smoke run
"""

from __future__ import annotations

import argparse
import json
import os
import sys

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import _common as common
else:  # imported as benchmarks.bench_health
    from . import _common as common

from sparseindex import Codes, Store  # noqa: E402
from sparseindex.store.bank import DetectorBank  # noqa: E402
from sparseindex.codes import row_table  # noqa: E402


def parse_args(argv):
    p = argparse.ArgumentParser(description="Benchmark Store.health, Store.measure_false_hits and usage counting in add.")
    p.add_argument("--sizes", default="1e6", help="comma-separated store sizes N (default 1e6)")
    p.add_argument("--quick", action="store_true", help="CI smoke run: N = 20,000, few repeats")
    p.add_argument("--measure", type=int, default=10_000, help="measurement queries (default 10,000)")
    p.add_argument("--repeats", type=int, default=5, help="timed repeats (default 5)")
    p.add_argument("--out", default=None, help="also write the Markdown report here")
    p.add_argument("--json", default=None, help="write every sample here as JSON")
    return p.parse_args(argv)


def run(n, measured_queries, repeats):
    warm = Store.for_target(2048, 40, false_hit=1e-9, capacity=2 * n, noise=0.25, seed=1)
    warm.add(Codes.random(2_000, 2048, 40, seed=1))  # compile (or load) every kernel first
    warm.health(refresh=True), warm.measure_false_hits(100, seed=1), warm.measure_false_hits(100, source="usage", seed=1)
    codes = Codes.random(n, 2048, 40, seed=11)
    store = Store.for_target(2048, 40, false_hit=1e-9, capacity=2 * n, noise=0.25, seed=11)
    add = common.measure(lambda: store.add(codes), repeats=1, warmup=0)
    bank_args = (store.bits, store.threshold, store.sample_size, store.detectors, store.seed)
    ids = np.arange(n, dtype=np.int64)

    def fused(count):
        bank = DetectorBank(*bank_args)
        return lambda: bank.prepare_append(row_table(codes), ids, codes.weights, count_usage=count)

    fused(True)()  # compile both paths
    with_usage, without_usage = [], []
    for _ in range(repeats):  # interleaved: the machine's drift hits both alike
        with_usage.append(common.time_once(fused(True)))
        without_usage.append(common.time_once(fused(False)))
    t = {
        "add (whole store)": add,
        "fused kernel, usage counted": common.Timing(with_usage),
        "fused kernel, usage not counted": common.Timing(without_usage),
        "health() memoised": common.measure(store.health, repeats=max(20, 10 * repeats), warmup=2),
        "health(refresh=True)": common.measure(lambda: store.health(refresh=True), repeats=repeats, warmup=1),
    }
    h = store.health()
    t["to_openmetrics()"] = common.measure(h.to_openmetrics, repeats=max(20, 10 * repeats), warmup=2)
    queries = Codes.random(measured_queries, 2048, 40, seed=12)
    store.query_many(queries[:100])
    t["query_many peer"] = common.measure(lambda: store.query_many(queries), repeats=repeats, warmup=0,
                                          per=measured_queries)
    t["measurement uniform"] = common.measure(lambda: store.measure_false_hits(measured_queries, seed=1), repeats=repeats, warmup=1,
                                        per=measured_queries)
    t["measurement usage"] = common.measure(lambda: store.measure_false_hits(measured_queries, source="usage", seed=1),
                                      repeats=repeats, warmup=1, per=measured_queries)
    return {"n": n, "timings": t, "health": h, "measurement": store.measure_false_hits(measured_queries, seed=2)}


def report(results, record, bandwidth):
    lines = ["# Health benchmark", "", common.machine_markdown(record, bandwidth), ""]
    rows = []
    for r in results:
        for name, timing in r["timings"].items():
            rows.append([f"{r['n']:,}", name, common.fmt_timing(timing)])
    lines += [common.markdown_table(["N", "operation", "time per call (per query for measurements)"], rows), ""]
    for r in results:
        t = r["timings"]
        on, off = t["fused kernel, usage counted"].median, t["fused kernel, usage not counted"].median
        cost = (on - off) / off
        health_ms = 1000 * t["health() memoised"].median
        lines += [
            f"- N = {r['n']:,}: `health()` {health_ms:.2f} ms "
            f"({'meets' if health_ms < 10 else 'misses'} the 10 ms target); refresh "
            f"{1000 * t['health(refresh=True)'].median:.1f} ms; OpenMetrics text "
            f"{1000 * t['to_openmetrics()'].median:.2f} ms.",
            f"- Usage counting in add: {100 * cost:+.1f}% of the fused kernel's time "
            f"({'meets' if cost < 0.05 else 'misses'} the 5% target); whole add "
            f"{r['n'] / t['add (whole store)'].median / 1e6:.2f} M codes/s.",
            f"- Measurement: {1 / t['measurement uniform'].median:,.0f} uniform and {1 / t['measurement usage'].median:,.0f} "
            f"usage queries/s; `query_many` of the same count {1 / t['query_many peer'].median:,.0f} queries/s "
            f"(measurement / peer time {t['measurement uniform'].median / t['query_many peer'].median:.2f}x).",
            f"- Report: {r['measurement']}",
            "",
            "```",
            str(r["health"]),
            "```",
            "",
        ]
    return "\n".join(lines) + "\n"


def main(argv=None):
    args = parse_args(sys.argv[1:] if argv is None else argv)
    sizes = [20_000] if args.quick else [int(float(x)) for x in args.sizes.split(",")]
    repeats = 2 if args.quick else args.repeats
    measurement = 1_000 if args.quick else args.measure
    results = [run(n, measurement, repeats) for n in sizes]
    record = common.machine_record()
    bandwidth = [common.memory_bandwidth(64 if args.quick else 256, repeats=2 if args.quick else 5)]
    text = report(results, record, bandwidth)
    print(text)
    if args.out:
        with open(args.out, "w") as f:
            f.write(text)
    if args.json:
        with open(args.json, "w") as f:
            json.dump({"machine": record, "results": [
                {"n": r["n"], "timings": {k: v.as_dict() for k, v in r["timings"].items()},
                 "health": r["health"].to_dict()} for r in results]}, f, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
