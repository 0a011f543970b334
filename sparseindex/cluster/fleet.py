"""The shard actors of one sharded store and their supervision: start, call, notice loss, recover.

Every call goes to its shards at once and waits in short polls, so a shard
whose worker died is noticed and named (:class:`ShardLostError`) instead of
waited for. A mutation that reached some shards but not others leaves the
store *broken*: it then refuses every call, since the shards no longer
agree, and says that only the last save can be trusted.
"""

from __future__ import annotations

import asyncio
import os
import time

import numpy as np

from .. import validation
from .host import ShardHost, shard_of

__all__ = ["ShardFleet", "ShardLostError", "Lost", "distributed_module", "worker_addresses"]

INSTALL_HINT = 'pip install "sparseindex[cluster]"'
#: Seconds between liveness checks while a shard call is outstanding.
POLL_SECONDS = 0.5
#: Seconds a failed call waits for the cluster to notice a worker's death.
SETTLE_SECONDS = 5.0


def distributed_module():
    """The ``distributed`` package, or an ImportError that says how to get it."""
    try:
        import distributed
    except ImportError as exc:
        raise ImportError(
            "sparseindex.cluster needs Dask's distributed scheduler, which is not installed; "
            f"install it with: {INSTALL_HINT}"
        ) from exc
    return distributed


def worker_addresses(client) -> list:
    """Addresses of the cluster's workers now, sorted (asks the scheduler)."""
    try:
        info = client.scheduler_info(n_workers=-1)
    except TypeError:  # releases before the n_workers argument
        info = client.scheduler_info()
    return sorted(info["workers"])


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


class Lost(Exception):
    """A shard call found its shard gone (turned into ShardLostError by the fleet)."""


class ShardFleet:
    """The ``shards`` actors of one store on ``client``'s cluster, with what is known about each.

    ``lost`` maps a lost shard to the cause, ``dirty`` says which shards
    changed since the last save, ``saved`` is ``(directory, generation,
    files, load options)`` of the last save or load, and ``broken`` says
    why the shards no longer agree (or None).
    """

    def __init__(self, client, shards):
        distributed = distributed_module()
        if not isinstance(client, distributed.Client):
            raise TypeError(f"client={validation.quoted(client)} must be a distributed.Client")
        self.client = client
        self.shards = validation.integer("shards", shards, minimum=1, maximum=65535)
        self.hosts = [None] * self.shards
        self.futures = [None] * self.shards
        self.where = [None] * self.shards
        self.lost = {}
        self.broken = None
        self.dirty = [True] * self.shards
        self.saved = None
        self.closed = False

    def place(self, workers, count):
        known = worker_addresses(self.client)
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

    def start(self, specs, where, which=None) -> None:
        """Create the shard actors ``which`` (default all) pinned to ``where``."""
        which = list(range(self.shards)) if which is None else list(which)
        futures = {}
        for k, spec, address in zip(which, specs, where):
            futures[k] = self.client.submit(
                ShardHost, k, self.shards, spec[0], spec[1], actor=True, workers=[address],
                allow_other_workers=False, pure=False, key=f"sparseindex-shard-{k}-{os.urandom(6).hex()}",
            )
        failure = None
        for k, fut in futures.items():
            try:
                self.hosts[k] = fut.result()
                self.futures[k] = fut
                self.where[k] = where[which.index(k)]
            except Exception as exc:  # the Store could not be made or loaded there
                failure = failure or exc
        if failure is not None:
            self.client.cancel(list(futures.values()), force=True)
            for k in which:
                self.hosts[k] = self.futures[k] = None
            raise failure

    # -- supervision -----------------------------------------------------

    def gone(self, k) -> bool:
        fut = self.futures[k]
        return fut is None or fut.status != "finished"

    def lost_error(self, lost: dict, doing: str) -> ShardLostError:
        shards = sorted(lost)
        where = [self.where[k] for k in shards]
        names = ", ".join(f"shard {k} of {self.shards} (worker {self.where[k]}): {lost[k]}" for k in shards)
        changed = [k for k in shards if self.dirty[k]]
        if self.saved is None:
            advice = ("this store was never saved, so the codes of the lost shard are gone; "
                      "rebuild the store from your data")
        elif self.broken is not None or changed:
            why = self.broken or f"shards {changed} changed after the last save"
            advice = (f"{why}, so only the last save can be trusted: reload it with "
                      f"ShardedStore.load(client, {self.saved[0]!r}) (changes since that save are lost)")
        else:
            directory = self.saved[0]
            advice = (f"recover with store.recover() (rebuilds lost shards unchanged since the last save "
                      f"from {directory!r}) or reload the last save with ShardedStore.load(client, {directory!r})")
        return ShardLostError(f"{doing}: {names}. Nothing was returned, since an answer without "
                              f"that shard would be incomplete; {advice}", shards, where)

    def usable(self, doing: str) -> None:
        if self.closed:
            raise RuntimeError(f"{doing}: this ShardedStore is closed")
        if self.notice_losses():
            raise self.lost_error(self.lost, doing)
        if self.broken is not None:
            raise RuntimeError(f"{doing}: {self.broken}")

    def wait(self, k, fut):
        """The result of one shard call; raises _Lost when the shard is gone."""
        while True:
            try:
                return fut.result(timeout=POLL_SECONDS)
            except (TimeoutError, asyncio.TimeoutError):
                if self.gone(k):
                    raise Lost(self.gone_reason(k)) from None
                if not self.worker_alive(k):
                    raise Lost("its worker left the cluster") from None
            except Exception as exc:
                if self.reachable(k):
                    raise  # the Store itself raised: an ordinary error
                raise Lost(f"{type(exc).__name__}: {exc}") from exc

    def worker_alive(self, k) -> bool:
        """False only when the scheduler answers and no longer lists the shard's worker."""
        try:
            return self.where[k] in worker_addresses(self.client)
        except Exception:  # no answer is no evidence: the actor's own status still decides
            return True

    def gone_reason(self, k) -> str:
        fut = self.futures[k]
        return "it was released" if fut is None else f"its worker is gone (actor status: {fut.status})"

    def reachable(self, k) -> bool:
        """After a failed call: is the shard still there? (a ping, once the cluster has settled)."""
        deadline = time.monotonic() + SETTLE_SECONDS
        while time.monotonic() < deadline:
            if self.gone(k):
                return False
            try:
                return self.hosts[k].ping().result(timeout=POLL_SECONDS) == k
            except (TimeoutError, asyncio.TimeoutError):
                continue
            except Exception:
                time.sleep(0.05)
        return False

    def fanout(self, method: str, calls: dict, doing: str, *, changes: bool = False) -> dict:
        """Call ``method`` on the shards of ``calls`` ({shard: args}) at once; {shard: result}."""
        pending, lost, results = [], {}, {}
        for k, args in calls.items():
            try:
                pending.append((k, getattr(self.hosts[k], method)(*args)))
            except RuntimeError as exc:  # the actor is known to be gone
                lost[k] = str(exc)
        failure = None
        for k, fut in pending:
            try:
                results[k] = self.wait(k, fut)
            except Lost as exc:
                lost[k] = str(exc)
            except Exception as exc:
                failure = failure or exc
        if changes:
            for k in calls:
                self.dirty[k] = True
        if lost:
            self.lost.update(lost)
            if changes:
                self.broken = (f"{doing} failed part-way (shards {sorted(results)} applied it, "
                                f"shards {sorted(lost)} are lost), so the shards no longer agree")
            raise self.lost_error(lost, doing)
        if failure is not None:
            if changes:
                self.broken = f"{doing} failed part-way on a shard ({failure!r}), so the shards no longer agree"
            raise failure
        return results

    def everywhere(self, method, args, doing, **kw) -> list:
        results = self.fanout(method, {k: args for k in range(self.shards)}, doing, **kw)
        return [results[k] for k in range(self.shards)]

    def routed(self, ids: np.ndarray):
        """{shard: positions of ``ids`` on that shard}."""
        where = shard_of(ids, self.shards)
        if self.shards == 1:
            return {0: np.arange(ids.shape[0])}
        order = np.argsort(where, kind="stable")
        cuts = np.searchsorted(where[order], np.arange(self.shards + 1))
        return {k: order[cuts[k] : cuts[k + 1]] for k in range(self.shards) if cuts[k + 1] > cuts[k]}


    def placement(self) -> list:
        """One dict per shard: its worker address, whether it is lost, and whether it changed since the last save."""
        self.notice_losses()
        return [{"shard": k, "worker": self.where[k], "lost": k in self.lost, "changed_since_save": self.dirty[k]}
                for k in range(self.shards)]

    def notice_losses(self) -> list:
        """Mark every shard whose actor is gone as lost; the lost shards, sorted."""
        for k in range(self.shards):
            if k not in self.lost and self.gone(k):
                self.lost[k] = self.gone_reason(k)
        return sorted(self.lost)

    def rebuild(self, lost, specs) -> None:
        """Start ``lost`` shards again from ``specs``, each on the live worker holding the fewest shards."""
        known = worker_addresses(self.client)
        if not known:
            raise RuntimeError("recover: the cluster has no workers left")
        held = {w: sum(1 for k in range(self.shards) if k not in self.lost and self.where[k] == w) for w in known}
        where = []
        for _ in lost:
            w = min(known, key=lambda a: (held[a], a))
            held[w] += 1
            where.append(w)
        old = [self.futures[k] for k in lost]
        self.start(specs, where, which=lost)
        for k in lost:
            del self.lost[k]
        self.client.cancel([f for f in old if f is not None], force=True)

    def close(self) -> None:
        """Release every shard actor (their memory on the workers)."""
        if self.closed:
            return
        self.closed = True
        futures = [f for f in self.futures if f is not None]
        self.hosts = [None] * self.shards
        self.futures = [None] * self.shards
        if futures:
            try:
                self.client.cancel(futures, force=True)
            except Exception:  # the client may already be closed
                pass
