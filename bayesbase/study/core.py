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
from ..io import read_results_hashed
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
    """(canonical frame, source name, sha256). A path is read with :func:`~bayesbase.io.read_results_hashed`
    (hashed by its bytes); a frame is validated when it is not canonical yet and hashed by its CSV text."""
    if isinstance(data, (str, Path)):
        path = Path(data)
        if not path.is_file():
            raise StudyError(f"{data}: study file not found")
        frame, sha = read_results_hashed(path)
        return frame, path.name, sha
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


# --------------------------------------------------------------------------- stages

@dataclass
class _Study:
    """The chosen results of a study (stage 2), as arrays aligned with ``frame``'s rows."""

    frame: pd.DataFrame
    source: str
    sha: str
    species: str
    analytes: list[str]
    days: np.ndarray
    censor: np.ndarray
    state: np.ndarray
    patient: np.ndarray
    specimen: np.ndarray
    value: np.ndarray
    analyte: np.ndarray
    replicate: np.ndarray
    src_row: np.ndarray


@dataclass
class _Analyte:
    """One analyte's results after the input exclusions: ``idx`` its rows of the study, ``use`` the
    rows kept as input, ``y`` their natural logs, animal and specimen codes (per ``use``) and
    ``keep`` (per ``use``) what survived the outlier steps."""

    aid: str
    unit: str
    idx: np.ndarray
    use: np.ndarray
    y: np.ndarray
    a_codes: np.ndarray
    s_codes: np.ndarray
    a_labels: np.ndarray
    spec_names: np.ndarray
    keep: np.ndarray

    @property
    def counts(self) -> dict:
        ka, ks = self.a_codes[self.keep], self.s_codes[self.keep]
        return dict(n_animals=int(np.unique(ka).size), n_specimens=int(np.unique(ks).size),
                    n_results=int(self.keep.sum()), n_removed=int(self.idx.size - self.keep.sum()))


@dataclass
class _Collect:
    """Everything the per-analyte stages add, in the order they add it."""

    table_rows: list[dict] = field(default_factory=list)
    est_rows: list[dict] = field(default_factory=list)
    removed_rows: list[dict] = field(default_factory=list)
    step_rows: list[dict] = field(default_factory=list)
    slope_rows: list[dict] = field(default_factory=list)
    series_parts: list[pd.DataFrame] = field(default_factory=list)
    notes: dict[str, list[str]] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    bayes_fits: dict[str, object] = field(default_factory=dict)
    used_fits: dict[str, dict] = field(default_factory=dict)


def _check_options(method: str, alpha: float, ci_prob: float) -> None:
    """Stage 1: the options, before any file is read."""
    if method not in METHODS:
        raise StudyError(f"method must be one of {', '.join(METHODS)}, got '{method}'")
    if not 0 < alpha < 1 or not 0 < ci_prob < 1:
        raise StudyError("alpha and ci_prob must lie between 0 and 1")


def _read(data, species, analytes) -> _Study:
    """Stage 2: read (path or frame, with its source name and SHA-256), choose species and analytes."""
    frame, source, sha = _load(data)
    frame, species, analyte_ids = _select(frame, source, species, analytes)
    frame = frame.reset_index(drop=True)
    days = (frame["collected_at"] - frame["collected_at"].min()).dt.total_seconds().to_numpy() / 86400.0
    text = {c: frame[c].astype(str).to_numpy(dtype=object) for c in ("censor", "state", "patient", "specimen",
                                                                       "analyte")}
    src_row = frame["source_row"].to_numpy() if "source_row" in frame.columns else np.full(len(frame), -1)
    return _Study(frame=frame, source=source, sha=sha, species=species, analytes=analyte_ids, days=days,
                  value=frame["value"].to_numpy(float), replicate=frame["replicate"].to_numpy(dtype=np.int64),
                  src_row=src_row, **text)


def _exclude_inputs(st: _Study, aid: str, out: _Collect) -> _Analyte:
    """Stage 3a: leave out censored values and specimens taken while unwell (each listed as removed
    at step 0); code the rest by animal and specimen. ``keep`` starts all True."""
    idx = np.flatnonzero(st.analyte == aid)
    reason = np.where(st.censor[idx] != "", "censored value (" + st.censor[idx] + ")", "")
    reason = np.where((reason == "") & (st.state[idx] == "unwell"), "specimen taken while unwell", reason)
    for j in np.flatnonzero(reason != ""):
        r = idx[j]
        out.removed_rows.append(dict(analyte=aid, step=0, test="input", level="result", animal=st.patient[r],
                                     specimen=st.specimen[r], n_results=1, statistic=math.nan,
                                     critical_value=math.nan, alpha=math.nan, action="removed",
                                     reason=f"{reason[j]}; source row {st.src_row[r]}"))
    use = idx[reason == ""]
    a_codes, a_labels = pd.factorize(st.patient[use], sort=False)
    sp_codes, sp_labels = pd.factorize(st.specimen[use], sort=False)
    _, s_first, s_codes = np.unique(a_codes.astype(np.int64) * (len(sp_labels) + 1) + sp_codes,
                                    return_index=True, return_inverse=True)
    return _Analyte(aid=aid, unit=str(st.frame["unit"].iat[idx[0]]), idx=idx, use=use, y=np.log(st.value[use]),
                    a_codes=a_codes, s_codes=s_codes.ravel(), a_labels=np.asarray(a_labels, dtype=object),
                    spec_names=np.asarray(sp_labels, dtype=object)[sp_codes[s_first]],
                    keep=np.ones(use.size, bool))


def _screen_warnings(aid: str, sc, a_labels) -> list[str]:
    """What the reader must not miss from the outlier screen: Reed's criterion on an animal,
    heterogeneous within-animal variances, a common drift."""
    warnings = [f"{aid}: Reed's criterion {rec['action']} animal {a_labels[rec['animal']]} "
                f"({rec['reason'].split('; ', 1)[-1]}; --no-outlier-removal keeps it)"
                for rec in sc.records if rec["step"] == 3]
    for t in sc.tests:
        if t["flagged"] and t["step"] == 4:
            warnings.append(f"{aid}: {t['test']} p = {t['p_value']:.3g}: within-animal variances "
                            "differ between animals; the classical CVI is an average and its interval, "
                            "which ignores the differences, is too narrow (the Bayesian model "
                            "estimates the spread)")
        elif t["flagged"] and t["step"] == 6 and "mean slope" in t["test"]:
            warnings.append(f"{aid}: the animals drift together ({t['detail']}, p = {t['p_value']:.3g}): "
                            "the study may not be in a steady state")
    return warnings


def _screen_analyte(an: _Analyte, days: np.ndarray, alpha: float, remove: bool, out: _Collect) -> None:
    """Stage 3b: the outlier, homogeneity, normality and steady-state steps of :func:`.outliers.screen`
    on one analyte; sets ``an.keep`` and lists every record, test and slope."""
    if not an.use.size:
        return
    sc = screen(an.a_codes, an.s_codes, an.y, days[an.use], alpha=alpha, remove=remove)
    an.keep = sc.keep
    out.notes[an.aid].extend(sc.notes)
    for rec in sc.records:
        out.removed_rows.append(dict(rec, analyte=an.aid, animal=an.a_labels[rec["animal"]],
                                     specimen=an.spec_names[rec["specimen"]] if rec["specimen"] >= 0 else ""))
    out.step_rows += [dict(t, analyte=an.aid) for t in sc.tests]
    out.warnings += _screen_warnings(an.aid, sc, an.a_labels)
    out.slope_rows += [dict(s, analyte=an.aid, animal=an.a_labels[s["animal"]]) for s in sc.slopes]


def _series_part(st: _Study, an: _Analyte) -> pd.DataFrame:
    """The analyte's results for plots: every row with ``days``, ``ln_value`` and ``kept``."""
    idx = an.idx
    return pd.DataFrame({
        "analyte": an.aid, "animal": st.patient[idx], "specimen": st.specimen[idx],
        "replicate": st.replicate[idx], "collected_at": st.frame["collected_at"].to_numpy()[idx],
        "days": st.days[idx], "value": st.value[idx], "ln_value": np.log(st.value[idx]),
        "kept": np.isin(idx, an.use[an.keep]),
    })


def _add_rows(out: _Collect, an: _Analyte, method: str, comps: dict, converged, note: str) -> None:
    out.table_rows += _method_rows(an.aid, an.unit, method, comps, converged, note)
    out.est_rows.append(_estimate_row(an.aid, an.unit, method, an.counts, comps))


def _classical(an: _Analyte, label: str, ci_prob: float, run_anova: bool, cv_anova: bool, out: _Collect) -> None:
    """Stage 4: nested ANOVA (rows when ``run_anova``) and CV-ANOVA (when ``cv_anova``) on the
    results kept; a design that cannot be estimated is a note and a warning, not an error."""
    aid, k = an.aid, an.keep
    ka, ks, ky = an.a_codes[k], an.s_codes[k], an.y[k]
    afit = None
    try:
        afit = _anova.nested_anova(ka, ks, ky, ci_prob=ci_prob, label=f"{label}: {aid}")
    except StudyError as exc:
        out.notes[aid].append(f"Classical estimate not possible: {exc}")
        out.warnings.append(f"{aid}: no classical estimate ({exc})")
    if run_anova:
        comps = _anova_comps(afit) if afit is not None else {}
        note = ""
        if afit is not None and afit.truncated:
            note = "negative moment estimate set to 0: " + ", ".join(afit.truncated)
            out.warnings.append(f"{aid}: ANOVA {note}")
        _add_rows(out, an, "anova", comps, pd.NA, note)
        if afit is not None:
            out.used_fits.setdefault(aid, {})["anova"] = dict(comps=comps, counts=an.counts, fit=afit)
    if cv_anova and afit is not None:
        try:
            z = _anova.cv_anova_transform(ka, np.exp(ky))
            cfit = _anova.nested_anova(ka, ks, z, ci_prob=ci_prob, label=f"{label}: {aid} (CV-ANOVA)")
            # CV-ANOVA: the components are CV^2 directly (Roraas 2016); CVG is not defined
            comps = {c: (math.sqrt(cfit.var[c]), math.sqrt(cfit.lower[c]), math.sqrt(cfit.upper[c]))
                     for c in ("cva", "cvi")}
            _add_rows(out, an, "cv-anova", comps, pd.NA, "CVG not defined by CV-ANOVA")
        except StudyError as exc:
            out.notes[aid].append(f"CV-ANOVA not possible: {exc}")


def _convergence_note(diag: dict) -> str:
    return (f"did not converge: max R-hat {diag.get('max_r_hat', math.nan):.3f}, min bulk ESS "
            f"{diag.get('min_ess_bulk', math.nan):.0f}, min tail ESS {diag.get('min_ess_tail', math.nan):.0f}, "
            f"{diag.get('divergences', 0)} divergence(s)")


def _bayes_data(an: _Analyte, replicate: np.ndarray) -> pd.DataFrame:
    """The results kept of one analyte as the Bayesian model takes them (log values)."""
    k = an.keep
    return pd.DataFrame({"animal": an.a_labels[an.a_codes[k]].astype(str),
                         "specimen": an.spec_names[an.s_codes[k]].astype(str),
                         "replicate": replicate[an.use][k], "y": an.y[k]})


def _bayesian(an: _Analyte, replicate: np.ndarray, bayes_mod, seed: int, fit_kw: dict, out: _Collect) -> None:
    """Stage 5 for one analyte (its own model, ``fit_bayes``). Never silent: a fit that fails is a note
    and a warning; a fit that does not converge gets rows marked ``UNCONVERGED`` (``converged`` False),
    a warning, and is not used for the pack fragment."""
    try:
        bfit = bayes_mod.fit_bayes(_bayes_data(an, replicate), seed=seed, **fit_kw)
    except BayesbaseError as exc:
        bfit = exc
    _bayes_record(an, bfit, out)


def _bayesian_batch(ans: dict, replicate: np.ndarray, bayes_mod, seed: int, fit_kw: dict, sampler: str,
                    out: _Collect) -> None:
    """Stage 5 for every analyte at once: ONE compiled model with the analyte as a dim, sampled once
    (``bayes.fit_many``; each analyte keeps its own posterior and its own convergence checks, the joint
    run's divergences charged to every analyte). ``ans``: analyte -> (position k, _Analyte). A bayes
    module without ``fit_many`` is run one analyte at a time with seed ``seed + k``."""
    fit_many = getattr(bayes_mod, "fit_many", None)
    if fit_many is None:
        for aid, (k, an) in ans.items():
            _bayesian(an, replicate, bayes_mod, seed + k, fit_kw, out)
        return
    try:
        fits = fit_many({aid: _bayes_data(an, replicate) for aid, (_, an) in ans.items()}, seed=seed,
                        sampler=sampler, **fit_kw)
    except BayesbaseError as exc:
        fits = {aid: exc for aid in ans}
    for aid, (_, an) in ans.items():
        _bayes_record(an, fits[aid], out)


def _bayes_record(an: _Analyte, bfit, out: _Collect) -> None:
    """Rows, notes and warnings of one analyte's Bayesian fit (``bfit`` a fit or the error that
    prevented it)."""
    aid = an.aid
    if isinstance(bfit, Exception):
        out.notes[aid].append(f"Bayesian estimate not possible: {bfit}")
        out.warnings.append(f"{aid}: no Bayesian estimate ({bfit})")
        bfit = None
    out.bayes_fits[aid] = bfit
    if bfit is None:
        return
    bt = _bayes_table(bfit)
    comps = {c: (float(bt.at[c, "estimate"]), float(bt.at[c, "lower"]), float(bt.at[c, "upper"]))
             for c in COMPONENTS if c in bt.index}
    conv = bool(dict(bfit.diagnostics).get("converged", False))
    note = "" if conv else _convergence_note(dict(bfit.diagnostics))
    if not conv:
        out.warnings.append(f"{aid}: Bayesian fit {note}; its rows are marked '{UNCONVERGED}' and it is "
                            "not used for the pack fragment (rerun with more draws/tune or check the data)")
    _add_rows(out, an, "bayes" if conv else UNCONVERGED, comps, conv, note)
    if conv:
        out.used_fits.setdefault(aid, {})["bayes"] = dict(comps=comps, counts=an.counts, fit=bfit)


def _desirable_warning(aid: str, fits: dict) -> str | None:
    """Stage 5b: desirable analytical performance, CVA <= 0.5 CVI (common practice), checked on the
    Bayesian fit when it converged, else the ANOVA."""
    best = fits.get("bayes") or fits.get("anova")
    if best is None:
        return None
    cva_, cvi_ = best["comps"]["cva"][0], best["comps"]["cvi"][0]
    if np.isfinite(cva_) and np.isfinite(cvi_) and cva_ > DESIRABLE_CVA_FRACTION * cvi_:
        return (f"{aid}: CVA {100 * cva_:.1f} % exceeds the desirable 0.5 x CVI = "
                f"{50 * cvi_:.1f} %: analytical imprecision dominates serial comparisons")
    return None


def _tables(out: _Collect) -> dict[str, pd.DataFrame]:
    """Stage 6: the tidy frames of :class:`StudyResult` from the collected rows."""
    estimates = pd.DataFrame(out.est_rows, columns=list(ESTIMATE_COLUMNS))
    estimates["n_for_setpoint"] = estimates["n_for_setpoint"].astype("Int64")
    return dict(
        table=pd.DataFrame(out.table_rows, columns=["analyte", "unit", "method", "component", "estimate",
                                                     "lower", "upper", "scale", "converged", "note"]),
        estimates=estimates,
        removed=pd.DataFrame(out.removed_rows, columns=list(REMOVED_COLUMNS)),
        steps=pd.DataFrame(out.step_rows, columns=["analyte", "step", "test", "statistic", "p_value", "df",
                                                   "flagged", "detail"]),
        slopes=pd.DataFrame(out.slope_rows, columns=["analyte", "animal", "n_specimens", "slope_per_day",
                                                     "pct_per_week", "p_value", "flagged"]),
        series=pd.concat(out.series_parts, ignore_index=True) if out.series_parts else pd.DataFrame(),
    )


def _attrs(st: _Study, method: str, seed, alpha, ci_prob, outlier_removal, cv_anova, robust, draws, tune,
           chains) -> dict:
    """Stage 7: provenance of the result (source and its SHA-256, options, engine, version, time)."""
    run_anova, run_bayes = method in ("anova", "both"), method in ("bayes", "both")
    return dict(
        source_file=st.source, source_sha256=st.sha, species=st.species, method=method, seed=int(seed),
        alpha=float(alpha), ci_prob=float(ci_prob), outlier_removal=bool(outlier_removal), cv_anova=bool(cv_anova),
        robust=bool(robust), draws=int(draws), tune=int(tune), chains=int(chains), version=__version__,
        engine=("nested ANOVA (method of moments) + MLS intervals" if run_anova else "")
        + (" | " if run_anova and run_bayes else "") + ("Bayesian hierarchical model (PyMC)" if run_bayes else ""),
        created=datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
    )


# --------------------------------------------------------------------------- main

def estimate(data, *, analytes=None, species=None, method: str = "anova", seed: int = 0,
             outlier_removal: bool = True, alpha: float = DEFAULT_ALPHA, ci_prob: float = DEFAULT_CI_PROB,
             cv_anova: bool = False, robust: bool = False, draws: int = 1000, tune: int = 1000,
             chains: int = 4, sampler: str = "auto") -> StudyResult:
    """Estimate CVA, CVI and CVG of every (or each chosen) analyte of a study.

    ``data``: a results file path (read with :func:`bayesbase.io.read_results`; its SHA-256
    goes into the provenance) or a results DataFrame. ``method``: ``"anova"``, ``"bayes"`` or
    ``"both"``; ``cv_anova`` adds CV-ANOVA rows. ``outlier_removal=False`` keeps every result
    (outliers are still tested and listed as kept). The Bayesian fits of all analytes run as ONE
    compiled model with the analyte as a dim, sampled once with seed ``seed``
    (:func:`bayesbase.study.bayes.fit_many`; ``sampler`` ``"auto"`` uses nutpie when installed, else
    PyMC). Raises :class:`StudyError` for an unusable file or design.
    """
    _check_options(method, alpha, ci_prob)
    st = _read(data, species, analytes)
    run_anova, run_bayes = method in ("anova", "both"), method in ("bayes", "both")
    bayes_mod = _bayes_module() if run_bayes else None
    out = _Collect()
    pending = {}
    for k, aid in enumerate(st.analytes):
        out.notes[aid] = []
        an = _exclude_inputs(st, aid, out)
        _screen_analyte(an, st.days, alpha, outlier_removal, out)
        out.series_parts.append(_series_part(st, an))
        if run_anova or cv_anova:
            _classical(an, st.source, ci_prob, run_anova, cv_anova, out)
        pending[aid] = (k, an)
        if not run_bayes:
            _add_desirable(aid, out)
    if run_bayes:
        _bayesian_batch(pending, st.replicate, bayes_mod, seed,
                        dict(robust=robust, draws=draws, tune=tune, chains=chains), sampler, out)
        for aid in st.analytes:
            _add_desirable(aid, out)
    frames = _tables(out)
    if run_bayes:  # rows grouped by analyte, in the order of the study (the fits ran after the loop)
        for key in ("table", "estimates"):
            order = frames[key]["analyte"].map({a: i for i, a in enumerate(st.analytes)})
            frames[key] = frames[key].iloc[np.argsort(order.to_numpy(), kind="stable")].reset_index(drop=True)
    attrs = _attrs(st, method, seed, alpha, ci_prob, outlier_removal, cv_anova, robust, draws, tune, chains)
    if run_bayes:
        resolve = getattr(bayes_mod, "resolve_sampler", None)
        attrs["sampler"] = resolve(sampler) if resolve else sampler
    dataset = _dataset(frames["table"], frames["estimates"], st.analytes, attrs)
    return StudyResult(dataset=dataset, notes=out.notes, warnings=out.warnings, bayes=out.bayes_fits,
                       attrs=dict(attrs, fits=out.used_fits), **frames)


def _add_desirable(aid: str, out: _Collect) -> None:
    warning = _desirable_warning(aid, out.used_fits.get(aid, {}))
    if warning:
        out.warnings.append(warning)


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
