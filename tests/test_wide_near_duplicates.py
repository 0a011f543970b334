"""Near-duplicate labelling of wide codes (2**20 bits) without packing them.

Reference: the scipy.sparse product ``S @ S.T`` (exact overlaps of every
pair) and ``scipy.sparse.csgraph.connected_components`` over the pairs at
or above ``min_overlap``; the packed size (131,072 bytes a code) is what the
labelling must never allocate, checked on the process's peak RSS
(``VmHWM``) in a fresh interpreter.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from sparseindex import Codes, label_near_duplicates

BITS = 2**20
ROOT = Path(__file__).resolve().parents[1]


def _planted(n, weight, seed):
    """``n`` random wide codes, every third one a near copy (a fifth of its bits swapped) of the one before."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        if i % 3 == 2:
            src = rows[-1]
            kept = rng.choice(src, size=weight - weight // 5, replace=False)
            rows.append(np.unique(np.concatenate([kept, rng.integers(0, BITS, weight // 5)])))
        else:
            rows.append(np.unique(rng.integers(0, BITS, weight)))
    return Codes.from_indices(rows, bits=BITS)


def _components(codes, m):
    S = codes.to_scipy().tocsr().astype(np.int32)
    pairs = (S @ S.T).tocoo()
    keep = (pairs.data >= m) & (pairs.row != pairs.col)
    graph = sp.coo_matrix((np.ones(int(keep.sum())), (pairs.row[keep], pairs.col[keep])), shape=(len(codes),) * 2)
    _, comp = connected_components(graph, directed=False)
    smallest = np.full(comp.max() + 1, len(codes))
    np.minimum.at(smallest, comp, np.arange(len(codes)))
    return smallest[comp]


@pytest.mark.parametrize("method", ["index", "banding"])
def test_wide_codes_are_labelled_like_the_scipy_components(method):
    codes = _planted(900, 200, seed=3)
    assert codes.layout == "sparse"
    m = 120
    want = _components(codes, m)
    labels, summary = label_near_duplicates(codes, min_overlap=m, mode="components", method=method, recall=0.999,
                                            return_summary=True)
    if method == "index":
        assert np.array_equal(labels, want)
    else:
        # banding may miss a pair (recall < 1) but never joins codes that do not match
        assert np.all(want[labels] == want)
        assert summary.groups >= np.unique(want).shape[0] and np.mean(labels == want) > 0.99
    assert summary.duplicates == 300 or method == "banding"


SCRIPT = r"""
import json, sys
import numpy as np, scipy.sparse as sp
from sparseindex import Codes
from sparseindex.cli import main

def hwm():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024

path, out = sys.argv[1], sys.argv[2]
small = Codes.random(50, 2**20, 200, seed=1).to_scipy().tocsr()
sp.save_npz(out + ".small.npz", small)
main(["near-duplicates", out + ".small.npz", "--min-overlap", "120", "--json"])   # compiles, warms up
before = hwm()
status = main(["near-duplicates", path, "--min-overlap", "120", "--json", "--out", out])
print(json.dumps({"status": status, "before": before, "after": hwm()}), file=sys.stderr)
"""


@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="reads peak RSS from /proc")
def test_an_npz_of_wide_rows_goes_through_near_duplicates_without_packing(tmp_path):
    codes = _planted(3_000, 200, seed=5)
    path = tmp_path / "wide.npz"
    sp.save_npz(path, codes.to_scipy().tocsr())
    out = tmp_path / "labels.npy"
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    done = subprocess.run([sys.executable, "-c", SCRIPT, str(path), str(out)], capture_output=True, text=True,
                          env=env, timeout=600)
    assert done.returncode == 0, done.stderr
    figures = json.loads(done.stderr.strip().splitlines()[-1])
    assert figures["status"] == 0
    packed = 3_000 * BITS // 8     # 393 MB: what packing these codes would take
    assert figures["after"] - figures["before"] < packed // 4, figures
    labels = np.load(out)
    assert np.array_equal(labels, _labels_first_reference(codes, 120))


def _labels_first_reference(codes, m):
    """The "first" rule by brute force over the scipy product: each code joins the earliest representative
    of greatest overlap >= m, else becomes one."""
    S = codes.to_scipy().tocsr().astype(np.int32)
    ov = (S @ S.T).toarray()
    labels = np.arange(len(codes))
    is_rep = np.zeros(len(codes), dtype=bool)
    for i in range(len(codes)):
        row = np.where(is_rep[:i], ov[i, :i], -1)
        best = int(np.argmax(row)) if i else -1   # argmax takes the first of equal maxima: the smaller index
        if best < 0 or row[best] < m:
            is_rep[i] = True
        else:
            labels[i] = best
    return labels
