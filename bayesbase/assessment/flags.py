"""Stage 6: the flags of every case. One small function per flag, each vectorised over the
cases: it returns an object array with the flag's words where it applies and "" elsewhere.
:data:`CASE_FLAGS` gives the order in which a case lists its flags."""
from __future__ import annotations

import math
from typing import Callable

import numpy as np
import pandas as pd

from ..contract import HIL_INDICES
from .cases import CaseBatch, text_column
from .roles import is_feeding_sensitive, texts_full

__all__ = ["CASE_FLAGS", "hil_over", "quality", "quality_column", "case_flags", "not_converged_flag", "hil_words",
           "YOUNG_YEARS", "CVA_RULE"]

#: age (years) under which a pack's age rule (``age_dependent``: how the analyte differs in growing
#: animals) is flagged. bayesbase modelling choice: age-related changes are most evident during the
#: first year of life (Harper EJ et al. J Am Vet Med Assoc 2003;223(10):1436-1442, abstract), plus
#: half a year for large breeds that mature later (recalled).
YOUNG_YEARS = 1.5

#: the desirable analytical imprecision, CVA <= 0.5 CVI, of the hierarchy of analytical quality
#: goals based on biological variation (Fraser CG, Petersen PH. Desirable standards for laboratory
#: tests if they are to fulfill medical needs. Clin Chem 1993;39(7):1447-1453; attribution as in the
#: documentation of the R package valytics, function ate_from_bv; bibliographic details recalled)
CVA_RULE = "CVA above half the CVI (desirable imprecision CVA <= 0.5 CVI; Fraser & Petersen, Clin Chem 1993)"

#: what each sample-quality index measures (the pack's HIL scale: serum index in mg/dL)
_INDEX_MEANS = {
    "haemolysis": "free haemoglobin from red cells broken in the tube",
    "lipaemia": "turbidity from lipids, typically after a meal",
    "icterus": "bilirubin colour in the serum",
}
#: what to do about it
_INDEX_REMEDY = {
    "haemolysis": "measure again on a clean, promptly separated specimen before acting on it",
    "lipaemia": "measure again on a specimen taken after a fast before acting on it",
    "icterus": "ask the laboratory whether a method less affected by bilirubin is available",
}
_BIAS = {
    "up": "this result is expected to read falsely high",
    "down": "this result is expected to read falsely low",
}


def _words(mask, make: Callable[[int], str]) -> np.ndarray:
    """``make(i)`` where ``mask`` holds, "" elsewhere."""
    mask = np.asarray(mask, dtype=bool)
    out = texts_full(len(mask), "")
    idx = np.flatnonzero(mask)
    out[idx] = [make(int(i)) for i in idx]
    return out


def _words_by(mask, keys, make: Callable[[object], str]) -> np.ndarray:
    """``make(key)`` where ``mask`` holds, computed once per distinct key of the flagged cases
    ("" elsewhere): for flags whose words depend on a few values only."""
    mask = np.asarray(mask, dtype=bool)
    out = texts_full(len(mask), "")
    idx = np.flatnonzero(mask)
    if len(idx):
        keys = np.asarray(keys)
        if keys.dtype.kind in "iub":  # integer keys: grouped by one sort
            uniq, codes = np.unique(keys[idx], return_inverse=True)
            uniq, codes = uniq.tolist(), codes.reshape(-1)
        else:
            codes, uniq = pd.factorize(np.asarray(keys, dtype=object)[idx], use_na_sentinel=False)
        out[idx] = np.asarray([make(k) for k in uniq] + [""], dtype=object)[codes]
    return out


def assumed_healthy(b: CaseBatch) -> np.ndarray:
    n = b.baselines.n_assumed
    return _words_by(n > 0, n, lambda k: f"{k} baseline(s) assumed healthy (state blank)")


def censored_baseline(b: CaseBatch) -> np.ndarray:
    words = "censored baseline value" + (
        " used at its limit (exact engine; use --engine mcmc to model it)" if b.engine == "exact" else "")
    return _words(np.any(b.baselines.c != 0, axis=1), lambda i: words)


def censored_assessed(b: CaseBatch) -> np.ndarray:
    cen = np.asarray(b.censor, dtype=object)
    mask = (cen != "") & pd.notna(cen)
    reported = b.assessed.first["reported_value"].to_numpy(dtype=object) if mask.any() else None
    return _words(mask, lambda i: f"assessed value is censored ({reported[i]})")


def hil_over(b: CaseBatch, idx: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mask, index value, threshold) of the assessed results over the pack's ``idx`` threshold."""
    vals = b.assessed.first[idx] if idx in b.assessed.first.columns else pd.Series(np.nan, index=range(len(b)))
    v = pd.to_numeric(vals, errors="coerce").to_numpy(dtype=float)
    thr = b.prior_attr(lambda p: p.hil_thresholds.get(idx, np.nan))
    return np.isfinite(v) & np.isfinite(thr) & (v > thr), v, thr


def hil_words(idx: str, value: float, threshold: float, direction: str) -> str:
    """The compromised-sample flag: what the index measures, the expected direction of the bias
    (the pack's interference direction and its source), and what to do."""
    bias = _BIAS.get(direction, "the bias depends on the method and may go either way")
    return (f"{idx} index {value:g} over the pack's limit {threshold:g} ({_INDEX_MEANS[idx]}): "
            f"{bias}; {_INDEX_REMEDY[idx]}")


def _hil_flag(idx: str) -> Callable[[CaseBatch], np.ndarray]:
    def flag(b: CaseBatch) -> np.ndarray:
        over, v, thr = hil_over(b, idx)
        if not over.any():
            return texts_full(len(b), "")
        how = b.prior_attr(lambda p: p.interference.get(idx, "variable"), object)
        return _words(over, lambda i: hil_words(idx, v[i], thr[i], how[i]))

    flag.__name__ = f"{idx}_over_threshold"
    return flag


def not_fasted(b: CaseBatch) -> np.ndarray:
    first = b.assessed.first
    fasted = first["fasted"] if "fasted" in first.columns else pd.Series(pd.NA, index=first.index)
    mask = b.prior_attr(is_feeding_sensitive, bool) & fasted.eq(False).fillna(False).to_numpy(dtype=bool)
    return _words(mask, lambda i: "assessed specimen not fasted (feeding-sensitive analyte)")


def _pct(log_bias: float) -> str:
    return f"{100 * math.expm1(log_bias):+.1f} %"


def calibrated_words(before: str, after: str, cal: dict, extra_var: float) -> str:
    """The flag of a method change corrected by the pack's calibrated biases (:mod:`.cases`)."""
    ref = cal["reference"]
    biases = ", ".join(f"{m} {'reference' if m == ref else _pct(bs[0])}" for m, bs in sorted(cal["biases"].items()))
    return (f"method changed ({before} -> {after}); calibrated correction applied: each result corrected by "
            f"its method's bias against the reference method {cal['reference']} from the pack ({biases}), "
            f"the baseline read on {after}'s scale, bias uncertainty (log SD {math.sqrt(extra_var):.3f}) "
            "added to the variance")


def method_changed(b: CaseBatch) -> np.ndarray:
    m = b.method
    kind = m.kind or [""] * len(b)
    uncovered = m.uncovered or [()] * len(b)

    def words(i):
        if m.corrected[i] and kind[i] == "calibrated":
            return calibrated_words(m.before[i], m.after[i], m.calibrated[i], float(m.extra_var[i]))
        if m.corrected[i]:
            bias, bsd = m.bias[i]
            return (f"method changed ({m.before[i]} -> {m.after[i]}); "
                    f"corrected by a stated bias of {100*bias:+.1f} % (SD {100*bsd:.1f} %)")
        why = (f"the pack's calibrated biases do not cover {', '.join(uncovered[i])}" if uncovered[i]
               else "no between-method bias is given")
        return f"not directly comparable: method changed ({m.before[i]} -> {m.after[i]}) and {why}"

    return _words(m.changed, words)


def _unit_codes(b: CaseBatch) -> np.ndarray:
    """The assessed reported unit of every case as a code of ``b.baselines.units.names`` (-2
    when the baseline never saw it)."""
    lookup = {v: k for k, v in enumerate(b.baselines.units.names)}
    codes, uniq = pd.factorize(np.asarray(b.assessed.unit, dtype=object), use_na_sentinel=False)
    return np.asarray([lookup.get(u, -2) for u in uniq] + [-2], dtype=np.int64)[codes]


def mixed_units(b: CaseBatch) -> np.ndarray:
    mixed = b.baselines.units.differs(_unit_codes(b))
    unit = b.prior_attr(lambda p: p.unit, object)
    return _words(mixed, lambda i: (
        f"reported in different units ({', '.join(b.baselines.units.texts(i, b.assessed.unit[i]))}); "
        f"converted to {unit[i]}"))


def no_baseline(b: CaseBatch) -> np.ndarray:
    return _words_by(b.baselines.n == 0, np.zeros(len(b), dtype=np.int64),
                     lambda k: "no baseline: population prior alone")


def cva_high(b: CaseBatch) -> np.ndarray:
    return _words_by(b.prior_attr(lambda p: p.cva_high, bool), np.zeros(len(b), dtype=np.int64),
                     lambda k: f"{CVA_RULE}: the RCV is dominated by analytical imprecision")


def young_animal(b: CaseBatch) -> np.ndarray:
    """The pack's age rule (``age_dependent``: how the analyte differs in growing animals), for an
    animal younger than :data:`YOUNG_YEARS` at the assessed specimen. Breed and sample notes are
    other flags (:func:`breed_note`). Worded once per distinct (age, prior)."""
    first = b.assessed.first
    age = (first["age_years"].to_numpy(dtype=float, na_value=np.nan) if "age_years" in first.columns
           else np.full(len(b), np.nan))
    dependent = b.prior_attr(lambda p: bool(p.age_dependent), bool)
    priors, pindex = b.prior_groups
    mask = dependent & (age < YOUNG_YEARS)
    idx = np.flatnonzero(mask)
    ages, acode = np.unique(age[idx], return_inverse=True)
    keys = np.zeros(len(b), dtype=np.int64)
    keys[idx] = acode.reshape(-1) * len(priors) + pindex[idx]
    return _words_by(mask, keys, lambda k: (
        f"young animal ({ages[k // len(priors)]:.1f} years; age rule under {YOUNG_YEARS:g} years): "
        f"{priors[k % len(priors)].age_dependent}"))


def _breed_key(breed: str) -> str:
    return "_".join(str(breed).strip().lower().replace("-", " ").split())


def breed_note(b: CaseBatch) -> np.ndarray:
    """The pack's note for the animal's breed (``breed_notes``: breed -> text, a schema field with
    its source in ``sources["breed_notes.<breed>"]``), whatever the animal's age. Worded once per
    distinct (prior, breed)."""
    b.prior_attr(lambda p: None, object)  # the distinct priors
    priors, pindex = b.prior_groups
    if not any(getattr(p, "breed_notes", None) for p in priors):
        return texts_full(len(b), "")
    bc, bnames = pd.factorize(np.asarray(b.breed, dtype=object))
    width = len(bnames) + 1
    used, inv = np.unique(pindex * width + (bc + 1), return_inverse=True)

    def words(pair: int) -> str:
        k = pair % width
        notes = getattr(priors[pair // width], "breed_notes", None) or {}
        key = _breed_key(bnames[k - 1]) if k else ""
        return f"breed note ({bnames[k - 1]}): {notes[key]}" if key and key in notes else ""

    return np.asarray([words(pr) for pr in used.tolist()], dtype=object)[inv.reshape(-1)]


def breed_centre(b: CaseBatch) -> np.ndarray:
    breed = np.asarray(b.breed, dtype=object)
    used = (breed != None) & (np.asarray(b.center, dtype=float) != b.prior_attr(lambda p: p.center))  # noqa: E711
    return _words_by(used, breed, lambda k: f"breed-specific centre used ({k})")


#: every flag of a case, in the order a case lists them
CASE_FLAGS: tuple[Callable[[CaseBatch], np.ndarray], ...] = (
    assumed_healthy, censored_baseline, censored_assessed, *(_hil_flag(i) for i in HIL_INDICES),
    not_fasted, method_changed, mixed_units, no_baseline, cva_high, young_animal, breed_note, breed_centre,
)


def case_flags(b: CaseBatch, flags=CASE_FLAGS) -> list[list[str]]:
    """The flags of every case (a list of words per case), gathered column by column: the words
    of each flag where it applies, ordered by case (stable: a case lists them in flag order)."""
    n = len(b)
    hits, words = [np.zeros(0, dtype=np.int64)], [np.zeros(0, dtype=object)]
    for f in flags:
        col = np.asarray(f(b), dtype=object)
        on = np.flatnonzero(col != "")
        hits.append(on)
        words.append(col[on])
    case = np.concatenate(hits)
    order = np.argsort(case, kind="stable")
    flat = np.concatenate(words)[order].tolist()
    ends = np.cumsum(np.bincount(case, minlength=n)).tolist()
    return [flat[a:e] for a, e in zip([0] + ends[:-1], ends)]


def _quality_codes(b: CaseBatch) -> tuple[np.ndarray, list[str]]:
    """(code per case, the texts of the codes) of :func:`quality`."""
    code = np.zeros(len(b), dtype=np.int64)
    for k, idx in enumerate(HIL_INDICES):
        code |= hil_over(b, idx)[0].astype(np.int64) << k
    names = [",".join(n for k, n in enumerate(HIL_INDICES) if c >> k & 1) or "ok"
             for c in range(1 << len(HIL_INDICES))]
    return code, names


def quality(b: CaseBatch) -> list[str]:
    """Sample quality of each assessed result: ``ok``, or the H/L/I indices over the pack's
    thresholds (``haemolysis,lipaemia``)."""
    code, names = _quality_codes(b)
    return np.asarray(names, dtype=object)[code].tolist()


def quality_column(b: CaseBatch):
    """:func:`quality` as the results table's column (:func:`.cases.text_column`)."""
    return text_column(*_quality_codes(b))


def not_converged_flag(diagnostics: dict) -> str:
    return ("MCMC DID NOT CONVERGE: do not use these numbers "
            f"(max r_hat {diagnostics.get('max_r_hat')}, divergences {diagnostics.get('divergences')})")
