"""The worker side of a sharded store: :class:`ShardHost` (one shard, a Dask actor) and the id routing."""

from __future__ import annotations

import math
import os

import numpy as np

from ..store import Store

__all__ = ["ShardHost", "shard_of", "share_targets"]


def shard_of(ids, shards):
    """The shard that holds each global id: ``id % shards``.

    Round-robin by id keeps the shards equally full as codes arrive, needs
    no table, and never moves a code.

    Examples
    --------
    >>> shard_of(np.arange(6), 4).tolist()
    [0, 1, 2, 3, 0, 1]
    """
    return np.asarray(ids, dtype=np.int64) % int(shards)


def share_targets(false_hit, capacity, shards):
    """One shard's share of a whole-store target: ``(capacity, false_hit)``.

    A query goes to every shard, so its chance of no false hit is the
    product over the shards: ``(1 - p)**N`` for ``N`` codes in all with
    per-code chance ``p``, however they are spread. A shard planned for
    ``C_k = ceil(capacity / shards)`` codes at ``F_k = 1 - (1 - false_hit)
    ** (C_k / capacity)`` therefore meets its target exactly when the whole
    store meets ``false_hit`` at ``capacity``: the planner picks the same
    sample_size, threshold and detectors for it.

    Examples
    --------
    >>> c, f = share_targets(1e-9, 10**6, 2)
    >>> c, f"{f:.6e}"
    (500000, '5.000000e-10')
    """
    shares = -(-int(capacity) // int(shards))
    return shares, float(-math.expm1(shares / capacity * math.log1p(-false_hit)))


class ShardHost:
    """One shard: a real :class:`~sparseindex.Store` held by a cluster worker.

    Created by :class:`ShardedStore` as a Dask actor; every method runs on
    the worker's actor thread, one call at a time. ``how`` is ``"new"``
    (``Store(**args)``), ``"plan"`` (``Store.for_target(**args)``),
    ``"watch"`` (a ``Store`` whose target is set by ``watch``) or ``"load"``
    (``Store.load``). Besides the store it keeps the bit-usage counts and
    the weight histogram of its live codes (counted on first use, then
    kept current), which the whole-store health report adds up from each
    shard's :meth:`Store.stats`.
    """

    def __init__(self, shard, shards, how, args):
        self.shard, self.shards = int(shard), int(shards)
        if how == "new":
            self.store = Store(**args)
        elif how == "plan":
            self.store = Store.for_target(**args)
        elif how == "watch":
            args = dict(args)
            target, warn = args.pop("false_hit"), args.pop("warn_fraction")
            self.store = Store(**args)
            self.store.watch(false_hit=target, warn_fraction=warn)
        elif how == "load":
            self.store = Store.load(args["path"], mmap=args["mmap"], writable=args["writable"])
        else:
            raise ValueError(f"ShardHost: unknown how={how!r}")

    def describe(self, check_routing=False) -> dict:
        """Where this shard lives and what it holds (and, on request, that every id belongs here)."""
        from distributed import get_worker

        s = self.store
        out = {
            "shard": self.shard, "worker": get_worker().address, "pid": os.getpid(), "items": len(s),
            "next_id": s.next_id, "bits": s.bits, "threshold": s.threshold, "sample_size": s.sample_size,
            "detectors": s.detectors, "seed": s.seed, "read_only": s.read_only, "routing_ok": None,
        }
        if check_routing:
            ids = s.ids()
            out["routing_ok"] = bool(np.all(ids % self.shards == self.shard))
        return out

    def ping(self) -> int:
        return self.shard

    # -- the store's operations ------------------------------------------

    def add(self, codes, ids):
        return self.store.add(codes, ids=ids)

    def query(self, code, min_overlap):
        return self.store.query(code, min_overlap=min_overlap)

    def query_many(self, codes, min_overlap):
        return self.store.query_many(codes, min_overlap=min_overlap)

    def find_matches(self, codes, min_overlap):
        return self.store.find_matches(codes, min_overlap=min_overlap)

    def nearest(self, code, k):
        return self.store.nearest(code, k)

    def live(self, ids):
        """For each id, whether this shard holds it (and it is not removed)."""
        return np.fromiter((i in self.store for i in ids.tolist()), dtype=bool, count=len(ids))

    def get(self, ids):
        """``(live mask, codes of the live ids in order)``."""
        mask = self.live(ids)
        return mask, self.store.get(ids[mask])

    def remove(self, ids):
        self.store.remove(ids)

    def compact(self):
        self.store.compact()

    def ids(self):
        return self.store.ids()

    def stats(self):
        return self.store.stats()

    def detector_samples(self, ids):
        return [self.store.detector_bits(int(i)) for i in ids.tolist()]

    def health(self, kwargs):
        return self.store.health(**kwargs)

    def save(self, path) -> int:
        self.store.save(path)
        return os.path.getsize(path)
