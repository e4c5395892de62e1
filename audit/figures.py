"""Figures of the summary report: matplotlib object API on the Agg canvas (no pyplot state).

Every function returns a ``matplotlib.figure.Figure``; ``png_base64`` turns it into an embeddable
PNG. Colours: the Okabe-Ito palette (distinguishable with the common colour-vision deficiencies);
lines also differ in style so that nothing depends on colour alone.
"""

from __future__ import annotations

import base64
import io
import textwrap
from dataclasses import dataclass

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}
BASELINE = OKABE_ITO["blue"]
TREATMENT = OKABE_ITO["orange"]
OLS_LINE = OKABE_ITO["black"]
GLS_LINE = OKABE_ITO["vermillion"]
GREY = "#6b6b6b"

_RC = {
    "font.size": 9,
    "axes.titlesize": 9,
    "axes.labelsize": 9,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.edgecolor": "#444444",
    "axes.grid": True,
    "grid.color": "#e4e4e4",
    "grid.linewidth": 0.6,
    "legend.frameon": False,
    "legend.fontsize": 8,
}


def new_figure(width: float, height: float, constrained: bool = True) -> Figure:
    """A Figure attached to an Agg canvas, with the report's plain style."""
    import matplotlib as mpl

    with mpl.rc_context(_RC):
        fig = Figure(figsize=(width, height), layout="constrained" if constrained else None)
    FigureCanvasAgg(fig)
    return fig


def _axes(fig: Figure, *args, **kwargs):
    import matplotlib as mpl

    with mpl.rc_context(_RC):
        return fig.add_subplot(*args, **kwargs)


def png_bytes(fig: Figure, dpi: int = 96, colors: int | None = 128) -> bytes:
    """The figure as PNG bytes; with ``colors``, reduced to an adaptive palette (about 3x smaller)."""
    buf = io.BytesIO()
    if colors is None:
        fig.savefig(buf, format="png", dpi=dpi, facecolor="white")
        return buf.getvalue()
    from PIL import Image

    fig.set_dpi(dpi)
    fig.set_facecolor("white")
    fig.canvas.draw()
    w, h = fig.canvas.get_width_height(physical=True)
    img = Image.frombuffer("RGBA", (w, h), fig.canvas.buffer_rgba(), "raw", "RGBA", 0, 1).convert("RGB")
    img.quantize(colors=colors, method=Image.Quantize.MEDIANCUT).save(buf, format="PNG")
    return buf.getvalue()


def png_base64(fig: Figure, dpi: int = 96, colors: int | None = 128) -> str:
    """The figure as a base64 PNG string for a data: URI."""
    return base64.b64encode(png_bytes(fig, dpi, colors)).decode("ascii")


def _wrap(text: str, width: int) -> str:
    return "\n".join(textwrap.wrap(str(text), width)) or str(text)


def _short(text: str, width: int) -> str:
    return textwrap.shorten(str(text), width=width, placeholder="...")


# ----------------------------------------------------------------------------- review figures


def autocorrelation_distribution(shrinkage: pd.DataFrame, pooled: pd.DataFrame) -> Figure:
    """Histograms of per-case corrected r1 and calibrated AR(1) with the pooled value and intervals."""
    fig = new_figure(9.0, 3.2)
    panels = (
        ("r1_corrected", "r1_corrected", "Residual lag-1 autocorrelation,\ncorrected by its null mean"),
        ("raw", "ar1_coefficient", "AR(1) coefficient per case\n(exact mean inversion)"),
    )
    for i, (col, measure, title) in enumerate(panels):
        ax = _axes(fig, 1, 2, i + 1)
        x = pd.to_numeric(shrinkage.get(col), errors="coerce").to_numpy(dtype=float)
        x = x[np.isfinite(x)]
        bins = np.linspace(-1.0, 1.0, 21)
        ax.hist(np.clip(x, -1, 1), bins=bins, color=OKABE_ITO["sky_blue"], edgecolor="white")
        row = pooled[(pooled["measure"] == measure) & (pooled["group_by"] == "all")]
        if len(row) and np.isfinite(row["estimate"].iloc[0]):
            r = row.iloc[0]
            if np.isfinite(r["pi_lower"]):
                ax.axvspan(max(r["pi_lower"], -1), min(r["pi_upper"], 1), color=OKABE_ITO["yellow"], alpha=0.35,
                           lw=0, label="95% prediction interval")
            ax.axvspan(r["ci_lower"], r["ci_upper"], color=OKABE_ITO["orange"], alpha=0.45, lw=0,
                       label="95% confidence interval")
            ax.axvline(r["estimate"], color=OKABE_ITO["black"], lw=2, label=f"pooled = {r['estimate']:.2f}")
        ax.axvline(0, color=GREY, lw=0.8, ls=":")
        ax.set_xlim(-1, 1)
        counts, _ = np.histogram(np.clip(x, -1, 1), bins=bins)
        ax.set_ylim(0, max(counts.max() if counts.size else 1, 1) * 1.55)
        if col == "raw" and "raw_at_bound" in shrinkage:
            k = int(pd.Series(shrinkage["raw_at_bound"]).fillna(False).astype(bool).sum())
            if k:
                ax.text(0.99, 0.70, f"{k} at the \u00b10.95 bound", transform=ax.transAxes, ha="right", fontsize=7.5,
                        color=GREY)
        ax.set_title(title)
        ax.set_xlabel("value")
        ax.set_ylabel("cases")
        ax.legend(loc="upper left", fontsize=7.5)
    return fig


def forest_by_study(pooled: pd.DataFrame, measure: str = "ar1_coefficient") -> Figure:
    """Forest plot: pooled AR(1) per study with 95% CI, the overall estimate and its prediction interval."""
    sel = pooled[(pooled["measure"] == measure) & (pooled["group_by"] == "study")].copy()
    overall = pooled[(pooled["measure"] == measure) & (pooled["group_by"] == "all")]
    sel = sel.sort_values("group", ascending=False)
    n = len(sel)
    fig = new_figure(9.0, 0.9 + 0.32 * (n + 2))
    ax = _axes(fig, 1, 1, 1)
    y = np.arange(n) + 2
    est = sel["estimate"].to_numpy(float)
    lo = np.clip(sel["ci_lower"].to_numpy(float), -1.2, 1.2)
    hi = np.clip(sel["ci_upper"].to_numpy(float), -1.2, 1.2)
    k = sel["n_cases"].to_numpy(float)
    ax.hlines(y, lo, hi, color=OKABE_ITO["blue"], lw=1.6)
    ax.scatter(est, y, s=18 + 8 * k, marker="s", color=OKABE_ITO["blue"], zorder=3)
    labels = [f"{_short(g, 60)}  (n={int(c)})" for g, c in zip(sel["group"], k)]
    if len(overall):
        r = overall.iloc[0]
        if np.isfinite(r["pi_lower"]):
            ax.hlines(0.6, max(r["pi_lower"], -1.2), min(r["pi_upper"], 1.2), color=GREY, lw=1.2, ls="--",
                      label="95% prediction interval")
        diamond_x = [r["ci_lower"], r["estimate"], r["ci_upper"], r["estimate"]]
        diamond_y = [1, 1.3, 1, 0.7]
        ax.fill(diamond_x, diamond_y, color=OKABE_ITO["vermillion"], label="pooled, 95% CI")
        ax.axvline(r["estimate"], color=OKABE_ITO["vermillion"], lw=0.8, ls=":")
    ax.axvline(0, color=GREY, lw=0.8)
    ax.set_yticks(list(y) + [1], labels + [f"All cases (n={int(overall['n_cases'].iloc[0]) if len(overall) else 0})"])
    ax.set_ylim(0.2, n + 2.8)
    ax.set_xlim(-1.2, 1.2)
    ax.set_xlabel("AR(1) coefficient (random-effects pooled, 95% CI)")
    ax.grid(axis="y", visible=False)
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.09 * 14 / max(n + 2, 8)), ncols=2)
    return fig


def flip_chart(flips: pd.DataFrame) -> Figure:
    """Horizontal bars: share of cases whose decision flips, split into lost and gained significance."""
    sel = flips[flips["group_by"] == "all"].iloc[::-1]
    n = len(sel)
    fig = new_figure(9.0, 1.2 + 0.55 * max(n, 1))
    ax = _axes(fig, 1, 1, 1)
    y = np.arange(n)
    lost = sel["lost_rate"].to_numpy(float)
    gained = sel["gained_rate"].to_numpy(float)
    ax.barh(y, lost, color=OKABE_ITO["vermillion"], label="significance lost", height=0.55)
    ax.barh(y, gained, left=lost, color=OKABE_ITO["sky_blue"], label="significance gained", height=0.55,
            hatch="//", edgecolor="white")
    lo = sel["flip_ci_lower"].to_numpy(float)
    hi = sel["flip_ci_upper"].to_numpy(float)
    tot = sel["flip_rate"].to_numpy(float)
    ax.errorbar(tot, y, xerr=[tot - lo, hi - tot], fmt="none", ecolor=OKABE_ITO["black"], capsize=3, lw=1)
    for yi, t, k, m in zip(y, tot, sel["n_flips"], sel["n_cases"]):
        ax.text(min(hi.max() if n else 0, 1) + 0.02, yi, f"{int(k)} of {int(m)}", va="center")
    ax.set_yticks(y, [_wrap(lbl, 34) for lbl in sel["label"]])
    ax.set_xlim(0, max(0.2, min(1.0, (np.nanmax(hi) if n else 0.2) + 0.12)))
    ax.set_xlabel("share of cases whose decision at alpha differs from OLS (bar: Wilson 95% CI of the total)")
    ax.grid(axis="y", visible=False)
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return fig


def sensitivity_curve(sensitivity: pd.DataFrame, pooled_rho: float | None = None) -> Figure:
    """Flip rate (with Wilson band) of the GLS test against an assumed AR(1) coefficient."""
    fig = new_figure(8.0, 3.4)
    ax = _axes(fig, 1, 1, 1)
    r = sensitivity["assumed_rho"].to_numpy(float)
    ax.fill_between(r, sensitivity["flip_ci_lower"], sensitivity["flip_ci_upper"], color=OKABE_ITO["sky_blue"],
                    alpha=0.35, lw=0, label="Wilson 95% CI")
    ax.plot(r, sensitivity["flip_rate"], color=OKABE_ITO["blue"], marker="o", lw=2, label="any flip")
    ax.plot(r, sensitivity["lost_rate"], color=OKABE_ITO["vermillion"], marker="v", ls="--", label="significance lost")
    ax.plot(r, sensitivity["gained_rate"], color=OKABE_ITO["green"], marker="^", ls=":", label="significance gained")
    if pooled_rho is not None and np.isfinite(pooled_rho):
        ax.axvline(pooled_rho, color=GREY, lw=1, ls="-.")
        ax.annotate(f"pooled AR(1) = {pooled_rho:.2f}", (pooled_rho, 0.98), xycoords=("data", "axes fraction"),
                    ha="left", va="top", fontsize=8, xytext=(3, 0), textcoords="offset points")
    ax.set_xlabel("assumed AR(1) coefficient (same for every case)")
    ax.set_ylabel("share of cases")
    ax.set_ylim(0, max(0.2, float(np.nanmax(sensitivity["flip_ci_upper"])) + 0.05) if len(sensitivity) else 1)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return fig


# ----------------------------------------------------------------------------- case panels


@dataclass(frozen=True)
class CasePanel:
    """What one small-multiple panel shows."""

    title: str
    session: np.ndarray
    outcome: np.ndarray
    is_treatment: np.ndarray  # bool per point
    phase_starts: np.ndarray  # session (x) of each phase change, drawn half-way to the previous point
    segments: np.ndarray  # segment id per point: fitted lines are drawn within a segment
    fit_ols: np.ndarray
    fit_gls: np.ndarray
    caption: str  # DW zone in words, rho, flip


def _nice_ticks(lo: float, hi: float, n: int = 4) -> np.ndarray:
    from matplotlib.ticker import MaxNLocator

    if not (np.isfinite(lo) and np.isfinite(hi)):
        return np.array([])
    if hi <= lo:
        lo, hi = lo - 0.5, hi + 0.5
    t = MaxNLocator(n).tick_values(lo, hi)
    return t[(t >= lo - 1e-9 * abs(hi - lo)) & (t <= hi + 1e-9 * abs(hi - lo))]


def _num_label(v: float) -> str:
    return f"{v:.10g}" if abs(v) >= 1e-9 else "0"


def case_panel_svg(p: CasePanel, width: int = 330, height: int = 228) -> str:
    """One case as an inline SVG: points by condition, phase-change lines, OLS and GLS fitted lines.

    Hand-built (no matplotlib) so that a review with hundreds of cases renders fast; text is real
    text, escaped with html.escape.
    """
    from html import escape

    left, right, top, caption_h, tick_h = 40, 10, 24, 52, 16
    x0, x1 = left, width - right
    y0, y1 = top, height - caption_h - tick_h
    sx = p.session.astype(float)
    vals = np.concatenate([p.outcome, p.fit_ols[np.isfinite(p.fit_ols)], p.fit_gls[np.isfinite(p.fit_gls)]])
    vals = vals[np.isfinite(vals)]
    ylo, yhi = (float(vals.min()), float(vals.max())) if vals.size else (0.0, 1.0)
    if yhi - ylo < 1e-12:
        ylo, yhi = ylo - 1, yhi + 1
    pad = 0.06 * (yhi - ylo)
    ylo, yhi = ylo - pad, yhi + pad
    xlo, xhi = (float(sx.min()), float(sx.max())) if sx.size else (0.0, 1.0)
    if xhi - xlo < 1e-12:
        xlo, xhi = xlo - 1, xhi + 1
    xpad = 0.03 * (xhi - xlo)
    xlo, xhi = xlo - xpad, xhi + xpad

    def X(v):
        return x0 + (np.asarray(v, float) - xlo) / (xhi - xlo) * (x1 - x0)

    def Y(v):
        return y1 - (np.asarray(v, float) - ylo) / (yhi - ylo) * (y1 - y0)

    out = [f"<svg xmlns='http://www.w3.org/2000/svg' width='{width}' height='{height}' "
           f"viewBox='0 0 {width} {height}' role='img' aria-label='{escape(p.title)}'>",
           f"<title>{escape(p.title)}: {escape(p.caption)}</title>",
           f"<rect x='0' y='0' width='{width}' height='{height}' fill='white'/>"]
    for t in _nice_ticks(ylo, yhi):
        y = float(Y(t))
        out.append(f"<line x1='{x0}' x2='{x1}' y1='{y:.1f}' y2='{y:.1f}' stroke='#e4e4e4' stroke-width='0.8'/>")
        out.append(f"<text x='{x0 - 4}' y='{y + 3.5:.1f}' font-size='10' text-anchor='end' fill='#444'>"
                   f"{escape(_num_label(t))}</text>")
    for t in _nice_ticks(xlo, xhi, 5):
        x = float(X(t))
        out.append(f"<line x1='{x:.1f}' x2='{x:.1f}' y1='{y1}' y2='{y1 + 3}' stroke='#444'/>")
        out.append(f"<text x='{x:.1f}' y='{y1 + 13}' font-size='10' text-anchor='middle' fill='#444'>"
                   f"{escape(_num_label(t))}</text>")
    out.append(f"<polyline points='{x0},{y0} {x0},{y1} {x1},{y1}' fill='none' stroke='#444' stroke-width='1'/>")
    for xs in p.phase_starts:
        x = float(X(xs))
        out.append(f"<line x1='{x:.1f}' x2='{x:.1f}' y1='{y0}' y2='{y1}' stroke='{GREY}' stroke-width='1.2' "
                   "stroke-dasharray='2,3'/>")
    for fit, colour, dash in ((p.fit_ols, OLS_LINE, ""), (p.fit_gls, GLS_LINE, " stroke-dasharray='6,3'")):
        for seg in np.unique(p.segments):
            m = (p.segments == seg) & np.isfinite(fit)
            if m.sum() < 2:
                continue
            pts = " ".join(f"{a:.1f},{b:.1f}" for a, b in zip(X(sx[m]), Y(fit[m])))
            out.append(f"<polyline points='{pts}' fill='none' stroke='{colour}' stroke-width='1.6'{dash}/>")
    for a, b, treat in zip(X(sx), Y(p.outcome), p.is_treatment):
        if not (np.isfinite(a) and np.isfinite(b)):
            continue
        if treat:
            out.append(f"<polygon points='{a:.1f},{b - 4.2:.1f} {a - 3.8:.1f},{b + 2.6:.1f} {a + 3.8:.1f},{b + 2.6:.1f}' "
                       f"fill='{TREATMENT}' stroke='#7a5200' stroke-width='0.5'/>")
        else:
            out.append(f"<circle cx='{a:.1f}' cy='{b:.1f}' r='3.1' fill='{BASELINE}' stroke='white' stroke-width='0.5'/>")
    out.append(f"<text x='4' y='15' font-size='12' font-weight='600' fill='#1d1d1f'>{escape(_short(p.title, 46))}</text>")
    for i, line in enumerate(textwrap.wrap(p.caption, 62)[:4]):
        out.append(f"<text x='4' y='{y1 + 28 + 11 * i}' font-size='9.5' fill='#333'>{escape(line)}</text>")
    out.append("</svg>")
    return "".join(out)


def legend_svg() -> str:
    """Legend of the case panels as a small inline SVG."""
    items = [
        f"<circle cx='8' cy='10' r='3.5' fill='{BASELINE}'/><text x='16' y='14' font-size='11'>baseline</text>",
        f"<polygon points='86,5.5 81.5,13 90.5,13' fill='{TREATMENT}'/><text x='96' y='14' font-size='11'>treatment</text>",
        f"<line x1='170' x2='170' y1='2' y2='18' stroke='{GREY}' stroke-width='1.2' stroke-dasharray='2,3'/>"
        "<text x='176' y='14' font-size='11'>phase change</text>",
        f"<line x1='262' x2='286' y1='10' y2='10' stroke='{OLS_LINE}' stroke-width='1.6'/>"
        "<text x='292' y='14' font-size='11'>OLS fit</text>",
        f"<line x1='346' x2='370' y1='10' y2='10' stroke='{GLS_LINE}' stroke-width='1.6' stroke-dasharray='6,3'/>"
        "<text x='376' y='14' font-size='11'>GLS fit, case's REML AR(1)</text>",
    ]
    return ("<svg xmlns='http://www.w3.org/2000/svg' width='540' height='20' viewBox='0 0 540 20' role='img' "
            "aria-label='Legend of the case graphs'>" + "".join(items) + "</svg>")
