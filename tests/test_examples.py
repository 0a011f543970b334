"""Every script in examples/ runs, at a small size, and prints what it should.

Each runs as a user would run it (``python examples/NAME.py ...``, in a new
process). Outside references, named beside each check: scipy.stats.hypergeom
for the model's recall and false-hit figures, a scipy.sparse product of the
codes with their transpose and scipy.sparse.csgraph.connected_components for
the near-duplicate labels, and prometheus_client's OpenMetrics parser for the
served metrics.
"""

import math
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import sparse, stats
from scipy.sparse.csgraph import connected_components

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples"


def run(name, *args, timeout=300):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    done = subprocess.run([sys.executable, str(EXAMPLES / name), *map(str, args)], capture_output=True, text=True,
                          env=env, timeout=timeout, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    return done.stdout


def number(text):
    return float(text.replace(",", ""))


def test_every_example_is_tested_and_listed():
    scripts = sorted(p.name for p in EXAMPLES.glob("*.py"))
    tested = sorted(name[len("test_"):] + ".py" for name in globals() if name.startswith("test_")
                    and (EXAMPLES / (name[len("test_"):] + ".py")).exists())
    assert scripts == tested
    listing = (EXAMPLES / "README.md").read_text()
    for script in scripts:
        assert f"`{script}`" in listing


def test_recall_noisy():
    out = run("recall_noisy.py", "--routes", 5_000, "--reruns", 300, "--seed", 3)
    found, total = map(number, re.search(r"recall \(logged route among the hits\): [\d.]+ \(([\d,]+) of ([\d,]+)\)",
                                         out).groups())
    # threshold 20 over all 40 bits; a re-run keeps 30 of them, so the model's recall is 1 exactly
    assert stats.hypergeom.sf(20 - 1, 40, 30, 40) == 1.0
    assert (found, total) == (300, 300)
    # chance a random 40-bit code shares >= 20 bits with one stored code (scipy): far below 1 in all
    per_code = stats.hypergeom.sf(20 - 1, 2048, 40, 40)
    assert 300 * 5_000 * per_code < 1e-6
    assert re.search(r"false hits per query: 0\.0000 \(0 in all\)", out)
    assert "query and query_many agree: yes" in out


def test_near_duplicates_file(tmp_path):
    out = run("near_duplicates_file.py", "--reports", 3_000, "--seed", 4)
    sample = Path(re.search(r"wrote a sample day of [\d,]+ buoy reports to (\S+)", out).group(1))
    kept_file = Path(re.search(r"one per squall\) -> (\S+)", out).group(1))
    found, planted = map(number, re.search(r"planted retries: ([\d,]+) of ([\d,]+) grouped", out).groups())
    assert planted == 300 and found == planted
    # the script again on its own sample file, writing the labels too
    labels_file = tmp_path / "labels.npy"
    again = run("near_duplicates_file.py", sample, "--out", tmp_path / "kept.npy", "--labels", labels_file)
    assert "labels (row of each code's first report)" in again
    rows = np.load(sample)
    labels = np.load(labels_file)
    # reference: overlaps of all pairs by a sparse product, components of "overlap >= 20"
    n = rows.shape[0]
    m = sparse.csr_matrix((np.ones(rows.size), rows.ravel(), np.arange(0, rows.size + 1, rows.shape[1])),
                          shape=(n, 1024))
    overlaps = (m @ m.T).tocoo()
    keep = overlaps.data >= 20
    graph = sparse.coo_matrix((np.ones(int(keep.sum())), (overlaps.row[keep], overlaps.col[keep])), shape=(n, n))
    _, comp = connected_components(graph, directed=False)
    first = np.full(comp.max() + 1, n)
    np.minimum.at(first, comp, np.arange(n))
    assert np.array_equal(labels, first[comp])
    kept = np.load(tmp_path / "kept.npy")
    assert np.array_equal(kept, rows[np.unique(labels)])
    assert np.array_equal(np.load(kept_file), kept)


def test_serve_health():
    parser = pytest.importorskip("prometheus_client.openmetrics.parser")
    out = run("serve_health.py", "--port", 0, "--once", "--events", 4_000)
    head, status, body = out.split("\n", 2)
    assert re.match(r"serving the health of a sample store of 4,000 surge events at http://127\.0\.0\.1:\d+/metrics",
                    head)
    assert status.endswith("-> 200, Content-Type: application/openmetrics-text; version=1.0.0; charset=utf-8")
    families = {f.name: f for f in parser.text_string_to_metric_families(body)}
    assert families["sparseindex_items"].samples[0].value == 4_000
    states = {s.labels["sparseindex_status"]: s.value for s in families["sparseindex_status"].samples}
    assert states == {"healthy": 1, "filling": 0, "saturated": 0, "unknown": 0}
    limit = {s.labels["model"]: s.value for s in families["sparseindex_limit_codes"].samples}
    headroom = families["sparseindex_headroom_codes"].samples[0].value
    assert headroom == limit["operative"] - 4_000 > 0


def test_plan_store():
    out = run("plan_store.py", "--capacity", 1e5, 1e6, 1e7)
    rows = re.findall(r"(?m)^\s+([\d,]+)\s+(\d+)\s+(\d+)\s+(\d+)\s+([\d,]+)\s+([\d.]+)\s+([\d.]+) GiB\s+(\S+)\s+"
                      r"([\d.]+) ms$", out)
    assert [number(r[0]) for r in rows] == [1e5, 1e6, 1e7]
    bits, weight, lost = 4096, 80, math.ceil(0.3 * 80)
    for count, s, t, d, limit, recall, gib, updates, _ in rows:
        s, t, d, count = int(s), int(t), int(d), number(count)
        # recall of a query lacking 24 of 80 bits, and the per-code false-hit chance (scipy; D = 1 here)
        assert d == 1
        expected_recall = stats.hypergeom.sf(t - 1, weight, weight - lost, s)
        assert number(recall) == pytest.approx(expected_recall, abs=1e-6) and expected_recall >= 0.999
        p = stats.hypergeom.sf(t - 1, bits, s, weight)
        assert -math.expm1(count * math.log1p(-p)) <= 1e-9
        assert abs(number(limit) - math.log1p(-1e-9) / math.log1p(-p)) <= 1
        assert number(gib) == pytest.approx(count * (8 * 64 + 2 * s + 5) / 2**30, abs=0.006)
        assert number(updates) == pytest.approx(weight * count * s / bits, rel=1e-2)
    assert "PlanError: false_hit=1e-09 at capacity=10,000,000 cannot be met" in out


def test_feature_hashing():
    out = run("feature_hashing.py", "--records", 3_000, "--edits", 150, "--seed", 4)
    # reference: the script's own scipy.sparse product S @ Q^T, thresholded like the store
    assert "store and scipy.sparse agree on every query: yes" in out
    found, total = map(number, re.search(r"recall of edited records: [\d.]+ \(([\d,]+) of ([\d,]+)\)", out).groups())
    assert total == 150 and found >= 147   # an edit keeps about 70% of a record's features, 3x the threshold
    per_code, index_bytes = map(number, re.search(r"([\d,]+) bytes per code \(the set-bit indices alone take ([\d,]+)\)",
                                                  out).groups())
    assert "rows kept as sparse indices" in out
    assert per_code < 8 * index_bytes   # far from the 131,072 bytes of a packed 2**20-bit row
    assert "a hit is a lead for a person to confirm" in out
