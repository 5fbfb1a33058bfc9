"""Evidence behind a prior CVI (numpy/scipy only, no project imports).

Each published biological-variation study gives an estimate of the within-animal CV (CVI). On
the natural-log scale, y_i = ln(CVI_i) with a standard error s_i:

* from a 95 % confidence interval of CVI: s_i = ln(upper / lower) / (2 z), z = 1.959964
  (:func:`log_sd_from_ci`; the "ln(upper/lower)/3.92" rule);
* from the design when no interval is published (:func:`se_log_cv_from_design`): a large-sample
  (delta-method) approximation for a variance component. The within-animal mean square has
  df_w = n_animals x (n_specimens - 1) degrees of freedom and Var(ln s^2) ~= 2 / df_w, so
  SE(ln CVI) ~= 1 / sqrt(2 df_w) when analytical variation is negligible. When the study's CVA
  and number of replicates r are known, CVI^2 = CV_w^2 - CVA^2 / r and
  Var(CVI^2) ~= 2 CV_w^4 / df_w + 2 (CVA^2 / r)^2 / df_a (df_a = n_animals n_specimens (r - 1)),
  SE(ln CVI) = SD(CVI^2) / (2 CVI^2). Both are approximations (they ignore the unbalanced designs
  and outlier removal of real studies).

Several studies of one analyte are combined with the DerSimonian-Laird random-effects model
(DerSimonian R, Laird N. Meta-analysis in clinical trials. Control Clin Trials 1986;7(3):177-188.
doi:10.1016/0197-2456(86)90046-2), closed form:

    w_i = 1 / s_i^2,   mu_FE = sum(w_i y_i) / sum(w_i)
    Q = sum(w_i (y_i - mu_FE)^2),   df = k - 1
    C = sum(w_i) - sum(w_i^2) / sum(w_i)
    tau^2 = max(0, (Q - df) / C)
    w*_i = 1 / (s_i^2 + tau^2),   mu = sum(w*_i y_i) / sum(w*_i),   SE(mu) = 1 / sqrt(sum(w*_i))
    I^2 = max(0, (Q - df) / Q)

The prior for a new animal in a new laboratory is the predictive distribution of ln CVI in a new
setting: mean mu and SD sqrt(SE(mu)^2 + tau^2) (:func:`predictive_log_sd`). With fewer than
:data:`MIN_STUDIES_FOR_TAU` studies tau is not estimable with any reliability, so the rule of this
project (:func:`combine_log_cvi`) is tau_used = max(tau_DL, :data:`TAU_FLOOR`) for k < 3 and
tau_used = tau_DL otherwise; mu and SE(mu) are then recomputed with tau_used.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = [
    "Z95",
    "TAU_FLOOR",
    "MIN_STUDIES_FOR_TAU",
    "DLResult",
    "dersimonian_laird",
    "log_sd_from_ci",
    "se_log_cv_from_design",
    "cvi_from_rcv",
    "predictive_log_sd",
    "combine_log_cvi",
]

#: Two-sided 95 % normal quantile.
Z95 = float(stats.norm.ppf(0.975))
#: Between-study SD of ln CVI assumed when fewer than MIN_STUDIES_FOR_TAU studies exist
#: (bayesbase modelling choice: a CVI estimated in one laboratory and one population is taken to
#: differ from another setting's by about 15 % (1 SD); DerSimonian-Laird cannot estimate the
#: spread from one or two studies).
TAU_FLOOR = 0.15
#: Smallest number of studies from which the DerSimonian-Laird tau is used on its own.
MIN_STUDIES_FOR_TAU = 3


@dataclass(frozen=True)
class DLResult:
    """DerSimonian-Laird random-effects combination on the log scale."""

    mu: float            # pooled mean of y = ln(CVI)
    se: float            # standard error of mu (random-effects weights)
    tau2: float          # between-study variance (method of moments, truncated at 0)
    q: float             # Cochran's Q
    df: int              # k - 1
    i2: float            # Higgins' I^2 (0-1)
    mu_fixed: float      # inverse-variance (fixed-effect) mean
    se_fixed: float
    weights: np.ndarray  # normalised random-effects weights
    k: int

    @property
    def tau(self) -> float:
        return math.sqrt(self.tau2)


def _as_arrays(y, se):
    y = np.asarray(y, dtype=float).ravel()
    se = np.asarray(se, dtype=float).ravel()
    if y.size == 0 or y.shape != se.shape:
        raise ValueError("y and se must be non-empty and of equal length")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(se)) and np.all(se > 0)):
        raise ValueError("y must be finite and se finite and > 0")
    return y, se


def dersimonian_laird(y, se) -> DLResult:
    """DerSimonian-Laird random-effects combination of estimates ``y`` with standard errors ``se``."""
    y, se = _as_arrays(y, se)
    k = y.size
    w = 1.0 / se**2
    sw = w.sum()
    mu_fe = float((w * y).sum() / sw)
    q = float((w * (y - mu_fe) ** 2).sum())
    df = k - 1
    c = float(sw - (w**2).sum() / sw)
    tau2 = max(0.0, (q - df) / c) if (k > 1 and c > 0) else 0.0
    wr = 1.0 / (se**2 + tau2)
    mu = float((wr * y).sum() / wr.sum())
    i2 = max(0.0, (q - df) / q) if q > 0 else 0.0
    return DLResult(mu=mu, se=float(1.0 / math.sqrt(wr.sum())), tau2=float(tau2), q=q, df=df, i2=i2,
                    mu_fixed=mu_fe, se_fixed=float(1.0 / math.sqrt(sw)), weights=wr / wr.sum(), k=k)


def log_sd_from_ci(lower: float, upper: float, level: float = 0.95) -> float:
    """SD of ln(CV) from a two-sided confidence interval of the CV: ln(upper/lower) / (2 z)."""
    if not (0 < lower < upper):
        raise ValueError(f"need 0 < lower < upper, got {lower!r}, {upper!r}")
    z = float(stats.norm.ppf(0.5 + level / 2))
    return math.log(upper / lower) / (2 * z)


def se_log_cv_from_design(cv: float, n_animals: int, n_specimens: int, cva: float | None = None,
                          n_replicates: int = 1) -> float:
    """Approximate SE of ln(CVI) from a study's design (see the module docstring).

    ``cv`` is the published CVI (fraction); ``cva`` the study's analytical CV (fraction) and
    ``n_replicates`` the replicate analyses per specimen, used when both are given (r >= 2).
    """
    if n_animals < 1 or n_specimens < 2:
        raise ValueError("need at least 1 animal and 2 specimens per animal")
    if cv <= 0:
        raise ValueError("cv must be > 0")
    df_w = n_animals * (n_specimens - 1)
    if cva is None or n_replicates < 2:
        return 1.0 / math.sqrt(2.0 * df_w)
    a2 = cva * cva / n_replicates            # analytical share of the specimen-mean variance
    w2 = cv * cv + a2                         # within-animal mean-square scale (CV_w^2)
    df_a = n_animals * n_specimens * (n_replicates - 1)
    var_cvi2 = 2 * w2 * w2 / df_w + 2 * a2 * a2 / df_a
    return math.sqrt(var_cvi2) / (2 * cv * cv)


def cvi_from_rcv(rcv: float, cva: float, z: float = Z95) -> float:
    """CVI from a classical two-sided RCV: RCV = sqrt(2) z sqrt(CVA^2 + CVI^2) (Fraser & Harris 1989)."""
    total = rcv / (math.sqrt(2.0) * z)
    if total <= cva:
        raise ValueError(f"RCV {rcv:g} is not larger than the analytical part (CVA {cva:g})")
    return math.sqrt(total * total - cva * cva)


def predictive_log_sd(result: DLResult) -> float:
    """SD of ln CVI in a new setting from a DerSimonian-Laird result: sqrt(SE(mu)^2 + tau^2)."""
    return math.sqrt(result.se**2 + result.tau2)


def combine_log_cvi(y, se, tau_floor: float = TAU_FLOOR,
                    min_studies: int = MIN_STUDIES_FOR_TAU) -> dict:
    """Pool ln CVI estimates; returns ``cvi`` (exp of the pooled mean), ``cvi_log_sd`` (predictive SD
    of ln CVI for a new setting), ``tau_used``, and the :class:`DLResult` under ``dl``.

    tau_used = tau_DL when k >= ``min_studies``, else max(tau_DL, ``tau_floor``); the pooled mean
    and its SE are then the random-effects ones with tau_used, and
    cvi_log_sd = sqrt(SE(mu)^2 + tau_used^2).
    """
    y, se = _as_arrays(y, se)
    dl = dersimonian_laird(y, se)
    tau2 = dl.tau2 if dl.k >= min_studies else max(dl.tau2, tau_floor**2)
    w = 1.0 / (se**2 + tau2)
    mu = float((w * y).sum() / w.sum())
    se_mu = float(1.0 / math.sqrt(w.sum()))
    return {"cvi": math.exp(mu), "mu": mu, "se_mu": se_mu, "tau_used": math.sqrt(tau2),
            "cvi_log_sd": math.sqrt(se_mu**2 + tau2), "dl": dl}
