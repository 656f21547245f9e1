"""Fault suite, part 1: hostile input to the commands (issue 16).

Every case: exit status 2, a message naming the file/key/option and what to do, no
traceback or "internal error", a short message (a bad value is quoted only in part),
nothing the user gave changed and no output written (the whole test folder and the
simulated session byte-identical). Then the inputs that used to give silent wrong
answers or internal errors and must now give the right answer.
"""
from __future__ import annotations

import gzip
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Callable

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from faultkit import P, Kit, run_cli, setkey, simulate_session, tree_digest
from seriesio import write_4d, write_json, write_nifti

MAX_MESSAGE = 2500   # characters of stderr a bad-input case may print


@pytest.fixture(scope="module")
def sim(tmp_path_factory) -> Path:
    return simulate_session(tmp_path_factory.mktemp("sim"))


@pytest.fixture(scope="module")
def maps(sim, tmp_path_factory) -> Path:
    """megre maps of the simulated session (what `relaxline qc` reads)."""
    out = tmp_path_factory.mktemp("maps")
    kit = Kit(sim, out)
    from pipeline.cli import main
    assert main(["fit", "megre", kit.s("MEGRE"), "--out", str(out)]) == 0
    return out


def fit(model, *inputs, **kw):
    return ["fit", model, *inputs, *sum(([f"--{k.replace('_', '-')}", str(v)]
                                         for k, v in kw.items()), [])]


def qc(k: Kit, maps: Path, *extra, labels=None, reference=None):
    return ["qc", str(maps), "--labels", labels or k.s("dseg"), "--reference",
            reference or str(k.phantom / "reference.tsv"), "--out", str(k.out),
            "--no-figures", *extra]


def run(k: Kit, **over) -> list[str]:
    """``relaxline run`` on a config over the simulated session (megre only)."""
    cfg = {"input_dir": str(k.sim), "output_dir": str(k.tmp / "res"),
           "models": {"megre": {"pattern": "*_MEGRE.nii.gz"}},
           "phantom": {"reference": str(k.phantom / "reference.tsv")},
           "report": {"figures": False}}
    for key, value in over.items():
        section, _, name = key.partition("__")
        if name:
            cfg.setdefault(section, {})[name] = value
        else:
            cfg[section] = value
    import yaml
    return ["run", "--config", k.file("config.yaml", yaml.safe_dump(cfg))]


# ---- hostile files ------------------------------------------------------------------------

def user_map(k: Kit, path: Path, data=None) -> str:
    """A user's own map (ones) on the session grid, saved at ``path``."""
    shape, affine = k.grid("MEGRE")
    path.parent.mkdir(parents=True, exist_ok=True)
    write_nifti(path, np.ones(shape, np.float32) if data is None else data, affine)
    return str(path)


def header_claims(k: Kit, shape: tuple[int, ...]) -> str:
    """The MEGRE series with a header claiming ``shape`` over the file's real data."""
    raw = gzip.decompress(Path(k.s("MEGRE")).read_bytes())
    hdr = nib.Nifti1Header.from_fileobj(__import__("io").BytesIO(raw[:348]))
    hdr.set_data_shape(shape)
    d = k.tmp / "in"
    d.mkdir(exist_ok=True)
    (d / "big.nii.gz").write_bytes(gzip.compress(hdr.binaryblock + raw[348:], mtime=0))
    shutil.copy(k.anat / f"{P}MEGRE.json", d / "big.json")
    return str(d / "big.nii.gz")


def zero_dimension(k: Kit) -> str:
    d = k.tmp / "in"
    p = write_4d(d, "zero", np.zeros((0, 8, 1, 4), np.float32), "EchoTime",
                 [0.01, 0.02, 0.03, 0.04], {"RepetitionTime": 1.0})
    return str(p)


def nan_sform(k: Kit) -> str:
    aff = np.diag([2.0, 2.0, 4.0, 1.0])
    aff[0, 3] = np.nan
    p = write_4d(k.tmp / "in", "nan", np.ones((8, 8, 1, 4), np.float32) + 1, "EchoTime",
                 [0.01, 0.02, 0.03, 0.04], {"RepetitionTime": 1.0}, affine=aff)
    return str(p)


def deep_sidecar(k: Kit) -> str:
    p = k.variant("MEGRE")
    Path(p.replace(".nii.gz", ".json")).write_text(
        '{"EchoTime": ' + "[" * 100_000 + "]" * 100_000 + "}")
    return p


def maps_copy(k: Kit, maps: Path, change: Callable[[dict], dict]) -> str:
    """A copy of the maps folder whose T2* map sidecar passes through ``change``."""
    d = k.tmp / "maps"
    shutil.copytree(maps, d)
    side = d / f"{P}rec-megre_T2starmap.json"
    side.write_text(json.dumps(change(json.loads(side.read_text()))))
    return str(d)


ALIAS_BOMB = """\
a: &a ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]
b: &b [*a,*a,*a,*a,*a,*a,*a,*a,*a]
c: &c [*b,*b,*b,*b,*b,*b,*b,*b,*b]
d: &d [*c,*c,*c,*c,*c,*c,*c,*c,*c]
e: &e [*d,*d,*d,*d,*d,*d,*d,*d,*d]
f: &f [*e,*e,*e,*e,*e,*e,*e,*e,*e]
"""
# below the size limit, but the value quoted in the schema message is 6561 items
SMALL_BOMB = """\
models:
  ir: {pattern: &a [lol,lol,lol,lol,lol,lol,lol,lol,lol]}
  dam: {pattern: &b [*a,*a,*a,*a,*a,*a,*a,*a,*a]}
  vfa: {pattern: &c [*b,*b,*b,*b,*b,*b,*b,*b,*b]}
  mese: {pattern: &d [*c,*c,*c,*c,*c,*c,*c,*c,*c]}
output_dir: o
input_dir: *d
"""


def sqlite_of_another_program(k: Kit) -> str:
    import sqlite3
    p = k.tmp / "other.sqlite"
    con = sqlite3.connect(p)
    con.execute("CREATE TABLE invoices (id INTEGER, amount REAL)")
    con.commit()
    con.close()
    return str(p)


def history_file(k: Kit, content: bytes) -> str:
    return k.file("hist/history.sqlite", content)


def session_with_site(k: Kit, site) -> str:
    raw = k.tmp / "raw"
    shutil.copytree(k.sim / "sub-relaxlinedemo", raw / "sub-relaxlinedemo")
    anat = raw / "sub-relaxlinedemo" / "ses-20261101" / "anat"
    for side in anat.glob("*.json"):
        sc = json.loads(side.read_text())
        if "Site" in sc:
            side.write_text(json.dumps({**sc, "Site": site}))
    return str(raw)


CASES: dict[str, tuple[Callable[..., list[str]], str]] = {
    # ---- data loss: an input that is also an output is refused before any work
    "fit --mask is one of its outputs": (lambda k, m: fit(
        "megre", k.s("MEGRE"), out=k.out, mask=user_map(
            k, k.out / f"{P}rec-megre_desc-fitstatus_mask.nii.gz")), "would be overwritten"),
    "fit --b1 is one of its outputs": (lambda k, m: fit(
        "vfa", k.s("VFA"), out=k.out, b1=user_map(k, k.out / f"{P}rec-vfa_M0map.nii.gz")),
        "rec-vfa_M0map.nii.gz: this input is also where `relaxline fit` writes"),
    "qc --reference is one of its outputs": (lambda k, m: qc(k, m, reference=k.file(
        "out/roi_stats.tsv", (k.phantom / "reference.tsv").read_text())),
        "roi_stats.tsv: this input is also where `relaxline qc` writes"),
    "refit --plot is its input series": (lambda k, m: [
        "refit", "megre", (s := k.variant("MEGRE")), "--voxel", "24,24,0", "--plot", s],
        "MEGRE.nii.gz: this input is also where `relaxline refit --plot` writes"),
    # ---- internal errors that were bad input
    "zero dimension in a header": (lambda k, m: fit("megre", zero_dimension(k), out=k.out),
                                   "zero.nii.gz: the header declares the image shape (0, 8"),
    "sidecar nested 100 000 levels": (lambda k, m: fit("megre", deep_sidecar(k), out=k.out),
                                      "MEGRE.json: the sidecar nests lists or objects too"),
    # ---- silent wrong answers
    "NaN in the sform": (lambda k, m: fit("megre", nan_sform(k), out=k.out),
                         "nan.nii.gz: the header's voxel-to-world transform"),
    "qc --temperature 500": (lambda k, m: qc(k, m, "--temperature", "500"),
                             "--temperature: phantom temperature 500 °C is outside 0–50 °C"),
    "qc --temperature -300": (lambda k, m: qc(k, m, "--temperature", "-300"),
                              "phantom temperature -300 °C is outside"),
    "sidecar PhantomTemperature in kelvin": (lambda k, m: qc(k, Path(maps_copy(
        k, m, setkey("PhantomTemperature", 294.15)))), "It looks like kelvin"),
    "refit --label 0": (lambda k, m: ["refit", "megre", k.s("MEGRE"), "--label-map",
                                      k.s("dseg"), "--label", "0"],
                        "--label 0: label 0 is the background"),
    "sidecar Site is an object": (lambda k, m: run(k, input_dir=session_with_site(
        k, {"name": "x"})), "key 'Site' must be a short text label"),
    # ---- messages
    "header claims 20000 x 20000": (lambda k, m: fit("megre", header_claims(
        k, (20000, 20000, 1, 8)), out=k.out), "big.nii.gz: the header declares an image of "
        "20000 x 20000 x 1 x 8 voxels"),
    "all-zero label map": (lambda k, m: qc(k, m, labels=k.image(
        "zero_dseg.nii.gz", np.zeros(k.grid()[0], np.uint8))), "holds no region"),
    "label value 1e20": (lambda k, m: qc(k, m, labels=k.image(
        "huge_dseg.nii.gz", np.where(np.asarray(nib.load(k.s("dseg")).dataobj) == 1, 1e20,
                                     np.asarray(nib.load(k.s("dseg")).dataobj)
                                     ).astype(np.float32))), "holds the label 1e+20"),
    "YAML alias bomb config": (lambda k, m: ["run", "--config", k.file("bomb.yaml", ALIAS_BOMB
                                                                        + "input_dir: *f\n")],
                               "expands to more than 100000 values"),
    "YAML aliases below the limit": (lambda k, m: ["run", "--config", k.file(
        "bomb.yaml", SMALL_BOMB)], "key `input_dir`"),
    "YAML alias bomb tolerances": (lambda k, m: qc(k, m, "--config", k.file(
        "tol.yaml", ALIAS_BOMB)), "tol.yaml: the QC config expands"),
    "sidecar value of a megabyte": (lambda k, m: fit("megre", k.variant("MEGRE", setkey(
        "RepetitionTime", "x" * 1_000_000)), out=k.out), "'RepetitionTime' must be a number"),
    # ---- config-named files checked before the first job
    "reference table without temperature": (lambda k, m: run(k, phantom__reference=k.file(
        "ref.tsv", "label\tname\tT1\n1\ta\t1.0\n")), "key `phantom.reference`"),
    "layout that is not a layout": (lambda k, m: run(k, phantom__layout=k.file(
        "layout.tsv", "no layout here\n")), "key `phantom.layout`"),
    "history.database is a folder": (lambda k, m: run(k, history__database=str(
        (k.tmp / "histdir").mkdir() or k.tmp / "histdir")), "it is a folder"),
    "history.database is a text file": (lambda k, m: run(k, history__database=history_file(
        k, b"label\tname\n")), "it is not an SQLite database"),
    "history.database is empty (0 bytes)": (lambda k, m: run(k, history__database=history_file(
        k, b"")), "it is empty (0 bytes)"),
    "history.database of another program": (lambda k, m: run(
        k, history__database=sqlite_of_another_program(k)), "not a relaxline history"),
}


@pytest.mark.parametrize("name", list(CASES))
def test_fault_case(name, sim, maps, tmp_path, capsys):
    kit = Kit(sim, tmp_path)
    argv = CASES[name][0](kit, maps)
    fragment = CASES[name][1]
    given, sim_before, maps_before = tree_digest(tmp_path), tree_digest(sim), tree_digest(maps)
    code, err = run_cli(argv, capsys)
    assert code == 2, (code, err[:2000])
    assert fragment in err, err[:2000]
    assert "Traceback" not in err and "internal error" not in err
    assert len(err) < MAX_MESSAGE, len(err)
    # nothing the user gave changed, nothing written (no new file anywhere)
    assert tree_digest(tmp_path) == given
    assert tree_digest(sim) == sim_before and tree_digest(maps) == maps_before


# ---- answers that used to be wrong without a word ------------------------------------------

def _header_without_zooms(src: Path, dst: Path) -> None:
    """``src`` with pixdim 1-3 set to 0 and the qform cleared; the sform (the affine) kept."""
    raw = gzip.decompress(src.read_bytes())
    hdr = nib.Nifti1Header.from_fileobj(__import__("io").BytesIO(raw[:348]))
    pix = hdr["pixdim"].copy()
    pix[1:4] = 0
    hdr["pixdim"] = pix
    hdr["qform_code"] = 0
    dst.write_bytes(gzip.compress(hdr.binaryblock + raw[348:], mtime=0))


def test_erosion_uses_the_affine_voxel_size(sim, maps, tmp_path, capsys):
    """Header zooms of 0 beside a valid sform must not change the eroded vials."""
    kit = Kit(sim, tmp_path)
    bad = tmp_path / "maps"
    bad.mkdir()
    for p in maps.iterdir():
        if p.name.endswith(".nii.gz"):
            _header_without_zooms(p, bad / p.name)
        else:
            shutil.copy(p, bad / p.name)
    img = nib.load(str(bad / f"{P}rec-megre_T2starmap.nii.gz"))
    # nibabel reads pixdim 0 as 1 (with a warning): the zooms now disagree with the affine
    assert img.header.get_zooms()[:2] != tuple(np.abs(np.diag(img.affine)[:2]))
    tables = []
    for d, o in ((maps, "good"), (bad, "zooms0")):
        code, err = run_cli(["qc", str(d), "--labels", kit.s("dseg"), "--out",
                             str(tmp_path / o), "--erode", "5", "--no-figures"],   # 1.2 voxels
                            capsys)
        assert code in (0, 1), err
        tables.append(pd.read_csv(tmp_path / o / "roi_stats.tsv", sep="\t"))
    good, zero = tables
    assert (good["n_voxels"] > 0).all()
    assert good["n_voxels"].tolist() == zero["n_voxels"].tolist()
    # the erosion really removed the rim: fewer voxels than the uneroded vials
    labels = np.asarray(nib.load(kit.s("dseg")).dataobj)
    t2s = good[good["map"] == "T2starmap"].set_index("label")
    assert all(t2s.loc[v, "n_voxels"] + t2s.loc[v, "n_excluded"] < (labels == v).sum()
               for v in t2s.index)


BIG = 2 ** 24   # float32 holds whole numbers exactly only up to here (IEEE 754 binary32)


def test_labels_above_2_24_stay_apart(sim, maps, tmp_path, capsys):
    """Vials labelled 2^24 and 2^24 + 1 are two regions in qc and in refit."""
    kit = Kit(sim, tmp_path)
    lab = np.asarray(nib.load(kit.s("dseg")).dataobj).astype(np.int64)
    big = np.where(lab == 1, BIG, np.where(lab == 2, BIG + 1, lab)).astype(np.int32)
    labels = kit.image("big_dseg.nii.gz", big, like="MEGRE")
    code, err = run_cli(["qc", str(maps), "--labels", labels, "--out", str(kit.out),
                         "--no-figures"], capsys)
    assert code in (0, 1), err
    t = pd.read_csv(kit.out / "roi_stats.tsv", sep="\t")
    t = t[t["map"] == "T2starmap"].set_index("label")
    assert {BIG, BIG + 1} <= set(t.index)
    assert t.loc[BIG, "n_voxels"] + t.loc[BIG, "n_excluded"] == (lab == 1).sum()
    assert t.loc[BIG + 1, "n_voxels"] + t.loc[BIG + 1, "n_excluded"] == (lab == 2).sum()
    code = __import__("pipeline.cli", fromlist=["main"]).main(
        ["refit", "megre", kit.s("MEGRE"), "--label-map", labels, "--label", str(BIG + 1),
         "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0 and doc["region"]["n_voxels_in_region"] == (lab == 2).sum()


def test_dam_pair_of_2d_images(tmp_path, capsys):
    """A double-angle pair stored as 2D images is one slice: B1 in closed form."""
    rng = np.random.default_rng(4)
    b1 = rng.uniform(0.7, 1.2, (10, 12))
    alpha, m0 = 50.0, 1000.0
    folder = tmp_path / "in"
    folder.mkdir()
    paths = []
    for k, a in enumerate((alpha, 2 * alpha), start=1):
        # long-TR spoiled signal M0 sin(B1 a): the double-angle method, Insko & Bolinger
        # 1993, J Magn Reson A 103:82 (from memory)
        data = (m0 * np.sin(np.deg2rad(b1 * a))).astype(np.float32)
        p = write_nifti(folder / f"x_flip-{k}_TB1DAM.nii.gz", data)
        write_json(folder / f"x_flip-{k}_TB1DAM.json", {"FlipAngle": a, "RepetitionTime": 20.0})
        paths.append(str(p))
    code, err = run_cli(["fit", "dam", *paths, "--out", str(tmp_path / "o")], capsys)
    assert code == 0, err
    got = np.asarray(nib.load(str(tmp_path / "o" / "x_rec-dam_TB1map.nii.gz")).dataobj)
    assert got.shape == (10, 12, 1)
    np.testing.assert_allclose(got[..., 0], b1, rtol=1e-4)


# ---- leftovers of killed writers -----------------------------------------------------------

_KILLED_WRITER = """
import os, sys, time
from pipeline import outputs
def stuck(fd):   # the process is killed while its temporary file is being written
    print("writing", flush=True)
    time.sleep(600)
outputs.os.fsync = stuck
outputs.atomic_write_bytes(sys.argv[1], b"half a map")
"""


def test_killed_fit_leaves_nothing_a_later_fit_keeps(sim, tmp_path, capsys):
    kit = Kit(sim, tmp_path)
    kit.out.mkdir()
    proc = subprocess.Popen([sys.executable, "-c", _KILLED_WRITER,
                             str(kit.out / f"{P}rec-megre_T2starmap.nii.gz")],
                            stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "writing"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    left = [p.name for p in kit.out.iterdir()]
    assert len(left) == 1 and left[0].endswith(".tmp"), left     # what the kill left
    old = kit.out / ".x.nii.gz.abcd1234.tmp"                     # an earlier version's
    old.write_bytes(b"x")
    os.utime(old, (time.time() - 2 * 86400,) * 2)
    mine = kit.out / f".y.nii.gz.~{__import__('pipeline.outputs', fromlist=['x'])._HOST}~" \
                     f"{os.getpid()}~00ff00ff.tmp"                # a live writer's: kept
    mine.write_bytes(b"y")
    code, err = run_cli(fit("megre", kit.s("MEGRE"), out=kit.out), capsys)
    assert code == 0, err
    hidden = sorted(p.name for p in kit.out.iterdir() if p.name.startswith("."))
    assert hidden == [mine.name]


def test_config_file_inside_the_results_is_refused(sim, tmp_path, capsys):
    """A reference table kept where the workflow writes (output_dir/trend/) is an input
    that would be overwritten: refused before any job."""
    kit = Kit(sim, tmp_path)
    ref = kit.file("res/trend/reference.tsv", (kit.phantom / "reference.tsv").read_text())
    argv = run(kit, phantom__reference=ref)
    given = tree_digest(tmp_path)
    code, err = run_cli(argv, capsys)
    assert code == 2 and "lies where the workflow writes its results" in err, err
    assert tree_digest(tmp_path) == given
