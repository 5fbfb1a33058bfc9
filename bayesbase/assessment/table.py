"""Stage 10: assembly of the results table (one row per case) and its provenance attributes."""
from __future__ import annotations

import numpy as np
import pandas as pd

from .. import __version__
from .cases import CaseBatch, object_texts, per_object, series_text, text_column
from .engine_step import EngineResult
from .options import Options
from .roles import Targets

__all__ = ["analyte_label", "frame_of_columns", "results_table", "provenance"]


def analyte_label(aid: str) -> str:
    """Display name of an analyte; its id when the registry has no entry."""
    try:
        from ..units import label
        return label(aid)
    except Exception:  # registry missing an entry: fall back to the id
        return aid


def assessed_values(b: CaseBatch) -> np.ndarray:
    """Assessed value per case: the reported value, or the geometric mean of replicates."""
    first = b.assessed.first
    single = (first["value"].to_numpy(dtype=float) if "value" in first.columns
              else np.array(b.assessed.col("value"), dtype=float))
    return np.where(b.assessed.n_rep > 1, np.exp(b.assessed.log_mean), single)


def _per_patient(b: CaseBatch, targets: Targets):
    """(assessed specimen, its collection time) of every case, looked up once per patient."""
    codes, pids = pd.factorize(np.asarray(b.patient, dtype=object))
    spec = [targets.specimen[p] for p in pids]
    when = targets.collected_at.reindex(pd.Index(pids, dtype=object))
    return text_column(codes, spec), when.iloc[codes].reset_index(drop=True)


def _identity(b: CaseBatch, targets: Targets, values: np.ndarray) -> dict:
    specimen, collected_at = _per_patient(b, targets)
    codes, analytes = pd.factorize(np.asarray(b.analyte, dtype=object))
    first = b.assessed.first

    def text(name, fallback, **how):
        got = series_text(first[name], **how) if name in first.columns else None
        return fallback() if got is None else got

    return {
        "patient": text("patient", lambda: b.patient), "species": text("species", lambda: b.species),
        "breed": text("breed", lambda: b.breed, blank_missing=True), "analyte": text("analyte", lambda: b.analyte),
        "label": text_column(codes, [analyte_label(a) for a in analytes]),
        "unit": b.prior_text(lambda p: p.unit),
        "specimen": specimen, "collected_at": collected_at,
        "value": values, "reported_value": text("reported_value", lambda: b.assessed.col("reported_value")),
        "reported_unit": text("reported_unit", lambda: b.assessed.col("reported_unit")), "censor": text("censor", lambda: b.censor, fill=""),
        "n_baseline": b.baselines.n.astype(int), "baseline_specimens": object_texts(b.baselines.specimens),
        "assumed_healthy": b.baselines.n_assumed,
    }


def _model(b: CaseBatch, res: dict, coverage: float) -> dict:
    sp_mean = np.exp(res["theta_mean"])
    mcrc_pct = b.prior_attr(lambda p: 100 * float(p.mcrc) if p.mcrc else np.nan)
    return {
        "set_point_mean": sp_mean, "set_point_lower": np.exp(res["theta_lower"]),
        "set_point_upper": np.exp(res["theta_upper"]),
        "pi_lower": np.exp(res["pi_lower"]), "pi_upper": np.exp(res["pi_upper"]), "coverage": coverage,
        "percentile": res["percentile"], "bayes_factor": res["bf10"], "p_change": res["p_change"],
        "p_increase": res["p_increase"], "p_exceed_delta": res["p_exceed_delta"], "delta_pct": mcrc_pct,
        "change_pct": 100 * (np.exp(b.scalars["new_y"]) / sp_mean - 1),
    }


def _population(b: CaseBatch, values: np.ndarray, res: dict, cva: np.ndarray, cvg: np.ndarray) -> dict:
    pop_lo = b.prior_attr(lambda p: float(p.ri_lower))
    pop_hi = b.prior_attr(lambda p: float(p.ri_upper))
    return {
        "pop_lower": pop_lo, "pop_upper": pop_hi, "outside_population": (values < pop_lo) | (values > pop_hi),
        "cvi_pct": 100 * b.scalars["cvi"], "cvg_pct": 100 * cvg, "cva_pct": 100 * cva,
        "cvi_post_pct": 100 * res["cvi_post_mean"],
    }


def _texts(values):
    """A list of texts (or a column already built) as the table column pandas infers from it."""
    if not isinstance(values, list):
        return values
    codes, uniq = pd.factorize(np.asarray(values, dtype=object), use_na_sentinel=False)
    return text_column(codes, uniq.tolist())


def _pack_ids(b: CaseBatch):
    """The pack id of every case, looked up once per distinct pack."""
    if b.pack_groups is None:
        return per_object(b.pack, lambda pk: pk.id, object)
    uniq, index = b.pack_groups
    return text_column(index, [pk.id for pk in uniq])


def _cells(flags) -> np.ndarray:
    """The flags column: an object array holding each case's list (a tuple becomes a list)."""
    if set(map(type, flags)) <= {list}:
        return np.fromiter(flags, dtype=object, count=len(flags))  # the lists themselves
    out = np.empty(len(flags), dtype=object)
    for i, f in enumerate(flags):
        out[i] = f if type(f) is list else list(f)
    return out


def frame_of_columns(cols: dict, keep_apart=()) -> pd.DataFrame:
    """``pd.DataFrame(cols)`` (the reference: the same values, dtypes and column order) without
    its copy of every numpy column into one 2-D block per dtype: each column keeps its own array.
    The frame then owns its arrays as the copy would: a numpy array that may share memory with an
    earlier column or with one of ``keep_apart`` (arrays that live on outside the frame) is copied
    first, so writing into one column never changes another column or those arrays."""
    seen = [a for a in keep_apart if isinstance(a, np.ndarray)]
    own = {}
    for k, v in cols.items():
        if isinstance(v, np.ndarray) and v.ndim == 1:
            if any(np.may_share_memory(v, a) for a in seen):
                v = v.copy()
            seen.append(v)
        own[k] = v
    return pd.DataFrame(own, copy=False)


def results_table(b: CaseBatch, targets: Targets, engine: EngineResult, classical_cols: dict,
                  cvs: tuple, quality: list, flags: list, opts: Options) -> pd.DataFrame:
    """One row per case; column order is part of the contract (DEVELOPERS.md). The lists of
    ``flags`` (one per case, fresh from :func:`.flags.case_flags`) become the table's cells as
    they are, not copied; the columns' arrays are the table's own (:func:`frame_of_columns`; the
    PyMC engine's summary arrays stay with its result)."""
    values = assessed_values(b)
    cva, _, cvg = cvs
    cols = _identity(b, targets, values)
    cols.update(_model(b, engine.summary, opts.coverage))
    cols.update(classical_cols)
    cols.update(_population(b, values, engine.summary, cva, cvg))
    cols.update({
        "retest_group": b.prior_text(lambda p: p.group), "quality": _texts(quality),
        "comparable": np.asarray(~b.method.changed | b.method.corrected, dtype=bool), "flags": _cells(flags),
        "engine": text_column(np.zeros(len(b), dtype=np.int64), [opts.engine]), "converged": engine.converged,
        "pack": _pack_ids(b),
    })
    return frame_of_columns(cols, list(engine.summary.values()) if engine.mcmc is not None else ())


def provenance(b: CaseBatch, engine: EngineResult, opts: Options) -> tuple[dict, dict]:
    """(packs used by id in case order, attrs stamped on the assessment)."""
    packs_used = {pk.id: pk for pk in b.pack}
    ids = sorted(packs_used)
    attrs = {
        "pack_id": ",".join(ids),
        "pack_sha256": ",".join(packs_used[k].sha256 for k in ids),
        "engine": opts.engine,
        "seed": opts.seed,
        "settings": engine.settings,
        "version": __version__,
        "coverage": opts.coverage,
        "ci_prob": opts.ci_prob,
        "prior_change": sorted(set(b.scalars["prior_change"].tolist())),
        "prior_drift": opts.drift_prior,
        "at": None if opts.at is None else str(opts.at),
    }
    return packs_used, attrs
