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


def _moments_reference(y, mu, sg, cvi, s, sa):
    """Posterior mean and variance of z = (theta - mu) / sG and of eta for one case, by
    scipy.integrate.quad over eta: p(eta | y) is proportional to N(eta; 0, 1) times the
    marginal density of the baselines with theta integrated out, N(y; mu 1, sG^2 11' +
    (sI(eta)^2 + sA^2) I) (scipy.stats.multivariate_normal); given eta, theta is normal by the
    textbook normal-normal update (Gelman et al., Bayesian Data Analysis, 3rd ed., sec. 2.5)."""
    y = np.asarray(y, float)
    n = y.size

    def v(e):
        return cv_to_sigma(cvi * np.exp(s * e)) ** 2 + sa**2

    def cond(e):
        prec = 1.0 / sg**2 + n / v(e)
        return (mu / sg**2 + y.sum() / v(e)) / prec, 1.0 / prec

    def dens(e):
        if n == 0:  # no baseline: the prior
            return stats.norm.pdf(e)
        cov = sg**2 * np.ones((n, n)) + v(e) * np.eye(n)
        return stats.norm.pdf(e) * stats.multivariate_normal(np.full(n, mu), cov).pdf(y)

    def mean_of(f):
        return integrate.quad(lambda e: f(e) * dens(e), -10, 10, epsabs=1e-11 * z0,
                              epsrel=1e-10, limit=200)[0] / z0

    z0 = integrate.quad(dens, -10, 10, epsabs=0, epsrel=1e-10, limit=200)[0]
    e_mean = mean_of(lambda e: e)
    e_var = mean_of(lambda e: e * e) - e_mean**2
    t_mean = mean_of(lambda e: cond(e)[0])
    t_var = mean_of(lambda e: cond(e)[1] + (cond(e)[0] - t_mean) ** 2)
    return (t_mean - mu) / sg, t_var / sg**2, e_mean, e_var


def test_informed_start_moments_match_scipy_integration():
    """The posterior means and variances that start NUTS on a plain normal model (the mass
    matrix and starting points, ``_exact_moments``) against :func:`_moments_reference`
    (scipy quadrature of the same model), every case of the panel; the padded grid cell
    (d2, urea) keeps the prior N(0, 1) for z and eta. A case with known CVI (cvi_log_sd 0)
    keeps eta at its prior N(0, 1) (eta does not enter its likelihood)."""
    scal = dict(SCALARS, cvi_log_sd=[0.3, 0.2, 0.0, 0.3, 0.25, 0.2, 0.35])
    cases = CaseArrays.from_lists(BASELINES, **scal)
    _, coords, _, pidx, aidx, _, _ = mcmc._layout(cases, PATIENTS, ANALYTES)
    mom = mcmc._exact_moments(cases, pidx, aidx, coords)
    for i in range(cases.n_cases):
        zm, zv, em, ev = _moments_reference(BASELINES[i], scal["prior_mean"][i], scal["sg"][i],
                                            scal["cvi"][i], scal["cvi_log_sd"][i], scal["sa"][i])
        got = [mom["z"][0][pidx[i], aidx[i]], mom["z"][1][pidx[i], aidx[i]],
               mom["eta"][0][pidx[i], aidx[i]], mom["eta"][1][pidx[i], aidx[i]]]
        if scal["cvi_log_sd"][i] == 0:
            em, ev = 0.0, 1.0
        assert got == pytest.approx([zm, zv, em, ev], rel=1e-6, abs=1e-9), i
    empty = (list(coords["patient"]).index("d2"), list(coords["analyte"]).index("urea"))
    assert mom["z"][0][empty] == 0 and mom["z"][1][empty] == 1
    assert mom["eta"][0][empty] == 0 and mom["eta"][1][empty] == 1


@pytest.mark.slow
def test_informed_start_draws_what_pm_sample_draws_with_that_step():
    """The plain normal model's NUTS (cached compile, second panel reusing the first panel's
    compiled function) draws bit-identically what ``pymc.sample`` draws on a freshly built
    model with PyMC's own compile, given the step ``pm.NUTS(scaling=var, is_cov=True,
    step_scale=INFORMED_STEP_SCALE)`` with the exact posterior variances and the starts
    mean + sd * N(0, 1) from ``numpy.random.default_rng(seed)``, one per chain."""
    import pymc as pm
    from pymc.blocking import DictToArrayBijection

    kw = dict(draws=30, tune=30, chains=2, cores=1, seed=7)
    a, b = mcmc._demo_panel(4, seed=1), mcmc._demo_panel(4, seed=2)
    mcmc.mcmc_assess(a, **kw)
    warm = mcmc.mcmc_assess(b, **kw)
    data, coords, structure, pidx, aidx, _, _ = mcmc._layout(b, None, None)
    model = mcmc.build_model(data, coords, **structure)
    mom = mcmc._exact_moments(b, pidx, aidx, coords)
    names = [v.name for v in model.value_vars]
    mean = DictToArrayBijection.map({n: mom[n][0] for n in names})
    var = DictToArrayBijection.map({n: mom[n][1] for n in names}).data
    rng = np.random.default_rng(7)
    starts = [DictToArrayBijection.rmap(mean._replace(
        data=mean.data + np.sqrt(var) * rng.standard_normal(var.size))) for _ in range(2)]
    step = pm.NUTS(model=model, scaling=var, is_cov=True, step_scale=mcmc.INFORMED_STEP_SCALE,
                   target_accept=mcmc.DEFAULTS_NORMAL["target_accept"])
    ref = pm.sample(draws=30, tune=30, chains=2, cores=1, random_seed=7, step=step,
                    initvals=starts, model=model, progressbar=False,
                    compute_convergence_checks=False)
    np.testing.assert_array_equal(warm.idata.posterior["theta"].values,
                                  ref.posterior["theta"].values)


@pytest.mark.slow
def test_robust_model_keeps_pymc_default_start():
    """A robust (Student-t) model keeps PyMC's own start ("jitter+adapt_diag"): with the
    cached compile it draws bit-identically what plain ``pymc.sample`` draws (reference:
    ``reuse_model=False``, PyMC's own initialisation and compile)."""
    kw = dict(draws=30, tune=30, chains=2, cores=1, seed=7, robust=True)
    a, b = mcmc._demo_panel(4, seed=1), mcmc._demo_panel(4, seed=2)
    mcmc.mcmc_assess(a, **kw)
    warm = mcmc.mcmc_assess(b, **kw)
    ref = mcmc.mcmc_assess(b, reuse_model=False, **kw)
    np.testing.assert_array_equal(warm.idata.posterior["theta"].values,
                                  ref.idata.posterior["theta"].values)


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
    # target_accept not given: the plain normal model's default (DEFAULTS_NORMAL)
    assert r.settings["target_accept"] == mcmc.DEFAULTS_NORMAL["target_accept"]


@pytest.mark.slow
def test_sampler_defaults_follow_the_model_kind():
    """Settings not given take the model kind's default (a robust or censored model keeps
    DEFAULTS_CENSORED_OR_ROBUST, a plain normal one DEFAULTS_NORMAL); settings given are used
    as given. Tiny under-run fits: only the recorded settings and the draw count are checked."""
    assert mcmc.sampler_defaults(False, False) == mcmc.DEFAULTS_NORMAL
    for censored, robust in ((True, False), (False, True), (True, True)):
        assert mcmc.sampler_defaults(censored, robust) == mcmc.DEFAULTS_CENSORED_OR_ROBUST
    assert mcmc.DEFAULTS_NORMAL["target_accept"] < mcmc.DEFAULTS_CENSORED_OR_ROBUST["target_accept"]
    r = mcmc.mcmc_assess(_panel(), draws=15, tune=5, chains=1, cores=1, seed=4, robust=True,
                         patient=PATIENTS, analyte=ANALYTES)
    assert r.settings["target_accept"] == mcmc.DEFAULTS_CENSORED_OR_ROBUST["target_accept"]
    assert r.settings["tune"] == 5 and r.idata.posterior.sizes["draw"] == 15
    r = mcmc.mcmc_assess(_panel(), draws=15, tune=5, chains=1, cores=1, seed=4,
                         target_accept=0.85, patient=PATIENTS, analyte=ANALYTES)
    assert r.settings["target_accept"] == 0.85
    with pytest.raises(ValueError, match="target_accept"):
        mcmc.mcmc_assess(_panel(), draws=15, tune=5, target_accept=1.0)


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


# ------------------------------------------------- fast: summary stages on hand-made draws
# Hand-made "posterior" draws (seeded numpy, two chains of 60 draws) fed to each summary stage
# alone; every reference is written here with numpy / scipy.stats / ArviZ, not the engine.
def _hand_draws(c, s=120, seed=314):
    rng = np.random.default_rng(seed)
    theta = 4.0 + 0.05 * rng.standard_normal((c, s))
    cvi = 0.10 * np.exp(0.2 * rng.standard_normal((c, s)))
    return theta, cvi


def _hand_cases(new_y, new_censor, delta):
    c = len(new_y)
    return CaseArrays.from_lists(
        [[4.0, 4.1]] * c, prior_mean=4.0, sg=0.2, cvi=0.1, cvi_log_sd=0.2, sa=0.03,
        new_y=new_y, new_censor=new_censor, prior_change=0.1, delta=delta, tau=0.25,
        new_r=2.0, new_extra_var=0.001,
    )


def test_setpoint_stage_matches_numpy_and_arviz():
    """Posterior mean and quantiles of theta by numpy; MCSE of the mean = sd / sqrt(bulk ESS)
    with ArviZ's bulk ESS of the same chain-major draws."""
    import arviz as az

    cases = _hand_cases([4.2, 4.3], [0, 0], np.log(1.2))
    theta, cvi = _hand_draws(2)
    q_se = (np.array([0.01, 0.02]), np.array([0.03, 0.04]))
    out, se = mcmc._setpoint_summaries(cases, theta, cvi, 2, 0.9, q_se)
    assert np.array_equal(out["n_baseline"], [2.0, 2.0])
    assert np.allclose(out["theta_mean"], np.mean(theta, axis=1), rtol=0, atol=1e-14)
    assert np.allclose(out["theta_lower"], np.quantile(theta, 0.05, axis=1), rtol=0, atol=1e-14)
    assert np.allclose(out["theta_upper"], np.quantile(theta, 0.95, axis=1), rtol=0, atol=1e-14)
    assert np.allclose(out["cvi_post_mean"], np.mean(cvi, axis=1), rtol=0, atol=1e-14)
    assert se["theta_lower"] is q_se[0] and se["theta_upper"] is q_se[1]
    for i in range(2):
        ess = az.ess(theta[i].reshape(2, 60), method="bulk")
        ref = np.std(theta[i], ddof=1) / np.sqrt(ess)
        assert abs(se["theta_mean"][i] - ref) < 1e-12 * ref


def test_interval_stage_is_the_mixture_quantile():
    """The predictive interval bounds are the 2.5 % / 97.5 % points of the normal mixture
    (1/S) sum_s N(theta_s, V0_s): its CDF there (scipy.stats.norm) equals the level; V0_s =
    ln(1 + CVI_s^2) + sA^2 / r* + e* (log-scale CV conversion, see module docstring)."""
    cases = _hand_cases([4.2, 4.3], [0, 0], np.log(1.2))
    theta, cvi = _hand_draws(2)
    v0 = mcmc._h0_variance(cases, cvi)
    assert np.allclose(v0, np.log1p(cvi**2) + 0.03**2 / 2.0 + 0.001, rtol=1e-12, atol=0)
    out, se = mcmc._interval_summaries(theta, v0, 2, 0.95)
    for key, q in (("pi_lower", 0.025), ("pi_upper", 0.975)):
        cdf = stats.norm.cdf((out[key][:, None] - theta) / np.sqrt(v0)).mean(axis=1)
        assert np.allclose(cdf, q, rtol=0, atol=1e-9), (key, cdf)
        assert np.all(np.isfinite(se[key]) & (se[key] > 0))


def test_change_stage_matches_scipy_mixture_densities():
    """log BF10 = log mean_s N(y*; theta_s, V0_s + tau^2) - log mean_s N(y*; theta_s, V0_s)
    (scipy.stats.norm.pdf); a left-censored y* "<L" uses norm.cdf instead; P(change) =
    pi BF / (pi BF + 1 - pi); percentile = mean_s Phi((y* - theta_s) / sqrt(V0_s)); a missing
    y* gives NaN."""
    cases = _hand_cases([4.2, 3.9, np.nan], [0, -1, 0], np.log(1.2))
    theta, cvi = _hand_draws(3)
    v0 = mcmc._h0_variance(cases, cvi)
    pr = mcmc._predictive(cases, theta, v0, theta.mean(1))
    out, se, a1, p_change, infl_pc = mcmc._change_summaries(cases, pr, 2)
    v1 = v0 + 0.25**2
    h0 = stats.norm.pdf(4.2, theta[0], np.sqrt(v0[0])).mean()
    h1 = stats.norm.pdf(4.2, theta[0], np.sqrt(v1[0])).mean()
    c0 = stats.norm.cdf(3.9, theta[1], np.sqrt(v0[1])).mean()
    c1 = stats.norm.cdf(3.9, theta[1], np.sqrt(v1[1])).mean()
    ref = np.log([h1 / h0, c1 / c0])
    assert np.allclose(out["log_bf10"][:2], ref, rtol=0, atol=1e-12)
    bf = np.exp(ref)
    assert np.allclose(out["p_change"][:2], 0.1 * bf / (0.1 * bf + 0.9), rtol=0, atol=1e-12)
    pct = stats.norm.cdf((np.array([4.2, 3.9])[:, None] - theta[:2]) / np.sqrt(v0[:2]))
    assert np.allclose(out["percentile"][:2], pct.mean(1), rtol=0, atol=1e-12)
    for key in ("log_bf10", "bf10", "p_change", "percentile"):
        assert np.isnan(out[key][2]) and np.isnan(se[key][2]), key
        assert np.all(np.isfinite(se[key][:2]) & (se[key][:2] > 0)), key
    w1 = stats.norm.pdf(4.2, theta[0], np.sqrt(v1[0]))
    assert np.allclose(a1[0], w1 / w1.mean(), rtol=1e-10, atol=0)


def test_direction_stage_matches_scipy_normal_references():
    """Uncensored y*: P(D > 0 | y*) = sum_s w_s Phi(m_s / sd_s) / sum_s w_s with w_s =
    N(y*; theta_s, V1_s) and D | y*, theta_s ~ N(tau^2 (y* - theta_s) / V1_s, tau^2 V0_s / V1_s)
    (normal conditioning, scipy.stats.norm). Left-censored "<L": (-D, y*) | theta_s is
    bivariate normal (Var -D = tau^2, Cov = -tau^2, Var y* = V1_s), so P(D > 0 | y* < L) =
    sum_s P(-D < 0, y* < L | theta_s) / sum_s P(y* < L | theta_s) by
    scipy.stats.multivariate_normal.cdf. P(|D| > delta) likewise; p_exceed_delta =
    P(change) P(|D| > delta | H1); NaN where delta is missing."""
    cases = _hand_cases([4.2, 3.9, 4.25], [0, -1, 0], [np.log(1.2), np.log(1.1), np.nan])
    theta, cvi = _hand_draws(3, s=20)
    v0 = mcmc._h0_variance(cases, cvi)
    pr = mcmc._predictive(cases, theta, v0, theta.mean(1))
    _, _, a1, p_change, infl_pc = mcmc._change_summaries(cases, pr, 2)
    out, se = mcmc._direction_summaries(cases, theta, pr, a1, p_change, infl_pc, 2)
    t2 = 0.25**2
    v1 = v0 + t2
    # case 0, uncensored
    w = stats.norm.pdf(4.2, theta[0], np.sqrt(v1[0]))
    m = t2 * (4.2 - theta[0]) / v1[0]
    sd = np.sqrt(t2 * v0[0] / v1[0])
    dl = np.log(1.2)
    ref_inc = np.sum(w * stats.norm.sf(0, m, sd)) / w.sum()
    ref_tail = np.sum(w * (stats.norm.sf(dl, m, sd) + stats.norm.cdf(-dl, m, sd))) / w.sum()
    assert abs(out["p_increase"][0] - ref_inc) < 1e-12
    assert abs(out["p_exceed_delta"][0] - p_change[0] * ref_tail) < 1e-12
    # case 1, left-censored at L = 3.9
    L, dl = 3.9, np.log(1.1)
    joint_inc, joint_tail, marg = 0.0, 0.0, 0.0
    for th, vv in zip(theta[1], v1[1]):
        mvn = stats.multivariate_normal(mean=[0.0, th], cov=[[t2, -t2], [-t2, vv]])
        joint_inc += mvn.cdf([0.0, L])
        joint_tail += mvn.cdf([-dl, L]) + (stats.norm.cdf(L, th, np.sqrt(vv))
                                           - mvn.cdf([dl, L]))
        marg += stats.norm.cdf(L, th, np.sqrt(vv))
    assert abs(out["p_increase"][1] - joint_inc / marg) < 1e-5
    assert abs(out["p_exceed_delta"][1] - p_change[1] * joint_tail / marg) < 1e-5
    # case 2: no delta
    assert np.isnan(out["p_exceed_delta"][2]) and np.isnan(se["p_exceed_delta"][2])
    assert np.isfinite(out["p_increase"][2]) and np.all(se["p_increase"] > 0)


def test_summaries_compose_the_stages():
    """_summaries returns every summary key, each equal to the stage that computes it."""
    cases = _hand_cases([4.2, 3.9], [0, 1], np.log(1.2))
    theta, cvi = _hand_draws(2)
    q_se = (np.zeros(2), np.zeros(2))
    out, se = mcmc._summaries(cases, theta, cvi, 2, 0.95, 0.9, q_se)
    assert tuple(out) == mcmc._SUMMARY_KEYS == tuple(se)
    ref, _ = mcmc._interval_summaries(theta, mcmc._h0_variance(cases, cvi), 2, 0.95)
    assert np.array_equal(out["pi_lower"], ref["pi_lower"])
    assert np.array_equal(out["theta_mean"], theta.mean(1))
