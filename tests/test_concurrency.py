"""Four threads query while a fifth adds, removes, compacts and saves.

Reference: a second store with the same parameters and seed holding every
code ever added (ids match, so detector samples match). A query against a
committed state S must return exactly the reference's hits whose ids are in
S. Each query records how many mutations had finished before it started and
after it ended; its answer must equal the one for one of the states in that
window (the mutation in flight may or may not have committed). Nothing may
raise, and the last save must load as the final state.
"""

import os
import threading
import time

import numpy as np

from sparseindex import Codes, Store

BITS, WEIGHT, BATCH, POOL = 256, 12, 40, 4000
PARAMS = dict(threshold=3, sample_size=6, detectors=2, seed=21)


def test_queries_see_only_committed_states(tmp_path, seconds=3.0):
    pool = Codes.random(POOL, BITS, WEIGHT, seed=3)
    reference = Store(BITS, **PARAMS)
    reference.add(pool)
    store = Store(BITS, **PARAMS)
    store.add(pool[:BATCH])
    states = [frozenset(range(BATCH))]  # states[i]: live ids after i mutations
    errors, records = [], []
    stop = threading.Event()
    path = tmp_path / "live.sidx"
    saved = {}

    def mutator():
        rng = np.random.default_rng(0)
        live, added = set(states[0]), BATCH
        try:
            while not stop.is_set() and added + BATCH <= POOL:
                action = rng.choice(["add", "add", "remove", "compact", "save"])
                if action == "add":
                    ids = store.add(pool[added : added + BATCH])
                    assert ids.tolist() == list(range(added, added + BATCH))
                    live |= set(ids.tolist())
                    added += BATCH
                elif action == "remove" and live:
                    gone = rng.choice(sorted(live), size=min(len(live), 15), replace=False).tolist()
                    store.remove(gone)
                    live -= set(gone)
                elif action == "compact":
                    store.compact()
                else:
                    store.save(path)
                    saved["state"] = len(states) - 1  # index of the state this save wrote
                states.append(frozenset(live))
        except Exception as exc:  # pragma: no cover - reported below
            errors.append(repr(exc))

    def reader(k):
        rng = np.random.default_rng(100 + k)
        try:
            while not stop.is_set():
                picks = rng.integers(0, POOL, size=4)
                qs = Codes.from_indices([_noisy(pool[int(p)], rng) for p in picks], bits=BITS)
                before = len(states) - 1
                if k % 2:
                    answers = [store.query(qs[i]) for i in range(len(qs))]
                    per_query = True
                else:
                    batch = store.query_many(qs)
                    answers = [batch[i] for i in range(len(qs))]
                    per_query = False
                after = len(states) - 1
                records.append((qs, answers, before, after, per_query))
        except Exception as exc:  # pragma: no cover - reported below
            errors.append(repr(exc))

    threads = [threading.Thread(target=reader, args=(k,)) for k in range(4)]
    threads.append(threading.Thread(target=mutator))
    for t in threads:
        t.start()
    time.sleep(seconds)
    stop.set()
    for t in threads:
        t.join(timeout=120)
    assert not any(t.is_alive() for t in threads), "a thread hung"
    assert errors == []
    assert len(states) > 10 and len(records) > 40, (len(states), len(records))

    checked = 0
    step = max(1, len(records) // 1500)  # check an even sample: the reference costs more than the store
    for qs, answers, before, after, per_query in records[::step]:
        window = states[before : after + 2]
        want_all = reference.query_many(qs)
        matches = []
        for i, got in enumerate(answers):
            full = want_all[i]
            ok = set()
            for j, state in enumerate(window):
                keep = np.isin(full.ids, list(state))
                if np.array_equal(full.ids[keep], got.ids) and np.array_equal(full.overlaps[keep], got.overlaps):
                    ok.add(j)
            assert ok, "an answer matches no committed state"
            matches.append(ok)
            checked += 1
        if not per_query:  # one batch holds one read lock: one state for all of it
            assert set.intersection(*matches), "a batch mixed two states"
    assert "state" in saved, "the mutator never saved"
    assert set(Store.load(path).ids().tolist()) == states[saved["state"]]
    print(f"\n{len(states) - 1} mutations, {checked} answers checked against their window")


def _noisy(bits: np.ndarray, rng) -> list[int]:
    keep = rng.choice(bits, size=len(bits) - 3, replace=False)
    return sorted(set(keep.tolist()) | set(rng.integers(0, BITS, size=3).tolist()))
