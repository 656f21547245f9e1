"""Error type shared by every layer.

`fitting` sits at the bottom of the import graph, so the project's one user-facing
error type lives here; `pipeline` and `qc` import it (they may subclass it).
The command line turns it into a one-paragraph message and exit status 2.
"""
from __future__ import annotations

import errno


class RelaxlineError(ValueError):
    """Bad input or usage. The message is shown to the user verbatim.

    Write messages that name the file and key, what was expected and how to fix it.
    """


EXCERPT_CHARS = 60      # longest quote of a user's value in a message
MESSAGE_CHARS = 2000    # longest message the command line prints


def excerpt(value: object, limit: int = EXCERPT_CHARS) -> str:
    """``repr(value)`` cut to about ``limit`` characters, for quoting bad values in messages.

    A value can be arbitrarily large (a YAML alias bomb expands 200 bytes into millions
    of items, a sidecar can hold a megabyte string); a message quotes only its start and
    says how long it was. Containers are cut while being rendered, so a huge one is
    never turned into one huge string first.
    """
    text = _short_repr(value, limit + 1)
    if len(text) <= limit:
        return text
    return f"{text[:limit]}… ({type(value).__name__}{_size(value)}, cut)"


def _size(value: object) -> str:
    try:
        return f" of {len(value)} {'characters' if isinstance(value, str) else 'items'}"
    except TypeError:
        return ""


def _short_repr(value: object, budget: int, depth: int = 0) -> str:
    """repr of ``value`` stopped soon after ``budget`` characters (never fully built)."""
    if isinstance(value, (list, tuple, dict)) and depth > 8:
        return "…"
    if isinstance(value, (list, tuple, dict)):
        opening, closing = ("[", "]") if isinstance(value, list) else \
            ("(", ")") if isinstance(value, tuple) else ("{", "}")
        parts, used = [], 1
        items = value.items() if isinstance(value, dict) else value
        for item in items:
            if used > budget:
                break
            if isinstance(value, dict):
                k, v = item
                text = (f"{_short_repr(k, budget - used, depth + 1)}: "
                        f"{_short_repr(v, budget - used, depth + 1)}")
            else:
                text = _short_repr(item, budget - used, depth + 1)
            parts.append(text)
            used += len(text) + 2
        return opening + ", ".join(parts) + closing
    if isinstance(value, str) and len(value) > budget:
        return repr(value[:budget])
    return repr(value)


def shorten_message(text: str, limit: int = MESSAGE_CHARS) -> str:
    """A message cut to ``limit`` characters (its start and its end, which holds the remedy)."""
    if len(text) <= limit:
        return text
    half = limit // 2
    return f"{text[:half]} […{len(text) - 2 * half} characters cut…] {text[-half:]}"


def is_no_space(exc: BaseException) -> bool:
    """True for an OSError meaning a full disk or an exhausted quota."""
    return isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT)


def no_space_error(folder: object, clean: bool = True) -> RelaxlineError:
    """The error for a full disk or exhausted quota while writing into ``folder``.

    ``clean``: the writer removed what it had begun (say so); else the user is told to
    check the folder.
    """
    state = ("nothing was left half-written there" if clean else
             "files written there by this run may be incomplete; delete them")
    return RelaxlineError(f"no space left on {folder} (the disk or your quota is full); "
                          f"{state}. Free some space or choose another output folder, then "
                          "run again.")
