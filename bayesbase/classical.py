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
.. [Coskun2021] Coskun A, Sandberg S, Unsal I, et al. Personalized reference intervals in
   laboratory medicine: a new model based on within-subject biological variation. Clin Chem
   2021;67:374-384, doi:10.1093/clinchem/hvaa233 (model 2: homeostatic set point HSP = the
   arithmetic mean of the n previous results; limits HSP +/- Z * sqrt(1 + 1/n) * CVT * HSP, with
   the database CVI; Z, not t, because CVI is not estimated from the animal's own results -
   Coskun A et al., Clin Chem Lab Med 2022;60:629-635, which keeps t for the within-person model).
   The 2021 abstract (read) describes the model; the formula and the Z/t split are as restated
   in the project's method notes (from memory there) and agree with an independent research
   implementation read here; the primary paper's equations were not read, and no published
   worked example with numbers was found, so the tests check the formula, its n = 1 identity
   with the 2.77 x CVT RCV and its coverage by simulation.

Change against the mean of n baselines
--------------------------------------
The RCV and the probability of a significant change compare two single results: the difference
of two independent results has variance 2 sigma^2, hence the factor sqrt(2). Laboratories apply
the same factor when the comparison is against the mean of several earlier results (the
*laboratory convention*, the default here). The difference between one new result and the mean
of n earlier ones has variance (1 + 1/n) sigma^2 (the variance of a mean of n independent results
is sigma^2 / n), so the exact factor is sqrt(1 + 1/n): pass ``n_mean=n``. With n = 1 the two agree;
for n > 1 the convention is conservative (its false-alarm rate is below the nominal one:
2 (1 - Phi(Z sqrt(2) / sqrt(1 + 1/n))), about 2.4 % for n = 2 and 1.1 % for n = 5 at a nominal
5 %). The exact rule against the arithmetic mean is the model-2 personal interval of
[Coskun2021]; the exact log-normal rule against the geometric mean is its log form.
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
    "pair_factor",
    "model2_interval",
    "model2_intervals",
    "model2_interval_log",
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


def pair_factor(n_mean=None):
    """Factor of the SD of a difference in units of one result's SD.

    ``None``: two single results, sqrt(2) (the laboratory convention, also used against a mean);
    ``n_mean = n``: one result against the mean of n independent results, sqrt(1 + 1/n) exactly.
    n may be an array; n < 1 gives NaN (no baseline, nothing to compare with).
    """
    if n_mean is None:
        return np.sqrt(2.0)
    n = np.asarray(n_mean, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(n >= 1, np.sqrt(1.0 + 1.0 / np.where(n >= 1, n, 1.0)), np.nan)


def _z(z, level, one_sided):
    if z is not None:
        return z
    return z_one_sided(level) if one_sided else z_two_sided(level)


def rcv_classical(cva, cvi, z=None, level=0.95, one_sided=False, n_mean=None):
    """Classical symmetric RCV (fraction): sqrt(2) * Z * sqrt(CVA^2 + CVI^2) [Fraser2012].

    ``n_mean``: compare against the arithmetic mean of that many baselines with the exact factor
    sqrt(1 + 1/n) instead of sqrt(2) (see the module notes; None keeps the laboratory convention).
    """
    return pair_factor(n_mean) * _z(z, level, one_sided) * cvt(cva, cvi)


def rcv_lognormal(cva, cvi, z=None, level=0.95, one_sided=False, n_mean=None):
    """Log-normal RCV (fractions) as (up, down) [Fokkema2006].

    sigma^2 = ln(1 + CVA^2) + ln(1 + CVI^2); up = exp(+Z sqrt(2) sigma) - 1,
    down = exp(-Z sqrt(2) sigma) - 1, so (1 + up)(1 + down) = 1. ``n_mean``: against the
    geometric mean of n baselines, with sqrt(1 + 1/n) in place of sqrt(2) (exact on the log scale).
    """
    sigma = np.sqrt(np.log1p(np.asarray(cva, float) ** 2) + np.log1p(np.asarray(cvi, float) ** 2))
    h = _z(z, level, one_sided) * pair_factor(n_mean) * sigma
    return np.expm1(h), np.expm1(-h)


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


def n_for_setpoint(cva, cvi, d=0.10, level=0.95, rounding="ceil"):
    """Number of results for the set point within +/- d (fraction): n = (Z CVT / d)^2
    [FraserHarris1989]. Ignores the population, unlike the Bayesian estimate.

    ``rounding="ceil"`` (default, our choice): the smallest n whose mean is within +/- d, i.e.
    Z CVT / sqrt(n) <= d. ``rounding="nearest"`` reproduces the published veterinary examples,
    which round to the nearest integer (canine fructosamine 20.1 -> 20 at d = 5 %, Vet Res
    Commun 1999;23:73; canine TSH 40.3 -> 40, Vet Clin Pathol 1999, d = 5 % being our reading),
    at the price of a mean that can miss +/- d by a little (20 results give +/- 5.02 % for the
    fructosamine example). The table column keeps the default.
    """
    raw = (z_two_sided(level) * cvt(cva, cvi) / d) ** 2
    if rounding == "ceil":
        return np.ceil(raw).astype(int)
    if rounding == "nearest":
        return np.maximum(np.floor(raw + 0.5), 1).astype(int)
    raise ValueError(f"rounding must be 'ceil' or 'nearest', not {rounding!r}")


def prob_significant_change(d, cva, cvi, one_sided=False, n_mean=None):
    """Frequentist probability that a relative difference ``d`` (fraction) is significant
    [Fraser2011]: Z_obs = |d| / (sqrt(2) CVT); one-sided Phi(Z), two-sided 2 Phi(Z) - 1.
    A surprise measure, not a posterior probability of true change. ``n_mean``: ``d`` is taken
    against the arithmetic mean of n baselines and sqrt(1 + 1/n) replaces sqrt(2) (exact form).
    """
    z = np.abs(np.asarray(d, float)) / (pair_factor(n_mean) * cvt(cva, cvi))
    p = special.ndtr(z)
    return p if one_sided else 2.0 * p - 1.0


def model2_interval(baselines, cva, cvi, coverage=0.95, form="arithmetic"):
    """Model-2 personal reference interval [Coskun2021] from the animal's previous results.

    ``form="arithmetic"`` (default, the published form): set point HSP = arithmetic mean of the
    n baselines; limits HSP * (1 -/+ Z sqrt(1 + 1/n) CVT), CVT = sqrt(CVA^2 + CVI^2). A lower
    limit below 0 (only when Z sqrt(1 + 1/n) CVT > 1, i.e. very large CVs) is returned as 0: a
    concentration cannot be negative.

    ``form="log"`` (our log-normal adaptation, also :func:`model2_interval_log`): set point =
    mean of the ln baselines (geometric mean); limits exp(mean -/+ Z sigma_T sqrt(1 + 1/n)),
    sigma_T^2 = ln(1 + CVA^2) + ln(1 + CVI^2); never negative, asymmetric like the log-normal RCV.

    A new result lies outside the arithmetic interval exactly when its change from the
    arithmetic mean exceeds :func:`rcv_classical` with ``n_mean=n``, and outside the log interval
    exactly when its change from the geometric mean exceeds :func:`rcv_lognormal` with
    ``n_mean=n``. ``baselines`` are values on the original scale (1-D). Returns (lower, upper);
    NaN without baselines.
    """
    lo, hi = model2_intervals(np.asarray(baselines, float)[None, :], cva, cvi, coverage, form)
    return float(lo[0]), float(hi[0])


def model2_intervals(baselines, cva, cvi, coverage=0.95, form="arithmetic"):
    """:func:`model2_interval` of many cases at once: ``baselines`` (C, J) on the original scale,
    NaN where a case has fewer than J results; ``cva``, ``cvi`` scalars or (C,). Returns (lower,
    upper) arrays of shape (C,), NaN for a case without a finite baseline."""
    if form not in ("arithmetic", "log"):
        raise ValueError(f"form must be 'arithmetic' or 'log', not {form!r}")
    x = np.asarray(baselines, float)
    ok = np.isfinite(x)
    n = ok.sum(axis=1)
    has = n > 0
    nn = np.where(has, n, 1)
    z = z_two_sided(coverage)
    with np.errstate(invalid="ignore", divide="ignore"):
        if form == "log":
            st = np.sqrt(np.log1p(np.asarray(cva, float) ** 2) + np.log1p(np.asarray(cvi, float) ** 2))
            m = np.where(ok, np.log(np.where(ok, x, 1.0)), 0.0).sum(axis=1) / nn
            h = z * st * np.sqrt(1.0 + 1.0 / nn)
            lo, hi = np.exp(m - h), np.exp(m + h)
        else:
            hsp = np.where(ok, x, 0.0).sum(axis=1) / nn
            k = rcv_classical(cva, cvi, z=z, n_mean=nn)
            lo, hi = np.maximum(hsp * (1.0 - k), 0.0), hsp * (1.0 + k)
    lo = np.where(has, lo, np.nan)
    hi = np.where(has, hi, np.nan)
    return lo, hi


def model2_interval_log(baselines, cva, cvi, coverage=0.95):
    """Log form of the model-2 interval: ``model2_interval(..., form="log")``."""
    return model2_interval(baselines, cva, cvi, coverage=coverage, form="log")


def cva_too_high(cva, cvi):
    """True where CVA > 0.5 CVI (desirable imprecision, Fraser & Petersen hierarchy, from
    memory for the citation): an RCV built on such a CVA is dominated by the analyser."""
    return np.asarray(cva, float) > 0.5 * np.asarray(cvi, float)


def chance_any_outside(k, level=0.95):
    """P(at least one of k independent results outside a central ``level`` interval) =
    1 - level^k (Clin Chem Lab Med 2004;42:747: k = 10 leaves 60 % with none outside)."""
    return 1.0 - level ** np.asarray(k, float)
