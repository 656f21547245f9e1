"""Errors and exit statuses of the command line (design §5)."""
from fitting.errors import RelaxlineError

EXIT_OK = 0
EXIT_QC_FAIL = 1  # a QC failure or drift-rule violation a nightly job must notice
EXIT_BAD_INPUT = 2  # bad input or usage


class InputError(RelaxlineError):
    """A problem with a file, sidecar, option or config the user supplied."""


__all__ = ["RelaxlineError", "InputError", "EXIT_OK", "EXIT_QC_FAIL", "EXIT_BAD_INPUT"]
