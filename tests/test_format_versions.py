"""Every file format version the project has written still loads and answers.

The fixtures in ``tests/fixtures`` were written by the library of their day
(``write_fixtures.py`` is that code for the current version; older fixtures
are never rewritten). The reference for each fixture's answers is the JSON
written beside it by the same run, i.e. what the writing version answered.
The rule these tests hold is in ``docs/format.md``, "Changing the format".
"""

import json
import pathlib
import pickle
import re
import struct
import warnings

import numpy as np
import pytest

from sparseindex import Codes, Store, StoreFormatError
from sparseindex.store import format as _persist
from sparseindex.errors import FormatVersionWarning

from tests.fixtures.write_fixtures import answers_of, store_fixture

FIXTURES = pathlib.Path(__file__).parent / "fixtures"
DOC = (pathlib.Path(__file__).parent.parent / "docs" / "format.md").read_text(encoding="utf-8")
STORE_FIXTURES = sorted(FIXTURES.glob("store_v*.sidx"))


def version_of(path):
    major, minor = re.match(r"store_v(\d+)_(\d+)\.sidx$", path.name).groups()
    return int(major), int(minor)


def header_of(data: bytes) -> dict:
    (length,) = struct.unpack("<I", data[12:16])
    return json.loads(data[32 : 32 + length])


def test_there_is_a_fixture_of_every_version_in_the_table():
    table = set(re.findall(r"^\| (\d+)\.(\d+) \|", DOC, flags=re.M))
    written = {version_of(p) for p in STORE_FIXTURES}
    assert {(int(a), int(b)) for a, b in table} == written
    assert max(written) == (_persist.FORMAT_MAJOR, _persist.FORMAT_MINOR)


@pytest.mark.parametrize("path", STORE_FIXTURES, ids=lambda p: p.stem)
@pytest.mark.parametrize("mmap", [False, True])
def test_every_store_version_loads_and_answers_as_it_did(path, mmap):
    expected = json.loads(path.with_suffix(".json").read_text())
    with warnings.catch_warnings():
        warnings.simplefilter("error", FormatVersionWarning)  # an old file is not a newer one
        store = Store.load(path, mmap=mmap)
    store._check()
    assert store.ids().tolist() == expected["ids"]
    assert (store.bits, store.threshold, store.sample_size, store.detectors) == (300, 5, 8, 1)
    assert store.plan.weight == 12 and store.plan.target_capacity == 200 and store.plan.limit == 469
    codes = Codes.from_indices(expected["codes"], bits=300)
    assert answers_of(store, codes) == expected["answers"]
    # the same codes give the same answers in a store built today
    fresh, _ = store_fixture(Store, Codes)
    assert answers_of(fresh, codes) == expected["answers"]


def test_an_old_file_saved_again_is_written_as_the_current_version(tmp_path):
    oldest = STORE_FIXTURES[0]
    store = Store.load(oldest)
    store.save(tmp_path / "again.sidx")
    data = (tmp_path / "again.sidx").read_bytes()
    assert struct.unpack("<HH", data[8:12]) == (_persist.FORMAT_MAJOR, _persist.FORMAT_MINOR)
    assert header_of(data)["params"]["sample_size"] == 8 and "segment" not in header_of(data)["params"]


def assert_golden(current, store, tmp_path) -> bytes:
    """``store`` saved today equals the fixture ``current`` byte for byte, ``written_by`` aside; today's bytes."""
    store.save(tmp_path / "today.sidx")
    golden, today = current.read_bytes(), (tmp_path / "today.sidx").read_bytes()
    hg, ht = header_of(golden), header_of(today)
    hg.pop("written_by"), ht.pop("written_by")
    assert hg == ht
    sections = lambda data: data[32 + struct.unpack("<I", data[12:16])[0]:].lstrip(b"\0")  # noqa: E731
    assert sections(golden) == sections(today)
    return today


def test_golden_bytes_of_the_current_version(tmp_path):
    """A store saved today is byte for byte the current fixture (the library
    version in ``written_by`` aside): a change here needs a version bump."""
    store, _ = store_fixture(Store, Codes)
    today = assert_golden(FIXTURES / f"store_v{_persist.FORMAT_MAJOR}_{_persist.FORMAT_MINOR}.sidx", store, tmp_path)
    # a pickle carries exactly the file format
    assert today in pickle.dumps(store)
    assert pickle.loads(pickle.dumps(store)).ids().tolist() == store.ids().tolist()


def test_a_newer_major_version_is_refused_with_both_versions(tmp_path):
    data = bytearray((FIXTURES / f"store_v{_persist.FORMAT_MAJOR}_{_persist.FORMAT_MINOR}.sidx").read_bytes())
    data[8:10] = struct.pack("<H", _persist.FORMAT_MAJOR + 1)
    # reseal the preamble so that only the version is wrong
    import zlib

    data[20:24] = struct.pack("<I", zlib.crc32(bytes(data[:20])))
    (tmp_path / "newer.sidx").write_bytes(bytes(data))
    want = (rf"store file format {_persist.FORMAT_MAJOR + 1}\.{_persist.FORMAT_MINOR} is not supported: "
            rf"this library reads {_persist.FORMAT_MAJOR}\.0 to {_persist.FORMAT_MAJOR}\.{_persist.FORMAT_MINOR}")
    with pytest.raises(StoreFormatError, match=want):
        Store.load(tmp_path / "newer.sidx")


def test_an_old_header_that_already_uses_a_new_name_is_refused(tmp_path):
    data = (FIXTURES / "store_v1_0.sidx").read_bytes()
    header = header_of(data)
    header["params"]["sample_size"] = header["params"].pop("segment")
    from tests.test_persist import reheader

    text = json.dumps(header, separators=(",", ":")).encode()
    (tmp_path / "mixed.sidx").write_bytes(reheader(data, text))
    with pytest.raises(StoreFormatError, match=r"section 'params': key 'sample_size' belongs to a later format"):
        Store.load(tmp_path / "mixed.sidx")


@pytest.mark.parametrize("folder", sorted(p for p in FIXTURES.glob("sharded_v*") if p.is_dir()), ids=lambda p: p.name)
def test_every_sharded_version_loads_and_answers_as_it_did(folder):
    distributed = pytest.importorskip("distributed")
    from sparseindex.cluster import ShardedStore

    expected = json.loads(folder.with_suffix(".json").read_text())
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None)
    client = distributed.Client(cluster)
    try:
        store = ShardedStore.load(client, folder)
        assert (store.bits, store.threshold, store.sample_size) == (300, 5, 8)
        assert store.plan.weight == 12 and store.plan.limit == 469
        codes = Codes.from_indices(expected["codes"], bits=300)
        got = {str(i): store.query(codes[i]).ids.tolist() for i in range(len(codes))}
        assert got == expected["answers"]
        assert np.array_equal(store.ids(), np.setdiff1d(np.arange(40), [5, 6]))
    finally:
        client.close()
        cluster.close()


WIDE_FIXTURES = sorted(FIXTURES.glob("wide_store_v*.sidx"))


@pytest.mark.parametrize("path", WIDE_FIXTURES, ids=lambda p: p.stem)
@pytest.mark.parametrize("mmap", [False, True])
def test_every_wide_fixture_loads_with_index_rows_and_answers_as_it_did(path, mmap):
    from tests.fixtures.write_fixtures import WIDE_BITS, wide_store_fixture

    expected = json.loads(path.with_suffix(".json").read_text())
    store = Store.load(path, mmap=mmap)
    store._check()
    assert store.row_layout == "sparse" and store.bits == WIDE_BITS
    assert store.ids().tolist() == expected["ids"]
    codes = Codes.from_indices(expected["codes"], bits=WIDE_BITS)
    assert answers_of(store, codes) == expected["answers"]
    fresh, _ = wide_store_fixture(Store, Codes)
    assert answers_of(fresh, codes) == expected["answers"]


def test_golden_bytes_of_the_current_wide_version(tmp_path):
    from tests.fixtures.write_fixtures import wide_store_fixture

    store, _ = wide_store_fixture(Store, Codes)
    today = assert_golden(FIXTURES / f"wide_store_v{_persist.FORMAT_MAJOR}_{_persist.FORMAT_MINOR}.sidx", store,
                          tmp_path)
    header = header_of(today)
    assert header["params"]["row_layout"] == "sparse"
    assert [s["name"] for s in header["sections"]][:2] == ["row_indptr", "row_indices"]
    # from 1.3 a wide store's postings have one column per bit in use, not per bit of the width
    names = [s["name"] for s in header["sections"]]
    assert names.index("bit_columns") == names.index("block_indptr") - 1
    mapped = header["counts"]["mapped_bits"]
    # the map holds every bit of the codes the compaction kept (all but 2 and 9) and those added after
    # it, the later-removed 44 included: it only grows until the next compaction
    _, codes = wide_store_fixture(Store, Codes)
    kept = [row for i, row in enumerate(codes.to_indices()) if i not in (2, 9)]
    assert mapped == np.unique(np.concatenate(kept)).shape[0]
    assert header["sections"][names.index("block_indptr")]["shape"][1] == mapped + 2
