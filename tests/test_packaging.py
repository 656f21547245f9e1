"""The README's two commands, the CI script and the command line agree."""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    setup = text.split("## Set up", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```\n(.+?)\n```", setup)


def test_readme_has_exactly_two_setup_commands():
    cmds = _readme_commands()
    assert len(cmds) == 2
    assert cmds[0].endswith("relaxline demo") and "python3 -m venv .venv" in cmds[0]
    assert "pytest" in cmds[1] and "'.[test]'" in cmds[1]


def test_ci_runs_readme_test_command_verbatim():
    ci_lines = (ROOT / ".ci" / "run").read_text().splitlines()
    assert _readme_commands()[1] in ci_lines


def test_readme_caution():
    text = (ROOT / "README.md").read_text().lower()
    assert "not a medical device" in text and "licensed physicist" in text


def test_cli_help_lists_commands():
    out = subprocess.run([sys.executable, "-m", "pipeline.cli", "--help"],
                         capture_output=True, text=True, cwd=ROOT)
    assert out.returncode == 0
    for cmd in ["simulate", "fit", "refit", "qc", "run", "demo", "design"]:
        assert re.search(rf"^\s+{cmd}\s", out.stdout, re.M), cmd


def test_unknown_command_is_usage_error():
    out = subprocess.run([sys.executable, "-m", "pipeline.cli", "nonsense"],
                         capture_output=True, text=True, cwd=ROOT)
    assert out.returncode == 2 and "Traceback" not in out.stderr
