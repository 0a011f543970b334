"""The width ladder: memory and query cost of wide sparse codes, beside plain scipy/numpy peers.

For each rung (bits / set bits per code) — 2,048/40, 16,384/160, 65,536/650
and 1,048,576/300 — at N codes (default 10^5; ``--sizes 1e5,1e6``), it
builds ``Store(bits, threshold=t, sample_size=s)`` from ``Codes.random``
(added in batches of 10^5) and measures in this process:

* bytes per stored code (``store.nbytes / N``), beside what the set bits
  alone need (indices of the narrowest type + 2-byte postings), and the row
  layout the store chose;
* the add rate;
* ``query`` (median of single queries of noisy copies of stored codes),
  ``query_many`` per query, ``nearest(k=10)`` on that store (its detectors
  sample, so it checks the stored rows) and on a second store of the same
  codes with ``sample_size=None`` (every bit indexed: ``nearest`` counts
  from the postings, at a cost that follows the query), beside the peer
  "inverted slice-sum, then ``argpartition`` for the top 10";
* peers over the same codes as a scipy.sparse CSR matrix S (N × bits):
  the product ``S @ q``, the transposed inverted slice-sum
  ``S.T.tocsr()[q_bits].sum(axis=0)`` and a numpy ``bincount`` over the
  same inverted rows — each answering the threshold query on full overlap,
  the job a user would otherwise write by hand.

Every time is printed with its ratio to the best peer measured in the same
run (the machine is shared: absolute times drift, ratios hold).

Run from the project root::

    PYTHONPATH=. python benchmarks/bench_wide.py --out benchmarks/results_wide.md
    PYTHONPATH=. python benchmarks/bench_wide.py --quick      # CI smoke run
    PYTHONPATH=. python benchmarks/bench_wide.py --rss 1e6    # peak memory of building 10^6 codes of 2^20/300

``--rss N`` builds only the 2^20-bit rung (300 set bits, in batches of
10^5, no peers) and prints the process's peak RSS (``VmHWM``) beside the
store's final bytes, then queries it.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import numpy as np
import scipy.sparse as sp

if __package__ in (None, ""):
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import _common as common
else:  # imported as benchmarks.bench_wide
    from . import _common as common

from sparseindex import Codes, Store  # noqa: E402
from sparseindex.codes import index_dtype  # noqa: E402

#: (bits, set bits, sample_size, threshold) per rung.
RUNGS = [(2_048, 40, 20, 10), (16_384, 160, 24, 12), (65_536, 650, 24, 12), (1_048_576, 300, 24, 12)]
BATCH = 100_000


def parse_args(argv):
    p = argparse.ArgumentParser(description="Memory and query cost of wide codes against scipy/numpy peers.")
    p.add_argument("--sizes", default="1e5", help="store sizes N (default 1e5)")
    p.add_argument("--queries", type=int, default=100, help="single queries timed per rung (default 100)")
    p.add_argument("--quick", action="store_true", help="CI smoke run: N = 2,000, few queries")
    p.add_argument("--out", default=None, help="also write the Markdown report here")
    p.add_argument("--rss", default=None, help="only build N codes of 2^20 bits / 300 set and report peak RSS")
    return p.parse_args(argv)


def noisy(rng, row, bits, keep):
    """A query: ``keep`` of the row's bits plus as many random others."""
    kept = rng.choice(row, size=keep, replace=False)
    return np.unique(np.concatenate([kept, rng.integers(0, bits, size=row.size - keep)]))


def median_time(fn, items):
    times = []
    for item in items:
        t0 = time.perf_counter()
        fn(item)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def rung(n, bits, weight, sample_size, threshold, n_queries, rng):
    store = Store(bits, threshold=threshold, sample_size=sample_size, seed=1)
    t0 = time.perf_counter()
    parts = []
    for a in range(0, n, BATCH):
        batch = Codes.random(min(BATCH, n - a), bits, weight, seed=a + bits)
        store.add(batch)
        parts.append(batch.to_scipy())
    add_s = time.perf_counter() - t0
    matrix = sp.vstack(parts).tocsr().astype(np.int32)
    inverted = matrix.T.tocsr()
    own = [matrix.indices[matrix.indptr[i] : matrix.indptr[i + 1]] for i in rng.integers(0, n, n_queries)]
    queries = [noisy(rng, row, bits, (3 * weight) // 4) for row in own]
    min_ov = weight // 2  # the peers answer "overlap >= min_ov" exactly; the store is asked the same
    store.query(queries[0].tolist())
    single = median_time(lambda q: store.query(q.tolist(), min_overlap=min_ov), queries)
    batch_codes = Codes.from_indices(queries, bits)
    store.query_many(batch_codes[:4])
    t0 = time.perf_counter()
    store.query_many(batch_codes, min_overlap=min_ov)
    many = (time.perf_counter() - t0) / len(queries)
    store.nearest(queries[0].tolist(), 10)
    nearest = median_time(lambda q: store.nearest(q.tolist(), 10), queries[: max(5, n_queries // 5)])
    whole = Store(bits, threshold=threshold, sample_size=None, seed=1)
    for a in range(0, n, BATCH):
        whole.add(Codes.from_scipy(matrix[a : a + BATCH]))
    whole.nearest(queries[0].tolist(), 10)
    nearest_whole = median_time(lambda q: whole.nearest(q.tolist(), 10), queries)
    whole_bytes = whole.nbytes / n
    del whole

    def top10(q):
        scores = np.asarray(inverted[q].sum(axis=0)).ravel()
        cut = np.argpartition(-scores, 10)[:10]
        return cut[np.lexsort((cut, -scores[cut]))]

    nearest_peer = median_time(top10, queries)

    def dense(q):
        v = np.zeros(bits, dtype=np.int32)
        v[q] = 1
        return v

    product = median_time(lambda q: np.flatnonzero(matrix @ dense(q) >= min_ov), queries)
    slice_sum = median_time(lambda q: np.flatnonzero(np.asarray(inverted[q].sum(axis=0)).ravel() >= min_ov),
                            queries)
    counted = median_time(lambda q: np.flatnonzero(np.bincount(
        np.concatenate([inverted.indices[inverted.indptr[b] : inverted.indptr[b + 1]] for b in q]), minlength=n)
        >= min_ov), queries)
    index_bytes = np.dtype(index_dtype(bits)).itemsize * weight
    postings_bytes = 2 * min(sample_size, weight)
    return dict(n=n, bits=bits, weight=weight, layout=store.row_layout, bytes_per_code=store.nbytes / n,
                set_bits_bytes=index_bytes + postings_bytes, add_rate=n / add_s, single=single, many=many,
                nearest=nearest, product=product, slice_sum=slice_sum, bincount=counted,
                nearest_whole=nearest_whole, whole_bytes=whole_bytes, nearest_peer=nearest_peer)


def report(rows, machine) -> str:
    head = ["N", "bits / set", "rows", "bytes/code (set bits need)", "add codes/s", "query", "query_many /q",
            "nearest k=10", "S @ q", "S.T slice-sum", "bincount", "query vs best peer",
            "nearest, every bit indexed (B/code)", "peer: slice-sum + top 10", "nearest vs peer"]
    table = []
    for r in rows:
        best = min(r["product"], r["slice_sum"], r["bincount"])
        table.append([f"{r['n']:,}", f"{r['bits']:,} / {r['weight']}", r["layout"],
                      f"{r['bytes_per_code']:,.0f} ({r['set_bits_bytes']:,})", f"{r['add_rate']:,.0f}",
                      common.fmt_seconds(r["single"]), common.fmt_seconds(r["many"]),
                      common.fmt_seconds(r["nearest"]), common.fmt_seconds(r["product"]),
                      common.fmt_seconds(r["slice_sum"]), common.fmt_seconds(r["bincount"]),
                      f"{best / r['single']:.1f}x faster",
                      f"{common.fmt_seconds(r['nearest_whole'])} ({r['whole_bytes']:,.0f})",
                      common.fmt_seconds(r["nearest_peer"]), f"{r['nearest_peer'] / r['nearest_whole']:.1f}x faster"])
    return ("# Wide codes: the width ladder\n\nGenerated by `benchmarks/bench_wide.py`; peers measured in the same "
            "run on the same codes.\n\n" + common.machine_markdown(machine, []) + "\n\n"
            + common.markdown_table(head, table) + "\n")


def peak_rss_bytes() -> int:
    """The process's peak resident set (Linux ``VmHWM``), or 0 where it cannot be read."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def rss_run(n: int) -> int:
    bits, weight, sample_size, threshold = RUNGS[-1]
    before = peak_rss_bytes()
    store = Store(bits, threshold=threshold, sample_size=sample_size, seed=1)
    t0 = time.perf_counter()
    for a in range(0, n, BATCH):
        store.add(Codes.random(min(BATCH, n - a), bits, weight, seed=a + bits))
    built = time.perf_counter() - t0
    q = Codes.random(1, bits, weight, seed=n + 1)
    store.query(q)
    peak = peak_rss_bytes()
    print(f"N={n:,} bits={bits:,}/{weight}: built in {built:.1f} s ({n / built:,.0f} codes/s); store "
          f"{store.nbytes / 1e9:.2f} GB ({store.nbytes / n:,.0f} B/code); peak RSS {peak / 1e9:.2f} GB "
          f"({(peak - before) / store.nbytes:.2f}x the store's final bytes above the {before / 1e9:.2f} GB at start)")
    return 0


def main(argv=None) -> int:
    args = parse_args(argv)
    if args.rss:
        return rss_run(int(float(args.rss)))
    sizes = [2_000] if args.quick else [int(float(x)) for x in args.sizes.split(",")]
    n_queries = 10 if args.quick else args.queries
    rng = np.random.default_rng(7)
    rows = []
    for n in sizes:
        for bits, weight, s, t in RUNGS:
            r = rung(n, bits, weight, s, t, n_queries, rng)
            rows.append(r)
            print(f"N={n:,} bits={bits:,}/{weight}: {r['layout']} rows, {r['bytes_per_code']:,.0f} B/code "
                  f"(set bits {r['set_bits_bytes']:,}); query {r['single'] * 1e3:.3f} ms, best peer "
                  f"{min(r['product'], r['slice_sum'], r['bincount']) * 1e3:.3f} ms; nearest "
                  f"{r['nearest'] * 1e3:.2f} ms, from postings {r['nearest_whole'] * 1e3:.2f} ms vs peer "
                  f"{r['nearest_peer'] * 1e3:.2f} ms", flush=True)
    text = report(rows, common.machine_record())
    if args.out:
        with open(args.out, "w", encoding="utf-8") as f:
            f.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
