"""BIDS: `relaxline simulate` writes a raw dataset the official validator accepts, and the
reader and the workflow's discovery take its one-file-per-volume series from anat/ and fmap/."""
from __future__ import annotations

import json

import pandas as pd
import pytest

from bidscheck import summary, validate
from pipeline import phantom
from pipeline.cli import main
from pipeline.series import read_series
from pipeline.sessions import plan
from pipeline.simulate import (IR_TI, MESE_ECHOES, MP2RAGE_ALPHA, MP2RAGE_TI, VFA_FLIPS, VFA_TR,
                               SimOptions, series_paths, session_label, simulate)
from pipeline.wfconfig import resolve_paths, validate_config
from seriesio import write_3d_set

SUB = f"sub-{phantom.SUBJECT_LABEL}"


def test_simulated_raw_dataset_is_valid_bids(tmp_path):
    # The BIDS specification's own validator (bids-validator-deno) is the reference.
    simulate(tmp_path, SimOptions(sessions=2, matrix=40, slices=1, seed=2))
    errors, _ = validate(tmp_path)
    assert errors == [], summary(errors)
    ses = tmp_path / SUB / f"ses-{session_label(0)}"
    assert len(list((ses / "anat").glob("*_inv-*_IRT1.nii.gz"))) == len(IR_TI)
    assert len(list((ses / "anat").glob("*_echo-*_MESE.nii.gz"))) == MESE_ECHOES
    assert sorted(p.name for p in (ses / "fmap").glob("*.nii.gz")) == [
        f"{SUB}_ses-{session_label(0)}_acq-tr{k}_TB1AFI.nii.gz" for k in (1, 2)] + [
        f"{SUB}_ses-{session_label(0)}_flip-{k}_TB1DAM.nii.gz" for k in (1, 2)]
    # the further methods are in the first session only; the validator checks the keys the
    # BIDS qMRI appendix requires of TB1AFI (RepetitionTimeExcitation) and MP2RAGE
    later = tmp_path / SUB / f"ses-{session_label(1)}"
    assert not list(later.glob("*/*_TB1AFI.*")) and not list(later.glob("*/*_MP2RAGE.*"))
    mp = json.loads((ses / "anat" / f"{SUB}_ses-{session_label(0)}_inv-2_MP2RAGE.json")
                    .read_text())
    assert mp["InversionTime"] == MP2RAGE_TI[1] and mp["FlipAngle"] == MP2RAGE_ALPHA[1]
    assert {"RepetitionTimeExcitation", "RepetitionTimePreparation", "NumberShots"} <= set(mp)
    vfa = json.loads((ses / "anat" / f"{SUB}_ses-{session_label(0)}_flip-1_VFA.json").read_text())
    # BIDS qMRI: VFA needs PulseSequenceType and RepetitionTimeExcitation (s), one FlipAngle
    assert vfa["RepetitionTimeExcitation"] == VFA_TR and vfa["FlipAngle"] == VFA_FLIPS[0]
    assert vfa["PulseSequenceType"]


def test_sessions_table_holds_each_sessions_temperature(tmp_path):
    simulate(tmp_path, SimOptions(sessions=3, matrix=40, slices=1))
    table = pd.read_csv(tmp_path / SUB / f"{SUB}_sessions.tsv", sep="\t")
    for k in range(3):
        truth = json.loads((tmp_path / "phantom" / f"truth_ses-{session_label(k)}.json")
                           .read_text())
        row = table[table.session_id == f"ses-{session_label(k)}"].iloc[0]
        assert row.phantom_temperature == truth["temperature"]
    # a rerun with fewer sessions keeps the rows of the sessions it does not rewrite
    simulate(tmp_path, SimOptions(sessions=1, matrix=40, slices=1))
    again = pd.read_csv(tmp_path / SUB / f"{SUB}_sessions.tsv", sep="\t")
    pd.testing.assert_frame_equal(again, table)


def test_split_series_read_in_value_order(tmp_path):
    simulate(tmp_path, SimOptions(sessions=1, matrix=40, slices=1))
    vfa = read_series(series_paths(tmp_path, 0, "VFA"), "FlipAngle")
    assert vfa.values.tolist() == sorted(VFA_FLIPS)
    assert vfa.stem == f"{SUB}_ses-{session_label(0)}_VFA"
    assert vfa.meta["RepetitionTime"] == VFA_TR


def test_repetition_time_excitation_stands_in_for_repetition_time(tmp_path):
    import numpy as np
    paths = write_3d_set(tmp_path, "sub-a_VFA", np.ones((2, 2, 1, 3), np.float32), "FlipAngle",
                         [3.0, 9.0, 15.0], {"RepetitionTimeExcitation": 0.012}, entity="flip")
    assert read_series(paths, "FlipAngle").meta["RepetitionTime"] == 0.012
    ms = write_3d_set(tmp_path / "ms", "sub-a_VFA", np.ones((2, 2, 1, 3), np.float32),
                      "FlipAngle", [3.0, 9.0, 15.0], {"RepetitionTimeExcitation": 12.0},
                      entity="flip")
    assert read_series(ms, "FlipAngle", time_unit="ms").meta["RepetitionTime"] == 0.012


def test_discovery_finds_series_in_anat_and_fmap(tmp_path):
    simulate(tmp_path / "raw", SimOptions(sessions=1, matrix=40, slices=1))
    cfg = resolve_paths(validate_config({
        "input_dir": "raw", "output_dir": "out",
        "models": {"ir": {"pattern": "*_IRT1.nii.gz"}, "dam": {"pattern": "*_TB1DAM.nii.gz"},
                   "vfa": {"pattern": "*_VFA.nii.gz", "b1": "dam"}}}), tmp_path)
    (s,) = plan(cfg).sessions
    jobs = {j.model: j for j in s.series}
    assert len(jobs["ir"].inputs) == len(IR_TI) and len(jobs["vfa"].inputs) == len(VFA_FLIPS)
    assert all("/fmap/" in p for p in jobs["dam"].inputs) and len(jobs["dam"].inputs) == 2
    assert s.labels.endswith("_dseg.nii.gz") and (s.site, s.scanner) == ("northfield-lab", "bay2")
    # only anat/ searched: no dam series, so vfa's `b1: dam` has no source
    anat_only = {**cfg, "discovery": {**cfg["discovery"], "datatype": "anat"}}
    assert "dam" not in {j.model for j in plan(anat_only).sessions[0].series}


@pytest.mark.slow
def test_demo_raw_and_results_are_valid_bids(tmp_path):
    """`relaxline demo` (one session, every demo model): the raw dataset and the results
    folder pass the official validator with 0 errors; the results are a derivative
    dataset whose map sidecars describe themselves and cite their sources as BIDS URIs."""
    # a small session first: the demo keeps the sessions it finds and runs its workflow
    simulate(tmp_path / "rawdata", SimOptions(sessions=1, matrix=48, slices=1))
    assert main(["demo", str(tmp_path), "--sessions", "1", "--cores", "2"]) in (0, 1)
    raw, results = tmp_path / "rawdata", tmp_path / "results"
    for root in (raw, results):
        errors, _ = validate(root)
        assert errors == [], f"{root}:\n{summary(errors)}"
    desc = json.loads((results / "dataset_description.json").read_text())
    assert desc["DatasetType"] == "derivative" and desc["GeneratedBy"][0]["Name"] == "relaxline"
    link = (results / desc["DatasetLinks"]["raw"]).resolve()
    assert link == raw.resolve()
    ses = results / SUB / f"ses-{session_label(0)}"
    sidecars = sorted(ses.glob("anat/*.json")) + sorted(ses.glob("fmap/*.json"))
    assert {p.name.split("_rec-")[1].split("_")[0] for p in sidecars} == \
        {"ir", "dam", "vfa", "mese", "mesemono", "megre",      # and, in the first session,
         "afi", "looklocker", "sr", "mp2rage", "mesemulti"}     # the further methods
    for p in sidecars:
        side = json.loads(p.read_text())
        assert side["Description"], p.name
        for uri in side["Sources"]:
            assert uri.startswith("bids:raw:") and (link / uri[len("bids:raw:"):]).is_file()
    assert (ses / "fmap" / f"{SUB}_ses-{session_label(0)}_rec-dam_TB1map.nii.gz").is_file()
    # B1 fitted from an echo train is a B1 map too (the demo's mese takes dam's B1)
    assert (ses / "fmap" / f"{SUB}_ses-{session_label(0)}_rec-mesemulti_TB1map.nii.gz").is_file()
    assert (ses / "qc" / "ir" / "roi_stats.tsv").is_file() and (results / "report.html").is_file()


@pytest.mark.parametrize("raw_stem, model", [
    ("sub-p_ses-1_IRT1", "ir"), ("sub-p_ses-1_TB1DAM", "dam"), ("sub-p_ses-1_MESE", "mese-mono"),
    ("sub-p_ses-1_acq-fast_VFA", "vfa"), ("site9_ses-1_IRT1", "ir")])
def test_first_release_history_keys_continue(raw_stem, model):
    # the first release keyed a series `model:<raw stem without ses>`; the derivative map
    # names changed the key, and the migration maps the old key onto the one today's
    # workflow records for the same raw series, so the trend continues
    from pipeline.bidsderiv import derivative_stem
    from pipeline.workflow import history_series, upgrade_series_key
    old = f"{model}:{raw_stem.replace('_ses-1', '')}"
    today = history_series(model, derivative_stem(raw_stem, model), "ses-1")
    assert upgrade_series_key(old) == today
    assert upgrade_series_key("IRT1") == "IRT1"       # a key without a model stays
