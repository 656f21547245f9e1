"""DICOM folders: read the headers, group files into series, recognise each series' role.

Only the headers are read here (``pydicom``, pixel data skipped); the conversion of the
pixel data is :mod:`pipeline.ingest`'s job (``dcm2niix``).

A series (one SeriesInstanceUID) is recognised by which acquisition parameter varies
across its images:

==========  =====================================  ==============  =======  ========
kind        recognised by                          varying tag     entity   datatype
==========  =====================================  ==============  =======  ========
``IRT1``    InversionTime (0018,0082) varies       InversionTime   inv      anat
``VFA``     FlipAngle (0018,1314) varies           FlipAngle       flip     anat
``TB1DAM``  exactly two flip angles α, 2α, α≥30°   FlipAngle       flip     fmap
``MESE``    EchoTime varies, ScanningSequence SE   EchoTime        echo     anat
``MEGRE``   EchoTime varies, ScanningSequence GR   EchoTime        echo     anat
==========  =====================================  ==============  =======  ========

(The kinds are the BIDS qMRI suffixes.) A series where nothing varies, where more than
one of TI, TE and flip angle varies, whose images are derived (scanner-computed maps,
reformats) or not classic MR Image Storage is *unclassified*: listed with the reason,
never guessed. Rules from the config (``dicom.rules``: a glob on SeriesDescription →
a kind or ``skip``) settle series whose tags do not tell; the kind's varying tag must
still be present in every image. Problems that make a series unusable (its varying tag
missing in some images, images of different geometry, an incomplete set of slices) are
:class:`~pipeline.errors.InputError` naming the series.
"""
from __future__ import annotations

import fnmatch
import math
import os
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Sequence

from pipeline.errors import InputError

MR_IMAGE_STORAGE = "1.2.840.10008.5.1.4.1.1.4"
ENHANCED_MR_STORAGE = "1.2.840.10008.5.1.4.1.1.4.1"
DAM_MIN_ALPHA_DEG = 30.0   # a 2:1 pair below this is a two-angle VFA, not a double angle
VALUE_DECIMALS = 3         # ms / degrees: values equal to 0.001 are the same value
SKIP = "skip"


@dataclass(frozen=True)
class Kind:
    """How a series kind is written in BIDS raw data."""

    suffix: str      # BIDS suffix
    tag: str         # varying DICOM attribute (pydicom keyword)
    key: str         # BIDS sidecar key of the varying value
    entity: str      # BIDS index entity of the volumes
    datatype: str    # BIDS datatype folder
    model: str       # the relaxline model that fits it


KINDS: dict[str, Kind] = {k.suffix: k for k in (
    Kind("IRT1", "InversionTime", "InversionTime", "inv", "anat", "ir"),
    Kind("VFA", "FlipAngle", "FlipAngle", "flip", "anat", "vfa"),
    Kind("TB1DAM", "FlipAngle", "FlipAngle", "flip", "fmap", "dam"),
    Kind("MESE", "EchoTime", "EchoTime", "echo", "anat", "mese"),
    Kind("MEGRE", "EchoTime", "EchoTime", "echo", "anat", "megre"),
)}
VARYING_TAGS = ("InversionTime", "EchoTime", "FlipAngle")
TAG_NUMBERS = {"InversionTime": "(0018,0082)", "EchoTime": "(0018,0081)",
               "FlipAngle": "(0018,1314)"}


@dataclass(frozen=True)
class Image:
    """The header fields of one DICOM file that recognition and checks need."""

    path: Path
    series_uid: str
    study_uid: str
    series_number: int | None
    description: str
    sop_class: str
    image_type: tuple[str, ...]
    scanning_sequence: str
    values: dict[str, float | None]     # InversionTime, EchoTime (ms), FlipAngle (deg)
    repetition_time: float | None       # ms
    rows: int | None
    columns: int | None
    orientation: tuple[float, ...] | None
    position: tuple[float, ...] | None
    spacing: tuple[float, ...] | None
    patient_id: str
    study_date: str
    study_time: str
    mtime: float


@dataclass
class DicomSeries:
    """The images of one SeriesInstanceUID (magnitude images only, see :attr:`note`)."""

    uid: str
    images: list[Image]
    note: str = ""

    @property
    def first(self) -> Image:
        return self.images[0]

    @property
    def label(self) -> str:
        """How messages name the series: number, description and folder."""
        f = self.first
        num = f"series {f.series_number}" if f.series_number is not None else "series"
        folder = os.path.commonpath([str(i.path.parent) for i in self.images])
        return f"{num} '{f.description}' ({len(self.images)} files in {folder})"

    def distinct(self, tag: str) -> list[float]:
        return sorted({round(v, VALUE_DECIMALS) for i in self.images
                       if (v := i.values.get(tag)) is not None})


@dataclass
class Recognised:
    """The outcome for one series: a kind, or why there is none."""

    series: DicomSeries
    kind: Kind | None
    reason: str                   # how it was recognised, or why not
    by_rule: str | None = None    # the rule's pattern when a rule decided
    skipped: bool = False
    groups: dict[float, list[Image]] = field(default_factory=dict)  # value -> images


@dataclass(frozen=True)
class Rule:
    """``dicom.rules`` entry: SeriesDescription glob (case-insensitive) -> kind or skip."""

    match: str
    kind: str

    @classmethod
    def parse(cls, entries: Sequence[dict[str, Any]] | None, source: str = "config"
              ) -> list["Rule"]:
        rules = []
        for n, e in enumerate(entries or []):
            where = f"{source}: key `dicom.rules[{n}]`"
            if not isinstance(e, dict) or set(e) != {"match", "kind"}:
                raise InputError(f"{where}: expected {{match: <SeriesDescription glob>, kind: "
                                 f"<{'|'.join(KINDS)}|skip>}}, got {e!r}.")
            if e["kind"] not in (*KINDS, SKIP):
                raise InputError(f"{where}: kind {e['kind']!r} is not one of "
                                 f"{', '.join((*KINDS, SKIP))}.")
            rules.append(cls(str(e["match"]), str(e["kind"])))
        return rules

    def matches(self, description: str) -> bool:
        return fnmatch.fnmatchcase(description.lower(), self.match.lower())


# ---------------------------------------------------------------- reading headers

def _strings(ds, keyword: str) -> list[str]:
    """A multi-valued string attribute (CS, VM 1-n) as a list, upper case."""
    v = ds.get(keyword)
    if v is None or v == "":
        return []
    return [str(x).upper() for x in ([v] if isinstance(v, (str, bytes)) else v)]


def _num(ds, keyword: str) -> float | None:
    """A numeric attribute (first value when multi-valued), None when absent or unusable."""
    v = ds.get(keyword)
    if v is None or v == "":
        return None
    if not isinstance(v, (str, bytes, int, float)):
        try:
            v = v[0]
        except (TypeError, IndexError):
            return None
    try:
        x = float(v)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def _floats(ds, keyword: str) -> tuple[float, ...] | None:
    v = ds.get(keyword)
    if v is None or v == "":
        return None
    try:
        return tuple(round(float(x), 4) for x in v)
    except (TypeError, ValueError):
        return None


def _is_dicom_file(path: Path) -> bool:
    """DICOM Part 10 files carry 'DICM' after a 128-byte preamble."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(132)
    except OSError:
        return False
    return len(head) == 132 and head[128:] == b"DICM"


def read_image(path: Path) -> Image:
    """Header fields of one DICOM file (pixel data not read)."""
    import pydicom
    from pydicom.errors import InvalidDicomError
    try:
        ds = pydicom.dcmread(str(path), stop_before_pixels=True)
    except (InvalidDicomError, OSError, EOFError, ValueError, KeyError, TypeError) as exc:
        raise InputError(f"{path}: starts like a DICOM file but its header cannot be read "
                         f"({type(exc).__name__}: {exc}); export it again from the scanner "
                         f"or remove it from the folder.") from None
    uid = str(ds.get("SeriesInstanceUID", "") or "")
    if not uid:
        raise InputError(f"{path}: DICOM file without SeriesInstanceUID (0020,000E); it "
                         f"cannot be assigned to a series. Export it again or remove it.")
    sop = ds.get("SOPClassUID") or getattr(getattr(ds, "file_meta", None),
                                           "MediaStorageSOPClassUID", "")
    num = ds.get("SeriesNumber")
    return Image(
        path=path, series_uid=uid, study_uid=str(ds.get("StudyInstanceUID", "") or ""),
        series_number=int(num) if num not in (None, "") else None,
        description=str(ds.get("SeriesDescription", "") or ds.get("ProtocolName", "") or ""),
        sop_class=str(sop or ""),
        image_type=tuple(_strings(ds, "ImageType")),
        scanning_sequence="\\".join(_strings(ds, "ScanningSequence")),
        values={t: _num(ds, t) for t in VARYING_TAGS},
        repetition_time=_num(ds, "RepetitionTime"),
        rows=int(ds.Rows) if "Rows" in ds else None,
        columns=int(ds.Columns) if "Columns" in ds else None,
        orientation=_floats(ds, "ImageOrientationPatient"),
        position=_floats(ds, "ImagePositionPatient"),
        spacing=_floats(ds, "PixelSpacing"),
        patient_id=str(ds.get("PatientID", "") or ""),
        study_date=str(ds.get("StudyDate", "") or ""),
        study_time=str(ds.get("StudyTime", "") or ""),
        mtime=path.stat().st_mtime)


def scan_folder(folder: str | Path) -> tuple[list[DicomSeries], list[Path]]:
    """All DICOM series under ``folder`` (any nesting, any order) and the non-DICOM files.

    Files are grouped by SeriesInstanceUID; inside a series, images are ordered by their
    path. Hidden files and ``DICOMDIR`` index files are ignored.
    """
    root = Path(folder)
    if not root.is_dir():
        raise InputError(f"{root}: DICOM folder not found; give the folder the scanner "
                         f"exported to.")
    by_uid: dict[str, list[Image]] = {}
    other: list[Path] = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = sorted(d for d in dirnames if not d.startswith("."))
        for name in sorted(filenames):
            p = Path(dirpath) / name
            if name.startswith(".") or name.upper() == "DICOMDIR" or not p.is_file():
                continue
            if not _is_dicom_file(p):
                other.append(p)
                continue
            img = read_image(p)
            by_uid.setdefault(img.series_uid, []).append(img)
    series = []
    for uid, images in by_uid.items():
        images.sort(key=lambda i: str(i.path))
        series.append(_magnitude_only(DicomSeries(uid, images)))
    series.sort(key=lambda s: (s.first.study_date, s.first.study_time,
                               s.first.series_number if s.first.series_number is not None
                               else 1 << 30, s.uid))
    return series, other


def _is_phase(img: Image) -> bool:
    # ImageType value 3 names the image component: M magnitude, P phase, R/I real/imaginary
    return any(v in ("P", "PHASE", "R", "REAL", "I", "IMAGINARY") for v in img.image_type[2:])


def _magnitude_only(s: DicomSeries) -> DicomSeries:
    mag = [i for i in s.images if not _is_phase(i)]
    if mag and len(mag) < len(s.images):
        return DicomSeries(s.uid, mag, note=f"{len(s.images) - len(mag)} phase/real/imaginary "
                                            f"images left out (magnitude fitted)")
    return s


# ---------------------------------------------------------------- recognition

def recognise(s: DicomSeries, rules: Sequence[Rule] = ()) -> Recognised:
    """The series' kind (or why it has none); raises InputError when it is unusable."""
    f = s.first
    rule = next((r for r in rules if r.matches(f.description)), None)
    if rule is not None and rule.kind == SKIP:
        return Recognised(s, None, f"skipped by rule '{rule.match}'", rule.match, skipped=True)
    if f.sop_class == ENHANCED_MR_STORAGE:
        return Recognised(s, None, "Enhanced MR multi-frame images: not supported; export "
                                   "the series as classic MR Image Storage")
    if f.sop_class != MR_IMAGE_STORAGE:
        return Recognised(s, None, f"not MR Image Storage (SOP class {f.sop_class or '?'})")
    if all(_is_phase(i) for i in s.images):
        return Recognised(s, None, "phase/real/imaginary images only (no magnitude)")
    if rule is None and "DERIVED" in f.image_type[:1]:
        return Recognised(s, None, "derived images (ImageType DERIVED: scanner-computed map "
                                   "or reformat), not acquired data")
    varying = [t for t in VARYING_TAGS if len(s.distinct(t)) > 1]
    if rule is not None:
        kind = KINDS[rule.kind]
        how = f"rule '{rule.match}'"
    else:
        if not varying:
            return Recognised(s, None, "nothing varies (one TI, TE and flip angle): not a "
                                       "relaxometry series")
        if len(varying) > 1:
            return Recognised(s, None, f"{' and '.join(varying)} all vary; add a rule "
                                       f"(dicom.rules) if this is a relaxometry series")
        kind, how = _kind_from_tags(s, varying[0])
        if kind is None:
            return Recognised(s, None, how)
    groups = _groups(s, kind)
    _check_geometry(s, groups, kind)
    return Recognised(s, kind, how, rule.match if rule else None, groups=groups)


def _kind_from_tags(s: DicomSeries, tag: str) -> tuple[Kind | None, str]:
    values = s.distinct(tag)
    if tag == "InversionTime":
        return KINDS["IRT1"], f"{len(values)} inversion times"
    if tag == "FlipAngle":
        if len(values) == 2 and math.isclose(values[1], 2 * values[0], rel_tol=0.01) \
                and values[0] >= DAM_MIN_ALPHA_DEG:
            return KINDS["TB1DAM"], f"flip angles {values[0]:g}° and {values[1]:g}° (2:1)"
        return KINDS["VFA"], f"{len(values)} flip angles"
    seq = set(s.first.scanning_sequence.split("\\"))
    if "GR" in seq:
        return KINDS["MEGRE"], f"{len(values)} echo times, gradient echo"
    if "SE" in seq:
        return KINDS["MESE"], f"{len(values)} echo times, spin echo"
    return None, (f"{len(values)} echo times but ScanningSequence (0018,0020) is "
                  f"'{s.first.scanning_sequence}', neither SE nor GR; add a rule "
                  f"(dicom.rules) naming MESE or MEGRE")


def _groups(s: DicomSeries, kind: Kind) -> dict[float, list[Image]]:
    missing = [i for i in s.images if i.values.get(kind.tag) is None]
    if missing:
        raise InputError(f"{s.label}: {kind.suffix} series but {kind.tag} "
                         f"{TAG_NUMBERS[kind.tag]} is missing in {len(missing)} of "
                         f"{len(s.images)} files (e.g. {missing[0].path}); relaxline needs the "
                         f"varying {kind.tag} of every image. Export the series again with "
                         f"full headers, or skip it with a dicom.rules entry.")
    groups: dict[float, list[Image]] = {}
    for i in s.images:
        groups.setdefault(round(i.values[kind.tag], VALUE_DECIMALS), []).append(i)
    if len(groups) < 2:
        raise InputError(f"{s.label}: {kind.suffix} series (by rule) but {kind.tag} does not "
                         f"vary (all {next(iter(groups)):g}); the rule matches the wrong "
                         f"series, or the series is incomplete.")
    return dict(sorted(groups.items()))


def _check_geometry(s: DicomSeries, groups: dict[float, list[Image]], kind: Kind) -> None:
    """Every value must cover the same slices on the same grid (no silent resampling)."""
    def describe(attr: str) -> Counter:
        return Counter(getattr(i, attr) for i in s.images)

    for attr, what in (("rows", "matrix rows"), ("columns", "matrix columns"),
                       ("orientation", "ImageOrientationPatient"),
                       ("spacing", "PixelSpacing")):
        seen = describe(attr)
        if len(seen) > 1:
            (a, na), (b, nb) = seen.most_common(2)
            raise InputError(f"{s.label}: inconsistent geometry: {what} is {a} in {na} files "
                             f"but {b} in {nb}; all images of a series must share one grid. "
                             f"Export the series again, or skip it with a dicom.rules entry.")
    slices = {v: sorted(i.position or () for i in imgs) for v, imgs in groups.items()}
    (v0, ref), *rest = slices.items()
    unit = "°" if kind.tag == "FlipAngle" else " ms"
    for v, pos in rest:
        if pos != ref:
            raise InputError(f"{s.label}: inconsistent geometry: {kind.tag} {v:g}{unit} has "
                             f"{len(pos)} slice(s) at other positions than {kind.tag} "
                             f"{v0:g}{unit} ({len(ref)} slice(s)); every {kind.tag} must cover "
                             f"the same slices (an incomplete export?).")
    for v, imgs in groups.items():
        if len({i.position for i in imgs}) < len(imgs):
            raise InputError(f"{s.label}: {len(imgs)} images share {kind.tag} {v:g}{unit} but "
                             f"some lie at the same position: duplicates, or another value "
                             f"varies that relaxline does not separate.")


def recognise_all(series: Iterable[DicomSeries], rules: Sequence[Rule] = ()
                  ) -> tuple[list[Recognised], list[tuple[DicomSeries, str]]]:
    """Recognise every series; unusable ones are collected as (series, message)."""
    done, problems = [], []
    for s in series:
        try:
            done.append(recognise(s, rules))
        except InputError as exc:
            problems.append((s, str(exc)))
    return done, problems
