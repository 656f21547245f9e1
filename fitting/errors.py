"""Error type shared by every layer.

`fitting` sits at the bottom of the import graph, so the project's one user-facing
error type lives here; `pipeline` and `qc` import it (they may subclass it).
The command line turns it into a one-paragraph message and exit status 2.
"""


class RelaxlineError(ValueError):
    """Bad input or usage. The message is shown to the user verbatim.

    Write messages that name the file and key, what was expected and how to fix it.
    """
