"""Stores whose rows are sorted indices (wide codes): files round-trip, serve memory-mapped, and hostile rows are refused.

References: the same store in memory (its answers before saving), the
set-based model of ``tests/naive.py``, and corruptions of the new ``row_indptr`` /
``row_indices`` sections written by the file writer itself (so every CRC is
right and only the content checks stand between them and the kernels).
"""

import json
import struct

import numpy as np
import pytest

from sparseindex import Codes, Store, StoreFormatError
from sparseindex.store import format as _persist

BITS = 70_000


def wide_store():
    codes = Codes.random(400, BITS, 60, seed=4)
    store = Store(BITS, threshold=8, sample_size=16, detectors=2, seed=2)
    store.add(codes[:300])
    store.remove([5, 17])
    store.add(codes[300:])
    return store, codes


def answers(store, codes):
    return [(h.ids.tolist(), h.overlaps.tolist()) for h in store.query_many(codes)]


@pytest.mark.parametrize("mmap", [False, True])
def test_a_wide_store_round_trips_with_index_rows(tmp_path, mmap):
    store, codes = wide_store()
    assert store.row_layout == "sparse"
    path = tmp_path / "wide.sidx"
    store.save(path)
    loaded = Store.load(path, mmap=mmap)
    loaded._check(deep=True)
    assert loaded.row_layout == "sparse" and answers(loaded, codes[:50]) == answers(store, codes[:50])
    assert [list(loaded.nearest(q, 4)) for q in codes[:5].to_indices()] == \
        [list(store.nearest(q, 4)) for q in codes[:5].to_indices()]
    # the rows in the file are the set bits, not the width (4-byte indices at this width), and so are the
    # block tables: one column per bit in use plus the spare one
    header, _ = _sections(path.read_bytes())
    rows = {s["name"]: s for s in header["sections"]}
    hist = store.stats().weight_hist
    assert "words" not in rows and rows["row_indices"]["nbytes"] == 4 * int(hist @ np.arange(hist.shape[0])
                                                                           + 60 * store.removed_count)
    in_use = np.unique(np.concatenate(codes.to_indices())).shape[0]
    assert header["counts"]["mapped_bits"] == in_use < BITS
    assert rows["block_indptr"]["shape"][1] == in_use + 2


def _sections(data: bytes):
    (length,) = struct.unpack("<I", data[12:16])
    return json.loads(data[32 : 32 + length]), length


def corrupted(store, name: str, change) -> bytes:
    """The store's file with section ``name``'s array changed by ``change``; CRCs written afresh by the writer."""
    state = store._state()
    array = getattr(state, name).copy()
    change(array)
    setattr(state, name, array)
    return _persist.dumps(state)


def _swap_first_pair(a):
    a[0], a[1] = a[1], a[0]


def _repeat_first(a):
    a[1] = a[0]


def _too_wide(a):
    a[3] = BITS


def _descending_pointer(a):
    a[2] = a[1] - 1


@pytest.mark.parametrize("section,change,message", [
    ("row_indices", _swap_first_pair, "row 0 is not strictly ascending"),
    ("row_indices", _repeat_first, "row 0 is not strictly ascending"),
    ("row_indices", _too_wide, f"row 0 has an index >= bits={BITS}"),
    ("row_indptr", _descending_pointer, "pointers descend at row 1"),
])
def test_hostile_index_rows_are_refused_before_any_kernel_runs(tmp_path, section, change, message):
    store, _ = wide_store()
    bad = tmp_path / "bad.sidx"
    bad.write_bytes(corrupted(store, section, change))
    with pytest.raises(StoreFormatError, match=message) as info:
        Store.load(bad)
    assert info.value.section == section


def test_pointers_that_do_not_cover_the_indices_are_refused(tmp_path):
    store, _ = wide_store()

    def shift_last(a):
        a[-1] -= 1

    bad = tmp_path / "bad.sidx"
    bad.write_bytes(corrupted(store, "row_indptr", shift_last))
    with pytest.raises(StoreFormatError, match="pointers run"):
        Store.load(bad)
