"""Exact engine: conjugate normal update of the set point given the within-animal SD, and
Gauss-Hermite quadrature over ln(CVI). numpy / scipy only.

Model (one animal, one analyte, natural-log scale)::

    theta            ~ Normal(mu, sG^2)                       set point
    ln CVI           ~ Normal(ln CVI_pack, s^2)               s = pack's CVI uncertainty
    sI               = sqrt(ln(1 + CVI^2))
    ybar_j | theta   ~ Normal(theta, sI^2 + sA^2 / r_j + e_j)  baseline specimen j (r_j replicates)
    y*     | theta   ~ Normal(theta + D, sI^2 + sA^2 / r* + e*)
    H0: D = 0;  H1: D ~ Normal(0, tau^2)

Given sI the set point posterior is normal (McIntosh & Urban, Biostatistics 2003;4:27-40, the
normal-normal empirical-Bayes algebra); the marginal likelihood of the baselines weights the
quadrature nodes, so every predictive quantity is a finite normal mixture. Mixture quantiles
are found by safeguarded Newton iterations (bisection fallback).

References
----------
.. [1] McIntosh MW, Urban N. A parametric empirical Bayes method for cancer screening using
   longitudinal observations of a biomarker. Biostatistics 2003;4:27-40.
.. [2] Sottas P-E et al. Bayesian detection of abnormal values in longitudinal biomarkers with
   an application to T/E ratio. Biostatistics 2007;8:285-296 (predictive mixture over the
   individual's spread).
"""
from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
from scipy import special

from ..constants import DEFAULT_CI_PROB, DEFAULT_COVERAGE, DEFAULT_QUAD_NODES

__all__ = [
    "CaseArrays",
    "cv_to_sigma",
    "sigma_to_cv",
    "quadrature",
    "exact_assess",
    "mixture_quantile",
]

_LOG_2PI = np.log(2.0 * np.pi)


def cv_to_sigma(cv):
    """Log-scale SD of a log-normal variable with coefficient of variation ``cv`` (fraction):
    sigma = sqrt(ln(1 + CV^2))."""
    cv = np.asarray(cv, dtype=float)
    return np.sqrt(np.log1p(cv * cv))


def sigma_to_cv(sigma):
    """Inverse of :func:`cv_to_sigma`: CV = sqrt(exp(sigma^2) - 1)."""
    sigma = np.asarray(sigma, dtype=float)
    return np.sqrt(np.expm1(sigma * sigma))


@dataclass
class CaseArrays:
    """Padded arrays over C cases (patient x analyte) and J baseline specimens, log scale.

    See DEVELOPERS.md ("Exact-engine input") for the meaning of every field.
    """

    prior_mean: np.ndarray
    sg: np.ndarray
    cvi: np.ndarray
    cvi_log_sd: np.ndarray
    sa: np.ndarray
    base_y: np.ndarray
    base_r: np.ndarray
    base_extra_var: np.ndarray
    base_censor: np.ndarray
    new_y: np.ndarray
    new_r: np.ndarray
    new_extra_var: np.ndarray
    new_censor: np.ndarray
    tau: np.ndarray
    delta: np.ndarray
    prior_change: np.ndarray

    def __post_init__(self):
        c = np.atleast_2d(np.asarray(self.base_y, dtype=float)).shape[0]
        if np.ndim(self.base_y) == 1 and np.ndim(self.prior_mean) == 0:
            c = 1
        for f in fields(self):
            v = np.asarray(getattr(self, f.name), dtype=float)
            if f.name.startswith("base_"):
                if v.ndim == 1:
                    v = v.reshape(c, -1)
                if v.shape[0] != c:
                    raise ValueError(f"{f.name}: expected {c} rows, got {v.shape}")
            else:
                v = np.broadcast_to(v, (c,)).astype(float, copy=True)
            setattr(self, f.name, v)
        # padded entries: a NaN baseline value or zero replicates means "no specimen"
        pad = ~np.isfinite(self.base_y) | (self.base_r <= 0)
        self.base_y = np.where(pad, np.nan, self.base_y)
        self.base_r = np.where(pad, 0.0, self.base_r)
        if np.any(self.sg <= 0) or np.any(self.cvi <= 0) or np.any(self.sa < 0):
            raise ValueError("sg and cvi must be > 0 and sa >= 0")

    @property
    def n_cases(self) -> int:
        return int(self.prior_mean.shape[0])

    @property
    def mask(self) -> np.ndarray:
        return self.base_r > 0

    def subset(self, idx) -> "CaseArrays":
        return CaseArrays(**{f.name: getattr(self, f.name)[idx] for f in fields(self)})

    @classmethod
    def from_lists(cls, baselines, **scalars) -> "CaseArrays":
        """Build from a list of per-case baseline lists (log values) and per-case scalars.

        ``baselines`` is a list (length C) of sequences of log values, one per specimen (a
        specimen mean when it has replicates). Convenience for tests and simulations.
        """
        c = len(baselines)
        j = max([len(b) for b in baselines] + [1])
        y = np.full((c, j), np.nan)
        r = np.zeros((c, j))
        for i, b in enumerate(baselines):
            y[i, : len(b)] = b
            r[i, : len(b)] = 1
        if "base_r" in scalars:
            r = np.where(r > 0, np.asarray(scalars.pop("base_r"), dtype=float), 0.0)
        defaults = dict(
            base_extra_var=np.zeros((c, j)),
            base_censor=np.zeros((c, j)),
            new_r=1.0,
            new_extra_var=0.0,
            new_censor=0.0,
            delta=np.nan,
            tau=None,
        )
        defaults.update(scalars)
        if defaults["tau"] is None:
            sg = np.broadcast_to(np.asarray(defaults["sg"], float), (c,))
            si = cv_to_sigma(np.broadcast_to(np.asarray(defaults["cvi"], float), (c,)))
            defaults["tau"] = np.sqrt(sg**2 + si**2)
        return cls(base_y=y, base_r=r, **defaults)


def quadrature(n: int = DEFAULT_QUAD_NODES, kind: str = "gh"):
    """Nodes and weights for E[f(Z)], Z ~ N(0, 1).

    ``kind="gh"``: probabilists' Gauss-Hermite (numpy.polynomial.hermite_e.hermegauss).
    ``kind="grid"``: a dense trapezoid grid on [-9, 9] (the reference the tests compare with).
    """
    if n < 1:
        raise ValueError("need at least one node")
    if kind == "gh":
        if n == 1:
            return np.zeros(1), np.ones(1)
        x, w = np.polynomial.hermite_e.hermegauss(n)
        return x, w / w.sum()
    if kind == "grid":
        x = np.linspace(-9.0, 9.0, n)
        w = np.exp(-0.5 * x * x)
        w[0] *= 0.5
        w[-1] *= 0.5
        return x, w / w.sum()
    raise ValueError(f"unknown quadrature kind {kind!r}")


def _logsumexp(a, b=None, axis=-1):
    return special.logsumexp(a, b=b, axis=axis)


def mixture_quantile(q, weights, means, sds, tol=1e-9, max_iter=60):
    """Quantile ``q`` of the normal mixture sum_k weights[..., k] N(means, sds^2), vectorised.

    ``weights`` are normalised along the last axis. Newton from the moment-matched normal,
    kept inside a bisection bracket so it always converges.
    """
    weights = np.asarray(weights, float)
    means = np.asarray(means, float)
    sds = np.asarray(sds, float)
    q = np.broadcast_to(np.asarray(q, float), means.shape[:-1])
    mu = np.sum(weights * means, axis=-1)
    var = np.sum(weights * (sds**2 + means**2), axis=-1) - mu**2
    x = mu + np.sqrt(np.maximum(var, 1e-300)) * special.ndtri(q)
    lo = np.min(means - 12.0 * sds, axis=-1)
    hi = np.max(means + 12.0 * sds, axis=-1)
    inv_sd = 1.0 / sds
    for _ in range(max_iter):
        z = (x[..., None] - means) * inv_sd
        f = np.sum(weights * special.ndtr(z), axis=-1) - q
        dens = np.sum(weights * np.exp(-0.5 * z * z) * inv_sd, axis=-1) / np.sqrt(2 * np.pi)
        lo = np.where(f < 0, np.maximum(lo, x), lo)
        hi = np.where(f > 0, np.minimum(hi, x), hi)
        step = f / np.maximum(dens, 1e-300)
        x_new = x - step
        done = np.abs(step) <= tol
        # a Newton step leaving the bracket falls back to bisection (never for converged points,
        # whose bracket may have collapsed onto them by rounding)
        bad = ~done & ~((x_new > lo) & (x_new < hi))
        x_new = np.where(bad, 0.5 * (lo + hi), x_new)
        x = x_new
        if np.all(done):
            break
    return x


def _posterior_given_nodes(cases: CaseArrays, x_nodes, w_nodes):
    """Per case and node: set-point posterior mean/variance, sI^2, and log weights."""
    cvi_k = cases.cvi[:, None] * np.exp(cases.cvi_log_sd[:, None] * x_nodes[None, :])  # (C,K)
    si2 = np.log1p(cvi_k * cvi_k)  # (C,K)
    sg2 = cases.sg**2
    mask = cases.mask  # (C,J)
    r = np.where(mask, cases.base_r, 1.0)
    # centre at the prior mean for numerical stability
    yc = np.where(mask, cases.base_y - cases.prior_mean[:, None], 0.0)  # (C,J)
    ev = (cases.sa[:, None] ** 2) / r + cases.base_extra_var  # (C,J)
    n_b = mask.sum(-1).astype(float)  # (C,)
    # Fast path: when every baseline of a case has the same variance (same replicates, no extra
    # variance: the usual case) the sums over j collapse to counts, sums and sums of squares.
    ev0 = ev[:, 0]
    uniform = np.all((ev == ev0[:, None]) | ~mask, axis=-1)
    prec = np.empty_like(si2)
    b = np.empty_like(si2)
    sum_logv = np.empty_like(si2)
    sum_y2v = np.empty_like(si2)
    if uniform.any():
        u = uniform
        v0 = si2[u] + ev0[u, None]  # (Cu,K)
        inv0 = 1.0 / v0
        sy = yc[u].sum(-1)[:, None]
        syy = (yc[u] ** 2).sum(-1)[:, None]
        nb = n_b[u, None]
        prec[u] = 1.0 / sg2[u, None] + nb * inv0
        b[u] = sy * inv0
        sum_logv[u] = nb * (_LOG_2PI + np.log(v0))
        sum_y2v[u] = syy * inv0
    if not uniform.all():
        g = ~uniform
        v = si2[g][:, :, None] + ev[g][:, None, :]  # (Cg,K,J)
        mg = mask[g][:, None, :]
        inv_v = np.where(mg, 1.0 / v, 0.0)
        yg = yc[g][:, None, :]
        prec[g] = 1.0 / sg2[g, None] + inv_v.sum(-1)
        b[g] = (inv_v * yg).sum(-1)
        sum_logv[g] = np.where(mg, _LOG_2PI + np.log(v), 0.0).sum(-1)
        sum_y2v[g] = (inv_v * yg**2).sum(-1)
    m_c = b / prec
    pv = 1.0 / prec
    log_ml = -0.5 * (sum_logv + np.log(sg2[:, None] * prec) + sum_y2v - m_c * m_c * prec)
    logw = np.log(w_nodes)[None, :] + log_ml
    logw = logw - _logsumexp(logw, axis=-1)[:, None]
    return m_c + cases.prior_mean[:, None], pv, si2, logw


def exact_assess(
    cases: CaseArrays,
    coverage: float = DEFAULT_COVERAGE,
    ci_prob: float = DEFAULT_CI_PROB,
    nodes: int = DEFAULT_QUAD_NODES,
    kind: str = "gh",
    chunk: int = 50_000,
    intervals: bool = True,
    prune: float = 1e-10,
) -> dict[str, np.ndarray]:
    """Score every case; returns a dict of (C,) arrays (log scale where a value is returned).

    Keys: theta_mean, theta_lower, theta_upper (set point posterior mean and central ``ci_prob``
    credible limits), pi_lower, pi_upper (central ``coverage`` posterior-predictive interval for
    one new result under H0), percentile (predictive CDF of the assessed result), log_bf10,
    bf10, p_change, p_increase (P(D > 0 | y*, change)), p_exceed_delta (P(|D| > delta | y*)),
    n_baseline, cvi_post_mean (posterior mean of CVI, a fraction).

    ``intervals=False`` skips the four mixture quantiles (set point and personal interval
    limits, returned as NaN) for bulk scoring: the personal-interval decision is then read from
    ``percentile`` (outside the central interval <=> percentile < (1-coverage)/2 or > (1+coverage)/2).
    ``prune`` drops quadrature nodes whose posterior weight is below it in every case of the
    chunk (their total contribution is below ``prune * nodes``).
    """
    if not 0 < coverage < 1 or not 0 < ci_prob < 1:
        raise ValueError("coverage and ci_prob must lie in (0, 1)")
    n = cases.n_cases
    if n > chunk:
        parts = [
            exact_assess(
                cases.subset(slice(i, i + chunk)), coverage, ci_prob, nodes, kind, chunk,
                intervals, prune,
            )
            for i in range(0, n, chunk)
        ]
        return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}

    x_nodes, w_nodes = quadrature(nodes, kind)
    m, pv, si2, logw = _posterior_given_nodes(cases, x_nodes, w_nodes)
    w = np.exp(logw)
    if prune > 0 and w.shape[1] > 1:
        keep = np.max(w, axis=0) > prune
        m, pv, si2, w = m[:, keep], pv[:, keep], si2[:, keep], w[:, keep]
        with np.errstate(divide="ignore"):  # weights that underflowed to 0 give -inf, as intended
            logw = np.log(w)
        w = w / w.sum(-1, keepdims=True)
        logw = logw - np.log(np.sum(np.exp(logw), -1, keepdims=True))
    out: dict[str, np.ndarray] = {}
    out["n_baseline"] = cases.mask.sum(-1).astype(float)
    theta_mean = np.sum(w * m, axis=-1)
    out["theta_mean"] = theta_mean
    a = 0.5 * (1.0 - ci_prob)
    sd_theta = np.sqrt(pv)
    nan = np.full(n, np.nan)
    out["theta_lower"] = mixture_quantile(np.full(n, a), w, m, sd_theta) if intervals else nan
    out["theta_upper"] = mixture_quantile(np.full(n, 1 - a), w, m, sd_theta) if intervals else nan
    out["cvi_post_mean"] = np.sum(w * np.sqrt(np.expm1(si2)), axis=-1)

    new_var = pv + si2 + (cases.sa**2 / np.maximum(cases.new_r, 1.0) + cases.new_extra_var)[:, None]
    sd0 = np.sqrt(new_var)
    b = 0.5 * (1.0 - coverage)
    out["pi_lower"] = mixture_quantile(np.full(n, b), w, m, sd0) if intervals else nan
    out["pi_upper"] = mixture_quantile(np.full(n, 1 - b), w, m, sd0) if intervals else nan

    y = cases.new_y
    has_y = np.isfinite(y)
    yy = np.where(has_y, y, theta_mean)[:, None]
    tau2 = (cases.tau**2)[:, None]
    v1 = new_var + tau2
    resid = yy - m
    l0 = logw - 0.5 * (_LOG_2PI + np.log(new_var) + resid**2 / new_var)
    l1 = logw - 0.5 * (_LOG_2PI + np.log(v1) + resid**2 / v1)
    lp0 = _logsumexp(l0, axis=-1)
    lp1 = _logsumexp(l1, axis=-1)
    log_bf = lp1 - lp0
    pi = cases.prior_change
    # P(change) = pi BF / (pi BF + 1 - pi), computed on the log scale
    with np.errstate(divide="ignore"):
        logit = np.log(pi) - np.log1p(-pi) + log_bf
    p_change = special.expit(logit)
    out["percentile"] = np.where(has_y, np.sum(w * special.ndtr(resid / sd0), axis=-1), np.nan)
    # Under H1, D | y*, node k ~ N(tau^2/V1 * resid, tau^2 V0 / V1)
    w1 = np.exp(l1 - lp1[:, None])
    d_mean = tau2 / v1 * resid
    d_sd = np.sqrt(tau2 * new_var / v1)
    p_inc = np.sum(w1 * special.ndtr(d_mean / d_sd), axis=-1)
    has_delta = np.isfinite(cases.delta)
    if has_delta.any():
        delta = np.where(has_delta, cases.delta, 0.0)[:, None]
        tail = special.ndtr((d_mean - delta) / d_sd) + special.ndtr((-delta - d_mean) / d_sd)
        p_tail = np.sum(w1 * tail, axis=-1)
    else:
        p_tail = np.full(n, np.nan)
    out["log_bf10"] = np.where(has_y, log_bf, np.nan)
    out["bf10"] = np.exp(out["log_bf10"])
    out["p_change"] = np.where(has_y, p_change, np.nan)
    out["p_increase"] = np.where(has_y, p_inc, np.nan)
    out["p_exceed_delta"] = np.where(has_y & has_delta, p_change * p_tail, np.nan)
    return out
