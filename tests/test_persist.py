"""Store files: round trips, truncation, bit flips, I/O faults, hostile headers.

The reference for "the same store" is byte equality of the saved files (the
format is deterministic) plus equal answers to the same queries; the
reference for "a bad file" is the one documented exception,
``StoreFormatError``.
"""

import json
import os
import pickle
import struct
import tracemalloc
import warnings
import zlib

import numpy as np
import pytest

from sparseindex import Codes, FormatVersionWarning, ReadOnlyStoreError, Store, StoreFormatError
from sparseindex.store import format as _persist
from tests.naive import hits_as_pairs


class SmallBlockStore(Store):
    _block_span = 7


def make_store(n=100, bits=128, weight=9, seed=11, cls=Store, remove=(3, 50), **params):
    params = {"threshold": 3, "sample_size": 5, "detectors": 2, **params}
    store = cls(bits, seed=seed, **params)
    store.add(Codes.random(n, bits, weight, seed=seed))
    if remove:
        store.remove(list(remove))
    return store


def file_bytes(store) -> bytes:
    return _persist.dumps(store._state())


def queries(store, count=40, seed=5):
    return Codes.random(count, store.bits, 12, seed=seed)


def assert_same(a, b):
    """Same contents (file bytes) and the same answers."""
    assert file_bytes(a) == file_bytes(b)
    b._check(deep=True)
    qs = queries(a)
    ra, rb = a.query_many(qs, min_overlap=1), b.query_many(qs, min_overlap=1)
    assert np.array_equal(ra.indptr, rb.indptr) and np.array_equal(ra.ids, rb.ids)
    assert np.array_equal(ra.overlaps, rb.overlaps)
    for i in range(3):
        assert hits_as_pairs(a.nearest(qs[i], 5)) == hits_as_pairs(b.nearest(qs[i], 5))
    assert a.ids().tolist() == b.ids().tolist()


# -- round trips ---------------------------------------------------------


@pytest.mark.parametrize(
    "build",
    [
        lambda: make_store(),
        lambda: make_store(cls=SmallBlockStore),
        lambda: make_store(sample_size=None, detectors=1, remove=()),
        lambda: make_store(n=0, remove=()),
        lambda: Store.for_target(512, 16, false_hit=1e-3, capacity=1000, noise=0.1, seed=2),
    ],
    ids=["removed", "many-blocks", "whole-code", "empty", "planned"],
)
@pytest.mark.parametrize("mmap", [False, True])
def test_round_trip(tmp_path, build, mmap):
    store = build()
    path = tmp_path / "store.sidx"
    store.save(path)
    loaded = Store.load(path, mmap=mmap)
    assert_same(store, loaded)
    assert loaded.plan == store.plan
    assert loaded.read_only == mmap
    assert path.read_bytes() == file_bytes(store)


def test_round_trip_after_compaction_dropped_rows(tmp_path):
    store = make_store(cls=SmallBlockStore)
    store.compact()  # ids no longer equal rows
    store.add(Codes.random(20, 128, 9, seed=99))
    store.save(tmp_path / "s")
    loaded = SmallBlockStore.load(tmp_path / "s")
    assert_same(store, loaded)
    loaded.add(Codes.random(5, 128, 9, seed=98))
    store.add(Codes.random(5, 128, 9, seed=98))
    assert_same(store, loaded)


def test_emptied_by_compaction(tmp_path):
    store = make_store(n=5, remove=(0, 1, 2, 3, 4))
    store.compact()
    store.save(tmp_path / "s")
    loaded = Store.load(tmp_path / "s")
    assert len(loaded) == 0 and loaded.next_id == 5
    assert loaded.add(Codes.random(2, 128, 9, seed=1)).tolist() == [5, 6]


def test_writable_mmap_changes_stay_private(tmp_path):
    store = make_store()
    path = tmp_path / "s"
    store.save(path)
    before = path.read_bytes()
    mapped = Store.load(path, mmap=True, writable=True)
    mapped.remove([0, 1])
    mapped.add(Codes.random(3, 128, 9, seed=4))
    mapped.compact()
    mapped._check(deep=True)
    assert path.read_bytes() == before
    mapped.save(path)  # replacing the mapped file is safe: the mapping keeps the old one
    assert Store.load(path).ids().tolist() == mapped.ids().tolist()
    assert mapped.query_many(queries(mapped)).ids.shape[0] >= 0


def test_read_only_refuses_every_change(tmp_path):
    make_store().save(tmp_path / "s")
    for opened in (Store.load(tmp_path / "s", mmap=True), Store.load(tmp_path / "s", writable=False)):
        before = file_bytes(opened)
        with pytest.raises(ReadOnlyStoreError, match="add: this store is read-only"):
            opened.add([[1, 2, 3, 4]])
        with pytest.raises(ReadOnlyStoreError, match="remove"):
            opened.remove([0])
        with pytest.raises(ReadOnlyStoreError, match="compact"):
            opened.compact()
        assert file_bytes(opened) == before
        opened.save(tmp_path / "copy")  # saving is reading
        assert (tmp_path / "copy").read_bytes() == before


def test_load_argument_errors(tmp_path):
    make_store().save(tmp_path / "s")
    with pytest.raises(TypeError, match="mmap='yes'"):
        Store.load(tmp_path / "s", mmap="yes")
    with pytest.raises(FileNotFoundError):
        Store.load(tmp_path / "missing")


def test_pickle_goes_through_the_format():
    store = make_store(cls=SmallBlockStore)
    data = pickle.dumps(store)
    assert _persist.MAGIC in data  # the validated format, not the internals
    assert_same(store, pickle.loads(data))
    bad = bytearray(file_bytes(store))
    bad[-1] ^= 1
    from sparseindex.store import _restore_pickled

    with pytest.raises(StoreFormatError, match="postings"):
        _restore_pickled(bytes(bad))


# -- truncation and bit flips -------------------------------------------


def test_every_truncated_prefix_is_refused(tmp_path):
    store = make_store(n=100)
    data = file_bytes(store)
    path = tmp_path / "cut"
    tracemalloc.start()
    try:
        worst = 0
        for cut in range(len(data)):
            path.write_bytes(data[:cut])
            for mmap in (False, True):
                tracemalloc.reset_peak()
                base = tracemalloc.get_traced_memory()[0]
                with pytest.raises(StoreFormatError):
                    Store.load(path, mmap=mmap)
                worst = max(worst, tracemalloc.get_traced_memory()[1] - base)
    finally:
        tracemalloc.stop()
    print(f"\n{len(data)} prefixes x 2 modes refused; largest allocation {worst} bytes (file {len(data)})")
    assert worst <= len(data) + 64 * 1024  # allowance for the parser's own small objects


def test_every_header_bit_and_sampled_section_bits_flip_detected(tmp_path):
    store = make_store(n=100, cls=SmallBlockStore)
    data = bytearray(file_bytes(store))
    data_start = json.loads(data[32 : 32 + struct.unpack_from("<I", data, 12)[0]])["sections"][0]["offset"]
    rng = np.random.default_rng(2)
    section_bits = rng.choice((len(data) - data_start) * 8, size=10_000, replace=False) + data_start * 8
    positions = list(range(data_start * 8)) + section_bits.tolist()
    path = tmp_path / "flip"
    path.write_bytes(bytes(data))
    undetected = []
    with open(path, "r+b") as f:
        for bit in positions:
            byte, mask = bit // 8, 1 << (bit % 8)
            f.seek(byte)
            f.write(bytes([data[byte] ^ mask]))
            f.flush()
            try:
                Store.load(path)
                undetected.append(bit)
            except StoreFormatError:
                pass
            f.seek(byte)
            f.write(bytes([data[byte]]))
            f.flush()
    print(f"\n{data_start * 8} header bits + 10000 section bits flipped; {len(undetected)} undetected")
    assert undetected == []
    assert_same(store, Store.load(path))  # restored file is fine again


# -- hostile headers (valid CRCs) ------------------------------------------


def reheader(data: bytes, text: bytes, major=None, minor=None) -> bytes:
    """``data`` with its header replaced by ``text`` and the CRCs re-sealed.

    The sections stay where they are: the new header must fit before the
    first one (the gap is zero-filled as the format requires).
    """
    _, old_major, old_minor, hlen, _, _ = _persist.PREAMBLE.unpack_from(data)
    data_start = json.loads(data[32 : 32 + hlen])["sections"][0]["offset"]
    room = data_start - 32
    body = data[data_start:]
    while len(text) > room:  # move the sections down by whole 64-byte steps, offsets with them
        header = json.loads(text)
        for entry in header["sections"]:
            if isinstance(entry, dict) and isinstance(entry.get("offset"), int):
                entry["offset"] += 64
        text = json.dumps(header, separators=(",", ":")).encode()
        room += 64
    major = old_major if major is None else major
    minor = old_minor if minor is None else minor
    fixed = struct.pack("<8sHHII", _persist.MAGIC, major, minor, len(text), zlib.crc32(text))
    pre = _persist.PREAMBLE.pack(_persist.MAGIC, major, minor, len(text), zlib.crc32(text), zlib.crc32(fixed))
    return pre + text + bytes(room - len(text)) + body


def header_of(data: bytes) -> dict:
    hlen = struct.unpack_from("<I", data, 12)[0]
    return json.loads(data[32 : 32 + hlen])


def rewrite(data: bytes, edit, minor=None) -> bytes:
    """Apply ``edit`` to the parsed header and re-seal the CRCs (a hostile file)."""
    header = header_of(data)
    edit(header)
    return reheader(data, json.dumps(header, separators=(",", ":")).encode(), minor=minor)


def load_bytes(tmp_path, data, **kw):
    path = tmp_path / "hostile"
    path.write_bytes(data)
    return Store.load(path, **kw)


@pytest.mark.parametrize(
    "edit, section, message",
    [
        (lambda h: h["counts"].update(rows=2**60), "counts", "rows=1152921504606846976 is outside"),
        (lambda h: h["counts"].update(postings=2**60), "postings", "does not match the counts"),
        (lambda h: h["params"].update(bits=2**40), "params", "bits=1099511627776 is outside"),
        (lambda h: h["params"].update(threshold=0), "params", "threshold=0"),
        (lambda h: h["params"].update(detectors=True), "params", "detectors=True is not an integer"),
        (lambda h: h["sections"][0].update(offset=1), "words", "not a multiple of 64"),
        (lambda h: h["sections"][-1].update(nbytes=2**62), "postings", "past the end"),
        (lambda h: h["sections"][0].update(dtype="<i8"), "words", "dtype"),
        (lambda h: h["sections"].reverse(), "", ""),
        (lambda h: h.pop("plan"), "header", "missing key 'plan'"),
        (lambda h: h.update(kind="other"), "header", "kind="),
    ],
)
def test_hostile_headers_fail_fast_without_large_allocations(tmp_path, edit, section, message):
    data = file_bytes(make_store())
    hostile = rewrite(data, edit)
    tracemalloc.start()
    try:
        with pytest.raises(StoreFormatError) as info:
            load_bytes(tmp_path, hostile)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 2 * len(hostile) + 64 * 1024
    if section:
        assert info.value.section == section and message in str(info.value), str(info.value)


def test_hostile_contents_with_valid_crcs(tmp_path):
    store = make_store(cls=SmallBlockStore)
    data = file_bytes(store)
    hlen = struct.unpack_from("<I", data, 12)[0]
    header = json.loads(data[32 : 32 + hlen])
    sections = {s["name"]: s for s in header["sections"]}

    def patched(name, mutate):
        raw = bytearray(data)
        s = sections[name]
        arr = np.frombuffer(raw, dtype=np.dtype(s["dtype"]), count=int(np.prod(s["shape"])), offset=s["offset"])
        arr = arr.copy().reshape(s["shape"])
        mutate(arr)
        raw[s["offset"] : s["offset"] + s["nbytes"]] = arr.tobytes()
        crc = zlib.crc32(arr.tobytes())

        def edit(h):
            for e in h["sections"]:
                if e["name"] == name:
                    e["crc32"] = crc

        return rewrite(bytes(raw), edit)

    cases = [
        ("postings", lambda a: a.__setitem__(0, 60000), "outside its block"),
        ("postings", lambda a: a.__setitem__(slice(0, 2), a[1::-1].copy()), "postings"),
        ("block_indptr", lambda a: a.__setitem__((0, 3), a[0, 3] + 10**6), "block_indptr"),
        ("block_lo", lambda a: a.__setitem__(1, a[1] + 1), "block"),
        ("block_hi", lambda a: a.__setitem__(-1, a[-1] + 100), "block"),
        ("removed", lambda a: a.__setitem__(0, 7), "flag 7"),
        ("removed", lambda a: a.__setitem__(0, 1 - a[0]), "counts say"),
        ("words", lambda a: a.__setitem__(0, np.array([0b1111, 0], dtype=np.uint64)), "postings"),
        ("words", lambda a: a.__setitem__((0, slice(None)), 0), "fewer than threshold"),
    ]
    for name, mutate, message in cases:
        with pytest.raises(StoreFormatError, match=message) as info:
            load_bytes(tmp_path, patched(name, mutate))
        assert info.value.section in (name, "block_lo", "block_hi", "postings"), str(info.value)


def test_versions(tmp_path):
    data = file_bytes(make_store())
    text = json.dumps(header_of(data), separators=(",", ":")).encode()
    want = (rf"store file format 2\.{_persist.FORMAT_MINOR} is not supported: "
            rf"this library reads 1\.0 to 1\.{_persist.FORMAT_MINOR}")
    with pytest.raises(StoreFormatError, match=want):
        load_bytes(tmp_path, reheader(data, text, major=2))
    # newer minor: loads with a warning, ignoring keys it does not know
    header = header_of(data)
    header["future"] = 1
    header["params"]["future_param"] = "x"
    newer = json.dumps(header, separators=(",", ":")).encode()
    with pytest.warns(FormatVersionWarning, match="newer"):
        loaded = load_bytes(tmp_path, reheader(data, newer, minor=_persist.FORMAT_MINOR + 1))
    assert file_bytes(loaded) == data
    # the same unknown key in a current-version file is refused
    with pytest.raises(StoreFormatError, match="unknown key 'future'"):
        load_bytes(tmp_path, reheader(data, newer))


def test_not_a_regular_file(tmp_path):
    with pytest.raises(StoreFormatError, match="not a regular file"):
        Store.load(tmp_path)
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    with pytest.raises(StoreFormatError, match="not a regular file"):  # and it must not hang
        Store.load(fifo)


def test_json_tricks_refused(tmp_path):
    data = file_bytes(make_store())
    text = json.dumps(header_of(data), separators=(",", ":"))
    dup = text.replace('"kind":', '"kind":"x","kind":', 1)
    nan = text.replace('"seed":', '"nan":NaN,"seed":', 1)
    deep = text[:-1] + ',"deep":' + "[" * 5000 + "]" * 5000 + "}"
    for bad, message in ((dup, "duplicate key 'kind'"), (nan, "NaN is not allowed"), (deep, "not valid JSON")):
        with pytest.raises(StoreFormatError, match=message):
            load_bytes(tmp_path, _big_header(data, bad.encode()))
    too_long = struct.pack("<8sHHII", _persist.MAGIC, 1, 0, 2**31, 0)
    too_long = too_long + struct.pack("<I", zlib.crc32(too_long)) + bytes(8)
    with pytest.raises(StoreFormatError, match="header length 2147483648 exceeds"):
        load_bytes(tmp_path, too_long + bytes(100))


def _big_header(data: bytes, text: bytes) -> bytes:
    """A file whose (bad) header is too long for the original gap: sections dropped."""
    fixed = struct.pack("<8sHHII", _persist.MAGIC, 1, 0, len(text), zlib.crc32(text))
    return _persist.PREAMBLE.pack(_persist.MAGIC, 1, 0, len(text), zlib.crc32(text), zlib.crc32(fixed)) + text


# -- I/O faults during save ------------------------------------------------


class FaultyOs:
    """Stand-in for the ``os`` module inside ``_persist`` that fails one call."""

    def __init__(self, fail_at=None):
        self.calls = []
        self.fail_at = fail_at

    def __getattr__(self, name):
        real = getattr(os, name)
        if name not in ("open", "write", "fsync", "close", "replace", "link", "unlink"):
            return real

        def wrapped(*args, **kwargs):
            label = name
            if name == "fsync":
                label = "fsync-dir" if self.calls and self.calls[-1] in ("replace", "open-dir") else "fsync"
            if name == "open" and args and os.path.isdir(args[0]):
                label = "open-dir"
            self.calls.append(label)
            if self.fail_at is not None and len(self.calls) - 1 == self.fail_at:
                raise OSError(5, f"injected failure of {label}")
            return real(*args, **kwargs)

        return wrapped


def test_each_failing_os_call_leaves_the_old_store(tmp_path, monkeypatch):
    old, new = make_store(seed=1), make_store(seed=2, n=300)
    path = tmp_path / "store.sidx"
    old.save(path)
    old_bytes = path.read_bytes()
    faulty = FaultyOs()
    monkeypatch.setattr(_persist, "os", faulty)
    new.save(path)  # over an existing file, as in every run below
    sequence = faulty.calls
    monkeypatch.setattr(_persist, "os", os)
    old.save(path)
    must_fail = {"write", "fsync", "replace", "fsync-dir", "open", "open-dir"}
    assert {"write", "fsync", "replace", "fsync-dir"} <= set(sequence), sequence
    outcomes = {}
    for i, label in enumerate(sequence):
        if label == "unlink":
            continue  # cleanup of the hard link; a failure there only leaves a stray file
        monkeypatch.setattr(_persist, "os", FaultyOs(fail_at=i))
        try:
            new.save(path)
            saved = True
        except OSError as exc:
            assert "injected failure" in str(exc)
            saved = False
        monkeypatch.setattr(_persist, "os", os)
        left = sorted(p.name for p in tmp_path.iterdir())
        assert left == ["store.sidx"], (i, label, left)
        if label in must_fail:
            assert not saved, (i, label)
        if saved:
            assert path.read_bytes() == file_bytes(new)
            old.save(path)
        else:
            assert path.read_bytes() == old_bytes, (i, label)
            assert_same(old, Store.load(path))
        outcomes[label] = "saved" if saved else "kept old"
    print("\ncalls of one save:", " ".join(sequence), "\noutcome per failing call:", outcomes)
