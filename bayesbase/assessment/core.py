"""Per-patient, per-analyte answers: which result is assessed, which earlier specimens form the
baseline (and which are left out, and why), sample-quality and comparability rules, the model's
answer (exact or PyMC engine) and the classical RCV family beside it.

Every result is stamped with the prior pack id and hash, the engine, its settings and the seed.
Decision support, not a diagnosis.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import __version__, classical
from ..constants import (
    DEFAULT_CI_PROB,
    DEFAULT_COVERAGE,
    DEFAULT_PRIOR_CHANGE,
    DEFAULT_PRIOR_DRIFT,
    DEFAULT_QUAD_NODES,
    DIM_ANALYTE,
    DIM_CI,
    DIM_PATIENT,
    CI_BOUNDS,
    TREND_HORIZON_YEARS,
    TREND_MIN_SPAN_YEARS,
    TREND_MIN_SPECIMENS,
)
from ..model.engine import CaseArrays, cv_to_sigma, exact_assess
from ..errors import AnalyteNotInPack, BayesbaseError

__all__ = ["assess", "Assessment", "FEEDING_SENSITIVE_DEFAULT"]

#: Analytes moved by feeding (fasting study of 100 healthy dogs, as summarised in the project's
#: sample-quality notes: triglycerides, urea, phosphate, glucose); used when a pack is silent.
FEEDING_SENSITIVE_DEFAULT = frozenset({"triglycerides", "urea", "phosphate", "glucose"})
_INDEX_COLUMNS = ("haemolysis", "lipaemia", "icterus")
_YEAR_DAYS = 365.25


@dataclass
class Assessment:
    """Result of :func:`assess`: tidy table, labelled dataset, annotated history, provenance."""

    table: pd.DataFrame
    history: pd.DataFrame
    attrs: dict[str, Any]
    packs: dict[str, Any] = field(default_factory=dict, repr=False)
    mcmc: Any = field(default=None, repr=False)

    @property
    def dataset(self):
        return _to_dataset(self.table, self.attrs)

    @property
    def converged(self) -> bool:
        return bool(self.table["converged"].all()) if len(self.table) else True

    def to_records(self) -> list[dict]:
        return [_json_record(r, self.attrs) for r in self.table.to_dict("records")]

    def to_json(self, indent: int | None = 2) -> str:
        return json.dumps(self.to_records(), indent=indent, default=_json_default)


# --------------------------------------------------------------------------------- helpers

def _json_default(o):
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return None if not np.isfinite(o) else float(o)
    if isinstance(o, (np.bool_,)):
        return bool(o)
    if isinstance(o, (pd.Timestamp,)):
        return o.isoformat()
    return str(o)


def _num(x):
    if x is None:
        return None
    try:
        if pd.isna(x):
            return None
    except (TypeError, ValueError):
        pass
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    x = float(x)
    return x if math.isfinite(x) else None


def _json_record(r: dict, attrs: dict) -> dict:
    exceeded = r.get("rcv_exceeded_last")
    rec = {
        "patient": r["patient"],
        "analyte": r["analyte"],
        "label": r["label"],
        "unit": r["unit"],
        "specimen": r["specimen"],
        "collected_at": pd.Timestamp(r["collected_at"]).isoformat(),
        "value": _num(r["value"]),
        "reported_value": r["reported_value"],
        "reported_unit": r["reported_unit"],
        "n_baseline": int(r["n_baseline"]),
        "set_point": {
            "mean": _num(r["set_point_mean"]),
            "lower": _num(r["set_point_lower"]),
            "upper": _num(r["set_point_upper"]),
        },
        "personal_interval": {
            "lower": _num(r["pi_lower"]),
            "upper": _num(r["pi_upper"]),
            "coverage": _num(r["coverage"]),
        },
        "percentile": _num(r["percentile"]),
        "bayes_factor": _num(r["bayes_factor"]),
        "p_change": _num(r["p_change"]),
        "p_increase": _num(r["p_increase"]),
        "p_exceed_delta": _num(r["p_exceed_delta"]),
        "rcv": {
            "classical_pct": _num(r["rcv_classical_pct"]),
            "one_sided_pct": _num(r["rcv_one_sided_pct"]),
            "lognormal_up_pct": _num(r["rcv_lognormal_up_pct"]),
            "lognormal_down_pct": _num(r["rcv_lognormal_down_pct"]),
            "change_vs_last_pct": _num(r["change_vs_last_pct"]),
            "change_vs_mean_pct": _num(r["change_vs_mean_pct"]),
            "exceeded": _num(exceeded),
            "exceeded_vs_mean": _num(r.get("rcv_exceeded_mean")),
            "lognormal_exceeded": _num(r.get("lognormal_exceeded_last")),
            "p_significant": _num(r.get("p_significant")),
        },
        "model2_interval": {"lower": _num(r["model2_lower"]), "upper": _num(r["model2_upper"])},
        "population_interval": {
            "lower": _num(r["pop_lower"]),
            "upper": _num(r["pop_upper"]),
            "outside": _num(r["outside_population"]),
        },
        "index_of_individuality": {
            "cvi_over_cvg": _num(r["ii"]),
            "cvt_over_cvg": _num(r["ii_total"]),
            "orientation": "Harris: CVI/CVG (low < 0.6 means the population interval is insensitive)",
        },
        "n_for_setpoint": _num(r["n_for_setpoint"]),
        "flags": list(r["flags"]),
        "engine": r["engine"],
        "converged": bool(r["converged"]),
        "pack": attrs.get("pack_id"),
        "pack_sha256": attrs.get("pack_sha256"),
    }
    if "trend_p_drift" in r:
        rec["trend"] = {
            "p_drift": _num(r.get("trend_p_drift")),
            "p_increase": _num(r.get("trend_p_increase")),
            "pct_per_year": {
                "mean": _num(r.get("trend_pct_per_year")),
                "lower": _num(r.get("trend_pct_lower")),
                "upper": _num(r.get("trend_pct_upper")),
            },
            "years_to_limit": _num(r.get("trend_years_to_limit")),
            "limit": r.get("trend_limit") or None,
            "note": r.get("trend_note") or None,
        }
    return rec


def _to_dataset(table: pd.DataFrame, attrs: dict):
    import xarray as xr

    if table.empty:
        return xr.Dataset(attrs={k: str(v) for k, v in attrs.items()})
    t = table.set_index([DIM_PATIENT, DIM_ANALYTE])
    pats = list(dict.fromkeys(table[DIM_PATIENT]))
    ans = list(dict.fromkeys(table[DIM_ANALYTE]))
    idx = pd.MultiIndex.from_product([pats, ans], names=[DIM_PATIENT, DIM_ANALYTE])
    t = t.reindex(idx)

    def grid(col, dtype=float):
        return np.asarray(t[col].to_numpy(dtype=dtype, na_value=np.nan)).reshape(len(pats), len(ans))

    dims = (DIM_PATIENT, DIM_ANALYTE)
    data = {}
    for col in ("value", "percentile", "bayes_factor", "p_change", "p_increase", "p_exceed_delta",
                "n_baseline", "rcv_classical_pct", "rcv_lognormal_up_pct", "rcv_lognormal_down_pct",
                "change_pct", "ii", "ii_total"):
        data[col] = (dims, grid(col))
    for name, lo, hi in (("set_point", "set_point_lower", "set_point_upper"),
                         ("personal_interval", "pi_lower", "pi_upper"),
                         ("population_interval", "pop_lower", "pop_upper"),
                         ("model2_interval", "model2_lower", "model2_upper")):
        data[name] = (dims + (DIM_CI,), np.stack([grid(lo), grid(hi)], axis=-1))
    data["set_point_mean"] = (dims, grid("set_point_mean"))
    ds = xr.Dataset(
        data,
        coords={DIM_PATIENT: pats, DIM_ANALYTE: ans, DIM_CI: list(CI_BOUNDS)},
        attrs={k: (json.dumps(v, default=str) if isinstance(v, dict) else str(v)) for k, v in attrs.items()},
    )
    ds["personal_interval"].attrs["ci_prob"] = float(table["coverage"].iloc[0])
    ds["set_point"].attrs["ci_prob"] = float(attrs.get("ci_prob", DEFAULT_CI_PROB))
    return ds


def _coerce_results(results, now=None) -> pd.DataFrame:
    from .. import data as _data

    if isinstance(results, (str, Path)):
        return _data.load_results(results, now=now)
    if not isinstance(results, pd.DataFrame):
        raise BayesbaseError("results must be a file path or a pandas DataFrame")
    needed = {"patient", "species", "specimen", "collected_at", "analyte", "value", "unit", "censor"}
    if needed.issubset(results.columns) and "reported_value" in results.columns:
        return results.copy()
    return _data.validate(results, now=now)


def _resolve_pack(pack, species: str, priors, cache: dict):
    from ..priors import Pack, load_pack

    if isinstance(pack, Pack):
        key = ("obj", id(pack))
        if key not in cache:
            cache[key] = pack if priors is None else load_pack(pack.id.split("+")[0], overrides=priors)
        return cache[key]
    name = pack if pack is not None else species
    key = (str(name), str(priors))
    if key not in cache:
        cache[key] = load_pack(name, overrides=priors)
    return cache[key]


def _pick_assessed(spec: pd.DataFrame, at) -> str:
    """Specimen id to assess: the latest, or one named by ``at`` (a specimen id or a date:
    the latest specimen collected on or before that date)."""
    if at is None:
        return spec["specimen"].iloc[-1]
    at_s = str(at)
    if at_s in set(spec["specimen"]):
        return at_s
    try:
        ts = pd.Timestamp(at_s)
    except (ValueError, TypeError):
        raise BayesbaseError(f"--at '{at_s}' is neither a specimen id of this patient nor a date") from None
    if ts.tzinfo is not None:
        ts = ts.tz_convert("UTC").tz_localize(None)
    if len(at_s) <= 10:  # a bare date means the whole day
        ts = ts + pd.Timedelta(days=1) - pd.Timedelta(microseconds=1)
    before = spec[spec["collected_at"] <= ts]
    if before.empty:
        raise BayesbaseError(f"no specimen of this patient was collected on or before {at_s}")
    return before["specimen"].iloc[-1]


def _index_problem(row, prior) -> list[tuple[str, float, float, str]]:
    out = []
    for idx in _INDEX_COLUMNS:
        thr = prior.hil_thresholds.get(idx)
        v = row.get(idx)
        if thr is None or v is None or pd.isna(v):
            continue
        if float(v) > float(thr):
            out.append((idx, float(v), float(thr), prior.interference.get(idx, "variable")))
    return out


def _is_feeding_sensitive(prior) -> bool:
    fs = getattr(prior, "feeding_sensitive", None)
    return bool(fs) if fs is not None else prior.analyte in FEEDING_SENSITIVE_DEFAULT


# ------------------------------------------------------------------------------ main entry

def assess(
    results,
    pack=None,
    priors=None,
    engine: str = "exact",
    coverage: float = DEFAULT_COVERAGE,
    prior_change: float | None = None,
    shift_scale: float | None = None,
    at=None,
    patient=None,
    keep_compromised: bool = False,
    method_bias: dict | None = None,
    seed: int = 0,
    ci_prob: float = DEFAULT_CI_PROB,
    nodes: int = DEFAULT_QUAD_NODES,
    trend: bool = True,
    prior_drift: float | None = None,
    mcmc_options: dict | None = None,
    now=None,
) -> Assessment:
    """Assess the latest (or ``at``) specimen of every patient against its own history.

    Parameters
    ----------
    results : path or DataFrame in the tidy results contract (validated here when raw).
    pack : prior pack name, path or :class:`bayesbase.priors.Pack`; default: the species' pack.
    priors : a lab override CSV layered over the pack.
    engine : ``"exact"`` (conjugate update + quadrature) or ``"mcmc"`` (PyMC, same model; also
        censored baselines).
    coverage : central coverage of the personal interval (0.99 for a specificity-first screen).
    prior_change : prior probability of a true change (default: the pack's, else
        :data:`~bayesbase.constants.DEFAULT_PRIOR_CHANGE`).
    shift_scale : multiplies the SD of a true change under H1 (default 1: tau^2 = sG^2 + sI^2
        unless the pack gives ``shift_sd``).
    at : specimen id or date of the result to assess (default: each patient's latest specimen).
    keep_compromised : keep baselines with an H/L/I index above the pack's threshold, with their
        variance inflated by sI^2 (default: leave them out).
    method_bias : ``{analyte: (bias_fraction, bias_sd_fraction)}`` for a method change between
        baseline and assessed result; the assessed value is corrected by the bias and its
        uncertainty enters the variance, and the comparison is then called comparable.

    Baseline rule: earlier specimens of the same analyte whose state is healthy or blank (blank
    is reported as "assumed healthy"); unwell specimens are shown but never used; a specimen
    whose H/L/I index exceeds the pack's threshold for the analyte is left out (unless
    ``keep_compromised``); for feeding-sensitive analytes a non-fasted specimen is left out when
    fasted ones exist. Vectorised over patients: a clinic database is scored in one call.
    """
    if engine not in ("exact", "mcmc"):
        raise BayesbaseError(f"unknown engine '{engine}' (choose exact or mcmc)")
    if not 0 < coverage < 1:
        raise BayesbaseError("coverage must lie between 0 and 1")
    if prior_change is not None and not 0 < prior_change < 1:
        raise BayesbaseError("prior probability of change must lie between 0 and 1")
    frame = _coerce_results(results, now=now)
    if patient is not None:
        wanted = {str(patient)} if isinstance(patient, (str, int)) else {str(p) for p in patient}
        frame = frame[frame["patient"].isin(wanted)]
        if frame.empty:
            raise BayesbaseError(f"patient {', '.join(sorted(wanted))} not found in the results")
    if frame.empty:
        raise BayesbaseError("no results to assess")
    frame = frame.sort_values(["patient", "collected_at", "specimen", "analyte", "replicate"]).reset_index(drop=True)
    method_bias = method_bias or {}
    cache: dict = {}

    hist = frame.copy()
    n_rows = len(hist)
    bd = pd.to_datetime(hist["birth_date"]) if "birth_date" in hist else pd.Series(pd.NaT, index=hist.index)
    hist["age_years"] = (hist["collected_at"] - bd).dt.days / _YEAR_DAYS

    # -- packs per species
    species_of = hist.groupby("patient", sort=False)["species"].first()
    packs_by_species = {}
    for sp in species_of.unique():
        pk = _resolve_pack(pack, sp, priors, cache)
        if pk.species != sp:
            pid = species_of.index[species_of == sp][0]
            raise BayesbaseError(
                f"patient {pid} is a {sp} but pack '{pk.id}' is for {pk.species}; choose the {sp} pack")
        packs_by_species[sp] = pk

    # -- the assessed specimen of each patient
    spec = hist.drop_duplicates(["patient", "specimen"])[["patient", "specimen", "collected_at"]]
    if at is None:
        last = spec.groupby("patient", sort=False).tail(1)
        target = dict(zip(last["patient"], last["specimen"]))
    else:
        target = {pid: _pick_assessed(g, at) for pid, g in spec.groupby("patient", sort=False)}
    t_of = dict(zip(zip(spec["patient"], spec["specimen"]), spec["collected_at"]))
    hist["_target"] = hist["patient"].map(target)
    t_target = pd.Series([t_of[(p, s)] for p, s in zip(target, target.values())], index=list(target))
    hist["_t_target"] = hist["patient"].map(t_target)
    key = hist["patient"].astype(str) + "\x1f" + hist["analyte"].astype(str)
    hist["_key"] = key
    is_assessed = (hist["specimen"] == hist["_target"]).to_numpy()
    assessed_keys = pd.unique(key[is_assessed])
    in_case = key.isin(set(assessed_keys)).to_numpy()
    t_arr = hist["collected_at"].to_numpy()
    tt_arr = hist["_t_target"].to_numpy()
    earlier = in_case & ~is_assessed & (t_arr < tt_arr)
    later = in_case & ~is_assessed & ~earlier

    role = np.full(n_rows, "not assessed", dtype=object)
    reason = np.full(n_rows, "analyte not measured in the assessed specimen", dtype=object)
    role[is_assessed] = "assessed"
    reason[is_assessed] = ""
    role[later] = "later"
    reason[later] = "collected with or after the assessed specimen"

    # -- per-row prior fields (species x analyte)
    pair = list(zip(hist["species"].tolist(), hist["analyte"].tolist()))
    sp_an = dict.fromkeys(p for p, ic in zip(pair, in_case.tolist()) if ic)
    prior_of: dict = {}
    for sp, aid in sp_an:
        try:
            prior_of[(sp, aid)] = packs_by_species[sp].get(aid)
        except AnalyteNotInPack as exc:
            pids = sorted(set(hist.loc[(hist["species"] == sp) & (hist["analyte"] == aid) & in_case, "patient"]))
            raise AnalyteNotInPack(
                f"{exc} (patient {', '.join(pids[:5])}); add it with a lab override CSV (--priors) or drop it") from None
    state = hist["state"].fillna("").astype(str).to_numpy()
    unwell = earlier & (state == "unwell")
    role[unwell] = "unwell"
    reason[unwell] = "state unwell: shown, never used for the set point"

    # sample-quality indices above the pack's threshold
    compromised = np.zeros(n_rows, dtype=bool)
    comp_text = np.full(n_rows, "", dtype=object)
    for idx in _INDEX_COLUMNS:
        if idx not in hist:
            continue
        vals = pd.to_numeric(hist[idx], errors="coerce").to_numpy(dtype=float)
        thr = np.array([getattr(prior_of.get(p), "hil_thresholds", {}).get(idx, np.nan) if p in prior_of else np.nan
                        for p in pair], dtype=float)
        over = np.isfinite(vals) & np.isfinite(thr) & (vals > thr) & in_case
        for i in np.flatnonzero(over):
            pr = prior_of[pair[i]]
            txt = f"{idx} index {vals[i]:g} above {thr[i]:g} (interference: {pr.interference.get(idx, 'variable')})"
            comp_text[i] = txt if not comp_text[i] else comp_text[i] + "; " + txt
        compromised |= over
    cand = earlier & ~unwell
    excl_q = cand & compromised & (not keep_compromised)
    role[excl_q] = "excluded"
    reason[excl_q] = ["sample quality: " + t for t in comp_text[excl_q]]
    kept_q = cand & compromised & keep_compromised
    reason[kept_q] = ["kept with inflated variance: " + t for t in comp_text[kept_q]]
    cand = cand & ~excl_q
    # feeding-sensitive analytes: leave out non-fasted baselines when fasted ones exist
    feeding = np.array([(_is_feeding_sensitive(prior_of[p]) if p in prior_of else False) for p in pair])
    fasted = hist["fasted"] if "fasted" in hist else pd.Series(pd.NA, index=hist.index)
    fasted_true = fasted.eq(True).fillna(False).to_numpy(dtype=bool)
    fasted_false = fasted.eq(False).fillna(False).to_numpy(dtype=bool)
    has_fasted = pd.Series(cand & fasted_true).groupby(key.to_numpy()).transform("any").to_numpy(dtype=bool)
    excl_f = cand & feeding & has_fasted & fasted_false
    role[excl_f] = "excluded"
    reason[excl_f] = "not fasted (feeding-sensitive analyte; fasted baselines exist)"
    base = cand & ~excl_f
    role[base] = "baseline"
    reason[base & ~kept_q] = ""
    assumed = base & (state == "")
    reason[assumed & ~kept_q] = "assumed healthy (state blank)"
    hist["role"] = role
    hist["reason"] = reason

    # -- aggregate baselines per (case, specimen): mean log, replicates, extra variance
    logv = np.log(hist["value"].to_numpy(dtype=float))
    years = hist["collected_at"].to_numpy().astype("datetime64[ns]").astype("int64") / 1e9 / 86400 / _YEAR_DAYS
    si_row = np.array([(float(prior_of[p].si) if p in prior_of else 0.0) for p in pair])
    extra_row = np.where(kept_q, si_row**2, 0.0)
    cen_row = hist["censor"].fillna("").astype(str).to_numpy()
    cen_num = np.where(cen_row == "left", -1.0, np.where(cen_row == "right", 1.0, 0.0))
    case_index = {k: i for i, k in enumerate(assessed_keys)}
    C = len(assessed_keys)
    if C == 0:
        raise BayesbaseError("the assessed specimen has no results")
    bl = pd.DataFrame({
        "case": key[base].map(case_index).to_numpy(), "specimen": hist["specimen"].to_numpy()[base],
        "y": logv[base], "e": extra_row[base], "c": cen_num[base], "t": years[base],
        "assumed": assumed[base],
    })
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

    base_y, base_r, base_e = padded("y", np.nan), padded("r", 0.0), padded("e", 0.0)
    base_c, base_t = padded("c", 0.0), padded("t", np.nan)
    n_base = np.bincount(ci_, minlength=C)
    n_assumed = np.bincount(ci_, weights=agg["assumed"].to_numpy(dtype=float), minlength=C).astype(int)
    spec_lists: dict[int, list] = {}
    for c_, sp_ in zip(agg["case"].tolist(), agg["specimen"].tolist()):
        spec_lists.setdefault(c_, []).append(str(sp_))
    base_specs = np.array([";".join(spec_lists.get(i, [])) for i in range(C)], dtype=object)
    # methods and units seen in the baseline, per case (plain loops: faster than groupby lambdas)
    base_case_list = bl["case"].tolist()

    def _sets(values):
        out: dict[int, set] = {}
        for c_, v_ in zip(base_case_list, values):
            if isinstance(v_, str) and v_:
                out.setdefault(c_, set()).add(v_)
        return out

    base_methods = _sets(hist["method"].to_numpy(dtype=object)[base].tolist()) if "method" in hist else {}
    # -- assessed result per case (replicates: geometric mean)
    arow = hist[is_assessed].copy()
    arow["_case"] = arow["_key"].map(case_index)
    arow["_logv"] = np.log(arow["value"].astype(float))
    a_first = arow.groupby("_case", sort=True).head(1).set_index("_case").sort_index()
    a_log = arow.groupby("_case", sort=True)["_logv"].mean().sort_index().to_numpy()
    a_r = arow.groupby("_case", sort=True).size().sort_index().to_numpy(dtype=float)
    a_units = arow.groupby("_case", sort=True)["reported_unit"].first().sort_index()
    base_units = _sets(hist["reported_unit"].to_numpy(dtype=object)[base].tolist())

    # -- per-case priors, scalars and flags
    scal: dict[str, list] = {k: [] for k in (
        "prior_mean", "sg", "cvi", "cvi_log_sd", "sa", "new_extra_var", "new_y",
        "tau", "delta", "prior_change", "slope_sd")}
    metas: list[dict] = []
    packs_used: dict[str, Any] = {}
    _cols = list(a_first.columns)
    a_recs = [dict(zip(_cols, vals)) for vals in zip(*[a_first[c].tolist() for c in _cols])]
    a_unit_list = a_units.to_list()
    for i in range(C):
        r0 = a_recs[i]
        sp, aid, pid = r0["species"], r0["analyte"], r0["patient"]
        pk = packs_by_species[sp]
        packs_used[pk.id] = pk
        prior = prior_of[(sp, aid)]
        flags: list[str] = []
        if n_assumed[i]:
            flags.append(f"{n_assumed[i]} baseline(s) assumed healthy (state blank)")
        if np.any(base_c[i] != 0):
            flags.append("censored baseline value" + (
                " used at its limit (exact engine; use --engine mcmc to model it)" if engine == "exact" else ""))
        y_new = float(a_log[i])
        new_extra = 0.0
        a_cen = r0["censor"] or ""
        if a_cen:
            flags.append(f"assessed value is censored ({r0['reported_value']})")
        quality = "ok"
        aprobs = _index_problem(r0, prior)
        if aprobs:
            quality = ",".join(n for n, *_ in aprobs)
            for nme, v, t, d in aprobs:
                flags.append(f"{nme} index {v:g} above {t:g}: expected interference {d}; the result is compromised "
                             "and even a value inside the interval may be unreliable")
        if _is_feeding_sensitive(prior) and r0.get("fasted") is False:
            flags.append("assessed specimen not fasted (feeding-sensitive analyte)")
        comparable = True
        a_meth = r0.get("method") if "method" in r0 else None
        bms = set(base_methods.get(i, ()))
        if isinstance(a_meth, str) and a_meth and bms and (bms - {a_meth}):
            if aid in method_bias:
                b, bsd = method_bias[aid]
                y_new -= math.log1p(b)
                new_extra += math.log1p(bsd**2)
                flags.append(f"method changed ({', '.join(sorted(bms))} -> {a_meth}); "
                             f"corrected by a stated bias of {100*b:+.1f} % (SD {100*bsd:.1f} %)")
            else:
                comparable = False
                flags.append(f"not directly comparable: method changed ({', '.join(sorted(bms))} -> {a_meth}) "
                             "and no between-method bias is given")
        units_seen = set(base_units.get(i, ())) | {a_unit_list[i]}
        if len(units_seen) > 1:
            flags.append(f"reported in different units ({', '.join(sorted(units_seen))}); converted to {prior.unit}")
        if n_base[i] == 0:
            flags.append("no baseline: population prior alone")
        if prior.cva_high:
            flags.append("CVA > 0.5 CVI: RCV dominated by analytical imprecision")
        age = r0.get("age_years")
        if getattr(prior, "age_dependent", None) and age is not None and not pd.isna(age) and float(age) < 1.5:
            flags.append(f"young animal: {prior.age_dependent}")
        breed = r0.get("breed")
        breed = breed if isinstance(breed, str) and breed else None
        center = prior.center_for(breed)
        if breed and center != prior.center:
            flags.append(f"breed-specific centre used ({breed})")
        sg, si = float(prior.sg), float(prior.si)
        tau = float(prior.shift_sd) if getattr(prior, "shift_sd", None) else math.sqrt(sg**2 + si**2)
        if shift_scale:
            tau *= float(shift_scale)
        mcrc = getattr(prior, "mcrc", None)
        pc = prior_change if prior_change is not None else float(pk.defaults.get("prior_change", DEFAULT_PRIOR_CHANGE))
        scal["prior_mean"].append(math.log(center))
        scal["sg"].append(sg)
        scal["cvi"].append(float(prior.cvi))
        scal["cvi_log_sd"].append(float(prior.cvi_log_sd))
        scal["sa"].append(float(prior.sa))
        scal["new_extra_var"].append(new_extra)
        scal["new_y"].append(y_new)
        scal["tau"].append(tau)
        scal["delta"].append(math.log1p(mcrc) if mcrc else float("nan"))
        scal["prior_change"].append(pc)
        scal["slope_sd"].append(float(getattr(prior, "slope_sd", 0.1) or 0.1))
        metas.append(dict(patient=pid, species=sp, breed=breed, analyte=aid, prior=prior, pack=pk,
                          row=r0, flags=flags, quality=quality, comparable=comparable, a_cen=a_cen))

    S = {k: np.asarray(v, dtype=float) for k, v in scal.items()}
    new_cen = np.array([(-1.0 if m["a_cen"] == "left" else (1.0 if m["a_cen"] == "right" else 0.0)) for m in metas])
    cases = CaseArrays(
        prior_mean=S["prior_mean"], sg=S["sg"], cvi=S["cvi"], cvi_log_sd=S["cvi_log_sd"], sa=S["sa"],
        base_y=base_y, base_r=base_r, base_extra_var=base_e, base_censor=base_c,
        new_y=S["new_y"], new_r=a_r, new_extra_var=S["new_extra_var"], new_censor=new_cen,
        tau=S["tau"], delta=S["delta"], prior_change=S["prior_change"],
    )
    settings: dict[str, Any] = {"coverage": coverage, "ci_prob": ci_prob, "shift_scale": shift_scale or 1.0,
                                "keep_compromised": keep_compromised}
    mres = None
    if engine == "exact":
        res = exact_assess(cases, coverage=coverage, ci_prob=ci_prob, nodes=nodes)
        converged = np.ones(C, dtype=bool)
        settings["nodes"] = nodes
        settings["quadrature"] = "Gauss-Hermite over ln(CVI)"
    else:
        from .. import mcmc as _mcmc  # PyMC is imported only here

        opts = dict(mcmc_options or {})
        mres = _mcmc.mcmc_assess(
            cases, coverage=coverage, ci_prob=ci_prob, seed=seed,
            patient=[m["patient"] for m in metas], analyte=[m["analyte"] for m in metas], **opts,
        )
        res = mres.summary
        conv = bool(mres.diagnostics.get("converged", False))
        converged = np.full(C, conv)
        settings.update({k: v for k, v in mres.settings.items() if k != "seed"})
        if not conv:
            for m in metas:
                m["flags"].append("MCMC DID NOT CONVERGE: do not use these numbers "
                                  f"(max r_hat {mres.diagnostics.get('max_r_hat')}, "
                                  f"divergences {mres.diagnostics.get('divergences')})")

    # -- classical comparisons, vectorised over cases
    cva = np.array([float(m["prior"].cva) for m in metas])
    cvi = S["cvi"]
    cvg = np.array([float(m["prior"].cvg) for m in metas])
    rcv = classical.rcv_classical(cva, cvi)
    rcv1 = classical.rcv_classical(cva, cvi, one_sided=True)
    up, down = classical.rcv_lognormal(cva, cvi)
    has_b = n_base > 0
    last_idx = np.maximum(n_base - 1, 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        last = np.where(has_b, np.exp(base_y[np.arange(C), last_idx]), np.nan)
        gmean = np.where(has_b, np.exp(np.nansum(np.nan_to_num(base_y), axis=1) / np.maximum(n_base, 1)), np.nan)
        v_eff = np.exp(S["new_y"])
        d_last = v_eff / last - 1
        d_mean = v_eff / gmean - 1
        p_sig = np.where(has_b, classical.prob_significant_change(d_mean, cva, cvi), np.nan)
        z = classical.z_two_sided(coverage)
        st = np.sqrt(np.log1p(cva**2) + np.log1p(cvi**2))
        h = z * st * np.sqrt(1.0 + 1.0 / np.maximum(n_base, 1))
        m2lo = np.where(has_b, gmean * np.exp(-h), np.nan)
        m2hi = np.where(has_b, gmean * np.exp(h), np.nan)

    def tri(mask):
        return pd.array([bool(x) if hb else pd.NA for x, hb in zip(mask, has_b)], dtype="boolean")

    values = np.array([float(np.exp(a_log[i])) if a_r[i] > 1 else float(a_recs[i]["value"]) for i in range(C)])
    pop_lo = np.array([float(m["prior"].ri_lower) for m in metas])
    pop_hi = np.array([float(m["prior"].ri_upper) for m in metas])
    sp_mean = np.exp(res["theta_mean"])
    mcrc_pct = np.array([100 * float(m["prior"].mcrc) if getattr(m["prior"], "mcrc", None) else np.nan for m in metas])
    table = pd.DataFrame({
        "patient": [m["patient"] for m in metas], "species": [m["species"] for m in metas],
        "breed": [m["breed"] for m in metas], "analyte": [m["analyte"] for m in metas],
        "label": [_label(m["analyte"]) for m in metas], "unit": [m["prior"].unit for m in metas],
        "specimen": [target[m["patient"]] for m in metas],
        "collected_at": [t_target[m["patient"]] for m in metas],
        "value": values, "reported_value": [m["row"]["reported_value"] for m in metas],
        "reported_unit": [m["row"]["reported_unit"] for m in metas], "censor": [m["a_cen"] for m in metas],
        "n_baseline": n_base.astype(int), "baseline_specimens": base_specs,
        "assumed_healthy": n_assumed,
        "set_point_mean": sp_mean, "set_point_lower": np.exp(res["theta_lower"]),
        "set_point_upper": np.exp(res["theta_upper"]),
        "pi_lower": np.exp(res["pi_lower"]), "pi_upper": np.exp(res["pi_upper"]), "coverage": coverage,
        "percentile": res["percentile"], "bayes_factor": res["bf10"], "p_change": res["p_change"],
        "p_increase": res["p_increase"], "p_exceed_delta": res["p_exceed_delta"], "delta_pct": mcrc_pct,
        "change_pct": 100 * (v_eff / sp_mean - 1),
        "rcv_classical_pct": 100 * rcv, "rcv_one_sided_pct": 100 * rcv1,
        "rcv_lognormal_up_pct": 100 * up, "rcv_lognormal_down_pct": 100 * down,
        "change_vs_last_pct": 100 * d_last, "change_vs_mean_pct": 100 * d_mean,
        "rcv_exceeded_last": tri(np.abs(d_last) > rcv), "rcv_exceeded_mean": tri(np.abs(d_mean) > rcv),
        "lognormal_exceeded_last": tri((d_last > up) | (d_last < down)),
        "lognormal_exceeded_mean": tri((d_mean > up) | (d_mean < down)),
        "p_significant": p_sig, "model2_lower": m2lo, "model2_upper": m2hi,
        "ii": classical.index_of_individuality(cvi, cvg),
        "ii_total": classical.index_of_individuality(cvi, cvg, cva),
        "n_for_setpoint": classical.n_for_setpoint(cva, cvi, 0.10),
        "cva_high": classical.cva_too_high(cva, cvi),
        "pop_lower": pop_lo, "pop_upper": pop_hi, "outside_population": (values < pop_lo) | (values > pop_hi),
        "cvi_pct": 100 * cvi, "cvg_pct": 100 * cvg, "cva_pct": 100 * cva,
        "cvi_post_pct": 100 * res["cvi_post_mean"],
        "retest_group": [m["prior"].group for m in metas], "quality": [m["quality"] for m in metas],
        "comparable": [m["comparable"] for m in metas], "flags": [list(m["flags"]) for m in metas],
        "engine": engine, "converged": converged, "pack": [m["pack"].id for m in metas],
    })
    if trend:
        tr = _trend_block(metas, S, base_y, base_t, base_r, base_e, years, hist, is_assessed, settings,
                          prior_drift, nodes, case_index)
        if tr is not None:
            for k, v in tr.items():
                table[k] = v
    hist = hist.drop(columns=["_target", "_t_target", "_key"])
    ids = sorted(packs_used)
    attrs = {
        "pack_id": ",".join(ids),
        "pack_sha256": ",".join(packs_used[k].sha256 for k in ids),
        "engine": engine,
        "seed": seed,
        "settings": settings,
        "version": __version__,
        "coverage": coverage,
        "ci_prob": ci_prob,
        "prior_change": sorted(set(scal["prior_change"])),
        "prior_drift": prior_drift if prior_drift is not None else DEFAULT_PRIOR_DRIFT,
        "at": None if at is None else str(at),
    }
    return Assessment(table=table, history=hist, attrs=attrs, packs=packs_used, mcmc=mres)


def _label(aid: str) -> str:
    try:
        from ..units import label
        return label(aid)
    except Exception:  # registry missing an entry: fall back to the id
        return aid


def _trend_block(metas, S, base_y, base_t, base_r, base_e, years, hist, is_assessed, settings,
                 prior_drift, nodes, case_index):
    """Drift model per case over baselines + assessed result (rule: >= TREND_MIN_SPECIMENS usable
    specimens spanning >= TREND_MIN_SPAN_YEARS)."""
    try:
        from ..model import trend as _trend
    except ImportError:
        return None
    C = len(metas)
    a_t = np.empty(C)
    keys = hist["_key"].to_numpy()[is_assessed]
    yrs = years[is_assessed]
    for k, y in zip(keys, yrs):
        a_t[case_index[k]] = y
    t = np.concatenate([base_t, a_t[:, None]], axis=1)
    y = np.concatenate([base_y, S["new_y"][:, None]], axis=1)
    r = np.concatenate([base_r, np.ones((C, 1))], axis=1)
    e = np.concatenate([base_e, S["new_extra_var"][:, None]], axis=1)
    lim_u = np.log([m["prior"].ri_upper for m in metas])
    lim_l = np.log([m["prior"].ri_lower for m in metas])
    pdrift = prior_drift if prior_drift is not None else DEFAULT_PRIOR_DRIFT
    out = _trend.trend_exact(
        t, y, r, e, S["prior_mean"], S["sg"], S["cvi"], S["cvi_log_sd"], S["sa"], S["slope_sd"],
        prior_drift=pdrift, limit_upper=lim_u, limit_lower=lim_l, nodes=nodes,
    )
    settings["trend_rule"] = (f">= {TREND_MIN_SPECIMENS} usable specimens spanning >= "
                              f"{TREND_MIN_SPAN_YEARS} years")
    elig = np.asarray(out["eligible"], dtype=bool)

    def col(k):
        return np.where(elig, np.asarray(out[k], dtype=float), np.nan)

    res = {
        "trend_p_drift": col("p_drift"), "trend_p_increase": col("p_increase"),
        "trend_pct_per_year": col("pct_per_year_mean"), "trend_pct_lower": col("pct_per_year_lower"),
        "trend_pct_upper": col("pct_per_year_upper"), "trend_years_to_limit": col("years_to_limit"),
        "trend_years_lower": col("years_to_limit_lower"), "trend_years_upper": col("years_to_limit_upper"),
        "trend_limit": [str(s) if e_ else "" for s, e_ in zip(out["limit_side"], elig)],
    }
    notes = []
    first_t = np.nanmin(t, axis=1)
    for i, m in enumerate(metas):
        if not elig[i]:
            notes.append(f"trend not computed: needs >= {TREND_MIN_SPECIMENS} usable specimens spanning >= "
                         f"{TREND_MIN_SPAN_YEARS} years")
            continue
        note = ""
        if not np.isfinite(res["trend_years_to_limit"][i]):
            note = f"set point not projected to reach a population limit within {TREND_HORIZON_YEARS:g} years"
        if getattr(m["prior"], "age_dependent", None):
            bd = m["row"].get("birth_date")
            age0 = None
            if bd is not None and not pd.isna(bd):
                age0 = first_t[i] - pd.Timestamp(bd).value / 1e9 / 86400 / _YEAR_DAYS
            if age0 is None or age0 < 2.0:
                note = ("young or unknown age: this analyte's set point is known to move with age "
                        f"({m['prior'].age_dependent}); a drift may be growth, not disease")
        notes.append(note)
    res["trend_note"] = notes
    return res
