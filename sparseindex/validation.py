"""Argument checks with one rule for every entry point.

A value of the wrong *type* raises ``TypeError``; a value of the right type
but outside what is allowed raises ``ValueError`` (an id that was never
handed out stays ``KeyError``). Every message quotes the offending value and
names the argument, prefixed with the call it came from when ``what`` is
given (``"add: ids[0]=-1 is negative"``). Checks change nothing: they run
before any work.

Examples
--------
>>> integer("k", 3, minimum=0)
3
>>> integer("k", "3", minimum=0, what="nearest")
Traceback (most recent call last):
...
TypeError: nearest: k='3' must be an integer
>>> chance("false_hit", 1.5)
Traceback (most recent call last):
...
ValueError: false_hit=1.5 must be a chance strictly between 0 and 1
"""

from __future__ import annotations

import math
import os
from numbers import Integral, Real

import numpy as np

#: Seeds are drawn and accepted as 64-bit unsigned integers everywhere.
SEED_LIMIT = 2**64
#: Widest code accepted everywhere (construction, plan, files, CLI): bit indices fit uint32.
MAX_BITS = 2**32


def quoted(value, limit: int = 60) -> str:
    """``repr(value)`` cut to ``limit`` characters, for error messages.

    Examples
    --------
    >>> quoted("x" * 100)[-5:]
    'xx...'
    """
    if isinstance(value, np.generic):
        value = value.item()
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _prefix(what) -> str:
    return f"{what}: " if what else ""


def is_integer(value) -> bool:
    """An integer that is not a bool (Python or NumPy)."""
    return not isinstance(value, (bool, np.bool_)) and isinstance(value, (Integral, np.integer))


def is_real(value) -> bool:
    """A real number that is not a bool (Python or NumPy)."""
    return not isinstance(value, (bool, np.bool_)) and isinstance(value, (Real, np.integer, np.floating))


def integer(name, value, *, minimum=None, maximum=None, what=None) -> int:
    """``value`` as an int within ``[minimum, maximum]`` (either bound optional)."""
    if not is_integer(value):
        raise TypeError(f"{_prefix(what)}{name}={quoted(value)} must be an integer")
    if minimum is not None and value < minimum:
        raise ValueError(f"{_prefix(what)}{name}={int(value)} must be >= {minimum}")
    if maximum is not None and value > maximum:
        raise ValueError(f"{_prefix(what)}{name}={int(value)} must be <= {maximum}")
    return int(value)


def width(value, *, what=None, name="bits") -> int:
    """A code width: an integer in 1..MAX_BITS."""
    if is_integer(value) and value > MAX_BITS:
        raise ValueError(f"{_prefix(what)}{name}={int(value)} is wider than the {MAX_BITS:,} bits (2**32) this "
                         f"library supports")
    return integer(name, value, minimum=1, what=what)


def optional_integer(name, value, *, minimum=None, maximum=None, what=None):
    """None, or :func:`integer`."""
    return None if value is None else integer(name, value, minimum=minimum, maximum=maximum, what=what)


def number(name, value, *, what=None) -> float:
    """A finite real number as a float."""
    if not is_real(value):
        raise TypeError(f"{_prefix(what)}{name}={quoted(value)} must be a number")
    if not math.isfinite(float(value)):
        raise ValueError(f"{_prefix(what)}{name}={quoted(value)} must be finite")
    return float(value)


def chance(name, value, *, what=None) -> float:
    """A probability strictly between 0 and 1."""
    x = number(name, value, what=what)
    if not 0.0 < x < 1.0:
        raise ValueError(f"{_prefix(what)}{name}={quoted(value)} must be a chance strictly between 0 and 1")
    return x


def fraction(name, value, *, what=None) -> float:
    """A number in (0, 1]."""
    x = number(name, value, what=what)
    if not 0.0 < x <= 1.0:
        raise ValueError(f"{_prefix(what)}{name}={quoted(value)} must be a number in (0, 1]")
    return x


def flag(name, value, *, what=None) -> bool:
    """True or False (NumPy bools too); anything else is a wrong type."""
    if not isinstance(value, (bool, np.bool_)):
        raise TypeError(f"{_prefix(what)}{name}={quoted(value)} must be True or False")
    return bool(value)


def choice(name, value, allowed, *, what=None):
    """One of ``allowed`` (strings)."""
    if not isinstance(value, str):
        raise TypeError(f"{_prefix(what)}{name}={quoted(value)} must be a string, one of "
                        f"{', '.join(repr(a) for a in allowed)}")
    if value not in allowed:
        raise ValueError(f"{_prefix(what)}{name}={quoted(value)} must be one of {', '.join(repr(a) for a in allowed)}")
    return value


def callback(name, value, *, what=None):
    """A callable or None."""
    if value is not None and not callable(value):
        raise TypeError(f"{_prefix(what)}{name}={quoted(value)} must be callable or None")
    return value


def path(name, value, *, what=None) -> str:
    """A file-system path (``str`` or ``os.PathLike``) as a str."""
    if not isinstance(value, (str, os.PathLike)):
        raise TypeError(f"{_prefix(what)}{name}={quoted(value)} must be a path")
    return os.fspath(value)


def fresh_seed() -> int:
    """A new 64-bit seed from the operating system's entropy."""
    return int(np.random.SeedSequence().generate_state(1, dtype=np.uint64)[0])


def seed(name, value, *, what=None) -> int:
    """A seed in ``0 .. 2**64 - 1``; None draws a fresh one."""
    if value is None:
        return fresh_seed()
    return integer(name, value, minimum=0, maximum=SEED_LIMIT - 1, what=what)


def integer_array(name, values, *, what=None) -> np.ndarray:
    """An int or a 1-D sequence of integers as a 1-D int64 array."""
    arr = np.asarray(values)
    if arr.ndim > 1:
        raise ValueError(f"{_prefix(what)}{name} must be an integer or a 1-D sequence, got shape {arr.shape}")
    arr = arr.reshape(-1)
    if arr.size and (arr.dtype == np.bool_ or arr.dtype.kind not in "iu"):
        listed = arr.tolist()
        bad = next((x for x in listed if not is_integer(x)), listed[0])
        raise TypeError(f"{_prefix(what)}{name[:-1] if name.endswith('s') else name} {quoted(bad)} is not an integer")
    return arr.astype(np.int64)


def ids_below(ids, next_id: int, what: str) -> np.ndarray:
    """Validated 1-D int64 ids (an int or a 1-D sequence), each in ``0..next_id-1``.

    ``TypeError`` for a non-integer id, ``KeyError`` naming the first id
    that was never handed out.

    Examples
    --------
    >>> ids_below([2, 0], 3, "get").tolist()
    [2, 0]
    >>> ids_below(5, 3, "get")
    Traceback (most recent call last):
    ...
    KeyError: 'get: id 5 was never stored (ids so far: 0..2)'
    """
    arr = integer_array("ids", ids, what=what)
    never = np.flatnonzero((arr < 0) | (arr >= next_id))
    if never.size:
        raise KeyError(f"{what}: id {int(arr[never[0]])} was never stored (ids so far: 0..{next_id - 1})")
    return arr


def new_ids(ids, count: int, what: str) -> np.ndarray:
    """Ids given for ``count`` new codes: 1-D, integers, non-negative, strictly ascending."""
    arr = np.asarray(ids)
    if arr.ndim != 1 or arr.shape[0] != count:
        raise ValueError(f"{what}: ids must be a 1-D sequence of {count} ids (one per code), got shape {arr.shape}")
    if count and (arr.dtype == np.bool_ or arr.dtype.kind not in "iu"):
        raise TypeError(f"{what}: ids must be integers, got {quoted(arr.tolist()[:3])}")
    arr = arr.astype(np.int64)
    if count and arr[0] < 0:
        raise ValueError(f"{what}: ids[0]={int(arr[0])} is negative")
    steps = np.flatnonzero(np.diff(arr) <= 0)
    if steps.size:
        k = int(steps[0]) + 1
        raise ValueError(f"{what}: ids must ascend strictly: ids[{k}]={int(arr[k])} follows {int(arr[k - 1])}")
    return arr
