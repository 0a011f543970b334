"""Recall logged robot routes from partial, detoured re-runs.

The scenario (invented): the Brackenfold depot runs a fleet of 64 warehouse
robots. Every route a robot drives is logged as a route fingerprint, a
2048-bit code with 40 set bits (one per hashed aisle leg and turn). The
depot keeps 100,000 logged routes in a ``sparseindex.Store``. When a robot
re-drives a known route it takes detours: a quarter of the legs differ.
Given the fingerprint of such a re-run, which logged route is it?

This script stores 100,000 random fingerprints, makes 1,000 noisy copies of
stored ones (each drops 10 of its 40 bits and gains 10 others), recalls them
with ``query_many`` and prints the measured recall, the false hits per
query and the query latency, one query at a time and in a batch.

Run::

    python examples/recall_noisy.py            # after `pip install .`
    PYTHONPATH=. python examples/recall_noisy.py   # from a source checkout
    python examples/recall_noisy.py --routes 5000 --reruns 200   # a smaller depot
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from sparseindex import Codes, Store

BITS = 2048  # width of a route fingerprint
WEIGHT = 40  # set bits per fingerprint
ROUTES = 100_000  # logged routes kept in the store (default of --routes)
RERUNS = 1_000  # detoured re-runs to recognise (default of --reruns)
DETOUR = WEIGHT // 4  # bits a re-run drops and replaces
THRESHOLD = 20  # shared bits that make a logged route a hit
ROBOTS = 64


def detoured_copies(routes: Codes, picks: np.ndarray, detour: int, rng: np.random.Generator) -> Codes:
    """Each picked route with ``detour`` of its bits swapped for bits outside it."""
    rows = []
    for src in picks:
        own = routes[int(src)]
        kept = rng.choice(own, size=own.size - detour, replace=False)
        outside = np.ones(routes.bits, dtype=bool)
        outside[own] = False
        added = rng.choice(np.flatnonzero(outside), size=detour, replace=False)
        rows.append(np.concatenate([kept, added]))
    return Codes.from_indices(rows, routes.bits)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description="Recall logged robot routes from detoured re-runs.")
    parser.add_argument("--routes", type=int, default=ROUTES, help=f"logged routes to store (default {ROUTES:,})")
    parser.add_argument("--reruns", type=int, default=RERUNS, help=f"detoured re-runs to recall (default {RERUNS:,})")
    parser.add_argument("--seed", type=int, default=2024, help="seed of the re-runs (default 2024)")
    args = parser.parse_args(argv)
    if not 1 <= args.reruns <= args.routes:
        parser.error(f"--reruns {args.reruns} must be between 1 and --routes {args.routes}")
    routes_n, reruns_n = args.routes, args.reruns
    rng = np.random.default_rng(args.seed)
    started = time.perf_counter()

    # warm-up: the first calls compile the kernels (or load them from numba's cache)
    warm = Store(BITS, threshold=THRESHOLD, seed=11)
    warm.add(Codes.random(100, BITS, WEIGHT, seed=1))
    warm.query(warm.get([0]).to_indices()[0])
    warm.query_many(warm.get([1, 2]))
    t_warm = time.perf_counter() - started

    # the route log: one fingerprint per logged route; robot i drives route ids i, i + 64, ...
    routes = Codes.random(routes_n, BITS, WEIGHT, seed=7)
    store = Store(BITS, threshold=THRESHOLD, seed=11)
    t0 = time.perf_counter()
    route_ids = store.add(routes)
    t_add = time.perf_counter() - t0

    # 1,000 re-runs of randomly chosen logged routes, each with a quarter of its legs detoured
    sources = rng.choice(routes_n, size=reruns_n, replace=False)
    reruns = detoured_copies(routes, sources, DETOUR, rng)
    rerun_bits = reruns.to_indices()

    t0 = time.perf_counter()
    hits = store.query_many(reruns)
    t_batch = time.perf_counter() - t0

    t0 = time.perf_counter()
    single = [store.query(bits) for bits in rerun_bits]
    t_single = time.perf_counter() - t0

    found = np.array([route_ids[src] in h.ids for src, h in zip(sources, hits)])
    counts = hits.counts
    false_hits = counts - found
    same = all(np.array_equal(a.ids, b.ids) for a, b in zip(single, hits))
    best_overlap = np.array([h.overlaps[0] if len(h) else 0 for h in hits])

    print(f"Brackenfold depot: {routes_n:,} logged routes of {ROBOTS} robots, "
          f"{BITS}-bit fingerprints with {WEIGHT} set bits")
    print(f"store: {store!r}")
    print(f"  added in {t_add:.2f} s ({routes_n / t_add:,.0f} routes/s), "
          f"{store.nbytes / 2**20:.1f} MiB ({store.nbytes / len(store):.0f} bytes per route)")
    print(f"re-runs: {reruns_n:,}, each keeping {WEIGHT - DETOUR} of its route's {WEIGHT} bits "
          f"plus {DETOUR} detour bits; a hit needs >= {THRESHOLD} shared bits")
    print(f"  recall (logged route among the hits): {found.mean():.3f} ({int(found.sum())} of {reruns_n})")
    print(f"  false hits per query: {false_hits.mean():.4f} ({int(false_hits.sum())} in all)")
    print(f"  overlap of the best hit: min {best_overlap.min()}, median {int(np.median(best_overlap))} bits")
    print(f"  query latency, one at a time (query): {t_single / reruns_n * 1e3:.3f} ms per query")
    print(f"  query latency, batch of {reruns_n:,} (query_many): {t_batch / reruns_n * 1e3:.3f} ms per query")
    print(f"  query and query_many agree: {'yes' if same else 'NO'}")
    src = int(sources[0])
    print(f"  e.g. re-run of route {src} (robot R-{src % ROBOTS:02d}) -> hits {hits[0].ids.tolist()} "
          f"with overlaps {hits[0].overlaps.tolist()}")
    print(f"total {time.perf_counter() - started:.1f} s, of which {t_warm:.1f} s compiling or loading kernels")
    print("a hit is probabilistic evidence, not proof of identity: check the stored code before acting on it")


if __name__ == "__main__":
    main()
