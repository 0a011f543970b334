"""``sparseindex demo`` at a small size: its printed figures are checked.

Outside references, named beside each check: scipy.stats.hypergeom for the
planned recall and the false-hit chance per code (recomputed from the plan
the demo prints, not taken from the library's model), scipy.stats.poisson
and scipy.stats.binom for the 3-sigma ranges of counts, and the planted
truth of the generated data for the near-duplicate figures.
"""

import math
import re

import numpy as np
import pytest
from scipy import stats

from sparseindex.cli import main

SIZE = 5_000
SEED = 1
BITS, WEIGHT = 2048, 40
TAIL = (1 - 0.9973) / 2  # one tail of +/- 3 sigma


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    import io
    from contextlib import redirect_stdout, redirect_stderr

    buf, err = io.StringIO(), io.StringIO()
    with redirect_stdout(buf), redirect_stderr(err):
        status = main(["demo", "--size", str(SIZE), "--seed", str(SEED), "--out", str(out), "--no-progress"])
    return status, buf.getvalue(), err.getvalue(), out


def number(text):
    return float(text.replace(",", ""))


def grab(pattern, text, count=None):
    found = re.findall(pattern, text)
    assert found, f"pattern {pattern!r} not in the demo's output"
    if count is not None:
        assert len(found) == count, (pattern, found)
    return found


def plan_of(out):
    s, t, d = map(int, grab(r"plan:\s+sample size (\d+), threshold (\d+), detectors (\d+)", out, 1)[0])
    return s, t, d


def scipy_recall(s, t, d, lost):
    """Recall of a query lacking ``lost`` of the code's bits: 1 - P[Hyp(a, a - lost, s) < t]^d (scipy)."""
    miss1 = stats.hypergeom.cdf(t - 1, WEIGHT, WEIGHT - lost, s)
    return 1.0 - miss1**d


def scipy_per_code(s, t, d, q):
    """Chance an unrelated query of q bits hits one stored code: the mixture over the overlap (scipy)."""
    z = np.arange(0, min(WEIGHT, q) + 1)
    pz = stats.hypergeom.pmf(z, BITS, WEIGHT, q)
    fire = stats.hypergeom.sf(t - 1, WEIGHT, z, s)
    return float(np.sum(pz * (1.0 - (1.0 - fire) ** d)))


def test_runs_and_says_what_it_wrote(demo):
    status, out, err, folder = demo
    assert status == 0 and err == ""
    assert (folder / "quillmarsh-bolts.sidx").is_file()
    assert "answers identical to the in-memory store: yes" in out
    assert "not proof of identity" in out
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        assert "No plot: matplotlib is not installed" in out
    else:
        png = folder / "headroom.png"
        assert f"Headroom plot written to {png}" in out
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_plan_matches_scipy(demo):
    _, out, _, _ = demo
    s, t, d = plan_of(out)
    recall = number(grab(r"model:\s+recall ([\d.]+) at the planned noise", out, 1)[0])
    assert recall == pytest.approx(scipy_recall(s, t, d, 10), abs=1e-5)  # printed with 5 decimals
    assert recall >= 0.999
    limit = number(grab(r"limit ([\d,]+) bolts at the target", out, 1)[0])
    p = scipy_per_code(s, t, d, WEIGHT)
    # largest M with 1 - (1 - p)^M <= 1e-3 (the demo's target)
    assert abs(limit - math.log1p(-1e-3) / math.log1p(-p)) <= 1.0


def test_recall_at_least_planned_minus_3_sigma(demo):
    _, out, _, _ = demo
    s, t, d = plan_of(out)
    rows = grab(r"recall\s+([\d.]+) measured \(([\d,]+) of ([\d,]+);.*?model ([\d.]+)", out, 3)
    lost = [10, 16, 16]  # the three kinds of query the demo prints, in order
    for (measured, hit, queries, printed), k in zip(rows, lost):
        n = number(queries)
        assert number(measured) == pytest.approx(number(hit) / n, abs=1e-5)
        planned = scipy_recall(s, t, d, k)
        assert number(printed) == pytest.approx(planned, abs=1e-5)
        sigma = math.sqrt(planned * (1 - planned) / n)
        assert number(measured) >= planned - 3 * sigma, (measured, planned, sigma)


def test_false_hits_within_3_sigma_of_the_model(demo):
    _, out, _, _ = demo
    s, t, d = plan_of(out)
    rows = grab(r"false hits\s+([\d,]+) measured in ([\d,]+) queries; model ([\d.]+) expected", out, 3)
    weights = [WEIGHT, WEIGHT, WEIGHT - 16]  # noisy rescans keep their weight; partial scans keep 24 bits
    for (seen, queries, printed), q in zip(rows, weights):
        expected = number(queries) * (SIZE - 1) * scipy_per_code(s, t, d, q)
        assert number(printed) == pytest.approx(expected, rel=1e-3, abs=0.006)
        low, high = stats.poisson.ppf(TAIL, expected), stats.poisson.isf(TAIL, expected)
        assert low <= number(seen) <= high, (seen, expected)
    # unknown bolts: queries with a hit ~ Binomial(Q, 1 - (1 - p)^N)
    rate, hit, low_ci, high_ci, model_rate = grab(
        r"false-hit rate\s+([\d.]+) per query measured \(([\d,]+) queries hit; 95% CI ([\d.]+)-([\d.]+)\)\s+"
        r"model ([\d.]+)", out, 1)[0]
    queries = number(grab(r"unknown bolts \(never catalogued\): ([\d,]+) random codes", out, 1)[0])
    predicted = -math.expm1(SIZE * math.log1p(-scipy_per_code(s, t, d, WEIGHT)))
    assert number(model_rate) == pytest.approx(predicted, abs=1e-5)
    assert number(low_ci) <= number(rate) <= number(high_ci)
    assert stats.binom.ppf(TAIL, queries, predicted) <= number(hit) <= stats.binom.isf(TAIL, queries, predicted)


def test_near_duplicates_finds_the_planted_copies(demo):
    _, out, _, _ = demo
    found, planted = grab(r"planted re-uploads found ([\d,]+) of ([\d,]+)", out, 1)[0]
    assert number(planted) == round(0.1 * max(500, SIZE // 8)) and number(found) == number(planted)
    assert grab(r"merges not planted ([\d,]+)", out, 1)[0] == "0"
    found, planted = grab(r"catalogued re-uploads found ([\d,]+) of ([\d,]+)", out, 1)[0]
    assert number(planted) == SIZE // 100 and number(found) == number(planted)
    assert grab(r"matches not planted ([\d,]+)", out, 1)[0] == "0"


def test_health_passes_the_warning_level_and_the_limit(demo):
    _, out, _, _ = demo
    limit = number(grab(r"limit ([\d,]+) bolts at the target", out, 1)[0])
    assert grab(r">> status (\w+) -> (\w+)", out) == [("healthy", "filling"), ("filling", "saturated")]
    assert "SaturationWarning" in out
    rows = grab(r"(?m)^\s+([\d,]+)\s+([\d.]+)%\s+([\d,]+)\s+([\d.]+)\s+([\d.]+) \(([\d.]+)-([\d.]+)\)\s+([\d,]+)"
                r"\s+(\w+)$", out)
    assert len(rows) >= 4
    s, t, d = plan_of(out)
    p = scipy_per_code(s, t, d, WEIGHT)
    for items, fill, headroom, model_now, rate, low, high, measurements, status in rows:
        n = number(items)
        assert number(fill) == pytest.approx(100 * n / limit, abs=0.06)
        assert number(headroom) == max(0, limit - n)
        expected = status == "healthy" if n < 0.8 * limit else (status == "filling" if n <= limit
                                                                    else status == "saturated")
        assert expected, (items, status)
        predicted = -math.expm1(n * math.log1p(-p))
        assert number(model_now) == pytest.approx(predicted, abs=1e-5)
        k, q = round(number(rate) * number(measurements)), number(measurements)
        assert stats.binom.ppf(TAIL, q, predicted) <= k <= stats.binom.isf(TAIL, q, predicted), (items, k)
    assert rows[-1][8] == "saturated" and number(rows[-1][0]) >= 1.1 * limit


def test_bad_arguments_exit_2(capsys, tmp_path):
    assert main(["demo", "--size", "10"]) == 2
    assert "--size 10 must be at least 1,000" in capsys.readouterr().err
    blocker = tmp_path / "file"
    blocker.write_text("x")
    assert main(["demo", "--out", str(blocker)]) == 2
    assert "exists and is not a folder" in capsys.readouterr().err
