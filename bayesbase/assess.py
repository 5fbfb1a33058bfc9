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

from . import __version__, classical
from .constants import (
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
from .engine import CaseArrays, cv_to_sigma, exact_assess
from .errors import AnalyteNotInPack, BayesbaseError

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
    from . import data as _data

    if isinstance(results, (str, Path)):
        return _data.load_results(results, now=now)
    if not isinstance(results, pd.DataFrame):
        raise BayesbaseError("results must be a file path or a pandas DataFrame")
    needed = {"patient", "species", "specimen", "collected_at", "analyte", "value", "unit", "censor"}
    if needed.issubset(results.columns) and "reported_value" in results.columns:
        return results.copy()
    return _data.validate(results, now=now)


def _resolve_pack(pack, species: str, priors, cache: dict):
    from .priors import Pack, load_pack

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
    hist["role"] = "baseline"
    hist["reason"] = ""
    bd = pd.to_datetime(hist["birth_date"]) if "birth_date" in hist else pd.Series(pd.NaT, index=hist.index)
    hist["age_years"] = (hist["collected_at"] - bd).dt.days / _YEAR_DAYS

    cases_meta: list[dict] = []
    rows_y: list[list[float]] = []
    rows_r: list[list[float]] = []
    rows_e: list[list[float]] = []
    rows_c: list[list[float]] = []
    rows_t: list[list[float]] = []
    scal: dict[str, list] = {k: [] for k in (
        "prior_mean", "sg", "cvi", "cvi_log_sd", "sa", "new_y", "new_r", "new_extra_var",
        "new_censor", "tau", "delta", "prior_change", "slope_sd", "new_t")}
    packs_used: dict[str, Any] = {}

    for pid, pf in frame.groupby("patient", sort=False):
        species = pf["species"].iloc[0]
        pk = _resolve_pack(pack, species, priors, cache)
        if pk.species != species:
            raise BayesbaseError(
                f"patient {pid} is a {species} but pack '{pk.id}' is for {pk.species}; choose the {species} pack")
        packs_used[pk.id] = pk
        spec = pf.drop_duplicates("specimen")[["specimen", "collected_at"]]
        target = _pick_assessed(spec, at)
        t_target = spec.loc[spec["specimen"] == target, "collected_at"].iloc[0]
        target_rows = pf[pf["specimen"] == target]
        pc_default = prior_change if prior_change is not None else float(
            pk.defaults.get("prior_change", DEFAULT_PRIOR_CHANGE))
        for aid, arows in target_rows.groupby("analyte", sort=False):
            try:
                prior = pk.get(aid)
            except AnalyteNotInPack as exc:
                raise AnalyteNotInPack(
                    f"{exc} (patient {pid}); add it with a lab override CSV (--priors) or drop it") from None
            sub = pf[pf["analyte"] == aid]
            flags: list[str] = []
            earlier = sub[sub["collected_at"] < t_target]
            later = sub[sub["collected_at"] > t_target]
            hist.loc[later.index, "role"] = "later"
            hist.loc[later.index, "reason"] = "collected after the assessed specimen"
            hist.loc[arows.index, "role"] = "assessed"
            # -- baseline selection
            base_idx = []
            extra = {}
            fasted_exist = earlier["fasted"].eq(True).any() if "fasted" in earlier else False
            feeding = _is_feeding_sensitive(prior)
            for i, row in earlier.iterrows():
                state = row.get("state") or ""
                if state == "unwell":
                    hist.loc[i, ["role", "reason"]] = ["unwell", "state unwell: shown, never used for the set point"]
                    continue
                probs = _index_problem(row, prior)
                if probs:
                    txt = "; ".join(f"{n} index {v:g} above {t:g} (interference: {d})" for n, v, t, d in probs)
                    if keep_compromised:
                        extra[i] = float(prior.si) ** 2
                        hist.loc[i, "reason"] = f"kept with inflated variance: {txt}"
                    else:
                        hist.loc[i, ["role", "reason"]] = ["excluded", f"sample quality: {txt}"]
                        continue
                if feeding and fasted_exist and row.get("fasted") is False:
                    hist.loc[i, ["role", "reason"]] = [
                        "excluded", "not fasted (feeding-sensitive analyte; fasted baselines exist)"]
                    continue
                if state == "":
                    hist.loc[i, "reason"] = "assumed healthy (state blank)"
                base_idx.append(i)
            base = hist.loc[base_idx]
            n_assumed = int((base["state"].fillna("") == "").sum()) if len(base) else 0
            if n_assumed:
                flags.append(f"{n_assumed} baseline(s) assumed healthy (state blank)")
            # group replicates per specimen: mean of logs, count
            sa = float(prior.sa)
            ys, rs, es, cs, ts = [], [], [], [], []
            for sid, g in base.groupby("specimen", sort=False):
                ys.append(float(np.mean(np.log(g["value"].astype(float)))))
                rs.append(float(len(g)))
                es.append(float(np.mean([extra.get(i, 0.0) for i in g.index])))
                cen = g["censor"].iloc[0]
                cs.append(-1.0 if cen == "left" else (1.0 if cen == "right" else 0.0))
                ts.append(float(g["collected_at"].iloc[0].value) / 1e9 / 86400 / _YEAR_DAYS)
            if any(c != 0 for c in cs):
                flags.append("censored baseline value" + (
                    " used at its limit (exact engine; use --engine mcmc to model it)" if engine == "exact" else ""))
            # -- assessed result
            a_log = float(np.mean(np.log(arows["value"].astype(float))))
            a_r = float(len(arows))
            a_row = arows.iloc[0]
            a_cen = a_row["censor"]
            new_extra = 0.0
            if a_cen:
                flags.append(f"assessed value is censored ({a_row['reported_value']})")
            aprobs = _index_problem(a_row, prior)
            quality = "ok"
            if aprobs:
                quality = ",".join(n for n, *_ in aprobs)
                for n, v, t, d in aprobs:
                    flags.append(
                        f"{n} index {v:g} above {t:g}: expected interference {d}; the result is compromised "
                        "and even a value inside the interval may be unreliable")
            if feeding and a_row.get("fasted") is False:
                flags.append("assessed specimen not fasted (feeding-sensitive analyte)")
            # -- method comparability
            comparable = True
            a_meth = a_row.get("method")
            base_meths = {m for m in base["method"].dropna().unique()} if "method" in base else set()
            if isinstance(a_meth, str) and a_meth and base_meths and (base_meths - {a_meth}):
                if aid in method_bias:
                    b, bsd = method_bias[aid]
                    a_log -= math.log1p(b)
                    new_extra += math.log1p(bsd**2)
                    flags.append(f"method changed ({', '.join(sorted(base_meths))} -> {a_meth}); "
                                 f"corrected by a stated bias of {100*b:+.1f} % (SD {100*bsd:.1f} %)")
                else:
                    comparable = False
                    flags.append(f"not directly comparable: method changed ({', '.join(sorted(base_meths))} -> {a_meth}) "
                                 "and no between-method bias is given")
            units_seen = set(sub.loc[sub.index.isin(base_idx) | sub.index.isin(arows.index), "reported_unit"])
            if len(units_seen) > 1:
                flags.append(f"reported in different units ({', '.join(sorted(units_seen))}); converted to {prior.unit}")
            if not ys:
                flags.append("no baseline: population prior alone")
            if prior.cva_high:
                flags.append("CVA > 0.5 CVI: RCV dominated by analytical imprecision")
            if getattr(prior, "age_dependent", None):
                ages = hist.loc[arows.index, "age_years"]
                if ages.notna().any() and float(ages.iloc[0]) < 1.5:
                    flags.append(f"young animal: {prior.age_dependent}")
            breed = a_row.get("breed")
            breed = breed if isinstance(breed, str) and breed else None
            center = prior.center_for(breed)
            if breed and center != prior.center:
                flags.append(f"breed-specific centre used ({breed})")
            sg = float(prior.sg)
            si = float(prior.si)
            tau = float(prior.shift_sd) if getattr(prior, "shift_sd", None) else math.sqrt(sg**2 + si**2)
            if shift_scale:
                tau *= float(shift_scale)
            mcrc = getattr(prior, "mcrc", None)
            cases_meta.append(dict(
                patient=pid, species=species, breed=breed, analyte=aid, prior=prior, pack=pk,
                specimen=target, collected_at=t_target, row=a_row,
                value=float(arows["value"].iloc[0]) if len(arows) == 1 else float(np.exp(np.mean(np.log(arows["value"].astype(float))))),
                base_values=[float(np.exp(y)) for y in ys], base_specimens=list(base.drop_duplicates("specimen")["specimen"]),
                n_assumed=n_assumed, flags=flags, quality=quality, comparable=comparable, a_cen=a_cen,
                base_times=ts, base_logs=ys, center=center, a_log=a_log,
            ))
            rows_y.append(ys)
            rows_r.append(rs)
            rows_e.append(es)
            rows_c.append(cs)
            rows_t.append(ts)
            scal["prior_mean"].append(math.log(center))
            scal["sg"].append(sg)
            scal["cvi"].append(float(prior.cvi))
            scal["cvi_log_sd"].append(float(prior.cvi_log_sd))
            scal["sa"].append(sa)
            scal["new_y"].append(a_log)
            scal["new_r"].append(a_r)
            scal["new_extra_var"].append(new_extra)
            scal["new_censor"].append(-1.0 if a_cen == "left" else (1.0 if a_cen == "right" else 0.0))
            scal["tau"].append(tau)
            scal["delta"].append(math.log1p(mcrc) if mcrc else float("nan"))
            scal["prior_change"].append(pc_default)
            scal["slope_sd"].append(float(getattr(prior, "slope_sd", 0.1) or 0.1))
            scal["new_t"].append(float(pd.Timestamp(t_target).value) / 1e9 / 86400 / _YEAR_DAYS)

    if not cases_meta:
        raise BayesbaseError("the assessed specimen has no results")
    J = max([len(y) for y in rows_y] + [1])
    C = len(cases_meta)

    def pad(rows, fill):
        a = np.full((C, J), fill, dtype=float)
        for i, r in enumerate(rows):
            a[i, : len(r)] = r
        return a

    cases = CaseArrays(
        prior_mean=np.array(scal["prior_mean"]), sg=np.array(scal["sg"]), cvi=np.array(scal["cvi"]),
        cvi_log_sd=np.array(scal["cvi_log_sd"]), sa=np.array(scal["sa"]),
        base_y=pad(rows_y, np.nan), base_r=pad(rows_r, 0.0), base_extra_var=pad(rows_e, 0.0),
        base_censor=pad(rows_c, 0.0), new_y=np.array(scal["new_y"]), new_r=np.array(scal["new_r"]),
        new_extra_var=np.array(scal["new_extra_var"]), new_censor=np.array(scal["new_censor"]),
        tau=np.array(scal["tau"]), delta=np.array(scal["delta"]), prior_change=np.array(scal["prior_change"]),
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
        from . import mcmc as _mcmc  # PyMC is imported only here

        opts = dict(mcmc_options or {})
        mres = _mcmc.mcmc_assess(
            cases, coverage=coverage, ci_prob=ci_prob, seed=seed,
            patient=[m["patient"] for m in cases_meta], analyte=[m["analyte"] for m in cases_meta],
            **opts,
        )
        res = mres.summary
        conv = bool(mres.diagnostics.get("converged", False))
        converged = np.full(C, conv)
        settings.update({k: v for k, v in mres.settings.items() if k != "seed"})
        if not conv:
            for m in cases_meta:
                m["flags"].append("MCMC DID NOT CONVERGE: do not use these numbers "
                                  f"(max r_hat {mres.diagnostics.get('max_r_hat')}, "
                                  f"divergences {mres.diagnostics.get('divergences')})")

    # -- trend over the usable specimens (baselines + assessed)
    trend_out = None
    if trend:
        trend_out = _trend_block(cases_meta, scal, settings, prior_drift, nodes)

    records = []
    z2 = classical.z_two_sided(0.95)
    for i, m in enumerate(cases_meta):
        prior = m["prior"]
        cva, cvi, cvg = float(prior.cva), float(prior.cvi), float(prior.cvg)
        rcv = float(classical.rcv_classical(cva, cvi))
        rcv1 = float(classical.rcv_classical(cva, cvi, one_sided=True))
        up, down = (float(x) for x in classical.rcv_lognormal(cva, cvi))
        bv = m["base_values"]
        val = m["value"] if m["comparable"] or True else m["value"]
        v_eff = float(np.exp(m["a_log"]))
        if bv:
            last = bv[-1]
            gmean = float(np.exp(np.mean(np.log(bv))))
            d_last = v_eff / last - 1
            d_mean = v_eff / gmean - 1
            ex_last = abs(d_last) > rcv
            ex_mean = abs(d_mean) > rcv
            ln_ex_last = bool(d_last > up or d_last < down)
            ln_ex_mean = bool(d_mean > up or d_mean < down)
            p_sig = float(classical.prob_significant_change(d_mean, cva, cvi))
            m2lo, m2hi = classical.model2_interval(bv, cva, cvi, coverage)
        else:
            d_last = d_mean = np.nan
            ex_last = ex_mean = ln_ex_last = ln_ex_mean = pd.NA
            p_sig = np.nan
            m2lo = m2hi = np.nan
        sp = float(np.exp(res["theta_mean"][i]))
        pop_lo, pop_hi = float(prior.ri_lower), float(prior.ri_upper)
        rec = dict(
            patient=m["patient"], species=m["species"], breed=m["breed"], analyte=m["analyte"],
            label=_label(m["analyte"]), unit=prior.unit, specimen=m["specimen"], collected_at=m["collected_at"],
            value=val, reported_value=m["row"]["reported_value"], reported_unit=m["row"]["reported_unit"],
            censor=m["a_cen"], n_baseline=int(res["n_baseline"][i]),
            baseline_specimens=";".join(m["base_specimens"]), assumed_healthy=m["n_assumed"],
            set_point_mean=sp, set_point_lower=float(np.exp(res["theta_lower"][i])),
            set_point_upper=float(np.exp(res["theta_upper"][i])),
            pi_lower=float(np.exp(res["pi_lower"][i])), pi_upper=float(np.exp(res["pi_upper"][i])),
            coverage=coverage, percentile=float(res["percentile"][i]), bayes_factor=float(res["bf10"][i]),
            p_change=float(res["p_change"][i]), p_increase=float(res["p_increase"][i]),
            p_exceed_delta=float(res["p_exceed_delta"][i]),
            delta_pct=100 * float(prior.mcrc) if getattr(prior, "mcrc", None) else np.nan,
            change_pct=100 * (v_eff / sp - 1),
            rcv_classical_pct=100 * rcv, rcv_one_sided_pct=100 * rcv1,
            rcv_lognormal_up_pct=100 * up, rcv_lognormal_down_pct=100 * down,
            change_vs_last_pct=100 * d_last, change_vs_mean_pct=100 * d_mean,
            rcv_exceeded_last=ex_last, rcv_exceeded_mean=ex_mean,
            lognormal_exceeded_last=ln_ex_last, lognormal_exceeded_mean=ln_ex_mean,
            p_significant=p_sig, model2_lower=m2lo, model2_upper=m2hi,
            ii=float(classical.index_of_individuality(cvi, cvg)),
            ii_total=float(classical.index_of_individuality(cvi, cvg, cva)),
            n_for_setpoint=int(classical.n_for_setpoint(cva, cvi, 0.10)),
            cva_high=bool(classical.cva_too_high(cva, cvi)),
            pop_lower=pop_lo, pop_upper=pop_hi, outside_population=bool(val < pop_lo or val > pop_hi),
            cvi_pct=100 * cvi, cvg_pct=100 * cvg, cva_pct=100 * cva, cvi_post_pct=100 * float(res["cvi_post_mean"][i]),
            retest_group=prior.group, quality=m["quality"], comparable=m["comparable"],
            flags=list(m["flags"]), engine=engine, converged=bool(converged[i]),
            pack=m["pack"].id,
        )
        if trend_out is not None:
            for k, v in trend_out[i].items():
                rec[k] = v
        records.append(rec)
    table = pd.DataFrame.from_records(records)
    del z2
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
        from .units import label
        return label(aid)
    except Exception:  # registry missing an entry: fall back to the id
        return aid


def _trend_block(cases_meta, scal, settings, prior_drift, nodes):
    """Drift model per case over baselines + assessed result (rule: >= TREND_MIN_SPECIMENS usable
    specimens spanning >= TREND_MIN_SPAN_YEARS)."""
    try:
        from . import trend as _trend
    except ImportError:
        return None
    C = len(cases_meta)
    J = max(len(m["base_logs"]) + 1 for m in cases_meta)
    t = np.full((C, J), np.nan)
    y = np.full((C, J), np.nan)
    r = np.zeros((C, J))
    e = np.zeros((C, J))
    lim_u = np.empty(C)
    lim_l = np.empty(C)
    for i, m in enumerate(cases_meta):
        ts = list(m["base_times"]) + [scal["new_t"][i]]
        ys = list(m["base_logs"]) + [m["a_log"]]
        n = len(ts)
        t[i, :n] = ts
        y[i, :n] = ys
        r[i, :n] = 1.0
        lim_u[i] = math.log(m["prior"].ri_upper)
        lim_l[i] = math.log(m["prior"].ri_lower)
    pdrift = prior_drift if prior_drift is not None else DEFAULT_PRIOR_DRIFT
    out = _trend.trend_exact(
        t, y, r, e, np.array(scal["prior_mean"]), np.array(scal["sg"]), np.array(scal["cvi"]),
        np.array(scal["cvi_log_sd"]), np.array(scal["sa"]), np.array(scal["slope_sd"]),
        prior_drift=pdrift, limit_upper=lim_u, limit_lower=lim_l, nodes=nodes,
    )
    settings["trend_rule"] = (f">= {TREND_MIN_SPECIMENS} usable specimens spanning >= "
                              f"{TREND_MIN_SPAN_YEARS} years")
    rows = []
    for i, m in enumerate(cases_meta):
        elig = bool(out["eligible"][i])
        d = {
            "trend_p_drift": float(out["p_drift"][i]) if elig else np.nan,
            "trend_p_increase": float(out["p_increase"][i]) if elig else np.nan,
            "trend_pct_per_year": float(out["pct_per_year_mean"][i]) if elig else np.nan,
            "trend_pct_lower": float(out["pct_per_year_lower"][i]) if elig else np.nan,
            "trend_pct_upper": float(out["pct_per_year_upper"][i]) if elig else np.nan,
            "trend_years_to_limit": float(out["years_to_limit"][i]) if elig else np.nan,
            "trend_years_lower": float(out["years_to_limit_lower"][i]) if elig else np.nan,
            "trend_years_upper": float(out["years_to_limit_upper"][i]) if elig else np.nan,
            "trend_limit": str(out["limit_side"][i]) if elig else "",
            "trend_note": "" if elig else (f"trend not computed: needs >= {TREND_MIN_SPECIMENS} usable "
                                           f"specimens spanning >= {TREND_MIN_SPAN_YEARS} years"),
        }
        if elig and not np.isfinite(d["trend_years_to_limit"]):
            d["trend_note"] = f"set point not projected to reach a population limit within {TREND_HORIZON_YEARS:g} years"
        if elig and getattr(m["prior"], "age_dependent", None):
            bd = m["row"].get("birth_date")
            first = min(m["base_times"] + [scal["new_t"][i]])
            age0 = (first - pd.Timestamp(bd).value / 1e9 / 86400 / _YEAR_DAYS) if (bd is not None and not pd.isna(bd)) else None
            if age0 is None or age0 < 2.0:
                d["trend_note"] = ("young or unknown age: this analyte's set point is known to move with age "
                                   f"({m['prior'].age_dependent}); a drift may be growth, not disease")
        rows.append(d)
    return rows
