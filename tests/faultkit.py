"""Helpers for the bad-input and fault suites: a small simulated session, broken copies
of its files, tree digests (inputs byte-identical, no outputs) and a CLI runner."""
from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path
from typing import Callable

import nibabel as nib
import numpy as np

from pipeline.cli import main
from seriesio import combine_4d, write_json, write_nifti

P = "sub-relaxlinedemo_ses-20261101_"


def simulate_session(root: Path) -> Path:
    """One simulated session of the demo phantom (1 slice, 48 x 48) under ``root``, its
    series in the 4D-with-list form (the TB1DAM pair stays two 3D files in fmap/)."""
    assert main(["simulate", str(root), "--sessions", "1", "--slices", "1",
                 "--matrix", "48"]) == 0
    combine_4d(root / "sub-relaxlinedemo" / "ses-20261101")
    return root


class Kit:
    """Paths of the simulated session and helpers to write broken variants."""

    def __init__(self, sim: Path, tmp: Path):
        self.sim = sim
        self.anat = sim / "sub-relaxlinedemo" / "ses-20261101" / "anat"
        self.phantom = sim / "phantom"
        self.tmp = tmp
        self.out = tmp / "out"           # must hold no final-named file afterwards

    def s(self, name: str) -> str:
        folder = self.anat.with_name("fmap") if "TB1" in name else self.anat
        return str(folder / f"{P}{name}.nii.gz")

    def grid(self, name: str = "VFA"):
        img = nib.load(self.s(name))
        return img.shape[:3], img.affine

    def variant(self, name: str, change: Callable[[dict], dict] | None = None) -> str:
        """Copy series ``name`` to tmp with its sidecar passed through ``change``."""
        d = self.tmp / "in"
        d.mkdir(exist_ok=True)
        shutil.copy(self.s(name), d / f"{name}.nii.gz")
        sc = json.loads(Path(self.s(name)[: -len(".nii.gz")] + ".json").read_text())
        write_json(d / f"{name}.json", change(sc) if change else sc)
        return str(d / f"{name}.nii.gz")

    def image(self, fname: str, data, like: str = "VFA", affine=None) -> str:
        _, aff = self.grid(like)
        return str(write_nifti(self.tmp / fname, np.asarray(data),
                               aff if affine is None else affine))

    def file(self, fname: str, text: str | bytes) -> str:
        p = self.tmp / fname
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(text) if isinstance(text, bytes) else p.write_text(text)
        return str(p)


def setkey(key, value):
    return lambda sc: {**sc, key: value}


def first(key, value):
    return lambda sc: {**sc, key: [value] + sc[key][1:]}


def tree_digest(root: Path) -> dict[str, str]:
    """sha256 of every file under ``root`` (relative path -> digest)."""
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def run_cli(argv: list[str], capsys) -> tuple[int, str]:
    """``relaxline ARGV`` in this process: (exit status, stderr)."""
    capsys.readouterr()
    try:
        code = main(argv)
    except SystemExit as exc:      # argparse usage errors
        code = exc.code
    return code, capsys.readouterr().err
