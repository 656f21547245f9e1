"""The ``relaxline`` command line: one sub-command per module in ``pipeline.commands``.

Each command module exposes ``HELP`` (one line), ``add_arguments(parser)`` and
``run(args) -> int``. Modules import their heavy dependencies inside ``run`` so
that ``relaxline --help`` stays fast.
"""
from __future__ import annotations

import argparse
import importlib
import os
import sys
from typing import Sequence

from fitting.errors import is_no_space, no_space_error, shorten_message
from pipeline.errors import EXIT_BAD_INPUT, RelaxlineError

# Order is the order shown by --help.
COMMANDS = ["simulate", "ingest", "fit", "refit", "qc", "run", "demo", "design"]


def _version() -> str:
    try:
        from importlib.metadata import version
        return version("relaxline")
    except Exception:  # running from a source tree without installation
        return "unknown"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="relaxline",
        description="Relaxometry fitting pipeline: T1/T2 maps corrected for flip-angle "
                    "errors, phantom QC against reference values, drift across sessions. "
                    "For quality assurance and research; not a medical device.",
        epilog="Exit status: 0 success, 1 QC failure or drift-rule violation, "
               "2 bad input or usage.")
    parser.add_argument("--version", action="version", version=f"relaxline {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        mod = importlib.import_module(f"pipeline.commands.{name.replace('-', '_')}")
        p = sub.add_parser(name, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP),
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        mod.add_arguments(p)
        p.set_defaults(_module=mod)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    # `run` and `demo` pass unknown options through to Snakemake.
    args, extra = parser.parse_known_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_BAD_INPUT
    if extra and not getattr(args._module, "PASSTHROUGH", False):
        parser.error(f"unrecognized arguments: {' '.join(extra)}")
    args.extra = extra
    try:
        return int(args._module.run(args) or 0)
    except RelaxlineError as exc:
        _say(args.command, f"error: {exc}")
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        _say(args.command, "interrupted")
        return 130
    except MemoryError:
        _say(args.command, "error: out of memory; fit a mask or use smaller chunks")
        return EXIT_BAD_INPUT
    except OSError as exc:
        if is_no_space(exc):   # a write no writer translated
            folder = os.path.dirname(exc.filename) if exc.filename else "the output folder"
            _say(args.command, f"error: {no_space_error(folder or '.', clean=False)}")
            return EXIT_BAD_INPUT
        return _internal(args.command, exc)
    except Exception as exc:  # a bug, not bad input: say so plainly
        return _internal(args.command, exc)


def _say(command: str, text: str) -> None:
    """One message on stderr, cut to a readable length (a bad value may be huge)."""
    print(f"relaxline {command}: {shorten_message(text)}", file=sys.stderr)


def _internal(command: str, exc: BaseException) -> int:
    if os.environ.get("RELAXLINE_DEBUG"):
        raise exc
    _say(command, f"internal error: {type(exc).__name__}: {exc}\n"
                  "This is a bug in relaxline, not a problem with your data. Rerun with "
                  "RELAXLINE_DEBUG=1 to see the traceback and report it.")
    return 3


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
