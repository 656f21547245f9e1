"""Test helpers: write MR Image Storage DICOM series with pydicom (classic, one slice a file).

The headers carry the real attributes a scanner writes for relaxometry: InversionTime,
EchoTime, RepetitionTime (ms), FlipAngle (deg), ScanningSequence, SequenceVariant,
SeriesDescription, ImageType, RescaleSlope/RescaleIntercept and the patient geometry.
Stored values are ``round((signal - intercept) / slope)`` as uint16, so a converter must
apply the rescale to get the signal back.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

import numpy as np

MR_IMAGE_STORAGE = "1.2.840.10008.5.1.4.1.1.4"


def uid() -> str:
    """A fresh UID under the 2.25 (UUID-derived) root, which needs no registration."""
    import uuid
    return f"2.25.{uuid.uuid4().int}"


def write_series(folder: Path, volumes: np.ndarray, values: Sequence[float], tag: str, *,
                 description: str, series_number: int, tr_ms: float, te_ms: float = 10.0,
                 flip_deg: float = 90.0, ti_ms: float | None = None,
                 scanning_sequence: str | list[str] = "SE", sequence_variant: str = "NONE",
                 image_type: Sequence[str] = ("ORIGINAL", "PRIMARY", "M", "NONE"),
                 slope: float = 1.0, intercept: float = 0.0, spacing_mm: float = 2.0,
                 thickness_mm: float = 4.0, study: dict[str, str] | None = None,
                 series_uid: str | None = None, names: str = "{series}_{index:04d}.dcm",
                 omit: Sequence[str] = (), template=None, extra: dict[str, Any] | None = None
                 ) -> list[Path]:
    """Write ``volumes`` (x, y, z, n), volume k at ``values[k]`` of ``tag`` (ms or degrees).

    One file per slice and value; ``omit`` drops attributes (e.g. the varying tag) from
    every file; ``template`` is a pydicom Dataset whose attributes are copied first (a
    real image's header).
    """
    import pydicom
    from pydicom.dataset import Dataset, FileMetaDataset
    from pydicom.uid import ExplicitVRLittleEndian

    folder.mkdir(parents=True, exist_ok=True)
    study = study or new_study()
    series_uid = series_uid or uid()
    nx, ny, nz, n = volumes.shape
    frame = uid()
    paths = []
    index = 0
    for k in range(n):
        for z in range(nz):
            index += 1
            ds = Dataset()
            if template is not None:
                for elem in template:
                    if elem.tag.group not in (0x7FE0, 0x0002):
                        ds.add(elem)
            meta = FileMetaDataset()
            meta.MediaStorageSOPClassUID = MR_IMAGE_STORAGE
            meta.MediaStorageSOPInstanceUID = uid()
            meta.TransferSyntaxUID = ExplicitVRLittleEndian
            ds.file_meta = meta
            ds.SOPClassUID = MR_IMAGE_STORAGE
            ds.SOPInstanceUID = meta.MediaStorageSOPInstanceUID
            ds.Modality = "MR"
            ds.PatientName = "Phantom^Demo"
            ds.PatientID = study["patient_id"]
            ds.StudyInstanceUID = study["uid"]
            ds.StudyDate = study["date"]
            ds.StudyTime = study["time"]
            ds.SeriesDate = study["date"]
            ds.SeriesTime = study["time"]
            ds.AcquisitionTime = study["time"]
            ds.SeriesInstanceUID = series_uid
            ds.FrameOfReferenceUID = frame
            ds.SeriesNumber = series_number
            ds.InstanceNumber = index
            ds.SeriesDescription = description
            ds.ProtocolName = description
            ds.ImageType = list(image_type)
            ds.ScanningSequence = scanning_sequence
            ds.SequenceVariant = sequence_variant
            ds.MRAcquisitionType = "2D"
            ds.MagneticFieldStrength = 3.0
            ds.InstitutionName = "Northfield Lab (invented)"
            ds.StationName = "BAY2"
            ds.Manufacturer = "relaxline test"
            ds.RepetitionTime = f"{tr_ms:g}"
            ds.EchoTime = f"{te_ms:g}"
            ds.FlipAngle = f"{flip_deg:g}"
            if ti_ms is not None:
                ds.InversionTime = f"{ti_ms:g}"
            setattr(ds, tag, f"{values[k]:g}")
            if tag == "EchoTime":
                ds.EchoNumbers = k + 1
            if template is None or nz > 1 or "ImagePositionPatient" not in template:
                # a template's own geometry is kept (one slice)
                ds.SliceThickness = f"{thickness_mm:g}"
                ds.SpacingBetweenSlices = f"{thickness_mm:g}"
                ds.PixelSpacing = [f"{spacing_mm:g}", f"{spacing_mm:g}"]
                ds.ImageOrientationPatient = ["1", "0", "0", "0", "1", "0"]
                ds.ImagePositionPatient = ["-40", "-40", f"{z * thickness_mm:g}"]
                ds.SliceLocation = f"{z * thickness_mm:g}"
            ds.Rows, ds.Columns = ny, nx
            ds.SamplesPerPixel = 1
            ds.PhotometricInterpretation = "MONOCHROME2"
            ds.BitsAllocated, ds.BitsStored, ds.HighBit = 16, 16, 15
            ds.PixelRepresentation = 0
            ds.RescaleSlope = f"{slope:g}"
            ds.RescaleIntercept = f"{intercept:g}"
            ds.RescaleType = "US"
            for key, value in (extra or {}).items():
                setattr(ds, key, value)
            stored = np.clip(np.round((volumes[:, :, z, k] - intercept) / slope), 0, 65535)
            # DICOM rows run along y (the second image axis), columns along x
            ds.PixelData = stored.T.astype("<u2").tobytes()
            for key in omit:
                if key in ds:
                    delattr(ds, key)
            p = folder / names.format(series=series_number, index=index)
            p.parent.mkdir(parents=True, exist_ok=True)
            pydicom.dcmwrite(str(p), ds, enforce_file_format=True)
            paths.append(p)
    return paths


def new_study(patient_id: str = "QA-PHANTOM-1", date: str = "20261105",
              time: str = "073000") -> dict[str, str]:
    return {"uid": uid(), "patient_id": patient_id, "date": date, "time": time}
