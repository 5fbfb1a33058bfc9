"""Tests of bayesbase.plots: figures carry the marks described in the legend, use the
Okabe-Ito colour-blind-safe palette (Okabe M & Ito K, Color Universal Design, 2008), and never
touch pyplot's global state.

The input rows are invented demo data shaped like Assessment.table / Assessment.history
(DEVELOPERS.md).
"""
from __future__ import annotations

import re
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from matplotlib.colors import to_hex
from matplotlib.figure import Figure

from bayesbase.report import figures as plots
from bayesbase.constants import UNCERTAIN_BAND

# the eight Okabe-Ito colours (Okabe & Ito 2008), plus greys used for neutral marks
OKABE_ITO = {"#000000", "#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00",
             "#cc79a7"}

ROLES = ["baseline", "unwell", "baseline", "excluded", "baseline", "assessed", "later"]


def demo(p_change=0.93, trend=False, censor_last=False):
    t0 = pd.Timestamp("2023-02-01")
    times = [t0 + pd.Timedelta(days=90 * i) for i in range(len(ROLES))]
    vals = [80.0, 95.0, 84.0, 130.0, 82.0, 118.0, 90.0]  # invented
    hist = pd.DataFrame({
        "patient": "D1", "analyte": "creatinine", "specimen": [f"S{i}" for i in range(len(ROLES))],
        "collected_at": times, "value": vals, "censor": "", "role": ROLES,
    })
    if censor_last:
        hist.loc[5, "censor"] = "left"
    row = pd.Series({
        "patient": "D1", "analyte": "creatinine", "label": "Creatinine", "unit": "umol/L",
        "specimen": "S5", "collected_at": times[5], "value": 118.0, "censor": "",
        "pop_lower": 60.0, "pop_upper": 115.0, "pi_lower": 70.0, "pi_upper": 96.0,
        "p_change": p_change,
        "trend_pct_per_year": 9.0 if trend else np.nan, "trend_pct_lower": 4.0 if trend else np.nan,
        "trend_pct_upper": 14.0 if trend else np.nan,
    })
    path = pd.DataFrame({
        "patient": "D1", "analyte": "creatinine", "specimen": ["S1", "S2", "S3", "S4"],
        "collected_at": times[1:5], "pi_lower": [50.0, 62.0, 66.0, 69.0],
        "pi_upper": [120.0, 104.0, 100.0, 97.0],
    })
    return hist, row, path


def _scatter_by_marker(ax):
    """Map each scatter collection to its number of points and face colours."""
    from matplotlib.collections import PathCollection

    out = []
    for c in ax.collections:
        offs = c.get_offsets()
        if type(c) is PathCollection and len(offs):
            out.append((len(offs), [to_hex(f) for f in c.get_facecolors()],
                        [to_hex(f) for f in c.get_edgecolors()]))
    return out


def test_star_colour_follows_uncertain_band():
    lo, hi = UNCERTAIN_BAND
    assert plots.star_colour(lo - 0.01) == plots.PALETTE["low"]
    assert plots.star_colour(lo) == plots.PALETTE["uncertain"]
    assert plots.star_colour(hi) == plots.PALETTE["uncertain"]
    assert plots.star_colour(hi + 0.01) == plots.PALETTE["probable"]
    assert plots.star_colour(float("nan")) == "#FFFFFF"


def test_palette_is_okabe_ito():
    for name, colour in plots.PALETTE.items():
        c = colour.lower()
        grey = c[1:3] == c[3:5] == c[5:7]
        assert c in OKABE_ITO or grey, (name, colour)


def test_panel_marks_population_personal_and_roles():
    hist, row, path = demo()
    fig = plots.analyte_panel(hist, row, interval_path=path)
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    # population interval: two dashed lines at the limits
    dashed = [l for l in ax.lines if l.get_linestyle() == "--"]
    assert sorted(l.get_ydata()[0] for l in dashed) == [60.0, 115.0]
    # personal interval: stepped edges through every path value and the assessed interval
    solid = [l for l in ax.lines if l.get_linestyle() == "-"]
    ys = set(np.round(np.concatenate([l.get_ydata() for l in solid]), 6))
    assert {50.0, 62.0, 66.0, 69.0, 70.0, 120.0, 104.0, 100.0, 97.0, 96.0} <= ys
    # one mark per specimen: 3 baselines, 1 unwell, 1 excluded, 1 later, 1 assessed star
    counts = sorted(n for n, _, _ in _scatter_by_marker(ax))
    assert counts == [1, 1, 1, 1, 3]
    star = [fc for n, fc, _ in _scatter_by_marker(ax) if fc == [plots.PALETTE["probable"].lower()]]
    assert star, "assessed star should be vermillion for P(change) 0.93"
    assert "Creatinine" in ax.get_title(loc="left")


def test_trend_line_follows_the_slope():
    hist, row, _ = demo(trend=True)
    ax = plots.analyte_panel(hist, row).axes[0]
    dashdot = [l for l in ax.lines if l.get_linestyle() == "-."]
    assert len(dashdot) == 1
    x = dashdot[0].get_xdata()
    y = dashdot[0].get_ydata()
    years = (pd.Timestamp(x[-1]) - pd.Timestamp(x[0])) / pd.Timedelta(days=365.25)
    # geometric growth of 9 %/year along the drawn line
    assert y[-1] / y[0] == pytest.approx(1.09 ** years, rel=1e-6)
    # the line passes through the geometric mean of the used specimens (baselines + assessed)
    used = hist[hist["role"].isin(["baseline", "assessed"])]
    gm = float(np.exp(np.log(used["value"]).mean()))
    assert y.min() < gm < y.max()


def test_no_trend_without_trend_columns_and_censor_chevron():
    hist, row, _ = demo(censor_last=True)
    ax = plots.analyte_panel(hist, row).axes[0]
    assert not [l for l in ax.lines if l.get_linestyle() == "-."]
    assert any(t.get_text() == "v" for t in ax.texts)


def test_small_multiples_one_visible_panel_per_row():
    hist, row, path = demo()
    rows = []
    hists = []
    for a in ("creatinine", "urea", "alt", "ast", "alp"):
        r = row.copy()
        r["analyte"], r["label"] = a, a.upper()
        rows.append(r)
        hists.append(hist.assign(analyte=a))
    table = pd.DataFrame(rows)
    fig = plots.small_multiples(pd.concat(hists), table, path, ncols=3)
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert len(visible) == 5
    assert [ax.get_title(loc="left").split()[0] for ax in visible] == ["CREATININE", "UREA",
                                                                        "ALT", "AST", "ALP"]
    assert fig.legends, "shared legend expected"
    png = plots.figure_png(fig, dpi=40)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_svg_has_no_external_reference():
    hist, row, path = demo()
    svg = plots.figure_svg(plots.analyte_panel(hist, row, path))
    assert svg.lstrip().startswith("<?xml")
    # namespace identifiers (xmlns, DOCTYPE) are not fetched; no link may point outside
    assert not re.search(r'(href|src)\s*=\s*"https?:', svg)
    assert "matplotlib.org" not in svg and "purl.org" not in svg  # metadata stripped


def test_pyplot_never_imported():
    code = ("import sys; sys.path.insert(0, %r); from test_plots import demo; "
            "from bayesbase.report import figures as plots; h, r, p = demo(); "
            "plots.figure_png(plots.analyte_panel(h, r, p), dpi=30); "
            "print('matplotlib.pyplot' in sys.modules)") % str(__import__("pathlib").Path(__file__).parent)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_drift_line_only_when_drift_is_probable():
    hist, row, _ = demo(trend=True)
    row["trend_p_drift"] = 0.2
    ax = plots.analyte_panel(hist, row).axes[0]
    assert not [l for l in ax.lines if l.get_linestyle() == "-."]
    row["trend_p_drift"] = 0.97
    ax = plots.analyte_panel(hist, row).axes[0]
    assert len([l for l in ax.lines if l.get_linestyle() == "-."]) == 1
