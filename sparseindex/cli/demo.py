"""The ``sparseindex demo`` subcommand: the whole job on invented data, end to end.

Runs :func:`sparseindex.demo.run`: plans a store from targets, builds it,
recalls noisy and partial queries against the model's prediction, catches
re-uploaded near-copies, follows its health past the warning level and
past its limit, saves it and serves it memory-mapped, and draws the headroom
curve (when matplotlib is installed). ``add_parser(subparsers)`` registers
the subcommand; ``run(args)`` carries it out and returns the exit status: 0,
or 2 with one line on stderr for a bad option.
"""

from __future__ import annotations

import argparse
import os
import sys

from .arguments import count

__all__ = ["add_parser", "run"]


def add_parser(subparsers):
    """Register ``demo`` on an argparse sub-parser collection; return it.

    Examples
    --------
    >>> sub = argparse.ArgumentParser(prog="sparseindex").add_subparsers()
    >>> args = add_parser(sub).parse_args(["--size", "5,000", "--seed", "2"])
    >>> args.size, args.seed, args.out, args.plot
    (5000, 2, None, True)
    """
    from ..demo import DEFAULT_SIZE, MIN_SIZE

    p = subparsers.add_parser(
        "demo",
        help="run the whole job on invented data: plan, build, recall, near-duplicates, health, save, plot",
        description=(
            "An invented weaving mill catalogues its bolts of cloth as sparse 2048-bit codes (data made on "
            "the fly from --seed). The demo plans a store for SIZE bolts from a false-hit and a recall "
            "target, builds it, recognises bolts from noisy and partial rescans (measured recall and false "
            "hits beside the model's prediction), catches re-uploaded near-copies, follows the store's "
            "health as it fills past the warning level and past its limit, saves it and serves it "
            "memory-mapped, and draws the headroom curve when matplotlib is installed."),
        epilog=(
            "The store is filled to 110% of the model's limit, which can be several times SIZE. At the "
            "default size: about 45 s on 2 cores on the first run (most of it compiling the kernels), about "
            "15 s after. A hit is probabilistic evidence, not proof of identity: do not let a hit alone decide "
            "access, money or identity."),
    )
    p.add_argument("--size", type=count, default=DEFAULT_SIZE,
                   help=f"bolts in the planned catalogue (default {DEFAULT_SIZE:,}, at least {MIN_SIZE:,})")
    p.add_argument("--seed", type=count, default=1, help="seed of all generated data (default 1)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="folder for the saved store and the plot (default: a new temporary folder)")
    p.add_argument("--no-plot", dest="plot", action="store_false", help="do not draw the headroom plot")
    p.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                   help="draw progress bars on stderr (default: only when stderr is a terminal)")
    p.set_defaults(func=run)
    return p


def _fail(message: str) -> int:
    print(f"sparseindex demo: {message}", file=sys.stderr)
    return 2


def run(args) -> int:
    """Carry out ``sparseindex demo``; return the exit status.

    Examples
    --------
    >>> run(argparse.Namespace(size=10, seed=1, out=None, plot=False, progress=False))
    2
    """
    from ..demo import MIN_SIZE, run as run_demo

    if args.size < MIN_SIZE:
        return _fail(f"--size {args.size:,} must be at least {MIN_SIZE:,}")
    if args.size > 10**8:
        return _fail(f"--size {args.size:,} is more than this demo is made for (at most 100,000,000)")
    if args.seed < 0 or args.seed >= 2**64:
        return _fail(f"--seed {args.seed} must be in 0..2**64-1")
    if args.out is not None:
        if os.path.exists(args.out) and not os.path.isdir(args.out):
            return _fail(f"--out {args.out}: exists and is not a folder")
        try:
            os.makedirs(args.out, exist_ok=True)
        except OSError as exc:
            return _fail(f"--out {args.out}: cannot create the folder ({exc.strerror or exc})")
        if not os.access(args.out, os.W_OK):
            return _fail(f"--out {args.out}: folder is not writable")
    run_demo(args.size, seed=args.seed, out=args.out, progress=args.progress, plot=args.plot)
    return 0
