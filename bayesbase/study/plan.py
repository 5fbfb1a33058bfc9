"""Design planning for a biological-variation study: simulate a balanced design and report the
expected confidence interval of CVI (numpy/scipy/pandas; vectorised and seeded).

For a balanced design (I animals x S specimens x R replicates) under the nested normal model on
the log scale, the mean squares are independent scaled chi-square variables (standard normal
theory, e.g. Searle, Casella & McCulloch 1992, from memory for the chapter)::

    MS_A ~ sA^2 chi2(I S (R-1)) / (I S (R-1))
    MS_I ~ (sA^2 + R sI^2) chi2(I (S-1)) / (I (S-1))

so a study's CVI interval (the MLS interval of :mod:`bayesbase.study.anova`) is simulated by
drawing the two mean squares. :func:`simulate_balanced` draws whole data sets instead (used by
the coverage test, and to check that the two simulations agree).
Power and confidence-interval planning for CVI in this way follows Roraas T et al. Clin Chem
2012;58:1306-1313.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .anova import cv_from_var, masked_anova, mls_difference, var_from_cv
from .common import StudyError

__all__ = ["DesignPlan", "plan_design", "simulate_cvi_interval", "simulate_cvi_interval_dropout", "simulate_balanced"]

#: Default grid of the planning table (modelling choice of this project; the design guidance of
#: >= 10 animals x >= 6 specimens is in Freeman KP et al. Vet Clin Pathol 2017;46:211-220).
DEFAULT_ANIMALS = (6, 8, 10, 12, 15, 20, 30)
DEFAULT_SPECIMENS = (4, 5, 6, 8, 10, 12)


def simulate_balanced(n_sim: int, animals: int, specimens: int, replicates: int, cva: float, cvi: float,
                      cvg: float, rng: np.random.Generator, cvi_log_sd: float = 0.0, mu: float = 0.0):
    """Simulated log values y[n_sim, animals, specimens, replicates] of the nested model.

    ``cvi_log_sd`` > 0 gives each animal its own CVI, ln CVI_i ~ N(ln cvi, cvi_log_sd^2) (the
    heterogeneous model of Roraas et al. Clin Chem 2019). Returns (y, per-animal sI^2 array).
    """
    sa, sg = np.sqrt(var_from_cv(cva)), np.sqrt(var_from_cv(cvg))
    if cvi_log_sd > 0:
        cvi_i = cvi * np.exp(rng.normal(0.0, cvi_log_sd, (n_sim, animals)))
    else:
        cvi_i = np.full((n_sim, animals), float(cvi))
    si = np.sqrt(var_from_cv(cvi_i))
    g = rng.normal(0.0, sg, (n_sim, animals, 1, 1))
    b = rng.normal(0.0, 1.0, (n_sim, animals, specimens, 1)) * si[:, :, None, None]
    e = rng.normal(0.0, sa, (n_sim, animals, specimens, replicates))
    return mu + g + b + e, si**2


def simulate_cvi_interval(animals: int, specimens: int, replicates: int, cva: float, cvi: float,
                          n_sim: int, rng: np.random.Generator, ci_prob: float = 0.95):
    """Simulated CVI estimates and MLS limits (fractions) of ``n_sim`` balanced studies, drawn
    from the exact distributions of MS_A and MS_I (module docstring). Returns (cvi, lower, upper)."""
    va, vi = float(var_from_cv(cva)), float(var_from_cv(cvi))
    df_a = animals * specimens * (replicates - 1)
    df_i = animals * (specimens - 1)
    ms_a = va * rng.chisquare(df_a, n_sim) / df_a
    ms_i = (va + replicates * vi) * rng.chisquare(df_i, n_sim) / df_i
    c = 1.0 / replicates
    lo, up = mls_difference(c, ms_i, df_i, c, ms_a, df_a, ci_prob)
    est = np.clip((ms_i - ms_a) / replicates, 0.0, None)
    return cv_from_var(est), cv_from_var(lo), cv_from_var(up)


@dataclass
class DesignPlan:
    """Expected CVI interval of a planned study.

    ``summary``: the requested design with the mean simulated lower and upper limits, the mean
    and 90th percentile of the interval width (percentage points), the mean relative half-width
    and the simulated coverage. ``table``: the same over a grid of animals x specimens (tidy).
    ``attrs``: inputs, seed, number of simulated studies, method.
    """

    summary: dict
    table: pd.DataFrame
    attrs: dict = field(default_factory=dict)

    def width_grid(self) -> pd.DataFrame:
        """Expected width (percentage points) as an animals x specimens grid, for printing."""
        return self.table.pivot(index="animals", columns="specimens", values="width_pct")


def simulate_cvi_interval_dropout(animals: int, specimens: int, replicates: int, cva: float, cvi: float,
                                  cvg: float, dropout: float, n_sim: int, rng: np.random.Generator,
                                  ci_prob: float = 0.95):
    """As :func:`simulate_cvi_interval` with each result missing at random with probability
    ``dropout`` (whole data sets simulated, unbalanced nested ANOVA of :func:`masked_anova`).
    Studies left without the degrees of freedom of a level are counted as failures (NaN)."""
    y, _ = simulate_balanced(n_sim, animals, specimens, replicates, cva, cvi, cvg, rng)
    mask = rng.random(y.shape) >= dropout
    n_ij = mask.sum(-1)
    ok = ((n_ij >= 2).any((-2, -1)) & ((n_ij > 0).sum(-1) >= 2).any(-1) & ((n_ij > 0).any(-1).sum(-1) >= 2))
    est = np.full(n_sim, np.nan)
    lo = np.full(n_sim, np.nan)
    up = np.full(n_sim, np.nan)
    if ok.any():
        var, lower, upper = masked_anova(y[ok], mask[ok], ci_prob)
        est[ok], lo[ok], up[ok] = cv_from_var(var["cvi"]), cv_from_var(lower["cvi"]), cv_from_var(upper["cvi"])
    return est, lo, up


def _cell(animals, specimens, replicates, cva, cvi, cvg, n_sim, seed, ci_prob, dropout=0.0) -> dict:
    rng = np.random.default_rng([seed, animals, specimens, replicates])
    if dropout > 0:
        est, lo, up = simulate_cvi_interval_dropout(animals, specimens, replicates, cva, cvi, cvg, dropout,
                                                    n_sim, rng, ci_prob)
        fail = float(np.mean(np.isnan(est)))
        est, lo, up = est[~np.isnan(est)], lo[~np.isnan(lo)], up[~np.isnan(up)]
    else:
        est, lo, up = simulate_cvi_interval(animals, specimens, replicates, cva, cvi, n_sim, rng, ci_prob)
        fail = 0.0
    width = 100.0 * (up - lo)
    return dict(animals=animals, specimens=specimens, replicates=replicates,
                cvi_lower_pct=float(100 * lo.mean()), cvi_upper_pct=float(100 * up.mean()),
                width_pct=float(width.mean()), width_p90_pct=float(np.quantile(width, 0.9)),
                relative_half_width=float(np.mean((up - lo) / 2.0) / cvi),
                coverage=float(np.mean((lo <= cvi) & (cvi <= up))),
                p_zero_estimate=float(np.mean(est <= 0)), p_not_estimable=fail)


def plan_design(animals: int = 10, specimens: int = 6, replicates: int = 2, cva: float = 0.03,
                cvi: float = 0.10, cvg: float = 0.25, *, n_sim: int = 4000, seed: int = 0,
                ci_prob: float = 0.95, animals_grid=None, specimens_grid=None,
                dropout: float = 0.0) -> DesignPlan:
    """Expected 95 % CI of CVI for a balanced design (CVs as fractions). ``cvg`` does not affect
    the CVI interval of a balanced design. ``dropout`` > 0: each result is missing at random with
    that probability (whole data sets are then simulated; slower)."""
    for name, v, lo in (("animals", animals, 2), ("specimens", specimens, 2), ("replicates", replicates, 2)):
        if int(v) != v or v < lo:
            raise StudyError(f"--{name} must be a whole number >= {lo}, got {v}"
                             + (" (replicates are needed to separate CVA)" if name == "replicates" else ""))
    for name, v in (("cva", cva), ("cvi", cvi), ("cvg", cvg)):
        if not (0 < v < 2):
            raise StudyError(f"--{name} must be a CV between 0 and 200 %, got {100 * v:g} %")
    if not 0 <= dropout < 0.5:
        raise StudyError(f"dropout must be a fraction in [0, 0.5), got {dropout}")
    if n_sim < 100:
        raise StudyError("n_sim must be at least 100")
    a_grid = sorted(set(animals_grid or DEFAULT_ANIMALS) | {int(animals)})
    s_grid = sorted(set(specimens_grid or DEFAULT_SPECIMENS) | {int(specimens)})
    a_grid = [a for a in a_grid if a >= 2]
    s_grid = [s for s in s_grid if s >= 2]
    rows = [_cell(a, s, int(replicates), cva, cvi, cvg, n_sim, seed, ci_prob, dropout) for a in a_grid for s in s_grid]
    table = pd.DataFrame(rows)
    summary = next(r for r in rows if r["animals"] == animals and r["specimens"] == specimens)
    attrs = dict(cva=cva, cvi=cvi, cvg=cvg, n_sim=n_sim, seed=seed, ci_prob=ci_prob, dropout=dropout,
                 method=("nested normal model, whole data sets with results missing at random"
                         if dropout > 0 else
                         "balanced nested normal model; mean squares drawn from their chi-square distributions")
                 + "; CVI interval: modified large-sample (Burdick & Graybill 1992)")
    return DesignPlan(summary=dict(summary), table=table, attrs=attrs)
