"""Every use of the report (:mod:`bayesbase.report`) by the desk, in one place.

The patient page shows the report's sections built by the report's own functions (rows,
common notes, panel summary, retest advice, specimen roles, header, provenance), without its
figures, so the page is fast; each figure is drawn by the report's figure function when the
browser asks for its image. The downloads are the report itself (:func:`full_content` ->
``report.html.render`` / ``report.pdf.render``).
"""
from __future__ import annotations

import tempfile
import threading
from dataclasses import dataclass
from datetime import datetime, timezone
from functools import lru_cache
from pathlib import Path

__all__ = ["Sections", "sections", "pack_for", "assessed_specimen", "star", "interval_path", "figure_png", "legend_png", "full_content",
           "report_html", "report_pdf", "report_css_text", "FIGURE_DPI"]

#: resolution of the figures on the page (the downloads keep the report's own)
FIGURE_DPI = 110
#: matplotlib is not documented as thread-safe: one figure is drawn at a time
_DRAW = threading.Lock()


@dataclass(frozen=True)
class Sections:
    """The report's sections for one patient, as the page lays them out."""

    title: str
    header: tuple
    specimens: tuple
    summary: object
    headings: tuple
    rows: tuple
    notes: tuple[str, ...]  # each row's own notes (those every row carries are in common_line)
    common_line: str | None
    table_key: str
    advice: tuple
    no_advice: str | None
    figures: tuple[tuple[str, str, str], ...]  # (analyte, label, alt text)
    legend: tuple
    provenance: tuple
    section_titles: dict
    role_words: dict


def sections(assessment, pack, patient: str) -> Sections:
    """The page's sections of one patient's assessment (everything but the figure images)."""
    from ..report import content as rc
    from ..report import wording as w

    patient, table, history = rc.one_patient(assessment, patient)
    attrs = assessment.attrs
    rows = rc.report_rows(table)
    common = rc.common_notes(rows)
    holder = _CommonNotes(common)
    advice = rc.retest_advice(table, pack)
    return Sections(
        title=w.title(patient),
        header=rc.patient_header(history, table.iloc[0]),
        specimens=rc.specimen_lines(history),
        summary=rc.panel_summary(table, ci_prob=float(attrs["ci_prob"])),
        headings=w.result_headings(float(table["coverage"].iloc[0])),
        rows=rows,
        notes=tuple(rc.ReportContent.own_notes(holder, r) for r in rows),
        common_line=w.common_notes_line(common) if common else None,
        table_key=w.table_key(),
        advice=advice,
        no_advice=None if advice else w.NO_ADVICE,
        figures=tuple((r.analyte, r.label, w.figure_alt(r.label)) for r in rows),
        legend=tuple(w.LEGEND_TEXT),
        provenance=rc.provenance_lines(attrs, pack, datetime.now(timezone.utc)),
        section_titles=dict(summary=w.SECTION_SUMMARY, results=w.SECTION_RESULTS,
                            next=w.SECTION_NEXT, figures=w.SECTION_FIGURES,
                            method=w.SECTION_METHOD),
        role_words=dict(w.ROLE_WORDS),
    )


def pack_for(assessment, patient: str):
    """The prior pack the assessment used for this patient."""
    from ..report import content as rc

    return rc.pack_of(assessment, rc.one_patient(assessment, patient)[1])


def assessed_specimen(assessment, patient: str) -> str:
    """The specimen the assessment judged for this patient."""
    from ..report import content as rc

    return str(rc.one_patient(assessment, patient)[1]["specimen"].iloc[0])


def star(row):
    """The report's P(change) star of a table row as inline SVG markup (built from a number and
    fixed colours only, as in the report)."""
    from markupsafe import Markup

    from ..report import figures

    return "" if row.p_change is None else Markup(figures.star_svg(row.p_change))


@dataclass(frozen=True)
class _CommonNotes:
    """Stands in for a ReportContent where only its common notes are read (own_notes)."""

    common_notes: tuple[str, ...]


def interval_path(frame, pack, patient: str, **assess_kw):
    """The personal interval as it stood at each specimen, as ``report_for_file`` computes it
    (exact engine, no drift model, the page's other settings)."""
    from ..assessment import assess
    from ..report import personal_interval_path

    kw = {k: v for k, v in assess_kw.items() if k not in ("seed", "engine", "at")}
    return personal_interval_path(frame, pack, str(patient), assess,
                                  **{**kw, "engine": "exact", "trend": False})


def figure_png(assessment, patient: str, analyte: str, path) -> bytes | None:
    """One analyte's figure as PNG (None when the patient has no row for it)."""
    from ..report import content as rc
    from ..report import figures

    _, table, history = rc.one_patient(assessment, patient)
    match = table[table["analyte"].astype(str) == str(analyte)]
    if match.empty:
        return None
    with _DRAW:
        fig = figures.analyte_panel(history, match.iloc[0], path, width=rc.FIG_WIDTH,
                                    height=rc.FIG_HEIGHT)
        return figures.figure_png(fig, dpi=FIGURE_DPI)


@lru_cache(maxsize=1)
def legend_png() -> bytes:
    """The strip with the legend of the figures' visual language."""
    from ..report import figures

    with _DRAW:
        return figures.figure_png(figures.legend_figure(), dpi=FIGURE_DPI)


def full_content(assessment, pack, patient: str, path):
    """The report's whole content model (figures included) for the downloads."""
    from ..report import build_content

    with _DRAW:
        return build_content(assessment, pack, patient=patient, interval_path=path)


def report_html(content) -> str:
    from ..report import html

    return html.render(content)


def report_pdf(content) -> bytes:
    from ..report import pdf

    with tempfile.TemporaryDirectory(prefix="bayesbase-pdf-") as d:
        out = Path(d) / "report.pdf"
        pdf.render(content, out)
        return out.read_bytes()


@lru_cache(maxsize=1)
def report_css_text() -> str:
    """The report's own style sheet (``report/templates/report.css``, filled with the figures'
    colour-blind-safe palette), so the desk keeps the report's visual language."""
    from ..report import figures
    from ..report.templating import jinja_environment

    env = jinja_environment("bayesbase.report", autoescape=False)
    # the values are fixed colours of the figures module, never data
    return env.get_template("report.css").render(ramp=figures.CHANGE_RAMP,
                                                 palette=figures.PALETTE)
