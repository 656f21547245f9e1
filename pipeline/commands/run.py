"""`relaxline run`: not available yet."""
from __future__ import annotations

import argparse

from pipeline.errors import InputError

HELP = "Run the Snakemake workflow over sessions (not available yet)"
PASSTHROUGH = True


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("args", nargs="*", help="[--config F] [--cores N]")


def run(args: argparse.Namespace) -> int:
    raise InputError("`relaxline run` is not available in this version yet; "
                     "it lands with a later release of relaxline.")
