"""The ``sparseindex plan`` subcommand: size a store from its targets.

``add_parser(subparsers)`` registers the subcommand on an argparse
sub-parser collection; ``run(args)`` carries it out and returns the exit
status (0, or 2 with a one-line message on stderr for a request that is
malformed or cannot be met).
"""

from __future__ import annotations

import json
import math
import sys

from .arguments import count, number
from ..model import PlanError
from ..model.planner import plan

__all__ = ["add_parser", "run"]

_POSTING_BYTES = 2  # postings are uint16 offsets within a block of detectors (store/bank.py)


def add_parser(subparsers):
    """Register ``plan`` on an argparse sub-parser collection; return it.

    Examples
    --------
    >>> import argparse
    >>> sub = argparse.ArgumentParser(prog="sparseindex").add_subparsers()
    >>> args = add_parser(sub).parse_args(["--bits", "1536", "--weight", "30", "--false-hit", "1e-9",
    ...                                    "--capacity", "1,000,000"])
    >>> args.bits, args.capacity, args.noise, args.recall, args.max_detectors
    (1536, 1000000, 0.0, 0.999, 8)
    """
    p = subparsers.add_parser(
        "plan",
        help="choose sample size, threshold and detectors for a false-hit target",
        description=(
            "Find the cheapest detector configuration (fewest postings per "
            "stored code) for which a store of CAPACITY codes keeps the chance "
            "of any false hit per unrelated query at or below FALSE_HIT, while "
            "a query that lacks a NOISE fraction of a stored code's set bits "
            "still recalls it with chance RECALL."),
    )
    p.add_argument("--bits", type=count, required=True,
                   help="code width in bits")
    p.add_argument("--weight", type=count, required=True,
                   help="set bits per code")
    p.add_argument("--false-hit", type=number, required=True, dest="false_hit",
                   help="largest chance of a false hit per query, e.g. 1e-9")
    p.add_argument("--capacity", type=count, required=True,
                   help="stored codes the target must hold for, e.g. 1e6")
    p.add_argument("--noise", type=number, default=0.0,
                   help="fraction of set bits a query may lack (default 0)")
    p.add_argument("--recall", type=number, default=0.999,
                   help="smallest recall of such a query (default 0.999)")
    p.add_argument("--max-detectors", type=count, default=8, dest="max_detectors",
                   help="most detectors per stored code (default 8)")
    p.add_argument("--json", action="store_true",
                   help="print the plan as JSON instead of a table")
    p.set_defaults(func=run)
    return p


def _fmt_count(value):
    if isinstance(value, float) and not math.isfinite(value):
        return "unbounded"
    if value >= 1e15:
        return f"{float(value):.3g}"
    return f"{int(value):,}"


def _fmt_recall(p):
    if p.miss <= 0:
        return "1"
    if p.miss < 1e-6:
        return f"1-{p.miss:.1e}"
    digits = max(4, int(-math.floor(math.log10(p.miss))) + 2)
    return f"{p.recall:.{digits}f}"


def _fmt_bytes(n):
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if n < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000.0
    return f"{n:.1f} TB"  # pragma: no cover


def _table(best):
    """The chosen plan and its alternatives as aligned text with units."""
    heads = [("", ""), ("sample_size", "[bits]"), ("threshold", "[bits]"),
             ("detectors", "[/code]"), ("postings", "[/code]"),
             ("false hits", "[/code]"), ("false hits", "[/query]"),
             ("recall", ""), ("limit", "[codes]")]
    rows = []
    for rank, p in enumerate((best,) + tuple(best.alternatives)):
        rows.append([
            "chosen" if rank == 0 else f"option {rank + 1}",
            str(p.sample_size), str(p.threshold), str(p.detectors),
            str(p.postings_per_code),
            f"{p.false_hit_per_code:.3g}", f"{p.false_hit_per_query:.3g}",
            _fmt_recall(p), _fmt_count(p.limit),
        ])
    widths = [max(len(h[0]), len(h[1]), *(len(r[i]) for r in rows))
              for i, h in enumerate(heads)]

    def line(cells):
        first = cells[0].ljust(widths[0])
        rest = [c.rjust(w) for c, w in zip(cells[1:], widths[1:])]
        return "  " + "  ".join([first] + rest)

    out = [line([h[0] for h in heads]), line([h[1] for h in heads])]
    out.append("  " + "  ".join("-" * w for w in widths))
    out.extend(line(r) for r in rows)
    return out


def _report(best):
    lines = [
        f"sparseindex plan: {best.bits:,}-bit codes with {best.weight:,} set bits",
        f"  target: at most {best.target_false_hit:g} false hits per query with "
        f"{best.target_capacity:,} codes stored",
        f"          recall at least {best.target_recall:g} when a query lacks "
        f"{best.lost_bits} of the {best.weight} set bits (noise {best.noise:g}), "
        f"at most {best.max_detectors} detectors",
        "",
    ]
    lines.extend(_table(best))
    postings = best.postings_per_code * best.target_capacity
    lines += [
        "",
        "  limit: stored codes at which false hits per query reach the target",
        f"  at {best.target_capacity:,} codes: {postings:,} postings "
        f"(~{_fmt_bytes(postings * _POSTING_BYTES)} as uint16 postings), "
        f"~{best.updates_per_query:,.0f} counter updates per query",
    ]
    return "\n".join(lines)


def run(args):
    """Carry out ``sparseindex plan``; return the exit status.

    The table goes to stdout; a request that cannot be met, or a malformed
    one, prints one line on stderr and returns 2.

    Examples
    --------
    >>> import argparse
    >>> args = argparse.Namespace(bits=1536, weight=30, false_hit=1e-9, capacity=10**6, noise=0.25,
    ...                           recall=0.999, max_detectors=8, json=False)
    >>> import contextlib, io
    >>> out = io.StringIO()
    >>> with contextlib.redirect_stdout(out):
    ...     status = run(args)
    >>> lines = out.getvalue().splitlines()
    >>> status, lines[0], [line.split()[1:4] for line in lines if "chosen" in line]
    (0, 'sparseindex plan: 1,536-bit codes with 30 set bits', [['20', '12', '1']])
    >>> run(argparse.Namespace(**{**vars(args), "noise": 0.95}))   # no plan reaches that recall
    2
    """
    try:
        best = plan(args.bits, args.weight, false_hit=args.false_hit,
                    capacity=args.capacity, noise=args.noise, recall=args.recall,
                    max_detectors=args.max_detectors)
    except (PlanError, ValueError) as exc:
        message = " ".join(str(exc).split())
        print(f"sparseindex plan: {message}", file=sys.stderr)
        return 2
    if args.json:
        print(json.dumps(best.to_dict(), indent=2))
    else:
        print(_report(best))
    return 0
