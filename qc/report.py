"""The self-contained HTML QC report (one file: styles inline, images as data URIs).

:func:`build_report` takes the ROI table and already-rendered figures and returns the
HTML text; it never touches the network or the file system. Other stages (history,
drift) add their own sections through ``extra_sections`` and ``warnings``.
"""
from __future__ import annotations

import base64
import html
import json
import math
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import pandas as pd

from qc.figures import display_scale

CAUTION = ("For quality assurance and research only; this is not a medical device. Local "
           "codes, QA procedures and the responsible licensed physicist take precedence over "
           "anything this report says.")
STATUS_TEXT = {"pass": "PASS", "warn": "WARN", "fail": "FAIL", "n/a": "N/A"}
STATUS_SYMBOL = {"pass": "✔", "warn": "▲", "fail": "✖", "n/a": "–"}
AGREEMENT = "Agreement with reference"
MAP_TITLE = {"T1map": "T1", "T2map": "T2", "T2starmap": "T2*", "TB1map": "B1 (ratio to nominal)",
             "M0map": "M0", "MWFmap": "short-T2 fraction", "T1starmap": "apparent T1*"}

CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",sans-serif;
 margin:0 auto;max-width:1200px;padding:16px 24px;color:#111;line-height:1.45;font-size:15px}
h1{font-size:1.6em;margin:.2em 0}h2{font-size:1.25em;border-bottom:2px solid #ccc;
 padding-bottom:3px;margin-top:1.6em}h3{font-size:1.05em;margin:1.2em 0 .4em}
.banner{display:flex;align-items:center;gap:18px;padding:14px 18px;border-radius:6px;
 border:3px solid;margin:10px 0}
.banner .big{font-size:2em;font-weight:800;letter-spacing:.04em}
.banner.pass{background:#e6f4ea;border-color:#1b7837}.banner.warn{background:#fff4e0;
 border-color:#b35806}.banner.fail{background:#fde8e8;border-color:#b2182b}
.banner.na{background:#f0f0f0;border-color:#666}
ul.fired{font-size:1.05em;margin:4px 0 10px}ul.fired li{margin:2px 0}
.caution{background:#f4f4f4;border-left:6px solid #444;padding:8px 12px;margin:10px 0}
.warnings{background:#fff8e1;border-left:6px solid #b35806;padding:8px 12px;margin:10px 0}
.warnings li{margin:3px 0}
table{border-collapse:collapse;margin:6px 0 12px;font-size:.92em}
th,td{border:1px solid #bbb;padding:3px 7px;text-align:right;vertical-align:top}
th{background:#eef1f5;position:sticky;top:0}td.t,th.t{text-align:left}
tbody tr:nth-child(even){background:#fafafa}
td.st{font-weight:700;text-align:center;white-space:nowrap}
td.pass{background:#d9f0d3;color:#00441b}td.warn{background:#fee0b6;color:#7f3b08}
td.fail{background:#f4a6a6;color:#67001f}td.na{color:#555}
td.note{text-align:left;font-size:.85em;color:#333;min-width:10em;max-width:22em}
td.nw{white-space:nowrap}
.kv td:first-child{text-align:left;font-weight:600;background:#f7f7f7}.kv td{text-align:left}
figure{margin:10px 0 22px}figure img{max-width:100%;border:1px solid #ddd}
figcaption{font-size:.9em;color:#333;max-width:60em}
code,.mono{font-family:"DejaVu Sans Mono",Consolas,monospace;font-size:.85em;word-break:break-all}
footer{margin-top:2em;font-size:.85em;color:#444;border-top:1px solid #ccc;padding-top:6px}
@media print{th{position:static}}
"""


@dataclass
class Figure:
    """A rendered figure for the report."""

    title: str
    png: bytes
    caption: str = ""
    section: str = "Figures"


def esc(x: Any) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def overall_status(table: pd.DataFrame) -> str:
    """fail if any vial fails, else warn if any warns, else pass; n/a without references."""
    st = set(table["status"]) if "status" in table and len(table) else set()
    for s in ("fail", "warn", "pass"):
        if s in st:
            return s
    return "n/a"


def img_tag(png: bytes, alt: str) -> str:
    return (f'<img alt="{esc(alt)}" src="data:image/png;base64,'
            f'{base64.b64encode(png).decode("ascii")}">')


def _fmt(v: Any, spec: str) -> str:
    """Format a number with ``spec`` ("–" for missing/non-finite; text passes escaped)."""
    try:
        f = float(v)
    except (TypeError, ValueError):
        return esc(v)
    if not math.isfinite(f):
        return "–"
    if spec.endswith("f"):
        f = round(f, int(spec.rstrip("f").lstrip("+.") or 0)) + 0.0   # no "-0.0"
    return format(f, spec)


def _num(v: Any, digits: int = 4) -> str:
    return _fmt(v, f".{digits}g")


def _fixed(v: Any, decimals: int, signed: bool = False) -> str:
    return _fmt(v, f"{'+' if signed else ''}.{decimals}f")


def status_cell(status: str) -> str:
    s = status if status in STATUS_TEXT else "n/a"
    cls = "na" if s == "n/a" else s
    return f'<td class="st {cls}">{STATUS_SYMBOL[s]} {STATUS_TEXT[s]}</td>'


def results_table(table: pd.DataFrame) -> str:
    """One HTML table per series and map, values in display units."""
    if table.empty or not {"series", "map", "label"} <= set(table.columns):
        return "<p>No ROI statistics.</p>"
    parts = []
    t = table if "model" in table else table.assign(model="")
    t = t.assign(model=t["model"].astype(object).where(t["model"].notna(), "").astype(str))
    for (model, series, m), g in t.groupby(["model", "series", "map"], sort=False):
        units = str(g["units"].iloc[0]) if "units" in g else "s"
        k, u = display_scale(m, units)
        uu = f" ({u})" if u else " (ratio)" if m == "TB1map" else ""
        title = MAP_TITLE.get(m, m) + (f" — model {model}" if model else "")
        has_ref = g["reference_at_temperature"].notna().any()
        has_rng = "range_low" in g and g["range_low"].notna().any()
        head = ["vial", "name", "n used", "n excl.", f"mean{uu}", f"SD{uu}", f"median{uu}",
                f"IQR{uu}", "CV %", f"fit SE{uu}"]
        if has_ref:
            head += [f"ref.{uu}", "ref. at °C", f"ref. corrected{uu}", "bias %",
                     "warn / fail ±%"]
        if has_rng:
            head += [f"range of mean{uu}"]
        if has_ref or has_rng:
            head += ["status"]
        head += ["note"]
        rows = []
        for r in g.itertuples():
            cells = [f"<td>{esc(r.label)}</td>", f'<td class="t nw">{esc(r.name)}</td>',
                     f"<td>{esc(r.n_voxels)}</td>", f"<td>{esc(r.n_excluded)}</td>"]
            for v in (r.mean, r.sd, r.median, r.iqr):
                cells.append(f"<td>{_num(float(v) * k)}</td>")
            cells.append(f"<td>{_fixed(r.cv_pct, 1)}</td>")
            cells.append(f"<td>{_num(float(r.median_stderr) * k, 3)}</td>")
            if has_ref:
                cells.append(f"<td>{_num(float(r.reference) * k)}</td>")
                cells.append(f"<td>{_num(r.reference_temperature, 3)}</td>")
                cells.append(f"<td>{_num(float(r.reference_at_temperature) * k)}</td>")
                cells.append(f"<td>{_fixed(r.bias_pct, 1, signed=True)}</td>")
                lim = (f"{_num(r.warn_pct, 3)} / {_num(r.tolerance_pct, 3)}"
                       if math.isfinite(float(r.tolerance_pct)) else "–")
                cells.append(f"<td>{lim}</td>")
            if has_rng:
                lo, hi = float(r.range_low) * k, float(r.range_high) * k
                cells.append(f'<td class="nw">{_num(lo)} – {_num(hi)}</td>'
                             if math.isfinite(lo) else "<td>–</td>")
            if has_ref or has_rng:
                cells.append(status_cell(str(r.status)))
            cells.append(f'<td class="note">{esc(r.note if isinstance(r.note, str) else "")}</td>')
            rows.append("<tr>" + "".join(cells) + "</tr>")
        ths = "".join(f'<th class="{"t" if h in ("name", "note") else ""}">{esc(h)}</th>'
                      for h in head)
        parts.append(f"<h3>{esc(title)} — <span class=\"mono\">{esc(series)}</span></h3>"
                     + (f'<p class="caution">{esc(mese_b1_note(g))}</p>'
                        if model == "mese" and m == "TB1map" else "")
                     + f"<table><thead><tr>{ths}</tr></thead><tbody>{''.join(rows)}</tbody>"
                     "</table>")
    return "\n".join(parts)


MESE_B1_NOTE = (
    "This B1 is a by-product of the mese (extended phase graph) T2 fit: an estimate of the "
    "refocusing efficiency (actual over nominal refocusing angle), not a transmit-field "
    "measurement, so it is expected to differ from a dedicated B1 map such as dam's. "
    "The echo train of an angle α and of 360° − α are the same, so the estimate is "
    "identifiable only up to a fold about 1")
MESE_B1_FOLDED = "folded about 1"   # the note written into roi_stats.tsv by the QC


def mese_b1_note(rows: pd.DataFrame) -> str:
    """The words shown with a mese B1 table; the fold as the QC read it from the sidecar."""
    notes = " ".join(str(n) for n in rows.get("note", pd.Series(dtype=str)).fillna(""))
    if f"not {MESE_B1_FOLDED}" in notes:
        fold = ("; this fit reports it unfolded (values above 1 possible), as recorded in "
                "the TB1map sidecar.")
    elif MESE_B1_FOLDED in notes:
        fold = ("; this fit reports it folded, 1 − |1 − B1| (never above 1), as recorded in "
                "the TB1map sidecar.")
    else:
        fold = "; whether this fit folded it is not recorded in the TB1map sidecar."
    return (MESE_B1_NOTE + fold + " It is shown for inspection and not judged by the drift "
            "rules.")


def vial_finding(r: Any) -> dict:
    """A failing or warning row as {map, vial, detail} (for summaries and the console)."""
    name = str(r.name) if isinstance(r.name, str) and r.name else f"label {r.label}"
    vial = name if name == f"label {r.label}" else f"{name} (label {r.label})"
    return {"map": str(r.map), "vial": vial, "detail": _fail_text(r).split(": ", 1)[-1]}


def _fail_text(r: Any) -> str:
    """Why a row fails: the bias against its limit, or the mean outside its range."""
    units = getattr(r, "units", "s")
    k, u = display_scale(str(r.map), units if isinstance(units, str) else "")
    lo = float(getattr(r, "range_low", math.nan))
    if math.isfinite(lo):
        rng = f"range {_num(lo * k)} – {_num(float(r.range_high) * k)} {esc(u)}".rstrip()
        mean = float(r.mean)
        what = (f"mean {_num(mean * k)} {esc(u)}".rstrip() + " outside the "
                if math.isfinite(mean) else "no usable voxel; ")
        return f"region {esc(r.label)} ({esc(r.name)}): {what}{rng}"
    return (f"vial {esc(r.label)} ({esc(r.name)}): bias {_fixed(r.bias_pct, 1, True)} % "
            f"(limit ±{_num(r.tolerance_pct, 3)} %)")


def kv_table(items: Mapping[str, Any]) -> str:
    rows = "".join(f"<tr><td>{esc(k)}</td><td>{esc(v)}</td></tr>" for k, v in items.items())
    return f'<table class="kv"><tbody>{rows}</tbody></table>'


def provenance_html(provenance: Sequence[Mapping[str, Any]]) -> str:
    """Each map: file, model, engine, options, version and the checksummed sources."""
    if not provenance:
        return "<p>No provenance recorded.</p>"
    rows = []
    for p in provenance:
        src = p.get("Sources") or []
        # file name shown, full path on hover: the folder is usually the same for all
        src_html = "<br>".join(
            f'<span class="mono" title="{esc(s.get("path", ""))}">'
            f'{esc(str(s.get("path", "")).replace(chr(92), "/").rsplit("/", 1)[-1])}</span> '
            f'<span class="mono">sha256:{esc(str(s.get("sha256", ""))[:12])}…</span>'
            if isinstance(s, Mapping) else esc(s) for s in src) or "–"
        opts = p.get("Options")
        rows.append("<tr>" + "".join([
            f'<td class="t mono">{esc(p.get("file", ""))}</td>',
            f'<td class="t">{esc(p.get("Model", "–"))}</td>',
            f'<td class="t">{esc(p.get("Engine", "–"))}</td>',
            f'<td class="t mono">{esc(json.dumps(opts, sort_keys=True) if opts else "–")}</td>',
            f'<td class="t">{esc(p.get("RelaxlineVersion", "–"))}</td>',
            f'<td class="t">{src_html}</td>']) + "</tr>")
    head = "".join(f'<th class="t">{h}</th>' for h in
                   ("map file", "model", "engine", "options", "relaxline", "sources (sha256)"))
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def build_report(table: pd.DataFrame, *, title: str = "relaxline phantom QC",
                 summary: Mapping[str, Any] | None = None,
                 figures: Sequence[Figure] = (),
                 agreement: pd.DataFrame | None = None,
                 noise_html: str = "",
                 provenance: Sequence[Mapping[str, Any]] = (),
                 warnings: Sequence[str] = (),
                 extra_sections: Sequence[tuple[str, str]] = (),
                 footer: str = "", headline: str | None = None,
                 results_title: str = "Results per vial",
                 sections_first: bool = False) -> str:
    """The report page as one HTML string.

    Parameters
    ----------
    table : the ROI table (roi_stats.tsv columns).
    summary : key → value lines shown under the status banner (session, temperature...).
    figures : rendered figures, grouped by their ``section`` in order of appearance.
    agreement : Bland–Altman statistics per map (map, n, bias, sd, lower, upper).
    noise_html : an HTML fragment with background noise and SNR (trusted, built here).
    provenance : one mapping per map file (file, Model, Engine, Options, RelaxlineVersion,
        Sources).
    warnings : shown in a highlighted list near the top, never hidden.
    extra_sections : (title, trusted HTML fragment) pairs appended before provenance, for
        other stages (history, drift).
    headline : trusted HTML replacing the status banner (the workflow's run verdict).
    results_title : heading of the per-vial tables.
    sections_first : put ``extra_sections`` right after the summary (before the tables).
    """
    st = overall_status(table)
    counts = table["status"].value_counts().to_dict() if len(table) else {}
    n_ref = sum(counts.get(k, 0) for k in ("pass", "warn", "fail"))
    by_range = "range_low" in table and bool(table["range_low"].notna().any())
    if st == "n/a":
        verdict = "No reference values or ranges: statistics only (no pass/fail)."
    else:
        verdict = (f"{counts.get('fail', 0)} fail, {counts.get('warn', 0)} warn, "
                   f"{counts.get('pass', 0)} pass of {n_ref} vial/map results compared with "
                   + ("reference or configured range." if by_range else "reference."))
    failing = table[table["status"] == "fail"] if len(table) else table
    fail_list = ""
    if len(failing):
        items = "".join(f"<li>{esc(r.map)} {_fail_text(r)}"
                        f"{' — ' + esc(r.note) if isinstance(r.note, str) and r.note else ''}"
                        "</li>" for r in failing.itertuples())
        fail_list = f"<p><strong>Failing:</strong></p><ul>{items}</ul>"
    cls = "na" if st == "n/a" else st
    out = [f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
           f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
           f"<title>{esc(title)}</title><style>{CSS}</style></head><body>",
           f"<h1>{esc(title)}</h1>",
           headline if headline is not None else
           f'<div class="banner {cls}" role="status"><span class="big">'
           f"{STATUS_SYMBOL[st]} {STATUS_TEXT[st]}</span><span>{esc(verdict)}</span></div>",
           "" if headline is not None else fail_list,
           f'<p class="caution"><strong>Caution.</strong> {esc(CAUTION)}</p>']
    if warnings:
        out.append('<div class="warnings"><strong>Warnings</strong><ul>'
                   + "".join(f"<li>{esc(w)}</li>" for w in warnings) + "</ul></div>")
    if summary:
        out.append("<h2>Session</h2>" + kv_table(summary))
    if sections_first:
        out += [f"<h2>{esc(t)}</h2>{frag}" for t, frag in extra_sections]
    out.append(f"<h2>{esc(results_title)}</h2>"
               "<p>Status: |bias| ≤ warn limit → PASS; ≤ fail limit → WARN; otherwise FAIL. "
               "Ref. corrected = reference value corrected to the phantom temperature; "
               "bias = (vial mean − ref. corrected) / ref. corrected. "
               "A region without reference value but with a configured range: mean inside "
               "the range → PASS (WARN near an edge if a margin is configured), outside → "
               "FAIL. "
               "SD, IQR and CV over the voxels used; voxels whose fit is not usable are "
               "excluded (n excl.). Fit SE = median voxelwise standard error. Times in ms "
               "throughout this report (tables, drift tables, trend axes); roi_stats.tsv and "
               "drift.tsv hold SI seconds (their units column).</p>")
    out.append(results_table(table))
    sections: dict[str, list[Figure]] = {}
    for f in figures:
        sections.setdefault(f.section, []).append(f)
    ba = ""
    if agreement is not None and len(agreement):
        rows = "".join(
            f"<tr><td class=\"t\">{esc(MAP_TITLE.get(r.map, r.map))}</td><td>{esc(r.n)}</td>"
            f"<td>{_fixed(r.bias, 2, True)}</td><td>{_fixed(r.sd, 2)}</td>"
            f"<td>{_fixed(r.lower, 2, True)} to {_fixed(r.upper, 2, True)}</td></tr>"
            for r in agreement.itertuples())
        ba = ("<table><thead><tr><th class=\"t\">map</th><th>n vials</th><th>bias %</th>"
              "<th>SD %</th><th>95 % limits of agreement %</th></tr></thead>"
              f"<tbody>{rows}</tbody></table>"
              "<p>Limits of agreement = bias ± 1.96·SD of the percent differences "
              "(Bland &amp; Altman 1986, Lancet 1:307).</p>")
        sections.setdefault(AGREEMENT, [])
    order = [AGREEMENT] + [k for k in sections if k != AGREEMENT]
    for sec in order:
        if sec not in sections:
            continue
        out.append(f"<h2>{esc(sec)}</h2>" + (ba if sec == AGREEMENT else ""))
        for f in sections[sec]:
            out.append(f"<figure>{img_tag(f.png, f.title)}<figcaption><strong>{esc(f.title)}."
                       f"</strong> {esc(f.caption)}</figcaption></figure>")
    if noise_html:
        out.append("<h2>Noise and SNR</h2>" + noise_html)
    for sec_title, frag in (() if sections_first else extra_sections):
        out.append(f"<h2>{esc(sec_title)}</h2>{frag}")
    out.append("<h2>Provenance</h2>" + provenance_html(provenance))
    out.append(f"<footer>{esc(footer)} {esc(CAUTION)}</footer></body></html>\n")
    return "\n".join(x for x in out if x)
