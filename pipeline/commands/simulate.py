"""`relaxline simulate`: not available yet."""
from __future__ import annotations

import argparse

from pipeline.errors import InputError

HELP = "Write demo phantom sessions (invented phantom) as NIfTI series (not available yet)"
PASSTHROUGH = True


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("args", nargs="*", help="OUTDIR [--sessions N] [--seed K] [--snr S]")


def run(args: argparse.Namespace) -> int:
    raise InputError("`relaxline simulate` is not available in this version yet; "
                     "it lands with a later release of relaxline.")
