"""Hypothesis fuzzing of ``Store.load``: 10,000 examples in CI.

Random bytes, raw mutations of a valid file, and *resealed* mutations (the
header or an array changed and every CRC recomputed, as a hostile writer
would) are loaded. The only acceptable outcomes are the documented
``StoreFormatError`` or a store that passes its invariant checker and then
answers queries, takes changes, compacts and round-trips without error.
"""

import json
import os
import tempfile
import zlib

import numpy as np
from hypothesis import event, given, settings
from hypothesis import strategies as st

from sparseindex import Codes, Store, StoreFormatError
from sparseindex.store import format as _persist
from tests.test_persist import _big_header, header_of, reheader


class TinyBlockStore(Store):
    _block_span = 5


def _valid_file() -> bytes:
    store = TinyBlockStore(64, threshold=2, sample_size=3, detectors=2, seed=8)
    store.add(Codes.random(12, 64, 6, seed=8))
    store.remove([4])
    return _persist.dumps(store._state())


class TinyBlockIndexRowsStore(TinyBlockStore):
    _row_layout = "sparse"  # rows as sorted indices, the layout of wide stores


def _valid_index_rows_file() -> bytes:
    store = TinyBlockIndexRowsStore(64, threshold=2, sample_size=3, detectors=2, seed=8)
    store.add(Codes.random(12, 64, 6, seed=8))
    store.remove([4])
    return _persist.dumps(store._state())


VALID = _valid_file()
HEADER = header_of(VALID)
VALID_INDEX_ROWS = _valid_index_rows_file()
HEADER_INDEX_ROWS = header_of(VALID_INDEX_ROWS)
DIRECTORY = tempfile.mkdtemp(prefix="sparseindex-fuzz-")
PATH = os.path.join(DIRECTORY, "fuzz.sidx")
INTERESTING = [-1, 0, 1, 2, 3, 5, 7, 63, 64, 65, 255, 256, 65535, 65536, 2**31 - 1, 2**31, 2**32, 2**62, 2**63,
               2**64, 10**30, None, True, 1.5, "x", [], {}]


def outcome(data: bytes, mmap: bool) -> str:
    with open(PATH, "wb") as f:
        f.write(data)
    try:
        store = Store.load(PATH, mmap=mmap, writable=True)
    except StoreFormatError as exc:
        _event(f"refused in {exc.section.split('[')[0]}")
        return "refused"
    exercise(store)
    _event("loaded")
    return "loaded"


def _event(label: str) -> None:
    try:
        event(label)
    except Exception:  # outside a hypothesis test (the plain check below)
        pass


def exercise(store: Store) -> None:
    """Everything a loaded store must survive."""
    store._check(deep=False)
    qs = Codes.random(6, store.bits, min(store.bits, 8), seed=1)
    store.query_many(qs, min_overlap=1)
    store.query(qs[0])
    store.nearest(qs[1], 3)
    live = store.ids()
    if live.size:
        store.get(live[:2])
        store.detector_bits(int(live[0]))
        store.remove([int(live[0])])
    store.add(Codes.random(3, store.bits, min(store.bits, max(store.threshold, 8)), seed=2))
    store.compact()
    store._check(deep=False)
    store.query_many(qs)
    store.save(PATH)
    Store.load(PATH)._check(deep=False)


def test_the_valid_file_loads():
    assert outcome(VALID, False) == "loaded"


@settings(max_examples=2000)
@given(st.binary(max_size=600), st.booleans(), st.booleans())
def test_random_bytes(data, keep_preamble, mmap):
    if keep_preamble:
        data = VALID[:32] + data
    assert outcome(data, mmap) in ("refused", "loaded")


edits = st.lists(
    st.one_of(
        st.tuples(st.just("set"), st.integers(0, len(VALID) - 1), st.integers(0, 255)),
        st.tuples(st.just("delete"), st.integers(0, len(VALID) - 1), st.integers(1, 64)),
        st.tuples(st.just("insert"), st.integers(0, len(VALID)), st.binary(min_size=1, max_size=64)),
        st.tuples(st.just("truncate"), st.integers(0, len(VALID)), st.just(0)),
    ),
    min_size=1,
    max_size=4,
)


def apply(data: bytes, changes) -> bytes:
    out = bytearray(data)
    for kind, at, arg in changes:
        at = min(at, len(out))
        if kind == "set" and at < len(out):
            out[at] = arg
        elif kind == "delete":
            del out[at : at + arg]
        elif kind == "insert":
            out[at:at] = arg
        elif kind == "truncate":
            del out[at:]
    return bytes(out)


@settings(max_examples=3000)
@given(edits, st.booleans())
def test_raw_mutations(changes, mmap):
    mutated = apply(VALID, changes)
    result = outcome(mutated, mmap)
    if mutated != VALID:
        assert result == "refused"  # without resealing, the CRCs catch every change


def _paths(obj, prefix=()):
    if isinstance(obj, dict):
        for key, value in obj.items():
            yield prefix + (key,)
            yield from _paths(value, prefix + (key,))
    elif isinstance(obj, list):
        for i, value in enumerate(obj):
            yield prefix + (i,)
            yield from _paths(value, prefix + (i,))


HEADER_PATHS = list(_paths(HEADER))


def _set(obj, path, value):
    for key in path[:-1]:
        obj = obj[key]
    obj[path[-1]] = value


@settings(max_examples=2500)
@given(
    st.lists(st.tuples(st.sampled_from(HEADER_PATHS), st.sampled_from(INTERESTING) | st.integers(-5, 300)),
             min_size=1, max_size=3),
    st.booleans(),
)
def test_resealed_header_mutations(changes, mmap):
    header = json.loads(json.dumps(HEADER))
    for path, value in changes:
        try:
            _set(header, path, value)
        except (KeyError, IndexError, TypeError):
            pass  # an earlier change replaced the container
    text = json.dumps(header, separators=(",", ":")).encode()
    try:
        data = reheader(VALID, text)
    except AssertionError:  # too long for the gap: the sections move and their offsets go stale
        head = _big_header(VALID, text)
        data = head + bytes(-len(head) % 64) + VALID[HEADER["sections"][0]["offset"] :]
    assert outcome(data, mmap) in ("refused", "loaded")


SECTIONS = [s["name"] for s in HEADER["sections"]]


@settings(max_examples=2500)
@given(
    st.sampled_from(SECTIONS),
    st.lists(st.tuples(st.integers(0, 10_000), st.integers(-(2**63), 2**64 - 1) | st.sampled_from(INTERESTING[:21])),
             min_size=1, max_size=4),
    st.booleans(),
)
def test_resealed_array_mutations(name, changes, mmap):
    resealed_array_mutation(VALID, HEADER, name, changes, mmap)


@settings(max_examples=1500)
@given(
    st.sampled_from(["row_indptr", "row_indices"]),
    st.lists(st.tuples(st.integers(0, 10_000), st.integers(-(2**63), 2**64 - 1) | st.sampled_from(INTERESTING[:21])),
             min_size=1, max_size=4),
    st.booleans(),
)
def test_resealed_index_row_mutations(name, changes, mmap):
    resealed_array_mutation(VALID_INDEX_ROWS, HEADER_INDEX_ROWS, name, changes, mmap)


def resealed_array_mutation(valid, valid_header, name, changes, mmap):
    """Change entries of section ``name``, reseal every CRC: the load refuses, or loads and serves safely."""
    HEADER = valid_header  # noqa: N806
    entry = next(s for s in HEADER["sections"] if s["name"] == name)
    raw = bytearray(valid)
    count = int(np.prod(entry["shape"]))
    if count == 0:
        return
    dtype = np.dtype(entry["dtype"])
    arr = np.frombuffer(bytes(raw[entry["offset"] : entry["offset"] + entry["nbytes"]]), dtype=dtype).copy()
    info = np.iinfo(dtype)
    for at, value in changes:
        if value is None or isinstance(value, bool):
            continue
        arr[at % count] = int(value) % (int(info.max) - int(info.min) + 1) + int(info.min)
    raw[entry["offset"] : entry["offset"] + entry["nbytes"]] = arr.tobytes()
    header = json.loads(json.dumps(HEADER))
    next(s for s in header["sections"] if s["name"] == name)["crc32"] = zlib.crc32(arr.tobytes())
    data = reheader(bytes(raw), json.dumps(header, separators=(",", ":")).encode())
    assert outcome(data, mmap) in ("refused", "loaded")
