"""Trend figures per vial across sessions and the history section of the report.

One figure per (site, scanner, series, map): a panel per vial with the measured value
(mean ± SD of the ROI) in session order, the reference corrected to each session's
temperature, its tolerance band, the baseline mean with ±2 SD and ±3 SD control limits
(Westgard et al. 1981, Clin Chem 27:493) and the sessions where a drift rule fired.
Violations are marked by shape and labelled, so the figures read in grey.
"""
from __future__ import annotations

import html
import math

import numpy as np
import pandas as pd

from qc.figures import QUANTITY_LABEL, _plt, display_scale, to_png
from qc.report import img_tag

PANEL_GROUP = ("site", "scanner", "series", "map")


def y_label(map_name: str, value: str = "mean", units: str = "s") -> str:
    """Quantity, statistic and display unit of the plotted values, e.g. "T2, ROI mean ± SD
    (ms)": the history holds SI values (seconds, a ratio for B1); figures show them in the
    report's display units (:func:`qc.figures.display_scale`)."""
    q = QUANTITY_LABEL.get(map_name, map_name)
    _, u = display_scale(map_name, units)
    return f"{q}, ROI {value} ± SD{f' ({u})' if u else ''}"


def trend_figure(scored: pd.DataFrame, violations: pd.DataFrame | None = None,
                 value: str = "mean", title: str = "") -> bytes:
    """PNG of one (site, scanner, series, map): a panel per vial over sessions.

    Parameters
    ----------
    scored : rows of one group as returned by :func:`qc.drift.evaluate` (``session``,
        ``label``, ``name``, ``value``, ``sd``, ``reference_at_temperature``,
        ``tolerance_pct``, ``baseline_mean``, ``baseline_sd``).
    violations : drift violations of the group (rule per session and label).
    """
    plt = _plt()
    sessions = sorted(scored["session"].astype(str).unique())
    xpos = {s: i for i, s in enumerate(sessions)}
    labels = sorted(scored["label"].astype(int).unique())
    ncol = min(4, len(labels))
    nrow = math.ceil(len(labels) / ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(3.2 * ncol, 2.4 * nrow + 0.6),
                             squeeze=False, sharex=True)
    mapname = str(scored["map"].iloc[0])
    units = str(scored["units"].dropna().iloc[0]) if "units" in scored and \
        scored["units"].notna().any() else "s"
    k, _ = display_scale(mapname, units)
    scored = scored.copy()
    cols = [c for c in (value, "sd", "reference", "reference_at_temperature",
                        "baseline_mean", "baseline_sd", "tracked") if c in scored]
    ycol = "tracked" if "tracked" in scored else value     # what the rules follow
    rcol = "reference" if ycol == "tracked" else "reference_at_temperature"
    scored[cols] = scored[cols].astype(float) * k
    for ax in axes.flat[len(labels):]:
        ax.set_visible(False)
    for ax, lab in zip(axes.flat, labels):
        g = scored[scored["label"].astype(int) == lab].sort_values("session")
        x = np.array([xpos[s] for s in g["session"].astype(str)])
        y = g[ycol].astype(float).to_numpy()
        sd = g["sd"].astype(float).to_numpy() if "sd" in g else np.zeros_like(y)
        ax.errorbar(x, y, yerr=sd, fmt="o-", color="#2166ac", ms=4, lw=1, capsize=2,
                    label="measured")
        ref = g[rcol].astype(float).to_numpy() if rcol in g else np.full_like(y, np.nan)
        if np.isfinite(ref).any():
            ax.plot(x, ref, "k--", lw=1, label="reference")
            tol = g["tolerance_pct"].astype(float).to_numpy() \
                if "tolerance_pct" in g else np.full_like(y, np.nan)
            ok = np.isfinite(tol) & np.isfinite(ref)
            if ok.any():
                ax.fill_between(x[ok], (ref * (1 - tol / 100))[ok], (ref * (1 + tol / 100))[ok],
                                color="0.85", label="tolerance", zorder=0)
        bm = g["baseline_mean"].astype(float).to_numpy() if "baseline_mean" in g else []
        if len(bm) and np.isfinite(bm).any():
            m, s = float(np.nanmax(bm)), float(np.nanmax(g["baseline_sd"].astype(float)))
            ax.axhline(m, color="#1b7837", lw=0.8, label="baseline mean, ±2/3 SD")
            for k, ls in ((2, ":"), (3, "-.")):
                ax.axhline(m + k * s, color="#1b7837", lw=0.7, ls=ls)
                ax.axhline(m - k * s, color="#1b7837", lw=0.7, ls=ls)
        if violations is not None and not violations.empty:
            vv = violations[(violations["label"].astype(int) == lab)]
            for sev, marker, colour in (("warning", "s", "#b35806"), ("reject", "X", "#b2182b")):
                hit = vv[vv["severity"] == sev]
                for ses, rules in hit.groupby("session")["rule"]:
                    if ses not in xpos:
                        continue
                    yv = float(g.loc[g["session"].astype(str) == ses, ycol].iloc[0])
                    ax.plot(xpos[ses], yv, marker, color=colour, ms=9, mfc="none", mew=1.5)
                    ax.annotate(",".join(sorted(set(rules))), (xpos[ses], yv), fontsize=6,
                                xytext=(3, 5), textcoords="offset points", color=colour)
        name = str(g["name"].iloc[0]) if "name" in g and g["name"].notna().any() else ""
        ax.set_title(f"{lab} {name}".strip(), fontsize=8)
        ax.tick_params(labelsize=6)
        ax.set_xticks(range(len(sessions)))
        ax.set_xticklabels(sessions, rotation=60, ha="right", fontsize=6)
    fig.supylabel(y_label(mapname, value, units)
                  + ("\nreferred to the reference temperature" if ycol == "tracked" else ""),
                  fontsize=8)
    fig.suptitle(title or mapname, fontsize=9)
    handles, names = axes.flat[0].get_legend_handles_labels()
    if handles:
        fig.legend(handles, names, loc="lower center", ncol=len(handles), fontsize=7,
                   frameon=False)
    fig.tight_layout(rect=(0, 0.05, 1, 0.97))
    return to_png(fig)


def trend_figures(scored: pd.DataFrame, violations: pd.DataFrame, value: str = "mean"
                  ) -> dict[tuple[str, str, str, str], bytes]:
    """:func:`trend_figure` for every (site, scanner, series, map) of ``scored`` seen in
    at least two sessions (one session has no trend to show; its values are in the
    session's tables)."""
    out = {}
    for key, g in scored.groupby(list(PANEL_GROUP), sort=True):
        if g["session"].nunique() < 2:
            continue
        v = violations.merge(pd.DataFrame([key], columns=list(PANEL_GROUP)), how="inner") \
            if not violations.empty else violations
        judged = bool(g["monitored"].any()) if "monitored" in g else True
        out[key] = trend_figure(g, v, value, title=" / ".join(str(k) for k in key)
                                + ("" if judged else " (shown, not judged)"))
    return out


def html_table(df: pd.DataFrame, columns: list[str],
               links: dict[str, str] | None = None) -> str:
    """A plain HTML table of ``columns`` (floats to 4 significant digits, text escaped).

    ``links`` maps a shown column to a column of ``df`` holding a relative link target
    (a path, "/"-separated); a cell whose target is empty stays plain text.
    """
    from urllib.parse import quote

    links = links or {}
    head = "".join(f"<th>{html.escape(c)}</th>" for c in columns)
    body = []
    for _, row in df.iterrows():
        cells = []
        for c in columns:
            v = row[c]
            if isinstance(v, float):
                v = "" if math.isnan(v) else f"{v:.4g}"
            text = html.escape(str(v))
            target = row[links[c]] if c in links else ""
            if isinstance(target, str) and target:
                text = f'<a href="{html.escape(quote(target), quote=True)}">{text}</a>'
            cells.append(f"<td>{text}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def history_section_html(scored: pd.DataFrame, figures: dict[tuple, bytes],
                         baseline_note: str) -> str:
    """HTML fragment: baseline note, history size and the embedded trend figures (the
    violations are tabled by :func:`qc.verdict.drift_html`)."""
    parts = [f"<p>{html.escape(baseline_note)}</p>"]
    n_sessions = scored[["site", "scanner", "session"]].drop_duplicates().shape[0] \
        if not scored.empty else 0
    parts.append(f"<p>{n_sessions} session(s) in the history database. Trend figures: the "
                 "tracked value (vial statistic referred to the reference temperature) per "
                 "session with the reference value and its tolerance band, the baseline "
                 "mean and ±2/±3 SD control limits; squares mark warnings, crosses "
                 "rejections.</p>")
    for key, png in figures.items():
        alt = " / ".join(str(k) for k in key)
        parts.append(f"<figure>{img_tag(png, f'trend {alt}')}<figcaption>{html.escape(alt)}"
                     "</figcaption></figure>")
    return "\n".join(parts)
