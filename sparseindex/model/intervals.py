"""Exact binomial (Clopper–Pearson) intervals for measured false-hit rates."""

from __future__ import annotations

import numbers

import numpy as np

from .checks import check_count, short


# ---------------------------------------------------------------------------
# Exact binomial confidence intervals for measured false-hit rates
# ---------------------------------------------------------------------------

def _check_hits_trials(hits, trials, confidence):
    hits = check_count("hits", hits)
    trials = check_count("trials", trials, minimum=1)
    if hits > trials:
        raise ValueError(f"hits={hits} must be <= trials={trials}")
    if isinstance(confidence, (bool, np.bool_)) or not isinstance(
            confidence, (numbers.Real, np.floating)):
        raise TypeError(f"confidence={short(confidence)} must be a number")
    confidence = float(confidence)
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence={confidence!r} must be between 0 and 1 (exclusive)")
    return hits, trials, confidence


def clopper_pearson(hits, trials, confidence=0.95):
    """Exact two-sided Clopper-Pearson interval for a binomial proportion.

    The interval holds every rate r whose binomial test at level
    ``1 - confidence`` split evenly between the tails keeps ``hits`` out of
    ``trials``: ``low = Beta^-1(alpha/2; x, n - x + 1)`` and
    ``high = Beta^-1(1 - alpha/2; x + 1, n - x)`` (C. J. Clopper and
    E. S. Pearson, "The use of confidence or fiducial limits illustrated in
    the case of the binomial", Biometrika 26, 1934).

    Parameters
    ----------
    hits : int
        Observed successes x (e.g. false hits), ``0 <= hits <= trials``.
    trials : int
        Trials n (e.g. measurement queries), ``>= 1``.
    confidence : float, optional
        Coverage, ``0 < confidence < 1``.

    Returns
    -------
    (float, float)
        ``(low, high)``; ``low = 0`` when ``hits == 0`` (then
        ``high = 1 - (alpha/2)**(1/n)``), ``high = 1`` when ``hits == trials``.

    Notes
    -----
    Quantiles from ``scipy.stats.beta.ppf``.  The coverage is at least
    ``confidence`` for every true rate (the interval is conservative).  For
    a one-sided upper bound, e.g. to report when a measurement sees no hit, use
    :func:`clopper_pearson_upper`.

    Examples
    --------
    >>> [round(x, 4) for x in clopper_pearson(5, 10)]
    [0.1871, 0.8129]
    >>> low, high = clopper_pearson(0, 1000)
    >>> low, round(high, 6)
    (0.0, 0.003682)
    """
    hits, trials, confidence = _check_hits_trials(hits, trials, confidence)
    from scipy.stats import beta

    alpha = 1.0 - confidence
    low = 0.0 if hits == 0 else float(beta.ppf(alpha / 2, hits, trials - hits + 1))
    high = 1.0 if hits == trials else float(beta.ppf(1 - alpha / 2, hits + 1, trials - hits))
    return low, high


def clopper_pearson_upper(hits, trials, confidence=0.95):
    """One-sided exact (Clopper-Pearson) upper confidence bound for a rate.

    The largest rate r with ``P[Bin(trials, r) <= hits] >= 1 - confidence``:
    ``Beta^-1(confidence; x + 1, n - x)``, 1 when ``hits == trials``.  With
    no hit it is ``1 - (1 - confidence)**(1/n)``, about 3/n at 95% (the
    "rule of three", J. A. Hanley and A. Lippman-Hand, JAMA 249, 1983).

    Parameters
    ----------
    hits : int
        Observed successes, ``0 <= hits <= trials``.
    trials : int
        Trials, ``>= 1``.
    confidence : float, optional
        Coverage, ``0 < confidence < 1``.

    Returns
    -------
    float

    Examples
    --------
    >>> round(clopper_pearson_upper(0, 1000), 6)
    0.002991
    >>> round(clopper_pearson_upper(5, 10), 4)
    0.7776
    """
    hits, trials, confidence = _check_hits_trials(hits, trials, confidence)
    if hits == trials:
        return 1.0
    from scipy.stats import beta

    return float(beta.ppf(confidence, hits + 1, trials - hits))
