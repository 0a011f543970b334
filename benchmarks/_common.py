"""Shared helpers for the benchmark scripts.

* :func:`machine_record` - CPU model, cores, RAM, Python and library
  versions, written next to every set of numbers.
* :func:`memory_bandwidth` - this machine's streaming memory bandwidth,
  measured with numpy (sum and copy of a large array, best of several), the
  yardstick for the lower bounds the scripts print.
* :func:`measure` - time a callable: warm-up runs, then repeats; each sample
  runs with the garbage collector off, and the result gives min / median /
  max.
* :func:`time_once` - one timed call, collector off.
* :func:`markdown_table`, :func:`fmt_seconds`, :func:`fmt_rate` - output.

Nothing here runs at import time.
"""

from __future__ import annotations

import datetime
import gc
import os
import platform
import statistics
import subprocess
import sys
import threading
import time
from dataclasses import dataclass


@dataclass
class Timing:
    """Wall-clock samples of one measurement, in seconds per call.

    ``per`` divides every sample (e.g. the number of queries a call ran) so
    that ``min`` / ``median`` / ``max`` are per item.
    """

    samples: list[float]
    per: int = 1
    warmup: int = 0

    @property
    def min(self) -> float:
        return min(self.samples) / self.per

    @property
    def median(self) -> float:
        return statistics.median(self.samples) / self.per

    @property
    def max(self) -> float:
        return max(self.samples) / self.per

    def as_dict(self) -> dict:
        return {
            "per": self.per,
            "warmup": self.warmup,
            "repeats": len(self.samples),
            "samples_s": list(self.samples),
            "min_s": self.min,
            "median_s": self.median,
            "max_s": self.max,
        }


def measure(fn, *, repeats: int, warmup: int = 1, per: int = 1, setup=None, warmup_fn=None) -> Timing:
    """Time ``fn``: ``warmup`` untimed runs, then ``repeats`` timed ones.

    ``setup`` (untimed) runs before every call and its return value is
    passed to ``fn``; without it ``fn`` takes no argument. ``warmup_fn``
    replaces ``fn`` for the warm-up runs (e.g. a shorter slice of the same
    work when the full call is expensive). The collector is run before and
    disabled during each timed call.
    """
    if repeats < 1:
        raise ValueError(f"repeats={repeats} must be >= 1")
    warm = warmup_fn if warmup_fn is not None else fn
    for _ in range(warmup):
        arg = setup() if setup is not None else None
        warm(arg) if setup is not None else warm()
        del arg
    samples = []
    for _ in range(repeats):
        if setup is not None:
            arg = setup()
            samples.append(time_once(lambda: fn(arg)))
            del arg
        else:
            samples.append(time_once(fn))
    return Timing(samples, per=per, warmup=warmup)


def time_once(fn) -> float:
    """Seconds one call of ``fn()`` takes, collector run before and off during it."""
    gc.collect()
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        t0 = time.perf_counter()
        fn()
        t1 = time.perf_counter()
    finally:
        if was_enabled:
            gc.enable()
    return t1 - t0


# -- memory bandwidth ---------------------------------------------------------


def memory_bandwidth(megabytes: int = 256, repeats: int = 5, threads: int = 1) -> dict:
    """Streaming memory bandwidth in bytes/s, best of ``repeats``.

    ``read``: ``a.sum()`` over a float64 array of ``megabytes`` MiB, far
    larger than any cache (bytes read / time). ``copy``: ``np.copyto``
    between two such arrays (bytes read + bytes written / time). With
    ``threads`` > 1 the array is split into that many slices, each summed
    or copied by its own Python thread (numpy releases the GIL), giving the
    aggregate figure.
    """
    import numpy as np

    n = megabytes * 2**20 // 8
    src = np.ones(n, dtype=np.float64)
    dst = np.empty_like(src)
    dst[:] = 0.0  # touch every page before timing
    edges = np.linspace(0, n, threads + 1).astype(np.int64)
    slices = [slice(int(edges[i]), int(edges[i + 1])) for i in range(threads)]

    def run(task):
        if threads == 1:
            task(slices[0])
            return
        workers = [threading.Thread(target=task, args=(sl,)) for sl in slices]
        for w in workers:
            w.start()
        for w in workers:
            w.join()

    def read(sl):
        src[sl].sum()

    def copy(sl):
        np.copyto(dst[sl], src[sl])

    t_read = measure(lambda: run(read), repeats=repeats, warmup=1)
    t_copy = measure(lambda: run(copy), repeats=repeats, warmup=1)
    return {
        "array_mib": megabytes,
        "threads": threads,
        "repeats": repeats,
        "read_bytes_per_s": src.nbytes / t_read.min,
        "copy_bytes_per_s": 2 * src.nbytes / t_copy.min,
    }


# -- machine record -------------------------------------------------------


def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="replace") as f:
            for line in f:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine() or "unknown"


def _ram_bytes() -> int | None:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return None


def _git_commit(path: str) -> str | None:
    try:
        out = subprocess.run(
            ["git", "-C", path, "rev-parse", "--short", "HEAD"], capture_output=True, text=True, timeout=5
        )
    except (OSError, subprocess.SubprocessError):
        return None
    return out.stdout.strip() or None if out.returncode == 0 else None


def machine_record() -> dict:
    """The machine and software the numbers were measured on."""
    import numba
    import numpy
    import scipy

    import sparseindex

    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:
        usable = os.cpu_count()
    ram = _ram_bytes()
    try:
        layer = numba.threading_layer()
    except ValueError:  # no parallel function has run yet
        layer = "not chosen yet"
    return {
        "date_utc": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "cpu_model": _cpu_model(),
        "logical_cpus": os.cpu_count(),
        "usable_cpus": usable,
        "ram_gib": round(ram / 2**30, 1) if ram else None,
        "os": f"{platform.system()} {platform.release()}",
        "python": f"{platform.python_implementation()} {platform.python_version()}",
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "numba": numba.__version__,
        "numba_threads": numba.config.NUMBA_NUM_THREADS,
        "numba_threading_layer": layer,
        "sparseindex": sparseindex.__version__,
        "sparseindex_commit": _git_commit(os.path.dirname(os.path.dirname(os.path.abspath(sparseindex.__file__)))),
        "argv": " ".join(sys.argv),
    }


def machine_markdown(record: dict, bandwidth: list[dict]) -> str:
    """The machine record and bandwidths as a Markdown bullet list."""
    lines = [
        f"- Machine: {record['cpu_model']}, {record['logical_cpus']} logical CPUs "
        f"({record['usable_cpus']} usable), {record['ram_gib']} GiB RAM, {record['os']}",
        f"- Software: {record['python']}, numpy {record['numpy']}, scipy {record['scipy']}, "
        f"numba {record['numba']} ({record['numba_threads']} threads, layer {record['numba_threading_layer']}), "
        f"sparseindex {record['sparseindex']}"
        + (f" at {record['sparseindex_commit']}" if record.get("sparseindex_commit") else ""),
    ]
    for bw in bandwidth:
        lines.append(
            f"- Memory bandwidth, {bw['threads']} thread{'s' if bw['threads'] > 1 else ''} "
            f"(numpy, {bw['array_mib']} MiB array, best of {bw['repeats']}): "
            f"read {bw['read_bytes_per_s'] / 1e9:.1f} GB/s, copy {bw['copy_bytes_per_s'] / 1e9:.1f} GB/s"
        )
    lines.append(f"- Measured {record['date_utc']}; command: `{record['argv']}`")
    return "\n".join(lines)


# -- formatting ---------------------------------------------------------------


def fmt_seconds(seconds: float) -> str:
    """A duration with a unit that keeps 3 significant digits."""
    if seconds >= 1.0:
        return f"{seconds:.3g} s"
    if seconds >= 1e-3:
        return f"{seconds * 1e3:.3g} ms"
    if seconds >= 1e-6:
        return f"{seconds * 1e6:.3g} µs"
    return f"{seconds * 1e9:.3g} ns"


def fmt_timing(t: Timing) -> str:
    """``median (min–max)`` of a per-item timing."""
    return f"{fmt_seconds(t.median)} ({fmt_seconds(t.min)}–{fmt_seconds(t.max)})"


def fmt_rate(t: Timing) -> str:
    """Items per second of a per-item timing: ``median (slowest–fastest)``."""

    def one(seconds_per_item):
        r = 1.0 / seconds_per_item
        return f"{r / 1e6:.2f} M/s" if r >= 1e6 else f"{r / 1e3:.0f} k/s"

    return f"{one(t.median)} ({one(t.max)}–{one(t.min)})"


def fmt_ratio(x: float) -> str:
    return f"{x:.0f}×" if x >= 100 else f"{x:.1f}×" if x >= 1 else f"{x:.2f}×"


def markdown_table(header: list[str], rows: list[list[str]], align: list[str] | None = None) -> str:
    """A Markdown table; ``align`` holds 'l' or 'r' per column (default: first left, rest right)."""
    if align is None:
        align = ["l"] + ["r"] * (len(header) - 1)
    sep = [":---" if a == "l" else "---:" for a in align]
    out = ["| " + " | ".join(header) + " |", "| " + " | ".join(sep) + " |"]
    out += ["| " + " | ".join(row) + " |" for row in rows]
    return "\n".join(out)
