"""Session discovery and job planning for the workflow.

:func:`plan` walks ``input_dir`` for ``sub-*/ses-*/`` session folders and lists, per
session, the series each configured model fits (:class:`SeriesJob`, split into z-slab
chunk jobs when large) and where their outputs go. A session's series are looked for in
its BIDS datatype folders (``discovery.datatype``: by default ``anat/`` and ``fmap/``,
where BIDS puts B1 mapping series such as ``TB1DAM``).
"""
from __future__ import annotations

import fnmatch
import re
from dataclasses import dataclass, field
from pathlib import Path

from fitting.errors import excerpt
from pipeline.errors import InputError

MANIFEST = "{sub}/{ses}/fits/{model}/{stem}.fit.json"   # maps: {sub}/{ses}/anat|fmap/
CHUNK = "{sub}/{ses}/chunks/{model}/{stem}/chunk-{chunk}.npz"


@dataclass
class SeriesJob:
    """One fit: a model on one series of one session."""

    sub: str
    ses: str
    model: str
    stem: str
    inputs: list[str]
    shape: tuple[int, int, int]
    slabs: list[tuple[int, int]]   # z ranges of the chunk jobs; one entry = unchunked

    @property
    def chunked(self) -> bool:
        return len(self.slabs) > 1

    def manifest(self) -> str:
        return MANIFEST.format(sub=self.sub, ses=self.ses, model=self.model, stem=self.stem)

    def chunk_files(self) -> list[str]:
        return [CHUNK.format(sub=self.sub, ses=self.ses, model=self.model, stem=self.stem,
                             chunk=i) for i in range(len(self.slabs))] if self.chunked else []


@dataclass
class Session:
    sub: str
    ses: str
    folder: Path
    site: str
    scanner: str
    labels: str | None
    series: list[SeriesJob] = field(default_factory=list)
    temperature: float | None = None       # °C from the BIDS sessions file, if it gives one
    temperature_source: str = ""           # e.g. "sub-x_sessions.tsv (phantom_temperature)"

    @property
    def label(self) -> str:
        """Session label as QC writes it (the ``ses-`` value)."""
        return self.ses[len("ses-"):] if self.ses.startswith("ses-") else self.ses


@dataclass
class Plan:
    sessions: list[Session]
    skipped: list[str] = field(default_factory=list)   # warnings: files or folders left out

    def session(self, sub: str, ses: str) -> Session:
        for s in self.sessions:
            if s.sub == sub and s.ses == ses:
                return s
        raise KeyError(f"{sub}/{ses}")

    def job(self, sub: str, ses: str, model: str, stem: str) -> SeriesJob:
        for j in self.session(sub, ses).series:
            if j.model == model and j.stem == stem:
                return j
        raise KeyError(f"{sub}/{ses}/{model}/{stem}")

    def companion(self, cfg: dict, job: SeriesJob, kind: str) -> SeriesJob | None:
        """The fit whose map of ``kind`` ("b1": TB1map, "t1": T1map) feeds ``job``, or None.

        Candidates and whether one is required come from the config
        (:func:`pipeline.wfconfig.companion_models`: ``b1: dam``, ``t1: ir|vfa|auto``);
        the first candidate the session has is used. A candidate matching several series
        of the session is an error, as is a required one matching none.
        """
        from pipeline.wfconfig import companion_models
        models, required = companion_models(cfg, job.model, kind)
        session = self.session(job.sub, job.ses)
        for cand in models:
            found = [j for j in session.series if j.model == cand]
            if len(found) == 1:
                return found[0]
            if found or required:
                raise InputError(f"{session.folder}: models.{job.model}.{kind} "
                                 f"{'is' if required else 'takes'} '{cand}' but "
                                 f"{len(found)} {cand} series match "
                                 f"'{cfg['models'][cand]['pattern']}'; make the pattern "
                                 "match exactly one.")
        return None

    def b1_source(self, cfg: dict, job: SeriesJob) -> SeriesJob | None:
        """The B1 fit (dam or afi) whose TB1map feeds ``job`` (``b1: dam`` or ``b1: afi``)."""
        return self.companion(cfg, job, "b1")

    def t1_source(self, cfg: dict, job: SeriesJob) -> SeriesJob | None:
        """The ir/vfa fit whose T1map feeds ``job`` (``models.<name>.t1``)."""
        return self.companion(cfg, job, "t1")


def slab_bounds(nz: int, per_slice: int, max_voxels: int) -> list[tuple[int, int]]:
    """z ranges of whole slices holding at most ``max_voxels`` voxels (≥ 1 slice each)."""
    step = max(1, max_voxels // max(per_slice, 1))
    return [(z0, min(z0 + step, nz)) for z0 in range(0, nz, step)]


def _series_groups(files: list[Path]) -> dict[str, list[Path]]:
    # 3D files differing only by an index entity (flip-, echo-, inv-...) are one series;
    # the series reader names the stem the same way.
    from pipeline.series import _series_stem, nifti_stem
    from pipeline.series import _INDEX_ENTITY  # noqa: PLC2701 (same package)
    groups: dict[str, list[Path]] = {}
    for f in files:
        groups.setdefault(_INDEX_ENTITY.sub("", nifti_stem(f)), []).append(f)
    return {_series_stem(sorted(v)): sorted(v) for v in groups.values()}


# sidecar keys naming the site and the scanner, in order of preference: relaxline's own,
# then the BIDS keys a DICOM converter fills from the DICOM header
SITE_KEYS = ("Site", "InstitutionName")
SCANNER_KEYS = ("Scanner", "StationName")


def _site_scanner(files: list[Path], cfg: dict) -> tuple[str, str]:
    from pipeline.series import read_json_file
    for side in files:
        if side.suffix != ".json":
            continue
        try:
            meta = read_json_file(side)
        except InputError:   # a broken sidecar is reported by the fit that reads it
            continue
        if not isinstance(meta, dict):
            continue
        site = next((k for k in SITE_KEYS if meta.get(k)), None)
        scanner = next((k for k in SCANNER_KEYS if meta.get(k)), None)
        if site is not None or scanner is not None:
            return (_identity(meta, site, side) if site else cfg["history"]["site"],
                    _identity(meta, scanner, side) if scanner else cfg["history"]["scanner"])
    return cfg["history"]["site"], cfg["history"]["scanner"]


def _identity(meta: dict, key: str, side: Path) -> str:
    """A sidecar's site or scanner name: a short text label (it keys the history)."""
    v = meta[key]
    if isinstance(v, int) and not isinstance(v, bool):
        v = str(v)
    if not isinstance(v, str) or not v.strip() or len(v) > 200 or not v.isprintable():
        what = "site" if key in SITE_KEYS else "scanner"
        raise InputError(f"{side}: key '{key}' must be a short text label naming the {what} "
                         f"(it keys the history database), got {excerpt(v)}; fix the "
                         "sidecar.")
    return v.strip()


# characters Snakemake reads as wildcard braces in file names; such a file cannot be a job input
_UNUSABLE = re.compile(r"[{}]")


def _usable(path: Path, skipped: list[str]) -> bool:
    if _UNUSABLE.search(path.name):
        skipped.append(f"{path}: skipped; its name holds '{{' or '}}', which the workflow "
                       "cannot use in a file name (Snakemake patterns). Rename it to process "
                       "it.")
        return False
    return True


def datatypes(cfg: dict) -> list[str]:
    """The datatype folders searched in each session (``discovery.datatype``)."""
    d = cfg["discovery"]["datatype"]
    return [d] if isinstance(d, str) else list(d)


def session_temperatures(sub_dir: Path, column: str) -> tuple[dict[str, float], str]:
    """Phantom temperatures (°C) per ``ses-`` folder from the BIDS sessions file.

    Reads ``sub-<label>/sub-<label>_sessions.tsv`` (BIDS: one row per session, first
    column ``session_id``); ``column`` holds the temperature in °C, described in the
    file's JSON sidecar (``sub-<label>_sessions.json``: ``{column: {"Description": ...,
    "Units": "oC"}}``). Empty cells and ``n/a`` mean "not measured" (the sidecars or the
    config fallback then apply). Returns ({ses-folder: °C}, file name); an empty mapping
    when the file or the column is absent.
    """
    import csv
    tsv = sub_dir / f"{sub_dir.name}_sessions.tsv"
    if not tsv.is_file():
        return {}, ""
    side = tsv.with_suffix(".json")
    if side.is_file():
        from pipeline.series import read_json_file
        meta = read_json_file(side, "sessions file's JSON sidecar")
        units = (meta.get(column) or {}).get("Units") if isinstance(meta, dict) and \
            isinstance(meta.get(column), dict) else None
        if units is not None and str(units).replace("°", "deg").lower() not in \
                ("oc", "degc", "degree celsius", "degrees celsius", "celsius", "c"):
            raise InputError(f"{side}: key `{column}.Units` is {excerpt(units)}; the phantom "
                             "temperature column must be in degrees Celsius (\"oC\", as BIDS writes it).")
    try:
        with tsv.open(encoding="utf-8", newline="") as fh:
            rows = list(csv.DictReader(fh, delimiter="\t"))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"{tsv}: cannot read the BIDS sessions file ({exc}).") from None
    if not rows or column not in rows[0]:
        return {}, ""
    if "session_id" not in rows[0]:
        raise InputError(f"{tsv}: no `session_id` column; a BIDS sessions file lists each "
                         "session as ses-<label> in its first column, session_id.")
    out = {}
    for i, r in enumerate(rows, start=2):
        text = (r.get(column) or "").strip()
        if text in ("", "n/a"):
            continue
        try:
            t = float(text)
        except ValueError:
            t = float("nan")
        if not (-20.0 <= t <= 60.0):
            raise InputError(f"{tsv}: line {i}, column `{column}`: {excerpt(text)} is not a phantom "
                             "temperature in °C (expected a number from -20 to 60, or n/a "
                             "when not measured).")
        out[str(r["session_id"]).strip()] = t
    return out, tsv.name


def plan(cfg: dict) -> Plan:
    """Find the sessions of ``input_dir`` and the fit jobs of each (reads headers only)."""
    from pipeline.series import _load_image
    d = cfg["discovery"]
    root = Path(cfg["input_dir"])
    only = set(d.get("sessions") or [])
    sessions, skipped = [], []
    column = cfg["phantom"]["temperature_column"]
    for sub_dir in sorted(p for p in root.glob(d["subject_glob"]) if p.is_dir()):
        if not _usable(sub_dir, skipped):
            continue
        temps, temps_file = session_temperatures(sub_dir, column)
        for ses_dir in sorted(p for p in sub_dir.glob(d["session_glob"]) if p.is_dir()):
            if only and ses_dir.name not in only:
                continue
            folders = [ses_dir / t for t in datatypes(cfg) if (ses_dir / t).is_dir()]
            if not _usable(ses_dir, skipped) or not folders:
                continue
            names = sorted(p for f in folders for p in f.iterdir() if p.is_file())
            names = [p for p in names if not fnmatch.fnmatch(p.name, "*.nii*")
                     or _usable(p, skipped)]
            labels = [p for p in names if fnmatch.fnmatch(p.name, cfg["phantom"]["labels"])]
            if len(labels) > 1:
                raise InputError(f"{ses_dir}: {len(labels)} files match the label pattern "
                                 f"phantom.labels = '{cfg['phantom']['labels']}' "
                                 f"({', '.join(p.name for p in labels)}); make it match one.")
            site, scanner = _site_scanner(names, cfg)
            s = Session(sub_dir.name, ses_dir.name, ses_dir, site, scanner,
                        str(labels[0]) if labels else None)
            if ses_dir.name in temps:
                s.temperature = temps[ses_dir.name]
                s.temperature_source = f"{temps_file} ({column})"
            for model, m in cfg["models"].items():
                files = [p for p in names if fnmatch.fnmatch(p.name, m["pattern"])
                         and p not in labels and re.search(r"\.nii(\.gz)?$", p.name)]
                for stem, group in _series_groups(files).items():
                    shape = tuple(int(v) for v in _load_image(group[0]).shape[:3])
                    shape = (shape + (1, 1, 1))[:3]
                    n = shape[0] * shape[1] * shape[2]
                    slabs = slab_bounds(shape[2], shape[0] * shape[1], cfg["fit"]["chunk_voxels"]) \
                        if n > cfg["fit"]["chunk_voxels"] else [(0, shape[2])]
                    s.series.append(SeriesJob(s.sub, s.ses, model, stem,
                                              [str(p) for p in group], shape, slabs))
            if s.series:
                sessions.append(s)
    return Plan(sessions, skipped)
