"""Writing one patient's report: content model -> HTML, PDF and figure files."""
from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..contract import is_canonical
from ..errors import BayesbaseError
from . import figures
from . import html as html_out
from . import pdf as pdf_out
from .content import ReportContent, build_content, one_patient

__all__ = ["ReportFiles", "build_report", "report_for_file", "personal_interval_path"]

_PATH_COLUMNS = ["patient", "analyte", "specimen", "collected_at", "pi_lower", "pi_upper"]
#: columns an assessment adds to the canonical history
_ASSESSMENT_COLUMNS = ("role", "reason", "age_years")


@dataclass(frozen=True)
class ReportFiles:
    """Paths written by :func:`build_report`."""

    html: Path
    pdf: Path | None = None
    pngs: tuple[Path, ...] = field(default_factory=tuple)


def personal_interval_path(results: pd.DataFrame, pack, patient: str, assess_fn: Callable,
                           **kw) -> pd.DataFrame:
    """The personal interval as it stood at each specimen of one patient.

    Calls ``assess_fn(results_subset, pack=pack, at=<specimen>, **kw)`` for every specimen after
    the first (in collection order), with ``results_subset`` the patient's rows collected up to
    and including that specimen, and keeps ``pi_lower, pi_upper`` of each analyte measured in it.
    Returns columns patient, analyte, specimen, collected_at, pi_lower, pi_upper.
    """
    sub = results[results["patient"].astype(str) == str(patient)]
    if sub.empty:
        raise BayesbaseError(f"personal_interval_path: no results for patient {patient!r}")
    specs = (sub[["specimen", "collected_at"]].drop_duplicates("specimen")
             .sort_values(["collected_at", "specimen"], kind="stable"))
    frames = []
    for spec, when in list(specs.itertuples(index=False, name=None))[1:]:
        t = assess_fn(sub[sub["collected_at"] <= when], pack=pack, at=spec, **kw).table
        t = t[(t["patient"].astype(str) == str(patient)) & (t["specimen"].astype(str) == str(spec))]
        if len(t):
            frames.append(t[_PATH_COLUMNS])
    if not frames:
        return pd.DataFrame({c: pd.Series(dtype="object") for c in _PATH_COLUMNS})
    return pd.concat(frames, ignore_index=True)


def _safe_name(s: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", str(s)).strip("_") or "x"


def _interval_path(interval_path, assessment, pack, patient: str):
    """A DataFrame, or a callable run over the assessment's history with its engine and
    coverage, or None."""
    if interval_path is None or isinstance(interval_path, pd.DataFrame):
        return interval_path
    if not callable(interval_path):
        raise TypeError("interval_path must be a DataFrame, a callable or None")
    _, _, history = one_patient(assessment, patient)
    results = history.drop(columns=[c for c in _ASSESSMENT_COLUMNS if c in history.columns])
    kw = {k: assessment.attrs[k] for k in ("engine", "coverage")}
    return personal_interval_path(results, pack, patient, interval_path, **kw)


def _overview_rgb(figs) -> np.ndarray:
    """The report's shared figure with the legend strip centred under it (pixels as drawn)."""
    grid, legend = figs.grid_rgb, figs.legend_rgb
    width = max(grid.shape[1], legend.shape[1])
    out = np.full((grid.shape[0] + legend.shape[0], width, 3), 255, dtype=np.uint8)
    x = (width - grid.shape[1]) // 2
    out[:grid.shape[0], x:x + grid.shape[1]] = grid
    x = (width - legend.shape[1]) // 2
    out[grid.shape[0]:, x:x + legend.shape[1]] = legend
    return out


def _write_figures(content: ReportContent, assessment, interval_path, png_dir,
                   svg: bool, dpi: int) -> tuple[Path, ...]:
    """One PNG (and SVG) per analyte plus an overview of every panel, in ``png_dir``: the
    PNGs are the report's own (cut from its one shared figure); the overview is that figure
    with the legend under it."""
    png_dir = Path(png_dir)
    png_dir.mkdir(parents=True, exist_ok=True)
    stem = _safe_name(content.patient)
    out = []
    for panel in content.figures.panels:
        base = png_dir / f"{stem}_{_safe_name(panel.analyte)}"
        out.append(base.with_suffix(".png"))
        out[-1].write_bytes(panel.png)
        if svg:
            out.append(base.with_suffix(".svg"))
            out[-1].write_text(panel.svg, encoding="utf-8")
    out.append(png_dir / f"{stem}_overview.png")
    out[-1].write_bytes(figures.png_bytes(_overview_rgb(content.figures), dpi))
    if svg:
        _, table, history = one_patient(assessment, content.patient)
        overview = figures.small_multiples(history, table, interval_path)
        out.append(png_dir / f"{stem}_overview.svg")
        out[-1].write_text(figures.figure_svg(overview), encoding="utf-8")
    return tuple(out)


def build_report(assessment, pack, out_html, pdf=None, png_dir=None,
                 title: str | None = None, interval_path=None, *, patient: str | None = None,
                 svg: bool = False, dpi: int = 150) -> ReportFiles:
    """Write one patient's report.

    Parameters
    ----------
    assessment : an ``Assessment``; it may hold several patients only when ``patient`` names one.
    pack : the prior pack for the CVs' sources and the retest groups, or None for the pack the
        assessment used.
    out_html : path of the self-contained HTML file.
    pdf : optional path of a PDF with the same content (A4 landscape).
    png_dir : optional directory for one PNG per analyte plus an overview PNG (and SVG when
        ``svg=True``); the PNGs are the report's own figures.
    title : report title (default "Probability of change — patient <id>").
    interval_path : the personal interval as it stood at each specimen: a DataFrame (columns
        patient, analyte, specimen, collected_at, pi_lower, pi_upper), or a callable used as
        ``assess_fn`` in :func:`personal_interval_path` (called on the assessment's history
        reduced to the canonical columns, with the assessment's engine and coverage), or None
        (only the interval at the assessed specimen is drawn).
    """
    patient = one_patient(assessment, patient)[0]
    path = _interval_path(interval_path, assessment, pack, patient)
    content = build_content(assessment, pack, patient=patient, interval_path=path, title=title,
                            dpi=dpi, svg=svg)
    out_html = Path(out_html)
    out_html.parent.mkdir(parents=True, exist_ok=True)
    out_html.write_text(html_out.render(content), encoding="utf-8")
    pdf_path = None
    if pdf is not None:
        pdf_path = Path(pdf)
        pdf_path.parent.mkdir(parents=True, exist_ok=True)
        pdf_out.render(content, pdf_path)
    pngs = _write_figures(content, assessment, path, png_dir, svg, dpi) if png_dir is not None else ()
    return ReportFiles(html=out_html, pdf=pdf_path, pngs=pngs)


def report_for_file(results_path_or_frame, patient: str, pack, out_html, pdf=None, at=None,
                    engine: str = "exact", *, png_dir=None, title=None,
                    with_path: bool = True, **assess_kw) -> ReportFiles:
    """Read results (a path or a frame), assess one patient and write the report.

    ``pack`` is a Pack, a pack id (``"dog"``) or None (the species' pack). With ``with_path``
    (default) the personal interval is recomputed at every earlier specimen for the stepped
    ribbon.
    """
    from ..assessment import assess
    from ..io import read_results as load_results
    from ..validate import validate
    from ..priors import load_pack

    if isinstance(pack, str):
        pack = load_pack(pack)
    if isinstance(results_path_or_frame, pd.DataFrame):
        frame = results_path_or_frame
        results = frame.copy() if is_canonical(frame) else validate(frame)
    else:
        results = load_results(results_path_or_frame)
    sub = results[results["patient"].astype(str) == str(patient)]
    if sub.empty:
        known = ", ".join(list(dict.fromkeys(results["patient"].astype(str)))[:10])
        raise BayesbaseError(f"patient {patient!r} not found in the results (patients: {known})")
    assessment = assess(sub, pack=pack, engine=engine, at=at, **assess_kw)
    if pack is None:
        pack = next(iter(assessment.packs.values()))
    path = None
    if with_path:
        # the ribbon of earlier personal intervals always uses the exact engine (one fit per
        # specimen would be slow with MCMC; both engines fit the same model); it needs the
        # intervals only, so the drift model is not run
        kw = {k: v for k, v in assess_kw.items() if k != "seed"}
        path = personal_interval_path(sub, pack, str(patient), assess,
                                      **{**kw, "engine": "exact", "trend": False})
    return build_report(assessment, pack, out_html, pdf=pdf, png_dir=png_dir, title=title,
                        interval_path=path, patient=str(patient))
