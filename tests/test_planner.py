"""Tests of sparseindex.planner.plan and the ``plan`` subcommand.

References: brute-force enumeration of every (sample_size, threshold, detectors)
with the public model functions (which are themselves checked against
scipy.stats and exact rationals in test_model.py); hypothesis properties.
"""

import argparse
import dataclasses
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sparseindex import model
from sparseindex.cli import plan as _cli_plan
from sparseindex.model import PlanError
from sparseindex.model.planner import Plan, plan


def meets(p_code, miss, F, M, R):
    """The two targets, by the public model, as the planner states them."""
    return (model.store_false_hit(p_code, M, log=True) <= math.log(F)
            and miss <= math.log1p(-R))


def brute_force(n, a, F, M, noise, R, max_d):
    """Every (s, theta, D) evaluated by the model; best per (s, D), ranked.

    Reference: exhaustive enumeration (no search shortcuts).
    """
    trip = [(s, th, D) for s in range(1, a + 1) for th in range(1, s + 1)
            for D in range(1, max_d + 1)]
    s, th, D = (np.array(v) for v in zip(*trip))
    lp = model.false_hit_per_code(n, a, s, th, D, log=True)
    lm = model.recall(a, s, th, D, noise, log=True, complement=True)
    best = {}
    for i, (si, ti, Di) in enumerate(trip):
        if meets(lp[i], lm[i], F, M, R):
            key = (si * Di, lp[i], Di)
            if (si, Di) not in best or key < best[(si, Di)][0]:
                best[(si, Di)] = (key, (si, ti, Di))
    return [cfg for _, cfg in sorted(best.values())]


GRID = [
    # n, a, F, M, noise, R, max_d
    (64, 8, 1e-2, 10, 0.0, 0.999, 3),
    (64, 8, 1e-1, 20, 0.25, 0.9, 3),
    (100, 10, 1e-3, 10, 0.3, 0.99, 4),
    (128, 12, 1e-2, 100, 0.5, 0.95, 4),
    (200, 16, 1e-4, 50, 0.25, 0.999, 3),
    (256, 16, 1e-3, 1000, 0.5, 0.9, 8),
    (256, 20, 1e-6, 100, 0.2, 0.999, 2),
    (300, 12, 1e-2, 10**4, 0.6, 0.8, 6),
    (512, 24, 1e-6, 10**4, 0.4, 0.99, 3),
    (40, 20, 1e-1, 3, 0.3, 0.9, 4),        # dense: half the bits set
]


@pytest.mark.parametrize("n,a,F,M,noise,R,max_d", GRID)
def test_plan_is_optimal_against_brute_force(n, a, F, M, noise, R, max_d):
    # Reference: brute-force enumeration of every configuration.
    ranked = brute_force(n, a, F, M, noise, R, max_d)
    if not ranked:
        with pytest.raises(PlanError):
            plan(n, a, false_hit=F, capacity=M, noise=noise, recall=R,
                 max_detectors=max_d)
        return
    p = plan(n, a, false_hit=F, capacity=M, noise=noise, recall=R,
             max_detectors=max_d)
    got = [(q.sample_size, q.threshold, q.detectors) for q in (p,) + p.alternatives]
    assert got == ranked[:len(got)]
    assert len(got) == min(4, len(ranked))


def test_grid_exercises_both_outcomes():
    outcomes = {bool(brute_force(*g)) for g in GRID}
    assert outcomes == {True, False}


@settings(max_examples=120, deadline=None, derandomize=True)
@given(st.integers(min_value=4, max_value=14).flatmap(
    lambda a: st.tuples(st.integers(min_value=2 * a, max_value=12 * a), st.just(a))),
    st.sampled_from([1e-1, 1e-2, 1e-4]), st.sampled_from([1, 10, 1000]),
    st.floats(min_value=0.0, max_value=0.6), st.sampled_from([0.5, 0.9, 0.99]),
    st.integers(min_value=1, max_value=3))
def test_plan_matches_brute_force_on_random_small_requests(code, F, M, noise, R, max_d):
    # Reference: brute-force enumeration; plan meets its targets by the model.
    n, a = code
    ranked = brute_force(n, a, F, M, noise, R, max_d)
    try:
        p = plan(n, a, false_hit=F, capacity=M, noise=noise, recall=R,
                 max_detectors=max_d)
    except PlanError:
        assert ranked == []
        return
    got = [(q.sample_size, q.threshold, q.detectors) for q in (p,) + p.alternatives]
    assert got == ranked[:len(got)]
    for q in (p,) + p.alternatives:
        check_meets_targets(q)


def check_meets_targets(p):
    """Recompute a plan's numbers with the public model; targets hold."""
    per_code = model.false_hit_per_code(p.bits, p.weight, p.sample_size, p.threshold,
                                        p.detectors)
    assert per_code == pytest.approx(p.false_hit_per_code, rel=1e-12)
    per_query = model.store_false_hit(per_code, p.target_capacity)
    assert per_query <= p.target_false_hit * (1 + 1e-12)
    assert per_query == pytest.approx(p.false_hit_per_query, rel=1e-12)
    r = model.recall(p.weight, p.sample_size, p.threshold, p.detectors, p.noise)
    # (exact ties such as recall == 0.5 occur on small codes: allow rounding)
    assert r >= p.target_recall * (1 - 1e-12)
    miss = model.recall(p.weight, p.sample_size, p.threshold, p.detectors, p.noise,
                        complement=True)
    assert miss <= (1 - p.target_recall) * (1 + 1e-12)
    assert miss == pytest.approx(p.miss, rel=1e-12, abs=1e-300)
    assert r == pytest.approx(p.recall, rel=1e-12)
    assert p.limit >= p.target_capacity
    assert p.limit == model.code_limit(per_code, p.target_false_hit)
    assert p.postings_per_code == p.sample_size * p.detectors
    assert isinstance(p.sample_size, int) and isinstance(p.threshold, int)
    assert 1 <= p.threshold <= p.sample_size <= p.weight
    assert 1 <= p.detectors <= p.max_detectors


@settings(max_examples=25, deadline=None, derandomize=True)
@given(st.sampled_from([(2048, 40), (10_000, 100), (100_000, 300), (10**6, 2000)]),
       st.sampled_from([1e-3, 1e-6, 1e-9, 1e-12]),
       st.sampled_from([10, 10**4, 10**6, 10**9]),
       st.floats(min_value=0.0, max_value=0.7),
       st.sampled_from([0.9, 0.999, 0.999999]))
def test_plan_meets_its_targets_at_production_sizes(code, F, M, noise, R):
    # Reference: the public model functions recomputing every reported number.
    n, a = code
    try:
        p = plan(n, a, false_hit=F, capacity=M, noise=noise, recall=R)
    except PlanError as exc:
        assert "cannot be met" in str(exc)
        return
    check_meets_targets(p)
    for q in p.alternatives:
        check_meets_targets(q)
        assert (q.postings_per_code, q.false_hit_per_code) >= \
            (p.postings_per_code, p.false_hit_per_code)


def _cost(n, a, **kw):
    try:
        return plan(n, a, **kw).postings_per_code
    except PlanError:
        return math.inf


@settings(max_examples=25, deadline=None, derandomize=True)
@given(st.sampled_from([(256, 16), (2048, 40), (10**5, 500)]),
       st.floats(min_value=0.0, max_value=0.6), st.floats(min_value=0.0, max_value=0.2),
       st.integers(min_value=1, max_value=10**6), st.integers(min_value=1, max_value=100))
def test_cost_monotone_in_noise_and_capacity(code, noise, extra, M, factor):
    # Property: the feasible set only shrinks as noise or capacity grow (and
    # as the targets tighten), so the cheapest cost never falls.
    n, a = code
    base = dict(false_hit=1e-6, capacity=M, noise=noise, recall=0.99)
    c0 = _cost(n, a, **base)
    assert _cost(n, a, **{**base, "noise": min(0.95, noise + extra)}) >= c0
    assert _cost(n, a, **{**base, "capacity": M * factor}) >= c0
    assert _cost(n, a, **{**base, "false_hit": 1e-6 / factor}) >= c0
    assert _cost(n, a, **{**base, "recall": 0.999}) >= c0


def test_thresholds_rise_with_sample_size_at_zero_noise():
    # With no noise every threshold <= sample_size recalls; the plan takes the
    # highest, threshold == sample_size.
    p = plan(10**6, 2000, false_hit=1e-9, capacity=10**6)
    assert p.threshold == p.sample_size and p.recall == 1.0 and p.miss == 0.0


def test_several_detectors_can_be_cheapest():
    # With a lenient false-hit target, two 2-bit detectors at threshold 1
    # cost as much as one 4-bit detector and give fewer false hits.
    p = plan(4096, 12, false_hit=0.1, capacity=1, noise=0.3, recall=0.99)
    assert (p.sample_size, p.threshold, p.detectors) == (2, 1, 2)
    assert (4, 1, 1) in [(q.sample_size, q.threshold, q.detectors) for q in p.alternatives]
    check_meets_targets(p)


# ---------------------------------------------------------------------------
# Plan object
# ---------------------------------------------------------------------------

def test_plan_object_is_frozen_and_serialisable():
    p = plan(2048, 40, false_hit=1e-9, capacity=10**6, noise=0.25)
    assert isinstance(p, Plan)
    with pytest.raises(dataclasses.FrozenInstanceError):
        p.sample_size = 3
    d = p.to_dict()
    text = json.dumps(d)
    back = json.loads(text)
    assert back["sample_size"] == p.sample_size and back["threshold"] == p.threshold
    assert len(back["alternatives"]) == len(p.alternatives) == 3
    assert back["alternatives"][0]["alternatives"] == []
    assert back["target_false_hit"] == 1e-9 and back["target_capacity"] == 10**6
    s = str(p)
    assert f"sample size {p.sample_size}" in s and "per query" in s and "alternatives" in s


def test_sample_size_may_equal_weight_and_is_an_int():
    p = plan(64, 8, false_hit=0.2, capacity=2, noise=0.3, recall=0.999)
    assert type(p.sample_size) is int
    assert p.sample_size <= 8


# ---------------------------------------------------------------------------
# Impossible requests and bad input
# ---------------------------------------------------------------------------

def test_impossible_false_hit_names_the_target_and_best_values():
    with pytest.raises(PlanError) as info:
        plan(2000, 40, false_hit=1e-9, capacity=10**6, noise=0.8)
    msg = str(info.value)
    assert "false_hit=1e-09 at capacity=1,000,000 cannot be met" in msg
    assert "recall=0.999 at noise=0.8" in msg
    assert "lowest reachable" in msg and "sample size" in msg and "threshold" in msg


def test_impossible_false_hit_reports_the_reachable_limit():
    with pytest.raises(PlanError, match=r"only up to [\d,]+ codes"):
        plan(64, 8, false_hit=1e-3, capacity=10, noise=0.3)


def test_impossible_recall_is_named():
    with pytest.raises(PlanError, match=r"recall=0.999 at noise=0.99 cannot be met"):
        plan(2048, 40, false_hit=1e-3, capacity=10, noise=0.99)


def test_plan_error_is_value_error():
    with pytest.raises(ValueError):
        plan(2048, 40, false_hit=1e-30, capacity=10**12, noise=0.9)


@pytest.mark.parametrize("kwargs, error, message", [
    (dict(bits=0), ValueError, r"bits=0 must be >= 1"),
    (dict(weight=0), ValueError, r"weight=0 must be >= 1"),
    (dict(weight=5000), ValueError, r"weight=5000 must be <= bits=2048"),
    (dict(false_hit=0.0), ValueError, r"false_hit=0.0 must be > 0 and < 1"),
    (dict(false_hit=1.0), ValueError, r"false_hit=1.0 must be > 0 and < 1"),
    (dict(capacity=0), ValueError, r"capacity=0 must be >= 1"),
    (dict(capacity=2.5), ValueError, r"capacity=2.5 must be an integer"),
    (dict(noise=1.0), ValueError, r"noise=1.0 must be >= 0 and < 1"),
    (dict(noise=-0.1), ValueError, r"noise=-0.1 must be >= 0 and < 1"),
    (dict(noise=float("nan")), ValueError, r"noise=nan must be a number"),
    (dict(recall=1.0), ValueError, r"recall=1.0 must be > 0 and < 1"),
    (dict(recall=0.0), ValueError, r"recall=0.0 must be > 0 and < 1"),
    (dict(max_detectors=0), ValueError, r"max_detectors=0 must be >= 1"),
    (dict(bits=True), TypeError, r"bits=True must be a single integer"),
    (dict(bits=[2048]), TypeError, r"bits=\[2048\] must be a single integer"),
    (dict(recall="high"), TypeError, r"recall='high' must be a number"),
])
def test_bad_input_raises_value_error_quoting_the_value(kwargs, error, message):
    args = dict(bits=2048, weight=40, false_hit=1e-9, capacity=10**6, noise=0.25,
                recall=0.999, max_detectors=8)
    args.update(kwargs)
    bits, weight = args.pop("bits"), args.pop("weight")
    with pytest.raises(error, match=message) as info:
        plan(bits, weight, **args)
    assert not isinstance(info.value, PlanError)


# ---------------------------------------------------------------------------
# The `plan` subcommand
# ---------------------------------------------------------------------------

def _parser():
    parser = argparse.ArgumentParser(prog="sparseindex")
    _cli_plan.add_parser(parser.add_subparsers(dest="command"))
    return parser


def test_cli_prints_table_with_units(capsys):
    args = _parser().parse_args(["plan", "--bits", "2048", "--weight", "40",
                                 "--false-hit", "1e-9", "--capacity", "1000000",
                                 "--noise", "0.25"])
    assert _cli_plan.run(args) == 0
    out = capsys.readouterr().out
    p = plan(2048, 40, false_hit=1e-9, capacity=10**6, noise=0.25)
    assert "[bits]" in out and "[codes]" in out and "[/query]" in out
    assert "chosen" in out and "option 4" in out
    chosen = next(line for line in out.splitlines() if line.strip().startswith("chosen"))
    assert chosen.split()[1:4] == [str(p.sample_size), str(p.threshold), str(p.detectors)]


def test_cli_json_matches_plan(capsys):
    args = _parser().parse_args(["plan", "--bits", "1e6", "--weight", "2000",
                                 "--false-hit", "1e-9", "--capacity", "1,000,000",
                                 "--noise", "0.5", "--json"])
    assert _cli_plan.run(args) == 0
    got = json.loads(capsys.readouterr().out)
    want = plan(10**6, 2000, false_hit=1e-9, capacity=10**6, noise=0.5).to_dict()
    assert got == json.loads(json.dumps(want))


@pytest.mark.parametrize("argv,needle", [
    (["--bits", "2048", "--weight", "0", "--false-hit", "1e-9", "--capacity", "10"],
     "weight=0 must be >= 1"),
    (["--bits", "2048", "--weight", "40", "--false-hit", "1e-9", "--capacity", "10",
      "--noise", "0.99"], "cannot be met"),
    (["--bits", "2048", "--weight", "40", "--false-hit", "2", "--capacity", "10"],
     "false_hit=2.0"),
])
def test_cli_bad_or_impossible_request_exits_2_with_one_line(capsys, argv, needle):
    args = _parser().parse_args(["plan"] + argv)
    assert _cli_plan.run(args) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    assert needle in captured.err
    assert len(captured.err.strip().splitlines()) == 1


def test_cli_malformed_numbers_exit_2(capsys):
    with pytest.raises(SystemExit) as info:
        _parser().parse_args(["plan", "--bits", "wide", "--weight", "40",
                              "--false-hit", "1e-9", "--capacity", "10"])
    assert info.value.code == 2
    assert "'wide' is not a whole number" in capsys.readouterr().err
