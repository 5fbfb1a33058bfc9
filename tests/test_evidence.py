"""Evidence behind a prior CVI: DerSimonian-Laird combination, CI and design standard errors."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from bayesbase import evidence as ev

# Three published feline creatinine within-cat CVs (fractions) and the design standard errors of
# ln CVI, 1/sqrt(2 df) with df = animals x (specimens - 1):
#   Baral et al. 2014 (J Feline Med Surg 16:317): 5.97 %, 14 cats x 6 specimens -> df 70, w = 140
#   Summers et al. (J Small Anim Pract, doi:10.1111/jsap.13892): RCV 19.8 % -> CVI 6.48 % (CVA 3 %),
#       11 cats x 6 specimens -> df 55, w = 110
#   Finch et al. 2018 (J Feline Med Surg 20:1144): 8.82 %, 24 cats x 2 visits -> df 24, w = 48
CVS = np.array([0.0597, 0.0648, 0.0882])
W = np.array([140.0, 110.0, 48.0])
SE = 1.0 / np.sqrt(W)


def test_dersimonian_laird_matches_hand_computation():
    # By hand (DerSimonian & Laird, Control Clin Trials 1986;7:177):
    #   y = ln CV = (-2.818423, -2.736450, -2.428148)
    #   sum w = 298; mu_FE = (140*-2.818423 + 110*-2.736450 + 48*-2.428148) / 298 = -2.725301
    #   Q = 140*(-0.093122)^2 + 110*(-0.011149)^2 + 48*(0.297153)^2 = 1.21402 + 0.01367 + 4.23842
    #     = 5.46610 (rounding in the last digit)
    #   C = 298 - (140^2 + 110^2 + 48^2) / 298 = 298 - 34004/298 = 183.8926
    #   tau^2 = (5.46610 - 2) / 183.8926 = 0.018849
    r = ev.dersimonian_laird(np.log(CVS), SE)
    assert r.mu_fixed == pytest.approx(-2.725301, abs=2e-6)
    assert r.q == pytest.approx(5.46610, abs=2e-4)
    assert r.tau2 == pytest.approx(0.018849, abs=2e-6)
    assert r.df == 2 and r.k == 3
    assert r.i2 == pytest.approx((5.46610 - 2) / 5.46610, abs=1e-4)
    # random-effects weights 1/(s_i^2 + tau^2) by hand
    wr = 1 / (1 / W + 0.018849)
    mu = float((wr * np.log(CVS)).sum() / wr.sum())
    assert r.mu == pytest.approx(mu, abs=1e-5)
    assert r.se == pytest.approx(1 / math.sqrt(wr.sum()), abs=1e-5)
    assert r.weights.sum() == pytest.approx(1.0)


def test_dersimonian_laird_agrees_with_statsmodels():
    # outside reference: statsmodels.stats.meta_analysis.combine_effects(method_re="dl")
    meta = pytest.importorskip("statsmodels.stats.meta_analysis")
    rng = np.random.default_rng(20261201)
    cases = [(np.log(CVS), SE),
             (np.log([0.05, 0.08, 0.13]), np.array([0.08, 0.09, 0.10])),  # heterogeneous
             (rng.normal(-2.5, 0.3, 6), rng.uniform(0.05, 0.2, 6))]
    for y, se in cases:
        ours = ev.dersimonian_laird(y, se)
        ref = meta.combine_effects(y, se**2, method_re="dl")
        assert ours.mu == pytest.approx(ref.mean_effect_re, abs=1e-10)
        assert ours.mu_fixed == pytest.approx(ref.mean_effect_fe, abs=1e-10)
        assert ours.tau2 == pytest.approx(ref.tau2, abs=1e-10)
        assert ours.se == pytest.approx(ref.sd_eff_w_re, rel=1e-8)
        assert ours.q == pytest.approx(ref.q, rel=1e-10)


def test_two_agreeing_studies_have_no_between_study_variance():
    # Baral 5.97 % and Summers-derived 6.48 %: for two studies Q = w1 w2 / (w1 + w2) (y1 - y2)^2
    # = 140*110/250 * (ln(6.48/5.97))^2 = 61.6 * 0.081973^2 = 0.41393 < df 1, so tau^2_DL truncates
    # at 0 and the random-effects mean equals the fixed-effect one.
    r = ev.dersimonian_laird(np.log(CVS[:2]), SE[:2])
    assert r.tau2 == 0.0 and r.i2 == 0.0
    assert r.mu == pytest.approx(r.mu_fixed)
    assert r.q == pytest.approx(0.41393, abs=1e-4)
    assert ev.predictive_log_sd(r) == pytest.approx(r.se)


def test_combination_rule_floors_tau_below_three_studies():
    one = ev.combine_log_cvi([math.log(0.0597)], [SE[0]])
    # k = 1: mu = y, SE(mu)^2 = s^2 + tau^2, predictive SD = sqrt(s^2 + 2 tau^2)
    assert one["cvi"] == pytest.approx(0.0597)
    assert one["tau_used"] == ev.TAU_FLOOR
    assert one["cvi_log_sd"] == pytest.approx(math.sqrt(1 / 140 + 2 * ev.TAU_FLOOR**2))
    three = ev.combine_log_cvi(np.log(CVS), SE)
    dl = ev.dersimonian_laird(np.log(CVS), SE)
    assert three["tau_used"] == pytest.approx(dl.tau)           # k >= 3: DL tau on its own
    assert three["cvi_log_sd"] == pytest.approx(ev.predictive_log_sd(dl))
    assert math.log(three["cvi"]) == pytest.approx(dl.mu)


def test_log_sd_from_ci_is_ln_ratio_over_3_92():
    assert ev.log_sd_from_ci(0.04, 0.09) == pytest.approx(math.log(0.09 / 0.04) / (2 * 1.959964), rel=1e-6)
    # a log-normal 95 % interval exp(m +/- 1.96 s) gives back s
    s = 0.23
    lo, hi = math.exp(-2 - 1.959964 * s), math.exp(-2 + 1.959964 * s)
    assert ev.log_sd_from_ci(lo, hi) == pytest.approx(s, rel=1e-6)
    with pytest.raises(ValueError):
        ev.log_sd_from_ci(0.09, 0.04)


def test_design_se_approximates_exact_chi_square_result():
    # Exact: if df * s^2 / sigma^2 ~ chi2(df), Var(ln s) = trigamma(df/2) / 4 (scipy.special.polygamma).
    for df in (24, 55, 70, 160):
        exact = math.sqrt(special.polygamma(1, df / 2) / 4)
        approx = ev.se_log_cv_from_design(0.06, n_animals=df, n_specimens=2)
        assert approx == pytest.approx(1 / math.sqrt(2 * df))
        assert approx == pytest.approx(exact, rel=0.05)


def test_design_se_grows_when_analytical_variation_is_removed():
    # Delta method check against a seeded simulation of a nested design (CVI 5 %, CVA 4 %, duplicates)
    rng = np.random.default_rng(7)
    n_a, n_s, n_r, cvi, cva = 14, 6, 2, 0.05, 0.04
    est = []
    for _ in range(4000):
        x = rng.normal(0, cvi, (n_a, n_s, 1)) + rng.normal(0, cva, (n_a, n_s, n_r))
        spec = x.mean(axis=2)
        ms_w = ((spec - spec.mean(axis=1, keepdims=True)) ** 2).sum() / (n_a * (n_s - 1))
        ms_a = ((x - x.mean(axis=2, keepdims=True)) ** 2).sum() / (n_a * n_s * (n_r - 1))
        v = ms_w - ms_a / n_r
        if v > 0:
            est.append(0.5 * math.log(v))
    sim_sd = float(np.std(est))
    se = ev.se_log_cv_from_design(cvi, n_a, n_s, cva=cva, n_replicates=n_r)
    assert se > ev.se_log_cv_from_design(cvi, n_a, n_s)
    assert se == pytest.approx(sim_sd, rel=0.15)


def test_cvi_from_rcv_inverts_the_classical_rcv():
    # Fraser & Harris 1989: RCV = sqrt(2) * 1.96 * sqrt(CVA^2 + CVI^2)
    cvi = ev.cvi_from_rcv(0.237, 0.03)
    assert math.sqrt(2) * stats.norm.ppf(0.975) * math.hypot(0.03, cvi) == pytest.approx(0.237)
    assert cvi == pytest.approx(0.0801, abs=5e-5)
    with pytest.raises(ValueError):
        ev.cvi_from_rcv(0.05, 0.03)


def test_bad_inputs_are_refused():
    with pytest.raises(ValueError):
        ev.dersimonian_laird([], [])
    with pytest.raises(ValueError):
        ev.dersimonian_laird([1.0, 2.0], [0.1, 0.0])
    with pytest.raises(ValueError):
        ev.se_log_cv_from_design(0.05, 10, 1)
