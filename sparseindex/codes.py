"""One canonical batch of binary codes, and every accepted way in and out.

:class:`Codes` holds packed ``uint64`` rows (bit ``i`` of a code lives in
word ``i // 64`` at position ``i % 64``; padding bits above ``bits`` are
always zero), each row's set-bit count, and the width ``bits``. Every other
layer of the library works on this one form; this module is the only place
that knows about index lists, dense booleans, packed bytes, ``bitarray``
and ``scipy.sparse``.

Errors quote the offending value and its row, and nothing is built from a
batch that has one bad row.
"""

from __future__ import annotations

from collections.abc import Sequence, Set
from numbers import Integral

import numpy as np

from . import validation
from ._numba import kernels as _kernels

__all__ = ["Codes", "as_codes", "as_code", "ACCEPTED_BATCH_FORMS", "ACCEPTED_SINGLE_FORMS"]

ACCEPTED_BATCH_FORMS = (
    "a Codes batch, a list/tuple of integer index sequences, a 2-D bool ndarray, "
    "a scipy.sparse matrix or array, or a list of bitarray"
)
ACCEPTED_SINGLE_FORMS = (
    "a 1-D integer index sequence or ndarray, a set of indices, a 1-D bool ndarray, "
    "a bitarray, or a one-row Codes"
)
_PACKED_HINT = (
    "integer matrices are ambiguous (index lists or packed words?): "
    "use Codes.from_indices(rows, bits) or Codes.from_packed(array, bits)"
)

# byte -> byte with its 8 bits reversed (converts MSB-first bytes to LSB-first)
_REVERSE_BYTE = np.array([int(f"{b:08b}"[::-1], 2) for b in range(256)], dtype=np.uint8)


def _words_for(bits: int) -> int:
    return (bits + 63) // 64


def _check_bits(bits) -> int:
    return validation.width(bits)


def _binary_csr(csr):
    """(indptr, set-bit indices, bits) of a CSR matrix of 0/1 entries; explicit zeros dropped."""
    rows, bits = csr.shape
    bits = _check_bits(bits)
    indptr = csr.indptr.astype(np.int64)
    flat = _validated_indices(csr.indices, indptr, bits)
    data = csr.data
    bad = np.flatnonzero((data != 0) & (data != 1))
    if bad.size:
        p = int(bad[0])
        raise ValueError(f"row {_row_of(indptr, p)}: value {data[p].item()!r} at bit index {int(flat[p])} is not 0 or 1")
    keep = data != 0
    if not keep.all():
        rows_of_entries = np.repeat(np.arange(rows, dtype=np.int64), np.diff(indptr))
        counts = np.bincount(rows_of_entries[keep], minlength=rows)
        indptr = np.zeros(rows + 1, dtype=np.int64)
        np.cumsum(counts, out=indptr[1:])
        flat = flat[keep]
    return indptr, flat, bits


def _row_of(indptr: np.ndarray, position: int) -> int:
    return int(np.searchsorted(indptr, position, side="right") - 1)


def _validated_indices(flat, indptr: np.ndarray, bits: int) -> np.ndarray:
    """Check a flat CSR index array; return it as int64. Raises on any bad entry."""
    flat = np.asarray(flat)
    if flat.dtype == np.bool_:
        raise TypeError("index lists must hold integers, got booleans; use Codes.from_dense for bool masks")
    if flat.dtype.kind == "f":
        bad = np.flatnonzero(~np.isfinite(flat))
        if bad.size:
            p = int(bad[0])
            raise ValueError(f"row {_row_of(indptr, p)}: bit index {flat[p].item()!r} is not a finite integer")
        bad = np.flatnonzero(flat != np.floor(flat))
        if bad.size:
            p = int(bad[0])
            raise ValueError(f"row {_row_of(indptr, p)}: bit index {flat[p].item()!r} is not an integer")
    elif flat.dtype.kind == "O":
        for p, value in enumerate(flat):
            if isinstance(value, (bool, np.bool_)) or not isinstance(value, Integral):
                raise TypeError(f"row {_row_of(indptr, p)}: bit index {value!r} is not an integer")
        flat = flat.astype(np.int64) if flat.size else np.zeros(0, dtype=np.int64)
    elif flat.dtype.kind not in "iu":
        if flat.size == 0:
            flat = np.zeros(0, dtype=np.int64)
        else:
            raise TypeError(f"row {_row_of(indptr, 0)}: bit index {flat.ravel()[0]!r} is not an integer")
    if flat.size:
        if flat.dtype.kind == "u":
            bad = np.flatnonzero(flat >= bits)
        else:
            bad = np.flatnonzero((flat < 0) | (flat >= bits))
        if bad.size:
            p = int(bad[0])
            value = flat[p]
            shown = int(value) if flat.dtype.kind != "f" else value.item()
            raise ValueError(
                f"row {_row_of(indptr, p)}: bit index {shown!r} is out of range for bits={bits} "
                f"(valid 0..{bits - 1})"
            )
    return flat.astype(np.int64, copy=False)


class Codes:
    """A batch of binary codes of one width, as packed words or as sorted set-bit indices.

    Build one with a ``from_*`` constructor; the constructor itself takes
    already-canonical packed words and checks their shapes and padding.

    Parameters
    ----------
    words : ndarray of uint64, shape (rows, ceil(bits / 64))
        Packed rows; bit ``i`` in word ``i // 64`` at position ``i % 64``.
    bits : int
        Width of every code.

    Notes
    -----
    A batch keeps whichever form is smaller: up to :data:`PACKED_MAX_BITS`
    bits it is always packed (``8 * ceil(bits / 64)`` bytes per code, the
    form the narrow kernels read); wider, it is held as CSR — row pointers
    plus each code's set-bit indices, ascending, in the narrowest unsigned
    type that holds ``bits - 1`` — unless its rows are so dense that packed
    is smaller. Memory of a wide sparse batch is then ``8 + weight ×
    (1, 2, 4 or 8)`` bytes per code, whatever the width (:attr:`nbytes`).
    The other form is made on request (:meth:`to_csr`, :attr:`words`);
    :meth:`to_dense` and :meth:`to_packed` refuse a result larger than
    :data:`MAX_EXPANDED_BYTES`. Indexing with an integer returns that
    code's set-bit indices; a slice, an integer array or a boolean mask
    returns a new ``Codes``.

    Examples
    --------
    >>> codes = Codes.from_indices([[0, 5, 64], [3]], bits=100)
    >>> len(codes), codes.bits, codes.weights.tolist(), codes.layout
    (2, 100, [3, 1], 'packed')
    >>> codes[0].tolist()
    [0, 5, 64]
    >>> codes.to_dense().sum(axis=1).tolist()
    [3, 1]
    >>> wide = Codes.from_indices([[7, 2**20 - 1]], bits=2**20)
    >>> wide.layout, wide.nbytes
    ('sparse', 32)
    """

    __slots__ = ("_words", "_indptr", "_indices", "_weights", "_bits")

    @classmethod
    def _wrap(cls, words, bits) -> "Codes":
        """Adopt a fresh, canonical uint64 array without copying or checking (kept packed)."""
        self = cls.__new__(cls)
        self._words, self._indptr, self._indices = words, None, None
        self._weights = _kernels.row_weights(words)
        self._bits = bits
        return self

    @classmethod
    def _adopt_packed(cls, words, bits) -> "Codes":
        """Fresh canonical packed rows, kept in the smaller form."""
        codes = cls._wrap(words, bits)
        if _sparse_is_smaller(bits, len(codes), int(codes.weights.sum())):
            return cls._adopt_csr(*codes.to_csr(), bits)
        return codes

    @classmethod
    def _adopt_csr(cls, indptr, indices, bits) -> "Codes":
        """Fresh canonical CSR (int64 pointers, indices sorted per row, checked), kept in the smaller form."""
        rows = indptr.shape[0] - 1
        if not _sparse_is_smaller(bits, rows, int(indices.shape[0])):
            words, _, _ = _kernels.pack_indices(indptr, indices, _words_for(bits))
            return cls._wrap(words, bits)
        self = cls.__new__(cls)
        self._words = None
        self._indptr = indptr.astype(np.int64, copy=False)
        self._indices = indices.astype(index_dtype(bits), copy=False)
        self._weights = np.diff(self._indptr)
        self._bits = bits
        return self

    def __init__(self, words, bits):
        bits = _check_bits(bits)
        words = np.asarray(words)
        if words.dtype != np.uint64:
            raise TypeError(f"words must be uint64, got dtype {words.dtype}")
        if words.ndim != 2 or words.shape[1] != _words_for(bits):
            raise ValueError(
                f"words must have shape (rows, {_words_for(bits)}) for bits={bits}, got {words.shape}"
            )
        words = np.array(words, dtype=np.uint64, order="C", copy=True)  # never share the caller's buffer
        tail = bits % 64
        if tail and words.shape[0]:
            pad = words[:, -1] >> np.uint64(tail)
            bad = np.flatnonzero(pad)
            if bad.size:
                raise ValueError(f"row {int(bad[0])}: padding bits above bits={bits} are set")
        self._words, self._indptr, self._indices = words, None, None
        self._weights = _kernels.row_weights(words)
        self._bits = bits
        if _sparse_is_smaller(bits, words.shape[0], int(self._weights.sum())):
            self._indptr, indices = _kernels.unpack_indices(words, self._weights)
            self._indices = indices.astype(index_dtype(bits))
            self._words = None

    # -- constructors -----------------------------------------------------

    @classmethod
    def _from_csr(cls, indptr, flat, bits) -> "Codes":
        flat = _validated_indices(flat, indptr, bits)
        if not _sparse_is_smaller(bits, indptr.shape[0] - 1, flat.shape[0]):
            words, dup_row, dup_value = _kernels.pack_indices(indptr, flat, _words_for(bits))
            if dup_row >= 0:
                raise ValueError(f"row {int(dup_row)}: duplicate bit index {int(dup_value)}")
            return cls._wrap(words, bits)
        ordered, dup_row, dup_value = _kernels.sort_rows_checked(indptr, flat)
        if dup_row >= 0:
            raise ValueError(f"row {int(dup_row)}: duplicate bit index {int(dup_value)}")
        return cls._adopt_csr(indptr, ordered, bits)

    @classmethod
    def from_indices(cls, rows, bits) -> "Codes":
        """Codes from index lists: a 2-D integer ndarray or a sequence of sequences.

        A 2-D ndarray (one code per row, all of one weight) converts without
        a Python loop; a sequence may hold rows of different lengths (lists,
        tuples, 1-D arrays or sets). Complexity O(total indices).

        Raises
        ------
        ValueError
            An index out of ``0..bits-1``, negative, NaN or non-integer, or
            repeated within a row; the message names the row and value.

        Examples
        --------
        >>> Codes.from_indices([[1, 2], [0, 3, 7]], bits=8).weights.tolist()
        [2, 3]
        >>> Codes.from_indices([[1, 9]], bits=8)
        Traceback (most recent call last):
        ...
        ValueError: row 0: bit index 9 is out of range for bits=8 (valid 0..7)
        """
        bits = _check_bits(bits)
        if isinstance(rows, np.ndarray):
            if rows.ndim != 2:
                raise ValueError(f"an index matrix must be 2-D (one code per row), got shape {rows.shape}")
            n, w = rows.shape
            indptr = np.arange(0, (n + 1) * w, w, dtype=np.int64) if w else np.zeros(n + 1, dtype=np.int64)
            return cls._from_csr(indptr, rows.reshape(-1), bits)
        if isinstance(rows, (str, bytes)) or not isinstance(rows, (Sequence, np.ndarray)):
            raise TypeError(f"from_indices takes a 2-D integer ndarray or a sequence of index sequences, got {type(rows).__name__}")
        pieces = []
        for r, row in enumerate(rows):
            pieces.append(_row_array(row, r))
        lengths = np.fromiter((p.size for p in pieces), dtype=np.int64, count=len(pieces))
        indptr = np.zeros(len(pieces) + 1, dtype=np.int64)
        np.cumsum(lengths, out=indptr[1:])
        flat = np.concatenate(pieces) if pieces else np.zeros(0, dtype=np.int64)
        if any(p.dtype.kind == "O" for p in pieces):
            flat = np.concatenate([p.astype(object) for p in pieces])
        return cls._from_csr(indptr, flat, bits)

    @classmethod
    def from_dense(cls, array) -> "Codes":
        """Codes from a 2-D ``bool`` array of shape (rows, bits).

        Examples
        --------
        >>> import numpy as np
        >>> Codes.from_dense(np.eye(3, dtype=bool)).to_indices()[2].tolist()
        [2]
        """
        array = np.asarray(array)
        if array.dtype != np.bool_:
            raise TypeError(f"from_dense takes a bool array, got dtype {array.dtype}")
        if array.ndim != 2:
            raise ValueError(f"from_dense takes a 2-D bool array (rows, bits), got shape {array.shape}")
        rows, bits = array.shape
        bits = _check_bits(bits)
        if _sparse_is_smaller(bits, rows, int(np.count_nonzero(array))):
            r, c = np.nonzero(array)  # row-major: indices ascend within each row
            indptr = np.zeros(rows + 1, dtype=np.int64)
            np.cumsum(np.bincount(r, minlength=rows), out=indptr[1:])
            return cls._adopt_csr(indptr, c.astype(np.int64), bits)
        packed = np.packbits(array, axis=1, bitorder="little")
        return cls._wrap(_bytes_to_words(packed, rows, bits), bits)

    @classmethod
    def from_packed(cls, array, bits, bitorder="little") -> "Codes":
        """Codes from packed rows: ``uint8`` bytes or ``uint64`` words.

        ``bitorder="little"``: bit ``i`` is bit ``i % 8`` of byte ``i // 8``
        (or bit ``i % 64`` of word ``i // 64``); ``"big"``: the most
        significant bit comes first, as in ``numpy.packbits``' default.
        Padding bits above ``bits`` must be zero.

        Examples
        --------
        >>> import numpy as np
        >>> Codes.from_packed(np.array([[0b101]], dtype=np.uint8), bits=3)[0].tolist()
        [0, 2]
        >>> Codes.from_packed(np.array([[0b10100000]], dtype=np.uint8), bits=3, bitorder="big")[0].tolist()
        [0, 2]
        """
        bits = _check_bits(bits)
        if bitorder not in ("little", "big"):
            raise ValueError(f"bitorder={bitorder!r} must be 'little' or 'big'")
        array = np.asarray(array)
        if array.ndim != 2:
            raise ValueError(f"packed codes must be 2-D (rows, bytes or words), got shape {array.shape}")
        rows = array.shape[0]
        if array.dtype == np.uint8:
            expected = (bits + 7) // 8
            if array.shape[1] != expected:
                raise ValueError(f"packed uint8 rows for bits={bits} need {expected} bytes, got {array.shape[1]}")
            data = array if bitorder == "little" else _REVERSE_BYTE[array]
            tail = bits % 8
            if tail and rows:
                bad = np.flatnonzero(data[:, -1] >> tail)
                if bad.size:
                    raise ValueError(f"row {int(bad[0])}: padding bits above bits={bits} are set")
            return cls(_bytes_to_words(data, rows, bits), bits)
        if array.dtype == np.uint64:
            expected = _words_for(bits)
            if array.shape[1] != expected:
                raise ValueError(f"packed uint64 rows for bits={bits} need {expected} words, got {array.shape[1]}")
            if bitorder == "little":
                return cls(array.astype(np.uint64, copy=True), bits)
            as_bytes = np.ascontiguousarray(array.astype(">u8")).view(np.uint8).reshape(rows, 8 * array.shape[1])
            data = _REVERSE_BYTE[as_bytes]
            return cls(np.ascontiguousarray(data).view("<u8").astype(np.uint64), bits)
        raise TypeError(f"packed codes must be uint8 or uint64, got dtype {array.dtype}")

    @classmethod
    def from_bitarrays(cls, seq) -> "Codes":
        """Codes from a sequence of ``bitarray`` objects of one length.

        Examples
        --------
        >>> from bitarray import bitarray
        >>> Codes.from_bitarrays([bitarray("0110"), bitarray("1000")]).to_indices()[0].tolist()
        [1, 2]
        """
        from bitarray import bitarray

        seq = list(seq)
        if not seq:
            raise ValueError("from_bitarrays needs at least one bitarray to know the width")
        bits = None
        rows = []
        for r, ba in enumerate(seq):
            if not isinstance(ba, bitarray):
                raise TypeError(f"row {r}: expected a bitarray, got {type(ba).__name__}")
            if bits is None:
                bits = _check_bits(len(ba))
            elif len(ba) != bits:
                raise ValueError(f"row {r}: bitarray has length {len(ba)}, expected {bits} like row 0")
            raw = np.frombuffer(ba.tobytes(), dtype=np.uint8)
            rows.append(raw if ba.endian == "little" else _REVERSE_BYTE[raw])
        data = np.stack(rows)
        tail = bits % 8
        if tail:
            data[:, -1] &= np.uint8((1 << tail) - 1)  # bitarray pads with zeros; make sure
        return cls._adopt_packed(_bytes_to_words(data, len(rows), bits), bits)

    @classmethod
    def from_scipy(cls, matrix) -> "Codes":
        """Codes from a scipy.sparse matrix or array of shape (rows, bits).

        Stored entries must be 0 or 1 (explicit zeros are dropped); a
        repeated (row, column) entry is an error. A wide matrix is taken in
        as indices, never packed (memory follows its entries).

        Examples
        --------
        >>> import scipy.sparse as sp
        >>> Codes.from_scipy(sp.csr_matrix([[0, 1, 1], [1, 0, 0]])).weights.tolist()
        [2, 1]
        """
        import scipy.sparse as sp

        if not sp.issparse(matrix):
            raise TypeError(f"from_scipy takes a scipy.sparse matrix or array, got {type(matrix).__name__}")
        if matrix.ndim != 2:
            raise ValueError(f"from_scipy takes a 2-D sparse matrix, got shape {matrix.shape}")
        indptr, flat, bits = _binary_csr(sp.csr_matrix(matrix, copy=True))
        ordered, dup_row, dup_value = _kernels.sort_rows_checked(indptr, flat)
        if dup_row >= 0:
            raise ValueError(f"row {int(dup_row)}: duplicate entry at bit index {int(dup_value)}")
        return cls._adopt_csr(indptr, ordered, bits)

    @classmethod
    def random(cls, count, bits, weight, seed=0) -> "Codes":
        """``count`` random codes with exactly ``weight`` distinct set bits each.

        Uniform over all such codes (Floyd's sampling, kernels
        ``random_words`` and ``random_indices``, which draw the same codes);
        reproducible from ``seed``. For tests, measurements and benchmarks.
        O(count * weight).

        Examples
        --------
        >>> c = Codes.random(3, bits=100, weight=5, seed=1)
        >>> c.weights.tolist()
        [5, 5, 5]
        >>> Codes.random(3, bits=2**20, weight=5, seed=1)[0].tolist() == Codes.random(3, 2**20, 5, seed=1)[0].tolist()
        True
        """
        bits = _check_bits(bits)
        count = validation.integer("count", count, minimum=0, what="Codes.random")
        weight = validation.integer("weight", weight, minimum=0, maximum=bits, what="Codes.random")
        seed = validation.integer("seed", seed, minimum=0, maximum=validation.SEED_LIMIT - 1, what="Codes.random")
        if _sparse_is_smaller(bits, count, count * weight):
            flat = _kernels.random_indices(count, bits, weight, np.uint64(seed),
                                           np.empty(count * weight, dtype=index_dtype(bits)))
            return cls._adopt_csr(np.arange(0, count * weight + 1, max(weight, 1), dtype=np.int64)[: count + 1]
                                  if weight else np.zeros(count + 1, dtype=np.int64), flat, bits)
        return cls._wrap(_kernels.random_words(count, bits, weight, np.uint64(seed)), bits)

    # -- exits --------------------------------------------------------------

    @property
    def bits(self) -> int:
        """Width of every code.

        Examples
        --------
        >>> c = Codes.from_indices([[1, 70]], bits=100)
        >>> c.bits, c.words.shape, c.weights.tolist()
        (100, (1, 2), [2])
        """
        return self._bits

    @property
    def layout(self) -> str:
        """``"packed"`` or ``"sparse"``: the form this batch is held in."""
        return "sparse" if self._indices is not None else "packed"

    @property
    def nbytes(self) -> int:
        """Bytes this batch holds (its form, the weights and, once made, the other form)."""
        total = self._weights.nbytes
        for part in (self._words, self._indptr, self._indices):
            total += 0 if part is None else part.nbytes
        return total

    @property
    def words(self) -> np.ndarray:
        """The packed rows (read-only view), shape (rows, ceil(bits / 64)); made once for a sparse batch."""
        view = packed_words(self).view()
        view.flags.writeable = False
        return view

    @property
    def weights(self) -> np.ndarray:
        """Set-bit count of every code (read-only int64 view)."""
        view = self._weights.view()
        view.flags.writeable = False
        return view

    def to_csr(self) -> tuple[np.ndarray, np.ndarray]:
        """``(indptr, indices)``: code ``i``'s set bits are ``indices[indptr[i]:indptr[i+1]]``, ascending (int64).

        Examples
        --------
        >>> [a.tolist() for a in Codes.from_indices([[3, 1], [], [7]], bits=8).to_csr()]
        [[0, 2, 2, 3], [1, 3, 7]]
        """
        if self._indices is not None:
            return self._indptr.copy(), self._indices.astype(np.int64)
        return _kernels.unpack_indices(self._words, self._weights)

    def to_indices(self) -> list[np.ndarray]:
        """Each code's set-bit indices, ascending, as a list of int64 arrays.

        Examples
        --------
        >>> [a.tolist() for a in Codes.from_indices([[4, 1], []], bits=8).to_indices()]
        [[1, 4], []]
        """
        if len(self) == 0:
            return []
        indptr, flat = self.to_csr()
        return np.split(flat, indptr[1:-1])

    def _row_table(self) -> tuple:
        if self._indices is not None:
            return index_table(self._indptr, self._indices, self._bits)
        return packed_table(self._words)

    def _packed_words(self) -> np.ndarray:
        if self._words is None:
            self._refuse_expanded("packing", len(self) * 8 * _words_for(self._bits))
            words, _, _ = _kernels.pack_indices(self._indptr, self._indices.astype(np.int64), _words_for(self._bits))
            self._words = words
        return self._words

    def _le_bytes(self) -> np.ndarray:
        """The packed rows as little-endian bytes, shape (rows, 8 * words)."""
        words = packed_words(self)
        return words.astype("<u8", copy=False).view(np.uint8).reshape(len(self), 8 * words.shape[1])

    def _refuse_expanded(self, what: str, nbytes: int) -> None:
        if nbytes > MAX_EXPANDED_BYTES:
            raise ValueError(
                f"{what} of {len(self):,} codes of {self._bits:,} bits would take {nbytes:,} bytes, more than "
                f"MAX_EXPANDED_BYTES={MAX_EXPANDED_BYTES:,}; use to_csr() or to_scipy(), or convert a slice at a time"
            )

    def to_dense(self) -> np.ndarray:
        """A (rows, bits) bool array; ``ValueError`` if it would exceed :data:`MAX_EXPANDED_BYTES`.

        Examples
        --------
        >>> Codes.from_indices([[0, 2]], bits=4).to_dense().tolist()
        [[True, False, True, False]]
        """
        self._refuse_expanded("to_dense", len(self) * self._bits)
        if self._indices is not None:
            out = np.zeros((len(self), self._bits), dtype=bool)
            out[np.repeat(np.arange(len(self)), self._weights), self._indices] = True
            return out
        as_bytes = self._le_bytes()
        return np.unpackbits(as_bytes, axis=1, count=self._bits, bitorder="little").astype(bool)

    def to_packed(self, bitorder="little", dtype=np.uint8) -> np.ndarray:
        """Packed rows as ``uint8`` bytes (default) or ``uint64`` words.

        The inverse of :meth:`from_packed` for the same ``bitorder``;
        ``ValueError`` if the result would exceed :data:`MAX_EXPANDED_BYTES`.

        Examples
        --------
        >>> c = Codes.from_indices([[0, 9]], bits=10)
        >>> c.to_packed().tolist(), c.to_packed(bitorder="big").tolist()
        ([[1, 2]], [[128, 64]])
        """
        if bitorder not in ("little", "big"):
            raise ValueError(f"bitorder={bitorder!r} must be 'little' or 'big'")
        dtype = np.dtype(dtype)
        if dtype not in (np.uint64, np.uint8):
            raise TypeError(f"to_packed dtype must be uint8 or uint64, got {dtype}")
        self._refuse_expanded("to_packed", len(self) * 8 * _words_for(self._bits))
        if dtype == np.uint64:
            if bitorder == "little":
                return packed_words(self).copy()
            as_bytes = self._le_bytes()
            return np.ascontiguousarray(_REVERSE_BYTE[as_bytes]).view(">u8").astype(np.uint64)
        as_bytes = self._le_bytes()
        as_bytes = as_bytes[:, : (self._bits + 7) // 8]
        return np.ascontiguousarray(as_bytes if bitorder == "little" else _REVERSE_BYTE[as_bytes])

    def to_bitarrays(self, endian="big") -> list:
        """Each code as a ``bitarray`` of length ``bits``.

        Examples
        --------
        >>> Codes.from_indices([[0, 2]], bits=4).to_bitarrays()[0].to01()
        '1010'
        """
        from bitarray import bitarray

        packed = self.to_packed(bitorder=endian)
        out = []
        for row in packed:
            ba = bitarray(endian=endian)
            ba.frombytes(row.tobytes())
            del ba[self._bits :]
            out.append(ba)
        return out

    def to_scipy(self):
        """A ``scipy.sparse.csr_array`` of dtype bool, shape (rows, bits).

        Examples
        --------
        >>> m = Codes.from_indices([[0, 2], [3]], bits=4).to_scipy()
        >>> m.shape, m.nnz
        ((2, 4), 3)
        """
        import scipy.sparse as sp

        indptr, flat = self.to_csr()
        data = np.ones(flat.size, dtype=bool)
        return sp.csr_array((data, flat, indptr), shape=(len(self), self._bits))

    # -- container protocol --------------------------------------------------

    def __len__(self) -> int:
        return self._weights.shape[0]

    def __getitem__(self, item):
        n = len(self)
        if isinstance(item, (Integral, np.integer)) and not isinstance(item, (bool, np.bool_)):
            i = int(item)
            if not -n <= i < n:
                raise IndexError(f"code index {i} out of range for {n} codes")
            i %= n
            if self._indices is not None:
                return self._indices[self._indptr[i] : self._indptr[i + 1]].astype(np.int64)
            return _kernels.unpack_indices(self._words[i : i + 1], self._weights[i : i + 1])[1]
        if self._indices is None:
            picked = self._words[item]
            if picked.ndim != 2:
                raise IndexError(f"unsupported index {item!r}")
            # Codes never change after construction, so a view can be shared
            return adopt_words(np.ascontiguousarray(picked), self._bits)
        try:
            rows = np.arange(n)[item]
        except (IndexError, TypeError, ValueError) as exc:
            raise IndexError(f"unsupported index {item!r}: {exc}") from None
        if rows.ndim != 1:
            raise IndexError(f"unsupported index {item!r}")
        lengths = self._weights[rows]
        indptr = np.zeros(rows.shape[0] + 1, dtype=np.int64)
        np.cumsum(lengths, out=indptr[1:])
        gather = np.repeat(self._indptr[rows] - indptr[:-1], lengths) + np.arange(indptr[-1])
        return self._adopt_csr(indptr, self._indices[gather], self._bits)

    def __iter__(self):
        return iter(self.to_indices())

    def __eq__(self, other):
        if not isinstance(other, Codes):
            return NotImplemented
        if self._bits != other.bits or len(self) != len(other) or not np.array_equal(self._weights, other.weights):
            return False
        if self.layout == other.layout == "packed":
            return np.array_equal(self._words, packed_words(other))
        return all(np.array_equal(a, b) for a, b in zip(self.to_csr(), other.to_csr()))

    __hash__ = None

    def __repr__(self) -> str:
        n = len(self)
        if n == 0:
            return f"Codes(rows=0, bits={self._bits})"
        w = self._weights
        return (
            f"Codes(rows={n}, bits={self._bits}, {self.layout}, set bits min/mean/max "
            f"{int(w.min())}/{float(w.mean()):.1f}/{int(w.max())})"
        )

    @staticmethod
    def concat(batches) -> "Codes":
        """Join batches of one width into one.

        Examples
        --------
        >>> a = Codes.from_indices([[1]], bits=4); b = Codes.from_indices([[2], [3]], bits=4)
        >>> len(Codes.concat([a, b]))
        3
        """
        batches = list(batches)
        if not batches:
            raise ValueError("concat needs at least one batch")
        bits = batches[0].bits
        for k, b in enumerate(batches):
            if b.bits != bits:
                raise ValueError(f"batch {k} has bits={b.bits}, expected {bits} like batch 0")
        if all(b.layout == "packed" for b in batches):
            return adopt_words(np.concatenate([packed_words(b) for b in batches]), bits)
        parts = [b.to_csr() for b in batches]
        counts = np.concatenate([np.diff(ip) for ip, _ in parts])
        indptr = np.zeros(counts.shape[0] + 1, dtype=np.int64)
        np.cumsum(counts, out=indptr[1:])
        return adopt_csr(indptr, np.concatenate([ind for _, ind in parts]), bits)


#: Widths up to this are always held packed (a row is at most 512 bytes and
#: the packed kernels read it in a few cache lines).
PACKED_MAX_BITS = 4096
#: ``to_dense`` and ``to_packed`` refuse results larger than this (1 GiB).
MAX_EXPANDED_BYTES = 1 << 30


def index_dtype(bits: int):
    """The narrowest unsigned integer type that holds every index below ``bits``.

    Examples
    --------
    >>> [index_dtype(b).__name__ for b in (256, 257, 2**16 + 1, 2**32 + 1)]
    ['uint8', 'uint16', 'uint32', 'uint64']
    """
    # plain comparisons: this runs on every wide query, and np.iinfo costs microseconds
    return np.uint8 if bits <= 2**8 else np.uint16 if bits <= 2**16 else np.uint32 if bits <= 2**32 else np.uint64


_INDEX_BYTES = {np.uint8: 1, np.uint16: 2, np.uint32: 4, np.uint64: 8}


def _sparse_is_smaller(bits: int, rows: int, nnz: int) -> bool:
    """Whether a batch is held as indices: wide, and smaller that way than packed."""
    if bits <= PACKED_MAX_BITS:
        return False
    packed = rows * 8 * _words_for(bits)
    sparse = 8 * (rows + 1) + nnz * _INDEX_BYTES[index_dtype(bits)]
    return sparse < packed


# The two friends below are how the rest of the package reaches a batch's
# packed rows: kernels need the array itself, since a read-only view is a
# separate numba type (compiled again), and a fresh array needs no copy.


def packed_words(codes: Codes) -> np.ndarray:
    """The batch's packed rows themselves (not a read-only view), for kernels; never write to them.

    A sparse batch packs once, on the first call, and keeps them; ``ValueError``
    if they would exceed :data:`MAX_EXPANDED_BYTES`.
    """
    return codes._packed_words()


def row_table(codes: Codes) -> tuple:
    """The batch as a kernel row table ``(words, indptr, indices)`` (see ``_numba.kernels``), in its own layout."""
    return codes._row_table()


#: The empty parts of a row table: no pointers (a packed table), or no
#: packed rows (an index table).
NO_POINTERS = np.zeros(0, dtype=np.int64)
NO_INDICES = np.zeros(0, dtype=np.uint16)


def packed_table(words: np.ndarray) -> tuple:
    """A kernel row table over packed rows."""
    return (words, NO_POINTERS, NO_INDICES)


def index_table(indptr: np.ndarray, indices: np.ndarray, bits: int) -> tuple:
    """A kernel row table over sorted index rows (int64 pointers, ``rows + 1`` of them)."""
    return (np.zeros((0, _words_for(bits)), dtype=np.uint64), indptr, indices)


def query_words(codes: Codes, table: tuple) -> np.ndarray:
    """The batch's rows as the exact check against a kernel row table wants them.

    A packed table ANDs with packed queries (:func:`packed_words`); an index
    table merges with each query's sorted bits, so its queries get empty
    rows and a wide query is never packed.
    """
    if table[1].shape[0] == 0:
        return packed_words(codes)
    return np.zeros((len(codes), 0), dtype=np.uint64)


def adopt_words(words: np.ndarray, bits: int) -> Codes:
    """A Codes over a fresh, canonical uint64 array made by the caller, without a copy or a check."""
    return Codes._wrap(words, bits)


def adopt_csr(indptr: np.ndarray, indices: np.ndarray, bits: int) -> Codes:
    """A Codes over fresh CSR arrays (int64 pointers, in-range indices sorted and distinct per row), unchecked."""
    return Codes._adopt_csr(indptr, indices, bits)


def _row_array(row, r: int) -> np.ndarray:
    """One row of a sequence of index sequences as a 1-D array."""
    if isinstance(row, (Set, frozenset)):
        row = sorted(row, key=lambda v: (not isinstance(v, Integral), v if isinstance(v, Integral) else 0))
    if isinstance(row, (str, bytes)) or not isinstance(row, (Sequence, np.ndarray)):
        raise TypeError(f"row {r}: expected a sequence of bit indices, got {type(row).__name__} {row!r}")
    arr = np.asarray(row)
    if arr.ndim != 1:
        if arr.ndim == 0 or arr.size:
            raise ValueError(f"row {r}: expected a flat sequence of bit indices, got shape {arr.shape}")
        arr = arr.reshape(0)
    if arr.dtype.kind not in "iuf" and arr.size:
        arr = np.asarray(row, dtype=object)
    return arr


def _bytes_to_words(data: np.ndarray, rows: int, bits: int) -> np.ndarray:
    """LSB-first uint8 rows -> native uint64 words, zero-padded."""
    n_bytes = 8 * _words_for(bits)
    buf = np.zeros((rows, n_bytes), dtype=np.uint8)
    buf[:, : data.shape[1]] = data
    return buf.view("<u8").astype(np.uint64)


def _is_bool_array(obj) -> bool:
    return isinstance(obj, np.ndarray) and obj.dtype == np.bool_


def as_codes(obj, bits: int, *, what: str = "codes") -> Codes:
    """Convert any accepted batch form to :class:`Codes` of width ``bits``.

    Raises ``TypeError`` for an unaccepted form (naming the accepted ones)
    and ``ValueError`` for a wrong width or a bad row.

    Examples
    --------
    >>> len(as_codes([[1, 2], [3]], bits=8))
    2
    >>> as_codes([[1, 9]], bits=8)
    Traceback (most recent call last):
    ...
    ValueError: row 0: bit index 9 is out of range for bits=8 (valid 0..7)
    """
    import scipy.sparse as sp

    if isinstance(obj, Codes):
        codes = obj
    elif _is_bool_array(obj):
        if obj.ndim != 2:
            raise ValueError(f"{what}: a bool array batch must be 2-D (rows, bits), got shape {obj.shape}")
        if obj.shape[1] != bits:
            raise ValueError(f"{what}: dense array has width {obj.shape[1]}, expected bits={bits}")
        codes = Codes.from_dense(obj)
    elif sp.issparse(obj):
        if obj.ndim == 2 and obj.shape[1] != bits:
            raise ValueError(f"{what}: sparse matrix has width {obj.shape[1]}, expected bits={bits}")
        codes = Codes.from_scipy(obj)
    elif isinstance(obj, np.ndarray):
        raise TypeError(
            f"{what}: a {obj.ndim}-D {obj.dtype} ndarray is not an accepted batch; accepted: "
            f"{ACCEPTED_BATCH_FORMS}. {_PACKED_HINT}"
        )
    elif isinstance(obj, (list, tuple)):
        from bitarray import bitarray

        if obj and all(isinstance(x, bitarray) for x in obj):
            codes = Codes.from_bitarrays(obj)
        else:
            for r, x in enumerate(obj):
                if isinstance(x, bitarray):
                    raise TypeError(f"{what}: row {r} is a bitarray but other rows are not; do not mix forms")
            codes = Codes.from_indices(obj, bits)
    else:
        raise TypeError(f"{what}: {validation.quoted(obj)} ({type(obj).__name__}) is not an accepted batch; "
                        f"accepted: {ACCEPTED_BATCH_FORMS}")
    if codes.bits != bits:
        raise ValueError(f"{what}: codes have bits={codes.bits}, expected bits={bits}")
    return codes


def _plain_ints_code(obj, bits: int):
    """The one-row Codes of plain distinct in-range ints; None for anything else.

    Takes a list or tuple of Python ints, or a 1-D integer ndarray: the
    common query forms, without the general path's per-row machinery (a
    tenth of its time for an array, three quarters for a list). Any other input —
    and any bad value — goes the general way, which names the problem.
    """
    if type(obj) is np.ndarray:
        if obj.ndim != 1 or obj.dtype.kind not in "iu":
            return None
        arr = np.ascontiguousarray(obj, dtype=np.int64)  # uint64 >= 2**63 wraps negative: refused below
    elif type(obj) in (list, tuple) and all(type(x) is int for x in obj):
        try:
            arr = np.array(obj, dtype=np.int64) if obj else np.zeros(0, dtype=np.int64)
        except OverflowError:
            return None
    else:
        return None
    if bits > PACKED_MAX_BITS:  # wide: never a width-sized row for one query
        if arr.size and (arr.min() < 0 or arr.max() >= bits):
            return None
        indptr = np.array([0, arr.size], dtype=np.int64)
        ordered, dup_row, _ = _kernels.sort_rows_checked(indptr, arr)
        return None if dup_row >= 0 else adopt_csr(indptr, ordered, bits)
    words, ok = _kernels.pack_one_checked(arr, bits, _words_for(bits))
    return adopt_words(words, bits) if ok else None


def as_code(obj, bits: int, *, what: str = "code") -> Codes:
    """Convert any accepted single-code form to a one-row :class:`Codes`.

    Examples
    --------
    >>> as_code({5, 1}, bits=8).to_indices()[0].tolist()
    [1, 5]
    """
    fast = _plain_ints_code(obj, bits)
    if fast is not None:
        return fast
    from bitarray import bitarray

    if isinstance(obj, Codes):
        if len(obj) != 1:
            raise ValueError(f"{what}: expected one code, got a batch of {len(obj)}")
        codes = obj
    elif isinstance(obj, bitarray):
        codes = Codes.from_bitarrays([obj])
    elif _is_bool_array(obj):
        if obj.ndim != 1:
            raise ValueError(f"{what}: a single code as a bool array must be 1-D, got shape {obj.shape}")
        if obj.shape[0] != bits:
            raise ValueError(f"{what}: dense array has width {obj.shape[0]}, expected bits={bits}")
        codes = Codes.from_dense(obj[None, :])
    elif isinstance(obj, np.ndarray):
        if obj.ndim != 1:
            raise TypeError(
                f"{what}: a {obj.ndim}-D {obj.dtype} ndarray is not a single code; accepted: {ACCEPTED_SINGLE_FORMS}"
            )
        codes = Codes.from_indices([obj], bits)
    elif isinstance(obj, (Set, frozenset, list, tuple, range)):
        codes = Codes.from_indices([obj], bits)
    else:
        raise TypeError(f"{what}: {validation.quoted(obj)} ({type(obj).__name__}) is not an accepted code; "
                        f"accepted: {ACCEPTED_SINGLE_FORMS}")
    if codes.bits != bits:
        raise ValueError(f"{what}: code has bits={codes.bits}, expected bits={bits}")
    return codes
