"""Run the official BIDS validator (PyPI ``bids-validator-deno``, offline) on a folder."""
from __future__ import annotations

import json
import subprocess
from pathlib import Path

from pipeline.ingest import find_tool


def validator() -> str:
    """The validator's executable: beside this Python (the venv), else on PATH."""
    exe = find_tool("bids-validator-deno")
    if exe is None:
        raise AssertionError("bids-validator-deno is not installed; it is in the test extra: "
                             "pip install -e '.[test]'")
    return exe


def validate(root: Path) -> tuple[list[dict], list[dict]]:
    """(errors, warnings) the validator reports on the dataset at ``root``."""
    proc = subprocess.run([validator(), str(root), "--format", "json"], capture_output=True,
                          text=True, timeout=300)
    try:
        report = json.loads(proc.stdout)
    except json.JSONDecodeError:
        raise AssertionError(f"validator gave no JSON (exit {proc.returncode}): "
                             f"{proc.stderr[-2000:]}") from None
    issues = report["issues"]["issues"]
    return ([i for i in issues if i["severity"] == "error"],
            [i for i in issues if i["severity"] == "warning"])


def summary(issues: list[dict], limit: int = 15) -> str:
    """One line per issue (code, location, sub-code) for an assertion message."""
    return "\n".join(f"{i['code']} {i.get('location', '')} {i.get('subCode') or ''}"
                     for i in issues[:limit])
