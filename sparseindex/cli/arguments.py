"""Argument types every subcommand shares (argparse ``type=`` callables): a bad value is a usage error quoting it.

Examples
--------
>>> count("1,000,000"), count("1e6"), number("1e-9")
(1000000, 1000000, 1e-09)
"""

from __future__ import annotations

import argparse
import math

__all__ = ["count", "number"]


def count(text):
    """A count such as 1000000, 1e6, 1_000_000 or 1,000,000."""
    cleaned = text.replace(",", "").replace("_", "").strip()
    try:
        value = int(cleaned)
    except ValueError:
        try:
            number = float(cleaned)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number")
        if not math.isfinite(number) or not number.is_integer():
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number")
        value = int(number)
    return value


def number(text):
    """A real number such as 0.2 or 1e-9 (not NaN)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number")
    if math.isnan(value):
        raise argparse.ArgumentTypeError(f"{text!r} is not a number")
    return value
