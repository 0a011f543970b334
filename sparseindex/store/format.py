"""Store files: this project's own format, atomic durable saves, validating loads.

The layout is documented in ``docs/format.md``. In short: a 32-byte
preamble (magic, major and minor version, header length and CRC32, and a
CRC32 of the preamble itself), a JSON header, then raw little-endian array
sections, each starting on a 64-byte boundary and covered by its own CRC32.
The file ends exactly where the last section ends, and every gap is zero.

This module knows the file and :class:`StoreState` only, never the Store:
``Store.save`` hands it a state, ``Store.load`` gets one back. A state that
comes out of :func:`read_file` or :func:`read_bytes` has passed every check
in ``_validate_*`` — nothing from a file reaches a numba kernel before it has
(kernels run without bounds checks).
"""

from __future__ import annotations

import dataclasses
import json
import math
import mmap as _mmap
import os
import secrets
import stat
import struct
import sys
import warnings
import zlib

import numpy as np

from .._numba import kernels as _kernels
from .._numba.config import PARALLEL_LOCK
from .. import validation
from ..codes import index_dtype, index_table, packed_table
from ..version import __version__
from ..errors import FormatVersionWarning, StoreFormatError

MAGIC = b"\x89SIDX\r\n\x1a"
FORMAT_MAJOR = 1
FORMAT_MINOR = 3
#: Keys that format 1.0 (and sharded manifest format 1) spelled differently; nothing else changed.
RENAMED_KEYS = {"segment": "sample_size", "active": "weight", "capacity": "limit"}
_PARAM_RENAMES = {old: new for old, new in RENAMED_KEYS.items() if new == "sample_size"}
#: magic, major, minor, header bytes, header CRC32, preamble CRC32, 8 zero bytes
PREAMBLE = struct.Struct("<8sHHIII8x")
PREAMBLE_CRC_SPAN = 20  # the CRC covers bytes 0..19 (everything before it)
ALIGN = 64
#: Largest header accepted; checked before the header is read.
MAX_HEADER_BYTES = 1 << 20
#: Largest ``bits`` a file may declare: the widest a store may be (a wide
#: store's per-bit tables are sized by the bits in use, its column map).
MAX_BITS = validation.MAX_BITS
MAX_DETECTORS_TOTAL = 2**31 - 1
_WRITE_CHUNK = 1 << 23
KIND = "sparseindex store"
_NO_COLUMNS = np.zeros(0, dtype=np.int64)


@dataclasses.dataclass
class StoreState:
    """Everything a store file holds, as arrays and plain values.

    ``weights`` and ``max_sample`` are derived (not stored): :func:`read_file`
    recomputes them from the rows. Rows are ``words`` (``row_layout``
    ``"packed"``) or ``row_indptr`` / ``row_indices`` (``"sparse"``).

    Examples
    --------
    >>> from sparseindex import Store
    >>> store = Store(bits=64, threshold=2, seed=3); _ = store.add([[1, 2, 3], [7, 8]])
    >>> state = store._state()        # what Store.save hands to save_file
    >>> state.rows, state.bits, state.postings.shape[0], state.weights is None
    (2, 64, 5, True)
    """

    bits: int
    threshold: int
    sample_size: int | None
    detectors: int
    seed: int
    block_span: int
    plan: dict | None
    rows: int
    next_id: int
    removed_count: int
    words: np.ndarray | None
    removed: np.ndarray
    row_ids: np.ndarray | None
    block_lo: np.ndarray
    block_hi: np.ndarray
    block_indptr: np.ndarray
    postings: np.ndarray
    weights: np.ndarray | None = None
    max_sample: int = 0
    row_layout: str = "packed"
    row_indptr: np.ndarray | None = None  # sparse rows: rows + 1 int64 pointers
    row_indices: np.ndarray | None = None  # sparse rows: sorted set-bit indices, narrowest unsigned type
    bit_columns: np.ndarray | None = None  # the postings' column map (int64 bits, ascending), or None


def _fail(section, problem, path=None):
    raise StoreFormatError(section, problem, path)


# ---------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------


def _little(array: np.ndarray) -> np.ndarray:
    """C-contiguous little-endian copy (or view) of an array, as raw bytes."""
    dtype = array.dtype.newbyteorder("<") if array.dtype.itemsize > 1 else array.dtype
    flat = np.ascontiguousarray(array, dtype=dtype).reshape(-1)
    return flat.view(np.uint8)


def _dtype_name(array: np.ndarray) -> str:
    return {np.dtype(np.uint64): "<u8", np.dtype(np.int64): "<i8", np.dtype(np.uint16): "<u2",
            np.dtype(np.uint32): "<u4", np.dtype(np.uint8): "|u1", np.dtype(np.bool_): "|u1"}[array.dtype]


def index_dtype_name(bits: int) -> str:
    """The file dtype of sparse row indices for a width: the narrowest unsigned type."""
    return {1: "|u1", 2: "<u2", 4: "<u4", 8: "<u8"}[np.dtype(index_dtype(bits)).itemsize]


def _section_arrays(state: StoreState):
    if state.row_layout == "sparse":
        sections = [("row_indptr", state.row_indptr), ("row_indices", state.row_indices)]
    else:
        sections = [("words", state.words)]
    sections.append(("removed", state.removed.view(np.uint8)))
    if state.row_ids is not None:
        sections.append(("row_ids", state.row_ids))
    sections += [
        ("block_lo", state.block_lo),
        ("block_hi", state.block_hi),
    ]
    if state.bit_columns is not None:
        sections.append(("bit_columns", state.bit_columns))
    sections += [
        ("block_indptr", state.block_indptr),
        ("postings", state.postings),
    ]
    return sections


def _round_up(n: int) -> int:
    return -(-n // ALIGN) * ALIGN


def encode(state: StoreState):
    """The file as ``(head, pieces, size)``: ``head`` is the preamble and
    header bytes; ``pieces`` are ``(offset, uint8 array)`` in file order.

    Every offset is a multiple of 64 and the file ends where the last piece
    does. O(size) for the CRC32s; the arrays are not copied when they are
    already little-endian and contiguous.

    Examples
    --------
    >>> from sparseindex import Store
    >>> store = Store(bits=64, threshold=2, seed=3); _ = store.add([[1, 2, 3], [7, 8]])
    >>> head, pieces, size = encode(store._state())
    >>> head[:8] == MAGIC, all(offset % 64 == 0 for offset, _ in pieces), size
    (True, True, 1738)
    """
    table, pieces = [], []
    for name, array in _section_arrays(state):
        raw = _little(array)
        table.append({"name": name, "dtype": _dtype_name(array), "shape": list(array.shape),
                      "nbytes": int(raw.shape[0]), "crc32": zlib.crc32(raw)})
        pieces.append(raw)
    header = {
        "kind": KIND,
        "written_by": library_version(),
        "params": {
            "bits": state.bits, "threshold": state.threshold, "sample_size": state.sample_size,
            "detectors": state.detectors, "seed": state.seed, "block_span": state.block_span,
            "row_layout": state.row_layout,
        },
        "plan": state.plan,
        "counts": {
            "rows": state.rows, "next_id": state.next_id, "removed": state.removed_count,
            "blocks": int(state.block_lo.shape[0]), "postings": int(state.postings.shape[0]),
            "set_bits": 0 if state.row_indices is None else int(state.row_indices.shape[0]),
            "mapped_bits": None if state.bit_columns is None else int(state.bit_columns.shape[0]),
        },
        "sections": table,
    }
    # offsets depend on the header's length, which depends on the offsets'
    # digits: settle it by iterating (converges in two or three rounds)
    offsets = [0] * len(table)
    while True:
        for entry, off in zip(table, offsets):
            entry["offset"] = off
        text = json.dumps(header, separators=(",", ":"), allow_nan=False).encode("utf-8")
        start = _round_up(PREAMBLE.size + len(text))
        new = []
        for entry in table:
            new.append(start)
            start = _round_up(start + entry["nbytes"])
        if new == offsets:
            break
        offsets = new
    if len(text) > MAX_HEADER_BYTES:
        raise ValueError(f"store header would be {len(text)} bytes, over the {MAX_HEADER_BYTES}-byte limit")
    head_crc = zlib.crc32(text)
    fixed = struct.pack("<8sHHII", MAGIC, FORMAT_MAJOR, FORMAT_MINOR, len(text), head_crc)
    head = PREAMBLE.pack(MAGIC, FORMAT_MAJOR, FORMAT_MINOR, len(text), head_crc, zlib.crc32(fixed)) + text
    size = offsets[-1] + table[-1]["nbytes"]
    return head, list(zip(offsets, pieces)), size


def library_version() -> str:
    return f"sparseindex {__version__}"


def _chunks(head, pieces):
    """Bytes of the file in order, zero padding included."""
    yield memoryview(head)
    at = len(head)
    for offset, raw in pieces:
        if offset > at:
            yield memoryview(bytes(offset - at))
        yield memoryview(raw)
        at = offset + raw.shape[0]


def dumps(state: StoreState) -> bytes:
    """The whole file as one ``bytes`` object (the pickle path of a Store).

    Examples
    --------
    >>> from sparseindex import Store
    >>> store = Store(bits=64, threshold=2, seed=3); _ = store.add([[1, 2, 3], [7, 8]])
    >>> data = dumps(store._state())
    >>> len(data), read_bytes(data).rows
    (1738, 2)
    """
    head, pieces, size = encode(state)
    out = bytearray()
    for chunk in _chunks(head, pieces):
        out += chunk
    assert len(out) == size
    return bytes(out)


def write_all(fd: int, view: memoryview) -> None:
    view = view.cast("B") if view.format != "B" else view
    while view.nbytes:
        n = os.write(fd, view[:_WRITE_CHUNK])
        if n <= 0:
            raise OSError(f"write returned {n}")
        view = view[n:]


def fsync_directory(directory: str) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def save_file(path, state: StoreState) -> None:
    """Write ``state`` to ``path`` atomically and durably.

    A temporary file in the same directory is written, ``fsync``-ed and
    renamed over ``path`` with ``os.replace``; then the directory is
    ``fsync``-ed. On any error the temporary file is removed, ``path`` keeps
    its previous content and the error propagates (a failed fsync is never
    retried). If only the directory ``fsync`` fails, the previous file is
    put back under ``path`` from a hard link taken before the rename.

    Examples
    --------
    >>> import os, tempfile
    >>> from sparseindex import Store
    >>> store = Store(bits=64, threshold=2, seed=3); _ = store.add([[1, 2, 3], [7, 8]])
    >>> folder = tempfile.mkdtemp(); path = os.path.join(folder, "depot.sidx")
    >>> save_file(path, store._state())
    >>> os.listdir(folder), os.path.getsize(path)      # no temporary file left behind
    (['depot.sidx'], 1738)
    """
    path = os.fspath(path)
    head, pieces, _ = encode(state)
    directory = os.path.dirname(os.path.abspath(path))
    base = os.path.basename(path)
    tag = f"{os.getpid()}.{secrets.token_hex(4)}"
    tmp = os.path.join(directory, f".{base}.{tag}.tmp")
    backup = None
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0), 0o666)
    try:
        try:
            for chunk in _chunks(head, pieces):
                write_all(fd, chunk)
            os.fsync(fd)
        finally:
            os.close(fd)
        if os.path.isfile(path):
            candidate = os.path.join(directory, f".{base}.{tag}.previous")
            try:
                os.link(path, candidate)
                backup = candidate
            except OSError:
                backup = None  # no hard links here: a failed directory fsync cannot roll back
        os.replace(tmp, path)
        tmp = None
        try:
            fsync_directory(directory)
        except BaseException:
            if backup is not None:
                os.replace(backup, path)
                backup = None
            raise
    finally:
        for leftover in (tmp, backup):
            if leftover is not None:
                try:
                    os.unlink(leftover)
                except OSError:
                    pass


# ---------------------------------------------------------------------------
# reading and validation
# ---------------------------------------------------------------------------


def no_duplicate_keys(pairs):
    out = {}
    for key, value in pairs:
        if key in out:
            raise ValueError(f"duplicate key {key!r}")
        out[key] = value
    return out


def reject_constant(name):
    raise ValueError(f"{name} is not allowed")


def _check_preamble(pre: bytes, size: int, path):
    if size < PREAMBLE.size:
        _fail("preamble", f"file is {size} bytes, shorter than the {PREAMBLE.size}-byte preamble", path)
    magic, major, minor, header_bytes, header_crc, preamble_crc = PREAMBLE.unpack(pre)
    if magic != MAGIC:
        _fail("preamble", f"magic bytes {magic!r} are not {MAGIC!r}: not a sparseindex store file", path)
    if major != FORMAT_MAJOR:
        _fail("preamble", f"store file format {major}.{minor} is not supported: this library reads "
              f"{FORMAT_MAJOR}.0 to {FORMAT_MAJOR}.{FORMAT_MINOR}", path)
    if zlib.crc32(pre[:PREAMBLE_CRC_SPAN]) != preamble_crc:
        _fail("preamble", "CRC32 mismatch: the preamble is corrupt", path)
    if pre[PREAMBLE_CRC_SPAN + 4 :] != bytes(PREAMBLE.size - PREAMBLE_CRC_SPAN - 4):
        _fail("preamble", "reserved bytes are not zero", path)
    if header_bytes > MAX_HEADER_BYTES:
        _fail("preamble", f"header length {header_bytes} exceeds the {MAX_HEADER_BYTES}-byte limit", path)
    if PREAMBLE.size + header_bytes > size:
        _fail("preamble", f"header of {header_bytes} bytes runs past the end of the {size}-byte file", path)
    if minor > FORMAT_MINOR:
        warnings.warn(
            f"store file format {major}.{minor} is newer than {FORMAT_MAJOR}.{FORMAT_MINOR}; "
            "fields this version does not know are ignored",
            FormatVersionWarning,
            stacklevel=4,
        )
    return minor, header_bytes, header_crc


def _parse_header(text: bytes, crc: int, path):
    if zlib.crc32(text) != crc:
        _fail("header", "CRC32 mismatch: the header is corrupt", path)
    try:
        header = json.loads(
            text.decode("utf-8"), object_pairs_hook=no_duplicate_keys, parse_constant=reject_constant
        )
    except (ValueError, RecursionError) as exc:  # UnicodeDecodeError and JSONDecodeError are ValueErrors
        _fail("header", f"not valid JSON: {exc}", path)
    return header


class _Fields:
    """Typed access to one JSON object of the header, with exact key sets."""

    def __init__(self, obj, section, keys, strict, path):
        self.section, self.path = section, path
        if not isinstance(obj, dict):
            _fail(section, f"expected a JSON object, got {type(obj).__name__}", path)
        missing = [k for k in keys if k not in obj]
        if missing:
            _fail(section, f"missing key {missing[0]!r}", path)
        extra = sorted(set(obj) - set(keys))
        if extra and strict:
            _fail(section, f"unknown key {extra[0]!r}", path)
        self.obj = obj

    def int(self, key, lo, hi, allow_none=False):
        value = self.obj[key]
        if value is None and allow_none:
            return None
        if isinstance(value, bool) or not isinstance(value, int):
            _fail(self.section, f"{key}={value!r} is not an integer", self.path)
        if not lo <= value <= hi:
            _fail(self.section, f"{key}={value} is outside {lo}..{hi}", self.path)
        return value


def _parse_params(header, strict, minor, path):
    top = _Fields(header, "header", ("kind", "written_by", "params", "plan", "counts", "sections"), strict, path)
    if header["kind"] != KIND:
        _fail("header", f"kind={header['kind']!r} is not {KIND!r}", path)
    since_1_2 = ("row_layout",) if minor >= 2 else ()
    p = _Fields(header["params"], "params",
                ("bits", "threshold", "sample_size", "detectors", "seed", "block_span") + since_1_2, strict, path)
    layout = header["params"]["row_layout"] if minor >= 2 else "packed"
    if layout not in ("packed", "sparse"):
        _fail("params", f"row_layout={layout!r} is not 'packed' or 'sparse'", path)
    bits = p.int("bits", 1, MAX_BITS)
    threshold = p.int("threshold", 1, bits)
    sample_size = p.int("sample_size", threshold, 2**31 - 1, allow_none=True)
    detectors = p.int("detectors", 1, MAX_DETECTORS_TOTAL)
    seed = p.int("seed", 0, 2**64 - 1)
    block_span = p.int("block_span", 1, 2**16)
    counted = ("rows", "next_id", "removed", "blocks", "postings") + (("set_bits",) if minor >= 2 else ()) + (
        ("mapped_bits",) if minor >= 3 else ())
    c = _Fields(header["counts"], "counts", counted, strict, path)
    next_id = c.int("next_id", 0, 2**62)
    rows = c.int("rows", 0, min(next_id, MAX_DETECTORS_TOTAL // detectors))
    removed = c.int("removed", 0, rows)
    blocks = c.int("blocks", 0, 2**62)
    postings = c.int("postings", 0, 2**62)
    set_bits = c.int("set_bits", 0, 2**62) if minor >= 2 else 0
    mapped_bits = c.int("mapped_bits", 0, bits, allow_none=True) if minor >= 3 else None
    if layout == "packed" and set_bits:
        _fail("counts", f"set_bits={set_bits} in a store with packed rows (it counts sparse row indices)", path)
    if (blocks == 0) != (rows == 0):
        _fail("counts", f"blocks={blocks} with rows={rows}: a store has blocks exactly when it has rows", path)
    del top
    return dict(bits=bits, threshold=threshold, sample_size=sample_size, detectors=detectors, seed=seed,
                block_span=block_span, rows=rows, next_id=next_id, removed_count=removed, blocks=blocks,
                postings=postings, row_layout=layout, set_bits=set_bits, mapped_bits=mapped_bits)


def _expected_sections(v):
    rows, bits = v["rows"], v["bits"]
    if v["row_layout"] == "sparse":
        out = [("row_indptr", "<i8", (rows + 1,)), ("row_indices", index_dtype_name(bits), (v["set_bits"],))]
    else:
        out = [("words", "<u8", (rows, (bits + 63) // 64))]
    out.append(("removed", "|u1", (rows,)))
    if rows < v["next_id"]:
        out.append(("row_ids", "<i8", (rows,)))
    out += [
        ("block_lo", "<i8", (v["blocks"],)),
        ("block_hi", "<i8", (v["blocks"],)),
    ]
    mapped = v["mapped_bits"]
    if mapped is not None:
        out.append(("bit_columns", "<i8", (mapped,)))
    out += [
        ("block_indptr", "<i8", (v["blocks"], bits + 1 if mapped is None else mapped + 2)),
        ("postings", "<u2", (v["postings"],)),
    ]
    return out


def _parse_layout(header, v, strict, data_start, size, path):
    """Section table checked against the counts and the file size (no allocation)."""
    table = header["sections"]
    if not isinstance(table, list):
        _fail("header", "sections is not a list", path)
    expected = _expected_sections(v)
    known = {name for name, _, _ in expected}
    entries, at = {}, data_start
    order = []
    for i, raw in enumerate(table):
        name = raw.get("name") if isinstance(raw, dict) else None
        if not isinstance(name, str) or len(name) > 64:
            _fail(f"sections[{i}]", f"name={name!r} is not a section name", path)
        e = _Fields(raw, name, ("name", "dtype", "shape", "offset", "nbytes", "crc32"), strict, path)
        if name in entries:
            _fail(name, "listed twice", path)
        offset = e.int("offset", 0, 2**63)
        nbytes = e.int("nbytes", 0, 2**63)
        crc = e.int("crc32", 0, 2**32 - 1)
        if offset % ALIGN:
            _fail(name, f"offset {offset} is not a multiple of {ALIGN}", path)
        if offset < at:
            _fail(name, f"offset {offset} overlaps the data before it (which ends at {at})", path)
        if offset + nbytes > size:
            _fail(name, f"runs to byte {offset + nbytes}, past the end of the {size}-byte file", path)
        entries[name] = (raw, offset, nbytes, crc)
        order.append(name)
        at = offset + nbytes
    names = [n for n in order if n in known]
    if names != [name for name, _, _ in expected]:
        _fail("header", f"sections {names} are not the expected {[n for n, _, _ in expected]}", path)
    if strict and len(order) != len(names):
        _fail("header", f"unknown section {sorted(set(order) - known)[0]!r}", path)
    if at != size:
        _fail("file", f"file is {size} bytes but its sections end at byte {at}", path)
    layout = []
    for name, dtype, shape in expected:
        raw, offset, nbytes, crc = entries[name]
        if raw["dtype"] != dtype:
            _fail(name, f"dtype {raw['dtype']!r} is not {dtype!r}", path)
        if raw["shape"] != list(shape):
            _fail(name, f"shape {raw['shape']!r} does not match the counts (expected {list(shape)})", path)
        want = math.prod(shape) * np.dtype(dtype).itemsize
        if nbytes != want:
            _fail(name, f"nbytes={nbytes} but shape {list(shape)} of {dtype} needs {want}", path)
        layout.append((name, dtype, shape, offset, nbytes, crc))
    gaps = []
    at = data_start
    for name in order:
        _, offset, nbytes, _ = entries[name]
        gaps.append((at, offset))
        at = offset + nbytes
    unknown = [(entries[n][1], entries[n][2], entries[n][3], n) for n in order if n not in known]
    return layout, gaps, unknown


def _parse_plan(plan, v, path):
    if plan is None:
        return None
    from ..model.planner import Plan

    def build(obj, where, depth):
        names = [f.name for f in dataclasses.fields(Plan)]
        f = _Fields(obj, where, names, True, path)
        kwargs = {}
        for field in dataclasses.fields(Plan):
            value = obj[field.name]
            if field.name == "alternatives":
                if not isinstance(value, list) or (depth and value):
                    _fail(where, "alternatives must be a list (and empty inside an alternative)", path)
                kwargs["alternatives"] = tuple(build(a, f"{where}.alternatives[{j}]", 1) for j, a in enumerate(value))
            elif field.name == "limit":
                if value is None:
                    kwargs["limit"] = math.inf
                elif isinstance(value, bool) or not isinstance(value, (int, float)) or value < 0:
                    _fail(where, f"limit={value!r} is not a count", path)
                else:
                    kwargs["limit"] = value
            elif field.type in ("int", int):
                kwargs[field.name] = f.int(field.name, 0, 2**62)
            else:
                if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                    _fail(where, f"{field.name}={value!r} is not a finite number", path)
                kwargs[field.name] = float(value)
        return Plan(**kwargs)

    chosen = build(plan, "plan", 0)
    for key in ("bits", "threshold", "detectors"):
        if getattr(chosen, key) != v[key]:
            _fail("plan", f"plan {key}={getattr(chosen, key)} differs from the store's {key}={v[key]}", path)
    if v["sample_size"] is not None and chosen.sample_size != v["sample_size"]:
        _fail("plan", f"plan sample_size={chosen.sample_size} differs from the store's sample_size={v['sample_size']}", path)
    return chosen


def _view(buf: np.ndarray, dtype: str, shape, offset: int, nbytes: int) -> np.ndarray:
    arr = buf[offset : offset + nbytes].view(np.dtype(dtype)).reshape(shape)
    if sys.byteorder != "little" and arr.dtype.itemsize > 1:
        arr = arr.astype(arr.dtype.newbyteorder("="))
    return arr


def _validate_blocks(arrays, table, weights, v, path):
    """Block ranges, offsets and every posting against the codes (kernel ``check_postings``)."""
    rows, detectors = v["rows"], v["detectors"]
    lo, hi, indptr, post = arrays["block_lo"], arrays["block_hi"], arrays["block_indptr"], arrays["postings"]
    columns = arrays.get("bit_columns")
    if columns is not None and columns.shape[0]:
        if columns[0] < 0 or columns[-1] >= v["bits"] or np.any(np.diff(columns) <= 0):
            _fail("bit_columns", f"the column map is not strictly ascending inside 0..{v['bits'] - 1}", path)
    span = v["block_span"]
    if v["blocks"]:
        if lo[0] != 0 or hi[-1] != rows * detectors:
            _fail("block_lo", f"blocks cover detectors {int(lo[0])}..{int(hi[-1]) - 1}, "
                  f"not 0..{rows * detectors - 1}", path)
        if not (np.all(hi > lo) and np.all(lo[1:] == hi[:-1])):
            _fail("block_hi", "block ranges are empty or not consecutive", path)
        if not np.all((hi - 1) // span == lo // span):
            _fail("block_hi", f"a block crosses a {span}-detector span boundary", path)
        groups = lo // span
        if np.any(groups[:-1][groups[:-1] == groups[1:]] != groups[-1]):
            _fail("block_lo", "a completed span is split into several blocks", path)
        if indptr[0, 0] != 0 or indptr[-1, -1] != post.shape[0]:
            _fail("block_indptr", f"offsets run {int(indptr[0, 0])}..{int(indptr[-1, -1])}, "
                  f"not 0..{post.shape[0]}", path)
        if np.any(indptr[1:, 0] != indptr[:-1, -1]) or np.any(np.diff(indptr, axis=1) < 0):
            _fail("block_indptr", "offsets are not monotone", path)
        if columns is not None and np.any(indptr[:, -2] != indptr[:, -1]):
            _fail("block_indptr", "the spare column (bits no code sets) holds postings", path)
        tail_rows = indptr[groups == groups[-1]]
        if tail_rows.shape[0] > 2 + int(np.log2(1 + tail_rows[-1, -1] - tail_rows[0, 0])):
            _fail("block_lo", f"{tail_rows.shape[0]} blocks in the last span, more than a store ever keeps", path)
        sample_size = -1 if v["sample_size"] is None else v["sample_size"]
        with PARALLEL_LOCK:
            problem, where = _kernels.check_postings(post, indptr, _NO_COLUMNS if columns is None else columns, lo, hi,
                                                     table, weights, detectors, sample_size)
        messages = {
            1: f"posting {where} points outside its block",
            2: f"posting {where} breaks the ascending order of its bit",
            3: f"posting {where} names a bit that is not set in its code",
            4: f"detector {where} has the wrong number of postings",
        }
        if problem:
            _fail("postings", messages[int(problem)], path)
    elif post.shape[0]:
        _fail("postings", f"{post.shape[0]} postings in a store without rows", path)


def _validated_rows(arrays, v, path):
    """The rows as a kernel row table, their weights, and the section to blame for a bad row."""
    rows, bits = v["rows"], v["bits"]
    if v["row_layout"] == "sparse":
        indptr, indices = arrays["row_indptr"], arrays["row_indices"]
        if indptr[0] != 0 or indptr[-1] != indices.shape[0]:
            _fail("row_indptr", f"pointers run {int(indptr[0])}..{int(indptr[-1])}, not 0..{indices.shape[0]}", path)
        steps = np.flatnonzero(np.diff(indptr) < 0)
        if steps.size:
            _fail("row_indptr", f"pointers descend at row {int(steps[0])}", path)
        problem, row = _kernels.check_index_rows(indptr, indices, bits)
        if problem:
            what = {1: f"has an index >= bits={bits}", 2: "is not strictly ascending (unsorted or repeated)"}
            _fail("row_indices", f"row {int(row)} {what[int(problem)]}", path)
        return index_table(indptr, indices, bits), np.diff(indptr), "row_indices"
    words = arrays["words"]
    tail = bits % 64
    if tail and rows:
        dirty = np.flatnonzero(words[:, -1] >> np.uint64(tail))
        if dirty.size:
            _fail("words", f"row {int(dirty[0])} has bits set above bits={bits} (padding must be zero)", path)
    return packed_table(words), _kernels.row_weights(words), "words"


def _validate_body(buf, header_text, v, layout, gaps, unknown, path):
    """CRCs, padding and every structural property kernels rely on."""
    for lo, hi in gaps:
        if hi > lo and buf[lo:hi].any():
            _fail("padding", f"bytes {lo}..{hi - 1} between sections are not zero", path)
    for offset, nbytes, crc, name in unknown:
        if zlib.crc32(buf[offset : offset + nbytes]) != crc:
            _fail(name, "CRC32 mismatch: the section is corrupt", path)
    arrays = {}
    for name, dtype, shape, offset, nbytes, crc in layout:
        if zlib.crc32(buf[offset : offset + nbytes]) != crc:
            _fail(name, "CRC32 mismatch: the section is corrupt", path)
        arrays[name] = _view(buf, dtype, shape, offset, nbytes)
    rows = v["rows"]

    removed_raw = arrays["removed"]
    if rows and removed_raw.max() > 1:
        bad = int(np.flatnonzero(removed_raw > 1)[0])
        _fail("removed", f"row {bad} has flag {int(removed_raw[bad])}, not 0 or 1", path)
    if int(removed_raw.sum(dtype=np.int64)) != v["removed_count"]:
        _fail("removed", f"{int(removed_raw.sum(dtype=np.int64))} rows flagged but counts say {v['removed_count']}",
              path)
    removed = removed_raw.view(np.bool_)

    row_ids = arrays.get("row_ids")
    if row_ids is not None and rows:
        steps = np.flatnonzero(np.diff(row_ids) <= 0)
        if steps.size:
            _fail("row_ids", f"ids not strictly ascending at row {int(steps[0]) + 1}", path)
        if row_ids[0] < 0 or row_ids[-1] >= v["next_id"]:
            _fail("row_ids", f"ids {int(row_ids[0])}..{int(row_ids[-1])} outside 0..{v['next_id'] - 1}", path)

    table, weights, rows_section = _validated_rows(arrays, v, path)
    light = np.flatnonzero(weights < v["threshold"])
    if light.size:
        r = int(light[0])
        _fail(rows_section, f"row {r} has {int(weights[r])} set bits, fewer than threshold={v['threshold']}", path)

    _validate_blocks(arrays, table, weights, v, path)
    max_sample = 0
    if rows:
        top = int(weights.max())
        max_sample = top if v["sample_size"] is None else min(top, v["sample_size"])
    return arrays, removed, weights, max_sample


def renamed_keys(obj, names, fail):
    """``obj`` with its keys renamed by ``names`` (old -> new), if it is a dict.

    An old object that already uses a new name is refused: ``fail(message)``.
    """
    if not isinstance(obj, dict):
        return obj
    out = {}
    for key, value in obj.items():
        if key in names.values():
            fail(f"key {key!r} belongs to a later format version")
        out[names.get(key, key)] = value
    return out


def renamed_plan(obj, fail):
    """An old plan dict (alternatives included) with its keys spelled as now."""
    obj = renamed_keys(obj, RENAMED_KEYS, fail)
    if isinstance(obj, dict) and isinstance(obj.get("alternatives"), list):
        obj["alternatives"] = [renamed_plan(a, fail) for a in obj["alternatives"]]
    return obj


def _header_from_1_0(header, path):
    """A format 1.0 header read as 1.1: only key names differ."""
    if not isinstance(header, dict):
        return header
    header = dict(header)
    header["params"] = renamed_keys(header.get("params"), _PARAM_RENAMES, lambda m: _fail("params", m, path))
    if header.get("plan") is not None:
        header["plan"] = renamed_plan(header["plan"], lambda m: _fail("plan", m, path))
    return header


def _state_from(buf, header_text, header, minor, size, path) -> StoreState:
    strict = minor <= FORMAT_MINOR
    if minor == 0:
        header = _header_from_1_0(header, path)
    v = _parse_params(header, strict, minor, path)
    plan = _parse_plan(header["plan"], v, path)
    data_start = PREAMBLE.size + len(header_text)
    layout, gaps, unknown = _parse_layout(header, v, strict, data_start, size, path)
    if buf is None:
        return None
    arrays, removed, weights, max_sample = _validate_body(buf, header_text, v, layout, gaps, unknown, path)
    return StoreState(
        bits=v["bits"], threshold=v["threshold"], sample_size=v["sample_size"], detectors=v["detectors"],
        seed=v["seed"], block_span=v["block_span"], plan=plan, rows=v["rows"], next_id=v["next_id"],
        removed_count=v["removed_count"], words=arrays.get("words"), removed=removed, row_ids=arrays.get("row_ids"),
        row_layout=v["row_layout"], row_indptr=arrays.get("row_indptr"), row_indices=arrays.get("row_indices"),
        block_lo=arrays["block_lo"], block_hi=arrays["block_hi"], block_indptr=arrays["block_indptr"],
        postings=arrays["postings"], weights=weights.astype(np.int32), max_sample=max_sample,
        bit_columns=arrays.get("bit_columns"),
    )


def _read_into(fd: int, out: np.ndarray, path) -> None:
    view = memoryview(out)
    got = 0
    while got < out.shape[0]:
        if hasattr(os, "preadv"):
            n = os.preadv(fd, [view[got:]], got)
        else:  # pragma: no cover - platforms without preadv
            chunk = os.pread(fd, min(out.shape[0] - got, _WRITE_CHUNK), got)
            n = len(chunk)
            out[got : got + n] = np.frombuffer(chunk, dtype=np.uint8)
        if n == 0:
            _fail("file", f"file shrank to {got} bytes while it was being read", path)
        got += n


def read_file(path, *, mmap: bool) -> tuple[StoreState, object]:
    """Validated state of the store file at ``path``.

    With ``mmap`` the arrays are views of a private (copy-on-write) mapping
    of the file; otherwise of one buffer the size of the file. Nothing larger
    than the file is allocated, and only after the header has been checked.
    Returns ``(state, owner)``; keep ``owner`` (the mapping or the buffer)
    alive as long as the arrays are used.

    Examples
    --------
    >>> import os, tempfile
    >>> from sparseindex import Store
    >>> store = Store(bits=64, threshold=2, seed=3); _ = store.add([[1, 2, 3], [7, 8]])
    >>> path = os.path.join(tempfile.mkdtemp(), "depot.sidx"); store.save(path)
    >>> state, owner = read_file(path, mmap=True)
    >>> type(owner).__name__, state.next_id, state.weights.tolist()
    ('mmap', 2, [3, 2])
    """
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_CLOEXEC", 0)
    fd = os.open(os.fspath(path), flags)  # O_NONBLOCK: a FIFO must not hang the open
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            _fail("file", "not a regular file", path)
        size = info.st_size
        pre = os.pread(fd, PREAMBLE.size, 0)
        minor, header_bytes, header_crc = _check_preamble(pre, min(size, len(pre)) if len(pre) < PREAMBLE.size
                                                          else size, path)
        text = os.pread(fd, header_bytes, PREAMBLE.size)
        if len(text) != header_bytes:
            _fail("header", "file shrank while it was being read", path)
        header = _parse_header(text, header_crc, path)
        _state_from(None, text, header, minor, size, path)  # layout against the size before allocating
        if mmap:
            mapping = _mmap.mmap(fd, size, access=_mmap.ACCESS_COPY)
            buf = np.frombuffer(mapping, dtype=np.uint8)
            owner = mapping
        else:
            buf = np.empty(size, dtype=np.uint8)
            _read_into(fd, buf, path)
            owner = buf
    finally:
        os.close(fd)
    if bytes(buf[PREAMBLE.size : PREAMBLE.size + header_bytes]) != text or bytes(buf[: PREAMBLE.size]) != pre:
        _fail("header", "file changed while it was being read", path)
    return _state_from(buf, text, header, minor, size, path), owner


def read_bytes(data) -> StoreState:
    """Validated state of a store held in memory (the pickle path); copies ``data``.

    Examples
    --------
    >>> from sparseindex import Store
    >>> store = Store(bits=64, threshold=2, seed=3); _ = store.add([[1, 2, 3], [7, 8]])
    >>> data = bytearray(dumps(store._state()))
    >>> data[-1] ^= 1                                   # one flipped bit in the last section
    >>> read_bytes(data)
    Traceback (most recent call last):
    ...
    sparseindex.errors.StoreFormatError: section 'postings': CRC32 mismatch: the section is corrupt
    """
    raw = memoryview(data).cast("B")
    size = raw.nbytes
    pre = bytes(raw[: PREAMBLE.size])
    minor, header_bytes, header_crc = _check_preamble(pre, size, None)
    text = bytes(raw[PREAMBLE.size : PREAMBLE.size + header_bytes])
    header = _parse_header(text, header_crc, None)
    _state_from(None, text, header, minor, size, None)
    buf = np.empty(size, dtype=np.uint8)
    buf[:] = np.frombuffer(raw, dtype=np.uint8)
    return _state_from(buf, text, header, minor, size, None)
