"""Hypothesis stateful test: add / remove / compact / save / load interleaved.

The store under test is replaced by its own reloaded copy (in memory, or
memory-mapped and writable) at random points; the naive set model of
``tests/naive.py`` never is. Every query must agree with the model, and a
read-only memory-mapped copy opened beside it must answer identically.
"""

import os
import tempfile

from hypothesis import strategies as st
from hypothesis.stateful import precondition, rule

from tests.naive import hits_as_pairs
from tests.test_store_stateful import StoreMachine, query_code

DIRECTORY = tempfile.mkdtemp(prefix="sparseindex-stateful-")


class PersistMachine(StoreMachine):
    saves = 0

    def _path(self):
        PersistMachine.saves += 1
        return os.path.join(DIRECTORY, f"s{PersistMachine.saves % 4}.sidx")

    @rule(mmap=st.booleans())
    def save_and_continue_on_the_loaded_copy(self, mmap):
        path = self._path()
        self.store.save(path)
        self.store = type(self.store).load(path, mmap=mmap, writable=True)

    @precondition(lambda self: hasattr(self, "store"))
    @rule(qs=st.lists(query_code, min_size=1, max_size=4), min_overlap=st.integers(0, 4))
    def read_only_copy_answers_the_same(self, qs, min_overlap):
        path = self._path()
        self.store.save(path)
        copy = type(self.store).load(path, mmap=True)
        for q in qs:
            expected = self.naive.query(q, min_overlap)
            assert hits_as_pairs(copy.query(q, min_overlap=min_overlap)) == expected
            assert hits_as_pairs(self.store.query(q, min_overlap=min_overlap)) == expected
        assert copy.ids().tolist() == sorted(self.naive.codes)
        assert copy.next_id == self.naive.next_id


TestPersistMachine = PersistMachine.TestCase
