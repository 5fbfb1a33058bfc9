"""Stage 5: the case batch. A case is one (patient, analyte) of an assessed specimen; the batch
holds the baselines padded to arrays (log scale, one column per specimen), the assessed result,
the per-case prior scalars and the metadata later stages read (prior, pack, breed, method)."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..constants import DEFAULT_PRIOR_CHANGE
from ..errors import BayesbaseError
from ..model.engine import CaseArrays
from .frame import years_of
from .options import Options
from .packs import RowPriors
from .roles import CaseRows, Roles

__all__ = ["Baselines", "AssessedResults", "MethodChange", "CaseBatch", "aggregate_baselines",
           "assessed_results", "method_changes", "prior_scalars", "build_cases"]


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
    methods: dict  # case -> set of methods seen in the baseline
    units: dict  # case -> set of reported units seen in the baseline


def _sets(cases: list, values: list) -> dict[int, set]:
    """case -> set of the non-empty strings among ``values`` (plain loop: faster than groupby)."""
    out: dict[int, set] = {}
    for c_, v_ in zip(cases, values):
        if isinstance(v_, str) and v_:
            out.setdefault(c_, set()).add(v_)
    return out


def _baseline_rows(hist, rows: CaseRows, roles: Roles, priors: RowPriors, case_index, years):
    base = roles.baseline
    logv = np.log(hist["value"].to_numpy(dtype=float))
    si_row = priors.column(lambda p: float(p.si), 0.0)
    extra_row = np.where(roles.kept, si_row**2, 0.0)
    cen_row = hist["censor"].fillna("").astype(str).to_numpy()
    cen_num = np.where(cen_row == "left", -1.0, np.where(cen_row == "right", 1.0, 0.0))
    return pd.DataFrame({
        "case": rows.key[base].map(case_index).to_numpy(), "specimen": hist["specimen"].to_numpy()[base],
        "y": logv[base], "e": extra_row[base], "c": cen_num[base], "t": years[base],
        "assumed": roles.assumed[base],
    })


def aggregate_baselines(hist, rows: CaseRows, roles: Roles, priors: RowPriors, case_index: dict,
                        years: np.ndarray) -> Baselines:
    """Baseline rows per (case, specimen): mean log, replicates, extra variance, padded."""
    C = len(case_index)
    bl = _baseline_rows(hist, rows, roles, priors, case_index, years)
    agg = (bl.groupby(["case", "specimen"], sort=False)
             .agg(y=("y", "mean"), r=("y", "size"), e=("e", "mean"), c=("c", "first"), t=("t", "first"),
                  assumed=("assumed", "first"))
             .reset_index()
             .sort_values(["case", "t"], kind="stable"))
    agg["j"] = agg.groupby("case").cumcount()
    J = int(agg["j"].max()) + 1 if len(agg) else 1
    ci_, cj_ = agg["case"].to_numpy(dtype=int), agg["j"].to_numpy(dtype=int)

    def padded(col, fill):
        a = np.full((C, J), fill, dtype=float)
        a[ci_, cj_] = agg[col].to_numpy(dtype=float)
        return a

    spec_lists: dict[int, list] = {}
    for c_, sp_ in zip(agg["case"].tolist(), agg["specimen"].tolist()):
        spec_lists.setdefault(c_, []).append(str(sp_))
    base_cases = bl["case"].tolist()
    base = roles.baseline
    methods = _sets(base_cases, hist["method"].to_numpy(dtype=object)[base].tolist()) if "method" in hist else {}
    return Baselines(
        y=padded("y", np.nan), r=padded("r", 0.0), e=padded("e", 0.0), c=padded("c", 0.0),
        t=padded("t", np.nan), n=np.bincount(ci_, minlength=C),
        n_assumed=np.bincount(ci_, weights=agg["assumed"].to_numpy(dtype=float), minlength=C).astype(int),
        specimens=np.array([";".join(spec_lists.get(i, [])) for i in range(C)], dtype=object),
        methods=methods, units=_sets(base_cases, hist["reported_unit"].to_numpy(dtype=object)[base].tolist()),
    )


@dataclass(frozen=True)
class AssessedResults:
    """The assessed result of every case (replicates: geometric mean)."""

    first: pd.DataFrame  # first row of the case in the assessed specimen; index = case
    log_mean: np.ndarray  # mean ln value of the replicates
    n_rep: np.ndarray  # replicates (float)
    unit: list  # reported unit
    years: np.ndarray  # collection time, years since 1970

    def col(self, name: str) -> list:
        """One column of :attr:`first` as a list (None per case when the column is absent)."""
        return self.first[name].tolist() if name in self.first.columns else [None] * len(self.first)


def assessed_results(hist, rows: CaseRows, case_index: dict, years: np.ndarray) -> AssessedResults:
    arow = hist[rows.is_assessed].copy()
    arow["_case"] = rows.key[rows.is_assessed].map(case_index)
    arow["_logv"] = np.log(arow["value"].astype(float))
    first = arow.groupby("_case", sort=True).head(1).set_index("_case").sort_index()
    log_mean = arow.groupby("_case", sort=True)["_logv"].mean().sort_index().to_numpy()
    n_rep = arow.groupby("_case", sort=True).size().sort_index().to_numpy(dtype=float)
    unit = arow.groupby("_case", sort=True)["reported_unit"].first().sort_index().to_list()
    when = np.empty(len(case_index))
    when[arow["_case"].to_numpy(dtype=int)] = years[rows.is_assessed]
    return AssessedResults(first=first, log_mean=log_mean, n_rep=n_rep, unit=unit, years=when)


@dataclass(frozen=True)
class MethodChange:
    """Method of the assessed result against the methods of the baseline, per case."""

    changed: np.ndarray  # the assessed method differs from one seen in the baseline
    corrected: np.ndarray  # ... and a between-method bias is given for the analyte
    before: list  # the baseline methods, sorted, ", "-joined
    after: list  # the assessed method
    bias: list  # (bias fraction, bias SD fraction) or None
    y_shift: np.ndarray  # subtracted from the assessed ln value: ln(1 + bias)
    extra_var: np.ndarray  # added to the assessed variance: ln(1 + bias_sd^2)


def method_changes(assessed: AssessedResults, baselines: Baselines, analytes: list,
                   method_bias: dict) -> MethodChange:
    C = len(analytes)
    changed, corrected = np.zeros(C, dtype=bool), np.zeros(C, dtype=bool)
    before, bias = [""] * C, [None] * C
    y_shift, extra = np.zeros(C), np.zeros(C)
    after = assessed.col("method")
    for i, a_meth in enumerate(after):
        bms = set(baselines.methods.get(i, ()))
        if not (isinstance(a_meth, str) and a_meth and bms and (bms - {a_meth})):
            continue
        changed[i], before[i] = True, ", ".join(sorted(bms))
        if analytes[i] in method_bias:
            b, bsd = method_bias[analytes[i]]
            corrected[i], bias[i] = True, (b, bsd)
            y_shift[i], extra[i] = math.log1p(b), 0.0 + math.log1p(bsd**2)
    return MethodChange(changed=changed, corrected=corrected, before=before, after=after, bias=bias,
                        y_shift=y_shift, extra_var=extra)


def prior_scalars(priors: list, packs: list, centers: list, opts: Options) -> dict[str, np.ndarray]:
    """Per-case prior scalars on the log scale (prior mean at the breed's centre when known)."""
    def tau(p):
        t = float(p.shift_sd) if p.shift_sd else math.sqrt(float(p.sg) ** 2 + float(p.si) ** 2)
        return t * float(opts.shift_scale) if opts.shift_scale else t

    pc = [opts.prior_change if opts.prior_change is not None
          else float(pk.defaults.get("prior_change", DEFAULT_PRIOR_CHANGE)) for pk in packs]
    cols = {
        "prior_mean": [math.log(c) for c in centers], "sg": [float(p.sg) for p in priors],
        "cvi": [float(p.cvi) for p in priors], "cvi_log_sd": [float(p.cvi_log_sd) for p in priors],
        "sa": [float(p.sa) for p in priors], "tau": [tau(p) for p in priors],
        "delta": [math.log1p(p.mcrc) if p.mcrc else float("nan") for p in priors],
        "prior_change": pc, "slope_sd": [float(p.slope_sd or 0.1) for p in priors],
    }
    return {k: np.asarray(v, dtype=float) for k, v in cols.items()}


@dataclass(frozen=True)
class CaseBatch:
    """Everything the engine, the flags, the comparisons and the table read, per case."""

    keys: np.ndarray  # "patient\x1fanalyte"
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

    def __len__(self) -> int:
        return len(self.keys)

    def case_arrays(self) -> CaseArrays:
        """The engine's input (DEVELOPERS.md, "Exact-engine input")."""
        S, b = self.scalars, self.baselines
        new_cen = np.array([(-1.0 if c == "left" else (1.0 if c == "right" else 0.0)) for c in self.censor])
        return CaseArrays(
            prior_mean=S["prior_mean"], sg=S["sg"], cvi=S["cvi"], cvi_log_sd=S["cvi_log_sd"], sa=S["sa"],
            base_y=b.y, base_r=b.r, base_extra_var=b.e, base_censor=b.c,
            new_y=S["new_y"], new_r=self.assessed.n_rep, new_extra_var=S["new_extra_var"], new_censor=new_cen,
            tau=S["tau"], delta=S["delta"], prior_change=S["prior_change"],
        )


def build_cases(hist: pd.DataFrame, rows: CaseRows, roles: Roles, priors: RowPriors, packs: dict,
                opts: Options) -> CaseBatch:
    case_index = {k: i for i, k in enumerate(rows.assessed_keys)}
    if not case_index:
        raise BayesbaseError("the assessed specimen has no results")
    years = years_of(hist["collected_at"])
    baselines = aggregate_baselines(hist, rows, roles, priors, case_index, years)
    assessed = assessed_results(hist, rows, case_index, years)
    species, analyte = assessed.col("species"), assessed.col("analyte")
    prior = [priors.of[(sp, aid)] for sp, aid in zip(species, analyte)]
    pack = [packs[sp] for sp in species]
    breed = [b if isinstance(b, str) and b else None for b in assessed.col("breed")]
    center = [p.center_for(b) for p, b in zip(prior, breed)]
    method = method_changes(assessed, baselines, analyte, opts.method_bias)
    scalars = prior_scalars(prior, pack, center, opts)
    scalars["new_y"] = assessed.log_mean - method.y_shift
    scalars["new_extra_var"] = method.extra_var
    return CaseBatch(
        keys=np.asarray(list(case_index), dtype=object), patient=assessed.col("patient"), species=species,
        analyte=analyte, breed=breed, prior=prior, pack=pack, center=center,
        censor=[c or "" for c in assessed.col("censor")], baselines=baselines, assessed=assessed,
        method=method, scalars=scalars, engine=opts.engine,
    )
