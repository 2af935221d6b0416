"""``diskfield ages``: chronometer ratios to Myr after CAI formation (work in progress)."""
from __future__ import annotations

__all__ = ["NAME", "HELP", "add_arguments", "run"]

NAME = "ages"
HELP = "convert chronometer ratios or Pb-Pb ages to Myr after CAI formation"


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an argparse parser)."""


def run(args) -> int:
    """Run the command; returns the exit status."""
    return 0
