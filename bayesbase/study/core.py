"""``estimate()``: CVA, CVI and CVG of a biological-variation study, classical and Bayesian.

Input: the tidy results contract (DEVELOPERS.md) of a designed study - healthy animals
(``patient``), repeated specimens per animal (``specimen``, ``collected_at``) and analytical
replicates (``replicate``), one or many analytes. Per analyte, on the natural-log scale:

1. input exclusions (censored values, specimens taken while unwell), each listed;
2. the outlier, homogeneity, normality and steady-state steps of :mod:`.outliers`;
3. the nested ANOVA with confidence intervals of :mod:`.anova` (``method="anova"``/``"both"``),
   optionally CV-ANOVA (Roraas 2016);
4. the Bayesian model of :mod:`.bayes` (``method="bayes"``/``"both"``; PyMC, imported only
   there and only then). A fit that fails its convergence checks is never silent: its rows are
   marked (method ``"bayes (not converged)"``, ``converged`` False), a warning is added and it
   is not used for the pack fragment;
5. derived numbers: index of individuality CVI/CVG (Harris EK, Clin Chem 1974;20:1535),
   classical RCV sqrt(2) 1.96 sqrt(CVA^2 + CVI^2) (Fraser CG, Clin Chem Lab Med 2012;50:807),
   number of results for the set point within +/- 10 % (Fraser & Harris 1989), desirable CVA
   <= 0.5 CVI (common practice).

Analysis only: nothing is printed; :mod:`.output` writes files and :mod:`.cli` prints.
"""
from __future__ import annotations

import hashlib
import importlib
import io
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from .. import __version__, classical
from ..constants import CI_BOUNDS, DEFAULT_CI_PROB, DIM_ANALYTE, DIM_CI
from ..io import read_results as load_results
from ..validate import validate
from ..errors import BayesbaseError
from ..units import label as analyte_label
from ..units import resolve_analyte
from . import anova as _anova
from .common import (
    COMPONENTS,
    DEFAULT_ALPHA,
    DESIRABLE_CVA_FRACTION,
    ESTIMATE_COLUMNS,
    METHODS,
    REMOVED_COLUMNS,
    SETPOINT_TOLERANCE,
    StudyError,
)
from .outliers import screen

__all__ = ["StudyResult", "estimate", "DIM_COMPONENT"]

DIM_COMPONENT = "component"
#: Method label of a Bayesian fit that failed its convergence checks.
UNCONVERGED = "bayes (not converged)"
_CANONICAL = ("patient", "species", "specimen", "collected_at", "analyte", "value", "unit", "censor",
              "replicate", "state")


@dataclass
class StudyResult:
    """What :func:`estimate` returns.

    ``table``: tidy, one row per analyte, method and quantity (``component`` in COMPONENTS plus
    ``ii``, ``rcv``, ``n_for_setpoint``, ``desirable_cva``) with ``estimate, lower, upper``
    (CVs as fractions), ``scale``, ``converged`` and ``note``.
    ``estimates``: the estimates.csv frame (exact columns of :data:`ESTIMATE_COLUMNS`, percent).
    ``dataset``: xarray with dims ``analyte``, ``component``, ``ci_bound``.
    ``removed``: every outlier found (and every input exclusion), :data:`REMOVED_COLUMNS`.
    ``steps``: every test run (outlier steps that found nothing, homogeneity, normality, steady
    state) with statistic, p value and outcome; ``slopes``: per-animal steady-state slopes.
    ``series``: the results of the study with ``ln_value``, ``kept`` and ``days`` (for plots).
    ``notes``: per-analyte words; ``warnings``: what a reader must not miss.
    ``bayes``: the Bayesian fit per analyte (or None); ``attrs``: provenance.
    """

    table: pd.DataFrame
    estimates: pd.DataFrame
    dataset: xr.Dataset
    removed: pd.DataFrame
    steps: pd.DataFrame
    slopes: pd.DataFrame
    series: pd.DataFrame
    notes: dict[str, list[str]]
    warnings: list[str]
    bayes: dict[str, object] = field(default_factory=dict, repr=False)
    attrs: dict = field(default_factory=dict)


# --------------------------------------------------------------------------- input

def _sha256_frame(frame: pd.DataFrame) -> str:
    cols = [c for c in ("patient", "specimen", "collected_at", "analyte", "replicate", "value", "unit",
                        "censor", "state") if c in frame.columns]
    buf = io.StringIO()
    frame[cols].to_csv(buf, index=False)
    return hashlib.sha256(buf.getvalue().encode("utf-8")).hexdigest()


def _load(data) -> tuple[pd.DataFrame, str, str]:
    """(canonical frame, source name, sha256). A path is read with load_results and hashed by its
    bytes; a frame is validated when it is not canonical yet and hashed by its CSV text."""
    if isinstance(data, (str, Path)):
        path = Path(data)
        if not path.is_file():
            raise StudyError(f"{data}: study file not found")
        frame = load_results(path)
        return frame, path.name, hashlib.sha256(path.read_bytes()).hexdigest()
    if not isinstance(data, pd.DataFrame):
        raise TypeError("estimate expects a results file path or a pandas DataFrame")
    frame = data
    if any(c not in frame.columns for c in _CANONICAL):
        frame = validate(frame, source=str(data.attrs.get("source") or "<data>"))
    src = str(frame.attrs.get("source") or "<data frame>")
    sha = str(frame.attrs.get("sha256") or _sha256_frame(frame))
    return frame, src, sha


def _select(frame: pd.DataFrame, source: str, species, analytes) -> tuple[pd.DataFrame, str, list[str]]:
    sp = sorted(set(frame["species"].astype(str)))
    if species is not None:
        species = str(species).strip().lower()
        aliases = {"canine": "dog", "feline": "cat", "equine": "horse"}
        species = aliases.get(species, species)
        if species not in sp:
            raise StudyError(f"{source}: no results for species '{species}' (the file has: {', '.join(sp)})")
        frame = frame[frame["species"] == species]
    elif len(sp) > 1:
        raise StudyError(f"{source}: the file holds several species ({', '.join(sp)}); choose one with --species")
    else:
        species = sp[0]
    present = list(dict.fromkeys(frame["analyte"].astype(str)))
    if analytes:
        want = []
        for a in analytes:
            try:
                aid = resolve_analyte(str(a).strip())
            except BayesbaseError as exc:
                raise StudyError(f"--analytes: {exc}") from None
            if aid not in present:
                raise StudyError(f"{source}: analyte '{aid}' has no results in the file "
                                 f"(analytes present: {', '.join(present)})")
            want.append(aid)
        present = list(dict.fromkeys(want))
    return frame[frame["analyte"].isin(present)], species, present


# --------------------------------------------------------------------------- per analyte

def _derived(cva, cvi, cvg) -> dict:
    ok = all(np.isfinite(x) for x in (cva, cvi))
    ii = cvi / cvg if (np.isfinite(cvi) and np.isfinite(cvg) and cvg > 0) else math.nan
    return dict(
        ii=ii,
        ii_total=float(classical.index_of_individuality(cvi, cvg, cva)) if (ok and np.isfinite(cvg) and cvg > 0) else math.nan,
        rcv=float(classical.rcv_classical(cva, cvi)) if ok else math.nan,
        n_for_setpoint=int(classical.n_for_setpoint(cva, cvi, SETPOINT_TOLERANCE)) if ok else None,
        desirable_cva=DESIRABLE_CVA_FRACTION * cvi if np.isfinite(cvi) else math.nan,
    )


def _bayes_table(fit) -> pd.DataFrame:
    t = fit.table
    if "component" in t.columns:
        t = t.set_index("component")
    return t


def _method_rows(analyte, unit, method, comps: dict, converged, note) -> list[dict]:
    """Tidy rows from comps {component: (estimate, lower, upper)}."""
    rows = []
    for c in COMPONENTS:
        est, lo, up = comps.get(c, (math.nan, math.nan, math.nan))
        rows.append(dict(analyte=analyte, unit=unit, method=method, component=c, estimate=est, lower=lo,
                         upper=up, scale="log sd" if c == "cvi_spread_log_sd" else "fraction",
                         converged=converged, note=note))
    d = _derived(comps.get("cva", (math.nan,))[0], comps.get("cvi", (math.nan,))[0], comps.get("cvg", (math.nan,))[0])
    for k, scale in (("ii", "ratio"), ("ii_total", "ratio"), ("rcv", "fraction"), ("n_for_setpoint", "count"),
                     ("desirable_cva", "fraction")):
        v = d[k]
        rows.append(dict(analyte=analyte, unit=unit, method=method, component=k,
                         estimate=math.nan if v is None else float(v), lower=math.nan, upper=math.nan,
                         scale=scale, converged=converged, note=note))
    return rows


def _estimate_row(analyte, unit, method, counts, comps) -> dict:
    def pct(c, i):
        v = comps.get(c, (math.nan,) * 3)[i]
        return 100.0 * v if np.isfinite(v) else math.nan

    d = _derived(comps.get("cva", (math.nan,))[0], comps.get("cvi", (math.nan,))[0], comps.get("cvg", (math.nan,))[0])
    spread = comps.get("cvi_spread_log_sd", (math.nan,))[0]
    return dict(
        analyte=analyte, unit=unit, method=method, **counts,
        cva_pct=pct("cva", 0), cva_lower=pct("cva", 1), cva_upper=pct("cva", 2),
        cvi_pct=pct("cvi", 0), cvi_lower=pct("cvi", 1), cvi_upper=pct("cvi", 2),
        cvi_spread_log_sd=spread,
        cvg_pct=pct("cvg", 0), cvg_lower=pct("cvg", 1), cvg_upper=pct("cvg", 2),
        ii=d["ii"], rcv_pct=100.0 * d["rcv"] if np.isfinite(d["rcv"]) else math.nan,
        n_for_setpoint=d["n_for_setpoint"],
    )


def _anova_comps(fit: _anova.AnovaFit) -> dict:
    cv, lo, up = fit.cv, fit.cv_lower, fit.cv_upper
    return {c: (cv[c], lo[c], up[c]) for c in ("cva", "cvi", "cvg")}


def _bayes_module():
    try:
        return importlib.import_module(".bayes", __package__)
    except ImportError as exc:
        raise StudyError(f"the Bayesian study model (bayesbase.study.bayes) is not available: {exc}") from None


# --------------------------------------------------------------------------- main

def estimate(data, *, analytes=None, species=None, method: str = "anova", seed: int = 0,
             outlier_removal: bool = True, alpha: float = DEFAULT_ALPHA, ci_prob: float = DEFAULT_CI_PROB,
             cv_anova: bool = False, robust: bool = False, draws: int = 1000, tune: int = 1000,
             chains: int = 2) -> StudyResult:
    """Estimate CVA, CVI and CVG of every (or each chosen) analyte of a study.

    ``data``: a results file path (read with :func:`bayesbase.io.read_results`; its SHA-256
    goes into the provenance) or a results DataFrame. ``method``: ``"anova"``, ``"bayes"`` or
    ``"both"``; ``cv_anova`` adds CV-ANOVA rows. ``outlier_removal=False`` keeps every result
    (outliers are still tested and listed as kept). The Bayesian fit of analyte number k uses
    seed ``seed + k``. Raises :class:`StudyError` for an unusable file or design.
    """
    if method not in METHODS:
        raise StudyError(f"method must be one of {', '.join(METHODS)}, got '{method}'")
    if not 0 < alpha < 1 or not 0 < ci_prob < 1:
        raise StudyError("alpha and ci_prob must lie between 0 and 1")
    frame, source, sha = _load(data)
    frame, species, analyte_ids = _select(frame, source, species, analytes)
    frame = frame.reset_index(drop=True)
    t0 = frame["collected_at"].min()
    days_all = (frame["collected_at"] - t0).dt.total_seconds().to_numpy() / 86400.0
    censor = frame["censor"].astype(str).to_numpy(dtype=object)
    state = frame["state"].astype(str).to_numpy(dtype=object)
    patient = frame["patient"].astype(str).to_numpy(dtype=object)
    specimen = frame["specimen"].astype(str).to_numpy(dtype=object)
    value = frame["value"].to_numpy(float)
    analyte_col = frame["analyte"].astype(str).to_numpy(dtype=object)
    replicate = frame["replicate"].to_numpy(dtype=np.int64)
    src_row = frame["source_row"].to_numpy() if "source_row" in frame.columns else np.full(len(frame), -1)

    run_anova = method in ("anova", "both")
    run_bayes = method in ("bayes", "both")
    bayes_mod = _bayes_module() if run_bayes else None

    table_rows: list[dict] = []
    est_rows: list[dict] = []
    removed_rows: list[dict] = []
    step_rows: list[dict] = []
    slope_rows: list[dict] = []
    series_parts: list[pd.DataFrame] = []
    notes: dict[str, list[str]] = {}
    warnings: list[str] = []
    bayes_fits: dict[str, object] = {}
    used_fits: dict[str, dict] = {}

    for k, aid in enumerate(analyte_ids):
        idx = np.flatnonzero(analyte_col == aid)
        unit = str(frame["unit"].iat[idx[0]])
        an_notes: list[str] = []
        notes[aid] = an_notes
        # ---- input exclusions
        excl_reason = np.where(censor[idx] != "", "censored value (" + censor[idx] + ")", "")
        excl_reason = np.where((excl_reason == "") & (state[idx] == "unwell"), "specimen taken while unwell",
                               excl_reason)
        for j in np.flatnonzero(excl_reason != ""):
            r = idx[j]
            removed_rows.append(dict(analyte=aid, step=0, test="input", level="result", animal=patient[r],
                                     specimen=specimen[r], n_results=1, statistic=math.nan,
                                     critical_value=math.nan, alpha=math.nan, action="removed",
                                     reason=f"{excl_reason[j]}; source row {src_row[r]}"))
        use = idx[excl_reason == ""]
        y = np.log(value[use])
        a_codes, a_labels = pd.factorize(patient[use], sort=False)
        sp_codes, sp_labels = pd.factorize(specimen[use], sort=False)
        _, s_first, s_codes = np.unique(a_codes.astype(np.int64) * (len(sp_labels) + 1) + sp_codes,
                                        return_index=True, return_inverse=True)
        s_codes = s_codes.ravel()
        spec_names = np.asarray(sp_labels, dtype=object)[sp_codes[s_first]]  # name of specimen code c
        a_labels = np.asarray(a_labels, dtype=object)
        keep = np.ones(use.size, bool)
        sc = None
        if use.size:
            sc = screen(a_codes, s_codes, y, days_all[use], alpha=alpha, remove=outlier_removal)
            keep = sc.keep
            an_notes.extend(sc.notes)
            for rec in sc.records:
                removed_rows.append(dict(rec, analyte=aid, animal=a_labels[rec["animal"]],
                                         specimen=spec_names[rec["specimen"]] if rec["specimen"] >= 0 else ""))
                if rec["step"] == 3:
                    warnings.append(f"{aid}: Reed's criterion {rec['action']} animal {a_labels[rec['animal']]} "
                                    f"({rec['reason'].split('; ', 1)[-1]}; --no-outlier-removal keeps it)")
            for t in sc.tests:
                step_rows.append(dict(t, analyte=aid))
                if t["flagged"]:
                    if t["step"] == 4:
                        warnings.append(f"{aid}: {t['test']} p = {t['p_value']:.3g}: within-animal variances "
                                        "differ between animals; the classical CVI is an average and its interval, "
                                        "which ignores the differences, is too narrow (the Bayesian model "
                                        "estimates the spread)")
                    elif t["step"] == 6 and "mean slope" in t["test"]:
                        warnings.append(f"{aid}: the animals drift together ({t['detail']}, p = {t['p_value']:.3g}): "
                                        "the study may not be in a steady state")
            for s in sc.slopes:
                slope_rows.append(dict(s, analyte=aid, animal=a_labels[s["animal"]]))
        n_removed = int(idx.size - keep.sum())
        series_parts.append(pd.DataFrame({
            "analyte": aid, "animal": patient[idx], "specimen": specimen[idx],
            "replicate": replicate[idx], "collected_at": frame["collected_at"].to_numpy()[idx],
            "days": days_all[idx], "value": value[idx], "ln_value": np.log(value[idx]),
            "kept": np.isin(idx, use[keep]),
        }))
        ky = y[keep]
        ka, ks = a_codes[keep], s_codes[keep]
        counts = dict(n_animals=int(np.unique(ka).size), n_specimens=int(np.unique(ks).size),
                      n_results=int(ky.size), n_removed=n_removed)

        # ---- classical
        afit = None
        if run_anova or cv_anova:
            try:
                afit = _anova.nested_anova(ka, ks, ky, ci_prob=ci_prob, label=f"{source}: {aid}")
            except StudyError as exc:
                an_notes.append(f"Classical estimate not possible: {exc}")
                warnings.append(f"{aid}: no classical estimate ({exc})")
        if run_anova:
            comps = _anova_comps(afit) if afit is not None else {}
            note = ""
            if afit is not None and afit.truncated:
                note = "negative moment estimate set to 0: " + ", ".join(afit.truncated)
                warnings.append(f"{aid}: ANOVA {note}")
            table_rows += _method_rows(aid, unit, "anova", comps, pd.NA, note)
            est_rows.append(_estimate_row(aid, unit, "anova", counts, comps))
            if afit is not None:
                used_fits.setdefault(aid, {})["anova"] = dict(comps=comps, counts=counts, fit=afit)
        if cv_anova and afit is not None:
            try:
                z = _anova.cv_anova_transform(ka, np.exp(ky))
                cfit = _anova.nested_anova(ka, ks, z, ci_prob=ci_prob, label=f"{source}: {aid} (CV-ANOVA)")
                # CV-ANOVA: the components are CV^2 directly (Roraas 2016); CVG is not defined
                comps = {c: (math.sqrt(cfit.var[c]), math.sqrt(cfit.lower[c]), math.sqrt(cfit.upper[c]))
                         for c in ("cva", "cvi")}
                table_rows += _method_rows(aid, unit, "cv-anova", comps, pd.NA, "CVG not defined by CV-ANOVA")
                est_rows.append(_estimate_row(aid, unit, "cv-anova", counts, comps))
            except StudyError as exc:
                an_notes.append(f"CV-ANOVA not possible: {exc}")

        # ---- Bayesian
        if run_bayes:
            bdata = pd.DataFrame({"animal": a_labels[ka].astype(str), "specimen": spec_names[ks].astype(str),
                                  "replicate": replicate[use][keep],
                                  "y": ky})
            try:
                bfit = bayes_mod.fit_bayes(bdata, robust=robust, draws=draws, tune=tune, chains=chains,
                                           seed=seed + k)
            except BayesbaseError as exc:
                bfit = None
                an_notes.append(f"Bayesian estimate not possible: {exc}")
                warnings.append(f"{aid}: no Bayesian estimate ({exc})")
            bayes_fits[aid] = bfit
            if bfit is not None:
                bt = _bayes_table(bfit)
                comps = {c: (float(bt.at[c, "estimate"]), float(bt.at[c, "lower"]), float(bt.at[c, "upper"]))
                         for c in COMPONENTS if c in bt.index}
                diag = dict(bfit.diagnostics)
                conv = bool(diag.get("converged", False))
                mlabel = "bayes" if conv else UNCONVERGED
                note = "" if conv else (
                    f"did not converge: max R-hat {diag.get('max_r_hat', math.nan):.3f}, min bulk ESS "
                    f"{diag.get('min_ess_bulk', math.nan):.0f}, min tail ESS {diag.get('min_ess_tail', math.nan):.0f}, "
                    f"{diag.get('divergences', 0)} divergence(s)")
                if not conv:
                    warnings.append(f"{aid}: Bayesian fit {note}; its rows are marked '{UNCONVERGED}' and it is "
                                    "not used for the pack fragment (rerun with more draws/tune or check the data)")
                table_rows += _method_rows(aid, unit, mlabel, comps, conv, note)
                est_rows.append(_estimate_row(aid, unit, mlabel, counts, comps))
                if conv:
                    used_fits.setdefault(aid, {})["bayes"] = dict(comps=comps, counts=counts, fit=bfit)

        # ---- desirable analytical performance (common practice: CVA <= 0.5 CVI)
        fits = used_fits.get(aid, {})
        best = fits.get("bayes") or fits.get("anova")
        if best is not None:
            cva_, cvi_ = best["comps"]["cva"][0], best["comps"]["cvi"][0]
            if np.isfinite(cva_) and np.isfinite(cvi_) and cva_ > DESIRABLE_CVA_FRACTION * cvi_:
                warnings.append(f"{aid}: CVA {100 * cva_:.1f} % exceeds the desirable 0.5 x CVI = "
                                f"{50 * cvi_:.1f} %: analytical imprecision dominates serial comparisons")

    removed = pd.DataFrame(removed_rows, columns=list(REMOVED_COLUMNS))
    table = pd.DataFrame(table_rows, columns=["analyte", "unit", "method", "component", "estimate", "lower", "upper",
                                              "scale", "converged", "note"])
    estimates = pd.DataFrame(est_rows, columns=list(ESTIMATE_COLUMNS))
    estimates["n_for_setpoint"] = estimates["n_for_setpoint"].astype("Int64")
    steps = pd.DataFrame(step_rows, columns=["analyte", "step", "test", "statistic", "p_value", "df", "flagged", "detail"])
    slopes = pd.DataFrame(slope_rows, columns=["analyte", "animal", "n_specimens", "slope_per_day", "pct_per_week",
                                               "p_value", "flagged"])
    series = pd.concat(series_parts, ignore_index=True) if series_parts else pd.DataFrame()
    attrs = dict(
        source_file=source, source_sha256=sha, species=species, method=method, seed=int(seed), alpha=float(alpha),
        ci_prob=float(ci_prob), outlier_removal=bool(outlier_removal), cv_anova=bool(cv_anova),
        robust=bool(robust), draws=int(draws), tune=int(tune), chains=int(chains), version=__version__,
        engine=("nested ANOVA (method of moments) + MLS intervals" if run_anova else "")
        + (" | " if run_anova and run_bayes else "") + ("Bayesian hierarchical model (PyMC)" if run_bayes else ""),
        created=datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
    )
    dataset = _dataset(table, estimates, analyte_ids, attrs)
    return StudyResult(table=table, estimates=estimates, dataset=dataset, removed=removed, steps=steps,
                       slopes=slopes, series=series, notes=notes, warnings=warnings, bayes=bayes_fits,
                       attrs=dict(attrs, fits=used_fits))


def _var_name(method: str) -> str:
    return {"anova": "anova", "bayes": "bayes", UNCONVERGED: "bayes", "cv-anova": "cv_anova"}[method]


def _dataset(table: pd.DataFrame, estimates: pd.DataFrame, analyte_ids: list[str], attrs: dict) -> xr.Dataset:
    coords = {DIM_ANALYTE: list(analyte_ids), DIM_COMPONENT: list(COMPONENTS), DIM_CI: list(CI_BOUNDS)}
    data_vars = {}
    a_index = {a: i for i, a in enumerate(analyte_ids)}
    c_index = {c: i for i, c in enumerate(COMPONENTS)}
    for m in dict.fromkeys(table["method"]):
        name = _var_name(m)
        est = np.full((len(analyte_ids), len(COMPONENTS)), np.nan)
        ci = np.full((len(analyte_ids), len(COMPONENTS), 2), np.nan)
        sub = table[(table["method"] == m) & table["component"].isin(COMPONENTS)]
        for r in sub.itertuples(index=False):
            i, j = a_index[r.analyte], c_index[r.component]
            est[i, j] = r.estimate
            ci[i, j] = (r.lower, r.upper)
        if f"{name}_estimate" in data_vars:  # bayes + unconverged share a variable: merge
            old = data_vars[f"{name}_estimate"][1]
            est = np.where(np.isnan(old), est, old)
            ci = np.where(np.isnan(data_vars[f"{name}_interval"][1]), ci, data_vars[f"{name}_interval"][1])
        data_vars[f"{name}_estimate"] = ((DIM_ANALYTE, DIM_COMPONENT), est,
                                         {"long_name": f"{name} estimate (CV fraction; cvi_spread_log_sd: SD of ln CVI)"})
        data_vars[f"{name}_interval"] = ((DIM_ANALYTE, DIM_COMPONENT, DIM_CI), ci,
                                         {"long_name": f"{name} {100 * attrs['ci_prob']:.0f} % interval"})
        sub = estimates[estimates["method"] == m]
        for col in ("ii", "rcv_pct"):
            arr = np.full(len(analyte_ids), np.nan)
            for r in sub.itertuples(index=False):
                arr[a_index[r.analyte]] = getattr(r, col)
            data_vars[f"{name}_{col}"] = ((DIM_ANALYTE,), arr)
        if name == "bayes":
            conv = np.zeros(len(analyte_ids), dtype=np.int8)
            for r in sub.itertuples(index=False):
                conv[a_index[r.analyte]] = r.method == "bayes"
            data_vars["bayes_converged"] = ((DIM_ANALYTE,), conv)
    for col in ("n_animals", "n_specimens", "n_results", "n_removed"):
        arr = np.zeros(len(analyte_ids), dtype=np.int64)
        for r in estimates.drop_duplicates("analyte").itertuples(index=False):
            arr[a_index[r.analyte]] = getattr(r, col)
        data_vars[col] = ((DIM_ANALYTE,), arr)
    ds_attrs = {k: (str(v) if isinstance(v, bool) else v) for k, v in attrs.items()}
    ds_attrs["ci_prob"] = attrs["ci_prob"]
    return xr.Dataset(data_vars, coords=coords, attrs=ds_attrs)


def analyte_title(aid: str) -> str:
    """Display label of an analyte id (falls back to the id)."""
    try:
        return analyte_label(aid)
    except Exception:
        return aid
