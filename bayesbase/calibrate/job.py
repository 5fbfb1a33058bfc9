""":func:`calibrate`: usable results -> hierarchical fit -> summary table, dataset, stamps.

Summaries are posterior medians with 95 % equal-tailed credible intervals, CVs as fractions:
``center`` (exp mu: the centre of the breed-centre distribution, on the reference method; close
to the geometric mean of the breed centres when there are many breeds), ``cvg`` (between animals
within a breed), ``cvi`` (the median animal's CVI), ``cvi_log_sd`` (SD of ln CVI across animals),
``cva``, ``breed_center`` (exp(mu + breed offset), per breed) and ``method_bias`` (fraction, per
method: a result of that method reads (1 + bias) times the reference method's; the reference
method's row is 0). ``cvi_predictive_log_sd`` (in ``attrs``, per analyte) is the SD of ln CVI of a
new animal over the posterior, sqrt(E[cvi_log_sd^2] + Var[ln CVI median]): the number a pack's
``cvi_log_sd`` stands for. ``age_slope`` (analytes with the optional age term only): the fraction
by which the set point changes per year of age, exp(age_log_slope) - 1, group ``per year from
age R y`` (R: the analyte's reference age, the median age of its specimens; prior value 0); not
a pack key (the pack schema has none), so it stays in calibration.csv, the page and idata.
"""
from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import __version__
from ..constants import CI_BOUNDS, DIM_ANALYTE, DIM_CI
from .core import (UNKNOWN_BREED, CalibrationData, Selection, age_analytes, load_input, prepare, reference_methods,
                   select_specimens)

__all__ = ["TABLE_COLUMNS", "PARAMETERS", "FIT_FORMS", "Calibration", "calibrate", "summary_table", "to_dataset"]

TABLE_COLUMNS = ("analyte", "parameter", "group", "prior_value", "estimate", "lower", "upper", "n_animals",
                 "n_specimens")
PARAMETERS = ("center", "cvg", "cvi", "cvi_log_sd", "breed_center", "method_bias", "cva", "age_slope")
CI_PROB = 0.95
#: How the model is fitted: per analyte where it applies (auto), or every analyte in one graph.
FIT_FORMS = ("auto", "joint")


@dataclass
class Calibration:
    """Result of :func:`calibrate`: ``table`` (one row per parameter, :data:`TABLE_COLUMNS`),
    ``dataset`` (xarray; dims analyte, breed, method_name, ci_bound), ``idata`` (ArviZ, settings
    stamped), ``diagnostics``, ``selection`` (every input row with its role and reason), ``attrs``
    (pack id and sha256, engine, seed, source kind/label/sha256, counts, date, priors)."""

    table: pd.DataFrame
    dataset: object
    idata: object
    diagnostics: dict
    selection: Selection
    data: CalibrationData
    attrs: dict = field(default_factory=dict)
    heldout: object = None  # :class:`bayesbase.calibrate.heldout.HeldOut` when asked for (heldout_folds)

    @property
    def converged(self) -> bool:
        return bool(self.diagnostics.get("converged", False))


def _draws(post, name) -> np.ndarray:
    """(S, ...) draws of a posterior variable, chains stacked."""
    v = post[name].values
    return v.reshape((-1,) + v.shape[2:])


def _q(x) -> tuple[float, float, float]:
    lo, med, hi = np.quantile(x, [0.5 * (1 - CI_PROB), 0.5, 0.5 * (1 + CI_PROB)])
    return float(med), float(lo), float(hi)


def _row(a, param, group, prior, est, n):
    return dict(zip(TABLE_COLUMNS, (a, param, group, float(prior), *est, int(n[0]), int(n[1]))))


def _analyte_rows(post, data: CalibrationData, pack, i: int, a: str) -> list[dict]:
    p = pack.analytes[a]
    n = data.counts[(a, "analyte", "")]
    rows = [_row(a, "center", "", p.center, _q(_draws(post, "center")[:, i]), n),
            _row(a, "cvg", "", p.cvg, _q(_draws(post, "cvg")[:, i]), n),
            _row(a, "cvi", "", p.cvi, _q(_draws(post, "cvi")[:, i]), n),
            _row(a, "cvi_log_sd", "", p.cvi_log_sd, _q(_draws(post, "cvi_log_sd")[:, i]), n)]
    if data.df_within[i] > 0:
        rows.append(_row(a, "cva", "", p.cva, _q(_draws(post, "cva")[:, i]), n))
    else:
        rows.append(_row(a, "cva", "fixed (no replicates)", p.cva, (p.cva, np.nan, np.nan), n))
    bc = _draws(post, "breed_center_all")
    for j, (ba, b) in enumerate(data.breed_pairs):
        if ba == a:
            prior = p.center_for(None if b == UNKNOWN_BREED else b)
            rows.append(_row(a, "breed_center", b, prior, _q(bc[:, j]), data.counts[(a, "breed", b)]))
    rows.append(_row(a, "method_bias", data.reference[a], 0.0, (0.0, 0.0, 0.0),
                     data.counts[(a, "method", data.reference[a])]))
    for k, (ma, m) in enumerate(data.bias_pairs):
        if ma == a:
            rows.append(_row(a, "method_bias", m, 0.0, _q(_draws(post, "method_bias")[:, k]),
                             data.counts[(a, "method", m)]))
    if a in getattr(data, "age_analytes", []):
        k = data.age_analytes.index(a)
        rows.append(_row(a, "age_slope", f"per year from age {data.age_ref[a]:.2f} y", 0.0,
                         _q(_draws(post, "age_slope")[:, k]), (data.age_counts[a][0], data.age_counts[a][2])))
    return rows


def summary_table(idata, data: CalibrationData, pack) -> pd.DataFrame:
    """The tidy table of the module docstring."""
    post = idata.posterior
    rows = [r for i, a in enumerate(data.analytes) for r in _analyte_rows(post, data, pack, i, a)]
    return pd.DataFrame(rows, columns=list(TABLE_COLUMNS))


def predictive_log_sd(idata) -> np.ndarray:
    """Per analyte: sqrt(E[cvi_log_sd^2] + Var[ln CVI median]) over the posterior."""
    post = idata.posterior
    s = _draws(post, "cvi_log_sd")
    m = _draws(post, "ln_cvi_median")
    return np.sqrt(np.mean(s**2, axis=0) + np.var(m, axis=0))


def _grid(table: pd.DataFrame, param: str, analytes, groups):
    t = table[table["parameter"] == param].set_index(["analyte", "group"])
    est = np.full((len(analytes), len(groups)), np.nan)
    ci = np.full((len(analytes), len(groups), 2), np.nan)
    for (a, g), r in t.iterrows():
        i, j = analytes.index(a), groups.index(g)
        est[i, j], ci[i, j] = r["estimate"], (r["lower"], r["upper"])
    return est, ci


def to_dataset(table: pd.DataFrame, attrs: dict):
    """xarray Dataset of the table: per-analyte parameters on ``analyte`` (+ ``ci_bound``),
    breed centres on (analyte, breed), method biases on (analyte, method_name; not ``method``, which
    xarray's ``sel`` takes as a keyword); NaN where absent."""
    import xarray as xr

    analytes = list(dict.fromkeys(table["analyte"]))
    breeds = sorted(set(table.loc[table["parameter"] == "breed_center", "group"]))
    methods = sorted(set(table.loc[table["parameter"] == "method_bias", "group"]))
    data_vars = {}
    for param in ("center", "cvg", "cvi", "cvi_log_sd", "cva"):
        t = table[table["parameter"] == param].set_index("analyte").reindex(analytes)
        data_vars[param] = ((DIM_ANALYTE,), t["estimate"].to_numpy(float))
        data_vars[f"{param}_ci"] = ((DIM_ANALYTE, DIM_CI), t[["lower", "upper"]].to_numpy(float))
        data_vars[f"{param}_prior"] = ((DIM_ANALYTE,), t["prior_value"].to_numpy(float))
    for param, dim, groups in (("breed_center", "breed", breeds), ("method_bias", "method_name", methods)):
        est, ci = _grid(table, param, analytes, groups)
        data_vars[param] = ((DIM_ANALYTE, dim), est)
        data_vars[f"{param}_ci"] = ((DIM_ANALYTE, dim, DIM_CI), ci)
    ds = xr.Dataset(data_vars, coords={DIM_ANALYTE: analytes, "breed": breeds, "method_name": methods,
                                       DIM_CI: list(CI_BOUNDS)})
    ds.attrs.update({k: v if isinstance(v, (int, float, str)) and not isinstance(v, bool) else str(v)
                     for k, v in attrs.items()})
    return ds


def _pack_ref(pack_arg, pk) -> str:
    """How the fragment's ``extends`` names the prior pack: a built-in name, or an absolute path."""
    from pathlib import Path

    from ..priors.layers import available_packs

    if isinstance(pack_arg, (str, Path)) and str(pack_arg) not in available_packs():
        return str(Path(pack_arg).resolve())
    if pack_arg is None or isinstance(pack_arg, (str, Path)):
        return str(pack_arg or pk.species)
    return pk.id if pk.id in available_packs() else pk.species


def _attrs(pack, source, data, settings, diag, analytes, pri_text, pred_sd) -> dict:
    return dict(
        pack_id=pack.id, pack_sha256=pack.sha256, species=pack.species, engine="mcmc-calibrate",
        seed=int(settings["seed"]), sampler=settings["sampler"], draws=settings["draws"],
        tune=settings["tune"], chains=settings["chains"], target_accept=float(settings["target_accept"]),
        seconds=round(settings.get("seconds", float("nan")), 2),
        fit_form=settings.get("fit_form", "joint"),
        source_kind=source.kind, source_label=source.label, source_sha256=source.sha256,
        n_animals=len(set(data.cell_animal)), n_results=int(data.n_obs), n_cells=len(data.cell_animal),
        analytes=list(analytes), reference_methods=dict(data.reference), converged=bool(diag["converged"]),
        date=_dt.date.today().isoformat(), bayesbase_version=__version__, ci_prob=CI_PROB,
        priors=pri_text, cvi_predictive_log_sd={a: float(x) for a, x in zip(analytes, pred_sd)})


def calibrate(results_or_store, *, species: str = "dog", analytes=None, pack=None,
              reference_method: str | None = None, sampler: str = "pymc", draws: int = 1000,
              tune: int = 1000, chains: int = 4, seed: int = 0, cores: int | None = None,
              target_accept: float = 0.9, keep_compromised: bool = False, now=None,
              heldout_folds: int = 0, age_term: bool = False, fit_form: str = "auto",
              locations: str = "auto") -> Calibration:
    """Fit the hierarchical calibration model (:mod:`bayesbase.calibrate.model`) to every usable
    result of ``species`` in a store (a ``Store`` or its file), a results file or a frame.

    ``pack``: the pack whose values are the priors (name, path or Pack; default the species'
    own). ``analytes``: ids to calibrate (default every analyte of the input the pack carries).
    ``reference_method``: the method whose bias is fixed at 0 (default: each analyte's most
    frequent). ``heldout_folds`` >= 2 adds the k-fold held-out proof of
    :mod:`bayesbase.calibrate.heldout` (same settings; ``Calibration.heldout``). ``age_term``:
    the model's optional age term for the analytes the pack marks ``age_dependent`` whose
    specimens carry birth dates (:mod:`bayesbase.calibrate.core`; default False: none, because
    the packs' age marks describe young animals, not a steady trend over adult life; ask for it
    when the store spans ages and such a trend is plausible). ``fit_form``: ``auto`` (default)
    fits one analyte at a time where that applies (:mod:`bayesbase.calibrate.split`: the same
    posterior, exactly), ``joint`` every analyte in one graph. ``locations``: the location
    parameters sampled or integrated out exactly (:data:`bayesbase.calibrate.model.LOCATIONS`;
    same posterior; default ``auto``: integrated out wherever that is exact). Returns a
    :class:`Calibration`; never raises on poor convergence (it says so in ``diagnostics`` and
    ``converged``)."""
    from ..priors import Pack, load_pack
    from . import model as _model

    frame, source = load_input(results_or_store, now=now)
    pk = pack if isinstance(pack, Pack) else load_pack(pack if pack is not None else species)
    if pk.species != species:
        from ..errors import BayesbaseError

        raise BayesbaseError(f"pack '{pk.id}' is for {pk.species}, not {species}")
    sel = select_specimens(frame, species, pk, analytes, keep_compromised=keep_compromised)
    data = prepare(sel.usable, reference_methods(sel.usable, reference_method),
                   age_analytes(pk, sel.analytes) if age_term else ())
    pri = _model.prior_values(pk, data.analytes)
    if fit_form not in FIT_FORMS:
        raise ValueError(f"fit_form must be one of {FIT_FORMS}, got {fit_form!r}")
    from .split import fit_split

    fitter = fit_split if fit_form == "auto" else _model.fit
    idata, diag, settings = fitter(data, pri, draws=draws, tune=tune, chains=chains, seed=seed, sampler=sampler,
                                   cores=cores, target_accept=target_accept, locations=locations)
    table = summary_table(idata, data, pk)
    attrs = _attrs(pk, source, data, settings, diag, data.analytes, _model.prior_text(pk, data.analytes),
                   predictive_log_sd(idata))
    attrs["pack_ref"] = _pack_ref(pack, pk)
    attrs.update(age_term=bool(age_term), age_reference_years={a: round(r, 4) for a, r in data.age_ref.items()},
                 age_animals_without_birth_date={a: data.age_counts[a][1] for a in data.age_analytes},
                 age_notes=dict(data.age_notes))
    attrs["n_specimens"] = int(len(sel.usable[["patient", "specimen"]].drop_duplicates()))
    idata.posterior.attrs.update({k: str(v) if not isinstance(v, (int, float, str)) or isinstance(v, bool) else v
                                  for k, v in attrs.items()})
    held = None
    if heldout_folds:
        from .heldout import heldout_proof

        held = heldout_proof(frame, species=species, analytes=data.analytes, pack=pack, folds=heldout_folds, seed=seed,
                             reference_method=reference_method, sampler=sampler, draws=draws, tune=tune, chains=chains,
                             cores=cores, target_accept=target_accept, keep_compromised=keep_compromised, now=now,
                             locations=locations)
    return Calibration(table=table, dataset=to_dataset(table, attrs), idata=idata, diagnostics=diag,
                       selection=sel, data=data, attrs=attrs, heldout=held)
