"""Nested random-effects ANOVA of a biological-variation study (numpy/scipy only).

Model on the natural-log scale (animal > specimen > replicate)::

    y_ijk = mu + g_i + b_ij + e_ijk,  g ~ N(0, sG^2), b ~ N(0, sI^2), e ~ N(0, sA^2)

Point estimates: the method of moments (ANOVA estimators) for unbalanced data, with the expected
mean squares of the unbalanced two-fold nested classification (Searle SR, Casella G, McCulloch CE.
Variance Components. Wiley 1992, from memory for the chapter; the coefficients are re-derived in the docstring of :func:`nested_anova` and checked against
statsmodels MixedLM and by simulation in tests/test_study_anova.py)::

    E[MS_A] = sA^2
    E[MS_I] = sA^2 + k1 sI^2
    E[MS_G] = sA^2 + k2 sI^2 + k3 sG^2

with N results, B specimens, I animals, n_ij replicates of specimen j of animal i, n_i = sum_j n_ij:
k1 = (N - sum_ij n_ij^2/n_i)/(B - I), k2 = (sum_ij n_ij^2/n_i - sum_ij n_ij^2/N)/(I - 1),
k3 = (N - sum_i n_i^2/N)/(I - 1). Balanced data: k1 = k2 = R, k3 = S R.

Confidence intervals (95 % by default):

* sA^2: exact chi-square interval on MS_A (df N - B).
* sI^2 = (MS_I - MS_A)/k1: modified large-sample (MLS) interval for a difference of two mean
  squares, Burdick & Graybill 1992 chapter 3 (Ting CP, Burdick RK, Graybill FA, Jeyaratnam S,
  Lu TFC. J Stat Comput Simul 1990;35:135-143), as used for CVI by Roraas et al. Clin Chem
  2012;58:1306. The same algebra appears in Kutner MH et al., Applied Linear Statistical Models,
  5th ed. 2005, chapter 25 (MLS procedure); see :func:`mls_difference` for the equations.
* sG^2 = (MS_G - (k2/k1) MS_I - (1 - k2/k1) MS_A)/k3: the same MLS difference, with the
  subtracted combination of MS_I and MS_A given Satterthwaite's degrees of freedom (Satterthwaite
  FE, Biometrics Bull 1946;2:110-114). Balanced data: k2 = k1 and this is exactly the two-term MLS.

Unbalanced designs: MS_A is still exactly chi-square; MS_I and MS_G are only approximately
scaled chi-square, which is the approximation Roraas 2012 accepts; the coverage of the CVI
interval is checked by simulation in the tests. A CV is sqrt(exp(s^2) - 1).

CV-ANOVA (Roraas T et al. Clin Chem 2016;62:725-736): each result divided by its animal's mean,
then the same nested ANOVA; CVA and CVI are the square roots of the components (CVG is not
defined by it). :func:`cv_anova_transform` does the transform.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import special

from .common import StudyError

__all__ = [
    "AnovaFit",
    "nested_anova",
    "mls_difference",
    "chisq_interval",
    "cv_from_var",
    "var_from_cv",
    "balanced_mean_squares",
    "cv_anova_transform",
    "components_from_ms",
    "masked_anova",
]


def cv_from_var(v):
    """CV (fraction) of a log-normal with log-variance ``v``: sqrt(exp(v) - 1); NaN stays NaN."""
    v = np.asarray(v, float)
    return np.sqrt(np.expm1(np.clip(v, 0.0, None)))


def var_from_cv(cv):
    """Log-variance of a CV (fraction): ln(1 + CV^2) (project convention, DEVELOPERS.md)."""
    cv = np.asarray(cv, float)
    return np.log1p(cv * cv)


def chisq_interval(ms, df, ci_prob=0.95):
    """Exact interval for a variance estimated by a mean square with ``df`` degrees of freedom:
    [df MS / chi2_{upper a/2}, df MS / chi2_{lower a/2}] (normal theory)."""
    a = 1.0 - ci_prob
    ms = np.asarray(ms, float)
    df = np.asarray(df, float)
    # scipy.special.chdtri(df, q) is the upper-q chi-square quantile (= scipy.stats.chi2.isf)
    return df * ms / special.chdtri(df, a / 2), df * ms / special.chdtri(df, 1.0 - a / 2)


def mls_difference(c1, ms1, df1, c2, ms2, df2, ci_prob=0.95):
    """Modified large-sample interval for theta = c1 MS1 - c2 MS2 (c1, c2 > 0), vectorised.

    Burdick & Graybill 1992, chapter 3 (Ting et al. 1990); with a = (1 - ci_prob)/2, upper-tail
    quantiles F_{a: n, m} (area a to the right) and F_{a: n, inf} = chi2_{a: n}/n:

    G1 = 1 - 1/F_{a: df1, inf},   H1 = 1/F_{1-a: df1, inf} - 1
    G2 = 1 - 1/F_{a: df2, inf},   H2 = 1/F_{1-a: df2, inf} - 1
    F_hi = F_{a: df1, df2},       F_lo = F_{1-a: df1, df2}
    G12 = [(F_hi - 1)^2 - G1^2 F_hi^2 - H2^2] / F_hi
    H12 = [(1 - F_lo)^2 - H1^2 F_lo^2 - G2^2] / F_lo
    V_L = G1^2 c1^2 MS1^2 + H2^2 c2^2 MS2^2 + G12 c1 c2 MS1 MS2
    V_U = H1^2 c1^2 MS1^2 + G2^2 c2^2 MS2^2 + H12 c1 c2 MS1 MS2
    lower = theta - sqrt(V_L), upper = theta + sqrt(V_U)

    (identical algebra to Kutner et al. 2005, chapter 25). Lower limits below 0 are returned as
    0 (a variance). As MS2 -> 0 the limits become the exact chi-square limits of c1 MS1.
    """
    a = (1.0 - ci_prob) / 2.0
    c1, ms1, df1, c2, ms2, df2 = (np.asarray(x, float) for x in (c1, ms1, df1, c2, ms2, df2))
    # quantiles through scipy.special (fast scalar calls): chdtri(df, q) = chi2.isf(q, df),
    # fdtri(d1, d2, p) = f.ppf(p, d1, d2)
    g1 = 1.0 - df1 / special.chdtri(df1, a)
    h1 = df1 / special.chdtri(df1, 1.0 - a) - 1.0
    g2 = 1.0 - df2 / special.chdtri(df2, a)
    h2 = df2 / special.chdtri(df2, 1.0 - a) - 1.0
    f_hi = special.fdtri(df1, df2, 1.0 - a)
    f_lo = special.fdtri(df1, df2, a)
    g12 = ((f_hi - 1.0) ** 2 - g1**2 * f_hi**2 - h2**2) / f_hi
    h12 = ((1.0 - f_lo) ** 2 - h1**2 * f_lo**2 - g2**2) / f_lo
    t1 = c1 * ms1
    t2 = c2 * ms2
    theta = t1 - t2
    vl = g1**2 * t1**2 + h2**2 * t2**2 + g12 * t1 * t2
    vu = h1**2 * t1**2 + g2**2 * t2**2 + h12 * t1 * t2
    lower = theta - np.sqrt(np.clip(vl, 0.0, None))
    upper = theta + np.sqrt(np.clip(vu, 0.0, None))
    return np.clip(lower, 0.0, None), np.clip(upper, 0.0, None)


@dataclass(frozen=True)
class AnovaFit:
    """Nested ANOVA of one analyte on the log scale.

    ``var`` / ``lower`` / ``upper`` are the log-scale variances (sA^2, sI^2, sG^2) and their
    confidence limits; ``cv`` / ``cv_lower`` / ``cv_upper`` the same as CVs (fractions) in the
    order (cva, cvi, cvg). ``truncated`` names components whose moment estimate was negative and
    was set to 0.
    """

    ms: dict[str, float]
    df: dict[str, float]
    k: tuple[float, float, float]
    var: dict[str, float]
    lower: dict[str, float]
    upper: dict[str, float]
    n_animals: int
    n_specimens: int
    n_results: int
    balanced: bool
    ci_prob: float
    truncated: tuple[str, ...] = field(default=())
    raw_var: dict[str, float] = field(default_factory=dict)

    @property
    def cv(self) -> dict[str, float]:
        return {c: float(cv_from_var(self.var[c])) for c in ("cva", "cvi", "cvg")}

    @property
    def cv_lower(self) -> dict[str, float]:
        return {c: float(cv_from_var(self.lower[c])) for c in ("cva", "cvi", "cvg")}

    @property
    def cv_upper(self) -> dict[str, float]:
        return {c: float(cv_from_var(self.upper[c])) for c in ("cva", "cvi", "cvg")}


def _codes(x) -> np.ndarray:
    return np.unique(np.asarray(x), return_inverse=True)[1].ravel()


def nested_anova(animal, specimen, y, ci_prob: float = 0.95, label: str = "data") -> AnovaFit:
    """Method-of-moments nested ANOVA with confidence intervals (see the module docstring).

    ``animal`` and ``specimen`` are labels or codes per result (a specimen label must belong to
    one animal); ``y`` the log values. Raises :class:`StudyError` naming ``label`` when the design
    leaves a level without degrees of freedom.

    Expected mean squares (derivation): with B_i = sum_j (n_ij/n_i) b_ij,
    E sum_ij n_ij (ybar_ij - ybar_i)^2 = (N - sum n_ij^2/n_i) sI^2 + (B - I) sA^2 and
    E sum_i n_i (ybar_i - ybar)^2 = (N - sum n_i^2/N) sG^2 + (sum n_ij^2/n_i - sum n_ij^2/N) sI^2
    + (I - 1) sA^2, which give k1, k2, k3 above.
    """
    y = np.asarray(y, float).ravel()
    if y.size == 0:
        raise StudyError(f"{label}: no results to analyse")
    if not np.all(np.isfinite(y)):
        raise StudyError(f"{label}: log values must be finite")
    a = _codes(animal)
    s = _codes(specimen)
    n_res = y.size
    n_spec = int(s.max()) + 1
    n_anim = int(a.max()) + 1
    # specimen -> animal (must be unique)
    spec_animal = np.full(n_spec, -1)
    spec_animal[s] = a
    if np.any(spec_animal[s] != a):
        raise StudyError(f"{label}: a specimen id is shared by two animals (specimens are nested in animals)")
    n_ij = np.bincount(s, minlength=n_spec).astype(float)
    ybar_ij = np.bincount(s, y, minlength=n_spec) / n_ij
    n_i = np.bincount(spec_animal, n_ij, minlength=n_anim)
    ybar_i = np.bincount(a, y, minlength=n_anim) / n_i
    ybar = y.mean()
    df_a = n_res - n_spec
    df_i = n_spec - n_anim
    df_g = n_anim - 1
    problems = []
    if df_a < 1:
        problems.append("no specimen has two or more replicates, so the analytical variation (CVA) "
                        "cannot be separated")
    if df_i < 1:
        problems.append("no animal has two or more specimens, so CVI cannot be estimated")
    if df_g < 1:
        problems.append("only one animal, so CVG cannot be estimated")
    if problems:
        raise StudyError(f"{label}: " + "; ".join(problems))
    ss_a = float(np.sum((y - ybar_ij[s]) ** 2))
    ss_i = float(np.sum(n_ij * (ybar_ij - ybar_i[spec_animal]) ** 2))
    ss_g = float(np.sum(n_i * (ybar_i - ybar) ** 2))
    ms_a, ms_i, ms_g = ss_a / df_a, ss_i / df_i, ss_g / df_g
    s_nij2_ni = float(np.sum(n_ij**2 / n_i[spec_animal]))
    k1 = (n_res - s_nij2_ni) / df_i
    k2 = (s_nij2_ni - float(np.sum(n_ij**2)) / n_res) / df_g
    k3 = (n_res - float(np.sum(n_i**2)) / n_res) / df_g
    var, lower, upper, raw = components_from_ms(ms_a, ms_i, ms_g, df_a, df_i, df_g, k1, k2, k3, ci_prob)
    var = {c: float(v) for c, v in var.items()}
    raw = {c: float(v) for c, v in raw.items()}
    truncated = tuple(c for c, v in raw.items() if v < 0)
    balanced = bool(np.all(n_ij == n_ij[0]) and np.all(np.bincount(spec_animal) == np.bincount(spec_animal)[0]))
    return AnovaFit(
        ms={"cva": ms_a, "cvi": ms_i, "cvg": ms_g},
        df={"cva": float(df_a), "cvi": float(df_i), "cvg": float(df_g)},
        k=(k1, k2, k3),
        var=var,
        lower={c: float(v) for c, v in lower.items()},
        upper={c: float(v) for c, v in upper.items()},
        n_animals=n_anim, n_specimens=n_spec, n_results=n_res, balanced=balanced,
        ci_prob=ci_prob, truncated=truncated, raw_var=raw,
    )


def components_from_ms(ms_a, ms_i, ms_g, df_a, df_i, df_g, k1, k2, k3, ci_prob=0.95):
    """Variance components, truncated at 0, with their confidence limits from the mean squares
    (vectorised; the equations of the module docstring). Returns (var, lower, upper, raw) dicts
    keyed cva / cvi / cvg; ``raw`` holds the untruncated moment estimates."""
    ms_a, ms_i, ms_g, df_a, df_i, df_g, k1, k2, k3 = (
        np.asarray(x, float) for x in (ms_a, ms_i, ms_g, df_a, df_i, df_g, k1, k2, k3))
    r = k2 / k1
    raw = {
        "cva": ms_a,
        "cvi": (ms_i - ms_a) / k1,
        "cvg": (ms_g - r * ms_i - (1.0 - r) * ms_a) / k3,
    }
    var = {c: np.clip(v, 0.0, None) for c, v in raw.items()}
    lo_a, up_a = chisq_interval(ms_a, df_a, ci_prob)
    lo_i, up_i = mls_difference(1.0 / k1, ms_i, df_i, 1.0 / k1, ms_a, df_a, ci_prob)
    # animal level: subtract T = r MS_I + (1 - r) MS_A with Satterthwaite df (exactly MS_I, df_I
    # and so the two-term MLS when r = 1, i.e. balanced data)
    exact = np.abs(1.0 - r) < 1e-12
    t = np.where(exact, ms_i, r * ms_i + (1.0 - r) * ms_a)
    with np.errstate(divide="ignore", invalid="ignore"):
        df_t = np.where(exact, df_i, t**2 / ((r * ms_i) ** 2 / df_i + ((1.0 - r) * ms_a) ** 2 / df_a))
    t = np.clip(t, 1e-300, None)
    df_t = np.where(np.isfinite(df_t) & (df_t > 0), df_t, df_i)
    lo_g, up_g = mls_difference(1.0 / k3, ms_g, df_g, 1.0 / k3, t, df_t, ci_prob)
    lower = {"cva": lo_a, "cvi": lo_i, "cvg": lo_g}
    upper = {"cva": up_a, "cvi": up_i, "cvg": up_g}
    return var, lower, upper, raw


def masked_anova(y, mask, ci_prob=0.95):
    """:func:`nested_anova` of many studies at once: y[..., I, S, R] with a boolean ``mask`` of
    the results present (missing replicates, specimens or animals), vectorised over the leading
    axes. Returns (var, lower, upper) dicts of arrays, the same numbers as :func:`nested_anova`
    study by study (tested). Each study needs at least one duplicate, two specimens in an animal
    and two animals."""
    y = np.asarray(y, float)
    m = np.asarray(mask, bool)
    w = m.astype(float)
    yw = np.where(m, y, 0.0)
    n_ij = w.sum(-1)
    n_i = n_ij.sum(-1)
    n = n_i.sum(-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ybar_ij = yw.sum(-1) / n_ij
        ybar_i = yw.sum((-2, -1)) / n_i
        ybar = yw.sum((-3, -2, -1)) / n
        ss_a = (w * (y - np.nan_to_num(ybar_ij)[..., None]) ** 2).sum((-3, -2, -1))
        ss_i = (n_ij * np.nan_to_num(ybar_ij - ybar_i[..., None]) ** 2).sum((-2, -1))
        ss_g = (n_i * np.nan_to_num(ybar_i - ybar[..., None]) ** 2).sum(-1)
        b = (n_ij > 0).sum((-2, -1))
        a = (n_i > 0).sum(-1)
        df_a, df_i, df_g = n - b, b - a, a - 1
        s_nij2_ni = np.nan_to_num(n_ij**2 / n_i[..., None]).sum((-2, -1))
        k1 = (n - s_nij2_ni) / df_i
        k2 = (s_nij2_ni - (n_ij**2).sum((-2, -1)) / n) / df_g
        k3 = (n - (n_i**2).sum(-1) / n) / df_g
        ms_a, ms_i, ms_g = ss_a / df_a, ss_i / df_i, ss_g / df_g
    if np.any((df_a < 1) | (df_i < 1) | (df_g < 1)):
        raise StudyError("masked_anova: a study has a level without degrees of freedom")
    var, lower, upper, _ = components_from_ms(ms_a, ms_i, ms_g, df_a, df_i, df_g, k1, k2, k3, ci_prob)
    return var, lower, upper


def balanced_mean_squares(y):
    """Mean squares (MS_A, MS_I, MS_G) of balanced arrays y[..., I, S, R], vectorised over the
    leading axes (the balanced formulas of the module docstring, k1 = k2 = R, k3 = S R)."""
    y = np.asarray(y, float)
    n_i, n_s, n_r = y.shape[-3:]
    ybar_ij = y.mean(axis=-1)
    ybar_i = ybar_ij.mean(axis=-1)
    ybar = ybar_i.mean(axis=-1)
    ms_a = ((y - ybar_ij[..., None]) ** 2).sum(axis=(-3, -2, -1)) / (n_i * n_s * (n_r - 1))
    ms_i = n_r * ((ybar_ij - ybar_i[..., None]) ** 2).sum(axis=(-2, -1)) / (n_i * (n_s - 1))
    ms_g = n_s * n_r * ((ybar_i - ybar[..., None]) ** 2).sum(axis=-1) / (n_i - 1)
    return ms_a, ms_i, ms_g


def cv_anova_transform(animal, value) -> np.ndarray:
    """CV-ANOVA transform (Roraas 2016): each value divided by the mean of its animal's values
    (original scale); the nested ANOVA of the result gives CVA^2 and CVI^2 directly."""
    a = _codes(animal)
    v = np.asarray(value, float)
    means = np.bincount(a, v) / np.bincount(a)
    return v / means[a]
