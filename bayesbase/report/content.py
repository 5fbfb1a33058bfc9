"""The report's content model: one patient's report as frozen dataclasses, built from an
:class:`~bayesbase.assessment.Assessment` and its prior pack.

Everything a reader sees is decided here (which rows, which notes, which advice, which sources),
with its text from :mod:`.wording`; :mod:`.html` and :mod:`.pdf` only lay it out. Sections, in
the order a busy reader needs them:

1. cautions (also at the bottom of the page and on every PDF page);
2. header: patient, species, breed, sex, age at the assessed specimen, the assessed specimen,
   the specimens that formed the baseline and the ones left out, with the reason;
3. panel summary: the probable true changes chosen with Bayesian false-discovery control
   (:func:`.panel.select_changes`), the chance that a healthy animal shows at least one result
   outside the population interval, and drift sentences;
4. one row per analyte, with the notes common to every row shown once;
5. what to do next (retest advice from the pack's retest groups);
6. small-multiple figures (see :mod:`.figures` for the visual language);
7. method and provenance (prior pack id and hash, CVs with their sources, engine, settings,
   seed, software version) and the numbered references.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone

import numpy as np
import pandas as pd

from .. import __version__
from ..constants import CAUTIONS, DEFAULT_CI_PROB, PANEL_FDR, PROBABLE_CHANGE, UNCERTAIN_BAND
from ..errors import BayesbaseError
from ..units import display_unit, label as analyte_label
from . import figures
from . import wording as w
from .panel import chance_any_outside, change_band, select_changes
from .wording import Phrase, num

__all__ = [
    "ReportContent", "SpecimenLine", "RolePart", "Summary", "Change", "Row", "Verdict", "Advice",
    "FigureImage", "Figures", "CvCell", "CvRow",
    "build_content", "one_patient", "panel_summary", "report_rows", "common_notes",
    "retest_advice", "patient_header", "provenance_lines", "DRIFT_SENTENCE_P",
]

#: P(drift) from which a drift sentence is written (modelling choice of this project).
DRIFT_SENTENCE_P = 0.9

#: flag words that mark a compromised sample (a retest can help), as opposed to facts about the
#: data (units converted, breed centre used) that a retest does not change.
_COMPROMISE_WORDS = ("compromised", "not fasted", "haemoly", "lipaem", "icter", "fed:",
                     "feeding-sensitive")

#: size of one analyte's figure, inches (the PDF keeps its aspect ratio)
FIG_WIDTH, FIG_HEIGHT = 3.4, 2.3


# --------------------------------------------------------------------------- the model
@dataclass(frozen=True)
class RolePart:
    """One role within a specimen: 'baseline', or 'left out ALT, AST (haemolysis ...)'."""

    role: str
    word: str
    analytes: str | None
    reasons: str | None


@dataclass(frozen=True)
class SpecimenLine:
    specimen: str
    date: str
    parts: tuple[RolePart, ...]


@dataclass(frozen=True)
class Change:
    """A probable true change listed in the panel summary."""

    analyte: str
    label: str
    direction: str
    change_pct: float | None
    p_change: float
    line: Phrase


@dataclass(frozen=True)
class Summary:
    changes: tuple[Change, ...]
    expected_false: float
    fdr: float
    n: int
    k_outside: int
    chance_any: float
    intro: str
    outside_line: str
    drift: tuple[str, ...]


@dataclass(frozen=True)
class Verdict:
    """An RCV verdict: 'beyond' or 'within', the limits it was judged against."""

    word: str
    limits: str
    beyond: bool

    @property
    def text(self) -> str:
        return f"{self.word} {self.limits}"


@dataclass(frozen=True)
class Row:
    """One analyte of the results table, as display text."""

    analyte: str
    label: str
    unit: str
    value: str
    outside_population: bool
    population: str
    personal: str
    percentile: str
    p_change: float | None
    p_text: str
    band: str | None
    direction: str
    arrow: str
    vs_set_point: str
    delta_mean: str
    classical: Verdict
    lognormal: Verdict
    ii: str
    ii_short: str
    ii_words: str
    notes: tuple[str, ...]


@dataclass(frozen=True)
class Advice:
    """A retest suggestion for one retest group."""

    group: str
    title: str
    when: str
    source: str | None
    analytes: tuple[str, ...]
    reasons: tuple[tuple[str, str], ...]
    line: Phrase
    reasons_text: str


@dataclass(frozen=True)
class FigureImage:
    """One analyte's panel: its PNG (HTML) and the same pixels as an RGB array (PDF)."""

    analyte: str
    label: str
    alt: str
    png: bytes
    svg: str | None = None
    rgb: np.ndarray | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class Figures:
    panels: tuple[FigureImage, ...]
    legend_png: bytes
    legend: tuple[tuple[str, str], ...]
    ratio: float  # height / width of a panel
    legend_ratio: float  # height / width of the legend strip
    #: the whole shared figure and the legend strip, as drawn (RGB arrays)
    grid_rgb: np.ndarray | None = field(default=None, compare=False, repr=False)
    legend_rgb: np.ndarray | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class CvCell:
    text: str
    ref: str


@dataclass(frozen=True)
class CvRow:
    label: str
    cvi: CvCell
    cvg: CvCell
    cva: CvCell
    ri: CvCell

    @property
    def cells(self) -> tuple[CvCell, ...]:
        return (self.cvi, self.cvg, self.cva, self.ri)


@dataclass(frozen=True)
class ReportContent:
    """Everything one patient's report shows, in reading order."""

    title: str
    patient: str
    cautions: tuple[str, ...]
    header: tuple[tuple[str, str], ...]
    specimens: tuple[SpecimenLine, ...]
    summary: Summary
    headings: tuple[str, ...]
    rows: tuple[Row, ...]
    common_notes: tuple[str, ...]
    common_line: str | None
    table_key: str
    advice: tuple[Advice, ...]
    no_advice: str | None
    figures: Figures
    method: str
    provenance: tuple[tuple[str, str], ...]
    cv_rows: tuple[CvRow, ...]
    references: tuple[str, ...]

    def own_notes(self, row: Row) -> str:
        """A row's notes less those every row carries ('–' when none is left)."""
        return "; ".join(n for n in row.notes if n not in self.common_notes) or w.DASH


# --------------------------------------------------------------------------- one patient
def one_patient(assessment, patient: str | None = None):
    """(patient, table, history) of the one patient a report is made for."""
    table = assessment.table
    if table is None or len(table) == 0:
        raise BayesbaseError("build_report: the assessment has no rows")
    patients = list(dict.fromkeys(table["patient"].astype(str)))
    if patient is None:
        if len(patients) != 1:
            more = "..." if len(patients) > 5 else ""
            raise BayesbaseError(
                f"build_report makes one patient's report; the assessment holds {len(patients)} "
                f"patients ({', '.join(patients[:5])}{more}): pass patient=<id>")
        patient = patients[0]
    patient = str(patient)
    if patient not in patients:
        raise BayesbaseError(f"build_report: patient {patient!r} is not in the assessment")
    table = table[table["patient"].astype(str) == patient].reset_index(drop=True)
    history = assessment.history
    history = history[history["patient"].astype(str) == patient]
    return patient, table, history


def pack_of(assessment, table: pd.DataFrame):
    """The prior pack the assessment used for this patient's rows."""
    return assessment.packs[str(table["pack"].iloc[0])]


# --------------------------------------------------------------------------- rows
def _flags(row) -> tuple[str, ...]:
    return tuple(dict.fromkeys(str(f) for f in row["flags"] if str(f).strip()))


def _direction(row) -> str:
    p_inc = num(row["p_increase"])
    if p_inc is None:
        c = num(row["change_pct"])
        return "" if c is None else ("up" if c >= 0 else "down")
    return "up" if p_inc >= 0.5 else "down"


def _verdicts(row) -> tuple[Verdict, Verdict]:
    """Classical and log-normal RCV verdicts on the change from the baseline mean."""
    if not num(row["n_baseline"]) or num(row["change_vs_mean_pct"]) is None:
        none = Verdict(w.NO_BASELINE, "", False)
        return none, none
    ex_c = None if pd.isna(row["rcv_exceeded_mean"]) else bool(row["rcv_exceeded_mean"])
    ex_l = None if pd.isna(row["lognormal_exceeded_mean"]) else bool(row["lognormal_exceeded_mean"])
    c_word, c_lim = w.rcv_classical_cell(ex_c, row["rcv_classical_pct"])
    l_word, l_lim = w.rcv_lognormal_cell(ex_l, row["rcv_lognormal_up_pct"],
                                         row["rcv_lognormal_down_pct"])
    return Verdict(c_word, c_lim, bool(ex_c)), Verdict(l_word, l_lim, bool(ex_l))


def _value_text(row) -> str:
    value = w.fmt_value(row["value"])
    censor = str(row["censor"])
    return {"left": "<", "right": ">"}.get(censor, "") + value


def _row(row) -> Row:
    p = num(row["p_change"])
    ii = num(row["ii"])
    direction = _direction(row) if p is not None and p >= PROBABLE_CHANGE else ""
    classical, lognormal = _verdicts(row)
    pct_ = num(row["percentile"])
    return Row(
        analyte=str(row["analyte"]), label=str(row["label"]),
        unit=display_unit(str(row["analyte"])), value=_value_text(row),
        outside_population=bool(row["outside_population"]),
        population=w.interval(row["pop_lower"], row["pop_upper"]),
        personal=w.interval(row["pi_lower"], row["pi_upper"]),
        percentile=w.DASH if pct_ is None else f"{100 * pct_:.0f}",
        p_change=p, p_text=w.DASH if p is None else f"{p:.2f}", band=change_band(p),
        direction=direction, arrow=f" {w.ARROWS[direction]}" if direction else "",
        vs_set_point=w.vs_set_point(row["change_pct"]),
        delta_mean=w.pct(row["change_vs_mean_pct"]) if num(row["n_baseline"]) else w.DASH,
        classical=classical, lognormal=lognormal,
        ii=w.DASH if ii is None else f"{ii:.2f}",
        ii_short=w.individuality_short(ii), ii_words=w.individuality_words(ii),
        notes=_flags(row),
    )


def report_rows(table: pd.DataFrame) -> tuple[Row, ...]:
    """The per-analyte rows as display text (shared by the HTML and the PDF)."""
    return tuple(_row(r) for _, r in table.iterrows())


def common_notes(rows) -> tuple[str, ...]:
    """Notes that every row carries (shown once above the table instead of in every row)."""
    if len(rows) < 2:
        return ()
    return tuple(n for n in rows[0].notes if all(n in r.notes for r in rows[1:]))


# --------------------------------------------------------------------------- panel summary
def _limit_side(r, rate: float | None) -> str:
    """'upper' or 'lower': the population limit the drift heads for."""
    lim = r["trend_limit"]
    if isinstance(lim, str) and lim.strip():
        return lim.strip().lower().replace("pop_", "")
    return "upper" if (rate or 0) >= 0 else "lower"


def _drift_sentence(r, p_drift: float, ci_prob: float) -> str:
    rate = num(r["trend_pct_per_year"])
    return w.drift_sentence(str(r["label"]), rate, num(r["trend_pct_lower"]),
                            num(r["trend_pct_upper"]), ci_prob, p_drift,
                            num(r["trend_years_to_limit"]), w.limit_words(_limit_side(r, rate)))


def _drift_sentences(table: pd.DataFrame, ci_prob: float) -> tuple[str, ...]:
    if "trend_p_drift" not in table.columns:  # assessed with trend=False
        return ()
    out = []
    for _, r in table.iterrows():
        p_drift = num(r["trend_p_drift"])
        if p_drift is not None and p_drift >= DRIFT_SENTENCE_P:
            out.append(_drift_sentence(r, p_drift, ci_prob))
    return tuple(out)


def panel_summary(table: pd.DataFrame, fdr: float = PANEL_FDR,
                  ci_prob: float = DEFAULT_CI_PROB) -> Summary:
    """The panel summary of one patient's table: the probable true changes (in descending
    P(change)) with the posterior expected number of false alarms among them, the results
    outside the population interval against 1 - 0.95^n, and the drift sentences."""
    p = table["p_change"].to_numpy(dtype=float)
    mask = select_changes(p, fdr=fdr)
    chosen = table[mask].assign(_p=p[mask]).sort_values("_p", ascending=False, kind="stable")
    changes = []
    for _, r in chosen.iterrows():
        direction, label = _direction(r), str(r["label"])
        changes.append(Change(str(r["analyte"]), label, direction, num(r["change_pct"]),
                              float(r["_p"]),
                              w.change_line(label, direction, r["change_pct"], float(r["_p"]))))
    expected_false = float(np.sum(1.0 - p[mask])) if mask.any() else 0.0
    has_pop = table[["pop_lower", "pop_upper"]].notna().all(axis=1)
    n = int(has_pop.sum())
    k = int(table["outside_population"].astype(bool)[has_pop].sum())
    chance = chance_any_outside(n)
    intro = w.changes_intro(expected_false, fdr) if changes else w.no_change_line(fdr)
    return Summary(tuple(changes), expected_false, fdr, n, k, chance, intro,
                   w.outside_line(k, n, chance), _drift_sentences(table, ci_prob))


# --------------------------------------------------------------------------- advice
def _retest_reasons(r) -> list[str]:
    reasons = []
    lo, hi = UNCERTAIN_BAND
    p = num(r["p_change"])
    if p is not None and lo <= p <= hi:
        reasons.append(w.reason_uncertain(p))
    if str(r["quality"]) not in ("", "ok"):
        reasons.append(w.reason_compromised(str(r["quality"])))
    flagged = [f for f in _flags(r) if any(k in f.lower() for k in _COMPROMISE_WORDS)
               and "index" not in f.lower()]  # index flags are summarised by quality
    if flagged:
        reasons.append("; ".join(flagged))
    return reasons


def _advice(group: str, labels: list[str], reasons: list[tuple[str, str]], pack) -> Advice:
    spec = pack.retest_groups.get(group)
    if spec is None:
        title, when, source = w.group_title(group), w.NO_RETEST_INTERVAL, None
    else:
        title = spec.label or w.group_title(group)
        when = w.hours_text(spec.hours_min, spec.hours_max)
        source = pack.sources.get(f"retest_groups.{group}.hours_min")
    return Advice(group, title, when, source, tuple(labels), tuple(reasons),
                  w.advice_line(title, labels, when, source), w.advice_reasons(reasons))


def retest_advice(table: pd.DataFrame, pack) -> tuple[Advice, ...]:
    """Retest suggestions for uncertain answers and compromised samples.

    A row qualifies when p_change lies in ``UNCERTAIN_BAND`` (inclusive), when ``quality`` is not
    ``ok``, or when a flag marks the sample as compromised (not fasted for a feeding-sensitive
    analyte); flags a retest cannot change (units converted, method changed, breed centre) do
    not. Rows are grouped by ``retest_group`` in table order; the time and its source come from
    the pack's retest group.
    """
    groups: dict[str, tuple[list[str], list[tuple[str, str]]]] = {}
    for _, r in table.iterrows():
        reasons = _retest_reasons(r)
        if not reasons:
            continue
        g = str(r["retest_group"]) or "other"
        labels, why = groups.setdefault(g, ([], []))
        labels.append(str(r["label"]))
        why.append((str(r["label"]), "; ".join(reasons)))
    return tuple(_advice(g, labels, why, pack) for g, (labels, why) in groups.items())


# --------------------------------------------------------------------------- header
def patient_header(history: pd.DataFrame, row0) -> tuple[tuple[str, str], ...]:
    """The header fields of one patient's report, as (name, text) pairs: patient, species,
    breed, sex, age at the assessed specimen, the assessed specimen and its date.

    ``history`` is the patient's Assessment.history (species, breed and sex from its first row,
    the age from the assessed specimen's rows); ``row0`` any row of the patient's table (the
    patient, the species when the history lacks it, and the assessed specimen)."""
    first = history.iloc[0]

    def pick(col):
        v = first[col]
        return None if pd.isna(v) or str(v) == "" else str(v)

    ages = history.loc[history["role"] == "assessed", "age_years"].dropna()
    return w.header_fields(
        str(row0["patient"]), pick("species") or str(row0["species"]),
        pick("breed") or w.NOT_RECORDED, (pick("sex") or w.NOT_RECORDED).replace("_", " "),
        w.age(ages.iloc[0] if len(ages) else None), str(row0["specimen"]),
        w.date(row0["collected_at"]))


def _role_parts(g: pd.DataFrame) -> tuple[RolePart, ...]:
    n_an = g["analyte"].nunique()
    main_role = g["role"].mode().iloc[0]
    parts: list[RolePart] = []
    for role, gr in g.groupby("role", sort=False):
        analytes = sorted({str(a) for a in gr["analyte"]})
        reasons = sorted({str(x) for x in gr["reason"] if not pd.isna(x) and str(x)})
        word = w.ROLE_WORDS.get(role, role)
        note = w.reasons_note(reasons) if reasons else None
        if role == main_role and len(analytes) == n_an:
            parts.append(RolePart(role, word, None, note))
        elif role == main_role:
            parts.insert(0, RolePart(role, word, w.n_analytes(len(analytes)), note))
        else:
            parts.append(RolePart(role, word, ", ".join(analyte_label(a) for a in analytes),
                                  note))
    return tuple(parts)


def specimen_lines(history: pd.DataFrame) -> tuple[SpecimenLine, ...]:
    """One line per specimen of the patient: date, roles (per analyte where they differ) and
    the reasons for leaving results out, in collection order."""
    h = history[history["role"] != "not assessed"]  # analytes the assessed specimen lacks
    lines = []
    for spec, g in h.groupby("specimen", sort=False):
        when = g["collected_at"].min()
        lines.append((when, str(spec), SpecimenLine(str(spec), w.date(when), _role_parts(g))))
    lines.sort(key=lambda t: (t[0], t[1]))
    return tuple(line for _, _, line in lines)


# --------------------------------------------------------------------------- method
class _Refs:
    """Numbered source list (each distinct citation text once)."""

    def __init__(self):
        self.items: list[str] = []

    def ref(self, text) -> str:
        if text is None or not str(text).strip():
            return ""
        text = str(text).strip()
        if text not in self.items:
            self.items.append(text)
        return f"[{self.items.index(text) + 1}]"


def _cv_row(row, pack, refs: _Refs) -> CvRow:
    cited = pack.cited[str(row["analyte"])]
    cells = {}
    for fld in ("cvi", "cvg", "cva"):
        c = cited[fld]
        cells[fld] = CvCell(w.cv_percent(100 * c.value), refs.ref(w.cited_source(c.source,
                                                                                 c.provenance)))
    lo, hi = cited["ri_lower"], cited["ri_upper"]
    src = lo.source or hi.source
    ri = f"{w.interval(lo.value, hi.value)} {display_unit(str(row['analyte']))}"
    cells["ri"] = CvCell(ri, refs.ref(w.cited_source(src, lo.provenance)))
    return CvRow(str(row["label"]), **cells)


def provenance_lines(attrs: dict, pack, now: datetime) -> tuple[tuple[str, str], ...]:
    """The method-and-provenance lines of a report, as (name, text) pairs: prior pack (id,
    title, version) and its sha256, engine, settings, coverage, prior P(change), seed, the
    versions that assessed and reported, and the time ``now`` the report is made.

    ``attrs`` are the Assessment's attrs (pack_id, pack_sha256, engine, settings, coverage,
    prior_change, seed, version); ``pack`` the prior pack the assessment used."""
    return w.provenance_items(
        pack=w.pack_line(str(attrs["pack_id"]), pack.title, pack.version),
        sha256=str(attrs["pack_sha256"]), engine=str(attrs["engine"]),
        settings=w.settings_line(attrs["settings"]), coverage=float(attrs["coverage"]),
        prior_change=w.plain_setting(attrs["prior_change"]), seed=str(attrs["seed"]),
        assessed_by=str(attrs["version"]), report_by=__version__,
        made_at=now.strftime("%Y-%m-%d %H:%M UTC"))


# --------------------------------------------------------------------------- figures
def _figures(history, table, interval_path, dpi: int, svg: bool) -> Figures:
    """Every panel drawn once, in one shared figure (:func:`.figures.panel_grid`), and cut out
    per analyte: the PNGs of the HTML and the pixels the PDF places come from that one
    drawing. SVGs (``svg=True``) are drawn per panel."""
    panels = []
    per_analyte = figures.analyte_histories(history, table["patient"].iloc[0]) if len(table) else {}
    grid_rgb, cells = None, []
    if len(table):
        grid = figures.panel_grid(history, table, interval_path, width=FIG_WIDTH,
                                  height=FIG_HEIGHT, dpi=dpi, histories=per_analyte)
        grid_rgb, cells = figures.grid_pixels(grid)
    for (_, row), rgb in zip(table.iterrows(), cells):
        label = str(row["label"])
        svg_text = None
        if svg:
            h = per_analyte.get(row["analyte"])
            fig = figures.analyte_panel(history, row, interval_path, width=FIG_WIDTH,
                                        height=FIG_HEIGHT,
                                        analyte_history=h if h is not None else history.iloc[0:0])
            svg_text = figures.figure_svg(fig)
        panels.append(FigureImage(str(row["analyte"]), label, w.figure_alt(label),
                                  figures.png_bytes(rgb, dpi), svg_text, rgb=rgb))
    legend = figures.legend_rgb(dpi)
    return Figures(tuple(panels), figures.legend_png(dpi), figures.LEGEND_TEXT,
                   FIG_HEIGHT / FIG_WIDTH, legend.shape[0] / legend.shape[1],
                   grid_rgb=grid_rgb, legend_rgb=legend)


# --------------------------------------------------------------------------- assembly
def build_content(assessment, pack=None, *, patient: str | None = None, interval_path=None,
                  title: str | None = None, dpi: int = 150, svg: bool = False,
                  now: datetime | None = None) -> ReportContent:
    """The content of one patient's report.

    ``pack`` defaults to the pack the assessment used; ``interval_path`` is the personal
    interval as it stood at each specimen (see :func:`bayesbase.report.personal_interval_path`)
    or None; ``svg`` keeps an SVG of every figure beside its PNG.
    """
    patient, table, history = one_patient(assessment, patient)
    pack = pack if pack is not None else pack_of(assessment, table)
    attrs = assessment.attrs
    rows = report_rows(table)
    common = common_notes(rows)
    advice = retest_advice(table, pack)
    refs = _Refs()
    cv_rows = tuple(_cv_row(r, pack, refs) for _, r in table.iterrows())
    return ReportContent(
        title=title or w.title(patient), patient=patient, cautions=CAUTIONS,
        header=patient_header(history, table.iloc[0]), specimens=specimen_lines(history),
        summary=panel_summary(table, ci_prob=float(attrs["ci_prob"])),
        headings=w.result_headings(float(table["coverage"].iloc[0])), rows=rows,
        common_notes=common, common_line=w.common_notes_line(common) if common else None,
        table_key=w.table_key(), advice=advice, no_advice=None if advice else w.NO_ADVICE,
        figures=_figures(history, table, interval_path, dpi, svg), method=w.method_text(),
        provenance=provenance_lines(attrs, pack, now or datetime.now(timezone.utc)),
        cv_rows=cv_rows, references=tuple(refs.items),
    )
