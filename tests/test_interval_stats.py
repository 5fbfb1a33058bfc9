"""Kernels of the population reference interval (bayesbase.interval.stats) against published
tables, worked examples and general-purpose libraries (scipy, numpy, statsmodels)."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from bayesbase.interval import stats as S


# --------------------------------------------------------------------------- order statistics

def test_rank_ci_n120_matches_the_published_table():
    # CLSI EP28-A3c, Table 8 (rank numbers of the 90 % CI of nonparametric reference limits; the
    # same ranks as Reed AH, Henry RJ, Mason WB, Clin Chem 1971;17:275): for n = 120 the lower
    # limit's CI runs from rank 1 to rank 7 and the upper limit's from 114 to 120. The table rows
    # are recalled (from memory): the table itself was not found in a searchable copy; its index
    # (n = 119-1000) is reproduced by the nonparRanks data set of the mcradds R package
    # (https://rdrr.io/cran/mcradds/man/nonparRanks.html, "CLSI-EP28A3 Table 8").
    assert S.rank_ci(120, S.P_LOWER, 0.90) == (1, 7)
    x = np.arange(1.0, 121.0)  # x(r) = r, so the CI values are the ranks themselves
    lo_ci, up_ci, ranks = S.nonparametric_limit_cis(x)
    assert ranks == ((1, 7), (114, 120))
    assert tuple(lo_ci) == (1.0, 7.0) and tuple(up_ci) == (114.0, 120.0)
    # the point limits sit at ranks 0.025 x 121 = 3.025 and 0.975 x 121 = 117.975 (EP28-A3c)
    np.testing.assert_allclose(S.nonparametric_limits(x), [3.025, 117.975], rtol=0, atol=1e-12)
    # binomial coverage of ranks 1-7 at n = 120: 92.05 % (derived; scipy.stats.binom below)
    cov = stats.binom.cdf(6, 120, 0.025) - stats.binom.cdf(0, 120, 0.025)
    assert S.rank_ci_coverage(120, 0.025, 1, 7) == pytest.approx(cov, abs=1e-12)
    assert cov == pytest.approx(0.9205, abs=5e-5)


def test_table_starts_at_119_as_the_published_table_does():
    # The EP28-A3c table (as indexed by mcradds' nonparRanks: sample sizes 119-1000) starts at
    # n = 119: below it P(no value under the 2.5th percentile) = 0.975^n exceeds 5 %.
    assert S.rank_ci(118, 0.025, 0.90) is None
    assert S.rank_ci(119, 0.025, 0.90) == (1, 7)
    assert 0.975 ** 118 > 0.05 > 0.975 ** 119


def test_binom_cdf_matches_scipy():
    for n, p in ((120, 0.025), (457, 0.025), (30, 0.5), (1000, 0.975)):
        np.testing.assert_allclose(S.binom_cdf(n, p), stats.binom.cdf(np.arange(n + 1), n, p),
                                   rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("n", [119, 120, 133, 150, 200, 250, 301, 400, 500, 750, 1000])
def test_rank_ci_equals_the_scipy_binomial_construction(n):
    # ranks from scipy.stats.binom: the largest r1 with P(B <= r1 - 1) <= 0.05 and the smallest
    # r2 with P(B <= r2 - 1) >= 0.95, B ~ Binomial(n, 0.025) (equal-tailed, conservative).
    F = stats.binom.cdf(np.arange(n + 1), n, 0.025)
    r1 = max(r for r in range(1, n + 1) if F[r - 1] <= 0.05)
    r2 = min(r for r in range(1, n + 1) if F[r - 1] >= 0.95)
    assert S.rank_ci(n) == (r1, r2)
    cov = F[r2 - 1] - F[r1 - 1]
    assert cov >= 0.90
    assert S.rank_ci_coverage(n, 0.025, r1, r2) == pytest.approx(cov, abs=1e-10)


@pytest.mark.parametrize("n,k,conf", [(12, 3, 96.1), (20, 6, 95.9), (40, 14, 96.2), (60, 22, 97.3)])
def test_median_ci_ranks_match_nairs_table(n, k, conf):
    # Confidence limits for the median, x(k) to x(n + 1 - k) with >= 95 % confidence (Nair 1940,
    # as tabulated by Dixon & Massey 1969; read at http://en.m.wikisource.org/wiki/Page:Sm_all_cc.pdf/38):
    # the same order-statistic construction at p = 0.5.
    assert S.rank_ci(n, 0.5, 0.95) == (k, n + 1 - k)
    assert 100 * S.rank_ci_coverage(n, 0.5, k, n + 1 - k) == pytest.approx(conf, abs=0.05)


@pytest.mark.parametrize("n", [39, 40, 77, 120, 131])
def test_nonparametric_limits_equal_numpy_weibull_quantiles(n):
    # rank p(n + 1) with linear interpolation is Hyndman & Fan's definition 6, numpy's "weibull"
    x = np.random.default_rng(n).lognormal(3.0, 0.4, size=n)
    np.testing.assert_allclose(S.nonparametric_limits(x),
                               np.quantile(x, [0.025, 0.975], method="weibull"), rtol=1e-12)
    # vectorised over rows as the bootstrap uses it
    X = np.random.default_rng(1).lognormal(size=(5, n))
    np.testing.assert_allclose(S.nonparametric_limits(X),
                               np.quantile(X, [0.025, 0.975], axis=1, method="weibull").T, rtol=1e-12)


def test_coverage_of_the_order_statistic_cis_on_2000_lognormal_samples():
    # 2,000 seeded log-normal samples of n = 120: each limit's 90 % CI [x(1), x(7)] resp.
    # [x(114), x(120)] must cover the true 2.5th / 97.5th percentile with the exact binomial
    # coverage (92.05 %, scipy.stats.binom), within a 3-sigma binomial band.
    rng = np.random.default_rng(20240613)
    R, n, mu, sigma = 2000, 120, math.log(90.0), 0.25
    xs = np.sort(rng.lognormal(mu, sigma, size=(R, n)), axis=1)
    q_lo = stats.lognorm.ppf(0.025, s=sigma, scale=math.exp(mu))
    q_hi = stats.lognorm.ppf(0.975, s=sigma, scale=math.exp(mu))
    (r1, r2) = S.rank_ci(n)
    cov_lo = np.mean((xs[:, r1 - 1] <= q_lo) & (q_lo <= xs[:, r2 - 1]))
    cov_hi = np.mean((xs[:, n - r2] <= q_hi) & (q_hi <= xs[:, n - r1]))
    p = stats.binom.cdf(r2 - 1, n, 0.025) - stats.binom.cdf(r1 - 1, n, 0.025)
    band = 3.0 * math.sqrt(p * (1 - p) / R)
    assert abs(cov_lo - p) < band, (cov_lo, p, band)
    assert abs(cov_hi - p) < band, (cov_hi, p, band)
    # and the point limits are unbiased to within their sampling error
    lims = S.nonparametric_limits(xs)
    assert abs(np.mean(np.log(lims[:, 0])) - math.log(q_lo)) < 0.02


# --------------------------------------------------------------------------- Box-Cox

@pytest.mark.parametrize("kind", ["lognormal", "normal", "gamma", "sqrtnormal"])
def test_boxcox_lambda_matches_scipy(kind):
    rng = np.random.default_rng(7)
    x = {"lognormal": rng.lognormal(2.0, 0.5, 200), "normal": rng.normal(50.0, 8.0, 150),
         "gamma": rng.gamma(3.0, 2.0, 90), "sqrtnormal": rng.normal(10.0, 1.5, 120) ** 2}[kind]
    y_sp, lam_sp = stats.boxcox(x)  # maximum-likelihood lambda (scipy.stats.boxcox)
    lam = float(S.boxcox_lambda(x))
    assert lam == pytest.approx(lam_sp, abs=1e-5)
    np.testing.assert_allclose(S.boxcox(x, lam_sp), y_sp, rtol=1e-10, atol=1e-12)
    assert float(S.boxcox_llf(lam_sp, x)) == pytest.approx(stats.boxcox_llf(lam_sp, x), rel=1e-10)
    np.testing.assert_allclose(S.inv_boxcox(y_sp, lam_sp), special.inv_boxcox(y_sp, lam_sp), rtol=1e-10)
    # vectorised rows agree with the one-row search
    X = np.stack([x, x * 3.0, np.sqrt(x)])
    L = S.boxcox_lambda(X)
    assert L[0] == pytest.approx(lam, abs=1e-8)
    assert L[1] == pytest.approx(lam, abs=1e-6)  # lambda is scale invariant
    assert L[2] == pytest.approx(stats.boxcox(np.sqrt(x))[1], abs=1e-5)


def test_boxcox_log_limit_and_inverse_below_zero():
    x = np.array([1.0, 2.0, 5.0])
    np.testing.assert_allclose(S.boxcox(x, 0.0), np.log(x), rtol=1e-15)
    np.testing.assert_allclose(S.inv_boxcox(np.log(x), 0.0), x, rtol=1e-14)
    # lam y + 1 <= 0 has no positive back-transform: NaN (scipy.special.inv_boxcox also gives NaN/0)
    assert np.isnan(S.inv_boxcox(-3.0, 0.5))


# --------------------------------------------------------------------------- normality

def test_anderson_darling_wrapper_agrees_with_scipy():
    rng = np.random.default_rng(3)
    for x, expect in ((rng.normal(size=100), True), (rng.lognormal(0, 1, size=100), False)):
        stat, passes, text = S.anderson_normal(x)
        assert stat == pytest.approx(stats.anderson(x, dist="norm", method="interpolate").statistic)
        assert passes is expect
        assert "Anderson-Darling" in text


# --------------------------------------------------------------------------- robust method

EP28_B = np.array([8.9, 9.2] + [9.4] * 2 + [9.5] * 3 + [9.6] * 4 + [9.7] * 5 + [9.8] + [9.9] * 2 + [10.2])


def test_robust_method_reproduces_the_ep28_appendix_b_example():
    # CLSI EP28-A3c Appendix B, robust method on 20 values (8.9 ... 10.2): limits 9.05 and 10.20
    # (reproduced to six digits, 9.049545 and 10.199396, by the mcradds R package's documented
    # example, https://kaigu1990.github.io/mcradds/reference/robustRI.html). Our equations
    # (Horn, Pesce & Copeland 1998; MAD/0.6745, small-sample biweight midvariance, t with n - 1 df)
    # give the same limits to 0.001 and to the published two decimals.
    lo, hi, T = S.robust_limits(EP28_B)
    assert round(lo, 2) == 9.05 and round(hi, 2) == 10.20
    assert lo == pytest.approx(9.049545, abs=1e-3)
    assert hi == pytest.approx(10.199396, abs=1e-3)
    # centre of the published interval = the biweight location
    assert T == pytest.approx((9.049545 + 10.199396) / 2, abs=1e-5)


def test_biweight_location_solves_its_defining_equation():
    # T = sum w_i y_i / sum w_i with w_i = (1 - u_i^2)^2, u_i = (y_i - T)/(3.7 MAD), |u_i| < 1
    rng = np.random.default_rng(11)
    y = np.r_[rng.normal(0.0, 1.0, 60), 9.0, 11.0]  # two gross outliers get weight 0
    T = float(S.biweight_location(y))
    mad = np.median(np.abs(y - np.median(y))) / 0.6745
    u = (y - T) / (3.7 * mad)
    w = np.where(np.abs(u) < 1, (1 - u ** 2) ** 2, 0.0)
    assert T == pytest.approx((w * y).sum() / w.sum(), abs=1e-9)
    assert w[-1] == 0.0 and w[-2] == 0.0
    assert abs(T - np.mean(y[:-2])) < 0.1 < abs(np.mean(y) - np.mean(y[:-2]))


def test_robust_limits_approach_normal_theory_for_large_gaussian_samples():
    # with c = 205.6 the biweight scale is close to the SD, so for large Gaussian samples the robust
    # limits approach mean -/+ 1.96 SD (normal theory, scipy.stats.norm)
    y = np.random.default_rng(5).normal(100.0, 10.0, size=(20, 2000))
    lim = S.robust_limits(y)
    z = stats.norm.ppf(0.975)
    np.testing.assert_allclose(lim[:, 0], y.mean(1) - z * y.std(1, ddof=1), atol=0.6)
    np.testing.assert_allclose(lim[:, 1], y.mean(1) + z * y.std(1, ddof=1), atol=0.6)


def test_parametric_limits_are_mean_plus_minus_1_96_sd():
    y = np.random.default_rng(2).normal(5.0, 0.5, 80)
    lo, hi, m = S.parametric_limits(y)
    z = stats.norm.ppf(0.975)  # 1.959964
    assert lo == pytest.approx(y.mean() - z * y.std(ddof=1), rel=1e-12)
    assert hi == pytest.approx(y.mean() + z * y.std(ddof=1), rel=1e-12)


# --------------------------------------------------------------------------- outliers

def test_tukey_fences_from_numpy_quartiles():
    y = np.random.default_rng(4).normal(size=101)
    q1, q3 = np.percentile(y, [25, 75])
    assert S.tukey_fences(y) == pytest.approx((q1 - 1.5 * (q3 - q1), q3 + 1.5 * (q3 - q1)))
    assert S.tukey_fences(y, 3.0) == pytest.approx((q1 - 3 * (q3 - q1), q3 + 3 * (q3 - q1)))


def test_dixon_reed_one_third_rule_by_hand():
    # Reed et al. 1971 (CLSI EP28-A3c): flag an extreme whose gap to its neighbour exceeds 1/3 of
    # the range. [1, 2, 3, 4, 10]: high gap 6 / range 9 = 0.667 -> flagged; then [1, 2, 3, 4]:
    # gap 1 / range 3 = 0.333, not > 1/3 -> stop. The low side: gap 1 / 9 -> not flagged.
    flags = S.dixon_reed(np.array([3.0, 1.0, 10.0, 2.0, 4.0]), max_per_side=5)
    assert [(f.index, f.side) for f in flags] == [(2, "high")]
    assert flags[0].q == pytest.approx(6 / 9)
    assert S.dixon_reed(np.array([1.0, 2.0, 3.0, 4.0])) == []


# --------------------------------------------------------------------------- partitions

def test_harris_boyd_z_equals_statsmodels_unequal_variance_z():
    from statsmodels.stats.weightstats import CompareMeans, DescrStatsW

    rng = np.random.default_rng(8)
    a, b = rng.normal(0.0, 1.0, 150), rng.normal(0.4, 1.3, 170)
    hb = S.harris_boyd(a, b, floor=False)
    z_sm, _ = CompareMeans(DescrStatsW(a), DescrStatsW(b)).ztest_ind(usevar="unequal")
    assert hb.z == pytest.approx(abs(z_sm), rel=1e-10)
    assert hb.z_crit == pytest.approx(3 * math.sqrt(320 / 240))  # z* = 3 (n_avg/120)^(1/2)
    assert hb.sd_ratio == pytest.approx(max(a.std(ddof=1), b.std(ddof=1)) / min(a.std(ddof=1), b.std(ddof=1)))


def _null_rate(n1, n2, z_crit):
    # P(|z| > z*) from Student's t with n1 + n2 - 2 df (z is a two-sample t statistic) plus
    # P(SD ratio > 1.5) from the F distribution (scipy), counted once (independent for Gaussian data)
    pz = 2 * stats.t.sf(z_crit, n1 + n2 - 2)
    pf = stats.f.sf(2.25, n1 - 1, n2 - 1) + stats.f.sf(2.25, n2 - 1, n1 - 1)
    return pz + pf - pz * pf


def test_harris_boyd_on_simulated_groups_that_do_and_do_not_differ():
    rng = np.random.default_rng(1990)
    R, n = 2000, 150
    # groups that differ by one SD (Harris & Boyd: separate intervals needed) -> split every time
    sep, z, z_crit, _ = S.harris_boyd_vec(rng.normal(0, 1, (R, n)), rng.normal(1.0, 1, (R, n)))
    assert z_crit == pytest.approx(3 * math.sqrt(300 / 240))
    assert sep.mean() > 0.999
    # groups from one population: split at the rate the normal/F tails predict (binomial band)
    sep0, *_ = S.harris_boyd_vec(rng.normal(0, 1, (R, n)), rng.normal(0, 1, (R, n)))
    p0 = _null_rate(n, n, z_crit)
    assert sep0.sum() <= stats.binom.ppf(0.999, R, p0) and p0 < 0.002
    # a group whose SD is twice the other's (same mean) -> split by the SD-ratio criterion
    sep2, *_ = S.harris_boyd_vec(rng.normal(0, 1, (R, n)), rng.normal(0, 2, (R, n)))
    assert sep2.mean() > 0.999


def test_harris_boyd_floor_for_small_groups():
    # groups of 40: the published z* = 3 sqrt(80/240) = 1.73 splits one null pair in ~9; the floor
    # z* >= 3 (this project's choice) brings it to ~1 % (t and F tails, scipy)
    rng = np.random.default_rng(40)
    R, n = 4000, 40
    a, b = rng.normal(0, 1, (R, n)), rng.normal(0, 1, (R, n))
    published, *_ = S.harris_boyd_vec(a, b, floor=False)
    floored, _, zc, _ = S.harris_boyd_vec(a, b, floor=True)
    assert zc == 3.0
    for sep, z_crit in ((published, 3 * math.sqrt(80 / 240)), (floored, 3.0)):
        p = _null_rate(n, n, z_crit)
        lo, hi = stats.binom.ppf([0.0005, 0.9995], R, p)
        assert lo <= sep.sum() <= hi, (sep.sum(), p * R)


def test_lahti_percentages_outside():
    y = np.arange(1.0, 101.0)
    assert S.lahti_outside(y, 3.5, 95.5) == (3.0, 5.0)


# --------------------------------------------------------------------------- summaries

def test_cvg_from_interval_recovers_the_between_animal_sd():
    # a healthy animal's single result is log-normal with log-variance sG^2 + sI^2 + sA^2; its
    # central 95 % interval (scipy.stats.lognorm) fed back must return sG exactly
    sG, sI, sA = math.sqrt(math.log1p(0.20 ** 2)), math.sqrt(math.log1p(0.08 ** 2)), math.sqrt(math.log1p(0.03 ** 2))
    tot = math.sqrt(sG ** 2 + sI ** 2 + sA ** 2)
    z = stats.norm.ppf(0.975)
    lo, hi = stats.lognorm.ppf([0.025, 0.975], s=tot, scale=88.0)
    cvg, sg2 = S.cvg_from_interval(lo, hi, sI, sA)
    # 3.92 is 2 x 1.96 (the trade's rounding of 2 x 1.959964): tolerance from that rounding
    assert math.sqrt(sg2) == pytest.approx(math.sqrt((tot * 2 * z / 3.92) ** 2 - sI ** 2 - sA ** 2), rel=1e-12)
    assert cvg == pytest.approx(0.20, rel=2e-3)
    # an interval narrower than within-animal + analytical variation gives no CVG
    assert math.isnan(S.cvg_from_interval(95.0, 100.0, sI, sA)[0])
    # the dog pack's urea CVG (models/dog.toml, derived with the same formula): 0.18688
    cvg_u, _ = S.cvg_from_interval(3.57, 8.925, math.sqrt(math.log1p(0.14 ** 2)), math.sqrt(math.log1p(0.03 ** 2)))
    assert cvg_u == pytest.approx(0.18688, abs=1e-4)


def test_ci_ratio():
    assert S.ci_ratio(9.0, 11.0, 10.0, 30.0) == pytest.approx(0.1)
    assert math.isnan(S.ci_ratio(float("nan"), 11.0, 10.0, 30.0))
