"""Reading the text files a user gives (workflow config, QC tolerances, sidecars) safely.

``yaml.safe_load`` builds no objects but still honours aliases: a few hundred bytes of
nested aliases ("billion laughs") expand into a structure of billions of items that
validation would walk and messages would print. :func:`read_yaml` refuses a document
whose expanded size passes :data:`MAX_NODES`; real configs have a few hundred values.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

from fitting.errors import RelaxlineError

MAX_NODES = 100_000


def expanded_size(obj: Any, limit: int = MAX_NODES) -> int:
    """Number of values in ``obj`` with every alias expanded, counted up to ``limit`` + 1."""
    count, stack = 0, [obj]
    while stack and count <= limit:
        item = stack.pop()
        count += 1
        if isinstance(item, dict):
            stack.extend(item.keys())
            stack.extend(item.values())
        elif isinstance(item, (list, tuple)):
            stack.extend(item)
    return count


def read_text(path: str | Path, what: str, kind: str,
              error: type[RelaxlineError] = RelaxlineError) -> str:
    """A user's UTF-8 text file; problems raise ``error`` naming the file (``kind``: "YAML")."""
    p = Path(path)
    try:
        return p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise error(f"{p}: not UTF-8 text; a {what} is a {kind} text file.") from None
    except OSError as exc:
        raise error(f"{p}: cannot read the {what} ({exc.strerror}).") from None


def read_yaml(path: str | Path, what: str = "YAML file") -> Any:
    """Parse a YAML file; every problem is a :class:`RelaxlineError` naming the file."""
    import yaml
    p = Path(path)
    text = read_text(p, what, "YAML")
    try:
        obj = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" (line {mark.line + 1}, column {mark.column + 1})" if mark else ""
        problem = getattr(exc, "problem", None) or "cannot be parsed"
        raise RelaxlineError(f"{p}: not valid YAML{where}: {problem}.") from None
    except RecursionError:
        raise RelaxlineError(f"{p}: the {what} nests too deeply to be read.") from None
    if expanded_size(obj) > MAX_NODES:
        raise RelaxlineError(f"{p}: the {what} expands to more than {MAX_NODES} values "
                             "(nested YAML aliases &/* repeat parts of it); a "
                             f"{what} holds a few hundred. Write it without such aliases.")
    return obj
