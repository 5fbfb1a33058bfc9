"""Stage 5: the case batch. A case is one (patient, analyte) of an assessed specimen; the batch
holds the baselines padded to arrays (log scale, one column per specimen), the assessed result,
the per-case prior scalars and the metadata later stages read (prior, pack, breed, method).

A method change (:func:`method_changes`) is made comparable in one of two ways:

* *stated*: ``method_bias[analyte] = (bias, bias_sd)`` fractions given by the caller (the
  assessment's ``method_bias`` option): the assessed ln value is corrected by ln(1 + bias) onto the
  baseline's method and ln(1 + bias_sd^2) is added to its variance. An explicit option always wins
  over the pack.
* *calibrated*: the pack carries ``method_biases`` for the analyte (ln bias b_m and its SD s_m of
  every method against one reference method, e.g. from ``bayesbase calibrate``) covering the new
  result's method and the method of every baseline specimen. Each result is corrected by its own
  method's bias to the reference method, and the series is read on the new result's method: baseline
  specimen j moves by b_new - b_m(j) (ln), the new result stays as measured, so the set point, the
  personal interval and the change are on the scale of the result being read. The uncertainty of
  the correction is added to the new result's variance: Var(b_new - sum_j b_m(j) / n) =
  s_new^2 + sum_m (n_m / n)^2 s_m^2, the biases taken as independent (their posterior correlation
  through the shared reference is not in the pack; the reference has s = 0), with the weights of a
  plain mean of the n baseline specimens (n_m on method m; one baseline method: s_new^2 + s_old^2).
  The exact posterior puts less than full weight on the baselines (shrinkage toward the population
  centre), so this errs on the wide side. The population centre is used as the pack gives it, as
  for a series that never changed method.
"""
from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Callable

import numpy as np
import pandas as pd

from ..constants import DEFAULT_PRIOR_CHANGE
from ..errors import BayesbaseError
from ..model.engine import CaseArrays
from .frame import factorized, years_of
from .options import Options
from .packs import RowPriors
from .roles import CaseRows, Roles, texts_full

__all__ = ["CaseSets", "Baselines", "AssessedResults", "MethodChange", "CaseBatch", "aggregate_baselines",
           "assessed_results", "method_changes", "pack_correction", "prior_scalars", "build_cases", "distinct",
           "per_object", "row_cases", "codes_of", "text_column", "series_text", "object_texts"]


_ARROW_TEXT: list = []  # [(dtype, Arrow type)] pandas gives a list of texts, once known; [None] when not Arrow


def _arrow_text():
    """(dtype, Arrow type) of the column pandas infers from a list of texts when that is an
    Arrow-backed string dtype (pandas 3 with pyarrow), else None: the text columns below are built
    in Arrow only when the result is the very column pandas would infer from the values."""
    if not _ARROW_TEXT:
        dt = pd.Series(["a", None]).dtype
        ok = isinstance(dt, pd.StringDtype) and dt.storage == "pyarrow"
        _ARROW_TEXT.append((dt, pa_array(pd.array(["a"], dtype=dt)).type) if ok else None)
    return _ARROW_TEXT[0]


def pa_array(values):
    """An Arrow array of a pandas array or Series (no copy for Arrow-backed ones)."""
    import pyarrow as pa

    return pa.array(values)


def text_column(codes: np.ndarray, uniques) -> np.ndarray:
    """``uniques[codes]`` (code -1: None) as the table column pandas infers from those values, built
    once per distinct value: an Arrow string array when pandas makes text columns so and every
    value is a text or None (at least one a text), else an object array."""
    uniques = list(uniques) + [None]
    codes = np.asarray(codes, dtype=np.int64)
    codes = np.where(codes < 0, len(uniques) - 1, codes)
    arrow = _arrow_text()
    if arrow is not None and all(u is None or type(u) is str for u in uniques) and len(codes):
        used = np.bincount(codes, minlength=len(uniques)) > 0
        if any(u is not None for u, k in zip(uniques, used.tolist()) if k):
            import pyarrow as pa

            taken = pa.array(uniques, type=arrow[1]).take(pa.array(codes))
            return pd.array(taken, dtype=arrow[0])
    out = np.empty(len(uniques), dtype=object)
    out[:] = uniques
    return out[codes]


def object_texts(values: np.ndarray):
    """An object array of texts (None: missing) as the column pandas infers from it: converted in
    Arrow when pandas makes text columns so, else (or when a value is not a text) as it is."""
    arrow = _arrow_text()
    if arrow is None or not len(values):
        return values
    import pyarrow as pa

    try:
        arr = pa.array(values, type=arrow[1])
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        return values
    if arr.null_count == len(arr):
        return values
    return pd.array(arr, dtype=arrow[0])


def series_text(col: pd.Series, blank_missing: bool = False, fill: str | None = None):
    """A text column held in a pandas string dtype as the table column pandas infers from its
    values as a list (``blank_missing``: "" read as missing; ``fill``: missing read as ``fill``),
    or None when that is not an Arrow string column (then the caller builds it from the list)."""
    arrow = _arrow_text()
    if arrow is None or not isinstance(col.dtype, pd.StringDtype):
        return None
    import pyarrow as pa
    import pyarrow.compute as pc

    arr = pa_array(col.astype(arrow[0]).array)
    if blank_missing:
        arr = pc.if_else(pc.equal(arr, ""), pa.scalar(None, arr.type), arr)
    if fill is not None:
        arr = pc.fill_null(arr, pa.scalar(fill, arr.type))
    if arr.null_count == len(arr):
        return None
    return pd.array(arr, dtype=arrow[0])


def _sorted_unique(values: np.ndarray) -> np.ndarray:
    """``np.unique`` of integers by one sort (numpy's hash path is slower on many values)."""
    a = np.sort(np.asarray(values))
    return a[np.r_[True, a[1:] != a[:-1]]] if len(a) else a


def _texts(col: pd.Series) -> tuple[np.ndarray, np.ndarray] | None:
    """(values as objects, None where missing; mask of the non-empty texts) of a column held as a
    pandas string dtype, else None (then read value by value)."""
    if not isinstance(col.dtype, pd.StringDtype):
        return None
    values = col.to_numpy(dtype=object, na_value=None)
    return values, (col.notna() & col.ne("")).to_numpy(dtype=bool)


class CaseSets:
    """The distinct non-empty texts (methods, reported units) of the baseline rows of every
    case, held as sorted (case, code) pairs over one table of ``names``. ``get(i, default)``
    reads like the dict of sets it replaces."""

    def __init__(self, case: np.ndarray, code: np.ndarray, names: np.ndarray):
        self.case, self.code, self.names = case, code, names

    @classmethod
    def of_rows(cls, row_case: np.ndarray, row_code: np.ndarray, names: np.ndarray) -> "CaseSets":
        """From one (case, code) per row; code -1 and empty names are left out."""
        names = np.asarray(names, dtype=object)
        ok = row_code >= 0
        if len(names):
            ok &= np.array([isinstance(v, str) and v != "" for v in names], dtype=bool)[np.maximum(row_code, 0)]
        width = len(names) + 1
        pairs = _sorted_unique(row_case[ok].astype(np.int64) * width + row_code[ok])
        return cls(pairs // width, pairs % width, names)

    def get(self, i: int, default=()):
        lo, hi = np.searchsorted(self.case, [i, i + 1])
        return {self.names[c] for c in self.code[lo:hi]} if hi > lo else default

    def differs(self, codes: np.ndarray) -> np.ndarray:
        """Per case: the baseline holds a text other than ``codes[case]`` (a code of ``names``)."""
        out = np.zeros(len(codes), dtype=bool)
        other = self.code != codes[self.case]
        out[self.case[other]] = True
        return out

    def texts(self, i: int, extra=None) -> list[str]:
        """The case's texts (with ``extra``), sorted."""
        seen = set(self.get(i, ()))
        if extra is not None:
            seen.add(extra)
        return sorted(seen)


@dataclass(frozen=True)
class Baselines:
    """Baseline specimens of every case: (C, J) arrays padded with NaN / 0 replicates."""

    y: np.ndarray  # mean ln value of the specimen's replicates
    r: np.ndarray  # replicates
    e: np.ndarray  # extra variance (kept compromised results: sI^2)
    c: np.ndarray  # censoring -1 left, +1 right, 0 none
    t: np.ndarray  # collection time, years since 1970
    n: np.ndarray  # baseline specimens per case
    n_assumed: np.ndarray  # of which with a blank state
    specimens: np.ndarray  # "S1;S2" per case
    methods: CaseSets  # case -> set of methods seen in the baseline (``.get(i, default)``)
    units: CaseSets  # case -> set of reported units seen in the baseline
    method_code: np.ndarray | None = None  # (C, J) method of each specimen's first row, a code of methods.names (-1)


def row_cases(rows: CaseRows, case_index: dict) -> np.ndarray:
    """The case of every row of the history (-1 for a row in no case)."""
    if rows.case is not None:
        return rows.case
    index = case_index if isinstance(case_index, dict) else dict(case_index)
    return pd.Series(np.asarray(rows.key, dtype=object)).map(index).fillna(-1).to_numpy(dtype=np.int64)


class _CaseIndex(Mapping):
    """key -> case of the assessed keys; the dict is made only when a stage reads it (the
    stages mostly need the number of cases, with the case of every row already known)."""

    def __init__(self, keys):
        self._keys, self._dict = keys, None

    def _get(self) -> dict:
        if self._dict is None:
            self._dict = {k: i for i, k in enumerate(self._keys)}
        return self._dict

    def __len__(self) -> int:
        return len(self._keys)

    def __getitem__(self, key):
        return self._get()[key]

    def __iter__(self):
        return iter(self._get())


def codes_of(hist: pd.DataFrame, column: str, cache: dict | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(code per row, distinct values as an object array) of a column (-1 where missing or absent);
    ``cache``: a dict of those already made for ``hist`` by column."""
    if cache is not None and column in cache:
        return cache[column]
    if column not in hist:
        got = np.full(len(hist), -1, dtype=np.int64), np.array([], dtype=object)
    else:
        codes, uniq = factorized(hist, column, cache)
        got = codes.astype(np.int64), np.asarray(uniq, dtype=object)
    if cache is not None:
        cache[column] = got
    return got


def log_values(hist: pd.DataFrame, cache: dict | None = None) -> np.ndarray:
    """``np.log`` of the history's values, made once per assessment (``cache``: as for
    :func:`codes_of`; the stages never change the values)."""
    if cache is not None and ("log", "value") in cache:
        return cache[("log", "value")]
    got = np.log(hist["value"].to_numpy(dtype=float))
    if cache is not None:
        cache[("log", "value")] = got
    return got


def _baseline_groups(hist, row_case, roles: Roles, years, cache: dict | None = None):
    """Baseline rows in (case, time, specimen) order, with the start of each specimen's group."""
    idx = np.flatnonzero(roles.baseline)
    spec = codes_of(hist, "specimen", cache)[0][idx]
    order = np.lexsort((spec, years[idx], row_case[idx]))
    idx, spec, case = idx[order], spec[order], row_case[idx][order]
    new = np.ones(len(idx), dtype=bool)
    new[1:] = (case[1:] != case[:-1]) | (spec[1:] != spec[:-1])
    return idx, case, np.cumsum(new) - 1, np.flatnonzero(new)


def _joined_specimens(hist, idx_first: np.ndarray, gcase: np.ndarray, j: np.ndarray, C: int,
                      cache: dict | None = None) -> np.ndarray:
    """"S1;S2" per case from its groups (in order, ``j``: position in the case), joined once per
    distinct sequence of specimens (the analytes of a patient mostly share one); ``cache``: as
    for :func:`codes_of`."""
    out = texts_full(C, "")
    if not len(gcase):
        return out
    codes, uniq = codes_of(hist, "specimen", cache)
    codes = codes[idx_first]
    if len(codes) and codes.min() < 0:  # a missing specimen id: named as pandas gives it
        codes, uniq = pd.factorize(hist["specimen"].iloc[idx_first], use_na_sentinel=False)
    names = [str(s) for s in np.asarray(uniq, dtype=object).tolist()]
    seq = np.full((C, int(j.max()) + 1), -1, dtype=np.int64)
    seq[gcase, j] = codes
    cases = gcase[np.r_[True, gcase[1:] != gcase[:-1]]]  # gcase is sorted
    seq = seq[cases]
    key = np.zeros(len(cases), dtype=np.int64)  # dense code of each case's sequence, column by column
    for col in seq.T:
        key = np.unique(key * (len(names) + 1) + col + 1, return_inverse=True)[1].reshape(-1)
    rows = seq[np.unique(key, return_index=True)[1]]
    out[cases] = _joined_rows(rows, names)[key]
    return out


def _joined_rows(rows: np.ndarray, names: list) -> np.ndarray:
    """";".join of the names of every row of codes (-1: none; a row's codes come first), column
    by column over the rows (object arrays add their strings in numpy's loop)."""
    table = np.empty(len(names), dtype=object)
    table[:] = names
    joined = texts_full(len(rows), "")
    started = np.zeros(len(rows), dtype=bool)
    for col in rows.T:
        has = col >= 0
        glue = has & started
        joined[glue] = joined[glue] + ";"
        joined[has] = joined[has] + table[col[has]]
        started |= has
    return joined


def _censor_numbers(col: pd.Series) -> np.ndarray:
    """-1 for "left", +1 for "right", 0 otherwise (missing too), per row."""
    if isinstance(col.dtype, pd.StringDtype):
        left, right = (col.eq(w).to_numpy(dtype=bool, na_value=False) for w in ("left", "right"))
    else:
        cen = col.fillna("").astype(str).to_numpy()
        left, right = cen == "left", cen == "right"
    return np.where(left, -1.0, np.where(right, 1.0, 0.0))


def aggregate_baselines(hist, rows: CaseRows, roles: Roles, priors: RowPriors, case_index: dict,
                        years: np.ndarray, cache: dict | None = None) -> Baselines:
    """Baseline rows per (case, specimen): mean log, replicates, extra variance, padded
    (``cache``: as for :func:`codes_of`)."""
    C = len(case_index)
    row_case = row_cases(rows, case_index)
    idx, case, g, starts = _baseline_groups(hist, row_case, roles, years, cache)
    G = len(starts)
    logv = log_values(hist, cache)
    extra = np.where(roles.kept[idx], priors.column(lambda p: float(p.si), 0.0)[idx] ** 2, 0.0)  # baseline rows
    cen_num = _censor_numbers(hist["censor"])
    r = np.bincount(g, minlength=G).astype(float)
    gcase, first = case[starts], idx[starts]
    case_start = np.r_[True, gcase[1:] != gcase[:-1]] if G else np.zeros(0, dtype=bool)
    j = np.arange(G) - np.maximum.accumulate(np.where(case_start, np.arange(G), 0)) if G else np.zeros(0, int)
    J = int(j.max()) + 1 if G else 1

    def padded(values, fill):
        a = np.full((C, J), fill, dtype=float)
        a[gcase, j] = values
        return a

    mcodes, mnames = codes_of(hist, "method", cache)
    ucodes, unames = codes_of(hist, "reported_unit", cache)
    mcode = np.full((C, J), -1, dtype=np.int64)
    mcode[gcase, j] = mcodes[first]
    return Baselines(
        y=padded(np.bincount(g, weights=logv[idx], minlength=G) / r, np.nan), r=padded(r, 0.0),
        e=padded(np.bincount(g, weights=extra, minlength=G) / r, 0.0), c=padded(cen_num[first], 0.0),
        t=padded(years[first], np.nan), n=np.bincount(gcase, minlength=C),
        n_assumed=np.bincount(gcase, weights=roles.assumed[first].astype(float), minlength=C).astype(int),
        specimens=_joined_specimens(hist, first, gcase, j, C, cache),
        methods=CaseSets.of_rows(case, mcodes[idx], mnames), units=CaseSets.of_rows(case, ucodes[idx], unames),
        method_code=mcode,
    )


@dataclass(frozen=True)
class AssessedResults:
    """The assessed result of every case (replicates: geometric mean)."""

    first: pd.DataFrame  # first row of the case in the assessed specimen; index = case
    log_mean: np.ndarray  # mean ln value of the replicates
    n_rep: np.ndarray  # replicates (float)
    unit: list  # reported unit
    years: np.ndarray  # collection time, years since 1970
    rows: np.ndarray | None = None  # the history row of :attr:`first`, per case
    #: column -> (code per history row, distinct values) of the history's text columns
    #: (:func:`.frame.factorized`), when known: then texts are read once per distinct value
    coded: Callable | None = None

    def _codes(self, name: str):
        """(code per case, distinct texts as a list) of a text column of :attr:`first`, or None."""
        if self.coded is None or self.rows is None or name not in self.first.columns \
                or not isinstance(self.first[name].dtype, pd.StringDtype):
            return None
        codes, uniq = self.coded(name)
        return codes[self.rows], list(uniq)

    def col(self, name: str) -> list:
        """One column of :attr:`first` as a list (None per case when the column is absent)."""
        got = self._codes(name)
        if got is not None and not (len(got[0]) and got[0].min() < 0):
            return _gather(got[1], got[0])
        return self.first[name].tolist() if name in self.first.columns else [None] * len(self.first)

    def texts(self, name: str) -> tuple[np.ndarray, np.ndarray] | None:
        """:func:`_texts` of a column of :attr:`first`: (values as objects, None where missing;
        mask of the non-empty texts), or None when it is not a text column."""
        got = self._codes(name)
        if got is None:
            return _texts(self.first[name]) if name in self.first.columns else None
        codes, uniq = got
        table = np.empty(len(uniq) + 1, dtype=object)
        table[:-1] = uniq
        nonempty = np.array([u != "" for u in uniq] + [False], dtype=bool)
        return table[codes], nonempty[codes]


#: history columns no later stage reads from the assessed rows (the roles the stages add, the
#: rows' provenance): left out of :attr:`AssessedResults.first`
_NOT_READ = frozenset({"role", "reason", "source_file", "source_row"})


def assessed_results(hist, rows: CaseRows, case_index: dict, years: np.ndarray,
                     cache: dict | None = None) -> AssessedResults:
    """The assessed result of every case (``cache``: as for :func:`.frame.factorized`; given,
    text columns are read through their codes)."""
    ai = np.flatnonzero(rows.is_assessed)
    acase = row_cases(rows, case_index)[ai]
    order = np.argsort(acase, kind="stable")
    ai, acase = ai[order], acase[order]
    start = np.r_[True, acase[1:] != acase[:-1]] if len(ai) else np.zeros(0, dtype=bool)
    first_rows = ai[start]
    keep = [k for k, c in enumerate(hist.columns) if c not in _NOT_READ]
    first = hist.iloc[first_rows, keep] if len(keep) < hist.shape[1] else hist.iloc[first_rows]
    first.index = pd.RangeIndex(len(first_rows), name="_case")
    C = len(case_index)
    n_rep = np.bincount(acase, minlength=C).astype(float)
    log_mean = np.bincount(acase, weights=log_values(hist, cache)[ai], minlength=C) / n_rep
    when = np.empty(C)
    when[acase] = years[ai]
    coded = None if cache is None else (lambda name: factorized(hist, name, cache))
    out = AssessedResults(first=first, log_mean=log_mean, n_rep=n_rep, unit=[], years=when, rows=first_rows,
                          coded=coded)
    unit = out.col("reported_unit") if "reported_unit" in first.columns else first["reported_unit"].tolist()
    return replace(out, unit=unit)


@dataclass(frozen=True)
class MethodChange:
    """Method of the assessed result against the methods of the baseline, per case (module
    docstring: stated and calibrated corrections)."""

    changed: np.ndarray  # the assessed method differs from one seen in the baseline
    corrected: np.ndarray  # ... and a between-method bias corrects it (stated or calibrated)
    before: list  # the baseline methods, sorted, ", "-joined
    after: list  # the assessed method
    bias: list  # stated: (bias fraction, bias SD fraction); else None
    y_shift: np.ndarray  # subtracted from the assessed ln value (stated: ln(1 + bias); calibrated: 0)
    extra_var: np.ndarray  # added to the assessed variance (stated: ln(1 + bias_sd^2); calibrated: above)
    kind: list = field(default_factory=list)  # "stated", "calibrated" or "" per case
    base_shift: np.ndarray | None = None  # (C, J) subtracted from the baseline ln values (calibrated)
    calibrated: list = field(default_factory=list)  # per case: None or {reference, biases: {method: (b, s)}}
    uncovered: list = field(default_factory=list)  # per case: methods the pack's biases do not cover (tuple)


def _case_base_methods(baselines: Baselines, i: int) -> list:
    """The method of each baseline specimen of case ``i`` (None where none is stated)."""
    if baselines.method_code is None:
        return []
    names = baselines.methods.names
    out = []
    for c in baselines.method_code[i, : int(baselines.n[i])].tolist():
        m = names[c] if c >= 0 else None
        out.append(m if isinstance(m, str) and m != "" else None)
    return out


def pack_correction(prior, base_methods: list, new_method) -> tuple[dict | None, list]:
    """The calibrated correction of one case from its prior's ``method_biases`` (module
    docstring): ({reference, biases, base_shift (per baseline specimen, ln), extra_var}, []) or
    (None, the methods the pack does not cover; empty when it carries no biases)."""
    if prior is None or not getattr(prior, "method_biases", None) or not base_methods:
        return None, []
    got = {m: prior.method_log_bias(m) for m in set(base_methods) | {new_method}}
    missing = sorted(m if isinstance(m, str) else "(not stated)" for m, g in got.items() if g is None)
    if missing:
        return None, missing
    b_new, s_new = got[new_method]
    n = len(base_methods)
    var_old = sum((k / n) ** 2 * got[m][1] ** 2 for m, k in Counter(base_methods).items())
    return {"reference": prior.method_reference, "biases": got,
            "base_shift": [got[m][0] - b_new for m in base_methods], "extra_var": s_new**2 + var_old}, []


def method_changes(assessed: AssessedResults, baselines: Baselines, analytes: list,
                   method_bias: dict, assessed_codes: np.ndarray | None = None,
                   priors: list | None = None) -> MethodChange:
    """Cases whose assessed method differs from a method of the baseline (``assessed_codes``:
    the assessed method as a code of ``baselines.methods.names``, -1 when none; found by name
    when not given), with the stated correction (``method_bias``, which wins) or the calibrated
    one (``priors``: the AnalytePrior of every case, whose ``method_biases`` are used)."""
    C = len(analytes)
    after = assessed.col("method")
    if assessed_codes is None:
        lookup = {v: k for k, v in enumerate(baselines.methods.names)}
        assessed_codes = np.array([lookup.get(m, -2) if isinstance(m, str) else -1 for m in after], dtype=np.int64)
    text = assessed.texts("method")
    has_method = (text[1] if text is not None else
                  np.array([isinstance(m, str) and m != "" for m in after], dtype=bool))
    changed = has_method & baselines.methods.differs(np.where(has_method, assessed_codes, -1))
    corrected = np.zeros(C, dtype=bool)
    before, bias, kind = [""] * C, [None] * C, [""] * C
    calibrated, uncovered = [None] * C, [()] * C
    y_shift, extra = np.zeros(C), np.zeros(C)
    base_shift = np.zeros(baselines.y.shape)
    for i in np.flatnonzero(changed).tolist():
        before[i] = ", ".join(sorted(baselines.methods.get(i, ())))
        if analytes[i] in method_bias:
            b, bsd = method_bias[analytes[i]]
            corrected[i], bias[i], kind[i] = True, (b, bsd), "stated"
            y_shift[i], extra[i] = math.log1p(b), 0.0 + math.log1p(bsd**2)
            continue
        corr, missing = pack_correction(None if priors is None else priors[i],
                                        _case_base_methods(baselines, i), after[i])
        uncovered[i] = tuple(missing)
        if corr is not None:
            corrected[i], kind[i] = True, "calibrated"
            calibrated[i] = {"reference": corr["reference"], "biases": corr["biases"]}
            base_shift[i, : len(corr["base_shift"])] = corr["base_shift"]
            extra[i] = corr["extra_var"]
    return MethodChange(changed=changed, corrected=corrected, before=before, after=after, bias=bias,
                        y_shift=y_shift, extra_var=extra, kind=kind, base_shift=base_shift,
                        calibrated=calibrated, uncovered=uncovered)


def distinct(objs: list) -> tuple[list, np.ndarray]:
    """(the distinct objects of a list, by identity, in first-seen order; the index of each
    element among them)."""
    seen: dict = {}
    index = np.fromiter((seen.setdefault(id(o), len(seen)) for o in objs), dtype=np.int64, count=len(objs))
    firsts = np.unique(index, return_index=True)[1]
    return [objs[i] for i in firsts.tolist()], index


def per_object(objs: list, get, dtype=float, groups=None) -> np.ndarray:
    """``get(o)`` for every element of ``objs``, computed once per distinct object
    (``groups``: a precomputed :func:`distinct` of ``objs``)."""
    uniq, index = groups if groups is not None else distinct(objs)
    return np.asarray([get(o) for o in uniq], dtype=dtype)[index] if len(uniq) else np.zeros(0, dtype=dtype)


def _per_value(values, fn) -> np.ndarray:
    """``fn(v)`` (a math function of one float) of every value, computed once per distinct value."""
    values = np.asarray(values, dtype=float)
    uniq, inv = np.unique(values, return_inverse=True)
    return np.asarray([fn(float(v)) for v in uniq], dtype=float)[inv] if len(values) else np.zeros(0)


def prior_scalars(priors: list, packs: list, centers: list, opts: Options,
                  prior_groups=None, pack_groups=None) -> dict[str, np.ndarray]:
    """Per-case prior scalars on the log scale (prior mean at the breed's centre when known);
    each computed once per distinct prior and pack (``prior_groups``, ``pack_groups``: groups
    of ``priors`` and ``packs`` as :func:`distinct` gives them, when known)."""
    def tau(p):
        t = float(p.shift_sd) if p.shift_sd else math.sqrt(float(p.sg) ** 2 + float(p.si) ** 2)
        return t * float(opts.shift_scale) if opts.shift_scale else t

    g = prior_groups if prior_groups is not None else distinct(priors)
    pc = per_object(packs, lambda pk: opts.prior_change if opts.prior_change is not None
                    else float(pk.defaults.get("prior_change", DEFAULT_PRIOR_CHANGE)), groups=pack_groups)
    cols = {
        "prior_mean": _per_value(centers, math.log), "sg": per_object(priors, lambda p: float(p.sg), groups=g),
        "cvi": per_object(priors, lambda p: float(p.cvi), groups=g),
        "cvi_log_sd": per_object(priors, lambda p: float(p.cvi_log_sd), groups=g),
        "sa": per_object(priors, lambda p: float(p.sa), groups=g), "tau": per_object(priors, tau, groups=g),
        "delta": per_object(priors, lambda p: math.log1p(p.mcrc) if p.mcrc else float("nan"), groups=g),
        "prior_change": pc, "slope_sd": per_object(priors, lambda p: float(p.slope_sd or 0.1), groups=g),
    }
    return {k: np.asarray(v, dtype=float) for k, v in cols.items()}


@dataclass(frozen=True)
class CaseBatch:
    """Everything the engine, the flags, the comparisons and the table read, per case."""

    patient: list
    species: list
    analyte: list
    breed: list  # None when unknown
    prior: list  # AnalytePrior
    pack: list  # Pack
    center: list  # population centre used (the breed's when the pack has one)
    censor: list  # censoring of the assessed result: "", "left", "right"
    baselines: Baselines
    assessed: AssessedResults
    method: MethodChange
    scalars: dict[str, np.ndarray]  # prior scalars plus new_y and new_extra_var
    engine: str
    prior_groups: tuple | None = None  # :func:`distinct` of ``prior`` (computed when not given)
    pack_groups: tuple | None = None  # (distinct packs, index of each case's) as :func:`distinct` gives them

    def __len__(self) -> int:
        return len(self.patient)

    @property
    def keys(self) -> np.ndarray:
        """"patient\x1fanalyte" of every case (made when read: no stage needs it)."""
        return _case_keys(self.assessed, self.patient, self.analyte)

    def prior_attr(self, get, dtype=float) -> np.ndarray:
        """``get(prior)`` of every case, computed once per distinct prior."""
        if self.prior_groups is None:
            object.__setattr__(self, "prior_groups", distinct(self.prior))
        return per_object(self.prior, get, dtype, groups=self.prior_groups)

    def prior_text(self, get):
        """``get(prior)`` (a text or None) of every case as a table column (:func:`text_column`),
        computed once per distinct prior."""
        if self.prior_groups is None:
            object.__setattr__(self, "prior_groups", distinct(self.prior))
        uniq, index = self.prior_groups
        return text_column(index, [get(p) for p in uniq])

    def case_arrays(self) -> CaseArrays:
        """The engine's input (DEVELOPERS.md, "Exact-engine input")."""
        S, b = self.scalars, self.baselines
        cen = np.asarray(self.censor, dtype=object)
        new_cen = np.where(cen == "left", -1.0, np.where(cen == "right", 1.0, 0.0))
        return CaseArrays(
            prior_mean=S["prior_mean"], sg=S["sg"], cvi=S["cvi"], cvi_log_sd=S["cvi_log_sd"], sa=S["sa"],
            base_y=b.y, base_r=b.r, base_extra_var=b.e, base_censor=b.c,
            new_y=S["new_y"], new_r=self.assessed.n_rep, new_extra_var=S["new_extra_var"], new_censor=new_cen,
            tau=S["tau"], delta=S["delta"], prior_change=S["prior_change"],
        )


def _case_priors(priors: RowPriors, assessed: AssessedResults, species: list, analyte: list):
    """(prior per case, :func:`distinct` of them), from the prior codes of the assessed rows."""
    if assessed.rows is None:
        prior = [priors.of[(sp, aid)] for sp, aid in zip(species, analyte)]
        return prior, distinct(prior)
    codes = np.asarray(priors.codes)[assessed.rows]
    used, index = np.unique(codes, return_inverse=True)
    uniq = [priors.priors[c] for c in used.tolist()]
    return _gather(uniq, index), (uniq, index.astype(np.int64))


def _gather(values: list, index: np.ndarray) -> list:
    """``[values[i] for i in index]`` (the same objects), gathered in numpy."""
    arr = np.empty(len(values), dtype=object)
    for k, v in enumerate(values):
        arr[k] = v
    return arr[np.asarray(index, dtype=np.int64)].tolist()


def _case_packs(packs: dict, species: list) -> tuple[list, tuple]:
    """(pack of every case, (distinct packs, index of each case's)), looked up once per species."""
    codes, names = pd.factorize(np.asarray(species, dtype=object), use_na_sentinel=False)
    found = [packs[sp] for sp in names.tolist()]
    uniq, first = distinct(found)
    index = first[codes].astype(np.int64)
    return _gather(found, codes), (uniq, index)


def _centers(prior_groups, breed: list) -> list:
    """Population centre of every case (the breed's when the pack has one), once per distinct
    (prior, breed)."""
    uniq, index = prior_groups
    bcodes, bnames = pd.factorize(np.asarray(breed, dtype=object))
    pair = index * (len(bnames) + 1) + (bcodes + 1)
    used, inv = np.unique(pair, return_inverse=True)
    width = len(bnames) + 1
    vals = [uniq[int(k) // width].center_for(bnames[k % width - 1] if k % width else None) for k in used.tolist()]
    return _gather(vals, inv.reshape(-1))


def _breeds(assessed: AssessedResults) -> list:
    """The breed of every case (None when blank or unknown)."""
    text = assessed.texts("breed")
    if text is None:
        return [b if isinstance(b, str) and b else None for b in assessed.col("breed")]
    return np.where(text[1], text[0], None).tolist()


def _case_keys(assessed: AssessedResults, patient: list, analyte: list) -> np.ndarray:
    """"patient\x1fanalyte" of every case (in pandas when both are text columns with no gap)."""
    first = assessed.first
    if all(c in first.columns and isinstance(first[c].dtype, pd.StringDtype) and not first[c].isna().any()
           for c in ("patient", "analyte")):
        return (first["patient"] + "\x1f" + first["analyte"]).to_numpy(dtype=object)
    return np.asarray([f"{p}\x1f{a}" for p, a in zip(patient, analyte)], dtype=object)


def build_cases(hist: pd.DataFrame, rows: CaseRows, roles: Roles, priors: RowPriors, packs: dict,
                opts: Options, cache: dict | None = None) -> CaseBatch:
    """The case batch (``cache``: as for :func:`.frame.factorized`)."""
    case_index = _CaseIndex(rows.assessed_keys)
    if not len(case_index):
        raise BayesbaseError("the assessed specimen has no results")
    years = years_of(hist["collected_at"])
    codes: dict = {} if cache is None else cache
    baselines = aggregate_baselines(hist, rows, roles, priors, case_index, years, codes)
    assessed = assessed_results(hist, rows, case_index, years, codes)
    species, analyte, patient = assessed.col("species"), assessed.col("analyte"), assessed.col("patient")
    prior, groups = _case_priors(priors, assessed, species, analyte)
    pack, pack_groups = _case_packs(packs, species)
    breed = _breeds(assessed)
    center = _centers(groups, breed)
    mcodes = codes_of(hist, "method", codes)[0][assessed.rows] if assessed.rows is not None else None
    method = method_changes(assessed, baselines, analyte, opts.method_bias, mcodes, priors=prior)
    if method.base_shift is not None and method.base_shift.any():
        baselines = replace(baselines, y=baselines.y - method.base_shift)
    scalars = prior_scalars(prior, pack, center, opts, prior_groups=groups, pack_groups=pack_groups)
    scalars["new_y"] = assessed.log_mean - method.y_shift
    scalars["new_extra_var"] = method.extra_var
    return CaseBatch(
        patient=patient,
        species=species, analyte=analyte, breed=breed, prior=prior, pack=pack, center=center,
        censor=[c or "" for c in assessed.col("censor")], baselines=baselines, assessed=assessed,
        method=method, scalars=scalars, engine=opts.engine, prior_groups=groups, pack_groups=pack_groups,
    )
