"""The PDF's quick line breaking (bayesbase.report.pdftext) gives exactly the lines of fpdf2's own
``MultiLineBreak`` (the reference: the general-purpose PDF library the report is written with).
Texts are random strings of the characters the report writes (letters, digits, spaces, no-break
spaces, newlines, signs such as minus and plus-minus), plus long words that must be cut, leading
spaces and lines too narrow for one character."""
from __future__ import annotations

import numpy as np
import pytest

fpdf = pytest.importorskip("fpdf")

from fpdf.errors import FPDFException  # noqa: E402
from fpdf.line_break import MultiLineBreak  # noqa: E402

from bayesbase.report import pdf as report_pdf  # noqa: E402
from bayesbase.report import pdftext  # noqa: E402

SEED = 20261203
ALPHABET = list("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789.,;:()%/-+<>")
ALPHABET += [" "] * 12 + ["\u00a0"] * 3 + ["\n"] + ["\u2212", "\u00b1", "\u00b7", "\u2022", "\u2265"]


def _doc():
    doc = report_pdf._document("test")
    doc.add_page()
    return doc


def _lines(cls, fragments, width, margins, align):
    brk = cls(fragments, width, margins, align=align)
    out = []
    try:
        line = brk.get_line()
        while line is not None:
            out.append(line)
            line = brk.get_line()
    except FPDFException as e:
        out.append(("raised", str(e)))
    return out


def _random_texts(rng, n):
    for _ in range(n):
        k = int(rng.integers(0, 160))
        text = "".join(rng.choice(ALPHABET, size=k))
        if rng.random() < 0.2:
            text = "   " + text  # leading spaces (the summary's bullets)
        if rng.random() < 0.15:
            text += " " + "x" * int(rng.integers(20, 80))  # a word longer than a line
        yield text


@pytest.mark.skipif(report_pdf._font_paths() is None, reason="DejaVu fonts of matplotlib missing")
def test_quick_lines_equal_fpdf2_lines():
    doc = _doc()
    quick = pdftext._quick_class()
    rng = np.random.default_rng(SEED)
    checked = quick_used = 0
    for style, size in (("", 7.0), ("B", 8.5), ("", 11.0)):
        doc.set_font(doc.font_name, style, size)
        for text in _random_texts(rng, 150):
            fragments = doc._preload_font_styles(text, False)
            width = float(rng.choice([3.0, 12.0, 25.0, 40.0, 120.0, 277.0]))
            margins = [(doc.c_margin, doc.c_margin), (), (0.8,)][int(rng.integers(0, 3))]
            align = ["L", "C", "J"][int(rng.integers(0, 3))]
            from fpdf.enums import Align

            expected = _lines(MultiLineBreak, fragments, width, margins, Align.coerce(align))
            got_brk = quick(fragments, width, margins, align=Align.coerce(align))
            quick_used += bool(got_brk._plain())
            got = _lines(quick, fragments, width, margins, Align.coerce(align))
            assert got == expected, (text, width, margins, align)
            checked += 1
    assert checked == 450
    # the quick path (not fpdf2's own method) answered nearly every text
    assert quick_used >= 0.9 * checked


def test_quick_line_breaking_restores_fpdf2():
    import fpdf.fpdf as fpdf_module

    before = fpdf_module.MultiLineBreak
    with pdftext.quick_line_breaking():
        assert fpdf_module.MultiLineBreak is pdftext._quick_class()
        with pdftext.quick_line_breaking():
            assert fpdf_module.MultiLineBreak is pdftext._quick_class()
        assert fpdf_module.MultiLineBreak is pdftext._quick_class()
    assert fpdf_module.MultiLineBreak is before
