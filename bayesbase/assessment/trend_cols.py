"""Stage 9: the drift model per case over the baselines and the assessed result (rule: at least
TREND_MIN_SPECIMENS usable specimens spanning TREND_MIN_SPAN_YEARS), as table columns."""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..constants import TREND_HORIZON_YEARS, TREND_MIN_SPAN_YEARS, TREND_MIN_SPECIMENS
from ..model.trend import trend_exact
from .cases import CaseBatch, text_column
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


def _birth_years(b: CaseBatch) -> np.ndarray:
    """Birth date of every case's animal in years since 1970 (NaN when unknown)."""
    first = b.assessed.first
    if "birth_date" not in first.columns:
        return np.full(len(b), np.nan)
    bd = pd.to_datetime(first["birth_date"]).to_numpy().astype("datetime64[ns]")
    ns = bd.astype("int64")
    return np.where(np.isnat(bd), np.nan, ns / 1e9 / 86400 / YEAR_DAYS)


def _note_codes(b: CaseBatch, eligible: np.ndarray, years_to_limit: np.ndarray, first_t: np.ndarray):
    """(code per case, the distinct notes) of :func:`trend_notes`."""
    eligible = np.asarray(eligible, dtype=bool)
    codes = np.where(eligible, 1, 0)
    codes[eligible & ~np.isfinite(np.asarray(years_to_limit, dtype=float))] = 2
    uniques = [f"trend not computed: needs {TREND_RULE}", "",
               f"set point not projected to reach a population limit within {TREND_HORIZON_YEARS:g} years"]
    dependent = b.prior_attr(lambda p: bool(p.age_dependent), bool)
    with np.errstate(invalid="ignore"):
        age0 = first_t - _birth_years(b)
    young = eligible & dependent & ~(age0 >= GROWING_YEARS)  # unknown age (NaN) counts as young
    if young.any():
        priors, index = b.prior_groups
        codes[young] = len(uniques) + index[young]
        uniques += ["young or unknown age: this analyte's set point is known to move with age "
                    f"({p.age_dependent}); a drift may be growth, not disease" for p in priors]
    return codes, uniques


def trend_notes(b: CaseBatch, eligible: np.ndarray, years_to_limit: np.ndarray, first_t: np.ndarray) -> list[str]:
    """Why a trend was not computed, or what to keep in mind when reading it."""
    codes, uniques = _note_codes(b, eligible, years_to_limit, first_t)
    return np.asarray(uniques, dtype=object)[codes].tolist()


def _limit_sides(side, elig: np.ndarray):
    """The ``trend_limit`` column: the side of the limit reached where the rule is met, "" elsewhere."""
    side = np.asarray(side, dtype=object)
    codes = np.ones(len(side), dtype=np.int64)
    codes[side == "lower"] = 0
    codes[side == "upper"] = 2
    if not ((codes != 1) | (side == ""))[elig].all():  # a side other than these three
        return [str(s) if e_ else "" for s, e_ in zip(side, elig)]
    return text_column(np.where(elig, codes, 1), ["lower", "", "upper"])


def trend_columns(b: CaseBatch, prior_drift: float, nodes: int) -> dict[str, object]:
    """Trend columns of the results table (NaN / "" where the rule is not met)."""
    S = b.scalars
    t, y, r, e = _series(b)
    out = trend_exact(
        t, y, r, e, S["prior_mean"], S["sg"], S["cvi"], S["cvi_log_sd"], S["sa"], S["slope_sd"],
        prior_drift=prior_drift, limit_upper=np.log(b.prior_attr(lambda p: p.ri_upper)),
        limit_lower=np.log(b.prior_attr(lambda p: p.ri_lower)), nodes=nodes,
    )
    elig = np.asarray(out["eligible"], dtype=bool)

    def col(k):
        return np.where(elig, np.asarray(out[k], dtype=float), np.nan)

    res = {
        "trend_p_drift": col("p_drift"), "trend_p_increase": col("p_increase"),
        "trend_pct_per_year": col("pct_per_year_mean"), "trend_pct_lower": col("pct_per_year_lower"),
        "trend_pct_upper": col("pct_per_year_upper"), "trend_years_to_limit": col("years_to_limit"),
        "trend_years_lower": col("years_to_limit_lower"), "trend_years_upper": col("years_to_limit_upper"),
        "trend_limit": _limit_sides(out["limit_side"], elig),
    }
    res["trend_note"] = text_column(*_note_codes(b, elig, res["trend_years_to_limit"], np.nanmin(t, axis=1)))
    return res
