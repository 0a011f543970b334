"""Hypothesis stateful test: random add / remove / compact / query / nearest
sequences against the naive set model, with the invariant checker after
every mutation. ``HYPOTHESIS_PROFILE=long`` runs it much longer.
"""

import numpy as np
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, precondition, rule

from sparseindex import Store
from tests.naive import NaiveStore, hits_as_pairs

BITS = 40


class SmallBlockStore(Store):
    _block_span = 5


code = st.sets(st.integers(0, BITS - 1), min_size=3, max_size=14).map(sorted)
query_code = st.sets(st.integers(0, BITS - 1), max_size=20).map(sorted)


class StoreMachine(RuleBasedStateMachine):
    @initialize(
        threshold=st.integers(1, 3),
        sample_size=st.sampled_from([None, 3, 5]),
        detectors=st.integers(1, 3),
        seed=st.integers(0, 2**64 - 1),
        verify_cost=st.sampled_from([0.0, 256.0, float("inf")]),  # prefix filtering: lowest, usual, off
    )
    def start(self, threshold, sample_size, detectors, seed, verify_cost):
        self.store = SmallBlockStore(BITS, threshold=threshold, sample_size=sample_size, detectors=detectors, seed=seed)
        self.store._bank.verify_cost = verify_cost
        self.naive = NaiveStore(threshold)

    def _samples(self, ids):
        return [[set(s.tolist()) for s in self.store.detector_bits(int(i))] for i in ids]

    @rule(rows=st.lists(code, min_size=1, max_size=6))
    def add(self, rows):
        ids = self.store.add(rows)
        assert ids.tolist() == list(range(self.naive.next_id, self.naive.next_id + len(rows)))
        self.naive.add(rows, self._samples(ids))

    @precondition(lambda self: len(self.naive.codes) > 0)
    @rule(data=st.data())
    def remove(self, data):
        live = sorted(self.naive.codes)
        chosen = data.draw(st.lists(st.sampled_from(live), min_size=1, max_size=3, unique=True))
        self.store.remove(chosen)
        self.naive.remove(chosen)

    @rule()
    def compact(self):
        self.store.compact()

    @rule(q=query_code, min_overlap=st.integers(0, 5))
    def query(self, q, min_overlap):
        assert hits_as_pairs(self.store.query(q, min_overlap=min_overlap)) == self.naive.query(q, min_overlap)

    @rule(qs=st.lists(query_code, min_size=1, max_size=4))
    def query_many(self, qs):
        batch = self.store.query_many(qs)
        for i, q in enumerate(qs):
            assert hits_as_pairs(batch[i]) == self.naive.query(q)

    @rule(q=query_code, k=st.integers(0, 6))
    def nearest(self, q, k):
        assert hits_as_pairs(self.store.nearest(q, k)) == self.naive.nearest(q, k)

    @precondition(lambda self: len(self.naive.codes) > 0)
    @rule(data=st.data())
    def get(self, data):
        i = data.draw(st.sampled_from(sorted(self.naive.codes)))
        assert set(self.store.get([i]).to_indices()[0].tolist()) == self.naive.codes[i]

    @invariant()
    def consistent(self):
        if not hasattr(self, "store"):
            return
        self.store._check(deep=True)
        assert len(self.store) == len(self.naive.codes)
        assert self.store.ids().tolist() == sorted(self.naive.codes)
        # samples never change, compaction included
        for i, samples in self.naive.samples.items():
            assert [set(s.tolist()) for s in self.store.detector_bits(i)] == samples


TestStoreMachine = StoreMachine.TestCase


def test_stress_seeded(iterations=300, seed=0):
    """Registry-of-actions stress run against the naive model (seeded)."""
    run_stress(iterations, seed)


def run_stress(iterations: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    store = SmallBlockStore(BITS, threshold=2, sample_size=4, detectors=2, seed=seed)
    naive = NaiveStore(2)

    def rand_code(lo=3, hi=14):
        return sorted(rng.choice(BITS, int(rng.integers(lo, hi + 1)), replace=False).tolist())

    def act_add():
        rows = [rand_code() for _ in range(int(rng.integers(1, 20)))]
        ids = store.add(rows)
        naive.add(rows, [[set(s.tolist()) for s in store.detector_bits(int(i))] for i in ids])

    def act_remove():
        if naive.codes:
            live = sorted(naive.codes)
            chosen = rng.choice(live, min(len(live), int(rng.integers(1, 5))), replace=False).tolist()
            store.remove(chosen)
            naive.remove(chosen)

    def act_query():
        q = rand_code(0, 25)
        assert hits_as_pairs(store.query(q)) == naive.query(q)

    def act_nearest():
        q = rand_code(0, 25)
        assert hits_as_pairs(store.nearest(q, 4)) == naive.nearest(q, 4)

    actions = [act_add, act_add, act_remove, act_query, act_query, act_nearest, store.compact]
    for _ in range(iterations):
        actions[int(rng.integers(len(actions)))]()
        store._check(deep=False)
    store._check(deep=True)


if __name__ == "__main__":  # python -m tests.test_store_stateful ITERATIONS SEED
    import sys

    run_stress(int(sys.argv[1]), int(sys.argv[2]))
    print("ok")
