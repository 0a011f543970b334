"""A sharded store on a Dask ``distributed`` cluster (optional extra).

:class:`ShardedStore` spreads one logical store over ``shards`` real
:class:`~sparseindex.Store` objects, each living on a cluster worker as a
Dask *actor* (:class:`ShardHost`). It answers every question a ``Store``
answers, with the same meaning and the same result types, merged across
shards; the answers do not depend on how many shards there are.

Why it is exact
---------------
* Ids are global: the store hands out ``0, 1, 2, ...`` and code ``i``
  lives on shard ``i % shards`` (:func:`shard_of`), added there with
  ``Store.add(codes, ids=global_ids)``. A code's detector samples depend
  only on the seed and its id, so every code is sampled exactly as a single
  ``Store`` of the same seed samples it, and a hit there is a hit here.
* ``query`` / ``query_many`` / ``find_matches`` take the union of the
  shards' hits, ``nearest`` merges the shards' exact top-``k`` lists, all
  ordered as :class:`~sparseindex.Hits` (overlap descending, id ascending).
* ``find_or_add`` collects every match (``Store.find_matches``, complete and
  exact) from every shard, matches the batch against itself, applies the
  greedy rule of ``Store.find_or_add`` and only then routes the new codes.

Why actors
----------
A shard is mutable state that must stay on one worker. An actor is exactly
that: its method calls go to the object in place (1–2 ms a round trip
here against 11–13 ms for a submitted task), nothing is copied between
workers, and when its worker dies the actor is gone and every call says so.
A shard held as the result of a task would look immutable to the scheduler:
a task that mutates it breaks Dask's model, and after a worker loss the
scheduler would silently recompute the result from its recipe, bringing
back an old or empty shard — a wrong answer with no error. So shards are
actors, pinned to a worker by address, and this module supervises them
itself: a lost shard raises :class:`ShardLostError` and is rebuilt from the
last save by :meth:`ShardedStore.recover` or :meth:`ShardedStore.load`.

Install with ``pip install "sparseindex[cluster]"``; importing this module
works without it, and creating a store then says what to install.
"""

from __future__ import annotations

import asyncio
import json
import math
import os
import re
import tempfile
import threading
import time
import warnings
from numbers import Integral

import numpy as np

from . import health as _health
from .store import format as _persist
from .store.guard import ReadWriteLock
from .codes import Codes, as_code, as_codes
from .errors import ReadOnlyStoreError, StoreFormatError
from .health import Health, FalseHitMeasurement
from .model.planner import Plan, plan as make_plan
from .store.single import BatchHits, Hits, Store, ids_below
from .store.single import _check_chance as _chance
from .store.single import _check_fraction as _fraction
from .store.single import _check_new_ids as _new_ids

__all__ = ["ShardedStore", "ShardHost", "ShardLostError", "shard_of", "share_targets"]

INSTALL_HINT = 'pip install "sparseindex[cluster]"'
MANIFEST = "manifest.json"
MANIFEST_KIND = "sparseindex sharded store"
MANIFEST_FORMAT = 2
#: Manifest formats this library reads: 1 spelled some keys and the shard file names differently.
MANIFEST_FORMATS = (1, 2)
#: Seconds between liveness checks while a shard call is outstanding.
POLL_SECONDS = 0.5
#: Seconds a failed call waits for the cluster to notice a worker's death.
SETTLE_SECONDS = 5.0

#: A shard file: its shard number, the shard count and the save generation.
_SHARD_FILE = re.compile(r"^shard(\d{4,})\.total(\d{4,})\.gen(\d{6,})\.sidx$")
_SHARD_FILE_FORMAT_1 = re.compile(r"^shard-(\d{4,})-of-(\d{4,})\.g(\d{6,})\.sidx$")  # manifest format 1 only
_MANIFEST_KEYS = {"kind", "format", "written_by", "generation", "params", "plan", "shards", "routing",
                  "next_id", "items", "files"}
_PARAM_KEYS = {"bits", "threshold", "sample_size", "detectors", "seed"}
_FILE_KEYS = {"shard", "file", "items", "next_id", "bytes"}


def _distributed():
    """The ``distributed`` package, or an ImportError that says how to get it."""
    try:
        import distributed
    except ImportError as exc:
        raise ImportError(
            "sparseindex.cluster needs Dask's distributed scheduler, which is not installed; "
            f"install it with: {INSTALL_HINT}"
        ) from exc
    return distributed


def _int(name, value, minimum, maximum=None) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (Integral, np.integer)):
        raise TypeError(f"{name}={value!r} must be an integer")
    if value < minimum:
        raise ValueError(f"{name}={value} must be >= {minimum}")
    if maximum is not None and value > maximum:
        raise ValueError(f"{name}={value} must be <= {maximum}")
    return int(value)


def _min_overlap(value) -> int:
    return 0 if value is None else _int("min_overlap", value, 0)


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


class ShardLostError(RuntimeError):
    """A shard of a :class:`ShardedStore` is gone (its worker died or cannot be reached).

    ``shards`` lists the lost shard numbers and ``workers`` the addresses
    they lived on. The call that raised returned nothing: an answer
    without those shards would be silently incomplete. The message says
    how to recover (``docs/cluster.md``, "Faults").
    """

    def __init__(self, message, shards=(), workers=()):
        super().__init__(message)
        self.shards = tuple(shards)
        self.workers = tuple(workers)

    def __reduce__(self):
        return (type(self), (str(self), self.shards, self.workers))


# ---------------------------------------------------------------------------
# the worker side
# ---------------------------------------------------------------------------


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


# ---------------------------------------------------------------------------
# merging
# ---------------------------------------------------------------------------


def _merge_hits(parts) -> Hits:
    if len(parts) == 1:
        return parts[0]
    ids = np.concatenate([p.ids for p in parts])
    overlaps = np.concatenate([p.overlaps for p in parts])
    order = np.lexsort((ids, -overlaps))
    return Hits(ids[order], overlaps[order])


def _merge_batches(n: int, parts) -> BatchHits:
    if len(parts) == 1:
        return parts[0]
    which = np.concatenate([np.repeat(np.arange(n, dtype=np.int64), p.counts) for p in parts])
    ids = np.concatenate([p.ids for p in parts])
    overlaps = np.concatenate([p.overlaps for p in parts])
    order = np.lexsort((ids, -overlaps, which))
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(which, minlength=n), out=indptr[1:])
    return BatchHits(indptr, ids[order], overlaps[order])


def _batch_matches(batch: Codes, m: int) -> BatchHits:
    """For each code of a batch, the codes of the same batch with overlap >= m (itself included).

    A scratch store whose one detector per code holds all its bits with
    threshold ``m`` fires exactly when the overlap reaches ``m``.
    """
    n = len(batch)
    usable = np.flatnonzero(batch.weights >= m)
    if usable.size == 0:
        return BatchHits(np.zeros(n + 1, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64))
    scratch = Store(batch.bits, threshold=m, sample_size=None, detectors=1, seed=0)
    scratch.add(batch[usable])
    found = scratch.query_many(batch, min_overlap=m)
    return BatchHits(found.indptr, usable[found.ids], found.overlaps)


def _greedy(stored: BatchHits, within: BatchHits, first_new: int):
    """The rule of ``Store.find_or_add``: each code in turn takes its best match or a new id.

    A code's candidates are the stored matches and the earlier codes of the
    batch that were added; the best is the greatest overlap, ties to the
    smallest id.
    """
    n = len(stored)
    out = np.empty(n, dtype=np.int64)
    fresh = np.zeros(n, dtype=bool)
    upcoming = first_new
    for i in range(n):
        lo, hi = stored.indptr[i], stored.indptr[i + 1]
        best = (int(stored.overlaps[lo]), -int(stored.ids[lo])) if hi > lo else None
        lo, hi = within.indptr[i], within.indptr[i + 1]
        for j, ov in zip(within.ids[lo:hi].tolist(), within.overlaps[lo:hi].tolist()):
            if j < i and fresh[j] and (best is None or (ov, -int(out[j])) > best):
                best = (ov, -int(out[j]))
        if best is None:
            out[i], fresh[i] = upcoming, True
            upcoming += 1
        else:
            out[i] = -best[1]
    return out, fresh


# ---------------------------------------------------------------------------
# the client side
# ---------------------------------------------------------------------------


class ShardedStore:
    """One store of sparse binary codes spread over the workers of a Dask cluster.

    Parameters
    ----------
    client : distributed.Client
        A connected client; the shards live on its cluster's workers.
    shards : int
        Number of shards (K). Shard ``k`` holds the codes with id ``k`` mod
        K; shards are placed round-robin on ``workers``.
    bits, threshold, sample_size, detectors, seed
        As for :class:`~sparseindex.Store`; every shard gets the same
        values (``seed=None`` draws one seed for all).
    workers : list of str or None
        Worker addresses to place shards on (default: every worker of the
        cluster, sorted). Each shard is pinned to its worker's address.

    Notes
    -----
    Every call is one round trip to every shard involved (1–2 ms on
    loopback plus the transfer of its arguments and results), so batch
    calls are the efficient ones; ``query`` of one code is dominated by the
    round trip. The client keeps the id counter, the item count and the
    serving counters; the shards keep the codes.

    Threads: many threads may query at once; a mutation (``add``,
    ``find_or_add``, ``remove``, ``compact``) waits for the queries in
    flight and holds new ones back until every shard has applied it, so a
    query sees a call's effect entirely or not at all. ``save`` lets
    queries go on and holds mutations back.

    A hit is probabilistic evidence, not proof: check the stored code
    (``get``, the exact overlap) against your own rules before a hit
    decides anything that can hurt a person (access, money, identity).
    """

    # -- construction ----------------------------------------------------

    def __init__(self, client, shards, bits, *, threshold, sample_size=None, detectors=1, seed=None, workers=None):
        local = Store(bits, threshold=threshold, sample_size=sample_size, detectors=detectors, seed=seed)
        params = dict(bits=local.bits, threshold=local.threshold, sample_size=local.sample_size,
                      detectors=local.detectors, seed=local.seed)
        self._setup(client, shards, params, None)
        self._start([("new", params)] * self._shards, self._placement(workers, self._shards))

    @classmethod
    def for_target(cls, client, shards, bits, weight, *, false_hit, capacity, noise=0.0, recall=0.999,
                   max_detectors=8, seed=None, workers=None, warn_fraction=0.8, on_status=None):
        """A sharded store planned from whole-store targets.

        ``capacity`` and ``false_hit`` describe the whole store (a query
        reaches every shard, so false-hit chances add up across shards).
        The plan (``store.plan``) is :func:`sparseindex.plan` of those
        targets; each shard is planned for its share
        (:func:`share_targets`), which is the same configuration, so its own
        ``health()`` measures it against its share. ``warn_fraction`` and
        ``on_status`` set a whole-store :meth:`watch`.

        Examples
        --------
        >>> share_targets(1e-9, 2_000_000, 2)[0]   # each of 2 shards is planned for 10^6 codes
        1000000
        """
        whole = make_plan(bits, weight, false_hit=false_hit, capacity=capacity, noise=noise, recall=recall,
                          max_detectors=max_detectors)
        shards = _int("shards", shards, 1, 65535)
        share_cap, share_fh = share_targets(false_hit, capacity, shards)
        local = Store(bits, threshold=whole.threshold, sample_size=whole.sample_size, detectors=whole.detectors, seed=seed)
        params = dict(bits=local.bits, threshold=whole.threshold, sample_size=whole.sample_size,
                      detectors=whole.detectors, seed=local.seed)
        shard_plan = make_plan(bits, weight, false_hit=share_fh, capacity=share_cap, noise=noise, recall=recall,
                               max_detectors=max_detectors)
        if (shard_plan.sample_size, shard_plan.threshold, shard_plan.detectors) == (
                whole.sample_size, whole.threshold, whole.detectors):
            spec = ("plan", dict(bits=bits, weight=weight, false_hit=share_fh, capacity=share_cap, noise=noise,
                                 recall=recall, max_detectors=max_detectors, seed=local.seed,
                                 warn_fraction=warn_fraction))
        else:  # a rounding step at a boundary: keep the whole plan, watch the share target
            spec = ("watch", dict(params, false_hit=share_fh, warn_fraction=warn_fraction))
        self = cls.__new__(cls)
        self._setup(client, shards, params, whole)
        self._start([spec] * shards, self._placement(workers, shards))
        self.watch(on_status, warn_fraction=warn_fraction)
        return self

    def _setup(self, client, shards, params, plan) -> None:
        distributed = _distributed()
        if not isinstance(client, distributed.Client):
            raise TypeError(f"client={client!r} must be a distributed.Client")
        self._client = client
        self._shards = _int("shards", shards, 1, 65535)
        self._params = params
        self._plan = plan
        self._hosts = [None] * self._shards
        self._futures = [None] * self._shards
        self._where = [None] * self._shards
        self._lost = {}  # shard -> cause
        self._broken = None  # why the store can no longer be trusted, or None
        self._next_id = 0
        self._items = 0
        self._rw = ReadWriteLock()
        self._writer = threading.Lock()
        self._dirty = [True] * self._shards
        self._saved = None  # (directory, generation, files, load options) of the last save or load
        self._load_options = {"mmap": False, "writable": None}
        self._served = {"queries": 0, "hits": 0, "added": 0, "removed": 0}
        self._served_lock = threading.Lock()
        self._measurement = None
        self._watch = None
        self._health_memo = _health.HealthMemo()
        self._closed = False
        self._read_only = None  # or why, for a store loaded read-only

    def _placement(self, workers, count):
        known = _worker_addresses(self._client)
        if not known:
            raise RuntimeError("the cluster has no workers to hold shards")
        if workers is None:
            workers = known
        else:
            if isinstance(workers, str) or not all(isinstance(w, str) for w in workers) or not workers:
                raise TypeError(f"workers={workers!r} must be a non-empty list of worker addresses")
            unknown = [w for w in workers if w not in known]
            if unknown:
                raise ValueError(f"workers: {unknown[0]!r} is not a worker of this cluster (workers: {known})")
        return [workers[k % len(workers)] for k in range(count)]

    def _start(self, specs, where, which=None) -> None:
        """Create the shard actors ``which`` (default all) pinned to ``where``."""
        which = list(range(self._shards)) if which is None else list(which)
        futures = {}
        for k, spec, address in zip(which, specs, where):
            futures[k] = self._client.submit(
                ShardHost, k, self._shards, spec[0], spec[1], actor=True, workers=[address],
                allow_other_workers=False, pure=False, key=f"sparseindex-shard-{k}-{os.urandom(6).hex()}",
            )
        failure = None
        for k, fut in futures.items():
            try:
                self._hosts[k] = fut.result()
                self._futures[k] = fut
                self._where[k] = where[which.index(k)]
            except Exception as exc:  # the Store could not be made or loaded there
                failure = failure or exc
        if failure is not None:
            self._client.cancel(list(futures.values()), force=True)
            for k in which:
                self._hosts[k] = self._futures[k] = None
            raise failure

    # -- supervision -----------------------------------------------------

    def _gone(self, k) -> bool:
        fut = self._futures[k]
        return fut is None or fut.status != "finished"

    def _lost_error(self, lost: dict, doing: str) -> ShardLostError:
        shards = sorted(lost)
        where = [self._where[k] for k in shards]
        names = ", ".join(f"shard {k} of {self._shards} (worker {self._where[k]}): {lost[k]}" for k in shards)
        changed = [k for k in shards if self._dirty[k]]
        if self._saved is None:
            advice = ("this store was never saved, so the codes of the lost shard are gone; "
                      "rebuild the store from your data")
        elif self._broken is not None or changed:
            why = self._broken or f"shards {changed} changed after the last save"
            advice = (f"{why}, so only the last save can be trusted: reload it with "
                      f"ShardedStore.load(client, {self._saved[0]!r}) (changes since that save are lost)")
        else:
            directory = self._saved[0]
            advice = (f"recover with store.recover() (rebuilds lost shards unchanged since the last save "
                      f"from {directory!r}) or reload the last save with ShardedStore.load(client, {directory!r})")
        return ShardLostError(f"{doing}: {names}. Nothing was returned, since an answer without "
                              f"that shard would be incomplete; {advice}", shards, where)

    def _usable(self, doing: str) -> None:
        if self._closed:
            raise RuntimeError(f"{doing}: this ShardedStore is closed")
        for k in range(self._shards):
            if k not in self._lost and self._gone(k):
                self._lost[k] = self._gone_reason(k)
        if self._lost:
            raise self._lost_error(self._lost, doing)
        if self._broken is not None:
            raise RuntimeError(f"{doing}: {self._broken}")

    def _changing(self, doing: str) -> None:
        self._usable(doing)
        if self._read_only is not None:
            raise ReadOnlyStoreError(
                f"{doing}: this sharded store is read-only ({self._read_only}); load it with writable=True to change it"
            )

    def _wait(self, k, fut):
        """The result of one shard call; raises _Lost when the shard is gone."""
        while True:
            try:
                return fut.result(timeout=POLL_SECONDS)
            except (TimeoutError, asyncio.TimeoutError):
                if self._gone(k):
                    raise _Lost(self._gone_reason(k)) from None
                if not self._worker_alive(k):
                    raise _Lost("its worker left the cluster") from None
            except Exception as exc:
                if self._reachable(k):
                    raise  # the Store itself raised: an ordinary error
                raise _Lost(f"{type(exc).__name__}: {exc}") from exc

    def _worker_alive(self, k) -> bool:
        """False only when the scheduler answers and no longer lists the shard's worker."""
        try:
            return self._where[k] in _worker_addresses(self._client)
        except Exception:  # no answer is no evidence: the actor's own status still decides
            return True

    def _gone_reason(self, k) -> str:
        fut = self._futures[k]
        return "it was released" if fut is None else f"its worker is gone (actor status: {fut.status})"

    def _reachable(self, k) -> bool:
        """After a failed call: is the shard still there? (a ping, once the cluster has settled)."""
        deadline = time.monotonic() + SETTLE_SECONDS
        while time.monotonic() < deadline:
            if self._gone(k):
                return False
            try:
                return self._hosts[k].ping().result(timeout=POLL_SECONDS) == k
            except (TimeoutError, asyncio.TimeoutError):
                continue
            except Exception:
                time.sleep(0.05)
        return False

    def _fanout(self, method: str, calls: dict, doing: str, *, changes: bool = False) -> dict:
        """Call ``method`` on the shards of ``calls`` ({shard: args}) at once; {shard: result}."""
        pending, lost, results = [], {}, {}
        for k, args in calls.items():
            try:
                pending.append((k, getattr(self._hosts[k], method)(*args)))
            except RuntimeError as exc:  # the actor is known to be gone
                lost[k] = str(exc)
        failure = None
        for k, fut in pending:
            try:
                results[k] = self._wait(k, fut)
            except _Lost as exc:
                lost[k] = str(exc)
            except Exception as exc:
                failure = failure or exc
        if changes:
            for k in calls:
                self._dirty[k] = True
        if lost:
            self._lost.update(lost)
            if changes:
                self._broken = (f"{doing} failed part-way (shards {sorted(results)} applied it, "
                                f"shards {sorted(lost)} are lost), so the shards no longer agree")
            raise self._lost_error(lost, doing)
        if failure is not None:
            if changes:
                self._broken = f"{doing} failed part-way on a shard ({failure!r}), so the shards no longer agree"
            raise failure
        return results

    def _everywhere(self, method, args, doing, **kw) -> list:
        results = self._fanout(method, {k: args for k in range(self._shards)}, doing, **kw)
        return [results[k] for k in range(self._shards)]

    def _routed(self, ids: np.ndarray):
        """{shard: positions of ``ids`` on that shard}."""
        where = shard_of(ids, self._shards)
        if self._shards == 1:
            return {0: np.arange(ids.shape[0])}
        order = np.argsort(where, kind="stable")
        cuts = np.searchsorted(where[order], np.arange(self._shards + 1))
        return {k: order[cuts[k] : cuts[k + 1]] for k in range(self._shards) if cuts[k + 1] > cuts[k]}

    # -- parameters ------------------------------------------------------

    bits = property(lambda self: self._params["bits"], doc="Width of every code.")
    threshold = property(lambda self: self._params["threshold"], doc="Sampled bits a detector needs to fire.")
    sample_size = property(lambda self: self._params["sample_size"], doc="Set bits each detector samples (None: all).")
    detectors = property(lambda self: self._params["detectors"], doc="Detectors per stored code.")
    seed = property(lambda self: self._params["seed"], doc="Seed of the detector sampling (all shards).")
    shards = property(lambda self: self._shards, doc="Number of shards.")
    client = property(lambda self: self._client, doc="The distributed.Client the shards live behind.")

    @property
    def plan(self):
        """The whole-store :class:`~sparseindex.Plan` (``for_target``), or None."""
        return self._plan

    @property
    def next_id(self) -> int:
        """The id the next added code will get."""
        return self._next_id

    @property
    def directory(self):
        """Directory of the last save or load, or None."""
        return None if self._saved is None else self._saved[0]

    def __len__(self) -> int:
        return self._items

    def __repr__(self) -> str:
        state = "closed" if self._closed else (f"lost shards {sorted(self._lost)}" if self._lost else "ok")
        return (f"ShardedStore(shards={self._shards}, bits={self.bits}, threshold={self.threshold}, "
                f"sample_size={self.sample_size}, detectors={self.detectors}, items={self._items}, "
                f"seed={self.seed}, {state})")

    def __reduce__(self):
        raise TypeError("a ShardedStore cannot be pickled; save(directory) it and load(client, directory)")

    def placement(self) -> list:
        """One dict per shard: its worker address, whether it is lost, and whether it changed since the last save."""
        for k in range(self._shards):
            if k not in self._lost and self._gone(k):
                self._lost[k] = self._gone_reason(k)
        return [{"shard": k, "worker": self._where[k], "lost": k in self._lost, "changed_since_save": self._dirty[k]}
                for k in range(self._shards)]

    def _count(self, **amounts) -> None:
        with self._served_lock:
            for key, value in amounts.items():
                self._served[key] += int(value)

    # -- ids ---------------------------------------------------------------

    def _ids_arg(self, ids, what: str) -> np.ndarray:
        """Validated 1-D int64 ids, every one below ``next_id``; the messages of ``Store``."""
        return ids_below(ids, self._next_id, what)

    def _live_codes(self, arr: np.ndarray, what: str):
        """Codes of ``arr`` in order; KeyError naming the first id that is not live."""
        routes = self._routed(arr)
        got = self._fanout("get", {k: (arr[pos],) for k, pos in routes.items()}, what)
        live = np.ones(arr.shape[0], dtype=bool)
        for k, pos in routes.items():
            live[pos] = got[k][0]
        if not live.all():
            raise KeyError(f"{what}: id {int(arr[np.flatnonzero(~live)[0]])} was removed")
        words = np.zeros((arr.shape[0], (self.bits + 63) // 64), dtype=np.uint64)
        for k, pos in routes.items():
            words[pos] = got[k][1].words
        return Codes(words, self.bits), routes

    def __contains__(self, code_id) -> bool:
        if isinstance(code_id, (bool, np.bool_)) or not isinstance(code_id, (Integral, np.integer)):
            return False
        if not 0 <= code_id < self._next_id:
            return False
        with self._rw.reading():
            self._usable("contains")
            k = int(shard_of(code_id, self._shards))
            arr = np.array([int(code_id)], dtype=np.int64)
            return bool(self._fanout("live", {k: (arr,)}, "contains")[k][0])

    def ids(self) -> np.ndarray:
        """Ids of every stored (not removed) code, ascending. O(N) transfer."""
        with self._rw.reading():
            self._usable("ids")
            return self._all_ids()

    def _all_ids(self) -> np.ndarray:
        parts = self._everywhere("ids", (), "ids")
        return np.sort(np.concatenate(parts)) if len(parts) > 1 else parts[0]

    def get(self, ids) -> Codes:
        """The stored codes with these ids, in the order given."""
        with self._rw.reading():
            self._usable("get")
            return self._live_codes(self._ids_arg(ids, "get"), "get")[0]

    # -- mutation --------------------------------------------------------

    def add(self, codes, *, ids=None) -> np.ndarray:
        """Store a batch of codes; return their global ids (int64).

        Accepts what :meth:`Store.add` accepts and checks it the same way
        in the client before any shard sees it: one bad row and nothing is
        added. Code ``i`` goes to shard ``i % shards``; all shards add
        their part at once. ``ids`` (optional) gives the ids yourself:
        strictly ascending, from ``next_id`` up, gaps allowed.
        """
        batch = as_codes(codes, self.bits, what="add")
        m = len(batch)
        given = None if ids is None else _new_ids(ids, m)
        if m == 0:
            return np.zeros(0, dtype=np.int64)
        weak = np.flatnonzero(batch.weights < self.threshold)
        if weak.size:
            r = int(weak[0])
            raise ValueError(
                f"add: row {r} has {int(batch.weights[r])} set bits, fewer than threshold={self.threshold}: "
                "no detector could ever fire for it"
            )
        with self._writer, self._rw.writing():
            self._changing("add")
            if given is not None and given[0] < self._next_id:
                raise ValueError(f"add: ids[0]={int(given[0])} is below next_id={self._next_id}: ids are never reused")
            new = np.arange(self._next_id, self._next_id + m, dtype=np.int64) if given is None else given
            self._put(batch, new, "add")
        self._after_change()
        return new

    def _put(self, batch: Codes, new: np.ndarray, doing: str) -> None:
        routes = self._routed(new)
        calls = {k: (batch if pos.shape[0] == len(batch) else batch[pos], new[pos]) for k, pos in routes.items()}
        self._fanout("add", calls, doing, changes=True)
        self._next_id = int(new[-1]) + 1
        self._items += new.shape[0]
        self._count(added=new.shape[0])

    def find_or_add(self, codes, *, min_overlap):
        """Add only what is new: return each code's match or its new id, exactly as :meth:`Store.find_or_add`.

        Every shard returns all its codes of overlap ``>= min_overlap``
        (``Store.find_matches``: complete and exact); the client matches the
        batch against itself, takes for each code in turn the greatest
        overlap (ties to the smallest id) among the stored matches and the
        earlier codes of the batch that were added, and routes the new
        codes. Returns ``(ids, is_new)``. One mutation: no other change
        interleaves and queries see all its additions or none.
        """
        batch = as_codes(codes, self.bits, what="find_or_add")
        m = _int("min_overlap", min_overlap, 1)
        n = len(batch)
        if n == 0:
            return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=bool)
        weak = np.flatnonzero(batch.weights < self.threshold)
        if weak.size:
            r = int(weak[0])
            raise ValueError(
                f"find_or_add: row {r} has {int(batch.weights[r])} set bits, fewer than "
                f"threshold={self.threshold}: it could never be recalled if added"
            )
        with self._writer, self._rw.writing():
            self._changing("find_or_add")
            stored = _merge_batches(n, self._everywhere("find_matches", (batch, m), "find_or_add"))
            ids, is_new = _greedy(stored, _batch_matches(batch, m), self._next_id)
            fresh = np.flatnonzero(is_new)
            if fresh.size:
                self._put(batch if fresh.size == n else batch[fresh], ids[fresh], "find_or_add")
        if fresh.size:
            self._after_change()
        return ids, is_new

    def remove(self, ids) -> None:
        """Remove codes by id; they never come back and their ids are not reused.

        All ids are checked on their shards first: an unknown, removed or
        repeated id raises ``KeyError`` naming it (as :meth:`Store.remove`)
        and nothing is removed.
        """
        arr = self._ids_arg(ids, "remove")
        with self._writer, self._rw.writing():
            self._changing("remove")
            routes = self._routed(arr)
            live = np.ones(arr.shape[0], dtype=bool)
            for k, mask in self._fanout("live", {k: (arr[pos],) for k, pos in routes.items()}, "remove").items():
                live[routes[k]] = mask
            if not live.all():
                raise KeyError(f"remove: id {int(arr[np.flatnonzero(~live)[0]])} was removed")
            uniq, counts = np.unique(arr, return_counts=True)
            if (counts > 1).any():
                raise KeyError(f"remove: id {int(uniq[np.flatnonzero(counts > 1)[0]])} appears more than once in one call")
            if arr.size == 0:
                return
            self._fanout("remove", {k: (arr[pos],) for k, pos in routes.items()}, "remove", changes=True)
            self._items -= arr.shape[0]
            self._count(removed=arr.shape[0])
        self._after_change()

    def compact(self) -> None:
        """Reclaim removed rows on every shard (:meth:`Store.compact`); ids do not change."""
        with self._writer, self._rw.writing():
            self._changing("compact")
            self._everywhere("compact", (), "compact", changes=True)

    # -- queries ---------------------------------------------------------

    def query(self, code, *, min_overlap=None) -> Hits:
        """The stored codes with at least one firing detector for this query (:meth:`Store.query`), from every shard.

        One round trip to every shard; for many queries use :meth:`query_many`.
        """
        q = as_code(code, self.bits, what="query")
        m = _min_overlap(min_overlap)
        with self._rw.reading():
            self._usable("query")
            hits = _merge_hits(self._everywhere("query", (q, m), "query"))
        self._count(queries=1, hits=len(hits))
        return hits

    def query_many(self, codes, *, min_overlap=None) -> BatchHits:
        """:meth:`Store.query_many` on every shard at once, merged per query.

        O(the shards' work, in parallel) + O(hits log hits) to merge.
        """
        batch = as_codes(codes, self.bits, what="query_many")
        m = _min_overlap(min_overlap)
        with self._rw.reading():
            self._usable("query_many")
            result = self._query_batch(batch, m, "query_many")
        self._count(queries=len(batch), hits=result.ids.shape[0])
        return result

    def _query_batch(self, batch, m, doing):
        if len(batch) == 0:
            return BatchHits(np.zeros(1, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64))
        return _merge_batches(len(batch), self._everywhere("query_many", (batch, m), doing))

    def find_matches(self, codes, *, min_overlap) -> BatchHits:
        """Every stored code whose overlap with each query is at least ``min_overlap`` (complete; :meth:`Store.find_matches`)."""
        batch = as_codes(codes, self.bits, what="find_matches")
        m = _int("min_overlap", min_overlap, 1)
        with self._rw.reading():
            self._usable("find_matches")
            result = _merge_batches(len(batch), self._everywhere("find_matches", (batch, m), "find_matches"))
        self._count(queries=len(batch), hits=result.ids.shape[0])
        return result

    def nearest(self, code, k) -> Hits:
        """The exact ``k`` stored codes of greatest overlap (ties to the lower id): each shard's top ``k``, merged."""
        q = as_code(code, self.bits, what="nearest")
        k = _int("k", k, 0)
        with self._rw.reading():
            self._usable("nearest")
            best = _merge_hits(self._everywhere("nearest", (q, k), "nearest"))
        return Hits(best.ids[:k], best.overlaps[:k])

    # -- health ----------------------------------------------------------

    def health(self, *, false_hit=None, warn_fraction=None, refresh=False) -> Health:
        """The whole store's :class:`~sparseindex.health.Health`, from every shard's figures.

        Aggregation (``docs/cluster.md``): items, pending removals, memory
        and codes added/removed are sums; bit usage and the weight
        histogram are summed per bit and per weight, and everything derived
        from them (weights, effective bits, hottest bit, the usage-aware
        model) is computed from the sums; the per-code false-hit chance is
        the same on every shard (one configuration), so the whole store's
        chance is ``store_false_hit(per_code, total items)`` and its
        limit ``code_limit(per_code, target)``. The usage-aware estimate
        samples 256 live codes of the whole store as ``Store.health`` does.
        Queries and hits count whole-store queries (not one per shard).
        For each shard's own report against its share use :meth:`shard_health`.
        """
        if false_hit is not None:
            false_hit = _chance("false_hit", false_hit)
        if warn_fraction is not None:
            warn_fraction = _fraction(warn_fraction)
        return _health.compute(self._stats("health"), self.detector_samples, self._health_memo, false_hit=false_hit,
                               warn_fraction=warn_fraction, refresh=bool(refresh))

    def stats(self) -> "_health.StoreStats":
        """The whole store's snapshot: every shard's :meth:`Store.stats` summed field by field.

        Items, pending removals, memory, bit usage and the weight histogram
        are sums over the shards; the serving counters, plan, measurement
        and watch are the whole store's own (a query counts once, not once
        per shard).
        """
        return self._stats("stats")

    def _stats(self, doing):
        with self._rw.reading():
            self._usable(doing)
            parts = self._everywhere("stats", (), doing)
            with self._served_lock:
                served = dict(self._served)
            watch = self._watch
        return _health.StoreStats(
            bits=self.bits, threshold=self.threshold, sample_size=self.sample_size, detectors=self.detectors,
            seed=self.seed, plan=self._plan, items=sum(s.items for s in parts),
            removed_pending=sum(s.removed_pending for s in parts), usage=np.sum([s.usage for s in parts], axis=0),
            weight_hist=np.sum([s.weight_hist for s in parts], axis=0),
            memory_bytes=sum(s.memory_bytes for s in parts), served=served, measurement=self._measurement,
            watch_false_hit=None if watch is None else watch.false_hit,
            watch_warn_fraction=None if watch is None else watch.warn_fraction,
        )

    def detector_samples(self, count, *, seed) -> list:
        """As :meth:`Store.detector_samples`, over the whole store: the same codes a single store would pick."""
        with self._rw.reading():
            self._usable("detector_samples")
            live = self._all_ids()
            rng = np.random.default_rng([self.seed, int(seed)])
            pick = np.sort(rng.choice(live, size=min(int(count), live.shape[0]), replace=False))
            routes = self._routed(pick)
            got = self._fanout("detector_samples", {k: (pick[pos],) for k, pos in routes.items()}, "health")
        samples = [None] * pick.shape[0]
        for k, pos in routes.items():
            for p, bits in zip(pos.tolist(), got[k]):
                samples[p] = bits
        return samples

    def shard_health(self, *, refresh=False) -> list:
        """Each shard's own :meth:`Store.health`, measured against its share of the target.

        A shard of a ``for_target`` store carries its share's plan
        (:func:`share_targets`); a shard of a store with a whole-store
        target set by :meth:`watch` is measured against the share of that
        target.
        """
        with self._rw.reading():
            self._usable("shard_health")
            kwargs = {"refresh": bool(refresh)}
            if self._watch is not None and self._watch.false_hit is not None:
                kwargs["false_hit"] = -math.expm1(math.log1p(-self._watch.false_hit) / self._shards)
                kwargs["warn_fraction"] = self._watch.warn_fraction
            return self._everywhere("health", (kwargs,), "shard_health")

    def measure_false_hits(self, queries=10_000, *, source="uniform", seed=None, batch=2048) -> FalseHitMeasurement:
        """Random unrelated queries through every shard: the measured whole-store false-hit rate.

        The same queries, counts and interval as :meth:`Store.measure_false_hits` with
        the same ``seed`` on a single store of the same codes. Measurement
        queries do not count as served queries of the whole store (each
        shard's own counters do count them).
        """
        _health.check_measurement(queries, source)
        stats = self._stats("measure_false_hits")
        report = _health.compute(stats, self.detector_samples, self._health_memo)
        with self._rw.reading():
            self._usable("measure_false_hits")
            result = _health.measure_false_hits(
                report, stats.usage, lambda batch: self._query_batch(batch, 0, "measure_false_hits").counts,
                queries, source=source, seed=seed, batch=batch)
        self._measurement = result
        return result

    def watch(self, on_status=None, *, warn_fraction=0.8, false_hit=None) -> None:
        """Alert on whole-store status changes: ``on_status(previous, current, health)``.

        As :meth:`Store.watch`, for the whole store: called in the changing
        thread after an ``add``, ``find_or_add`` or ``remove`` moved the
        status; crossing the limit issues :class:`~sparseindex.SaturationWarning`.
        """
        if on_status is not None and not callable(on_status):
            raise TypeError(f"on_status={on_status!r} must be callable or None")
        warn_fraction = _fraction(warn_fraction)
        if false_hit is not None:
            false_hit = _chance("false_hit", false_hit)
        elif self._plan is None:
            raise ValueError("watch: this store has no plan; give false_hit=... (target chance per query)")
        watcher = _health.Watch(on_status, warn_fraction, false_hit)
        self._watch = watcher
        watcher.status = self.health().status

    def _after_change(self) -> None:
        watcher = self._watch
        if watcher is None:
            return
        with self._served_lock:
            churn = self._served["added"] + self._served["removed"]
        try:
            watcher.changed(self._items, churn, self.health)
        except Exception as exc:  # the change is done; a failed status check must not hide that
            warnings.warn(f"the status check after a change failed: {exc}", RuntimeWarning, stacklevel=3)

    # -- persistence -----------------------------------------------------

    def save(self, directory) -> None:
        """Write every shard and a manifest into ``directory``, atomically as a whole.

        ``directory`` must be reachable under the same path by this client
        and every worker (a shared file system). Each shard writes its own
        file with :meth:`Store.save` (atomic and durable), under a name
        that carries a new save generation, so the files of the previous
        save are untouched; then the client writes ``manifest.json``
        (temporary file, ``fsync``, ``os.replace``, directory ``fsync``),
        which is the moment the new save takes effect; then the previous
        generation's files are deleted. A crash at any point leaves a
        directory that loads as the old save or the new one. Queries go on
        meanwhile; mutations wait.
        """
        if not isinstance(directory, (str, os.PathLike)):
            raise TypeError(f"save: directory={directory!r} must be a path")
        directory = os.path.abspath(os.fspath(directory))
        with self._writer:
            self._usable("save")
            os.makedirs(directory, exist_ok=True)
            generation = _next_generation(directory)
            names = {k: shard_file_name(k, self._shards, generation) for k in range(self._shards)}
            stats = self._everywhere("describe", (), "save")
            try:
                sizes = self._fanout("save", {k: (os.path.join(directory, names[k]),) for k in names}, "save")
            except BaseException:
                _remove_quietly(directory, [names[k] for k in names])
                raise
            files = [{"shard": k, "file": names[k], "items": int(stats[k]["items"]),
                      "next_id": int(stats[k]["next_id"]), "bytes": int(sizes[k])} for k in range(self._shards)]
            manifest = {
                "kind": MANIFEST_KIND, "format": MANIFEST_FORMAT, "written_by": f"sparseindex {_version()}",
                "generation": generation, "params": dict(self._params),
                "plan": None if self._plan is None else self._plan.to_dict(), "shards": self._shards,
                "routing": "id % shards", "next_id": self._next_id, "items": self._items, "files": files,
            }
            _write_atomically(os.path.join(directory, MANIFEST),
                              json.dumps(manifest, indent=1, allow_nan=False).encode("utf-8"))
            keep = {f["file"] for f in files}
            _remove_quietly(directory, [n for n in os.listdir(directory) if _shard_file_match(n) and n not in keep])
            self._saved = (directory, generation, files, dict(self._load_options))
            self._dirty = [False] * self._shards

    @classmethod
    def load(cls, client, directory, *, mmap=False, writable=None, workers=None) -> "ShardedStore":
        """Open a sharded store written by :meth:`save`; each worker loads its shard's file.

        The manifest is checked strictly (a bad one raises
        :class:`~sparseindex.StoreFormatError` with section ``"manifest"``),
        each shard file is checked by :meth:`Store.load`, and then each
        shard is compared with the manifest: parameters, items, next id,
        and that every id it holds belongs to it. ``mmap`` and ``writable``
        are passed to :meth:`Store.load` on every shard.
        """
        if not isinstance(directory, (str, os.PathLike)):
            raise TypeError(f"load: directory={directory!r} must be a path")
        if not isinstance(mmap, (bool, np.bool_)):
            raise TypeError(f"mmap={mmap!r} must be True or False")
        if writable is not None and not isinstance(writable, (bool, np.bool_)):
            raise TypeError(f"writable={writable!r} must be True, False or None")
        directory = os.path.abspath(os.fspath(directory))
        manifest = _read_manifest(os.path.join(directory, MANIFEST))
        self = cls.__new__(cls)
        self._setup(client, manifest["shards"], manifest["params"], _plan_from_dict(manifest["plan"]))
        self._load_options = {"mmap": bool(mmap), "writable": writable}
        self._next_id, self._items = manifest["next_id"], manifest["items"]
        files = manifest["files"]
        self._saved = (directory, manifest["generation"], files, dict(self._load_options))
        self._start(self._load_specs(range(self._shards)), self._placement(workers, self._shards))
        self._verify(range(self._shards))
        self._dirty = [False] * self._shards
        return self

    def _load_specs(self, which):
        directory, _, files, options = self._saved
        return [("load", {"path": os.path.join(directory, files[k]["file"]), **options}) for k in which]

    def _verify(self, which) -> None:
        """Every shard in ``which`` agrees with the manifest, or StoreFormatError (and the shards are released)."""
        directory, _, files, _ = self._saved
        info = self._fanout("describe", {k: (True,) for k in which}, "load")
        for k in which:
            d, f = info[k], files[k]
            path = os.path.join(directory, f["file"])
            problem = None
            for key in sorted(_PARAM_KEYS):
                if d[key] != self._params[key]:
                    problem = f"{key}={d[key]!r} in the shard file, {self._params[key]!r} in the manifest"
                    break
            if problem is None and (d["items"], d["next_id"]) != (f["items"], f["next_id"]):
                problem = (f"holds {d['items']} codes up to next_id {d['next_id']}, the manifest says "
                           f"{f['items']} up to {f['next_id']}")
            if problem is None and not d["routing_ok"]:
                problem = f"holds ids that do not belong to shard {k} of {self._shards} (id % shards)"
            if problem is not None:
                self.close()
                raise StoreFormatError("manifest", f"shard {k}: {problem}", path)
            if d["read_only"]:
                self._read_only = "memory-mapped" if self._load_options["mmap"] else "opened with writable=False"

    def recover(self) -> list:
        """Rebuild lost shards from the last save; returns the shard numbers rebuilt.

        Possible when every lost shard is unchanged since the last save
        (or load): its file then holds exactly what it held, and the other
        shards are untouched. Otherwise raises :class:`ShardLostError`
        saying why; reload the last save with :meth:`load` (changes since
        that save are lost) — see ``docs/cluster.md``. A rebuilt shard goes
        to the live worker holding the fewest shards.
        """
        with self._writer, self._rw.writing():
            if self._closed:
                raise RuntimeError("recover: this ShardedStore is closed")
            for k in range(self._shards):
                if k not in self._lost and self._gone(k):
                    self._lost[k] = self._gone_reason(k)
            lost = sorted(self._lost)
            if not lost:
                return []
            if self._broken is not None or self._saved is None or any(self._dirty[k] for k in lost):
                raise self._lost_error({k: self._lost[k] for k in lost}, "recover")
            known = _worker_addresses(self._client)
            if not known:
                raise RuntimeError("recover: the cluster has no workers left")
            held = {w: sum(1 for k in range(self._shards) if k not in self._lost and self._where[k] == w)
                    for w in known}
            where = []
            for _ in lost:
                w = min(known, key=lambda a: (held[a], a))
                held[w] += 1
                where.append(w)
            old = [self._futures[k] for k in lost]
            self._start(self._load_specs(lost), where, which=lost)
            for k in lost:
                del self._lost[k]
            self._client.cancel([f for f in old if f is not None], force=True)
            self._verify(lost)
            return lost

    def close(self) -> None:
        """Release every shard actor (their memory on the workers). The store cannot be used after."""
        if self._closed:
            return
        self._closed = True
        futures = [f for f in self._futures if f is not None]
        self._hosts = [None] * self._shards
        self._futures = [None] * self._shards
        if futures:
            try:
                self._client.cancel(futures, force=True)
            except Exception:  # the client may already be closed
                pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class _Lost(Exception):
    """Internal: a shard call found its shard gone."""


def _worker_addresses(client) -> list:
    """Addresses of the cluster's workers now, sorted (asks the scheduler)."""
    try:
        info = client.scheduler_info(n_workers=-1)
    except TypeError:  # releases before the n_workers argument
        info = client.scheduler_info()
    return sorted(info["workers"])


def _version() -> str:
    from . import __version__

    return __version__


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------


def _write_atomically(path: str, data: bytes) -> None:
    """Replace ``path`` by ``data``: temporary file, fsync, os.replace, directory fsync.

    The writing and syncing steps are the persistence layer's own
    (``_persist._write_all``, ``_persist._fsync_directory``).
    """
    directory, name = os.path.split(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=directory)
    try:
        try:
            _persist._write_all(fd, memoryview(data))
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
        tmp = None
        _persist._fsync_directory(directory)
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass


def _remove_quietly(directory, names) -> None:
    for name in names:
        try:
            os.unlink(os.path.join(directory, name))
        except OSError:
            pass


def _next_generation(directory: str) -> int:
    """One more than any generation in ``directory`` (manifest or shard file names)."""
    top = 0
    for name in os.listdir(directory):
        match = _shard_file_match(name)
        if match:
            top = max(top, int(match.group(3)))
    try:
        with open(os.path.join(directory, MANIFEST), "rb") as f:
            generation = json.loads(f.read(1 << 20)).get("generation")
        if isinstance(generation, int) and not isinstance(generation, bool):
            top = max(top, generation)
    except (OSError, ValueError, AttributeError):
        pass
    return top + 1


def shard_file_name(shard: int, shards: int, generation: int) -> str:
    """The file name of ``shard`` of ``shards`` in save ``generation``.

    Examples
    --------
    >>> shard_file_name(1, 2, 3)
    'shard0001.total0002.gen000003.sidx'
    """
    return f"shard{shard:04d}.total{shards:04d}.gen{generation:06d}.sidx"


def _shard_file_match(name: str):
    return _SHARD_FILE.match(name) or _SHARD_FILE_FORMAT_1.match(name)


def _manifest_from_format_1(doc: dict, fail) -> dict:
    """A format-1 manifest with its keys spelled as in format 2 (the file names stay as written)."""
    doc = dict(doc)
    params_renamed = {old: new for old, new in _persist.RENAMED_KEYS.items() if new in _PARAM_KEYS}
    doc["params"] = _persist.renamed_keys(doc["params"], params_renamed, lambda m: fail(f"params: {m}"))
    doc["plan"] = _persist.renamed_plan(doc["plan"], lambda m: fail(f"plan: {m}"))
    return doc


def _read_manifest(path: str) -> dict:
    """The manifest at ``path``, every field checked; StoreFormatError(section="manifest") otherwise."""
    def fail(problem):
        raise StoreFormatError("manifest", problem, path)

    def whole(value, name, lo, hi=2**63 - 1):
        if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
            fail(f"{name}={value!r} must be an integer in {lo}..{hi}")
        return value

    try:
        with open(path, "rb") as f:
            raw = f.read((1 << 24) + 1)
    except FileNotFoundError:
        raise FileNotFoundError(f"no sharded store at {os.path.dirname(path)!r}: {MANIFEST} is missing") from None
    if len(raw) > 1 << 24:
        fail("larger than 16 MiB")

    try:
        doc = json.loads(raw.decode("utf-8"), object_pairs_hook=_persist._no_duplicates,
                         parse_constant=_persist._reject_constant)
    except (UnicodeDecodeError, ValueError) as exc:
        fail(f"not valid JSON: {exc}")
    if not isinstance(doc, dict) or set(doc) != _MANIFEST_KEYS:
        got = sorted(doc) if isinstance(doc, dict) else type(doc).__name__
        fail(f"keys {got} must be exactly {sorted(_MANIFEST_KEYS)}")
    if doc["kind"] != MANIFEST_KIND:
        fail(f"kind={doc['kind']!r} must be {MANIFEST_KIND!r}")
    if doc["format"] not in MANIFEST_FORMATS:
        fail(f"format={doc['format']!r} is not a version this library reads ({', '.join(map(str, MANIFEST_FORMATS))})")
    if doc["format"] == 1:
        doc = _manifest_from_format_1(doc, fail)
    if doc["routing"] != "id % shards":
        fail(f"routing={doc['routing']!r} must be 'id % shards'")
    shards = whole(doc["shards"], "shards", 1, 65535)
    whole(doc["generation"], "generation", 1)
    next_id = whole(doc["next_id"], "next_id", 0)
    items = whole(doc["items"], "items", 0, next_id)
    params = doc["params"]
    if not isinstance(params, dict) or set(params) != _PARAM_KEYS:
        fail(f"params must hold exactly {sorted(_PARAM_KEYS)}")
    for key in ("bits", "threshold", "detectors"):
        whole(params[key], f"params.{key}", 1, 2**24)
    if params["sample_size"] is not None:
        whole(params["sample_size"], "params.sample_size", 1, 2**24)
    whole(params["seed"], "params.seed", 0, 2**64 - 1)
    files = doc["files"]
    if not isinstance(files, list) or len(files) != shards:
        fail(f"files must list one entry per shard ({shards})")
    total = 0
    for k, entry in enumerate(files):
        if not isinstance(entry, dict) or set(entry) != _FILE_KEYS:
            fail(f"files[{k}] must hold exactly {sorted(_FILE_KEYS)}")
        whole(entry["shard"], f"files[{k}].shard", k, k)
        pattern = _SHARD_FILE_FORMAT_1 if doc["format"] == 1 else _SHARD_FILE
        match = pattern.match(entry["file"]) if isinstance(entry["file"], str) else None
        if not match or (int(match.group(1)), int(match.group(2)), int(match.group(3))) != (k, shards, doc["generation"]):
            fail(f"files[{k}].file={entry['file']!r} is not this save's file of shard {k}")
        total += whole(entry["items"], f"files[{k}].items", 0)
        whole(entry["next_id"], f"files[{k}].next_id", 0, next_id)
        whole(entry["bytes"], f"files[{k}].bytes", 0)
    if total != items:
        fail(f"items={items} but the shards hold {total}")
    if doc["plan"] is not None and not isinstance(doc["plan"], dict):
        fail("plan must be an object or null")
    try:
        _plan_from_dict(doc["plan"])
    except (TypeError, ValueError) as exc:
        fail(f"plan: {exc}")
    return doc


def _plan_from_dict(d):
    if d is None:
        return None
    fields = dict(d)
    alternatives = tuple(_plan_from_dict(a) for a in fields.pop("alternatives", []))
    if fields.get("limit") is None:
        fields["limit"] = math.inf
    return Plan(**fields, alternatives=alternatives)
