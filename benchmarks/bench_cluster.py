"""Sharded-store benchmark: query throughput on 1 and 2 local workers against one Store.

At N codes (default 2·10^6; random 2048-bit codes with 40 set bits,
``threshold=20``, one detector holding every set bit, as in
``bench_store.py``) this script builds, in one run:

* the peer: a single in-process ``Store`` with the same seed and codes;
* ``ShardedStore(client, 1, ...)`` with its one shard on one worker;
* ``ShardedStore(client, 2, ...)`` with one shard on each of two workers,

on a ``distributed.LocalCluster`` of 2 worker processes (1 thread each,
loopback), and times ``query_many`` on batches of several sizes (queries
alternate noisy copies of stored codes and random codes), reporting
queries/s and the ratio to the single store. Every sharded answer is
compared with the single store's: the script exits 1 if any differs.

The engine's own cost per call is measured beside it: a no-op actor method
round trip, a no-op submitted task (pinned to a worker), and a whole
ShardedStore fan-out that does no store work (``nearest(code, k=0)``).

Run from the project root::

    PYTHONPATH=. python benchmarks/bench_cluster.py --out benchmarks/results_cluster.md
    PYTHONPATH=. python benchmarks/bench_cluster.py --quick      # CI smoke run (seconds)

Without ``distributed`` installed it prints a skip line and exits 0.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import _common as common
    import bench_store
else:  # imported as benchmarks.bench_cluster
    from . import _common as common
    from . import bench_store


def parse_args(argv):
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--quick", action="store_true", help="tiny sizes for CI (seconds)")
    p.add_argument("--size", type=float, default=2e6, help="stored codes N (default 2e6)")
    p.add_argument("--batches", default="1,100,1000,10000", help="query batch sizes")
    p.add_argument("--bits", type=int, default=2048)
    p.add_argument("--weight", type=int, default=40)
    p.add_argument("--threshold", type=int, default=20)
    p.add_argument("--drop", type=int, default=10, help="bits a noisy query copy loses")
    p.add_argument("--repeats", type=int, default=5)
    p.add_argument("--omp-wait", default="PASSIVE",
                   help="OMP_WAIT_POLICY for this process and the workers, unless already set (default PASSIVE: "
                        "idle OpenMP threads sleep instead of spinning, which matters with several processes per core)")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--out", help="write the Markdown report here")
    args = p.parse_args(argv)
    if args.quick:
        args.size, args.batches, args.repeats = 2e4, "1,100", 3
    args.n = int(args.size)
    args.batch_list = [int(float(b)) for b in args.batches.split(",")]
    return args


class Echo:
    """A no-op actor: the round trip of a method call and nothing else."""

    def ping(self):
        return 0


def _noop():
    return 0


def same(a, b) -> bool:
    return (np.array_equal(a.indptr, b.indptr) and np.array_equal(a.ids, b.ids)
            and np.array_equal(a.overlaps, b.overlaps))


def build(make, codes, chunk, log, label):
    """A store from ``make()`` with every code added in chunks; (store, add Timing)."""
    t0 = time.perf_counter()
    store = make()
    for a in range(0, len(codes), chunk):
        store.add(codes[a : a + chunk])
    seconds = time.perf_counter() - t0
    log(f"{label}: built in {seconds:.1f} s")
    return store, common.Timing([seconds], per=len(codes))


def time_batches(store, queries, args):
    """{batch size: per-query Timing of query_many}."""
    out = {}
    for b in args.batch_list:
        part = queries[:b]
        reps = args.repeats if b >= 100 else max(args.repeats, 50)
        out[b] = common.measure(lambda: store.query_many(part), repeats=reps, warmup=2 if b < 1000 else 1, per=b)
    return out


def overheads(client, sharded, workers, code, args):
    echo = client.submit(Echo, actor=True, workers=[workers[0]], allow_other_workers=False, pure=False).result()
    calls = 50 if args.quick else 300
    actor = common.measure(lambda: [echo.ping().result() for _ in range(calls)], repeats=3, warmup=1, per=calls)
    tasks = 20 if args.quick else 100
    task = common.measure(
        lambda: [client.submit(_noop, pure=False, workers=[workers[0]], allow_other_workers=False).result()
                 for _ in range(tasks)], repeats=3, warmup=1, per=tasks)
    fan = common.measure(lambda: [sharded.nearest(code, 0) for _ in range(calls)], repeats=3, warmup=1, per=calls)
    return {"actor": actor, "task": task, "fanout": fan}


def render(args, machine, single_add, rows, over, elapsed, exact):
    f = common.fmt_seconds
    lines = [
        "# Sharded store (ShardedStore on a local Dask cluster) against one Store",
        "",
        f"N = {args.n:,} random {args.bits}-bit codes with {args.weight} set bits; `threshold={args.threshold}`, "
        "`sample_size=None`, 1 detector (as `bench_store.py`). Queries alternate noisy copies (lose "
        f"{args.drop} bits) and random codes. `query_many` per batch, warm-up 2 (1 from 1,000 queries), "
        f"{args.repeats} repeats (50 for single queries); medians per query; ratio = store ÷ single Store "
        "in queries/s (above 1: faster than one Store).",
        "",
        common.machine_markdown(machine, []),
        "- Cluster: `distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True)` on loopback; "
        "each worker's numba kernels use every core; client `direct_to_workers` left at its default; "
        f"`OMP_WAIT_POLICY={os.environ.get('OMP_WAIT_POLICY')}` in every process (numba threading layer "
        f"{machine['numba_threading_layer']}).",
        f"- Answers identical to the single Store on every timed batch: **{'yes' if exact else 'NO'}**",
        f"- Whole run: {elapsed:.0f} s",
        "",
        "## Query throughput",
        "",
    ]
    header = ["batch", "single Store", "1 worker (1 shard)", "ratio", "2 workers (2 shards)", "ratio"]
    table = []
    for b in args.batch_list:
        s, one, two = rows["single"][b], rows["one"][b], rows["two"][b]
        table.append([
            f"{b:,}",
            f"{f(s.median)} ({1 / s.median:,.0f}/s)",
            f"{f(one.median)} ({1 / one.median:,.0f}/s)",
            common.fmt_ratio(s.median / one.median),
            f"{f(two.median)} ({1 / two.median:,.0f}/s)",
            common.fmt_ratio(s.median / two.median),
        ])
    lines += [common.markdown_table(header, table), ""]
    lines += [
        "Per query: median (queries/s). Min–max per cell:",
        "",
    ]
    for key, name in (("single", "single Store"), ("one", "1 worker"), ("two", "2 workers")):
        lines.append(f"- {name}: " + "; ".join(f"{b:,}: {common.fmt_timing(rows[key][b])}" for b in args.batch_list))
    lines += [
        "",
        "## Building (add, chunks of 250,000 codes)",
        "",
        common.markdown_table(
            ["store", "codes/s", "ratio to single Store"],
            [["single Store", f"{1 / single_add.median:,.0f}", "1.0×"]]
            + [[name, f"{1 / t.median:,.0f}", common.fmt_ratio(single_add.median / t.median)]
               for name, t in (("1 worker", rows["add_one"]), ("2 workers", rows["add_two"]))],
        ),
        "",
        "## Per-call overhead of the engine",
        "",
        common.markdown_table(
            ["call", "median (min–max)"],
            [["actor method round trip (no-op)", common.fmt_timing(over["actor"])],
             ["submitted task round trip (no-op, pinned)", common.fmt_timing(over["task"])],
             ["ShardedStore fan-out to 2 shards, no store work (`nearest(code, 0)`)", common.fmt_timing(over["fanout"])]],
        ),
        "",
        f"A submitted task costs {over['task'].median / over['actor'].median:.1f}× an actor call: "
        "the reason shards are actors. A query batch pays about one fan-out "
        f"({f(over['fanout'].median)}) plus moving its queries and hits; spread over a batch of "
        f"{args.batch_list[-1]:,} that is {f(over['fanout'].median / args.batch_list[-1])} per query.",
        "",
    ]
    return "\n".join(lines) + "\n"


def main(argv=None):
    args = parse_args(sys.argv[1:] if argv is None else argv)

    def log(msg):
        print(f"[bench_cluster] {msg}", file=sys.stderr, flush=True)

    os.environ.setdefault("OMP_WAIT_POLICY", args.omp_wait)  # before any parallel kernel runs
    try:
        import distributed
    except ImportError:
        print('[bench_cluster] skipped: dask distributed is not installed (pip install "sparseindex[cluster]")')
        return 0
    from sparseindex import Codes, Store
    from sparseindex.cluster import ShardedStore

    started = time.perf_counter()
    params = dict(threshold=args.threshold, sample_size=None, detectors=1, seed=args.seed)
    codes = Codes.random(args.n, args.bits, args.weight, seed=args.seed)
    queries = bench_store.make_queries(codes, max(args.batch_list), args.bits, args.drop, args.seed + 7)[0]
    chunk = 250_000
    single, single_add = build(lambda: Store(args.bits, **params), codes, chunk, log, "single Store")
    rows = {"single": time_batches(single, queries, args)}
    want = {b: single.query_many(queries[:b]) for b in args.batch_list}
    exact = True
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address="127.0.0.1:0", silence_logs=30)
    client = distributed.Client(cluster)
    try:
        workers = sorted(client.scheduler_info()["workers"])
        for key, shards, on in (("one", 1, workers[:1]), ("two", 2, workers)):
            sharded, add = build(lambda: ShardedStore(client, shards, args.bits, workers=on, **params),
                                 codes, chunk, log, f"{shards} shard(s)")
            rows["add_" + key] = add
            rows[key] = time_batches(sharded, queries, args)
            exact &= all(same(sharded.query_many(queries[:b]), want[b]) for b in args.batch_list)
            if key == "two":
                over = overheads(client, sharded, workers, queries[0], args)
            sharded.close()
    finally:
        client.close()
        cluster.close()
    machine = common.machine_record()
    report = render(args, machine, single_add, rows, over, time.perf_counter() - started, exact)
    print(report, end="")
    if args.out:
        with open(args.out, "w", encoding="utf-8") as f:
            f.write(report)
        log(f"wrote {args.out}")
    return 0 if exact else 1


if __name__ == "__main__":
    sys.exit(main())
