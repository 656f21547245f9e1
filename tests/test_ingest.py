"""`relaxline ingest`: DICOM series (synthesised with pydicom, and a real MR image pydicom
ships) -> BIDS raw data -> maps that match the values the files were made with.

Signals come from published closed forms, not from the project's forward models:
inversion recovery with long TR, |M0 (1 - 2 e^(-TI/T1))| (Bloch equations; Barral et al.
2010, Magn Reson Med 64:1057 with ideal inversion); spoiled gradient echo
M0 sin a (1 - E1) / (1 - cos a E1), E1 = e^(-TR/T1) (Ernst & Anderson 1966, Rev Sci
Instrum 37:93); spin-echo and gradient-echo decay M0 e^(-TE/T2) (Carr & Purcell 1954,
Phys Rev 94:630) and M0 e^(-TE/T2*); double angle with full recovery:
S(2a)/S(a) = 2 cos(a B1) (Insko & Bolinger 1993, J Magn Reson A 103:82).
"""
from __future__ import annotations

import json
import os
import random
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from bidscheck import summary, validate
from dicomsynth import new_study, uid, write_series
from pipeline.cli import main
from pipeline.dicomscan import Rule, recognise, scan_folder
from pipeline.ingest import LEDGER, IngestOptions, ingest

NX, NY, NZ = 12, 10, 2
SUB = "sub-QAPHANTOM1"


def regions() -> np.ndarray:
    """Four blocks of the image (labels 1-4) and a zero border (label 0)."""
    lab = np.zeros((NX, NY, NZ), int)
    lab[1:6, 1:5], lab[6:11, 1:5], lab[1:6, 5:9], lab[6:11, 5:9] = 1, 2, 3, 4
    return lab


LAB = regions()
T1 = np.array([1.0, 0.3, 0.6, 1.2, 2.0])      # s, per label (0: border)
T2 = np.array([1.0, 0.04, 0.08, 0.15, 0.30])
T2S = T2 * 0.5
B1 = np.array([1.0, 0.85, 0.95, 1.05, 1.15])
M0 = np.where(LAB > 0, 2000.0, 0.0)


def per_voxel(values: np.ndarray) -> np.ndarray:
    return values[LAB]


def ir_volumes(ti_ms):
    t1 = per_voxel(T1)[..., None]
    return np.abs(M0[..., None] * (1 - 2 * np.exp(-np.asarray(ti_ms) / 1000.0 / t1)))


def spgr_volumes(flips, tr_ms):
    t1 = per_voxel(T1)[..., None]
    e1 = np.exp(-tr_ms / 1000.0 / t1)
    a = np.radians(flips)
    return M0[..., None] * np.sin(a) * (1 - e1) / (1 - np.cos(a) * e1)


def decay_volumes(te_ms, t2):
    return M0[..., None] * np.exp(-np.asarray(te_ms) / 1000.0 / per_voxel(t2)[..., None])


def dam_volumes(alpha):
    # TR >> T1: full recovery, S = M0 sin(a B1) (Insko & Bolinger 1993)
    b1 = per_voxel(B1)[..., None]
    return M0[..., None] * np.sin(np.radians([alpha, 2 * alpha]) * b1)


def on_dicom_grid(path: Path, ipp=(-40.0, -40.0, 0.0), spacing: float = 2.0,
                  thickness: float = 4.0) -> np.ndarray:
    """A NIfTI image resampled (by index) onto the DICOM (column, row, slice) grid of
    :func:`dicomsynth.write_series` (orientation rows along +x, columns along +y, LPS),
    through the NIfTI affine (RAS): independent of how the converter orders the axes."""
    img = nib.load(str(path))
    data = np.asarray(img.dataobj)
    ijk = np.indices(data.shape[:3]).reshape(3, -1)
    ras = img.affine[:3, :3] @ ijk + img.affine[:3, 3:4]
    lps = ras * np.array([[-1.0], [-1.0], [1.0]])   # DICOM patient axes
    col = np.rint((lps[0] - ipp[0]) / spacing).astype(int)
    row = np.rint((lps[1] - ipp[1]) / spacing).astype(int)
    sl = np.rint((lps[2] - ipp[2]) / thickness).astype(int)
    out = np.full((col.max() + 1, row.max() + 1, sl.max() + 1) + data.shape[3:], np.nan)
    out[col, row, sl] = data.reshape((-1,) + data.shape[3:])
    return out


def _region_median(path: Path, label: int) -> float:
    return float(np.median(on_dicom_grid(path)[LAB == label]))


def _shuffle_into(paths: list[Path], dest: Path, seed: int) -> None:
    """Move files into random nested folders under random names (any nesting, any order)."""
    rng = random.Random(seed)
    rng.shuffle(paths)
    for n, p in enumerate(paths):
        q = dest / f"d{rng.randrange(3)}" / f"e{rng.randrange(2)}" / f"IM{n:05d}"
        q.parent.mkdir(parents=True, exist_ok=True)
        shutil.move(str(p), q)


TI = [50.0, 150.0, 400.0, 900.0, 2000.0, 4000.0]
FLIPS = [3.0, 8.0, 15.0, 25.0]
TE_SE = [10.0 * k for k in range(1, 9)]
TE_GR = [4.0, 9.0, 15.0, 24.0, 35.0, 50.0]


@pytest.fixture(scope="module")
def export(tmp_path_factory) -> Path:
    """One scanner export: five relaxometry series, a localiser, a derived map and a
    text file, files shuffled into nested folders; two series interleaved in one folder."""
    root = tmp_path_factory.mktemp("dicom")
    stage = root / "stage"
    study = new_study()
    files = []
    files += write_series(stage / "a", ir_volumes(TI), TI, "InversionTime",
                          description="T1 IR phantom", series_number=3, tr_ms=15000,
                          slope=0.5, intercept=-100, study=study)   # rescale must be applied
    files += write_series(stage / "b", spgr_volumes(FLIPS, 15.0), FLIPS, "FlipAngle",
                          description="vfa 3d", series_number=4, tr_ms=15.0, te_ms=3.0,
                          scanning_sequence="GR", sequence_variant=["SP", "SS"], study=study,
                          slope=0.25)
    files += write_series(stage / "c", dam_volumes(60.0), [60.0, 120.0], "FlipAngle",
                          description="b1 double angle", series_number=5, tr_ms=20000,
                          study=study)
    files += write_series(stage / "d", decay_volumes(TE_SE, T2), TE_SE, "EchoTime",
                          description="t2 mse", series_number=6, tr_ms=10000, study=study)
    files += write_series(stage / "d", decay_volumes(TE_GR, T2S), TE_GR, "EchoTime",
                          description="t2star mge", series_number=7, tr_ms=80, flip_deg=20,
                          scanning_sequence="GR", study=study)   # same folder as series 6
    files += write_series(stage / "e", M0[..., None] + 1.0, [10.0], "EchoTime",
                          description="localizer", series_number=1, tr_ms=8, study=study)
    files += write_series(stage / "f", np.repeat(ir_volumes([500.0]), 2, axis=-1),
                          [1000.0, 1000.0], "RepetitionTime", description="T1 map (scanner)",
                          series_number=30, tr_ms=1000, study=study,
                          image_type=["DERIVED", "SECONDARY", "T1 MAP"])
    drop = root / "export"
    _shuffle_into(files, drop, seed=7)
    (drop / "d0").mkdir(exist_ok=True)
    (drop / "d0" / "notes.txt").write_text("export log, not DICOM\n")
    return drop


@pytest.fixture(scope="module")
def ingested(export, tmp_path_factory):
    raw = tmp_path_factory.mktemp("raw")
    before = {p: p.stat().st_mtime_ns for p in export.rglob("*") if p.is_file()}
    report = ingest(export, raw)
    after = {p: p.stat().st_mtime_ns for p in export.rglob("*") if p.is_file()}
    assert before == after            # nothing in the DICOM folder is changed
    return raw, report


def _files(raw: Path, suffix: str) -> list[str]:
    return sorted(str(p) for p in raw.glob(f"{SUB}/ses-*/*/*_{suffix}.nii.gz"))


def test_series_recognised_and_written_as_bids(ingested):
    raw, report = ingested
    kinds = {r.series.first.series_number: r.kind.suffix for r, _ in report.converted}
    assert kinds == {3: "IRT1", 4: "VFA", 5: "TB1DAM", 6: "MESE", 7: "MEGRE"}
    unrec = {r.series.first.series_number: r.reason for r in report.unclassified}
    assert set(unrec) == {1, 30} and "nothing varies" in unrec[1] and "derived" in unrec[30]
    assert [p.name for p in report.other_files] == ["notes.txt"] and not report.problems
    ses = raw / SUB / "ses-20261105"
    assert len(_files(raw, "IRT1")) == len(TI) and len(_files(raw, "MESE")) == len(TE_SE)
    assert sorted(p.name for p in (ses / "fmap").glob("*.nii.gz")) == [
        f"{SUB}_ses-20261105_flip-1_TB1DAM.nii.gz", f"{SUB}_ses-20261105_flip-2_TB1DAM.nii.gz"]
    # sidecars in BIDS units: DICOM ms -> s; index entity in increasing order of the value
    for k, ti in enumerate(TI):
        side = json.loads((ses / "anat" / f"{SUB}_ses-20261105_inv-{k + 1}_IRT1.json")
                          .read_text())
        assert side["InversionTime"] == pytest.approx(ti / 1000.0)
        assert side["RepetitionTime"] == pytest.approx(15.0)
    vfa = json.loads((ses / "anat" / f"{SUB}_ses-20261105_flip-2_VFA.json").read_text())
    assert vfa["FlipAngle"] == 8.0 and vfa["RepetitionTimeExcitation"] == pytest.approx(0.015)
    assert nib.load(_files(raw, "IRT1")[0]).shape == (NX, NY, NZ)
    # the official validator accepts the dataset
    errors, _ = validate(raw)
    assert errors == [], summary(errors)


@pytest.mark.parametrize("model, suffix, mapname, truth", [
    ("ir", "IRT1", "T1map", T1), ("vfa", "VFA", "T1map", T1), ("dam", "TB1DAM", "TB1map", B1),
    ("mese-mono", "MESE", "T2map", T2), ("megre", "MEGRE", "T2starmap", T2S)])
def test_converted_series_fit_to_the_values_they_were_made_with(ingested, tmp_path, model,
                                                                 suffix, mapname, truth):
    raw, _ = ingested
    out = tmp_path / "maps"
    assert main(["fit", model, *_files(raw, suffix), "--out", str(out)]) == 0
    (path,) = [p for p in out.glob(f"*_{mapname}.nii.gz") if "_desc-" not in p.name]
    for label in range(1, 5):
        # 16-bit storage limits the precision (values quantised to 1 in 2000 or better)
        assert _region_median(path, label) == pytest.approx(truth[label], rel=0.01), label


def test_second_ingest_converts_nothing_again(ingested, export):
    raw, _ = ingested
    stamp = {p: p.stat().st_mtime_ns for p in raw.rglob("*.nii.gz")}
    report = ingest(export, raw)
    assert not report.converted and len(report.already) == 5
    assert {p: p.stat().st_mtime_ns for p in raw.rglob("*.nii.gz")} == stamp
    ledger = (raw / LEDGER).read_text().splitlines()
    assert len(ledger) == 6 and all("\tdone\t" in row for row in ledger[1:])


def test_real_pydicom_mr_image_as_multi_echo_series(tmp_path):
    """MR_small.dcm (a real MR slice pydicom ships) as M0 of a spin-echo train with its
    own header and geometry; T2 varies across the image."""
    import pydicom
    from pydicom.data import get_testdata_file
    real = pydicom.dcmread(get_testdata_file("MR_small.dcm"))
    m0 = real.pixel_array.astype(float).T[:, :, None] * 4.0   # (x, y, 1)
    x = np.linspace(0.0, 1.0, m0.shape[0])[:, None, None]
    t2 = 0.05 + 0.10 * x * np.ones_like(m0)                   # 50-150 ms left to right
    te = [15.0 * k for k in range(1, 7)]
    vols = m0[..., None] * np.exp(-np.asarray(te) / 1000.0 / t2[..., None])
    write_series(tmp_path / "dcm", vols, te, "EchoTime", description="real slice multi-echo",
                 series_number=9, tr_ms=4000, template=real, study=new_study("MRSMALL"))
    shutil.copy(get_testdata_file("MR_small.dcm"), tmp_path / "dcm" / "original.dcm")
    report = ingest(tmp_path / "dcm", tmp_path / "raw")
    (r, files), = report.converted
    assert r.kind.suffix == "MESE" and r.series.first.series_number == 9
    # the untouched original is a derived single image: listed, not converted
    assert [u.reason.split(" ")[0] for u in report.unclassified] == ["derived"]
    niis = [str(f) for f in files if f.name.endswith(".nii.gz")]
    img = nib.load(niis[0])
    np.testing.assert_allclose(np.abs(np.diag(img.affine))[:2], [0.3125, 0.3125], rtol=1e-4)
    assert main(["fit", "mese-mono", *niis, "--out", str(tmp_path / "maps")]) == 0
    t2map = next(p for p in (tmp_path / "maps").glob("*_T2map.nii.gz") if "_desc-" not in p.name)
    ipp = tuple(float(v) for v in real.ImagePositionPatient)
    fitted = on_dicom_grid(t2map, ipp, float(real.PixelSpacing[0]), float(real.SliceThickness))
    signal = on_dicom_grid(Path(niis[0]), ipp, float(real.PixelSpacing[0]),
                           float(real.SliceThickness))
    # the first echo on the DICOM grid is what was written: the geometry round-trips
    np.testing.assert_allclose(signal, vols[..., 0], atol=0.51)
    bright = m0 > np.percentile(m0, 60)
    np.testing.assert_allclose(fitted[bright], t2[bright], rtol=0.02)


# ---------------------------------------------------------------- rules and bad input

def test_rules_settle_series_the_tags_do_not_tell(tmp_path):
    # a research-mode multi-echo sequence: ScanningSequence RM, neither SE nor GR
    write_series(tmp_path / "dcm", decay_volumes(TE_SE, T2), TE_SE, "EchoTime",
                 description="QA_T2_research", series_number=12, tr_ms=8000,
                 scanning_sequence="RM")
    series, _ = scan_folder(tmp_path / "dcm")
    plain = recognise(series[0])
    assert plain.kind is None and "neither SE nor GR" in plain.reason
    ruled = recognise(series[0], Rule.parse([{"match": "qa_t2*", "kind": "MESE"}]))
    assert ruled.kind.suffix == "MESE" and ruled.by_rule == "qa_t2*"
    skipped = recognise(series[0], Rule.parse([{"match": "*research*", "kind": "skip"}]))
    assert skipped.skipped and skipped.kind is None
    rc = main(["ingest", str(tmp_path / "dcm"), "--out", str(tmp_path / "raw"), "--rule",
               "QA_T2_*=MESE"])
    assert rc == 0 and len(list((tmp_path / "raw").rglob("*_echo-*_MESE.nii.gz"))) == 8


def test_only_non_dicom_files_is_an_error(tmp_path, capsys):
    (tmp_path / "dcm").mkdir()
    (tmp_path / "dcm" / "readme.txt").write_text("not an image")
    assert main(["ingest", str(tmp_path / "dcm"), "--out", str(tmp_path / "raw")]) == 2
    err = capsys.readouterr().err
    assert "no DICOM file found" in err and "readme.txt" in err
    assert not (tmp_path / "raw").exists()


def test_damaged_dicom_file_is_named(tmp_path, capsys):
    write_series(tmp_path / "dcm", ir_volumes(TI[:3]), TI[:3], "InversionTime",
                 description="ir", series_number=2, tr_ms=10000)
    good = sorted((tmp_path / "dcm").glob("*.dcm"))[0]
    (tmp_path / "dcm" / "broken.dcm").write_bytes(good.read_bytes()[:200])   # cut short
    assert main(["ingest", str(tmp_path / "dcm"), "--out", str(tmp_path / "raw")]) == 2
    err = capsys.readouterr().err
    assert "broken.dcm: " in err and ("cannot be read" in err or "without SeriesInstanceUID"
                                      in err)
    assert not (tmp_path / "raw").exists()


def _two_part_series(folder: Path, description: str, number: int, **second) -> None:
    """One IR series (one SeriesInstanceUID) written in two parts: TIs 1-3 plainly, TIs 4-6
    with the changes ``second`` (e.g. a tag left out, another pixel spacing)."""
    study, series_uid = new_study(), uid()
    for part, tis, extra in ((0, TI[:3], {}), (1, TI[3:], second)):
        write_series(folder, ir_volumes(tis), tis, "InversionTime", description=description,
                     series_number=number, tr_ms=10000, study=study, series_uid=series_uid,
                     names=f"{{series}}_{part}_{{index:04d}}.dcm", **extra)


def test_series_missing_its_varying_tag(tmp_path, capsys):
    _two_part_series(tmp_path / "dcm", "T1 IR lost tags", 8, omit=["InversionTime"])
    rc = main(["ingest", str(tmp_path / "dcm"), "--out", str(tmp_path / "raw")])
    out = capsys.readouterr().out
    assert rc == 2 and "series 8 'T1 IR lost tags'" in out
    assert "InversionTime (0018,0082) is missing in 6 of 12 files" in out
    assert not list((tmp_path / "raw").rglob("*.nii.gz"))
    # a rule naming a kind whose tag no image carries: an error too, not a guess
    write_series(tmp_path / "dcm2", decay_volumes([10.0], T2), [10.0], "EchoTime",
                 description="t1 ir no tags", series_number=9, tr_ms=10000)
    rc = main(["ingest", str(tmp_path / "dcm2"), "--out", str(tmp_path / "raw"), "--rule",
               "t1 ir*=IRT1"])
    out = capsys.readouterr().out
    assert rc == 2 and "series 9 't1 ir no tags'" in out and "missing in 2 of 2 files" in out


def test_inconsistent_geometry_is_named(tmp_path, capsys):
    _two_part_series(tmp_path / "dcm", "ir moved", 4, spacing_mm=2.5)
    rc = main(["ingest", str(tmp_path / "dcm"), "--out", str(tmp_path / "raw")])
    out = capsys.readouterr().out
    assert rc == 2 and "series 4 'ir moved'" in out and "inconsistent geometry" in out
    assert "PixelSpacing" in out
    assert not list((tmp_path / "raw").rglob("*.nii.gz"))


def test_incomplete_slices_are_named(tmp_path, capsys):
    paths = write_series(tmp_path / "dcm", ir_volumes(TI[:3]), TI[:3], "InversionTime",
                         description="ir cut", series_number=5, tr_ms=10000)
    os.unlink(paths[-1])     # the last TI lost one of its two slices
    rc = main(["ingest", str(tmp_path / "dcm"), "--out", str(tmp_path / "raw")])
    out = capsys.readouterr().out
    assert rc == 2 and "series 5 'ir cut'" in out and "same slices" in out


def test_settling_series_waits_for_the_next_run(tmp_path):
    write_series(tmp_path / "dcm", ir_volumes(TI[:3]), TI[:3], "InversionTime",
                 description="ir", series_number=2, tr_ms=10000)
    report = ingest(tmp_path / "dcm", tmp_path / "raw", IngestOptions(settle_s=300.0))
    assert len(report.settling) == 1 and not report.converted
    import time
    report = ingest(tmp_path / "dcm", tmp_path / "raw", IngestOptions(settle_s=300.0),
                    now=time.time() + 600)
    assert len(report.converted) == 1


# ---------------------------------------------------------------- the nightly workflow

def _run(config: Path) -> tuple[int, str]:
    import subprocess
    import sys
    r = subprocess.run([sys.executable, "-m", "pipeline.cli", "run", "--config", str(config),
                        "--cores", "2"], capture_output=True, text=True, timeout=600, cwd="/")
    return r.returncode, r.stdout + r.stderr


@pytest.mark.slow
def test_workflow_starts_from_a_dicom_drop_folder(tmp_path):
    """`relaxline run` with dicom.drop_dir: new exports are converted and fitted; a series
    converted once is not converted again; a second night's export adds a session."""
    import yaml
    drop = tmp_path / "drop"
    write_series(drop / "night1", ir_volumes(TI), TI, "InversionTime", description="T1 IR",
                 series_number=3, tr_ms=15000, study=new_study(date="20261105"))
    write_series(drop / "night1", decay_volumes(TE_SE, T2), TE_SE, "EchoTime",
                 description="T2 MSE", series_number=4, tr_ms=10000,
                 study=new_study(date="20261105"))
    config = tmp_path / "config.yaml"
    config.write_text(yaml.safe_dump({
        "input_dir": "raw", "output_dir": "results",
        "dicom": {"drop_dir": "drop", "subject": "qa", "settle_minutes": 0},
        "models": {"ir": {"pattern": "*_IRT1.nii.gz"},
                   "mese-mono": {"pattern": "*_MESE.nii.gz"}}}))
    rc, log = _run(config)
    assert rc == 0, log
    assert "2 new series converted" in log
    t1 = tmp_path / "results" / "sub-qa" / "ses-20261105"
    maps = sorted(p.name for p in t1.rglob("*_T1map.nii.gz") if "_desc-" not in p.name)
    assert len(maps) == 1
    (t1map,) = [p for p in t1.rglob("*_T1map.nii.gz") if "_desc-" not in p.name]
    assert _region_median(t1map, 2) == pytest.approx(T1[2], rel=0.01)
    stamp = {p: p.stat().st_mtime_ns for p in (tmp_path / "raw").rglob("*.nii.gz")}

    # the next night: one more export; the first is not converted (nor fitted) again
    write_series(drop / "night2", ir_volumes(TI), TI, "InversionTime", description="T1 IR",
                 series_number=3, tr_ms=15000, study=new_study(date="20261106"))
    rc, log = _run(config)
    assert rc == 0, log
    assert "1 new series converted, 2 converted before" in log
    assert all(p.stat().st_mtime_ns == t for p, t in stamp.items())
    assert list((tmp_path / "results" / "sub-qa" / "ses-20261106").rglob("*_T1map.nii.gz"))
    assert (tmp_path / "results" / "report.html").is_file()


def test_config_dicom_section_checked_and_used(tmp_path, capsys):
    from pipeline.wfconfig import validate_config
    from pipeline.errors import InputError
    base = {"input_dir": "raw", "output_dir": "out", "models": {"ir": {"pattern": "*"}}}
    cfg = validate_config({**base, "dicom": {"drop_dir": "d", "rules": [
        {"match": "*qa_t2*", "kind": "MESE"}]}})
    assert cfg["dicom"]["settle_minutes"] == 5
    with pytest.raises(InputError, match=r"dicom\.rules\.0\.kind"):
        validate_config({**base, "dicom": {"rules": [{"match": "*", "kind": "T2MAP"}]}})
    # `relaxline ingest --config`: the config's rules and subject apply, input_dir is the target
    write_series(tmp_path / "dcm", decay_volumes(TE_SE, T2), TE_SE, "EchoTime",
                 description="site QA_T2 train", series_number=12, tr_ms=8000,
                 scanning_sequence="RM")
    (tmp_path / "config.yaml").write_text(
        "input_dir: raw\noutput_dir: out\nmodels: {mese: {pattern: '*_MESE.nii.gz'}}\n"
        "dicom: {subject: site7, rules: [{match: '*qa_t2*', kind: MESE}]}\n")
    assert main(["ingest", str(tmp_path / "dcm"), "--config", str(tmp_path / "config.yaml")]) == 0
    assert len(list((tmp_path / "raw" / "sub-site7").rglob("*_echo-*_MESE.json"))) == 8
    assert "rule '*qa_t2*'" in capsys.readouterr().out


def test_interrupted_conversion_is_redone_under_the_same_names(tmp_path):
    write_series(tmp_path / "dcm", ir_volumes(TI[:3]), TI[:3], "InversionTime",
                 description="ir", series_number=2, tr_ms=10000)
    ingest(tmp_path / "dcm", tmp_path / "raw")
    ledger = tmp_path / "raw" / LEDGER
    names = sorted(p.name for p in (tmp_path / "raw").rglob("*_IRT1.nii.gz"))
    # as if killed while moving the files into place: state 'writing', one file missing
    ledger.write_text(ledger.read_text().replace("\tdone\t", "\twriting\t"))
    next((tmp_path / "raw").rglob("*_inv-3_IRT1.nii.gz")).unlink()
    report = ingest(tmp_path / "dcm", tmp_path / "raw")
    assert len(report.converted) == 1 and not report.problems
    assert sorted(p.name for p in (tmp_path / "raw").rglob("*_IRT1.nii.gz")) == names
    assert "\tdone\t" in ledger.read_text()
    # a file of that name that no ingest wrote is never overwritten
    other = tmp_path / "raw2" / "sub-QAPHANTOM1" / "ses-20261105" / "anat"
    other.mkdir(parents=True)
    (other / names[0]).write_bytes(b"someone else's file")
    report = ingest(tmp_path / "dcm", tmp_path / "raw2")
    assert "was not written by an earlier ingest" in report.problems[0][1]
    assert (other / names[0]).read_bytes() == b"someone else's file"


def test_second_study_on_the_same_day_gets_its_own_session(tmp_path):
    for n, hhmm in enumerate(("073000", "143000")):
        write_series(tmp_path / "dcm" / str(n), ir_volumes(TI[:3]), TI[:3], "InversionTime",
                     description="ir", series_number=2, tr_ms=10000,
                     study=new_study(date="20261105", time=hhmm))
    ingest(tmp_path / "dcm", tmp_path / "raw")
    assert sorted(p.name for p in (tmp_path / "raw" / SUB).iterdir()) == [
        "ses-20261105", "ses-202611051430"]
