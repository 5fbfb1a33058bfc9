"""Nested ANOVA of a biological-variation study (bayesbase.study.anova) against outside checks:
a hand-checkable balanced example, statsmodels MixedLM (REML), scipy's chi-square/F quantiles,
and the coverage of the 95 % CVI interval on 500 seeded simulated studies."""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from bayesbase.study.anova import (
    balanced_mean_squares,
    chisq_interval,
    cv_anova_transform,
    cv_from_var,
    masked_anova,
    mls_difference,
    nested_anova,
    var_from_cv,
)
from bayesbase.study.common import StudyError
from bayesbase.study.plan import simulate_balanced


def _design(n_animals, n_specimens, n_replicates):
    a, s, _ = np.meshgrid(np.arange(n_animals), np.arange(n_specimens), np.arange(n_replicates), indexing="ij")
    return a.ravel(), (a * 1000 + s).ravel()


def test_toy_example_by_hand():
    """Hand-checkable balanced example (methods reference, section 6, derived): animal 1 =
    [[10, 11], [12, 12]], animal 2 = [[20, 21], [19, 20]] gives MS_A 0.375, MS_I 1.625,
    MS_G 153.125, var_I 0.625, var_G 37.875."""
    y = np.array([10, 11, 12, 12, 20, 21, 19, 20.0])
    f = nested_anova([0, 0, 0, 0, 1, 1, 1, 1], [0, 0, 1, 1, 2, 2, 3, 3], y)
    assert f.ms["cva"] == pytest.approx(0.375)
    assert f.ms["cvi"] == pytest.approx(1.625)
    assert f.ms["cvg"] == pytest.approx(153.125)
    assert f.var["cvi"] == pytest.approx(0.625)
    assert f.var["cvg"] == pytest.approx(37.875)
    assert f.k == pytest.approx((2.0, 2.0, 4.0))
    assert f.balanced


def test_cv_conversion_is_the_lognormal_identity():
    """CV = sqrt(exp(s^2) - 1) inverts s^2 = ln(1 + CV^2) (DEVELOPERS.md convention); check
    against the CV of scipy's log-normal (std/mean)."""
    for cv in (0.02, 0.1, 0.5):
        s2 = float(var_from_cv(cv))
        d = stats.lognorm(s=np.sqrt(s2))
        assert float(cv_from_var(s2)) == pytest.approx(d.std() / d.mean(), rel=1e-12)


def _mixedlm(df):
    """statsmodels MixedLM, REML: random animal intercept + specimen variance component. The
    log values are centred and scaled by 20 so that no component is below statsmodels' fixed
    0.01 'boundary' warning threshold (REML is scale-equivariant; variances divide by 400)."""
    import statsmodels.formula.api as smf

    c = 20.0
    d = df.assign(z=(df["y"] - df["y"].mean()) * c)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no silent convergence problem in the reference fit
        m = smf.mixedlm("z ~ 1", d, groups="animal", re_formula="1", vc_formula={"specimen": "0 + C(specimen)"})
        r = m.fit(reml=True, method="bfgs", gtol=1e-8, maxiter=5000)
    return {"cvg": float(r.cov_re.iloc[0, 0]) / c**2, "cvi": float(r.vcomp[0]) / c**2, "cva": float(r.scale) / c**2}


@pytest.mark.parametrize("seed", [0, 1])
def test_balanced_components_equal_statsmodels_reml(seed):
    """On balanced data with positive estimates, ANOVA = REML (Searle et al. 1992): statsmodels
    MixedLM (REML) is the reference, to 1e-6 on the log-variance scale."""
    pytest.importorskip("statsmodels")
    rng = np.random.default_rng(seed)
    y, _ = simulate_balanced(1, 12, 6, 2, 0.03, 0.10, 0.25, rng, mu=4.5)
    a, s = _design(12, 6, 2)
    df = pd.DataFrame({"animal": a, "specimen": s, "y": y.ravel()})
    f = nested_anova(df["animal"], df["specimen"], df["y"])
    ref = _mixedlm(df)
    for c in ("cva", "cvi", "cvg"):
        assert f.var[c] == pytest.approx(ref[c], abs=1e-6), c


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_unbalanced_components_agree_closely_with_statsmodels_reml(seed):
    """Unbalanced (6 % of results missing at random): ANOVA and REML are different estimators
    but agree closely; CVs within 5 % (relative) of statsmodels MixedLM REML."""
    pytest.importorskip("statsmodels")
    rng = np.random.default_rng(100 + seed)
    y, _ = simulate_balanced(1, 12, 6, 2, 0.03, 0.10, 0.25, rng, mu=4.5)
    a, s = _design(12, 6, 2)
    keep = rng.random(a.size) > 0.06
    df = pd.DataFrame({"animal": a[keep], "specimen": s[keep], "y": y.ravel()[keep]})
    f = nested_anova(df["animal"], df["specimen"], df["y"])
    assert not f.balanced
    ref = _mixedlm(df)
    for c in ("cva", "cvi", "cvg"):
        assert float(cv_from_var(f.var[c])) == pytest.approx(float(cv_from_var(ref[c])), rel=0.05), c


def test_unbalanced_moment_estimators_are_unbiased():
    """The unbalanced coefficients k1, k2, k3 make the moment estimators unbiased (their defining
    property): mean over 400 seeded simulated unbalanced studies within 4 Monte Carlo SEs of the
    simulated variances."""
    rng = np.random.default_rng(11)
    n = 400
    y, _ = simulate_balanced(n, 8, 5, 2, 0.05, 0.10, 0.20, rng)
    mask = rng.random(y.shape) > 0.2
    mask[..., 0, 0, :] = True  # every study keeps a duplicate
    var, _, _ = masked_anova(y, mask)
    for c, cv in (("cva", 0.05), ("cvi", 0.10), ("cvg", 0.20)):
        est = var[c]
        se = est.std(ddof=1) / np.sqrt(n)
        assert abs(est.mean() - float(var_from_cv(cv))) < 4 * se + 0.02 * float(var_from_cv(cv)), c


def test_masked_anova_equals_nested_anova_study_by_study():
    rng = np.random.default_rng(3)
    y, _ = simulate_balanced(4, 6, 4, 3, 0.03, 0.1, 0.25, rng)
    mask = rng.random(y.shape) > 0.15
    var, lo, up = masked_anova(y, mask)
    a, s, _ = np.meshgrid(np.arange(6), np.arange(4), np.arange(3), indexing="ij")
    for k in range(4):
        m = mask[k]
        f = nested_anova(a[m], a[m] * 10 + s[m], y[k][m])
        for c in ("cva", "cvi", "cvg"):
            assert f.var[c] == pytest.approx(var[c][k], rel=1e-10, abs=1e-15)
            assert f.lower[c] == pytest.approx(lo[c][k], rel=1e-10, abs=1e-15)
            assert f.upper[c] == pytest.approx(up[c][k], rel=1e-10, abs=1e-15)


def test_chisq_interval_is_the_exact_normal_theory_interval():
    """CVA interval: df MS / chi2 quantiles (scipy.stats.chi2), checked by its exact coverage:
    P(lower <= s2 <= upper) = P(chi2_{a/2} <= df MS/s2 <= chi2_{1-a/2}) = 0.95."""
    lo, up = chisq_interval(2.0, 10)
    assert lo == pytest.approx(10 * 2.0 / stats.chi2.ppf(0.975, 10))
    assert up == pytest.approx(10 * 2.0 / stats.chi2.ppf(0.025, 10))
    rng = np.random.default_rng(5)
    ms = rng.chisquare(10, 200_000) / 10
    lo, up = chisq_interval(ms, 10)
    assert np.mean((lo <= 1) & (1 <= up)) == pytest.approx(0.95, abs=0.003)


def test_mls_interval_reduces_to_the_exact_interval_when_the_subtracted_term_vanishes():
    """The 'modified' property of the MLS interval (Burdick & Graybill 1992, chapter 3): with
    c2 MS2 -> 0 the limits are the exact chi-square limits of c1 MS1."""
    lo, up = mls_difference(0.5, 3.0, 20, 0.5, 1e-12, 40)
    elo, eup = chisq_interval(1.5, 20)
    assert lo == pytest.approx(elo, rel=1e-9)
    assert up == pytest.approx(eup, rel=1e-9)


def test_mls_interval_matches_the_published_algebra():
    """Term-by-term recomputation with scipy quantiles in the notation of Kutner MH et al.,
    Applied Linear Statistical Models, 5th ed. 2005, chapter 25 (MLS procedure), where
    f1 = F(1 - a/2; df1, inf) = chi2(1 - a/2; df1)/df1 and f3 = F(1 - a/2; inf, df1) =
    1/F(a/2; df1, inf) (the reciprocal identity of the F distribution)."""
    ms1, df1, c1, ms2, df2, c2 = 0.0210, 60, 0.5, 0.0011, 72, 0.5
    a = 0.05
    f1, f2 = stats.chi2.ppf(1 - a / 2, df1) / df1, stats.chi2.ppf(1 - a / 2, df2) / df2
    f3, f4 = df1 / stats.chi2.ppf(a / 2, df1), df2 / stats.chi2.ppf(a / 2, df2)
    f5, f6 = stats.f.ppf(1 - a / 2, df1, df2), stats.f.ppf(1 - a / 2, df2, df1)
    g1, g2 = 1 - 1 / f1, 1 - 1 / f2
    g3 = ((f5 - 1) ** 2 - (g1 * f5) ** 2 - (f4 - 1) ** 2) / f5
    g4 = f6 * (((f6 - 1) / f6) ** 2 - ((f3 - 1) / f6) ** 2 - g2**2)
    est = c1 * ms1 - c2 * ms2
    hl = np.sqrt((g1 * c1 * ms1) ** 2 + ((f4 - 1) * c2 * ms2) ** 2 + g3 * c1 * c2 * ms1 * ms2)
    hu = np.sqrt(((f3 - 1) * c1 * ms1) ** 2 + (g2 * c2 * ms2) ** 2 + g4 * c1 * c2 * ms1 * ms2)
    lo, up = mls_difference(c1, ms1, df1, c2, ms2, df2)
    assert lo == pytest.approx(est - hl, rel=1e-10)
    assert up == pytest.approx(est + hu, rel=1e-10)


def _binomial_band(n, p=0.95, level=0.99):
    lo, hi = stats.binom.ppf([(1 - level) / 2, 1 - (1 - level) / 2], n, p)
    return lo / n, hi / n


@pytest.mark.parametrize("seed", [1, 2])
def test_cvi_interval_coverage_balanced_500_studies(seed):
    """Coverage of the 95 % CVI interval on 500 seeded simulated balanced studies (12 x 6 x 2)
    lies inside the 99 % binomial band around 0.95 (scipy.stats.binom), also for CVA and CVG."""
    rng = np.random.default_rng(seed)
    y, _ = simulate_balanced(500, 12, 6, 2, 0.03, 0.10, 0.25, rng)
    ms_a, ms_i, ms_g = balanced_mean_squares(y)
    lo, up = mls_difference(0.5, ms_i, 60, 0.5, ms_a, 72)
    band = _binomial_band(500)
    cov = np.mean((lo <= var_from_cv(0.10)) & (var_from_cv(0.10) <= up))
    assert band[0] <= cov <= band[1], cov
    var, lower, upper = masked_anova(y, np.ones(y.shape, bool))
    for c, cv in (("cva", 0.03), ("cvi", 0.10), ("cvg", 0.25)):
        cov = np.mean((lower[c] <= var_from_cv(cv)) & (var_from_cv(cv) <= upper[c]))
        assert band[0] <= cov <= band[1], (c, cov)


def test_cvi_interval_coverage_unbalanced_500_studies():
    """Unbalanced designs (8 % of results missing at random): coverage of the 95 % CVI and CVG
    intervals inside the 99 % binomial band on 500 seeded simulated studies."""
    rng = np.random.default_rng(7)
    y, _ = simulate_balanced(500, 12, 6, 2, 0.03, 0.10, 0.25, rng)
    mask = rng.random(y.shape) > 0.08
    var, lower, upper = masked_anova(y, mask)
    band = _binomial_band(500)
    for c, cv in (("cvi", 0.10), ("cvg", 0.25), ("cva", 0.03)):
        cov = np.mean((lower[c] <= var_from_cv(cv)) & (var_from_cv(cv) <= upper[c]))
        assert band[0] <= cov <= band[1], (c, cov)


def test_classical_cvi_interval_undercovers_when_cvi_differs_between_animals():
    """With heterogeneous CVI (ln CVI_i ~ N(ln 10 %, 0.5^2), Roraas et al. Clin Chem 2019) the
    classical interval treats every specimen as exchangeable and misses the between-animal
    variation of CVI: its coverage of the population mean within-animal variance falls clearly
    below the binomial band (measured: about 0.6). This is why the study report warns when
    Bartlett/Levene flag heterogeneity and why the Bayesian model estimates the spread."""
    rng = np.random.default_rng(4)
    y, _ = simulate_balanced(500, 12, 6, 2, 0.03, 0.10, 0.25, rng, cvi_log_sd=0.5)
    var, lower, upper = masked_anova(y, np.ones(y.shape, bool))
    z = np.random.default_rng(99).normal(size=400_000)
    target = float(np.mean(var_from_cv(0.10 * np.exp(0.5 * z))))
    cov = np.mean((lower["cvi"] <= target) & (target <= upper["cvi"]))
    assert cov < _binomial_band(500)[0] - 0.1, cov


def test_design_without_replicates_or_specimens_is_a_clear_error():
    with pytest.raises(StudyError, match="replicates"):
        nested_anova([0, 0, 1, 1], [0, 1, 2, 3], [1.0, 1.1, 2.0, 2.1], label="creatinine")
    with pytest.raises(StudyError, match="only one animal"):
        nested_anova([0, 0, 0, 0], [0, 0, 1, 1], [1.0, 1.1, 2.0, 2.1])
    with pytest.raises(StudyError, match="shared by two animals"):
        nested_anova([0, 1, 1, 1], [0, 0, 1, 1], [1.0, 1.1, 2.0, 2.1])


def test_negative_moment_estimate_is_truncated_and_named():
    """When the specimen means vary less than the replicates imply, the CVI moment estimate is
    negative: it is set to 0 and named in ``truncated`` (never silently)."""
    y = np.array([1.0, 1.2, 1.05, 1.17, 2.0, 2.2, 2.05, 2.17])
    f = nested_anova([0, 0, 0, 0, 1, 1, 1, 1], [0, 0, 1, 1, 2, 2, 3, 3], y)
    assert f.raw_var["cvi"] < 0
    assert f.var["cvi"] == 0.0
    assert "cvi" in f.truncated
    assert f.lower["cvi"] == 0.0


def test_cv_anova_transform_gives_cvs_directly():
    """CV-ANOVA (Roraas 2016): values divided by their animal's mean; with large balanced data
    sqrt(var_I) of the transformed data is close to the simulated CVI (normal data, 10 %)."""
    rng = np.random.default_rng(2)
    i, s, r = 60, 10, 2
    a, spec = _design(i, s, r)
    theta = rng.normal(100, 25, i)
    x = theta[a] * (1 + rng.normal(0, 0.10, a.size // r).repeat(r)) * (1 + rng.normal(0, 0.03, a.size))
    z = cv_anova_transform(a, x)
    assert np.allclose(np.bincount(a, z) / np.bincount(a), 1.0)
    f = nested_anova(a, spec, z)
    assert np.sqrt(f.var["cvi"]) == pytest.approx(0.10, abs=0.01)
    assert np.sqrt(f.var["cva"]) == pytest.approx(0.03, abs=0.003)
