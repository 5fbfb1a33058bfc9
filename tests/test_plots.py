"""Tests of bayesbase.report.figures: figures carry the marks described in the legend, use the
Okabe-Ito colour-blind-safe palette (Okabe M & Ito K, Color Universal Design, 2008), mark
P(change) with one hue from light to dark and a shape, and never touch pyplot's global state.

The inputs are real assessments of case-library cases (invented demo patients).
"""
from __future__ import annotations

import colorsys
import re
import subprocess
import sys
from functools import lru_cache

import numpy as np
import pandas as pd
import pytest
from matplotlib.colors import to_hex, to_rgb
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.path import Path as MplPath

from bayesbase.assessment import assess
from bayesbase.constants import UNCERTAIN_BAND
from bayesbase.io import read_results as load_results
from bayesbase.report import figures as plots
from bayesbase.report import personal_interval_path

from conftest import case_dirs, load_case

# the eight Okabe-Ito colours (Okabe & Ito 2008), plus greys used for neutral marks
OKABE_ITO = {"#000000", "#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00",
             "#cc79a7"}
CASES = {d.name: (d, load_case(d)) for d in case_dirs()}


@lru_cache(maxsize=None)
def case_frame(name: str) -> pd.DataFrame:
    return load_results(CASES[name][0] / "results.csv")


@lru_cache(maxsize=None)
def case_assessment(name: str, trend: bool = True):
    meta = CASES[name][1]
    return assess(case_frame(name), patient=meta["patient"], at=meta.get("at"), trend=trend)


def row_of(a, analyte: str) -> pd.Series:
    return a.table[a.table["analyte"] == analyte].iloc[0]


@lru_cache(maxsize=1)
def every_role():
    """The unwell-visit case with one earlier draw recorded as haemolysed (left out) and one
    invented later draw: ALT then has a baseline, an unwell, an excluded, the assessed and a
    later specimen. Returns the assessment, the ALT row and the personal-interval path."""
    name = "dog_unwell_visit_and_censored"
    frame = case_frame(name).copy()
    frame["haemolysis"] = frame["haemolysis"].astype(float)
    frame.loc[frame["specimen"] == "D07-2025-06-03", "haemolysis"] = 400.0
    last = frame[frame["specimen"] == "D07-2026-11-24"].copy()
    last["specimen"] = "D07-2027-01-12"
    last["collected_at"] = last["collected_at"] + pd.Timedelta(days=49)
    frame = pd.concat([frame, last], ignore_index=True)
    patient = CASES[name][1]["patient"]
    a = assess(frame, patient=patient, at="D07-2026-11-24")
    upto = frame[frame["collected_at"] <= pd.Timestamp("2026-11-24 23:59")]
    path = personal_interval_path(upto, None, patient, assess, engine="exact", trend=False)
    return a, row_of(a, "alt"), path


def _scatter_counts(ax) -> list[int]:
    """Number of points of each scatter collection (one collection per role)."""
    from matplotlib.collections import PathCollection

    return sorted(len(c.get_offsets()) for c in ax.collections
                  if type(c) is PathCollection and len(c.get_offsets()))


def _stars(ax) -> list[Line2D]:
    return [ln for ln in ax.lines if ln.get_marker() == "*"]


# --------------------------------------------------------------------------- colour and shape
def test_change_mark_follows_uncertain_band():
    lo, hi = UNCERTAIN_BAND
    ramp = plots.CHANGE_RAMP
    assert plots.change_mark(lo - 0.01) == plots.ChangeMark("low", "hollow", ramp["low"], ramp["low"])
    assert plots.change_mark(lo).shape == plots.change_mark(hi).shape == "half"
    assert plots.change_mark(hi) == plots.ChangeMark("uncertain", "half", ramp["uncertain"],
                                                     ramp["low"])
    assert plots.change_mark(hi + 0.01) == plots.ChangeMark("probable", "filled", ramp["probable"],
                                                            ramp["probable"])
    assert plots.change_mark(float("nan")).left == "#FFFFFF"
    assert plots.star_colour(hi + 0.01) == ramp["probable"]


def test_palette_is_okabe_ito():
    for name, colour in plots.PALETTE.items():
        c = colour.lower()
        grey = c[1:3] == c[3:5] == c[5:7]
        assert c in OKABE_ITO or grey, (name, colour)


#: sRGB to luminance weights (WCAG 2.1, definition of relative luminance)
_Y = np.array([0.2126, 0.7152, 0.0722])


def _linear(colour: str) -> np.ndarray:
    """Linear RGB of an sRGB colour (WCAG 2.1 / IEC 61966-2-1 transfer function)."""
    return np.array([c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4
                     for c in to_rgb(colour)])


def _luminance(colour: str) -> float:
    """Relative luminance of an sRGB colour (WCAG 2.1)."""
    return float(_Y @ _linear(colour))


def _contrast(a: str, b: str) -> float:
    """WCAG 2.1 contrast ratio (L1 + 0.05) / (L2 + 0.05)."""
    la, lb = sorted((_luminance(a), _luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


# Machado GM, Oliveira MM, Fernandes LAF. A physiologically-based model for simulation of colour
# vision deficiency. IEEE TVCG 2009;15:1291-1298: severity-1.0 matrices on linear RGB (from memory)
MACHADO = {
    "protanopia": np.array([[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
                            [-0.003882, -0.048116, 1.051998]]),
    "deuteranopia": np.array([[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                              [-0.011820, 0.042940, 0.968881]]),
}


def test_change_ramp_is_one_hue_light_to_dark():
    """One hue (the Okabe-Ito orange), never a blue/red pair; lighter for 'no change', darker for
    'probable change'; still ordered for protanopes and deuteranopes (Machado 2009)."""
    ramp = [plots.CHANGE_RAMP[b] for b in ("low", "uncertain", "probable")]
    assert plots.CHANGE_RAMP["uncertain"].lower() in OKABE_ITO
    hues = [colorsys.rgb_to_hsv(*to_rgb(c))[0] * 360 for c in ramp]
    assert max(hues) - min(hues) < 1.0, hues  # one hue
    assert 20 < hues[0] < 60  # orange: neither the blue (~200) nor the red (~0) of high/low marks
    lum = [_luminance(c) for c in ramp]
    assert lum[0] > lum[1] > lum[2]
    # each step is visibly darker; the darkest mark stands out from the white page
    # (WCAG 2.1 SC 1.4.11 asks 3:1 for graphical objects)
    assert _contrast(ramp[0], ramp[1]) > 1.5 and _contrast(ramp[1], ramp[2]) > 1.5
    assert _contrast(ramp[2], "#FFFFFF") >= 3.0
    for kind, matrix in MACHADO.items():
        sim = [float(_Y @ np.clip(matrix @ _linear(c), 0, 1)) for c in ramp]
        assert sim[0] > sim[1] > sim[2], (kind, sim)


def test_star_svg_is_the_figures_star():
    """The table's SVG star has the vertices of matplotlib's '*' marker (a regular star with
    inner radius 0.381966), y flipped for SVG, and its half fill covers the left half."""
    ref = MplPath.unit_regular_star(5, innerCircle=0.381966).vertices[:10]
    svg = plots.star_svg(0.5, standalone=True)
    polys = re.findall(r'<polygon points="([^"]+)" fill="([^"]+)"', svg)
    full = np.array([[float(v) for v in p.split(",")] for p in polys[0][0].split()])
    np.testing.assert_allclose(full, ref * [1, -1], atol=1e-3)
    left = np.array([[float(v) for v in p.split(",")] for p in polys[1][0].split()])
    assert (left[:, 0] <= 1e-9).all() and len(left) == 6
    assert polys[0][1] == plots.CHANGE_RAMP["low"] and polys[1][1] == plots.CHANGE_RAMP["uncertain"]
    assert not re.search(r"(href|src)\s*=|url\(", svg)


# --------------------------------------------------------------------------- panels
def test_panel_marks_population_personal_and_roles():
    a, row, path = every_role()
    fig = plots.analyte_panel(a.history, row, interval_path=path)
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    # population interval: two dashed lines at the limits
    dashed = [ln for ln in ax.lines if ln.get_linestyle() == "--"]
    assert sorted(ln.get_ydata()[0] for ln in dashed) == pytest.approx(
        sorted([row["pop_lower"], row["pop_upper"]]))
    # personal interval: stepped edges through every earlier interval and the assessed one
    solid = [ln for ln in ax.lines if ln.get_linestyle() == "-"]
    ys = set(np.round(np.concatenate([ln.get_ydata() for ln in solid]), 6))
    earlier = path[(path["analyte"] == "alt") & (path["collected_at"] < row["collected_at"])]
    want = set(np.round(np.r_[earlier["pi_lower"], earlier["pi_upper"],
                              row["pi_lower"], row["pi_upper"]], 6))
    assert len(earlier) >= 2 and want <= ys
    # one mark per specimen: 1 baseline, 1 unwell, 1 excluded, 1 later, and the assessed star
    roles = a.history[a.history["analyte"] == "alt"]["role"].value_counts().to_dict()
    assert roles == {"baseline": 1, "unwell": 1, "excluded": 1, "assessed": 1, "later": 1}
    assert _scatter_counts(ax) == [1, 1, 1, 1]
    (star,) = _stars(ax)
    assert star.get_ydata()[0] == pytest.approx(row["value"])
    mark = plots.change_mark(row["p_change"])
    assert mark.shape == "hollow" and to_hex(star.get_markerfacecolor()).upper() == mark.left
    assert "ALT" in ax.get_title(loc="left")


@pytest.mark.parametrize("case,analyte,shape", [
    ("dog_liver_enzymes_after_anticonvulsant", "alp", "filled"),   # P(change) 0.99
    ("dog_haemolysed_specimen", "ast", "half"),                    # P(change) 0.63
])
def test_star_fill_and_shape_follow_p_change(case, analyte, shape):
    a = case_assessment(case)
    row = row_of(a, analyte)
    (star,) = _stars(plots.analyte_panel(a.history, row).axes[0])
    mark = plots.change_mark(row["p_change"])
    assert mark.shape == shape
    assert to_hex(star.get_markerfacecolor()).upper() == mark.left
    assert to_hex(star.get_markerfacecoloralt()).upper() == mark.right
    assert star.get_fillstyle() == ("left" if shape == "half" else "full")


def _drift_row():
    for name in CASES:
        t = case_assessment(name).table
        if "trend_p_drift" in t and (t["trend_p_drift"] >= 0.9).any():
            a = case_assessment(name)
            return a, a.table[a.table["trend_p_drift"] >= 0.9].iloc[0].copy()
    pytest.fail("the case library has no drift case")


def test_trend_line_follows_the_slope():
    a, row = _drift_row()
    ax = plots.analyte_panel(a.history, row).axes[0]
    dashdot = [ln for ln in ax.lines if ln.get_linestyle() == "-."]
    assert len(dashdot) == 1
    x = dashdot[0].get_xdata()
    y = dashdot[0].get_ydata()
    years = (pd.Timestamp(x[-1]) - pd.Timestamp(x[0])) / pd.Timedelta(days=365.25)
    # geometric growth at the drift model's rate along the drawn line
    assert y[-1] / y[0] == pytest.approx((1 + row["trend_pct_per_year"] / 100) ** years, rel=1e-6)
    # the line passes through the geometric mean of the used specimens (baselines + assessed)
    h = a.history[a.history["analyte"] == row["analyte"]]
    used = h[h["role"].isin(["baseline", "assessed"])]
    gm = float(np.exp(np.log(used["value"]).mean()))
    assert y.min() < gm < y.max()


def test_no_trend_without_trend_columns_and_censor_chevron():
    a = case_assessment("dog_unwell_visit_and_censored", trend=False)
    assert "trend_pct_per_year" not in a.table
    row = row_of(a, "total_bilirubin")
    assert row["censor"] == "left"
    ax = plots.analyte_panel(a.history, row).axes[0]
    assert not [ln for ln in ax.lines if ln.get_linestyle() == "-."]
    assert any(t.get_text() == "v" for t in ax.texts)


def test_drift_line_only_when_drift_is_probable():
    a, row = _drift_row()
    row["trend_p_drift"] = 0.2
    ax = plots.analyte_panel(a.history, row).axes[0]
    assert not [ln for ln in ax.lines if ln.get_linestyle() == "-."]
    row["trend_p_drift"] = 0.97
    ax = plots.analyte_panel(a.history, row).axes[0]
    assert len([ln for ln in ax.lines if ln.get_linestyle() == "-."]) == 1


def test_small_multiples_one_visible_panel_per_row():
    a = case_assessment("dog_alp_personal_change")
    assert len(a.table) == 5
    fig = plots.small_multiples(a.history, a.table, ncols=3)
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert len(visible) == 5
    assert [ax.get_title(loc="left").split("  ")[0] for ax in visible] == list(a.table["label"])
    assert fig.legends, "shared legend expected"
    png = plots.figure_png(fig, dpi=40)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_legend_shows_the_three_stars():
    handles = plots.legend_handles()
    stars = [h for h in handles if isinstance(h, Line2D) and h.get_marker() == "*"]
    assert [h.get_fillstyle() for h in stars] == ["full", "left", "full"]
    assert [to_hex(h.get_markerfacecolor()).upper() for h in stars] == [
        plots.CHANGE_RAMP["low"], plots.CHANGE_RAMP["uncertain"], plots.CHANGE_RAMP["probable"]]
    text = " ".join(v for _, v in plots.LEGEND_TEXT)
    assert "hollow" in text and "half-filled" in text and "one orange hue" in text
    assert "sky blue" not in text and "vermillion" not in text


def test_svg_has_no_external_reference():
    a, row, path = every_role()
    svg = plots.figure_svg(plots.analyte_panel(a.history, row, path))
    assert svg.lstrip().startswith("<?xml")
    # namespace identifiers (xmlns, DOCTYPE) are not fetched; no link may point outside
    assert not re.search(r'(href|src)\s*=\s*"https?:', svg)
    assert "matplotlib.org" not in svg and "purl.org" not in svg  # metadata stripped


def test_pyplot_never_imported():
    d, meta = CASES["dog_haemolysed_specimen"]
    code = (
        "import sys\n"
        "from bayesbase.assessment import assess\n"
        "from bayesbase.io import read_results as load_results\n"
        "from bayesbase.report import figures as plots\n"
        f"a = assess(load_results({str(d / 'results.csv')!r}))\n"
        "plots.figure_png(plots.analyte_panel(a.history, a.table.iloc[0]), dpi=30)\n"
        "plots.figure_png(plots.small_multiples(a.history, a.table), dpi=30)\n"
        "print('matplotlib.pyplot' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_analyte_histories_equal_one_grouping_per_panel():
    """The per-report grouping gives each panel the frame its own grouping gives."""
    a, _, _ = every_role()
    patient = str(a.table["patient"].iloc[0])
    all_at_once = plots.analyte_histories(a.history, patient)
    assert set(all_at_once) == set(a.history["analyte"])
    for analyte, h in all_at_once.items():
        pd.testing.assert_frame_equal(h, plots._analyte_history(a.history, patient, analyte), check_exact=True)


def test_panel_pixels_do_not_depend_on_the_fixed_title_and_label_positions():
    """A panel with its title and empty axis labels placed directly draws the same pixels as
    one where matplotlib places them, including a y axis that shows an offset text."""
    import matplotlib.ticker as mticker

    a, row, path = every_role()
    fig = plots.analyte_panel(a.history, row, path)
    ax = fig.axes[0]
    assert ax._autotitlepos is False  # offset-free axis: placed directly
    direct = plots.figure_png(fig, dpi=80)
    ax._autotitlepos = True  # let matplotlib place the title and the labels itself
    ax.xaxis._autolabelpos = ax.yaxis._autolabelpos = True
    assert plots.figure_png(fig, dpi=80) == direct
    off = plots.analyte_panel(a.history, row, path)
    ax = off.axes[0]
    ax.set_ylim(1000.001, 1000.004)  # tick labels with an offset text
    ax.yaxis.set_major_locator(mticker.AutoLocator())  # the panel's ticks are fixed to its view
    ax.yaxis.set_major_formatter(mticker.ScalarFormatter())
    assert plots._y_offset_shown(ax)


def _png_pixels(png: bytes) -> np.ndarray:
    import io

    from PIL import Image

    return np.asarray(Image.open(io.BytesIO(png)).convert("RGB"))


def test_ticks_fixed_to_the_view_draw_what_matplotlibs_locators_draw():
    """A panel's ticks are fixed to those inside its view (fewer tick artists); with
    matplotlib's own date and number locators and formatters put back, the same pixels."""
    import matplotlib.dates as mdates
    import matplotlib.ticker as mticker

    a, row, path = every_role()
    for r in (row, *[r for _, r in a.table.iterrows()]):
        fig = plots.analyte_panel(a.history, r, path)
        ax = fig.axes[0]
        assert isinstance(ax.yaxis.get_major_locator(), mticker.FixedLocator)
        fixed = plots.figure_png(fig, dpi=60)
        locator = mdates.AutoDateLocator(minticks=2, maxticks=5)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
        ax.yaxis.set_major_locator(mticker.AutoLocator())
        ax.yaxis.set_major_formatter(mticker.ScalarFormatter())
        assert plots.figure_png(fig, dpi=60) == fixed, r["analyte"]


def test_shared_figure_cells_are_the_panels_drawn_alone():
    """The report draws every panel once in one shared figure and cuts each out: a cut panel
    has the size and the pixels of the same panel drawn alone, but for its texts, placed to
    the nearest pixel (at most 4 % of the pixels differ; tests/test_report_figure_grid.py
    checks the marks pixel for pixel and the texts against matplotlib's)."""
    a = case_assessment("dog_liver_enzymes_after_anticonvulsant")
    patient = str(a.table["patient"].iloc[0])
    path = personal_interval_path(case_frame("dog_liver_enzymes_after_anticonvulsant"), None,
                                  patient, assess, engine="exact", trend=False)
    grid = plots.panel_grid(a.history, a.table, path, width=3.4, height=2.3, ncols=3, dpi=60)
    assert len(a.table) == len(grid.boxes)
    whole, cells = plots.grid_pixels(grid)
    assert whole.shape[2] == 3 and whole.dtype == np.uint8  # RGB, no alpha channel
    for (_, r), cell in zip(a.table.iterrows(), cells):
        alone = _png_pixels(plots.figure_png(plots.analyte_panel(a.history, r, path, width=3.4,
                                                                 height=2.3), dpi=60))
        assert cell.shape == alone.shape == (round(2.3 * 60), round(3.4 * 60), 3)
        assert (cell != alone).any(axis=2).mean() <= 0.04, r["analyte"]
