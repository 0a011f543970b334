"""The row table of a store, and the usage counts of its live codes.

A stored code lives in a *row*: its packed words, its weight and a removal
flag. Ids are handed out 0, 1, 2, ... and never reused; rows and ids
coincide (``row_ids`` is None) until ``compact`` drops removed rows or an
``add`` gives ids with gaps, after which a sorted ``row -> id`` table maps
between them. A table never changes in place where a reader could see it:
``prepare_append`` fills new buffers or the unused room past ``rows``, and
``commit`` swaps them in, which is what a store does under its write lock.
"""

from __future__ import annotations

import numpy as np

from .. import validation
from .._numba import kernels
from .._numba.config import PARALLEL_LOCK
from ..health import summed_counts
from ..codes import (PACKED_MAX_BITS, Codes, adopt_csr, adopt_words, index_dtype, index_table, packed_table,
                     packed_words, row_table)

__all__ = ["RowTable", "PendingRows", "UsageCounts", "LAYOUTS", "layout_for"]


#: The two row layouts: packed words (narrow codes) or sorted set-bit indices (wide ones).
LAYOUTS = ("packed", "sparse")


def layout_for(bits: int) -> str:
    """The layout a store of this width keeps its rows in: packed up to ``PACKED_MAX_BITS``, indices above.

    Examples
    --------
    >>> layout_for(2048), layout_for(2**20)
    ('packed', 'sparse')
    """
    return "packed" if bits <= PACKED_MAX_BITS else "sparse"


class PendingRows:
    """New row arrays for an append, ready to be swapped in by :meth:`RowTable.commit`."""

    __slots__ = ("words", "indptr", "indices", "weights", "removed", "row_ids", "rows", "next_id")

    def __init__(self, words, indptr, indices, weights, removed, row_ids, rows, next_id):
        self.words, self.indptr, self.indices = words, indptr, indices
        self.weights, self.removed, self.row_ids = weights, removed, row_ids
        self.rows, self.next_id = rows, next_id


class RowTable:
    """Stored codes by row — packed words or sorted indices — with weights, removal flags and the id <-> row map.

    ``layout="packed"``: row ``r`` is ``words[r]``. ``layout="sparse"``: its
    set bits are ``indices[indptr[r]:indptr[r + 1]]``, ascending, in the
    narrowest unsigned type for the width; memory follows the set bits.
    :meth:`kernel_table` hands either to the kernels.

    Examples
    --------
    >>> from sparseindex import Codes
    >>> table = RowTable(16)
    >>> batch = Codes.from_indices([[1, 2], [3]], 16)
    >>> table.commit(table.prepare_append(batch, np.array([0, 5])))
    >>> table.row_of(5), table.row_of(1), table.live_ids().tolist()
    (1, -1, [0, 5])
    >>> table.check()
    """

    def __init__(self, bits: int, layout: str = "packed"):
        if layout not in LAYOUTS:
            raise ValueError(f"layout={layout!r} must be one of {LAYOUTS}")
        self.bits = bits
        self.layout = layout
        self.words = np.zeros((0, (bits + 63) // 64), dtype=np.uint64)
        self.indptr = np.zeros(1, dtype=np.int64)  # sparse: rows + 1 used, spare room after
        self.indices = np.zeros(0, dtype=index_dtype(bits))
        self.weights = np.zeros(0, dtype=np.int32)
        self.removed = np.zeros(0, dtype=bool)
        self.row_ids = None  # None: row r holds id r
        self.rows = 0
        self.next_id = 0
        self.removed_count = 0

    @classmethod
    def from_arrays(cls, bits, *, words=None, indptr=None, indices=None, weights, removed, row_ids, rows, next_id,
                    removed_count) -> "RowTable":
        """A table over already-checked arrays (a loaded file), without copying them."""
        table = cls(bits, "packed" if indptr is None else "sparse")
        table.adopt(words, indptr, indices, weights, removed, row_ids, rows, next_id, removed_count)
        return table

    def adopt(self, words, indptr, indices, weights, removed, row_ids, rows, next_id, removed_count) -> None:
        if self.layout == "packed":
            self.words = words
        else:
            self.indptr, self.indices = indptr, indices
        self.weights, self.removed, self.row_ids = weights, removed, row_ids
        self.rows, self.next_id, self.removed_count = rows, next_id, removed_count

    # -- sizes ------------------------------------------------------------

    @property
    def live(self) -> int:
        """Rows that hold a stored (not removed) code."""
        return self.rows - self.removed_count

    @property
    def nbytes(self) -> int:
        total = self.weights.nbytes + self.removed.nbytes
        total += self.words.nbytes if self.layout == "packed" else self.indptr.nbytes + self.indices.nbytes
        return total + (0 if self.row_ids is None else self.row_ids.nbytes)

    def kernel_table(self) -> tuple:
        """The rows as a kernel row table (views of the used part)."""
        if self.layout == "packed":
            return packed_table(self.words)
        return index_table(self.indptr[: self.rows + 1], self.indices[: self.indptr[self.rows]], self.bits)

    # -- ids <-> rows -----------------------------------------------------

    def ids_of(self, rows: np.ndarray) -> np.ndarray:
        """Ids held by ``rows`` (a new int64 array)."""
        if self.row_ids is None:
            return rows.astype(np.int64, copy=True)
        return self.row_ids[rows]

    def row_of(self, code_id: int) -> int:
        """Row of a stored id, or -1 if the id was never stored or was compacted away."""
        if code_id < 0 or code_id >= self.next_id:
            return -1
        if self.row_ids is None:
            return code_id
        r = int(np.searchsorted(self.row_ids[: self.rows], code_id))
        return r if r < self.rows and self.row_ids[r] == code_id else -1

    def rows_of(self, ids: np.ndarray):
        """(rows, live): the row of each id (0 where none) and whether it holds a stored code."""
        if self.row_ids is None:
            rows = ids.copy()
            live = (rows >= 0) & (rows < self.rows)
        else:
            table = self.row_ids[: self.rows]
            rows = np.searchsorted(table, ids)
            inside = rows < self.rows
            rows[~inside] = 0
            live = inside & (table[rows] == ids) if self.rows else np.zeros(ids.shape[0], dtype=bool)
        rows[~live] = 0
        if self.rows:
            live &= ~self.removed[rows]
        return rows, live

    def live_rows_of(self, ids, what: str) -> np.ndarray:
        """Rows of ``ids`` (an int or 1-D ints); KeyError naming the first one not stored."""
        arr = validation.ids_below(ids, self.next_id, what)
        rows, live = self.rows_of(arr)
        if not live.all():
            raise KeyError(f"{what}: id {int(arr[np.flatnonzero(~live)[0]])} was removed")
        return rows

    def live_rows(self) -> np.ndarray:
        return np.flatnonzero(~self.removed[: self.rows])

    def live_ids(self) -> np.ndarray:
        """Ids of every stored code, ascending."""
        return self.ids_of(self.live_rows())

    def codes_of(self, rows: np.ndarray) -> Codes:
        """The codes of ``rows`` as a new batch."""
        if self.layout == "packed":
            return adopt_words(self.words[rows], self.bits)
        indptr, indices = self._gather(rows)
        return adopt_csr(indptr, indices, self.bits)

    def _gather(self, rows):
        lengths = self.indptr[rows + 1] - self.indptr[rows]
        indptr = np.zeros(rows.shape[0] + 1, dtype=np.int64)
        np.cumsum(lengths, out=indptr[1:])
        at = np.repeat(self.indptr[rows] - indptr[:-1], lengths) + np.arange(indptr[-1])
        return indptr, self.indices[at]

    # -- changes ----------------------------------------------------------

    def prepare_append(self, batch: Codes, ids: np.ndarray, *, adopt: bool = False) -> PendingRows:
        """Row arrays holding the current rows and ``batch`` under ``ids`` (ascending, from ``next_id`` up).

        Nothing a reader sees is written: growth copies into new buffers
        (1.5 times the room needed), otherwise the new rows go into the
        room past ``rows``. ``adopt`` lets an empty packed table take the
        batch's words themselves (a batch never changes), sparing a copy of
        fresh memory.
        """
        m, used = len(batch), self.rows
        need = used + m
        weights, removed, row_ids = self.weights, self.removed, self.row_ids
        if row_ids is None and not np.array_equal(ids, np.arange(self.next_id, self.next_id + m)):
            # ids and rows part ways here: start the row -> id table
            row_ids = np.arange(max(weights.shape[0], used), dtype=np.int64)
        words, indptr, indices = self.words, self.indptr, self.indices
        if self.layout == "packed":
            new_words = packed_words(batch)
            if adopt and used == 0:
                return PendingRows(new_words, indptr, indices, batch.weights.astype(np.int32),
                                   np.zeros(m, dtype=bool),
                                   None if row_ids is None else ids.astype(np.int64, copy=True), need, int(ids[-1]) + 1)
            if need > words.shape[0]:
                words = _grown(words, _room(need, words.shape[0]), used)
            words[used:need] = new_words
        else:
            _, b_indptr, b_indices = row_table(batch) if batch.layout == "sparse" else (None, *batch.to_csr())
            start = int(indptr[used])
            end = start + b_indices.shape[0]
            if need + 1 > indptr.shape[0]:
                indptr = _grown(indptr, _room(need + 1, indptr.shape[0]), used + 1)
            if end > indices.shape[0]:
                indices = _grown(indices, _room(end, indices.shape[0]), start)
            indptr[used + 1 : need + 1] = start + b_indptr[1:]
            indices[start:end] = b_indices
        if need > weights.shape[0]:
            room = _room(need, weights.shape[0])
            weights, removed = _grown(weights, room, used), _grown(removed, room, used)
            if row_ids is not None:
                row_ids = _grown(row_ids, room, used)
        elif row_ids is not None and need > row_ids.shape[0]:
            row_ids = _grown(row_ids, weights.shape[0], used)
        weights[used:need] = batch.weights
        removed[used:need] = False
        if row_ids is not None:
            row_ids[used:need] = ids
        return PendingRows(words, indptr, indices, weights, removed, row_ids, need, int(ids[-1]) + 1)

    def commit(self, pending: PendingRows) -> None:
        """Swap in prepared arrays; cannot fail."""
        self.adopt(pending.words, pending.indptr, pending.indices, pending.weights, pending.removed,
                   pending.row_ids, pending.rows, pending.next_id, self.removed_count)

    def mark_removed(self, rows: np.ndarray) -> None:
        self.removed[rows] = True
        self.removed_count += rows.shape[0]

    def compacted(self) -> "RowTable":
        """A new table of the live rows only; ids and ``next_id`` unchanged."""
        live = self.live_rows()
        kept = live.shape[0]
        ids_kept = self.ids_of(live)
        parts = dict(words=np.ascontiguousarray(self.words[live])) if self.layout == "packed" else dict(
            zip(("indptr", "indices"), self._gather(live)))
        return RowTable.from_arrays(
            self.bits, **parts, weights=self.weights[live].copy(), removed=np.zeros(kept, dtype=bool),
            row_ids=None if kept == self.next_id else ids_kept, rows=kept, next_id=self.next_id, removed_count=0)

    # -- derived figures --------------------------------------------------

    def indices_of(self, rows=None):
        """CSR (indptr, set-bit indices as int64) of ``rows`` (None: every row)."""
        rows = np.arange(self.rows) if rows is None else np.asarray(rows, dtype=np.int64)
        if self.layout == "packed":
            return kernels.unpack_indices(self.words[rows], self.weights[rows].astype(np.int64))
        indptr, indices = self._gather(rows)
        return indptr, indices.astype(np.int64)

    def bit_usage(self, rows=None):
        """Set-bit counts of ``rows`` (None: every live row) as ``(bits, counts)``.

        Packed rows: ``bits`` is None and ``counts[b]`` counts bit ``b``.
        Index rows: ``bits`` are the distinct bits set (ascending), so the
        figures follow the set bits, not the width.
        """
        if self.layout == "sparse":
            _, bits = self.indices_of(self.live_rows() if rows is None else rows)
            used, counts = np.unique(bits, return_counts=True)
            return used.astype(np.int64), counts.astype(np.int64)
        if rows is None:
            if self.rows == 0:
                return None, np.zeros(self.bits, dtype=np.int64)
            pick, skip, words = np.zeros(0, dtype=np.int64), self.removed[: self.rows], self.words[: self.rows]
        else:
            pick, skip, words = np.asarray(rows, dtype=np.int64), np.zeros(0, dtype=bool), self.words
            if pick.shape[0] == 0:
                return None, np.zeros(self.bits, dtype=np.int64)
        with PARALLEL_LOCK:
            return None, kernels.bit_usage(words, pick, skip)[: self.bits]

    def weight_hist(self, rows=None) -> np.ndarray:
        """Codes of each weight 0..heaviest among ``rows`` (None: every live row)."""
        weights = self.weights[: self.rows][~self.removed[: self.rows]] if rows is None else self.weights[rows]
        return np.bincount(weights, minlength=1).astype(np.int64)

    def check(self, threshold: int = 1) -> None:
        """Every invariant of the table; AssertionError describing the first that fails."""
        n = self.rows
        state = (f"RowTable(bits={self.bits}, {self.layout}, rows={n}, next_id={self.next_id}, "
                 f"removed={self.removed_count})")
        assert self.weights.shape[0] >= n and self.removed.shape[0] >= n, state
        if self.layout == "packed":
            assert self.words.shape[0] >= n, state
            words = self.words[:n]
            assert np.array_equal(kernels.row_weights(words), self.weights[:n].astype(np.int64)), \
                f"weights stale: {state}"
            tail = self.bits % 64
            if tail and n:
                assert not np.any(words[:, -1] >> np.uint64(tail)), f"padding bits set: {state}"
        else:
            ptr = self.indptr[: n + 1]
            assert self.indptr.shape[0] >= n + 1 and ptr[0] == 0 and np.all(np.diff(ptr) >= 0), f"pointers: {state}"
            assert self.indices.shape[0] >= ptr[-1] and self.indices.dtype == index_dtype(self.bits), state
            assert np.array_equal(np.diff(ptr), self.weights[:n]), f"weights stale: {state}"
            idx = self.indices[: ptr[-1]].astype(np.int64)
            assert idx.size == 0 or idx.max() < self.bits, f"index out of range: {state}"
            step = np.diff(idx)
            inner = np.ones(step.shape[0], dtype=bool)
            inner[ptr[1:-1][ptr[1:-1] > 0] - 1] = False  # a row boundary is not a step inside a row
            assert np.all(step[inner] > 0), f"indices not ascending within a row: {state}"
        assert int(self.removed[:n].sum()) == self.removed_count, f"removed count: {state}"
        if n:
            assert self.weights[:n].min() >= threshold, f"a stored code is lighter than threshold: {state}"
        if self.row_ids is not None:
            ids = self.row_ids[:n]
            assert np.all(np.diff(ids) > 0), f"row ids not ascending: {state}"
            assert n == 0 or (ids[0] >= 0 and ids[-1] < self.next_id), state
        else:
            assert n == self.next_id, f"identity row map but rows != next_id: {state}"


class UsageCounts:
    """Set-bit counts and the weight histogram of the live codes, kept current by every change.

    ``sparse`` counts only the bits in use (``used``, ascending, with
    ``usage[i]`` the count of bit ``used[i]``), for wide stores; otherwise
    ``used`` is None and ``usage[b]`` counts bit ``b``. A loaded store
    starts *uncounted* (counting is O(N)) and counts once, on first need;
    after that every change adds or subtracts its share.
    """

    def __init__(self, bits: int, counted: bool = True, sparse: bool = False):
        self.bits, self.sparse = bits, sparse
        self.used, self.usage, self.weight_hist = self._empty() if counted else (self._empty()[0], None, None)

    def _empty(self):
        return (np.zeros(0, dtype=np.int64) if self.sparse else None,
                np.zeros(0 if self.sparse else self.bits, dtype=np.int64), np.zeros(1, dtype=np.int64))

    @property
    def counted(self) -> bool:
        return self.usage is not None

    def count(self, table: RowTable) -> None:
        self.used, self.usage, self.weight_hist = self._empty()
        self.added(table.bit_usage(), table.weight_hist())

    def after(self, usage: tuple, weight_hist: np.ndarray, sign: int = 1):
        """The counts once ``usage`` = ``(bits, counts)`` of :meth:`RowTable.bit_usage` and a histogram are added
        (``sign`` -1: taken away), as new arrays for :meth:`adopt`; None while uncounted.

        A writer computes them before it takes the write lock (for a wide
        store the merge is O(bits in use)) and adopts them under it.
        """
        if not self.counted:
            return None
        bits, counts = usage
        if not self.sparse:
            if bits is None:
                dense = self.usage + sign * counts
            else:
                dense = self.usage.copy()
                dense[bits] += sign * counts
            return None, dense, summed_counts([self.weight_hist, sign * weight_hist])
        if bits is None:
            bits = np.flatnonzero(counts)
            counts = counts[bits]
        merged = bits if np.array_equal(bits, self.used) else np.union1d(self.used, bits)
        out = np.zeros(merged.shape[0], dtype=np.int64)
        out[np.searchsorted(merged, self.used)] = self.usage
        out[np.searchsorted(merged, bits)] += sign * counts
        return merged.astype(np.int64), out, summed_counts([self.weight_hist, sign * weight_hist])

    def adopt(self, state) -> None:
        """Swap in what :meth:`after` computed (None: nothing to do); cannot fail."""
        if state is not None:
            self.used, self.usage, self.weight_hist = state

    def added(self, usage: tuple, weight_hist: np.ndarray) -> None:
        self.adopt(self.after(usage, weight_hist))

    def removed(self, usage: tuple, weight_hist: np.ndarray) -> None:
        self.adopt(self.after(usage, weight_hist, sign=-1))

    def check(self, table: RowTable) -> None:
        if not self.counted:
            return
        live = table.live_rows()
        _, bits = table.indices_of(live)
        if self.sparse:
            want_bits, want = np.unique(bits, return_counts=True)
            nonzero = self.usage != 0
            assert np.all(self.usage >= 0), "bit usage negative"
            assert np.array_equal(self.used[nonzero], want_bits) and np.array_equal(self.usage[nonzero], want), \
                "bit usage stale"
        else:
            assert np.array_equal(self.usage, np.bincount(bits, minlength=self.bits)), "bit usage stale"
        hist = np.trim_zeros(self.weight_hist, "b")
        assert np.array_equal(hist, np.trim_zeros(table.weight_hist(), "b")), "weight histogram stale"


def _room(need: int, current: int) -> int:
    return max(need, int(current * 1.5))


def _grown(array: np.ndarray, room: int, used: int) -> np.ndarray:
    out = np.zeros((room,) + array.shape[1:], dtype=array.dtype)
    out[:used] = array[:used]
    return out
