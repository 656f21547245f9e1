"""The run's verdict: one state shared by the exit status, the report headline and the console.

A nightly run judges the newest session of every site/scanner. Its state is

* ``rejection`` — a drift rule rejected a monitored quantity in a newest session (exit 1);
* ``fail`` — a vial failed its tolerance (or vials could not be placed) in a newest
  session (exit 1);
* ``warn`` — no rejection or failure, but a vial is in its warn band or a drift rule
  warned (1-2s) in a newest session (exit 0);
* ``pass`` — otherwise (exit 0).

:func:`verdict` decides it from plain facts; :func:`headline_html`, :func:`sessions_html`
and :func:`drift_html` present it (HTML fragments for :func:`qc.report.build_report`),
with every value shown in display units (ms for times) and the unit in each header.
"""
from __future__ import annotations

import html
import math
from dataclasses import dataclass, field
from typing import Any, Sequence
from urllib.parse import quote

import pandas as pd

from qc.figures import display_scale
from qc.report import MAP_TITLE, _num

STATES = {"rejection": ("DRIFT REJECTION", "✖", "fail", 1), "fail": ("FAIL", "✖", "fail", 1),
          "warn": ("WARN", "▲", "warn", 0), "pass": ("PASS", "✔", "pass", 0)}


@dataclass
class Finding:
    """One thing that fired in a newest session (a rejection or a failing vial)."""

    kind: str                # "rejection" | "fail" | "warn"
    session: str
    model: str
    map: str
    vial: str                # "vial07 (label 7)"
    rule: str                # drift rule, or "tolerance" / "placement"
    detail: str

    def text(self) -> str:
        what = f"{MAP_TITLE.get(self.map, self.map)} ({self.model})" if self.map else self.model
        head = {"rejection": f"drift rule {self.rule}", "fail": "QC failure",
                "warn": f"warning ({self.rule})"}[self.kind]
        vial = f" · {self.vial}" if self.vial else ""
        return f"{head} · {what}{vial} · session {self.session}: {self.detail}"


@dataclass
class Verdict:
    state: str
    findings: list[Finding] = field(default_factory=list)
    judged: list[str] = field(default_factory=list)     # newest sessions judged

    @property
    def exit_status(self) -> int:
        return STATES[self.state][3]

    @property
    def word(self) -> str:
        return STATES[self.state][0]


def verdict(rejections: Sequence[Finding], fails: Sequence[Finding], warns: Sequence[Finding],
            judged: Sequence[str]) -> Verdict:
    """The run's state from what fired in the newest sessions (rejections first)."""
    state = "rejection" if rejections else "fail" if fails else "warn" if warns else "pass"
    return Verdict(state, [*rejections, *fails, *warns], list(judged))


def vial_name(name: Any, label: Any) -> str:
    n = "" if name is None or (isinstance(name, float) and math.isnan(name)) else str(name)
    return f"{n} (label {int(label)})" if n and n != f"label {int(label)}" else \
        f"label {int(label)}"


def with_unit(value: float, map_name: str, units: str = "s") -> str:
    """A stored (SI) value in display units with its unit, e.g. "812.3 ms"."""
    k, u = display_scale(map_name, units if isinstance(units, str) and units else "s")
    return f"{_num(float(value) * k)} {u}".rstrip()


def esc(x: Any) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def headline_html(v: Verdict, title_note: str = "") -> str:
    """The banner on the first screen: state, exit status and what fired."""
    word, sym, cls, code = STATES[v.state]
    judged = ", ".join(v.judged) or "none"
    items = "".join(f"<li>{esc(f.text())}</li>" for f in v.findings[:12])
    more = (f"<li>… and {len(v.findings) - 12} more (tables below)</li>"
            if len(v.findings) > 12 else "")
    what = (f"<ul class=\"fired\">{items}{more}</ul>" if items else
            "<p>No drift rule rejected and no vial failed or warned in the newest "
            "session(s).</p>")
    return (f'<div class="banner {cls}" role="status"><span class="big">{sym} {word}</span>'
            f"<span>Verdict of this run (exit status {code}) on the newest session of each "
            f"site/scanner: {esc(judged)}.{esc(title_note)}</span></div>{what}")


def sessions_html(rows: pd.DataFrame) -> str:
    """Session × model table: counts, failing vials, drift rejections, temperature, link.

    ``rows`` columns: session, model, n_pass, n_warn, n_fail, failing, rejections,
    temperature, temperature_source, href (relative link to the session page, may be empty),
    and optionally judged (False: no reference values, the counts are shown as "–").
    """
    if rows.empty:
        return "<p>No session.</p>"
    head = ("<tr><th class=\"t\">session</th><th class=\"t\">model</th><th>pass</th>"
            "<th>warn</th><th>fail</th><th class=\"t\">failing vials</th>"
            "<th>drift rejections</th><th>temperature (°C)</th>"
            "<th class=\"t\">temperature from</th></tr>")
    body = []
    for r in rows.itertuples():
        ses = esc(r.session)
        if r.href:
            ses = f'<a href="{esc(quote(r.href))}">{ses}</a>'
        t = "–" if r.temperature is None or (isinstance(r.temperature, float)
                                             and math.isnan(r.temperature)) \
            else f"{float(r.temperature):.1f}"
        fail_cls = ' class="fail"' if r.n_fail else ""
        rej_cls = ' class="fail"' if r.rejections else ""
        counts = (r.n_pass, r.n_warn, r.n_fail) if getattr(r, "judged", True) else ("–",) * 3
        body.append(
            f'<tr><td class="t">{ses}</td><td class="t">{esc(r.model)}</td>'
            f"<td>{counts[0]}</td><td>{counts[1]}</td><td{fail_cls}>{counts[2]}</td>"
            f'<td class="t note">{esc(r.failing)}</td><td{rej_cls}>{r.rejections}</td>'
            f'<td>{t}</td><td class="t note">{esc(r.temperature_source)}</td></tr>')
    return f"<table><thead>{head}</thead><tbody>{''.join(body)}</tbody></table>"


def drift_html(violations: pd.DataFrame, monitored: dict[str, tuple[str, ...]],
               shown: pd.DataFrame, value: str = "mean") -> str:
    """Violations as one table per map (values in display units, unit in each header),
    and which quantities are judged and which only shown."""
    mon = "; ".join(f"{MAP_TITLE.get(mp, mp)} of {m}" for m, maps in sorted(monitored.items())
                    for mp in maps) or "none"
    judged_pairs = {(m, mp) for m, maps in monitored.items() for mp in maps}
    only_shown = sorted({(str(m), str(mp)) for m, mp in zip(shown["model"], shown["map"])}
                        - judged_pairs) if not shown.empty else []
    parts = [f"<p><strong>Judged</strong> (monitored quantities): {esc(mon)}. "
             + (f"<strong>Shown, not judged</strong> (nuisance parameters and comparison "
                f"models): {esc('; '.join(f'{MAP_TITLE.get(mp, mp)} of {m}' for m, mp in only_shown))}. "
                if only_shown else "")
             + f"Tracked value: the vial {esc(value)} referred to the reference temperature "
               "(measured × reference / reference at the session's temperature) where the "
               "reference gives it, else as measured. z = (tracked − baseline mean) / "
               "baseline SD.</p>"]
    if violations.empty:
        parts.append("<p><strong>No drift rule fired.</strong></p>")
        return "\n".join(parts)
    rej = violations[violations["severity"] == "reject"]
    parts.append(f"<p><strong>{len(rej)} rejection(s), {len(violations) - len(rej)} "
                 "warning(s)</strong> over the whole history (the verdict above counts the "
                 "newest sessions only).</p>")
    for (model, mp), g in violations.groupby(["model", "map"], sort=True):
        units = str(g["units"].dropna().iloc[0]) if g["units"].notna().any() else "s"
        k, u = display_scale(str(mp), units)
        uu = f" ({u})" if u else " (ratio)"
        head = ("<tr><th class=\"t\">session</th><th class=\"t\">vial</th><th class=\"t\">"
                f"rule</th><th class=\"t\">severity</th><th>measured{uu}</th>"
                f"<th>tracked{uu}</th><th>baseline mean{uu}</th><th>baseline SD{uu}</th>"
                "<th>z (SD)</th><th class=\"t\">detail</th></tr>")
        body = "".join(
            f'<tr><td class="t">{esc(r.session)}</td><td class="t">'
            f"{esc(vial_name(r.name, r.label))}</td><td class=\"t\">{esc(r.rule)}</td>"
            f'<td class="t {"fail" if r.severity == "reject" else "warn"}">{esc(r.severity)}'
            f"</td><td>{_num(float(r.value) * k)}</td><td>{_num(float(r.tracked) * k)}</td>"
            f"<td>{_num(float(r.baseline_mean) * k)}</td><td>{_num(float(r.baseline_sd) * k)}"
            f"</td><td>{_num(r.z, 3)}</td><td class=\"t note\">{esc(r.detail)}</td></tr>"
            for r in g.itertuples())
        parts.append(f"<h3>{esc(MAP_TITLE.get(mp, mp))} — {esc(model)}</h3>"
                     f"<table><thead>{head}</thead><tbody>{body}</tbody></table>")
    return "\n".join(parts)
