"""SIGKILL in the middle of a save: the file is always the old or the new store.

A forked child saves store B over a file holding store A; the parent kills
it with SIGKILL after a random delay drawn over the length of a save. After
every kill the file must load and be byte-identical to A or to B. The
``slow`` variant runs 2,000 kills.
"""

import os
import signal
import sys
import time

import numpy as np
import pytest

from sparseindex import Codes, Store

from sparseindex.store import format as _persist
pytestmark = pytest.mark.skipif(not hasattr(os, "fork"), reason="needs os.fork")


def _store(seed, n):
    store = Store(2048, threshold=10, sample_size=20, detectors=1, seed=seed)
    store.add(Codes.random(n, 2048, 40, seed=seed))
    return store


def run_kills(kills: int, directory, seed: int = 0, n: int = 20_000) -> dict:
    old, new = _store(1, n), _store(2, n + 1)
    path = os.path.join(directory, "fleet.sidx")
    old_bytes, new_bytes = _persist.dumps(old._state()), _persist.dumps(new._state())
    old.save(path)
    started = time.perf_counter()
    for _ in range(3):
        new.save(os.path.join(directory, "timing.sidx"))
    save_seconds = (time.perf_counter() - started) / 3
    os.unlink(os.path.join(directory, "timing.sidx"))
    rng = np.random.default_rng(seed)
    tally = {"old": 0, "new": 0, "killed mid-save": 0, "finished first": 0}
    for _ in range(kills):
        pid = os.fork()
        if pid == 0:  # child: one save, then leave without running any cleanup
            try:
                new.save(path)
            finally:
                os._exit(0)
        time.sleep(float(rng.uniform(0.0, 3.0 * save_seconds)))
        os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
        tally["killed mid-save" if os.WIFSIGNALED(status) else "finished first"] += 1
        with open(path, "rb") as f:
            content = f.read()
        assert content in (old_bytes, new_bytes), "the file is neither the old nor the new store"
        Store.load(path)  # and it loads
        if content == new_bytes:
            tally["new"] += 1
            old.save(path)
        else:
            tally["old"] += 1
        for name in os.listdir(directory):  # a killed save leaves its temporary file behind
            if name != "fleet.sidx":
                os.unlink(os.path.join(directory, name))
    tally["save ms"] = round(1000 * save_seconds, 1)
    return tally


def test_sigkill_during_save(tmp_path):
    tally = run_kills(200, tmp_path)
    print("\n", tally)
    assert tally["killed mid-save"] >= 20, tally  # the delays really land inside saves
    assert tally["old"] and tally["new"], tally


@pytest.mark.slow
def test_sigkill_during_save_long(tmp_path):
    tally = run_kills(2000, tmp_path, seed=1)
    print("\n", tally)
    assert tally["killed mid-save"] >= 500, tally


if __name__ == "__main__":  # python -m tests.test_persist_crash KILLS DIRECTORY
    print(run_kills(int(sys.argv[1]), sys.argv[2]))
