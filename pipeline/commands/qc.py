"""`relaxline qc`: not available yet."""
from __future__ import annotations

import argparse

from pipeline.errors import InputError

HELP = "Vial statistics against reference values, tolerances and an HTML report (not available yet)"
PASSTHROUGH = True


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("args", nargs="*", help="MAPS_DIR --labels F --reference F.tsv --out DIR")


def run(args: argparse.Namespace) -> int:
    raise InputError("`relaxline qc` is not available in this version yet; "
                     "it lands with a later release of relaxline.")
