"""``relaxline ingest``: a folder of scanner DICOM files -> the BIDS raw layout the workflow reads.

Series are found and recognised by :mod:`pipeline.dicomscan` (pydicom, headers only);
the pixel data and the sidecars come from ``dcm2niix`` (its PyPI wheel), run once per
value of the varying parameter so that every TI, flip angle or echo becomes one 3D
image: ``sub-<s>/ses-<d>/<datatype>/sub-<s>_ses-<d>[_run-<n>]_<entity>-<k>_<suffix>``
with ``k`` in increasing order of the value. Sidecars are dcm2niix's (BIDS keys, times
in seconds) with the varying value checked against the DICOM header (ms -> s) and the
keys BIDS qMRI requires added (``RepetitionTimeExcitation``, ``PulseSequenceType`` for
VFA).

Labels: ``sub-`` from ``--subject`` (or the config's ``dicom.subject``), else the
PatientID reduced to letters and digits; ``ses-`` from ``--session``, else the StudyDate
(``YYYYMMDD``; a second study on the same day gets ``YYYYMMDDhhmm``).

A series converted once is not converted again: ``sourcedata/relaxline-ingest.tsv`` in
the output (the *ledger*; BIDS leaves ``sourcedata/`` to the user) lists every converted
SeriesInstanceUID and the files written. A series' files are converted into a staging
folder first, recorded in the ledger as ``writing``, renamed into place and then marked
``done``; an interrupted conversion is redone under the same names on the next run.
Series whose newest file is younger than ``settle`` seconds are left for the next run
(an export still arriving). Nothing in the DICOM folder is modified.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

from pipeline.dicomscan import (DicomSeries, Recognised, Rule, recognise_all,
                                scan_folder)
from pipeline.errors import InputError
from pipeline.outputs import (atomic_write_bytes, atomic_write_json, atomic_write_text,
                              atomic_write_tsv, ensure_dir, package_version)

LEDGER = Path("sourcedata") / "relaxline-ingest.tsv"
LEDGER_COLUMNS = ["series_uid", "study_uid", "subject", "session", "kind", "series_number",
                  "description", "n_files", "state", "outputs"]
BIDS_VERSION = "1.10.0"


@dataclass
class IngestOptions:
    """What ``relaxline ingest`` (or the workflow's ``dicom`` section) asks for."""

    subject: str | None = None
    session: str | None = None
    rules: list[Rule] = field(default_factory=list)
    settle_s: float = 0.0
    dry_run: bool = False


@dataclass
class IngestReport:
    """What happened to every series of the DICOM folder."""

    converted: list[tuple[Recognised, list[Path]]] = field(default_factory=list)
    planned: list[tuple[Recognised, str]] = field(default_factory=list)   # dry run
    already: list[DicomSeries] = field(default_factory=list)
    unclassified: list[Recognised] = field(default_factory=list)
    skipped: list[Recognised] = field(default_factory=list)
    settling: list[DicomSeries] = field(default_factory=list)
    problems: list[tuple[DicomSeries, str]] = field(default_factory=list)
    other_files: list[Path] = field(default_factory=list)

    def lines(self) -> list[str]:
        """A plain-text account, one line per series (for the terminal and the logs)."""
        out = []
        for r, files in self.converted:
            n = sum(1 for f in files if f.name.endswith(".nii.gz"))
            out.append(f"converted {r.series.label} -> {r.kind.suffix} ({r.reason}"
                       f"{', ' + r.series.note if r.series.note else ''}): {n} images in "
                       f"{files[0].parent}")
        for r, name in self.planned:
            out.append(f"would convert {r.series.label} -> {r.kind.suffix} ({r.reason}): "
                       f"{name}")
        for s in self.already:
            out.append(f"already converted: {s.label}")
        for r in self.skipped:
            out.append(f"skipped: {r.series.label}: {r.reason}")
        for s in self.settling:
            out.append(f"still arriving (newest file too recent), left for the next run: "
                       f"{s.label}")
        for r in self.unclassified:
            out.append(f"not recognised, not converted: {r.series.label}: {r.reason}")
        if self.other_files:
            shown = ", ".join(str(p) for p in self.other_files[:3])
            more = f" and {len(self.other_files) - 3} more" if len(self.other_files) > 3 else ""
            out.append(f"ignored {len(self.other_files)} non-DICOM file(s): {shown}{more}")
        for s, msg in self.problems:
            out.append(f"error: {msg}")
        return out


def find_tool(name: str) -> str | None:
    """An executable a PyPI wheel installs: beside this Python (the venv), else on PATH."""
    here = Path(sys.executable).parent / name
    return str(here) if here.is_file() else shutil.which(name)


def dcm2niix_path() -> str:
    """The dcm2niix executable (the PyPI wheel in the venv)."""
    exe = find_tool("dcm2niix")
    if exe is None:
        raise InputError("dcm2niix not found; it comes with relaxline's dependencies "
                         "(pip install dcm2niix).")
    return exe


def clean_label(text: str) -> str:
    """A BIDS label: letters and digits only."""
    return re.sub(r"[^0-9A-Za-z]", "", text)


# ---------------------------------------------------------------- the ledger

def read_ledger(raw_dir: Path):
    import pandas as pd
    p = raw_dir / LEDGER
    if not p.is_file():
        return pd.DataFrame(columns=LEDGER_COLUMNS)
    try:
        table = pd.read_csv(p, sep="\t", dtype=str, keep_default_na=False)
    except Exception as exc:
        raise InputError(f"{p}: the ingest ledger cannot be read ({exc}); it lists the DICOM "
                         f"series already converted. Restore it, or delete it to convert "
                         f"everything again.") from None
    missing = [c for c in LEDGER_COLUMNS if c not in table.columns]
    if missing:
        raise InputError(f"{p}: the ingest ledger lacks column(s) {', '.join(missing)}; "
                         f"restore it, or delete it to convert everything again.")
    return table[LEDGER_COLUMNS]


def _write_ledger(raw_dir: Path, table) -> None:
    atomic_write_tsv(raw_dir / LEDGER, table.sort_values(["subject", "session", "kind",
                                                          "series_number", "series_uid"],
                                                         kind="stable"))


def _set_row(table, row: dict):
    import pandas as pd
    table = table[table.series_uid != row["series_uid"]]
    return pd.concat([table, pd.DataFrame([{k: str(row[k]) for k in LEDGER_COLUMNS}])],
                     ignore_index=True)


# ---------------------------------------------------------------- naming

def _labels(r: Recognised, options: IngestOptions, ledger) -> tuple[str, str]:
    f = r.series.first
    sub = clean_label(options.subject or f.patient_id)
    if not sub:
        raise InputError(f"{r.series.label}: no PatientID to name the subject; give "
                         f"--subject (or dicom.subject in the config).")
    if options.session:
        return sub, clean_label(options.session)
    if not re.fullmatch(r"[0-9]{8}", f.study_date):
        raise InputError(f"{r.series.label}: StudyDate (0008,0020) is {f.study_date!r}, not "
                         f"YYYYMMDD; give --session.")
    ses = f.study_date
    others = ledger[(ledger.subject == sub) & (ledger.session == ses)
                    & (ledger.study_uid != f.study_uid)]
    if len(others):   # another study on the same day already holds ses-<date>
        ses = f.study_date + (f.study_time[:4] if len(f.study_time) >= 4 else "0000")
    return sub, ses


def _stem(r: Recognised, sub: str, ses: str, ledger) -> str:
    """``sub-_ses-[_run-n]``: run-2, run-3 ... when the session already has this kind."""
    same = ledger[(ledger.subject == sub) & (ledger.session == ses)
                  & (ledger.kind == r.kind.suffix) & (ledger.series_uid != r.series.uid)]
    run = f"_run-{len(same) + 1}" if len(same) else ""
    return f"sub-{sub}_ses-{ses}{run}"


def _names(r: Recognised, stem: str) -> list[str]:
    return [f"{stem}_{r.kind.entity}-{k + 1}_{r.kind.suffix}" for k in range(len(r.groups))]


# ---------------------------------------------------------------- conversion

def _convert_group(exe: str, images, work: Path, where: str, value_text: str) -> tuple[Path, Path]:
    """dcm2niix on the images of one value; returns (nii.gz, json) in ``work``."""
    src, out = ensure_dir(work / "in"), ensure_dir(work / "out")
    for n, img in enumerate(images):
        link = src / f"{n:05d}.dcm"
        try:
            os.symlink(img.path.resolve(), link)
        except OSError:
            shutil.copyfile(img.path, link)
    proc = subprocess.run([exe, "-b", "y", "-ba", "y", "-z", "y", "-f", "vol", "-w", "1",
                           "-o", str(out), str(src)], capture_output=True, text=True)
    niis = sorted(out.glob("*.nii.gz"))
    if proc.returncode != 0 or len(niis) != 1:
        tail = " ".join((proc.stdout + proc.stderr).split())[-400:]
        raise InputError(f"{where}: dcm2niix made {len(niis)} image(s) from the "
                         f"{len(images)} files at {value_text} (expected one 3D image; exit "
                         f"{proc.returncode}): {tail}")
    side = niis[0].with_name(niis[0].name[: -len(".nii.gz")] + ".json")
    if not side.is_file():
        raise InputError(f"{where}: dcm2niix wrote no JSON sidecar for {value_text}.")
    return niis[0], side


def _sidecar(r: Recognised, value: float, side: Path) -> dict:
    meta = json.loads(side.read_text(encoding="utf-8"))
    kind = r.kind
    meta[kind.key] = round(value / 1000.0, 9) if kind.tag != "FlipAngle" else value
    if kind.suffix == "VFA":
        tr = meta.get("RepetitionTime")
        if tr is not None:
            meta.setdefault("RepetitionTimeExcitation", tr)
        meta.setdefault("PulseSequenceType", "spoiled gradient echo"
                        if "SP" in str(meta.get("SequenceVariant", "")) else "gradient echo")
    meta["SeriesInstanceUID"] = r.series.uid
    meta["GeneratedBy"] = f"relaxline ingest {package_version()} (pixel data and sidecar: " \
                          f"{meta.get('ConversionSoftware', 'dcm2niix')} " \
                          f"{meta.get('ConversionSoftwareVersion', '')})".replace(" )", ")")
    return meta


def _check_grids(r: Recognised, niis: list[Path], values: list[float]) -> None:
    import nibabel as nib
    import numpy as np
    ref = nib.load(str(niis[0]))
    for p, v in zip(niis[1:], values[1:]):
        img = nib.load(str(p))
        if img.shape[:3] != ref.shape[:3] or not np.allclose(img.affine, ref.affine, atol=1e-3):
            raise InputError(f"{r.series.label}: inconsistent geometry after conversion: "
                             f"{r.kind.tag} {v:g} gives grid {img.shape[:3]} but "
                             f"{values[0]:g} gives {ref.shape[:3]} (or the affines differ); "
                             f"all images of a series must share one grid.")
        if len(img.shape) > 3 and any(s > 1 for s in img.shape[3:]):
            raise InputError(f"{r.series.label}: {r.kind.tag} {v:g} converted to a "
                             f"{len(img.shape)}D image {img.shape}; expected 3D.")


def convert_series(r: Recognised, folder: Path, names: list[str], exe: str,
                   stage: Path) -> list[tuple[Path, Path]]:
    """Convert every value of ``r`` into ``stage``; returns (staged file, final path) pairs
    (final paths in ``folder``, named ``names``)."""
    unit = "°" if r.kind.tag == "FlipAngle" else " ms"
    staged, niis = [], []
    values = list(r.groups)
    for k, (value, images) in enumerate(r.groups.items()):
        nii, side = _convert_group(exe, images, stage / f"v{k}", r.series.label,
                                   f"{r.kind.tag} {value:g}{unit}")
        niis.append(nii)
        meta = atomic_write_json(stage / f"{names[k]}.json", _sidecar(r, value, side))
        staged += [(nii, folder / f"{names[k]}.nii.gz"), (meta, folder / f"{names[k]}.json")]
    _check_grids(r, niis, values)
    return staged


def _dataset_files(raw_dir: Path, source: Path) -> None:
    """dataset_description.json and README for a new raw dataset (never overwritten)."""
    if not (raw_dir / "dataset_description.json").exists():
        atomic_write_json(raw_dir / "dataset_description.json", {
            "Name": f"relaxometry series from {source.name}", "BIDSVersion": BIDS_VERSION,
            "DatasetType": "raw",
            "GeneratedBy": [{"Name": "relaxline ingest", "Version": package_version(),
                             "Description": "DICOM converted with dcm2niix; series "
                                            "recognised from their DICOM tags"}]})
    if not any((raw_dir / n).exists() for n in ("README", "README.md", "README.txt")):
        atomic_write_text(raw_dir / "README.md", (
            "# Relaxometry series converted from DICOM\n\nWritten by `relaxline ingest`: one "
            "3D image per inversion time (`inv-`), flip angle (`flip-`) or echo (`echo-`), "
            "B1 mapping series in `fmap/`. `sourcedata/relaxline-ingest.tsv` lists the DICOM "
            "series converted (SeriesInstanceUID) and the files written.\n\nFor quality "
            "assurance and research only; not a medical device.\n"))


def ingest(dicom_dir: str | Path, raw_dir: str | Path, options: IngestOptions | None = None,
           now: float | None = None) -> IngestReport:
    """Convert the new, recognised series of ``dicom_dir`` into the BIDS dataset ``raw_dir``.

    Unusable series are reported in ``report.problems`` (the others are still converted);
    a folder without any DICOM file is an :class:`InputError`.
    """
    options = options or IngestOptions()
    src, raw = Path(dicom_dir), Path(raw_dir)
    series, other = scan_folder(src)
    if not series:
        hint = (f" ({len(other)} other file(s), e.g. {other[0]})" if other else "")
        raise InputError(f"{src}: no DICOM file found{hint}. Give the folder the scanner "
                         f"exported DICOM files (Part 10, with the 'DICM' preamble) to.")
    report = IngestReport(other_files=other)
    ledger = read_ledger(raw)
    done = set(ledger.series_uid[ledger.state == "done"])
    now = time.time() if now is None else now
    fresh = []
    for s in series:
        if s.uid in done:
            report.already.append(s)
        elif options.settle_s > 0 and max(i.mtime for i in s.images) > now - options.settle_s:
            report.settling.append(s)
        else:
            fresh.append(s)
    recognised, report.problems = recognise_all(fresh, options.rules)
    exe = None
    for r in recognised:
        if r.skipped:
            report.skipped.append(r)
            continue
        if r.kind is None:
            report.unclassified.append(r)
            continue
        try:
            sub, ses = _labels(r, options, ledger)
            old = ledger[ledger.series_uid == r.series.uid]
            if len(old):    # an interrupted conversion: same names again
                names = [Path(p).name[: -len(".nii.gz")] for p in
                         old.iloc[0].outputs.split(";") if p.endswith(".nii.gz")]
                if len(names) != len(r.groups):
                    names = _names(r, _stem(r, sub, ses, ledger))
            else:
                names = _names(r, _stem(r, sub, ses, ledger))
            if options.dry_run:
                report.planned.append((r, f"sub-{sub}/ses-{ses}/{r.kind.datatype}/"
                                          f"{names[0]} ... ({len(names)} images)"))
                ledger = _set_row(ledger, _row(r, sub, ses, "planned", []))
                continue
            exe = exe or dcm2niix_path()
            ensure_dir(raw)
            with tempfile.TemporaryDirectory(prefix=".relaxline-ingest-", dir=raw) as tmp:
                folder = raw / f"sub-{sub}" / f"ses-{ses}" / r.kind.datatype
                staged = convert_series(r, folder, names, exe, Path(tmp))
                _clash(staged, ledger, r)
                ledger = _set_row(ledger, _row(r, sub, ses, "writing",
                                               [dst for _, dst in staged], raw))
                _write_ledger(raw, ledger)
                for tmp_file, dst in staged:
                    atomic_write_bytes(dst, tmp_file.read_bytes())
            ledger = _set_row(ledger, _row(r, sub, ses, "done", [d for _, d in staged], raw))
            _write_ledger(raw, ledger)
            report.converted.append((r, [d for _, d in staged]))
        except InputError as exc:
            report.problems.append((r.series, str(exc)))
    if report.converted:
        _dataset_files(raw, src)
    return report


def _row(r: Recognised, sub: str, ses: str, state: str, outputs: Sequence[Path],
         raw: Path | None = None) -> dict:
    f = r.series.first
    return {"series_uid": r.series.uid, "study_uid": f.study_uid, "subject": sub,
            "session": ses, "kind": r.kind.suffix,
            "series_number": "" if f.series_number is None else f.series_number,
            "description": f.description.replace("\t", " "), "n_files": len(r.series.images),
            "state": state,
            "outputs": ";".join(str(p.relative_to(raw)) if raw else str(p) for p in outputs)}


def _clash(staged: list[tuple[Path, Path]], ledger, r: Recognised) -> None:
    """A target that exists and is not this series' own (earlier, interrupted) output is
    someone else's file: never overwritten."""
    own = set()
    for outs in ledger.outputs[ledger.series_uid == r.series.uid]:
        own.update(outs.split(";"))
    for _, dst in staged:
        if dst.exists() and not any(str(dst).endswith(o) for o in own if o):
            raise InputError(f"{r.series.label}: {dst} exists and was not written by an "
                             f"earlier ingest of this series; relaxline does not overwrite "
                             f"it. Move it away, or ingest into another folder.")


def ingest_for_run(cfg: dict, stream) -> bool:
    """``relaxline run`` with a ``dicom.drop_dir``: convert the drop folder's new series into
    ``input_dir`` before the sessions are planned. Returns True when a series could not be
    converted (the run goes on with the others and ends with exit status 2)."""
    d = cfg.get("dicom") or {}
    if not d.get("drop_dir"):
        return False
    options = IngestOptions(subject=d.get("subject"), rules=Rule.parse(d.get("rules")),
                            settle_s=60.0 * float(d.get("settle_minutes", 5)))
    try:
        report = ingest(d["drop_dir"], cfg["input_dir"], options)
    except InputError as exc:
        if "no DICOM file found" not in str(exc):
            raise
        print(f"relaxline run: DICOM drop folder: nothing to convert ({exc})", file=stream)
        return False
    for line in report.lines():
        if not line.startswith("already converted"):
            print(f"relaxline run: DICOM: {line}", file=stream)
    print(f"relaxline run: DICOM drop folder {d['drop_dir']}: {len(report.converted)} new "
          f"series converted, {len(report.already)} converted before", file=stream)
    return bool(report.problems)
