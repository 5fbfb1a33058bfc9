"""Drift model (bayesbase.trend, bayesbase.mcmc_trend) checked against outside references:
scipy.stats.linregress and statsmodels OLS/WLS (flat-prior limit), scipy's multivariate normal
and numerical integration (marginal likelihoods), the chi-square(1) law of the GLS slope
statistic under H0 (false-alarm rate), binomial bands for calibration, the classical RCV
formula (Fraser CG, Clin Chem Lab Med 2012;50:807), and PyMC NUTS (slow)."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import integrate, special, stats

from bayesbase.constants import DEFAULT_PRIOR_DRIFT, TREND_HORIZON_YEARS
from bayesbase.model.engine import cv_to_sigma
from bayesbase.model.trend import DEFAULT_SLOPE_SD, drift_power, trend_exact, trend_path

Z975 = stats.norm.ppf(0.975)


def _binom_band(n, p, level=0.99):
    lo, hi = stats.binom.interval(level, n, p)
    return lo / n, hi / n


# ------------------------------------------------------------------ flat-prior limit = OLS / WLS
TIMES = np.array([0.0, 0.7, 1.5, 2.1, 3.4, 4.0])
Y = np.log(np.array([61.0, 66.0, 64.0, 73.0, 80.0, 79.0]))  # invented demo values (umol/L)
FLAT = dict(prior_mean=4.0, sg=1e6, cvi=0.10, cvi_log_sd=0.0, sa=0.0, slope_sd=1e6)


def _call(times, y, r=None, e=None, **kw):
    p = dict(FLAT)
    p.update(kw)
    return trend_exact(times, y, r, e, p.pop("prior_mean"), p.pop("sg"), p.pop("cvi"),
                       p.pop("cvi_log_sd"), p.pop("sa"), p.pop("slope_sd"), **p)


def test_flat_prior_slope_is_ols():
    """Reference: scipy.stats.linregress and statsmodels OLS. With sG, sB -> infinity and sI
    known, the posterior of (theta0, beta) is N(OLS estimate, sI^2 (X'X)^-1)."""
    out = _call(TIMES, Y)
    lr = stats.linregress(TIMES, Y)
    X = sm.add_constant(TIMES)
    ols = sm.OLS(Y, X).fit()
    assert out["eligible"][0]
    assert abs(out["slope_mean"][0] - lr.slope) < 1e-6
    assert abs(out["slope_mean"][0] - ols.params[1]) < 1e-6
    si = float(cv_to_sigma(0.10))
    sd_known = si * np.sqrt(ols.normalized_cov_params[1, 1])
    assert abs(out["slope_sd"][0] - sd_known) < 1e-6
    assert abs(out["slope_lower"][0] - (lr.slope - Z975 * sd_known)) < 1e-6
    assert abs(out["slope_upper"][0] - (lr.slope + Z975 * sd_known)) < 1e-6
    assert abs(out["p_increase"][0] - stats.norm.cdf(lr.slope / sd_known)) < 1e-6
    assert abs(out["t_ref"][0] - TIMES.mean()) < 1e-12


def test_flat_prior_path_is_ols_fit():
    """Reference: statsmodels OLS fitted line; band = fit +/- z sI sqrt(x0' (X'X)^-1 x0)."""
    at = np.array([-1.0, 0.0, 2.0, 4.0, 6.5])
    path = trend_path(TIMES, Y, None, None, 4.0, 1e6, 0.10, 0.0, 0.0, 1e6, at)
    ols = sm.OLS(Y, sm.add_constant(TIMES)).fit()
    x0 = sm.add_constant(at, has_constant="add")
    fit = ols.predict(x0)
    se = float(cv_to_sigma(0.10)) * np.sqrt(np.einsum("ij,jk,ik->i", x0, ols.normalized_cov_params, x0))
    np.testing.assert_allclose(path["mean"], fit, atol=1e-6)
    np.testing.assert_allclose(path["lower"], fit - Z975 * se, atol=1e-6)
    np.testing.assert_allclose(path["upper"], fit + Z975 * se, atol=1e-6)


def test_flat_prior_replicates_is_wls():
    """Reference: statsmodels WLS with weights 1/(sI^2 + sA^2/r_j + e_j)."""
    r = np.array([1.0, 2.0, 3.0, 1.0, 2.0, 1.0])
    e = np.array([0.0, 0.0, 0.001, 0.0, 0.002, 0.0])
    sa = 0.05
    out = _call(TIMES, Y, r, e, sa=sa)
    v = cv_to_sigma(0.10) ** 2 + sa**2 / r + e
    wls = sm.WLS(Y, sm.add_constant(TIMES), weights=1.0 / v).fit()
    assert abs(out["slope_mean"][0] - wls.params[1]) < 1e-6
    assert abs(out["slope_sd"][0] - np.sqrt(wls.normalized_cov_params[1, 1])) < 1e-6


# ------------------------------------------------------------- marginal likelihoods and BF
def _marginal_covs(times, v, sg, sb):
    tc = times - times.mean()
    s0 = np.diag(v) + sg**2
    return s0, s0 + sb**2 * np.outer(tc, tc)


def test_log_bf_known_si_matches_multivariate_normal():
    """Reference: scipy.stats.multivariate_normal with the marginal covariances
    V + sG^2 11' (H0) and V + sG^2 11' + sB^2 tc tc' (H1)."""
    mu, sg, sa, sb = np.log(70.0), 0.2, 0.03, 0.1
    r = np.array([1.0, 1.0, 2.0, 1.0, 1.0, 3.0])
    out = trend_exact(TIMES, Y, r, None, mu, sg, 0.10, 0.0, sa, sb)
    v = cv_to_sigma(0.10) ** 2 + sa**2 / r
    c0, c1 = _marginal_covs(TIMES, v, sg, sb)
    ref = (stats.multivariate_normal(np.full(6, mu), c1).logpdf(Y)
           - stats.multivariate_normal(np.full(6, mu), c0).logpdf(Y))
    assert abs(out["log_bf10"][0] - ref) < 1e-9
    pi = DEFAULT_PRIOR_DRIFT
    assert abs(out["p_drift"][0] - pi * np.exp(ref) / (pi * np.exp(ref) + 1 - pi)) < 1e-9


def test_log_bf_uncertain_cvi_matches_numerical_integration():
    """Reference: scipy.integrate.quad of the marginal likelihood over z, ln CVI = ln CVI_pack
    + s z, z ~ N(0, 1), under each hypothesis."""
    mu, sg, sa, sb, cvi, s = np.log(70.0), 0.2, 0.03, 0.1, 0.10, 0.35
    out = trend_exact(TIMES, Y, None, None, mu, sg, cvi, s, sa, sb, nodes=24)

    def ml(z, h):
        v = cv_to_sigma(cvi * np.exp(s * z)) ** 2 + sa**2
        c = _marginal_covs(TIMES, np.full(6, v), sg, sb)[h]
        return stats.norm.pdf(z) * stats.multivariate_normal(np.full(6, mu), c).pdf(Y)

    m0 = integrate.quad(ml, -10, 10, args=(0,), epsabs=0, epsrel=1e-11, limit=200)[0]
    m1 = integrate.quad(ml, -10, 10, args=(1,), epsabs=0, epsrel=1e-11, limit=200)[0]
    assert abs(out["log_bf10"][0] - np.log(m1 / m0)) < 1e-6


# ------------------------------------------------------------------------ simulations
def _gls_s(times, v, sg):
    """t' Sigma0^-1 t for the centred times (numpy linear algebra, independent of the kernel)."""
    tc = times - times.mean()
    c0 = _marginal_covs(times, v, sg, 0.0)[0]
    return float(tc @ np.linalg.solve(c0, tc))


@pytest.mark.parametrize(
    "times, r, prior_drift, cut",
    [
        (np.arange(6.0), np.ones(6), DEFAULT_PRIOR_DRIFT, 0.5),
        (np.array([0.0, 0.4, 1.0]), np.array([1.0, 3.0, 2.0]), 0.5, 0.6),
    ],
    ids=["six-annual", "three-unequal"],
)
def test_false_alarm_rate_under_h0_matches_chi_square(times, r, prior_drift, cut):
    """Under H0 with known sI, u = tc' Sigma0^-1 (y - mu) ~ N(0, s), s = tc' Sigma0^-1 tc, and
    log BF = -0.5 ln(1 + sB^2 s) + 0.5 sB^2 u^2 / (1 + sB^2 s) (matrix determinant lemma and
    Sherman-Morrison). P(drift) > cut <=> Q = u^2 / s > q*, Q ~ chi-square(1): expected rate
    scipy.stats.chi2.sf(q*, 1); the simulated rate must lie in its binomial 99 % band."""
    rng = np.random.default_rng(7101)
    n = 20_000
    mu, sg, sa, sb = np.log(90.0), 0.2, 0.03, DEFAULT_SLOPE_SD
    si = float(cv_to_sigma(0.10))
    v = si**2 + sa**2 / r
    theta0 = mu + sg * rng.normal(size=n)
    y = theta0[:, None] + rng.normal(size=(n, times.size)) * np.sqrt(v)
    out = trend_exact(np.broadcast_to(times, y.shape), y, np.broadcast_to(r, y.shape), None, mu,
                      sg, 0.10, 0.0, sa, sb, prior_drift=prior_drift, intervals=False)
    s = _gls_s(times, v, sg)
    k = sb**2 * s
    log_bf_cut = special.logit(cut) - special.logit(prior_drift)
    q_star = (2.0 * log_bf_cut + np.log1p(k)) * (1.0 + k) / k
    expected = stats.chi2.sf(q_star, 1)
    rate = np.mean(out["p_drift"] > cut)
    lo, hi = _binom_band(n, expected)
    assert 0.003 < expected < 0.2  # the design gives a rate the simulation can check
    assert lo <= rate <= hi, (rate, expected, (lo, hi))


def test_p_drift_calibrated_under_the_prior_mixture():
    """Series simulated from the model's own prior (drift with probability pi_d, uncertain CVI):
    in each decile bin of P(drift), the number of drifting series must match sum P(drift) within a
    normal band for the Poisson-binomial (Bonferroni over bins, family 99 %)."""
    rng = np.random.default_rng(7102)
    n, pi = 20_000, 0.3
    times = np.array([0.0, 0.5, 1.3, 2.0, 3.1])
    mu, sg, sa, sb, cvi, s = np.log(90.0), 0.2, 0.03, DEFAULT_SLOPE_SD, 0.10, 0.25
    drift = rng.random(n) < pi
    beta = np.where(drift, sb * rng.normal(size=n), 0.0)
    theta0 = mu + sg * rng.normal(size=n)
    si = cv_to_sigma(cvi * np.exp(s * rng.normal(size=n)))
    tc = times - times.mean()
    sd = np.sqrt(si**2 + sa**2)[:, None]
    y = theta0[:, None] + beta[:, None] * tc + sd * rng.normal(size=(n, times.size))
    out = trend_exact(np.broadcast_to(times, y.shape), y, None, None, mu, sg, cvi, s, sa, sb,
                      prior_drift=pi, intervals=False)
    p = out["p_drift"]
    edges = np.quantile(p, np.linspace(0.0, 1.0, 11))  # deciles of P(drift)
    edges[-1] = np.inf
    z = stats.norm.ppf(1 - 0.01 / (2 * (edges.size - 1)))
    assert p.min() < 0.2 and p.max() > 0.99  # the bins span the range
    for a, b in zip(edges[:-1], edges[1:]):
        sel = (p >= a) & (p < b)
        assert sel.sum() > 1000, (a, b, sel.sum())
        exp = p[sel].sum()
        sd_bin = np.sqrt(np.sum(p[sel] * (1 - p[sel])))
        assert abs(drift[sel].sum() - exp) <= z * sd_bin, (a, b, drift[sel].sum(), exp, sd_bin)


def test_time_to_limit_matches_monte_carlo_of_the_crossing_time():
    """Known sI: the H1 posterior of (theta0, beta) is N(m, S) with S^-1 = X'V^-1X + diag(1/sG^2,
    1/sB^2) (numpy here). Crossing time per draw = (ln L - theta_last)/beta for beta > 0
    (0 if already beyond, +inf if receding); its quantiles from 400,000 seeded draws
    must match the exact path within Monte Carlo error."""
    times = np.arange(6.0)
    y = np.log(np.array([98.0, 104.0, 111.0, 112.0, 125.0, 131.0]))  # invented demo values
    mu, sg, sa, sb, lim = np.log(90.0), 0.2, 0.03, 0.1, np.log(159.0)
    out = trend_exact(times, y, None, None, mu, sg, 0.10, 0.0, sa, sb, limit_upper=lim,
                      limit_lower=np.log(44.0))
    v = cv_to_sigma(0.10) ** 2 + sa**2
    tc = times - times.mean()
    X = np.column_stack([np.ones(6), tc])
    prec = X.T @ X / v + np.diag([1 / sg**2, 1 / sb**2])
    cov = np.linalg.inv(prec)
    m = cov @ (X.T @ y / v + np.array([mu / sg**2, 0.0]))
    d = np.random.default_rng(7103).multivariate_normal(m, cov, size=400_000)
    th_last = d[:, 0] + d[:, 1] * tc[-1]
    with np.errstate(divide="ignore"):
        t = np.where(th_last >= lim, 0.0, np.where(d[:, 1] > 0, (lim - th_last) / d[:, 1], np.inf))
    assert out["limit_side"][0] == "upper"
    for key, q in (("years_to_limit", 0.5), ("years_to_limit_lower", 0.025)):
        ref = np.quantile(t, q)
        assert abs(out[key][0] - ref) < 0.02 * ref, (key, out[key][0], ref)
    ref_hi = np.quantile(t, 0.975)
    assert (ref_hi > TREND_HORIZON_YEARS) == np.isinf(out["years_to_limit_upper"][0])
    assert abs(out["slope_mean"][0] - m[1]) < 1e-9
    assert abs(out["p_increase"][0] - stats.norm.cdf(m[1] / np.sqrt(cov[1, 1]))) < 1e-9
    assert abs(out["p_beyond_limit"][0] - np.mean(th_last >= lim)) < 5e-3


# ---------------------------------------------------------------------------- rule, inputs
def test_rule_not_met_gives_nan_and_a_reason():
    t = np.array([[0.0, 1.0, np.nan], [0.0, 0.2, 0.4], [0.0, 0.25, 0.5]])
    y = np.log(np.array([[60.0, 62.0, np.nan], [60.0, 62.0, 61.0], [60.0, 62.0, 61.0]]))
    out = trend_exact(t, y, None, None, np.log(90), 0.2, 0.1, 0.2, 0.03, 0.1,
                      limit_upper=np.log(159.0), limit_lower=np.log(44.0))
    assert out["eligible"].tolist() == [False, False, True]
    assert "fewer than 3" in out["reason"][0]
    assert "span less than 0.5" in out["reason"][1]
    assert out["reason"][2] == ""
    for k in ("p_drift", "p_increase", "slope_mean", "pct_per_year_mean", "years_to_limit"):
        assert np.all(np.isnan(out[k][:2])), k
        assert np.isfinite(out[k][2]) or k == "years_to_limit"
    assert out["n_used"].tolist() == [2.0, 3.0, 3.0]
    assert list(out["limit_side"][:2]) == ["", ""]


def test_padding_and_batching_do_not_change_a_series():
    y1 = np.log([61.0, 66.0, 64.0, 73.0])
    t1 = np.array([0.0, 0.9, 2.0, 3.0])
    alone = trend_exact(t1, y1, None, None, np.log(90), 0.2, 0.1, 0.2, 0.03, 0.1)
    t = np.array([[0.0, np.nan, 0.9, 2.0, 3.0, 5.0], [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]])
    y = np.array([[y1[0], np.log(70.0), y1[1], y1[2], y1[3], np.log(99.0)], np.log([90, 95, 99, 105, 111, 118])])
    r = np.array([[1, 1, 1, 1, 1, 0], [1, 1, 1, 1, 1, 1]], float)
    both = trend_exact(t, y, r, None, np.log(90), 0.2, 0.1, 0.2, 0.03, 0.1)
    for k in ("p_drift", "slope_mean", "slope_lower", "pct_per_year_upper", "t_ref"):
        assert abs(both[k][0] - alone[k][0]) < 1e-12, k


@pytest.mark.parametrize("width", [1, 3, 6, 7, 8, 12])
@pytest.mark.parametrize("padded", [False, True])
def test_prepare_series_summaries_match_numpy_nan_reductions(width, padded):
    """The per-series summaries of the usable specimens (computed column by column) against
    numpy's NaN-aware reductions (reference: numpy nanmin / nanmax / nanmean, count of finite
    values) on invented padded series, with and without padding (the unpadded fast path)."""
    from bayesbase.model.trend import prepare_series

    rng = np.random.default_rng(7)
    t = np.cumsum(rng.uniform(0.1, 1.5, (400, width)), axis=1) - 5.0
    y = rng.normal(4.5, 0.1, t.shape)
    r = np.ones(t.shape)
    if padded:
        t[rng.random(t.shape) < 0.2] = np.nan
        y[rng.random(t.shape) < 0.1] = np.nan
        r[rng.random(t.shape) < 0.1] = 0.0
    p = prepare_series(t, y, None if not padded else r)
    tu = np.where(np.isfinite(t) & np.isfinite(y) & (r > 0), t, np.nan)
    n = np.sum(np.isfinite(tu), axis=1)
    assert padded == bool(np.any(n < width))
    np.testing.assert_array_equal(p["n_used"], n)
    with warnings.catch_warnings():  # all-padding rows: numpy warns "empty slice"
        warnings.simplefilter("ignore", RuntimeWarning)
        np.testing.assert_allclose(p["t_ref"], np.nanmean(tu, axis=1), rtol=0, atol=1e-13)
        np.testing.assert_array_equal(p["t_last"], np.nanmax(tu, axis=1))
        span = np.where(n > 0, np.nanmax(tu, axis=1) - np.nanmin(tu, axis=1), 0.0)
    np.testing.assert_array_equal(p["span_years"], span)
    np.testing.assert_array_equal(p["r"], np.where(np.isfinite(tu), r, 0.0))
    np.testing.assert_array_equal(p["extra_var"], np.zeros(t.shape))


def test_bad_inputs_raise():
    with pytest.raises(ValueError, match="times"):
        trend_exact(np.arange(3.0), np.zeros(4), None, None, 0.0, 0.2, 0.1, 0.2, 0.03, 0.1)
    with pytest.raises(ValueError, match="sg"):
        trend_exact(np.arange(3.0), np.zeros(3), None, None, 0.0, 0.0, 0.1, 0.2, 0.03, 0.1)
    with pytest.raises(ValueError, match="prior_drift"):
        trend_exact(np.arange(3.0), np.zeros(3), None, None, 0.0, 0.2, 0.1, 0.2, 0.03, 0.1,
                    prior_drift=1.0)


# ---------------------------------------------------------------------- creatinine scenario
# Creatinine-like CVs: CVI 0.10 (from memory), CVA 0.03 (common practice), CVG 0.20 (from
# memory); population interval [44, 159] umol/L and centre 90 umol/L invented for this demo.
CREAT = dict(prior_mean=np.log(90.0), sg=float(cv_to_sigma(0.20)), cvi=0.10, cvi_log_sd=0.2,
             sa=float(cv_to_sigma(0.03)), slope_sd=0.10)
CREAT_VALUES = np.array([62.0, 66.0, 73.0, 79.0, 86.0, 95.0])  # invented, ~9 %/year rise


def test_creatinine_rising_inside_the_interval():
    assert np.all((CREAT_VALUES > 44) & (CREAT_VALUES < 159))
    c = CREAT
    out = trend_exact(np.arange(6.0), np.log(CREAT_VALUES), None, None, c["prior_mean"], c["sg"],
                      c["cvi"], c["cvi_log_sd"], c["sa"], c["slope_sd"],
                      limit_upper=np.log(159.0), limit_lower=np.log(44.0))
    assert out["p_increase"][0] > 0.95
    assert out["limit_side"][0] == "upper"
    assert np.isfinite(out["years_to_limit"][0]) and out["years_to_limit"][0] > 0
    assert out["years_to_limit_lower"][0] <= out["years_to_limit"][0] <= out["years_to_limit_upper"][0]
    assert out["pct_per_year_lower"][0] < out["pct_per_year_mean"][0] < out["pct_per_year_upper"][0]
    # model-averaged mean is the H1 mean shrunk by P(drift)
    assert abs(out["pct_per_year_avg_mean"][0] - out["p_drift"][0] * out["pct_per_year_mean"][0]) < 1e-9


# ---------------------------------------------------------------------------------- power
def test_drift_power_table():
    """Power rises with the number of annual specimens; at n = 6 both trend rules beat the
    consecutive-pair RCV while raising fewer false alarms. The pair rule's single-pair false
    alarm (n = 2) is checked against its closed form: d = ln(x2/x1) ~ N(0, 2 sigma^2),
    sigma^2 = ln(1 + CVA^2) + ln(1 + CVI^2), flag when exp(d) - 1 > RCV or 1 - exp(d) > RCV."""
    n = 10_000
    df = drift_power(n_specimens=(2, 3, 4, 6), pct_per_year=10, n_series=n, seed=7104)
    rcv = np.sqrt(2) * stats.norm.ppf(0.975) * np.hypot(0.03, 0.10)  # Fraser 2012
    np.testing.assert_allclose(df["rcv_pct"], 100 * rcv, rtol=1e-12)
    sig = np.sqrt(2 * (np.log1p(0.03**2) + np.log1p(0.10**2)))
    p_pair = stats.norm.sf(np.log1p(rcv) / sig) + stats.norm.cdf(np.log(1 - rcv) / sig)
    lo, hi = _binom_band(n, p_pair)
    assert lo <= df["false_alarm_rcv_any_pair"].iloc[0] <= hi
    assert np.isnan(df["power_p_drift"].iloc[0])  # n = 2 is below the trend rule
    d = df.set_index("n_specimens").loc[[3, 4, 6]]
    for col in ("power_p_drift", "power_p_increase", "power_rcv_any_pair"):
        assert np.all(np.diff(d[col].to_numpy()) > 0), col
    six = d.loc[6]
    assert six["power_p_drift"] > six["power_rcv_any_pair"]
    assert six["power_p_increase"] > six["power_rcv_any_pair"]
    assert six["false_alarm_p_drift"] < six["false_alarm_rcv_any_pair"]
    assert six["false_alarm_p_increase"] < six["false_alarm_rcv_any_pair"]


# ------------------------------------------------------------------------ exact vs PyMC
@pytest.mark.slow
def test_exact_agrees_with_mcmc():
    """Reference: PyMC NUTS on the same model (H1), Savage-Dickey Bayes factor; tolerances
    are 4 Monte Carlo standard errors (plus 2 % on the time to limit for the quantile method)."""
    from bayesbase.mcmc.trend import trend_mcmc

    c = CREAT
    t = np.array([np.arange(6.0), [0.0, 0.5, 1.5, 2.5, 3.0, np.nan]])
    y = np.log(np.array([CREAT_VALUES, [88.0, 84.0, 90.0, 79.0, 83.0, np.nan]]))
    args = (t, y, None, None, c["prior_mean"], c["sg"], c["cvi"], c["cvi_log_sd"], c["sa"],
            c["slope_sd"])
    kw = dict(limit_upper=np.log(159.0), limit_lower=np.log(44.0))
    e = trend_exact(*args, **kw)
    m = trend_mcmc(*args, **kw, draws=1000, tune=1000, chains=2, seed=7105)
    assert np.all(m["converged"]), (m["r_hat"], m["ess"], m["divergences"])
    assert np.all(np.abs(m["log_bf10"] - e["log_bf10"]) < 4 * m["log_bf10_mcse"] + 1e-3)
    assert np.all(np.abs(m["slope_mean"] - e["slope_mean"]) < 4 * m["slope_mean_mcse"])
    assert np.all(np.abs(m["p_increase"] - e["p_increase"]) < 0.03)
    assert list(m["limit_side"]) == list(e["limit_side"])
    fin = np.isfinite(e["years_to_limit"])
    assert fin[0]
    tol = 4 * m["years_to_limit_mcse"][fin] + 0.02 * e["years_to_limit"][fin]
    assert np.all(np.abs(m["years_to_limit"][fin] - e["years_to_limit"][fin]) < tol)


# ------------------------------------------- fast: MCMC drift stages on hand-made posteriors
# Each deterministic stage of bayesbase.mcmc.trend alone, fed inputs and a hand-made
# (chain, draw) posterior built here; references written with numpy / scipy / ArviZ.
def _hand_posterior(beta_mean=0.08, seed=2718, chains=2, draws=150):
    import xarray as xr

    rng = np.random.default_rng(seed)
    shape = (chains, draws)
    return xr.Dataset({
        "theta0": (("chain", "draw"), np.log(80.0) + 0.03 * rng.standard_normal(shape)),
        "z": (("chain", "draw"), rng.standard_normal(shape)),
        "beta": (("chain", "draw"), beta_mean + 0.03 * rng.standard_normal(shape)),
    })


def _az_mcse(x, **kw):
    import arviz as az

    return float(az.mcse(az.convert_to_dataset({"x": x}), **kw)["x"])


def test_mcmc_input_stage_prepares_and_checks():
    """Series data: used specimens only, times centred on their mean, ev = sA^2 / r + e,
    t_last - t_ref; limits and prior_drift broadcast per series; bad values raise."""
    from bayesbase.mcmc.trend import _prepare_inputs, _series_data

    t = np.array([[0.0, 1.0, 2.5, np.nan], [0.0, 0.5, 1.0, 3.0]])
    y = np.log(np.array([[60.0, 64.0, 70.0, np.nan], [80.0, 79.0, 81.0, 83.0]]))
    r = np.array([[1.0, 2.0, 1.0, 0.0], [1.0, 1.0, 0.0, 3.0]])  # r = 0: not used
    e = np.full((2, 4), 0.0004)
    c = CREAT
    p, pi, lu, ll = _prepare_inputs(t, y, r, e, c["prior_mean"], c["sg"], c["cvi"],
                                    c["cvi_log_sd"], c["sa"], c["slope_sd"], 0.2, np.log(159.0),
                                    None, 0.95)
    assert np.array_equal(pi, [0.2, 0.2]) and np.allclose(lu, np.log(159.0))
    assert np.all(np.isnan(ll))
    d = _series_data(p, 1)
    used = np.array([0.0, 0.5, 3.0])
    assert np.allclose(d["tc"], used - used.mean(), rtol=0, atol=1e-15)
    assert np.allclose(d["y"], np.log([80.0, 79.0, 83.0]), rtol=0, atol=1e-15)
    assert np.allclose(d["ev"], c["sa"] ** 2 / np.array([1.0, 1.0, 3.0]) + 0.0004, rtol=1e-14)
    assert abs(d["dt_last"] - (3.0 - used.mean())) < 1e-15
    assert abs(d["log_cvi"] - np.log(0.10)) < 1e-15 and d["sb"] == c["slope_sd"]
    args = (t, y, r, e, 4.0, 0.2, 0.1, 0.2, 0.03, 0.1)
    with pytest.raises(ValueError, match="ci_prob"):
        _prepare_inputs(*args, 0.1, None, None, 1.0)
    with pytest.raises(ValueError, match="prior_drift"):
        _prepare_inputs(*args, 1.0, None, None, 0.95)


def test_mcmc_drift_stage_matches_bayes_rule_and_normal_conditioning():
    """Savage-Dickey BF10 from the per-draw density of beta at 0, referenced by Bayes' rule:
    p(beta=0 | theta0, y) = N(y; theta0, V) N(0; 0, sB) / N(y; theta0, V + sB^2 tc tc')
    (scipy.stats.multivariate_normal); P(beta > 0) from the normal conditional of beta given
    y (covariance form, numpy); slope quantiles as numpy inverted-CDF quantiles; the averaged
    %/year bounds as the generalised inverse of the mixture (1 - P(drift)) delta_0 +
    P(drift) F_pct; MCSEs by ArviZ."""
    from bayesbase.mcmc.trend import _drift_summaries

    post = _hand_posterior()
    tc = np.array([-1.5, -0.5, 0.5, 1.5])
    data = dict(y=np.log([70.0, 78.0, 83.0, 92.0]), tc=tc, ev=np.full(4, 0.001), sb=0.1,
                cvi=0.10, cvi_log_sd=0.2)
    out = _drift_summaries(post, data, 0.3, 0.9)
    th = post["theta0"].values.ravel()
    beta = post["beta"].values.ravel()
    cv = 0.10 * np.exp(0.2 * post["z"].values.ravel())
    dens, pinc = [], []
    for t0, c in zip(th, cv):
        v = np.diag(np.log1p(c * c) + data["ev"])
        big = v + 0.01 * np.outer(tc, tc)
        dens.append(stats.multivariate_normal(np.full(4, t0), v).pdf(data["y"])
                    * stats.norm.pdf(0.0, 0.0, 0.1)
                    / stats.multivariate_normal(np.full(4, t0), big).pdf(data["y"]))
        k = 0.01 * tc @ np.linalg.inv(big)
        pinc.append(stats.norm.sf(0.0, k @ (data["y"] - t0), np.sqrt(0.01 - 0.01 * k @ tc)))
    dens = np.array(dens)
    log_bf = np.log(stats.norm.pdf(0.0, 0.0, 0.1)) - np.log(dens.mean())
    assert abs(out["log_bf10"] - log_bf) < 1e-9
    p_drift = 0.3 * np.exp(log_bf) / (0.3 * np.exp(log_bf) + 0.7)
    assert abs(out["p_drift"] - p_drift) < 1e-12 and abs(out["bf10"] - np.exp(log_bf)) < 1e-9
    assert abs(out["p_increase"] - np.mean(pinc)) < 1e-9
    mcse_d = _az_mcse(dens.reshape(2, 150))
    assert abs(out["log_bf10_mcse"] - mcse_d / dens.mean()) < 1e-6 * out["log_bf10_mcse"]
    assert abs(out["slope_mean_mcse"] - _az_mcse(beta.reshape(2, 150))) < 1e-12
    assert out["slope_mean"] == pytest.approx(np.mean(beta), abs=1e-15)
    assert out["slope_sd"] == pytest.approx(np.std(beta, ddof=1), rel=1e-12)
    for key, q in (("slope_lower", 0.05), ("slope_upper", 0.95)):
        assert out[key] == np.quantile(beta, q, method="inverted_cdf")
    pct = 100.0 * np.expm1(beta)
    assert out["pct_per_year_upper"] == np.quantile(pct, 0.95, method="inverted_cdf")
    cand = np.sort(np.append(pct, 0.0))
    cdf = p_drift * np.mean(pct[None, :] <= cand[:, None], axis=1) + (1 - p_drift) * (cand >= 0)
    for key, q in (("pct_per_year_avg_lower", 0.05), ("pct_per_year_avg_upper", 0.95)):
        assert out[key] == pytest.approx(cand[np.argmax(cdf >= q)], abs=1e-12), key
    assert out["pct_per_year_avg_mean"] == pytest.approx(p_drift * pct.mean(), rel=1e-12)


def test_mcmc_limit_stage_matches_crossing_times_per_draw():
    """Crossing time per draw written out here: 0 if theta_last is beyond ln L, (ln L -
    theta_last) / beta if moving toward it, +inf otherwise or past the horizon; quantiles as
    numpy inverted-CDF quantiles; median MCSE by ArviZ (quantile method)."""
    from bayesbase.mcmc.trend import _limit_summaries

    dt = 1.5
    for beta_mean, limit, side in ((0.08, np.log(120.0), "upper"),
                                   (-0.08, np.log(60.0), "lower")):
        post = _hand_posterior(beta_mean)
        th = post["theta0"].values.ravel()
        beta = post["beta"].values.ravel()
        lu, ll = (limit, np.nan) if side == "upper" else (np.nan, limit)
        out = _limit_summaries(post, dt, lu, ll, 0.95, 10.0)
        last = th + beta * dt
        t = []
        for tl, b in zip(last, beta):
            gap = (limit - tl) if side == "upper" else (tl - limit)
            rate = b if side == "upper" else -b
            t.append(0.0 if gap <= 0 else (gap / rate if rate > 0 else np.inf))
        t = np.array(t)
        t[t > 10.0] = np.inf
        assert out["limit_side"] == side
        assert out["theta_last_mean"] == pytest.approx(last.mean(), abs=1e-14)
        for key, q in (("years_to_limit", 0.5), ("years_to_limit_lower", 0.025),
                       ("years_to_limit_upper", 0.975)):
            assert out[key] == pytest.approx(np.quantile(t, q, method="inverted_cdf"),
                                             rel=1e-12), key
        assert 0 < out["years_to_limit"] < 10.0
        ref_se = _az_mcse(np.minimum(t, 20.0).reshape(2, 150), method="quantile", prob=0.5)
        assert out["years_to_limit_mcse"] == pytest.approx(ref_se, rel=1e-12)
        assert out["p_beyond_limit"] == np.mean(t == 0.0)
    # slope pointing away from the only limit given: +inf years; no limit at all: nothing
    post = _hand_posterior(0.08)
    away = _limit_summaries(post, dt, np.nan, np.log(60.0), 0.95, 10.0)
    assert away["limit_side"] == "" and np.isinf(away["years_to_limit"])
    assert "p_beyond_limit" not in away
    none = _limit_summaries(post, dt, np.nan, np.nan, 0.95, 10.0)
    assert none["limit_side"] == "" and set(none) == {"theta_last_mean", "limit_side"}


# ------------------------------------------------ fast kernels against plain scipy references
def _brentq_mixture(q, w, m, s):
    # reference: scipy.optimize.brentq on the mixture CDF built from scipy.stats.norm.cdf
    from scipy import optimize

    lo, hi = np.min(m - 40 * s), np.max(m + 40 * s)
    return optimize.brentq(lambda x: np.sum(w * stats.norm.cdf(x, m, s)) - q, lo, hi, xtol=1e-14)


def _reference_series(t, y, r, e, mu, sg, cvi, s, sa, sb, pi, lim_up, lim_lo, nodes=16, ci=0.95):
    """One series the plain way: per node the two marginal likelihoods from
    scipy.stats.multivariate_normal (covariance X D X' + V), the conjugate bivariate posterior
    by numpy.linalg, mixture quantiles and crossing times by scipy.optimize.brentq."""
    from scipy import optimize
    from scipy.special import expit, logsumexp

    use = np.isfinite(t) & np.isfinite(y) & (r > 0)
    t, y, r, e = t[use], y[use], r[use], e[use]
    tc = t - t.mean()
    X = np.column_stack([np.ones(t.size), tc])
    x, wn = np.polynomial.hermite_e.hermegauss(nodes)
    wn = wn / wn.sum()
    l0, l1, mt, mb, cov = (np.zeros(nodes) for _ in range(5))
    covs = []
    for k in range(nodes):
        v = np.log1p((cvi * np.exp(s * x[k])) ** 2) + sa**2 / r + e
        D = np.diag([sg**2, sb**2])
        l0[k] = stats.multivariate_normal(np.full(t.size, mu), sg**2 + np.diag(v)).logpdf(y)
        l1[k] = stats.multivariate_normal(np.full(t.size, mu), X @ D @ X.T + np.diag(v)).logpdf(y)
        S = np.linalg.inv(X.T @ (X / v[:, None]) + np.linalg.inv(D))
        mt[k], mb[k] = S @ (X.T @ (y / v) + np.array([mu / sg**2, 0.0]))
        covs.append(S)
    lw1 = np.log(wn) + l1
    log_bf = logsumexp(lw1) - logsumexp(np.log(wn) + l0)
    w = np.exp(lw1 - logsumexp(lw1))
    vb = np.array([c[1, 1] for c in covs])
    a = 0.5 * (1 - ci)
    out = dict(log_bf10=log_bf, p_drift=expit(np.log(pi / (1 - pi)) + log_bf), slope_mean=np.sum(w * mb),
               slope_lower=_brentq_mixture(a, w, mb, np.sqrt(vb)),
               slope_upper=_brentq_mixture(1 - a, w, mb, np.sqrt(vb)))
    tl = t.max() - t.mean()
    m_last = mt + mb * tl
    v_last = np.array([c[0, 0] + 2 * tl * c[0, 1] + tl * tl * c[1, 1] for c in covs])
    c_lb = np.array([c[0, 1] + tl * c[1, 1] for c in covs])
    sign, lim = (1.0, lim_up) if out["slope_mean"] > 0 else (-1.0, lim_lo)
    if np.isfinite(lim):
        def beyond(tau):  # P(set point beyond the limit tau years after the last specimen)
            sd = np.sqrt(v_last + 2 * tau * c_lb + tau * tau * vb)
            return np.sum(w * stats.norm.cdf((sign * (m_last + mb * tau) - sign * lim) / sd))
        for key, q in (("years_to_limit", 0.5), ("years_to_limit_lower", a), ("years_to_limit_upper", 1 - a)):
            if beyond(0.0) >= q:
                out[key] = 0.0
            elif beyond(TREND_HORIZON_YEARS) < q:
                out[key] = np.inf
            else:
                out[key] = optimize.brentq(lambda tau: beyond(tau) - q, 0.0, TREND_HORIZON_YEARS, xtol=1e-12)
    return out


@pytest.fixture(params=["compiled", "numpy"])
def kernel_path(request, monkeypatch):
    """Run a test with the numba loops (a declared dependency) and with the numpy/scipy path
    small inputs take."""
    from bayesbase.model import normal, trend

    if request.param == "compiled":
        assert normal.prepare(10**9)
        assert trend._kernels(10**9)
        monkeypatch.setattr(trend, "_kernels", lambda size=None: trend._K)  # small jobs too
    else:
        monkeypatch.setattr(normal, "_kernels", lambda size=None: None)
        monkeypatch.setattr(trend, "_kernels", lambda size=None: None)
    return request.param


def test_trend_fast_path_equals_plain_reference(kernel_path):
    """Seeded series with padding, replicates, extra variance, CVI uncertainty from none to
    large and both limits: the blocked kernel equals the plain per-series computation (scipy's
    multivariate normal, numpy.linalg, brentq) to 1e-9 on probabilities, 1e-8 on slope limits
    and 1e-6 years on the time to a limit (the solver's tolerance is 1e-7), in blocks of 7 and
    in one block."""
    rng = np.random.default_rng(4242)
    n, j = 40, 6
    t = np.sort(rng.uniform(0, 6, (n, j)), axis=1)
    y = np.log(90) + rng.normal(0, 0.2, (n, 1)) + rng.normal(0, 0.12, (n, 1)) * (t - 3) + rng.normal(0, 0.08, (n, j))
    y[rng.random((n, j)) < 0.1] = np.nan
    r = rng.choice([0.0, 1.0, 1.0, 1.0, 2.0], (n, j))
    e = np.where(rng.random((n, j)) < 0.15, rng.uniform(0, 0.01, (n, j)), 0.0)
    mu = np.log(90) + rng.normal(0, 0.1, n)
    sg, cvi, s = rng.uniform(0.1, 0.4, n), rng.uniform(0.03, 0.3, n), rng.choice([0.0, 0.1, 0.4, 0.9], n)
    sa, sb, pi = rng.uniform(0, 0.05, n), rng.choice([0.03, 0.1, 0.3], n), rng.uniform(0.05, 0.6, n)
    lu, ll = np.log(rng.uniform(110, 200, n)), np.log(rng.uniform(30, 80, n))
    for chunk in (7, 20_000):
        out = trend_exact(t, y, r, e, mu, sg, cvi, s, sa, sb, prior_drift=pi, limit_upper=lu, limit_lower=ll,
                          nodes=16, chunk=chunk)
        checked = 0
        for i in np.nonzero(out["eligible"])[0]:
            ref = _reference_series(t[i], y[i], r[i], e[i], mu[i], sg[i], cvi[i], s[i], sa[i], sb[i], pi[i],
                                    lu[i], ll[i])
            for key, val in ref.items():
                tol = {"log_bf10": 1e-9 * max(1, abs(val)), "slope_lower": 1e-8, "slope_upper": 1e-8}.get(key, 1e-9)
                if key.startswith("years"):
                    tol = 1e-6
                got = out[key][i]
                assert (np.isinf(got) and np.isinf(val)) or abs(got - val) <= tol, (key, i, got, val)
            checked += 1
        assert checked >= 30


def test_compiled_exp_log_and_start_quantile_match_numpy_and_scipy():
    """The drift loops' call-free exp and log (written so the loops vectorise) against numpy's
    exp and log (within 2 ulp over the range the model uses, and their special values), and the
    solvers' start quantile against scipy.special.ndtri (within 1e-7)."""
    import numba

    from bayesbase.model import _jit_trend as k

    @numba.njit
    def apply(x, out_e, out_l):
        for i in range(x.size):
            out_e[i] = k.vexp(x[i])
            out_l[i] = k.vlog(x[i])

    xe = np.concatenate([np.linspace(-700.0, 700.0, 200_001), -np.logspace(-300, 2, 1001)])
    xl = np.concatenate([np.exp(np.linspace(-700.0, 700.0, 200_001)), np.linspace(0.5, 2.0, 10_001),
                         [5e-324, 1e-310]])
    for x, ref_fn, slot in ((xe, np.exp, 0), (xl, np.log, 1)):
        got = [np.empty_like(x), np.empty_like(x)]
        apply(x, *got)
        ref = ref_fn(x)
        ulps = np.abs(got[slot] - ref) / np.spacing(np.abs(ref))
        assert np.max(ulps[ref != 0]) <= 2.0, (ref_fn.__name__, np.max(ulps[ref != 0]))
    special_x = np.array([0.0, -np.inf, np.inf, np.nan, -1.0, -800.0])
    got_e, got_l = np.empty(6), np.empty(6)
    apply(special_x, got_e, got_l)
    with np.errstate(all="ignore"):
        np.testing.assert_array_equal(got_e[:5], np.exp(special_x[:5]))
        np.testing.assert_array_equal(got_l, np.log(special_x))
    assert got_e[5] == 0.0  # below -708 the compiled exp flushes to 0 (numpy: 0 too, after underflow)
    q = np.concatenate([np.logspace(-300, -1, 300), np.linspace(0.1, 0.9, 41), 1 - np.logspace(-15, -1, 60)])
    got = np.array([k.ndtri_start(v) for v in q])
    assert np.max(np.abs(got - special.ndtri(q))) < 1e-7
