"""The sharded store: one store's contract over the shards of a Dask cluster."""

from __future__ import annotations

import math
import os
import threading
from contextlib import contextmanager

import numpy as np

from .. import health, validation
from ..codes import Codes
from ..errors import StoreFormatError
from ..model.planner import plan as make_plan
from ..store.contract import Params, StoreBase
from ..store.guard import Guard
from ..store.hits import merge_batches, merge_hits
from ..store.single import load_options
from . import manifest
from .fleet import ShardFleet
from .host import share_targets

__all__ = ["ShardedStore"]


class ShardedStore(StoreBase):
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

    The behaviour is :class:`~sparseindex.store.contract.StoreBase`'s, the
    same as :class:`~sparseindex.Store`'s; this class supplies the fan-out
    to the shards (:class:`~sparseindex.cluster.fleet.ShardFleet`) and the
    merging of their answers.

    A hit is probabilistic evidence, not proof: check the stored code
    (``get``, the exact overlap) against your own rules before a hit
    decides anything that can hurt a person (access, money, identity).
    """

    # -- construction ----------------------------------------------------

    def __init__(self, client, shards, bits, *, threshold, sample_size=None, detectors=1, seed=None, workers=None):
        self._setup(client, shards, Params.checked(bits, threshold, sample_size, detectors, seed), None)
        params = self._params.to_dict()
        self._fleet.start([("new", params)] * self.shards, self._fleet.place(workers, self.shards))

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
        shards = validation.integer("shards", shards, minimum=1, maximum=65535)
        share_cap, share_fh = share_targets(false_hit, capacity, shards)
        params = Params.checked(bits, whole.threshold, whole.sample_size, whole.detectors, seed)
        shard_plan = make_plan(bits, weight, false_hit=share_fh, capacity=share_cap, noise=noise, recall=recall,
                               max_detectors=max_detectors)
        if (shard_plan.sample_size, shard_plan.threshold, shard_plan.detectors) == (
                whole.sample_size, whole.threshold, whole.detectors):
            spec = ("plan", dict(bits=bits, weight=weight, false_hit=share_fh, capacity=share_cap, noise=noise,
                                 recall=recall, max_detectors=max_detectors, seed=params.seed,
                                 warn_fraction=warn_fraction))
        else:  # a rounding step at a boundary: keep the whole plan, watch the share target
            spec = ("watch", dict(params.to_dict(), false_hit=share_fh, warn_fraction=warn_fraction))
        self = cls.__new__(cls)
        self._setup(client, shards, params, whole)
        self._fleet.start([spec] * shards, self._fleet.place(workers, shards))
        self.watch(on_status, warn_fraction=warn_fraction)
        return self

    def _setup(self, client, shards, params: Params, plan) -> None:
        self._fleet = ShardFleet(client, shards)
        self._init_contract(params, plan)
        self._guard = Guard("sharded store")
        self._next_id = 0
        self._items = 0
        self._load_options = {"mmap": False, "writable": None}
        self._doing = threading.local()  # the public call a fan-out serves, for its error messages

    # -- figures ---------------------------------------------------------

    shards = property(lambda self: self._fleet.shards, doc="Number of shards.")
    client = property(lambda self: self._fleet.client, doc="The distributed.Client the shards live behind.")

    @property
    def next_id(self) -> int:
        """The id the next added code will get."""
        return self._next_id

    @property
    def directory(self):
        """Directory of the last save or load, or None."""
        return None if self._fleet.saved is None else self._fleet.saved[0]

    def __len__(self) -> int:
        return self._items

    def __repr__(self) -> str:
        fleet = self._fleet
        state = "closed" if fleet.closed else (f"lost shards {sorted(fleet.lost)}" if fleet.lost else "ok")
        return (f"ShardedStore(shards={self.shards}, bits={self.bits}, threshold={self.threshold}, "
                f"sample_size={self.sample_size}, detectors={self.detectors}, items={self._items}, "
                f"seed={self.seed}, {state})")

    def __reduce__(self):
        raise TypeError("a ShardedStore cannot be pickled; save(directory) it and load(client, directory)")

    def placement(self) -> list:
        """One dict per shard: its worker address, whether it is lost, and whether it changed since the last save."""
        return self._fleet.placement()

    def _figures(self):
        with self._reading("stats"):
            parts = self._fan("stats")
        return (sum(s.items for s in parts), sum(s.removed_pending for s in parts), health.summed_usage(parts),
                health.summed_counts([s.weight_hist for s in parts]), sum(s.memory_bytes for s in parts))

    # -- primitives of the contract: fan out, merge ------------------------

    @contextmanager
    def _reading(self, doing):
        with self._guard.reading(), self._serving(doing):
            yield

    @contextmanager
    def _exclusive(self, doing):
        with self._guard.mutating(doing, exclusive=True), self._serving(doing):
            yield

    @contextmanager
    def _serving(self, doing):
        self._fleet.usable(doing)
        outer = getattr(self._doing, "what", None)
        self._doing.what = outer or doing
        try:
            yield
        finally:
            self._doing.what = outer

    def _fan(self, method, args=(), *, changes=False) -> list:
        """``method(*args)`` on every shard, in shard order."""
        return self._fleet.everywhere(method, args, self._doing.what, changes=changes)

    def _by_shard(self, ids: np.ndarray, method: str, *, changes=False, extra=None):
        """Call ``method(ids on that shard[, extra on that shard])`` on each shard holding some of ``ids``."""
        routes = self._fleet.routed(ids)
        calls = {k: (ids[pos],) if extra is None else (extra(pos), ids[pos]) for k, pos in routes.items()}
        return routes, self._fleet.fanout(method, calls, self._doing.what, changes=changes)

    def _put(self, batch, ids) -> None:
        self._by_shard(ids, "add", changes=True,
                       extra=lambda pos: batch if pos.shape[0] == len(batch) else batch[pos])
        self._next_id = int(ids[-1]) + 1
        self._items += ids.shape[0]

    def _remove(self, ids) -> None:
        self._by_shard(ids, "remove", changes=True)
        self._items -= ids.shape[0]

    def _live_mask(self, ids):
        routes, got = self._by_shard(ids, "live")
        live = np.ones(ids.shape[0], dtype=bool)
        for k, pos in routes.items():
            live[pos] = got[k]
        return live

    def _get(self, ids):
        routes, got = self._by_shard(ids, "get")
        live = np.ones(ids.shape[0], dtype=bool)
        for k, pos in routes.items():
            live[pos] = got[k][0]
        if not live.all():
            return None, live  # the contract raises for the first id not stored
        if not routes:
            return Codes.from_indices([], bits=self.bits), live
        positions = np.concatenate([pos for pos in routes.values()])
        gathered = Codes.concat([got[k][1] for k in routes])   # in each code's own form: wide codes stay sparse
        order = np.empty_like(positions)
        order[positions] = np.arange(positions.shape[0])
        return gathered[order], live

    def _live_ids(self):
        parts = self._fan("ids")
        return np.sort(np.concatenate(parts)) if len(parts) > 1 else parts[0]

    def _samples_of(self, ids):
        routes, got = self._by_shard(ids, "detector_samples")
        samples = [None] * ids.shape[0]
        for k, pos in routes.items():
            for p, bits in zip(pos.tolist(), got[k]):
                samples[p] = bits
        return samples

    def _query_one(self, q, m):
        return merge_hits(self._fan("query", (q, m)))

    def _query_batch(self, batch, m):
        return merge_batches(len(batch), self._fan("query_many", (batch, m)))

    def _complete_matches(self, batch, m):
        return merge_batches(len(batch), self._fan("find_matches", (batch, m)))

    def _nearest(self, q, k):
        return merge_hits(self._fan("nearest", (q, k)))

    # -- sharded-only calls ----------------------------------------------

    def compact(self) -> None:
        """Reclaim removed rows on every shard (:meth:`Store.compact`); ids do not change."""
        with self._exclusive("compact"):
            self._fan("compact", changes=True)

    def shard_health(self, *, refresh=False) -> list:
        """Each shard's own :meth:`Store.health`, measured against its share of the target.

        A shard of a ``for_target`` store carries its share's plan
        (:func:`share_targets`); a shard of a store with a whole-store
        target set by :meth:`watch` is measured against the share of that
        target.
        """
        kwargs = {"refresh": validation.flag("refresh", refresh, what="shard_health")}
        with self._reading("shard_health"):
            if self._watch is not None and self._watch.false_hit is not None:
                kwargs["false_hit"] = -math.expm1(math.log1p(-self._watch.false_hit) / self.shards)
                kwargs["warn_fraction"] = self._watch.warn_fraction
            return self._fan("health", (kwargs,))

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
        directory = os.path.abspath(validation.path("directory", directory, what="save"))
        fleet, shards = self._fleet, self._fleet.shards
        with self._guard.writer:
            fleet.usable("save")
            os.makedirs(directory, exist_ok=True)
            generation = manifest.next_generation(directory)
            names = {k: manifest.shard_file_name(k, shards, generation) for k in range(shards)}
            stats = fleet.everywhere("describe", (), "save")
            try:
                sizes = fleet.fanout("save", {k: (os.path.join(directory, names[k]),) for k in names}, "save")
            except BaseException:
                manifest.remove_quietly(directory, [names[k] for k in names])
                raise
            files = [{"shard": k, "file": names[k], "items": int(stats[k]["items"]),
                      "next_id": int(stats[k]["next_id"]), "bytes": int(sizes[k])} for k in range(shards)]
            manifest.write_manifest(directory, generation=generation, params=self._params.to_dict(), plan=self._plan,
                                    shards=shards, next_id=self._next_id, items=self._items, files=files)
            keep = {f["file"] for f in files}
            manifest.remove_quietly(directory, [n for n in os.listdir(directory)
                                                if manifest.shard_file_match(n) and n not in keep])
            fleet.saved = (directory, generation, files, dict(self._load_options))
            fleet.dirty = [False] * shards

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
        directory = os.path.abspath(validation.path("directory", directory, what="load"))
        mmap, writable_now = load_options(mmap, writable)
        doc = manifest.read_manifest(os.path.join(directory, manifest.MANIFEST))
        self = cls.__new__(cls)
        self._setup(client, doc["shards"], Params(**doc["params"]), manifest.plan_from_dict(doc["plan"]))
        self._load_options = {"mmap": mmap, "writable": writable}
        self._next_id, self._items = doc["next_id"], doc["items"]
        fleet = self._fleet
        fleet.saved = (directory, doc["generation"], doc["files"], dict(self._load_options))
        fleet.start(self._load_specs(range(fleet.shards)), fleet.place(workers, fleet.shards))
        self._verify(range(fleet.shards))
        fleet.dirty = [False] * fleet.shards
        return self

    def _load_specs(self, which):
        directory, _, files, options = self._fleet.saved
        return [("load", {"path": os.path.join(directory, files[k]["file"]), **options}) for k in which]

    def _verify(self, which) -> None:
        """Every shard in ``which`` agrees with the manifest, or StoreFormatError (and the shards are released)."""
        directory, _, files, _ = self._fleet.saved
        info = self._fleet.fanout("describe", {k: (True,) for k in which}, "load")
        params = self._params.to_dict()
        for k in which:
            d, f = info[k], files[k]
            path = os.path.join(directory, f["file"])
            problem = None
            for key in sorted(manifest.PARAM_KEYS):
                if d[key] != params[key]:
                    problem = f"{key}={d[key]!r} in the shard file, {params[key]!r} in the manifest"
                    break
            if problem is None and (d["items"], d["next_id"]) != (f["items"], f["next_id"]):
                problem = (f"holds {d['items']} codes up to next_id {d['next_id']}, the manifest says "
                           f"{f['items']} up to {f['next_id']}")
            if problem is None and not d["routing_ok"]:
                problem = f"holds ids that do not belong to shard {k} of {self._fleet.shards} (id % shards)"
            if problem is not None:
                self.close()
                raise StoreFormatError("manifest", f"shard {k}: {problem}", path)
            if d["read_only"]:
                self._guard.read_only = "memory-mapped" if self._load_options["mmap"] else "opened with writable=False"

    def recover(self) -> list:
        """Rebuild lost shards from the last save; returns the shard numbers rebuilt.

        Possible when every lost shard is unchanged since the last save
        (or load): its file then holds exactly what it held, and the other
        shards are untouched. Otherwise raises :class:`ShardLostError`
        saying why; reload the last save with :meth:`load` (changes since
        that save are lost) — see ``docs/cluster.md``. A rebuilt shard goes
        to the live worker holding the fewest shards.
        """
        with self._guard.writer, self._guard.writing():
            fleet = self._fleet
            if fleet.closed:
                raise RuntimeError("recover: this ShardedStore is closed")
            lost = fleet.notice_losses()
            if not lost:
                return []
            if fleet.broken is not None or fleet.saved is None or any(fleet.dirty[k] for k in lost):
                raise fleet.lost_error({k: fleet.lost[k] for k in lost}, "recover")
            fleet.rebuild(lost, self._load_specs(lost))
            self._verify(lost)
            return lost

    def close(self) -> None:
        """Release every shard actor (their memory on the workers). The store cannot be used after."""
        self._fleet.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
