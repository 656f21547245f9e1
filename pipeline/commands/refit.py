"""`relaxline refit`: not available yet."""
from __future__ import annotations

import argparse

from pipeline.errors import InputError

HELP = "Careful lmfit refit of one region with full fit statistics (not available yet)"
PASSTHROUGH = True


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("args", nargs="*", help="MODEL INPUT... region")


def run(args: argparse.Namespace) -> int:
    raise InputError("`relaxline refit` is not available in this version yet; "
                     "it lands with a later release of relaxline.")
