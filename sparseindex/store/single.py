"""The Store: packed codes, their detector banks, and threshold queries.

A stored code is a *hit* for a query when any detector of its bank fires:
at least ``threshold`` of the detector's ``sample_size`` sampled bits are set in
the query. Hits come back with their exact full-code overlap (AND +
popcount over the packed rows), so a caller can rank or filter them.

Ids are 0, 1, 2, ... in insertion order and never reused. Internally a code
lives in a *row*; rows and ids coincide until ``compact`` drops removed
rows, after which a sorted ``row -> id`` table maps between them.
"""

from __future__ import annotations

import os
import threading
from contextlib import contextmanager
from numbers import Integral

import numpy as np

from .._numba import kernels as _kernels
from . import format as _persist
from .. import health
from .._numba.config import PARALLEL_LOCK
from .guard import ReadWriteLock
from .bank import BLOCK_SPAN, DetectorBank
from ..codes import Codes, as_code, as_codes
from ..errors import ReadOnlyStoreError

__all__ = ["Store", "Hits", "BatchHits"]


def _check_int(name: str, value, minimum: int) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (Integral, np.integer)):
        raise TypeError(f"{name}={value!r} must be an integer")
    if value < minimum:
        raise ValueError(f"{name}={value} must be >= {minimum}")
    return int(value)


def ids_below(ids, next_id: int, what: str) -> np.ndarray:
    """Validated 1-D int64 ids (an int or a 1-D sequence), each in ``0..next_id-1``.

    ``TypeError`` for a non-integer id, ``KeyError`` naming the first id
    that was never handed out. Shared by every store that hands out ids.

    Examples
    --------
    >>> ids_below([2, 0], 3, "get").tolist()
    [2, 0]
    >>> ids_below(5, 3, "get")
    Traceback (most recent call last):
    ...
    KeyError: 'get: id 5 was never stored (ids so far: 0..2)'
    """
    arr = np.asarray(ids)
    if arr.ndim > 1:
        raise ValueError(f"{what}: ids must be an integer or a 1-D sequence, got shape {arr.shape}")
    arr = arr.reshape(-1)
    if arr.size and (arr.dtype == np.bool_ or arr.dtype.kind not in "iu"):
        bad = next((x for x in arr.tolist() if isinstance(x, bool) or not isinstance(x, int)), arr.tolist()[0])
        raise TypeError(f"{what}: id {bad!r} is not an integer")
    arr = arr.astype(np.int64)
    never = np.flatnonzero((arr < 0) | (arr >= next_id))
    if never.size:
        raise KeyError(f"{what}: id {int(arr[never[0]])} was never stored (ids so far: 0..{next_id - 1})")
    return arr


def _check_new_ids(ids, m: int) -> np.ndarray:
    arr = np.asarray(ids)
    if arr.ndim != 1 or arr.shape[0] != m:
        raise ValueError(f"add: ids must be a 1-D sequence of {m} ids (one per code), got shape {arr.shape}")
    if m and (arr.dtype == np.bool_ or arr.dtype.kind not in "iu"):
        raise TypeError(f"add: ids must be integers, got {arr.tolist()[:3]!r}")
    arr = arr.astype(np.int64)
    if m and arr[0] < 0:
        raise ValueError(f"add: ids[0]={int(arr[0])} is negative")
    steps = np.flatnonzero(np.diff(arr) <= 0)
    if steps.size:
        k = int(steps[0]) + 1
        raise ValueError(f"add: ids must ascend strictly: ids[{k}]={int(arr[k])} follows {int(arr[k - 1])}")
    return arr


def _check_fraction(value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)) or not 0 < value <= 1:
        raise ValueError(f"warn_fraction={value!r} must be a number in (0, 1]")
    return float(value)


def _check_chance(name, value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)) or not 0 < value < 1:
        raise ValueError(f"{name}={value!r} must be a chance strictly between 0 and 1")
    return float(value)


def _check_min_overlap(min_overlap) -> int:
    if min_overlap is None:
        return 0
    return _check_int("min_overlap", min_overlap, 0)


class Hits:
    """The stored codes hit by one query.

    ``ids`` and ``overlaps`` (exact full-code overlap with the query) are
    int64 arrays ordered by overlap descending, then id ascending.
    Iterating yields ``(id, overlap)`` pairs.

    Examples
    --------
    >>> import numpy as np
    >>> h = Hits(np.array([4, 1]), np.array([9, 7]))
    >>> len(h), list(h)
    (2, [(4, 9), (1, 7)])
    """

    __slots__ = ("ids", "overlaps")

    def __init__(self, ids, overlaps):
        self.ids = np.asarray(ids, dtype=np.int64)
        self.overlaps = np.asarray(overlaps, dtype=np.int64)

    def __len__(self) -> int:
        return self.ids.shape[0]

    def __iter__(self):
        return zip(self.ids.tolist(), self.overlaps.tolist())

    def __eq__(self, other):
        if not isinstance(other, Hits):
            return NotImplemented
        return np.array_equal(self.ids, other.ids) and np.array_equal(self.overlaps, other.overlaps)

    __hash__ = None

    def __repr__(self) -> str:
        shown = ", ".join(f"{i}:{o}" for i, o in list(self)[:8])
        more = ", ..." if len(self) > 8 else ""
        return f"Hits({len(self)} [id:overlap] {shown}{more})"


class BatchHits:
    """Hits of many queries in flat CSR arrays.

    Query ``i``'s hits are ``ids[indptr[i]:indptr[i+1]]`` with the matching
    ``overlaps``, ordered as in :class:`Hits`. A million results cost three
    arrays, not a million objects.

    Examples
    --------
    >>> import numpy as np
    >>> b = BatchHits(np.array([0, 2, 2]), np.array([3, 5]), np.array([8, 6]))
    >>> len(b), b[0].ids.tolist(), len(b[1])
    (2, [3, 5], 0)
    """

    __slots__ = ("indptr", "ids", "overlaps")

    def __init__(self, indptr, ids, overlaps):
        self.indptr = np.asarray(indptr, dtype=np.int64)
        self.ids = np.asarray(ids, dtype=np.int64)
        self.overlaps = np.asarray(overlaps, dtype=np.int64)

    def __len__(self) -> int:
        return self.indptr.shape[0] - 1

    def __getitem__(self, i) -> Hits:
        n = len(self)
        if isinstance(i, (bool, np.bool_)) or not isinstance(i, (Integral, np.integer)):
            raise TypeError(f"BatchHits index must be an integer, got {i!r}")
        if not -n <= i < n:
            raise IndexError(f"query index {i} out of range for {n} queries")
        i = int(i) % n
        a, b = self.indptr[i], self.indptr[i + 1]
        return Hits(self.ids[a:b], self.overlaps[a:b])

    def __iter__(self):
        for i in range(len(self)):
            yield self[i]

    @property
    def counts(self) -> np.ndarray:
        """Number of hits of each query.

        Examples
        --------
        >>> BatchHits(np.array([0, 2, 2]), np.array([3, 5]), np.array([8, 6])).counts.tolist()
        [2, 0]
        """
        return np.diff(self.indptr)

    def __repr__(self) -> str:
        return f"BatchHits(queries={len(self)}, hits={self.ids.shape[0]})"


class Store:
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

    def __init__(self, bits, *, threshold, sample_size=None, detectors=1, seed=None):
        bits = _check_int("bits", bits, 1)
        threshold = _check_int("threshold", threshold, 1)
        if sample_size is not None:
            sample_size = _check_int("sample_size", sample_size, 1)
            if threshold > sample_size:
                raise ValueError(f"threshold={threshold} must be <= sample_size={sample_size}")
        if threshold > bits:
            raise ValueError(f"threshold={threshold} must be <= bits={bits}: no code could ever be recalled")
        detectors = _check_int("detectors", detectors, 1)
        if seed is None:
            seed = int(np.random.SeedSequence().generate_state(1, dtype=np.uint64)[0])
        else:
            seed = _check_int("seed", seed, 0)
            if seed >= 2**64:
                raise ValueError(f"seed={seed} must be < 2**64")
        self._bits = bits
        self._threshold = threshold
        self._sample_size = sample_size
        self._detectors = detectors
        self._seed = seed
        self._bank = DetectorBank(bits, threshold, sample_size, detectors, seed, self._block_span)
        n_words = (bits + 63) // 64
        self._words = np.zeros((0, n_words), dtype=np.uint64)
        self._weights = np.zeros(0, dtype=np.int32)
        self._removed = np.zeros(0, dtype=bool)
        self._row_ids = None  # None: row r holds id r
        self._rows = 0
        self._next_id = 0
        self._removed_count = 0
        self._local = threading.local()
        self._plan = None
        self._rw = ReadWriteLock()
        self._writer = threading.Lock()
        self._read_only = None  # or the reason, e.g. "memory-mapped from 'x.sidx'"
        self._mapping = None  # keeps a memory-mapped file open
        # health: per-bit set counts and the weight histogram of live codes
        # (None until first needed after a load), serving counters, alerts
        self._usage = np.zeros(bits, dtype=np.int64)
        self._weight_hist = np.zeros(bits + 1, dtype=np.int64)
        self._served = {"queries": 0, "hits": 0, "added": 0, "removed": 0}
        self._served_lock = threading.Lock()
        self._mutations = 0
        self._measurement = None
        self._watch = None  # a health.Watch once watch() or for_target set one
        self._health_memo = health.HealthMemo()

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
        store = cls(bits, threshold=chosen.threshold, sample_size=chosen.sample_size, detectors=chosen.detectors, seed=seed)
        store._plan = chosen
        store.watch(on_status, warn_fraction=warn_fraction)
        return store

    @property
    def plan(self):
        """The :class:`~sparseindex.Plan` this store was configured from, or None."""
        return self._plan

    # -- parameters ----------------------------------------------------------

    bits = property(lambda self: self._bits, doc="Width of every code.")
    threshold = property(lambda self: self._threshold, doc="Sampled bits a detector needs to fire.")
    sample_size = property(lambda self: self._sample_size, doc="Set bits each detector samples (None: all).")
    detectors = property(lambda self: self._detectors, doc="Detectors per stored code.")
    seed = property(lambda self: self._seed, doc="Seed of the detector sampling.")

    @property
    def next_id(self) -> int:
        """The id the next added code will get."""
        return self._next_id

    @property
    def removed_count(self) -> int:
        """Removed codes whose rows ``compact`` has not reclaimed yet."""
        return self._removed_count

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
        with self._rw.reading():
            return self._nbytes()

    def _nbytes(self) -> int:
        total = self._words.nbytes + self._weights.nbytes + self._removed.nbytes + self._bank.nbytes
        if self._row_ids is not None:
            total += self._row_ids.nbytes
        return total

    def __len__(self) -> int:
        with self._rw.reading():
            return self._rows - self._removed_count

    def __contains__(self, code_id) -> bool:
        if isinstance(code_id, (bool, np.bool_)) or not isinstance(code_id, (Integral, np.integer)):
            return False
        with self._rw.reading():
            row = self._row_of(int(code_id))
            return row >= 0 and not self._removed[row]

    @property
    def read_only(self) -> bool:
        """True when the store refuses changes (a memory-mapped load, by default)."""
        return self._read_only is not None

    def __repr__(self) -> str:
        with self._rw.reading():
            return self._repr()

    def _repr(self) -> str:
        return (
            f"Store(bits={self._bits}, threshold={self._threshold}, sample_size={self._sample_size}, "
            f"detectors={self._detectors}, items={len(self)}, removed={self._removed_count}, "
            f"seed={self._seed})"
        )

    # -- id <-> row -------------------------------------------------------

    def _ids_of_rows(self, rows: np.ndarray) -> np.ndarray:
        if self._row_ids is None:
            return rows.astype(np.int64, copy=True)
        return self._row_ids[rows]

    def _row_of(self, code_id: int) -> int:
        """Row of a stored id, or -1 if the id was never stored or was compacted away."""
        if code_id < 0 or code_id >= self._next_id:
            return -1
        if self._row_ids is None:
            return code_id
        r = int(np.searchsorted(self._row_ids[: self._rows], code_id))
        if r < self._rows and self._row_ids[r] == code_id:
            return r
        return -1

    def _live_rows_of(self, ids, what: str) -> np.ndarray:
        """Rows of ``ids`` (int or 1-D int array-like); KeyError for any not stored."""
        arr = ids_below(ids, self._next_id, what)
        if self._row_ids is None:
            rows = arr.copy()
            gone = np.zeros(arr.shape[0], dtype=bool)
        else:
            table = self._row_ids[: self._rows]
            rows = np.searchsorted(table, arr)
            gone = rows >= self._rows
            rows[gone] = 0
            gone |= table[rows] != arr if self._rows else np.ones(arr.shape[0], dtype=bool)
        if self._rows:
            gone |= self._removed[rows]
        bad = np.flatnonzero(gone)
        if bad.size:
            raise KeyError(f"{what}: id {int(arr[bad[0]])} was removed")
        return rows

    # -- health bookkeeping -------------------------------------------------

    def _bit_usage(self, rows=None) -> np.ndarray:
        """Set-bit counts per bit of ``rows`` (None: every live row)."""
        skip = np.zeros(0, dtype=bool)
        if rows is None:
            pick, skip = np.zeros(0, dtype=np.int64), self._removed[: self._rows]
            if self._rows == 0:
                return np.zeros(self._bits, dtype=np.int64)
            words = self._words[: self._rows]
        else:
            pick, words = np.asarray(rows, dtype=np.int64), self._words
            if pick.shape[0] == 0:
                return np.zeros(self._bits, dtype=np.int64)
        with PARALLEL_LOCK:
            return _kernels.bit_usage(words, pick, skip)[: self._bits]

    def _ensure_usage(self) -> None:
        """Count bit usage of a loaded store once (O(N)); mutations keep it current after."""
        if self._usage is None:
            with self._writer:  # the same lock order as a mutation: writer mutex, then rw
                if self._usage is None:
                    with self._rw.reading():
                        live = self._weights[: self._rows][~self._removed[: self._rows]]
                        self._weight_hist = np.bincount(live, minlength=self._bits + 1).astype(np.int64)
                        self._usage = self._bit_usage()

    def _count(self, **amounts) -> None:
        with self._served_lock:
            for key, value in amounts.items():
                self._served[key] += int(value)

    def _after_change(self) -> None:
        """Re-evaluate the status after a mutation; alerts fire here, outside every lock."""
        if self._watch is not None:
            with self._served_lock:
                churn = self._served["added"] + self._served["removed"]
            self._watch.changed(len(self), churn, self.health)

    def stats(self) -> "health.StoreStats":
        """A snapshot of the store's figures: parameters, plan, counts, bit usage, weights, counters, memory.

        Copies taken under the read lock (O(bits)); a loaded store counts
        its bit usage once, on the first call. :meth:`health` is computed
        from it outside every lock.

        Examples
        --------
        >>> s = Store(64, threshold=2, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5, 6]])
        >>> st = s.stats()
        >>> st.items, int(st.usage[3]), st.weight_hist[3:5].tolist(), st.served["added"]
        (2, 2, [1, 1], 2)
        """
        self._ensure_usage()
        with self._rw.reading():
            with self._served_lock:
                served = dict(self._served)
            watch = self._watch
            return health.StoreStats(
                bits=self._bits, threshold=self._threshold, sample_size=self._sample_size,
                detectors=self._detectors, seed=self._seed, plan=self._plan, items=len(self),
                removed_pending=self._removed_count, usage=self._usage.copy(), weight_hist=self._weight_hist.copy(),
                memory_bytes=self._nbytes(), served=served, measurement=self._measurement,
                watch_false_hit=None if watch is None else watch.false_hit,
                watch_warn_fraction=None if watch is None else watch.warn_fraction,
            )

    def detector_samples(self, count, *, seed) -> list:
        """The detector samples of up to ``count`` live codes chosen by ``seed``: one (D, s) array each.

        The codes are a uniform sample without replacement, drawn with
        ``numpy.random.default_rng([store seed, seed])`` from the live codes
        in id order and returned in id order, so a store and a sharded store
        of the same codes pick the same ones. O(count · weight).

        Examples
        --------
        >>> s = Store(64, threshold=2, sample_size=2, detectors=3, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5, 6]])
        >>> [a.shape for a in s.detector_samples(5, seed=1)]
        [(3, 2), (3, 2)]
        """
        with self._rw.reading():
            rows = np.flatnonzero(~self._removed[: self._rows])
            rng = np.random.default_rng([self._seed, int(seed)])
            pick = np.sort(rng.choice(rows, size=min(int(count), rows.shape[0]), replace=False))
            words, weights, ids = self._words[pick], self._weights[pick], self._ids_of_rows(pick)
        indptr, indices = _kernels.unpack_indices(words, weights.astype(np.int64))
        det_indptr, det_bits = self._bank.sample(indptr, indices, ids)
        D = self._detectors
        return [det_bits[det_indptr[k * D] : det_indptr[(k + 1) * D]].reshape(D, -1) for k in range(pick.shape[0])]

    # -- mutation -----------------------------------------------------------

    @contextmanager
    def _mutating(self, what: str):
        """One mutation at a time; refused on a read-only store."""
        if self._read_only is not None:
            raise ReadOnlyStoreError(
                f"{what}: this store is read-only ({self._read_only}); "
                "load it with writable=True to change it"
            )
        with self._writer:
            yield

    def add(self, codes, *, ids=None) -> np.ndarray:
        """Store a batch of codes; return their new ids (int64).

        Accepts a :class:`~sparseindex.Codes`, a list/tuple of index
        sequences, a 2-D bool ndarray, a scipy.sparse matrix or a list of
        ``bitarray``. Every row is checked before anything is stored: one
        bad row and the batch adds nothing. O(batch set bits + D·s per code).

        ``ids`` (optional) gives the new codes' ids yourself: strictly
        ascending, from ``next_id`` up, gaps allowed (a store that holds one
        shard of a larger id space). A code's detector samples depend only on
        the seed and its id, so the same code with the same id is sampled
        alike in any store of the same seed.

        Raises
        ------
        ValueError
            A bad row (message names it), or a code with fewer set bits
            than ``threshold`` (no detector of it could ever fire).

        Examples
        --------
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
        batch = as_codes(codes, self._bits, what="add")
        m = len(batch)
        given = None if ids is None else _check_new_ids(ids, m)
        if m == 0:
            return np.zeros(0, dtype=np.int64)
        weights = batch._weights
        weak = np.flatnonzero(weights < self._threshold)
        if weak.size:
            r = int(weak[0])
            raise ValueError(
                f"add: row {r} has {int(weights[r])} set bits, fewer than threshold={self._threshold}: "
                "no detector could ever fire for it"
            )
        with self._mutating("add"):
            if given is not None and given[0] < self._next_id:
                raise ValueError(
                    f"add: ids[0]={int(given[0])} is below next_id={self._next_id}: ids are never reused"
                )
            ids = self._add(batch, weights, m, given)
        self._after_change()
        return ids

    def _add(self, batch: Codes, weights: np.ndarray, m: int, given=None) -> np.ndarray:
        # Prepare everything where no query looks (new buffers, or the
        # unused room past ``_rows``), then commit under the write lock.
        ids = np.arange(self._next_id, self._next_id + m, dtype=np.int64)
        need = self._rows + m
        words, wts, removed, row_ids = self._words, self._weights, self._removed, self._row_ids
        if given is not None and not np.array_equal(given, ids):
            ids = given
            if row_ids is None:  # ids and rows part ways here: start the row -> id table
                row_ids = np.arange(max(words.shape[0], self._rows), dtype=np.int64)
        adopt = self._rows == 0
        if adopt:
            # a Codes batch never changes, so an empty store can take its
            # rows without a copy (first-touch of fresh memory is slow)
            words = batch._words
            wts = weights.astype(np.int32)
            removed = np.zeros(m, dtype=bool)
            if row_ids is not None:  # emptied by compact: ids no longer start at 0
                row_ids = np.zeros(m, dtype=np.int64)
        elif need > words.shape[0]:
            # room for the rows first: a MemoryError here changes nothing
            room = max(need, int(words.shape[0] * 1.5))
            words = _grown(words, room, self._rows)
            wts = _grown(wts, room, self._rows)
            removed = _grown(removed, room, self._rows)
            if row_ids is not None:
                row_ids = _grown(row_ids, room, self._rows)
        elif row_ids is not None and need > row_ids.shape[0]:
            row_ids = _grown(row_ids, words.shape[0], self._rows)
        pending = self._bank.prepare_append(batch._words, ids)
        if not adopt:
            words[self._rows : need] = batch._words
            wts[self._rows : need] = weights
            removed[self._rows : need] = False
        if row_ids is not None:
            row_ids[self._rows : need] = ids
        with self._rw.writing():
            self._bank.commit_append(pending)
            self._words, self._weights, self._removed, self._row_ids = words, wts, removed, row_ids
            self._rows = need
            self._next_id = int(ids[-1]) + 1
            if self._usage is not None:
                self._usage += pending.usage
                self._weight_hist += pending.weight_hist
            self._mutations += 1
        self._count(added=m)
        return ids

    def find_or_add(self, codes, *, min_overlap):
        """Add only what is new: return each code's match or its new id.

        For each code in order: if a stored code — or an earlier code of the
        same batch that was added — has full overlap ``>= min_overlap`` with
        it, its id is that code's (greatest overlap, ties to the smallest id)
        and ``is_new`` is False; otherwise it is added. Returns ``(ids,
        is_new)``. Exact: candidates come from the detector index where its
        threshold guarantees them (a stored code of weight ``w`` is sure to
        fire when ``min_overlap >= threshold + w - min(sample_size, w)``) and
        from a scan of the other stored codes; every match is verified on
        the packed codes, within the batch too. The whole call is one
        mutation: no other change interleaves, and queries see all of its
        additions or none.

        Raises
        ------
        ValueError
            A bad row (nothing is added), or a code lighter than
            ``threshold`` (it could never be recalled if added).

        Examples
        --------
        >>> s = Store(bits=64, threshold=2, seed=0)
        >>> _ = s.add([[1, 2, 3, 4, 5]])
        >>> ids, new = s.find_or_add([[1, 2, 3, 4, 6], [20, 21, 22], [20, 21, 22, 23]], min_overlap=3)
        >>> ids.tolist(), new.tolist()
        ([0, 1, 1], [False, True, False])
        """
        batch = as_codes(codes, self._bits, what="find_or_add")
        m = _check_int("min_overlap", min_overlap, 1)
        n = len(batch)
        if n == 0:
            return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=bool)
        weak = np.flatnonzero(batch._weights < self._threshold)
        if weak.size:
            r = int(weak[0])
            raise ValueError(
                f"find_or_add: row {r} has {int(batch._weights[r])} set bits, fewer than "
                f"threshold={self._threshold}: it could never be recalled if added"
            )
        with self._mutating("find_or_add"):
            stored = self._matches_in_store(batch, m)
            inner = _matches_within(batch, m)
            ids = np.empty(n, dtype=np.int64)
            is_new = np.zeros(n, dtype=bool)
            next_id = self._next_id
            for i in range(n):
                best_id, best_ov = -1, -1
                a, b = stored.indptr[i], stored.indptr[i + 1]
                if b > a:  # ordered by overlap desc, id asc
                    best_id, best_ov = int(stored.ids[a]), int(stored.overlaps[a])
                a, b = inner.indptr[i], inner.indptr[i + 1]
                for j, ov in zip(inner.ids[a:b].tolist(), inner.overlaps[a:b].tolist()):
                    if j >= i or not is_new[j]:
                        continue
                    cand = int(ids[j])
                    if ov > best_ov or (ov == best_ov and cand < best_id):
                        best_id, best_ov = cand, ov
                if best_id >= 0:
                    ids[i] = best_id
                else:
                    ids[i] = next_id
                    next_id += 1
                    is_new[i] = True
            new_rows = np.flatnonzero(is_new)
            if new_rows.size:
                fresh = batch if new_rows.size == n else Codes._wrap(
                    np.ascontiguousarray(batch._words[new_rows]), self._bits)
                added = self._add(fresh, fresh._weights, new_rows.size)
                assert np.array_equal(added, ids[new_rows])
        if new_rows.size:
            self._after_change()
        return ids, is_new

    def find_matches(self, codes, *, min_overlap) -> BatchHits:
        """Every stored code whose full overlap with each query is at least ``min_overlap``.

        Unlike :meth:`query_many` (which returns what the detectors find),
        this is complete: rows the detectors are not sure to find (``weight
        > min_overlap - threshold + min(sample_size, weight)``) are scanned as
        well, and every match is verified. Ordered as :class:`Hits`.

        Examples
        --------
        >>> s = Store(bits=64, threshold=2, sample_size=2, seed=0)
        >>> _ = s.add([[1, 2, 3, 4, 5, 6]])
        >>> s.find_matches([[1, 2, 3, 40]], min_overlap=3)[0].ids.tolist()
        [0]
        """
        batch = as_codes(codes, self._bits, what="find_matches")
        m = _check_int("min_overlap", min_overlap, 1)
        result = self._matches_in_store(batch, m)
        self._count(queries=len(batch), hits=result.ids.shape[0])
        return result

    def _matches_in_store(self, batch: Codes, m: int) -> BatchHits:
        """Every stored code with overlap >= m with each batch code (complete and exact)."""
        with self._rw.reading():
            hits = self._query_batch(batch, m)
            n = self._rows
            if n == 0:
                return hits
            sample = self._weights[:n] if self._sample_size is None else np.minimum(self._weights[:n], self._sample_size)
            # the detectors are sure to fire for rows with m >= threshold + weight - sample
            unsure = np.flatnonzero(
                ~self._removed[:n]
                & (self._weights[:n] >= m)
                & (m < self._threshold + self._weights[:n] - sample)
            )
            if unsure.size == 0:
                return hits
            counts, rows, overlaps = _kernels.matches_in_rows(batch._words, self._words, unsure, m)
            extra_ids = self._ids_of_rows(rows)
        which = np.concatenate([np.repeat(np.arange(len(batch)), hits.counts), np.repeat(np.arange(len(batch)), counts)])
        all_ids = np.concatenate([hits.ids, extra_ids])
        all_ov = np.concatenate([hits.overlaps, overlaps])
        order = np.lexsort((all_ids, -all_ov, which))
        which, all_ids, all_ov = which[order], all_ids[order], all_ov[order]
        keep = np.ones(which.shape[0], dtype=bool)  # a row both fired and was scanned: keep one
        keep[1:] = (which[1:] != which[:-1]) | (all_ids[1:] != all_ids[:-1])
        which, all_ids, all_ov = which[keep], all_ids[keep], all_ov[keep]
        indptr = np.zeros(len(batch) + 1, dtype=np.int64)
        np.cumsum(np.bincount(which, minlength=len(batch)), out=indptr[1:])
        return BatchHits(indptr, all_ids, all_ov)

    def remove(self, ids) -> None:
        """Remove codes by id; they never come back and their ids are not reused.

        All ids are checked first: an unknown, already removed or repeated
        id raises ``KeyError`` naming it and nothing is removed. Postings
        stay until :meth:`compact`; removed codes are never returned.

        Examples
        --------
        >>> s = Store(bits=8, threshold=1, seed=0); _ = s.add([[1], [2]])
        >>> s.remove([0]); 0 in s, len(s)
        (False, 1)
        >>> s.remove(0)
        Traceback (most recent call last):
        ...
        KeyError: 'remove: id 0 was removed'
        """
        with self._mutating("remove"):
            rows = self._live_rows_of(ids, "remove")
            uniq, counts = np.unique(rows, return_counts=True)
            if (counts > 1).any():
                dup_row = int(uniq[np.flatnonzero(counts > 1)[0]])
                dup_id = int(self._ids_of_rows(np.array([dup_row]))[0])
                raise KeyError(f"remove: id {dup_id} appears more than once in one call")
            if self._usage is not None:
                gone_usage = self._bit_usage(rows)
                gone_weights = np.bincount(self._weights[rows], minlength=self._bits + 1)
            with self._rw.writing():
                self._removed[rows] = True
                self._removed_count += rows.shape[0]
                if self._usage is not None:
                    self._usage -= gone_usage
                    self._weight_hist -= gone_weights
                self._mutations += 1
        self._count(removed=rows.shape[0])
        self._after_change()

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
        with self._mutating("compact"):
            live = ~self._removed[: self._rows]
            rows_left = int(live.sum())
            words = np.ascontiguousarray(self._words[: self._rows][live])
            wts = self._weights[: self._rows][live].copy()
            ids_kept = self._ids_of_rows(np.flatnonzero(live))
            identity = rows_left == self._next_id  # nothing was ever dropped
            bank = self._bank.rebuilt(words, ids_kept)
            with self._rw.writing():
                self._bank = bank
                self._words, self._weights = words, wts
                self._removed = np.zeros(rows_left, dtype=bool)
                self._row_ids = None if identity else ids_kept
                self._rows = rows_left
                self._removed_count = 0
                self._local = threading.local()

    # -- reading ----------------------------------------------------------

    def get(self, ids) -> Codes:
        """The stored codes with these ids, in the order given.

        Examples
        --------
        >>> s = Store(bits=8, threshold=1, seed=0); _ = s.add([[1, 2], [5]])
        >>> s.get([1, 0]).to_indices()[0].tolist()
        [5]
        """
        with self._rw.reading():
            rows = self._live_rows_of(ids, "get")
            return Codes(self._words[rows].copy(), self._bits)

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
        with self._rw.reading():
            row = self._live_rows_of(code_id, "detector_bits")[0]
            code_id = int(self._ids_of_rows(np.array([row]))[0])
            indptr, indices = _kernels.unpack_indices(
                self._words[row : row + 1], self._weights[row : row + 1].astype(np.int64)
            )
            det_indptr, det_bits = self._bank.sample(indptr, indices, np.array([code_id]))
        return det_bits.reshape(self._detectors, -1)

    def _counters(self) -> np.ndarray:
        counters = getattr(self._local, "counters", None)
        if counters is None or not self._bank.counters_fit(counters):
            counters = self._bank.new_counters()
            self._local.counters = counters
        return counters

    def query(self, code, *, min_overlap=None) -> Hits:
        """The stored codes with at least one firing detector for this query.

        ``min_overlap`` additionally drops hits whose exact full overlap
        with the query is below it. Wraps kernel ``query_one``:
        O(postings of the query's set bits + hits).

        Examples
        --------
        >>> s = Store(bits=32, threshold=2, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5]])
        >>> s.query([1, 2, 3, 4]).ids.tolist()
        [0, 1]
        >>> s.query([1, 2, 3, 4], min_overlap=3).ids.tolist()
        [0]
        """
        q = as_code(code, self._bits, what="query")
        min_ov = _check_min_overlap(min_overlap)
        q_bits = q._csr()[1]
        with self._rw.reading():
            if self._rows == 0:
                self._count(queries=1)
                return Hits(np.zeros(0, np.int64), np.zeros(0, np.int64))
            rows, overlaps = self._bank.scan_one(
                q_bits, q._words[0], self._words, self._removed, min_ov, self._counters()
            )
            ids = self._ids_of_rows(rows)
        order = np.lexsort((ids, -overlaps))
        self._count(queries=1, hits=ids.shape[0])
        return Hits(ids[order], overlaps[order])

    def query_many(self, codes, *, min_overlap=None) -> BatchHits:
        """:meth:`query` for a batch, in parallel threads (kernel ``query_batch``).

        Examples
        --------
        >>> s = Store(bits=32, threshold=2, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5]])
        >>> hits = s.query_many([[1, 2], [4, 5], [9, 10]])
        >>> [h.ids.tolist() for h in hits]
        [[0], [1], []]
        """
        batch = as_codes(codes, self._bits, what="query_many")
        min_ov = _check_min_overlap(min_overlap)
        result = self._query_batch(batch, min_ov)
        self._count(queries=len(batch), hits=result.ids.shape[0])
        return result

    def _query_batch(self, batch: Codes, min_ov: int) -> BatchHits:
        n = len(batch)
        q_indptr, q_bits = batch._csr()
        with self._rw.reading():
            if self._rows == 0 or n == 0:
                return BatchHits(np.zeros(n + 1, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64))
            counts, rows, overlaps = self._bank.scan_many(
                q_indptr, q_bits, batch._words, self._words, self._removed, min_ov
            )
            ids = self._ids_of_rows(rows)
        which = np.repeat(np.arange(n, dtype=np.int64), counts)
        order = np.lexsort((ids, -overlaps, which))
        indptr = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(counts, out=indptr[1:])
        return BatchHits(indptr, ids[order], overlaps[order])

    def nearest(self, code, k) -> Hits:
        """The exact ``k`` stored codes of greatest overlap (ties to the lower id).

        Scans every stored code (AND + popcount, kernel
        ``overlaps_with_all``), so it is right even when no detector fires:
        O(N · words per code). Fewer than ``k`` come back only when fewer are
        stored.

        Examples
        --------
        >>> s = Store(bits=32, threshold=3, seed=0); _ = s.add([[1, 2, 3], [3, 4, 5], [7, 8, 9]])
        >>> s.nearest([3, 4, 20], k=2).ids.tolist()
        [1, 0]
        """
        q = as_code(code, self._bits, what="nearest")
        k = _check_int("k", k, 0)
        with self._rw.reading():
            if self._rows == 0 or k == 0:
                return Hits(np.zeros(0, np.int64), np.zeros(0, np.int64))
            with PARALLEL_LOCK:
                overlaps = _kernels.overlaps_with_all(q._words[0], self._words, self._rows)
            rows = _kernels.top_k(overlaps, self._removed, k, self._bits)
            return Hits(self._ids_of_rows(rows), overlaps[rows])

    def __iter__(self):
        raise TypeError("a Store is not iterable; use store.ids() and store.get(ids)")

    def ids(self) -> np.ndarray:
        """Ids of every stored (not removed) code, ascending.

        Examples
        --------
        >>> s = Store(bits=16, threshold=1, seed=0); _ = s.add([[1], [2]]); s.remove([0])
        >>> s.ids().tolist()
        [1]
        """
        with self._rw.reading():
            rows = np.flatnonzero(~self._removed[: self._rows])
            return self._ids_of_rows(rows)

    # -- health -----------------------------------------------------------

    def health(self, *, false_hit=None, warn_fraction=None, refresh=False):
        """How full the store is: a :class:`~sparseindex.health.Health` report.

        Cheap enough for every scrape: it reads running per-bit usage counts
        and a weight histogram kept by ``add``/``remove`` (no scan of the
        codes; a loaded store counts them once, on its first report) and
        memoised model figures. The usage-aware estimate (a sample of
        stored codes, ``model.usage_false_hits``) is recomputed once 5% of
        the store has changed, or now with ``refresh=True``.

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
        >>> s = Store.for_target(1536, 30, false_hit=1e-6, capacity=50_000, seed=1)
        >>> _ = s.add(Codes.random(1_000, 1536, 30, seed=2))
        >>> h = s.health()
        >>> h.status, h.items, h.limit >= 50_000
        ('healthy', 1000, True)
        """
        if false_hit is not None:
            false_hit = _check_chance("false_hit", false_hit)
        if warn_fraction is not None:
            warn_fraction = _check_fraction(warn_fraction)
        return health.compute(self.stats(), self.detector_samples, self._health_memo, false_hit=false_hit,
                              warn_fraction=warn_fraction, refresh=bool(refresh))

    def measure_false_hits(self, queries=10_000, *, source="uniform", seed=None):
        """Run random unrelated queries and measure the false-hit rate.

        ``source="uniform"``: queries of the nominal weight (the plan's
        ``weight``, else the mean stored weight) with uniformly random bits;
        ``"usage"``: drawn from the store's measured bit usage (the
        usage-aware model's conditional Poisson queries). Every hit is false
        by construction. Returns a :class:`~sparseindex.health.FalseHitMeasurement`
        with the Clopper–Pearson 95% interval beside the model's prediction;
        :meth:`health` shows the latest one. Measurement queries do not count as
        served queries.

        Examples
        --------
        >>> s = Store(256, threshold=3, seed=1); _ = s.add(Codes.random(2_000, 256, 8, seed=1))
        >>> r = s.measure_false_hits(2_000, seed=3)
        >>> r.queries, 0 < r.rate < 1, r.low <= r.rate <= r.high
        (2000, True, True)
        """
        health.check_measurement(queries, source)
        stats = self.stats()
        result = health.measure_false_hits(
            self.health(), stats.usage, lambda batch: self._query_batch(batch, 0).counts, queries,
            source=source, seed=seed)
        self._measurement = result
        return result

    def watch(self, on_status=None, *, warn_fraction=0.8, false_hit=None) -> None:
        """Alert on status changes: ``on_status(previous, current, health)``.

        The callback runs once each time an ``add`` or ``remove`` moves the
        status between ``"healthy"``, ``"filling"`` (``warn_fraction`` of
        limit reached) and ``"saturated"`` (past the limit), in the thread
        that made the change, after the change is committed; an exception it
        raises becomes a ``RuntimeWarning``. Crossing the limit also issues a
        :class:`~sparseindex.SaturationWarning`. ``false_hit`` sets the target
        for a store without a plan.

        Examples
        --------
        >>> seen = []
        >>> s = Store(64, threshold=2, seed=0)
        >>> s.watch(lambda old, new, h: seen.append((old, new)), false_hit=0.05, warn_fraction=0.5)
        >>> import warnings
        >>> with warnings.catch_warnings(record=True):
        ...     for k in range(40):
        ...         _ = s.add(Codes.random(1, 64, 4, seed=k))
        >>> seen
        [('healthy', 'filling'), ('filling', 'saturated')]
        """
        if on_status is not None and not callable(on_status):
            raise TypeError(f"on_status={on_status!r} must be callable or None")
        warn_fraction = _check_fraction(warn_fraction)
        if false_hit is not None:
            false_hit = _check_chance("false_hit", false_hit)
        elif self._plan is None:
            raise ValueError("watch: this store has no plan; give false_hit=... (target chance per query)")
        watcher = health.Watch(on_status, warn_fraction, false_hit)
        self._watch = watcher
        watcher.status = self.health().status

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
        with self._writer:
            state = self._state()
            _persist.save_file(path, state)

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
        if not isinstance(mmap, (bool, np.bool_)):
            raise TypeError(f"mmap={mmap!r} must be True or False")
        if writable is None:
            writable = not mmap
        elif not isinstance(writable, (bool, np.bool_)):
            raise TypeError(f"writable={writable!r} must be True, False or None")
        state, owner = _persist.read_file(path, mmap=bool(mmap))
        store = cls._from_state(state)
        store._mapping = owner if mmap else None
        if not writable:
            store._read_only = "memory-mapped" if mmap else "opened with writable=False"
        return store

    def __reduce__(self):
        # a pickle holds the same validated file format, never raw internals
        with self._writer:
            return (_restore_pickled, (_persist.dumps(self._state()),))

    def _state(self) -> "_persist.StoreState":
        """The persistent state; call with the writer mutex held."""
        n = self._rows
        post, block_indptr, block_lo, block_hi = self._bank.arrays()
        return _persist.StoreState(
            bits=self._bits, threshold=self._threshold, sample_size=self._sample_size, detectors=self._detectors,
            seed=self._seed, block_span=self._bank.block_span,
            plan=None if self._plan is None else self._plan.to_dict(),
            rows=n, next_id=self._next_id, removed_count=self._removed_count,
            words=self._words[:n], removed=self._removed[:n],
            row_ids=None if self._row_ids is None else self._row_ids[:n],
            block_lo=block_lo, block_hi=block_hi, block_indptr=block_indptr, postings=post,
        )

    @classmethod
    def _from_state(cls, state: "_persist.StoreState") -> "Store":
        store = cls(state.bits, threshold=state.threshold, sample_size=state.sample_size, detectors=state.detectors,
                    seed=state.seed)
        store._bank = DetectorBank.from_arrays(
            state.bits, state.threshold, state.sample_size, state.detectors, state.seed, state.block_span,
            rows=state.rows, postings=state.postings, block_indptr=state.block_indptr,
            block_lo=state.block_lo, block_hi=state.block_hi, max_sample=state.max_sample,
            max_weight=int(state.weights.max()) if state.weights.shape[0] else 0,
        )
        store._words, store._weights, store._removed = state.words, state.weights, state.removed
        store._row_ids = state.row_ids
        store._rows, store._next_id, store._removed_count = state.rows, state.next_id, state.removed_count
        store._plan = state.plan
        store._usage = None  # counted on first use (health), not at load
        if state.plan is not None:
            # a planned store warns past the limit, as for_target's does; the
            # level is first taken at the first change (not at load: O(N))
            store._watch = health.Watch(None, 0.8, None)
        return store

    # -- invariants -------------------------------------------------------

    def _check(self, deep: bool = True) -> None:
        """Check every invariant; AssertionError with the state on failure.

        ``deep`` also recomputes every detector sample and compares it with
        the postings (O(N · D · s)); for tests.
        """
        with self._rw.reading():
            self._check_unlocked(deep)

    def _check_unlocked(self, deep: bool) -> None:
        state = self._repr()
        n = self._rows
        assert self._words.shape[0] >= n and self._weights.shape[0] >= n and self._removed.shape[0] >= n, state
        words = self._words[:n]
        assert np.array_equal(_kernels.row_weights(words), self._weights[:n].astype(np.int64)), f"weights stale: {state}"
        tail = self._bits % 64
        if tail and n:
            assert not np.any(words[:, -1] >> np.uint64(tail)), f"padding bits set: {state}"
        assert int(self._removed[:n].sum()) == self._removed_count, f"removed count: {state}"
        if n:
            assert self._weights[:n].min() >= self._threshold, f"a stored code is lighter than threshold: {state}"
            # the scan lowers its threshold only if this holds (whole-code detectors)
            assert self._bank._max_weight >= self._weights[:n].max(), f"bank's heaviest weight stale: {state}"
        if self._row_ids is not None:
            ids = self._row_ids[:n]
            assert np.all(np.diff(ids) > 0), f"row ids not ascending: {state}"
            assert n == 0 or (ids[0] >= 0 and ids[-1] < self._next_id), state
        else:
            assert n == self._next_id, f"identity row map but rows != next_id: {state}"
        assert self._bank.rows == n, f"bank rows {self._bank.rows} != {n}: {state}"
        if self._usage is not None:
            live = np.flatnonzero(~self._removed[:n])
            l_ptr, l_bits = _kernels.unpack_indices(words[live], self._weights[live].astype(np.int64))
            assert np.array_equal(self._usage, np.bincount(l_bits, minlength=self._bits)), f"bit usage stale: {state}"
            want_hist = np.bincount(self._weights[live], minlength=self._bits + 1)
            assert np.array_equal(self._weight_hist, want_hist), f"weight histogram stale: {state}"
        expected = None
        if deep and n:
            indptr, indices = _kernels.unpack_indices(words, self._weights[:n].astype(np.int64))
            expected = self._bank.sample(indptr, indices, self._ids_of_rows(np.arange(n)))
        self._bank._check(expected)


def _matches_within(batch: Codes, m: int) -> BatchHits:
    """For each code of a batch, the batch codes with overlap >= m (itself included).

    A detector holding all of a code's bits with threshold ``m`` fires
    exactly when the overlap reaches ``m``, so a scratch store of that kind
    finds every pair, exactly.
    """
    usable = np.flatnonzero(batch._weights >= m)
    n = len(batch)
    if usable.size == 0:
        return BatchHits(np.zeros(n + 1, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64))
    scratch = Store(batch.bits, threshold=m, sample_size=None, detectors=1, seed=0)
    sub = Codes._wrap(np.ascontiguousarray(batch._words[usable]), batch.bits)
    scratch.add(sub)
    hits = scratch._query_batch(batch, m)
    return BatchHits(hits.indptr, usable[hits.ids], hits.overlaps)


def _restore_pickled(data: bytes) -> Store:
    return Store._from_state(_persist.read_bytes(data))


def _grown(array: np.ndarray, room: int, used: int) -> np.ndarray:
    out = np.zeros((room,) + array.shape[1:], dtype=array.dtype)
    out[:used] = array[:used]
    return out
