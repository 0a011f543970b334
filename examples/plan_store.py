"""Size a store before building it, with ``sparseindex.plan``.

The scenario (invented): the Kelderwick print archive fingerprints every
scanned page as a 4096-bit code with 80 set bits (hashed local features). It
expects from a hundred thousand up to fifty million pages, wants at most one
false hit in a billion unrelated queries, and a re-scan may lose up to 30%
of a page's features. How should the detectors be set, how much memory will
the store take, and how much work is one query?

For each expected number of pages the script asks ``plan`` for the cheapest
configuration that meets both targets and prints it with its memory and
query work, then shows the planner refusing a target it cannot meet.

Run::

    python examples/plan_store.py
    python examples/plan_store.py --bits 2048 --weight 40 --noise 0.25 --capacity 1e5 1e6
"""

from __future__ import annotations

import argparse
import math

from sparseindex import PlanError, plan

NS_PER_UPDATE = 2.0  # rough cost of one counter update of a query's scan (DESIGN.md; benchmarks/ measure it)


def memory_per_code(bits: int, postings: int) -> int:
    """Bytes per stored code: packed bits, uint16 postings and bookkeeping (see ``Store``'s notes)."""
    return 8 * math.ceil(bits / 64) + 2 * postings + 5


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description="Size a store from false-hit and recall targets.")
    parser.add_argument("--bits", type=int, default=4096, help="code width (default 4096)")
    parser.add_argument("--weight", type=int, default=80, help="set bits per code (default 80)")
    parser.add_argument("--noise", type=float, default=0.3, help="fraction of set bits a query may lack (default 0.3)")
    parser.add_argument("--recall", type=float, default=0.999, help="least recall at that noise (default 0.999)")
    parser.add_argument("--false-hit", type=float, default=1e-9, help="most false hits per query (default 1e-9)")
    parser.add_argument("--capacity", type=float, nargs="+", default=[1e5, 1e6, 1e7, 5e7],
                        help="codes to plan for (default 1e5 1e6 1e7 5e7)")
    args = parser.parse_args(argv)

    print(f"Kelderwick print archive: {args.bits:,}-bit codes with {args.weight} set bits; at most "
          f"{args.false_hit:g} false hits per query; recall >= {args.recall:g} when a query lacks "
          f"{args.noise:.0%} of a code's bits")
    print()
    head = (f"{'codes':>12}  {'sample size':>11}  {'threshold':>9}  {'detectors':>9}  {'limit':>14}  "
            f"{'recall':>9}  {'memory':>10}  {'updates/query':>13}  {'~time':>8}")
    print(head)
    print("-" * len(head))
    for target in args.capacity:
        count = int(target)
        try:
            p = plan(args.bits, args.weight, false_hit=args.false_hit, capacity=count, noise=args.noise,
                     recall=args.recall)
        except PlanError as exc:
            print(f"{count:>12,}  no plan: {' '.join(str(exc).split())}")
            continue
        memory = memory_per_code(args.bits, p.postings_per_code) * count
        work_ms = p.updates_per_query * NS_PER_UPDATE * 1e-6
        limit = "unbounded" if not math.isfinite(p.limit) else f"{int(p.limit):,}"
        print(f"{count:>12,}  {p.sample_size:>11}  {p.threshold:>9}  {p.detectors:>9}  {limit:>14}  "
              f"{p.recall:>9.6f}  {memory / 2**30:>6.2f} GiB  {p.updates_per_query:>13.3g}  {work_ms:>5.2f} ms")
    print()
    print("memory: packed codes + 2-byte postings + 5 bytes of bookkeeping per code; per query: counter updates")
    print(f"of one scan and their rough time at {NS_PER_UPDATE:g} ns each (measure yours with benchmarks/)")
    print()
    too_noisy = min(0.999, args.noise + 0.6)
    try:
        plan(args.bits, args.weight, false_hit=args.false_hit, capacity=int(args.capacity[-1]), noise=too_noisy,
             recall=args.recall)
    except PlanError as exc:
        print(f"asking for recall at noise {too_noisy:g} instead: PlanError: {' '.join(str(exc).split())}")
    else:
        print(f"even noise {too_noisy:g} has a plan at these targets")


if __name__ == "__main__":
    main()
