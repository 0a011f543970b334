"""What every store promises, written once: :class:`StoreBase`.

Both :class:`~sparseindex.Store` and :class:`~sparseindex.cluster.ShardedStore`
inherit it. The base holds the behaviour — argument checks, the id policy,
``find_or_add``'s greedy rule and the batch self-join, the served counters,
watch and alerts, health and the false-hit measurement — and a concrete
store supplies primitives, each called inside a section the base opens:

=====================  ==================================================
``_reading(doing)``    a context in which the primitives below may read
``_exclusive(doing)``  a context for one mutation (no other interleaves)
``_put(batch, ids)``   store codes under new ids (in ``_exclusive``)
``_remove(ids)``       remove live ids (in ``_exclusive``)
``_query_one``         the hits of one query (``Hits``)
``_query_batch``       the hits of a batch (``BatchHits``)
``_complete_matches``  every code of overlap >= m, exact (``BatchHits``)
``_nearest``           the exact top ``k``
``_get(ids)``          ``(Codes, live mask)`` of ids below ``next_id``
``_live_mask(ids)``    which ids are stored
``_live_ids()``        every stored id, ascending
``_samples_of(ids)``   detector samples of live ids
``_figures()``         items, pending removals, usage, weights, memory
=====================  ==================================================
"""

from __future__ import annotations

import threading
import warnings
from dataclasses import dataclass

import numpy as np

from .. import health, validation
from ..codes import Codes, as_code, as_codes, query_words, row_table
from .bank import BLOCK_SPAN, DetectorBank
from .hits import BatchHits, Hits, batch_of, no_hits

__all__ = ["StoreBase", "HealthMixin", "Params", "greedy_first_match", "matches_within"]


@dataclass(frozen=True)
class Params:
    """The configuration every store and shard shares (checked on construction)."""

    bits: int
    threshold: int
    sample_size: "int | None"
    detectors: int
    seed: int

    @classmethod
    def checked(cls, bits, threshold, sample_size, detectors, seed) -> "Params":
        """Validated parameters; ``seed=None`` draws a fresh 64-bit seed.

        Examples
        --------
        >>> Params.checked(64, 3, 2, 1, 0)
        Traceback (most recent call last):
        ...
        ValueError: threshold=3 must be <= sample_size=2
        """
        bits = validation.width(bits)
        threshold = validation.integer("threshold", threshold, minimum=1)
        sample_size = validation.optional_integer("sample_size", sample_size, minimum=1)
        if sample_size is not None and threshold > sample_size:
            raise ValueError(f"threshold={threshold} must be <= sample_size={sample_size}")
        if threshold > bits:
            raise ValueError(f"threshold={threshold} must be <= bits={bits}: no code could ever be recalled")
        detectors = validation.integer("detectors", detectors, minimum=1)
        return cls(bits, threshold, sample_size, detectors, validation.seed("seed", seed))

    def to_dict(self) -> dict:
        return dict(bits=self.bits, threshold=self.threshold, sample_size=self.sample_size,
                    detectors=self.detectors, seed=self.seed)


class HealthMixin:
    """The monitoring half of the contract: snapshot, health report, false-hit measurement, watch and alerts.

    Needs from the store: ``_params``, ``_plan``, the served counters,
    ``_figures()``, ``_reading(doing)``, ``_live_ids()``, ``_samples_of(ids)``
    and ``_query_batch`` (set up by :meth:`StoreBase._init_contract`).
    """

    def stats(self) -> "health.StoreStats":
        """A snapshot of the store's figures: parameters, plan, counts, bit usage, weights, counters, memory.

        Copies (O(bits)); :meth:`health` is computed from it outside every
        lock. A sharded store's figures are its shards' summed field by
        field, its counters and plan the whole store's own.

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(64, threshold=2, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5, 6]])
        >>> st = s.stats()
        >>> st.items, int(st.usage[3]), st.weight_hist[3:5].tolist(), st.served["added"]
        (2, 2, [1, 1], 2)
        """
        items, removed_pending, usage, weight_hist, memory = self._figures()
        with self._served_lock:
            served = dict(self._served)
        watch = self._watch
        p = self._params
        return health.StoreStats(
            bits=p.bits, threshold=p.threshold, sample_size=p.sample_size, detectors=p.detectors, seed=p.seed,
            plan=self._plan, items=items, removed_pending=removed_pending, usage_bits=usage[0], usage=usage[1],
            weight_hist=weight_hist,
            memory_bytes=memory, served=served, measurement=self._measurement,
            watch_false_hit=None if watch is None else watch.false_hit,
            watch_warn_fraction=None if watch is None else watch.warn_fraction,
        )

    def detector_samples(self, count, *, seed) -> list:
        """The detector samples of up to ``count`` live codes chosen by ``seed``: one (D, s) array each.

        The codes are a uniform sample without replacement, drawn with
        ``numpy.random.default_rng([store seed, seed])`` from the live ids in
        ascending order and returned in id order, so every store of the same
        codes picks the same ones. O(count · weight).

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(64, threshold=2, sample_size=2, detectors=3, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5, 6]])
        >>> [a.shape for a in s.detector_samples(5, seed=1)]
        [(3, 2), (3, 2)]
        """
        count = validation.integer("count", count, minimum=0, what="detector_samples")
        seed = validation.integer("seed", seed, minimum=0, what="detector_samples")
        with self._reading("detector_samples"):
            live = self._live_ids()
            rng = np.random.default_rng([self.seed, seed])
            pick = np.sort(rng.choice(live, size=min(count, live.shape[0]), replace=False))
            return self._samples_of(pick) if pick.size else []

    def health(self, *, false_hit=None, warn_fraction=None, refresh=False):
        """How full the store is: a :class:`~sparseindex.health.Health` report.

        Cheap enough for every scrape: it reads the running per-bit usage
        counts and weight histogram kept by every change (a loaded store
        counts them once, on its first report) and memoised model figures.
        The usage-aware estimate (a sample of stored codes,
        ``model.usage_false_hits``) is recomputed once 5% of the store has
        changed, or now with ``refresh=True``.

        Parameters
        ----------
        false_hit : float or None
            Target chance of a false hit per unrelated query; default the
            one given to :meth:`watch`, else the plan's.
        warn_fraction : float or None
            Fill fraction where the status turns from healthy to filling
            (default the watch's, else 0.8).

        Examples
        --------
        >>> from sparseindex import Codes, Store
        >>> s = Store.for_target(1536, 30, false_hit=1e-6, capacity=50_000, seed=1)
        >>> _ = s.add(Codes.random(1_000, 1536, 30, seed=2))
        >>> h = s.health()
        >>> h.status, h.items, h.limit >= 50_000
        ('healthy', 1000, True)
        """
        if false_hit is not None:
            false_hit = validation.chance("false_hit", false_hit, what="health")
        if warn_fraction is not None:
            warn_fraction = validation.fraction("warn_fraction", warn_fraction, what="health")
        return health.compute(self.stats(), self.detector_samples, self._health_memo, false_hit=false_hit,
                              warn_fraction=warn_fraction, refresh=validation.flag("refresh", refresh, what="health"))

    def measure_false_hits(self, queries=10_000, *, source="uniform", seed=None, batch=2048):
        """Run random unrelated queries and measure the false-hit rate.

        ``source="uniform"``: queries of the nominal weight (the plan's
        ``weight``, else the mean stored weight) with uniformly random bits;
        ``"usage"``: drawn from the store's measured bit usage (the
        usage-aware model's conditional Poisson queries). Every hit is false
        by construction. Returns a :class:`~sparseindex.health.FalseHitMeasurement`
        with the Clopper–Pearson 95% interval beside the model's prediction;
        :meth:`health` shows the latest one. Measurement queries do not count
        as served queries.

        Examples
        --------
        >>> from sparseindex import Codes, Store
        >>> s = Store(256, threshold=3, seed=1); _ = s.add(Codes.random(2_000, 256, 8, seed=1))
        >>> r = s.measure_false_hits(2_000, seed=3)
        >>> r.queries, 0 < r.rate < 1, r.low <= r.rate <= r.high
        (2000, True, True)
        """
        health.check_measurement(queries, source)
        batch = validation.integer("batch", batch, minimum=1, what="measure_false_hits")
        stats = self.stats()
        report = health.compute(stats, self.detector_samples, self._health_memo)

        def count_hits(queries_batch):
            with self._reading("measure_false_hits"):
                return self._query_batch(queries_batch, 0).counts

        usage = stats.per_bit_usage() if source == "usage" else None
        result = health.measure_false_hits(report, usage, count_hits, queries, source=source, seed=seed, batch=batch)
        self._measurement = result
        return result

    def watch(self, on_status=None, *, warn_fraction=0.8, false_hit=None) -> None:
        """Alert on status changes: ``on_status(previous, current, health)``.

        The callback runs once each time a change moves the status between
        ``"healthy"``, ``"filling"`` (``warn_fraction`` of limit reached) and
        ``"saturated"`` (past the limit), in the thread that made the
        change, after the change is committed; an exception it raises
        becomes a ``RuntimeWarning``. Crossing the limit also issues a
        :class:`~sparseindex.SaturationWarning`. ``false_hit`` sets the
        target for a store without a plan.

        Examples
        --------
        >>> import warnings
        >>> from sparseindex import Codes, Store
        >>> seen = []
        >>> s = Store(64, threshold=2, seed=0)
        >>> s.watch(lambda old, new, h: seen.append((old, new)), false_hit=0.05, warn_fraction=0.5)
        >>> with warnings.catch_warnings(record=True):
        ...     for k in range(40):
        ...         _ = s.add(Codes.random(1, 64, 4, seed=k))
        >>> seen
        [('healthy', 'filling'), ('filling', 'saturated')]
        """
        validation.callback("on_status", on_status, what="watch")
        warn_fraction = validation.fraction("warn_fraction", warn_fraction, what="watch")
        if false_hit is not None:
            false_hit = validation.chance("false_hit", false_hit, what="watch")
        elif self._plan is None:
            raise ValueError("watch: this store has no plan; give false_hit=... (target chance per query)")
        watcher = health.Watch(on_status, warn_fraction, false_hit)
        self._watch = watcher
        watcher.status = self.health().status

    def _after_change(self) -> None:
        """Re-evaluate the status after a mutation; alerts fire here, outside every lock."""
        watcher = self._watch
        if watcher is None:
            return
        with self._served_lock:
            churn = self._served["added"] + self._served["removed"]
        try:
            watcher.changed(len(self), churn, self.health)
        except Exception as exc:  # the change is done; a failed status check must not hide that
            warnings.warn(f"the status check after a change failed: {exc}", RuntimeWarning, stacklevel=3)


class StoreBase(HealthMixin):
    """The store contract: public behaviour over a concrete store's primitives (see the module docstring).

    A hit is probabilistic evidence, not proof: check the stored code
    (``get``, the exact overlap) against your own rules before a hit decides
    anything that can hurt a person (access, money, identity).
    """

    def _init_contract(self, params: Params, plan=None) -> None:
        self._params = params
        self._plan = plan
        self._served = {"queries": 0, "hits": 0, "added": 0, "removed": 0}
        self._served_lock = threading.Lock()
        self._measurement = None
        self._watch = None  # a health.Watch once watch() or for_target set one
        self._health_memo = health.HealthMemo()

    # -- parameters -------------------------------------------------------

    bits = property(lambda self: self._params.bits, doc="Width of every code.")
    threshold = property(lambda self: self._params.threshold, doc="Sampled bits a detector needs to fire.")
    sample_size = property(lambda self: self._params.sample_size, doc="Set bits each detector samples (None: all).")
    detectors = property(lambda self: self._params.detectors, doc="Detectors per stored code.")
    seed = property(lambda self: self._params.seed, doc="Seed of the detector sampling.")

    @property
    def plan(self):
        """The :class:`~sparseindex.Plan` this store was configured from, or None."""
        return self._plan

    def __iter__(self):
        raise TypeError(f"a {type(self).__name__} is not iterable; use store.ids() and store.get(ids)")

    def _count(self, **amounts) -> None:
        with self._served_lock:
            for key, value in amounts.items():
                self._served[key] += int(value)

    def _refuse_light(self, batch: Codes, what: str, why: str) -> None:
        weights = batch.weights
        light = np.flatnonzero(weights < self.threshold)
        if light.size:
            r = int(light[0])
            raise ValueError(f"{what}: row {r} has {int(weights[r])} set bits, fewer than "
                             f"threshold={self.threshold}: {why}")

    # -- mutations --------------------------------------------------------

    def add(self, codes, *, ids=None) -> np.ndarray:
        """Store a batch of codes; return their new ids (int64).

        Accepts a :class:`~sparseindex.Codes`, a list/tuple of index
        sequences, a 2-D bool ndarray, a scipy.sparse matrix or a list of
        ``bitarray``. Every row is checked before anything is stored: one
        bad row and the batch adds nothing. O(batch set bits + D·s per code).

        ``ids`` (optional) gives the new codes' ids yourself: strictly
        ascending, from ``next_id`` up, gaps allowed. A code's detector
        samples depend only on the seed and its id, so the same code with
        the same id is sampled alike in any store of the same seed.

        Raises
        ------
        ValueError
            A bad row (message names it), or a code with fewer set bits
            than ``threshold`` (no detector of it could ever fire).

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=16, threshold=2, seed=0)
        >>> s.add([[0, 1], [2, 3, 4]]).tolist(), len(s)
        ([0, 1], 2)
        >>> s.add([[5, 6], [7]])
        Traceback (most recent call last):
        ...
        ValueError: add: row 1 has 1 set bits, fewer than threshold=2: no detector could ever fire for it
        >>> len(s)
        2
        >>> s.add([[8, 9]], ids=[10]).tolist(), s.next_id
        ([10], 11)
        """
        batch = as_codes(codes, self.bits, what="add")
        m = len(batch)
        given = None if ids is None else validation.new_ids(ids, m, "add")
        if m == 0:
            return np.zeros(0, dtype=np.int64)
        self._refuse_light(batch, "add", "no detector could ever fire for it")
        with self._exclusive("add"):
            first = self.next_id
            if given is not None and given[0] < first:
                raise ValueError(f"add: ids[0]={int(given[0])} is below next_id={first}: ids are never reused")
            new = np.arange(first, first + m, dtype=np.int64) if given is None else given
            self._put(batch, new)
        self._count(added=m)
        self._after_change()
        return new.copy()

    def find_or_add(self, codes, *, min_overlap):
        """Add only what is new: return each code's match or its new id.

        For each code in order: if a stored code — or an earlier code of the
        same batch that was added — has full overlap ``>= min_overlap`` with
        it, its id is that code's (greatest overlap, ties to the smallest id)
        and ``is_new`` is False; otherwise it is added. Returns ``(ids,
        is_new)``. Exact: the stored matches are complete
        (:meth:`find_matches`) and the batch is matched against itself. The
        whole call is one mutation: no other change interleaves, and
        queries see all of its additions or none.

        Raises
        ------
        ValueError
            A bad row (nothing is added), or a code lighter than
            ``threshold`` (it could never be recalled if added).

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=64, threshold=2, seed=0)
        >>> _ = s.add([[1, 2, 3, 4, 5]])
        >>> ids, new = s.find_or_add([[1, 2, 3, 4, 6], [20, 21, 22], [20, 21, 22, 23]], min_overlap=3)
        >>> ids.tolist(), new.tolist()
        ([0, 1, 1], [False, True, False])
        """
        batch = as_codes(codes, self.bits, what="find_or_add")
        m = validation.integer("min_overlap", min_overlap, minimum=1, what="find_or_add")
        n = len(batch)
        if n == 0:
            return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=bool)
        self._refuse_light(batch, "find_or_add", "it could never be recalled if added")
        with self._exclusive("find_or_add"):
            stored = self._complete_matches(batch, m)
            ids, is_new = greedy_first_match(stored, matches_within(batch, m), self.next_id)
            fresh = np.flatnonzero(is_new)
            if fresh.size:
                self._put(batch if fresh.size == n else batch[fresh], ids[fresh])
        if fresh.size:
            self._count(added=fresh.size)
            self._after_change()
        return ids, is_new

    def remove(self, ids) -> None:
        """Remove codes by id; they never come back and their ids are not reused.

        All ids are checked first: an unknown, already removed or repeated
        id raises ``KeyError`` naming it and nothing is removed. Postings
        stay until ``compact``; removed codes are never returned.

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=8, threshold=1, seed=0); _ = s.add([[1], [2]])
        >>> s.remove([0]); 0 in s, len(s)
        (False, 1)
        >>> s.remove(0)
        Traceback (most recent call last):
        ...
        KeyError: 'remove: id 0 was removed'
        """
        with self._exclusive("remove"):
            arr = validation.ids_below(ids, self.next_id, "remove")
            live = self._live_mask(arr)
            if not live.all():
                raise KeyError(f"remove: id {int(arr[np.flatnonzero(~live)[0]])} was removed")
            uniq, counts = np.unique(arr, return_counts=True)
            if (counts > 1).any():
                raise KeyError(f"remove: id {int(uniq[np.flatnonzero(counts > 1)[0]])} appears more than once in one call")
            if arr.size:
                self._remove(arr)
        self._count(removed=arr.shape[0])
        self._after_change()

    # -- reading ----------------------------------------------------------

    def query(self, code, *, min_overlap=None) -> Hits:
        """The stored codes with at least one firing detector for this query.

        ``min_overlap`` additionally drops hits whose exact full overlap
        with the query is below it. O(postings of the query's set bits + hits).

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=32, threshold=2, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5]])
        >>> s.query([1, 2, 3, 4]).ids.tolist()
        [0, 1]
        >>> s.query([1, 2, 3, 4], min_overlap=3).ids.tolist()
        [0]
        """
        q = as_code(code, self.bits, what="query")
        m = validation.integer("min_overlap", 0 if min_overlap is None else min_overlap, minimum=0, what="query")
        with self._reading("query"):
            hits = self._query_one(q, m)
        self._count(queries=1, hits=len(hits))
        return hits

    def query_many(self, codes, *, min_overlap=None) -> BatchHits:
        """:meth:`query` for a batch, in parallel threads.

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=32, threshold=2, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5]])
        >>> [h.ids.tolist() for h in s.query_many([[1, 2], [4, 5], [9, 10]])]
        [[0], [1], []]
        """
        batch = as_codes(codes, self.bits, what="query_many")
        m = validation.integer("min_overlap", 0 if min_overlap is None else min_overlap, minimum=0, what="query_many")
        with self._reading("query_many"):
            result = self._query_batch(batch, m) if len(batch) else no_hits(0)
        self._count(queries=len(batch), hits=result.ids.shape[0])
        return result

    def find_matches(self, codes, *, min_overlap) -> BatchHits:
        """Every stored code whose full overlap with each query is at least ``min_overlap``.

        Unlike :meth:`query_many` (which returns what the detectors find),
        this is complete: codes the detectors are not sure to find are
        scanned as well, and every match is verified. Ordered as :class:`Hits`.

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=64, threshold=2, sample_size=2, seed=0)
        >>> _ = s.add([[1, 2, 3, 4, 5, 6]])
        >>> s.find_matches([[1, 2, 3, 40]], min_overlap=3)[0].ids.tolist()
        [0]
        """
        batch = as_codes(codes, self.bits, what="find_matches")
        m = validation.integer("min_overlap", min_overlap, minimum=1, what="find_matches")
        with self._reading("find_matches"):
            result = self._complete_matches(batch, m) if len(batch) else no_hits(0)
        self._count(queries=len(batch), hits=result.ids.shape[0])
        return result

    def nearest(self, code, k) -> Hits:
        """The exact ``k`` stored codes of greatest overlap (ties to the lower id).

        Scans every stored code, so it is right even when no detector fires:
        O(N · words per code). Fewer than ``k`` come back only when fewer
        are stored.

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=32, threshold=3, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5], [7, 8, 9]])
        >>> s.nearest([3, 4, 20], k=2).ids.tolist()
        [1, 0]
        """
        q = as_code(code, self.bits, what="nearest")
        k = validation.integer("k", k, minimum=0, what="nearest")
        with self._reading("nearest"):
            if k == 0 or len(self) == 0:
                return Hits(np.zeros(0, np.int64), np.zeros(0, np.int64))
            best = self._nearest(q, min(k, len(self)))
        return Hits(best.ids[:k], best.overlaps[:k])

    def get(self, ids) -> Codes:
        """The stored codes with these ids, in the order given.

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=8, threshold=1, seed=0); _ = s.add([[1, 2], [5]])
        >>> s.get([1, 0]).to_indices()[0].tolist()
        [5]
        """
        with self._reading("get"):
            arr = validation.ids_below(ids, self.next_id, "get")
            codes, live = self._get(arr)
        if not live.all():
            raise KeyError(f"get: id {int(arr[np.flatnonzero(~live)[0]])} was removed")
        return codes

    def __contains__(self, code_id) -> bool:
        if not validation.is_integer(code_id) or not 0 <= code_id < self.next_id:
            return False
        with self._reading("contains"):
            return bool(self._live_mask(np.array([int(code_id)], dtype=np.int64))[0])

    def ids(self) -> np.ndarray:
        """Ids of every stored (not removed) code, ascending.

        Examples
        --------
        >>> from sparseindex import Store
        >>> s = Store(bits=16, threshold=1, seed=0); _ = s.add([[1], [2]]); s.remove([0])
        >>> s.ids().tolist()
        [1]
        """
        with self._reading("ids"):
            return self._live_ids()

    # -- primitives a concrete store supplies -------------------------------

    def _reading(self, doing):  # pragma: no cover - abstract
        raise NotImplementedError

    def _exclusive(self, doing):  # pragma: no cover - abstract
        raise NotImplementedError


def greedy_first_match(stored: BatchHits, within: BatchHits, first_new: int):
    """``find_or_add``'s rule: each code in turn takes its best match or the next new id.

    A code's candidates are its stored matches and the earlier codes of the
    batch that were added; the best is the greatest overlap, ties to the
    smallest id. Returns ``(ids, is_new)``.

    Examples
    --------
    >>> none = BatchHits(np.zeros(3, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64))
    >>> pairs = BatchHits(np.array([0, 2, 4]), np.array([0, 1, 1, 0]), np.array([5, 4, 5, 4]))
    >>> ids, new = greedy_first_match(none, pairs, 10)
    >>> ids.tolist(), new.tolist()
    ([10, 10], [True, False])
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


def matches_within(batch: Codes, m: int) -> BatchHits:
    """For each code of a batch, the batch codes (by position) with overlap >= m, itself included.

    A detector that holds all of a code's bits with threshold ``m`` fires
    exactly when the overlap reaches ``m``, so a scratch bank of such
    detectors finds every pair, exactly.

    Examples
    --------
    >>> from sparseindex import Codes
    >>> hits = matches_within(Codes.from_indices([[1, 2, 3], [2, 3, 4], [7, 8]], 16), 2)
    >>> [h.ids.tolist() for h in hits]
    [[0, 1], [1, 0], [2]]
    """
    n = len(batch)
    usable = np.flatnonzero(batch.weights >= m)
    if usable.size == 0:
        return no_hits(n)
    sub = batch[usable]
    bank = DetectorBank(batch.bits, m, None, 1, 0, BLOCK_SPAN)
    bank.commit_append(bank.prepare_append(row_table(sub), np.arange(usable.size, dtype=np.int64), sub.weights,
                                           count_usage=False))
    q_indptr, q_bits = batch.to_csr()
    table = row_table(sub)
    counts, rows, overlaps = bank.scan_many(q_indptr, q_bits, query_words(batch, table), table,
                                            np.zeros(usable.size, dtype=bool), m)
    return batch_of(n, [counts], [usable[rows]], [overlaps])

