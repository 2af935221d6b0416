"""The ``diskfield`` command line: a thin dispatcher over ``diskfield.commands.*``.

Each command module defines ``NAME``, ``HELP``, ``add_arguments(parser)`` and
``run(args) -> int``. Every command gets ``--seed`` and ``--out``. Any
:class:`~diskfield.errors.DiskfieldError` becomes one line per problem on stderr and
exit status 2 — never a traceback.
"""
from __future__ import annotations

import argparse
import importlib
import os
import sys

from . import __version__
from .errors import DiskfieldError

__all__ = ["main", "COMMANDS"]

#: Command modules under ``diskfield.commands``, in the order ``--help`` lists them.
COMMANDS = ("check", "ages", "profiles", "fit", "compare", "report", "calibrate", "forecast",
            "demo")


class _Parser(argparse.ArgumentParser):
    """argparse that exits with status 2 and one clear line (its default) — kept explicit."""

    def error(self, message):  # pragma: no cover - argparse formats this itself
        self.print_usage(sys.stderr)
        self.exit(2, f"{self.prog}: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="diskfield",
                     description="Fit smooth and ringed disk-field models to meteorite paleointensities.")
    parser.add_argument("--version", action="version", version=f"diskfield {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMANDS:
        module = importlib.import_module(f"diskfield.commands.{name}")
        p = sub.add_parser(module.NAME, help=module.HELP, description=module.HELP)
        p.add_argument("--seed", type=int, default=None,
                       help="random seed (integer); default: a fixed project seed, recorded in the manifest")
        p.add_argument("--out", default=None, help="output folder (default depends on the command)")
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``diskfield`` console script; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args) or 0)
    except DiskfieldError as err:
        for line in err.lines():
            print(f"diskfield {args.command}: error: {line}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"diskfield {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # Output piped into e.g. `head` that closed early: not an error of ours.
        # Point stdout at devnull so the interpreter's final flush does not complain.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
