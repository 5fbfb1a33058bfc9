"""PyMC engine (bayesbase.mcmc): the model's log density against scipy.stats, agreement with the
exact engine within Monte Carlo error, convergence reporting, censoring against scipy
integration, dims, provenance, and simulation-based calibration.

All panels below are invented for these tests (no real animals); the CVs are plausible demo
numbers, labelled as such.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

mcmc = pytest.importorskip("bayesbase.mcmc.engine")

from bayesbase.model.engine import CaseArrays, cv_to_sigma, exact_assess  # noqa: E402

# Invented demo panel: two dogs; dog "d2" has no urea (a padded grid cell); 0-3 baselines.
PATIENTS = ["d1", "d1", "d1", "d1", "d2", "d2", "d2"]
ANALYTES = ["creatinine", "alt", "glucose", "urea", "creatinine", "alt", "glucose"]
BASELINES = [[], [3.70], [1.60, 1.72], [1.85, 1.70, 1.78], [4.60, 4.52], [], [1.55]]
SCALARS = dict(
    prior_mean=[4.55, 3.60, 1.70, 1.75, 4.55, 3.60, 1.70],
    sg=[0.20, 0.35, 0.10, 0.25, 0.20, 0.35, 0.10],
    cvi=[0.07, 0.20, 0.06, 0.14, 0.07, 0.20, 0.06],
    cvi_log_sd=[0.3, 0.2, 0.4, 0.3, 0.25, 0.2, 0.35],
    sa=[0.03, 0.04, 0.02, 0.03, 0.03, 0.04, 0.02],
    new_y=[4.75, 4.20, 1.62, 1.90, 4.58, 3.30, 1.72],
    prior_change=0.1,
    delta=np.log(1.2),
)
KEYS = ("theta_mean", "theta_lower", "theta_upper", "pi_lower", "pi_upper", "percentile",
        "log_bf10", "p_change", "p_increase", "p_exceed_delta", "cvi_post_mean")


def _panel():
    return CaseArrays.from_lists(BASELINES, **SCALARS)


@pytest.fixture(scope="module")
def panel_fit():
    """One fit of the small panel, shared by the slow tests of this module."""
    return mcmc.mcmc_assess(_panel(), draws=500, tune=500, chains=4, seed=20240611,
                            patient=PATIENTS, analyte=ANALYTES)


# ------------------------------------------------------------------ fast: model log density
def test_logp_matches_scipy_reference():
    """The compiled model log density at a point equals a hand-written log density built from
    scipy.stats (norm.logpdf / logcdf / logsf; t.logpdf for the robust variant)."""
    cases = CaseArrays.from_lists(
        [[4.1, 3.9], [2.0]], prior_mean=[4.0, 2.2], sg=[0.2, 0.3], cvi=[0.1, 0.25],
        cvi_log_sd=[0.3, 0.0], sa=[0.03, 0.05], new_y=np.nan, prior_change=0.1,
        base_censor=[[0, -1], [1, 0]],  # (C, J) padded
    )
    data, coords, structure, pidx, aidx, *_ = mcmc._layout(cases, ["p", "p"], ["a", "b"])
    assert structure == dict(has_eta=True, has_obs=True, censored=True)
    z = np.array([[0.4, -1.1]])
    eta = np.array([[0.7, -0.3]])
    for robust in (False, True):
        model = mcmc.build_model(data, coords, robust=robust, nu=4.0, **structure)
        logp = model.compile_logp()
        got = float(logp({"z": z, "eta": eta}))
        theta = np.array([4.0, 2.2]) + np.array([0.2, 0.3]) * z[0]
        cvi = np.array([0.1, 0.25]) * np.exp(np.array([0.3, 0.0]) * eta[0])
        sd = np.sqrt(np.log1p(cvi**2) + np.array([0.03, 0.05]) ** 2)
        if robust:
            d = stats.t(df=4.0, loc=theta[[0, 0, 1]], scale=sd[[0, 0, 1]])
        else:
            d = stats.norm(loc=theta[[0, 0, 1]], scale=sd[[0, 0, 1]])
        ref = (stats.norm.logpdf(z).sum() + stats.norm.logpdf(eta).sum()
               + d.logpdf(4.1)[0]          # observed
               + d.logcdf(3.9)[1]          # "<3.9": P(y < 3.9)
               + d.logsf(2.0)[2])          # ">2.0": P(y > 2.0)
        # PyTensor's normal log-CDF differs from scipy's in the 8th digit (measured 2e-8)
        assert got == pytest.approx(ref, rel=1e-7, abs=1e-7)


def test_layout_rejects_repeated_pair_and_bad_labels():
    cases = CaseArrays.from_lists([[1.0], [1.1]], prior_mean=1.0, sg=0.2, cvi=0.1,
                                  cvi_log_sd=0.2, sa=0.02, new_y=np.nan, prior_change=0.1)
    with pytest.raises(ValueError, match="repeated"):
        mcmc._layout(cases, ["p", "p"], ["a", "a"])
    with pytest.raises(ValueError, match="2 labels"):
        mcmc._layout(cases, ["p"], None)


# ------------------------------------------------------------------ slow: one shared panel fit
@pytest.mark.slow
def test_agreement_with_exact_engine(panel_fit):
    """Every summary key agrees with bayesbase.engine.exact_assess (the same model solved by
    quadrature; its own accuracy is tested against a dense grid in test_engine) within
    |mcmc - exact| <= 4 * mc_se + floor, floor 0.004 on the log scale and for probabilities
    (covers the error of the MCSE estimate itself); log_bf10 gets floor 0.02."""
    ex = exact_assess(_panel())
    got, se = panel_fit.summary, panel_fit.mc_se
    assert set(got) == set(ex)
    np.testing.assert_array_equal(got["n_baseline"], ex["n_baseline"])
    for key in KEYS:
        floor = 0.02 if key == "log_bf10" else 0.004
        diff = np.abs(got[key] - ex[key])
        tol = 4.0 * se[key] + floor
        assert np.all(np.isfinite(se[key])) and np.all(se[key] > 0), key
        assert np.all(diff <= tol), (key, diff, tol)
    np.testing.assert_allclose(got["bf10"], np.exp(got["log_bf10"]))


@pytest.mark.slow
def test_diagnostics_and_dims(panel_fit, tmp_path):
    d = panel_fit.diagnostics
    assert d["converged"] is True
    assert d["max_r_hat"] <= mcmc.RHAT_MAX and d["min_ess_bulk"] >= mcmc.ESS_MIN
    assert d["min_ess_tail"] >= mcmc.ESS_MIN and d["divergences"] == 0
    assert d["r_hat"].shape == (7,) and d["ess_bulk"].shape == (7,)
    post = panel_fit.idata.posterior
    assert set(post["theta"].dims) == {"chain", "draw", "patient", "analyte"}
    assert "sample" not in post.dims
    assert list(post["patient"].values) == ["d1", "d2"]
    assert list(post["analyte"].values) == ["creatinine", "alt", "glucose", "urea"]
    assert "obs" in panel_fit.idata.observed_data["ybar"].dims
    assert panel_fit.idata.observed_data.sizes["obs"] == sum(len(b) for b in BASELINES)
    s = panel_fit.settings
    assert (s["draws"], s["tune"], s["chains"], s["seed"]) == (500, 500, 4, 20240611)


@pytest.mark.slow
def test_idata_saved_with_provenance(panel_fit, tmp_path):
    import xarray as xr

    path = tmp_path / "fit.nc"
    mcmc.save_idata(panel_fit.idata, path, panel_fit.settings,
                    attrs={"pack_id": "demo_dog", "pack_sha256": "ab" * 32})
    ds = xr.open_dataset(path, group="posterior", engine="h5netcdf")
    try:
        assert ds.attrs["engine"] == "mcmc"
        assert int(ds.attrs["seed"]) == 20240611
        assert ds.attrs["pack_id"] == "demo_dog"
        assert "bayesbase_version" in ds.attrs
        np.testing.assert_allclose(ds["theta"].values, panel_fit.idata.posterior["theta"].values)
    finally:
        ds.close()


@pytest.mark.slow
def test_under_run_fit_is_reported_not_converged(tmp_path):
    """20 draws after 5 tuning steps cannot reach ESS 400: converged must be False (and the
    summaries are still returned, for the caller to mark). Also writes idata_path."""
    import xarray as xr

    path = tmp_path / "short.nc"
    r = mcmc.mcmc_assess(_panel(), draws=20, tune=5, chains=2, seed=3, patient=PATIENTS,
                         analyte=ANALYTES, idata_path=path, attrs={"pack_id": "demo_dog"})
    assert r.diagnostics["converged"] is False
    assert r.diagnostics["min_ess_bulk"] < mcmc.ESS_MIN
    assert np.all(np.isfinite(r.summary["theta_mean"]))
    with xr.open_dataset(path, group="posterior", engine="h5netcdf") as ds:
        assert ds.attrs["engine"] == "mcmc" and ds.attrs["pack_id"] == "demo_dog"
        assert int(ds.attrs["setting_draws"]) == 20 and ds.sizes["draw"] == 20


@pytest.mark.slow
def test_censoring_against_scipy_integration():
    """Known CVI (cvi_log_sd = 0), so the reference is one-dimensional:
    case 0: baselines 4.0 and "<3.8": posterior mean of theta by scipy.integrate.quad of
    N(theta; mu, sG) N(4.0; theta, sd) Phi((3.8 - theta) / sd); it lies below the exact engine's
    answer, which treats "<3.8" as observed at 3.8.
    case 1: baselines 4.0, 4.1 (theta posterior exactly normal) and an assessed "<3.7": BF10 =
    Phi((L - m) / sqrt(pv + V0 + tau^2)) / Phi((L - m) / sqrt(pv + V0)) (scipy.stats.norm) and
    P(D > 0 | y* < L, H1) from scipy.stats.multivariate_normal.cdf.
    Tolerance 4 * mc_se + 0.004 (log_bf10: + 0.02)."""
    mu, sg, cvi, sa, tau = 4.0, 0.2, 0.1, 0.03, 0.25
    cases = CaseArrays.from_lists(
        [[4.0, 3.8], [4.0, 4.1]], prior_mean=mu, sg=sg, cvi=cvi, cvi_log_sd=0.0, sa=sa,
        new_y=[np.nan, 3.7], new_censor=[0, -1], tau=tau, prior_change=0.1,
        base_censor=[[0, -1], [0, 0]],
    )
    r = mcmc.mcmc_assess(cases, draws=500, tune=500, chains=4, seed=77)
    assert r.converged
    sd = float(np.sqrt(cv_to_sigma(cvi) ** 2 + sa**2))

    def post(t):
        return (stats.norm.pdf(t, mu, sg) * stats.norm.pdf(4.0, t, sd)
                * stats.norm.cdf((3.8 - t) / sd))

    z0 = integrate.quad(post, 2.0, 6.0, epsabs=0, epsrel=1e-10)[0]
    m_ref = integrate.quad(lambda t: t * post(t), 2.0, 6.0, epsabs=0, epsrel=1e-10)[0] / z0
    got, se = r.summary, r.mc_se
    assert abs(got["theta_mean"][0] - m_ref) <= 4 * se["theta_mean"][0] + 0.004
    as_observed = exact_assess(cases)["theta_mean"][0]
    assert got["theta_mean"][0] < as_observed - 0.01

    # case 1: conjugate normal posterior of theta, then closed-form censored predictive
    v = sd**2
    pv = 1.0 / (1.0 / sg**2 + 2.0 / v)
    m = pv * (mu / sg**2 + (4.0 + 4.1) / v)
    v0 = pv + v
    lim = 3.7
    bf_ref = stats.norm.cdf((lim - m) / np.sqrt(v0 + tau**2)) / stats.norm.cdf(
        (lim - m) / np.sqrt(v0))
    assert abs(got["log_bf10"][1] - np.log(bf_ref)) <= 4 * se["log_bf10"][1] + 0.02
    # (-D, y*) is bivariate normal: Var(-D) = tau^2, Cov(-D, y*) = -tau^2, Var(y*) = V0 + tau^2
    vy = v0 + tau**2
    joint = stats.multivariate_normal(mean=[0.0, m], cov=[[tau**2, -tau**2], [-tau**2, vy]])
    p_inc_ref = joint.cdf([0.0, lim]) / stats.norm.cdf((lim - m) / np.sqrt(vy))
    assert abs(got["p_increase"][1] - p_inc_ref) <= 4 * se["p_increase"][1] + 0.004
    pct_ref = stats.norm.cdf((lim - m) / np.sqrt(v0))
    assert abs(got["percentile"][1] - pct_ref) <= 4 * se["percentile"][1] + 0.004


@pytest.mark.slow
def test_simulation_based_calibration_of_set_point():
    """SBC (Talts et al. 2018, arXiv:1804.06788): 40 prior replicates fitted as independent
    patients of one model; the ranks of the true theta among 256 thinned draws must look
    uniform: scipy.stats.chisquare over 8 bins and scipy.stats.kstest both with p > 0.001
    (lenient: the check is for gross miscalibration, such as a wrong variance)."""
    out = mcmc.sbc_setpoint(n_rep=40, draws=256, tune=400, chains=4, thin=4, batch=40,
                            seed=99)
    assert len(out["ranks"]) == 40 and out["n_kept"] == 256
    assert out["chisq_p"] > 1e-3
    assert out["ks_p"] > 1e-3


@pytest.mark.slow
def test_optional_nutpie_sampler_agrees_with_exact_engine():
    """The optional nutpie sampler (skipped when the package is absent) on the same panel:
    same tolerance as above, |mcmc - exact| <= 4 * mc_se + 0.004 (log_bf10: + 0.02)."""
    pytest.importorskip("nutpie")
    r = mcmc.mcmc_assess(_panel(), draws=500, tune=500, chains=4, seed=5, sampler="nutpie",
                         patient=PATIENTS, analyte=ANALYTES)
    assert r.converged and r.settings["sampler"] == "nutpie"
    assert list(r.idata.posterior["analyte"].values) == ["creatinine", "alt", "glucose", "urea"]
    ex = exact_assess(_panel())
    for key in KEYS:
        floor = 0.02 if key == "log_bf10" else 0.004
        assert np.all(np.abs(r.summary[key] - ex[key]) <= 4.0 * r.mc_se[key] + floor), key
