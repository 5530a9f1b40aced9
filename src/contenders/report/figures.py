"""Figures of the comparison report, drawn with matplotlib (Agg) and returned as HTML.

Visual language (ours, used in every figure and echoed by the page's styles):

* observed data are ink: near-black, thick, solid lines, always drawn last;
* posterior replicated data are thin, light sky-blue lines or a blue fill;
* prior draws are a reddish-purple fill, so prior and posterior never look alike;
* limits the reader set or must respect (plausibility bounds, the Pareto k threshold,
  reference bands) are vermillion and dashed;
* anything flagged carries a symbol (◆) and bold text as well as an orange frame,
  never colour alone.

The hues are from the colour-blind-safe set of Okabe & Ito (2008), "Color Universal
Design (CUD): how to make figures and presentations that are friendly to colorblind
people"; the assignment of hues to roles and the style are ours. Small multiples share the x-range of each quantity across
candidates, so a column of panels compares candidates at a glance.

Figures are inline SVG (vector, prints sharply); artists with many elements are
rasterised inside the SVG, and a figure whose SVG would still be large becomes a PNG
data URI at modest resolution.
"""

from __future__ import annotations

import base64
import io
import itertools
import re
from dataclasses import dataclass
from typing import Sequence

import matplotlib
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.collections import LineCollection  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402
from markupsafe import Markup, escape  # noqa: E402
import numpy as np  # noqa: E402

from ..trials.statistics import describe  # noqa: E402

# --- palette and style ------------------------------------------------------------

INK = "#1a1a1a"          # observed data
REPLICATE = "#56B4E9"    # posterior replicated datasets (thin lines)
POSTERIOR = "#0072B2"    # posterior replicated statistics (fill)
PRIOR = "#CC79A7"        # prior predictive draws (fill)
LIMIT = "#D55E00"        # bounds, thresholds, reference limits (dashed)
FLAG = "#E69F00"         # flagged panels and points
GOOD = "#009E73"         # values that pass a threshold
MUTED = "#8a8a8a"        # reference lines
BAND = "#e4e4e4"         # reference bands
PANEL = "#fcfbf8"        # panel background, a warm paper tone

STYLE = {
    "font.family": "DejaVu Sans",
    "font.size": 8,
    "axes.titlesize": 8,
    "axes.titlelocation": "left",
    "axes.titlepad": 3,
    "axes.labelsize": 7.5,
    "axes.labelcolor": "#333333",
    "axes.edgecolor": "#6b6b6b",
    "axes.linewidth": 0.6,
    "axes.facecolor": PANEL,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": False,
    "xtick.labelsize": 6.5,
    "ytick.labelsize": 6.5,
    "xtick.color": "#4d4d4d",
    "ytick.color": "#4d4d4d",
    "xtick.major.size": 2.5,
    "ytick.major.size": 2.5,
    "xtick.major.width": 0.5,
    "ytick.major.width": 0.5,
    "legend.frameon": False,
    "legend.fontsize": 7,
    "figure.facecolor": "white",
    "svg.fonttype": "path",
    "svg.hashsalt": "contenders-report",
    "path.simplify": True,
    "hatch.linewidth": 0.5,
}

#: SVG larger than this (bytes) is replaced by a PNG.
SVG_BUDGET = 450_000
PNG_DPI = 110
RASTER_DPI = 130

_counter = itertools.count(1)


@dataclass
class Rendered:
    """One figure, ready to place in the page."""

    html: Markup
    kind: str          # "svg" or "png"
    size: int          # bytes of markup

    def __html__(self) -> str:  # lets the template print it directly
        return str(self.html)


def plain(text: str, limit: int = 34) -> str:
    """User text for a figure: shortened, with mathtext's dollar signs disarmed."""
    text = str(text)
    if len(text) > limit:
        text = text[: limit - 1] + "…"
    return text.replace("$", r"\$")


def _svg(fig: Figure, alt: str) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", dpi=RASTER_DPI, metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    text = text[text.index("<svg"):]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    text = re.sub(r"<style type=\"text/css\">.*?</style>", "", text, flags=re.S)
    prefix = f"f{next(_counter)}-"
    text = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{prefix}{m.group(1)}"', text)
    text = re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}{m.group(1)}"', text)
    text = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}{m.group(1)})", text)

    def root(m: re.Match) -> str:
        tag = m.group(0)
        width = re.search(r'width="([\d.]+)pt"', tag)
        tag = re.sub(r'\s(width|height)="[\d.]+pt"', "", tag, count=2)
        style = f' style="max-width:{width.group(1)}pt"' if width else ""
        return tag[:-1] + f' class="fig" role="img" aria-label="{escape(alt)}"{style}>'

    return re.sub(r"<svg\b[^>]*>", root, text, count=1)


def _png(fig: Figure, alt: str) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=PNG_DPI, metadata={"Software": None})
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    width = int(round(fig.get_figwidth() * 96))
    return (f'<img class="fig" src="data:image/png;base64,{data}" alt="{escape(alt)}" '
            f'style="max-width:{width}px">')


def render(fig: Figure, alt: str, prefer: str = "svg") -> Rendered:
    """The figure as inline SVG, or as a PNG data URI when SVG would be too large."""
    if prefer == "svg":
        text = _svg(fig, alt)
        if len(text) <= SVG_BUDGET:
            return Rendered(Markup(text), "svg", len(text))
    text = _png(fig, alt)
    return Rendered(Markup(text), "png", len(text))


def _new(width: float, height: float) -> Figure:
    with matplotlib.rc_context(STYLE):
        fig = Figure(figsize=(width, height), layout=None)
    FigureCanvasAgg(fig)   # the Agg backend, without touching pyplot's global state
    return fig


def _styled(fn):
    """Run a drawing function under the report's style."""
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(STYLE):
            return fn(*args, **kwargs)
    wrapper.__name__ = fn.__name__
    wrapper.__doc__ = fn.__doc__
    return wrapper


# --- shared ranges ------------------------------------------------------------------

@dataclass
class Scale:
    lo: float
    hi: float
    log: bool

    def edges(self, n: int = 36) -> np.ndarray:
        if self.log:
            return np.geomspace(self.lo, self.hi, n + 1)
        return np.linspace(self.lo, self.hi, n + 1)


def shared_scale(arrays: Sequence[np.ndarray], points: Sequence[float] = (),
                 q: tuple[float, float] = (0.05, 0.95), log_ratio: float = 50.0) -> Scale | None:
    """One x-range for the same quantity across candidates: from the lowest lower
    quantile to the highest upper quantile of any candidate's draws, widened to take in
    ``points`` (observed value, bounds). Log scale when everything in view is positive
    and the range spans more than ``log_ratio``."""
    lows, highs = [], []
    for a in arrays:
        a = np.asarray(a, dtype=float)
        a = a[np.isfinite(a)]
        if a.size:
            lo, hi = np.quantile(a, q)
            lows.append(lo)
            highs.append(hi)
    lows += [p for p in points if np.isfinite(p)]
    highs += [p for p in points if np.isfinite(p)]
    if not lows:
        return None
    lo, hi = float(min(lows)), float(max(highs))
    log = lo > 0 and hi / lo > log_ratio
    if hi <= lo:
        pad = abs(lo) * 0.1 or 1.0
        return Scale(lo - pad, hi + pad, False)
    if log:
        f = (hi / lo) ** 0.05
        return Scale(lo / f, hi * f, True)
    pad = 0.05 * (hi - lo)
    return Scale(lo - pad, hi + pad, False)


def _compact_ticks(ax, scale: Scale) -> None:
    if scale.log:
        ax.set_xscale("log")
    else:
        ax.xaxis.set_major_locator(MaxNLocator(nbins=3, min_n_ticks=2))
    ax.set_xlim(scale.lo, scale.hi)


def _histogram(ax, draws: np.ndarray, scale: Scale, color: str) -> tuple[float, float]:
    """Histogram on the shared scale; returns the shares of draws below and above it."""
    d = np.asarray(draws, dtype=float)
    d = d[~np.isnan(d)]
    if d.size == 0:
        ax.text(0.5, 0.5, "no finite draws", transform=ax.transAxes, ha="center", va="center",
                fontsize=6.5, color=MUTED)
        return 0.0, 0.0
    below = float(np.mean(d < scale.lo))
    above = float(np.mean(d > scale.hi))
    edges = scale.edges()
    counts, _ = np.histogram(d[(d >= scale.lo) & (d <= scale.hi)], bins=edges)
    width = np.diff(np.log(edges) if scale.log else edges)
    dens = counts / (d.size * width)
    ax.stairs(dens, edges, fill=True, color=color, alpha=0.45, linewidth=0)
    ax.stairs(dens, edges, color=color, linewidth=0.7)
    ax.set_ylim(0, max(float(dens.max()), 1e-300) * 1.22)
    return below, above


def _beyond(ax, below: float, above: float) -> None:
    """Note the share of draws outside the shown range, at the panel's edges."""
    style = dict(transform=ax.transAxes, fontsize=5.8, color="#555555", va="top")
    if below >= 0.005:
        ax.text(0.01, 0.99, f"← {100 * below:.0f} %", ha="left", **style)
    if above >= 0.005:
        ax.text(0.99, 0.99, f"{100 * above:.0f} % →", ha="right", **style)


def _flag_frame(ax) -> None:
    for side in ("left", "bottom", "top", "right"):
        ax.spines[side].set_visible(True)
        ax.spines[side].set_color(FLAG)
        ax.spines[side].set_linewidth(1.6)


def _row_label(ax, text: str) -> None:
    ax.annotate(plain(text, 24), xy=(0, 0.5), xycoords="axes fraction", xytext=(-6, 0),
                textcoords="offset points", ha="right", va="center", fontsize=7.5, color=INK)


def _grid_shape(n: int, ncols: int = 3) -> tuple[int, int]:
    ncols = max(1, min(ncols, n))
    return int(np.ceil(n / ncols)), ncols


# --- 1. elpd differences -------------------------------------------------------------

@_styled
def elpd_differences(rows: Sequence[dict]) -> Rendered | None:
    """Each ranked candidate's elpd behind the best: dot, ±1 SE (thick) and ±2 SE
    (thin) of the paired difference; the band below 4 marks differences too small to
    tell apart."""
    if len(rows) < 2:
        return None
    n = len(rows)
    fig = _new(7.2, 0.6 + 0.32 * n)
    fig.subplots_adjust(left=0.27, right=0.97, top=1 - 0.28 / (0.6 + 0.32 * n),
                        bottom=0.42 / (0.6 + 0.32 * n))
    ax = fig.add_subplot()
    d = np.array([r["elpd_diff"] for r in rows], dtype=float)
    se = np.nan_to_num(np.array([r["elpd_diff_se"] for r in rows], dtype=float))
    ypos = np.arange(n)[::-1]
    hi = float(np.nanmax(d + 2 * se)) if n else 1.0
    right = max(hi * 1.08, 6.0)
    ax.axvspan(0, 4, color=BAND, zorder=0, linewidth=0)
    ax.text(2, ypos[0] + 0.62, "within 4: too close to tell apart", ha="center", va="bottom",
            fontsize=6.3, color="#555555", clip_on=False)
    ax.axvline(0, color=MUTED, linewidth=0.7)
    for y, di, s, r in zip(ypos, d, se, rows):
        if r["rank"] == 1:
            ax.plot([0], [y], marker="D", color=INK, markersize=5, zorder=3)
            continue
        ax.hlines(y, di - 2 * s, di + 2 * s, color=POSTERIOR, linewidth=1.0)
        ax.hlines(y, di - s, di + s, color=POSTERIOR, linewidth=3.2)
        ax.plot([di], [y], marker="o", color=INK, markersize=4.2, zorder=3)
    ax.set_yticks(ypos, [plain(f"{r['rank']}. {r['label']}", 30) for r in rows])
    ax.tick_params(axis="y", length=0, labelsize=7.5)
    ax.spines["left"].set_visible(False)
    ax.set_xlim(min(-0.05 * right, float(np.nanmin(d - 2 * se)) * 1.05), right)
    ax.set_ylim(-0.6, n - 0.4)
    ax.set_xlabel("elpd behind the best candidate (0 = best; bars: ±1 SE thick, ±2 SE thin)")
    return render(fig, "elpd of each ranked candidate behind the best, with standard errors of the difference")


# --- 2. prior predictive trial ----------------------------------------------------------

@_styled
def prior_grid(cands: Sequence[tuple[str, object]], statistics: Sequence[str],
               observed: dict[str, float]) -> Rendered | None:
    """Rows: candidates; columns: test statistics. The prior distribution of each
    statistic (fill), the observed value (thick ink line) and the plausibility bounds
    (dashed vermillion, the implausible side hatched). Each column has one x-range."""
    cands = [(label, p) for label, p in cands if p is not None]
    if not cands:
        return None
    stats = list(statistics)
    nrow, ncol = len(cands), len(stats)
    width = min(1.6 + 1.12 * ncol, 12.0)
    height = 0.55 + 0.78 * nrow
    fig = _new(width, height)
    fig.subplots_adjust(left=1.45 / width, right=0.99, top=1 - 0.32 / height, bottom=0.3 / height,
                        wspace=0.14, hspace=0.32)
    axes = fig.subplots(nrow, ncol, squeeze=False)
    for j, stat in enumerate(stats):
        bounds = cands[0][1].bounds.get(stat)
        pts = [observed.get(stat, np.nan)] + (list(bounds) if bounds else [])
        scale = shared_scale([p.stat_draws.get(stat, np.zeros(0)) for _, p in cands], pts)
        for i, (label, p) in enumerate(cands):
            ax = axes[i, j]
            ax.set_yticks([])
            ax.spines["left"].set_visible(False)
            if scale is None:
                ax.set_xticks([])
                continue
            below, above = _histogram(ax, p.stat_draws.get(stat, np.zeros(0)), scale, PRIOR)
            _compact_ticks(ax, scale)
            if bounds:
                lo, hi = bounds
                if np.isfinite(lo) and lo > scale.lo:
                    ax.axvspan(scale.lo, lo, facecolor="none", edgecolor=LIMIT, hatch="////",
                               linewidth=0, alpha=0.35)
                    ax.axvline(lo, color=LIMIT, linestyle=(0, (3, 2)), linewidth=1.1)
                if np.isfinite(hi) and hi < scale.hi:
                    ax.axvspan(hi, scale.hi, facecolor="none", edgecolor=LIMIT, hatch="////",
                               linewidth=0, alpha=0.35)
                    ax.axvline(hi, color=LIMIT, linestyle=(0, (3, 2)), linewidth=1.1)
                inside = p.inside_each.get(stat)
                if inside is not None:
                    ax.text(0.5, -0.02, f"{100 * inside:.0f} % inside", transform=ax.transAxes,
                            ha="center", va="top", fontsize=5.8, color=LIMIT,
                            bbox=dict(facecolor="white", edgecolor="none", pad=0.6))
            obs = observed.get(stat, np.nan)
            if np.isfinite(obs):
                ax.axvline(obs, color=INK, linewidth=2.0)
            _beyond(ax, below, above)
            if i < nrow - 1:
                ax.tick_params(axis="x", labelbottom=False)
        title = describe(stat) + (" (log)" if scale is not None and scale.log else "")
        axes[0, j].set_title(plain(title, 22), fontsize=7.2)
    for i, (label, p) in enumerate(cands):
        _row_label(axes[i, 0], label)
    return render(fig, "prior distribution of each test statistic per candidate, with the observed value and bounds")


# --- 3. Pareto k ----------------------------------------------------------------------

@_styled
def pareto_k_grid(cands: Sequence[tuple[str, object]]) -> Rendered | None:
    """Rows: candidates. Pareto k of every observation, the threshold (dashed
    vermillion), observations above it (orange triangles) and those refitted exactly
    (black rings)."""
    cands = [(label, o) for label, o in cands if o is not None]
    if not cands:
        return None
    n_obs = max(len(o.pareto_k) for _, o in cands)
    ks = np.concatenate([np.asarray(o.pareto_k, float) for _, o in cands])
    ks = ks[np.isfinite(ks)]
    thresholds = [o.k_threshold for _, o in cands]
    ymin = min(-0.1, float(ks.min()) - 0.05) if ks.size else -0.1
    ymax = max(1.0, float(ks.max()) + 0.08, max(thresholds) + 0.15) if ks.size else 1.0
    width, height = 7.6, 0.5 + 0.72 * len(cands)
    fig = _new(width, height)
    fig.subplots_adjust(left=1.45 / width, right=0.985, top=1 - 0.15 / height, bottom=0.42 / height,
                        hspace=0.3)
    axes = fig.subplots(len(cands), 1, squeeze=False, sharex=True)[:, 0]
    raster = n_obs > 300
    for ax, (label, o) in zip(axes, cands):
        k = np.asarray(o.pareto_k, dtype=float)
        x = np.arange(1, k.size + 1)
        high = k > o.k_threshold
        ax.scatter(x[~high], k[~high], s=3 if n_obs > 300 else 6, color=POSTERIOR, alpha=0.7,
                   linewidths=0, rasterized=raster)
        if high.any():
            ax.scatter(x[high], k[high], s=16, marker="^", color=FLAG, edgecolors=INK,
                       linewidths=0.4, zorder=3)
        if o.refitted:
            idx = np.asarray(o.refitted, dtype=int)
            ax.scatter(idx + 1, k[idx], s=55, facecolors="none", edgecolors=INK, linewidths=0.9, zorder=4)
        ax.axhline(o.k_threshold, color=LIMIT, linestyle=(0, (4, 2)), linewidth=1.0)
        ax.set_ylim(ymin, ymax)
        ax.set_xlim(0, n_obs + 1)
        ax.yaxis.set_major_locator(MaxNLocator(nbins=3))
        if not np.isfinite(k).any():
            ax.text(0.5, 0.5, "no Pareto k (elpd from held-out fits)", transform=ax.transAxes,
                    ha="center", va="center", fontsize=6.5, color=MUTED)
        note = f"threshold {o.k_threshold:.2f}; {int(high.sum())} above; {len(o.refitted)} refitted"
        ax.text(0.995, 0.97, note, transform=ax.transAxes, ha="right", va="top", fontsize=6,
                color="#444444", bbox=dict(facecolor=PANEL, edgecolor="none", pad=0.5))
        _row_label(ax, label)
    axes[-1].set_xlabel("observation (row of the data after dropping rows without an outcome)")
    return render(fig, "Pareto k of every observation per candidate, with the threshold")


# --- 4. observed against replicated distributions ---------------------------------------------

def _quantile_lines(y_rep: np.ndarray, m: int = 160) -> np.ndarray:
    """Each replicated dataset's empirical distribution as m quantile points (x, p)."""
    probs = (np.arange(m) + 0.5) / m
    q = np.quantile(np.asarray(y_rep, dtype=float), probs, axis=1).T   # (draws, m)
    return np.stack([q, np.broadcast_to(probs, q.shape)], axis=-1)


@_styled
def replicate_ecdf_grid(y: np.ndarray, cands: Sequence[tuple[str, np.ndarray]], ncols: int = 3) -> Rendered | None:
    """One panel per candidate, same axes: the empirical distribution function of each
    replicated dataset (thin, light) and of the observed data (thick, solid ink)."""
    cands = [(label, r) for label, r in cands if r is not None and np.size(r)]
    if not cands:
        return None
    y = np.asarray(y, dtype=float)
    scale = shared_scale([r.reshape(-1) for _, r in cands], [float(y.min()), float(y.max())],
                         q=(0.005, 0.995), log_ratio=np.inf)
    nrow, ncol = _grid_shape(len(cands), ncols)
    width, height = 7.6, 0.45 + 1.75 * nrow
    fig = _new(width, height)
    fig.subplots_adjust(left=0.07, right=0.99, top=1 - 0.3 / height, bottom=0.5 / height,
                        wspace=0.12, hspace=0.42)
    axes = fig.subplots(nrow, ncol, squeeze=False)
    ys = np.sort(y)
    py = np.arange(1, ys.size + 1) / ys.size
    for k, ax in enumerate(axes.flat):
        if k >= len(cands):
            ax.set_visible(False)
            continue
        label, r = cands[k]
        segs = _quantile_lines(r)
        ax.add_collection(LineCollection(segs, colors=REPLICATE, linewidths=0.45, alpha=0.45,
                                         rasterized=True, label=f"replicated datasets ({r.shape[0]})"))
        ax.step(np.r_[scale.lo, ys], np.r_[0, py], where="post", color=INK, linewidth=2.0,
                label="observed data")
        ax.set_xlim(scale.lo, scale.hi)
        ax.set_ylim(0, 1.02)
        ax.xaxis.set_major_locator(MaxNLocator(nbins=4))
        ax.set_yticks([0, 0.5, 1])
        if k % ncol:
            ax.tick_params(axis="y", labelleft=False)
        ax.set_title(plain(label, 30))
        if k == 0:
            ax.legend(loc="lower right", fontsize=6.2, handlelength=1.8)
    fig.supxlabel("outcome", fontsize=7.5, y=0.12 / height)
    fig.text(0.012, 0.5, "share of values at or below", rotation=90, va="center", fontsize=7.5)
    return render(fig, "empirical distribution functions of replicated datasets and of the observed data per candidate")


# --- 5. test statistics ----------------------------------------------------------------

@_styled
def statistic_grid(cands: Sequence[tuple[str, object]], extreme: float) -> Rendered | None:
    """Rows: candidates; columns: test statistics. The distribution of each statistic
    over replicated datasets (blue fill) against the observed value (thick ink line),
    with the posterior predictive p-value; panels beyond ``extreme`` are flagged."""
    cands = [(label, c) for label, c in cands if c is not None]
    if not cands:
        return None
    stats = [row["statistic"] for row in cands[0][1].rows]
    observed = {row["statistic"]: row["observed"] for row in cands[0][1].rows}
    nrow, ncol = len(cands), len(stats)
    width = min(1.6 + 1.12 * ncol, 12.0)
    height = 0.5 + 0.74 * nrow
    fig = _new(width, height)
    fig.subplots_adjust(left=1.45 / width, right=0.99, top=1 - 0.32 / height, bottom=0.3 / height,
                        wspace=0.14, hspace=0.32)
    axes = fig.subplots(nrow, ncol, squeeze=False)
    for j, stat in enumerate(stats):
        scale = shared_scale([c.stat_draws.get(stat, np.zeros(0)) for _, c in cands],
                             [observed[stat]], q=(0.005, 0.995))
        for i, (label, c) in enumerate(cands):
            ax = axes[i, j]
            ax.set_yticks([])
            ax.spines["left"].set_visible(False)
            if scale is None:
                continue
            below, above = _histogram(ax, c.stat_draws.get(stat, np.zeros(0)), scale, POSTERIOR)
            _compact_ticks(ax, scale)
            if np.isfinite(observed[stat]):
                ax.axvline(observed[stat], color=INK, linewidth=2.0)
            _beyond(ax, below, above)
            row = next(r for r in c.rows if r["statistic"] == stat)
            p = row["p_value"]
            flagged = np.isfinite(p) and (p < extreme or p > 1 - extreme)
            text = ("◆ " if flagged else "") + ("p —" if not np.isfinite(p) else
                                                 "p < 0.001" if p < 0.001 else
                                                 "p > 0.999" if p > 0.999 else f"p {p:.2f}")
            ax.text(0.5, -0.02, text, transform=ax.transAxes, ha="center", va="top", fontsize=6,
                    fontweight="bold" if flagged else "normal", color=INK,
                    bbox=dict(facecolor="white", edgecolor="none", pad=0.6))
            if flagged:
                _flag_frame(ax)
            if i < nrow - 1:
                ax.tick_params(axis="x", labelbottom=False)
        title = describe(stat) + (" (log)" if scale is not None and scale.log else "")
        axes[0, j].set_title(plain(title, 22), fontsize=7.2)
    for i, (label, _) in enumerate(cands):
        _row_label(axes[i, 0], label)
    return render(fig, "distribution of each test statistic over replicated datasets per candidate, with the observed value")


# --- 6. LOO-PIT ------------------------------------------------------------------------

#: Asymptotic 95 % critical value of the one-sample Kolmogorov-Smirnov statistic times
#: sqrt(n) (Kolmogorov's distribution; 1.358 for alpha = 0.05). Common practice, no source.
KS_95 = 1.358


@_styled
def loo_pit_grid(cands: Sequence[tuple[str, object]], alpha: float = 0.01, ncols: int = 3) -> Rendered | None:
    """One panel per candidate, same axes: the empirical distribution function of the
    LOO-PIT values minus that of the uniform distribution (thick ink), with the 95 %
    Kolmogorov-Smirnov band around zero (grey). Calibrated predictions stay in the band."""
    cands = [(label, c) for label, c in cands if c is not None and np.isfinite(c.loo_pit).any()]
    if not cands:
        return None
    curves = []
    for label, c in cands:
        pit = np.sort(np.asarray(c.loo_pit, dtype=float)[np.isfinite(c.loo_pit)])
        n = pit.size
        # the ECDF jumps from (i - 1) / n to i / n at the i-th smallest value
        u = np.r_[0.0, np.repeat(pit, 2), 1.0]
        f = np.r_[0.0, np.column_stack([np.arange(n) / n, np.arange(1, n + 1) / n]).ravel(), 1.0]
        curves.append((label, c, u, f - u, KS_95 / np.sqrt(n)))
    lim = max(max(float(np.abs(d).max()), b * 1.25) for *_, d, b in curves) * 1.12
    nrow, ncol = _grid_shape(len(cands), ncols)
    width, height = 7.6, 0.45 + 1.55 * nrow
    fig = _new(width, height)
    fig.subplots_adjust(left=0.08, right=0.99, top=1 - 0.3 / height, bottom=0.5 / height,
                        wspace=0.12, hspace=0.45)
    axes = fig.subplots(nrow, ncol, squeeze=False)
    for k, ax in enumerate(axes.flat):
        if k >= len(curves):
            ax.set_visible(False)
            continue
        label, c, u, d, b = curves[k]
        ax.fill_between([0, 1], [-b, -b], [b, b], color=BAND, linewidth=0, label="95 % band (KS)")
        ax.axhline(0, color=MUTED, linewidth=0.6)
        ax.plot(u, d, color=INK, linewidth=1.6, label="LOO-PIT")
        ax.set_xlim(0, 1)
        ax.set_ylim(-lim, lim)
        ax.set_xticks([0, 0.5, 1])
        ax.yaxis.set_major_locator(MaxNLocator(nbins=4, symmetric=True))
        if k % ncol:
            ax.tick_params(axis="y", labelleft=False)
        p = c.loo_pit_test["p_value"]
        flagged = np.isfinite(p) and p < alpha
        ax.set_title(plain(label, 30))
        ax.text(0.98, 0.04, ("◆ " if flagged else "") + f"KS p {'< 0.001' if p < 0.001 else f'{p:.3f}'}",
                transform=ax.transAxes, ha="right", va="bottom", fontsize=6.3,
                fontweight="bold" if flagged else "normal")
        if flagged:
            _flag_frame(ax)
        if k == 0:
            ax.legend(loc="upper left", fontsize=6, handlelength=1.5)
    fig.supxlabel("LOO-PIT value", fontsize=7.5, y=0.12 / height)
    fig.text(0.012, 0.5, "ECDF minus uniform", rotation=90, va="center", fontsize=7.5)
    return render(fig, "LOO-PIT calibration per candidate: distribution function minus uniform with a 95 % band")


# --- 7. lineup -------------------------------------------------------------------------

@dataclass
class Lineup:
    panels: list[Rendered]      # 20 small histograms, in reading order
    answer: int                 # 1-based position of the observed data
    replicate_rows: list[int]   # rows of y_rep_sample used, in panel order (observed skipped)
    edges: np.ndarray           # the bins shared by every panel


def lineup_layout(n_replicates: int, seed: int, n_panels: int = 20) -> tuple[int, list[int]]:
    """Where the observed data go (0-based panel) and which replicated datasets fill the
    other panels, drawn with a seeded generator so the page is reproducible."""
    rng = np.random.default_rng(seed)
    position = int(rng.integers(n_panels))
    rows = [int(i) for i in rng.choice(n_replicates, size=n_panels - 1, replace=False)]
    return position, rows


@_styled
def lineup(y: np.ndarray, y_rep: np.ndarray, seed: int, n_bins: int = 24) -> Lineup | None:
    """Twenty histograms with the same bins and the same vertical scale, drawn in one
    style: nineteen replicated datasets and the observed data at a seeded random place.
    Values beyond the shared range (0.5 % and 99.5 % quantiles of all twenty datasets
    pooled) are counted in the outermost bins."""
    y_rep = np.asarray(y_rep, dtype=float)
    if y_rep.ndim != 2 or y_rep.shape[0] < 19:
        return None
    position, rows = lineup_layout(y_rep.shape[0], seed)
    sets = [y_rep[r] for r in rows]
    sets.insert(position, np.asarray(y, dtype=float))
    pooled = np.concatenate(sets)
    pooled = pooled[np.isfinite(pooled)]
    lo, hi = np.quantile(pooled, [0.005, 0.995])
    if hi <= lo:
        lo, hi = lo - 1, hi + 1
    edges = np.linspace(lo, hi, n_bins + 1)
    counts = [np.histogram(np.clip(s[np.isfinite(s)], lo, hi), bins=edges)[0] for s in sets]
    top = max(int(c.max()) for c in counts) * 1.08
    panels = []
    for k, c in enumerate(counts):
        fig = _new(1.45, 0.95)
        fig.subplots_adjust(left=0.03, right=0.97, top=0.97, bottom=0.06)
        ax = fig.add_subplot()
        ax.stairs(c, edges, fill=True, color=POSTERIOR, alpha=0.5, linewidth=0)
        ax.stairs(c, edges, color=POSTERIOR, linewidth=0.8)
        ax.set_xlim(lo, hi)
        ax.set_ylim(0, top)
        ax.set_xticks([])
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
        panels.append(render(fig, f"panel {k + 1}"))
    replicate_rows = rows
    return Lineup(panels, position + 1, replicate_rows, edges)
