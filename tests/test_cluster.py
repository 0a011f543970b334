"""ShardedStore on a real distributed.LocalCluster against a single Store.

The reference for every check is a single in-process ``Store`` with the same
parameters, seed and codes (named beside each check): a sharded store must
give identical results, whatever the number of shards. The cluster has two
worker processes on loopback, is started and closed here, and no process of
it may outlive the tests.
"""

import json
import os
import signal
import sys
import threading
import time
import warnings

import numpy as np
import pytest

from sparseindex import SaturationWarning, Codes, ReadOnlyStoreError, Store, StoreFormatError
from sparseindex import cluster as cl
from tests.naive import noisy_copy

BITS, WEIGHT = 256, 16
PARAMS = dict(threshold=6, sample_size=10, detectors=2)  # sample_size < weight: find_matches must scan too


def _new_cluster(workers=2):
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
        dashboard_address="127.0.0.1:0", silence_logs=50,  # every port on loopback, chosen free
    )
    return cluster, distributed.Client(cluster)


def _children():
    """Live child processes, less Python's multiprocessing resource tracker.

    The tracker is started once per process by the first spawned child and
    lives exactly as long as this (the test) process; it is not the cluster's.
    """
    psutil = pytest.importorskip("psutil")
    out = []
    for p in psutil.Process().children(recursive=True):
        try:
            if p.status() != psutil.STATUS_ZOMBIE and "multiprocessing.resource_tracker" not in " ".join(p.cmdline()):
                out.append(p)
        except psutil.NoSuchProcess:
            pass
    return out


def _close(cluster, client):
    client.close()
    cluster.close()


def _wait_no_children(before):
    """Children of this process that are not in ``before``, once they had the chance to exit."""
    deadline = time.monotonic() + 30
    while True:
        extra = [p for p in _children() if p.pid not in before]
        if not extra or time.monotonic() > deadline:
            return extra
        time.sleep(0.2)


@pytest.fixture(scope="module")
def client():
    before = {p.pid for p in _children()}
    cluster, client = _new_cluster()
    yield client
    _close(cluster, client)
    assert _wait_no_children(before) == []


def same_batch(a, b):
    return (np.array_equal(a.indptr, b.indptr) and np.array_equal(a.ids, b.ids)
            and np.array_equal(a.overlaps, b.overlaps))


def planted(rng, source: Codes, count):
    """Near-copies (1-3 bits changed) of random codes of ``source``, plus as many fresh codes."""
    rows = [noisy_copy(rng, source[int(i)].tolist(), BITS, int(rng.integers(1, 4)))
            for i in rng.integers(0, len(source), count)]
    fresh = Codes.random(count, BITS, WEIGHT, seed=int(rng.integers(1 << 30)))
    return Codes.concat([Codes.from_indices(rows, bits=BITS), fresh])


def assert_same_answers(ref, s, queries):
    """Every read of the sharded store ``s`` equals the single store ``ref`` (the reference)."""
    assert len(s) == len(ref) and s.next_id == ref.next_id
    assert np.array_equal(s.ids(), ref.ids())                                   # reference: single Store
    assert same_batch(s.query_many(queries), ref.query_many(queries))           # reference: single Store
    assert same_batch(s.query_many(queries, min_overlap=8), ref.query_many(queries, min_overlap=8))
    assert same_batch(s.find_matches(queries, min_overlap=7), ref.find_matches(queries, min_overlap=7))
    for i in (0, 1, len(queries) - 1):
        assert s.query(queries[i]) == ref.query(queries[i])                     # reference: single Store
        assert s.nearest(queries[i], 7) == ref.nearest(queries[i], 7)           # reference: single Store
    live = ref.ids()
    pick = live[:: max(1, len(live) // 50)]
    assert s.get(pick) == ref.get(pick)                                         # reference: single Store
    assert all((int(i) in s) == (int(i) in ref) for i in (0, 1, 2, 3, int(ref.next_id) - 1))


# -- without a cluster ----------------------------------------------------------


def test_missing_distributed_names_the_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed now fails
    with pytest.raises(ImportError, match=r'pip install "sparseindex\[cluster\]"'):
        cl.ShardedStore(object(), 2, BITS, threshold=3)


def test_share_targets_plan_the_same_configuration():
    # reference: the planner itself, once for the whole store and once for a share
    from sparseindex import plan

    for shards in (2, 3, 8):
        whole = plan(2048, 40, false_hit=1e-9, capacity=2_000_000, noise=0.25)
        cap, fh = cl.share_targets(1e-9, 2_000_000, shards)
        part = plan(2048, 40, false_hit=fh, capacity=cap, noise=0.25)
        assert (part.sample_size, part.threshold, part.detectors) == (whole.sample_size, whole.threshold, whole.detectors)
        # the whole store's chance of no false hit is the product of the shares' (1 - fh) ** (C / cap)
        assert (1 - fh) ** (2_000_000 / cap) == pytest.approx(1 - 1e-9, rel=1e-15)


# -- on the cluster -------------------------------------------------------------


@pytest.mark.parametrize("shards", [2, 3])
def test_every_operation_matches_a_single_store(client, shards):
    rng = np.random.default_rng(shards)
    ref = Store(BITS, seed=11, **PARAMS)
    with cl.ShardedStore(client, shards, BITS, seed=11, **PARAMS) as s:
        assert s.seed == ref.seed == 11
        first = Codes.random(1500, BITS, WEIGHT, seed=1)
        assert np.array_equal(s.add(first), ref.add(first))                     # reference: single Store
        gap = Codes.random(40, BITS, WEIGHT, seed=2)
        given = np.arange(2000, 2080, 2)
        assert np.array_equal(s.add(gap, ids=given), ref.add(gap, ids=given))   # ids with gaps
        workers = {p["worker"] for p in s.placement()}
        assert len(workers) == 2                                                # both workers hold shards
        assert all(h.items > 0 for h in s.shard_health())
        assert sum(h.items for h in s.shard_health()) == len(ref)
        queries = planted(rng, first, 60)
        assert_same_answers(ref, s, queries)

        batch = planted(rng, first, 100)
        got = s.find_or_add(batch, min_overlap=9)
        want = ref.find_or_add(batch, min_overlap=9)                            # reference: single Store
        assert np.array_equal(got[0], want[0]) and np.array_equal(got[1], want[1])
        assert want[1].any() and (~want[1]).any()

        drop = rng.choice(ref.ids(), 200, replace=False)
        s.remove(drop)
        ref.remove(drop)
        assert_same_answers(ref, s, queries)
        s.compact()
        ref.compact()
        assert_same_answers(ref, s, queries)
        more = Codes.random(300, BITS, WEIGHT, seed=3)
        assert np.array_equal(s.add(more), ref.add(more))
        assert_same_answers(ref, s, queries)

        h, r = s.health(refresh=True), ref.health(refresh=True)                 # reference: single Store
        for field in ("items", "removed_pending", "per_code_uniform", "false_hit_now_uniform", "effective_bits",
                      "hottest_bit_load_ratio", "unused_bits", "weight_min", "weight_mean", "weight_max",
                      "queries_total", "hits_total", "codes_added_total", "codes_removed_total",
                      "per_code_usage", "per_code_usage_stderr", "usage_shrinkage"):
            assert getattr(h, field) == getattr(r, field), field


def test_errors_match_a_single_store(client):
    ref = Store(BITS, seed=3, **PARAMS)
    with cl.ShardedStore(client, 2, BITS, seed=3, **PARAMS) as s:
        codes = Codes.random(20, BITS, WEIGHT, seed=1)
        s.add(codes)
        ref.add(codes)
        s.remove([4])
        ref.remove([4])

        def same_error(call, kind):
            with pytest.raises(kind) as want:
                call(ref)                                                       # reference: single Store
            with pytest.raises(kind) as got:
                call(s)
            assert str(got.value) == str(want.value)

        same_error(lambda x: x.add([list(range(5))]), ValueError)              # too light to ever fire
        same_error(lambda x: x.add([[1, 2, 3, 4, 5, 6, 300]]), ValueError)      # bit out of range
        same_error(lambda x: x.add(codes[:2], ids=[30, 30]), ValueError)
        same_error(lambda x: x.add(codes[:1], ids=[3]), ValueError)             # ids never reused
        same_error(lambda x: x.remove([4]), KeyError)                           # already removed
        same_error(lambda x: x.remove([7, 99]), KeyError)                       # never stored
        same_error(lambda x: x.remove([7, 7]), KeyError)                        # twice in one call
        same_error(lambda x: x.remove([[1]]), ValueError)
        same_error(lambda x: x.remove([1.5]), TypeError)
        same_error(lambda x: x.get([2, 4]), KeyError)
        same_error(lambda x: x.query([1, 999]), ValueError)
        same_error(lambda x: x.nearest(codes[0], -1), ValueError)
        same_error(lambda x: x.find_or_add(codes, min_overlap=0), ValueError)
        same_error(lambda x: x.query_many(codes, min_overlap="3"), TypeError)
        assert len(s) == len(ref) == 19                                         # nothing was added or removed
        with pytest.raises(ValueError, match="shards=0"):
            cl.ShardedStore(client, 0, BITS, threshold=3)
        with pytest.raises(TypeError, match="client='local'"):
            cl.ShardedStore("local", 2, BITS, threshold=3)
        with pytest.raises(ValueError, match="'tcp://127.0.0.1:1'"):
            cl.ShardedStore(client, 2, BITS, threshold=3, workers=["tcp://127.0.0.1:1"])
        with pytest.raises(ValueError, match="threshold=9 must be <= sample_size=4"):
            cl.ShardedStore(client, 2, BITS, threshold=9, sample_size=4)


def test_health_measurement_and_alerts_match_a_single_store(client):
    seen_ref, seen = [], []
    targets = dict(false_hit=0.1, capacity=1500, noise=0.2)  # a rate a measurement can measure
    ref = Store.for_target(BITS, WEIGHT, seed=21, on_status=lambda a, b, h: seen_ref.append((a, b)), **targets)
    s = cl.ShardedStore.for_target(client, 2, BITS, WEIGHT, seed=21,
                                   on_status=lambda a, b, h: seen.append((a, b)), **targets)
    with s:
        assert s.plan == ref.plan                                               # reference: single Store's plan
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            for k in range(6):  # 2,400 codes: past the planned capacity (1,958)
                batch = Codes.random(400, BITS, WEIGHT, seed=100 + k)
                s.add(batch)
                ref.add(batch)
        assert seen == seen_ref and seen_ref[-1][1] == "saturated"              # reference: single Store's alerts
        assert any(issubclass(w.category, SaturationWarning) and "past its limit" in str(w.message) for w in caught)
        s.remove(np.arange(0, 300))
        ref.remove(np.arange(0, 300))
        for refresh in (False, True):
            h, r = s.health(refresh=refresh).to_dict(), ref.health(refresh=refresh).to_dict()
            for key in ("seconds", "memory_bytes"):
                h.pop(key), r.pop(key)
            assert h == r                                                       # reference: single Store.health
        for source in ("uniform", "usage"):
            p, q = s.measure_false_hits(1500, source=source, seed=5).to_dict(), ref.measure_false_hits(1500, source=source, seed=5).to_dict()
            p.pop("seconds"), q.pop("seconds")
            assert p == q and p["queries_hit"] > 0                              # reference: single Store.measure_false_hits
        shares = s.shard_health()
        cap, fh = cl.share_targets(0.1, 1500, 2)
        assert [x.target_false_hit for x in shares] == [fh, fh] and [x.target_capacity for x in shares] == [cap, cap]
        assert sum(x.items for x in shares) == len(ref)
        assert s.health().status == "saturated" and {x.status for x in shares} == {"saturated"}


def test_save_load_and_generations(client, tmp_path):
    rng = np.random.default_rng(8)
    ref = Store(BITS, seed=5, **PARAMS)
    base = Codes.random(1200, BITS, WEIGHT, seed=1)
    queries = planted(rng, base, 40)
    with cl.ShardedStore(client, 2, BITS, seed=5, **PARAMS) as s:
        s.add(base)
        ref.add(base)
        s.remove([3, 8])
        ref.remove([3, 8])
        s.save(tmp_path / "fleet")
        first = sorted(os.listdir(tmp_path / "fleet"))
        assert first == ["manifest.json", "shard0000.total0002.gen000001.sidx", "shard0001.total0002.gen000001.sidx"]
        s.add(base[:10])
        ref.add(base[:10])
        s.save(tmp_path / "fleet")
        second = sorted(os.listdir(tmp_path / "fleet"))
        assert second == ["manifest.json", "shard0000.total0002.gen000002.sidx", "shard0001.total0002.gen000002.sidx"]
        # each shard file is an ordinary store file holding its part (reference: Store.load)
        part = Store.load(tmp_path / "fleet" / "shard0001.total0002.gen000002.sidx")
        assert np.array_equal(part.ids(), ref.ids()[ref.ids() % 2 == 1])
    with cl.ShardedStore.load(client, tmp_path / "fleet") as back:
        assert_same_answers(ref, back, queries)                                 # reference: single Store
        more = Codes.random(50, BITS, WEIGHT, seed=9)
        assert np.array_equal(back.add(more), ref.add(more))
        assert_same_answers(ref, back, queries)
    with cl.ShardedStore.load(client, tmp_path / "fleet", mmap=True) as served:
        with pytest.raises(ReadOnlyStoreError, match="add: this sharded store is read-only"):
            served.add(more)
        assert served.query_many(queries).ids.size > 0


def test_bad_manifests_are_refused(client, tmp_path):
    with cl.ShardedStore(client, 2, BITS, seed=5, **PARAMS) as s:
        s.add(Codes.random(100, BITS, WEIGHT, seed=1))
        s.save(tmp_path / "a")
    with cl.ShardedStore(client, 2, BITS, seed=6, **PARAMS) as other:
        other.add(Codes.random(100, BITS, WEIGHT, seed=1))
        other.save(tmp_path / "b")
    good = json.loads((tmp_path / "a" / "manifest.json").read_text())

    def refused(change, match):
        doc = json.loads(json.dumps(good))
        change(doc)
        (tmp_path / "a" / "manifest.json").write_text(json.dumps(doc))
        with pytest.raises(StoreFormatError, match=match) as err:
            cl.ShardedStore.load(client, tmp_path / "a")
        assert err.value.section == "manifest"

    refused(lambda d: d.update(shards=3), r"files must list one entry per shard \(3\)")
    refused(lambda d: d["files"][0].update(file="../../etc/passwd"), r"files\[0\]\.file='\.\./\.\./etc/passwd'")
    refused(lambda d: d.update(items=7), "items=7 but the shards hold 100")
    refused(lambda d: d.pop("routing"), "keys")
    refused(lambda d: d["params"].update(seed=-1), r"params\.seed=-1")
    refused(lambda d: (d["files"][1].update(items=49, next_id=97), d.update(items=99)),
            "shard 1: holds 50 codes up to next_id 100, the manifest says 49 up to 97")
    (tmp_path / "a" / "manifest.json").write_text(json.dumps(good))
    # another store's shard file under this name: its seed gives it away
    os.replace(tmp_path / "b" / "shard0001.total0002.gen000001.sidx", tmp_path / "a" / "shard0001.total0002.gen000001.sidx")
    with pytest.raises(StoreFormatError, match="shard 1: seed=6 in the shard file, 5 in the manifest"):
        cl.ShardedStore.load(client, tmp_path / "a")
    (tmp_path / "a" / "manifest.json").write_text("{not json")
    with pytest.raises(StoreFormatError, match="not valid JSON"):
        cl.ShardedStore.load(client, tmp_path / "a")
    with pytest.raises(FileNotFoundError, match="manifest.json is missing"):
        cl.ShardedStore.load(client, tmp_path / "nowhere")


def test_queries_see_a_change_entirely_or_not_at_all(client):
    ref = Store(BITS, seed=2, **PARAMS)
    base = Codes.random(2000, BITS, WEIGHT, seed=1)
    queries = planted(np.random.default_rng(3), base, 30)
    extra = Codes.from_indices([np.sort(np.concatenate([q[:12], [250, 251, 252, 253]]))[:WEIGHT]
                                for q in queries.to_indices()], bits=BITS)
    with cl.ShardedStore(client, 2, BITS, seed=2, **PARAMS) as s:
        s.add(base)
        ref.add(base)
        before = ref.query_many(queries)                                        # reference: single Store, before
        ref.add(extra)
        after = ref.query_many(queries)                                         # ... and after the add
        assert not same_batch(before, after)
        seen, stop = [], threading.Event()

        def reader():
            while not stop.is_set() and len(seen) < 200:
                seen.append(s.query_many(queries))

        threads = [threading.Thread(target=reader) for _ in range(2)]
        for t in threads:
            t.start()
        time.sleep(0.2)
        s.add(extra)
        time.sleep(0.2)
        stop.set()
        for t in threads:
            t.join()
        assert seen and all(same_batch(x, before) or same_batch(x, after) for x in seen)
        assert same_batch(seen[-1], after)


# -- faults: a cluster of its own, since a worker dies ----------------------------


def _pid_of(client, address):
    return client.run(os.getpid, workers=[address])[address]


def _kill_during_query_loop(client, s, victim, answers):
    """Query in a loop while the worker of shard ``victim`` is killed; the error raised."""
    pid = _pid_of(client, s.placement()[victim]["worker"])
    queries, want = answers
    killer = threading.Timer(0.3, os.kill, (pid, signal.SIGKILL))
    killer.start()
    try:
        for _ in range(100_000):  # bounded; ends at the first ShardLostError
            try:
                got = s.query_many(queries)
            except cl.ShardLostError as exc:
                return exc
            assert same_batch(got, want)                                        # never a partial answer
    finally:
        killer.join()
    pytest.fail("the query loop never saw the lost shard")


def test_killed_worker_is_named_and_recovered_from_the_last_save(tmp_path):
    before = {p.pid for p in _children()}
    cluster, client = _new_cluster()
    try:
        rng = np.random.default_rng(6)
        ref = Store(BITS, seed=4, **PARAMS)
        base = Codes.random(3000, BITS, WEIGHT, seed=1)
        queries = planted(rng, base, 80)
        s = cl.ShardedStore(client, 2, BITS, seed=4, **PARAMS)
        s.add(base)
        ref.add(base)
        s.save(tmp_path / "saved")
        want = ref.query_many(queries)                                          # reference: single Store

        err = _kill_during_query_loop(client, s, 1, (queries, want))
        assert err.shards == (1,) and "shard 1 of 2" in str(err) and "recover" in str(err)
        with pytest.raises(cl.ShardLostError, match="shard 1 of 2"):            # every later call fails too
            s.nearest(queries[0], 3)
        with pytest.raises(cl.ShardLostError, match="shard 1 of 2"):
            s.add(base[:3])
        client.wait_for_workers(2, timeout=120)  # the nanny restarts the worker under a new address
        assert s.recover() == [1]                                               # unchanged since the save
        assert len({p["worker"] for p in s.placement()}) == 2                   # on the restarted worker
        assert [p["lost"] for p in s.placement()] == [False, False]
        assert_same_answers(ref, s, queries)                                    # reference: single Store

        # a shard changed after the save cannot be rebuilt from it: reload the save instead
        s.add(base[:5])
        ref_at_save = Store.load(_save_copy(ref, tmp_path))
        ref.add(base[:5])
        err = _kill_during_query_loop(client, s, 0, (queries, ref.query_many(queries)))
        assert err.shards == (0,) and "shard 0 of 2" in str(err)
        with pytest.raises(cl.ShardLostError, match=r"changed after the last save"):
            s.recover()
        s.close()
        with cl.ShardedStore.load(client, tmp_path / "saved") as back:
            assert_same_answers(ref_at_save, back, queries)                     # reference: single Store at the save
    finally:
        _close(cluster, client)
    assert _wait_no_children(before) == []


def _save_copy(store, tmp_path):
    path = tmp_path / "reference.sidx"
    store.save(path)
    return path


def test_a_sharded_store_of_wide_codes_matches_a_single_store(client, tmp_path):
    # reference: a single Store of the same 2**20-bit codes (index rows, column map)
    bits = 2**20
    ref = Store(bits, threshold=8, sample_size=20, detectors=2, seed=4)
    with cl.ShardedStore(client, 2, bits, threshold=8, sample_size=20, detectors=2, seed=4) as s:
        codes = Codes.random(600, bits, 200, seed=6)
        assert codes.layout == "sparse"
        assert np.array_equal(s.add(codes), ref.add(codes))
        rng = np.random.default_rng(2)
        queries = Codes.from_indices([np.unique(np.concatenate([codes[int(i)][:150], rng.integers(0, bits, 50)]))
                                      for i in rng.integers(0, 600, 20)], bits=bits)
        assert same_batch(s.query_many(queries), ref.query_many(queries))
        assert s.nearest(queries[0], 5) == ref.nearest(queries[0], 5)
        picked = s.get([5, 1, 300])
        assert picked.layout == "sparse" and picked == ref.get([5, 1, 300])
        h, r = s.health(), ref.health()
        assert (h.effective_bits, h.unused_bits, h.items) == (r.effective_bits, r.unused_bits, r.items)
        s.save(tmp_path / "wide")
    with cl.ShardedStore.load(client, tmp_path / "wide") as again:
        assert same_batch(again.query_many(queries), ref.query_many(queries))
