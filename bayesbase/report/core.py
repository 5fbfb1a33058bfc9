"""One patient's probability-of-change report: self-contained HTML, PDF and PNG figures
(layer 5; matplotlib and fpdf2 are used only here and in ``plots``).

The report reads an :class:`bayesbase.assess.Assessment` (``.table``, ``.history``, ``.attrs``)
and a prior pack. Sections, in the order a busy reader needs them:

1. cautions (also at the bottom of the page and on every PDF page);
2. header: patient, species, breed, age at the assessed specimen, the assessed specimen, the
   specimens that formed the baseline and the ones left out, with the reason;
3. panel summary: the probable true changes chosen with Bayesian false-discovery control
   (:func:`select_changes`), the chance that a healthy animal shows at least one result outside
   the population interval (:func:`chance_any_outside`), and drift sentences;
4. one row per analyte;
5. what to do next (retest advice from the pack's retest groups);
6. small-multiple plots (see :mod:`bayesbase.plots` for the visual language);
7. method and provenance (prior pack id and hash, CVs with their sources, engine, settings, seed,
   software version).

Every user-supplied string is escaped with :func:`html.escape`; the HTML references nothing over
the network (figures are embedded base64 PNG).

References
----------
.. [1] Fraser CG, Harris EK. Generation and application of data on biological variation in
   clinical chemistry. Crit Rev Clin Lab Sci 1989;27:409-437 (index of individuality cut-offs
   0.6 and 1.4).
.. [2] Harris EK. Effects of intra- and interindividual variation on the appropriate use of
   normal ranges. Clin Chem 1974 (II = CVI/CVG).
.. [3] Fraser CG. Reference change values. Clin Chem Lab Med 2012;50:807-812 (classical RCV).
.. [4] Fokkema MR et al. Clin Chem 2006;52:1602 (log-normal, asymmetric RCV).
.. [5] Many results at once: P(at least one of n outside a central 95 % interval) = 1 - 0.95^n;
   n = 10 gives P(none outside) 60 % (Clin Chem Lab Med 2004;42:747).
.. [6] Bayesian false-discovery control by the posterior expected share of false alarms in the
   listed set (Newton MA et al., Biostatistics 2004;5:155-176 [from memory]).
"""
from __future__ import annotations

import base64
import html
import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..constants import (
    CAUTIONS,
    DEFAULT_CI_PROB,
    DEFAULT_COVERAGE,
    PANEL_FDR,
    PROBABLE_CHANGE,
    UNCERTAIN_BAND,
)
from ..errors import BayesbaseError
from . import figures as plots

__all__ = [
    "ReportFiles",
    "select_changes",
    "chance_any_outside",
    "individuality_words",
    "individuality_short",
    "common_notes",
    "panel_summary",
    "retest_advice",
    "personal_interval_path",
    "report_rows",
    "build_report",
    "report_for_file",
]

#: Harris index of individuality cut-offs (Fraser & Harris, Crit Rev Clin Lab Sci 1989;27:409).
II_LOW, II_HIGH = 0.6, 1.4
#: P(drift) from which a drift sentence is written (modelling choice of this project).
DRIFT_SENTENCE_P = 0.9

_II_CITATION = "Fraser & Harris, Crit Rev Clin Lab Sci 1989;27:409"


@dataclass(frozen=True)
class ReportFiles:
    """Paths written by :func:`build_report`."""

    html: Path
    pdf: Path | None = None
    pngs: tuple[Path, ...] = field(default_factory=tuple)


# --------------------------------------------------------------------------- small calculations
def select_changes(p_change, fdr: float = PANEL_FDR, min_p: float = PROBABLE_CHANGE) -> np.ndarray:
    """Boolean mask of the results to list as probable true changes.

    Bayesian false-discovery control: sort by ``p_change`` descending and keep the largest
    leading set whose mean posterior probability of *no* change, mean(1 - p_change), is at most
    ``fdr`` (the posterior expected share of false alarms in the list). The mean of the sorted
    1 - p is non-decreasing in the set size, so the largest such set is a prefix. Of that set,
    only results with ``p_change >= min_p`` are kept (``min_p=0`` switches this off). NaN
    probabilities are never selected. Ties are broken by input order (stable sort).
    """
    p = np.asarray(p_change, dtype=float).ravel()
    mask = np.zeros(p.shape, dtype=bool)
    ok = np.flatnonzero(np.isfinite(p))
    if ok.size == 0:
        return mask
    order = ok[np.argsort(-p[ok], kind="stable")]
    running = np.cumsum(1.0 - p[order]) / np.arange(1, order.size + 1)
    k = int(np.sum(running <= fdr + 1e-12))
    mask[order[:k]] = True
    mask &= np.where(np.isfinite(p), p, -np.inf) >= min_p
    return mask


def chance_any_outside(n: int, level: float = 0.95) -> float:
    """P(at least one of ``n`` independent results of a healthy animal falls outside a central
    ``level`` interval) = 1 - level^n (Clin Chem Lab Med 2004;42:747: n = 10 -> 40 %).
    Correlated analytes make this an overstatement."""
    if n < 0:
        raise ValueError("n must be >= 0")
    from ..classical import chance_any_outside as _chance  # one kernel for the formula

    return float(_chance(int(n), level))


def individuality_words(ii: float) -> str:
    """Index of individuality (Harris, II = CVI/CVG) in words, cut-offs 0.6 and 1.4 (Fraser &
    Harris, Crit Rev Clin Lab Sci 1989;27:409)."""
    if ii is None or not np.isfinite(ii):
        return "not available"
    if ii < II_LOW:
        return "population interval tells little for this animal"
    if ii <= II_HIGH:
        return "population interval of limited use"
    return "population interval informative"


# --------------------------------------------------------------------------- formatting helpers
def _isna(x) -> bool:
    if x is None or x is pd.NA or x is pd.NaT:
        return True
    try:
        return bool(pd.isna(x))
    except (TypeError, ValueError):
        return False


def _num(x) -> float | None:
    if _isna(x):
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if np.isfinite(v) else None


def fmt_value(x, sig: int = 3) -> str:
    """A measured value with about ``sig`` significant digits (no exponent for lab ranges)."""
    v = _num(x)
    if v is None:
        return "–"
    a = abs(v)
    if a == 0:
        return "0"
    digits = max(0, sig - 1 - int(math.floor(math.log10(a))))
    if a >= 10 ** sig:
        digits = 0
    return f"{v:,.{digits}f}".replace(",", "\u2009")


def _pct(x, signed: bool = True, digits: int = 0) -> str:
    v = _num(x)
    if v is None:
        return "–"
    s = f"{v:+.{digits}f}" if signed else f"{v:.{digits}f}"
    return s.replace("-", "\u2212") + "\u00a0%"


def _date(x) -> str:
    if _isna(x):
        return "–"
    return pd.Timestamp(x).strftime("%d %b %Y")


def _age(years) -> str:
    y = _num(years)
    if y is None:
        return "age not recorded"
    if y < 2:
        return f"{y * 12:.0f} months"
    return f"{y:.1f} years"


def _hours_text(hmin, hmax) -> str:
    lo, hi = _num(hmin), _num(hmax)
    if lo is None or hi is None:
        return "at the next visit"
    if hi <= 96:
        return f"{lo:g}\u2013{hi:g} h"
    if lo % 168 == 0 and hi % 168 == 0:
        return f"{lo / 168:g}\u2013{hi / 168:g} weeks"
    if lo % 24 == 0 and hi % 24 == 0:
        return f"{lo / 24:g}\u2013{hi / 24:g} days"
    return f"{lo / 24:.1f}\u2013{hi / 24:.1f} days"


def _flags(row) -> list[str]:
    f = row.get("flags") if hasattr(row, "get") else None
    if f is None or (not isinstance(f, (list, tuple, np.ndarray, str)) and _isna(f)):
        return []
    if isinstance(f, str):
        return [s.strip() for s in f.split(";") if s.strip()]
    return [str(s) for s in f if str(s).strip()]


def _label(row) -> str:
    lab = row.get("label")
    if _isna(lab) or not str(lab):
        lab = row["analyte"]
    return str(lab)


def _unit(row) -> str:
    try:
        from ..units import display_unit

        return display_unit(str(row["analyte"]))
    except Exception:  # unknown analyte in a fake or future registry: fall back to the code
        u = row.get("unit")
        return "" if _isna(u) else str(u)


def _bool(x) -> bool | None:
    if _isna(x):
        return None
    return bool(x)


def _direction(row) -> str:
    p_inc = _num(row.get("p_increase"))
    if p_inc is None:
        c = _num(row.get("change_pct"))
        if c is None:
            return ""
        return "up" if c >= 0 else "down"
    return "up" if p_inc >= 0.5 else "down"


def _notes(row) -> list[str]:
    """Notes of a row: the assessment's own flags first, then what the columns say and no flag
    already covers (matched by keyword, so a fake or older table still gets its notes)."""
    notes: list[str] = []
    for f in _flags(row):
        if f not in notes:
            notes.append(f)
    low = " ".join(notes).lower()

    def add(text, *keys):
        if not any(k in low for k in keys) and text not in notes:
            notes.append(text)

    q = row.get("quality")
    if not _isna(q) and str(q) and str(q) != "ok":
        add(f"sample quality: {q}", "index", "quality", "compromised")
    if _bool(row.get("comparable")) is False:
        add("method changed: not directly comparable", "comparable")
    ah = _num(row.get("assumed_healthy"))
    if ah:
        add("baselines assumed healthy (state not recorded)", "assumed healthy")
    c = row.get("censor")
    if not _isna(c) and str(c) in ("left", "right"):
        rv = row.get("reported_value")
        add(f"censored result ({rv})" if not _isna(rv) else "censored result", "assessed value is cens",
            "censored result")
    if _bool(row.get("converged")) is False:
        add("sampler did not converge: treat with caution", "converge")
    if _bool(row.get("cva_high")):
        add("analyser noise high (CVA > \u00bd CVI)", "cva")
    nb = _num(row.get("n_baseline"))
    if nb == 0:
        add("no baseline: population prior only", "no baseline")
    return notes


#: flag words that mark a compromised sample (a retest can help), as opposed to facts about the
#: data (units converted, breed centre used) that a retest does not change.
_COMPROMISE_WORDS = ("compromised", "not fasted", "haemoly", "lipaem", "icter", "fed:",
                     "feeding-sensitive")


def _rcv_cells(row) -> tuple[str, str, bool, bool]:
    """Classical and log-normal RCV verdicts on the change from the baseline mean."""
    nb = _num(row.get("n_baseline"))
    d = _num(row.get("change_vs_mean_pct"))
    if not nb or d is None:
        return "no baseline", "no baseline", False, False
    rc = _num(row.get("rcv_classical_pct"))
    up, down = _num(row.get("rcv_lognormal_up_pct")), _num(row.get("rcv_lognormal_down_pct"))
    ex_c = _bool(row.get("rcv_exceeded_mean"))
    ex_l = _bool(row.get("lognormal_exceeded_mean"))
    word = {True: "beyond", False: "within", None: "?"}
    classical = f"{word[ex_c]} \u00b1{_pct(rc, signed=False)}"
    lognormal = f"{word[ex_l]} {_pct(up).replace(chr(160) + '%', '')}/{_pct(down)}"
    return classical, lognormal, bool(ex_c), bool(ex_l)


def individuality_short(ii: float) -> str:
    """One word for the table: 'little', 'limited', 'informative' (cut-offs of
    :func:`individuality_words`)."""
    if ii is None or not np.isfinite(ii):
        return "n/a"
    return "tells little" if ii < II_LOW else ("limited" if ii <= II_HIGH else "informative")


def common_notes(rows: list[dict]) -> list[str]:
    """Notes that every row carries (shown once above the table instead of in every row)."""
    if len(rows) < 2:
        return []
    first = rows[0]["notes"]
    return [n for n in first if all(n in r["notes"] for r in rows[1:])]


def report_rows(table: pd.DataFrame) -> list[dict]:
    """The per-analyte rows as display strings (shared by the HTML and the PDF)."""
    out = []
    for _, row in table.iterrows():
        p = _num(row.get("p_change"))
        classical, lognormal, ex_c, ex_l = _rcv_cells(row)
        cov = _num(row.get("coverage")) or DEFAULT_COVERAGE
        pct = _num(row.get("percentile"))
        value = fmt_value(row.get("value"))
        c = row.get("censor")
        if not _isna(c) and str(c) in ("left", "right"):
            value = ("<" if str(c) == "left" else ">") + value
        ii = _num(row.get("ii"))
        out.append({
            "analyte": str(row["analyte"]),
            "label": _label(row),
            "value": value,
            "unit": _unit(row),
            "population": f"{fmt_value(row.get('pop_lower'))}\u2013{fmt_value(row.get('pop_upper'))}",
            "outside_population": bool(_bool(row.get("outside_population"))),
            "personal": f"{fmt_value(row.get('pi_lower'))}\u2013{fmt_value(row.get('pi_upper'))}",
            "coverage": cov,
            "percentile": "–" if pct is None else f"{100 * pct:.0f}",
            "p_change": p,
            "p_text": "–" if p is None else f"{p:.2f}",
            "direction": _direction(row) if p is not None and p >= PROBABLE_CHANGE else "",
            "change_pct": _pct(row.get("change_pct")),
            "delta_mean": _pct(row.get("change_vs_mean_pct")) if _num(row.get("n_baseline"))
            else "–",
            "classical": classical,
            "classical_beyond": ex_c,
            "lognormal": lognormal,
            "lognormal_beyond": ex_l,
            "ii": "–" if ii is None else f"{ii:.2f}",
            "ii_words": individuality_words(ii if ii is not None else float("nan")),
            "ii_short": individuality_short(ii if ii is not None else float("nan")),
            "notes": _notes(row),
        })
    return out


# --------------------------------------------------------------------------- summary and advice
def panel_summary(table: pd.DataFrame, fdr: float = PANEL_FDR,
                  ci_prob: float = DEFAULT_CI_PROB) -> dict:
    """Structured panel summary for one patient's table.

    Returns a dict: ``changes`` (list of dicts label, analyte, direction, change_pct, p_change,
    in descending p_change), ``expected_false`` (posterior expected number of false alarms among
    them), ``n``, ``k_outside``, ``chance_any`` (1 - 0.95^n), ``outside_line`` (sentence),
    ``drift`` (list of sentences).
    """
    p = table["p_change"].to_numpy(dtype=float) if len(table) else np.array([])
    mask = select_changes(p, fdr=fdr)
    chosen = table[mask].assign(_p=p[mask]).sort_values("_p", ascending=False, kind="stable")
    changes = [{
        "analyte": str(r["analyte"]),
        "label": _label(r),
        "direction": _direction(r),
        "change_pct": _num(r.get("change_pct")),
        "p_change": float(r["_p"]),
    } for _, r in chosen.iterrows()]
    expected_false = float(np.sum(1.0 - p[mask])) if mask.any() else 0.0

    has_pop = table[["pop_lower", "pop_upper"]].notna().all(axis=1) if len(table) else []
    n = int(np.sum(has_pop)) if len(table) else 0
    outside = table.get("outside_population")
    k = int(pd.Series(outside).fillna(False).astype(bool)[has_pop].sum()) if n else 0
    chance = chance_any_outside(n)
    outside_line = (
        f"{k} of {n} results fall outside the population interval; in a healthy animal {n} "
        f"independent results would show at least one outside with probability "
        f"1 \u2212 0.95^{n} = {100 * chance:.0f} %."
    )
    drift = []
    if "trend_p_drift" in table.columns:
        for _, r in table.iterrows():
            pd_ = _num(r.get("trend_p_drift"))
            if pd_ is None or pd_ < DRIFT_SENTENCE_P:
                continue
            drift.append(_drift_sentence(r, pd_, ci_prob))
    return {"changes": changes, "expected_false": expected_false, "n": n, "k_outside": k,
            "chance_any": chance, "outside_line": outside_line, "drift": drift, "fdr": fdr}


def _drift_sentence(r, p_drift: float, ci_prob: float) -> str:
    rate = _num(r.get("trend_pct_per_year"))
    lo, hi = _num(r.get("trend_pct_lower")), _num(r.get("trend_pct_upper"))
    verb = "rising" if (rate or 0) >= 0 else "falling"
    txt = f"{_label(r)} has been {verb} about {abs(rate or 0):.0f} %/year"
    if lo is not None and hi is not None:
        txt += (f" ({100 * ci_prob:.0f} % CrI {_pct(lo, digits=0)} to {_pct(hi, digits=0)}"
                "/year)")
    txt += f", P(drift) {p_drift:.2f}"
    years = _num(r.get("trend_years_to_limit"))
    lim = r.get("trend_limit")
    side = "upper" if (rate or 0) >= 0 else "lower"
    if isinstance(lim, str) and lim.strip():
        side = lim.strip().lower().replace("pop_", "")
    elif _num(lim) is not None:
        side = f"{side} population limit ({fmt_value(lim)} {_unit(r)})"
        lim = None
    limit_words = side if side.endswith(")") else f"{side} population limit"
    if years is not None and years > 0:
        txt += f"; at that pace it reaches the {limit_words} in ~{years:.1f} years"
    elif years is not None and years <= 0:
        txt += f"; it is already beyond the {limit_words}"
    return txt + "."


def retest_advice(table: pd.DataFrame, pack=None) -> list[dict]:
    """Retest suggestions for uncertain answers and compromised samples.

    A row qualifies when p_change lies in ``UNCERTAIN_BAND`` (inclusive), when ``quality`` is not
    ``ok``, or when a flag marks the sample as compromised (not fasted for a feeding-sensitive
    analyte, an H/L/I index above threshold); flags a retest cannot change (units converted,
    method changed, breed centre) do not. Rows are grouped by ``retest_group``; the time comes from
    ``pack.retest_groups[group]`` (hours_min / hours_max). Returns dicts group, when, analytes
    (labels), reasons (per label), source.
    """
    lo, hi = UNCERTAIN_BAND
    groups: dict[str, dict] = {}
    for _, r in table.iterrows():
        reasons = []
        p = _num(r.get("p_change"))
        if p is not None and lo <= p <= hi:
            reasons.append(f"P(change) {p:.2f} is uncertain")
        q = r.get("quality")
        if not _isna(q) and str(q) and str(q) != "ok":
            reasons.append(f"sample compromised ({q})")
        fl = [f for f in _flags(r) if any(w in f.lower() for w in _COMPROMISE_WORDS)
              and "index" not in f.lower()]  # index flags are summarised by quality
        if fl:
            reasons.append("; ".join(fl))
        if not reasons:
            continue
        g = r.get("retest_group")
        g = "other" if _isna(g) or not str(g) else str(g)
        entry = groups.setdefault(g, {"group": g, "analytes": [], "reasons": {}, "when": None,
                                      "source": None, "title": g.replace("_", " ").capitalize()})
        entry["analytes"].append(_label(r))
        entry["reasons"][_label(r)] = "; ".join(reasons)
    rg = getattr(pack, "retest_groups", None) or {}
    for g, entry in groups.items():
        spec = rg.get(g) if isinstance(rg, Mapping) else None
        if spec is not None:
            get = spec.get if isinstance(spec, Mapping) else (lambda k, s=spec: getattr(s, k, None))
            entry["when"] = _hours_text(get("hours_min"), get("hours_max"))
            srcs = getattr(pack, "sources", None) or {}
            entry["source"] = get("source") or (srcs.get(f"retest_groups.{g}.hours_min")
                                                if isinstance(srcs, Mapping) else None)
            title = get("label") or get("title")
            if title:
                entry["title"] = str(title)
        else:
            entry["when"] = "at the next visit (no retest interval in the pack for this group)"
    return list(groups.values())


# --------------------------------------------------------------------------- personal interval path
_PATH_COLUMNS = ["patient", "analyte", "specimen", "collected_at", "pi_lower", "pi_upper"]


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
        part = sub[sub["collected_at"] <= when]
        res = assess_fn(part, pack=pack, at=spec, **kw)
        t = res.table
        t = t[(t["patient"].astype(str) == str(patient)) & (t["specimen"].astype(str) == str(spec))]
        if len(t):
            frames.append(t[_PATH_COLUMNS])
    if not frames:
        return pd.DataFrame({c: pd.Series(dtype="object") for c in _PATH_COLUMNS})
    return pd.concat(frames, ignore_index=True)


# --------------------------------------------------------------------------- header data
def _patient_info(history: pd.DataFrame, row0) -> dict:
    h = history[history["patient"].astype(str) == str(row0["patient"])]
    first = h.iloc[0] if len(h) else row0

    def pick(col):
        v = first.get(col) if hasattr(first, "get") else None
        return None if _isna(v) or str(v) == "" else str(v)

    assessed = h[h["role"] == "assessed"] if "role" in h else h.iloc[0:0]
    age = None
    if "age_years" in h and len(assessed):
        age = _num(assessed["age_years"].dropna().iloc[0]) if assessed["age_years"].notna().any() \
            else None
    if age is None and pick("birth_date") and not _isna(row0.get("collected_at")):
        age = (pd.Timestamp(row0["collected_at"]) - pd.Timestamp(first["birth_date"])).days / 365.25
    return {
        "patient": str(row0["patient"]),
        "species": pick("species") or str(row0.get("species", "")),
        "breed": pick("breed") or "not recorded",
        "sex": (pick("sex") or "not recorded").replace("_", " "),
        "age": _age(age),
        "specimen": str(row0["specimen"]),
        "collected": _date(row0["collected_at"]),
    }


def _specimen_lines(history: pd.DataFrame, patient: str) -> list[dict]:
    """One entry per specimen: date, role summary (per analyte where roles differ), reasons."""
    h = history[history["patient"].astype(str) == str(patient)]
    if "role" in h:  # rows of analytes the assessed specimen did not measure play no part
        h = h[h["role"] != "not assessed"]
    out = []
    for spec, g in h.groupby("specimen", sort=False):
        when = g["collected_at"].min()
        roles = g.groupby("role", sort=False)
        n_an = g["analyte"].nunique()
        parts = []
        main_role = g["role"].mode().iloc[0]
        for role, gr in roles:
            labels = sorted({str(a) for a in gr["analyte"]})
            reasons = sorted({str(x) for x in gr["reason"] if not _isna(x) and str(x)})
            if role == main_role and len(labels) == n_an:
                parts.append({"role": role, "analytes": None, "reasons": reasons})
            elif role == main_role:
                parts.insert(0, {"role": role, "analytes": f"{len(labels)} analytes",
                                 "reasons": reasons})
            else:
                parts.append({"role": role, "analytes": ", ".join(_label_of(a) for a in labels),
                              "reasons": reasons})
        out.append({"specimen": str(spec), "when": when, "date": _date(when), "parts": parts,
                    "main_role": main_role})
    out.sort(key=lambda d: (d["when"], d["specimen"]))
    return out


def _label_of(analyte: str) -> str:
    try:
        from ..units import label

        return label(analyte)
    except Exception:  # unknown to the registry: show the id
        return analyte


_ROLE_WORDS = {"assessed": "assessed", "baseline": "baseline", "unwell": "left out (unwell)",
               "excluded": "left out", "later": "after the assessed specimen (not used)"}


# --------------------------------------------------------------------------- provenance
def _cited(pack, analyte: str, fld: str):
    cited = getattr(pack, "cited", None)
    try:
        c = cited[analyte][fld]
    except (KeyError, TypeError, IndexError):
        c = None
    if c is not None:
        return _num(getattr(c, "value", None)), getattr(c, "source", None), \
            getattr(c, "provenance", None)
    ap = (getattr(pack, "analytes", None) or {}).get(analyte)
    if ap is not None:
        return _num(getattr(ap, fld, None)), (getattr(ap, "sources", {}) or {}).get(fld), None
    return None, None, None


class _Refs:
    """Numbered source list (each distinct citation text once)."""

    def __init__(self):
        self.items: list[str] = []

    def ref(self, text) -> str:
        if text is None or _isna(text) or not str(text).strip():
            return ""
        text = str(text).strip()
        if text not in self.items:
            self.items.append(text)
        return f"[{self.items.index(text) + 1}]"


def _cv_rows(table: pd.DataFrame, pack, refs: _Refs) -> list[dict]:
    rows = []
    for _, r in table.iterrows():
        a = str(r["analyte"])
        cells = {"label": _label(r)}
        for fld, col in (("cvi", "cvi_pct"), ("cvg", "cvg_pct"), ("cva", "cva_pct")):
            v, src, prov = _cited(pack, a, fld)
            pct = v * 100 if v is not None else _num(r.get(col))
            note = src if src else None
            if prov and src:
                note = f"{src} ({prov})"
            cells[fld] = (f"{pct:.1f} %" if pct is not None else "–", refs.ref(note))
        lo, src_lo, prov_lo = _cited(pack, a, "ri_lower")
        hi, src_hi, _ = _cited(pack, a, "ri_upper")
        src = src_lo or src_hi
        cells["ri"] = (f"{fmt_value(lo if lo is not None else r.get('pop_lower'))}\u2013"
                       f"{fmt_value(hi if hi is not None else r.get('pop_upper'))} {_unit(r)}",
                       refs.ref(f"{src} ({prov_lo})" if src and prov_lo else src))
        rows.append(cells)
    return rows


def _plain(v) -> str:
    """A setting for display: a list of equal values shows once."""
    if isinstance(v, (list, tuple, np.ndarray)):
        vals = list(dict.fromkeys(str(x) for x in v))
        return ", ".join(vals)
    return str(v)


def _provenance(assessment, pack) -> list[tuple[str, str]]:
    attrs = dict(getattr(assessment, "attrs", {}) or {})
    settings = attrs.get("settings") or {}
    if isinstance(settings, Mapping):
        settings_txt = ", ".join(f"{k} = {v}" for k, v in settings.items()) or "defaults"
    else:
        settings_txt = str(settings)
    items = [
        ("Prior pack", f"{attrs.get('pack_id', getattr(pack, 'id', '?'))}"
                       + (f" — {pack.title}" if getattr(pack, "title", None) else "")
                       + (f" (version {pack.version})" if getattr(pack, "version", None) else "")),
        ("Pack SHA-256", str(attrs.get("pack_sha256", getattr(pack, "sha256", "?")))),
        ("Engine", str(attrs.get("engine", "?"))),
        ("Settings", settings_txt),
        ("Personal interval coverage", f"{100 * float(attrs.get('coverage', DEFAULT_COVERAGE)):.0f} %"),
        ("Prior P(change)", _plain(attrs.get("prior_change", "?"))),
        ("Seed", str(attrs.get("seed", "?"))),
        ("Assessment made by", f"bayesbase {attrs.get('version', '?')}"),
        ("Report made by", f"bayesbase {__version__}, "
                           f"{datetime.now(timezone.utc).strftime('%Y-%m-%d %H:%M UTC')}"),
    ]
    return items


METHOD_TEXT = (
    "Each analyte's set point (the animal's own long-run mean) is estimated on the log scale by a "
    "hierarchical Bayesian model that shrinks the animal's baseline results toward the "
    "population (breed) mean, using the within-animal (CVI), between-animal (CVG) and analytical "
    "(CVA) coefficients of variation of the prior pack (a CV converts to a log-scale SD as "
    "sigma = sqrt(ln(1 + CV\u00b2))). The personal interval is the posterior-predictive central "
    "interval for a new result of this animal; the percentile places the assessed result in that "
    "predictive distribution. P(change) is the posterior probability that the assessed result "
    "reflects a true change of the set point rather than within-animal and analytical variation. "
    "The classical reference change value RCV = \u221a2 \u00b7 1.96 \u00b7 CVT (Fraser, Clin Chem "
    "Lab Med 2012;50:807) and the log-normal, asymmetric RCV (Fokkema et al., Clin Chem "
    "2006;52:1602) are shown beside the model, against the mean of the baseline results. "
    "The index of individuality is II = CVI/CVG (Harris, Clin Chem 1974; orientation CVI over "
    f"CVG): below {II_LOW} the population interval tells little for one animal, above {II_HIGH} "
    f"it is informative ({_II_CITATION}). The panel summary lists the largest set of results, "
    "in descending P(change), whose mean probability of no change is at most "
    f"{100 * PANEL_FDR:.0f} % (Bayesian false-discovery control; constant PANEL_FDR of this "
    f"project) and that each have P(change) \u2265 {PROBABLE_CHANGE}. The chance of at least one "
    "result outside a 95 % population interval among n independent results of a healthy animal "
    "is 1 \u2212 0.95^n (Clin Chem Lab Med 2004;42:747); correlated analytes make it an "
    "overstatement."
)


# --------------------------------------------------------------------------- HTML
_CSS = """
@page { size: A4; margin: 12mm 11mm 14mm 11mm; }
* { box-sizing: border-box; }
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; font-size: 10pt;
  color: #1b1b1b; margin: 0 auto; max-width: 188mm; line-height: 1.35; }
h1 { font-size: 16pt; margin: 4mm 0 1mm 0; }
h2 { font-size: 12pt; margin: 5mm 0 2mm 0; border-bottom: 2px solid #009E73; padding-bottom: 1mm;
  break-after: avoid; page-break-after: avoid; }
.cautions { border: 1.5px solid #D55E00; border-left: 6px solid #D55E00; padding: 2mm 3mm;
  margin: 2mm 0; font-size: 9pt; background: #fff7f0; break-inside: avoid; }
.cautions b { color: #8a3200; }
.cautions ul { margin: 0.5mm 0 0 0; padding-left: 5mm; }
.hdr { display: grid; grid-template-columns: 1fr 1fr; gap: 1mm 6mm; font-size: 9.5pt; }
.hdr div span { color: #555; }
table { border-collapse: collapse; width: 100%; }
table.results { font-size: 7.6pt; table-layout: fixed; }
table.results th, table.results td { border-bottom: 0.5px solid #bbb; padding: 1mm 0.8mm;
  vertical-align: top; overflow-wrap: break-word; hyphens: auto; }
table.results th { background: #e8f4f0; text-align: left; font-weight: bold;
  overflow-wrap: normal; hyphens: manual; vertical-align: bottom; }
table.results th.num { text-align: right; }
td.beyond { font-weight: bold; }
td.pc { white-space: nowrap; }
table.results thead { display: table-header-group; }
table.results tr { break-inside: avoid; page-break-inside: avoid; }
td.num { text-align: right; white-space: nowrap; }
tr.chg td:first-child { border-left: 4px solid #D55E00; }
tr.unc td:first-child { border-left: 4px solid #E69F00; }
tr.low td:first-child { border-left: 4px solid #56B4E9; }
.pbar { display: inline-block; width: 7mm; height: 2mm; border: 0.5px solid #444; vertical-align: middle;
  margin-left: 0.5mm; background: #fff; }
.pbar i { display: block; height: 100%; }
.out { font-weight: bold; }
.small { font-size: 8pt; color: #444; }
ul.changes li { margin: 0.6mm 0; }
table.kv td { padding: 0.6mm 2mm 0.6mm 0; font-size: 8.5pt; vertical-align: top; }
table.kv td:first-child { color: #555; white-space: nowrap; }
table.cv { font-size: 7.8pt; }
table.cv th, table.cv td { border-bottom: 0.5px solid #ccc; padding: 0.6mm 1mm; text-align: left; }
.grid { display: grid; grid-template-columns: repeat(3, 1fr); gap: 2mm; }
.grid figure { margin: 0; break-inside: avoid; page-break-inside: avoid; }
.grid img { width: 100%; height: auto; display: block; }
.legend img.key { width: 100%; height: auto; display: block; margin: 0 auto; }
.legend dl { display: grid; grid-template-columns: 34mm 1fr; gap: 0.4mm 3mm; font-size: 8pt; margin: 1mm 0; }
.legend dt { font-weight: bold; }
.legend dd { margin: 0; }
ol.refs { font-size: 7.4pt; color: #333; padding-left: 6mm; overflow-wrap: anywhere; }
section { break-inside: auto; }
table.spec { width: auto; }
.spec td { font-size: 8.5pt; padding: 0.5mm 2mm 0.5mm 0; vertical-align: top; }
.tag { display: inline-block; padding: 0 1.5mm; border-radius: 1.5mm; font-size: 7.8pt; }
.tag.assessed { background: #D55E00; color: #fff; }
.tag.baseline { background: #0072B2; color: #fff; }
.tag.excluded, .tag.unwell, .tag.later { background: #ddd; color: #222; }
@media print { a { color: inherit; text-decoration: none; } .noprint { display: none; } }
"""


def _e(x) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _cautions_html() -> str:
    items = "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
    return f'<div class="cautions" role="note"><b>Cautions</b><ul>{items}</ul></div>'


def _two_lines(text: str) -> str:
    """'beyond ±20 %' -> 'beyond<br>±20 %' (the numbers kept on one line)."""
    word, _, rest = str(text).partition(" ")
    if not rest:
        return _e(text)
    return f"{_e(word)}<br><span style='white-space:nowrap'>{_e(rest)}</span>"


def _row_class(p) -> str:
    if p is None:
        return ""
    lo, hi = UNCERTAIN_BAND
    return "chg" if p > hi else ("unc" if p >= lo else "low")


def _html(ctx: dict) -> str:
    info, summ, rows, advice = ctx["info"], ctx["summary"], ctx["rows"], ctx["advice"]
    e = _e
    out = ['<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{e(ctx['title'])}</title><style>{_CSS}</style></head><body>"]
    out.append(_cautions_html())
    out.append(f"<h1>{e(ctx['title'])}</h1>")
    out.append('<div class="hdr">')
    for k, v in (("Patient", info["patient"]), ("Species", info["species"]),
                 ("Breed", info["breed"]), ("Sex", info["sex"]),
                 ("Age at assessed specimen", info["age"]),
                 ("Assessed specimen", f"{info['specimen']} — collected {info['collected']}")):
        out.append(f"<div><span>{e(k)}:</span> <b>{e(v)}</b></div>")
    out.append("</div>")
    out.append('<table class="spec" style="margin-top:2mm"><tbody>')
    for s in ctx["specimens"]:
        bits = []
        for part in s["parts"]:
            word = _ROLE_WORDS.get(part["role"], part["role"])
            t = f'<span class="tag {e(part["role"])}">{e(word)}</span>'
            if part["analytes"]:
                t += f" {e(part['analytes'])}"
            if part["reasons"]:
                t += f" <span class='small'>({e('; '.join(part['reasons']))})</span>"
            bits.append(t)
        out.append(f"<tr><td>{e(s['date'])}</td><td>{e(s['specimen'])}</td>"
                   f"<td>{' · '.join(bits)}</td></tr>")
    out.append("</tbody></table>")

    # panel summary
    out.append("<section><h2>Panel summary</h2>")
    if summ["changes"]:
        out.append(f"<p>Probable true changes (expected false alarms among them "
                   f"{summ['expected_false']:.2f}; target share \u2264 {100 * summ['fdr']:.0f} %):</p>")
        out.append('<ul class="changes">')
        for c in summ["changes"]:
            arrow = "\u2191" if c["direction"] == "up" else "\u2193"
            out.append(f"<li><b>{e(c['label'])}</b> {arrow} {e(c['direction'])}, "
                       f"{e(_pct(c['change_pct']))} of the set point, P(change) "
                       f"<b>{c['p_change']:.2f}</b></li>")
        out.append("</ul>")
    else:
        out.append("<p>No result qualifies as a probable true change at the panel's "
                   f"false-alarm target ({100 * summ['fdr']:.0f} %).</p>")
    out.append(f"<p>{e(summ['outside_line'])}</p>")
    for d in summ["drift"]:
        out.append(f"<p>{e(d)}</p>")
    out.append("</section>")

    # table
    cov = rows[0]["coverage"] if rows else DEFAULT_COVERAGE
    common = ctx["common_notes"]
    out.append("<section><h2>Results</h2>")
    if common:
        out.append(f"<p class='small'>For every analyte: {e('; '.join(common))}.</p>")
    widths = (12, 6.5, 9.5, 9.5, 5, 11.5, 6, 8, 8.5, 8.5, 15)
    out.append('<table class="results"><colgroup>'
               + "".join(f'<col style="width:{w}%">' for w in widths) + "</colgroup><thead><tr>"
               "<th>Analyte</th><th class='num'>Result</th><th class='num'>Population interval</th>"
               f"<th class='num'>Personal interval ({100 * cov:.0f} %)</th>"
               "<th class='num'>Per\u00adcen\u00adtile</th>"
               "<th>P(change)</th><th class='num'>\u0394 vs mean</th>"
               "<th>Classical RCV</th><th>Log-normal RCV</th>"
               "<th>Indivi\u00addual\u00adity II</th><th>Notes</th></tr></thead><tbody>")
    for r in rows:
        p = r["p_change"]
        bar = ""
        if p is not None:
            bar = (f'<span class="pbar" aria-hidden="true"><i style="width:{100 * p:.0f}%;'
                   f'background:{plots.star_colour(p)}"></i></span>')
        arrow = {"up": " \u2191", "down": " \u2193"}.get(r["direction"], "")
        notes = [n for n in r["notes"] if n not in common]
        out.append(
            f'<tr class="{_row_class(p)}"><td><b>{e(r["label"])}</b><br>'
            f'<span class="small">{e(r["unit"])}</span></td>'
            f'<td class="num{" out" if r["outside_population"] else ""}">{e(r["value"])}</td>'
            f'<td class="num">{e(r["population"])}</td><td class="num">{e(r["personal"])}</td>'
            f'<td class="num">{e(r["percentile"])}</td>'
            f'<td class="pc"><b>{e(r["p_text"])}</b>{e(arrow)} {bar}<br>'
            f'<span class="small">{e(r["change_pct"])} vs set point</span></td>'
            f'<td class="num">{e(r["delta_mean"])}</td>'
            f'<td{" class=beyond" if r["classical_beyond"] else ""}>{_two_lines(r["classical"])}</td>'
            f'<td{" class=beyond" if r["lognormal_beyond"] else ""}>{_two_lines(r["lognormal"])}</td>'
            f'<td>{e(r["ii"])}<br><span class="small">{e(r["ii_short"])}</span></td>'
            f'<td class="small">{e("; ".join(notes) or "–")}</td></tr>')
    out.append("</tbody></table>")
    out.append('<p class="small">Bold result: outside the population interval. Percentile: where the '
               "result falls in the animal's own predictive distribution. P(change) with arrow: "
               "direction of a probable change; under it, the result relative to the set point. "
               "RCV verdicts compare the change from the mean of the baseline results (\u0394) with "
               "the two-sided 95 % RCV (bold: beyond). Individuality II = CVI/CVG: "
               f"&lt; {II_LOW} the population interval tells little for this animal, "
               f"{II_LOW}\u2013{II_HIGH} of limited use, &gt; {II_HIGH} informative "
               f"({e(_II_CITATION)}).</p></section>")

    # next steps
    out.append("<section><h2>What to do next</h2>")
    if advice:
        out.append("<ul>")
        for a in advice:
            src = f" <span class='small'>(source: {e(a['source'])})</span>" if a["source"] else ""
            reasons = "; ".join(f"{k}: {v}" for k, v in a["reasons"].items())
            out.append(f"<li><b>{e(a['title'])}</b> ({e(', '.join(a['analytes']))}): retest in "
                       f"<b>{e(a['when'])}</b>{src}.<br><span class='small'>{e(reasons)}</span></li>")
        out.append("</ul>")
    else:
        out.append("<p>No answer is uncertain and no sample is compromised: no retest is suggested "
                   "by the model (clinical reasons may still call for one).</p>")
    out.append("</section>")

    # plots
    out.append("<section><h2>Results over time</h2>")
    out.append('<div class="legend">')
    if ctx.get("legend_png"):
        out.append(f'<img alt="legend" class="key" src="data:image/png;base64,{ctx["legend_png"]}">')
    out.append("<dl>" + "".join(f"<dt>{e(k)}</dt><dd>{e(v)}</dd>" for k, v in plots.LEGEND_TEXT)
               + "</dl></div>")
    out.append('<div class="grid">')
    for lab, b64 in ctx["figures"]:
        out.append(f'<figure><img alt="{e(lab)} over time" src="data:image/png;base64,{b64}">'
                   "</figure>")
    out.append("</div></section>")

    # method
    out.append("<section><h2>Method and provenance</h2>")
    out.append(f"<p class='small'>{e(METHOD_TEXT)}</p>")
    out.append('<table class="kv"><tbody>')
    for k, v in ctx["provenance"]:
        out.append(f"<tr><td>{e(k)}</td><td>{e(v)}</td></tr>")
    out.append("</tbody></table>")
    out.append('<h3 style="font-size:10pt;margin:3mm 0 1mm">Variation and intervals used</h3>')
    out.append('<table class="cv"><thead><tr><th>Analyte</th><th>CVI</th><th>CVG</th><th>CVA</th>'
               "<th>Population interval</th></tr></thead><tbody>")
    for c in ctx["cv_rows"]:
        cells = "".join(f"<td>{e(c[k][0])} <span class='small'>{e(c[k][1])}</span></td>"
                        for k in ("cvi", "cvg", "cva", "ri"))
        out.append(f"<tr><td>{e(c['label'])}</td>{cells}</tr>")
    out.append("</tbody></table>")
    if ctx["refs"]:
        out.append('<ol class="refs">' + "".join(f"<li>{e(t)}</li>" for t in ctx["refs"]) + "</ol>")
    out.append("</section>")
    out.append(_cautions_html())
    out.append("</body></html>")
    return "\n".join(out)


# --------------------------------------------------------------------------- PDF
def _font_paths() -> tuple[Path, Path] | None:
    import matplotlib

    base = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
    reg, bold = base / "DejaVuSans.ttf", base / "DejaVuSans-Bold.ttf"
    return (reg, bold) if reg.exists() and bold.exists() else None


def _pdf(ctx: dict, path: Path) -> None:
    from io import BytesIO

    from fpdf import FPDF
    from fpdf.fonts import FontFace

    fonts = _font_paths()

    class _Doc(FPDF):
        def footer(self):
            self.set_y(-10)
            self.set_font(ff, size=6.5)
            self.set_text_color(110, 40, 0)
            self.cell(0, 4, "  ".join(CAUTIONS) + f"   Page {self.page_no()}/{{nb}}", align="C")
            self.set_text_color(0, 0, 0)

    pdf = _Doc(orientation="L", unit="mm", format="A4")
    if fonts:
        pdf.add_font("DejaVu", "", str(fonts[0]))
        pdf.add_font("DejaVu", "B", str(fonts[1]))
        ff = "DejaVu"
    else:  # core font: Latin-1 only
        ff = "Helvetica"
    pdf.set_title(ctx["title"])
    pdf.set_creator(f"bayesbase {__version__}")
    pdf.set_auto_page_break(True, margin=13)
    pdf.set_margins(10, 10, 10)
    pdf.add_page()
    W = pdf.w - pdf.l_margin - pdf.r_margin

    def txt(s):
        s = str(s)
        if ff == "Helvetica":
            s = s.encode("latin-1", "replace").decode("latin-1")
        return s

    def cautions_box():
        if pdf.get_y() > pdf.h - pdf.b_margin - 14:  # keep the box on one page
            pdf.add_page()
        pdf.set_draw_color(213, 94, 0)
        pdf.set_fill_color(255, 247, 240)
        pdf.set_font(ff, "B", 8.5)
        y0 = pdf.get_y()
        pdf.multi_cell(W, 4.4, txt("Cautions: " + " ".join(CAUTIONS)), border=1, fill=True,
                       new_x="LMARGIN", new_y="NEXT", align="L", padding=1.2)
        pdf.set_y(max(pdf.get_y(), y0) + 1.5)

    def h2(s):
        if pdf.get_y() > pdf.h - 30:
            pdf.add_page()
        pdf.ln(1.5)
        pdf.set_font(ff, "B", 11)
        pdf.set_text_color(0, 100, 70)
        pdf.cell(W, 6, txt(s), new_x="LMARGIN", new_y="NEXT")
        pdf.set_draw_color(0, 158, 115)
        pdf.line(pdf.l_margin, pdf.get_y(), pdf.l_margin + W, pdf.get_y())
        pdf.set_text_color(0, 0, 0)
        pdf.ln(1)

    def para(s, size=8.5, style=""):
        pdf.set_font(ff, style, size)
        pdf.multi_cell(W, size * 0.48, txt(s), new_x="LMARGIN", new_y="NEXT", align="L")

    info = ctx["info"]
    cautions_box()
    pdf.set_font(ff, "B", 14)
    pdf.multi_cell(W, 7, txt(ctx["title"]), new_x="LMARGIN", new_y="NEXT")
    para(f"Patient {info['patient']} · {info['species']} · breed {info['breed']} · "
         f"sex {info['sex']} · age at assessed specimen {info['age']}", 9)
    para(f"Assessed specimen {info['specimen']}, collected {info['collected']}", 9, "B")
    for s in ctx["specimens"]:
        bits = []
        for part in s["parts"]:
            t = _ROLE_WORDS.get(part["role"], part["role"])
            if part["analytes"]:
                t += f" {part['analytes']}"
            if part["reasons"]:
                t += f" ({'; '.join(part['reasons'])})"
            bits.append(t)
        para(f"{s['date']}  {s['specimen']}: " + " · ".join(bits), 7.8)

    summ = ctx["summary"]
    h2("Panel summary")
    if summ["changes"]:
        para(f"Probable true changes (expected false alarms among them "
             f"{summ['expected_false']:.2f}; target share ≤ {100 * summ['fdr']:.0f} %):", 9)
        for c in summ["changes"]:
            arrow = "↑" if c["direction"] == "up" else "↓"
            para(f"   • {c['label']} {arrow} {c['direction']}, {_pct(c['change_pct'])} of the set "
                 f"point, P(change) {c['p_change']:.2f}", 9, "B")
    else:
        para("No result qualifies as a probable true change at the panel's false-alarm target "
             f"({100 * summ['fdr']:.0f} %).", 9)
    para(summ["outside_line"], 9)
    for d in summ["drift"]:
        para(d, 9)

    h2("Results")
    rows = ctx["rows"]
    common = ctx["common_notes"]
    if common:
        para("For every analyte: " + "; ".join(common) + ".", 7.5)
    cov = rows[0]["coverage"] if rows else DEFAULT_COVERAGE
    head = ("Analyte", "Result", "Population interval", f"Personal interval ({100 * cov:.0f} %)",
            "Centile", "P(change)", "Δ vs baseline mean", "Classical RCV", "Log-normal RCV",
            "II (CVI/CVG)", "Notes")
    widths = (27, 15, 24, 24, 15, 31, 17, 22, 26, 21, 55)
    tints = {"chg": (250, 221, 204), "unc": (251, 236, 204), "low": (226, 241, 251)}
    pdf.set_font(ff, "", 7)
    pdf.set_fill_color(255, 255, 255)
    heading = FontFace(emphasis="BOLD", fill_color=(232, 244, 240))
    with pdf.table(col_widths=widths, width=W, line_height=3.3, text_align="LEFT",
                   headings_style=heading, borders_layout="HORIZONTAL_LINES",
                   padding=0.8, repeat_headings=1, v_align="TOP", cell_fill_mode="NONE") as tab:
        hr = tab.row()
        for hcell in head:
            hr.cell(txt(hcell))
        for r in rows:
            tr = tab.row()
            arrow = {"up": " ↑", "down": " ↓"}.get(r["direction"], "")
            tint = tints.get(_row_class(r["p_change"]))
            bold = FontFace(emphasis="BOLD")
            tr.cell(txt(f"{r['label']}\n{r['unit']}"), style=bold)
            tr.cell(txt(r["value"] + (" *" if r["outside_population"] else "")),
                    style=bold if r["outside_population"] else None)
            tr.cell(txt(r["population"]))
            tr.cell(txt(r["personal"]))
            tr.cell(txt(r["percentile"]))
            tr.cell(txt(f"{r['p_text']}{arrow}\n{r['change_pct']} vs set point"),
                    style=FontFace(emphasis="BOLD", fill_color=tint) if tint else None)
            tr.cell(txt(r["delta_mean"]))
            tr.cell(txt(r["classical"]), style=bold if r["classical_beyond"] else None)
            tr.cell(txt(r["lognormal"]), style=bold if r["lognormal_beyond"] else None)
            tr.cell(txt(f"{r['ii']}\n{r['ii_short']}"))
            tr.cell(txt("; ".join(n for n in r["notes"] if n not in common) or "–"))
    para("* outside the population interval (bold). Centile: percentile, the place of the result in the "
         "animal's own predictive distribution. P(change) shaded by band: blue below "
         f"{UNCERTAIN_BAND[0]}, orange {UNCERTAIN_BAND[0]}–{UNCERTAIN_BAND[1]}, vermillion above. "
         "RCV verdicts compare Δ (change from the baseline mean) with the two-sided 95 % RCV "
         f"(bold: beyond). II < {II_LOW}: population interval tells little for this animal; "
         f"{II_LOW}–{II_HIGH} limited; > {II_HIGH} informative ({_II_CITATION}).", 7)

    h2("What to do next")
    if ctx["advice"]:
        for a in ctx["advice"]:
            src = f" (source: {a['source']})" if a["source"] else ""
            para(f"{a['title']} ({', '.join(a['analytes'])}): retest in {a['when']}{src}.", 8.5, "B")
            para("; ".join(f"{k}: {v}" for k, v in a["reasons"].items()), 7.5)
    else:
        para("No answer is uncertain and no sample is compromised: no retest is suggested by the "
             "model (clinical reasons may still call for one).", 8.5)

    h2("Results over time")
    if ctx.get("legend_bytes"):
        pdf.image(BytesIO(ctx["legend_bytes"]), w=W * 0.8, x=pdf.l_margin + W * 0.1)
    para(" · ".join(f"{k}: {v}" for k, v in plots.LEGEND_TEXT), 6.8)
    ncol = 4
    gap = 3
    cw = (W - gap * (ncol - 1)) / ncol
    ratio = ctx["fig_ratio"]
    ch = cw * ratio
    x0 = pdf.l_margin
    y = pdf.get_y() + 1
    for i, (lab, png) in enumerate(ctx["figure_bytes"]):
        col = i % ncol
        if col == 0 and i:
            y += ch + gap
        if y + ch > pdf.h - 13:
            pdf.add_page()
            y = pdf.t_margin
        pdf.image(BytesIO(png), x=x0 + col * (cw + gap), y=y, w=cw, h=ch)
    pdf.set_y(y + ch + gap)

    h2("Method and provenance")
    para(METHOD_TEXT, 7.6)
    pdf.ln(1)
    for k, v in ctx["provenance"]:
        para(f"{k}: {v}", 7.6)
    pdf.ln(1)
    pdf.set_font(ff, "", 7)
    pdf.set_fill_color(255, 255, 255)
    with pdf.table(col_widths=(40, 30, 30, 30, 60), width=190, cell_fill_mode="NONE", line_height=3.2,
                   text_align="LEFT", headings_style=heading, borders_layout="HORIZONTAL_LINES",
                   padding=0.6, align="LEFT") as tab:
        hr = tab.row()
        for hcell in ("Analyte", "CVI", "CVG", "CVA", "Population interval"):
            hr.cell(hcell)
        for c in ctx["cv_rows"]:
            tr = tab.row()
            tr.cell(txt(c["label"]))
            for k in ("cvi", "cvg", "cva", "ri"):
                tr.cell(txt(f"{c[k][0]} {c[k][1]}"))
    if ctx["refs"]:
        pdf.ln(1)
        for i, t in enumerate(ctx["refs"], 1):
            para(f"[{i}] {t}", 6.6)
    pdf.ln(2)
    cautions_box()
    pdf.output(str(path))


# --------------------------------------------------------------------------- build
def _safe_name(s: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", str(s)).strip("_") or "x"


_CANONICAL_EXTRA = ("role", "reason", "age_years")


def build_report(assessment, pack, out_html, pdf=None, png_dir=None, title: str | None = None,
                 interval_path=None, *, patient: str | None = None, svg: bool = False,
                 dpi: int = 150) -> ReportFiles:
    """Write one patient's report.

    Parameters
    ----------
    assessment : an ``Assessment`` (``.table``, ``.history``, ``.attrs``); it may hold several
        patients only when ``patient`` names one.
    pack : the prior pack used (for the CVs' sources and the retest groups).
    out_html : path of the self-contained HTML file.
    pdf : optional path of a PDF with the same table, plots and cautions (A4 landscape).
    png_dir : optional directory for one PNG per analyte plus an overview PNG (and SVG when
        ``svg=True``).
    title : report title (default "Probability of change — patient <id>").
    interval_path : the personal interval as it stood at each specimen: a DataFrame (columns
        patient, analyte, specimen, collected_at, pi_lower, pi_upper), or a callable used as
        ``assess_fn`` in :func:`personal_interval_path` (called on the assessment's history
        reduced to the canonical columns, with the assessment's engine and coverage), or None
        (only the interval at the assessed specimen is drawn).

    Returns
    -------
    ReportFiles(html, pdf, pngs)
    """
    table = assessment.table
    history = assessment.history
    attrs = dict(getattr(assessment, "attrs", {}) or {})
    if table is None or len(table) == 0:
        raise BayesbaseError("build_report: the assessment has no rows")
    patients = list(dict.fromkeys(table["patient"].astype(str)))
    if patient is None:
        if len(patients) != 1:
            raise BayesbaseError(
                f"build_report makes one patient's report; the assessment holds {len(patients)} "
                f"patients ({', '.join(patients[:5])}{'...' if len(patients) > 5 else ''}): "
                "pass patient=<id>")
        patient = patients[0]
    patient = str(patient)
    if patient not in patients:
        raise BayesbaseError(f"build_report: patient {patient!r} is not in the assessment")
    table = table[table["patient"].astype(str) == patient].reset_index(drop=True)
    history = history[history["patient"].astype(str) == patient]

    if callable(interval_path):
        results = history.drop(columns=[c for c in _CANONICAL_EXTRA if c in history.columns])
        kw = {}
        if "engine" in attrs:
            kw["engine"] = attrs["engine"]
        if "coverage" in attrs:
            kw["coverage"] = attrs["coverage"]
        interval_path = personal_interval_path(results, pack, patient, interval_path, **kw)
    elif interval_path is not None and not isinstance(interval_path, pd.DataFrame):
        raise TypeError("interval_path must be a DataFrame, a callable or None")

    out_html = Path(out_html)
    title = title or f"Probability of change — patient {patient}"
    settings = attrs.get("settings") if isinstance(attrs.get("settings"), Mapping) else {}
    ci_prob = attrs.get("ci_prob", settings.get("ci_prob", DEFAULT_CI_PROB))
    summary = panel_summary(table, ci_prob=float(ci_prob))
    rows = report_rows(table)
    refs = _Refs()
    cv_rows = _cv_rows(table, pack, refs)

    # figures: one panel per analyte, rendered once and reused everywhere
    fig_w, fig_h = 3.4, 2.3
    figure_bytes, figure_b64, pngs = [], [], []
    tab_disp = table.assign(display_unit=[r["unit"] for r in rows])
    if png_dir is not None:
        png_dir = Path(png_dir)
        png_dir.mkdir(parents=True, exist_ok=True)
    for (_, row), r in zip(tab_disp.iterrows(), rows):
        fig = plots.analyte_panel(history, row, interval_path, width=fig_w, height=fig_h)
        data = plots.figure_png(fig, dpi=dpi)
        figure_bytes.append((r["label"], data))
        figure_b64.append((r["label"], base64.b64encode(data).decode("ascii")))
        if png_dir is not None:
            stem = f"{_safe_name(patient)}_{_safe_name(r['analyte'])}"
            p = png_dir / f"{stem}.png"
            p.write_bytes(data)
            pngs.append(p)
            if svg:
                s = png_dir / f"{stem}.svg"
                s.write_text(plots.figure_svg(fig), encoding="utf-8")
                pngs.append(s)
    legend = plots.figure_png(plots.legend_figure(), dpi=dpi)
    if png_dir is not None:
        overview = plots.small_multiples(history, tab_disp, interval_path)
        p = png_dir / f"{_safe_name(patient)}_overview.png"
        p.write_bytes(plots.figure_png(overview, dpi=110))
        pngs.append(p)
        if svg:
            s = png_dir / f"{_safe_name(patient)}_overview.svg"
            s.write_text(plots.figure_svg(overview), encoding="utf-8")
            pngs.append(s)

    ctx = {
        "title": title,
        "info": _patient_info(history, table.iloc[0]),
        "specimens": _specimen_lines(history, patient),
        "summary": summary,
        "rows": rows,
        "common_notes": common_notes(rows),
        "advice": retest_advice(table, pack),
        "figures": figure_b64,
        "figure_bytes": figure_bytes,
        "fig_ratio": fig_h / fig_w,
        "legend_png": base64.b64encode(legend).decode("ascii"),
        "legend_bytes": legend,
        "provenance": _provenance(assessment, pack),
        "cv_rows": cv_rows,
        "refs": refs.items,
    }
    out_html.parent.mkdir(parents=True, exist_ok=True)
    out_html.write_text(_html(ctx), encoding="utf-8")
    pdf_path = None
    if pdf is not None:
        pdf_path = Path(pdf)
        pdf_path.parent.mkdir(parents=True, exist_ok=True)
        _pdf(ctx, pdf_path)
    return ReportFiles(html=out_html, pdf=pdf_path, pngs=tuple(pngs))


def report_for_file(results_path_or_frame, patient: str, pack, out_html, pdf=None, at=None,
                    engine: str = "exact", *, png_dir=None, title=None,
                    with_path: bool = True, **assess_kw) -> ReportFiles:
    """Read results (a path or a frame), assess one patient and write the report.

    ``pack`` is a Pack or a pack id (``"dog"``). With ``with_path`` (default) the personal
    interval is recomputed at every earlier specimen for the stepped ribbon.
    """
    from ..assessment import assess
    from ..data import load_results, validate
    from ..priors import load_pack

    if isinstance(pack, str):
        pack = load_pack(pack)
    if isinstance(results_path_or_frame, pd.DataFrame):
        canonical = {"reported_value", "reported_unit", "censor", "source_row"}
        results = (results_path_or_frame.copy() if canonical <= set(results_path_or_frame.columns)
                   else validate(results_path_or_frame))
    else:
        results = load_results(results_path_or_frame)
    sub = results[results["patient"].astype(str) == str(patient)]
    if sub.empty:
        known = ", ".join(list(dict.fromkeys(results["patient"].astype(str)))[:10])
        raise BayesbaseError(f"patient {patient!r} not found in the results (patients: {known})")
    assessment = assess(sub, pack=pack, engine=engine, at=at, **assess_kw)
    if pack is None and assessment.packs:
        pack = next(iter(assessment.packs.values()))
    path = None
    if with_path:
        # the ribbon of earlier personal intervals always uses the exact engine (one fit per
        # specimen would be slow with MCMC; both engines fit the same model)
        kw = dict(assess_kw)
        kw.pop("seed", None)
        kw["engine"] = "exact"
        kw["trend"] = False  # the ribbon needs the intervals only; the drift model is not used
        path = personal_interval_path(sub, pack, str(patient), assess, **kw)
    return build_report(assessment, pack, out_html, pdf=pdf, png_dir=png_dir, title=title,
                        interval_path=path, patient=str(patient))
