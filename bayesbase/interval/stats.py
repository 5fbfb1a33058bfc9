"""Statistical kernels of the population reference interval (numpy/scipy only, no pandas).

Every function works on plain arrays; the ones used inside the bootstrap are vectorised over a
leading axis (one row per resample). Sources are named beside each formula.

References
----------
.. [EP28] CLSI EP28-A3c. Defining, Establishing, and Verifying Reference Intervals in the Clinical
   Laboratory; Approved Guideline, 3rd ed. Wayne PA: CLSI; 2008 (nonparametric limits at rank
   p(n + 1); 90 % confidence limits of each reference limit from order statistics; robust method
   Appendix B; Dixon/Reed outlier rule).
.. [ASVCP] Friedrichs KR, Harr KE, Freeman KP, Szladovits B, Walton RM, Barnhart KF,
   Blanco-Chavez J. ASVCP reference interval guidelines: determination of de novo reference
   intervals in veterinary species and other related topics. Vet Clin Pathol 2012;41:441-453
   (method by sample size; CI of a limit wider than 0.2 of the interval flagged). Only the
   abstract was read here; the sample-size bands (>= 120, 40-119, 20-39, < 20) and the 0.2 ratio
   are taken as the project's issue states them (from memory, not verified against the text).
.. [HPC] Horn PS, Pesce AJ, Copeland BE. A robust approach to reference interval estimation and
   evaluation. Clin Chem 1998;44:622-631 (biweight location and scale, robust prediction interval).
.. [HFLP] Horn PS, Feng L, Li Y, Pesce AJ. Effect of outliers and nonhealthy individuals on
   reference interval estimation. Clin Chem 2001;47:2137-2145 (Box-Cox transformation followed by
   Tukey's interquartile fences to find outliers).
.. [RHM] Reed AH, Henry RJ, Mason WB. Influence of statistical method used on the resulting
   estimate of normal range. Clin Chem 1971;17:275-284 (Dixon's gap/range ratio with the
   one-third rule for the extreme values).
.. [Tukey] Tukey JW. Exploratory Data Analysis. Addison-Wesley; 1977 (fences at 1.5 IQR).
.. [BC] Box GEP, Cox DR. An analysis of transformations. J R Stat Soc B 1964;26:211-252.
.. [AD] Anderson TW, Darling DA. Ann Math Stat 1952;23:193-212; the test as implemented by
   ``scipy.stats.anderson`` (normal case with estimated mean and variance).
.. [HB] Harris EK, Boyd JC. On dividing reference data into subgroups to produce separate
   reference ranges. Clin Chem 1990;36:265-270.
.. [Lahti] Lahti A, Hyltoft Petersen P, Boyd JC, Fraser CG, Jorgensen N. Objective criteria for
   partitioning Gaussian-distributed reference values into subgroups. Clin Chem 2002;48:338-352
   (4.1 % / 3.2 % outside the combined limits: read in the abstract).
.. [RM] Royston P, Matthews JNS. Estimation of reference ranges from normal samples. Stat Med
   1991;10:691-695 (mean +/- the normal deviate times the SD).
"""
from __future__ import annotations

import inspect
import math
from dataclasses import dataclass

import numpy as np
from scipy import special
from scipy import stats as _st

__all__ = [
    "REF_COVERAGE",
    "CI_LEVEL",
    "P_LOWER",
    "P_UPPER",
    "CI_RATIO_FLAG",
    "binom_cdf",
    "rank_ci",
    "rank_ci_coverage",
    "nonparametric_limits",
    "nonparametric_limit_cis",
    "boxcox",
    "inv_boxcox",
    "boxcox_lambda",
    "boxcox_llf",
    "anderson_normal",
    "parametric_limits",
    "biweight_location",
    "biweight_scale",
    "robust_limits",
    "tukey_fences",
    "dixon_reed",
    "harris_boyd",
    "lahti_outside",
    "ci_ratio",
    "cvg_from_interval",
]

#: Central coverage of a population reference interval (2.5th-97.5th percentiles) [EP28].
REF_COVERAGE = 0.95
P_LOWER, P_UPPER = 0.025, 0.975
#: Confidence level of each reference limit's confidence interval [EP28], [ASVCP].
CI_LEVEL = 0.90
#: A limit whose 90 % CI is wider than this fraction of the interval width is flagged
#: ([ASVCP], Friedrichs et al. 2012, as stated in the project's issue; the ratio itself is
#: recalled, not read here: from memory).
CI_RATIO_FLAG = 0.2

#: Horn-Pesce tuning constants [HPC] (c = 3.7 for the biweight location and the standard error of
#: the location, c = 205.6 for the biweight scale; checked here against the CLSI EP28-A3c
#: Appendix B worked example, tests/test_interval_stats.py).
C_LOCATION = 3.7
C_SCALE = 205.6
#: MAD scaled by 1/0.6745 (the normal-consistent MAD; 0.6745 = Phi^-1(0.75), common practice).
MAD_SCALE = 0.6745
#: Tukey's inner fences at 1.5 IQR ("outside" values) [Tukey], as used on Box-Cox data by [HFLP].
TUKEY_K = 1.5
#: Tukey's outer fences at 3 IQR ("far out" values) [Tukey].
TUKEY_FAR = 3.0
#: Reed's one-third rule for Dixon's gap/range ratio of an extreme value [RHM].
DIXON_REED_Q = 1.0 / 3.0
#: Box-Cox lambda is searched in this interval (modelling choice: wide enough for lab data).
LAMBDA_BOUNDS = (-5.0, 5.0)


# =========================================================================== order statistics

def binom_cdf(n: int, p: float) -> np.ndarray:
    """P(B <= k) for k = 0..n, B ~ Binomial(n, p), from log-gamma sums (numpy only).

    Written out rather than taken from scipy so that the test can check it against
    ``scipy.stats.binom`` independently.
    """
    k = np.arange(n + 1, dtype=float)
    logpmf = (special.gammaln(n + 1) - special.gammaln(k + 1) - special.gammaln(n - k + 1)
              + k * math.log(p) + (n - k) * math.log1p(-p))
    return np.minimum(np.cumsum(np.exp(logpmf)), 1.0)


def rank_ci(n: int, p: float = P_LOWER, level: float = CI_LEVEL) -> tuple[int, int] | None:
    """Ranks (1-based) r1 < r2 of the order statistics bounding a ``level`` confidence interval
    for the p-th population quantile, equal-tailed and conservative [EP28]:

    ``x(r) <= Q_p`` happens when at least r values fall below Q_p, so with B ~ Binomial(n, p)
    ``P(x(r1) > Q_p) = P(B <= r1 - 1)`` and ``P(x(r2) < Q_p) = 1 - P(B <= r2 - 1)``;
    r1 is the largest rank with ``P(B <= r1 - 1) <= (1 - level)/2`` and r2 the smallest with
    ``P(B <= r2 - 1) >= (1 + level)/2``. Returns None when the sample is too small (no rank
    qualifies: for p = 0.025 and a 90 % CI, n < 119).
    """
    if n < 1:
        return None
    a = (1.0 - level) / 2.0
    F = binom_cdf(n, p)  # F[k] = P(B <= k)
    eps = 1e-12
    r1_cands = [r for r in range(1, n + 1) if F[r - 1] <= a + eps]
    r2_cands = [r for r in range(1, n + 1) if F[r - 1] >= 1.0 - a - eps]
    if not r1_cands or not r2_cands:
        return None
    r1, r2 = max(r1_cands), min(r2_cands)
    if r1 >= r2:
        return None
    return r1, r2


def rank_ci_coverage(n: int, p: float, r1: int, r2: int) -> float:
    """Exact coverage P(x(r1) <= Q_p <= x(r2)) = P(r1 <= B <= r2 - 1), B ~ Binomial(n, p)."""
    F = binom_cdf(n, p)
    return float(F[r2 - 1] - (F[r1 - 1] if r1 >= 1 else 0.0))


def _interp_rank(xs: np.ndarray, r: float) -> np.ndarray:
    """Value at (1-based, possibly fractional) rank r of sorted rows xs (..., n)."""
    n = xs.shape[-1]
    k = int(math.floor(r))
    frac = r - k
    k = min(max(k, 1), n)
    lo = xs[..., k - 1]
    hi = xs[..., min(k, n - 1)]
    return lo + frac * (hi - lo)


def nonparametric_limits(x, p_lower: float = P_LOWER, p_upper: float = P_UPPER) -> np.ndarray:
    """Rank-based limits at ranks p(n + 1) with linear interpolation between neighbours [EP28].

    ``x`` is (n,) or (B, n); returns (..., 2) = lower, upper. Needs n >= 39 so that rank
    0.025 (n + 1) >= 1 (the caller checks).
    """
    xs = np.sort(np.asarray(x, dtype=float), axis=-1)
    n = xs.shape[-1]
    return np.stack([_interp_rank(xs, p_lower * (n + 1)), _interp_rank(xs, p_upper * (n + 1))], axis=-1)


def nonparametric_limit_cis(x, level: float = CI_LEVEL):
    """90 % CIs of the nonparametric lower and upper limits from order statistics [EP28].

    Returns ``(ci_lower_limit, ci_upper_limit, ranks)`` with each CI a (2,) array and ranks
    ``((r1, r2), (n + 1 - r2, n + 1 - r1))``, or None when n is too small (n < 119).
    """
    xs = np.sort(np.asarray(x, dtype=float))
    n = xs.size
    r = rank_ci(n, P_LOWER, level)
    if r is None:
        return None
    r1, r2 = r
    lo_ci = np.array([xs[r1 - 1], xs[r2 - 1]])
    up_ci = np.array([xs[n - r2], xs[n - r1]])  # ranks n+1-r2 and n+1-r1
    return lo_ci, up_ci, ((r1, r2), (n + 1 - r2, n + 1 - r1))


# =========================================================================== Box-Cox

def boxcox(x, lam):
    """Box-Cox transform [BC]: (x^lam - 1)/lam, log(x) at lam = 0. Broadcasts lam over rows."""
    x = np.asarray(x, dtype=float)
    lam = np.asarray(lam, dtype=float)
    lx = np.log(x)
    lam_b = lam[..., None] if lam.ndim and lam.ndim == x.ndim - 1 else lam
    small = np.abs(lam_b) < 1e-10
    safe = np.where(small, 1.0, lam_b)
    return np.where(small, lx, np.expm1(safe * lx) / safe)


def inv_boxcox(y, lam):
    """Inverse Box-Cox: (lam y + 1)^(1/lam), exp(y) at lam = 0; NaN where lam y + 1 <= 0
    (a limit that would fall at or below zero on the original scale)."""
    y = np.asarray(y, dtype=float)
    lam = np.asarray(lam, dtype=float)
    small = np.abs(lam) < 1e-10
    safe = np.where(small, 1.0, lam)
    base = safe * y + 1.0
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        out = np.where(small, np.exp(y), np.where(base > 0, np.exp(np.log(np.where(base > 0, base, 1.0)) / safe),
                                                  np.nan))
    return out


def boxcox_llf(lam, x) -> np.ndarray:
    """Profile log-likelihood of lambda [BC]: (lam - 1) sum(log x) - n/2 log(var(y_lam)),
    var with divisor n (as scipy.stats.boxcox_llf). ``x`` (..., n); lam broadcast over rows."""
    x = np.asarray(x, dtype=float)
    n = x.shape[-1]
    y = boxcox(x, lam)
    var = np.var(y, axis=-1)
    lam = np.asarray(lam, dtype=float)
    with np.errstate(divide="ignore"):
        return (lam - 1.0) * np.log(x).sum(axis=-1) - 0.5 * n * np.log(var)


def _llf_log(lam, lx, sum_lx):
    """Box-Cox profile log-likelihood from precomputed logs (lam (...,), lx (..., n))."""
    n = lx.shape[-1]
    lam_b = lam[..., None]
    small = np.abs(lam_b) < 1e-10
    safe = np.where(small, 1.0, lam_b)
    y = np.where(small, lx, np.expm1(safe * lx) / safe)
    with np.errstate(divide="ignore"):
        return (lam - 1.0) * sum_lx - 0.5 * n * np.log(np.var(y, axis=-1))


def boxcox_lambda(x, bounds: tuple[float, float] = LAMBDA_BOUNDS, iters: int = 60) -> np.ndarray:
    """Maximum-likelihood Box-Cox lambda [BC] by golden-section search, vectorised over rows.

    The search runs on x divided by its geometric mean (lambda's MLE is scale invariant, and the
    powers stay finite); 60 golden steps shrink the bracket to 1e-11. Checked against
    ``scipy.stats.boxcox`` in the tests. Rows with no spread give lambda = 1 (no transformation).
    """
    x = np.asarray(x, dtype=float)
    lx = np.log(x)
    lx = lx - lx.mean(axis=-1, keepdims=True)
    sum_lx = lx.sum(axis=-1)
    shape = x.shape[:-1]
    a = np.full(shape, bounds[0])
    b = np.full(shape, bounds[1])
    g = (math.sqrt(5.0) - 1.0) / 2.0
    c = b - g * (b - a)
    d = a + g * (b - a)
    fc = _llf_log(c, lx, sum_lx)
    fd = _llf_log(d, lx, sum_lx)
    for _ in range(iters):
        left = fc > fd  # maximum in [a, d]
        b = np.where(left, d, b)
        a = np.where(left, a, c)
        new_c = b - g * (b - a)
        new_d = a + g * (b - a)
        c_next = np.where(left, new_c, d)
        d_next = np.where(left, c, new_d)
        f_new = _llf_log(np.where(left, new_c, new_d), lx, sum_lx)
        fc, fd = np.where(left, f_new, fd), np.where(left, fc, f_new)
        c, d = c_next, d_next
    lam = (a + b) / 2.0
    flat = np.ptp(x, axis=-1) <= 0
    return np.where(flat, 1.0, lam)


# =========================================================================== normality

_AD_HAS_METHOD = "method" in inspect.signature(_st.anderson).parameters


def anderson_normal(y, alpha: float = 0.05) -> tuple[float, bool, str]:
    """Anderson-Darling test of normality with estimated mean and SD [AD] via scipy.

    Returns (statistic, passes, text): ``passes`` when H0 (normal) is not rejected at ``alpha``.
    scipy >= 1.17 interpolates a p-value from its tables (clipped to 0.01-0.15); older scipy
    compares with the tabulated critical value at 5 %.
    """
    y = np.asarray(y, dtype=float)
    if _AD_HAS_METHOD:
        res = _st.anderson(y, dist="norm", method="interpolate")
        p = float(res.pvalue)
        text = (f"Anderson-Darling A2 = {res.statistic:.3f}, p {'>=' if p >= 0.15 else ('<=' if p <= 0.01 else '=')} "
                f"{p:.2f} (scipy.stats.anderson)")
        return float(res.statistic), p > alpha, text
    res = _st.anderson(y, dist="norm")  # pragma: no cover - scipy < 1.17
    levels = [float(s) for s in res.significance_level]  # pragma: no cover
    crit = float(res.critical_values[levels.index(100 * alpha)])  # pragma: no cover
    return (float(res.statistic), bool(res.statistic < crit),  # pragma: no cover
            f"Anderson-Darling A2 = {res.statistic:.3f}, critical value at 5 % {crit:.3f} (scipy.stats.anderson)")


# =========================================================================== parametric

def parametric_limits(y, coverage: float = REF_COVERAGE) -> np.ndarray:
    """mean -/+ z_(1+coverage)/2 * SD (SD with divisor n - 1) on the (transformed) scale [RM],
    [EP28]. ``y`` (n,) or (B, n) -> (..., 3): lower, upper, mean."""
    y = np.asarray(y, dtype=float)
    z = float(_st.norm.ppf(0.5 + coverage / 2.0))
    m = y.mean(axis=-1)
    s = y.std(axis=-1, ddof=1)
    return np.stack([m - z * s, m + z * s, m], axis=-1)


# =========================================================================== robust (Horn-Pesce)

def _mad(y, center):
    return np.median(np.abs(y - center[..., None]), axis=-1) / MAD_SCALE


def biweight_location(y, c: float = C_LOCATION, tol: float = 1e-10, max_iter: int = 200):
    """Tukey biweight location T_bi [HPC], vectorised over rows, started at the median:

    u_i = (y_i - T) / (c MAD), w_i = (1 - u_i^2)^2 for |u_i| < 1 else 0, T <- sum w_i y_i / sum w_i,
    iterated to convergence (MAD about the median, scaled by 1/0.6745). Rows with MAD = 0 give NaN.
    """
    y = np.asarray(y, dtype=float)
    M = np.median(y, axis=-1)
    mad = _mad(y, M)
    ok = mad > 0
    mad_s = np.where(ok, mad, 1.0)
    T = M.copy()
    for _ in range(max_iter):
        u = (y - T[..., None]) / (c * mad_s[..., None])
        w = np.where(np.abs(u) < 1.0, (1.0 - u * u) ** 2, 0.0)
        T_new = (w * y).sum(axis=-1) / w.sum(axis=-1)
        done = np.all(np.abs(T_new - T) < tol)
        T = T_new
        if done:
            break
    return np.where(ok, T, np.nan)


def biweight_scale(y, center, c: float):
    """Biweight scale s_bi [HPC] about ``center`` with tuning constant c (small-sample form):

    u_i = (y_i - center) / (c MAD), over |u_i| < 1:
    s_bi^2 = n sum (y_i - center)^2 (1 - u_i^2)^4 / (S max(1, S - 1)), S = sum (1 - u_i^2)(1 - 5 u_i^2).
    """
    y = np.asarray(y, dtype=float)
    center = np.asarray(center, dtype=float)
    n = y.shape[-1]
    mad = _mad(y, np.median(y, axis=-1))
    mad_s = np.where(mad > 0, mad, 1.0)
    d = y - center[..., None]
    u = d / (c * mad_s[..., None])
    inside = np.abs(u) < 1.0
    u2 = np.where(inside, u * u, 0.0)
    num = n * np.where(inside, d * d * (1.0 - u2) ** 4, 0.0).sum(axis=-1)
    S = np.where(inside, (1.0 - u2) * (1.0 - 5.0 * u2), 0.0).sum(axis=-1)
    den = S * np.maximum(1.0, S - 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.sqrt(num / den)
    return np.where((mad > 0) & (den > 0), out, np.nan)


def robust_limits(y, coverage: float = REF_COVERAGE) -> np.ndarray:
    """Horn-Pesce robust reference limits [HPC] on (transformed) data, vectorised over rows:

    T_bi(c = 3.7) -/+ t_((1+coverage)/2, n-1) sqrt(s_bi(c = 205.6)^2 + s_bi(c = 3.7)^2 / n),

    both scales about the median; the second term is the standard error of the location.
    Returns (..., 3): lower, upper, T_bi. (Equations as recalled from [HPC]; the CLSI EP28-A3c
    Appendix B example is reproduced to 0.001, see the tests.)
    """
    y = np.asarray(y, dtype=float)
    n = y.shape[-1]
    M = np.median(y, axis=-1)
    T = biweight_location(y)
    s_pop = biweight_scale(y, M, C_SCALE)
    s_loc = biweight_scale(y, M, C_LOCATION)
    t = float(_st.t.ppf(0.5 + coverage / 2.0, n - 1))
    half = t * np.sqrt(s_pop ** 2 + s_loc ** 2 / n)
    return np.stack([T - half, T + half, T], axis=-1)


# =========================================================================== outliers

def tukey_fences(y, k: float = TUKEY_K) -> tuple[float, float]:
    """Tukey's fences Q1 - k IQR, Q3 + k IQR [Tukey] (quartiles by numpy's default linear rule)."""
    q1, q3 = np.percentile(np.asarray(y, dtype=float), [25.0, 75.0])
    iqr = q3 - q1
    return float(q1 - k * iqr), float(q3 + k * iqr)


@dataclass(frozen=True)
class DixonFlag:
    index: int  # index into the array passed in
    side: str  # "low" / "high"
    q: float  # gap / range


def dixon_reed(y, q_crit: float = DIXON_REED_Q, max_per_side: int | None = None) -> list[DixonFlag]:
    """Dixon's gap/range ratio for the extremes with Reed's one-third rule [RHM], [EP28].

    Q = |x_extreme - x_next| / (x_max - x_min); an extreme with Q > 1/3 is flagged, set aside,
    and the new extreme on that side is tested again (at most ``max_per_side`` times, default
    n // 10; masking by several close outliers is a known limit of the rule).
    """
    y = np.asarray(y, dtype=float)
    order = list(np.argsort(y, kind="mergesort"))
    cap = max(1, y.size // 10) if max_per_side is None else max_per_side
    flags: list[DixonFlag] = []
    for side in ("low", "high"):
        count = 0
        while len(order) >= 3 and count < cap:
            rng_ = y[order[-1]] - y[order[0]]
            if rng_ <= 0:
                break
            if side == "low":
                q = (y[order[1]] - y[order[0]]) / rng_
                idx = order[0]
            else:
                q = (y[order[-1]] - y[order[-2]]) / rng_
                idx = order[-1]
            if q > q_crit:
                flags.append(DixonFlag(int(idx), side, float(q)))
                order.remove(idx)
                count += 1
            else:
                break
    return flags


# =========================================================================== partitions

@dataclass(frozen=True)
class HarrisBoyd:
    z: float
    z_crit: float
    sd_ratio: float
    partition: bool
    reason: str


#: Floor of Harris & Boyd's z* (modelling choice of this project, not in [HB]): the published
#: z* = 3 sqrt((n1 + n2)/240) was set for subgroups of about 120; with smaller groups it drops
#: below 3 and splits groups that do not differ (invented null data, 3 breeds x ~43 dogs: about
#: one analyte in four split). Below 240 animals in the pair z* is held at 3.
HB_Z_FLOOR = 3.0


def hb_z_crit(n1: int, n2: int, floor: bool = True) -> float:
    """z* = 3 sqrt((n1 + n2)/240) [HB], held at >= 3 when ``floor`` (see :data:`HB_Z_FLOOR`)."""
    z = 3.0 * math.sqrt((n1 + n2) / 240.0)
    return max(z, HB_Z_FLOOR) if floor else z


def harris_boyd(y1, y2, floor: bool = True) -> HarrisBoyd:
    """Harris & Boyd's test for separate reference intervals [HB], on Gaussian (transformed) data:

    z = |mean1 - mean2| / sqrt(s1^2/n1 + s2^2/n2) against z* = 3 sqrt((n1 + n2)/240)
    (z* = 3 at 120 per group; held at >= 3 for smaller groups unless ``floor=False``); separate
    intervals are also advised when the larger SD exceeds 1.5 times the smaller (the SD-ratio
    criterion of [HB], recalled: from memory).
    """
    y1 = np.asarray(y1, dtype=float)
    y2 = np.asarray(y2, dtype=float)
    n1, n2 = y1.size, y2.size
    s1, s2 = y1.std(ddof=1), y2.std(ddof=1)
    z = abs(y1.mean() - y2.mean()) / math.sqrt(s1 * s1 / n1 + s2 * s2 / n2)
    z_crit = hb_z_crit(n1, n2, floor)
    ratio = max(s1, s2) / min(s1, s2) if min(s1, s2) > 0 else math.inf
    reasons = []
    if z > z_crit:
        reasons.append(f"z = {z:.2f} > z* = {z_crit:.2f}")
    if ratio > 1.5:
        reasons.append(f"SD ratio {ratio:.2f} > 1.5")
    part = bool(reasons)
    if not part:
        reasons.append(f"z = {z:.2f} <= z* = {z_crit:.2f} and SD ratio {ratio:.2f} <= 1.5")
    return HarrisBoyd(float(z), float(z_crit), float(ratio), part, "; ".join(reasons))


def harris_boyd_vec(y1, y2, floor: bool = True):
    """Vectorised [HB] decision over rows of two (R, n1), (R, n2) arrays (for simulations).
    Returns (separate, z, z_crit, sd_ratio)."""
    y1 = np.asarray(y1, dtype=float)
    y2 = np.asarray(y2, dtype=float)
    n1, n2 = y1.shape[-1], y2.shape[-1]
    s1, s2 = y1.std(axis=-1, ddof=1), y2.std(axis=-1, ddof=1)
    z = np.abs(y1.mean(axis=-1) - y2.mean(axis=-1)) / np.sqrt(s1 ** 2 / n1 + s2 ** 2 / n2)
    z_crit = hb_z_crit(n1, n2, floor)
    ratio = np.maximum(s1, s2) / np.minimum(s1, s2)
    return (z > z_crit) | (ratio > 1.5), z, z_crit, ratio


def lahti_outside(y_group, lower: float, upper: float) -> tuple[float, float]:
    """Percent of a subgroup below and above the combined reference limits [Lahti]
    (> 4.1 % on a side suggests partitioning, < 3.2 % combining; in between marginal)."""
    y = np.asarray(y_group, dtype=float)
    return float(100.0 * np.mean(y < lower)), float(100.0 * np.mean(y > upper))


# =========================================================================== summaries

def ci_ratio(ci_low: float, ci_high: float, lower: float, upper: float) -> float:
    """Width of a limit's CI over the interval width [ASVCP] (flag when > 0.2)."""
    width = upper - lower
    if not (np.isfinite(width) and width > 0 and np.isfinite(ci_low) and np.isfinite(ci_high)):
        return float("nan")
    return float((ci_high - ci_low) / width)


def cvg_from_interval(lower: float, upper: float, si: float, sa: float) -> tuple[float, float]:
    """Between-animal CV from a population interval, as the packs derive it (models/dog.toml):

    sG^2 = (ln(upper/lower)/3.92)^2 - sI^2 - sA^2, CVG = sqrt(exp(sG^2) - 1), treating the
    interval as a central 95 % log-normal interval holding between-animal, within-animal and
    analytical variation (3.92 = 2 x 1.96). Returns (cvg fraction or NaN, sG^2) - NaN when
    sG^2 <= 0 (the interval is narrower than within-animal plus analytical variation).
    """
    if not (lower > 0 and upper > lower):
        return float("nan"), float("nan")
    s_tot = math.log(upper / lower) / 3.92
    sg2 = s_tot * s_tot - si * si - sa * sa
    if sg2 <= 0:
        return float("nan"), float(sg2)
    return float(math.sqrt(math.expm1(sg2))), float(sg2)
