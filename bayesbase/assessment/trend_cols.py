"""Stage 9: the drift model per case over the baselines and the assessed result (rule: at least
TREND_MIN_SPECIMENS usable specimens spanning TREND_MIN_SPAN_YEARS), as table columns."""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..constants import TREND_HORIZON_YEARS, TREND_MIN_SPAN_YEARS, TREND_MIN_SPECIMENS
from ..model.trend import trend_exact
from .cases import CaseBatch
from .frame import YEAR_DAYS

__all__ = ["TREND_RULE", "trend_columns", "trend_notes"]

TREND_RULE = f">= {TREND_MIN_SPECIMENS} usable specimens spanning >= {TREND_MIN_SPAN_YEARS} years"
#: age (years) at the first specimen under which a drift of an age-dependent analyte may be growth
#: (common practice: dogs and cats are growing or maturing until about two years)
GROWING_YEARS = 2.0


def _series(b: CaseBatch):
    """Times, ln values, replicates and extra variances of baselines + assessed result."""
    S, base = b.scalars, b.baselines
    t = np.concatenate([base.t, b.assessed.years[:, None]], axis=1)
    y = np.concatenate([base.y, S["new_y"][:, None]], axis=1)
    r = np.concatenate([base.r, np.ones((len(b), 1))], axis=1)
    e = np.concatenate([base.e, S["new_extra_var"][:, None]], axis=1)
    return t, y, r, e


def trend_notes(b: CaseBatch, eligible: np.ndarray, years_to_limit: np.ndarray, first_t: np.ndarray) -> list[str]:
    """Why a trend was not computed, or what to keep in mind when reading it."""
    birth = b.assessed.col("birth_date")
    notes = []
    for i, p in enumerate(b.prior):
        if not eligible[i]:
            notes.append(f"trend not computed: needs {TREND_RULE}")
            continue
        note = ""
        if not np.isfinite(years_to_limit[i]):
            note = f"set point not projected to reach a population limit within {TREND_HORIZON_YEARS:g} years"
        if p.age_dependent:
            bd = birth[i]
            age0 = None
            if bd is not None and not pd.isna(bd):
                age0 = first_t[i] - pd.Timestamp(bd).value / 1e9 / 86400 / YEAR_DAYS
            if age0 is None or age0 < GROWING_YEARS:
                note = ("young or unknown age: this analyte's set point is known to move with age "
                        f"({p.age_dependent}); a drift may be growth, not disease")
        notes.append(note)
    return notes


def trend_columns(b: CaseBatch, prior_drift: float, nodes: int) -> dict[str, object]:
    """Trend columns of the results table (NaN / "" where the rule is not met)."""
    S = b.scalars
    t, y, r, e = _series(b)
    out = trend_exact(
        t, y, r, e, S["prior_mean"], S["sg"], S["cvi"], S["cvi_log_sd"], S["sa"], S["slope_sd"],
        prior_drift=prior_drift, limit_upper=np.log([p.ri_upper for p in b.prior]),
        limit_lower=np.log([p.ri_lower for p in b.prior]), nodes=nodes,
    )
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
    res["trend_note"] = trend_notes(b, elig, res["trend_years_to_limit"], np.nanmin(t, axis=1))
    return res
