"""Argument checks and scalar/array conventions shared by the model's modules (``ValueError`` quoting the value)."""

from __future__ import annotations

import numbers

import numpy as np


def fmt(value):
    """Format an offending value for an error message."""
    if isinstance(value, np.generic):
        value = value.item()
    return repr(value) if isinstance(value, (float, int)) else str(value)


def is_scalar(*values):
    return all(np.ndim(v) == 0 for v in values)


def int_param(name, value, exact=True):
    """Return ``value`` as an int64 array, or raise ValueError.

    With ``exact=False`` (counts such as ``items``) any size is accepted and
    a float64 array returned.
    """
    if isinstance(value, (bool, np.bool_)):
        raise TypeError(f"{name}={value!r} must be an integer, not a bool")
    if isinstance(value, numbers.Integral):
        if not exact:
            return np.asarray(float(value))
        if abs(int(value)) > 2**53:
            raise ValueError(f"{name}={value} is too large (limit 2**53)")
        return np.asarray(int(value), dtype=np.int64)
    arr = np.asarray(value)
    if arr.dtype == np.bool_ or arr.dtype.kind not in "iuf":
        raise TypeError(f"{name}={short(value)} must be an integer")
    arr = arr.astype(np.float64)
    bad = ~np.isfinite(arr) | (arr != np.floor(arr))
    if np.any(bad):
        raise ValueError(f"{name}={fmt(arr[bad].flat[0])} must be an integer")
    if not exact:
        return arr
    if np.any(np.abs(arr) > 2.0**53):
        raise ValueError(f"{name}={fmt(arr[np.abs(arr) > 2.0**53].flat[0])} "
                         "is too large (limit 2**53)")
    return arr.astype(np.int64)


def real_param(name, value):
    """Return ``value`` as a float64 array of finite numbers, or raise."""
    if isinstance(value, (bool, np.bool_)):
        raise TypeError(f"{name}={value!r} must be a number, not a bool")
    arr = np.asarray(value)
    if arr.dtype == np.bool_ or arr.dtype.kind not in "iuf":
        raise TypeError(f"{name}={short(value)} must be a number")
    arr = arr.astype(np.float64)
    if np.any(np.isnan(arr)):
        raise ValueError(f"{name}=nan must be a number")
    return arr


def need(ok, text, **named):
    """Raise ValueError(text) for the first element where ``ok`` is False.

    ``text`` is formatted with the named values at that element.
    """
    if np.all(ok):
        return
    arrays = {k: np.asarray(v) for k, v in named.items()}
    shape = np.broadcast_shapes(np.shape(ok), *(a.shape for a in arrays.values()))
    bad = ~np.broadcast_to(ok, shape)
    first = np.unravel_index(int(np.argmax(bad)), shape) if shape else ()
    vals = {k: fmt(np.broadcast_to(a, shape)[first]) for k, a in arrays.items()}
    raise ValueError(text.format(**vals))


def check_bits_weight(bits, weight):
    need(bits >= 1, "bits={bits} must be >= 1", bits=bits)
    need(weight >= 1, "weight={weight} must be >= 1", weight=weight)
    need(weight <= bits, "weight={weight} must be <= bits={bits}",
          weight=weight, bits=bits)


def check_sample_size_threshold(sample_size, threshold, limit, limit_name):
    need(sample_size >= 1, "sample_size={sample_size} must be >= 1", sample_size=sample_size)
    need(sample_size <= limit, "sample_size={sample_size} must be <= " + limit_name
          + "={limit}", sample_size=sample_size, limit=limit)
    need(threshold >= 1, "threshold={threshold} must be >= 1",
          threshold=threshold)
    need(threshold <= sample_size,
          "threshold={threshold} must be <= sample_size={sample_size}",
          threshold=threshold, sample_size=sample_size)


def check_detectors(detectors):
    need(detectors >= 1, "detectors={detectors} must be >= 1",
          detectors=detectors)


def check_noise(noise):
    need(noise >= 0, "noise={noise} must be >= 0", noise=noise)
    need(noise < 1, "noise={noise} must be < 1", noise=noise)


def out(value, scalar):
    """Return a Python float for scalar calls, an ndarray otherwise."""
    if scalar:
        return float(np.asarray(value).reshape(()))
    return np.asarray(value, dtype=np.float64)



def short(value):
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def check_count(name, value, minimum=0):
    """Return ``value`` as a Python int ``>= minimum``, or raise ValueError."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        if isinstance(value, (float, np.floating)) and float(value).is_integer():
            value = int(value)
        elif isinstance(value, (float, np.floating)):
            raise ValueError(f"{name}={short(value)} must be a whole number")
        else:
            raise TypeError(f"{name}={short(value)} must be an integer")
    value = int(value)
    if value < minimum:
        raise ValueError(f"{name}={value} must be >= {minimum}")
    return value


