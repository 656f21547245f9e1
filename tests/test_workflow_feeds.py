"""Workflow companion maps: a session's T1 map feeds mese (`models.<name>.t1`), cycles
are refused, slice profiles per series pattern; the fit steps give what `relaxline fit
--t1-map` gives."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from pipeline import wfconfig
from pipeline import workflow as W
from pipeline.cli import main
from pipeline.errors import InputError
from pipeline.simulate import series_paths

ALL = {"ir": {"pattern": "*_IRT1.nii.gz"}, "dam": {"pattern": "*_TB1DAM.nii.gz"},
       "vfa": {"pattern": "*_VFA.nii.gz", "b1": "dam"}, "mese": {"pattern": "*_MESE.nii.gz"}}


@pytest.fixture(scope="module")
def sim1(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("sim")
    assert main(["simulate", str(d), "--sessions", "1", "--slices", "1", "--matrix", "40",
                 "--seed", "5"]) == 0
    return d


def _load(tmp_path: Path, models: dict, **over) -> dict:
    (tmp_path / "in").mkdir(exist_ok=True)
    cfg = {"input_dir": over.pop("input_dir", "in"), "output_dir": "out", "models": models,
           **over}
    p = tmp_path / "config.yaml"
    p.write_text(yaml.safe_dump(cfg, sort_keys=False))    # glob order matters
    return W.load(p)


@pytest.mark.parametrize("models, key, fragment", [
    ({"ir": {"pattern": "x", "t1": "vfa"}}, "models.ir.t1", "the ir model takes no T1 map"),
    ({"mese": {"pattern": "x", "t1": "vfa"}}, "models.mese.t1", "no `models.vfa` is configured"),
    ({"mese": {"pattern": "x", "t1": "mri"}}, "models.mese.t1", "is not one of"),
    ({"mese": {"pattern": "x", "slice_profile": "sinc:0"}}, "models.mese.slice_profile",
     "time-bandwidth product 0 outside"),
    ({"mese": {"pattern": "x", "slice_profile": "none.tsv"}}, "models.mese.slice_profile",
     "none.tsv: file not found"),
    ({"mese-mono": {"pattern": "x", "slice_profile": "sinc:3"}},
     "models.mese-mono.slice_profile", "applies to mese, mese-multi only"),
    ({"mese": {"pattern": "x", "t1_fixed": 0}}, "models.mese.t1_fixed", "less than or equal"),
])
def test_bad_feed_settings_name_the_key(tmp_path, models, key, fragment):
    with pytest.raises(InputError) as exc:
        _load(tmp_path, models)
    assert f"key `{key}`" in str(exc.value) and fragment in str(exc.value), str(exc.value)


def test_t1_cycle_is_refused_and_auto_skips_it(tmp_path, monkeypatch):
    # once dam takes a T1 map (finite-TR correction), vfa -> dam -> vfa would deadlock
    monkeypatch.setattr(wfconfig, "t1_users", lambda: ["dam", "mese"])
    with pytest.raises(InputError) as exc:
        _load(tmp_path, {**ALL, "dam": {"pattern": "x", "t1": "vfa"}})
    assert "key `models.dam.t1` is 'vfa'" in str(exc.value) and "neither could start" in \
        str(exc.value)
    cfg = _load(tmp_path, ALL)
    assert wfconfig.companion_models(cfg, "dam", "t1") == (["ir"], False)      # not vfa
    assert wfconfig.companion_models(cfg, "mese", "t1") == (["ir", "vfa"], False)
    assert wfconfig.companion_models(cfg, "vfa", "b1") == (["dam"], True)
    cfg = _load(tmp_path, {**ALL, "mese": {"pattern": "x", "t1": "fixed"}})
    assert wfconfig.companion_models(cfg, "mese", "t1") == ([], False)


def test_plan_feeds_ir_else_vfa_t1_to_mese(sim1, tmp_path):
    cfg = _load(tmp_path, ALL, input_dir=str(sim1))
    plan = W.plan(cfg)
    s = plan.sessions[0]
    job = {j.model: j for j in s.series}
    assert plan.t1_source(cfg, job["mese"]) is job["ir"]
    assert plan.b1_source(cfg, job["vfa"]) is job["dam"]
    assert plan.t1_source(cfg, job["ir"]) is None and plan.t1_source(cfg, job["vfa"]) is None
    no_ir = {k: v for k, v in ALL.items() if k != "ir"}
    cfg = _load(tmp_path, no_ir, input_dir=str(sim1))
    plan = W.plan(cfg)
    job = {j.model: j for j in plan.sessions[0].series}
    assert plan.t1_source(cfg, job["mese"]) is job["vfa"]
    # a required source absent from the session is an error naming the pattern
    cfg = _load(tmp_path, {**ALL, "ir": {"pattern": "*_NOSUCH.nii.gz"},
                           "mese": {"pattern": "*_MESE.nii.gz", "t1": "ir"}},
                input_dir=str(sim1))
    plan = W.plan(cfg)
    job = {j.model: j for j in plan.sessions[0].series}
    with pytest.raises(InputError, match="models.mese.t1 is 'ir' but 0 ir series match"):
        plan.t1_source(cfg, job["mese"])


def test_slice_profile_per_series_pattern(tmp_path):
    (tmp_path / "p.tsv").write_text("position\texcitation\trefocusing\n0\t1\t1\n")
    cfg = _load(tmp_path, {"mese": {"pattern": "x", "slice_profile": {
        "*acq-2d*": "sinc:3", "*acq-tsv*": "p.tsv", "*": "none"}}})
    assert W.model_options(cfg, "mese", "sub-1_acq-2d_MESE") == {"slice_profile": "sinc:3"}
    assert W.model_options(cfg, "mese", "sub-1_acq-tsv_MESE") == {
        "slice_profile": str((tmp_path / "p.tsv").resolve())}
    assert W.model_options(cfg, "mese", "sub-1_acq-3d_MESE") == {}
    cfg = _load(tmp_path, {"mese": {"pattern": "x", "slice_profile": "sinc:2:1.5",
                                    "t1_fixed": 0.8}})
    assert W.model_options(cfg, "mese", "any") == {"slice_profile": "sinc:2:1.5",
                                                    "t1_fixed": 0.8}


def test_fit_steps_with_a_t1_feed_equal_the_command(sim1, tmp_path):
    """mese fed the session's ir T1map: unchunked and chunked steps give the bytes of
    `relaxline fit mese --t1-map <ir T1map> --t1-fixed 1` (gaps filled with the default)."""
    ir = [str(p) for p in series_paths(sim1, 0, "IRT1")]
    mese = [str(p) for p in series_paths(sim1, 0, "MESE")]
    ir_manifest = tmp_path / "ir.fit.json"
    W.step_fit("ir", ir, str(tmp_path / "ses"), str(ir_manifest), None, "fast", 1, "s")
    t1 = W.map_path(ir_manifest, "T1map")
    assert main(["fit", "mese", *mese, "--out", str(tmp_path / "cli"), "--t1-map", t1,
                 "--t1-fixed", "1"]) == 0
    W.step_fit("mese", mese, str(tmp_path / "wf"), str(tmp_path / "m1.json"), None, "fast", 1,
               "s", t1_manifest=str(ir_manifest))
    c = tmp_path / "chunk-0.npz"
    W.step_chunk("mese", mese, 0, 1, str(c), None, "fast", 1, "s", {}, str(ir_manifest))
    W.step_fit("mese", mese, str(tmp_path / "wfc"), str(tmp_path / "m2.json"), None, "fast", 1,
               "s", [str(c)], {}, str(ir_manifest))
    names = sorted(p.name for p in (tmp_path / "cli").glob("*.nii.gz"))
    assert names
    for name in names:          # the workflow puts them into anat/ (TB1map: fmap/)
        a = (tmp_path / "cli" / name).read_bytes()
        assert a == next((tmp_path / "wf").rglob(name)).read_bytes(), name
        assert a == next((tmp_path / "wfc").rglob(name)).read_bytes(), name
    for folder in (tmp_path / "cli", tmp_path / "wf" / "anat", tmp_path / "wfc" / "anat"):
        side = json.loads(next(folder.glob("*_T2map.json")).read_text())
        assert side["Options"]["t1_map"] == t1 and side["Options"]["t1_fixed"] == 1.0
        assert side.get("Warnings") == json.loads(
            next((tmp_path / "cli").glob("*_T2map.json")).read_text()).get("Warnings")


@pytest.mark.slow
def test_run_feeds_the_ir_t1_map_to_mese(sim1, tmp_path):
    cfg = {"input_dir": str(sim1), "output_dir": "out",
           "models": {"ir": ALL["ir"], "mese": {**ALL["mese"], "slice_profile": {"*": "none"}}},
           "phantom": {"reference": str(sim1 / "phantom" / "reference.tsv")},
           "fit": {"threads": 1}, "report": {"figures": False}}
    p = tmp_path / "c.yaml"
    p.write_text(yaml.safe_dump(cfg))
    r = subprocess.run([sys.executable, "-m", "pipeline.cli", "run", "--config", str(p),
                        "--cores", "2"], capture_output=True, text=True, timeout=600)
    assert r.returncode in (0, 1), r.stdout + r.stderr
    anat = tmp_path / "out" / "sub-relaxlinedemo" / "ses-20261101" / "anat"
    side = json.loads(next(anat.glob("*_rec-mese_T2map.json")).read_text())
    assert side["Options"]["t1_map"].endswith("_rec-ir_T1map.nii.gz")
    assert (tmp_path / "out" / side["Options"]["t1_map"]).is_file()   # relative to output_dir
