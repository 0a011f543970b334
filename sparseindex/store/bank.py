"""Detector banks: sampling, postings, threshold scans and compaction.

Every stored code (a *row* here) owns ``detectors`` detectors with ids
``row * detectors + j``. A detector samples ``sample_size`` of its code's set
bits (all of them when ``sample_size`` is None or the code is lighter) and fires
when at least ``threshold`` of them are set in a query.

Postings map each bit to the detectors that sampled it. They live in
*blocks*, each over a run of consecutive detector ids inside one *span* of
``block_span`` = 65,536 ids, stored as ``uint16`` offsets from the block's
first detector (2 bytes a posting). A query counts block by block, so its
counters are one span long and stay in cache however large the store grows.
Each ``add`` appends new blocks (cost proportional to the batch, nothing is
rebuilt); a full span is merged into one block, and inside the span still
filling the newest block merges into the one before whenever it is at least
half its size, so every posting is rewritten O(log span) times at most.
``compact`` rebuilds the postings of the surviving rows from scratch.

Postings are indexed by *column*. A narrow bank's column ``b`` is bit ``b``.
A wide bank (above ``COLUMN_MAP_MIN_BITS``) keeps a *column map*: the
sorted bits that any stored code sets, column ``c`` being bit
``columns[c]``, plus one spare last column that is always empty and stands
for every bit no code sets. Its per-block tables are then sized by the
bits in use, not by the width: a 2^32-bit bank holding one code costs
kilobytes. The map only grows (``compact`` rebuilds it); a query maps its
bits through a bitmap with per-word ranks when the map is dense, by binary
search otherwise.

This layer knows nothing of ids, codes or the store; it sees rows only.
"""

from __future__ import annotations

import numpy as np

from .._numba import kernels as _kernels
from .._numba.config import PARALLEL_LOCK, PARALLEL_SINGLE_QUERY, thread_count
from ..codes import index_dtype

#: Detector ids are int32 in results and int64 in kernels; keep them int32-sized.
MAX_DETECTORS_TOTAL = 2**31 - 1

#: Detectors per postings block: offsets within a block fit uint16, and a
#: block's counters (64 KiB of uint8) stay in the second-level cache.
BLOCK_SPAN = 2**16

#: Widths above which a bank maps used bits to columns (below it, a
#: table per bit is small and saves the query's binary searches).
COLUMN_MAP_MIN_BITS = 4096

#: An empty column map, and the "no map" marker kernels take.
NO_COLUMNS = np.zeros(0, dtype=np.int64)

#: Set bits mapped to columns per step of an append (bounds its temporaries).
MAP_CHUNK = 1 << 22

#: A column map this dense or denser (mapped bits per bit of the width) is
#: looked up through a bitmap with per-word ranks (bits / 32 bytes, about
#: 8 bytes per mapped bit at most): two cached reads per query bit instead
#: of a binary search's chain of cache misses.
BITMAP_MIN_DENSITY = 1 / 64

#: A single query splits its blocks among threads from this many blocks up.
PARALLEL_MIN_BLOCKS = 2

#: Counter rows of parallel single queries, by (chunks, span, dtype); used
#: only under PARALLEL_LOCK (see ``DetectorBank._chunk_counters``).
_CHUNK_COUNTERS: dict = {}

#: Codes sampled per kernel call in ``append`` (bounds the temporaries).
APPEND_CHUNK_ROWS = 2**18

#: What checking one candidate costs (finding it among the counters,
#: sorting it among the fired, reading its code, AND + popcount), in
#: postings counted; it sets how far a query's scan may lower its threshold
#: (kernel ``_prefix_plan``). Chosen with ``benchmarks/bench_prefix.py``
#: (DEVELOPERS.md, "Measured choices"); query time hardly depends on it.
VERIFY_COST_POSTINGS = 256.0


class DetectorBank:
    """Postings of every detector of every row, and the scans over them.

    Parameters
    ----------
    bits : int
        Width of the codes.
    threshold, sample_size, detectors, seed
        As in :class:`sparseindex.Store` (validated there).
    block_span : int
        Detectors per postings block (at most 65,536; smaller in tests to
        exercise many blocks).
    column_map : bool, optional
        Map used bits to columns (see the module notes); default: above
        ``COLUMN_MAP_MIN_BITS`` bits.

    Examples
    --------
    >>> import numpy as np
    >>> bank = DetectorBank(bits=16, threshold=2, sample_size=None, detectors=1, seed=0)
    >>> from sparseindex.codes import packed_table
    >>> words = np.array([[(1 << 1) | (1 << 4) | (1 << 9)]], dtype=np.uint64)
    >>> bank.append(packed_table(words), np.array([0]), np.array([3]))
    >>> bank.postings_count, bank.rows
    (3, 1)
    """

    def __init__(self, bits, threshold, sample_size, detectors, seed, block_span=BLOCK_SPAN, column_map=None):
        if not 1 <= block_span <= 2**16:
            raise ValueError(f"block_span={block_span} must be in 1..65536")
        #: the column map (ascending bits), or None: column b is bit b
        mapped = bits > COLUMN_MAP_MIN_BITS if column_map is None else column_map
        self.columns = NO_COLUMNS if mapped else None
        self.bits = bits
        self.threshold = threshold
        self.sample_size = sample_size
        self.detectors = detectors
        self.seed = seed
        self.block_span = block_span
        self.rows = 0
        self._post = np.zeros(0, dtype=np.uint16)  # buffer; room >= used
        self._used = 0
        self._block_indptr = np.zeros((0, self.column_count + 1), dtype=np.int64)
        self._block_lo = np.zeros(0, dtype=np.int64)
        self._block_hi = np.zeros(0, dtype=np.int64)
        self._max_sample = 0  # largest sample of any detector (sizes the counters)
        self._max_weight = 0  # heaviest code ever appended (says whether samples are whole codes)
        self._bit_postings = np.zeros(self.column_count, dtype=np.int64)  # postings of each column over all blocks
        self._lookup_of = None  # (the column map it was made for, its bitmap lookup or None)
        #: cost of a candidate check in postings (``float("inf")``: never lower the scan threshold)
        self.verify_cost = VERIFY_COST_POSTINGS

    # -- building --------------------------------------------------------

    def sample(self, indptr: np.ndarray, indices: np.ndarray, code_ids: np.ndarray):
        """Detector samples for a batch of codes (kernel ``sample_detectors``).

        Returns ``(det_indptr, det_bits)`` in row-major detector order. Pure:
        the bank is not changed.
        """
        sample_size = -1 if self.sample_size is None else self.sample_size
        return _kernels.sample_detectors(
            indptr, indices, np.asarray(code_ids, dtype=np.int64), self.detectors, sample_size, np.uint64(self.seed)
        )

    def append(self, table: tuple, code_ids: np.ndarray, weights: np.ndarray) -> None:
        """Sample and index the detectors of new rows (a kernel row table, their ids and weights).

        :meth:`prepare_append` then :meth:`commit_append`. O(batch postings).
        """
        self.commit_append(self.prepare_append(table, code_ids, weights))

    def prepare_append(self, table: tuple, code_ids: np.ndarray, weights: np.ndarray,
                       count_usage: bool = True) -> "PendingAppend":
        """Everything an append computes, without changing what readers see.

        The new postings are sized from the rows' weights first, so the
        (grown) postings buffer is allocated once and kernel
        ``build_blocks_parallel`` writes straight into it — past the used
        part, where no query looks — in chunks of ``APPEND_CHUNK_ROWS`` rows
        run in parallel. Peak memory is the new buffer plus small block
        tables. An error (MemoryError included) leaves the bank as it was.
        Only one thread may prepare or commit at a time.
        """
        weights = np.asarray(weights, dtype=np.int64)
        rows = weights.shape[0]
        if (self.rows + rows) * self.detectors > MAX_DETECTORS_TOTAL:
            raise OverflowError(
                f"a store holds at most {MAX_DETECTORS_TOTAL // self.detectors:,} codes with "
                f"detectors={self.detectors}; adding {rows:,} to {self.rows:,} exceeds it"
            )
        sample_size = -1 if self.sample_size is None else self.sample_size
        code_ids = np.asarray(code_ids, dtype=np.int64)
        columns, table, block_indptr_before, bit_postings_before = self._mapped(table, weights)
        n_cols = self.column_count if columns is None else columns.shape[0] + 1
        take = weights if sample_size < 0 else np.minimum(weights, sample_size)
        chunk_rows = np.arange(0, rows + APPEND_CHUNK_ROWS, APPEND_CHUNK_ROWS, dtype=np.int64)
        chunk_rows[-1] = rows
        chunk_rows = np.unique(chunk_rows)
        per_chunk = np.add.reduceat(take, chunk_rows[:-1]) * self.detectors if rows else np.zeros(0, np.int64)
        post_starts = self._used + np.concatenate([[0], np.cumsum(per_chunk)[:-1]]).astype(np.int64)
        first_det = (self.rows + chunk_rows[:-1]) * self.detectors
        last_det = (self.rows + chunk_rows[1:]) * self.detectors
        n_blocks = (last_det - 1) // self.block_span - first_det // self.block_span + 1
        block_starts = np.concatenate([[0], np.cumsum(n_blocks)[:-1]]).astype(np.int64)
        need = self._used + int(per_chunk.sum())
        buffer = self._post
        if need > buffer.shape[0]:
            # exact size for the first batch (a store built in one add wastes
            # nothing); grow by 1.5x after that
            room = need if self._used == 0 else max(need, int(buffer.shape[0] * 1.5))
            buffer = np.empty(room, dtype=np.uint16)
            buffer[: self._used] = self._post[: self._used]
        total_blocks = int(n_blocks.sum())
        new_indptr = np.empty((total_blocks, n_cols + 1), dtype=np.int64)
        new_lo = np.empty(total_blocks, dtype=np.int64)
        new_hi = np.empty(total_blocks, dtype=np.int64)
        heaviest = int(weights.max()) if rows else 0
        usage = np.zeros((chunk_rows.shape[0] - 1, n_cols), dtype=np.int64)
        weight_hist = np.zeros((chunk_rows.shape[0] - 1, heaviest + 1), dtype=np.int64)
        max_sample = self._max_sample
        max_weight = max(self._max_weight, heaviest)
        if rows:
            args = (table, code_ids, self.rows, self.detectors, sample_size, np.uint64(self.seed), n_cols,
                    self.block_span, chunk_rows, buffer, post_starts, new_indptr, new_lo, new_hi, block_starts,
                    usage, weight_hist, count_usage)
            if chunk_rows.shape[0] > 2:
                with PARALLEL_LOCK:
                    biggest = _kernels.build_blocks_parallel(*args)
            else:  # one chunk: starting the thread team would cost more than the work
                biggest = _kernels.build_blocks_serial(*args)
            max_sample = max(max_sample, int(biggest.max()))
        block_indptr = np.concatenate([block_indptr_before, new_indptr])
        block_lo = np.concatenate([self._block_lo, new_lo])
        block_hi = np.concatenate([self._block_hi, new_hi])
        bit_postings = bit_postings_before + np.diff(new_indptr, axis=1).sum(axis=0)
        usage = usage.sum(axis=0)
        used_bits = None if columns is None else columns
        if columns is not None:
            usage = usage[:-1]  # the spare column counts nothing
        return PendingAppend(self.rows, rows, buffer, block_indptr, block_lo, block_hi, need, max_sample,
                             (used_bits, usage), weight_hist.sum(axis=0), max_weight, bit_postings, columns,
                             None if columns is None else self._lookup_for(columns))

    def _mapped(self, table: tuple, weights: np.ndarray):
        """``(columns, table, block_indptr, bit_postings)`` for an append of ``table``'s rows.

        Without a column map: the bank's own. With one: the map grown by
        the batch's new bits, the batch as a table of columns (each row in
        its bit order, which the column order keeps, so the samples are
        those of the bits), and the existing tables re-indexed onto the
        grown map: a new column starts where the next old one did, so its
        runs are empty. New arrays only; the bank is not changed.
        """
        if self.columns is None:
            return None, table, self._block_indptr, self._bit_postings
        words, indptr, indices = table
        if indptr.shape[0] == 0:
            indptr, indices = _kernels.unpack_indices(words, np.asarray(weights, dtype=np.int64))
        old = self.columns
        seen = np.unique(indices).astype(np.int64)
        grown = old if np.isin(seen, old, assume_unique=True).all() else np.union1d(old, seen)
        cols = np.empty(indices.shape[0], dtype=index_dtype(grown.shape[0] + 1))
        for a in range(0, indices.shape[0], MAP_CHUNK):  # in pieces: no batch-sized int64 temporary
            cols[a : a + MAP_CHUNK] = np.searchsorted(grown, indices[a : a + MAP_CHUNK])
        col_table = (np.zeros((0, 1), dtype=np.uint64), indptr, cols)
        if grown is old:
            return old, col_table, self._block_indptr, self._bit_postings
        bi = self._block_indptr
        start_of = np.concatenate([np.searchsorted(old, grown), [old.shape[0] + 1, old.shape[0] + 1]])
        bit_postings = np.zeros(grown.shape[0] + 1, dtype=np.int64)
        bit_postings[np.searchsorted(grown, old)] = self._bit_postings[:-1]
        return grown, col_table, bi[:, start_of], bit_postings

    def commit_append(self, pending: "PendingAppend") -> None:
        """Make a prepared append visible (hold the store's write lock).

        Swaps in the new tables and merges blocks; O(postings merged), which
        is O(span) at most and O(log span) per posting over time.
        """
        if pending.base_rows != self.rows:
            raise RuntimeError("the bank changed between prepare_append and commit_append")
        self._post = pending.buffer
        self._block_indptr, self._block_lo, self._block_hi = pending.block_indptr, pending.block_lo, pending.block_hi
        self._used = pending.used
        self.rows += pending.rows
        self._max_sample = pending.max_sample
        self._max_weight, self._bit_postings = pending.max_weight, pending.bit_postings
        if pending.columns is not None:
            self.columns, self._lookup_of = pending.columns, pending.lookup
        self._merge_blocks()

    @classmethod
    def from_arrays(cls, bits, threshold, sample_size, detectors, seed, block_span, *, rows, postings, block_indptr,
                    block_lo, block_hi, max_sample, max_weight, columns=None) -> "DetectorBank":
        """A bank over arrays that were validated elsewhere (a loaded file).

        The arrays are adopted, not copied: they may be memory-mapped.
        ``max_weight`` is the heaviest stored code's weight; ``columns`` the
        column map (int64, ascending), or None for none.
        """
        bank = cls(bits, threshold, sample_size, detectors, seed, block_span, column_map=columns is not None)
        bank.restore(rows, postings, block_indptr, block_lo, block_hi, max_sample, max_weight, columns)
        return bank

    def restore(self, rows, postings, block_indptr, block_lo, block_hi, max_sample, max_weight, columns=None) -> None:
        """Adopt the arrays of :meth:`from_arrays` into this (empty) bank."""
        self.columns = columns
        self.rows = rows
        self._post = postings
        self._used = postings.shape[0]
        self._block_indptr, self._block_lo, self._block_hi = block_indptr, block_lo, block_hi
        self._max_sample = max_sample
        self._max_weight = max_weight
        self._bit_postings = (np.diff(block_indptr, axis=1).sum(axis=0) if block_lo.shape[0]
                              else np.zeros(self.column_count, dtype=np.int64))

    def arrays(self):
        """``(postings, block_indptr, block_lo, block_hi, columns)``, used part only (views; columns may be None)."""
        return self._post[: self._used], self._block_indptr, self._block_lo, self._block_hi, self.columns

    @property
    def column_count(self) -> int:
        """Columns of the postings tables: the width, or the mapped bits plus the spare column."""
        return self.bits if self.columns is None else self.columns.shape[0] + 1

    def query_columns(self, q_bits: np.ndarray) -> np.ndarray:
        """The postings columns of a query's sorted bits (int64); bits no code sets go to the spare column."""
        if self.columns is None:
            return q_bits
        lookup = self._lookup()
        if lookup is not None:
            return _kernels.columns_of_bits(q_bits, lookup[0], lookup[1], self.columns.shape[0])
        at = np.searchsorted(self.columns, q_bits)
        known = at < self.columns.shape[0]
        known[known] = self.columns[at[known]] == q_bits[known]
        at[~known] = self.columns.shape[0]
        return at

    def _merge_blocks(self) -> None:
        """Keep few blocks: one per full span, O(log) in the span still filling.

        Blocks of one span that is no longer the last (or is complete) merge
        into one; in the last span the newest block merges into the one
        before while it holds at least half as many postings, so that many
        small adds rewrite each posting O(log) times in total.
        """
        span = self.block_span
        while True:
            n = self._block_lo.shape[0]
            if n < 2:
                return
            group = self._block_lo // span
            same_as_next = np.flatnonzero(group[:-1] == group[1:])
            last_group_start = int(np.flatnonzero(group != group[-1])[-1] + 1) if np.any(group != group[-1]) else 0
            split = same_as_next[same_as_next < last_group_start - 1] if last_group_start else same_as_next[:0]
            if split.size:
                # the last earlier span that is split: merge all its blocks
                g = group[split[-1]]
                members = np.flatnonzero(group == g)
                self._merge_range(int(members[0]), int(members[-1]) + 1)
                continue
            k = last_group_start
            if n - k < 2:
                return
            if self._block_hi[n - 1] - self._block_lo[k] == span:
                self._merge_range(k, n)
                continue
            sizes = self._block_indptr[:, -1] - self._block_indptr[:, 0]
            if 2 * sizes[n - 1] < sizes[n - 2]:
                return
            self._merge_range(n - 2, n)

    def _merge_range(self, first: int, last: int) -> None:
        start = int(self._block_indptr[first, 0])
        indptr, merged = _kernels.merge_blocks(
            self._post, self._block_indptr, self._block_lo, first, last, start
        )
        self._post[start : start + merged.shape[0]] = merged
        self._block_indptr = np.concatenate([self._block_indptr[:first], indptr[None, :], self._block_indptr[last:]])
        self._block_lo = np.concatenate([self._block_lo[: first + 1], self._block_lo[last:]])
        self._block_hi = np.concatenate([self._block_hi[:first], self._block_hi[last - 1 : last], self._block_hi[last:]])

    def _lookup(self):
        """``(bitmap, rank)`` for the current column map when it is dense enough (see BITMAP_MIN_DENSITY), else None.

        An append makes it for its grown map (:meth:`prepare_append`); a loaded bank on first need.
        """
        kept = self._lookup_of
        if kept is None or kept[0] is not self.columns:
            kept = self._lookup_of = self._lookup_for(self.columns)
        return kept[1]

    def _lookup_for(self, columns):
        made = None
        if columns is not None and columns.shape[0] >= BITMAP_MIN_DENSITY * self.bits:
            made = _kernels.column_bitmap(columns, (self.bits + 63) // 64)
        return columns, made

    def rebuilt(self, table: tuple, code_ids: np.ndarray, weights: np.ndarray) -> "DetectorBank":
        """A new bank holding exactly these rows (used by compaction)."""
        fresh = DetectorBank(self.bits, self.threshold, self.sample_size, self.detectors, self.seed, self.block_span,
                             column_map=self.columns is not None)
        fresh.verify_cost = self.verify_cost
        if weights.shape[0]:
            fresh.append(table, code_ids, weights)
        return fresh

    # -- scanning --------------------------------------------------------

    @property
    def postings_count(self) -> int:
        """Postings held, including those of removed rows not yet compacted."""
        return self._used

    @property
    def block_count(self) -> int:
        return self._block_lo.shape[0]

    @property
    def nbytes(self) -> int:
        """Bytes held by the postings buffer and block tables."""
        total = self._post.nbytes + self._block_indptr.nbytes + self._block_lo.nbytes + self._block_hi.nbytes
        lookup = None if self._lookup_of is None else self._lookup_of[1]
        total += 0 if lookup is None else lookup[0].nbytes + lookup[1].nbytes
        return total + self._bit_postings.nbytes + (0 if self.columns is None else self.columns.nbytes)

    @property
    def max_weight(self) -> int:
        """Weight of the heaviest code ever appended (the scan lowers its threshold only below it)."""
        return self._max_weight

    @property
    def whole_codes(self) -> bool:
        """Whether every detector samples all of its code's bits (then it fires exactly when overlap >= threshold)."""
        return self.sample_size is None or self._max_weight <= self.sample_size

    def counter_dtype(self):
        top = max(self._max_sample, self.threshold)
        return np.uint8 if top < 2**8 else np.uint16 if top < 2**16 else np.int32

    def new_counters(self) -> np.ndarray:
        """A zeroed counter array for one block, of the narrowest safe dtype."""
        return np.zeros(self.block_span, dtype=self.counter_dtype())

    def _chunk_counters(self, n_chunks: int) -> np.ndarray:
        """Zeroed counter rows for a parallel single query, one per chunk; call only holding PARALLEL_LOCK.

        Only one parallel kernel runs at a time, so one set per shape serves
        every bank and thread; kernels leave it zeroed.
        """
        key = (n_chunks, self.block_span, np.dtype(self.counter_dtype()).str)
        rows = _CHUNK_COUNTERS.get(key)
        if rows is None:
            rows = _CHUNK_COUNTERS[key] = np.zeros((n_chunks, self.block_span), dtype=self.counter_dtype())
        return rows

    def counters_fit(self, counters: np.ndarray) -> bool:
        return counters.dtype == self.counter_dtype() and counters.shape[0] >= self.block_span

    def scan_one(self, q_bits, q_words, table, removed, min_overlap, counters):
        """Rows hit by one query, with their exact overlaps (kernel ``query_one``).

        ``q_bits`` are the query's sorted set bits; ``q_words`` its packed
        row for a packed ``table`` (for an index table, an empty row: the
        exact check merges with ``q_bits``).
        ``counters`` comes from :meth:`new_counters` and is returned zeroed.
        O(postings of the query's bits + hits * words per code). With more
        than one block and more than one thread, the blocks are split among
        the threads (kernel ``query_one_parallel``) — unless another
        thread is in a parallel kernel already, in which case this one scans
        serially rather than wait.
        """
        q_cols = self.query_columns(q_bits)
        postings = (self._post, self._block_indptr, self._block_lo, self._block_hi)
        rest = (self.threshold, self.detectors, removed, table, min_overlap, self._bit_postings, self.whole_codes,
                self.verify_cost)
        threads = thread_count()
        if (
            PARALLEL_SINGLE_QUERY
            and threads > 1
            and self.block_count >= PARALLEL_MIN_BLOCKS
            and PARALLEL_LOCK.acquire(blocking=False)
        ):
            try:
                chunk_counters = self._chunk_counters(min(self.block_count, threads))
                try:
                    return _kernels.query_one_parallel(q_cols, q_bits, q_words, *postings, chunk_counters, *rest)
                except BaseException:
                    _CHUNK_COUNTERS.clear()  # a scan cut short may leave counts behind
                    raise
            finally:
                PARALLEL_LOCK.release()
        return _kernels.query_one(q_cols, q_bits, q_words, *postings, counters, *rest)

    def nearest(self, q_bits, removed, k):
        """``(rows, overlaps)`` of the k live rows nearest one query (sorted bits), from the postings (kernel
        ``nearest_from_postings``); only when :attr:`whole_codes`. O(query postings · log)."""
        return _kernels.nearest_from_postings(self.query_columns(q_bits), self._post, self._block_indptr,
                                              self._block_lo, self.detectors, removed, self.rows, k)

    def scan_many(self, q_indptr, q_bits, q_words, table, removed, min_overlap):
        """Rows hit by each of many queries, in parallel (kernel ``query_batch``).

        Returns ``(counts, rows, overlaps)``: ``counts[i]`` hits for query
        ``i``, laid end to end in query order, rows ascending within a query.
        """
        n_queries = q_indptr.shape[0] - 1
        if n_queries == 0:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty, empty
        counter_like = self.new_counters()
        q_cols = self.query_columns(q_bits)
        tasks = max(1, min(n_queries, 4 * thread_count()))
        pending = [(0, n_queries)]
        per_query = 8  # slab room per query; grows when a slab fills up
        counts = np.zeros(n_queries, dtype=np.int64)
        pieces: list[tuple[int, np.ndarray, np.ndarray]] = []
        while pending:
            lo_list, hi_list = _split_ranges(pending, tasks)
            lo = np.array(lo_list, dtype=np.int64)
            hi = np.array(hi_list, dtype=np.int64)
            room = (hi - lo) * per_query + 64
            slab_hi = np.cumsum(room)
            slab_lo = slab_hi - room
            out_rows = np.empty(int(slab_hi[-1]), dtype=np.int64)
            out_ov = np.empty(int(slab_hi[-1]), dtype=np.int64)
            with PARALLEL_LOCK:
                done = _kernels.query_batch(
                    q_indptr,
                    q_cols,
                    q_bits,
                    q_words,
                    self._post,
                    self._block_indptr,
                    self._block_lo,
                    self._block_hi,
                    counter_like,
                    self.threshold,
                    self.detectors,
                    removed,
                    table,
                    min_overlap,
                    lo,
                    hi,
                    slab_lo,
                    slab_hi,
                    out_rows,
                    out_ov,
                    counts,
                    self._bit_postings,
                    self.whole_codes,
                    self.verify_cost,
                )
            pending = []
            for c in range(lo.shape[0]):
                n_hits = int(counts[lo[c] : done[c]].sum())
                a = int(slab_lo[c])
                pieces.append((int(lo[c]), out_rows[a : a + n_hits].copy(), out_ov[a : a + n_hits].copy()))
                if done[c] < hi[c]:
                    pending.append((int(done[c]), int(hi[c])))
            per_query *= 8
        pieces.sort(key=lambda p: p[0])
        rows = np.concatenate([p[1] for p in pieces])
        overlaps = np.concatenate([p[2] for p in pieces])
        return counts, rows, overlaps

    # -- inspection ------------------------------------------------------

    def postings_of(self, bit: int) -> np.ndarray:
        """All detector ids that sampled ``bit`` (across blocks, ascending)."""
        c = int(self.query_columns(np.array([bit], dtype=np.int64))[0])
        parts = [
            self._block_lo[k] + self._post[self._block_indptr[k, c] : self._block_indptr[k, c + 1]].astype(np.int64)
            for k in range(self.block_count)
        ]
        return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)

    def check(self, expected_samples=None) -> None:
        """Invariants: block ranges, offsets monotone and in range, ids sorted.

        ``expected_samples`` (optional ``(det_indptr, det_bits)`` for every
        row) must then equal the postings exactly. Raises AssertionError
        with the state printed.
        """
        bi, lo, hi = self._block_indptr, self._block_lo, self._block_hi
        state = (
            f"rows={self.rows} used={self._used} blocks={lo.shape[0]} buffer={self._post.shape[0]} "
            f"lo={lo[:6].tolist()} hi={hi[:6].tolist()}"
        )
        span = self.block_span
        assert bi.ndim == 2 and bi.shape[1] == self.column_count + 1 and bi.shape[0] == lo.shape[0] == hi.shape[0], state
        if self.columns is not None:
            cols = self.columns
            assert cols.dtype == np.int64 and np.all(np.diff(cols) > 0), f"column map not ascending: {state}"
            assert cols.size == 0 or (cols[0] >= 0 and cols[-1] < self.bits), f"column map out of range: {state}"
            assert np.all(bi[:, -2] == bi[:, -1]), f"the spare column holds postings: {state}"
        assert self._used <= self._post.shape[0], state
        if lo.shape[0]:
            assert lo[0] == 0 and hi[-1] == self.rows * self.detectors, f"blocks do not cover the detectors: {state}"
            assert np.all(hi > lo) and np.all(lo[1:] == hi[:-1]), f"block ranges not consecutive: {state}"
            assert np.all((hi - 1) // span == lo // span), f"a block crosses a span boundary: {state}"
            assert bi[0, 0] == 0 and bi[-1, -1] == self._used, state
            assert np.all(np.diff(bi, axis=1) >= 0), f"offsets not monotone: {state}"
            assert np.all(bi[1:, 0] == bi[:-1, -1]), f"blocks not contiguous: {state}"
            for k in range(lo.shape[0]):
                seg = self._post[bi[k, 0] : bi[k, -1]]
                assert seg.size == 0 or int(seg.max()) < hi[k] - lo[k], f"offset beyond block {k}: {state}"
            groups = lo // span
            full_spans = np.unique(groups[:-1][groups[:-1] == groups[1:]])
            last = groups[-1]
            assert np.all(full_spans == last), f"a full span is split into several blocks: {state}"
            tail = bi[groups == last]
            limit = 2 + int(np.log2(1 + tail[-1, -1] - tail[0, 0]))
            assert tail.shape[0] <= limit, f"too many blocks in the last span: {state}"
            assert np.array_equal(self._bit_postings, np.diff(bi, axis=1).sum(axis=0)), f"bit postings stale: {state}"
        else:
            assert self._used == 0 and self.rows == 0, state
            assert not self._bit_postings.any(), f"bit postings stale: {state}"
        column, detector = self._every_posting()
        inner = np.ones(max(0, column.shape[0] - 1), dtype=bool)
        inner[np.flatnonzero(np.diff(column))] = False  # a step into the next column is not a step inside one
        assert np.all(np.diff(detector)[inner] > 0), f"a column's postings are not strictly ascending: {state}"
        if expected_samples is not None:
            det_indptr, det_bits = expected_samples
            det_of = np.repeat(np.arange(det_indptr.shape[0] - 1), np.diff(det_indptr))
            want_col = self.query_columns(det_bits.astype(np.int64))
            if self.columns is not None:
                assert not np.any(want_col == self.columns.shape[0]), f"a sampled bit is not in the column map: {state}"
            order = np.lexsort((det_of, want_col))
            assert np.array_equal(want_col[order], column) and np.array_equal(det_of[order], detector), \
                f"postings differ from the detector samples: {state}"

    def _every_posting(self):
        """``(column, detector)`` of every posting, ordered by column then detector id (when the bank is sound)."""
        bi, lo = self._block_indptr, self._block_lo
        if lo.shape[0] == 0:
            return np.zeros(0, np.int64), np.zeros(0, np.int64)
        runs = np.diff(bi, axis=1)
        column = np.repeat(np.tile(np.arange(runs.shape[1]), runs.shape[0]), runs.ravel())
        detector = np.repeat(lo, bi[:, -1] - bi[:, 0]) + self._post[: self._used].astype(np.int64)
        order = np.argsort(column, kind="stable")  # block by block inside a column: detector ids ascend
        return column[order], detector[order]


class PendingAppend:
    """What :meth:`DetectorBank.prepare_append` computed, waiting for commit."""

    __slots__ = ("base_rows", "rows", "buffer", "block_indptr", "block_lo", "block_hi", "used", "max_sample",
                 "usage", "weight_hist", "max_weight", "bit_postings", "columns", "lookup")

    def __init__(self, base_rows, rows, buffer, block_indptr, block_lo, block_hi, used, max_sample, usage,
                 weight_hist, max_weight, bit_postings, columns, lookup):
        self.base_rows, self.rows, self.buffer = base_rows, rows, buffer
        self.block_indptr, self.block_lo, self.block_hi = block_indptr, block_lo, block_hi
        self.used, self.max_sample = used, max_sample
        #: set-bit counts of the new rows as ``(bits, counts)`` (bits None: counts[b] is bit b's),
        #: and their weight histogram
        self.usage, self.weight_hist = usage, weight_hist
        #: heaviest code so far and each column's postings over all blocks, after the append
        self.max_weight, self.bit_postings = max_weight, bit_postings
        #: the column map after the append (None: the bank has none), and its lookup (``_lookup_for``)
        self.columns, self.lookup = columns, lookup


def _split_ranges(ranges, tasks):
    """Cut query ranges into about ``tasks`` contiguous pieces."""
    total = sum(hi - lo for lo, hi in ranges)
    step = max(1, -(-total // tasks))
    los, his = [], []
    for lo, hi in ranges:
        while lo < hi:
            end = min(hi, lo + step)
            los.append(lo)
            his.append(end)
            lo = end
    return los, his
