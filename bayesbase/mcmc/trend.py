"""MCMC version of the drift model of :mod:`bayesbase.trend` (PyMC NUTS), the reference the
exact path is tested against and the place to extend it where no closed form exists.

Same model, natural-log scale, t in years, t_ref = mean time of the usable specimens::

    theta0 ~ Normal(mu, sG^2);  z ~ Normal(0, 1);  CVI = CVI_pack exp(s z);  sI^2 = ln(1 + CVI^2)
    beta   ~ Normal(0, sB^2)                                          (H1)
    y_j    ~ Normal(theta0 + beta (t_j - t_ref), sI^2 + sA^2 / r_j + e_j)   dims ("obs",)

Only H1 is sampled. The Bayes factor comes from the Savage-Dickey density ratio
BF01 = p(beta = 0 | y, H1) / p(beta = 0 | H1) (Dickey JM, Ann Math Stat 1971;42:204-223; Wagenmakers
EJ et al., Cogn Psychol 2010;60:158-189), valid because H0 is H1 with beta fixed at 0 and the
other priors do not depend on beta. The posterior density at 0 is Rao-Blackwellised: given
theta0 and sI, beta | y is normal with precision 1/sB^2 + sum_j (t_j - t_ref)^2 / v_j and mean
sum_j (t_j - t_ref)(y_j - theta0) / v_j / precision, and its density at 0 is averaged over the
draws. P(beta > 0 | y, H1) is Rao-Blackwellised the same way.

Years to the population limit are computed draw by draw: with theta_last = theta0 + beta
(t_last - t_ref), the crossing time is 0 when theta_last is already beyond ln L,
(ln L - theta_last) / beta when beta points to the limit, and +inf otherwise; its quantiles
beyond the horizon are reported as +inf (as in the exact path).

One PyMC model is built per call and reused for every series with ``pm.set_data`` (the
specimen dim ``obs`` is resized per series); its compiled log density and gradient and its
initial-point function are compiled once per call, kept on a
:class:`bayesbase.mcmc.compiled.KeptModel`. Convergence: max R-hat < 1.01, min bulk ESS >= 400
and no divergences (thresholds after Vehtari A et al., Bayesian Analysis 2021;16:667-718, from
memory).
"""
from __future__ import annotations

import logging
import warnings
from contextlib import contextmanager

import numpy as np
from scipy import special

with warnings.catch_warnings():
    # arviz 0.23 announces its refactor with a FutureWarning at import time; a notice only.
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az
import pymc as pm
import pytensor.tensor as pt

from ..constants import (
    DEFAULT_CI_PROB,
    DEFAULT_PRIOR_DRIFT,
    DIM_OBS,
    TREND_HORIZON_YEARS,
)
from ..model.trend import SUMMARY_KEYS, prepare_series
from .compiled import KeptModel, nuts_start

__all__ = ["trend_mcmc", "build_trend_model"]

_RHAT_MAX = 1.01
_ESS_MIN = 400.0

_KEYS = SUMMARY_KEYS + (
    "r_hat", "ess", "divergences", "slope_mean_mcse", "log_bf10_mcse", "years_to_limit_mcse",
)


def build_trend_model(n_obs: int = 3) -> pm.Model:
    """The H1 drift model with every input as ``pm.Data`` (resize ``obs`` with set_data)."""
    with pm.Model(coords={DIM_OBS: np.arange(n_obs)}) as model:
        y = pm.Data("y", np.zeros(n_obs), dims=DIM_OBS)
        tc = pm.Data("tc", np.zeros(n_obs), dims=DIM_OBS)
        ev = pm.Data("ev", np.zeros(n_obs), dims=DIM_OBS)
        mu = pm.Data("mu", 0.0)
        sg = pm.Data("sg", 1.0)
        log_cvi = pm.Data("log_cvi", np.log(0.1))
        cvi_log_sd = pm.Data("cvi_log_sd", 0.0)
        sb = pm.Data("sb", 0.1)
        theta0 = pm.Normal("theta0", mu=mu, sigma=sg)
        z = pm.Normal("z", 0.0, 1.0)
        cvi = pm.Deterministic("cvi", pt.exp(log_cvi + cvi_log_sd * z))
        si2 = pt.log1p(cvi * cvi)
        beta = pm.Normal("beta", mu=0.0, sigma=sb)
        pm.Normal("y_obs", mu=theta0 + beta * tc, sigma=pt.sqrt(si2 + ev), observed=y, dims=DIM_OBS)
    return model


def _mcse(x, prob=None):
    """Monte Carlo SE of the mean (or of the ``prob`` quantile) of (chain, draw) draws (ArviZ)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=RuntimeWarning, module="arviz")
        ds = az.convert_to_dataset({"x": np.asarray(x, float)})  # dims (chain, draw)
        if prob is None:
            return float(az.mcse(ds)["x"])
        return float(az.mcse(ds, method="quantile", prob=prob)["x"])


def _quantile(x, q):
    # no interpolation: keeps +inf crossing times meaningful
    return float(np.quantile(x, q, method="inverted_cdf"))


_DATA_KEYS = ("y", "tc", "ev", "mu", "sg", "log_cvi", "cvi_log_sd", "sb")


@contextmanager
def _quiet_pymc_logs():
    """PyMC / PyTensor loggers at ERROR for the duration (restored afterwards)."""
    loggers = [logging.getLogger(n) for n in ("pymc", "pymc.sampling.mcmc", "pytensor")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.ERROR)
    try:
        yield
    finally:
        for lg, lv in zip(loggers, levels):
            lg.setLevel(lv)


def _prepare_inputs(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa, slope_sd,
                    prior_drift, limit_upper, limit_lower, ci_prob):
    """Checked inputs: the :func:`bayesbase.trend.prepare_series` dict, and prior_drift and
    the two limits broadcast to (C,) (a missing limit is NaN)."""
    if not 0 < ci_prob < 1:
        raise ValueError("ci_prob must lie in (0, 1)")
    p = prepare_series(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa, slope_sd)
    c = p["y"].shape[0]
    pi = np.broadcast_to(np.asarray(prior_drift, float), (c,))
    if np.any(~((pi > 0) & (pi < 1))):
        raise ValueError("prior_drift must lie in (0, 1)")
    lu = np.broadcast_to(np.asarray(np.nan if limit_upper is None else limit_upper, float), (c,))
    ll = np.broadcast_to(np.asarray(np.nan if limit_lower is None else limit_lower, float), (c,))
    return p, pi, lu, ll


def _series_data(p: dict, i: int) -> dict:
    """Series ``i`` of prepared inputs ``p``: the model's ``pm.Data`` values (``_DATA_KEYS``:
    used specimens only, times centred on t_ref, ev = sA^2 / r + e) plus ``cvi`` and
    ``dt_last`` = t_last - t_ref."""
    m = p["mask"][i]
    return {
        "y": p["y"][i, m], "tc": p["times"][i, m] - p["t_ref"][i],
        "ev": p["sa"][i] ** 2 / p["r"][i, m] + p["extra_var"][i, m],
        "mu": p["prior_mean"][i], "sg": p["sg"][i], "log_cvi": np.log(p["cvi"][i]),
        "cvi_log_sd": p["cvi_log_sd"][i], "sb": p["slope_sd"][i],
        "cvi": p["cvi"][i], "dt_last": p["t_last"][i] - p["t_ref"][i],
    }


def _sample_series(model, data, draws, tune, chains, seed, target_accept, kept=None):
    """Set one series on ``model`` and sample H1 by NUTS. Returns the posterior of theta0, z,
    beta (dims chain, draw) and its diagnostics r_hat (max), ess (min bulk), divergences.
    ``kept``: the :class:`bayesbase.mcmc.compiled.KeptModel` of ``model``, kept across its
    series, holding its compiled log density and gradient and initial-point function (the
    parameters are scalars, so one compile serves every series; the draws are those of
    ``pm.sample(random_seed=seed)``, see :func:`bayesbase.mcmc.compiled.nuts_start`). None:
    ``pm.sample`` compiles its own."""
    pm.set_data({k: data[k] for k in _DATA_KEYS}, model=model,
                coords={DIM_OBS: np.arange(data["tc"].size)})
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*[Tt]he number of samples is too small.*")
        warnings.filterwarnings("ignore", category=RuntimeWarning, module="arviz")
        warnings.filterwarnings("ignore", message="PyTensor could not link to a BLAS")
        kw = dict(draws=draws, tune=tune, chains=chains, cores=1, random_seed=seed,
                  progressbar=False, model=model, compute_convergence_checks=False,
                  return_inferencedata=True)
        if kept is None:
            idata = pm.sample(target_accept=target_accept, **kw)
        else:
            start, step = nuts_start(kept, "trend", chains, seed, target_accept)
            idata = pm.sample(step=step, initvals=start, **kw)
        post = idata.posterior[["theta0", "z", "beta"]]
        rhat = float(az.rhat(post).to_array().max())
        ess = float(az.ess(post, method="bulk").to_array().min())
    div = int(idata.sample_stats["diverging"].sum())
    return post, dict(r_hat=rhat, ess=ess, divergences=div)


def _savage_dickey(post, data) -> dict:
    """Savage-Dickey log BF10 (Rao-Blackwellised density of beta at 0), its MCSE (delta
    method), P(beta > 0 | y, H1) and the slope's MCSE, from one series' posterior."""
    th = post["theta0"].values.ravel()
    zz = post["z"].values.ravel()
    beta = post["beta"].values.ravel()
    tc, yy, ev, sb = data["tc"], data["y"], data["ev"], data["sb"]
    cvi_d = data["cvi"] * np.exp(data["cvi_log_sd"] * zz)
    v = np.log1p(cvi_d * cvi_d)[:, None] + ev[None, :]  # (S, J)
    prec = 1.0 / sb**2 + np.sum(tc * tc / v, -1)
    mc = np.sum(tc * (yy[None, :] - th[:, None]) / v, -1) / prec
    dens_draws = np.sqrt(prec / (2 * np.pi)) * np.exp(-0.5 * prec * mc * mc)
    dens0 = np.mean(dens_draws)
    shape = post["beta"].shape  # (chain, draw)
    prior0 = 1.0 / (sb * np.sqrt(2 * np.pi))
    return {
        "log_bf10": np.log(prior0) - np.log(dens0),
        "log_bf10_mcse": _mcse(dens_draws.reshape(shape)) / dens0,
        "slope_mean_mcse": _mcse(beta.reshape(shape)),
        "p_increase": np.mean(special.ndtr(mc * np.sqrt(prec))),
    }


def _drift_summaries(post, data, prior_drift: float, ci_prob: float) -> dict:
    """Drift keys of one series: Bayes factor, P(drift), P(increase), slope and %/year (given
    drift, and averaged over H0 / H1 with P(drift)), with MCSEs."""
    a = 0.5 * (1.0 - ci_prob)
    beta = post["beta"].values.ravel()
    out = _savage_dickey(post, data)
    log_bf = out["log_bf10"]
    p_drift = float(special.expit(np.log(prior_drift) - np.log1p(-prior_drift) + log_bf))
    out["bf10"] = np.exp(log_bf)
    out["p_drift"] = p_drift
    out["slope_mean"] = beta.mean()
    out["slope_sd"] = beta.std(ddof=1)
    out["slope_lower"] = _quantile(beta, a)
    out["slope_upper"] = _quantile(beta, 1 - a)
    pct = 100.0 * np.expm1(beta)
    out["pct_per_year_mean"] = pct.mean()
    out["pct_per_year_lower"] = _quantile(pct, a)
    out["pct_per_year_upper"] = _quantile(pct, 1 - a)
    out["pct_per_year_avg_mean"] = p_drift * pct.mean()
    below = p_drift * np.mean(pct < 0)
    for key, qv in (("pct_per_year_avg_lower", a), ("pct_per_year_avg_upper", 1 - a)):
        if qv < below:
            val = _quantile(pct, qv / p_drift)
        elif qv > below + 1 - p_drift:
            val = _quantile(pct, (qv - (1 - p_drift)) / p_drift)
        else:
            val = 0.0
        out[key] = val
    return out


def _limit_summaries(post, dt_last: float, limit_upper: float, limit_lower: float,
                     ci_prob: float, horizon: float) -> dict:
    """theta_last_mean and, toward the limit the mean slope points to, the crossing time
    per draw (0 if already beyond, +inf if receding or beyond ``horizon``): its median with
    MCSE, central ``ci_prob`` interval, and P(beyond the limit now). Both limits given but
    neither approached: the years are +inf. No limit: only theta_last_mean and side ""."""
    a = 0.5 * (1.0 - ci_prob)
    th = post["theta0"].values.ravel()
    beta = post["beta"].values.ravel()
    theta_last = th + beta * dt_last
    out = {"theta_last_mean": theta_last.mean(), "limit_side": ""}
    side, lim, sign = "", np.nan, 0.0
    if np.isfinite(limit_upper) and beta.mean() > 0:
        side, lim, sign = "upper", limit_upper, 1.0
    elif np.isfinite(limit_lower) and beta.mean() < 0:
        side, lim, sign = "lower", limit_lower, -1.0
    out["limit_side"] = side
    if side:
        gap = sign * (lim - theta_last)  # > 0: still inside
        rate = sign * beta  # > 0: moving toward the limit
        with np.errstate(divide="ignore"):
            t_cross = np.where(gap <= 0, 0.0,
                               np.where(rate > 0, gap / np.where(rate > 0, rate, 1.0), np.inf))
        t_cross = np.where(t_cross > horizon, np.inf, t_cross)
        out["years_to_limit"] = _quantile(t_cross, 0.5)
        if np.isfinite(out["years_to_limit"]):
            clipped = np.minimum(t_cross, 2.0 * horizon).reshape(post["beta"].shape)
            out["years_to_limit_mcse"] = _mcse(clipped, prob=0.5)
        out["years_to_limit_lower"] = _quantile(t_cross, a)
        out["years_to_limit_upper"] = _quantile(t_cross, 1 - a)
        out["p_beyond_limit"] = np.mean(gap <= 0)
    elif np.isfinite(limit_upper) or np.isfinite(limit_lower):
        for key in ("years_to_limit", "years_to_limit_lower", "years_to_limit_upper"):
            out[key] = np.inf
    return out


def trend_mcmc(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa, slope_sd,
               prior_drift=DEFAULT_PRIOR_DRIFT, limit_upper=None, limit_lower=None,
               ci_prob=DEFAULT_CI_PROB, draws=1000, tune=1000, chains=2, seed=0,
               target_accept=0.9, horizon=TREND_HORIZON_YEARS, model=None):
    """Drift model by NUTS for C series (same inputs and keys as
    :func:`bayesbase.trend.trend_exact`) plus diagnostics ``r_hat`` (max over theta0, z, beta),
    ``ess`` (min bulk ESS), ``divergences`` and ``converged`` (bool), and Monte Carlo standard
    errors ``slope_mean_mcse``, ``log_bf10_mcse`` (delta method on the Savage-Dickey density
    average) and ``years_to_limit_mcse`` (of the median, ArviZ quantile MCSE). Series that do
    not meet the trend rule are not sampled (NaN, ``eligible`` False).

    Stages: :func:`_prepare_inputs`, :func:`build_trend_model` (graph, once), then per series
    :func:`_series_data`, :func:`_sample_series`, :func:`_drift_summaries` and
    :func:`_limit_summaries`. ``seed`` seeds every fit (series i gets a seed drawn from
    ``numpy.random.default_rng(seed)``). ``model``: a model from :func:`build_trend_model` to
    reuse across calls (its compiled pieces are kept for the series of one call).
    """
    p, pi, lu, ll = _prepare_inputs(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa,
                                    slope_sd, prior_drift, limit_upper, limit_lower, ci_prob)
    c = p["y"].shape[0]
    out = {k: np.full(c, np.nan) for k in _KEYS}
    out["limit_side"] = np.full(c, "", dtype=object)
    out["converged"] = np.zeros(c, dtype=bool)
    seeds = np.random.default_rng(seed).integers(0, 2**31 - 1, size=c)
    if model is None and np.any(p["eligible"]):
        model = build_trend_model(int(p["n_used"].max()))
    kept = KeptModel(model)  # the model's compiled pieces, shared by its series
    with _quiet_pymc_logs():
        for i in np.nonzero(p["eligible"])[0]:
            data = _series_data(p, i)
            post, diag = _sample_series(model, data, draws, tune, chains, int(seeds[i]),
                                        target_accept, kept)
            row = _drift_summaries(post, data, pi[i], ci_prob)
            row.update(_limit_summaries(post, data["dt_last"], lu[i], ll[i], ci_prob, horizon))
            row.update(diag)
            row["converged"] = (diag["r_hat"] < _RHAT_MAX) and (diag["ess"] >= _ESS_MIN) \
                and diag["divergences"] == 0
            for k, v in row.items():
                out[k][i] = v
    out["eligible"] = p["eligible"].copy()
    for k in ("reason", "n_used", "span_years", "t_ref"):
        out[k] = p[k]
    return out
