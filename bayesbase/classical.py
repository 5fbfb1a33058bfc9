"""Published closed forms of biological variation, numpy/scipy only.

CVs are fractions. Z values come from scipy's exact normal quantile, not rounded tables.

References
----------
.. [Fraser2012] Fraser CG. Reference change values. Clin Chem Lab Med 2012;50:807-812
   (classical RCV = sqrt(2) * Z * sqrt(CVA^2 + CVI^2)).
.. [Fokkema2006] Fokkema MR et al. Reference change values for brain natriuretic peptides
   revisited. Clin Chem 2006;52:1602-1603 (log-normal, asymmetric RCV).
.. [Fraser2011] Fraser CG. Probability of a significant change. Clin Chem 2011;57:1635
   (Z_obs = |d| / (sqrt(2) CVT); a frequentist surprise measure, not a posterior probability).
.. [Harris1974] Harris EK. Effects of intra- and interindividual variation on the appropriate
   use of normal ranges. Clin Chem 1974;20:1535-1542 (index of individuality, CVI/CVG).
.. [Petersen1999] Petersen PH et al. Clin Chem Lab Med 1999;37:655 (II with analytical
   variation, sqrt(CVI^2 + CVA^2)/CVG).
.. [FraserHarris1989] Fraser CG, Harris EK. Generation and application of data on biological
   variation in clinical chemistry. Crit Rev Clin Lab Sci 1989;27:409-437 (II < 0.6 / > 1.4;
   number of results for a set point, n = (Z CVT / D)^2).
.. [Coskun2021] Coskun A et al. Personalized reference intervals. Clin Chem 2021;67:374-384
   (model 2: set point = mean of previous results, CVT * sqrt(1 + 1/n)).
"""
from __future__ import annotations

import numpy as np
from scipy import special  # scipy.stats costs seconds to import; special is enough

__all__ = [
    "z_two_sided",
    "z_one_sided",
    "cvt",
    "rcv_classical",
    "rcv_lognormal",
    "index_of_individuality",
    "ii_category",
    "n_for_setpoint",
    "prob_significant_change",
    "model2_interval",
    "cva_too_high",
    "chance_any_outside",
]


def z_two_sided(level=0.95):
    """Two-sided standard-normal quantile, e.g. 1.95996 for 95 %."""
    return float(special.ndtri(0.5 + level / 2.0))


def z_one_sided(level=0.95):
    """One-sided standard-normal quantile, e.g. 1.64485 for 95 %."""
    return float(special.ndtri(level))


def cvt(cva, cvi, k=1):
    """Total CV of one result around the set point: sqrt(CVA^2 / k + CVI^2), k replicates."""
    cva = np.asarray(cva, float)
    cvi = np.asarray(cvi, float)
    return np.sqrt(cva**2 / k + cvi**2)


def rcv_classical(cva, cvi, z=None, level=0.95, one_sided=False):
    """Classical symmetric RCV (fraction): sqrt(2) * Z * sqrt(CVA^2 + CVI^2) [Fraser2012]."""
    if z is None:
        z = z_one_sided(level) if one_sided else z_two_sided(level)
    return np.sqrt(2.0) * z * cvt(cva, cvi)


def rcv_lognormal(cva, cvi, z=None, level=0.95, one_sided=False):
    """Log-normal RCV (fractions) as (up, down) [Fokkema2006].

    sigma^2 = ln(1 + CVA^2) + ln(1 + CVI^2); up = exp(+Z sqrt(2) sigma) - 1,
    down = exp(-Z sqrt(2) sigma) - 1, so (1 + up)(1 + down) = 1.
    """
    if z is None:
        z = z_one_sided(level) if one_sided else z_two_sided(level)
    sigma = np.sqrt(np.log1p(np.asarray(cva, float) ** 2) + np.log1p(np.asarray(cvi, float) ** 2))
    return np.expm1(z * np.sqrt(2.0) * sigma), np.expm1(-z * np.sqrt(2.0) * sigma)


def index_of_individuality(cvi, cvg, cva=None):
    """Harris's index of individuality, oriented CVI/CVG [Harris1974]; with ``cva`` given,
    sqrt(CVI^2 + CVA^2)/CVG [Petersen1999]. Low (< 0.6): the population interval is
    insensitive to change in one animal. Some papers report the reciprocal (CVG/CVI)."""
    cvi = np.asarray(cvi, float)
    num = cvi if cva is None else np.sqrt(cvi**2 + np.asarray(cva, float) ** 2)
    return num / np.asarray(cvg, float)


def ii_category(ii):
    """Words for Harris's II (CVI/CVG) with the cut-offs 0.6 and 1.4 [FraserHarris1989]."""
    if ii is None or not np.isfinite(ii):
        return "unknown"
    if ii < 0.6:
        return "low"
    if ii > 1.4:
        return "high"
    return "intermediate"


def n_for_setpoint(cva, cvi, d=0.10, level=0.95):
    """Number of results for the set point within +/- d (fraction): ceil((Z CVT / d)^2)
    [FraserHarris1989]. Ignores the population, unlike the Bayesian estimate."""
    z = z_two_sided(level)
    return np.ceil((z * cvt(cva, cvi) / d) ** 2).astype(int)


def prob_significant_change(d, cva, cvi, one_sided=False):
    """Frequentist probability that a relative difference ``d`` (fraction) is significant
    [Fraser2011]: Z_obs = |d| / (sqrt(2) CVT); one-sided Phi(Z), two-sided 2 Phi(Z) - 1.
    A surprise measure, not a posterior probability of true change."""
    z = np.abs(np.asarray(d, float)) / (np.sqrt(2.0) * cvt(cva, cvi))
    p = special.ndtr(z)
    return p if one_sided else 2.0 * p - 1.0


def model2_interval(baselines, cva, cvi, coverage=0.95):
    """Model-2 personal interval on the log scale [Coskun2021]: set point = mean of the ln
    baselines; limits exp(mean +/- Z sigma_T sqrt(1 + 1/n)), sigma_T^2 = ln(1+CVA^2) + ln(1+CVI^2).

    ``baselines`` are values on the original scale (1-D). Returns (lower, upper); NaN without
    baselines.
    """
    x = np.asarray(baselines, float)
    x = x[np.isfinite(x)]
    n = x.size
    if n == 0:
        return float("nan"), float("nan")
    z = z_two_sided(coverage)
    st = np.sqrt(np.log1p(cva**2) + np.log1p(cvi**2))
    m = np.mean(np.log(x))
    h = z * st * np.sqrt(1.0 + 1.0 / n)
    return float(np.exp(m - h)), float(np.exp(m + h))


def cva_too_high(cva, cvi):
    """True where CVA > 0.5 CVI (desirable imprecision, Fraser & Petersen hierarchy, from
    memory for the citation): an RCV built on such a CVA is dominated by the analyser."""
    return np.asarray(cva, float) > 0.5 * np.asarray(cvi, float)


def chance_any_outside(k, level=0.95):
    """P(at least one of k independent results outside a central ``level`` interval) =
    1 - level^k (Clin Chem Lab Med 2004;42:747: k = 10 leaves 60 % with none outside)."""
    return 1.0 - level ** np.asarray(k, float)
