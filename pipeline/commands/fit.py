"""`relaxline fit`: not available yet."""
from __future__ import annotations

import argparse

from pipeline.errors import InputError

HELP = "Fit a relaxation model voxelwise and write maps (not available yet)"
PASSTHROUGH = True


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("args", nargs="*", help="MODEL INPUT... --out DIR")


def run(args: argparse.Namespace) -> int:
    raise InputError("`relaxline fit` is not available in this version yet; "
                     "it lands with a later release of relaxline.")
