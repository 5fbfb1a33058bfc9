"""The PDF's shortcuts give fpdf2's own output (the reference: the general-purpose PDF library the
report is written with, subsetting fonts with fontTools), byte for byte:

- embedded fonts made once per process (bayesbase.report.pdf._cached_subsetting): the same
  documents written with and without the cache give the same PDF bytes, for several glyph sets
  in turn (a cached subset is reused only for the same font and the same glyphs);
- each SVG (the P(change) stars of the results table) parsed once per document
  (bayesbase.report.pdf._svg_parsed_once): a whole report of a case-library case (invented demo
  patient) written with and without both shortcuts gives the same PDF bytes."""
from __future__ import annotations

import contextlib
from datetime import datetime, timezone

import pytest

fpdf = pytest.importorskip("fpdf")

from bayesbase.report import pdf as report_pdf  # noqa: E402

pytestmark = pytest.mark.skipif(report_pdf._font_paths() is None,
                                reason="DejaVu fonts of matplotlib missing")

TEXTS = {
    "a": "Creatinine 112 \u00b5mol/L \u2212 P(change) 94 % \u2265 set point",
    "b": "ALT 48 U/L \u00b1 3.1 \u00b7 no change \u2022 interval 20\u201360",
    "c": "Glucose 5.6 mmol/L; hollow star < uncertain band",
}


def _pdf(text: str, cached: bool) -> bytes:
    doc = report_pdf._document("fonts")
    doc.set_creation_date(datetime(2026, 1, 2, 3, 4, 5, tzinfo=timezone.utc))
    doc.add_page()
    doc.set_font(doc.font_name, "", 9)
    doc.multi_cell(0, 5, text, new_x="LMARGIN", new_y="NEXT")
    doc.set_font(doc.font_name, "B", 9)
    doc.multi_cell(0, 5, text[::-1], new_x="LMARGIN", new_y="NEXT")
    block = report_pdf._cached_subsetting(doc) if cached else contextlib.nullcontext()
    with block:
        return bytes(doc.output())


def test_cached_subsets_equal_fpdf2_fonts(monkeypatch):
    monkeypatch.setattr(report_pdf, "_SUBSETS", {})
    reference = {k: _pdf(t, cached=False) for k, t in TEXTS.items()}
    for k in ("a", "b", "a", "c", "b"):  # misses, then hits for a glyph set seen before
        assert _pdf(TEXTS[k], cached=True) == reference[k], k
    # two fonts (regular, bold) per glyph set, each subset once
    assert len(report_pdf._SUBSETS) == 2 * len(TEXTS)
    # the documents differ in glyphs, so the cache told them apart
    assert len(set(reference.values())) == len(TEXTS)


def test_cache_hit_does_not_subset_again(monkeypatch):
    from fontTools import subset as ftsubset

    monkeypatch.setattr(report_pdf, "_SUBSETS", {})
    calls = []
    real = ftsubset.Subsetter.subset
    monkeypatch.setattr(ftsubset.Subsetter, "subset",
                        lambda self, font: calls.append(1) or real(self, font))
    first = _pdf(TEXTS["a"], cached=True)
    assert len(calls) == 2  # regular and bold
    assert _pdf(TEXTS["a"], cached=True) == first
    assert len(calls) == 2
    # fpdf2's output module is left as it was
    from fpdf import output

    assert output.ftsubset is ftsubset


def test_report_pdf_equals_fpdf2_without_shortcuts(tmp_path, monkeypatch):
    from bayesbase.assessment import assess
    from bayesbase.io import read_results
    from bayesbase.report.content import build_content

    from conftest import case_dirs, load_case

    d = next(d for d in case_dirs() if d.name == "dog_liver_enzymes_after_anticonvulsant")
    meta = load_case(d)
    a = assess(read_results(d / "results.csv"), patient=meta["patient"], at=meta.get("at"))
    content = build_content(a, dpi=40, now=datetime(2026, 1, 2, 3, 4, tzinfo=timezone.utc))
    assert any(r.p_change is not None for r in content.rows)  # stars are placed
    document = report_pdf._document

    def fixed_date(title):
        doc = document(title)
        doc.set_creation_date(datetime(2026, 1, 2, 3, 4, 5, tzinfo=timezone.utc))
        return doc

    monkeypatch.setattr(report_pdf, "_document", fixed_date)
    report_pdf.render(content, tmp_path / "quick.pdf")
    from fpdf import image_parsing

    assert image_parsing.get_svg_info.__name__ == "get_svg_info"  # put back after the report
    monkeypatch.setattr(report_pdf, "_svg_parsed_once", lambda doc: contextlib.nullcontext())
    monkeypatch.setattr(report_pdf, "_cached_subsetting", lambda doc: contextlib.nullcontext())
    report_pdf.render(content, tmp_path / "plain.pdf")
    assert (tmp_path / "quick.pdf").read_bytes() == (tmp_path / "plain.pdf").read_bytes()
