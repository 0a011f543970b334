"""The analytic false-hit and recall model for detector banks.

Every stored code owns a bank of ``detectors``; each detector samples
``sample_size`` of the code's set bits and fires on a query that has at least
``threshold`` of them set.  The chances that matter for sizing a store are
hypergeometric tail sums, and this module computes them exactly in log space:

* :func:`detector_false_hit` -- one detector against a random query;
* :func:`false_hit_per_code` -- one stored code (its whole bank) against a
  random query, as the mixture over the query's overlap with the code;
* :func:`recall` -- a copy of a stored code that lost some of its set bits;
* :func:`detector_failure` -- a detector after bit positions die at random;
* :func:`store_false_hit` and :func:`code_limit` -- a store of many codes.

Real stores use some bits far more than others.  The usage-aware model
replaces the uniformly random query by a conditional Poisson query
(independent Bernoulli bits given the query's weight; Hajek 1964, Chen,
Dempster & Liu 1994) whose inclusion chances follow the measured usage:

* :func:`usage_bernoulli` -- the Bernoulli parameters for measured usage;
* :func:`inclusion_probabilities` -- each bit's chance to be in the query;
* :func:`detector_fire_probability` and :func:`code_fire_probability` --
  exact Poisson-binomial chances for given detector samples;
* :func:`usage_false_hits` -- expected false hits of a store, estimated from
  a sample of its codes, with a standard error;
* :func:`sample_usage_queries` -- exact random queries of that model;
* :func:`clopper_pearson` and :func:`clopper_pearson_upper` -- exact
  intervals for the false-hit rate a measurement measures.

The hypergeometric functions accept numpy arrays for any parameter (they
broadcast) and then return arrays; with scalar arguments they return Python
numbers.  Pass
``log=True`` to get the natural logarithm of a chance, which stays finite far
below the smallest double (1e-308).

Notes
-----
The probability mass function is evaluated with Loader's saddle-point form
(C. Loader, "Fast and Accurate Computation of Binomial Probabilities", 2000),
which keeps full relative precision for widths of millions of bits where a
difference of log-gamma values would lose up to eight digits.  Tail sums add
positive terms only, over a window around the largest term; log-concavity of
the hypergeometric distribution bounds what lies outside the window, and the
window grows until that bound is below 1e-19 of the sum.  No chance is ever
formed as ``1 - (1 - x)``: ``log1p`` and ``expm1`` carry the small
quantities.  The derivations are in ``docs/model.md``.
"""

from __future__ import annotations

from ..errors import PlanError
from .hypergeometric import (code_limit, detector_failure, detector_false_hit, false_hit_per_code, lost_bits, recall,
                             store_false_hit)
from .intervals import clopper_pearson, clopper_pearson_upper
from .usage import (UsageFalseHits, code_fire_probability, detector_fire_probability, inclusion_probabilities,
                    sample_usage_queries, usage_bernoulli, usage_false_hits)

__all__ = [
    "PlanError",
    "UsageFalseHits",
    "code_limit",
    "clopper_pearson",
    "clopper_pearson_upper",
    "code_fire_probability",
    "detector_failure",
    "detector_false_hit",
    "detector_fire_probability",
    "false_hit_per_code",
    "inclusion_probabilities",
    "lost_bits",
    "recall",
    "sample_usage_queries",
    "store_false_hit",
    "usage_bernoulli",
    "usage_false_hits",
]


