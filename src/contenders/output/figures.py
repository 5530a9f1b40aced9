"""Figures of the comparison report, drawn with matplotlib (Agg) and returned as HTML.

Visual language (ours, used in every figure and echoed by the page's styles):

* observed data are ink: near-black, thick, solid lines, always drawn last;
* posterior replicated data are thin, light sky-blue lines or a blue fill;
* prior draws are a reddish-purple fill, so prior and posterior never look alike;
* limits the reader set or must respect (plausibility bounds, the Pareto k threshold,
  reference bands) are vermillion and dashed;
* anything flagged carries a symbol (◆) and bold text as well as an orange frame,
  never colour alone;
* the predictive checks share one grammar: a replicated (or prior) quantity is an
  interval, thin over its central 95 %, thick over its central 50 %, with a white dot
  at its median; the observed value is a thick solid ink line through the intervals
  (statistics across candidates, quantile misses); distributions are envelopes (fills)
  with the observed curve in ink; a miss is an orange diamond with an ink edge.

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
import re
from dataclasses import dataclass
from typing import Sequence

import matplotlib
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import (  # noqa: E402
    FixedLocator, FuncFormatter, MaxNLocator, NullLocator)
from markupsafe import Markup, escape  # noqa: E402
import numpy as np  # noqa: E402

from contenders.rules import PARETO_K_GOOD, SE_FACTOR, SMALL_DIFFERENCE  # noqa: E402
from contenders.output.readings import describe  # noqa: E402
from contenders.output.figure_records import Lineup, Rendered, next_prefix  # noqa: E402  (records readable without matplotlib)
from contenders.output.out_of_sample import STANDING_WORDS
from contenders.statistics.compare import worst_k  # noqa: E402  (no matplotlib there)

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
    "axes.titlesize": 8.5,
    "axes.titlelocation": "left",
    "axes.titlepad": 3,
    "axes.labelsize": 8.5,
    "axes.labelcolor": "#333333",
    "axes.edgecolor": "#6b6b6b",
    "axes.linewidth": 0.6,
    "axes.facecolor": PANEL,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": False,
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "xtick.color": "#4d4d4d",
    "ytick.color": "#4d4d4d",
    "xtick.major.size": 2.5,
    "ytick.major.size": 2.5,
    "xtick.major.width": 0.5,
    "ytick.major.width": 0.5,
    "legend.frameon": False,
    "legend.fontsize": 7.5,
    "figure.facecolor": "white",
    "svg.fonttype": "path",
    "svg.hashsalt": "contenders-report",
    "path.simplify": True,
    "hatch.linewidth": 0.5,
}

#: SVG larger than this (bytes) is replaced by a PNG.
SVG_BUDGET = 450_000
PNG_DPI = 110
#: Figures may be shown this many times larger than drawn (their width in points).
DISPLAY_SCALE = 1.3
RASTER_DPI = 130

def plain(text: str, limit: int = 34) -> str:
    """User text for a figure: shortened, with mathtext's dollar signs disarmed."""
    text = str(text)
    if len(text) > limit:
        text = text[: limit - 1] + "…"
    return text.replace("$", r"\$")


_NUMBER = re.compile(r"-?\d+\.\d{3,}")


def _short_numbers(text: str) -> str:
    """Coordinates to two decimals (a hundredth of a point) and single spaces."""
    text = _NUMBER.sub(lambda m: f"{float(m.group(0)):.2f}".rstrip("0").rstrip("."), text)
    return " ".join(text.split())


def _compact(svg: str) -> str:
    """Smaller SVG with the same drawing: short coordinates, no indentation."""
    svg = re.sub(r'\b(d|points)="([^"]*)"', lambda m: f'{m.group(1)}="{_short_numbers(m.group(2))}"', svg)
    svg = re.sub(r'\b(x|y|width|height)="(-?\d+\.\d+)"',
                 lambda m: f'{m.group(1)}="{_short_numbers(m.group(2))}"', svg)
    used = set(re.findall(r'href="#([^"]+)"', svg)) | set(re.findall(r"url\(#([^)]+)\)", svg))
    svg = re.sub(r'\sid="([^"]+)"', lambda m: m.group(0) if m.group(1) in used else "", svg)
    return re.sub(r">\s+<", "><", svg)


def _svg(fig: Figure, alt: str) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", dpi=RASTER_DPI, metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    text = text[text.index("<svg"):]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    text = re.sub(r"<style type=\"text/css\">.*?</style>", "", text, flags=re.S)
    prefix = next_prefix()
    text = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{prefix}{m.group(1)}"', text)
    text = re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}{m.group(1)}"', text)
    text = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}{m.group(1)})", text)

    def root(m: re.Match) -> str:
        tag = m.group(0)
        width = re.search(r'width="([\d.]+)pt"', tag)
        tag = re.sub(r'\s(width|height)="[\d.]+pt"', "", tag, count=2)
        # shown up to DISPLAY_SCALE times its drawn size, so that its smallest text (7 pt)
        # reads at about 10 px or more on a 1280 px wide screen
        style = f' style="max-width:{float(width.group(1)) * DISPLAY_SCALE:.0f}pt"' if width else ""
        return tag[:-1] + f' class="fig" role="img" aria-label="{escape(alt)}"{style}>'

    return _compact(re.sub(r"<svg\b[^>]*>", root, text, count=1))


def _png(fig: Figure, alt: str) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=PNG_DPI, metadata={"Software": None})
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    width = int(round(fig.get_figwidth() * 96 * DISPLAY_SCALE))
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


def styled(fn):
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
    """The x-axis of one quantity, shared by every candidate's panel.

    ``kind`` is linear, log (everything positive, spanning orders of magnitude) or asinh
    (both signs and orders of magnitude: linear within ``width`` of zero, logarithmic
    beyond; matplotlib's ``asinh`` scale)."""

    lo: float
    hi: float
    kind: str = "linear"
    width: float = 1.0

    def forward(self, x):
        x = np.asarray(x, dtype=float)
        if self.kind == "log":
            return np.log(x)
        if self.kind == "asinh":
            return self.width * np.arcsinh(x / self.width)
        return x

    def inverse(self, t):
        t = np.asarray(t, dtype=float)
        if self.kind == "log":
            return np.exp(t)
        if self.kind == "asinh":
            return self.width * np.sinh(t / self.width)
        return t

    def edges(self, n: int = 32) -> np.ndarray:
        return self.inverse(np.linspace(self.forward(self.lo), self.forward(self.hi), n + 1))

    @property
    def note(self) -> str:
        return {"log": "log scale", "asinh": "compressed scale"}.get(self.kind, "")


def shared_scale(arrays: Sequence[np.ndarray], observed: float = np.nan, points: Sequence[float] = (),
                 q: tuple[float, float] = (0.05, 0.95), log_ratio: float = 50.0,
                 asinh_ratio: float = 10.0) -> Scale | None:
    """One x-range for the same quantity across candidates: from the lowest lower
    quantile to the highest upper quantile of any candidate's draws, widened to take in
    the observed value and ``points`` (bounds).

    Log scale when everything in view is positive and the range spans more than
    ``log_ratio``; asinh scale when the range has both signs and is more than
    ``asinh_ratio`` times a typical size (the observed value's size, or the narrowest
    candidate's interquartile range if larger), so that candidates whose draws differ
    by orders of magnitude all stay readable."""
    lows, highs, iqrs = [], [], []
    for a in arrays:
        a = np.asarray(a, dtype=float)
        a = a[np.isfinite(a)]
        if a.size:
            lo, q25, q75, hi = np.quantile(a, [q[0], 0.25, 0.75, q[1]])
            lows.append(lo)
            highs.append(hi)
            iqrs.append(q75 - q25)
    extra = [p for p in (observed, *points) if np.isfinite(p)]
    lows += extra
    highs += extra
    if not lows:
        return None
    lo, hi = float(min(lows)), float(max(highs))
    if hi <= lo:
        pad = abs(lo) * 0.1 or 1.0
        return Scale(lo - pad, hi + pad)
    typical = max(abs(observed) if np.isfinite(observed) else 0.0, min(iqrs) if iqrs else 0.0)
    if lo > 0 and hi / lo > log_ratio:
        kind, width = "log", 1.0
    elif typical > 0 and (hi - lo) > asinh_ratio * typical:
        kind, width = "asinh", float(typical)
    else:
        kind, width = "linear", 1.0
    scale = Scale(lo, hi, kind, width)
    t0, t1 = scale.forward(lo), scale.forward(hi)
    pad = 0.05 * (t1 - t0)
    lo2, hi2 = scale.inverse(t0 - pad), scale.inverse(t1 + pad)
    return Scale(float(lo2), float(hi2), kind, width)


def nice_ticks(scale: Scale, most: int = 4, gap: float = 0.27) -> list[float]:
    """Round tick values for log and compressed axes, at least ``gap`` of the axis
    apart: zero first, then powers of ten, then 2 and 5 times them."""
    t0, t1 = float(scale.forward(scale.lo)), float(scale.forward(scale.hi))
    span = t1 - t0
    mags = range(int(np.floor(np.log10(max(abs(scale.lo), abs(scale.hi), 1e-300)))) - 12,
                 int(np.floor(np.log10(max(abs(scale.lo), abs(scale.hi), 1e-300)))) + 2)
    cands = [0.0] if scale.kind != "log" else []
    for mult in (1, 2, 5):
        for e in sorted(mags, reverse=True):
            for sign in (1, -1):
                cands.append(sign * mult * 10.0 ** e)
    chosen: list[float] = []
    for v in cands:
        if not scale.lo <= v <= scale.hi or (scale.kind == "log" and v <= 0):
            continue
        t = float(scale.forward(v))
        if min(t - t0, t1 - t) < 0.07 * span:   # a label at the very edge collides with the next panel
            continue
        if all(abs(t - float(scale.forward(c))) >= gap * span for c in chosen):
            chosen.append(v)
        if len(chosen) >= most:
            break
    return sorted(chosen)


def _set_scale(ax, scale: Scale) -> None:
    if scale.kind == "log":
        ax.set_xscale("log")
    elif scale.kind == "asinh":
        ax.set_xscale("asinh", linear_width=scale.width)
    if scale.kind in ("log", "asinh"):
        ax.xaxis.set_major_locator(FixedLocator(nice_ticks(scale)))
        ax.xaxis.set_minor_locator(NullLocator())
        ax.xaxis.set_major_formatter(FuncFormatter(_tick_text))
    else:
        ax.xaxis.set_major_locator(MaxNLocator(nbins=3, min_n_ticks=2))
    ax.set_xlim(scale.lo, scale.hi)


_SUP = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _tick_text(x: float, _pos=None) -> str:
    """Tick labels of compressed axes: plain numbers, powers of ten when large."""
    if x == 0:
        return "0"
    sign = "−" if x < 0 else ""
    if 1e-2 <= abs(x) < 1e4:
        return sign + f"{abs(x):g}"
    exp = int(np.floor(np.log10(abs(x)) + 1e-9))
    man = abs(x) / 10 ** exp
    head = "" if abs(man - 1) < 0.05 else f"{man:.0f}·"
    return sign + head + "10" + str(exp).translate(_SUP)


def _tint(color: str, alpha: float) -> tuple[float, float, float, float]:
    from matplotlib.colors import to_rgb

    return (*to_rgb(color), alpha)


def _shared_legend(fig, x: float, top: float) -> None:
    """One legend above the panels, each label once (from whichever panel drew it first)."""
    handles = {}
    for ax in fig.axes:
        for h, text in zip(*ax.get_legend_handles_labels()):
            handles.setdefault(text, h)
    fig.legend(list(handles.values()), list(handles), loc="upper center", ncol=3, fontsize=7.5, handlelength=1.8,
               bbox_to_anchor=(x, top))


def flag_frame(ax) -> None:
    for side in ("left", "bottom", "top", "right"):
        ax.spines[side].set_visible(True)
        ax.spines[side].set_color(FLAG)
        ax.spines[side].set_linewidth(1.6)


def grid_shape(n: int, ncols: int = 3) -> tuple[int, int]:
    """``(rows, columns)`` for ``n`` panels in rows of at most ``ncols``."""
    ncols = max(1, min(ncols, n))
    return int(np.ceil(n / ncols)), ncols


def panel_grid(n: int, ncols: int, width: float, head: float, per_row: float, *, left: float, right: float,
               top: float, bottom: float, wspace: float, hspace: float) -> tuple[Figure, list, int, float]:
    """A figure of ``n`` panels in rows of at most ``ncols`` (``grid_shape``), the layout
    every grid of the report and the calibration page shares.

    The figure is ``width`` inches wide and ``head + per_row * rows`` high; ``left`` and
    ``right`` are fractions of the width, ``top`` and ``bottom`` margins in inches,
    ``wspace`` and ``hspace`` matplotlib's gaps between panels. Panels past ``n`` in the
    last row are hidden. Returns ``(figure, the n axes in reading order, columns,
    height)``."""
    nrow, ncol = grid_shape(n, ncols)
    height = head + per_row * nrow
    fig = _new(width, height)
    fig.subplots_adjust(left=left, right=right, top=1 - top / height, bottom=bottom / height,
                        wspace=wspace, hspace=hspace)
    axes = fig.subplots(nrow, ncol, squeeze=False)
    for ax in axes.flat[n:]:
        ax.set_visible(False)
    return fig, list(axes.flat[:n]), ncol, height


def axis_labels(fig: Figure, height: float, x: str, x_at: float, y: str | None = None) -> None:
    """The grid's shared axis labels: ``x`` under the panels, ``x_at`` inches from the
    bottom, and ``y`` (when given) upright at the left edge."""
    fig.supxlabel(x, fontsize=7.5, y=x_at / height)
    if y is not None:
        fig.text(0.012, 0.5, y, rotation=90, va="center", fontsize=7.5)


# --- 1. elpd differences -------------------------------------------------------------

#: How each standing (compare.standings) is drawn in the comparison chart: marker and
#: face colour; the words printed at the row's right end are ``STANDING_WORDS``.
STANDING_MARK = {
    "best": ("D", INK),
    "tied": ("o", INK),
    "close": ("o", INK),
    "uncertain": ("o", "white"),
    "worse": ("s", LIMIT),
}


@styled
def elpd_differences(rows: Sequence[dict]) -> Rendered | None:
    """How far each ranked candidate predicts behind the best, one row each, best at
    the top: the difference in elpd as a marker whose shape and fill say the candidate's
    standing (diamond: best; filled circle: tied or too close to tell; open circle: order
    uncertain; vermillion square: clearly worse), a thin line over ±2 SE of the paired
    difference and a heavier one over ±1 SE, the grey band of differences too small to
    matter, and the standing in words at the right end of the row."""
    if len(rows) < 2:
        return None
    n = len(rows)
    height = 0.75 + 0.3 * n
    fig = _new(5.6, height)
    fig.subplots_adjust(left=0.33, right=0.76, top=1 - 0.36 / height, bottom=0.5 / height)
    ax = fig.add_subplot()
    d = np.array([r.elpd_diff for r in rows], dtype=float)
    se = np.nan_to_num(np.array([r.elpd_diff_se for r in rows], dtype=float))
    ypos = np.arange(n)[::-1]
    hi = float(np.nanmax(d + SE_FACTOR * se))
    right = max(hi * 1.06, 2.5 * SMALL_DIFFERENCE)
    left = min(-0.04 * right, float(np.nanmin(d - SE_FACTOR * se)) * 1.05)
    ax.axvspan(left, SMALL_DIFFERENCE, color=BAND, zorder=0, linewidth=0)
    ax.text(SMALL_DIFFERENCE, n - 0.35, f" under {SMALL_DIFFERENCE:g}: too small to matter", ha="left",
            va="bottom", fontsize=7, color="#555555", clip_on=False)
    for y in ypos:
        ax.axhline(y, color="#ebe8e1", linewidth=0.5, zorder=0)
    for y, di, s, r in zip(ypos, d, se, rows):
        kind = r.standing
        marker, face = STANDING_MARK.get(kind, STANDING_MARK["uncertain"])
        words = STANDING_WORDS.get(kind, kind)
        if r.rank != 1:
            ax.hlines(y, di - SE_FACTOR * s, di + SE_FACTOR * s, color=POSTERIOR, linewidth=1.1, zorder=2)
            ax.hlines(y, di - s, di + s, color=POSTERIOR, linewidth=2.6, zorder=2)
            di = float(di)
        else:
            di = 0.0
        ax.plot([di], [y], marker=marker, markerfacecolor=face, markeredgecolor=INK, markeredgewidth=0.8,
                markersize=5.2, linestyle="none", zorder=4)
        ax.annotate(words, xy=(1, y), xycoords=("axes fraction", "data"), xytext=(6, 0),
                    textcoords="offset points", ha="left", va="center", fontsize=7.2,
                    color=LIMIT if kind == "worse" else INK, fontweight="bold" if kind == "best" else "normal")
    ax.set_yticks(ypos, [_wrap(f"{r.shared_rank or r.rank}. {r.label}", 30, 2) for r in rows])
    ax.tick_params(axis="y", length=0, labelsize=7.5)
    for side in ("left", "right", "top"):
        ax.spines[side].set_visible(False)
    ax.set_xlim(left, right)
    ax.set_ylim(-0.6, n - 0.4)
    ax.set_xlabel("elpd behind the best (line: ±2 SE of the difference, heavier: ±1 SE)")
    return render(fig, "how far each ranked candidate predicts behind the best, with its standing")


# --- 2. prior predictive trial ----------------------------------------------------------

def _wrap(text: str, width: int = 20, lines: int = 2) -> str:
    import textwrap

    parts = textwrap.wrap(str(text), width) or [""]
    if len(parts) > lines:
        parts = parts[:lines]
        parts[-1] = parts[-1][: width - 1] + "…"
    return plain("\n".join(parts), 200)


# --- predictive checks: intervals against the observed value -----------------------------
#
# One grammar for the checks: every replicated (or prior) quantity is a horizontal or
# vertical interval, thin over its central 95 % and thick over its central 50 %, with a
# white dot at its median; the observed value is a thick solid ink line through the
# intervals. A row that misses carries a ◆, bold text and an orange marker.

def _interval(ax, pos: float, lo: float, lo50: float, med: float, hi50: float, hi: float, color: str,
              vertical: bool = False, flagged: bool = False) -> None:
    """One interval: thin 95 %, thick 50 %, a white median dot (orange when flagged)."""
    line = ax.vlines if vertical else ax.hlines
    line(pos, lo, hi, color=color, linewidth=1.1, zorder=2)
    line(pos, lo50, hi50, color=color, linewidth=4.0, zorder=2)
    xy = ([pos], [med]) if vertical else ([med], [pos])
    ax.plot(*xy, marker="D" if flagged else "o", markersize=5.2 if flagged else 4.0,
            markerfacecolor=FLAG if flagged else "white", markeredgecolor=INK if flagged else color,
            markeredgewidth=0.9, zorder=4, linestyle="none")


def _spread(d: np.ndarray) -> tuple[float, ...] | None:
    d = np.asarray(d, dtype=float)
    d = d[np.isfinite(d)]
    if d.size == 0:
        return None
    return tuple(float(v) for v in np.quantile(d, [0.025, 0.25, 0.5, 0.75, 0.975]))


def _statistic_panels(cands, stats, observed, draws_of, color, note_of, flag_of=None, points_of=None,
                      ncols: int = 2):
    """One panel per statistic; rows: candidates. Each candidate's interval of the
    statistic, the observed value as a thick ink line, a note (p-value or share inside
    the bounds) at the right of each row, bounds as dashed vermillion lines."""
    nc = len(cands)
    ncol = grid_shape(len(stats), ncols)[1]
    panel_h = 0.3 + 0.27 * nc
    width = 8.0 if ncol > 1 else 5.4
    left, right = 1.3, 0.8      # candidate labels; p-values or shares at the right of each row
    fig, panels, ncol, height = panel_grid(
        len(stats), ncols, width, 0.25, panel_h + 0.55, left=left / width, right=1 - right / width, top=0.34,
        bottom=0.42, wspace=right / ((width - left - right * ncol) / ncol), hspace=0.55 / panel_h)
    ypos = np.arange(nc)[::-1].astype(float)
    for k, ax in enumerate(panels):
        stat = stats[k]
        obs = observed.get(stat, np.nan)
        points = tuple(points_of(stat)) if points_of else ()
        scale = shared_scale([draws_of(c, stat) for _, c in cands], obs, points, q=(0.025, 0.975))
        ax.set_ylim(-0.7, nc - 0.3)
        ax.spines["left"].set_visible(False)
        ax.tick_params(axis="y", length=0)
        ax.set_yticks(ypos, [_wrap(label, 19, 2) for label, _ in cands] if k % ncol == 0 else [""] * nc)
        ax.tick_params(axis="y", labelsize=7.2)
        ax.set_title(plain(describe(stat), 40) + (f"  ({scale.note})" if scale is not None and scale.note else ""))
        if scale is None:
            ax.set_xticks([])
            continue
        _set_scale(ax, scale)
        for lo in points:
            if np.isfinite(lo) and scale.lo < lo < scale.hi:
                ax.axvline(lo, color=LIMIT, linestyle=(0, (3, 2)), linewidth=1.1, zorder=1)
        for y, (label, c) in zip(ypos, cands):
            s = _spread(draws_of(c, stat))
            flagged = bool(flag_of(c, stat)) if flag_of else False
            if s is not None:
                clipped = [min(max(v, scale.lo), scale.hi) for v in s]
                _interval(ax, y, *clipped, color=color, flagged=flagged)
                d = np.asarray(draws_of(c, stat), dtype=float)
                d = d[~np.isnan(d)]
                for share, x, text, ha in ((np.mean(d < scale.lo), scale.lo, "◂ {}", "left"),
                                           (np.mean(d > scale.hi), scale.hi, "{} ▸", "right")):
                    if share > 0:   # the share of draws beyond the range shown
                        pct = f"{100 * share:.0f} %" if share >= 0.01 else "<1 %"
                        ax.text(x, y + 0.2, text.format(pct), fontsize=7, ha=ha, va="bottom", color="#555555")
            note = note_of(c, stat)
            if note:
                ax.annotate(("◆ " if flagged else "") + note, xy=(1, y), xycoords=("axes fraction", "data"),
                            xytext=(4, 0), textcoords="offset points", ha="left", va="center", fontsize=7,
                            fontweight="bold" if flagged else "normal", color=INK)
        if np.isfinite(obs):
            ax.axvline(obs, color=INK, linewidth=2.2, zorder=3)
    return fig


@styled
def prior_grid(cands: Sequence[tuple[str, object]], statistics: Sequence[str],
               observed: dict[str, float]) -> Rendered | None:
    """One panel per test statistic; rows: candidates. The prior distribution of the
    statistic as an interval (purple: 95 % thin, 50 % thick, white dot at the median),
    the observed value (thick ink line), the plausibility bounds (dashed vermillion) and
    the share of prior datasets inside them at the right of each row."""
    cands = [(label, p) for label, p in cands if p is not None]
    if not cands or not statistics:
        return None
    bounds = cands[0][1].bounds

    def note(p, stat):
        inside = p.inside_each.get(stat)
        return f"{100 * inside:.0f} % in" if inside is not None else ""

    fig = _statistic_panels(cands, list(statistics), observed,
                            lambda p, stat: p.stat_draws.get(stat, np.zeros(0)), PRIOR, note,
                            points_of=lambda stat: bounds.get(stat, ()))
    return render(fig, "prior interval of each test statistic per candidate, with the observed value and bounds")


# --- 3. Pareto k ----------------------------------------------------------------------

#: Observations shown per candidate in the Pareto k view.
WORST_SHOWN = 6


@styled
def pareto_k_worst(cands: Sequence[tuple[str, object, Sequence[int]]]) -> Rendered | None:
    """One small panel per candidate: its observations with the largest Pareto k, largest
    at the top, labelled by their row in the data file, as bars from 0 (blue up to the
    threshold, orange and outlined above it, a ring at the end when the observation was
    refitted exactly), with 0.5 dotted grey and the threshold dashed vermillion.
    ``cands`` holds ``(label, out_of_sample, data_rows)``, ``data_rows`` giving each
    observation's row in the data file."""
    cands = [(label, o, rows) for label, o, rows in cands
             if o is not None and (~np.isnan(np.asarray(o.pareto_k, dtype=float))).any()]
    if not cands:
        return None
    # an infinite k (the tail fit failed) is drawn to the panel's edge and labelled so;
    # the axis is set by the finite values
    finite = [k[np.isfinite(k)] for k in (np.asarray(o.pareto_k, dtype=float) for _, o, _ in cands)]
    kmax = max((float(f.max()) for f in finite if f.size), default=1.0)
    top = max(1.0, kmax + 0.08, max(o.k_threshold for _, o, _ in cands) + 0.1)
    fig, panels, _, height = panel_grid(len(cands), 5, 10.2, 0.35, 1.42, left=0.055, right=0.99, top=0.3,
                                        bottom=0.42, wspace=0.55, hspace=0.62)
    for ax, (label, o, rows) in zip(panels, cands):
        k = np.asarray(o.pareto_k, dtype=float)
        order = worst_k(k, WORST_SHOWN)
        y = np.arange(len(order))[::-1]
        vals = np.minimum(k[order], top - 0.02)
        high = vals > o.k_threshold
        ax.barh(y[~high], vals[~high], height=0.62, color=POSTERIOR, linewidth=0)
        if high.any():
            ax.barh(y[high], vals[high], height=0.62, color=FLAG, edgecolor=INK, linewidth=0.7, hatch="///")
        refitted = set(int(i) for i in o.refitted)
        for yy, i, v in zip(y, order, vals):
            if int(i) in refitted:
                ax.plot([v], [yy], marker="o", markersize=6.5, markerfacecolor="none", markeredgecolor=INK,
                        markeredgewidth=0.9, linestyle="none", zorder=4)
        ax.axvline(PARETO_K_GOOD, color=MUTED, linestyle=(0, (1, 1.5)), linewidth=0.9)
        ax.axvline(o.k_threshold, color=LIMIT, linestyle=(0, (4, 2)), linewidth=1.0)
        ax.set_yticks(y, [f"row {int(rows[i])}" + (" (k = ∞)" if np.isinf(k[i]) else "") for i in order])
        ax.tick_params(axis="y", length=0, labelsize=7)
        ax.set_xlim(min(0.0, float(np.nanmin(vals)) - 0.05), top)
        ax.set_ylim(-0.6, WORST_SHOWN - 0.4)
        ax.set_xticks([v for v in (0.0, 0.5, 1.0) if v <= top])
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
        ax.spines["left"].set_visible(False)
        ax.set_title(_wrap(label, 22, 2), fontsize=7.5)
    fig.supxlabel(f"Pareto k of the worst observations (dotted: {PARETO_K_GOOD:g}; dashed vermillion: the threshold)",
                  fontsize=7.5, y=0.02)
    return render(fig, "the observations with the largest Pareto k per candidate, by row of the data file")


# --- 4. observed against replicated distributions ---------------------------------------------

@styled
def replicate_density_grid(y: np.ndarray, cands: Sequence[tuple[str, np.ndarray]], ncols: int = 3,
                           outcome: str = "outcome") -> Rendered | None:
    """One panel per candidate, same axes: at each point of the outcome, the central
    95 % (light blue) and 50 % (darker blue) of the replicated datasets' densities, their
    median (thin dashed blue) and the density of the observed data (thick, solid ink);
    all smoothed with the same kernel bandwidth (Silverman's rule on the observed data).
    Where the observed density leaves the 95 % envelope by more than 1 % of the panel's
    height, a thick orange stroke runs along the bottom of the panel."""
    from contenders.statistics.checks import binned_density, silverman_bandwidth

    cands = [(label, r) for label, r in cands if r is not None and np.size(r)]
    if not cands:
        return None
    y = np.asarray(y, dtype=float)
    scale = shared_scale([r.reshape(-1) for _, r in cands], points=[float(y.min()), float(y.max())],
                         q=(0.005, 0.995), log_ratio=np.inf, asinh_ratio=np.inf)
    bw = silverman_bandwidth(y)
    grid, obs = binned_density(y, scale.lo, scale.hi, bw)
    obs = obs[0]
    bands = []
    for _, r in cands:
        dens = binned_density(r, scale.lo, scale.hi, bw)[1]
        bands.append(np.quantile(dens, [0.025, 0.25, 0.5, 0.75, 0.975], axis=0))
    top = max(float(obs.max()), max(float(b[-1].max()) for b in bands)) * 1.1
    fig, panels, _, height = panel_grid(len(cands), ncols, 7.6, 0.85, 1.6, left=0.04, right=0.99, top=0.62,
                                        bottom=0.52, wspace=0.1, hspace=0.45)
    for k, ax in enumerate(panels):
        label, r = cands[k]
        lo, lo50, med, hi50, hi = bands[k]
        ax.fill_between(grid, lo, hi, color=_tint(REPLICATE, 0.35), linewidth=0,
                        label=f"replicated, 95 % ({r.shape[0]} datasets)")
        ax.fill_between(grid, lo50, hi50, color=_tint(POSTERIOR, 0.45), linewidth=0, label="replicated, 50 %")
        ax.plot(grid, med, color=POSTERIOR, linewidth=0.8, linestyle=(0, (3, 2)), label="replicated median")
        ax.plot(grid, obs, color=INK, linewidth=2.0, label="observed data")
        # outside the envelope by more than 1 % of the panel's height (smaller gaps in the
        # flat tails cannot be seen and would mark noise)
        miss = (obs - hi > 0.01 * top) | (lo - obs > 0.01 * top)
        if miss.any():
            xs = np.where(miss, grid, np.nan)
            ax.plot(xs, np.full_like(grid, 0.012 * top), color=FLAG, linewidth=3.2, solid_capstyle="butt",
                    label="observed outside 95 %")
        ax.set_xlim(scale.lo, scale.hi)
        ax.set_ylim(0, top)
        ax.xaxis.set_major_locator(MaxNLocator(nbins=4))
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
        ax.set_title(plain(label, 60))   # a pointwise envelope: a short stroke is no verdict
    _shared_legend(fig, x=0.5, top=1 - 0.02 / height)
    fig.supxlabel(plain(outcome, 60), fontsize=8.5, y=0.1 / height)
    return render(fig, "envelope of the replicated datasets' densities and the density of the observed data "
                       "per candidate")


# --- 5. test statistics ----------------------------------------------------------------

def _p_text(p: float) -> str:
    from contenders.output.format import pvalue

    return "p " + pvalue(p)


class _PosteriorMarks:
    """The posterior predictive p-value of each candidate and statistic, and its flag."""

    def __init__(self, extreme: float):
        self.extreme = extreme

    def flagged(self, c, stat) -> bool:
        p = self.p(c, stat)
        return bool(np.isfinite(p) and (p < self.extreme or p > 1 - self.extreme))

    @staticmethod
    def p(c, stat) -> float:
        return next((r.p_value for r in c.rows if r.statistic == stat), np.nan)


@styled
def statistic_grid(cands: Sequence[tuple[str, object]], extreme: float) -> Rendered | None:
    """One panel per test statistic; rows: candidates. The statistic over replicated
    datasets as an interval (blue: 95 % thin, 50 % thick, white dot at the median), the
    observed value as a thick ink line through the intervals, and the posterior
    predictive p-value at the right of each row; a p-value beyond ``extreme`` gets a ◆,
    bold text and an orange diamond at the median."""
    cands = [(label, c) for label, c in cands if c is not None]
    if not cands:
        return None
    stats = [row.statistic for row in cands[0][1].rows]
    observed = {row.statistic: row.observed for row in cands[0][1].rows}
    marks = _PosteriorMarks(extreme)
    fig = _statistic_panels(cands, stats, observed, lambda c, stat: c.stat_draws.get(stat, np.zeros(0)),
                            POSTERIOR, lambda c, stat: _p_text(marks.p(c, stat)), flag_of=marks.flagged)
    return render(fig, "interval of each test statistic over replicated datasets per candidate, "
                       "with the observed value and the posterior predictive p-value")


# --- 6. LOO-PIT ------------------------------------------------------------------------

@styled
def loo_pit_grid(cands: Sequence[tuple[str, object]], ncols: int = 2) -> Rendered | None:
    """One panel per candidate, same axes: the empirical distribution function of the
    LOO-PIT values minus the uniform one (thick ink), between the limits of the
    simultaneous band of ``checks.uniformity_test`` (dashed vermillion; its level is the
    run's pit_alpha). Evaluation points where the ECDF leaves the band carry orange
    diamonds, and the panel's title says so with a ◆."""
    from contenders.statistics.checks import band_limits, leaves_band

    cands = [(label, c) for label, c in cands if c is not None and np.isfinite(c.loo_pit).any()]
    if not cands:
        return None
    curves = []
    for label, c in cands:
        pit = np.sort(np.asarray(c.loo_pit, dtype=float)[np.isfinite(c.loo_pit)])
        n = pit.size
        test = c.loo_pit_test
        prob = float(test.get("band", 0.99))
        z, lower, upper = band_limits(n, prob)
        if n <= 400:   # exact steps: the ECDF jumps from (i - 1) / n to i / n at the i-th value
            u = np.r_[0.0, np.repeat(pit, 2), 1.0]
            f = np.r_[0.0, np.column_stack([np.arange(n) / n, np.arange(1, n + 1) / n]).ravel(), 1.0]
        else:          # on a fine grid: the steps are narrower than a line's width
            u = np.linspace(0.0, 1.0, 801)
            f = np.searchsorted(pit, u, side="right") / n
        at = np.searchsorted(pit, z, side="right") / n
        out = (at > upper) | (at < lower)
        curves.append((label, test, u, f - u, z, lower - z, upper - z, at - z, out, prob))
    lim = max(max(float(np.abs(d).max()), float(np.abs(lo).max()), float(np.abs(hi).max()))
              for _, _, _, d, _, lo, hi, *_ in curves) * 1.15
    fig, panels, ncol, height = panel_grid(len(curves), ncols, 7.6, 0.85, 1.7, left=0.1, right=0.99, top=0.72,
                                           bottom=0.62, wspace=0.1, hspace=0.72)
    for k, ax in enumerate(panels):
        label, test, u, d, z, lo, hi, at, out, prob = curves[k]
        band = f"{100 * prob:g} % band"
        ax.plot(z, lo, color=LIMIT, linestyle=(0, (3, 2)), linewidth=1.0, label=f"limits of the {band}")
        ax.plot(z, hi, color=LIMIT, linestyle=(0, (3, 2)), linewidth=1.0)
        ax.axhline(0, color=MUTED, linewidth=0.6)
        ax.plot(u, d, color=INK, linewidth=1.7, label="LOO-PIT ECDF minus uniform")
        if out.any():
            ax.plot(z[out], at[out], linestyle="none", marker="D", markersize=3.6, markerfacecolor=FLAG,
                    markeredgecolor=INK, markeredgewidth=0.5, zorder=4, label="outside the band")
        ax.set_xlim(0, 1)
        ax.set_ylim(-lim, lim)
        ax.set_xticks([0, 0.25, 0.5, 0.75, 1], ["0", "0.25", "0.5", "0.75", "1"])
        ax.yaxis.set_major_locator(MaxNLocator(nbins=4, symmetric=True))
        if k % ncol:
            ax.tick_params(axis="y", labelleft=False)
        flagged = leaves_band(test)
        state = f"leaves the {band}" if flagged else f"inside the {band}"
        ax.set_title(("◆ " if flagged else "") + plain(label, 60) + "\n" + state,
                     fontweight="bold" if flagged else "normal")
        if flagged:
            flag_frame(ax)
    _shared_legend(fig, x=0.55, top=1 - 0.04 / height)
    axis_labels(fig, height, "LOO-PIT value (low: the observation fell low in its leave-one-out predictive "
                             "distribution)", 0.14, "ECDF minus uniform")
    return render(fig, "LOO-PIT calibration per candidate: distribution function minus uniform between the "
                       "limits of a simultaneous band")


# --- 6b. quantiles ---------------------------------------------------------------------

@styled
def quantile_grid(cands: Sequence[tuple[str, object]], outcome: str = "outcome", ncols: int = 2) -> Rendered | None:
    """One panel per candidate: at each quantile level (5 %, ..., 95 %) the replicated
    datasets' quantile minus the observed one, as a vertical interval (blue: 95 % thin,
    50 % thick, white dot at the median); the observed quantiles are the thick ink line
    at zero. A level whose 95 % interval misses zero gets an orange diamond; the panel's
    title names the stretches missed. Panels share the vertical axis unless one
    candidate's misses are more than four times another's, then each has its own."""
    import textwrap

    from contenders.output.readings import quantile_misses

    cands = [(label, c) for label, c in cands if c is not None and getattr(c, "quantiles", None)]
    if not cands:
        return None
    spans = []
    for _, c in cands:
        v = [abs(end - q.observed) for q in c.quantiles for end in (q.lower, q.upper) if np.isfinite(end)]
        spans.append(max(v) if v else 1.0)
    shared = max(spans) <= 4 * max(min(spans), 1e-300)
    fig, panels, ncol, height = panel_grid(len(cands), ncols, 7.6, 0.95, 2.0, left=0.1, right=0.99, top=0.72,
                                           bottom=0.62, wspace=0.1 if shared else 0.22, hspace=0.9)
    for k, ax in enumerate(panels):
        label, c = cands[k]
        rows = c.quantiles
        lim = (max(spans) if shared else spans[k]) * 1.12 or 1.0
        ax.axvspan(0, 12.5, color=BAND, linewidth=0, zorder=0)
        ax.axvspan(87.5, 100, color=BAND, linewidth=0, zorder=0)
        for x, text in ((6.25, "low tail"), (50, "body"), (93.75, "high tail")):
            ax.text(x, 0.97, text, transform=ax.get_xaxis_transform(), ha="center", va="top", fontsize=7,
                    color="#555555")
        ax.axhline(0, color=INK, linewidth=2.2, zorder=3, label="observed quantile")
        for q in rows:
            if not np.isfinite(q.median):
                continue
            o = q.observed
            _interval(ax, 100 * q.level, q.lower - o, q.lower50 - o, q.median - o, q.upper50 - o,
                      q.upper - o, POSTERIOR, vertical=True, flagged=bool(q.miss))
        ax.set_xlim(0, 100)
        ax.set_ylim(-lim, lim * 1.3)   # room for the zone names above the intervals
        ax.set_xticks([5, 25, 50, 75, 95], ["5", "25", "50", "75", "95"])
        ax.yaxis.set_major_locator(MaxNLocator(nbins=4, symmetric=True))
        if shared and k % ncol:
            ax.tick_params(axis="y", labelleft=False)
        misses = quantile_misses(rows)
        short = "; ".join(m.replace(" (replicates ", " ").replace(")", "") for m in misses)
        ax.set_title(plain(label, 50) + "\n" + ("\n".join(textwrap.wrap("outside: " + short, 58)) if misses
                                                 else "every level inside"), fontsize=7.5)
        if k == 0:
            ax.plot([], [], color=POSTERIOR, linewidth=4.0, label="replicated minus observed: 50 %, 95 %")
            ax.plot([], [], linestyle="none", marker="D", markerfacecolor=FLAG, markeredgecolor=INK,
                    label="observed outside the 95 %")
            fig.legend(*ax.get_legend_handles_labels(), loc="upper center", ncol=3, fontsize=7.5,
                       handlelength=1.8, bbox_to_anchor=(0.55, 1 - 0.04 / height))
    axis_labels(fig, height, "quantile level (%)", 0.14, plain(f"replicated minus observed ({outcome})", 60))
    return render(fig, "replicated minus observed quantile at each level from 5 % to 95 % per candidate")


# --- 7. lineup -------------------------------------------------------------------------

def lineup_layout(n_replicates: int, seed: int, n_panels: int = 20) -> tuple[int, list[int]]:
    """Where the observed data go (0-based panel) and which replicated datasets fill the
    other panels, drawn with a seeded generator so the page is reproducible."""
    rng = np.random.default_rng(seed)
    position = int(rng.integers(n_panels))
    rows = [int(i) for i in rng.choice(n_replicates, size=n_panels - 1, replace=False)]
    return position, rows


@styled
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
        ax.stairs(c, edges, fill=True, facecolor=_tint(POSTERIOR, 0.5), edgecolor=POSTERIOR, linewidth=0.8)
        ax.set_xlim(lo, hi)
        ax.set_ylim(0, top)
        ax.set_xticks([])
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
        panels.append(render(fig, f"panel {k + 1}"))
    return Lineup(panels, position + 1, rows, edges, counts)


# --- 8. effects across candidates ---------------------------------------------------------

def _effect_range(values: Sequence[float]) -> tuple[float, float]:
    """x-range of one effect's panel: every interval end and the observed value, with
    zero taken in when it lies within half the span of them (so the side of zero shows
    without squeezing effects far from zero)."""
    v = np.asarray([x for x in values if x is not None and np.isfinite(x)], dtype=float)
    if v.size == 0:
        return -1.0, 1.0
    lo, hi = float(v.min()), float(v.max())
    span = hi - lo or abs(hi) * 0.2 or 1.0
    if lo - 0.5 * span <= 0 <= hi + 0.5 * span:
        lo, hi = min(lo, 0.0), max(hi, 0.0)
        span = hi - lo
    return lo - 0.06 * span, hi + 0.06 * span


@styled
def effects_across(effects: Sequence[object], units: dict[str, str]) -> Rendered | None:
    """One panel per effect. Each candidate is a row, ranked candidates first by elpd
    with their stacking weight: a dot at the mean of its replicated effect and a line
    over the 95 % interval (solid blue; dotted grey and a hollow dot for candidates
    that are not ranked). The bottom row is the stacking-weighted mixture (a black
    diamond on a thick black line). The observed value is a thick black vertical line;
    zero a thin dashed grey one. A panel whose candidates disagree has an orange frame
    and a ◆ in its title. ``units`` maps an effect's key to its units."""
    effects = [e for e in effects if e.rows]
    if not effects:
        return None
    heights = [len(e.rows) + (1 if e.combined else 0) + 0.9 for e in effects]
    width = 8.0
    height = 0.35 + 0.22 * sum(heights) + 0.32 * len(effects)
    fig = _new(width, height)
    fig.subplots_adjust(left=2.8 / width, right=0.98, top=1 - 0.3 / height, bottom=0.55 / height, hspace=0.9)
    axes = fig.subplots(len(effects), 1, squeeze=False, gridspec_kw={"height_ratios": heights})[:, 0]
    for ax, e in zip(axes, effects):
        rows = list(e.rows)
        n = len(rows) + (1 if e.combined else 0)
        ypos = np.arange(n)[::-1].astype(float)
        labels = []
        ends = [e.observed]
        for y, row in zip(ypos, rows):
            ranked = row.weight is not None
            if np.isfinite(row.lower):
                ends += [row.lower, row.upper]
                ax.hlines(y, row.lower, row.upper, color=POSTERIOR if ranked else MUTED,
                          linewidth=1.8 if ranked else 1.2, linestyles="solid" if ranked else (0, (1, 1.5)))
                ax.plot([row.mean], [y], marker="o", markersize=4.2, color=INK if ranked else MUTED,
                        markerfacecolor=INK if ranked else "white", zorder=3)
            head = f"{row.rank}. " if ranked else ""
            tail = f"  w {row.weight:.2f}" if ranked else "  not ranked"
            labels.append(plain(head + str(row.label), 60) + tail)
        if e.combined:
            c = e.combined
            ends += [c.lower, c.upper]
            ax.hlines(ypos[-1], c.lower, c.upper, color=INK, linewidth=3.0)
            ax.plot([c.mean], [ypos[-1]], marker="D", markersize=5.2, color=INK, markerfacecolor="white",
                    markeredgewidth=1.4, zorder=4)
            labels.append("stacking-weighted mix")
        lo, hi = _effect_range(ends)
        if lo < 0 < hi:
            ax.axvline(0, color=MUTED, linewidth=0.8, linestyle=(0, (3, 2)), zorder=0)
        if np.isfinite(e.observed):
            ax.axvline(e.observed, color=INK, linewidth=2.2, zorder=2)
        ax.set_xlim(lo, hi)
        ax.set_ylim(-0.7, n - 0.3)
        ax.set_yticks(ypos, labels)
        ax.tick_params(axis="y", length=0, labelsize=7.5)
        ax.spines["left"].set_visible(False)
        ax.xaxis.set_major_locator(MaxNLocator(nbins=5))
        flagged = e.reading == "depends"
        title = plain(f"{e.title} ({units.get(e.key, '')})", 90)
        ax.set_title(("◆ " if flagged else "") + title + ("  (depends on the candidate)" if flagged else ""),
                     fontweight="bold" if flagged else "normal")
        if flagged:
            flag_frame(ax)
    axes[-1].set_xlabel("replicated effect (dot: mean; line: 95 % interval); thick black line: observed value",
                        fontsize=7.8)
    return render(fig, "each effect under each candidate with 95 % intervals, the stacking-weighted mix "
                       "and the observed value")
