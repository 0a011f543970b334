"""Real text hashed into 2**20 bits: exact answers against scipy.sparse.

Data: the docstrings of thirty modules of Python's own standard library
(they ship with every Python, nothing is downloaded), cut into overlapping
48-word windows; each window's words and word pairs are hashed with
``hashlib.blake2b`` into 2**20 bits, one bit per feature (a hashing step of
the usual kind). The text differs a little between Python versions, so the
tests assert relations, never counts.

Reference: the scipy.sparse product ``S @ q`` of the windows' CSR matrix
with a query (exact overlaps), and a store of the same codes without the
column map, which must answer identically.
"""

from __future__ import annotations

import hashlib
import importlib
import inspect
import re

import numpy as np
import pytest

from sparseindex import Codes, Store

BITS = 2**20
WINDOW, STEP = 48, 24
MODULES = ["argparse", "collections", "csv", "datetime", "decimal", "difflib", "email.message", "fractions",
           "functools", "heapq", "inspect", "itertools", "json", "logging", "os", "pathlib", "random", "re",
           "shutil", "socket", "statistics", "string", "subprocess", "tarfile", "textwrap", "threading", "tokenize",
           "unittest", "urllib.parse", "zipfile"]


def _words():
    words = []

    def take(obj):
        nonlocal words
        words += re.findall(r"[a-z]+", (inspect.getdoc(obj) or "").lower())

    for name in MODULES:
        module = importlib.import_module(name)
        take(module)
        for _, obj in sorted(vars(module).items()):
            if (inspect.isfunction(obj) or inspect.isclass(obj)) and getattr(obj, "__module__", None) == name:
                take(obj)
                if inspect.isclass(obj):
                    for _, member in sorted(vars(obj).items()):
                        if inspect.isfunction(member) and member.__doc__:
                            take(member)
    return words


def _hashed(words) -> np.ndarray:
    features = [f"w={w}" for w in words] + [f"p={a}_{b}" for a, b in zip(words, words[1:])]
    return np.unique([int.from_bytes(hashlib.blake2b(f.encode(), digest_size=8).digest(), "little") % BITS
                      for f in features])


@pytest.fixture(scope="module")
def text():
    words = _words()
    windows = [words[a : a + WINDOW] for a in range(0, len(words) - WINDOW, STEP)]
    assert len(windows) > 2_000, "too little standard-library text"
    codes = Codes.from_indices([_hashed(w) for w in windows], bits=BITS)
    rng = np.random.default_rng(5)
    picks = rng.choice(len(windows), size=25, replace=False)
    # a query: a stored window with a quarter of its words dropped
    queries = Codes.from_indices([_hashed([w for w in windows[i] if rng.random() >= 0.25]) for i in picks], bits=BITS)
    return codes, queries, picks


def test_real_text_answers_equal_the_scipy_product(text):
    codes, queries, picks = text
    threshold = 12
    store = Store(BITS, threshold=threshold, seed=9)
    store.add(codes)
    store._check(deep=False)
    assert store.row_layout == "sparse" and store._bank.columns is not None
    S = codes.to_scipy().tocsr().astype(np.int64)
    for q, source in zip(queries.to_indices(), picks):
        want = np.asarray(S[:, q].sum(axis=1)).ravel()
        hits = store.query(q)
        assert sorted(hits.ids.tolist()) == np.flatnonzero(want >= threshold).tolist()
        assert np.array_equal(hits.overlaps, want[hits.ids])
        assert int(source) in hits.ids   # the window the query came from is found
        top = store.nearest(q, 5)
        order = np.lexsort((np.arange(want.shape[0]), -want))[:5]
        assert top.ids.tolist() == order.tolist()
    batch = store.query_many(queries, min_overlap=20)
    for h, q in zip(batch, queries.to_indices()):
        want = np.asarray(S[:, q].sum(axis=1)).ravel()
        assert sorted(h.ids.tolist()) == np.flatnonzero(want >= 20).tolist()


def test_real_text_answers_alike_with_and_without_the_column_map(text):
    codes, queries, _ = text
    mapped = Store(BITS, threshold=10, sample_size=16, detectors=2, seed=2)
    plain = type("PerBitColumns", (Store,), {"_column_map": False})(BITS, threshold=10, sample_size=16, detectors=2,
                                                                     seed=2)
    for store in (mapped, plain):
        store.add(codes)
    assert [h.ids.tolist() for h in mapped.query_many(queries)] == [h.ids.tolist() for h in plain.query_many(queries)]
    # the map holds only the bits in use; the per-bit tables would hold the width
    assert mapped._bank.columns.shape[0] < BITS and mapped.nbytes < plain.nbytes


def test_real_text_is_skewed_and_health_says_so(text):
    codes, _, _ = text
    store = Store(BITS, threshold=12, seed=9)
    store.add(codes)
    report = store.health()
    used = BITS - report.unused_bits
    # common words ("the", "of", "a") are set in most windows: far fewer effective bits than bits in use
    assert report.effective_bits < used / 4
    assert report.hottest_bit_load_ratio > 100
