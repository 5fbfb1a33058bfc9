"""The panel-level rules of the report (numbers only, no text): which results are listed as
probable true changes, the many-results chance, and the band of a P(change)."""
from __future__ import annotations

import numpy as np

from ..classical import chance_any_outside as _chance_any_outside
from ..constants import PANEL_FDR, PROBABLE_CHANGE, UNCERTAIN_BAND

__all__ = ["select_changes", "chance_any_outside", "change_band", "BANDS", "DRIFT_DRAW_P"]

#: The drift line is drawn when the drift model's P(drift) is at least this (a line for a
#: stable analyte would suggest a drift the model does not support; modelling choice).
DRIFT_DRAW_P = 0.5

#: Bands of P(change), from no change to probable change (the figures and the table mark them).
BANDS = ("low", "uncertain", "probable")


def select_changes(p_change, fdr: float = PANEL_FDR, min_p: float = PROBABLE_CHANGE) -> np.ndarray:
    """Boolean mask of the results to list as probable true changes.

    Bayesian false-discovery control: sort by ``p_change`` descending and keep the largest
    leading set whose mean posterior probability of *no* change, mean(1 - p_change), is at most
    ``fdr`` (the posterior expected share of false alarms in the list). The mean of the sorted
    1 - p is non-decreasing in the set size, so the largest such set is a prefix. Of that set,
    only results with ``p_change >= min_p`` are kept (``min_p=0`` switches this off). NaN
    probabilities are never selected. Ties are broken by input order (stable sort).
    """
    p = np.asarray(p_change, dtype=float).ravel()
    mask = np.zeros(p.shape, dtype=bool)
    ok = np.flatnonzero(np.isfinite(p))
    if ok.size == 0:
        return mask
    order = ok[np.argsort(-p[ok], kind="stable")]
    running = np.cumsum(1.0 - p[order]) / np.arange(1, order.size + 1)
    k = int(np.sum(running <= fdr + 1e-12))
    mask[order[:k]] = True
    mask &= np.where(np.isfinite(p), p, -np.inf) >= min_p
    return mask


def chance_any_outside(n: int, level: float = 0.95) -> float:
    """P(at least one of ``n`` independent results of a healthy animal falls outside a central
    ``level`` interval) = 1 - level^n (Clin Chem Lab Med 2004;42:747: n = 10 -> 40 %).
    Correlated analytes make this an overstatement."""
    if n < 0:
        raise ValueError("n must be >= 0")
    return float(_chance_any_outside(int(n), level))


def change_band(p_change) -> str | None:
    """'low' below the uncertain band, 'uncertain' inside it (ends included), 'probable' above
    it; None when P(change) is missing."""
    if p_change is None or not np.isfinite(p_change):
        return None
    lo, hi = UNCERTAIN_BAND
    if p_change < lo:
        return "low"
    return "uncertain" if p_change <= hi else "probable"
