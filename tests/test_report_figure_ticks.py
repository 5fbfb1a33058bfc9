"""The report's shared figure draws each panel's ticks itself (bayesbase.report.figures
._tick_artists: one line of marks and one text per label instead of matplotlib's tick objects).
Checked against matplotlib's own ticks (the reference: the plotting library itself), pixel for
pixel: every panel of every patient case of the case library (invented demo patients), and
axes whose x axis (ConciseDateFormatter) and y axis (ScalarFormatter) write an offset text."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure

from bayesbase.assessment import assess
from bayesbase.io import read_results
from bayesbase.report import figures
from bayesbase.report.build import personal_interval_path

from conftest import case_dirs, load_case


def _grid_pixels(a, path, own_ticks: bool, monkeypatch):
    if not own_ticks:
        monkeypatch.setattr(figures, "_tick_artists", lambda ax: None)
    grid = figures.panel_grid(a.history, a.table, path, width=3.4, height=2.3, dpi=80)
    whole, _ = figures.grid_pixels(grid)
    monkeypatch.undo()
    return whole, grid


def _patient_cases():
    for d in case_dirs():
        case = load_case(d)
        if case.get("kind", "patient") == "patient" and "interval" not in case:
            yield d, case


@pytest.mark.parametrize("case_dir", [d for d, _ in _patient_cases()], ids=lambda d: d.name)
def test_shared_figure_ticks_draw_matplotlibs_pixels(case_dir, monkeypatch):
    case = load_case(case_dir)
    frame = read_results(case_dir / "results.csv")
    pid = str(case["patient"])
    sub = frame[frame["patient"].astype(str) == pid]
    a = assess(sub, at=case.get("at"))
    path = personal_interval_path(sub, None, pid, assess, engine="exact", trend=False)
    ours, grid = _grid_pixels(a, path, True, monkeypatch)
    theirs, plain = _grid_pixels(a, path, False, monkeypatch)
    assert ours.shape == theirs.shape
    assert np.array_equal(ours, theirs)
    # the replaced axes have no tick objects of their own left to draw, and the tick labels
    # are there as texts
    ax = grid.figure.axes[0]
    assert len(ax.xaxis.get_majorticklocs()) == 0
    assert len(plain.figure.axes[0].xaxis.get_majorticklocs()) >= 2
    assert {t.get_text() for t in ax.texts} >= set(plain.figure.axes[0].xaxis.get_major_formatter().seq)


def _offset_axes(own: bool):
    """A panel-like axes over a few days (ConciseDateFormatter writes the month as an x offset)
    with values near 1000 that differ in the 4th decimal (ScalarFormatter writes an offset)."""
    fig = Figure(figsize=(3.4, 2.3), dpi=80, facecolor="white")
    ax = fig.add_axes((0.15, 0.15, 0.8, 0.7))
    t = pd.date_range("2026-03-02", periods=4, freq="2D")
    ax.scatter(t, [1000.0011, 1000.0023, 1000.0019, 1000.0035], **figures._ROLE_STYLE["baseline"])
    ax.set_xlim(t[0] - pd.Timedelta(days=1), t[-1] + pd.Timedelta(days=1))
    ax.set_ylim(1000.001, 1000.004)
    row = {"label": "Test analyte", "analyte": "ALT", "p_change": 0.3}
    figures._style_axes(ax, row, compact=True)
    x_off = ax.xaxis.get_major_formatter().get_offset()
    y_off = ax.yaxis.get_major_formatter().get_offset()
    if own:
        figures._tick_artists(ax)
    return figures._rgb(fig, 80), x_off, y_off


def test_offset_texts_placed_as_matplotlib_places_them():
    ours, x_off, y_off = _offset_axes(True)
    theirs, _, _ = _offset_axes(False)
    assert x_off and y_off  # both axes write an offset text here
    assert np.array_equal(ours, theirs)
