"""BIDS-derivative names of the maps, and the workflow's results folder as a derivative dataset.

Design §6: the results folder is a BIDS derivative dataset that the official validator
accepts, and the standalone ``relaxline fit`` uses the same file names. A map of model
``M`` fitted to the series ``sub-<s>_ses-<d>[_acq-..][_run-..]_<SUFFIX>`` is named

    sub-<s>_ses-<d>[_acq-..]_rec-<M>[_run-..][_desc-stderr|_desc-rmse]_<map suffix>

The raw suffix (``IRT1``, ``MESE`` ...) and the volume index entities (``inv-``,
``echo-``, ``flip-``) are dropped; the model goes into the ``rec-`` entity (letters and
digits only: ``mese-mono`` -> ``rec-mesemono``), so two models fitted to one series
(``mese`` and ``mese-mono``) or one quantity from two series (T1 from ``ir`` and ``vfa``)
never collide, while ``desc-stderr``, ``desc-rmse`` and ``desc-fitstatus`` keep the
meaning they had. In the workflow the maps go into the session's datatype folders:
B1 maps (``TB1map``) into ``fmap/`` as BIDS requires, everything else into ``anat/``.
Maps BIDS has no suffix for (e.g. ``InvEffmap``, ``Plateaumap``) keep their own suffix
and are listed in the dataset's ``.bidsignore``, as are QC tables, reports, logs, the
history database and the workflow's bookkeeping.
"""
from __future__ import annotations

import os
import re
from pathlib import Path
from typing import Iterable

BIDS_VERSION = "1.10.0"
# BIDS entity order (those a relaxometry file name can carry)
ENTITY_ORDER = ("sub", "ses", "task", "acq", "ce", "trc", "stain", "rec", "dir", "run", "mod",
                "echo", "flip", "inv", "mt", "part", "proc", "hemi", "space", "split",
                "recording", "chunk", "seg", "res", "den", "label", "desc")
# entities that index the volumes of a raw series: meaningless on a fitted map
VOLUME_ENTITIES = ("echo", "flip", "inv", "mt", "part")
# parametric-map suffixes the BIDS specification defines (quantitative MRI)
BIDS_MAP_SUFFIXES = frozenset({
    "T1map", "T2map", "T2starmap", "R1map", "R2map", "R2starmap", "PDmap", "PDT2map",
    "M0map", "S0map", "MTRmap", "MTsat", "MWFmap", "MTVmap", "Chimap", "UNIT1", "T1rho",
    "TB1map", "RB1map"})
FMAP_SUFFIXES = frozenset({"TB1map", "RB1map"})   # BIDS puts B1 maps in fmap/
# what the workflow writes beside the BIDS data (.bidsignore lines)
NON_BIDS = ("qc", "fits", "chunks", "logs", "trend", "report.html", "status.json",
            "*.sqlite", "*.sqlite-wal", "*.sqlite-shm", "*.sqlite.backup-*")
QUANTITY = {"T1map": "longitudinal relaxation time T1 (s)",
            "T2map": "transverse relaxation time T2 (s)",
            "T2starmap": "effective transverse relaxation time T2* (s)",
            "M0map": "equilibrium signal M0 (signal units of the series)",
            "TB1map": "transmit B1 as the ratio of actual to nominal flip angle"}


def model_label(model: str) -> str:
    """A model name as a BIDS label (letters and digits): ``mese-mono`` -> ``mesemono``."""
    return re.sub(r"[^0-9A-Za-z]", "", model)


def derivative_stem(series_stem: str, model: str) -> str:
    """The stem of a model's maps fitted to the series ``series_stem`` (module docstring).

    Names that are not BIDS keep their leading parts: ``bench_IRT1`` -> ``bench_rec-ir``.
    """
    parts = series_stem.split("_")
    if len(parts) > 1 and "-" not in parts[-1]:
        parts = parts[:-1]                       # the raw suffix
    plain, entities = [], {}
    for p in parts:
        key, sep, value = p.partition("-")
        if sep and key in ENTITY_ORDER and re.fullmatch(r"[0-9A-Za-z]+", value):
            if key not in VOLUME_ENTITIES:
                entities[key] = value
        else:
            plain.append(p)
    entities["rec"] = entities.get("rec", "") + model_label(model)
    ordered = sorted(entities.items(), key=lambda kv: ENTITY_ORDER.index(kv[0]))
    return "_".join(plain + [f"{k}-{v}" for k, v in ordered])


def datatype(suffix: str) -> str:
    """The BIDS datatype folder of a map with ``suffix`` (a desc- variant goes with it)."""
    return "fmap" if suffix in FMAP_SUFFIXES else "anat"


def dataset_root(path: str | Path) -> Path | None:
    """The BIDS dataset holding ``path`` (the nearest folder above with a
    ``dataset_description.json``), or None."""
    p = Path(path).resolve().parent
    for folder in (p, *p.parents):
        if (folder / "dataset_description.json").is_file():
            return folder
    return None


def source_uri(path: str | Path) -> str:
    """``bids:raw:<path in its dataset>`` for a file in a BIDS dataset (the results'
    ``DatasetLinks`` name the raw dataset ``raw``), else a ``file://`` URI."""
    root = dataset_root(path)
    if root is None:
        return Path(path).resolve().as_uri()
    return "bids:raw:" + Path(path).resolve().relative_to(root).as_posix()


def is_parametric(suffix: str) -> bool:
    """A quantitative map (not a mask or segmentation): BIDS wants ``SkullStripped`` on it."""
    return suffix not in ("mask", "dseg", "probseg")


def nonstandard_suffixes(suffixes: Iterable[str]) -> list[str]:
    """The map suffixes among ``suffixes`` that BIDS does not define."""
    return sorted({s for s in suffixes if s not in BIDS_MAP_SUFFIXES and is_parametric(s)})


def registry_suffixes() -> list[str]:
    """Every map suffix the registered models write (default options)."""
    from fitting.spec import get_model, model_names
    return sorted({s for name in model_names() for s in get_model(name).map_suffixes})


def configured_suffixes(models: dict[str, dict]) -> list[str]:
    """Map suffixes of the workflow's models with their options (variants such as
    ``mese-mono`` with ``plateau`` write more maps)."""
    from fitting.spec import configure_model, get_model
    from pipeline.wfconfig import model_options
    cfg = {"models": models}
    return sorted({s for name in models for s in configure_model(
        get_model(name), model_options(cfg, name)).map_suffixes})


def bidsignore_text(extra_suffixes: Iterable[str] = ()) -> str:
    lines = list(NON_BIDS) + [f"*_{s}.*" for s in nonstandard_suffixes(
        [*registry_suffixes(), *extra_suffixes])]
    return "\n".join(lines) + "\n"


def write_dataset_files(output_dir: str | Path, input_dir: str | Path, version: str,
                        suffixes: Iterable[str] = ()) -> None:
    """``dataset_description.json``, ``README.md`` and ``.bidsignore`` of the results folder
    (rewritten only when their content changes). ``suffixes``: map suffixes the run may
    write besides the registry's defaults (:func:`configured_suffixes`)."""
    from pipeline.outputs import atomic_write_text
    import json
    out = Path(output_dir)
    raw = os.path.relpath(Path(input_dir).resolve(), out.resolve())
    files = {
        "dataset_description.json": json.dumps({
            "Name": "relaxline maps and phantom QC", "BIDSVersion": BIDS_VERSION,
            "DatasetType": "derivative",
            "GeneratedBy": [{"Name": "relaxline", "Version": version,
                             "Description": "voxelwise relaxometry fits (maps, standard "
                                            "errors, rms residuals, fit status); ROI "
                                            "statistics and QC reports in qc/ (not BIDS)"}],
            "SourceDatasets": [{"URL": Path(raw).as_posix()}],
            "DatasetLinks": {"raw": Path(raw).as_posix()}}, indent=2, sort_keys=True) + "\n",
        "README.md": README,
        ".bidsignore": bidsignore_text(suffixes)}
    for name, text in files.items():
        p = out / name
        if not p.is_file() or p.read_text(encoding="utf-8") != text:
            atomic_write_text(p, text)


README = """\
# relaxline results

A BIDS derivative dataset written by the relaxline workflow. Maps are named
`sub-<s>_ses-<d>_rec-<model>_<map>.nii.gz` (`T1map`, `T2map`, `T2starmap`, `M0map` in
`anat/`, `TB1map` in `fmap/`), with `desc-stderr` (standard error), `desc-rmse` (root-mean-
square residual) and `desc-fitstatus_mask` (fit status codes) variants; each sidecar says
what the map holds, its units, the model, engine, options and its sources (BIDS URIs,
`bids:raw:` = the raw dataset in `DatasetLinks`) with their sha256.

Beside the BIDS data (listed in `.bidsignore`): `sub-*/ses-*/qc/` ROI statistics
(`roi_stats.tsv`) and QC report of each session, `report.html` (all sessions, drift),
`trend/`, `logs/`, `status.json`, the history database and the workflow's bookkeeping.

For quality assurance and research only; not a medical device. Local codes, QA
procedures and the responsible licensed physicist take precedence.
"""
