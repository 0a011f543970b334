"""The Store: packed codes, their detector banks, and threshold queries.

A stored code is a *hit* for a query when any detector of its bank fires:
at least ``threshold`` of the detector's ``sample_size`` sampled bits are set in
the query. Hits come back with their exact full-code overlap (AND +
popcount over the packed rows), so a caller can rank or filter them.

``Store`` supplies the primitives of :class:`~sparseindex.store.contract.StoreBase`
over its parts: the row table (codes, weights, removal flags, id <-> row),
the detector bank (postings and scans), the guard (locks and the
read-only rule) and the usage counts that health reads.
"""

from __future__ import annotations

import threading

import numpy as np

from .. import health, validation
from .._numba import kernels
from .._numba.config import PARALLEL_LOCK
from ..codes import Codes, query_words, row_table
from . import format as _persist
from .bank import BLOCK_SPAN, DetectorBank
from .contract import Params, StoreBase
from .guard import Guard
from .hits import BatchHits, Hits, batch_of, no_hits
from .rows import RowTable, UsageCounts, layout_for

__all__ = ["Store", "Hits", "BatchHits", "load_options", "restore_pickled"]


def load_options(mmap, writable):
    """``(mmap, writable)`` of a load call, checked; ``writable=None`` means not ``mmap``."""
    mmap = validation.flag("mmap", mmap, what="load")
    if writable is not None:
        writable = validation.flag("writable", writable, what="load")
    return mmap, (not mmap) if writable is None else writable


class Store(StoreBase):
    """A content-addressable store of sparse binary codes.

    Parameters
    ----------
    bits : int
        Width of every code (n).
    threshold : int
        A detector fires when at least this many of its sampled bits are set
        in the query (θ).
    sample_size : int or None
        Set bits each detector samples from its code (s); None samples all
        of them. A code lighter than ``sample_size`` is sampled whole.
    detectors : int
        Detectors per stored code (D), sampled independently.
    seed : int or None
        Seeds the detector sampling; a code's samples depend only on this
        seed and the code's id. None draws a fresh seed (kept in
        ``store.seed``).

    Notes
    -----
    Memory per code is ``8 * ceil(bits / 64)`` bytes of packed code, ``2 *
    detectors * sample_size`` bytes of postings (uint16) and 5 bytes of
    bookkeeping (13 once a compaction has dropped removed codes). A
    query costs one counter update per posting of its set bits (about
    ``q * N * D * s / bits``) plus one AND + popcount per hit.

    Built from a row table (:class:`~sparseindex.store.rows.RowTable`), a
    detector bank, a guard and usage counts; the query, mutation and health
    behaviour is :class:`~sparseindex.store.contract.StoreBase`'s, shared
    with the sharded store.

    Thread safety: one Store may serve many threads. Queries hold a
    readers–writer lock shared and run side by side (kernels release the
    GIL). ``add``, ``remove``, ``compact`` and ``save`` take turns on a
    writer mutex and do their work while queries go on; only the short
    commit step holds the lock exclusively, so a query sees each call's
    effect entirely or not at all (never half a batch).

    Examples
    --------
    >>> store = Store(bits=64, threshold=3, seed=1)
    >>> store.add([[1, 2, 3, 4], [10, 11, 12]]).tolist()
    [0, 1]
    >>> store.query([1, 2, 3, 50]).ids.tolist()
    [0]
    >>> store.query([10, 11, 12, 1]).overlaps.tolist()
    [3]

    Parameters, counts and memory are read-only properties:

    >>> s = Store(64, threshold=2, sample_size=3, detectors=2, seed=5); _ = s.add([[1, 2, 3, 4]])
    >>> s.bits, s.threshold, s.sample_size, s.detectors, s.seed, s.plan, s.read_only
    (64, 2, 3, 2, 5, None, False)
    >>> s.next_id, s.removed_count, s.postings_count, s.nbytes > 0
    (1, 0, 6, True)
    """

    #: Detectors per postings block; tests lower it to exercise many blocks.
    _block_span = BLOCK_SPAN
    #: Row layout: "auto" (by width, :func:`~sparseindex.store.rows.layout_for`); tests force one.
    _row_layout = "auto"
    #: Postings column map: None (by width, see ``store.bank``); tests force True or False.
    _column_map = None

    def __init__(self, bits, *, threshold, sample_size=None, detectors=1, seed=None):
        self._init_parts(Params.checked(bits, threshold, sample_size, detectors, seed), None)

    def _init_parts(self, params: Params, plan, *, table=None, bank=None, counted=True) -> None:
        self._init_contract(params, plan)
        p = params
        self._bank = bank or DetectorBank(p.bits, p.threshold, p.sample_size, p.detectors, p.seed, self._block_span,
                                          column_map=self._column_map)
        self._table = table or RowTable(p.bits, layout_for(p.bits) if self._row_layout == "auto" else self._row_layout)
        self._counts = UsageCounts(p.bits, counted, sparse=self._table.layout == "sparse")
        self._guard = Guard("store")
        self._local = threading.local()  # per-thread scan counters
        self._mapping = None  # keeps a memory-mapped file open

    @classmethod
    def for_target(
        cls, bits, weight, *, false_hit, capacity, noise=0.0, recall=0.999, max_detectors=8, seed=None,
        warn_fraction=0.8, on_status=None,
    ) -> "Store":
        """A store configured by :func:`sparseindex.plan` from targets.

        The plan (``store.plan``) keeps the targets so that reports can
        measure against them. Codes of a weight other than ``weight`` are
        still accepted; a detector samples ``min(sample_size, weight)`` bits.
        ``warn_fraction`` and ``on_status`` are passed to :meth:`watch`.

        Raises
        ------
        PlanError
            No configuration meets both targets; the message says which
            target fails and the best reachable values.

        Examples
        --------
        >>> s = Store.for_target(1536, 30, false_hit=1e-6, capacity=100_000, noise=0.2, seed=1)
        >>> s.plan.false_hit_per_query <= 1e-6 and s.plan.recall >= 0.999
        True
        """
        from ..model.planner import plan as make_plan

        chosen = make_plan(
            bits, weight, false_hit=false_hit, capacity=capacity, noise=noise, recall=recall,
            max_detectors=max_detectors,
        )
        self = cls.__new__(cls)
        self._init_parts(Params.checked(bits, chosen.threshold, chosen.sample_size, chosen.detectors, seed), chosen)
        self.watch(on_status, warn_fraction=warn_fraction)
        return self

    # -- figures ------------------------------------------------------------

    @property
    def next_id(self) -> int:
        """The id the next added code will get."""
        return self._table.next_id

    @property
    def removed_count(self) -> int:
        """Removed codes whose rows ``compact`` has not reclaimed yet."""
        return self._table.removed_count

    @property
    def postings_count(self) -> int:
        """Postings held (D·s per code, plus removed ones until ``compact``)."""
        return self._bank.postings_count

    @property
    def nbytes(self) -> int:
        """Bytes held by codes, postings and bookkeeping (spare room included).

        For a memory-mapped store this counts the mapped file's arrays too,
        although the operating system pages them in and out as needed.
        """
        with self._guard.reading():
            return self._table.nbytes + self._bank.nbytes

    def __len__(self) -> int:
        return self._table.live

    @property
    def row_layout(self) -> str:
        """How stored rows are held: ``"packed"`` words or ``"sparse"`` sorted indices (chosen by width)."""
        return self._table.layout

    @property
    def read_only(self) -> bool:
        """True when the store refuses changes (a memory-mapped load, by default)."""
        return self._guard.read_only is not None

    def __repr__(self) -> str:
        p = self._params
        return (f"Store(bits={p.bits}, threshold={p.threshold}, sample_size={p.sample_size}, "
                f"detectors={p.detectors}, items={len(self)}, removed={self.removed_count}, seed={p.seed}, "
                f"rows={self._table.layout})")

    def _figures(self):
        if not self._counts.counted:  # a loaded store counts once, O(N); changes keep it current after
            with self._guard.writer, self._guard.reading():
                if not self._counts.counted:
                    self._counts.count(self._table)
        with self._guard.reading():
            counts = self._counts
            return (len(self), self.removed_count, (None if counts.used is None else counts.used.copy(),
                                                    counts.usage.copy()),
                    counts.weight_hist.copy(), self._table.nbytes + self._bank.nbytes)

    # -- primitives of the contract -----------------------------------------

    def _reading(self, doing):
        return self._guard.reading()

    def _exclusive(self, doing):
        return self._guard.mutating(doing)

    def _put(self, batch: Codes, ids: np.ndarray) -> None:
        # prepare everything where no query looks, then commit under the write lock
        rows = self._table.prepare_append(batch, ids, adopt=True)
        pending = self._bank.prepare_append(row_table(batch), ids, batch.weights)
        counts = self._counts.after(pending.usage, pending.weight_hist)
        with self._guard.writing():
            self._bank.commit_append(pending)
            self._table.commit(rows)
            self._counts.adopt(counts)

    def _remove(self, ids: np.ndarray) -> None:
        rows = self._table.rows_of(ids)[0]
        counts = None
        if self._counts.counted:
            counts = self._counts.after(self._table.bit_usage(rows), self._table.weight_hist(rows), sign=-1)
        with self._guard.writing():
            self._table.mark_removed(rows)
            self._counts.adopt(counts)

    def _live_mask(self, ids: np.ndarray) -> np.ndarray:
        return self._table.rows_of(ids)[1]

    def _get(self, ids: np.ndarray):
        rows, live = self._table.rows_of(ids)
        return self._table.codes_of(rows), live

    def _live_ids(self) -> np.ndarray:
        return self._table.live_ids()

    def _samples_of(self, ids: np.ndarray) -> list:
        rows = self._table.rows_of(ids)[0]
        indptr, indices = self._table.indices_of(rows)
        det_indptr, det_bits = self._bank.sample(indptr, indices, ids)
        D = self.detectors
        return [det_bits[det_indptr[k * D] : det_indptr[(k + 1) * D]].reshape(D, -1) for k in range(ids.shape[0])]

    def _counters(self) -> np.ndarray:
        counters = getattr(self._local, "counters", None)
        if counters is None or not self._bank.counters_fit(counters):
            counters = self._bank.new_counters()
            self._local.counters = counters
        return counters

    def _query_one(self, q: Codes, min_overlap: int) -> Hits:
        table = self._table
        if table.rows == 0:
            return Hits(np.zeros(0, np.int64), np.zeros(0, np.int64))
        kernel_table = table.kernel_table()
        rows, overlaps = self._bank.scan_one(q.to_csr()[1], query_words(q, kernel_table)[0], kernel_table,
                                             table.removed, min_overlap, self._counters())
        ids = table.ids_of(rows)
        order = np.lexsort((ids, -overlaps))
        return Hits(ids[order], overlaps[order])

    def _query_batch(self, batch: Codes, min_overlap: int) -> BatchHits:
        n, table = len(batch), self._table
        if table.rows == 0 or n == 0:
            return no_hits(n)
        q_indptr, q_bits = batch.to_csr()
        kernel_table = table.kernel_table()
        counts, rows, overlaps = self._bank.scan_many(q_indptr, q_bits, query_words(batch, kernel_table),
                                                      kernel_table, table.removed, min_overlap)
        return batch_of(n, [counts], [table.ids_of(rows)], [overlaps])

    def _complete_matches(self, batch: Codes, m: int) -> BatchHits:
        hits = self._query_batch(batch, m)
        table, n = self._table, self._table.rows
        if n == 0:
            return hits
        weights = table.weights[:n]
        sample = weights if self.sample_size is None else np.minimum(weights, self.sample_size)
        # the detectors are sure to fire for rows with m >= threshold + weight - sample; scan the others
        unsure = np.flatnonzero(~table.removed[:n] & (weights >= m) & (m < self.threshold + weights - sample))
        if unsure.size == 0:
            return hits
        q_indptr, q_bits = batch.to_csr()
        kernel_table = table.kernel_table()
        counts, rows, overlaps = kernels.matches_in_rows(q_indptr, q_bits, query_words(batch, kernel_table),
                                                         kernel_table, unsure, m)
        return batch_of(len(batch), [hits.counts, counts], [hits.ids, table.ids_of(rows)], [hits.overlaps, overlaps],
                        unique=True)

    def _nearest(self, q: Codes, k: int) -> Hits:
        table = self._table
        q_bits = q.to_csr()[1]
        if self._bank.whole_codes:  # count from the postings: the cost follows the query's bits
            rows, overlaps = self._bank.nearest(q_bits, table.removed, k)
            return Hits(table.ids_of(rows), overlaps)
        with PARALLEL_LOCK:
            kernel_table = table.kernel_table()
            overlaps = kernels.overlaps_with_all(query_words(q, kernel_table)[0], q_bits, kernel_table, table.rows)
        rows = kernels.top_k(overlaps, table.removed, k, q_bits.shape[0])
        return Hits(table.ids_of(rows), overlaps[rows])

    # -- store-only calls ---------------------------------------------------

    def compact(self) -> None:
        """Reclaim removed rows and merge the postings into one block.

        Ids do not change. O(stored codes + postings); queries go on
        meanwhile against the old arrays, and see the new ones at once.

        Examples
        --------
        >>> s = Store(bits=16, threshold=1, seed=0); _ = s.add([[1], [2], [3]])
        >>> s.remove([1]); s.removed_count
        1
        >>> s.compact(); s.removed_count, s.ids().tolist(), s.next_id
        (0, [0, 2], 3)
        """
        with self._guard.mutating("compact"):
            table = self._table.compacted()
            bank = self._bank.rebuilt(table.kernel_table(), table.ids_of(np.arange(table.rows)), table.weights)
            with self._guard.writing():
                self._bank, self._table = bank, table
                self._local = threading.local()

    def detector_bits(self, code_id) -> np.ndarray:
        """The bits each detector of a stored code sampled, shape (detectors, sample).

        Rows are sorted; ``sample = min(sample_size, weight)``. Recomputed from
        the seed and the id, exactly as at ``add``.

        Examples
        --------
        >>> s = Store(bits=32, threshold=2, sample_size=3, detectors=2, seed=7)
        >>> _ = s.add([[1, 4, 9, 16, 25]])
        >>> s.detector_bits(0).shape
        (2, 3)
        """
        with self._guard.reading():
            rows = self._table.live_rows_of(code_id, "detector_bits")
            return self._samples_of(self._table.ids_of(rows[:1]))[0]

    # -- persistence ------------------------------------------------------

    def save(self, path) -> None:
        """Write the store to ``path`` atomically and durably.

        The file (format in ``docs/format.md``) is written to a temporary
        file in the same directory, flushed with ``fsync``, renamed over
        ``path`` and the directory is ``fsync``-ed. On any error the error
        is raised, the previous file at ``path`` is left as it was and the
        temporary file is removed; a failed ``fsync`` is never retried.
        Queries go on while it writes; mutations wait. O(file size).

        Examples
        --------
        >>> import os, tempfile
        >>> s = Store(bits=64, threshold=2, seed=3); _ = s.add([[1, 2, 3], [7, 8]])
        >>> path = os.path.join(tempfile.mkdtemp(), "depot.sidx")
        >>> s.save(path)
        >>> Store.load(path).query([1, 2]).ids.tolist()
        [0]
        """
        path = validation.path("path", path, what="save")
        with self._guard.writer:
            _persist.save_file(path, self._state())

    @classmethod
    def load(cls, path, *, mmap=False, writable=None) -> "Store":
        """Open a store saved by :meth:`save`.

        Every section is checked (CRC32s, counts against the file size,
        offsets, ids and bits in range, padding zero, postings consistent with
        the codes) before any of it is used; a bad file raises
        :class:`~sparseindex.errors.StoreFormatError` naming the section.
        Nothing larger than the file is allocated.

        Parameters
        ----------
        mmap : bool
            Serve from a memory mapping of the file instead of reading it
            into memory; the OS pages it in as queries touch it and shares
            it between processes. The check reads the file through once.
        writable : bool or None
            Allow ``add``/``remove``/``compact``. Default: True for an
            in-memory load, False for a memory-mapped one. Changes to a
            memory-mapped store are private (copy-on-write); the file
            changes only by ``save``. Do not truncate or overwrite a file in
            place while it is mapped (``save`` replaces it, which is safe).

        Examples
        --------
        >>> import os, tempfile
        >>> s = Store(bits=64, threshold=2, seed=3); _ = s.add([[1, 2, 3]])
        >>> path = os.path.join(tempfile.mkdtemp(), "depot.sidx"); s.save(path)
        >>> ro = Store.load(path, mmap=True)
        >>> ro.read_only, ro.query([1, 2, 3]).overlaps.tolist()
        (True, [3])
        >>> ro.add([[4, 5]])
        Traceback (most recent call last):
        ...
        sparseindex.errors.ReadOnlyStoreError: add: this store is read-only (memory-mapped); load it with writable=True to change it
        """
        path = validation.path("path", path, what="load")
        mmap, writable = load_options(mmap, writable)
        state, owner = _persist.read_file(path, mmap=mmap)
        return cls._from_state(state, mapping=owner if mmap else None,
                               read_only=None if writable else "memory-mapped" if mmap else "opened with writable=False")

    def __reduce__(self):
        # a pickle holds the same validated file format, never raw internals
        with self._guard.writer:
            return (restore_pickled, (_persist.dumps(self._state()),))

    def _state(self) -> "_persist.StoreState":
        """The persistent state; call with the writer mutex held."""
        t, p = self._table, self._params
        n = t.rows
        post, block_indptr, block_lo, block_hi, columns = self._bank.arrays()
        return _persist.StoreState(
            bits=p.bits, threshold=p.threshold, sample_size=p.sample_size, detectors=p.detectors, seed=p.seed,
            block_span=self._bank.block_span, plan=None if self._plan is None else self._plan.to_dict(),
            rows=n, next_id=t.next_id, removed_count=t.removed_count,
            words=t.words[:n] if t.layout == "packed" else None, removed=t.removed[:n],
            row_layout=t.layout, row_indptr=None if t.layout == "packed" else t.indptr[: n + 1],
            row_indices=None if t.layout == "packed" else t.indices[: t.indptr[n]],
            row_ids=None if t.row_ids is None else t.row_ids[:n],
            block_lo=block_lo, block_hi=block_hi, block_indptr=block_indptr, postings=post, bit_columns=columns,
        )

    @classmethod
    def _from_state(cls, state: "_persist.StoreState", *, mapping=None, read_only=None) -> "Store":
        params = Params(state.bits, state.threshold, state.sample_size, state.detectors, state.seed)
        bank = DetectorBank.from_arrays(
            state.bits, state.threshold, state.sample_size, state.detectors, state.seed, state.block_span,
            rows=state.rows, postings=state.postings, block_indptr=state.block_indptr,
            block_lo=state.block_lo, block_hi=state.block_hi, max_sample=state.max_sample,
            max_weight=int(state.weights.max()) if state.weights.shape[0] else 0, columns=state.bit_columns,
        )
        table = RowTable.from_arrays(state.bits, words=state.words, indptr=state.row_indptr, indices=state.row_indices,
                                     weights=state.weights, removed=state.removed,
                                     row_ids=state.row_ids, rows=state.rows, next_id=state.next_id,
                                     removed_count=state.removed_count)
        self = cls.__new__(cls)
        self._init_parts(params, state.plan, table=table, bank=bank, counted=False)  # usage counted on first need
        self._mapping = mapping
        self._guard.read_only = read_only
        if state.plan is not None:
            # a planned store warns past the limit, as for_target's does; the
            # level is first taken at the first change (not at load: O(N))
            self._watch = health.Watch(None, 0.8, None)
        return self

    # -- invariants -------------------------------------------------------

    def _check(self, deep: bool = True) -> None:
        """Check every invariant; AssertionError with the state on failure.

        ``deep`` also recomputes every detector sample and compares it with
        the postings (O(N · D · s)); for tests.
        """
        with self._guard.reading():
            table, state = self._table, repr(self)
            table.check(self.threshold)
            if table.rows:
                # the scan lowers its threshold only if this holds (whole-code detectors)
                assert self._bank.max_weight >= table.weights[: table.rows].max(), f"bank's heaviest weight stale: {state}"
            assert self._bank.rows == table.rows, f"bank rows {self._bank.rows} != {table.rows}: {state}"
            self._counts.check(table)
            expected = None
            if deep and table.rows:
                indptr, indices = table.indices_of()
                expected = self._bank.sample(indptr, indices, table.ids_of(np.arange(table.rows)))
            self._bank.check(expected)


def restore_pickled(data: bytes) -> Store:
    """Rebuild a pickled store from its file-format bytes (checked like a file)."""
    return Store._from_state(_persist.read_bytes(data))
