"""Store benchmark: add rate, single and batch query time, memory per code.

Builds stores of random codes (2048 bits, 40 set bits) over a size ladder
(default N = 10^4, 10^5, 10^6) with ``sample_size=None, threshold=20`` and, on
the same data and the same queries, times:

* the store: ``add`` into an empty store and appending a second batch,
  ``query`` one code at a time and ``query_many`` over a batch;
* scipy.sparse product peers: single ``S @ q`` (csr store matrix times the
  query as a dense vector) and ``q @ S^T`` (query row times a pre-transposed
  store matrix), batch ``S @ Q^T`` and ``Q @ S^T``, each then thresholded
  at ``>= threshold``;
* a numpy packed-scan peer: ``np.bitwise_count(words & q).sum(axis=1)``
  over every stored row, thresholded;
* the lower bound: bytes of postings a query must read divided by the
  measured memory bandwidth.

Queries alternate between noisy copies of stored codes (keep 30 of the 40
bits, add 10 others) and random codes. The hits of the store are checked
against the peers' for every query a peer ran. Results go to stdout as
Markdown, optionally to ``--out FILE.md`` and ``--json FILE``.

Run from the project root::

    PYTHONPATH=. python benchmarks/bench_store.py --out benchmarks/results_store.md
    PYTHONPATH=. python benchmarks/bench_store.py --quick      # CI smoke run
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import _common as common
else:  # imported as benchmarks.bench_store
    from . import _common as common


def parse_args(argv):
    p = argparse.ArgumentParser(
        description="Benchmark sparseindex.Store against scipy.sparse and numpy peers over a size ladder."
    )
    p.add_argument("--sizes", default="1e4,1e5,1e6", help="comma-separated store sizes N (default 1e4,1e5,1e6)")
    p.add_argument("--quick", action="store_true", help="CI smoke run: tiny sizes, few queries and repeats")
    p.add_argument("--bits", type=int, default=2048, help="code width n (default 2048)")
    p.add_argument("--weight", type=int, default=40, help="set bits per code a (default 40)")
    p.add_argument("--threshold", type=int, default=20, help="detector threshold (default 20)")
    p.add_argument("--drop", type=int, default=10, help="bits a noisy query drops and replaces (default 10)")
    p.add_argument("--single", type=int, default=500, help="queries timed one at a time on the store (default 500)")
    p.add_argument("--batch", type=int, default=200, help="queries per batch for store and scipy batch (default 200)")
    p.add_argument("--append-fraction", type=float, default=0.1, help="second batch size as a fraction of N (default 0.1)")
    p.add_argument("--repeats", type=int, default=5, help="timed repeats of store queries (default 5)")
    p.add_argument("--peer-repeats", type=int, default=3, help="timed repeats of peer queries (default 3)")
    p.add_argument("--add-repeats", type=int, default=3, help="timed repeats of add (default 3)")
    p.add_argument("--seed", type=int, default=0, help="seed of codes and queries (default 0)")
    p.add_argument("--out", metavar="FILE.md", help="also write the Markdown report here")
    p.add_argument("--json", metavar="FILE", help="also write every sample and figure as JSON here")
    args = p.parse_args(argv)
    if args.quick:
        args.sizes = "2e3,1e4"
        args.single = min(args.single, 100)
        args.batch = min(args.batch, 50)
        args.repeats = min(args.repeats, 3)
        args.peer_repeats = min(args.peer_repeats, 2)
        args.add_repeats = min(args.add_repeats, 2)
    try:
        args.size_list = [int(float(x)) for x in args.sizes.split(",") if x.strip()]
    except ValueError:
        p.error(f"--sizes={args.sizes!r}: expected comma-separated numbers such as 1e4,1e5")
    if not args.size_list or min(args.size_list) < 1:
        p.error(f"--sizes={args.sizes!r}: every size must be >= 1")
    if not 0 <= args.drop <= args.weight - args.threshold:
        p.error(f"--drop={args.drop}: a noisy copy must keep at least threshold={args.threshold} bits")
    return args


# -- data ---------------------------------------------------------------------


def make_queries(codes, count, bits, drop, seed):
    """``count`` queries alternating noisy copy / random code.

    A noisy copy keeps all but ``drop`` of a stored code's bits and adds
    ``drop`` bits outside it, so it has the same weight. Returns the query
    ``Codes``, their index arrays, and the source row of each (-1: random).
    """
    from sparseindex import Codes

    rng = np.random.default_rng(seed)
    n_noisy = (count + 1) // 2
    sources = rng.choice(len(codes), size=n_noisy, replace=len(codes) < n_noisy)
    weight = len(codes[0])
    randoms = Codes.random(count - n_noisy, bits, weight, seed=seed + 1).to_indices()
    rows, source_of = [], []
    for k in range(count):
        if k % 2 == 0:
            src = int(sources[k // 2])
            own = codes[src]
            keep = rng.choice(own, size=own.size - drop, replace=False)
            outside = np.ones(bits, dtype=bool)
            outside[own] = False
            extra = rng.choice(np.flatnonzero(outside), size=drop, replace=False)
            rows.append(np.sort(np.concatenate([keep, extra])))
            source_of.append(src)
        else:
            rows.append(randoms[k // 2])
            source_of.append(-1)
    return Codes.from_indices(rows, bits), rows, np.array(source_of, dtype=np.int64)


def scipy_hits_single(S, idx, bits, threshold):
    """Peer: ``S @ q`` with q dense; rows with overlap >= threshold, ascending."""
    v = np.zeros(bits, dtype=np.int32)
    v[idx] = 1
    r = S @ v
    rows = np.flatnonzero(r >= threshold)
    return rows, r[rows]


def scipy_hits_single_qmajor(ST, idx, bits, threshold):
    """Peer: ``q @ S^T`` with q a 1-row csr and S^T pre-transposed to csr."""
    import scipy.sparse as sp

    q = sp.csr_array((np.ones(idx.size, dtype=np.int32), idx, np.array([0, idx.size])), shape=(1, bits))
    r = q @ ST
    keep = r.data >= threshold
    rows = r.indices[keep]
    order = np.argsort(rows)
    return rows[order], r.data[keep][order]


def scipy_hits_batch(S, Qb, threshold):
    """Peer: ``S @ Q^T`` (N x B csr), thresholded; flat (query, row, overlap)."""
    QT = Qb.to_scipy().astype(np.int32).T.tocsr()
    R = S @ QT
    pos = np.flatnonzero(R.data >= threshold)
    rows = np.searchsorted(R.indptr, pos, side="right") - 1
    return R.indices[pos], rows, R.data[pos]


def scipy_hits_batch_qmajor(ST, Qb, threshold):
    """Peer: ``Q @ S^T`` (B x N csr), thresholded; flat (query, row, overlap)."""
    R = Qb.to_scipy().astype(np.int32) @ ST
    pos = np.flatnonzero(R.data >= threshold)
    queries = np.searchsorted(R.indptr, pos, side="right") - 1
    return queries, R.indices[pos], R.data[pos]


def numpy_hits(words, qw, threshold):
    """Peer: AND + popcount over every packed row."""
    ov = np.bitwise_count(words & qw).sum(axis=1)
    rows = np.flatnonzero(ov >= threshold)
    return rows, ov[rows]


def as_pairs(queries, rows, overlaps):
    """A set of (query, row, overlap) triples."""
    return set(zip(np.asarray(queries).tolist(), np.asarray(rows).tolist(), np.asarray(overlaps).tolist()))


def peer_count(n, budget, lo, hi):
    """Queries for a peer whose cost grows with N: about ``budget / N``, clamped."""
    return int(max(lo, min(hi, round(budget / n))))


# -- one size -------------------------------------------------------------


def bench_size(n, args, bandwidth, log):
    from sparseindex import Codes, Store

    bits, weight, threshold = args.bits, args.weight, args.threshold
    out = {"N": n}
    log(f"N={n}: making codes")
    codes = Codes.random(n, bits, weight, seed=args.seed * 1000 + 11)
    n_append = max(1, int(round(n * args.append_fraction)))
    second = Codes.random(n_append, bits, weight, seed=args.seed * 1000 + 12)

    def new_store():
        return Store(bits, threshold=threshold, sample_size=None, detectors=1, seed=args.seed)

    # add: into an empty store, then a second batch into the now non-empty one
    log(f"N={n}: add ({args.add_repeats} repeats)")
    empty_s, append_s, bytes_after_append = [], [], None
    for _ in range(args.add_repeats):
        store = new_store()
        empty_s.append(common.time_once(lambda: store.add(codes)))
        append_s.append(common.time_once(lambda: store.add(second)))
        bytes_after_append = store.nbytes
        del store
    t_add = common.Timing(empty_s, per=n)
    t_append = common.Timing(append_s, per=n_append)
    store = new_store()
    store.add(codes)
    assert len(store) == n
    out["add_empty"] = t_add.as_dict()
    out["add_append"] = t_append.as_dict() | {"batch": n_append, "into": n}
    out["nbytes"] = store.nbytes
    out["bytes_per_code"] = store.nbytes / n
    out["bytes_per_code_after_append"] = bytes_after_append / (n + n_append)
    out["postings_count"] = store.postings_count
    out["postings_bytes_per_code"] = 2 * store.postings_count / n

    n_single = args.single
    n_batch = args.batch
    n_queries = max(n_single, n_batch)
    queries, q_rows, sources = make_queries(codes, n_queries, bits, args.drop, seed=args.seed * 1000 + 13)
    q_weight = float(np.mean([r.size for r in q_rows]))
    n_sp = min(n_single, peer_count(n, 2e7, 10, 500))
    n_slow = min(n_single, peer_count(n, 5e6, 5, 200))
    n_bq = min(n_batch, peer_count(n, 2e7, 10, n_batch))
    out["queries"] = {
        "weight_mean": q_weight,
        "store_single": n_single,
        "batch": n_batch,
        "scipy_single": n_sp,
        "scipy_single_qmajor": n_slow,
        "numpy_scan": n_slow,
        "scipy_batch_qmajor": n_bq,
    }

    # single queries: the store
    log(f"N={n}: store single queries ({n_single} x {args.repeats})")
    single = q_rows[:n_single]

    def store_single():
        for idx in single:
            store.query(idx)

    t = common.measure(store_single, repeats=args.repeats, warmup=1, per=n_single)
    out["store_single"] = t.as_dict()

    # single queries: peers
    log(f"N={n}: scipy single peers")
    S = codes.to_scipy().astype(np.int32)
    sp_single = q_rows[:n_sp]
    t = common.measure(
        lambda: [scipy_hits_single(S, idx, bits, threshold) for idx in sp_single],
        repeats=args.peer_repeats,
        warmup=1,
        per=n_sp,
        warmup_fn=lambda: [scipy_hits_single(S, idx, bits, threshold) for idx in sp_single[:5]],
    )
    out["scipy_single"] = t.as_dict()
    t0 = time.perf_counter()
    ST = S.T.tocsr()
    out["scipy_transpose_s"] = time.perf_counter() - t0
    slow = q_rows[:n_slow]
    t = common.measure(
        lambda: [scipy_hits_single_qmajor(ST, idx, bits, threshold) for idx in slow],
        repeats=args.peer_repeats,
        warmup=1,
        per=n_slow,
        warmup_fn=lambda: scipy_hits_single_qmajor(ST, slow[0], bits, threshold),
    )
    out["scipy_single_qmajor"] = t.as_dict()
    log(f"N={n}: numpy scan peer")
    words = codes.words
    qwords = queries.words
    t = common.measure(
        lambda: [numpy_hits(words, qwords[i], threshold) for i in range(n_slow)],
        repeats=args.peer_repeats,
        warmup=1,
        per=n_slow,
        warmup_fn=lambda: numpy_hits(words, qwords[0], threshold),
    )
    out["numpy_scan"] = t.as_dict()

    # batch queries
    log(f"N={n}: store batch ({n_batch} queries x {args.repeats})")
    Qb = queries[:n_batch]
    t = common.measure(lambda: store.query_many(Qb), repeats=args.repeats, warmup=1, per=n_batch)
    out["store_batch"] = t.as_dict()
    log(f"N={n}: scipy batch peers")
    t = common.measure(
        lambda: scipy_hits_batch(S, Qb, threshold),
        repeats=args.peer_repeats,
        warmup=1,
        per=n_batch,
        warmup_fn=lambda: scipy_hits_batch(S, queries[: min(10, n_batch)], threshold),
    )
    out["scipy_batch"] = t.as_dict()
    Qbq = queries[:n_bq]
    t = common.measure(
        lambda: scipy_hits_batch_qmajor(ST, Qbq, threshold),
        repeats=args.peer_repeats,
        warmup=1,
        per=n_bq,
        warmup_fn=lambda: scipy_hits_batch_qmajor(ST, queries[: min(5, n_bq)], threshold),
    )
    out["scipy_batch_qmajor"] = t.as_dict()

    # exactness: the store's hits against every peer, on every query a peer ran
    log(f"N={n}: exactness check")
    checks = {}
    mine = {}
    for i in range(n_single):
        h = store.query(single[i])
        mine[i] = (np.sort(h.ids), h.overlaps[np.argsort(h.ids)])

    def compare(name, count, peer):
        bad = []
        for i in range(count):
            rows, ov = peer(i)
            if not (np.array_equal(rows, mine[i][0]) and np.array_equal(ov, mine[i][1])):
                bad.append(i)
        checks[name] = {"queries": count, "mismatches": len(bad), "first_bad": bad[:5]}

    compare("scipy S@q", n_sp, lambda i: scipy_hits_single(S, single[i], bits, threshold))
    compare("scipy q@S^T", n_slow, lambda i: scipy_hits_single_qmajor(ST, single[i], bits, threshold))
    compare("numpy scan", n_slow, lambda i: numpy_hits(words, qwords[i], threshold))
    bh = store.query_many(Qb)
    store_pairs = as_pairs(np.repeat(np.arange(n_batch), bh.counts), bh.ids, bh.overlaps)
    peer_pairs = as_pairs(*scipy_hits_batch(S, Qb, threshold))
    checks["scipy S@Q^T (batch)"] = {
        "queries": n_batch,
        "mismatches": len(store_pairs ^ peer_pairs),
        "first_bad": sorted(store_pairs ^ peer_pairs)[:5],
    }
    sub = {p for p in store_pairs if p[0] < n_bq}
    peer_sub = as_pairs(*scipy_hits_batch_qmajor(ST, Qbq, threshold))
    checks["scipy Q@S^T (batch)"] = {
        "queries": n_bq,
        "mismatches": len(sub ^ peer_sub),
        "first_bad": sorted(sub ^ peer_sub)[:5],
    }
    single_match = all(
        np.array_equal(store.query(single[i]).ids, bh[i].ids) for i in range(min(n_single, n_batch))
    )
    checks["query == query_many"] = {"queries": min(n_single, n_batch), "mismatches": 0 if single_match else 1}
    out["exact"] = checks
    out["exact_all"] = all(c["mismatches"] == 0 for c in checks.values())
    noisy = sources[:n_batch] >= 0
    found = np.array([int(sources[i]) in set(bh[i].ids.tolist()) for i in range(n_batch) if noisy[i]])
    counts = bh.counts
    out["hits"] = {
        "noisy_queries": int(noisy.sum()),
        "noisy_source_found": float(found.mean()) if found.size else None,
        "hits_per_noisy_query": float(counts[noisy].mean()) if noisy.any() else None,
        "hits_per_random_query": float(counts[~noisy].mean()) if (~noisy).any() else None,
    }

    # the bound: postings a query must read / bandwidth
    per_code = store.postings_count / n  # D * s
    bytes_u16 = q_weight * store.postings_count / bits * 2
    bytes_i32 = q_weight * n * per_code / bits * 4
    bw1 = bandwidth[0]["read_bytes_per_s"]
    bwall = bandwidth[-1]["read_bytes_per_s"]
    out["bound"] = {
        "postings_bytes_per_query": bytes_u16,
        "int32_bytes_per_query": bytes_i32,
        "single_s": bytes_u16 / bw1,
        "single_int32_s": bytes_i32 / bw1,
        "batch_s": bytes_u16 / bwall,
        "bandwidth_single": bw1,
        "bandwidth_batch": bwall,
        "batch_threads": bandwidth[-1]["threads"],
    }
    del S, ST, store
    return out


# -- report ---------------------------------------------------------------


def _t(d):
    return common.Timing(d["samples_s"], per=d["per"], warmup=d["warmup"])


def ratios(r):
    """The ratios of one size's results (medians)."""
    best_single = min(r["scipy_single"]["median_s"], r["scipy_single_qmajor"]["median_s"])
    best_batch = min(r["scipy_batch"]["median_s"], r["scipy_batch_qmajor"]["median_s"])
    return {
        "scipy_single_over_store": best_single / r["store_single"]["median_s"],
        "numpy_over_store": r["numpy_scan"]["median_s"] / r["store_single"]["median_s"],
        "store_single_over_bound": r["store_single"]["median_s"] / r["bound"]["single_s"],
        "scipy_batch_over_store": best_batch / r["store_batch"]["median_s"],
        "store_batch_over_bound": r["store_batch"]["median_s"] / r["bound"]["batch_s"],
        "add_codes_per_s": 1.0 / r["add_empty"]["median_s"],
        "append_codes_per_s": 1.0 / r["add_append"]["median_s"],
    }


def targets(results, target_n=10**6):
    """The issue's targets, evaluated at N = ``target_n`` if it was measured."""
    at = [r for r in results if r["N"] == target_n]
    if not at:
        return None
    r = at[0]
    x = r["ratios"]
    return [
        ("single query ≥ 20× faster than the scipy single peer", x["scipy_single_over_store"] >= 20,
         f"{common.fmt_ratio(x['scipy_single_over_store'])}"),
        ("batch query ≥ 40× faster than the scipy batch peer", x["scipy_batch_over_store"] >= 40,
         f"{common.fmt_ratio(x['scipy_batch_over_store'])}"),
        ("add ≥ 1,000,000 codes/s (into an empty store)", x["add_codes_per_s"] >= 1e6,
         f"{x['add_codes_per_s']:,.0f} codes/s"),
        ("≤ 450 bytes per stored code", r["bytes_per_code"] <= 450, f"{r['bytes_per_code']:.0f} B"),
    ]


def render(results, machine, bandwidth, args, elapsed):
    f = common
    lines = [
        "# sparseindex Store benchmark",
        "",
        f"Random codes of {args.bits} bits with {args.weight} set bits; `Store(bits={args.bits}, "
        f"threshold={args.threshold}, sample_size=None, detectors=1)`. Queries alternate between noisy copies of "
        f"stored codes (keep {args.weight - args.drop} of the {args.weight} bits, add {args.drop} others) and "
        "random codes. Times are per query (per code for add): median (min–max) over the repeats, after a "
        "warm-up. Ratios use medians.",
        "",
        f.machine_markdown(machine, bandwidth),
        "",
        "## Adding codes",
        "",
    ]
    rows = []
    for r in results:
        rows.append([
            f"{r['N']:,}",
            f.fmt_rate(_t(r["add_empty"])),
            f"{r['add_append']['batch']:,}",
            f.fmt_rate(_t(r["add_append"])),
            f"{r['bytes_per_code']:.0f} B",
            f"{r['postings_bytes_per_code']:.0f} B",
            f"{r['bytes_per_code_after_append']:.0f} B",
        ])
    lines.append(f.markdown_table(
        ["N", "add into empty store (codes/s)", "second batch", "append to non-empty (codes/s)",
         "bytes per code", "of which postings", "bytes per code after append"], rows))
    lines += ["", "## Single query (time per query)", ""]
    rows = []
    for r in results:
        x, b = r["ratios"], r["bound"]
        rows.append([
            f"{r['N']:,}",
            f.fmt_timing(_t(r["store_single"])),
            f.fmt_timing(_t(r["scipy_single"])),
            f.fmt_timing(_t(r["scipy_single_qmajor"])),
            f.fmt_timing(_t(r["numpy_scan"])),
            f.fmt_seconds(b["single_s"]),
            f.fmt_seconds(b["single_int32_s"]),
            f.fmt_ratio(x["scipy_single_over_store"]),
            f.fmt_ratio(x["numpy_over_store"]),
            f.fmt_ratio(x["store_single_over_bound"]),
        ])
    lines.append(f.markdown_table(
        ["N", "store `query`", "scipy `S @ q`", "scipy `q @ Sᵀ`", "numpy packed scan", "bound (uint16 postings)",
         "int32 yardstick", "best scipy / store", "numpy / store", "store / bound"], rows))
    lines += ["", f"## Batch query ({args.batch} queries per batch, time per query)", ""]
    rows = []
    for r in results:
        x, b = r["ratios"], r["bound"]
        rows.append([
            f"{r['N']:,}",
            f.fmt_timing(_t(r["store_batch"])),
            f.fmt_timing(_t(r["scipy_batch"])),
            f.fmt_timing(_t(r["scipy_batch_qmajor"])) + f" [{r['queries']['scipy_batch_qmajor']}]",
            f.fmt_seconds(b["batch_s"]),
            f.fmt_ratio(x["scipy_batch_over_store"]),
            f.fmt_ratio(x["store_batch_over_bound"]),
        ])
    lines.append(f.markdown_table(
        ["N", "store `query_many`", "scipy `S @ Qᵀ`", "scipy `Q @ Sᵀ` [batch]",
         f"bound ({results[0]['bound']['batch_threads']} threads)", "best scipy / store", "store / bound"], rows))
    lines += ["", "## Exactness and hits", ""]
    rows = []
    for r in results:
        ex = r["exact"]
        checked = ", ".join(f"{k} {v['queries']}" + ("" if v["mismatches"] == 0 else f" ({v['mismatches']} differ)")
                            for k, v in ex.items())
        h = r["hits"]
        rows.append([
            f"{r['N']:,}",
            "yes" if r["exact_all"] else "**NO**",
            checked,
            f"{h['noisy_source_found']:.3f}" if h["noisy_source_found"] is not None else "-",
            f"{h['hits_per_noisy_query']:.2f}" if h["hits_per_noisy_query"] is not None else "-",
            f"{h['hits_per_random_query']:.3f}" if h["hits_per_random_query"] is not None else "-",
        ])
    lines.append(f.markdown_table(
        ["N", "hits equal", "queries compared (peer: count)", "noisy copies: source found",
         "hits per noisy query", "hits per random query"], rows, align=["l", "l", "l", "r", "r", "r"]))
    lines += ["", "Queries timed at each size:", ""]
    rows = [[f"{r['N']:,}"] + [str(r["queries"][k]) for k in (
        "store_single", "batch", "scipy_single", "scipy_single_qmajor", "numpy_scan", "scipy_batch_qmajor")]
        for r in results]
    lines.append(f.markdown_table(
        ["N", "store `query`", "batch (store, scipy `S @ Qᵀ`)", "scipy `S @ q`", "scipy `q @ Sᵀ`",
         "numpy scan", "scipy `Q @ Sᵀ` batch"], rows))
    lines += [
        "",
        "Peers get the store matrix in their best layout for free: `S` as an int32 csr matrix, `Sᵀ` transposed "
        "to csr beforehand (neither conversion is timed). \"Best scipy\" is the faster of the two scipy "
        "formulations at that size.",
        "",
        "The bound is the bytes of postings a query must read (query weight × postings ÷ bits × 2 bytes, the "
        "store's uint16 postings) ÷ the measured read bandwidth (1 thread for single queries, all threads for "
        "batches). The int32 yardstick is the same for 4-byte postings (q·N·D·s/n·4 bytes). "
        "\"Bytes per code\" is `store.nbytes / N` for a store built by one `add`; after an append it includes "
        "the grown capacity.",
        "",
        "## Targets at N = 1,000,000",
        "",
    ]
    tg = targets(results)
    if tg is None:
        lines.append("Not evaluated: N = 1,000,000 was not in this run's sizes.")
    else:
        for name, ok, value in tg:
            lines.append(f"- {'met' if ok else '**not met**'}: {name} — measured {value}")
    lines += ["", f"Total run time {elapsed:.0f} s (one process)."]
    return "\n".join(lines) + "\n"


# -- main -----------------------------------------------------------------


def warm_up(args, log):
    """Compile (or load from cache) every kernel the timed runs use."""
    from sparseindex import Codes, Store

    t0 = time.perf_counter()
    store = Store(args.bits, threshold=args.threshold, sample_size=None, detectors=1, seed=args.seed)
    store.add(Codes.random(2000, args.bits, args.weight, seed=1))
    store.add(Codes.random(200, args.bits, args.weight, seed=2))
    q = Codes.random(8, args.bits, args.weight, seed=3)
    store.query(q[0])
    store.query_many(q)
    np.bitwise_count(q.words & q.words[0]).sum(axis=1)
    seconds = time.perf_counter() - t0
    log(f"warm-up (numba compile or cache load): {seconds:.1f} s")
    return seconds


def main(argv=None):
    args = parse_args(sys.argv[1:] if argv is None else argv)

    def log(msg):
        print(f"[bench_store] {msg}", file=sys.stderr, flush=True)

    started = time.perf_counter()
    warm = warm_up(args, log)
    import numba

    log("measuring memory bandwidth")
    mib = 64 if args.quick else 256
    bandwidth = [common.memory_bandwidth(mib, repeats=5, threads=1)]
    threads = numba.config.NUMBA_NUM_THREADS
    if threads > 1:
        bandwidth.append(common.memory_bandwidth(mib, repeats=5, threads=threads))
    machine = common.machine_record()
    results = []
    for n in args.size_list:
        r = bench_size(n, args, bandwidth, log)
        r["ratios"] = ratios(r)
        results.append(r)
    elapsed = time.perf_counter() - started
    report = render(results, machine, bandwidth, args, elapsed)
    print(report, end="")
    if args.out:
        with open(args.out, "w", encoding="utf-8") as f:
            f.write(report)
        log(f"wrote {args.out}")
    if args.json:
        tg = targets(results)
        payload = {
            "benchmark": "bench_store",
            "params": {k: v for k, v in vars(args).items() if k not in ("out", "json")},
            "machine": machine,
            "bandwidth": bandwidth,
            "warmup_s": warm,
            "elapsed_s": elapsed,
            "results": results,
            "targets": None if tg is None else [{"target": a, "met": b, "measured": c} for a, b, c in tg],
        }
        with open(args.json, "w", encoding="utf-8") as f:
            json.dump(payload, f, indent=1, default=_json_default)
        log(f"wrote {args.json}")
    return 0 if all(r["exact_all"] for r in results) else 1


def _json_default(obj):
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, tuple):
        return list(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


if __name__ == "__main__":
    sys.exit(main())
