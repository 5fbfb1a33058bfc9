"""Every sentence, label and number format of the report, written once.

The content model (:mod:`.content`) takes its text from here; the HTML template and the PDF
layout only place that text. A sentence that needs emphasis is a :class:`Phrase` (parts with a
style), which the HTML renders with ``<b>``/small print and the PDF as plain text.

References for the numbers named in the sentences are listed in :mod:`bayesbase.report`.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..constants import CAUTIONS, PANEL_FDR, PROBABLE_CHANGE, UNCERTAIN_BAND
from .panel import DRIFT_DRAW_P

#: Harris index of individuality cut-offs (Fraser & Harris, Crit Rev Clin Lab Sci 1989;27:409).
II_LOW, II_HIGH = 0.6, 1.4
II_CITATION = "Fraser & Harris, Crit Rev Clin Lab Sci 1989;27:409"

DASH = "\u2013"
MINUS = "\u2212"
THIN = "\u2009"
NBSP = "\u00a0"
SHY = "\u00ad"  # soft hyphen: a narrow heading may break there
ARROWS = {"up": "\u2191", "down": "\u2193"}

_LO, _HI = UNCERTAIN_BAND

CAUTIONS_TITLE = "Cautions"
NOT_RECORDED = "not recorded"


@dataclass(frozen=True)
class Phrase:
    """A sentence with emphasis: ``parts`` are (text, style) with style "", "b" or "small"."""

    parts: tuple[tuple[str, str], ...]

    @property
    def text(self) -> str:
        return "".join(t for t, _ in self.parts)


# --------------------------------------------------------------------------- number formats
def num(x) -> float | None:
    """A finite float, or None for missing, NaN, infinite or non-numeric values."""
    if x is None or x is pd.NA or x is pd.NaT:
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def fmt_value(x, sig: int = 3) -> str:
    """A measured value with about ``sig`` significant digits (no exponent for lab ranges)."""
    v = num(x)
    if v is None:
        return DASH
    a = abs(v)
    if a == 0:
        return "0"
    digits = max(0, sig - 1 - int(math.floor(math.log10(a))))
    if a >= 10 ** sig:
        digits = 0
    return f"{v:,.{digits}f}".replace(",", THIN)


def pct(x, signed: bool = True, digits: int = 0) -> str:
    """A percentage: '+12 %' with a true minus sign and a no-break space."""
    v = num(x)
    if v is None:
        return DASH
    s = f"{v:+.{digits}f}" if signed else f"{v:.{digits}f}"
    return s.replace("-", MINUS) + NBSP + "%"


def date(x) -> str:
    if x is None or pd.isna(x):
        return DASH
    return pd.Timestamp(x).strftime("%d %b %Y")


def age(years) -> str:
    y = num(years)
    if y is None:
        return "age not recorded"
    if y < 2:
        return f"{y * 12:.0f} months"
    return f"{y:.1f} years"


def hours_text(hmin, hmax) -> str:
    """A retest window in the unit a reader plans with: hours up to 4 days, else weeks or days."""
    lo, hi = num(hmin), num(hmax)
    if lo is None or hi is None:
        return "at the next visit"
    if hi <= 96:
        return f"{lo:g}{DASH}{hi:g} h"
    if lo % 168 == 0 and hi % 168 == 0:
        return f"{lo / 168:g}{DASH}{hi / 168:g} weeks"
    if lo % 24 == 0 and hi % 24 == 0:
        return f"{lo / 24:g}{DASH}{hi / 24:g} days"
    return f"{lo / 24:.1f}{DASH}{hi / 24:.1f} days"


def interval(lo, hi) -> str:
    return f"{fmt_value(lo)}{DASH}{fmt_value(hi)}"


# --------------------------------------------------------------------------- individuality
def individuality_words(ii: float | None) -> str:
    """Index of individuality (Harris, II = CVI/CVG) in words, cut-offs 0.6 and 1.4 (Fraser &
    Harris, Crit Rev Clin Lab Sci 1989;27:409)."""
    if ii is None or not np.isfinite(ii):
        return "not available"
    if ii < II_LOW:
        return "population interval tells little for this animal"
    if ii <= II_HIGH:
        return "population interval of limited use"
    return "population interval informative"


def individuality_short(ii: float | None) -> str:
    """One word for the table: 'tells little', 'limited', 'informative' (cut-offs of
    :func:`individuality_words`)."""
    if ii is None or not np.isfinite(ii):
        return "n/a"
    return "tells little" if ii < II_LOW else ("limited" if ii <= II_HIGH else "informative")


# --------------------------------------------------------------------------- header
def title(patient: str) -> str:
    return f"Probability of change \u2014 patient {patient}"


def header_fields(patient, species, breed, sex, age_text, specimen, collected):
    """(label, value) pairs of the header, in reading order."""
    return (("Patient", patient), ("Species", species), ("Breed", breed), ("Sex", sex),
            ("Age at assessed specimen", age_text),
            ("Assessed specimen", f"{specimen} \u2014 collected {collected}"))


ROLE_WORDS = {"assessed": "assessed", "baseline": "baseline", "unwell": "left out (unwell)",
              "excluded": "left out", "later": "after the assessed specimen (not used)"}


def n_analytes(n: int) -> str:
    return f"{n} analytes"


def reasons_note(reasons) -> str:
    return f"({'; '.join(reasons)})"


# --------------------------------------------------------------------------- panel summary
SECTION_SUMMARY = "Panel summary"
SECTION_RESULTS = "Results"
SECTION_NEXT = "What to do next"
SECTION_FIGURES = "Results over time"
SECTION_METHOD = "Method and provenance"
SECTION_CV = "Variation and intervals used"


def changes_intro(expected_false: float, fdr: float) -> str:
    return (f"Probable true changes (expected false alarms among them {expected_false:.2f}; "
            f"target share \u2264 {100 * fdr:.0f} %):")


def change_line(label: str, direction: str, change_pct, p_change: float) -> Phrase:
    arrow = ARROWS["up"] if direction == "up" else ARROWS["down"]
    return Phrase(((label, "b"),
                   (f" {arrow} {direction}, {pct(change_pct)} of the set point, P(change) ", ""),
                   (f"{p_change:.2f}", "b")))


def no_change_line(fdr: float) -> str:
    return ("No result qualifies as a probable true change at the panel's false-alarm target "
            f"({100 * fdr:.0f} %).")


def outside_line(k: int, n: int, chance: float) -> str:
    return (f"{k} of {n} results fall outside the population interval; in a healthy animal {n} "
            f"independent results would show at least one outside with probability "
            f"1 \u2212 0.95^{n} = {100 * chance:.0f} %.")


def drift_sentence(label: str, rate, lo, hi, ci_prob: float, p_drift: float, years,
                   limit_words: str) -> str:
    """'X has been rising about 9 %/year (95 % CrI +4 % to +14 %/year), P(drift) 0.97; at that
    pace it reaches the upper population limit in ~3.1 years.'"""
    verb = "rising" if (rate or 0) >= 0 else "falling"
    txt = f"{label} has been {verb} about {abs(rate or 0):.0f} %/year"
    if lo is not None and hi is not None:
        txt += f" ({100 * ci_prob:.0f} % CrI {pct(lo)} to {pct(hi)}/year)"
    txt += f", P(drift) {p_drift:.2f}"
    if years is not None and years > 0:
        txt += f"; at that pace it reaches the {limit_words} in ~{years:.1f} years"
    elif years is not None and years <= 0:
        txt += f"; it is already beyond the {limit_words}"
    return txt + "."


def limit_words(side: str) -> str:
    """'upper population limit' or 'lower population limit'."""
    return f"{side} population limit"


# --------------------------------------------------------------------------- results table
RESULT_HEADINGS = ("Analyte", "Result", "Population interval", "Personal interval ({cov} %)",
                   f"Per{SHY}cen{SHY}tile", "P(change)", "\u0394 vs mean", "Classical RCV",
                   "Log-normal RCV", f"Indivi{SHY}dual{SHY}ity II", "Notes")


def result_headings(coverage: float) -> tuple[str, ...]:
    return tuple(h.format(cov=f"{100 * coverage:.0f}") for h in RESULT_HEADINGS)


def vs_set_point(change_pct) -> str:
    return f"{pct(change_pct)} vs set point"


NO_BASELINE = "no baseline"
_VERDICT = {True: "beyond", False: "within", None: "?"}


def rcv_classical_cell(beyond: bool | None, rcv_pct) -> tuple[str, str]:
    """('beyond', '±24 %'): the verdict word and the limit it was judged against."""
    return _VERDICT[beyond], f"\u00b1{pct(rcv_pct, signed=False)}"


def rcv_lognormal_cell(beyond: bool | None, up_pct, down_pct) -> tuple[str, str]:
    """('within', '+27/−21 %')."""
    return _VERDICT[beyond], f"{pct(up_pct).replace(NBSP + '%', '')}/{pct(down_pct)}"


def common_notes_line(notes) -> str:
    return f"For every analyte: {'; '.join(notes)}."


def table_key() -> str:
    """The key under the results table."""
    return ("Bold result: outside the population interval. Percentile: where the result falls in "
            "the animal's own predictive distribution. P(change) with arrow: direction of a "
            "probable change; under it, the result relative to the set point. RCV verdicts "
            "compare the change from the mean of the baseline results (\u0394) with the "
            "two-sided 95 % RCV (bold: beyond). The star beside P(change) is the mark of the "
            f"figures: hollow below {_LO:g}, half-filled from {_LO:g} to {_HI:g}, filled above "
            f"{_HI:g}, in one hue that darkens as a change grows more probable. "
            "Individuality II = CVI/CVG: "
            f"< {II_LOW} the population interval tells little for this animal, "
            f"{II_LOW}{DASH}{II_HIGH} of limited use, > {II_HIGH} informative ({II_CITATION}).")


# --------------------------------------------------------------------------- what to do next
def reason_uncertain(p: float) -> str:
    return f"P(change) {p:.2f} is uncertain"


def reason_compromised(quality: str) -> str:
    return f"sample compromised ({quality})"


NO_RETEST_INTERVAL = "at the next visit (no retest interval in the pack for this group)"


def group_title(group: str) -> str:
    return group.replace("_", " ").capitalize()


_AUTHOR = re.compile(r"^((?:(?:de|van|von|der|le|la|du|dos|da)\s+)*[A-Z][\w'\-]+(?:\s+[A-Z][\w'\-]{2,})*)"
                     r"\s+[A-Z]{1,4}(?=[,.\s]|$)")
_YEAR = re.compile(r"\b(19|20)\d{2}\b")
_SHORT_LIMIT = 80


def _top_parens(text: str) -> list[str]:
    """The top-level parenthesised segments of ``text`` (nested parentheses kept inside)."""
    out, depth, start = [], 0, 0
    for i, ch in enumerate(text):
        if ch == "(":
            if depth == 0:
                start = i + 1
            depth += 1
        elif ch == ")" and depth:
            depth -= 1
            if depth == 0:
                out.append(text[start:i])
    return out


def _citation_parts(seg: str) -> tuple[str, bool, str | None, str] | None:
    """(first author's surname, more authors?, year, journal or venue) of a citation, or None."""
    seg = seg.strip()
    authors = re.split(r"\.\s", seg, maxsplit=1)[0]
    m = _AUTHOR.match(authors)
    if m is None:
        return None
    several = "et al" in authors or "," in authors
    parts = [x.strip() for x in re.split(r"\.\s+", seg)[1:] if x.strip()]
    year_m = _YEAR.search(seg)
    venue = None
    for part in parts:
        y = _YEAR.search(part)
        if y and not part.lower().startswith(("doi", "http")):
            venue = part[:y.start()]
            break
    if venue is None and len(parts) >= 2:
        venue = parts[1]
    elif venue is None and parts:
        venue = parts[0]
    venue = re.split(r",|;|\(|https?://", venue or "")[0].strip().rstrip(".")
    venue = re.sub(r"\b(reviewed|updated|accessed)\s+\w+\s*$", "", venue).strip().rstrip(",")
    return m.group(1), several, year_m.group(0) if year_m else None, venue


def short_citation(source: str | None) -> str | None:
    """A short form of a source for one sentence: first author, year, journal ("Center 2007, Vet
    Clin North Am Small Anim Pract"), prefixed "bayesbase modelling choice after" when the source
    is one. The whole text stays in the pack (``bayesbase priors show``). When no citation can be
    found in the text, its first words, cut at :data:`_SHORT_LIMIT` characters."""
    if not source:
        return None
    choice = "modelling choice" in source
    for seg in _top_parens(source):
        got = _citation_parts(seg)
        if got is None:
            continue
        name, several, year, venue = got
        cite = name + (" et al." if several else "") + (f" {year}" if year else "") + (f", {venue}" if venue else "")
        return f"bayesbase modelling choice after {cite}" if choice else cite
    text = source.strip()
    return text if len(text) <= _SHORT_LIMIT else text[:_SHORT_LIMIT - 1].rstrip() + "\u2026"


def advice_line(title_: str, analytes, when: str, source: str | None) -> Phrase:
    """The retest sentence of a group; its source in short form (:func:`short_citation`), the whole
    citation being in the pack (``bayesbase priors show``)."""
    parts = [(title_, "b"), (f" ({', '.join(analytes)}): retest in ", ""), (when, "b")]
    short = short_citation(source)
    if short:
        parts += [(" ", ""), (f"({short}; full source: bayesbase priors show)", "small")]
    return Phrase(tuple(parts + [(".", "")]))


def advice_reasons(reasons) -> str:
    return "; ".join(f"{k}: {v}" for k, v in reasons)


NO_ADVICE = ("No answer is uncertain and no sample is compromised: no retest is suggested by the "
             "model (clinical reasons may still call for one).")


# --------------------------------------------------------------------------- figures
def figure_alt(label: str) -> str:
    return f"{label} over time"


def panel_p_text(p: float | None) -> str:
    """The P(change) printed above an analyte's figure."""
    return "P(change) n/a" if p is None else f"P(change) {p:.2f}"


#: labels of the legend strip drawn under the figures
LEGEND_LABELS = {
    "population": "population interval",
    "personal": "personal interval (stepped)",
    "baseline": "baseline",
    "unwell": "unwell",
    "excluded": "excluded",
    "later": "later, not used",
    "star_low": f"assessed, P(change) < {_LO:g} (hollow)",
    "star_uncertain": f"assessed, {_LO:g}-{_HI:g} (half)",
    "star_probable": f"assessed, > {_HI:g} (filled)",
    "drift": f"drift (P(drift) \u2265 {DRIFT_DRAW_P})",
}

#: what every mark of the figures means (shown beside them)
LEGEND_TEXT = (
    ("population interval", "two thin reddish-purple dashed lines with a faint hatch between them"),
    ("personal interval", "bluish-green stepped ribbon: the interval as it stood before each draw "
     "(from the specimens available then); the last step is the one the assessed result is read "
     "against"),
    ("baseline", "filled blue circle"),
    ("unwell", "hollow black diamond (taken while unwell: not used for the set point)"),
    ("excluded", "dark-grey cross (left out; the reason is listed in the header)"),
    ("later", "small hollow grey ring (after the assessed specimen; not used)"),
    ("assessed", "large star with a black edge; the more probable a true change, the fuller and "
     f"darker the star, in one orange hue: hollow and pale below {_LO:.1f}, half-filled from "
     f"{_LO:.1f} to {_HI:.1f}, filled dark above {_HI:.1f} (the same star marks P(change) in "
     "the results table)"),
    ("censored", "a chevron beside the point shows the true value lies below (v) or above (^) it"),
    ("drift", "black dash-dot line with a pale-yellow band (credible range of the slope), drawn "
     f"when the drift model gives P(drift) \u2265 {DRIFT_DRAW_P}"),
)


# --------------------------------------------------------------------------- method and provenance
def method_text() -> str:
    return (
        "Each analyte's set point (the animal's own long-run mean) is estimated on the log scale "
        "by a hierarchical Bayesian model that shrinks the animal's baseline results toward the "
        "population (breed) mean, using the within-animal (CVI), between-animal (CVG) and "
        "analytical (CVA) coefficients of variation of the prior pack (a CV converts to a "
        "log-scale SD as sigma = sqrt(ln(1 + CV\u00b2))). The personal interval is the "
        "posterior-predictive central interval for a new result of this animal; the percentile "
        "places the assessed result in that predictive distribution. P(change) is the posterior "
        "probability that the assessed result reflects a true change of the set point rather than "
        "within-animal and analytical variation. The classical reference change value RCV = "
        "\u221a2 \u00b7 1.96 \u00b7 CVT (Fraser, Clin Chem Lab Med 2012;50:807) and the "
        "log-normal, asymmetric RCV (Fokkema et al., Clin Chem 2006;52:1602) are shown beside "
        "the model, against the mean of the baseline results. The index of individuality is "
        "II = CVI/CVG (Harris, Clin Chem 1974; orientation CVI over CVG): below "
        f"{II_LOW} the population interval tells little for one animal, above {II_HIGH} it is "
        f"informative ({II_CITATION}). The panel summary lists the largest set of results, in "
        "descending P(change), whose mean probability of no change is at most "
        f"{100 * PANEL_FDR:.0f} % (Bayesian false-discovery control; constant PANEL_FDR of this "
        f"project) and that each have P(change) \u2265 {PROBABLE_CHANGE}. The chance of at least "
        "one result outside a 95 % population interval among n independent results of a healthy "
        "animal is 1 \u2212 0.95^n (Clin Chem Lab Med 2004;42:747); correlated analytes make it "
        "an overstatement."
    )


def pack_line(pack_id: str, title_: str | None, version: str | None) -> str:
    return (f"{pack_id}" + (f" \u2014 {title_}" if title_ else "")
            + (f" (version {version})" if version else ""))


def settings_line(settings: dict) -> str:
    return ", ".join(f"{k} = {v}" for k, v in settings.items()) or "defaults"


def plain_setting(v) -> str:
    """A setting for display: a list of equal values shows once."""
    if isinstance(v, (list, tuple, np.ndarray)):
        return ", ".join(dict.fromkeys(str(x) for x in v))
    return str(v)


def provenance_items(*, pack: str, sha256: str, engine: str, settings: str, coverage: float,
                     prior_change: str, seed: str, assessed_by: str, report_by: str,
                     made_at: str) -> tuple[tuple[str, str], ...]:
    return (
        ("Prior pack", pack),
        ("Pack SHA-256", sha256),
        ("Engine", engine),
        ("Settings", settings),
        ("Personal interval coverage", f"{100 * coverage:.0f} %"),
        ("Prior P(change)", prior_change),
        ("Seed", seed),
        ("Assessment made by", f"bayesbase {assessed_by}"),
        ("Report made by", f"bayesbase {report_by}, {made_at}"),
    )


CV_HEADINGS = ("Analyte", "CVI", "CVG", "CVA", "Population interval")


def cv_percent(pct_value: float | None) -> str:
    return f"{pct_value:.1f} %" if pct_value is not None else DASH


def cited_source(source: str | None, provenance: str | None) -> str | None:
    """A CV's source with its provenance word: 'Author ... (derived)'."""
    if source and provenance:
        return f"{source} ({provenance})"
    return source or None


def page_footer(page: int) -> str:
    """The PDF footer: the cautions and the page number ({nb} is the page count)."""
    return "  ".join(CAUTIONS) + f"   Page {page}/{{nb}}"


def cautions_line() -> str:
    return f"{CAUTIONS_TITLE}: " + " ".join(CAUTIONS)

