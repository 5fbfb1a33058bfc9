"""Figures for one patient's results over time (layer 5: matplotlib lives here and in report).

Figures are built with :class:`matplotlib.figure.Figure` directly, never through ``pyplot``, so
nothing global (the backend, the current figure, rcParams) changes when a report is drawn.

Visual language (described to the reader by :data:`LEGEND_TEXT`, written in
:mod:`.wording`; colours from the Okabe-Ito colour-blind-safe palette, Okabe M & Ito K, "Color
Universal Design", 2008, common practice in scientific figures):

* population reference interval: two thin reddish-purple dashed limit lines with a faint hatch
  between them;
* personal interval as it stood at each specimen: a bluish-green stepped ribbon (the interval
  predicted from the specimens before a draw, held from the previous draw up to that draw);
  the interval for the assessed specimen is the last step;
* baseline specimens: filled blue circles; specimens taken while unwell: hollow black diamonds;
  excluded specimens: dark-grey crosses; specimens after the assessed one: small hollow grey rings;
* the assessed result: a large star with a black edge whose fill shows P(change) in ONE hue
  (Okabe-Ito orange) from light to dark, and by shape: hollow (pale fill) below the uncertain
  band, half-filled inside it, filled dark above it. Never a blue/red pair: practice software
  commonly shows low results in blue and high ones in red, and a "no change" mark must not read
  as a low result. A one-hue ramp stays ordered for colour-blind readers because it varies in
  lightness, and the shape carries the band without colour at all;
* censored results (``<x`` / ``>x``): a small chevron pointing the way the true value lies;
* drift model (when P(drift) >= 0.5): a black dash-dot line with a pale-yellow band for its credible
  slope range, drawn through the geometric mean of the specimens used.
"""
from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pandas as pd
from matplotlib.colors import to_hex, to_rgb
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.text import Text
import matplotlib.dates as mdates

from ..units import display_unit
from . import wording as w
from .panel import DRIFT_DRAW_P, change_band

#: marker size (points) of the assessed star: sqrt of the former scatter areas 140 and 170
STAR_SIZE_COMPACT, STAR_SIZE = 11.8, 13.0

__all__ = [
    "PALETTE",
    "CHANGE_RAMP",
    "CHANGE_SHAPE",
    "LEGEND_TEXT",
    "ChangeMark",
    "change_mark",
    "star_colour",
    "star_svg",
    "tint",
    "analyte_panel",
    "analyte_histories",
    "small_multiples",
    "legend_figure",
    "legend_handles",
    "figure_png",
    "figure_svg",
    "PanelGrid",
    "panel_grid",
    "grid_pixels",
    "legend_png",
    "legend_rgb",
    "png_bytes",
]

#: Okabe-Ito colours (Okabe & Ito 2008), named by their use here.
PALETTE = {
    "population": "#CC79A7",  # reddish purple
    "personal": "#009E73",  # bluish green
    "baseline": "#0072B2",  # blue
    "unwell": "#000000",  # black
    "excluded": "#5A5A5A",  # dark grey
    "later": "#9A9A9A",  # mid grey
    "change": "#E69F00",  # orange: the one hue of the P(change) marks (see CHANGE_RAMP)
    "trend": "#000000",
    "trend_band": "#F0E442",  # yellow
}

#: what the marks mean, for the reader (text in :mod:`.wording`)
LEGEND_TEXT = w.LEGEND_TEXT

_ROLE_STYLE = {
    "baseline": dict(marker="o", s=30, facecolors=PALETTE["baseline"], edgecolors="#003B5C",
                     linewidths=0.6, zorder=5),
    "unwell": dict(marker="D", s=30, facecolors="none", edgecolors=PALETTE["unwell"],
                   linewidths=1.1, zorder=5),
    "excluded": dict(marker="X", s=46, facecolors=PALETTE["excluded"], edgecolors="none",
                     zorder=5),
    "later": dict(marker="o", s=16, facecolors="none", edgecolors=PALETTE["later"],
                  linewidths=0.9, zorder=4),
}


def _mix(colour: str, other: tuple[float, float, float], share: float) -> str:
    """``colour`` moved ``share`` of the way to ``other`` (RGB 0-1): a tint towards white or a
    shade towards black keeps the hue."""
    rgb = to_rgb(colour)
    return to_hex(tuple(c + share * (o - c) for c, o in zip(rgb, other))).upper()


def tint(colour: str, share: float) -> str:
    """``colour`` moved ``share`` of the way to white (same hue, lighter)."""
    return _mix(colour, (1.0, 1.0, 1.0), share)


#: P(change) bands in one hue, light to dark: pale tint (no change), the Okabe-Ito orange
#: (uncertain), a dark shade of it (probable change).
CHANGE_RAMP = {
    "low": tint(PALETTE["change"], 0.75),
    "uncertain": PALETTE["change"],
    "probable": _mix(PALETTE["change"], (0.0, 0.0, 0.0), 0.4),
}
#: shape of the mark by band: hollow (pale fill), half-filled, filled
CHANGE_SHAPE = {"low": "hollow", "uncertain": "half", "probable": "filled"}


@dataclass(frozen=True)
class ChangeMark:
    """How a P(change) is drawn: its band, shape, and the fill of the left and right halves."""

    band: str | None
    shape: str
    left: str
    right: str


def change_mark(p_change) -> ChangeMark:
    """The mark of a posterior probability of change (missing: a hollow white star)."""
    band = change_band(None if p_change is None else float(p_change))
    if band is None:
        return ChangeMark(None, "hollow", "#FFFFFF", "#FFFFFF")
    right = CHANGE_RAMP["low"] if band == "uncertain" else CHANGE_RAMP[band]
    return ChangeMark(band, CHANGE_SHAPE[band], CHANGE_RAMP[band], right)


def star_colour(p_change) -> str:
    """Main fill colour of the assessed-result star (its left half when half-filled)."""
    return change_mark(p_change).left


def _star_vertices(inner: float = 0.381966) -> list[tuple[float, float]]:
    """The five-pointed star of matplotlib's '*' marker (outer radius 1, point up) in screen
    coordinates (y down), from the top point round the left side first: the first six
    vertices outline the left half."""
    out = []
    for i in range(10):
        a = math.pi / 2 + i * math.pi / 5
        r = 1.0 if i % 2 == 0 else inner
        out.append((round(r * math.cos(a), 4), round(-r * math.sin(a), 4)))
    return out


def star_svg(p_change, size_mm: float = 3.6, standalone: bool = False) -> str:
    """The P(change) mark as a small SVG: the same star, fills and shape as in the figures
    (numbers and fixed colours only, so it is safe to embed as markup)."""
    mark = change_mark(p_change)
    pts = _star_vertices()
    full = " ".join(f"{x},{y}" for x, y in pts)
    left = " ".join(f"{x},{y}" for x, y in pts[:6])  # top point round the left to the bottom
    ns = ' xmlns="http://www.w3.org/2000/svg"' if standalone else ""
    body = f'<polygon points="{full}" fill="{mark.right}"/>'
    if mark.left != mark.right:
        body += f'<polygon points="{left}" fill="{mark.left}"/>'
    body += (f'<polygon points="{full}" fill="none" stroke="#000000" stroke-width="0.12" '
             'stroke-linejoin="round"/>')
    return (f'<svg{ns} class="star" viewBox="-1.15 -1.15 2.3 2.3" width="{size_mm}mm" '
            f'height="{size_mm}mm" role="img" aria-label="{mark.shape} star">{body}</svg>')


def _star_style(p_change, size: float) -> dict:
    """Line2D keywords of the assessed star (a half star is matplotlib's fillstyle 'left')."""
    mark = change_mark(p_change)
    return dict(marker="*", markersize=size, linestyle="none", markeredgecolor="#000000",
                markeredgewidth=0.8, markerfacecolor=mark.left, markerfacecoloralt=mark.right,
                fillstyle="left" if mark.left != mark.right else "full")


def _finite(x) -> bool:
    try:
        return x is not None and x is not pd.NA and np.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def _per_specimen(h: pd.DataFrame, by: list) -> pd.DataFrame:
    """One point per specimen (grouped ``by`` these columns): the mean of replicates on the log
    scale (geometric mean) and the first censoring mark."""
    agg = (
        h.assign(_logv=np.log(h["value"].astype(float)))
        .groupby(by, sort=False, dropna=False)
        .agg(_logv=("_logv", "mean"), censor=("censor", lambda s: next((c for c in s if c), "")))
        .reset_index()
    )
    agg["value"] = np.exp(agg["_logv"])
    return agg


def _analyte_history(history: pd.DataFrame, patient, analyte) -> pd.DataFrame:
    h = history[(history["patient"] == patient) & (history["analyte"] == analyte)]
    if h.empty:
        return h
    agg = _per_specimen(h, ["specimen", "collected_at", "role"])
    return agg.sort_values("collected_at").reset_index(drop=True)


def analyte_histories(history: pd.DataFrame, patient) -> dict:
    """:func:`_analyte_history` of every analyte of one patient at once (analyte -> frame, the
    same frames, from one grouping instead of one per panel)."""
    h = history[history["patient"] == patient]
    if h.empty:
        return {}
    agg = _per_specimen(h, ["analyte", "specimen", "collected_at", "role"])
    out = {}
    for analyte, g in agg.groupby("analyte", sort=False):
        g = g.drop(columns="analyte").reset_index(drop=True)
        out[analyte] = g.sort_values("collected_at").reset_index(drop=True)
    return out


def _path_for(interval_path, patient, analyte) -> pd.DataFrame | None:
    if interval_path is None or len(interval_path) == 0:
        return None
    p = interval_path[(interval_path["patient"] == patient) & (interval_path["analyte"] == analyte)]
    p = p.dropna(subset=["pi_lower", "pi_upper"]).sort_values("collected_at", kind="stable")
    return p if len(p) else None


def _path_points(interval_path) -> dict:
    """(patient, analyte) -> (times, lower, upper) lists: the rows :func:`_path_for` picks for
    each, in the same order, from one sort and one grouping for a whole report."""
    if interval_path is None or len(interval_path) == 0:
        return {}
    p = (interval_path.dropna(subset=["pi_lower", "pi_upper"])
         .sort_values("collected_at", kind="stable"))
    return {key: (list(g["collected_at"]), list(g["pi_lower"]), list(g["pi_upper"]))
            for key, g in p.groupby(["patient", "analyte"], sort=False, observed=True)}


def _window(times: list, t_assessed: pd.Timestamp):
    """x range of a panel: every specimen with 6 % room, at least a month."""
    t0, t1 = min(times + [t_assessed]), max(times + [t_assessed])
    span = t1 - t0
    if span < pd.Timedelta(days=30):  # one specimen or a few within days: show a month
        mid = t0 + span / 2
        t0, t1 = mid - pd.Timedelta(days=15), mid + pd.Timedelta(days=15)
        span = t1 - t0
    pad = span * 0.06
    return t0 - pad, t1 + pad, span


def _draw_population(ax, row, xlo, xhi) -> tuple:
    """Population interval: dashed limits with a faint hatch between them."""
    plo, phi = row["pop_lower"], row["pop_upper"]
    if _finite(plo) and _finite(phi):
        ax.fill_between([xlo, xhi], [plo, plo], [phi, phi], facecolor="none",
                        edgecolor=PALETTE["population"], hatch="////", linewidth=0, alpha=0.22,
                        zorder=1)
        for v in (plo, phi):
            ax.axhline(v, color=PALETTE["population"], linestyle=(0, (4, 3)), linewidth=0.9,
                       zorder=2)
    return plo, phi


def _interval_steps(interval_path, row, t_assessed) -> list[tuple]:
    """(time, lower, upper) of the personal interval at each earlier specimen and now.
    ``interval_path``: a frame, or this row's entry of :func:`_path_points`."""
    if isinstance(interval_path, tuple):
        points = interval_path
    else:
        path = _path_for(interval_path, row["patient"], row["analyte"])
        points = ((path["collected_at"], path["pi_lower"], path["pi_upper"])
                  if path is not None else ((), (), ()))
    steps = [(pd.Timestamp(t), lo, hi) for t, lo, hi in zip(*points)
             if pd.Timestamp(t) < t_assessed]
    if _finite(row["pi_lower"]) and _finite(row["pi_upper"]):
        steps.append((t_assessed, float(row["pi_lower"]), float(row["pi_upper"])))
    steps.sort(key=lambda s: s[0])
    return steps


def _draw_personal(ax, steps, times, span) -> None:
    """Personal interval: a stepped ribbon, each step from the previous draw to this one; the
    last reaches a little past the assessed result so that the star sits inside its own band."""
    if not steps:
        return
    spec_times = sorted(set(times))
    xs, los, his = [], [], []
    for i, (t, lo, hi) in enumerate(steps):
        earlier = [u for u in spec_times if u < t]
        start = earlier[-1] if earlier else t - span * 0.04
        if xs and start < xs[-1]:
            start = xs[-1]
        end = t + span * 0.02 if i == len(steps) - 1 else t
        xs += [start, end]
        los += [lo, lo]
        his += [hi, hi]
    ax.fill_between(xs, los, his, facecolor=PALETTE["personal"], alpha=0.26,
                    edgecolor="none", zorder=2)
    for ys in (los, his):
        ax.plot(xs, ys, color=PALETTE["personal"], linewidth=1.0, zorder=3)


def _trend_of(row, trend: dict | None) -> dict | None:
    """The drift to draw: ``trend`` when given, else the row's trend columns when the drift
    model gives P(drift) >= DRIFT_DRAW_P (an assessment made without trend has no columns)."""
    if trend is not None:
        return trend
    p_drift = row.get("trend_p_drift")
    shown = not _finite(p_drift) or float(p_drift) >= DRIFT_DRAW_P
    if shown and _finite(row.get("trend_pct_per_year")):
        return {"pct_per_year": float(row["trend_pct_per_year"]),
                "pct_lower": row["trend_pct_lower"], "pct_upper": row["trend_pct_upper"]}
    return None


def _draw_trend(ax, tr: dict | None, h: pd.DataFrame, xlo, xhi) -> None:
    """Drift line through the geometric mean of the specimens used, with its credible band."""
    used = h[h["role"].isin(["baseline", "assessed"])] if len(h) else h
    if not tr or len(used) < 2:
        return
    ct = pd.to_datetime(used["collected_at"])
    anchor_t = ct.min() + (ct - ct.min()).mean()  # resolution-safe mean time
    anchor = float(np.exp(np.log(used["value"]).mean()))
    tt = pd.date_range(xlo, xhi, periods=40)
    yrs = np.asarray((tt - anchor_t) / pd.Timedelta(days=365.25), dtype=float)

    def line(pct):
        return anchor * (1.0 + float(pct) / 100.0) ** yrs

    if _finite(tr.get("pct_lower")) and _finite(tr.get("pct_upper")):
        a, b = line(tr["pct_lower"]), line(tr["pct_upper"])
        ax.fill_between(tt, np.minimum(a, b), np.maximum(a, b), facecolor=PALETTE["trend_band"],
                        alpha=0.45, edgecolor="none", zorder=1.5)
    ax.plot(tt, line(tr["pct_per_year"]), color=PALETTE["trend"], linestyle="-.",
            linewidth=1.0, zorder=3.5)


def _draw_specimens(ax, h: pd.DataFrame, row, t_assessed, compact: bool) -> float | None:
    """Specimens by role, the assessed star and the censored chevrons; returns the assessed
    value (None when missing). The rows of each role are picked with numpy arrays (the same
    values as the frame's columns, without a frame per role)."""
    if len(h):
        roles = h["role"].to_numpy(dtype=object)
        when, values = h["collected_at"].to_numpy(), h["value"].to_numpy()
        for role, style in _ROLE_STYLE.items():
            pick = roles == role
            if pick.any():
                ax.scatter(when[pick], values[pick], **style)
    value = float(row["value"]) if _finite(row["value"]) else None
    if value is not None:
        ax.plot([t_assessed], [value], zorder=7,
                **_star_style(row["p_change"], STAR_SIZE_COMPACT if compact else STAR_SIZE))
    if len(h):
        censored = np.isin(h["censor"].to_numpy(dtype=object, na_value=""), ["left", "right"])
        for _, r in (h[censored].iterrows() if censored.any() else ()):
            ax.annotate("v" if r["censor"] == "left" else "^", (r["collected_at"], r["value"]),
                        xytext=(6, -2), textcoords="offset points", fontsize=7, zorder=8)
    elif value is not None and row["censor"] in ("left", "right"):
        ax.annotate("v" if row["censor"] == "left" else "^", (t_assessed, value),
                    xytext=(6, -2), textcoords="offset points", fontsize=7)
    return value


def _set_ylim(ax, h: pd.DataFrame, values, steps) -> None:
    """y range: everything drawn, with room."""
    ys = [v for v in list(h["value"]) if _finite(v)] if len(h) else []
    ys += [v for v in values if _finite(v)]
    for _, lo, hi in steps:
        ys += [lo, hi]
    if ys:
        lo, hi = min(ys), max(ys)
        r = (hi - lo) or abs(hi) * 0.1 or 1.0
        ax.set_ylim(max(lo - 0.12 * r, 0.0) if lo >= 0 else lo - 0.12 * r, hi + 0.12 * r)


def _y_offset_shown(ax) -> bool:
    """Whether the y axis will show an offset or multiplier text at draw time (True when that
    cannot be told without drawing)."""
    from matplotlib.ticker import ScalarFormatter

    fmt = ax.yaxis.get_major_formatter()
    if type(fmt) is not ScalarFormatter or not ax.yaxis.offsetText.get_visible():
        return True
    fmt.set_locs(ax.yaxis.get_majorticklocs())
    return bool(fmt.get_offset())


def _style_axes(ax, row, compact: bool) -> None:
    # maxticks 4 makes AutoDateLocator warn for spans near 18 months (checked 1 day to 11 years)
    locator = mdates.AutoDateLocator(minticks=2, maxticks=5 if compact else 7)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.tick_params(labelsize=6.5 if compact else 8, length=2.5, pad=1.5)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.spines["left"].set_linewidth(0.6)
    ax.spines["bottom"].set_linewidth(0.6)
    ptxt = w.panel_p_text(row["p_change"] if _finite(row["p_change"]) else None)
    # the title stays at the top of the axes unless a y offset text ("1e3", "+1.47e2") could
    # push it up: place it there directly then, which spares matplotlib measuring every tick
    # label for it at each draw (the same pixels)
    ax.set_title(f"{row['label']}  [{display_unit(str(row['analyte']))}]",
                 fontsize=8.5 if compact else 10, loc="left", pad=3, fontweight="bold",
                 y=None if _y_offset_shown(ax) else 1.0)
    # the axis labels are empty: fixed positions spare matplotlib placing them at each draw
    ax.xaxis.set_label_coords(0.5, -0.1)
    ax.yaxis.set_label_coords(-0.1, 0.5)
    ax.text(1.0, 1.01, ptxt, transform=ax.transAxes, ha="right", va="bottom",
            fontsize=7.2 if compact else 8, color="#333333")
    _ticks_in_view(ax.xaxis)
    _ticks_in_view(ax.yaxis)


def _ticks_in_view(axis) -> None:
    """Fix the axis's ticks to those its locator gives inside the view, each with the label
    (and the axis with the offset text) its formatter gives when it sees every tick, as at draw
    time: the same ticks and text are drawn, but matplotlib no longer builds tick artists for
    the ticks just outside the view that it never draws (tick artists were the largest cost of
    a panel). Call once the view limits are final."""
    from matplotlib.ticker import FixedFormatter, FixedLocator

    locs = np.asarray(axis.get_majorticklocs(), dtype=float)
    fmt = axis.get_major_formatter()
    labels = fmt.format_ticks(locs)
    offset = fmt.get_offset()
    lo, hi = sorted(axis.get_view_interval())
    tol = (hi - lo) * 1e-10  # matplotlib's own test of a tick inside the view (linear scale)
    keep = (locs >= lo - tol) & (locs <= hi + tol)
    axis.set_major_locator(FixedLocator(locs[keep]))
    fixed = FixedFormatter([lab for lab, k in zip(labels, keep) if k])
    fixed.set_offset_string(offset)
    axis.set_major_formatter(fixed)


class _OffsetUnderLabels(Text):
    """An x axis's offset text (the year under month ticks, say) for ticks drawn by
    :func:`_tick_artists`: placed at draw time under the tick labels as matplotlib's x axis
    places its own (``XAxis._update_offset_text_position``, ticks at the bottom)."""

    def __init__(self, source: Text, text: str, labels: list, pad_points: float):
        super().__init__()
        self.update_from(source)
        self.set_position(source.get_position())
        self.set_text(text)
        self._labels, self._pad = labels, pad_points

    def draw(self, renderer):
        from matplotlib.transforms import Bbox

        boxes = [t.get_window_extent(renderer) for t in self._labels
                 if t.get_visible() and t.get_in_layout()]
        bottom = Bbox.union(boxes).y0 if boxes else self.axes.bbox.ymin
        x, _ = self.get_position()
        self.set_position((x, bottom - self._pad * self.get_figure(root=True).dpi / 72))
        super().draw(renderer)


def _tick_artists(ax) -> None:
    """Draw the panel's fixed ticks (see :func:`_ticks_in_view`) as one line of tick marks and
    one text per label per axis, copies of the axis's own first tick, instead of one tick
    object per tick that matplotlib builds at each draw (five artists each, most never drawn;
    tick objects were the largest cost of the report's figure). The axes then locate no ticks;
    the y axis still writes its offset text (its place does not depend on the labels) and the
    x axis's offset text is placed under the labels by :class:`_OffsetUnderLabels`. The same
    marks and texts at the same places (the report's figure is checked against panels drawn
    with matplotlib's ticks, pixel by pixel, in the tests)."""
    from matplotlib.path import Path as MplPath
    from matplotlib.ticker import FixedFormatter, NullLocator
    from matplotlib.transforms import IdentityTransform, TransformedPath

    unclipped = TransformedPath(MplPath.unit_rectangle(), IdentityTransform())
    for axis, is_x in ((ax.xaxis, True), (ax.yaxis, False)):
        locs = np.asarray(axis.get_major_locator().locs, dtype=float)
        fmt = axis.get_major_formatter()
        texts, offset = list(fmt.seq), fmt.get_offset()
        tick = axis.majorTicks[0]  # every tick matplotlib draws copies this one
        zero = np.zeros(len(locs))
        marks = Line2D(locs if is_x else zero, zero if is_x else locs)
        marks.update_from(tick.tick1line)
        marks.set_visible(tick.tick1line.get_visible())
        labels = []
        for loc, text in zip(locs, texts):
            lab = Text()
            lab.update_from(tick.label1)
            lab.set_position((loc, 0.0) if is_x else (0.0, loc))
            lab.set_text(text)
            labels.append(lab)
        extra = [marks, *labels]
        if is_x and offset:
            extra.append(_OffsetUnderLabels(axis.offsetText, offset, labels, axis.OFFSETTEXTPAD))
        for artist in extra:
            # a clip path already set keeps add_artist from building the axes' clip box for
            # each (a visible share of the figure's time in a profile); it is removed next
            artist.set_clip_path(unclipped)
            ax.add_artist(artist)
            artist.set_clip_box(None)  # unclipped, as a tick's mark and label are
            artist.set_clip_path(None)
            artist.set_zorder(axis.get_zorder())
        none = FixedFormatter([])
        none.set_offset_string("" if is_x else offset)
        axis.set_major_locator(NullLocator())
        axis.set_major_formatter(none)


def _draw_panel(ax, history: pd.DataFrame, row, interval_path=None, trend=None,
                compact: bool = False, h: pd.DataFrame | None = None) -> None:
    """One analyte of one patient over time, on ``ax`` (``h``: its :func:`_analyte_history`
    when already computed)."""
    if h is None:
        h = _analyte_history(history, row["patient"], row["analyte"])
    t_assessed = pd.Timestamp(row["collected_at"])
    times = list(h["collected_at"]) if len(h) else [t_assessed]
    xlo, xhi, span = _window(times, t_assessed)
    plo, phi = _draw_population(ax, row, xlo, xhi)
    steps = _interval_steps(interval_path, row, t_assessed)
    _draw_personal(ax, steps, times, span)
    _draw_trend(ax, _trend_of(row, trend), h, xlo, xhi)
    value = _draw_specimens(ax, h, row, t_assessed, compact)
    ax.set_xlim(xlo, xhi)
    _set_ylim(ax, h, (plo, phi, value), steps)
    _style_axes(ax, row, compact)


def _new_figure(width, height, dpi=110) -> Figure:
    # fixed margins, not a layout engine: constrained layout cost ~0.35 s per panel here
    return Figure(figsize=(width, height), dpi=dpi)


def _margins(fig: Figure, width: float, height: float, top_in: float = 0.32,
             bottom_in: float = 0.28, left_in: float = 0.5, right_in: float = 0.1) -> None:
    fig.subplots_adjust(left=left_in / width, right=1 - right_in / width,
                        bottom=bottom_in / height, top=1 - top_in / height)


def analyte_panel(history: pd.DataFrame, table_row, interval_path: pd.DataFrame | None = None,
                  trend: dict | None = None, *, width: float = 3.4, height: float = 2.3,
                  analyte_history: pd.DataFrame | None = None) -> Figure:
    """One analyte of one patient over time.

    Parameters
    ----------
    history : Assessment.history (all rows; the panel picks the patient and analyte of the row).
    table_row : one row of Assessment.table (a Series or mapping).
    interval_path : optional frame with patient, analyte, specimen, collected_at, pi_lower,
        pi_upper: the personal interval as it stood at each specimen (see
        ``bayesbase.report.personal_interval_path``).
    trend : optional dict ``pct_per_year, pct_lower, pct_upper``; by default taken from the
        row's trend columns when they are finite.
    analyte_history : optional, this analyte's entry of :func:`analyte_histories` (computed
        from ``history`` when not given).
    """
    fig = _new_figure(width, height)
    _margins(fig, width, height)
    ax = fig.add_subplot(1, 1, 1)
    _draw_panel(ax, history, table_row, interval_path, trend, compact=True, h=analyte_history)
    return fig


def legend_handles() -> list:
    """Legend entries for the visual language (shared by the figures and the report)."""
    lab = w.LEGEND_LABELS
    return [
        Line2D([], [], color=PALETTE["population"], linestyle=(0, (4, 3)), linewidth=0.9,
               label=lab["population"]),
        Patch(facecolor=PALETTE["personal"], alpha=0.35, edgecolor=PALETTE["personal"],
              label=lab["personal"]),
        Line2D([], [], marker="o", linestyle="none", markerfacecolor=PALETTE["baseline"],
               markeredgecolor="#003B5C", label=lab["baseline"]),
        Line2D([], [], marker="D", linestyle="none", markerfacecolor="none",
               markeredgecolor=PALETTE["unwell"], label=lab["unwell"]),
        Line2D([], [], marker="X", linestyle="none", markersize=7,
               markerfacecolor=PALETTE["excluded"], markeredgecolor="none", label=lab["excluded"]),
        Line2D([], [], marker="o", linestyle="none", markerfacecolor="none", markersize=4.5,
               markeredgecolor=PALETTE["later"], label=lab["later"]),
        *[Line2D([], [], label=lab[f"star_{band}"], **_star_style(p, 11))
          for band, p in (("low", 0.0), ("uncertain", 0.5), ("probable", 1.0))],
        Line2D([], [], color=PALETTE["trend"], linestyle="-.", linewidth=1.0,
               label=lab["drift"]),
    ]


def legend_figure(width: float = 7.4, height: float = 0.8, ncols: int = 4) -> Figure:
    """A strip holding only the legend of the visual language (sized to fit its width)."""
    fig = _new_figure(width, height)
    fig.legend(handles=legend_handles(), loc="center", ncols=ncols, frameon=False, fontsize=7.5,
               handlelength=2.0, columnspacing=1.5, borderaxespad=0.1)
    return fig


def small_multiples(history: pd.DataFrame, table: pd.DataFrame,
                    interval_path: pd.DataFrame | None = None, *, ncols: int = 4,
                    analytes: Iterable[str] | None = None, panel_width: float = 2.6,
                    panel_height: float = 1.9, legend: bool = True) -> Figure:
    """A grid of :func:`analyte_panel` views, one per row of ``table`` (one patient), in table
    order (or the order of ``analytes``), with one shared legend underneath."""
    rows = table
    if analytes is not None:
        order = list(analytes)
        rows = table.set_index("analyte").loc[order].reset_index()
    n = len(rows)
    if n == 0:
        raise ValueError("small_multiples: the table has no rows")
    ncols = max(1, min(ncols, n))
    nrows = math.ceil(n / ncols)
    extra = 0.6 if legend else 0.0
    W, H = panel_width * ncols, panel_height * nrows + extra
    fig = _new_figure(W, H)
    fig.subplots_adjust(left=0.5 / W, right=1 - 0.1 / W, top=1 - 0.3 / H,
                        bottom=(extra + 0.28) / H, wspace=0.5 / (panel_width - 0.6),
                        hspace=0.55 / (panel_height - 0.55))
    axes = fig.subplots(nrows, ncols, squeeze=False)
    for i, (_, row) in enumerate(rows.iterrows()):
        _draw_panel(axes[i // ncols][i % ncols], history, row, interval_path, compact=True)
    for j in range(n, nrows * ncols):
        axes[j // ncols][j % ncols].set_visible(False)
    if legend:
        fig.legend(handles=legend_handles(), loc="lower center", ncols=5, frameon=False,
                   fontsize=7, bbox_to_anchor=(0.5, 0.0))
    return fig


#: zlib level of the PNGs: 3 is faster than the usual 6 and, without an alpha channel, the
#: files are still smaller than the former RGBA ones at 6 (measured on the report's panels)
PNG_COMPRESS_LEVEL = 3


def png_bytes(rgb: np.ndarray, dpi: float | None = None) -> bytes:
    """PNG bytes of an RGB pixel array (height x width x 3, uint8), no alpha channel."""
    import io

    from PIL import Image

    buf = io.BytesIO()
    kw = {"dpi": (dpi, dpi)} if dpi else {}
    Image.fromarray(np.ascontiguousarray(rgb[..., :3])).save(
        buf, format="PNG", compress_level=PNG_COMPRESS_LEVEL, **kw)
    return buf.getvalue()


def _rgb(fig: Figure, dpi: float) -> np.ndarray:
    """Draw ``fig`` once at ``dpi`` on an Agg canvas (no pyplot) and return its pixels as RGB
    (a copy: the canvas may be drawn again)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    old = fig.dpi
    fig.dpi = dpi
    try:
        canvas.draw()
        return np.array(np.asarray(canvas.buffer_rgba())[..., :3])
    finally:
        fig.dpi = old


def figure_png(fig: Figure, dpi: int = 150) -> bytes:
    """PNG bytes of a figure (no pyplot involved; RGB, no alpha channel: the figures are drawn
    on an opaque white background)."""
    return png_bytes(_rgb(fig, dpi), dpi)


@lru_cache(maxsize=4)
def legend_rgb(dpi: int = 150) -> np.ndarray:
    """Pixels of :func:`legend_figure` (the same strip for every report: drawn once per dpi;
    read-only)."""
    rgb = _rgb(legend_figure(), dpi)
    rgb.flags.writeable = False
    return rgb


@lru_cache(maxsize=4)
def legend_png(dpi: int = 150) -> bytes:
    """PNG of :func:`legend_figure` (encoded once per dpi)."""
    return png_bytes(legend_rgb(dpi), dpi)


def figure_svg(fig: Figure) -> str:
    """SVG text of a figure, with no external references."""
    import io

    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None, "Format": None,
                                             "Type": None})
    return buf.getvalue()


# --------------------------------------------------------------------------- one figure per report
#: room (inches) between the cells of a report's shared figure, across and down: text that runs
#: past a cell's edge (a long title, a wide tick label) lands there and is cut away with the
#: cell, as it is cut at the edge of a panel drawn alone. Cells start at whole multiples of a
#: quarter inch from the top left (the hatch "////" repeats every quarter inch), so the
#: population hatch meets each panel in the same phase as when it is drawn alone (cells 3.9 by
#: 2.6 inches apart had it shifted; tests/test_plots.py checks the pixels)
GRID_GUTTER = (0.6, 0.2)


def _pitch(size: float, gutter: float) -> float:
    """Cell size plus gutter, rounded up to a whole quarter inch."""
    return math.ceil((size + gutter) * 4 - 1e-9) / 4


@dataclass(frozen=True)
class PanelGrid:
    """One figure holding every panel of a report (one axes per analyte, each in a cell of the
    size of an :func:`analyte_panel` figure, with the same margins), and the pixel box
    ``(left, top, right, bottom)`` of each cell when drawn at ``dpi``."""

    figure: Figure
    boxes: tuple[tuple[int, int, int, int], ...]
    dpi: float


def panel_grid(history: pd.DataFrame, table: pd.DataFrame,
               interval_path: pd.DataFrame | None = None, *, width: float = 3.4,
               height: float = 2.3, ncols: int = 4, dpi: float = 150,
               histories: dict | None = None) -> PanelGrid:
    """Every row of ``table`` (one patient) as a panel of one shared figure, in table order.

    Each cell holds what :func:`analyte_panel` draws for the row at ``width`` x ``height``
    inches (same margins, fonts and marks); cells are at least ``GRID_GUTTER`` apart (see
    there), ``ncols`` to a row. Draw it once with
    :func:`grid_pixels` and cut each panel out by its box. ``histories``: the patient's
    :func:`analyte_histories` when already computed.
    """
    n = len(table)
    if n == 0:
        raise ValueError("panel_grid: the table has no rows")
    ncols = max(1, min(ncols, n))
    nrows = math.ceil(n / ncols)
    px, py = _pitch(width, GRID_GUTTER[0]), _pitch(height, GRID_GUTTER[1])
    W, H = ncols * px, nrows * py
    fig = Figure(figsize=(W, H), dpi=dpi, facecolor="white")
    if histories is None:
        histories = analyte_histories(history, table["patient"].iloc[0])
    empty = history.iloc[0:0]
    # each panel reads its own analyte's rows of the path (the same rows, split once)
    paths = _path_points(interval_path)
    boxes = []
    for i, (_, row) in enumerate(table.iterrows()):
        r, c = divmod(i, ncols)
        x0, top = c * px, r * py  # the cell, inches from the top left
        # the margins of analyte_panel: left 0.5, right 0.1, top 0.32, bottom 0.28 inches
        ax = fig.add_axes(((x0 + 0.5) / W, 1 - (top + height - 0.28) / H,
                           (width - 0.6) / W, (height - 0.6) / H))
        h = histories.get(row["analyte"])
        _draw_panel(ax, history, row, paths.get((row["patient"], row["analyte"])), compact=True,
                    h=h if h is not None else empty)
        _tick_artists(ax)
        boxes.append(tuple(round(v * dpi) for v in (x0, top, x0 + width, top + height)))
    return PanelGrid(fig, tuple(boxes), dpi)


def grid_pixels(grid: PanelGrid) -> tuple[np.ndarray, list[np.ndarray]]:
    """Draw the shared figure once: (all its pixels, each panel's pixels), RGB uint8."""
    rgb = _rgb(grid.figure, grid.dpi)
    return rgb, [np.ascontiguousarray(rgb[t:b, l:r]) for l, t, r, b in grid.boxes]
