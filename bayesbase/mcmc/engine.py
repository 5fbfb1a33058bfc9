"""PyMC engine: the exact engine's model (see :mod:`bayesbase.engine`) sampled with NUTS.

Why a second engine: it checks the exact engine (the two must agree within Monte Carlo error,
tested in ``tests/test_mcmc.py``), and it can do what the closed forms cannot:

* censored baseline results (``<x`` / ``>x``, ``base_censor`` -1 / +1) enter the likelihood as
  ``pm.Censored`` terms (probability mass below / above the limit). The exact engine treats a
  censored baseline as if it had been observed at its limit;
* a censored assessed result (``new_censor`` -1 / +1) is scored with predictive probabilities
  P(y* < limit) or P(y* > limit) instead of predictive densities;
* ``robust=True`` replaces the normal baseline likelihood by a Student-t with ``nu`` degrees of
  freedom (heavy tails: an outlying baseline moves the set point less). **The robust model is
  not the exact engine's model**; agreement tests use ``robust=False``. Predictive quantities for
  the assessed result still use the normal predictive of the model (only the baseline likelihood
  changes).

Model, natural-log scale, one cell per (patient, analyte) with named dims ``patient`` and
``analyte``; baseline specimens are flattened onto the dim ``obs``::

    z[p, a]        ~ Normal(0, 1)
    theta          = mu + sG * z                          (non-centred set point)
    eta[p, a]      ~ Normal(0, 1)                         (only when some cvi_log_sd > 0)
    ln CVI         = ln CVI_pack + s * eta                (a constant when every s == 0)
    sI             = sqrt(log1p(CVI^2))
    ybar[obs]      ~ Normal(theta[p, a], sqrt(sI^2 + sA^2 / r + e))   (Censored where censored)

Cells of the patient x analyte grid without a case carry a neutral prior and no data; they are
ignored in every summary and diagnostic.

Predictive quantities are Rao-Blackwellised over the S posterior draws (theta_s, sI_s): with
V0_s = sI_s^2 + sA^2 / r* + e*, the predictive of a new result under H0 is the normal mixture
(1/S) sum_s N(theta_s, V0_s); its central ``coverage`` interval is found exactly with
:func:`bayesbase.engine.mixture_quantile` (no extra Monte Carlo noise). percentile = mean_s
Phi((y* - theta_s) / sqrt(V0_s)); BF10 = mean_s N(y*; theta_s, V0_s + tau^2) / mean_s N(y*;
theta_s, V0_s); P(change) = pi BF / (pi BF + 1 - pi); P(D > 0) and P(|D| > delta) from the
per-draw normal posterior of D under H1, weighted by each draw's H1 predictive density, exactly
as the exact engine weights its quadrature nodes.

Monte Carlo standard errors (``McmcResult.mc_se``) use the delta method: every summary is a
smooth function of averages over draws; its influence values per draw are averaged, and the
standard error is sd(influence) / sqrt(ESS(influence)) with ArviZ's bulk ESS of that influence
series (for a posterior mean this is sd / sqrt(ess); for a probability averaged over draws the
sd of the per-draw values / sqrt(ess)). Quantiles of theta use ArviZ's quantile MCSE.

Sampler defaults (:func:`sampler_defaults`), 4 chains of 1000 draws for every model kind. A
plain normal model tunes 150 steps per chain at target acceptance 0.8 from an informed start
(below); a model with censored baselines or robust (Student-t) baselines keeps PyMC's own start
("jitter+adapt_diag") with 1000 tuning steps at 0.9, the settings it was validated with.
500 draws per chain were not enough: the largest R-hat over a 25-analyte panel's 50 parameters
reached 1.0115 (above :data:`RHAT_MAX`) in one of twelve fits (PyMC's own start, 300 / 0.8).

Informed start (plain normal model only, :func:`_informed_nuts`): the exact engine solves the
same model, so it gives every free variable's posterior mean and variance (:func:`_exact_moments`:
z and eta, by its quadrature over the CVI). NUTS gets those variances as a fixed diagonal mass
matrix (the diagonal that PyMC's adaptation estimates from the tuning draws, here without its
noise), so tuning only adapts the step size, starting at ``step_scale``
:data:`INFORMED_STEP_SCALE`; each chain starts at the means plus one normal draw of the
posterior standard deviations. Measured on the invented 25-analyte demo panels (``_demo_panel``,
data seeds 20240602-20240604 x sampler seeds 1-4, 12 fits, warm compile, 4 chains x 1000 draws,
one process; max R-hat and min bulk / tail ESS over theta and eta): tune 150 gave max R-hat
<= 1.0061, min bulk ESS >= 2878, min tail ESS >= 1902, no divergence, and 38.7-40.2k gradient
evaluations per fit (6 fits counted, tuning included); PyMC's own start at tune 300 on the same
panels and seeds gave max R-hat <= 1.0061, bulk ESS >= 2778, tail ESS >= 1947, no divergence and
52.1-56.8k gradient evaluations. Three such panels as one 3-patient fit (150 parameters, 2
fits): 71.1-72.9k against 89.2-90.8k gradient evaluations, max R-hat 1.0065 against 1.0061,
bulk ESS >= 4311 against >= 3879, tail ESS >= 2124 against >= 2202, no divergence in either.
Both draw about 7 leapfrog steps per kept draw (tree depth 3, tuned step sizes 0.35-0.6):
the saving is in tuning. Tune 100 was as clean in 6 fits but its
step sizes spread wider (one fit took 36k leapfrog steps in its draws instead of 28k); tune
200 costs 5 % more than 150 for the same diagnostics. A dense mass matrix (the z-eta
covariance added) did not shorten the trajectories and cost more per step.

This is the only module (with ``mcmc_trend``) that imports PyMC, PyTensor and ArviZ; nothing
imports it at import time.
"""
from __future__ import annotations

import logging
import os
import time
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import special

with warnings.catch_warnings():
    # arviz 0.23 announces its refactor with a FutureWarning at import time (measured here);
    # it is a notice, not a problem with this code.
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az
import pymc as pm
import pytensor
import pytensor.tensor as pt
import xarray as xr

from .. import __version__
from ..constants import DEFAULT_CI_PROB, DEFAULT_COVERAGE, DIM_ANALYTE, DIM_OBS, DIM_PATIENT
from ..model.engine import CaseArrays, mixture_quantile
from .compiled import (CompiledStore, KeptModel, kept_trace, logp_dlogp, nutpie_compiled,
                       nuts_start)

__all__ = [
    "McmcResult",
    "mcmc_assess",
    "build_model",
    "sbc_setpoint",
    "sampler_defaults",
    "default_cores",
    "RHAT_MAX",
    "ESS_MIN",
]

#: Convergence thresholds (common practice: Vehtari et al., Bayesian Analysis 2021;16:667-718,
#: "rank-normalization, folding, and localization": R-hat < 1.01 and bulk/tail ESS > 400).
RHAT_MAX = 1.01
ESS_MIN = 400.0

_LOG_2PI = float(np.log(2.0 * np.pi))
_SUMMARY_KEYS = (
    "theta_mean", "theta_lower", "theta_upper", "pi_lower", "pi_upper", "percentile",
    "log_bf10", "bf10", "p_change", "p_increase", "p_exceed_delta", "n_baseline",
    "cvi_post_mean",
)
_NEUTRAL = dict(mu=0.0, sg=1.0, ln_cvi=float(np.log(0.1)), cvi_sd=0.0)

with warnings.catch_warnings():
    # A pip-installed PyTensor without a linked BLAS says so once, when the flag is first read
    # (inside a graph rewrite, where an error-level warning filter turns it into a logged
    # rewrite failure). Read it here once; this model has no matrix products that need BLAS.
    warnings.filterwarnings("ignore", message="PyTensor could not link to a BLAS")
    _ = pytensor.config.blas__ldflags

# one PyMC model per structure (:func:`_model_key`), reused with pm.set_data, and what was
# compiled from it per parameter shape (patients, analytes): PyMC's log density and gradient,
# start and trace (pm.sample compiles them again on every call), nutpie's compile
_KEPT = CompiledStore()
SAMPLERS = ("pymc", "nutpie")

#: Sampler defaults per model kind (draws per chain, tuning steps per chain, NUTS target
#: acceptance), chosen by measurement (module docstring, "Sampler defaults"). 1000 draws for
#: every kind: at 500 the largest R-hat of a 25-analyte panel reached 1.0115 (above RHAT_MAX).
DEFAULTS_NORMAL = dict(draws=1000, tune=150, target_accept=0.8)
#: censored or robust (Student-t) baselines keep the settings they were validated with
DEFAULTS_CENSORED_OR_ROBUST = dict(draws=1000, tune=1000, target_accept=0.9)


def sampler_defaults(censored: bool, robust: bool) -> dict:
    """The default ``draws``, ``tune`` and ``target_accept`` of a model kind: a plain normal
    model (no censored baseline, ``robust=False``) gets :data:`DEFAULTS_NORMAL`, any other
    :data:`DEFAULTS_CENSORED_OR_ROBUST` (a new dict each call)."""
    return dict(DEFAULTS_CENSORED_OR_ROBUST if censored or robust else DEFAULTS_NORMAL)


def default_cores(chains: int, censored_or_robust: bool, sampler: str = "pymc") -> int:
    """Chains run in parallel by default (``cores`` not given): one process for a plain normal
    model under PyMC's NUTS, whose informed start makes the sampling short (a 25-analyte panel
    samples in a few CPU seconds), so that starting chain processes (each imports PyMC and
    receives the compiled model) costs about as much CPU as the sampling itself. Measured on the
    invented 25-analyte demo panels (data seeds 20240602 and 20240603, sampler seed 5, the same
    draws either way): 4.7 and 4.1 CPU-s, 18.6 and 15.4 s wall in one process against 9.4 and
    8.9 CPU-s, 35.0 and 33.8 s wall with 2 chain processes (load average 10-12 on 2 cores); the
    earlier start (tune 300) gave 6.3 against 9.8 CPU-s and 6.6 against 7.8 s wall (load
    1.2-1.9). On an idle machine 2 processes may finish a little sooner in wall time; the CPU
    cost is about twice. Censored or robust models (1000 tuning
    steps, several times the sampling) and nutpie (threads, not processes) keep
    min(chains, CPU count)."""
    if sampler == "pymc" and not censored_or_robust:
        return 1
    return max(1, min(chains, os.cpu_count() or 1))


@dataclass
class McmcResult:
    """Output of :func:`mcmc_assess`.

    ``summary``: dict of (C,) arrays with the same keys as :func:`bayesbase.engine.exact_assess`.
    ``mc_se``: Monte Carlo standard error of each summary value (same keys; NaN where the summary
    is NaN, 0 for ``n_baseline``). ``idata``: ArviZ InferenceData (posterior dims chain, draw,
    patient, analyte). ``diagnostics``: max_r_hat, min_ess_bulk, min_ess_tail, divergences,
    converged, and per-case arrays r_hat, ess_bulk, ess_tail for theta. ``settings``: every
    sampler setting and the seed. ``patient``, ``analyte``: the labels of each case.
    """

    summary: dict[str, np.ndarray]
    mc_se: dict[str, np.ndarray]
    idata: az.InferenceData
    diagnostics: dict
    settings: dict
    patient: np.ndarray = field(default_factory=lambda: np.array([]))
    analyte: np.ndarray = field(default_factory=lambda: np.array([]))

    @property
    def converged(self) -> bool:
        return bool(self.diagnostics["converged"])


# ----------------------------------------------------------------------------- model building
def _layout(cases: CaseArrays, patient, analyte):
    """Map cases onto the patient x analyte grid and flatten baselines onto obs."""
    c = cases.n_cases
    patient = np.array(["p0"] * c if patient is None else patient, dtype=object).astype(str)
    analyte = np.array([f"a{i}" for i in range(c)] if analyte is None else analyte,
                       dtype=object).astype(str)
    if patient.shape != (c,) or analyte.shape != (c,):
        raise ValueError(f"patient and analyte need {c} labels each, got "
                         f"{patient.shape[0]} and {analyte.shape[0]}")
    p_labels = list(dict.fromkeys(patient.tolist()))
    a_labels = list(dict.fromkeys(analyte.tolist()))
    pidx = np.array([p_labels.index(p) for p in patient], dtype=np.int64)
    aidx = np.array([a_labels.index(a) for a in analyte], dtype=np.int64)
    cell = pidx * len(a_labels) + aidx
    if len(np.unique(cell)) != c:
        dup = [f"{patient[i]}/{analyte[i]}" for i in range(c) if np.sum(cell == cell[i]) > 1]
        raise ValueError(f"each (patient, analyte) pair may appear once; repeated: {dup[:5]}")
    shape = (len(p_labels), len(a_labels))

    def grid(values, fill):
        g = np.full(shape, fill, dtype=float)
        g[pidx, aidx] = values
        return g

    mask = cases.mask
    ci, cj = np.nonzero(mask)
    y = cases.base_y[ci, cj]
    ev = cases.sa[ci] ** 2 / cases.base_r[ci, cj] + cases.base_extra_var[ci, cj]
    cens = cases.base_censor[ci, cj]
    # pm.Censored clips at its bounds: a value AT `lower` means "true value <= lower" (logcdf),
    # a value AT `upper` means ">= upper" (logccdf). Left-censored "<x" -> lower = x.
    lower = np.where(cens < 0, y, -np.inf)
    upper = np.where(cens > 0, y, np.inf)
    data = dict(
        mu=grid(cases.prior_mean, _NEUTRAL["mu"]),
        sg=grid(cases.sg, _NEUTRAL["sg"]),
        ln_cvi=grid(np.log(cases.cvi), _NEUTRAL["ln_cvi"]),
        cvi_sd=grid(cases.cvi_log_sd, _NEUTRAL["cvi_sd"]),
        y_obs=y.astype(float),
        obs_ev=ev.astype(float),
        obs_cell=(pidx * len(a_labels) + aidx)[ci].astype(np.int64),
        obs_lower=lower,
        obs_upper=upper,
    )
    coords = {DIM_PATIENT: p_labels, DIM_ANALYTE: a_labels, DIM_OBS: np.arange(len(y))}
    structure = dict(
        has_eta=bool(np.any(cases.cvi_log_sd > 0)),
        has_obs=bool(len(y) > 0),
        censored=bool(np.any(cens != 0)),
    )
    return data, coords, structure, pidx, aidx, patient, analyte


def build_model(data: dict, coords: dict, *, has_eta: bool, has_obs: bool, censored: bool,
                robust: bool = False, nu: float = 4.0) -> pm.Model:
    """Build the PyMC model (see module docstring) with every array in a ``pm.Data``
    container, so that one compiled structure serves any panel via ``pm.set_data``."""
    with pm.Model(coords=coords) as model:
        mu = pm.Data("mu", data["mu"], dims=(DIM_PATIENT, DIM_ANALYTE))
        sg = pm.Data("sg", data["sg"], dims=(DIM_PATIENT, DIM_ANALYTE))
        ln_cvi0 = pm.Data("ln_cvi", data["ln_cvi"], dims=(DIM_PATIENT, DIM_ANALYTE))
        z = pm.Normal("z", 0.0, 1.0, dims=(DIM_PATIENT, DIM_ANALYTE))
        theta = pm.Deterministic("theta", mu + sg * z, dims=(DIM_PATIENT, DIM_ANALYTE))
        if has_eta:
            cvi_sd = pm.Data("cvi_sd", data["cvi_sd"], dims=(DIM_PATIENT, DIM_ANALYTE))
            eta = pm.Normal("eta", 0.0, 1.0, dims=(DIM_PATIENT, DIM_ANALYTE))
            ln_cvi = ln_cvi0 + cvi_sd * eta
        else:
            ln_cvi = ln_cvi0
        cvi = pm.Deterministic("cvi", pt.exp(ln_cvi), dims=(DIM_PATIENT, DIM_ANALYTE))
        si2 = pt.log1p(cvi * cvi)
        if has_obs:
            y_obs = pm.Data("y_obs", data["y_obs"], dims=DIM_OBS)
            ev = pm.Data("obs_ev", data["obs_ev"], dims=DIM_OBS)
            cell = pm.Data("obs_cell", data["obs_cell"], dims=DIM_OBS)  # flat grid index
            loc = theta.ravel()[cell]
            sd = pt.sqrt(si2.ravel()[cell] + ev)
            if censored:
                if robust:
                    dist = pm.StudentT.dist(nu=nu, mu=loc, sigma=sd)
                else:
                    dist = pm.Normal.dist(mu=loc, sigma=sd)
                lo = pm.Data("obs_lower", data["obs_lower"], dims=DIM_OBS)
                hi = pm.Data("obs_upper", data["obs_upper"], dims=DIM_OBS)
                pm.Censored("ybar", dist, lower=lo, upper=hi, observed=y_obs, dims=DIM_OBS)
            elif robust:
                pm.StudentT("ybar", nu=nu, mu=loc, sigma=sd, observed=y_obs, dims=DIM_OBS)
            else:
                pm.Normal("ybar", mu=loc, sigma=sd, observed=y_obs, dims=DIM_OBS)
    return model


def _model_key(structure, robust, nu):
    return (structure["has_eta"], structure["has_obs"], structure["censored"], bool(robust),
            float(nu) if robust else None)


def _get_model(data, coords, structure, robust, nu, reuse=True) -> KeptModel:
    """The kept model of this structure with ``data`` and ``coords`` set (``reuse``), or a
    model built for them and kept nowhere."""
    def build():
        return build_model(data, coords, robust=robust, nu=nu, **structure)

    if not reuse:
        return KeptModel(build())
    return _KEPT.entry_with_data(_model_key(structure, robust, nu), build, data, coords)[0]


# ----------------------------------------------------------------------------- summaries
def _logmeanexp(a, axis=-1):
    return special.logsumexp(a, axis=axis) - np.log(a.shape[axis])


def _ess_of(values: np.ndarray, n_chain: int) -> np.ndarray:
    """ArviZ bulk ESS of per-draw series ``values`` (C, S) laid out chain-major; (C,)."""
    c, s = values.shape
    arr = values.reshape(c, n_chain, s // n_chain).transpose(1, 2, 0)
    out = np.full(c, np.nan)
    ok = np.all(np.isfinite(arr), axis=(0, 1)) & (np.ptp(arr.reshape(-1, c), axis=0) > 0)
    if np.any(ok):
        ds = xr.Dataset({"v": (("chain", "draw", "case_"), arr[:, :, ok])})
        out[ok] = az.ess(ds, method="bulk")["v"].values
    return out


def _mcse(influence: np.ndarray, n_chain: int) -> np.ndarray:
    """sd(influence) / sqrt(ESS(influence)) per case; 0 for a constant series."""
    sd = np.std(influence, axis=-1, ddof=1)
    ess = _ess_of(influence, n_chain)
    se = sd / np.sqrt(np.where(np.isfinite(ess) & (ess > 0), ess, influence.shape[-1]))
    return np.where(np.all(np.isfinite(influence), axis=-1), se, np.nan)


def _gl(n=48):
    x, w = np.polynomial.legendre.leggauss(n)
    return x, w


def _d_prob_censored(theta, v0, tau, limit, side, a, b):
    """Per draw: P(a < D < b, y* on the censored side of ``limit`` | theta, H1) with
    D ~ N(0, tau^2) and y* | D ~ N(theta + D, V0), by Gauss-Legendre over D/tau in
    [max(a, -10 tau), min(b, 10 tau)]. ``side`` -1: y* < limit; +1: y* > limit.
    theta, v0: (C, S); tau, limit, a, b: (C,)."""
    x, w = _gl()
    lo = np.maximum(a, -10.0 * tau)
    hi = np.minimum(b, 10.0 * tau)
    half = np.maximum(hi - lo, 0.0) / 2.0
    d = (lo + hi)[:, None] / 2.0 + half[:, None] * x[None, :]  # (C, G)
    dens = np.exp(-0.5 * (d / tau[:, None]) ** 2) / (tau[:, None] * np.sqrt(2 * np.pi))
    zz = (limit[:, None, None] - theta[:, :, None] - d[:, None, :]) / np.sqrt(v0)[:, :, None]
    cdf = special.ndtr(zz) if side < 0 else special.ndtr(-zz)
    return np.einsum("csg,cg,g->cs", cdf, dens, w) * half[:, None]


@dataclass
class _Predictive:
    """Per-draw (C, S) quantities of the assessed result y* shared by the summary stages:
    ``l0`` / ``l1``: log predictive density (or, censored, log probability) under H0 / H1;
    ``resid`` = y* - theta_s (theta_mean stands in where y* is missing); ``v0`` / ``v1``: the
    predictive variances under H0 / H1; ``tau2``: tau^2 as (C, 1); ``has_y``, ``left``,
    ``right``: (C,) masks of a present, left-censored and right-censored y*."""

    has_y: np.ndarray
    resid: np.ndarray
    v0: np.ndarray
    v1: np.ndarray
    tau2: np.ndarray
    l0: np.ndarray
    l1: np.ndarray
    left: np.ndarray
    right: np.ndarray


def _setpoint_summaries(cases: CaseArrays, theta: np.ndarray, cvi: np.ndarray, n_chain: int,
                        ci_prob: float, theta_q_mcse):
    """n_baseline, posterior mean and central ``ci_prob`` interval of theta, posterior mean
    CVI, with their MCSEs (``theta_q_mcse``: ArviZ quantile MCSEs of the two bounds)."""
    out = {"n_baseline": cases.mask.sum(-1).astype(float)}
    se = {"n_baseline": np.zeros(theta.shape[0])}
    out["theta_mean"] = theta.mean(-1)
    se["theta_mean"] = _mcse(theta - out["theta_mean"][:, None], n_chain)
    a = 0.5 * (1.0 - ci_prob)
    out["theta_lower"] = np.quantile(theta, a, axis=-1)
    out["theta_upper"] = np.quantile(theta, 1.0 - a, axis=-1)
    se["theta_lower"], se["theta_upper"] = theta_q_mcse
    out["cvi_post_mean"] = cvi.mean(-1)
    se["cvi_post_mean"] = _mcse(cvi - out["cvi_post_mean"][:, None], n_chain)
    return out, se


def _h0_variance(cases: CaseArrays, cvi: np.ndarray) -> np.ndarray:
    """V0 per draw (C, S): sI^2 + sA^2 / r* + e* for the assessed result."""
    si2 = np.log1p(cvi * cvi)
    return si2 + (cases.sa**2 / np.maximum(cases.new_r, 1.0) + cases.new_extra_var)[:, None]


def _interval_summaries(theta: np.ndarray, v0: np.ndarray, n_chain: int, coverage: float):
    """Central ``coverage`` interval of the normal-mixture predictive under H0 (exact mixture
    quantiles) with delta-method MCSEs."""
    c, s = theta.shape
    sd0 = np.sqrt(v0)
    w = np.full((c, s), 1.0 / s)
    b = 0.5 * (1.0 - coverage)
    out: dict[str, np.ndarray] = {}
    se: dict[str, np.ndarray] = {}
    for key, q in (("pi_lower", b), ("pi_upper", 1.0 - b)):
        x = mixture_quantile(np.full(c, q), w, theta, sd0)
        z = (x[:, None] - theta) / sd0
        dens = np.mean(np.exp(-0.5 * z * z) / (sd0 * np.sqrt(2 * np.pi)), axis=-1)
        out[key] = x
        se[key] = _mcse((special.ndtr(z) - q) / dens[:, None], n_chain)
    return out, se


def _predictive(cases: CaseArrays, theta: np.ndarray, v0: np.ndarray,
                theta_mean: np.ndarray) -> _Predictive:
    """Per-draw predictive log density (uncensored) or log probability (censored) of y*."""
    y = cases.new_y
    has_y = np.isfinite(y)
    yy = np.where(has_y, y, theta_mean)
    tau2 = (cases.tau**2)[:, None]
    v1 = v0 + tau2
    resid = yy[:, None] - theta
    cen = np.where(has_y, cases.new_censor, 0.0)
    l0 = -0.5 * (_LOG_2PI + np.log(v0) + resid**2 / v0)
    l1 = -0.5 * (_LOG_2PI + np.log(v1) + resid**2 / v1)
    left = cen < 0
    right = cen > 0
    if np.any(left | right):
        sgn = np.where(left, 1.0, -1.0)[:, None]  # left: P(y < L) = Phi(resid / sd)
        lc0 = special.log_ndtr(sgn * resid / np.sqrt(v0))
        lc1 = special.log_ndtr(sgn * resid / np.sqrt(v1))
        cmask = (left | right)[:, None]
        l0 = np.where(cmask, lc0, l0)
        l1 = np.where(cmask, lc1, l1)
    return _Predictive(has_y=has_y, resid=resid, v0=v0, v1=v1, tau2=tau2, l0=l0, l1=l1,
                       left=left, right=right)


def _change_summaries(cases: CaseArrays, pr: _Predictive, n_chain: int):
    """log BF10, BF10, P(change) and percentile with delta-method MCSEs. Also returns the
    per-draw H1 weights a1 (influence of log mean_s a_s is a_s / mean(a) - 1), P(change) and
    its influence values, which the direction stage reuses."""
    has_y = pr.has_y
    lp0 = _logmeanexp(pr.l0)
    lp1 = _logmeanexp(pr.l1)
    log_bf = lp1 - lp0
    a0 = np.exp(pr.l0 - lp0[:, None])
    a1 = np.exp(pr.l1 - lp1[:, None])
    infl_lbf = a1 - a0
    pi = cases.prior_change
    with np.errstate(divide="ignore"):
        logit = np.log(pi) - np.log1p(-pi) + log_bf
    p_change = special.expit(logit)
    infl_pc = (p_change * (1 - p_change))[:, None] * infl_lbf
    out = {"log_bf10": np.where(has_y, log_bf, np.nan)}
    se = {"log_bf10": np.where(has_y, _mcse(infl_lbf, n_chain), np.nan)}
    out["bf10"] = np.exp(out["log_bf10"])
    se["bf10"] = out["bf10"] * se["log_bf10"]
    out["p_change"] = np.where(has_y, p_change, np.nan)
    se["p_change"] = np.where(has_y, _mcse(infl_pc, n_chain), np.nan)
    cdf = special.ndtr(pr.resid / np.sqrt(pr.v0))
    out["percentile"] = np.where(has_y, cdf.mean(-1), np.nan)
    se["percentile"] = np.where(has_y, _mcse(cdf - cdf.mean(-1)[:, None], n_chain), np.nan)
    return out, se, a1, p_change, infl_pc


def _direction_draws(cases: CaseArrays, theta: np.ndarray, pr: _Predictive):
    """Per draw: P(D > 0 | y*, theta_s, H1) and P(|D| > delta | y*, theta_s, H1), (C, S).
    D | y*, theta_s, H1 ~ N(tau^2 / V1 * resid, tau^2 V0 / V1); a censored y* uses
    P(D in set, y* censored | theta) / P(y* censored | theta)."""
    d_mean = pr.tau2 / pr.v1 * pr.resid
    d_sd = np.sqrt(pr.tau2 * pr.v0 / pr.v1)
    pinc_s = special.ndtr(d_mean / d_sd)
    delta = cases.delta[:, None]
    with np.errstate(invalid="ignore"):
        tail_s = special.ndtr((d_mean - delta) / d_sd) + special.ndtr((-delta - d_mean) / d_sd)
    for side, m in ((-1, pr.left), (1, pr.right)):
        if not np.any(m):
            continue
        th, vv, tt, lim = theta[m], pr.v0[m], cases.tau[m], cases.new_y[m]
        pc = np.exp(pr.l1[m])
        inf = np.full(th.shape[0], np.inf)
        pinc_s[m] = _d_prob_censored(th, vv, tt, lim, side, 0.0 * tt, inf) / pc
        dl = cases.delta[m]
        dl0 = np.where(np.isfinite(dl), dl, 0.0)
        up = _d_prob_censored(th, vv, tt, lim, side, dl0, inf)
        dn = _d_prob_censored(th, vv, tt, lim, side, -inf, -dl0)
        tail_s[m] = np.where(np.isfinite(dl)[:, None], (up + dn) / pc, np.nan)
    return pinc_s, tail_s


def _direction_summaries(cases: CaseArrays, theta: np.ndarray, pr: _Predictive, a1, p_change,
                         infl_pc, n_chain: int):
    """P(increase) and P(|D| > delta) = P(change) P(|D| > delta | H1), each draw weighted by
    its H1 predictive density a1, with delta-method MCSEs."""
    pinc_s, tail_s = _direction_draws(cases, theta, pr)
    has_y = pr.has_y
    p_inc = np.mean(a1 * pinc_s, axis=-1)
    p_tail = np.mean(a1 * tail_s, axis=-1)
    out = {"p_increase": np.where(has_y, p_inc, np.nan)}
    se = {"p_increase": np.where(has_y, _mcse(a1 * (pinc_s - p_inc[:, None]), n_chain), np.nan)}
    has_d = has_y & np.isfinite(cases.delta)
    out["p_exceed_delta"] = np.where(has_d, p_change * p_tail, np.nan)
    infl_tail = a1 * (np.nan_to_num(tail_s) - np.nan_to_num(p_tail)[:, None])
    infl_ped = np.nan_to_num(p_tail)[:, None] * infl_pc + p_change[:, None] * infl_tail
    se["p_exceed_delta"] = np.where(has_d, _mcse(infl_ped, n_chain), np.nan)
    return out, se


def _summaries(cases: CaseArrays, theta: np.ndarray, cvi: np.ndarray, n_chain: int,
               coverage: float, ci_prob: float, theta_q_mcse):
    """Summaries and MCSEs from per-case draws theta, cvi of shape (C, S)."""
    out, se = _setpoint_summaries(cases, theta, cvi, n_chain, ci_prob, theta_q_mcse)
    v0 = _h0_variance(cases, cvi)
    o, s = _interval_summaries(theta, v0, n_chain, coverage)
    out.update(o)
    se.update(s)
    pr = _predictive(cases, theta, v0, out["theta_mean"])
    o, s, a1, p_change, infl_pc = _change_summaries(cases, pr, n_chain)
    out.update(o)
    se.update(s)
    o, s = _direction_summaries(cases, theta, pr, a1, p_change, infl_pc, n_chain)
    out.update(o)
    se.update(s)
    return {k: out[k] for k in _SUMMARY_KEYS}, {k: se[k] for k in _SUMMARY_KEYS}


def _case_draws(idata, name, pidx, aidx):
    """(C, S) draws of a (chain, draw, patient, analyte) variable, chain-major."""
    v = idata.posterior[name].transpose("chain", "draw", DIM_PATIENT, DIM_ANALYTE).values
    v = v[:, :, pidx, aidx]  # (chain, draw, C)
    return v.reshape(-1, v.shape[-1]).T.copy()


def _diagnostics(idata, pidx, aidx, cvi_sd):
    """R-hat and ESS on theta and (where the CVI is uncertain) eta, real cases only."""
    post = idata.posterior
    names = ["theta"] + (["eta"] if "eta" in post else [])
    sel = post[names]
    rh = az.rhat(sel)
    eb = az.ess(sel, method="bulk")
    et = az.ess(sel, method="tail")

    def cases_of(ds, name):
        return ds[name].transpose(DIM_PATIENT, DIM_ANALYTE).values[pidx, aidx]

    theta_r = cases_of(rh, "theta")
    theta_eb = cases_of(eb, "theta")
    theta_et = cases_of(et, "theta")
    all_r, all_eb, all_et = [theta_r], [theta_eb], [theta_et]
    if "eta" in post:
        m = cvi_sd > 0
        all_r.append(cases_of(rh, "eta")[m])
        all_eb.append(cases_of(eb, "eta")[m])
        all_et.append(cases_of(et, "eta")[m])
    r = np.concatenate(all_r)
    b = np.concatenate(all_eb)
    t = np.concatenate(all_et)
    div = int(idata.sample_stats["diverging"].values.sum()) if "diverging" in idata.sample_stats \
        else 0
    max_r = float(np.nanmax(r)) if np.any(np.isfinite(r)) else float("nan")
    min_b = float(np.nanmin(b)) if np.any(np.isfinite(b)) else float("nan")
    min_t = float(np.nanmin(t)) if np.any(np.isfinite(t)) else float("nan")
    checks = {
        "r_hat_ok": bool(np.all(np.isfinite(r)) and max_r <= RHAT_MAX),
        "ess_bulk_ok": bool(np.all(np.isfinite(b)) and min_b >= ESS_MIN),
        "ess_tail_ok": bool(np.all(np.isfinite(t)) and min_t >= ESS_MIN),
        "divergences_ok": div == 0,
    }
    return dict(
        max_r_hat=max_r,
        min_ess_bulk=min_b,
        min_ess_tail=min_t,
        divergences=div,
        converged=all(checks.values()),
        checks=checks,
        thresholds=dict(r_hat_max=RHAT_MAX, ess_min=ESS_MIN, divergences_max=0),
        r_hat=theta_r,
        ess_bulk=theta_eb,
        ess_tail=theta_et,
        ess=theta_eb,
    )


# ----------------------------------------------------------------------------- public API
def mcmc_assess(
    cases: CaseArrays,
    coverage: float = DEFAULT_COVERAGE,
    ci_prob: float = DEFAULT_CI_PROB,
    draws: int | None = None,
    tune: int | None = None,
    chains: int = 4,
    seed: int = 0,
    robust: bool = False,
    nu: float = 4.0,
    patient=None,
    analyte=None,
    idata_path=None,
    target_accept: float | None = None,
    attrs: dict | None = None,
    cores: int | None = None,
    reuse_model: bool = True,
    sampler: str = "pymc",
) -> McmcResult:
    """Fit every case of ``cases`` in one PyMC model and summarise like ``exact_assess``.

    ``patient`` / ``analyte``: labels of each case (default ``"p0"`` and ``"a{i}"``); every
    (patient, analyte) pair appears once. ``seed`` seeds the sampler (``random_seed``); no
    global seed is touched. ``cores``: parallel chain processes (default
    :func:`default_cores`: 1 for a plain normal model under PyMC, else min(chains, CPU count)).
    ``idata_path``: write the InferenceData to netCDF with attrs engine, seed, settings,
    bayesbase version and the caller's ``attrs`` (e.g. pack id and sha256).
    ``reuse_model``: reuse a cached model of the same structure via ``pm.set_data`` and, for
    the same number of patients and analytes, its compiled log density and gradient (PyMC's
    sampler: the same draws as without the cache, only the compile is skipped).
    ``sampler``: ``"pymc"`` (default, PyMC's NUTS) or ``"nutpie"`` (optional package
    ``nutpie``, numba backend: a long first compile, then much faster sampling; the compiled
    model is reused for panels of the same shape through ``with_data``).

    ``draws``, ``tune``, ``target_accept``: None takes the model kind's default
    (:func:`sampler_defaults`: a plain normal model samples with fewer tuning steps and a lower
    target acceptance than a censored or robust one); a value given is used as given. Under
    PyMC's NUTS a plain normal model starts from the exact engine's posterior means and
    variances (module docstring, "Informed start"); censored and robust models keep PyMC's own
    start.

    A fit that fails a convergence check is returned with ``diagnostics["converged"] = False``
    (never raised, never hidden): the caller marks every output of it.
    """
    if not 0 < coverage < 1 or not 0 < ci_prob < 1:
        raise ValueError("coverage and ci_prob must lie in (0, 1)")
    if robust and not nu > 0:
        raise ValueError("nu must be > 0")
    if sampler not in SAMPLERS:
        raise ValueError(f"sampler must be one of {SAMPLERS}, got {sampler!r}")
    data, coords, structure, pidx, aidx, patient, analyte = _layout(cases, patient, analyte)
    given = dict(draws=draws, tune=tune, target_accept=target_accept)
    kind = sampler_defaults(structure["censored"], robust)
    draws, tune, target_accept = (kind[k] if given[k] is None else given[k] for k in given)
    if draws < 1 or tune < 0 or chains < 1:
        raise ValueError("draws >= 1, tune >= 0 and chains >= 1 are required")
    if not 0 < target_accept < 1:
        raise ValueError("target_accept must lie in (0, 1)")
    if cores is None:
        cores = default_cores(chains, structure["censored"] or robust, sampler)
    settings = dict(
        sampler=sampler, draws=int(draws), tune=int(tune), chains=int(chains),
        cores=int(cores), seed=int(seed), target_accept=float(target_accept),
        robust=bool(robust), nu=float(nu) if robust else None, coverage=float(coverage),
        ci_prob=float(ci_prob), pymc_version=pm.__version__,
    )
    loggers = [logging.getLogger(n) for n in ("pymc", "pymc.sampling.mcmc", "pytensor")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.ERROR)
    t0 = time.perf_counter()
    try:
        kept = _get_model(data, coords, structure, robust, nu, reuse=reuse_model)
        shape = (len(coords[DIM_PATIENT]), len(coords[DIM_ANALYTE]))  # fixes the compiled pieces
        with warnings.catch_warnings():
            # short, deliberately under-run fits make PyMC/ArviZ warn about small samples; the
            # diagnostics below report the same fact as converged=False.
            warnings.filterwarnings("ignore", message=".*[Tt]he number of samples is too small.*")
            warnings.filterwarnings("ignore", category=RuntimeWarning, module="arviz")
            if sampler == "nutpie":
                idata = _sample_nutpie(kept, shape, data, coords, draws, tune, chains, cores,
                                       seed, target_accept, reuse_model)
            else:
                start = None if structure["censored"] or robust else \
                    _exact_moments(cases, pidx, aidx, coords)
                idata = _sample_pymc(kept, shape, draws, tune, chains, cores, seed,
                                     target_accept, reuse_model, start)
            settings["seconds"] = time.perf_counter() - t0
            diagnostics, summary, mc_se = _summarise_fit(idata, cases, pidx, aidx, chains,
                                                         coverage, ci_prob)
    finally:
        for lg, lv in zip(loggers, levels):
            lg.setLevel(lv)
    idata.posterior.attrs.update(_stamp(settings, attrs))
    if idata_path is not None:
        save_idata(idata, idata_path, settings, attrs)
    return McmcResult(summary=summary, mc_se=mc_se, idata=idata, diagnostics=diagnostics,
                      settings=settings, patient=patient, analyte=analyte)


def _summarise_fit(idata, cases, pidx, aidx, chains, coverage, ci_prob):
    """Diagnostics, summaries and their MCSEs of a fit (see :func:`mcmc_assess`)."""
    diagnostics = _diagnostics(idata, pidx, aidx, cases.cvi_log_sd)
    theta = _case_draws(idata, "theta", pidx, aidx)
    cvi = _case_draws(idata, "cvi", pidx, aidx)
    a = 0.5 * (1.0 - ci_prob)
    th_ds = idata.posterior[["theta"]]
    q_se = []
    for prob in (a, 1.0 - a):
        mq = az.mcse(th_ds, method="quantile", prob=prob)["theta"]
        q_se.append(mq.transpose(DIM_PATIENT, DIM_ANALYTE).values[pidx, aidx])
    summary, mc_se = _summaries(cases, theta, cvi, chains, coverage, ci_prob, q_se)
    return diagnostics, summary, mc_se


def _sample_pymc(kept, shape, draws, tune, chains, cores, seed, target_accept, reuse,
                 moments=None):
    """PyMC's NUTS on ``kept.model``. ``moments`` (plain normal model, :func:`_exact_moments`):
    the exact posterior means and variances start NUTS (:func:`_informed_nuts`); otherwise
    PyMC's default start ("jitter+adapt_diag", :func:`bayesbase.mcmc.compiled.nuts_start`).
    With ``reuse``, either start uses the model's compiled log density and gradient (and trace)
    kept on ``kept`` under ``shape`` (patients, analytes) by an earlier call; without it,
    :func:`pymc.sample` compiles them (and, without ``moments``, builds its own start)."""
    model = kept.model
    kw = dict(draws=draws, tune=tune, chains=chains, cores=cores, random_seed=seed,
              progressbar=False, model=model, compute_convergence_checks=False,
              return_inferencedata=True)
    if moments is not None:
        fn = logp_dlogp(kept, shape) if reuse else None
        start, step = _informed_nuts(model, moments, chains, seed, target_accept, fn)
        if reuse:
            kw["trace"] = kept_trace(kept, shape, start[0])
        return pm.sample(step=step, initvals=start, **kw)
    if not reuse:
        return pm.sample(target_accept=target_accept, **kw)
    start, step = nuts_start(kept, shape, chains, seed, target_accept)
    return pm.sample(step=step, initvals=start, trace=kept_trace(kept, shape, start[0]), **kw)


#: NUTS ``step_scale`` of the informed start: the first step size is step_scale / n^(1/4) for
#: n free parameters (PyMC's rule); PyMC's default 0.25 starts near 0.09 for a 25-analyte
#: panel, while with the exact posterior scales as mass matrix the tuned step sizes were
#: 0.4-0.55 (measured; module docstring, "Informed start"), so step-size adaptation starts
#: there.
INFORMED_STEP_SCALE = 1.3


def _exact_moments(cases: CaseArrays, pidx, aidx, coords) -> dict:
    """Posterior mean and variance of every free variable of the plain normal model (``z``
    and, where some CVI is uncertain, ``eta``) on the patient x analyte grid, from the exact
    engine's quadrature over the CVI (:mod:`bayesbase.model.engine`; the same model). Grid cells
    without a case, and ``eta`` of a case with known CVI, keep the prior N(0, 1). None when a
    moment is not finite or a variance not positive (the caller then keeps PyMC's own start)."""
    from ..model.engine import _FIELDS, DEFAULT_QUAD_NODES, _node_posterior, quadrature

    x, w = quadrature(DEFAULT_QUAD_NODES)
    with np.errstate(divide="ignore"):
        m, pv, _, _, _, wt = _node_posterior({k: getattr(cases, k) for k in _FIELDS}, x,
                                             np.log(w))
    t_mean = np.einsum("ij,ij->i", wt, m)
    t_var = np.einsum("ij,ij->i", wt, pv + (m - t_mean[:, None]) ** 2)
    e_mean = wt @ x
    e_var = wt @ (x * x) - e_mean**2
    shape = (len(coords[DIM_PATIENT]), len(coords[DIM_ANALYTE]))
    out = {n: (np.zeros(shape), np.ones(shape)) for n in ("z", "eta")}
    out["z"][0][pidx, aidx] = (t_mean - cases.prior_mean) / cases.sg
    out["z"][1][pidx, aidx] = t_var / cases.sg**2
    has = cases.cvi_log_sd > 0
    out["eta"][0][pidx[has], aidx[has]] = e_mean[has]
    out["eta"][1][pidx[has], aidx[has]] = e_var[has]
    ok = all(np.all(np.isfinite(a)) for pair in out.values() for a in pair)
    return out if ok and all(np.all(v > 0) for _, v in out.values()) else None


def _informed_nuts(model, moments, chains, seed, target_accept, fn=None):
    """NUTS with the exact posterior variances as its (fixed, diagonal) mass matrix, so tuning
    only adapts the step size, started at :data:`INFORMED_STEP_SCALE`; each chain starts at
    the posterior means plus one normal draw of the posterior standard deviations (a start
    spread like the posterior, as R-hat wants). ``fn``: a compiled log density and gradient
    (None: NUTS compiles its own). Seeded by ``seed`` alone (``pymc.sample`` then reseeds the
    step per chain from the same ``random_seed``)."""
    from pymc.blocking import DictToArrayBijection
    from pymc.step_methods.hmc import quadpotential

    names = [v.name for v in model.value_vars]
    mean = DictToArrayBijection.map({n: moments[n][0] for n in names})
    var = DictToArrayBijection.map({n: moments[n][1] for n in names}).data
    rng = np.random.default_rng(seed)
    starts = []
    for _ in range(chains):
        draw = mean.data + np.sqrt(var) * rng.standard_normal(var.size)
        point = DictToArrayBijection.rmap(mean._replace(data=draw))
        starts.append({n: np.asarray(point[n]) for n in names})
    potential = quadpotential.QuadPotentialDiag(var, rng=rng)
    kw = {} if fn is None else dict(logp_dlogp_func=fn)
    step = pm.NUTS(potential=potential, model=model, rng=rng, initial_point=starts[0],
                   target_accept=target_accept, step_scale=INFORMED_STEP_SCALE, **kw)
    return starts, step


def _sample_nutpie(kept, shape, data, coords, draws, tune, chains, cores, seed, target_accept,
                   reuse):
    try:
        import nutpie
    except ImportError as exc:  # optional extra
        from ..errors import MissingExtra
        raise MissingExtra("sampler='nutpie' needs the optional package nutpie "
                          "(pip install 'nutpie>=0.16,<0.17')") from exc
    # the parameter count fixes the compile; the number of baseline results (dim obs) does not:
    # with_data on another length samples as a fresh compile would (tests/test_bench_speed_table.py)
    cm = nutpie_compiled(kept, shape, data if reuse else None)
    idata = nutpie.sample(cm, draws=draws, tune=tune, chains=chains, cores=cores, seed=seed,
                          progress_bar=False, save_warmup=False, target_accept=target_accept)
    # labels come from this call, not from the panel the model was compiled for
    post = idata.posterior.assign_coords({DIM_PATIENT: coords[DIM_PATIENT],
                                          DIM_ANALYTE: coords[DIM_ANALYTE]})
    return az.InferenceData(posterior=post, sample_stats=idata.sample_stats)


def _stamp(settings, attrs):
    out = {"engine": "mcmc", "seed": int(settings["seed"]), "bayesbase_version": __version__}
    for k, v in settings.items():
        out[f"setting_{k}"] = v
    out.update({str(k): v for k, v in (attrs or {}).items()})
    # netCDF attributes hold numbers and strings only
    return {k: v if isinstance(v, (int, float, str)) and not isinstance(v, bool) else str(v)
            for k, v in out.items()}


def save_idata(idata, path, settings, attrs=None):
    """Write ``idata`` to netCDF (h5netcdf engine) with provenance attrs on every group."""
    stamp = _stamp(settings, attrs)
    for g in idata.groups():
        idata[g].attrs.update(stamp)
    idata.to_netcdf(str(path), engine="h5netcdf")
    return path


# ----------------------------------------------------------------------------- demo panel
def _demo_panel(n_analytes: int, seed: int = 20240601) -> CaseArrays:
    """Invented demo panel (numbers are for benchmarking only): one dog, ``n_analytes``
    analytes with 0-4 baselines and CVs drawn in plausible ranges."""
    rng = np.random.default_rng(seed)
    base = []
    cvi = rng.uniform(0.05, 0.25, n_analytes)
    sg = rng.uniform(0.1, 0.3, n_analytes)
    sa = rng.uniform(0.01, 0.05, n_analytes)
    mu = rng.normal(3.0, 1.0, n_analytes)
    theta = mu + sg * rng.standard_normal(n_analytes)
    si = np.sqrt(np.log1p(cvi**2))
    for i in range(n_analytes):
        k = int(rng.integers(0, 5))
        base.append(list(theta[i] + np.sqrt(si[i] ** 2 + sa[i] ** 2) * rng.standard_normal(k)))
    new = theta + np.sqrt(si**2 + sa**2) * rng.standard_normal(n_analytes) + 0.1
    return CaseArrays.from_lists(
        base, prior_mean=mu, sg=sg, cvi=cvi, cvi_log_sd=rng.uniform(0.2, 0.4, n_analytes),
        sa=sa, new_y=new, prior_change=0.1, delta=np.log(1.2),
    )


def sbc_setpoint(n_rep: int = 100, draws: int = 500, tune: int = 500, chains: int = 4,
                 thin: int = 4, n_baseline: int = 2, batch: int = 50, seed: int = 12345,
                 cores: int | None = None) -> dict:
    """Simulation-based calibration of the set point (Talts, Betancourt, Simpson, Vehtari,
    Gelman 2018, "Validating Bayesian inference algorithms with simulation-based
    calibration", arXiv:1804.06788).

    Each replicate draws theta and ln CVI from the prior of one invented demo case (numbers
    for this check only), simulates ``n_baseline`` baseline results, and records the rank of
    the true theta among the ``chains * draws / thin`` thinned posterior draws. Replicates are
    fitted ``batch`` at a time as independent patients of ONE model (the posterior factorises
    over cells, so each cell is its own replicate; one compile serves all batches through
    ``pm.set_data``). Under a correct sampler the ranks are uniform on {0, ..., L}.

    Returns ranks, L (``n_kept``), bin counts, a chi-square uniformity p-value
    (scipy.stats.chisquare over ``bins`` equal bins) and a KS p-value of the randomised
    normalised ranks (scipy.stats.kstest against U(0, 1)), plus the fits' convergence flags.
    """
    from scipy import stats

    rng = np.random.default_rng(seed)
    mu, sg, cvi0, s, sa = 4.0, 0.2, 0.12, 0.3, 0.03  # invented demo case
    ranks: list[int] = []
    converged = []
    n_kept = 0
    done = 0
    while done < n_rep:
        k = min(batch, n_rep - done)
        theta = mu + sg * rng.standard_normal(k)
        cvi = cvi0 * np.exp(s * rng.standard_normal(k))
        sd = np.sqrt(np.log1p(cvi**2) + sa**2)
        y = theta[:, None] + sd[:, None] * rng.standard_normal((k, n_baseline))
        cases = CaseArrays.from_lists([list(row) for row in y], prior_mean=mu, sg=sg, cvi=cvi0,
                                      cvi_log_sd=s, sa=sa, new_y=np.nan, prior_change=0.1)
        r = mcmc_assess(cases, draws=draws, tune=tune, chains=chains, seed=seed + done,
                        patient=[f"r{done + i}" for i in range(k)], analyte=["x"] * k,
                        cores=cores)
        converged.append(r.converged)
        th = r.idata.posterior["theta"].transpose("chain", "draw", DIM_PATIENT,
                                                  DIM_ANALYTE).values[:, ::thin, :, 0]
        kept = th.reshape(-1, k)  # (L, k)
        n_kept = kept.shape[0]
        ranks.extend(np.sum(kept < theta[None, :], axis=0).astype(int).tolist())
        done += k
    ranks_a = np.asarray(ranks)
    bins = int(max(2, min(10, n_rep // 5)))
    counts = np.histogram(ranks_a, bins=bins, range=(0, n_kept + 1))[0]
    chi = stats.chisquare(counts)
    u = (ranks_a + rng.uniform(size=ranks_a.size)) / (n_kept + 1)
    ks = stats.kstest(u, "uniform")
    return dict(ranks=ranks_a, n_kept=int(n_kept), bins=bins, counts=counts,
                chisq_p=float(chi.pvalue), ks_p=float(ks.pvalue), converged=converged)
