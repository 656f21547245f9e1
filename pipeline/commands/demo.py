"""`relaxline demo`: not available yet."""
from __future__ import annotations

import argparse

from pipeline.errors import InputError

HELP = "Simulate the demo sessions, run the workflow and report (not available yet)"
PASSTHROUGH = True


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("args", nargs="*", help="[OUTDIR]")


def run(args: argparse.Namespace) -> int:
    raise InputError("`relaxline demo` is not available in this version yet; "
                     "it lands with a later release of relaxline.")
