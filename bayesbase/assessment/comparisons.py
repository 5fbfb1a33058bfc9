"""Stage 8: the classical comparisons beside the model, from :mod:`bayesbase.classical`:
classical and log-normal RCV against the last baseline and the baseline mean, the probability
of a significant change, the model-2 personal interval, Harris's index of individuality.

Two families of columns compare the assessed result with the mean of the n baselines:

* the *laboratory convention* (``rcv_exceeded_mean``, ``lognormal_exceeded_mean``,
  ``p_significant``): the two-result factor sqrt(2), as if the mean were one earlier result; the
  same thresholds as against the last result, conservative for n > 1;
* the *exact form* (``rcv_mean_exact_pct``, ``rcv_lognormal_mean_exact_up_pct`` /
  ``_down_pct``, ``rcv_exceeded_mean_exact``, ``lognormal_exceeded_mean_exact``,
  ``p_significant_exact``): sqrt(1 + 1/n), the SD of one result minus the mean of n, at the
  assessment's coverage. ``rcv_exceeded_mean_exact`` is by construction "outside
  ``model2_lower``-``model2_upper``" (published model 2, arithmetic mean) and
  ``lognormal_exceeded_mean_exact`` "outside ``model2_log_lower``-``model2_log_upper``" (log form,
  geometric mean): the two interval columns and the two exact flags claim the same thing.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from .. import classical
from .cases import CaseBatch

__all__ = ["classical_cvs", "model2_intervals", "classical_comparisons"]


def classical_cvs(b: CaseBatch) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(CVA, CVI, CVG) fractions per case, from the pack."""
    cva = b.prior_attr(lambda p: float(p.cva))
    cvg = b.prior_attr(lambda p: float(p.cvg))
    return cva, b.scalars["cvi"], cvg


def model2_intervals(b: CaseBatch, coverage: float, form: str = "arithmetic") -> tuple[np.ndarray, np.ndarray]:
    """Model-2 interval of every case (:func:`bayesbase.classical.model2_interval` over the
    baseline specimens, ``form`` "arithmetic" - published - or "log"; NaN without a baseline)."""
    cva, cvi, _ = classical_cvs(b)
    y = b.baselines.y
    j = np.arange(y.shape[1])[None, :]
    values = np.where(j < b.baselines.n[:, None], np.exp(y), np.nan)  # the n baselines of each case
    return classical.model2_intervals(values, cva, cvi, coverage=coverage, form=form)


def _tri(mask, has_baseline) -> pd.arrays.BooleanArray:
    """True/False where a baseline exists, missing elsewhere."""
    return pd.arrays.BooleanArray(np.asarray(mask, dtype=bool), ~np.asarray(has_baseline, dtype=bool))


def _baseline_means(b: CaseBatch):
    """(last, geometric mean, arithmetic mean) of the baselines per case, NaN without one."""
    n, y = b.baselines.n, b.baselines.y
    has_b = n > 0
    last_idx = np.maximum(n - 1, 0)
    filled = np.nan_to_num(y)
    used = np.arange(y.shape[1])[None, :] < n[:, None]
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        last = np.where(has_b, np.exp(y[np.arange(len(b)), last_idx]), np.nan)
        gmean = np.where(has_b, np.exp(np.nansum(filled, axis=1) / np.maximum(n, 1)), np.nan)
        amean = np.where(has_b, np.where(used, np.exp(filled), 0.0).sum(axis=1) / np.maximum(n, 1), np.nan)
    return last, gmean, amean


def _changes(b: CaseBatch, means=None):
    """Relative change of the assessed result against the last baseline and the baseline mean
    (geometric), NaN without a baseline (``means``: :func:`_baseline_means` when known)."""
    last, gmean, _ = _baseline_means(b) if means is None else means
    with np.errstate(invalid="ignore", divide="ignore"):
        v_eff = np.exp(b.scalars["new_y"])
        return v_eff / last - 1, v_eff / gmean - 1


def _exact_columns(b: CaseBatch, coverage: float, cva, cvi, means=None) -> dict[str, object]:
    """Exact difference-from-a-mean columns and both model-2 intervals (see module notes;
    ``means``: :func:`_baseline_means` when known)."""
    n = b.baselines.n
    has_b = n > 0
    z = classical.z_two_sided(coverage)
    v = np.exp(b.scalars["new_y"])
    _, _, amean = _baseline_means(b) if means is None else means
    rcv_exact = classical.rcv_classical(cva, cvi, z=z, n_mean=n)  # NaN where n = 0
    up_exact, down_exact = classical.rcv_lognormal(cva, cvi, z=z, n_mean=n)
    m2lo, m2hi = model2_intervals(b, coverage, "arithmetic")
    m2llo, m2lhi = model2_intervals(b, coverage, "log")
    with np.errstate(invalid="ignore", divide="ignore"):
        d_arith = v / amean - 1
        p_exact = np.where(has_b, classical.prob_significant_change(d_arith, cva, cvi, n_mean=np.maximum(n, 1)),
                           np.nan)
        out_arith = (v < m2lo) | (v > m2hi)
        out_log = (v < m2llo) | (v > m2lhi)
    return {
        "rcv_mean_exact_pct": 100 * rcv_exact,
        "rcv_lognormal_mean_exact_up_pct": 100 * up_exact,
        "rcv_lognormal_mean_exact_down_pct": 100 * down_exact,
        "rcv_exceeded_mean_exact": _tri(out_arith, has_b),
        "lognormal_exceeded_mean_exact": _tri(out_log, has_b),
        "p_significant_exact": p_exact,
        "model2_lower": m2lo, "model2_upper": m2hi,
        "model2_log_lower": m2llo, "model2_log_upper": m2lhi,
    }


def classical_comparisons(b: CaseBatch, coverage: float) -> dict[str, object]:
    """The classical columns of the results table, in table order."""
    cva, cvi, cvg = classical_cvs(b)
    rcv = classical.rcv_classical(cva, cvi)
    up, down = classical.rcv_lognormal(cva, cvi)
    has_b = b.baselines.n > 0
    means = _baseline_means(b)
    d_last, d_mean = _changes(b, means)
    with np.errstate(invalid="ignore"):
        p_sig = np.where(has_b, classical.prob_significant_change(d_mean, cva, cvi), np.nan)
    return {
        "rcv_classical_pct": 100 * rcv, "rcv_one_sided_pct": 100 * classical.rcv_classical(cva, cvi, one_sided=True),
        "rcv_lognormal_up_pct": 100 * up, "rcv_lognormal_down_pct": 100 * down,
        "change_vs_last_pct": 100 * d_last, "change_vs_mean_pct": 100 * d_mean,
        "rcv_exceeded_last": _tri(np.abs(d_last) > rcv, has_b), "rcv_exceeded_mean": _tri(np.abs(d_mean) > rcv, has_b),
        "lognormal_exceeded_last": _tri((d_last > up) | (d_last < down), has_b),
        "lognormal_exceeded_mean": _tri((d_mean > up) | (d_mean < down), has_b),
        "p_significant": p_sig,
        **_exact_columns(b, coverage, cva, cvi, means),
        "ii": classical.index_of_individuality(cvi, cvg),
        "ii_total": classical.index_of_individuality(cvi, cvg, cva),
        "n_for_setpoint": classical.n_for_setpoint(cva, cvi, 0.10),
        "cva_high": classical.cva_too_high(cva, cvi),
    }
