"""Stage 6: the flags of every case. One small function per flag, each vectorised over the
cases: it returns an object array with the flag's words where it applies and "" elsewhere.
:data:`CASE_FLAGS` gives the order in which a case lists its flags."""
from __future__ import annotations

from typing import Callable

import numpy as np
import pandas as pd

from ..contract import HIL_INDICES
from .cases import CaseBatch
from .roles import is_feeding_sensitive

__all__ = ["CASE_FLAGS", "hil_over", "quality", "case_flags", "not_converged_flag", "hil_words",
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
    out = np.full(len(mask), "", dtype=object)
    idx = np.flatnonzero(mask)
    out[idx] = [make(int(i)) for i in idx]
    return out


def assumed_healthy(b: CaseBatch) -> np.ndarray:
    n = b.baselines.n_assumed
    return _words(n > 0, lambda i: f"{n[i]} baseline(s) assumed healthy (state blank)")


def censored_baseline(b: CaseBatch) -> np.ndarray:
    words = "censored baseline value" + (
        " used at its limit (exact engine; use --engine mcmc to model it)" if b.engine == "exact" else "")
    return _words(np.any(b.baselines.c != 0, axis=1), lambda i: words)


def censored_assessed(b: CaseBatch) -> np.ndarray:
    reported = b.assessed.col("reported_value")
    return _words([bool(c) for c in b.censor], lambda i: f"assessed value is censored ({reported[i]})")


def hil_over(b: CaseBatch, idx: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mask, index value, threshold) of the assessed results over the pack's ``idx`` threshold."""
    vals = b.assessed.first[idx] if idx in b.assessed.first.columns else pd.Series(np.nan, index=range(len(b)))
    v = pd.to_numeric(vals, errors="coerce").to_numpy(dtype=float)
    thr = np.array([p.hil_thresholds.get(idx, np.nan) for p in b.prior], dtype=float)
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
        return _words(over, lambda i: hil_words(idx, v[i], thr[i],
                                                b.prior[i].interference.get(idx, "variable")))

    flag.__name__ = f"{idx}_over_threshold"
    return flag


def not_fasted(b: CaseBatch) -> np.ndarray:
    mask = [is_feeding_sensitive(p) and f is False for p, f in zip(b.prior, b.assessed.col("fasted"))]
    return _words(mask, lambda i: "assessed specimen not fasted (feeding-sensitive analyte)")


def method_changed(b: CaseBatch) -> np.ndarray:
    m = b.method

    def words(i):
        if m.corrected[i]:
            bias, bsd = m.bias[i]
            return (f"method changed ({m.before[i]} -> {m.after[i]}); "
                    f"corrected by a stated bias of {100*bias:+.1f} % (SD {100*bsd:.1f} %)")
        return (f"not directly comparable: method changed ({m.before[i]} -> {m.after[i]}) "
                "and no between-method bias is given")

    return _words(m.changed, words)


def mixed_units(b: CaseBatch) -> np.ndarray:
    seen = [set(b.baselines.units.get(i, ())) | {u} for i, u in enumerate(b.assessed.unit)]
    return _words([len(s) > 1 for s in seen], lambda i: (
        f"reported in different units ({', '.join(sorted(seen[i]))}); converted to {b.prior[i].unit}"))


def no_baseline(b: CaseBatch) -> np.ndarray:
    return _words(b.baselines.n == 0, lambda i: "no baseline: population prior alone")


def cva_high(b: CaseBatch) -> np.ndarray:
    return _words([p.cva_high for p in b.prior], lambda i: f"{CVA_RULE}: the RCV is dominated by analytical "
                                                            "imprecision")


def young_animal(b: CaseBatch) -> np.ndarray:
    """The pack's age rule (``age_dependent``: how the analyte differs in growing animals), for an
    animal younger than :data:`YOUNG_YEARS` at the assessed specimen. Breed and sample notes are
    other flags (:func:`breed_note`)."""
    age = np.array(b.assessed.col("age_years"), dtype=float)
    dependent = np.array([bool(p.age_dependent) for p in b.prior], dtype=bool)
    return _words(dependent & (age < YOUNG_YEARS), lambda i: (
        f"young animal ({age[i]:.1f} years; age rule under {YOUNG_YEARS:g} years): {b.prior[i].age_dependent}"))


def _breed_key(breed: str) -> str:
    return "_".join(str(breed).strip().lower().replace("-", " ").split())


def breed_note(b: CaseBatch) -> np.ndarray:
    """The pack's note for the animal's breed (``breed_notes``: breed -> text), whatever its age.

    ``breed_notes`` is a pack field the schema does not carry yet (requested from the pack
    schema's owner); until it does, packs hold such notes in the analyte's ``note`` and this flag
    stays silent."""
    notes = [getattr(p, "breed_notes", None) or {} for p in b.prior]
    keys = [_breed_key(br) if br else "" for br in b.breed]
    return _words([bool(k) and k in n for k, n in zip(keys, notes)],
                  lambda i: f"breed note ({b.breed[i]}): {notes[i][keys[i]]}")


def breed_centre(b: CaseBatch) -> np.ndarray:
    used = [bool(br) and c != p.center for br, c, p in zip(b.breed, b.center, b.prior)]
    return _words(used, lambda i: f"breed-specific centre used ({b.breed[i]})")


#: every flag of a case, in the order a case lists them
CASE_FLAGS: tuple[Callable[[CaseBatch], np.ndarray], ...] = (
    assumed_healthy, censored_baseline, censored_assessed, *(_hil_flag(i) for i in HIL_INDICES),
    not_fasted, method_changed, mixed_units, no_baseline, cva_high, young_animal, breed_note, breed_centre,
)


def case_flags(b: CaseBatch, flags=CASE_FLAGS) -> list[list[str]]:
    """The flags of every case (a list of words per case)."""
    columns = [f(b) for f in flags]
    return [[w for w in words if w] for words in zip(*columns)]


def quality(b: CaseBatch) -> list[str]:
    """Sample quality of each assessed result: ``ok``, or the H/L/I indices over the pack's
    thresholds (``haemolysis,lipaemia``)."""
    over = [hil_over(b, idx)[0] for idx in HIL_INDICES]
    return [",".join(n for n, o in zip(HIL_INDICES, row) if o) or "ok" for row in zip(*over)]


def not_converged_flag(diagnostics: dict) -> str:
    return ("MCMC DID NOT CONVERGE: do not use these numbers "
            f"(max r_hat {diagnostics.get('max_r_hat')}, divergences {diagnostics.get('divergences')})")
