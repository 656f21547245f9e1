"""`relaxline design`: not available yet."""
from __future__ import annotations

import argparse

from pipeline.errors import InputError

HELP = "Protocol design from the Cramér–Rao bound (not available yet)"
PASSTHROUGH = True


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("args", nargs="*", help="MODEL --range LO:HI")


def run(args: argparse.Namespace) -> int:
    raise InputError("`relaxline design` is not available in this version yet; "
                     "it lands with a later release of relaxline.")
