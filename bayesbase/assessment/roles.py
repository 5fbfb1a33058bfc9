"""Stage 4: the assessed specimen of every patient and the role of every row of the history.

Baseline rule: earlier specimens of the same analyte whose state is healthy or blank (blank is
reported as "assumed healthy"). Each rule of :data:`BASELINE_RULES` takes the rows still
eligible and returns the rows it leaves out with the reason; the rows no rule leaves out form
the baseline.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from ..contract import (
    HIL_INDICES,
    ROLE_ASSESSED,
    ROLE_BASELINE,
    ROLE_EXCLUDED,
    ROLE_LATER,
    ROLE_NOT_ASSESSED,
    ROLE_UNWELL,
)
from ..errors import BayesbaseError
from .frame import factorized
from .packs import RowPriors

__all__ = ["FEEDING_SENSITIVE_DEFAULT", "Targets", "CaseRows", "RuleContext", "Roles",
           "BASELINE_RULES", "is_feeding_sensitive", "pick_assessed", "assessed_specimens",
           "case_rows", "rule_context", "assign_roles", "texts_full"]

#: Analytes moved by feeding (fasting study of 100 healthy dogs, as summarised in the project's
#: sample-quality notes: triglycerides, urea, phosphate, glucose); used when a pack is silent.
FEEDING_SENSITIVE_DEFAULT = frozenset({"triglycerides", "urea", "phosphate", "glucose"})


def texts_full(n: int, text: str) -> np.ndarray:
    """An object array of ``n`` references to ``text`` (``np.full`` with a text makes ``n`` new
    strings, one by one)."""
    out = np.empty(n, dtype=object)
    out.fill(text)
    return out


def is_feeding_sensitive(prior) -> bool:
    """The pack's word, else :data:`FEEDING_SENSITIVE_DEFAULT`."""
    fs = prior.feeding_sensitive
    return bool(fs) if fs is not None else prior.analyte in FEEDING_SENSITIVE_DEFAULT


# ------------------------------------------------------------------ the assessed specimen
@dataclass(frozen=True)
class Targets:
    """The assessed specimen of every patient and when it was collected."""

    specimen: dict  # patient -> specimen id
    collected_at: pd.Series  # index patient -> Timestamp


def pick_assessed(spec: pd.DataFrame, at) -> str:
    """Specimen id to assess among one patient's specimens (``specimen``, ``collected_at``,
    in collection order): the latest, or one named by ``at`` (a specimen id or a date: the
    latest specimen collected on or before that date; a bare date means the whole day)."""
    if at is None:
        return spec["specimen"].iloc[-1]
    at_s = str(at)
    if at_s in set(spec["specimen"]):
        return at_s
    before = spec[spec["collected_at"] <= _at_time(at_s)]
    if before.empty:
        raise BayesbaseError(f"no specimen of this patient was collected on or before {at_s}")
    return before["specimen"].iloc[-1]


def _at_time(at_s: str) -> pd.Timestamp:
    """The latest collection time ``--at`` allows when it names no specimen (UTC, naive; a bare
    date means the whole day)."""
    try:
        ts = pd.Timestamp(at_s)
    except (ValueError, TypeError):
        raise BayesbaseError(f"--at '{at_s}' is neither a specimen id of this patient nor a date") from None
    if ts.tzinfo is not None:
        ts = ts.tz_convert("UTC").tz_localize(None)
    if len(at_s) <= 10:  # a bare date means the whole day
        ts = ts + pd.Timedelta(days=1) - pd.Timedelta(microseconds=1)
    return ts


def _targets_at(hist: pd.DataFrame, at, cache: dict | None = None) -> Targets:
    """:func:`pick_assessed` for every patient at once (same choice, same errors): the specimen
    ``at`` names where the patient has it, else the last specimen (row order) collected on or
    before the time ``at`` gives."""
    pc, pu, _, _, first = _specimen_rows(hist, cache)
    at_s = str(at)
    sp = hist["specimen"].to_numpy(dtype=object)[first]
    pick = np.full(len(pu), -1, dtype=np.int64)
    named = first[sp == at_s]
    pick[pc[named]] = named
    if (pick < 0).any():
        t = hist["collected_at"].to_numpy(dtype="datetime64[ns]")[first]
        ok = first[t <= _at_time(at_s).to_datetime64()]
        last = np.full(len(pu), -1, dtype=np.int64)
        np.maximum.at(last, pc[ok], ok)
        pick = np.where(pick < 0, last, pick)
        if (pick < 0).any():
            raise BayesbaseError(f"no specimen of this patient was collected on or before {at_s}")
    pids = [str(p) for p in pu]
    target = dict(zip(pids, hist["specimen"].iloc[pick].tolist()))
    return Targets(specimen=target, collected_at=pd.Series(list(hist["collected_at"].iloc[pick]), index=pids))


def _specimen_rows(hist: pd.DataFrame, cache: dict | None = None):
    """(patient codes, patient ids, specimen codes, specimen ids, first row of every
    (patient, specimen) in row order); ``cache``: as for :func:`.frame.factorized`."""
    pc, pu = factorized(hist, "patient", cache)
    sc, su = factorized(hist, "specimen", cache)
    pair = pc.astype(np.int64) * (len(su) + 1) + sc
    starts = np.flatnonzero(np.r_[True, pair[1:] != pair[:-1]]) if len(pair) else np.zeros(0, dtype=np.int64)
    if len(_sorted_unique(pair[starts])) == len(starts):  # every pair in one run of rows (a sorted history)
        return pc, pu, sc, su, starts
    first = np.sort(np.unique(pair, return_index=True)[1])
    return pc, pu, sc, su, first


def _sorted_unique(values: np.ndarray) -> np.ndarray:
    """The distinct integers of ``values`` (sorted), by one sort."""
    a = np.sort(values)
    return a[np.r_[True, a[1:] != a[:-1]]] if len(a) else a


def assessed_specimens(hist: pd.DataFrame, at=None, cache: dict | None = None) -> Targets:
    """The assessed specimen of each patient (specimens are keyed by patient and id);
    ``cache``: as for :func:`.frame.factorized`."""
    if at is not None:
        return _targets_at(hist, at, cache)
    pc, pu, _, _, first = _specimen_rows(hist, cache)
    last = np.full(len(pu), -1, dtype=np.int64)
    np.maximum.at(last, pc[first], first)  # the last specimen (in row order) of every patient
    last = np.sort(last)
    pids = hist["patient"].iloc[last].tolist()
    target = dict(zip(pids, hist["specimen"].iloc[last].tolist()))
    when = pd.Series(list(hist["collected_at"].iloc[last]), index=pids)
    return Targets(specimen=target, collected_at=when)


@dataclass(frozen=True)
class CaseRows:
    """Rows of a history against the assessed specimens: a case is a (patient, analyte)
    measured in the patient's assessed specimen."""

    key: pd.Series  # the (patient, analyte) of every row (any hashable key)
    is_assessed: np.ndarray  # row of the patient's assessed specimen
    in_case: np.ndarray  # row of an analyte the assessed specimen measured
    earlier: np.ndarray  # in a case, collected before the assessed specimen
    later: np.ndarray  # in a case, not assessed, not earlier
    assessed_keys: np.ndarray  # the cases, in row order
    case: np.ndarray | None = None  # the case of every row (-1: in none), when known


def case_rows(hist: pd.DataFrame, targets: Targets, cache: dict | None = None) -> CaseRows:
    """The rows of ``hist`` against ``targets``; ``cache``: as for :func:`.frame.factorized`."""
    pc, pu = factorized(hist, "patient", cache)
    ac, au = factorized(hist, "analyte", cache)
    key, _ = pd.factorize(pc.astype(np.int64) * (len(au) + 1) + ac)  # dense (patient, analyte) code
    sc, su = factorized(hist, "specimen", cache)
    pids = pd.Index(pu)
    target_code = pd.Index(su).get_indexer(pids.map(lambda p: targets.specimen.get(p)))
    is_assessed = (sc == target_code[pc]) & (target_code[pc] >= 0)
    assessed_keys = pd.unique(key[is_assessed])
    case_of_key = np.full(int(key.max()) + 1 if len(key) else 0, -1, dtype=np.int64)
    case_of_key[assessed_keys] = np.arange(len(assessed_keys))
    case = case_of_key[key]
    in_case = case >= 0
    t_arr = hist["collected_at"].to_numpy()
    tt_arr = targets.collected_at.reindex(pids).to_numpy()[pc]
    earlier = in_case & ~is_assessed & (t_arr < tt_arr)
    later = in_case & ~is_assessed & ~earlier
    return CaseRows(key=key, is_assessed=is_assessed, in_case=in_case, earlier=earlier, later=later,
                    assessed_keys=assessed_keys, case=case)


# ------------------------------------------------------------------------ baseline rules
@dataclass(frozen=True)
class RuleContext:
    """What the baseline rules read, one entry per row."""

    key: np.ndarray
    state: np.ndarray  # "" (blank), "healthy", "unwell"
    compromised: np.ndarray  # an H/L/I index above the pack's threshold
    quality_text: np.ndarray  # which index, by how much, expected interference
    feeding: np.ndarray  # feeding-sensitive analyte
    fasted: np.ndarray  # fasted is True
    not_fasted: np.ndarray  # fasted is False
    keep_compromised: bool


def _quality_problems(hist: pd.DataFrame, priors: RowPriors, in_case: np.ndarray):
    """Rows (in a case) with an H/L/I index above the pack's threshold, and the words."""
    n = len(hist)
    compromised = np.zeros(n, dtype=bool)
    text = texts_full(n, "")
    for idx in HIL_INDICES:
        if idx not in hist:
            continue
        vals = pd.to_numeric(hist[idx], errors="coerce").to_numpy(dtype=float)
        thr = priors.column(lambda p, idx=idx: p.hil_thresholds.get(idx, np.nan), np.nan)
        over = np.isfinite(vals) & np.isfinite(thr) & (vals > thr) & in_case
        for i in np.flatnonzero(over):
            how = priors.at(i).interference.get(idx, "variable")
            txt = f"{idx} index {vals[i]:g} above {thr[i]:g} (interference: {how})"
            text[i] = txt if not text[i] else text[i] + "; " + txt
        compromised |= over
    return compromised, text


def rule_context(hist: pd.DataFrame, rows: CaseRows, priors: RowPriors,
                 keep_compromised: bool) -> RuleContext:
    compromised, text = _quality_problems(hist, priors, rows.in_case)
    fasted = hist["fasted"] if "fasted" in hist else pd.Series(pd.NA, index=hist.index)
    return RuleContext(
        key=np.asarray(rows.key), state=hist["state"].fillna("").astype(str).to_numpy(),
        compromised=compromised, quality_text=text,
        feeding=priors.column(is_feeding_sensitive, False, dtype=bool),
        fasted=fasted.eq(True).fillna(False).to_numpy(dtype=bool),
        not_fasted=fasted.eq(False).fillna(False).to_numpy(dtype=bool),
        keep_compromised=keep_compromised,
    )


Rule = Callable[[RuleContext, np.ndarray], "tuple[np.ndarray, str | np.ndarray]"]


def unwell_rule(ctx: RuleContext, eligible: np.ndarray):
    """An unwell visit is shown but never used for the set point."""
    return eligible & (ctx.state == "unwell"), "state unwell: shown, never used for the set point"


def sample_quality_rule(ctx: RuleContext, eligible: np.ndarray):
    """An H/L/I index above the pack's threshold leaves the result out (unless kept)."""
    out = eligible & ctx.compromised & (not ctx.keep_compromised)
    why = texts_full(len(out), "")
    why[out] = ["sample quality: " + t for t in ctx.quality_text[out]]
    return out, why


def _any_per_key(flag: np.ndarray, key) -> np.ndarray:
    """Per row: ``flag`` holds on some row of the same key (pandas' groupby ``transform("any")``;
    counted per code when the keys are codes 0, 1, ...)."""
    key = np.asarray(key)
    if key.dtype.kind in "iu" and len(key) and key.min() >= 0:
        return (np.bincount(key[flag], minlength=int(key.max()) + 1) > 0)[key]
    return pd.Series(flag).groupby(key).transform("any").to_numpy(dtype=bool)


def fasting_rule(ctx: RuleContext, eligible: np.ndarray):
    """For a feeding-sensitive analyte, non-fasted results are left out when fasted ones exist."""
    has_fasted = _any_per_key(eligible & ctx.fasted, ctx.key)
    out = eligible & ctx.feeding & has_fasted & ctx.not_fasted
    return out, "not fasted (feeding-sensitive analyte; fasted baselines exist)"


#: (role of the rows a rule leaves out, rule), applied in this order to the earlier rows
BASELINE_RULES: tuple[tuple[str, Rule], ...] = (
    (ROLE_UNWELL, unwell_rule),
    (ROLE_EXCLUDED, sample_quality_rule),
    (ROLE_EXCLUDED, fasting_rule),
)


@dataclass(frozen=True)
class Roles:
    """Role and reason of every row, and the rows that form the baselines."""

    role: np.ndarray
    reason: np.ndarray
    baseline: np.ndarray
    kept: np.ndarray  # baseline kept with an index above the threshold (variance inflated)
    assumed: np.ndarray  # baseline with a blank state ("assumed healthy")
    #: ((code per row, texts) of ``role``, the same of ``reason``), when made from codes
    coded: tuple | None = None


class _CodedTexts:
    """A column of texts held as a code per row over a table of the distinct texts."""

    def __init__(self, n: int, text: str):
        self.codes = np.zeros(n, dtype=np.int64)
        self.names, self._index = [text], {text: 0}

    def _code(self, text) -> int:
        k = self._index.get(text)
        if k is None:
            k = self._index[text] = len(self.names)
            self.names.append(text)
        return k

    def set(self, mask: np.ndarray, text) -> None:
        """``text`` where ``mask`` holds (a text, or an array of one per row)."""
        if isinstance(text, str):
            self.codes[mask] = self._code(text)
            return
        idx = np.flatnonzero(mask)
        if len(idx):
            self.codes[idx] = [self._code(t) for t in np.asarray(text, dtype=object)[idx].tolist()]

    def values(self) -> np.ndarray:
        """The texts as an object array."""
        table = np.empty(len(self.names), dtype=object)
        table[:] = self.names
        return table[self.codes]


def assign_roles(rows: CaseRows, ctx: RuleContext, rules=BASELINE_RULES) -> Roles:
    n = len(rows.in_case)
    role = _CodedTexts(n, ROLE_NOT_ASSESSED)
    reason = _CodedTexts(n, "analyte not measured in the assessed specimen")
    role.set(rows.is_assessed, ROLE_ASSESSED)
    reason.set(rows.is_assessed, "")
    role.set(rows.later, ROLE_LATER)
    reason.set(rows.later, "collected with or after the assessed specimen")
    eligible = rows.earlier
    for left_out_as, rule in rules:
        out, why = rule(ctx, eligible)
        role.set(out, left_out_as)
        reason.set(out, why)
        eligible = eligible & ~out
    kept = eligible & ctx.compromised & ctx.keep_compromised
    role.set(eligible, ROLE_BASELINE)
    reason.set(eligible, "")
    if kept.any():
        why = np.empty(n, dtype=object)
        why[kept] = ["kept with inflated variance: " + t for t in ctx.quality_text[kept]]
        reason.set(kept, why)
    assumed = eligible & (ctx.state == "")
    reason.set(assumed & ~kept, "assumed healthy (state blank)")
    return Roles(role=role.values(), reason=reason.values(), baseline=eligible, kept=kept, assumed=assumed,
                 coded=((role.codes, role.names), (reason.codes, reason.names)))
