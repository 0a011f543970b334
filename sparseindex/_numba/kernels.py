"""numba kernels: arrays in, arrays out, no validation.

Every function here trusts its caller (the public wrappers in ``codes``,
``bank`` and ``store``) for shapes, dtypes and index ranges: kernels run
without bounds checks. Options come from :mod:`sparseindex._config`.

Layout conventions
------------------
* Packed codes: ``uint64`` words, bit ``i`` in word ``i // 64`` at position
  ``i % 64``; padding bits above ``bits`` are zero.
* CSR index lists: ``indptr`` (int64, length rows + 1) and ``indices``
  (int64), each row sorted ascending.
* Postings: blocks over consecutive detector ranges
  ``block_lo[k]..block_hi[k]-1`` (never more than ``block_span`` = 65,536
  detectors). ``post`` holds ``uint16`` offsets ``detector - block_lo[k]``;
  ``block_indptr`` (int64, shape (blocks, bits + 1)) holds *absolute*
  positions in ``post``: the postings of bit ``b`` in block ``k`` are
  ``post[block_indptr[k, b]:block_indptr[k, b + 1]]``, ascending. Detector
  ``d`` belongs to row ``d // detectors``.
"""

from __future__ import annotations

import numpy as np

from .config import DISABLE_JIT, inline_kernel, kernel, on_first_use, parallel_kernel, prange

# ---------------------------------------------------------------------------
# bit tricks and a counter-based random stream
# ---------------------------------------------------------------------------

_GOLDEN = 0x9E3779B97F4A7C15
_MIX1 = 0xBF58476D1CE4E5B9
_MIX2 = 0x94D049BB133111EB
_MASK64 = 0xFFFFFFFFFFFFFFFF

if DISABLE_JIT:
    # Plain-Python twins of the intrinsics below: same results, no numpy
    # scalar overflow warnings.

    def popcount64(x):
        return int(x).bit_count()

    def mix64(z):
        """splitmix64 finaliser (Steele, Lea & Flood, OOPSLA 2014)."""
        z = int(z) & _MASK64
        z = ((z ^ (z >> 30)) * _MIX1) & _MASK64
        z = ((z ^ (z >> 27)) * _MIX2) & _MASK64
        return np.uint64(z ^ (z >> 31))

    def _detector_state(seed, code_id, j):
        base = int(mix64(int(seed) ^ int(mix64(int(code_id)))))
        return np.uint64(int(mix64((base + (int(j) + 1) * _GOLDEN) & _MASK64)))

    def _rng_next(state):
        state = (int(state) + _GOLDEN) & _MASK64
        return np.uint64(state), mix64(state)

    def prefetch(array, index):
        """A cache hint: nothing to do in plain Python."""

else:

    def _define_intrinsics(numba):
        """The LLVM intrinsics kernels use, made when numba is first imported."""
        from llvmlite import ir
        from numba import types
        from numba.core import cgutils
        from numba.extending import intrinsic

        @intrinsic
        def prefetch(typingctx, array, index):
            """Hint the CPU to fetch ``array[index]`` into cache (LLVM ``prefetch``, read, locality 2).

            Used where the next place a kernel reads is known but far away (the
            next block's postings runs), so the fetch overlaps current work. A
            hint never faults, even for an address past the array. Locality 2
            (the second-level cache, not the first): a block's worth of
            prefetched runs is larger than the first-level cache and would
            evict the counters and each other there (DEVELOPERS.md, "Measured
            choices").
            """
            sig = types.void(array, index)

            def codegen(context, builder, signature, args):
                aryty = signature.args[0]
                ary = context.make_array(aryty)(context, builder, args[0])
                ptr = cgutils.get_item_pointer(context, builder, aryty, ary, [args[1]], wraparound=False)
                i8p = ir.IntType(8).as_pointer()
                i32 = ir.IntType(32)
                fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
                fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0i8")
                builder.call(fn, [builder.bitcast(ptr, i8p), ir.Constant(i32, 0), ir.Constant(i32, 2),
                                  ir.Constant(i32, 1)])
                return context.get_dummy_value()

            return sig, codegen

        @intrinsic
        def _ctpop_u64(typingctx, x):
            sig = types.uint64(types.uint64)

            def codegen(context, builder, signature, args):
                return builder.ctpop(args[0])

            return sig, codegen

        globals().update(prefetch=prefetch, _ctpop_u64=_ctpop_u64)

    _ctpop_u64 = prefetch = None  # the intrinsics, put in place by _define_intrinsics before any compile
    on_first_use(_define_intrinsics)

    @inline_kernel
    def popcount64(x):
        """Population count of one uint64 word (LLVM ``ctpop``)."""
        return _ctpop_u64(x)

    @inline_kernel
    def mix64(z):
        """splitmix64 finaliser (Steele, Lea & Flood, OOPSLA 2014)."""
        z = np.uint64(z)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(_MIX1)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(_MIX2)
        return z ^ (z >> np.uint64(31))

    @inline_kernel
    def _detector_state(seed, code_id, j):
        base = mix64(np.uint64(seed) ^ mix64(np.uint64(code_id)))
        return mix64(base + (np.uint64(j) + np.uint64(1)) * np.uint64(_GOLDEN))

    @inline_kernel
    def _rng_next(state):
        state = state + np.uint64(_GOLDEN)
        return state, mix64(state)


@inline_kernel
def _row_overlap(a, b):
    total = 0
    for w in range(a.shape[0]):
        total += popcount64(a[w] & b[w])
    return total


# Stored rows reach the kernels as a *row table* ``(words, indptr, indices)``:
# packed rows in ``words`` (then ``indptr`` is empty), or each row's sorted
# set-bit indices in ``indices[indptr[r]:indptr[r + 1]]`` (then ``words`` has no
# rows). The row helpers below (``_stored_*``, ``rows_*``, ``row_hash``) are the
# only code that tells them apart.


@inline_kernel
def _merged_count(x, x_lo, x_hi, y, y_lo, y_hi):
    """How many values ``x[x_lo:x_hi]`` and ``y[y_lo:y_hi]`` share (both strictly ascending): one merge pass."""
    total = 0
    p, q = x_lo, y_lo
    while p < x_hi and q < y_hi:
        a = np.int64(x[p])
        b = np.int64(y[q])
        if a == b:
            total += 1
            p += 1
            q += 1
        elif a < b:
            p += 1
        else:
            q += 1
    return total


@inline_kernel
def _stored_overlap(table, r, q_words, q_bits):
    """Exact overlap of stored row ``r`` with a query.

    Packed rows AND with the packed query ``q_words``; index rows are merged
    with the query's sorted set bits ``q_bits``, so a wide query is never
    packed (its packed form would be as wide as the codes).
    """
    words, indptr, indices = table
    if indptr.shape[0] == 0:
        return _row_overlap(words[r], q_words)
    return _merged_count(indices, indptr[r], indptr[r + 1], q_bits, 0, q_bits.shape[0])


@inline_kernel
def _stored_bits(table, r, out):
    """Set-bit indices of stored row ``r`` into ``out``; returns the count."""
    words, indptr, indices = table
    if indptr.shape[0] == 0:
        return _row_bits(words, r, out)
    a = indptr[r]
    n = indptr[r + 1] - a
    for t in range(n):
        out[t] = np.int64(indices[a + t])
    return n


@inline_kernel
def _stored_has(table, r, b):
    """Whether stored row ``r`` sets bit ``b`` (a binary search in an index row)."""
    words, indptr, indices = table
    if indptr.shape[0] == 0:
        return (words[r, b >> 6] >> np.uint64(b & 63)) & np.uint64(1) != np.uint64(0)
    lo, hi = indptr[r], indptr[r + 1]
    end = hi
    while lo < hi:
        mid = (lo + hi) // 2
        if np.int64(indices[mid]) < b:
            lo = mid + 1
        else:
            hi = mid
    return lo < end and np.int64(indices[lo]) == b


@inline_kernel
def rows_overlap(table, a, b):
    """Exact overlap of rows ``a`` and ``b`` of one row table (AND + popcount, or a merge of index rows)."""
    words, indptr, indices = table
    if indptr.shape[0] == 0:
        return _row_overlap(words[a], words[b])
    return _merged_count(indices, indptr[a], indptr[a + 1], indices, indptr[b], indptr[b + 1])


@inline_kernel
def rows_equal(table, a, b):
    """Whether rows ``a`` and ``b`` of one row table hold the same code."""
    words, indptr, indices = table
    if indptr.shape[0] == 0:
        for w in range(words.shape[1]):
            if words[a, w] != words[b, w]:
                return False
        return True
    n = indptr[a + 1] - indptr[a]
    if indptr[b + 1] - indptr[b] != n:
        return False
    for t in range(n):
        if indices[indptr[a] + t] != indices[indptr[b] + t]:
            return False
    return True


@inline_kernel
def row_hash(table, r):
    """A 64-bit hash of row ``r`` (splitmix64 fold over its words, or over its indices)."""
    words, indptr, indices = table
    if indptr.shape[0] == 0:
        h = np.uint64(words.shape[1])
        for w in range(words.shape[1]):
            h = mix64(h ^ words[r, w])
        return h
    h = np.uint64(indptr[r + 1] - indptr[r])
    for p in range(indptr[r], indptr[r + 1]):
        h = mix64(h ^ np.uint64(indices[p]))
    return h


@inline_kernel
def _stored_prefetch(table, r):
    words, indptr, indices = table
    if indptr.shape[0] == 0:
        for w in range(0, words.shape[1], 8):  # one hint per cache line
            prefetch(words[r], w)
    else:
        prefetch(indices, indptr[r])


# ---------------------------------------------------------------------------
# packing and unpacking
# ---------------------------------------------------------------------------


@kernel
def pack_indices(indptr, indices, n_words):
    """CSR index lists -> packed uint64 rows (indices already range-checked).

    Returns ``(words, dup_row, dup_value)``: ``dup_row`` is the first row
    that sets one bit twice, or -1.
    """
    rows = indptr.shape[0] - 1
    words = np.zeros((rows, n_words), dtype=np.uint64)
    for r in range(rows):
        for p in range(indptr[r], indptr[r + 1]):
            i = indices[p]
            bit = np.uint64(1) << np.uint64(i & 63)
            if words[r, i >> 6] & bit:
                return words, r, i
            words[r, i >> 6] |= bit
    return words, -1, -1


@kernel
def pack_one_checked(indices, bits, n_words):
    """One code's packed row from int64 ``indices``; ``ok`` is False at the first index outside 0..bits-1 or repeated.

    The fast path for single queries: it checks while it packs, and a
    caller that gets ``ok`` False takes the general path, which names the
    offending value.
    """
    words = np.zeros((1, n_words), dtype=np.uint64)
    for p in range(indices.shape[0]):
        i = indices[p]
        if i < 0 or i >= bits:
            return words, False
        bit = np.uint64(1) << np.uint64(i & 63)
        if words[0, i >> 6] & bit:
            return words, False
        words[0, i >> 6] |= bit
    return words, True


@kernel
def row_weights(words):
    """Set-bit count of every packed row."""
    rows = words.shape[0]
    out = np.empty(rows, dtype=np.int64)
    for r in range(rows):
        out[r] = _row_overlap(words[r], words[r])
    return out


@inline_kernel
def _row_bits(words, r, out):
    """Set-bit indices of packed row ``r`` into ``out``; returns the count."""
    n = 0
    for w in range(words.shape[1]):
        x = words[r, w]
        while x != np.uint64(0):
            low = x & (~x + np.uint64(1))
            out[n] = w * 64 + np.int64(popcount64(low - np.uint64(1)))
            n += 1
            x = x ^ low
    return n


@kernel
def unpack_indices(words, weights):
    """Packed rows -> CSR index lists (``weights`` are the rows' popcounts)."""
    rows = words.shape[0]
    indptr = np.zeros(rows + 1, dtype=np.int64)
    for r in range(rows):
        indptr[r + 1] = indptr[r] + weights[r]
    indices = np.empty(indptr[rows], dtype=np.int64)
    for r in range(rows):
        _row_bits(words, r, indices[indptr[r] : indptr[r + 1]])
    return indptr, indices


@kernel
def random_words(rows, bits, weight, seed):
    """``rows`` random packed codes of exactly ``weight`` distinct set bits.

    Floyd's algorithm (Bentley & Floyd, "A sample of brilliance", CACM
    1987) with a splitmix64 stream per row keyed on ``(seed, row)``: uniform
    over all codes of that weight.
    """
    n_words = (bits + 63) // 64
    out = np.zeros((rows, n_words), dtype=np.uint64)
    for r in range(rows):
        state = _detector_state(seed, r, 0)
        for j in range(bits - weight, bits):
            state, x = _rng_next(state)
            v = np.int64(x % np.uint64(j + 1))
            bit = np.uint64(1) << np.uint64(v & 63)
            if out[r, v >> 6] & bit:
                v = j
                bit = np.uint64(1) << np.uint64(v & 63)
            out[r, v >> 6] |= bit
    return out


@kernel
def sort_rows_checked(indptr, indices):
    """Each CSR row's indices sorted ascending (a new int64 array).

    Returns ``(sorted, dup_row, dup_value)``: ``dup_row`` is the first row
    holding one index twice, or -1.
    """
    rows = indptr.shape[0] - 1
    out = indices.astype(np.int64)
    for r in range(rows):
        a, b = indptr[r], indptr[r + 1]
        if b - a > 1:
            out[a:b] = np.sort(out[a:b])
            for p in range(a + 1, b):
                if out[p] == out[p - 1]:
                    return out, r, out[p]
    return out, -1, -1


@kernel
def check_index_rows(indptr, indices, bits):
    """Check index rows read from a file (pointers already monotone and inside ``indices``).

    Returns ``(problem, row)``: 0 when every row's indices are below
    ``bits`` and strictly ascending, else 1 (an index out of range) or 2
    (not strictly ascending) for the first bad row.
    """
    for r in range(indptr.shape[0] - 1):
        problem, _ = _ascending_below(indices, indptr[r], indptr[r + 1], bits)
        if problem:
            return problem, r
    return 0, 0


@inline_kernel
def _ascending_below(values, start, end, limit):
    """``(0, 0)`` if ``values[start:end]`` ascend strictly and stay below ``limit``;
    else ``(1, p)`` (``values[p] >= limit``) or ``(2, p)`` (not ascending at ``p``)."""
    prev = -1
    for p in range(start, end):
        v = np.int64(values[p])
        if v >= limit:
            return 1, p
        if v <= prev:
            return 2, p
        prev = v
    return 0, 0


@kernel
def random_indices(rows, bits, weight, seed, out):
    """The codes of :func:`random_words` with the same arguments, as sorted CSR indices (``weight`` per row).

    The same Floyd draws; set membership is an open-addressing table of
    twice the weight instead of the packed row, so memory follows the set
    bits, not the width. Written into ``out`` (``rows * weight`` long, of
    the caller's index type: no wider temporary).
    """
    size = 1
    while size < 2 * weight:
        size *= 2
    table = np.zeros(max(size, 1), dtype=np.int64)  # stores index + 1; 0 is empty
    mask = size - 1
    for r in range(rows):
        table[:] = 0
        state = _detector_state(seed, r, 0)
        n = 0
        for j in range(bits - weight, bits):
            state, x = _rng_next(state)
            v = np.int64(x % np.uint64(j + 1))
            if _table_has(table, mask, v):
                v = j
            _table_put(table, mask, v)
            out[r * weight + n] = out.dtype.type(v)
            n += 1
        out[r * weight : (r + 1) * weight] = np.sort(out[r * weight : (r + 1) * weight])
    return out


@inline_kernel
def _table_has(table, mask, v):
    h = np.int64(mix64(np.uint64(v)) & np.uint64(mask))
    while table[h] != 0:
        if table[h] == v + 1:
            return True
        h = (h + 1) & mask
    return False


@inline_kernel
def _table_put(table, mask, v):
    h = np.int64(mix64(np.uint64(v)) & np.uint64(mask))
    while table[h] != 0:
        h = (h + 1) & mask
    table[h] = v + 1


# ---------------------------------------------------------------------------
# detector sampling and postings
# ---------------------------------------------------------------------------


@inline_kernel
def _sample_into(row_bits, w, take, seed, code_id, j, out):
    """Detector ``j``'s sample of a code (see ``sample_detectors``) into ``out[:take]``.

    A partial Fisher-Yates shuffle of the code's ``w`` set bits; with
    ``take == w`` the sample is the whole code and no random draw is made.
    """
    for t in range(w):
        out[t] = row_bits[t]
    if take == w:
        return
    state = _detector_state(seed, code_id, j)
    for t in range(take):
        state, x = _rng_next(state)
        k = t + np.int64(x % np.uint64(w - t))
        tmp = out[t]
        out[t] = out[k]
        out[k] = tmp


@kernel
def sample_detectors(indptr, indices, code_ids, detectors, sample_size, seed):
    """Sample each code's detector bits.

    Detector ``j`` of the code with id ``c`` draws ``min(sample_size, weight)``
    of the code's set bits by a partial Fisher-Yates shuffle driven by a
    splitmix64 stream keyed on ``(seed, c, j)`` only, so samples do not
    depend on batching or on where the code is stored. ``sample_size <= 0``
    means every set bit. Returns ``(det_indptr, det_bits)`` over
    ``rows * detectors`` detectors in row-major order, each sample sorted.
    """
    rows = indptr.shape[0] - 1
    n_det = rows * detectors
    det_indptr = np.zeros(n_det + 1, dtype=np.int64)
    for r in range(rows):
        w = indptr[r + 1] - indptr[r]
        take = w if (sample_size <= 0 or sample_size >= w) else sample_size
        for j in range(detectors):
            d = r * detectors + j
            det_indptr[d + 1] = det_indptr[d] + take
    det_bits = np.empty(det_indptr[n_det], dtype=np.int64)
    scratch = np.empty(0, dtype=np.int64)
    for r in range(rows):
        lo = indptr[r]
        w = indptr[r + 1] - lo
        for j in range(detectors):
            d = r * detectors + j
            out_lo = det_indptr[d]
            take = det_indptr[d + 1] - out_lo
            if take == w:
                for t in range(w):
                    det_bits[out_lo + t] = indices[lo + t]
                continue
            if scratch.shape[0] < w:
                scratch = np.empty(w, dtype=np.int64)
            _sample_into(indices[lo : lo + w], w, take, seed, code_ids[r], j, scratch)
            chosen = np.sort(scratch[:take])
            for t in range(take):
                det_bits[out_lo + t] = chosen[t]
    return det_indptr, det_bits


@kernel
def _build_chunk(table, code_ids, r0, r1, first_row, detectors, sample_size, seed, bits, block_span, post, post_base,
                 block_indptr, block_lo, block_hi, block_base, usage, weight_hist, count_usage):
    """Sample and index rows r0..r1-1 of the row table ``table`` into preallocated tables.

    Block boundaries fall on multiples of ``block_span`` in the global
    detector id space, so a block never spans more than ``block_span``
    detectors and its postings fit ``uint16`` offsets from its first
    detector. The samples are those of ``sample_detectors`` (the bank's
    ``_check`` compares them), but the packed rows are read twice (count,
    then fill) instead of materialising every sample. Row ``r`` becomes
    store row ``first_row + r``; its postings go to ``post[post_base:]`` and
    its blocks to rows ``block_base..`` of the block tables, whose offsets
    are absolute positions in ``post``. On the way (``count_usage``) each
    row's set bits are added to ``usage`` and its weight to ``weight_hist``.
    Returns the largest sample.
    """
    first_detector = (first_row + r0) * detectors
    n_det = (r1 - r0) * detectors
    last = first_detector + n_det
    first_block = first_detector // block_span
    n_blocks = 0 if n_det == 0 else (last - 1) // block_span - first_block + 1
    for k in range(n_blocks):
        block_lo[block_base + k] = max(first_detector, (first_block + k) * block_span)
        block_hi[block_base + k] = min(last, (first_block + k + 1) * block_span)
    counts = np.zeros((n_blocks, bits), dtype=np.int64)
    row_bits = np.empty(bits, dtype=np.int64)
    sample = np.empty(bits, dtype=np.int64)
    max_sample = 0
    for r in range(r0, r1):
        w = _stored_bits(table, r, row_bits)
        if count_usage:
            for t in range(w):
                usage[row_bits[t]] += 1
            weight_hist[w] += 1
        take = w if (sample_size <= 0 or sample_size >= w) else sample_size
        if take > max_sample:
            max_sample = take
        for j in range(detectors):
            d = (first_row + r) * detectors + j
            k = d // block_span - first_block
            _sample_into(row_bits, w, take, seed, code_ids[r], j, sample)
            for t in range(take):
                counts[k, sample[t]] += 1
    cursor = np.empty((n_blocks, bits), dtype=np.int64)
    pos = post_base
    for k in range(n_blocks):
        for b in range(bits):
            block_indptr[block_base + k, b] = pos
            cursor[k, b] = pos
            pos += counts[k, b]
        block_indptr[block_base + k, bits] = pos
    for r in range(r0, r1):
        w = _stored_bits(table, r, row_bits)
        take = w if (sample_size <= 0 or sample_size >= w) else sample_size
        for j in range(detectors):
            d = (first_row + r) * detectors + j
            k = d // block_span - first_block
            o = np.uint16(d - block_lo[block_base + k])
            _sample_into(row_bits, w, take, seed, code_ids[r], j, sample)
            for t in range(take):
                b = sample[t]
                post[cursor[k, b]] = o
                cursor[k, b] += 1
    return max_sample


@kernel
def build_blocks_serial(table, code_ids, first_row, detectors, sample_size, seed, bits, block_span, chunk_rows,
                        post, post_starts, block_indptr, block_lo, block_hi, block_starts, usage, weight_hist,
                        count_usage):
    """:func:`build_blocks_parallel` on the calling thread (one chunk: no parallel start-up cost)."""
    n_chunks = chunk_rows.shape[0] - 1
    biggest = np.zeros(n_chunks, dtype=np.int64)
    for c in range(n_chunks):
        biggest[c] = _build_chunk(
            table, code_ids, chunk_rows[c], chunk_rows[c + 1], first_row, detectors, sample_size, seed, bits,
            block_span, post, post_starts[c], block_indptr, block_lo, block_hi, block_starts[c], usage[c],
            weight_hist[c], count_usage,
        )
    return biggest


@parallel_kernel
def build_blocks_parallel(table, code_ids, first_row, detectors, sample_size, seed, bits, block_span, chunk_rows,
                          post, post_starts, block_indptr, block_lo, block_hi, block_starts, usage, weight_hist,
                          count_usage):
    """:func:`_build_chunk` over chunks of rows in parallel, into shared tables.

    Chunk ``c`` holds rows ``chunk_rows[c]..chunk_rows[c+1]-1`` and writes
    its postings from ``post_starts[c]`` and its blocks from
    ``block_starts[c]`` (the caller sized both from the rows' weights), and
    its bit usage into row ``c`` of ``usage`` / ``weight_hist``. Returns the
    largest sample of each chunk.
    """
    n_chunks = chunk_rows.shape[0] - 1
    biggest = np.zeros(n_chunks, dtype=np.int64)
    for c in prange(n_chunks):
        biggest[c] = _build_chunk(
            table, code_ids, chunk_rows[c], chunk_rows[c + 1], first_row, detectors, sample_size, seed, bits,
            block_span, post, post_starts[c], block_indptr, block_lo, block_hi, block_starts[c], usage[c],
            weight_hist[c], count_usage,
        )
    return biggest


@kernel
def merge_blocks(post, block_indptr, block_lo, first_block, last_block, out_offset):
    """Merge blocks ``first_block..last_block-1`` (consecutive detector ranges).

    Offsets are rebased on the first block's ``lo``; concatenating each
    bit's lists block after block keeps them ascending. Returns the merged
    ``(indptr, post)`` with ``indptr`` shifted by ``out_offset``.
    """
    bits = block_indptr.shape[1] - 1
    total = 0
    for k in range(first_block, last_block):
        total += block_indptr[k, bits] - block_indptr[k, 0]
    out = np.empty(total, dtype=np.uint16)
    indptr = np.empty(bits + 1, dtype=np.int64)
    base = block_lo[first_block]
    p = 0
    for b in range(bits):
        indptr[b] = p + out_offset
        for k in range(first_block, last_block):
            shift = block_lo[k] - base
            for q in range(block_indptr[k, b], block_indptr[k, b + 1]):
                out[p] = np.uint16(np.int64(post[q]) + shift)
                p += 1
    indptr[bits] = p + out_offset
    return indptr, out


# ---------------------------------------------------------------------------
# queries
# ---------------------------------------------------------------------------

#: Fired detectors a scan makes room for at first (a scan that finds more
#: is run again with room for all, so room is cheap beside a second scan).
FIRED_ROOM = 4096


@inline_kernel
def _fire(fired, base, room, n_fired, detector):
    if n_fired < room:
        fired[base + n_fired] = detector
    return n_fired + 1


#: Counters read per step when a block's fired detectors are collected:
#: a fixed trip count lets LLVM vectorise the maximum that rules out a
#: chunk, so collecting costs about a microsecond per 64 Ki block. A chunk
#: that holds a fired counter is searched 64 counters at a time through a
#: bit mask of the counters at or over the threshold (a loop that LLVM
#: turns into vector compares, 3 ns per 64 counters where a maximum over
#: them took 28 ns), so a candidate costs tens of nanoseconds.
FIRE_CHUNK = 1024


@kernel
def _chunk_max(chunk):
    top = chunk[0]
    for i in range(FIRE_CHUNK):
        v = chunk[i]
        top = v if v > top else top
    return top


@kernel
def _at_or_over(sub, thr):
    """Bit i set where ``sub[i] >= thr``, i < 64."""
    mask = np.uint64(0)
    for i in range(64):
        mask |= np.uint64(sub[i] >= thr) << np.uint64(i)
    return mask


@kernel
def _collect_fired(counters, size, lo, thr, fired, base, room, n_fired):
    """Record every detector ``lo + i`` with ``counters[i] >= thr``, i < size, ascending."""
    full = size - size % FIRE_CHUNK
    one = np.uint64(1)
    for a in range(0, full, FIRE_CHUNK):
        chunk = counters[a : a + FIRE_CHUNK]
        if _chunk_max(chunk) >= thr:
            for b in range(0, FIRE_CHUNK, 64):
                mask = _at_or_over(chunk[b : b + 64], thr)
                while mask:
                    low = popcount64((mask & (~mask + one)) - one)  # index of the lowest set bit
                    n_fired = _fire(fired, base, room, n_fired, lo + a + b + np.int64(low))
                    mask &= mask - one
    for i in range(full, size):
        if counters[i] >= thr:
            n_fired = _fire(fired, base, room, n_fired, lo + i)
    return n_fired


@kernel
def _scan_range(q_bits, post, block_indptr, block_lo, block_hi, k0, k1, counters, threshold, fired, base, room):
    """Count each detector's sampled bits present in the query, blocks k0..k1-1.

    A block's counters (at most ``block_span`` of them) stay in cache while
    its postings stream past. Runs are short and start far apart, so the
    reads are bound by latency: the bounds of every run are read first, and
    while a bit's run is counted the same bit's run in the next block is
    prefetched. Two postings are counted per step (a run's offsets are
    distinct, so the two increments never collide), in the counters' own
    integer type, with no test in the loop: once a block's runs are
    counted, its counters at or over ``threshold`` are collected by a
    vectorised sweep (:func:`_collect_fired`), which costs far less than a
    test per posting. A detector is recorded once, detectors ascending
    within a block. At most ``room`` are recorded, at ``fired[base:]``; the
    true count is returned so that the caller can retry with room for all.
    ``counters`` are zero again on exit.
    """
    n_fired = 0
    n_q = q_bits.shape[0]
    one = counters.dtype.type(1)
    thr = counters.dtype.type(threshold)
    u1 = np.uint64(1)
    u2 = np.uint64(2)
    # every run's bounds first: independent reads that miss in parallel,
    # where reading them run by run would wait for each in turn
    starts = np.empty((k1 - k0, n_q), dtype=np.int64)
    ends = np.empty((k1 - k0, n_q), dtype=np.int64)
    for k in range(k0, k1):
        for t in range(n_q):
            starts[k - k0, t] = block_indptr[k, q_bits[t]]
            ends[k - k0, t] = block_indptr[k, q_bits[t] + 1]
    for k in range(k0, k1):
        i = k - k0
        for t in range(n_q):
            if k + 1 < k1:  # the same bit's run in the next block, one hint per cache line
                for x in range(starts[i + 1, t], ends[i + 1, t], 32):
                    prefetch(post, x)
            # unsigned positions: numba then emits no negative-index
            # fix-up on each read, which was a third of the loop's work
            p = np.uint64(starts[i, t])
            end = np.uint64(ends[i, t])
            while p + u1 < end:
                counters[post[p]] += one
                counters[post[p + u1]] += one
                p += u2
            if p < end:
                counters[post[p]] += one
        size = block_hi[k] - block_lo[k]
        n_fired = _collect_fired(counters, size, block_lo[k], thr, fired, base, room, n_fired)
        counters[:size] = 0
    return n_fired


@kernel
def _scan_count(q_bits, post, block_indptr, block_lo, block_hi, counters, threshold, fired):
    """:func:`_scan_range` over every block into ``fired``."""
    return _scan_range(
        q_bits, post, block_indptr, block_lo, block_hi, 0, block_indptr.shape[0], counters, threshold, fired, 0,
        fired.shape[0],
    )


@kernel
def _fired_rows(fired, n_fired, detectors):
    """Distinct rows (ascending) owning the fired detectors."""
    rows = np.sort(fired[:n_fired] // detectors)
    n = 0
    for i in range(rows.shape[0]):
        if i == 0 or rows[i] != rows[i - 1]:
            rows[n] = rows[i]
            n += 1
    return rows[:n]


@kernel
def _verified(rows, removed, table, q_words, q_bits, min_overlap):
    """The live ``rows`` whose exact overlap with the query is >= min_overlap, with it."""
    out_rows = np.empty(rows.shape[0], dtype=np.int64)
    out_ov = np.empty(rows.shape[0], dtype=np.int64)
    # the rows are far apart in memory: hint them all first, so that their
    # misses overlap instead of being waited for one row at a time
    for i in range(rows.shape[0]):
        _stored_prefetch(table, rows[i])
    n = 0
    for i in range(rows.shape[0]):
        r = rows[i]
        if removed[r]:
            continue
        ov = _stored_overlap(table, r, q_words, q_bits)
        if ov >= min_overlap:
            out_rows[n] = r
            out_ov[n] = ov
            n += 1
    return out_rows[:n], out_ov[:n]


@kernel
def _prefix_plan(q_bits, bit_postings, n_detectors, threshold, whole, verify_cost):
    """The query bits to scan, and the count that makes a detector a candidate.

    Prefix filtering (Chaudhuri, Ganti & Kaushik, "A primitive operator for
    similarity joins in data cleaning", ICDE 2006): a detector that meets
    ``threshold`` of the query's q bits meets ``threshold - (q - m)`` of any
    m of them. When every detector samples its whole code (``whole``), a
    detector fires exactly when its code's overlap reaches ``threshold``, so
    the scan may skip the q - m bits with the longest postings, record the
    detectors that reach the lowered count, and leave the rest to the exact
    overlap check that every hit gets anyway — the answer is unchanged.

    m is chosen to minimise postings read plus ``verify_cost`` (one
    candidate's check, in postings) times the expected candidates, taken
    from the per-bit posting frequencies as a Poisson-binomial tail (bits
    independent; a cost guess only, never a correctness one). Returns
    ``(scan_bits, scan_threshold)``: scan_bits ascending. Not ``whole``, or
    ``verify_cost`` infinite: all of q_bits at ``threshold``.
    """
    n_q = q_bits.shape[0]
    if not whole or n_detectors == 0 or verify_cost == np.inf:
        return q_bits, threshold
    lengths = np.empty(n_q, dtype=np.int64)
    for t in range(n_q):
        lengths[t] = bit_postings[q_bits[t]]
    order = np.argsort(lengths, kind="mergesort")
    dist = np.zeros(threshold + 1)  # P(count = c) over the bits taken so far; the last cell is ">= threshold"
    dist[0] = 1.0
    best_m = n_q
    best_cost = np.inf
    scanned = 0.0
    for m in range(n_q + 1):
        if m > 0:
            length = lengths[order[m - 1]]
            p = min(1.0, length / n_detectors)
            dist[threshold] += dist[threshold - 1] * p
            for c in range(threshold - 1, 0, -1):
                dist[c] = dist[c] * (1.0 - p) + dist[c - 1] * p
            dist[0] *= 1.0 - p
            scanned += length
        need = threshold - (n_q - m)
        if need < 1:
            continue
        tail = 0.0
        for c in range(need, threshold + 1):
            tail += dist[c]
        cost = scanned + (verify_cost * n_detectors * tail if tail > 0.0 else 0.0)
        if cost < best_cost:
            best_cost = cost
            best_m = m
    chosen = np.sort(q_bits[order[:best_m]])
    return chosen, threshold - (n_q - best_m)


@kernel
def _answer(q_cols, q_bits, q_words, post, block_indptr, block_lo, block_hi, counters, threshold, detectors, removed,
            table, min_overlap, fired, bit_postings, whole, verify_cost):
    """Rows hit by one query with their overlaps; a larger ``fired`` if needed.

    ``q_cols`` are the query's postings columns (its bits, or their places
    in a bank's column map), ``q_bits``/``q_words`` the query for the exact
    check (see :func:`_stored_overlap`). The scan follows
    :func:`_prefix_plan`; for whole-code detectors the exact check also
    demands ``threshold`` (firing is then overlap >= it).
    """
    n_det = block_hi[block_hi.shape[0] - 1] if block_hi.shape[0] else 0
    scan_bits, scan_threshold = _prefix_plan(q_cols, bit_postings, n_det, threshold, whole, verify_cost)
    n_fired = _scan_count(scan_bits, post, block_indptr, block_lo, block_hi, counters, scan_threshold, fired)
    if n_fired > fired.shape[0]:
        fired = np.empty(2 * n_fired, dtype=np.int64)
        n_fired = _scan_count(scan_bits, post, block_indptr, block_lo, block_hi, counters, scan_threshold, fired)
    need = max(min_overlap, threshold) if whole else min_overlap
    rows, overlaps = _verified(_fired_rows(fired, n_fired, detectors), removed, table, q_words, q_bits, need)
    return rows, overlaps, fired


@kernel
def query_one(q_cols, q_bits, q_words, post, block_indptr, block_lo, block_hi, counters, threshold, detectors, removed,
              table, min_overlap, bit_postings, whole, verify_cost):
    """One query: rows with a firing detector and overlap >= min_overlap.

    ``counters`` (at least one block span long) must be zero on entry and
    are zero again on exit. ``bit_postings`` holds each bit's postings over
    all blocks; ``whole`` says every detector samples its whole code (see
    :func:`_prefix_plan`). Returns ``(rows, overlaps)``, rows ascending.
    """
    fired = np.empty(FIRED_ROOM, dtype=np.int64)
    rows, overlaps, fired = _answer(
        q_cols, q_bits, q_words, post, block_indptr, block_lo, block_hi, counters, threshold, detectors, removed, table,
        min_overlap, fired, bit_postings, whole, verify_cost,
    )
    return rows, overlaps


@parallel_kernel
def query_one_parallel(q_cols, q_bits, q_words, post, block_indptr, block_lo, block_hi, chunk_counters, threshold,
                       detectors, removed, table, min_overlap, bit_postings, whole, verify_cost):
    """:func:`query_one` with the blocks split into chunks scanned in parallel.

    ``chunk_counters`` holds one zeroed counter row (at least one block span
    long) per chunk, and is zero again on exit: kept by the caller, so that
    a query does not pay for first-touch of fresh memory on every call. Each chunk has room for its fired detectors; a chunk
    that runs out of room is rescanned with room for all. One call does the
    plan, the scans and the exact check, so a query pays one dispatch.
    """
    n_chunks = chunk_counters.shape[0]
    n_blocks = block_lo.shape[0]
    n_det = block_hi[n_blocks - 1] if n_blocks else 0
    scan_bits, scan_threshold = _prefix_plan(q_cols, bit_postings, n_det, threshold, whole, verify_cost)
    chunk_lo = np.empty(n_chunks, dtype=np.int64)
    for c in range(n_chunks):
        chunk_lo[c] = c * n_blocks // n_chunks
    room = FIRED_ROOM
    counts = np.zeros(n_chunks, dtype=np.int64)
    fired = np.empty(n_chunks * room, dtype=np.int64)
    again = True
    while again:
        for c in prange(n_chunks):
            hi = (c + 1) * n_blocks // n_chunks
            counts[c] = _scan_range(scan_bits, post, block_indptr, block_lo, block_hi, chunk_lo[c], hi,
                                    chunk_counters[c], scan_threshold, fired, c * room, room)
        again = counts.max() > room
        if again:
            room = counts.max()
            fired = np.empty(n_chunks * room, dtype=np.int64)
    gathered = np.empty(counts.sum(), dtype=np.int64)
    n = 0
    for c in range(n_chunks):
        for i in range(counts[c]):
            gathered[n] = fired[c * room + i]
            n += 1
    need = max(min_overlap, threshold) if whole else min_overlap
    return _verified(_fired_rows(gathered, n, detectors), removed, table, q_words, q_bits, need)


@parallel_kernel
def query_batch(
    q_indptr,
    q_cols,
    q_bits,
    q_words,
    post,
    block_indptr,
    block_lo,
    block_hi,
    counter_like,
    threshold,
    detectors,
    removed,
    table,
    min_overlap,
    chunk_lo,
    chunk_hi,
    slab_lo,
    slab_hi,
    out_rows,
    out_ov,
    out_count,
    bit_postings,
    whole,
    verify_cost,
):
    """Many queries in parallel, one chunk of queries per task.

    Chunk ``c`` answers queries ``chunk_lo[c]..chunk_hi[c]-1`` in order and
    writes their hits into ``out_rows/out_ov[slab_lo[c]:slab_hi[c]]``,
    ``out_count[i]`` hits for query ``i``. A chunk whose slab fills up stops
    early; the returned ``done[c]`` is the first query it did not answer, so
    the caller can resume it with a larger slab. Each task owns a counter
    array shaped and typed like ``counter_like``. Each query's scan follows
    :func:`_prefix_plan`, as in :func:`query_one`.
    """
    n_chunks = chunk_lo.shape[0]
    done = np.empty(n_chunks, dtype=np.int64)
    for c in prange(n_chunks):
        counters = np.zeros(counter_like.shape[0], dtype=counter_like.dtype)
        fired = np.empty(FIRED_ROOM, dtype=np.int64)
        pos = slab_lo[c]
        i = chunk_lo[c]
        while i < chunk_hi[c]:
            rows, overlaps, fired = _answer(
                q_cols[q_indptr[i] : q_indptr[i + 1]],
                q_bits[q_indptr[i] : q_indptr[i + 1]],
                q_words[i],
                post,
                block_indptr,
                block_lo,
                block_hi,
                counters,
                threshold,
                detectors,
                removed,
                table,
                min_overlap,
                fired,
                bit_postings,
                whole,
                verify_cost,
            )
            n = rows.shape[0]
            if pos + n > slab_hi[c]:
                break
            out_rows[pos : pos + n] = rows
            out_ov[pos : pos + n] = overlaps
            out_count[i] = n
            pos += n
            i += 1
        done[c] = i
    return done


@parallel_kernel
def overlaps_with_all(q_words, q_bits, table, n_rows):
    """Exact overlap of one query with each of the first n_rows rows of a row table."""
    out = np.empty(n_rows, dtype=np.int64)
    for r in prange(n_rows):
        out[r] = _stored_overlap(table, r, q_words, q_bits)
    return out


@kernel
def overlaps_with_rows(q_words, q_bits, table, rows):
    """Exact overlap of one query with the given rows of a row table."""
    out = np.empty(rows.shape[0], dtype=np.int64)
    for t in range(rows.shape[0]):
        out[t] = _stored_overlap(table, rows[t], q_words, q_bits)
    return out


@kernel
def column_bitmap(columns, n_words):
    """A bitmap of the mapped bits and, per word, the columns before it: ``(words, rank)``.

    Column of mapped bit b: ``rank[b >> 6] + popcount(words[b >> 6] & ((1 << (b & 63)) - 1))``.
    """
    words = np.zeros(n_words, dtype=np.uint64)
    for t in range(columns.shape[0]):
        b = columns[t]
        words[b >> 6] |= np.uint64(1) << np.uint64(b & 63)
    rank = np.empty(n_words, dtype=np.int64)
    total = 0
    for w in range(n_words):
        rank[w] = total
        total += popcount64(words[w])
    return words, rank


@kernel
def columns_of_bits(q_bits, words, rank, spare):
    """Each query bit's postings column through :func:`column_bitmap`'s tables; ``spare`` where unmapped.

    Two reads per bit from tables of bits / 32 bytes (in cache for widths
    up to a few million), where a binary search in the column map waits
    for a dozen cache misses per bit.
    """
    out = np.empty(q_bits.shape[0], dtype=np.int64)
    one = np.uint64(1)
    for t in range(q_bits.shape[0]):
        b = q_bits[t]
        w = words[b >> 6]
        bit = one << np.uint64(b & 63)
        out[t] = rank[b >> 6] + popcount64(w & (bit - one)) if w & bit else spare
    return out


@kernel
def nearest_from_postings(q_cols, post, block_indptr, block_lo, detectors, removed, n_rows, k):
    """The k live rows of greatest overlap with one query (ties to the lower row), counted from its postings.

    Valid only when every detector samples its whole code: then detector
    ``row * detectors`` alone holds all of its row's bits, and counting its
    postings over the query's columns is the overlap. Only the rows the
    query touches are ranked; rows of overlap 0 fill up from the lowest
    live row. Returns ``(rows, overlaps)``. O(query postings · log + rows
    for the zeroed counts).
    """
    total = 0
    for b in range(block_lo.shape[0]):
        for t in range(q_cols.shape[0]):
            total += block_indptr[b, q_cols[t] + 1] - block_indptr[b, q_cols[t]]
    counts = np.zeros(n_rows, dtype=np.int32)
    touched = np.empty(total, dtype=np.int64)
    n = 0
    for b in range(block_lo.shape[0]):
        lo = block_lo[b]
        for t in range(q_cols.shape[0]):
            c = q_cols[t]
            for p in range(block_indptr[b, c], block_indptr[b, c + 1]):
                d = lo + np.int64(post[p])
                if detectors != 1 and d % detectors != 0:
                    continue
                r = d // detectors
                if counts[r] == 0 and not removed[r]:
                    touched[n] = r
                    n += 1
                counts[r] += 1
    # the cut: the smallest overlap v >= 1 with fewer than k touched rows above it
    top = q_cols.shape[0]
    hist = np.zeros(top + 2, dtype=np.int64)
    for i in range(n):
        hist[counts[touched[i]]] += 1
    above = 0
    cut = top + 1
    while cut > 1 and above + hist[cut - 1] < k:
        above += hist[cut - 1]
        cut -= 1
    cut -= 1  # rows above ``cut`` are all taken; at ``cut`` the lowest rows fill up to k
    rows = np.empty(k, dtype=np.int64)
    overlaps = np.zeros(k, dtype=np.int64)
    take = 0
    if above:
        keys = np.empty(above, dtype=np.int64)
        j = 0
        for i in range(n):
            c = counts[touched[i]]
            if c > cut:
                keys[j] = (top + 1 - c) * n_rows + touched[i]   # overlap descending, then row ascending
                j += 1
        keys.sort()
        for i in range(above):
            rows[i] = keys[i] % n_rows
            overlaps[i] = counts[rows[i]]
        take = above
    if cut >= 1 and take < k:
        need = min(k - take, hist[cut])
        ties = np.empty(hist[cut], dtype=np.int64)
        j = 0
        for i in range(n):
            if counts[touched[i]] == cut:
                ties[j] = touched[i]
                j += 1
        if j > 4 * need + 64:   # many ties: the lowest rows by one pass over the counts, not a sort
            r = 0
            while need:
                if counts[r] == cut and not removed[r]:
                    rows[take] = r
                    overlaps[take] = cut
                    take += 1
                    need -= 1
                r += 1
        else:
            ties.sort()
            for i in range(need):
                rows[take] = ties[i]
                overlaps[take] = cut
                take += 1
    r = 0
    while take < k and r < n_rows:
        if counts[r] == 0 and not removed[r]:
            rows[take] = r
            take += 1
        r += 1
    return rows[:take], overlaps[:take]


@kernel
def top_k(overlaps, removed, k, max_overlap):
    """Rows of the k largest overlaps among live rows, ties to the lower row.

    A histogram over overlap values finds the cut in O(rows + max_overlap);
    the result is ordered by overlap descending, then row ascending.
    """
    n = overlaps.shape[0]
    hist = np.zeros(max_overlap + 2, dtype=np.int64)
    live = 0
    for r in range(n):
        if not removed[r]:
            hist[overlaps[r]] += 1
            live += 1
    if k > live:
        k = live
    # cut: smallest value v such that count(overlap >= v) >= k
    above = 0
    cut = max_overlap + 1
    while cut > 0 and above + hist[cut - 1] <= k and above < k:
        above += hist[cut - 1]
        cut -= 1
    # rows with overlap >= cut are all taken; take (k - above) rows at cut - 1
    take_at = k - above
    tie_value = cut - 1
    per_value = np.zeros(max_overlap + 2, dtype=np.int64)
    start = np.zeros(max_overlap + 2, dtype=np.int64)
    acc = 0
    for v in range(max_overlap + 1, -1, -1):
        start[v] = acc
        if v >= cut:
            acc += hist[v]
        elif v == tie_value:
            acc += take_at
    out = np.empty(k, dtype=np.int64)
    for r in range(n):
        if removed[r]:
            continue
        v = overlaps[r]
        if v >= cut or (v == tie_value and per_value[v] < take_at):
            out[start[v] + per_value[v]] = r
            per_value[v] += 1
    return out


# ---------------------------------------------------------------------------
# validation of loaded postings
# ---------------------------------------------------------------------------


#: Detectors per tile in ``check_postings``: their codes (256 B each at
#: 2048 bits) stay in the second-level cache while every bit's postings of
#: the tile are checked against them.
CHECK_TILE = 2048


@inline_kernel
def _check_block(post, block_indptr, columns, lo, size, table, weights, detectors, sample_size, k, counts, cursor):
    """``check_postings`` for block ``k``: (problem, where), see there."""
    bits = block_indptr.shape[1] - 1
    for b in range(bits):
        start, end = block_indptr[k, b], block_indptr[k, b + 1]
        problem, where = _ascending_below(post, start, end, size)  # order and range first: the tiles rely on them
        if problem:
            return problem, where
        cursor[b] = start
    for tile in range(0, size, CHECK_TILE):
        tile_end = min(size, tile + CHECK_TILE)
        for b in range(bits):
            end = block_indptr[k, b + 1]
            p = cursor[b]
            while p < end:
                off = np.int64(post[p])
                if off >= tile_end:
                    break
                row = lo + off if detectors == 1 else (lo + off) // detectors
                if not _stored_has(table, row, b if columns.shape[0] == 0 else columns[b]):
                    return 3, p
                counts[off] += 1
                p += 1
            cursor[b] = p
    for d in range(size):
        w = weights[(lo + d) // detectors]
        want = w if sample_size < 0 or sample_size > w else sample_size
        if counts[d] != want:
            return 4, lo + d
    return 0, 0


@parallel_kernel
def check_postings(post, block_indptr, columns, block_lo, block_hi, table, weights, detectors, sample_size):
    """Check postings read from a file against the codes they index.

    The caller has already checked the *shape* of the tables (``block_indptr``
    monotone and inside ``post``; blocks consecutive, each at most one span,
    together covering ``rows * detectors`` detectors; a column map
    ``columns`` ascending and in range, its spare last column empty; empty
    ``columns``: column b is bit b). This kernel reads only
    and checks, per block (blocks in parallel): every offset lies inside its
    block, the postings of each bit strictly ascend, the bit is set in the
    code that owns the detector, and every detector holds exactly
    ``min(sample_size, weight)`` postings (``sample_size < 0``: all of its code's
    bits). It walks each block in tiles of ``CHECK_TILE`` detectors with one
    cursor per bit, so the codes it tests stay in cache.

    Returns ``(problem, where)`` for the first bad block: ``problem`` 0 when
    all holds, else 1 (offset outside its block; ``where`` = position in
    ``post``), 2 (not ascending; position), 3 (bit not set in the owner's
    code; position) or 4 (wrong number of postings; ``where`` = detector id).
    """
    n_blocks = block_indptr.shape[0]
    bits = block_indptr.shape[1] - 1
    problems = np.zeros(n_blocks, dtype=np.int64)
    wheres = np.zeros(n_blocks, dtype=np.int64)
    for k in prange(n_blocks):
        lo = block_lo[k]
        size = block_hi[k] - lo
        counts = np.zeros(size, dtype=np.int32)
        cursor = np.empty(bits, dtype=np.int64)
        problem, where = _check_block(post, block_indptr, columns, lo, size, table, weights, detectors, sample_size,
                                      k, counts, cursor)
        problems[k] = problem
        wheres[k] = where
    for k in range(n_blocks):
        if problems[k]:
            return problems[k], wheres[k]
    return 0, 0


# ---------------------------------------------------------------------------
# bit usage (health)
# ---------------------------------------------------------------------------


@parallel_kernel
def bit_usage(words, rows, skip):
    """How many of ``words[rows]`` (or of every row, ``rows`` empty) set each bit.

    Rows with ``skip[r]`` set are left out (``skip`` empty: none). Returns
    int64 counts of length ``64 * words.shape[1]``. Threads count into
    private rows of a table that is summed at the end.
    """
    n_words = words.shape[1]
    width = 64 * n_words
    n = rows.shape[0] if rows.shape[0] else words.shape[0]
    chunks = max(1, min(n, 64))
    table = np.zeros((chunks, width), dtype=np.int64)
    for c in prange(chunks):
        for i in range(c * n // chunks, (c + 1) * n // chunks):
            r = rows[i] if rows.shape[0] else i
            if skip.shape[0] and skip[r]:
                continue
            for w in range(n_words):
                x = words[r, w]
                while x != np.uint64(0):
                    low = x & (~x + np.uint64(1))
                    table[c, w * 64 + np.int64(popcount64(low - np.uint64(1)))] += 1
                    x ^= low
    out = np.zeros(width, dtype=np.int64)
    for c in range(chunks):
        for b in range(width):
            out[b] += table[c, b]
    return out


@kernel
def matches_in_rows(q_indptr, q_bits, q_words, table, rows, min_overlap):
    """Every (query, row) with overlap >= min_overlap, rows taken from ``rows``.

    Query ``i`` is ``q_words[i]`` (packed) and ``q_bits[q_indptr[i]:q_indptr[i + 1]]``
    (its sorted bits); see :func:`_stored_overlap`. Returns ``(counts, hit_rows,
    overlaps)``: query ``i``'s matches are the next ``counts[i]`` entries,
    in the order of ``rows``. Two passes (count, then fill). O(queries *
    len(rows) * words).
    """
    n_q = q_indptr.shape[0] - 1
    counts = np.zeros(n_q, dtype=np.int64)
    for i in range(n_q):
        for t in range(rows.shape[0]):
            if _stored_overlap(table, rows[t], q_words[i], q_bits[q_indptr[i] : q_indptr[i + 1]]) >= min_overlap:
                counts[i] += 1
    total = 0
    for i in range(n_q):
        total += counts[i]
    hit_rows = np.empty(total, dtype=np.int64)
    overlaps = np.empty(total, dtype=np.int64)
    n = 0
    for i in range(n_q):
        for t in range(rows.shape[0]):
            ov = _stored_overlap(table, rows[t], q_words[i], q_bits[q_indptr[i] : q_indptr[i + 1]])
            if ov >= min_overlap:
                hit_rows[n] = rows[t]
                overlaps[n] = ov
                n += 1
    return counts, hit_rows, overlaps
