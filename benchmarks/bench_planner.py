"""Planner time and model evaluation rate.

Usage::

    python benchmarks/bench_planner.py            # full ladder
    python benchmarks/bench_planner.py --quick    # CI smoke run

Method: every measurement runs once to warm up, then ``--repeats`` times;
the table shows min / median / max wall time (time.perf_counter).  Planner
requests use false_hit=1e-9 at capacity=1,000,000 and recall 0.999 unless
the row says otherwise; the noise level changes how large a sample size the
answer needs, and the work grows with the square of that sample size.  Model
rates count one evaluation per parameter set, for scalar calls and for one
vectorised call over many parameter sets.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import sys
import time

import numpy as np

try:
    import sparseindex  # noqa: F401
except ImportError:  # run from a checkout without installing
    sys.path.insert(0, os.path.join(os.path.dirname(__file__), os.pardir))

from sparseindex import model  # noqa: E402
from sparseindex.model import PlanError  # noqa: E402
from sparseindex.model.planner import plan  # noqa: E402

LADDER = [
    # bits, weight, noise
    (2_048, 40, 0.25),
    (10_000, 100, 0.25),
    (65_536, 300, 0.25),
    (100_000, 2_000, 0.25),
    (1_000_000, 2_000, 0.25),
    (1_000_000, 2_000, 0.6),
    (1_000_000, 2_000, 0.9),
    (1_000_000, 2_000, 0.95),
    (1_000_000, 2_000, 0.995),   # no plan exists: the whole search space
]
QUICK_LADDER = [LADDER[0], LADDER[4], LADDER[6]]


def machine_text():
    cpu = platform.processor() or "unknown cpu"
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    import scipy
    return (f"machine: {cpu}, {os.cpu_count()} logical cpus, {platform.system()} "
            f"{platform.release()}\n"
            f"python {platform.python_version()}, numpy {np.__version__}, "
            f"scipy {scipy.__version__}, sparseindex {sparseindex_version()}")


def sparseindex_version():
    import sparseindex
    return getattr(sparseindex, "__version__", "?")


def timed(fn, repeats):
    """Warm-up once, then `repeats` timings in seconds."""
    fn()
    out = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return out


def bench_planner(ladder, repeats):
    print(f"\nplanner: plan(bits, weight, false_hit=1e-9, capacity=1e6, noise, "
          f"recall=0.999); {repeats} repeats after a warm-up")
    head = (f"  {'bits':>9}  {'weight':>6}  {'noise':>5}  {'answer':<22}"
            f"  {'min ms':>8}  {'median ms':>9}  {'max ms':>8}")
    print(head)
    print("  " + "-" * (len(head) - 2))
    rows = []
    for bits, weight, noise in ladder:
        def run():
            try:
                return plan(bits, weight, false_hit=1e-9, capacity=10**6,
                            noise=noise, recall=0.999)
            except PlanError:
                return None
        p = run()
        answer = ("no plan (PlanError)" if p is None else
                  f"s={p.sample_size} t={p.threshold} D={p.detectors}")
        times = timed(run, repeats)
        ms = [1e3 * t for t in times]
        rows.append((bits, weight, noise, answer, min(ms), statistics.median(ms), max(ms)))
        print(f"  {bits:>9,}  {weight:>6,}  {noise:>5g}  {answer:<22}"
              f"  {min(ms):>8.1f}  {statistics.median(ms):>9.1f}  {max(ms):>8.1f}")
    return rows


def bench_model(repeats, quick):
    print(f"\nmodel evaluations per second ({repeats} repeats after a warm-up; "
          "best and median)")
    size = 2_000 if quick else 20_000
    rng = np.random.default_rng(0)
    seg = rng.integers(5, 200, size=size)
    th = np.maximum(1, (seg * rng.uniform(0.2, 0.8, size=size)).astype(int))
    det = rng.integers(1, 9, size=size)
    noise = rng.uniform(0.0, 0.9, size=size)
    small = 100 if quick else 500
    cases = [
        ("detector_false_hit, scalar (n=1e6, s=20, t=10, q=2000)", 1,
         lambda: model.detector_false_hit(10**6, 20, 10, 2000)),
        ("false_hit_per_code, scalar (n=1e6, a=2000, s=20, t=8, D=4)", 1,
         lambda: model.false_hit_per_code(10**6, 2000, 20, 8, 4)),
        ("recall, scalar (a=2000, s=300, t=40, D=2, noise=0.8)", 1,
         lambda: model.recall(2000, 300, 40, 2, 0.8)),
        (f"detector_false_hit, one call over {size:,} sets (n=1e6, q=2000)", size,
         lambda: model.detector_false_hit(10**6, seg, th, 2000)),
        (f"recall, one call over {size:,} sets (a=2000)", size,
         lambda: model.recall(2000, seg, th, det, noise)),
        (f"false_hit_per_code, one call over {small:,} sets (n=1e6, a=2000)", small,
         lambda: model.false_hit_per_code(10**6, 2000, seg[:small], th[:small],
                                          det[:small])),
    ]
    width = max(len(c[0]) for c in cases)
    print(f"  {'evaluation':<{width}}  {'best /s':>12}  {'median /s':>12}")
    print("  " + "-" * (width + 28))
    rows = []
    for label, count, fn in cases:
        loops = 1
        if count == 1:  # time a batch of scalar calls
            loops = 20 if quick else 200

            def batch(fn=fn, loops=loops):
                for _ in range(loops):
                    fn()
            times = timed(batch, repeats)
        else:
            times = timed(fn, repeats)
        rates = [count * loops / t for t in times]
        rows.append((label, max(rates), statistics.median(rates)))
        print(f"  {label:<{width}}  {max(rates):>12,.0f}  {statistics.median(rates):>12,.0f}")
    return rows


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true",
                        help="a short ladder and few repeats (CI smoke run)")
    parser.add_argument("--repeats", type=int, default=None,
                        help="timed repeats per measurement (default 7, quick 2)")
    args = parser.parse_args(argv)
    repeats = args.repeats or (2 if args.quick else 7)
    print(machine_text())
    bench_planner(QUICK_LADDER if args.quick else LADDER, repeats)
    bench_model(repeats, args.quick)
    return 0


if __name__ == "__main__":
    sys.exit(main())
