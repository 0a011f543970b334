"""The ``sparseindex health`` subcommand: how full is a saved store.

Opens the store memory-mapped and read-only, optionally measures its false hits, and
prints the :class:`~sparseindex.health.Health` report as text (default),
JSON or OpenMetrics; ``--plot`` draws the predicted false-hit chance per
query against the number of stored codes (needs matplotlib, the ``plot``
extra). Exit status 0, or 2 with one line on stderr for a missing or bad
file or a bad option.
"""

from __future__ import annotations

import math
import sys

from .arguments import count, number
from ..errors import StoreFormatError

__all__ = ["add_parser", "run", "plot_headroom"]


def add_parser(subparsers):
    """Register ``health`` on an argparse sub-parser collection; return it.

    Examples
    --------
    >>> import argparse
    >>> sub = argparse.ArgumentParser(prog="sparseindex").add_subparsers()
    >>> args = add_parser(sub).parse_args(["fleet.sidx", "--measure", "1,000"])
    >>> args.path, args.measure, args.source, args.json, args.plot
    ('fleet.sidx', 1000, 'uniform', False, None)
    """
    p = subparsers.add_parser(
        "health",
        help="report the fill level and false-hit headroom of a saved store",
        description=(
            "Open the store saved at PATH (memory-mapped, read-only) and report its items, "
            "the limit (codes at the false-hit target) under the uniform and the usage-aware model, "
            "headroom, bit usage, code weights and status."),
        epilog=(
            "A hit is probabilistic evidence, not proof of identity: do not let a hit alone "
            "decide access, money or identity."),
    )
    p.add_argument("path", metavar="PATH", help="a store file written by Store.save")
    fmt = p.add_mutually_exclusive_group()
    fmt.add_argument("--json", action="store_true", help="print the report as JSON")
    fmt.add_argument("--openmetrics", action="store_true", help="print the report in the OpenMetrics text format")
    p.add_argument("--measure", type=count, default=0, metavar="N", help="run N random unrelated queries first")
    p.add_argument("--source", choices=("uniform", "usage"), default="uniform",
                   help="measurement queries: uniform random bits, or drawn from the store's bit usage")
    p.add_argument("--seed", type=count, default=None, help="seed of the measurement queries")
    p.add_argument("--false-hit", type=number, default=None, metavar="F",
                   help="false-hit target per query (default: the store's plan)")
    p.add_argument("--warn-fraction", type=number, default=None, metavar="W",
                   help="fill fraction where the status turns from healthy to filling (default 0.8)")
    p.add_argument("--plot", metavar="FILE.png", default=None,
                   help="draw false-hit chance against stored codes (needs matplotlib)")
    return p


def _fail(message: str) -> int:
    print(f"sparseindex health: {message}", file=sys.stderr)
    return 2


def run(args) -> int:
    """Carry out ``sparseindex health``; return the exit status.

    Opens ``args.path`` memory-mapped and read-only, measures its false hits if asked,
    prints the report (text, JSON or OpenMetrics) and draws the plot if
    asked; a missing or bad file or a bad option prints one line on stderr
    and returns 2.

    Examples
    --------
    >>> import argparse, contextlib, io, os, tempfile
    >>> from sparseindex import Codes, Store
    >>> store = Store.for_target(512, 16, false_hit=1e-4, capacity=5_000, seed=3)
    >>> _ = store.add(Codes.random(3_000, 512, 16, seed=3))
    >>> path = os.path.join(tempfile.mkdtemp(), "orchard.sidx"); store.save(path)
    >>> args = argparse.Namespace(path=path, json=False, openmetrics=False, measure=0, source="uniform", seed=None,
    ...                           false_hit=None, warn_fraction=None, plot=None)
    >>> out = io.StringIO()
    >>> with contextlib.redirect_stdout(out):
    ...     status = run(args)
    >>> status, out.getvalue().splitlines()[0]
    (0, 'status: HEALTHY  (3,000 codes stored, 0 removed awaiting compact)')
    >>> run(argparse.Namespace(**{**vars(args), "path": path + ".missing"}))
    2
    """
    from ..store.single import Store

    if args.measure < 0:
        return _fail(f"--measure {args.measure} must be >= 0")
    try:
        store = Store.load(args.path, mmap=True)
    except FileNotFoundError:
        return _fail(f"no such file: {args.path!r}")
    except (StoreFormatError, OSError) as exc:
        return _fail(f"cannot read {args.path!r}: {exc}")
    try:
        if args.measure:
            store.measure_false_hits(args.measure, source=args.source, seed=args.seed)
        report = store.health(false_hit=args.false_hit, warn_fraction=args.warn_fraction)
    except ValueError as exc:
        return _fail(str(exc))
    if args.plot:
        try:
            where = plot_headroom(store, report, args.plot)
        except ImportError:
            return _fail("--plot needs matplotlib: pip install 'sparseindex[plot]'")
        except OSError as exc:
            return _fail(f"cannot write {args.plot!r}: {exc}")
        print(f"plot written to {where}", file=sys.stderr)
    if args.json:
        print(report.to_json(indent=1))
    elif args.openmetrics:
        sys.stdout.write(report.to_openmetrics())
    else:
        print(report)
    return 0


def plot_headroom(store, report, path) -> str:
    """Draw predicted false-hit chance per query against stored codes; return the path.

    Uniform and usage-aware model curves, the target, the store's position
    and the latest measurement with its 95% interval (or its upper bound). Needs
    matplotlib (``pip install 'sparseindex[plot]'``); ImportError without it.

    Examples
    --------
    >>> import os, tempfile
    >>> from sparseindex import Codes, Store
    >>> store = Store.for_target(512, 16, false_hit=1e-4, capacity=5_000, seed=3)
    >>> _ = store.add(Codes.random(3_000, 512, 16, seed=3))
    >>> path = os.path.join(tempfile.mkdtemp(), "headroom.png")
    >>> try:
    ...     written = plot_headroom(store, store.health(), path)
    ... except ImportError:                  # matplotlib not installed: nothing drawn
    ...     written = None
    >>> written is None or (written == path and open(path, "rb").read(4)[1:] == b"PNG")
    True
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    from .. import model

    h = report
    top = max(10.0, 4.0 * max(h.items, 1))
    if h.limit is not None and math.isfinite(h.limit):
        top = max(top, 4.0 * h.limit)
    x = np.unique(np.logspace(0, math.log10(top), 200).astype(np.int64))
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=110)
    if h.per_code_uniform is not None:
        ax.plot(x, model.store_false_hit(h.per_code_uniform, x), label="uniform model", color="tab:blue",
                linewidth=2.5)
    if h.per_code_usage is not None:
        ax.plot(x, model.store_false_hit(min(1.0, h.per_code_usage), x), label="usage-aware model",
                color="tab:orange", linestyle="--")
    if h.target_false_hit is not None:
        ax.axhline(h.target_false_hit, color="tab:red", linestyle="--", label=f"target {h.target_false_hit:g}")
    if h.limit is not None and math.isfinite(h.limit):
        ax.axvline(h.limit, color="tab:red", linestyle=":", label=f"limit {int(h.limit):,}")
    if h.false_hit_now is not None and h.items:
        ax.plot([h.items], [h.false_hit_now], "o", color="black", label=f"now: {h.items:,} codes")
    if h.measurement is not None:
        pr = h.measurement
        if pr.queries_hit:
            ax.errorbar([pr.items], [pr.rate], yerr=[[pr.rate - pr.low], [pr.high - pr.rate]], fmt="s",
                        color="tab:green", capsize=4, label=f"measurement ({pr.queries:,} {pr.source} queries)")
        else:
            ax.plot([pr.items], [pr.upper], "v", color="tab:green",
                    label=f"measurement upper bound ({pr.queries:,} queries, no hit)")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("codes stored")
    ax.set_ylabel("chance of a false hit per unrelated query")
    ax.set_title(f"headroom: {h.status}")
    ax.grid(True, which="major", alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return str(path)
