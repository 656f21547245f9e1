"""Workflow configuration: read, check against the JSON schema, fill defaults, resolve paths.

What ``relaxline run`` and the Snakefile call before any job runs (:func:`load`); every
problem is an :class:`~pipeline.errors.InputError` naming the config key.
"""
from __future__ import annotations

import copy
import re
from pathlib import Path

from fitting.errors import excerpt, shorten_message
from pipeline.errors import InputError

SCHEMA = Path(__file__).with_name("schemas") / "config.schema.yaml"
# models that take a B1 map, with the setting that uses none (or fits it)
B1_USERS = {"vfa": "none", "mese": "fitted", "mp2rage": "none", "looklocker": "none"}
# models whose TB1map can feed another model's fit (the `b1` value names the model)
B1_SOURCES = ("dam", "afi")
# models whose T1map can feed another model's fit (`models.<name>.t1`), in the order
# `auto` prefers them
T1_SOURCES = ("ir", "vfa")


def _option_keys() -> dict[str, tuple[str, ...]]:
    """Model options a `models.<name>` entry may set -> the models they apply to: the
    options of `relaxline fit` (:data:`pipeline.fitjob.MODEL_OPTIONS`), passed to the fit
    jobs as JSON."""
    from pipeline.fitjob import MODEL_OPTIONS, option_models
    return {k: option_models(k) for k in MODEL_OPTIONS}


def t1_users() -> list[str]:
    """Models that take a per-voxel T1 map (:func:`fitting.spec.t1_map_models`)."""
    from fitting.spec import t1_map_models
    return t1_map_models()


def t1_setting(cfg: dict, model: str) -> str:
    """``models.<model>.t1``: auto (the default for models that take a T1 map, unless the
    model's spec says ``extra["t1_feed"] = "fixed"``: ``afi``, whose published method is the
    TR << T1 closed form), ir, vfa or fixed (the default for the others)."""
    from fitting.spec import get_model
    if cfg["models"][model].get("t1"):
        return cfg["models"][model]["t1"]
    auto = model in t1_users() and get_model(model).extra.get("t1_feed", "auto") == "auto"
    return "auto" if auto else "fixed"


def _depends(cfg: dict) -> dict[str, set[str]]:
    """Companion-map edges a fit waits for: B1 from dam or afi, T1 from an explicit source."""
    out: dict[str, set[str]] = {name: set() for name in cfg["models"]}
    for name, m in cfg["models"].items():
        if m.get("b1") in B1_SOURCES:
            out[name].add(m["b1"])
        if m.get("t1") in T1_SOURCES:
            out[name].add(m["t1"])
    return out


def _reaches(graph: dict[str, set[str]], start: str, goal: str) -> bool:
    seen, todo = set(), [start]
    while todo:
        n = todo.pop()
        if n == goal:
            return True
        if n not in seen:
            seen.add(n)
            todo.extend(graph.get(n, ()))
    return False


def companion_models(cfg: dict, model: str, kind: str) -> tuple[list[str], bool]:
    """Models whose map of ``kind`` ("b1" or "t1") may feed ``model``'s fit, in order of
    preference, and whether one is required (an explicit setting) or optional (``auto``:
    the first present in the session is used; a source that would wait for ``model``
    itself, directly or through others, is skipped)."""
    m = cfg["models"][model]
    if kind == "b1":
        return ([m["b1"]], True) if m.get("b1") in B1_SOURCES else ([], False)
    setting = t1_setting(cfg, model)
    if setting in T1_SOURCES:
        return [setting], True
    if setting != "auto":
        return [], False
    graph = _depends(cfg)
    return [c for c in T1_SOURCES if c in cfg["models"] and c != model
            and not _reaches(graph, c, model)], False


def _check_t1(cfg: dict, source: str) -> None:
    """``models.<name>.t1``: a model that takes a T1 map, a configured source, no cycle."""
    users = t1_users()
    for name, m in cfg["models"].items():
        t1 = m.get("t1")
        if t1 not in (None, "fixed") and name not in users:
            raise InputError(f"{source}: key `models.{name}.t1`: the {name} model takes no "
                             f"T1 map (models that do: {', '.join(users) or 'none'}); remove "
                             "the key.")
        if t1 in T1_SOURCES and t1 not in cfg["models"]:
            raise InputError(f"{source}: key `models.{name}.t1` is '{t1}' but no "
                             f"`models.{t1}` is configured; add its series pattern, or use "
                             "auto or fixed.")
        if t1 == name:
            raise InputError(f"{source}: key `models.{name}.t1`: a model cannot take its T1 "
                             "from itself; use another source, auto or fixed.")
    graph = _depends(cfg)
    for name, m in cfg["models"].items():
        t1 = m.get("t1")
        if t1 in T1_SOURCES and _reaches(graph, t1, name):
            raise InputError(f"{source}: key `models.{name}.t1` is '{t1}', but the {t1} fit "
                             f"itself waits for the {name} map (through `b1`/`t1` settings), "
                             f"so neither could start; take {name}'s T1 from another source "
                             "(e.g. ir) or set it to fixed.")


def profile_for(setting, stem: str | None) -> str | None:
    """The slice profile a series uses: ``models.<name>.slice_profile`` is one profile
    for every series, or a mapping of series-name globs to profiles (the first glob
    matching the series stem wins; ``none`` or no match: no profile)."""
    import fnmatch
    if isinstance(setting, dict):
        if stem is None:
            return None
        setting = next((v for g, v in setting.items() if fnmatch.fnmatch(stem, g)), None)
    return None if setting in (None, "none", False) else str(setting)


def _schema() -> dict:
    import yaml
    return yaml.safe_load(SCHEMA.read_text(encoding="utf-8"))


def read_config(path: str | Path) -> dict:
    """Read a YAML config file (errors name the file and line)."""
    from fitting.errors import RelaxlineError
    from qc.userfiles import read_yaml
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: config file not found; copy sample_config/config.yaml and "
                         "edit it, or give --config.")
    try:
        cfg = read_yaml(p, "config")
    except RelaxlineError as exc:
        raise InputError(f"{exc} See sample_config/config.yaml.") from None
    if not isinstance(cfg, dict):
        raise InputError(f"{p}: expected a mapping of config keys, got {type(cfg).__name__}.")
    return cfg


def _key_path(err) -> str:
    parts = [str(p) for p in err.absolute_path]
    return ".".join(parts) if parts else "(top level)"


def validate_config(cfg: dict, source: str = "config") -> dict:
    """Check ``cfg`` against the JSON schema and fill defaults; returns a new dict.

    The first problem becomes an :class:`InputError` naming the key, e.g.
    ``config.yaml: key `fit.chunk_voxels`: 'many' is not of type 'integer'``.
    """
    import jsonschema
    schema = _schema()
    validator = jsonschema.Draft202012Validator(schema)
    errors = sorted(validator.iter_errors(cfg), key=lambda e: (len(e.absolute_path),
                                                                list(map(str, e.absolute_path))))
    if errors:
        e = errors[0]
        # quote the offending value only in part: it may be huge (aliases, pasted data)
        msg = shorten_message(e.message.replace(repr(e.instance), excerpt(e.instance)), 300)
        if e.validator == "propertyNames":
            msg = f"unknown name: {msg}"
        if e.validator == "required":
            missing = re.findall(r"'([^']+)' is a required property", msg)
            key = ".".join([p for p in map(str, e.absolute_path)] + missing[:1])
            raise InputError(f"{source}: key `{key}` is missing; see "
                             "sample_config/config.yaml for a documented example.")
        raise InputError(f"{source}: key `{_key_path(e)}`: {msg}. See "
                         "sample_config/config.yaml for the allowed values.")
    out = copy.deepcopy(cfg)
    _fill_defaults(out, schema)
    for name, m in out["models"].items():
        b1 = m.get("b1")
        if b1 is not None and name not in B1_USERS:
            raise InputError(f"{source}: key `models.{name}.b1`: the {name} model takes no "
                             f"B1 map (only {', '.join(B1_USERS)} do); remove the key.")
        if b1 == "fitted" and name != "mese":
            raise InputError(f"{source}: key `models.{name}.b1`: 'fitted' applies to mese "
                             "only; use 'dam', 'afi' or 'none'.")
        if b1 == "none" and name == "mese":
            raise InputError(f"{source}: key `models.mese.b1`: use 'fitted' (B1 fitted from "
                             "the echoes), 'dam' or 'afi'.")
        if name == "looklocker" and b1 in B1_SOURCES and m.get("ll_correction") != "readout":
            raise InputError(f"{source}: key `models.looklocker.b1` is '{b1}', but only the "
                             "readout correction uses a B1 map; set `ll_correction: readout` "
                             "or remove the key.")
        if b1 in B1_SOURCES and b1 not in out["models"]:
            raise InputError(f"{source}: key `models.{name}.b1` is '{b1}' but no "
                             f"`models.{b1}` is configured; add the {b1} series pattern or "
                             f"set b1 to '{B1_USERS[name]}'.")
        keys = _option_keys()
        for key in keys:
            if key in m and m[key] is not False and name not in keys[key]:
                raise InputError(f"{source}: key `models.{name}.{key}` applies to "
                                 f"{', '.join(keys[key])} only; remove it.")
    _check_t1(out, source)
    return out


def model_options(cfg: dict, model: str, stem: str | None = None) -> dict:
    """The model options (as ``relaxline fit`` takes them) set in ``models.<model>``, for
    the series ``stem`` (its slice profile, :func:`profile_for`)."""
    m = cfg["models"][model]
    out = {k: m[k] for k in _option_keys() if k in m and m[k] is not False
           and k != "slice_profile"}
    prof = profile_for(m.get("slice_profile"), stem)
    if prof:
        out["slice_profile"] = prof
    return out


def _fill_defaults(obj: dict, schema: dict) -> None:
    for key, sub in schema.get("properties", {}).items():
        if key not in obj and "default" in sub:
            obj[key] = copy.deepcopy(sub["default"])
        if isinstance(obj.get(key), dict) and sub.get("type") == "object":
            _fill_defaults(obj[key], sub)


def resolve_paths(cfg: dict, base: str | Path | None = None) -> dict:
    """Make the config's paths absolute: relative to ``config_dir`` (or ``base``)."""
    out = copy.deepcopy(cfg)
    root = Path(out.get("config_dir") or base or Path.cwd()).resolve()
    out["config_dir"] = str(root)

    def absolute(p: str, against: Path) -> str:
        q = Path(p).expanduser()
        return str(q if q.is_absolute() else (against / q).resolve())

    out["input_dir"] = absolute(out["input_dir"], root)
    out["output_dir"] = absolute(out["output_dir"], root)
    ph = out.setdefault("phantom", {})
    for k in ("reference", "tolerances", "layout"):
        if ph.get(k):
            ph[k] = absolute(ph[k], root)
    for m in out["models"].values():   # profile files relative to the config too
        prof = m.get("slice_profile")
        if isinstance(prof, str) and not prof.startswith("sinc:") and prof != "none":
            m["slice_profile"] = absolute(prof, root)
        elif isinstance(prof, dict):
            m["slice_profile"] = {g: (absolute(v, root) if isinstance(v, str) and not
                                      v.startswith("sinc:") and v != "none" else v)
                                  for g, v in prof.items()}
    if out.get("dicom", {}).get("drop_dir"):
        out["dicom"]["drop_dir"] = absolute(out["dicom"]["drop_dir"], root)
    hist = out.setdefault("history", {})
    hist["database"] = absolute(hist.get("database", "history.sqlite"), Path(out["output_dir"]))
    return out


def check_paths(cfg: dict, source: str = "config", create_input: bool = False) -> None:
    """Paths the config names must exist, and the files they name must be valid, before any
    job runs (hours of fitting must not end in a typo in the reference table).

    A missing ``input_dir`` is created when DICOM conversion fills it (a ``dicom.drop_dir``
    is configured, or ``create_input``)."""
    from fitting.errors import RelaxlineError
    drop = cfg.get("dicom", {}).get("drop_dir")
    if drop and not Path(drop).is_dir():
        raise InputError(f"{source}: key `dicom.drop_dir`: folder {drop} not found; point it "
                         "at the folder the scanner exports DICOM files to.")
    if (create_input or drop) and not Path(cfg["input_dir"]).exists():
        from pipeline.outputs import ensure_dir
        ensure_dir(cfg["input_dir"])
    if not Path(cfg["input_dir"]).is_dir():
        raise InputError(f"{source}: key `input_dir`: folder {cfg['input_dir']} not found; "
                         "point it at the tree holding the sub-*/ses-* folders.")
    out = Path(cfg["output_dir"])
    if out.exists() and not out.is_dir():
        raise InputError(f"{source}: key `output_dir`: {out}: exists and is not a folder; "
                         "give a folder for the results (a new one is created).")
    ph = cfg.get("phantom", {})
    for k in ("reference", "tolerances", "layout"):
        p = ph.get(k)
        if p and not Path(p).is_file():
            raise InputError(f"{source}: key `phantom.{k}`: file {p} not found.")
    from pipeline import profiles
    for name, m in cfg["models"].items():   # slice profiles read and checked now
        prof = m.get("slice_profile")
        for v in (prof.values() if isinstance(prof, dict) else [prof]):
            if v in (None, "none"):
                continue
            try:
                profiles.check_spec(v)
                if profiles.is_file_spec(v):
                    profiles.read_profile(v)
            except InputError as exc:
                raise InputError(f"{source}: key `models.{name}.slice_profile`: {exc}") \
                    from None
    for key, p in (("phantom.reference", ph.get("reference")),
                   ("phantom.tolerances", ph.get("tolerances")),
                   ("phantom.layout", ph.get("layout")), ("input_dir", cfg["input_dir"])):
        if p and _written_by_workflow(Path(p), out, cfg["discovery"]):
            raise InputError(f"{source}: key `{key}`: {p} lies where the workflow writes its "
                             f"results in output_dir {out}, so it would be overwritten; move "
                             "it out of output_dir (or choose another output_dir).")
    checks = {"phantom.reference": (ph.get("reference"), _check_reference),
              "phantom.tolerances": (ph.get("tolerances"), _check_tolerances),
              "phantom.layout": (ph.get("layout"), _check_layout),
              "history.database": (cfg["history"]["database"], _check_database)}
    for key, (path, check) in checks.items():
        if not path:
            continue
        try:
            check(path)
        except RelaxlineError as exc:
            raise InputError(f"{source}: key `{key}`: {exc}") from None


# what the workflow writes in output_dir (pipeline.workflow's layout)
_WRITTEN_TOP = {"report.html", "status.json", "trend", "logs", ".snakemake", "history.sqlite"}
_WRITTEN_IN_SESSION = {"fits", "qc", "chunks"}   # sessions.MANIFEST, QC, sessions.CHUNK


def _written_by_workflow(path: Path, out: Path, discovery: dict) -> bool:
    """True if ``path`` is (or lies inside) something the workflow writes in ``out``."""
    import fnmatch
    try:
        rel = path.resolve().relative_to(out.resolve()).parts
    except ValueError:
        return False
    if not rel:
        return False       # input_dir = output_dir: results go beside the sessions' data
    if rel[0] in _WRITTEN_TOP:
        return True
    return (len(rel) >= 3 and fnmatch.fnmatch(rel[0], discovery["subject_glob"])
            and fnmatch.fnmatch(rel[1], discovery["session_glob"])
            and rel[2] in _WRITTEN_IN_SESSION)


def _check_reference(path: str) -> None:
    from qc.reference import Reference
    Reference.load(path)


def _check_tolerances(path: str) -> None:
    from qc.tolerance import load_tolerances
    load_tolerances(path)


def _check_layout(path: str) -> None:
    from qc.layout import read_layout
    read_layout(path)


def _check_database(path: str) -> None:
    from qc.history import check_database
    parent = Path(path).parent
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir():
        raise InputError(f"{parent} is a file, so the history database {path} cannot be "
                         "created below it; point `history.database` elsewhere.")
    check_database(path)


def load(path: str | Path | None = None, cfg: dict | None = None,
         create_input: bool = False) -> dict:
    """Read (or take), validate, resolve and check a config: what ``run`` and the Snakefile use.

    ``create_input``: create a missing ``input_dir`` (when DICOM conversion will fill it)."""
    source = str(path) if path is not None else "config"
    if cfg is None:
        cfg = read_config(path)
        cfg.setdefault("config_dir", str(Path(path).resolve().parent))
    cfg = resolve_paths(validate_config(cfg, source))
    check_paths(cfg, source, create_input=create_input)
    return cfg
