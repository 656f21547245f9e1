"""Bad input to every command: exit 2, a message naming the file/key/option, no traceback,
no output under a final name, and nothing the user gave is changed (design §3, §5, §6).

Valid material comes from ``relaxline simulate`` (one small session); broken variants
are copies with one thing changed. Cases are ``(argv builder, fragment)``; the builder
gets a :class:`Kit` and returns the argv (paths inside ``kit.out`` must stay free of
output files).
"""
from __future__ import annotations

import shutil
from pathlib import Path
from typing import Callable

import nibabel as nib
import numpy as np
import pytest

from faultkit import Kit, first, run_cli, setkey, simulate_session, tree_digest
from seriesio import write_3d_set, write_4d


@pytest.fixture(scope="module")
def sim(tmp_path_factory) -> Path:
    return simulate_session(tmp_path_factory.mktemp("sim"))


def fit(model, *inputs, **kw):
    """argv of ``relaxline fit`` with ``--out kit.out`` (added by the case runner)."""
    return ["fit", model, *inputs, *sum(([f"--{k.replace('_', '-')}", v]
                                         for k, v in kw.items()), [])]


def drop(key):
    return lambda sc: {k: v for k, v in sc.items() if k != key}


def mp2rage_pair(k: Kit, change, both: bool = True, magnitude: bool = False) -> list[str]:
    """The MP2RAGE pair with sidecar ``change`` on inv-1 (and inv-2 if ``both``)."""
    one = k.variant("inv-1_MP2RAGE", change)
    two = k.variant("inv-2_MP2RAGE", change if both else None)
    if magnitude:
        for p in (one, two):
            img = nib.load(p)
            nib.save(nib.Nifti1Image(np.abs(np.asarray(img.dataobj)), img.affine), p)
    return [one, two]


CASES: dict[str, tuple[Callable[[Kit], list[str]], str]] = {
    # ---- input files
    "input is a folder": (lambda k: fit("ir", str(k.anat)), "anat: expected a NIfTI"),
    "empty file": (lambda k: fit("ir", k.file("e.nii.gz", b"")), "e.nii.gz: cannot be read"),
    "nii.gz that is text": (lambda k: fit("ir", k.file("t.nii.gz", "not an image\n" * 9)),
                            "t.nii.gz: cannot be read as NIfTI"),
    "missing sidecar": (lambda k: fit("ir", str(shutil.copy(k.s("IRT1"), k.tmp / "n.nii.gz"))),
                        "n.json: sidecar not found"),
    "5D image": (lambda k: fit("ir", str(write_4d(k.tmp / "in", "f", np.ones((4, 4, 1, 3, 2)),
                                                  "InversionTime", [0.1, 0.2, 0.3]))),
                 "f.nii.gz: image has shape (4, 4, 1, 3, 2)"),
    "single volume": (lambda k: fit("ir", *map(str, write_3d_set(
        k.tmp / "in", "a_IR", np.ones((4, 4, 1, 1)), "InversionTime", [0.1]))),
        "needs at least 3 values of 'InversionTime'"),
    "3D mixed with 4D": (lambda k: fit("dam", k.s("flip-1_TB1DAM"), k.s("IRT1")),
                         "IRT1.nii.gz: a 4D image must be the only input"),
    "same file twice": (lambda k: fit("dam", k.s("flip-1_TB1DAM"), k.s("flip-1_TB1DAM")),
                        "the same input file is given twice"),
    "IR series to mese": (lambda k: fit("mese", k.s("IRT1")), "IRT1.json: missing key 'EchoTime'"),
    "MESE series to vfa": (lambda k: fit("vfa", k.s("MESE")),
                           "MESE.json: key 'FlipAngle' must be a list"),
    # ---- sidecars
    "sidecar is an array": (lambda k: fit("ir", k.variant("IRT1", lambda sc: [1, 2])),
                            "IRT1.json: expected a JSON object"),
    "string for a number": (lambda k: fit("ir", k.variant("IRT1", setkey("RepetitionTime", "2.5"))),
                            "'RepetitionTime' must be a number, got '2.5'"),
    "boolean": (lambda k: fit("ir", k.variant("IRT1", setkey("RepetitionTime", True))),
                "'RepetitionTime' must be a number, got True"),
    "nested dict": (lambda k: fit("ir", k.variant("IRT1", setkey("FlipAngle", {"v": 90}))),
                    "'FlipAngle' must be a number"),
    "null in list": (lambda k: fit("ir", k.variant("IRT1", first("InversionTime", None))),
                     "'InversionTime' must be a number, got None"),
    "ir TR = 0": (lambda k: fit("ir", k.variant("IRT1", setkey("RepetitionTime", 0))),
                  "not shorter than 'RepetitionTime' = 0 s"),
    "ir negative TI": (lambda k: fit("ir", k.variant("IRT1", first("InversionTime", -0.1))),
                       "'InversionTime' = -0.1 s is negative"),
    "ir FlipAngle 0": (lambda k: fit("ir", k.variant("IRT1", setkey("FlipAngle", 0))),
                       "'FlipAngle' = 0 degrees"),
    "ir FlipAngle 400": (lambda k: fit("ir", k.variant("IRT1", setkey("FlipAngle", 400))),
                         "'FlipAngle' = 400 degrees"),
    "field strength < 0": (lambda k: fit("ir", k.variant("IRT1", setkey(
        "MagneticFieldStrength", -3))), "IRT1.json: key 'MagneticFieldStrength' = -3"),
    "ir times in ms": (lambda k: fit("ir", k.variant("IRT1", lambda sc: {
        **sc, "InversionTime": [v * 1000 for v in sc["InversionTime"]]})),
        "'InversionTime' = 35 looks like milliseconds"),
    "seconds with --time-unit ms": (lambda k: fit("ir", k.s("IRT1"), time_unit="ms"),
                                    "IRT1.json: key 'InversionTime' is 1.9 at most"),
    "vfa TR = 0": (lambda k: fit("vfa", k.variant("VFA", setkey("RepetitionTime", 0))),
                   "'RepetitionTime' = 0 s must be positive"),
    "vfa angle 400": (lambda k: fit("vfa", k.variant("VFA", first("FlipAngle", 400))),
                      "'FlipAngle' values"),
    "dam not a 2:1 pair": (lambda k: fit("dam", k.variant("flip-1_TB1DAM", setkey(
        "FlipAngle", 50)), k.s("flip-2_TB1DAM")), "needs a 2:1 pair"),
    "mese EchoTime 0": (lambda k: fit("mese", k.variant("MESE", first("EchoTime", 0.0))),
                        "'EchoTime' values must be positive"),
    "mese refocusing 400": (lambda k: fit("mese", k.variant("MESE", setkey(
        "RefocusingFlipAngle", 400))), "'RefocusingFlipAngle' = 400"),
    "mese-mono negative TE": (lambda k: fit("mese-mono", k.variant("MESE", first(
        "EchoTime", -0.01))), "'EchoTime' = -0.01 s is negative"),
    "megre EchoTime 0": (lambda k: fit("megre", k.variant("MEGRE", first("EchoTime", 0.0))),
                         "'EchoTime' values must be positive"),
    # ---- options
    "unknown model": (lambda k: fit("t3", k.s("IRT1")), "unknown model 't3'"),
    "--jobs 0": (lambda k: fit("ir", k.s("IRT1"), jobs="0"), "--jobs must be at least 1"),
    "--jobs -2": (lambda k: fit("ir", k.s("IRT1"), jobs="-2"), "--jobs must be at least 1"),
    "--engine foo": (lambda k: fit("ir", k.s("IRT1"), engine="foo"), "argument --engine"),
    "--t1-fixed 0": (lambda k: fit("mese", k.s("MESE"), t1_fixed="0"), "fixed T1 = 0.0 s"),
    "--t1-fixed on ir": (lambda k: fit("ir", k.s("IRT1"), t1_fixed="1"),
                         "option --t1-fixed applies to the mese, mese-multi, afi and dam "
                         "models only"),
    "--plateau on megre": (lambda k: fit("megre", k.s("MEGRE")) + ["--plateau"],
                           "option --plateau applies to the mese-mono model only"),
    "--skip-echoes on ir": (lambda k: fit("ir", k.s("IRT1")) + ["--skip-echoes", "1"],
                            "option --skip-echoes applies to the mese-mono model only"),
    "--b1 on ir": (lambda k: fit("ir", k.s("IRT1"), b1=str(
        k.phantom / "truth_ses-20261101_TB1map.nii.gz")), "the ir model does not use a B1 map"),
    # ---- further methods (the simulated first session holds one series of each)
    "looklocker readout without spacing": (lambda k: fit("looklocker", k.variant(
        "LLT1", drop("RepetitionTimeExcitation")), ll_correction="readout"),
        "LLT1.nii.gz: sidecar key(s) 'RepetitionTimeExcitation' missing"),
    "looklocker spacing in ms": (lambda k: fit("looklocker", k.variant(
        "LLT1", setkey("RepetitionTimeExcitation", 100))),
        "'RepetitionTimeExcitation' = 100 looks like milliseconds"),
    "looklocker spacing longer than the images'": (lambda k: fit("looklocker", k.variant(
        "LLT1", setkey("RepetitionTimeExcitation", 0.5)), ll_correction="readout"),
        "is longer than every gap between the 'InversionTime' values"),
    "looklocker ratio with --b1": (lambda k: fit("looklocker", k.s("LLT1"), b1=str(
        k.phantom / "truth_ses-20261101_TB1map.nii.gz")),
        "the looklocker model does not use a B1 map"),
    "--ll-correction on ir": (lambda k: fit("ir", k.s("IRT1"), ll_correction="readout"),
                              "option --ll-correction applies to the looklocker model only"),
    "sr without SaturationDelay": (lambda k: fit("sr", k.s("IRT1")),
                                   "IRT1.json: missing key 'SaturationDelay'"),
    "sr delays in ms": (lambda k: fit("sr", k.variant("SRT1", lambda sc: {
        **sc, "SaturationDelay": [v * 1000 for v in sc["SaturationDelay"]]})),
        "'SaturationDelay' = 80 looks like milliseconds"),
    "sr negative delay": (lambda k: fit("sr", k.variant("SRT1", first("SaturationDelay", -0.1))),
                          "'SaturationDelay' = -0.1 s is negative"),
    "sr repeated delay": (lambda k: fit("sr", k.variant("SRT1", first("SaturationDelay", 0.08))),
                          "duplicate 'SaturationDelay' value(s) [0.08]"),
    "afi one image": (lambda k: fit("afi", k.s("acq-tr1_TB1AFI")),
                      "needs at least 2 values of 'RepetitionTimeExcitation'"),
    "afi without its TR": (lambda k: fit("afi", k.variant("acq-tr1_TB1AFI", drop(
        "RepetitionTimeExcitation")), k.s("acq-tr2_TB1AFI")),
        "acq-tr1_TB1AFI.json: missing key 'RepetitionTimeExcitation'"),
    "afi TRs too close": (lambda k: fit("afi", k.variant("acq-tr1_TB1AFI", setkey(
        "RepetitionTimeExcitation", 0.09)), k.s("acq-tr2_TB1AFI")), "is too close to 1"),
    "afi angles differ": (lambda k: fit("afi", k.variant("acq-tr1_TB1AFI", setkey(
        "FlipAngle", 50)), k.s("acq-tr2_TB1AFI")), "key 'FlipAngle' = 60 differs from 50"),
    "mp2rage magnitude only": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, None, magnitude=True)), "needs the inversion images as complex data"),
    "mp2rage NumberShots 0": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, setkey("NumberShots", 0))), "'NumberShots' = 0 must be at least 1"),
    "mp2rage NumberShots of three": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, setkey("NumberShots", [40, 40, 48]))), "must hold two numbers"),
    "mp2rage NumberShots text": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, setkey("NumberShots", "128"))), "'NumberShots' must be a number, got '128'"),
    "mp2rage NumberShots differ": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, setkey("NumberShots", 100), both=False)), "key 'NumberShots' = [40, 88] differs from 100"),
    "mp2rage without RepetitionTimePreparation": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, drop("RepetitionTimePreparation"))), "'RepetitionTimePreparation' missing"),
    "mp2rage RepetitionTimePreparation in ms": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, setkey("RepetitionTimePreparation", 5000))),
        "'RepetitionTimePreparation' = 5000 looks like milliseconds"),
    "mp2rage cycle too short": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, setkey("RepetitionTimePreparation", 2.6))),
        "the second block would end after the next inversion"),
    "mp2rage FlipAngle in one sidecar only": (lambda k: fit("mp2rage", *mp2rage_pair(
        k, drop("FlipAngle"), both=False)), "key 'FlipAngle' is missing here but given in"),
    "mp2rage --inversion-efficiency 1.5": (lambda k: fit("mp2rage", k.s("inv-1_MP2RAGE"), k.s(
        "inv-2_MP2RAGE"), inversion_efficiency="1.5"), "inversion efficiency 1.5"),
    "mese-multi rician": (lambda k: fit("mese-multi", k.s("MESE"), noise="rician"),
                          "the mese-multi model fits with Gaussian noise only"),
    "mese-multi lmfit engine": (lambda k: fit("mese-multi", k.s("MESE"), engine="lmfit"),
                                "the mese-multi model has no lmfit engine"),
    "mese-multi cutoff below the echo spacing": (lambda k: fit(
        "mese-multi", k.s("MESE"), short_t2_cutoff="0.005"), "short-T2 cutoff 0.005 s"),
    "refit mese-multi": (lambda k: ["refit", "mese-multi", k.s("MESE"), "--voxel", "1,1,0"],
                         "refit does not apply to mese-multi"),
    "run looklocker b1 without readout": (lambda k: ["run", "--config", k.file("c.yaml", (
        f"input_dir: {k.anat.parents[2]}\noutput_dir: {k.out}\nmodels:\n"
        f"  afi: {{pattern: '*TB1AFI.nii.gz'}}\n"
        f"  looklocker: {{pattern: '*LLT1.nii.gz', b1: afi}}\n"))],
        "only the readout correction uses a B1 map"),
    # ---- maps
    "mask all zeros": (lambda k: fit("megre", k.s("MEGRE"), mask=k.image(
        "m.nii.gz", np.zeros(k.grid()[0], np.uint8))), "m.nii.gz: the mask has no non-zero"),
    "mask 4D": (lambda k: fit("megre", k.s("MEGRE"), mask=k.image(
        "m.nii.gz", np.ones(k.grid()[0] + (2,), np.uint8))), "m.nii.gz: mask must be a 3D"),
    "mask off grid": (lambda k: fit("megre", k.s("MEGRE"), mask=k.image(
        "m.nii.gz", np.ones((5, 5, 1), np.uint8))), "m.nii.gz: mask has grid (5, 5, 1)"),
    "B1 4D": (lambda k: fit("vfa", k.s("VFA"), b1=k.image(
        "b.nii.gz", np.ones(k.grid()[0] + (2,), np.float32))), "b.nii.gz: B1 map must be a 3D"),
    "B1 all NaN": (lambda k: fit("vfa", k.s("VFA"), b1=k.image(
        "b.nii.gz", np.full(k.grid()[0], np.nan, np.float32))),
        "b.nii.gz: the B1 map holds no positive finite value"),
    "B1 negative": (lambda k: fit("mese", k.s("MESE"), b1=k.image(
        "b.nii.gz", np.full(k.grid()[0], -1.0, np.float32))),
        "b.nii.gz: the B1 map holds no positive finite value"),
    "B1 in percent": (lambda k: fit("vfa", k.s("VFA"), b1=k.image(
        "b.nii.gz", np.full(k.grid()[0], 100.0, np.float32))), "looks like a percent map"),
    "--t1-map on ir": (lambda k: fit("ir", k.s("IRT1"), t1_map=k.image(
        "t.nii.gz", np.ones(k.grid()[0], np.float32))), "the ir model does not use a T1 map"),
    "T1 map off grid": (lambda k: fit("mese", k.s("MESE"), t1_map=k.image(
        "t.nii.gz", np.ones((5, 5, 1), np.float32))), "t.nii.gz: T1 map has grid (5, 5, 1)"),
    "T1 map zeros in region": (lambda k: fit("mese", k.s("MESE"), t1_map=k.image(
        "t.nii.gz", np.where(np.arange(48)[:, None, None] < 24, 1.0, 0.0) * np.ones(
            k.grid()[0], np.float32), like="MESE")),
        "t.nii.gz: the T1 map has no value (NaN or 0) in"),
    "T1 map in ms": (lambda k: fit("mese", k.s("MESE"), t1_map=k.image(
        "t.nii.gz", np.full(k.grid()[0], 800.0, np.float32))), "looks like milliseconds"),
    # ---- output folder
    "--out is a file": (lambda k: ["fit", "megre", k.s("MEGRE"), "--out",
                                   k.file("o.txt", "keep me")], "o.txt: exists and is not a folder"),
    "--out below a file": (lambda k: ["fit", "megre", k.s("MEGRE"), "--out",
                                      k.file("o.txt", "keep me") + "/sub"], "cannot create output"),
    # ---- refit
    "refit box outside": (lambda k: ["refit", "megre", k.s("MEGRE"), "--box", "0:100,0:4,0:1"],
                          "the x range 0:100 is empty or outside the image (0:48)"),
    "refit box empty": (lambda k: ["refit", "megre", k.s("MEGRE"), "--box", "3:3,0:4,0:1"],
                        "the x range 3:3 is empty"),
    "refit box reversed": (lambda k: ["refit", "megre", k.s("MEGRE"), "--box", "5:2,0:4,0:1"],
                           "the x range 5:2 is empty"),
    "refit box two axes": (lambda k: ["refit", "megre", k.s("MEGRE"), "--box", "0:4,0:4"],
                           "--box '0:4,0:4': expected x0:x1,y0:y1,z0:z1"),
    "refit voxel outside": (lambda k: ["refit", "megre", k.s("MEGRE"), "--voxel", "100,0,0"],
                            "x = 100 is outside the image"),
    "refit label absent": (lambda k: ["refit", "megre", k.s("MEGRE"), "--label-map",
                                      k.s("dseg"), "--label", "99"], "--label 99: label absent"),
    "refit fractional labels": (lambda k: ["refit", "megre", k.s("MEGRE"), "--label-map",
                                           k.image("l.nii.gz", np.asarray(nib.load(k.s(
                                               "dseg")).dataobj, np.float32) * 0.5),
                                           "--label", "1"], "labels must be whole numbers"),
    "refit --plot is a folder": (lambda k: ["refit", "megre", k.s("MEGRE"), "--voxel", "24,24,0",
                                            "--plot", str(k.tmp)], "is a folder; give a file name"),
    "refit all-NaN region": (lambda k: ["refit", "megre", str(write_4d(
        k.tmp / "in", "nan", np.full((4, 4, 1, 4), np.nan, np.float32), "EchoTime",
        [0.01, 0.02, 0.03, 0.04], {"RepetitionTime": 1.0})), "--box", "0:4,0:4,0:1"],
        "hold non-finite or all-zero data"),
    # ---- simulate
    "simulate --sessions 0": (lambda k: ["simulate", str(k.out), "--sessions", "0"],
                              "--sessions must be an integer"),
    "simulate --snr 0": (lambda k: ["simulate", str(k.out), "--snr", "0"], "--snr must be positive"),
    "simulate --matrix 1": (lambda k: ["simulate", str(k.out), "--matrix", "1"], "--matrix"),
    "simulate OUTDIR is a file": (lambda k: ["simulate", k.file("o.txt", "keep me")],
                                  "o.txt: exists and is not a folder"),
    # ---- design
    "design LO = HI": (lambda k: ["design", "ir", "--range", "1:1", "--tr", "5"], "--range '1:1'"),
    "design LO > HI": (lambda k: ["design", "ir", "--range", "2:1", "--tr", "5"], "--range '2:1'"),
    "design --range abc": (lambda k: ["design", "ir", "--range", "abc", "--tr", "5"],
                           "--range 'abc': expected LO:HI"),
    "design --range in ms": (lambda k: ["design", "ir", "--range", "100:2500", "--tr", "5"],
                             "looks like milliseconds"),
    "design --points 1": (lambda k: ["design", "ir", "--range", "0.1:2", "--tr", "5",
                                     "--points", "1"], "--points 1"),
    "design --points huge": (lambda k: ["design", "mese", "--range", "0.01:0.5", "--points",
                                        "100000"], "--points 100000: at most"),
    "design --snr 0": (lambda k: ["design", "ir", "--range", "0.1:2", "--tr", "5", "--snr", "0"],
                       "--snr 0"),
    "design no --tr": (lambda k: ["design", "ir", "--range", "0.1:2"], "--tr is required"),
    "design unknown model": (lambda k: ["design", "megre", "--range", "0.01:0.1"],
                             "unknown model 'megre'"),
    "design --compare empty": (lambda k: ["design", "ir", "--range", "0.1:2", "--tr", "5",
                                          "--compare", ""], "--compare ''"),
    "design --compare TI > TR": (lambda k: ["design", "ir", "--range", "0.1:2", "--tr", "5",
                                            "--compare", "0.1,6"], "shorter than --tr 5"),
    "design --compare angle 400": (lambda k: ["design", "vfa", "--range", "0.1:2", "--tr",
                                              "0.01", "--compare", "2,400"], "(0, 180)"),
    "design --plot not png": (lambda k: ["design", "vfa", "--range", "0.1:2", "--tr", "0.01",
                                         "--plot", str(k.out)], "give a name ending .png"),
    # ---- run / demo (option and config errors only)
    "run missing config": (lambda k: ["run", "--config", str(k.tmp / "no.yaml")],
                           "no.yaml: config file not found"),
    "run config is binary": (lambda k: ["run", "--config", k.file("b.yaml", bytes(range(256)))],
                             "b.yaml: not UTF-8 text"),
    "run config is a list": (lambda k: ["run", "--config", k.file("l.yaml", "- a\n")],
                             "l.yaml: expected a mapping"),
    "run unknown key": (lambda k: ["run", "--config", k.file("c.yaml", "modles: {}\n")],
                        "'modles' was unexpected"),
    "run output_dir is a file": (lambda k: ["run", "--config", k.file("c.yaml", (
        f"input_dir: {k.anat.parents[2]}\noutput_dir: {k.file('o.txt', 'keep me')}\n"
        f"models:\n  ir: {{pattern: '*IRT1.nii.gz'}}\n"))], "o.txt: exists and is not a folder"),
    "run --cores 0": (lambda k: ["run", "--config", str(k.tmp / "no.yaml"), "--cores", "0"],
                      "--cores must be at least 1"),
    "demo --sessions 0": (lambda k: ["demo", str(k.out), "--sessions", "0"], "--sessions"),
    "demo --cores 0": (lambda k: ["demo", str(k.out), "--cores", "0"], "--cores must be"),
    "demo --profile missing": (lambda k: ["demo", str(k.out), "--profile", str(k.tmp / "np")],
                               "no config.yaml in that folder"),
    "demo OUTDIR is a file": (lambda k: ["demo", k.file("o.txt", "keep me")],
                              "o.txt: exists and is not a folder"),
}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input(name, sim, tmp_path, capsys):
    kit = Kit(sim, tmp_path)
    argv = CASES[name][0](kit)
    fragment = CASES[name][1]
    if argv[0] == "fit" and "--out" not in argv:
        argv += ["--out", str(kit.out)]
    given = tree_digest(tmp_path)
    sim_before = tree_digest(sim)
    code, err = run_cli(argv, capsys)
    assert code == 2, (code, err)
    assert fragment in err, err
    assert "Traceback" not in err and "internal error" not in err
    # no output under a final name, nothing given changed or lost
    if kit.out.is_dir():
        assert not [p for p in kit.out.rglob("*") if p.is_file()]
    assert tree_digest(tmp_path) == given
    assert tree_digest(sim) == sim_before
