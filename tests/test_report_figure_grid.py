"""The report's shared figure (bayesbase.report.figures.panel_grid) draws every panel without a
matplotlib Axes: one artist per kind of mark for all panels, ticks from the axes' own locators
and formatters, texts as stamps. The reference is the plotting library itself: each cell is
checked pixel by pixel against the same panel drawn by matplotlib on an Axes
(figures.analyte_panel), for every panel of every patient case of the case library (invented
demo patients) and for a panel whose axes write offset texts. Texts are checked twice: drawn
by matplotlib's Text at the grid's anchors the cells equal the Axes panels; drawn as stamps
they differ only inside the texts' boxes, by at most a sub-pixel shift."""
from __future__ import annotations

import io
from functools import lru_cache

import numpy as np
import pandas as pd
import pytest
from matplotlib.text import Text
from matplotlib.transforms import IdentityTransform
from PIL import Image

from bayesbase.assessment import assess
from bayesbase.io import read_results
from bayesbase.report import figures
from bayesbase.report.build import personal_interval_path

from conftest import case_dirs, load_case

DPI = 80
W, H = 3.4, 2.3


def _exact_text_draw(self, renderer):
    """Reference for figures._Stamps.draw: every text drawn by matplotlib's own Text at its
    anchor (no stamp, no rounding)."""
    for text, size, weight, colour, x, y, ha, va in self._items:
        t = Text(x, y, text, fontsize=size, fontweight=weight, color=colour, ha=ha, va=va)
        t.set_figure(self.get_figure(root=True))
        t.set_transform(IdentityTransform())
        t.draw(renderer)


def _alone(history, row, path):
    """The panel drawn alone on a matplotlib Axes: its pixels and its axes."""
    fig = figures.analyte_panel(history, row, path, width=W, height=H)
    png = figures.figure_png(fig, dpi=DPI)
    return np.asarray(Image.open(io.BytesIO(png)).convert("RGB")), fig.axes[0]


def _assert_axes_ticks(ax) -> None:
    """The grid's ticks, labels and offset texts for this view are the ones the axes has (its
    locators and formatters, fixed to the view by figures._ticks_in_view)."""
    xlo, xhi = ax.get_xlim()
    ylo, yhi = ax.get_ylim()
    space = int(np.floor((H - 0.6) * 72 / (2 * figures._TICK_LABEL_SIZE)))
    for (locs, labels, offset), axis in ((figures._date_ticks(xlo, xhi), ax.xaxis),
                                         (figures._value_ticks(ylo, yhi, space), ax.yaxis)):
        assert np.allclose(locs, axis.get_majorticklocs(), rtol=0, atol=1e-9)
        assert list(labels) == list(axis.get_major_formatter().seq)
        assert offset == axis.get_major_formatter().get_offset()


def _grid(history, table, path, exact: bool, monkeypatch, **kw):
    if exact:
        monkeypatch.setattr(figures._Stamps, "draw", _exact_text_draw)
    grid = figures.panel_grid(history, table, path, width=W, height=H, dpi=DPI, **kw)
    whole, cells = figures.grid_pixels(grid)
    monkeypatch.undo()
    return grid, whole, cells


def _text_mask(grid, shape, grow: int = 2) -> np.ndarray:
    """Pixels (top-down, whole figure) within ``grow`` pixels of any text's layout box."""
    (stamps,) = [a for a in grid.figure.artists if isinstance(a, figures._Stamps)]
    mask = np.zeros(shape[:2], dtype=bool)
    for text, size, weight, _, x, y, ha, va in stamps._items:
        lay = figures._layout(text, size, ha, va, grid.dpi, weight)
        if lay is None:
            continue
        x0, x1 = int(np.floor(x + lay[0])) - grow, int(np.ceil(x + lay[2])) + grow
        top, bottom = shape[0] - (y + lay[3]), shape[0] - (y + lay[1])
        mask[max(int(np.floor(top)) - grow, 0):max(int(np.ceil(bottom)) + grow, 0),
             max(x0, 0):max(x1, 0)] = True
    return mask


def _patient_cases():
    for d in case_dirs():
        case = load_case(d)
        if case.get("kind", "patient") == "patient" and "interval" not in case:
            yield d


@lru_cache(maxsize=None)
def _case(case_dir):
    case = load_case(case_dir)
    frame = read_results(case_dir / "results.csv")
    pid = str(case["patient"])
    sub = frame[frame["patient"].astype(str) == pid]
    a = assess(sub, at=case.get("at"))
    path = personal_interval_path(sub, None, pid, assess, engine="exact", trend=False)
    return a, path


@pytest.mark.parametrize("case_dir", list(_patient_cases()), ids=lambda d: d.name)
def test_cells_are_the_panels_drawn_on_axes(case_dir, monkeypatch):
    """The grid's ticks are the axes' ticks. With matplotlib's Text at the grid's anchors, each
    cell has the size and pixels of the panel drawn alone on an Axes (a mark may land one
    pixel apart where a position rounds the other way: at most 0.1 % of a cell's pixels
    differ). Then with stamps: every differing pixel lies in a text's box, and each cell
    differs from the exact one in under 4 %."""
    a, path = _case(case_dir)
    _, _, exact = _grid(a.history, a.table, path, True, monkeypatch)
    grid, whole, stamped = _grid(a.history, a.table, path, False, monkeypatch)
    assert len(exact) == len(a.table) == len(grid.boxes)
    texts = _text_mask(grid, whole.shape)
    for (_, row), ref_cell, cell, (l, t, r, b) in zip(a.table.iterrows(), exact, stamped,
                                                     grid.boxes):
        alone, ax = _alone(a.history, row, path)
        _assert_axes_ticks(ax)
        assert ref_cell.shape == alone.shape == (round(H * DPI), round(W * DPI), 3)
        assert (ref_cell != alone).any(axis=2).mean() <= 0.001, row["analyte"]
        differ = (cell != ref_cell).any(axis=2)
        assert not (differ & ~texts[t:b, l:r]).any(), row["analyte"]
        assert differ.mean() < 0.04, row["analyte"]


def test_stamped_text_is_matplotlibs_text_moved_under_a_pixel(monkeypatch):
    """Each stamp has the ink of matplotlib's own drawing of the text (same total within 2 %)
    and its ink's centre lies within 0.75 pixel of where matplotlib draws it."""
    a, path = _case(next(iter(_patient_cases())))
    _, ref, _ = _grid(a.history, a.table, path, True, monkeypatch)
    grid, ours, _ = _grid(a.history, a.table, path, False, monkeypatch)
    (stamps,) = [x for x in grid.figure.artists if isinstance(x, figures._Stamps)]
    checked = 0
    for text, size, weight, _, x, y, ha, va in stamps._items:
        lay = figures._layout(text, size, ha, va, grid.dpi, weight)
        x0, x1 = int(x + lay[0]) - 2, int(x + lay[2]) + 3
        top, bottom = int(ours.shape[0] - (y + lay[3])) - 2, int(ours.shape[0] - (y + lay[1])) + 3
        if x0 < 0 or top < 0 or x1 > ours.shape[1] or bottom > ours.shape[0]:
            continue
        inks = []
        for img in (ref, ours):
            ink = 255.0 - img[top:bottom, x0:x1].astype(float).min(axis=2)
            yy, xx = np.mgrid[top:bottom, x0:x1]
            inks.append((ink.sum(), (ink * xx).sum() / ink.sum(), (ink * yy).sum() / ink.sum()))
        (s0, cx0, cy0), (s1, cx1, cy1) = inks
        if s0 < 1000:  # nothing drawn at this place (a text cut away with its cell)
            continue
        assert s1 == pytest.approx(s0, rel=0.02), text
        assert abs(cx1 - cx0) <= 0.75 and abs(cy1 - cy0) <= 0.75, text
        checked += 1
    assert checked >= 3 * len(a.table)  # at least the title, P(change) and tick labels


def _offset_case():
    """An invented panel over a few days (the date axis writes the month as an offset text)
    with values near 1000 that differ in the 4th decimal (the value axis writes an offset)."""
    t = pd.date_range("2026-03-02", periods=4, freq="2D")
    vals = [1000.0011, 1000.0023, 1000.0019, 1000.0035]
    history = pd.DataFrame({
        "patient": "P1", "analyte": "alt", "specimen": [f"S{i}" for i in range(4)],
        "collected_at": t, "role": ["baseline", "baseline", "unwell", "assessed"],
        "value": vals, "censor": ["", "right", "", ""]})
    table = pd.DataFrame([{
        "patient": "P1", "analyte": "alt", "label": "Test analyte", "collected_at": t[-1],
        "value": vals[-1], "censor": "", "p_change": 0.3, "pop_lower": 1000.0012,
        "pop_upper": 1000.0032, "pi_lower": 1000.0015, "pi_upper": 1000.0030}])
    return history, table


def test_offset_texts_and_title_placed_as_on_axes(monkeypatch):
    history, table = _offset_case()
    fig = figures.analyte_panel(history, table.iloc[0], width=W, height=H)
    ax = fig.axes[0]
    assert ax.xaxis.get_major_formatter().get_offset()  # both axes write an offset text
    assert ax.yaxis.get_major_formatter().get_offset()
    grid, _, cells = _grid(history, table, None, True, monkeypatch)
    alone, _ = _alone(history, table.iloc[0], None)
    assert (cells[0] != alone).any(axis=2).mean() <= 0.001
    (stamps,) = [x for x in grid.figure.artists if isinstance(x, figures._Stamps)]
    texts = {item[0] for item in stamps._items}
    assert {ax.xaxis.get_major_formatter().get_offset(),
            ax.yaxis.get_major_formatter().get_offset(), "^"} <= texts


def test_drawn_twice_the_same_pixels(monkeypatch):
    a, path = _case(next(iter(_patient_cases())))
    _, one, _ = _grid(a.history, a.table, path, False, monkeypatch)
    figures._stamp.cache_clear()  # stamps drawn afresh give the same pixels
    figures._ink.cache_clear()
    _, two, _ = _grid(a.history, a.table, path, False, monkeypatch)
    assert np.array_equal(one, two)


@pytest.mark.parametrize("shape", [(345, 510, 3), (1, 1, 3), (7, 3, 3)])
def test_png_bytes_decode_to_the_pixels(shape):
    """The PNG writer against Pillow's decoder (the reference): the same RGB pixels, and the
    pixel density Pillow itself would write for the dpi."""
    rgb = np.random.default_rng(7).integers(0, 256, shape, dtype=np.uint8)
    png = figures.png_bytes(rgb, 150)
    im = Image.open(io.BytesIO(png))
    im.load()
    assert im.mode == "RGB" and np.array_equal(np.asarray(im), rgb)
    ref = io.BytesIO()
    Image.fromarray(rgb).save(ref, format="PNG", dpi=(150, 150))
    assert im.info["dpi"] == Image.open(io.BytesIO(ref.getvalue())).info["dpi"]


def test_changed_font_settings_are_not_served_from_kept_stamps(monkeypatch):
    """Stamps and ticks kept from one report are not reused once matplotlib's text settings
    change: under new settings the grid equals one drawn with nothing kept, and its marks and
    ticks equal the panel drawn on axes under those settings."""
    import matplotlib as mpl

    history, table = _offset_case()
    figures.panel_grid(history, table, None, width=W, height=H, dpi=DPI)  # stamps kept
    with mpl.rc_context({"font.family": "serif", "axes.formatter.useoffset": False}):
        _, after, _ = _grid(history, table, None, False, monkeypatch)
        for cached in (figures._date_ticks, figures._value_ticks, figures._ink,
                       figures._stamp, figures._layout):
            cached.cache_clear()
        _, fresh, _ = _grid(history, table, None, False, monkeypatch)
        assert np.array_equal(after, fresh)
        _, _, cells = _grid(history, table, None, True, monkeypatch)
        alone, ax = _alone(history, table.iloc[0], None)
        assert not ax.yaxis.get_major_formatter().get_offset()
        assert (cells[0] != alone).any(axis=2).mean() <= 0.001


@pytest.mark.parametrize("side", ["left", "right"])
def test_censored_result_without_history_chevron_above_star(side, monkeypatch):
    """An analyte with no earlier result whose assessed value is censored (``<x`` / ``>x``): the
    chevron is drawn above the star in both figures (reference: the panel on matplotlib's own
    Axes, texts drawn by matplotlib's Text), pixel for pixel."""
    t = pd.Timestamp("2026-05-04")
    history = pd.DataFrame({"patient": pd.Series(dtype=object), "analyte": pd.Series(dtype=object),
                            "specimen": pd.Series(dtype=object),
                            "collected_at": pd.Series(dtype="datetime64[ns]"),
                            "role": pd.Series(dtype=object), "value": pd.Series(dtype=float),
                            "censor": pd.Series(dtype=object)})
    table = pd.DataFrame([{
        "patient": "P1", "analyte": "alt", "label": "Test analyte", "collected_at": t,
        "value": 30.0, "censor": side, "p_change": 0.9, "pop_lower": 20.0, "pop_upper": 90.0,
        "pi_lower": float("nan"), "pi_upper": float("nan")}])
    alone, ax = _alone(history, table.iloc[0], None)
    (note,) = [c for c in ax.get_children() if type(c).__name__ == "Annotation"]
    (star,) = [ln for ln in ax.get_lines() if ln.get_zorder() == 7]
    assert note.get_zorder() > star.get_zorder()
    _, _, cells = _grid(history, table, None, True, monkeypatch)
    assert (cells[0] != alone).any(axis=2).mean() <= 0.001
