"""The ``sparseindex`` command.

Each subcommand lives in its own module that provides ``add_parser`` and
``run``; this file only wires them together. Exit status: 0 on success, 2
on bad arguments or bad input (one line on stderr).
"""

from __future__ import annotations

import argparse
import importlib
import sys

from ..version import __version__

#: Subcommand name -> module (inside this package) with ``add_parser`` and ``run``.
COMMANDS = {
    "plan": ".plan",
    "health": ".health",
    "near-duplicates": ".near_duplicates",
    "demo": ".demo",
}


def _module(name):
    return importlib.import_module(COMMANDS[name], __package__)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="sparseindex",
        description="Store, recall and size stores of sparse binary codes.",
        epilog=(
            "Matches are probabilistic evidence, not proof of identity: do not use a hit alone to "
            "decide access, money or identity."
        ),
    )
    parser.add_argument("--version", action="version", version=f"sparseindex {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")
    commands.required = True
    for name in COMMANDS:
        _module(name).add_parser(commands)
    return parser


def main(argv=None) -> int:
    """Entry point of the console script; returns the exit status.

    Examples
    --------
    >>> main(["--version"])
    Traceback (most recent call last):
    ...
    SystemExit: 0
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command in COMMANDS:
        return _module(args.command).run(args)
    parser.error(f"unknown command {args.command!r}")  # pragma: no cover - argparse rejects it first
    return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
