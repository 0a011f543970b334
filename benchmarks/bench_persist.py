"""Persistence benchmark: save, load, memory-mapped open, first query.

At each size N (default 10^6) builds ``Store(2048, threshold=20)`` from
random codes of 40 set bits and measures, in this process:

* ``store.save(path)`` (write, fsync, rename, directory fsync) and the file
  size per code;
* ``Store.load(path)`` (read into memory + every check of docs/format.md)
  and ``Store.load(path, mmap=True)`` (map + the same checks);
* peers on the same arrays: ``np.save`` of each array followed by an
  ``fsync`` (NumPy's open ``.npy`` format, no checks), ``np.load`` and
  ``np.load(mmap_mode="r")``; the ratios say what the checks and the
  atomic rename cost.

Then, in a **new process** with numba's cache warm and the file in the page
cache: the time from ``import sparseindex`` done to the first answered query
after ``Store.load(path, mmap=True)`` (the target: under 1 s at N = 10^6),
split into open and first query. The page cache is not dropped (that needs
root and disturbs a shared machine), so these are warm-cache figures.

Run from the project root::

    PYTHONPATH=. python benchmarks/bench_persist.py --out benchmarks/results_persist.md
    PYTHONPATH=. python benchmarks/bench_persist.py --quick      # CI smoke run
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import textwrap

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import _common as common
else:  # imported as benchmarks.bench_persist
    from . import _common as common

from sparseindex import Codes, Store  # noqa: E402

FIRST_QUERY = textwrap.dedent(
    """
    import json, sys, time
    t0 = time.perf_counter()
    import sparseindex
    t1 = time.perf_counter()
    store = sparseindex.Store.load(sys.argv[1], mmap=True)
    t2 = time.perf_counter()
    hits = store.query(list(range(0, 2048, 51))[:40])
    t3 = time.perf_counter()
    print(json.dumps({"import_s": t1 - t0, "open_s": t2 - t1, "first_query_s": t3 - t2, "hits": len(hits)}))
    """
)


def parse_args(argv):
    p = argparse.ArgumentParser(description="Benchmark Store.save / Store.load against numpy .npy peers.")
    p.add_argument("--sizes", default="1e6", help="comma-separated store sizes N (default 1e6)")
    p.add_argument("--quick", action="store_true", help="CI smoke run: N = 20,000, one repeat")
    p.add_argument("--repeats", type=int, default=3, help="timed repeats (default 3)")
    p.add_argument("--dir", default=None, help="directory for the files (default: a temporary one)")
    p.add_argument("--out", default=None, help="also write the Markdown report here")
    p.add_argument("--json", default=None, help="write every sample here as JSON")
    return p.parse_args(argv)


def _npy_save(arrays, directory):
    for name, array in arrays.items():
        path = os.path.join(directory, f"{name}.npy")
        with open(path, "wb") as f:
            np.save(f, array)
            f.flush()
            os.fsync(f.fileno())


def _npy_load(arrays, directory, mmap_mode=None):
    return {name: np.load(os.path.join(directory, f"{name}.npy"), mmap_mode=mmap_mode) for name in arrays}


def _first_query(path):
    env = dict(os.environ)
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env["PYTHONPATH"] = root + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run([sys.executable, "-c", FIRST_QUERY, path], capture_output=True, text=True, env=env,
                         check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def run(n, repeats, directory):
    codes = Codes.random(n, 2048, 40, seed=7)
    store = Store(2048, threshold=20, seed=7)
    store.add(codes)
    path = os.path.join(directory, f"bench-{n}.sidx")
    store.save(path)  # warm: compile the checks, create the file
    Store.load(path)
    size = os.path.getsize(path)
    state = store._state()
    arrays = {"words": state.words, "removed": state.removed, "block_lo": state.block_lo,
              "block_hi": state.block_hi, "block_indptr": state.block_indptr, "postings": state.postings}
    npy_dir = os.path.join(directory, f"npy-{n}")
    os.makedirs(npy_dir, exist_ok=True)
    _npy_save(arrays, npy_dir)
    t = {
        "save": common.measure(lambda: store.save(path), repeats=repeats, warmup=0),
        "npy save+fsync": common.measure(lambda: _npy_save(arrays, npy_dir), repeats=repeats, warmup=0),
        "load": common.measure(lambda: Store.load(path), repeats=repeats, warmup=0),
        "npy load": common.measure(lambda: _npy_load(arrays, npy_dir), repeats=repeats, warmup=0),
        "load mmap": common.measure(lambda: Store.load(path, mmap=True), repeats=repeats, warmup=0),
        "npy load mmap": common.measure(lambda: _npy_load(arrays, npy_dir, "r"), repeats=repeats, warmup=0),
    }
    loaded = Store.load(path, mmap=True)
    qs = codes[:50]
    same = np.array_equal(loaded.query_many(qs).ids, store.query_many(qs).ids)
    firsts = [_first_query(path) for _ in range(max(1, repeats))]
    return {"n": n, "file_bytes": size, "timings": t, "first": firsts, "same_answers": bool(same)}


def report(results, record, bandwidth):
    lines = ["# Persistence benchmark", "", common.machine_markdown(record, bandwidth), ""]
    header = ["N", "file B/code", "save", "npy save+fsync", "load", "npy load", "load mmap", "npy mmap"]
    rows = []
    for r in results:
        t = r["timings"]
        rows.append([f"{r['n']:,}", f"{r['file_bytes'] / r['n']:.1f}"] + [common.fmt_timing(t[k]) for k in
                    ("save", "npy save+fsync", "load", "npy load", "load mmap", "npy load mmap")])
    lines += [common.markdown_table(header, rows), ""]
    lines.append("Ratios (medians, this run): ")
    for r in results:
        t = r["timings"]
        lines.append(
            f"- N = {r['n']:,}: save {t['save'].median / t['npy save+fsync'].median:.2f}x npy save+fsync; "
            f"load {t['load'].median / t['npy load'].median:.2f}x npy load; "
            f"mmap load {t['load mmap'].median / t['npy load mmap'].median:.1f}x npy mmap load "
            f"(npy checks nothing); throughput save {r['file_bytes'] / t['save'].median / 1e6:.0f} MB/s, "
            f"load {r['file_bytes'] / t['load'].median / 1e6:.0f} MB/s, "
            f"mmap load {r['file_bytes'] / t['load mmap'].median / 1e6:.0f} MB/s"
        )
    lines.append("")
    lines.append("New process, numba cache warm, file in the page cache (median of runs):")
    for r in results:
        f = r["first"]
        med = {k: float(np.median([x[k] for x in f])) for k in ("import_s", "open_s", "first_query_s")}
        total = med["open_s"] + med["first_query_s"]
        lines.append(
            f"- N = {r['n']:,}: import {med['import_s']:.2f} s, mmap open {med['open_s']:.3f} s, first query "
            f"{med['first_query_s'] * 1000:.1f} ms: open to first answer {total:.2f} s "
            f"({'meets' if total <= 1.0 else 'misses'} the 1 s target); answers equal the in-memory store: "
            f"{r['same_answers']}"
        )
    return "\n".join(lines) + "\n"


def main(argv=None):
    args = parse_args(sys.argv[1:] if argv is None else argv)
    sizes = [20_000] if args.quick else [int(float(x)) for x in args.sizes.split(",")]
    repeats = 1 if args.quick else args.repeats
    with tempfile.TemporaryDirectory(dir=args.dir) as directory:
        results = [run(n, repeats, directory) for n in sizes]
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
                {**r, "timings": {k: v.as_dict() for k, v in r["timings"].items()}} for r in results]}, f, indent=1)
    return 0 if all(r["same_answers"] for r in results) else 1


if __name__ == "__main__":
    sys.exit(main())
