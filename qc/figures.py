"""QC figures as PNG bytes (matplotlib, Agg backend, no display needed).

* :func:`map_montage` — slices of a map in physical units over a perceptually uniform
  colour map (viridis), vial outlines and label numbers;
* :func:`measured_vs_reference` — measured against reference per vial, log–log, identity
  line and tolerance bands;
* :func:`bland_altman` — percent differences against the mean of the two methods with
  bias and 95 % limits of agreement, bias ± 1.96·SD (Bland & Altman 1986, Lancet 1:307);
* :func:`signal_curves` — mean signal per vial against the acquisition variable, with
  the model evaluated at the vial's median parameters when available.

Status is shown by marker shape and text as well as colour, so the figures read in grey.
"""
from __future__ import annotations

import io
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from qc.tolerance import TIME_MAPS

RATIO_MAPS = ("TB1map",)   # unitless: shown as bare ratios

STATUS_STYLE = {  # marker shape carries the status without colour
    "pass": {"marker": "o", "color": "#1b7837"},
    "warn": {"marker": "s", "color": "#b35806"},
    "fail": {"marker": "X", "color": "#b2182b"},
    "n/a": {"marker": "D", "color": "#4d4d4d"},
}
QUANTITY_LABEL = {"T1map": "T1", "T2map": "T2", "T2starmap": "T2*", "TB1map": "B1 (ratio)",
                  "MWFmap": "short-T2 fraction", "T1starmap": "apparent T1*",
                  "M0map": "M0"}


def display_scale(map_name: str, units: str) -> tuple[float, str]:
    """Factor and unit for display: times in ms (files keep seconds), B1 as a bare ratio."""
    if map_name in TIME_MAPS and units in ("s", ""):
        return 1000.0, "ms"
    return 1.0, "" if map_name in RATIO_MAPS else units


def for_display(df: pd.DataFrame) -> pd.DataFrame:
    """A copy of an ROI table with time columns scaled to display units (ms)."""
    t = df.copy()
    cols = [c for c in ("mean", "sd", "median", "iqr", "reference", "reference_at_temperature",
                        "median_stderr") if c in t]
    for i, r in t.iterrows():
        k, u = display_scale(str(r["map"]), str(r.get("units", "s")))
        if k != 1.0:
            t.loc[i, cols] = r[cols].astype(float) * k
            t.loc[i, "units"] = u
    return t


def _plt():
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    return plt


def to_png(fig, dpi: int = 110, tight: bool = True) -> bytes:
    """PNG bytes of a figure (no timestamp metadata: same figure, same bytes).

    ``tight``: crop to the drawn elements (an extra layout pass of the whole figure;
    figures laid out by ``tight_layout`` with nothing outside their axes skip it)."""
    plt = _plt()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight" if tight else None,
                metadata={"Software": None})
    plt.close(fig)
    return buf.getvalue()


def _axis_label(map_name: str, units: str) -> str:
    q = QUANTITY_LABEL.get(map_name, map_name)
    if map_name in RATIO_MAPS or not units:
        return q
    return f"{q} ({units})"


def colour_range(data: np.ndarray, labels: np.ndarray | None = None,
                 log: bool = False) -> tuple[float, float]:
    """1st–99th percentile of the finite values inside the labels (else everywhere),
    widened a little (by 10 % of the span, or by a factor 1.2 on a log scale)."""
    d = np.asarray(data, float)
    sel = np.isfinite(d)
    if labels is not None and np.any(sel & (np.asarray(labels) > 0)):
        sel &= np.asarray(labels) > 0
    if not sel.any():
        return 0.0, 1.0
    lo, hi = np.percentile(d[sel], [1, 99])
    if log and lo > 0 and hi > lo:
        return float(lo / 1.2), float(hi * 1.2)
    if hi <= lo:
        lo, hi = lo - 0.5 * abs(lo or 1), hi + 0.5 * abs(hi or 1)
    pad = 0.1 * (hi - lo)
    return float(max(lo - pad, 0.0) if lo >= 0 else lo - pad), float(hi + pad)


def map_montage(data: np.ndarray, title: str, map_name: str, units: str,
                labels: np.ndarray | None = None, max_slices: int = 12,
                vrange: tuple[float, float] | None = None) -> bytes:
    """Montage of up to ``max_slices`` evenly spaced slices with a colour bar in ``units``.

    Relaxation-time maps whose vials span more than a decade get a logarithmic colour
    scale, so short and long vials are both distinguishable; values beyond the range are
    shown in the end colours (arrows on the colour bar).
    """
    plt = _plt()
    import matplotlib as mpl
    import matplotlib.patheffects as pe
    d = np.asarray(data, float)
    if d.ndim == 2:
        d = d[..., None]
    nz = d.shape[2]
    zs = np.unique(np.linspace(0, nz - 1, min(nz, max_slices)).round().astype(int))
    ncol = min(len(zs), 4)
    nrow = int(np.ceil(len(zs) / ncol))
    lo, hi = colour_range(d, labels, log=True) if vrange is None else vrange
    if map_name in TIME_MAPS and lo > 0 and hi / lo > 10:
        norm = mpl.colors.LogNorm(lo, hi)
    else:
        norm = mpl.colors.Normalize(*(vrange or colour_range(d, labels)))
    cmap = mpl.colormaps["viridis"].with_extremes(bad="#d9d9d9")
    aspect = d.shape[1] / max(d.shape[0], 1)
    panel = 3.6
    fig, axes = plt.subplots(nrow, ncol, figsize=(panel * ncol + 1.4, panel * nrow * aspect + 0.7),
                             squeeze=False)
    im = None
    for ax in axes.ravel():
        ax.axis("off")
    halo = [pe.withStroke(linewidth=2.5, foreground="black")]
    for ax, z in zip(axes.ravel(), zs):
        # array index i runs left to right, j bottom to top (no radiological flip assumed)
        im = ax.imshow(d[:, :, z].T, origin="lower", cmap=cmap, norm=norm,
                       interpolation="nearest")
        if labels is not None:
            lab = np.asarray(labels)[:, :, z].T
            present = [v for v in np.unique(lab) if v > 0]
            if present:
                ax.contour(lab > 0, levels=[0.5], colors="white", linewidths=0.9)
                for v in present:
                    yy, xx = np.nonzero(lab == v)
                    # number just above the vial, so it does not hide the vial's values
                    ax.text(xx.mean(), yy.max() + 1.0, str(int(v)), color="white",
                            fontsize=8, ha="center", va="bottom", fontweight="bold",
                            path_effects=halo)
        ax.set_title(f"slice {z}", fontsize=9)
    fig.suptitle(title, fontsize=10)
    if im is not None:
        cb = fig.colorbar(im, ax=axes.ravel().tolist(), shrink=0.85, pad=0.02, extend="both")
        cb.set_label(_axis_label(map_name, units) + (", log scale" if isinstance(
            norm, mpl.colors.LogNorm) else ""))
        if isinstance(norm, mpl.colors.LogNorm):
            from matplotlib.ticker import FuncFormatter, LogLocator
            cb.ax.yaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
            cb.ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
            cb.ax.yaxis.set_minor_formatter(FuncFormatter(lambda v, _: ""))
    return to_png(fig)


def _plain_log_ticks(ax, axis: str = "both") -> None:
    """Log axes labelled with plain numbers at 1, 2, 5 × 10^k (easier to read than 10^k)."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter
    fmt = FuncFormatter(lambda v, _: f"{v:g}")
    axes = [ax.xaxis, ax.yaxis] if axis == "both" else [getattr(ax, f"{axis}axis")]
    for a in axes:
        a.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
        a.set_major_formatter(fmt)
        a.set_minor_formatter(NullFormatter())


def _with_reference(df: pd.DataFrame) -> pd.DataFrame:
    t = df.copy()
    t = t[np.isfinite(t["reference_at_temperature"].astype(float)) &
          np.isfinite(t["mean"].astype(float))]
    return t


def measured_vs_reference(df: pd.DataFrame) -> bytes | None:
    """Measured mean (± SD) against temperature-corrected reference, one panel per map."""
    t = _with_reference(df)
    if t.empty:
        return None
    plt = _plt()
    maps = list(dict.fromkeys(t["map"]))
    fig, axes = plt.subplots(1, len(maps), figsize=(4.6 * len(maps), 4.4), squeeze=False)
    for ax, m in zip(axes[0], maps):
        s = t[t["map"] == m]
        ref = s["reference_at_temperature"].to_numpy(float)
        lo, hi = np.nanmin(np.r_[ref, s["mean"]]) / 1.5, np.nanmax(np.r_[ref, s["mean"]]) * 1.5
        grid = np.geomspace(lo, hi, 50)
        fail = np.nanmedian(s["tolerance_pct"].astype(float))
        warn = np.nanmedian(s["warn_pct"].astype(float))
        if np.isfinite(fail):
            ax.fill_between(grid, grid * (1 - fail / 100), grid * (1 + fail / 100),
                            color="#d1e5f0", label=f"±{fail:g} % (fail limit)", lw=0)
        if np.isfinite(warn):
            ax.fill_between(grid, grid * (1 - warn / 100), grid * (1 + warn / 100),
                            color="#92c5de", label=f"±{warn:g} % (warn limit)", lw=0)
        ax.plot(grid, grid, color="black", lw=1, label="identity")
        for st in STATUS_STYLE:
            g = s[s["status"] == st]
            if g.empty:
                continue
            style = STATUS_STYLE[st]
            ax.errorbar(g["reference_at_temperature"], g["mean"], yerr=g["sd"].fillna(0),
                        ls="none", ms=7, mec="black", mew=0.6, ecolor="black", elinewidth=0.8,
                        label=st, **style)
        for r in s.itertuples():
            ax.annotate(str(r.label), (r.reference_at_temperature, r.mean), fontsize=8,
                        xytext=(5, -10), textcoords="offset points")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlim(lo, hi)
        ax.set_ylim(lo, hi)
        ax.set_aspect("equal")
        _plain_log_ticks(ax)
        units = str(s["units"].iloc[0]) if "units" in s else "s"
        q = QUANTITY_LABEL.get(m, m)
        ax.set_xlabel(f"reference {q} at phantom temperature ({units})")
        ax.set_ylabel(f"measured {q}, vial mean ± SD ({units})")
        ax.set_title(m)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=7, loc="upper left")
    fig.tight_layout()
    return to_png(fig, tight=False)


def bland_altman_stats(diff: Sequence[float]) -> dict[str, float]:
    """Bias, SD and 95 % limits of agreement, bias ± 1.96·SD (Bland & Altman 1986,
    Lancet 1:307); SD is the sample SD (ddof = 1)."""
    d = np.asarray(diff, float)
    d = d[np.isfinite(d)]
    if d.size == 0:
        return {"n": 0, "bias": np.nan, "sd": np.nan, "lower": np.nan, "upper": np.nan}
    bias = float(d.mean())
    sd = float(d.std(ddof=1)) if d.size > 1 else np.nan
    return {"n": int(d.size), "bias": bias, "sd": sd, "lower": bias - 1.96 * sd,
            "upper": bias + 1.96 * sd}


def bland_altman(df: pd.DataFrame) -> tuple[bytes | None, pd.DataFrame]:
    """Percent difference (measured − reference)/reference against the mean of the two.

    Returns the PNG and a table of bias and limits of agreement per map.
    """
    t = _with_reference(df)
    stats = []
    if t.empty:
        return None, pd.DataFrame(columns=["map", "n", "bias", "sd", "lower", "upper"])
    plt = _plt()
    maps = list(dict.fromkeys(t["map"]))
    fig, axes = plt.subplots(1, len(maps), figsize=(4.6 * len(maps), 3.8), squeeze=False)
    for ax, m in zip(axes[0], maps):
        s = t[t["map"] == m]
        avg = (s["mean"].to_numpy(float) + s["reference_at_temperature"].to_numpy(float)) / 2
        diff = s["bias_pct"].to_numpy(float)
        st = bland_altman_stats(diff)
        stats.append({"map": m, **st})
        for status in STATUS_STYLE:
            idx = np.flatnonzero(s["status"].to_numpy() == status)
            if idx.size == 0:
                continue
            style = STATUS_STYLE[status]
            ax.scatter(avg[idx], diff[idx], s=40, edgecolors="black", linewidths=0.6,
                       label=status, **style)
        for a, d, lab in zip(avg, diff, s["label"]):
            ax.annotate(str(lab), (a, d), fontsize=8, xytext=(5, 3), textcoords="offset points")
        ax.axhline(0, color="black", lw=0.8)
        if np.isfinite(st["bias"]):
            ax.axhline(st["bias"], color="#2166ac", lw=1.2, label=f"bias {st['bias']:+.2f} %")
        if np.isfinite(st["sd"]):
            for key in ("lower", "upper"):
                ax.axhline(st[key], color="#2166ac", lw=1, ls="--")
            ax.text(1.0, st["upper"], f" +1.96 SD\n {st['upper']:+.2f} %", fontsize=7,
                    va="center", transform=ax.get_yaxis_transform())
            ax.text(1.0, st["lower"], f" −1.96 SD\n {st['lower']:+.2f} %", fontsize=7,
                    va="center", transform=ax.get_yaxis_transform())
        # the fail limit is drawn when it is within reach of the data; otherwise it would
        # squash small differences into a line, so it is stated instead
        fail = np.nanmedian(s["tolerance_pct"].astype(float))
        extent = np.nanmax(np.abs(np.r_[diff, st["lower"], st["upper"]]))
        if np.isfinite(fail) and np.isfinite(extent) and fail <= 2 * extent:
            for sign in (-1, 1):
                ax.axhline(sign * fail, color="#777777", lw=1, ls=":")
            ax.text(0.01, fail, f"fail limit ±{fail:g} %", fontsize=7, color="#555555",
                    va="bottom", transform=ax.get_yaxis_transform())
        elif np.isfinite(fail):
            ax.text(0.01, 0.98, f"fail limit ±{fail:g} % is beyond the plotted range",
                    fontsize=7, color="#555555", va="top", transform=ax.transAxes)
        ax.set_xscale("log")
        _plain_log_ticks(ax, "x")
        units = str(s["units"].iloc[0]) if "units" in s else "s"
        q = QUANTITY_LABEL.get(m, m)
        ax.set_xlabel(f"mean of measured and reference {q} ({units})")
        ax.set_ylabel("(measured − reference)/reference (%)")
        ax.set_title(f"{m} (n = {st['n']})")
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    return to_png(fig, tight=False), pd.DataFrame(stats)


def signal_curves(x: np.ndarray, xlabel: str, curves: Mapping[int, tuple[np.ndarray, np.ndarray]],
                  names: Mapping[int, str], title: str,
                  fitted: Mapping[int, tuple[np.ndarray, np.ndarray]] | None = None,
                  note: str = "") -> bytes:
    """Mean ± SD signal per vial; fitted model curves as lines when given."""
    plt = _plt()
    import matplotlib as mpl
    labels = sorted(curves)
    cmap = mpl.colormaps["viridis"]
    fig, ax = plt.subplots(figsize=(7.5, 4.2))
    markers = "osD^v<>phX*"
    for i, lab in enumerate(labels):
        mean, sd = curves[lab]
        colour = cmap(i / max(len(labels) - 1, 1) * 0.9)
        ax.errorbar(x, mean, yerr=sd, ls="none", marker=markers[i % len(markers)], ms=5,
                    color=colour, mec="black", mew=0.4, elinewidth=0.7,
                    label=f"{lab}: {names.get(lab, '')}")
        if fitted and lab in fitted:
            xf, yf = fitted[lab]
            ax.plot(xf, yf, color=colour, lw=1.2)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("signal (arbitrary units), vial mean ± SD")
    ax.set_title(title, fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, ncol=2 if len(labels) > 6 else 1, loc="center left",
              bbox_to_anchor=(1.01, 0.5), title="vial", title_fontsize=8)
    if note:
        fig.text(0.01, -0.02, note, fontsize=7, ha="left", va="top")
    fig.tight_layout()
    return to_png(fig)
