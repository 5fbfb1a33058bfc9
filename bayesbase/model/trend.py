"""Exact drift model for the set point: a straight line on the log scale, conjugate given the
within-animal SD, Gauss-Hermite quadrature over ln(CVI). numpy / scipy; large jobs run the same
formulas in one compiled pass per series (:mod:`bayesbase.model._jit_trend`, numba).

Model (one animal, one analyte, natural-log scale; t in years)::

    theta(t)         = theta0 + beta * (t - t_ref)             set point path
    theta0           ~ Normal(mu, sG^2)                        set point at t_ref
    ln CVI           ~ Normal(ln CVI_pack, s^2)                s = pack's CVI uncertainty
    sI               = sqrt(ln(1 + CVI^2))
    y_j | theta0, b  ~ Normal(theta(t_j), sI^2 + sA^2 / r_j + e_j)
    H0: beta = 0;  H1: beta ~ Normal(0, sB^2)

``t_ref`` is the (unweighted) mean time of the usable specimens of the series: the population
prior N(mu, sG^2) describes the set point in the middle of the observed period (a modelling
choice). Given sI the model is a Gaussian linear model with two coefficients and prior
N((mu, 0), diag(sG^2, sB^2)), so the posterior of (theta0, beta) is bivariate normal and both
marginal likelihoods are closed forms (the same normal-normal algebra as
:mod:`bayesbase.engine`, extended from one coefficient to two). The marginal likelihoods
weight the quadrature nodes; every posterior quantity is a finite normal mixture.

P(drift) = pi_d BF / (pi_d BF + 1 - pi_d), BF = p(y | H1) / p(y | H0), pi_d =
:data:`bayesbase.constants.DEFAULT_PRIOR_DRIFT` unless given.

Rule: the trend is computed only when at least :data:`~bayesbase.constants.TREND_MIN_SPECIMENS`
(3) usable specimens span at least :data:`~bayesbase.constants.TREND_MIN_SPAN_YEARS` (0.5)
years; otherwise every output is NaN, ``eligible`` is False and ``reason`` says why.

Slope prior SD sB: the pack's ``slope_sd`` (per retest group); :data:`DEFAULT_SLOPE_SD` = 0.10
log units per year when absent. Modelling choice of this project: a drift of about 10 % a year
is a one-SD change for a chemistry analyte over a dog's senior years.

Time to a population limit L (``limit_upper`` / ``limit_lower``, natural log of the limit, the
same scale as ``y``): the side is the limit the posterior-mean slope (under H1) points to. The
q-quantile of the years from the last specimen is the smallest tau >= 0 with
P(theta(t_last + tau) beyond ln L | data, H1) = q, found by safeguarded Newton iterations. For
every posterior draw whose slope points to the limit this is exactly the crossing time
(ln L - theta(t_last)) / beta; it differs from that only for draws already beyond the limit at
the last specimen and moving back, whose probability is at most P(theta(t_last) beyond ln L)
(reported as ``p_beyond_limit``). A quantile later than
:data:`~bayesbase.constants.TREND_HORIZON_YEARS` (10 years), or any quantile when the slope
points away from both limits, is reported as +inf ("not within 10 years"). The MCMC path
(:mod:`bayesbase.mcmc_trend`) computes the crossing time draw by draw and is tested against this.

References
----------
.. [1] McIntosh MW, Urban N. A parametric empirical Bayes method for cancer screening using
   longitudinal observations of a biomarker. Biostatistics 2003;4:27-40 (normal-normal algebra
   on the log scale).
.. [2] Lindley DV, Smith AFM. Bayes estimates for the linear model. J R Stat Soc B
   1972;34:1-41 (conjugate Gaussian linear model; from memory).
.. [3] Kass RE, Raftery AE. Bayes factors. J Am Stat Assoc 1995;90:773-795 (posterior
   probability from a Bayes factor and prior odds).
"""
from __future__ import annotations


import numpy as np
from scipy import special

from ..classical import rcv_classical
from ..constants import (
    DEFAULT_CI_PROB,
    DEFAULT_PRIOR_DRIFT,
    DEFAULT_QUAD_NODES,
    TREND_HORIZON_YEARS,
    TREND_MIN_SPAN_YEARS,
    TREND_MIN_SPECIMENS,
)
from .engine import _BLOCK_ELEMS, _logsumexp, _node_cvi, cv_to_sigma, mixture_quantile, quadrature
from . import normal
from .normal import ndtr, ndtr_e

__all__ = [
    "DEFAULT_SLOPE_SD",
    "trend_exact",
    "trend_path",
    "prepare_series",
    "drift_power",
    "have_numba",
]

#: Prior SD of the drift slope (log units per year) when a pack gives none. Modelling choice:
#: a drift of about 10 %/year is a one-SD change for a chemistry analyte over a dog's senior years.
DEFAULT_SLOPE_SD = 0.10

_LOG_2PI = np.log(2.0 * np.pi)

#: the drift summary keys every engine returns (the PyMC engine adds its diagnostics)
SUMMARY_KEYS = (
    "p_drift", "bf10", "log_bf10", "p_increase",
    "slope_mean", "slope_sd", "slope_lower", "slope_upper",
    "pct_per_year_mean", "pct_per_year_lower", "pct_per_year_upper",
    "pct_per_year_avg_mean", "pct_per_year_avg_lower", "pct_per_year_avg_upper",
    "years_to_limit", "years_to_limit_lower", "years_to_limit_upper", "p_beyond_limit",
    "theta_last_mean",
)


# ----------------------------------------------------------------------------------- inputs
def _as_2d(a, name, shape=None):
    a = np.asarray(a, dtype=float)
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2:
        raise ValueError(f"{name}: expected a (C, J) array, got shape {a.shape}")
    if shape is not None and a.shape != shape:
        raise ValueError(f"{name}: expected shape {shape}, got {a.shape}")
    return a


def _as_1d(a, name, c, default=None):
    if a is None:
        a = default
    a = np.asarray(a, dtype=float)
    try:
        return np.broadcast_to(a, (c,)).astype(float, copy=True)
    except ValueError:
        raise ValueError(f"{name}: expected a scalar or a ({c},) array, got shape {a.shape}") from None


def _row_reduce(op, a):
    """``op.reduce(a, axis=-1)`` for a (C, J) array, one column at a time: numpy's reductions
    over a short last axis cost a fixed time per row. Exact for min / max (any order)."""
    if a.shape[1] == 0:
        return op.reduce(a, axis=-1)
    res = a[:, 0].copy()
    for j in range(1, a.shape[1]):
        op(res, a[:, j], out=res)
    return res


def _row_sum(a):
    """``a.sum(-1)`` for a (C, J) float array, bit for bit: numpy adds fewer than 8 terms in
    order (column by column here, faster); wider rows keep numpy's pairwise sum."""
    return _row_reduce(np.add, a) if 0 < a.shape[1] < 8 else a.sum(-1)


def _row_count(mask):
    """Number of True per row of a (C, J) boolean array."""
    n = np.zeros(mask.shape[0], dtype=np.intp)
    for j in range(mask.shape[1]):
        n += mask[:, j]
    return n


def prepare_series(times, y, r=None, extra_var=None, prior_mean=0.0, sg=1.0, cvi=0.1,
                   cvi_log_sd=0.0, sa=0.0, slope_sd=None):
    """Validate and broadcast padded series arrays; returns a dict of arrays.

    ``times``, ``y``, ``r``, ``extra_var``: (C, J) (or (J,) for one series); a specimen is
    usable when its time and log value are finite and ``r > 0`` (NaN / 0 padding as in
    :class:`bayesbase.engine.CaseArrays`). Scalars broadcast to (C,). ``slope_sd`` None or NaN
    takes :data:`DEFAULT_SLOPE_SD`. Adds ``mask``, ``n_used``, ``span_years``, ``t_ref``
    (mean time of the usable specimens), ``t_last``, ``eligible`` and ``reason``.
    """
    return _densify(_prepare(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa,
                             slope_sd))


def _densify(p):
    """``r`` and ``extra_var`` as (C, J) arrays where :func:`_prepare` left them None (not given:
    one replicate, no extra variance, 0 for unusable specimens)."""
    if p["r"] is None:
        p["r"] = p["mask"].astype(float)
    if p["extra_var"] is None:
        p["extra_var"] = np.zeros(p["y"].shape)
    return p


def _prepare(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa, slope_sd):
    """:func:`prepare_series` without building ``r`` / ``extra_var`` when not given (None:
    the compiled pass reads one shared row instead)."""
    y = _as_2d(y, "y")
    shape = y.shape
    times = _as_2d(times, "times", shape)
    r = None if r is None else _as_2d(r, "r", shape)
    extra_var = None if extra_var is None else _as_2d(extra_var, "extra_var", shape)
    c = shape[0]
    out = dict(
        prior_mean=_as_1d(prior_mean, "prior_mean", c),
        sg=_as_1d(sg, "sg", c),
        cvi=_as_1d(cvi, "cvi", c),
        cvi_log_sd=_as_1d(cvi_log_sd, "cvi_log_sd", c),
        sa=_as_1d(sa, "sa", c),
        slope_sd=_as_1d(DEFAULT_SLOPE_SD if slope_sd is None else slope_sd, "slope_sd", c),
    )
    out["slope_sd"] = np.where(np.isfinite(out["slope_sd"]), out["slope_sd"], DEFAULT_SLOPE_SD)
    for name in ("sg", "cvi", "slope_sd"):
        if np.any(~(out[name] > 0)):
            raise ValueError(f"{name} must be > 0 (log-scale SD or CV fraction)")
    for name in ("sa", "cvi_log_sd"):
        if np.any(~(out[name] >= 0)):
            raise ValueError(f"{name} must be >= 0")
    if not np.all(np.isfinite(out["prior_mean"])):
        raise ValueError("prior_mean must be finite (log scale)")
    mask = np.isfinite(times) & np.isfinite(y)
    if r is not None:
        mask &= r > 0
    if extra_var is not None and np.any(mask & ~(np.nan_to_num(extra_var, nan=-1.0) >= 0)):
        raise ValueError("extra_var must be >= 0 for every usable specimen")
    full = bool(mask.all())  # the usual case: no padding, no need to mask the times
    n_used = np.full(c, shape[1], dtype=np.intp) if full else _row_count(mask)
    tm = times if full else np.where(mask, times, np.inf)
    t_min = _row_reduce(np.minimum, tm)
    tm = times if full else np.where(mask, times, -np.inf)
    t_max = _row_reduce(np.maximum, tm)
    t_sum = _row_sum(times if full else np.where(mask, times, 0.0))
    t_ref = np.where(n_used > 0, t_sum / np.maximum(n_used, 1), np.nan)
    span = np.where(n_used > 0, t_max - t_min, 0.0)
    eligible = (n_used >= TREND_MIN_SPECIMENS) & (span >= TREND_MIN_SPAN_YEARS)
    reason = np.full(c, "", dtype=object)
    reason[n_used < TREND_MIN_SPECIMENS] = (
        f"fewer than {TREND_MIN_SPECIMENS} usable specimens"
    )
    short = (n_used >= TREND_MIN_SPECIMENS) & (span < TREND_MIN_SPAN_YEARS)
    reason[short] = f"usable specimens span less than {TREND_MIN_SPAN_YEARS} years"
    out.update(
        times=times, y=y,
        r=None if r is None else np.where(mask, r, 0.0),
        extra_var=None if extra_var is None else np.where(mask, extra_var, 0.0),
        mask=mask, n_used=n_used.astype(float), span_years=span, t_ref=t_ref,
        t_last=np.where(n_used > 0, t_max, np.nan), eligible=eligible, reason=reason,
    )
    return out


def _subset(p, idx):
    return {k: (v[idx] if isinstance(v, np.ndarray) else v) for k, v in p.items()}


# ---------------------------------------------------------------------------------- kernels
def _specimen_sums(p, si2):
    """Per series and node: the sums over usable specimens of (1, t, t^2, y, t y, y^2) / v_j
    (t, y centred; six (C, K) arrays) and of ln v_j, v_j = sI^2 + sA^2 / r_j + e_j. When every
    specimen of a series has the same variance (the usual case) v_j is one number per node and
    the sums are the plain sums divided by it."""
    mask = p["mask"]
    rr = np.where(mask, p["r"], 1.0)
    ev = (p["sa"][:, None] ** 2) / rr + p["extra_var"]  # (C,J)
    tc = np.where(mask, p["times"] - p["t_ref"][:, None], 0.0)
    yc = np.where(mask, p["y"] - p["prior_mean"][:, None], 0.0)
    g = np.stack([mask.astype(float), tc, tc * tc, yc, tc * yc, yc * yc], axis=-1)  # (C,J,6)
    ev0 = np.max(np.where(mask, ev, -np.inf), axis=-1)
    ev0 = np.where(np.isfinite(ev0), ev0, 0.0)
    uniform = np.all((ev == ev0[:, None]) | ~mask, axis=-1)
    gs = g.sum(1)  # (C,6)
    inv_v = 1.0 / (si2 + ev0[:, None])  # (C,K)
    sums = [gs[:, i : i + 1] * inv_v for i in range(6)]
    logv = np.log(inv_v)
    logv *= -gs[:, 0:1]
    if not uniform.all():
        o = ~uniform
        v = si2[o][:, :, None] + ev[o][:, None, :]  # (Co,K,J)
        mo = mask[o][:, None, :]
        so = np.matmul(np.where(mo, 1.0 / v, 0.0), g[o])
        for i in range(6):
            sums[i][o] = so[..., i]
        logv[o] = np.log(np.where(mo, v, 1.0)).sum(-1)
    return sums, logv


def _node_fits(p, x_nodes, w_nodes):
    """Per series and node: log marginal likelihoods under H0 and H1, and the H1 posterior of
    (theta0, beta) (means and covariance entries), all (C, K)."""
    _, si2 = _node_cvi(p["cvi"], p["cvi_log_sd"], x_nodes)  # sI^2 = ln(1 + CVI^2) per node
    (s0, s1, s2, h0, h1, qq), logv = _specimen_sums(p, si2)
    common = logv + qq  # the constant n ln(2 pi) cancels in every use
    sg2 = (p["sg"] ** 2)[:, None]
    sb2 = (p["slope_sd"] ** 2)[:, None]
    # H0: one coefficient (the set point), as in bayesbase.engine
    p0 = 1.0 / sg2 + s0
    ml0 = -0.5 * (common + np.log(sg2 * p0) - h0 * h0 / p0)
    # H1: two coefficients, prior precision diag(1/sG^2, 1/sB^2)
    a00 = p0
    a11 = 1.0 / sb2 + s2
    det = a00 * a11 - s1 * s1
    inv_det = 1.0 / det
    quad = (a11 * h0 * h0 - 2.0 * s1 * h0 * h1 + a00 * h1 * h1) * inv_det
    ml1 = -0.5 * (common + np.log(sg2 * sb2 * det) - quad)
    m_t = (a11 * h0 - s1 * h1) * inv_det + p["prior_mean"][:, None]
    m_b = (a00 * h1 - s1 * h0) * inv_det
    v_tt = a11 * inv_det
    v_tb = -s1 * inv_det
    v_bb = a00 * inv_det
    lw = np.log(w_nodes)[None, :]
    return dict(ml0=lw + ml0, ml1=lw + ml1, m_t=m_t, m_b=m_b, v_tt=v_tt, v_tb=v_tb, v_bb=v_bb)


def _normalise(logw):
    return np.exp(logw - _logsumexp(logw)[:, None])


def _line_at(f, tc):
    """Normal mixture components of theta at centred time(s) tc (broadcast against (C,K))."""
    mean = f["m_t"] + f["m_b"] * tc
    var = f["v_tt"] + 2.0 * tc * f["v_tb"] + tc * tc * f["v_bb"]
    return mean, var


def _crossing_cdf(tau, w, m0, v0, mb, c0b, vb, a):
    """F(tau) = sum_k w_k Phi(z_k(tau)) and dF/dtau, z = (m0 + mb tau - a) / s(tau),
    s^2 = v0 + 2 tau c0b + tau^2 vb; ``tau`` and ``a`` are (N,), the rest (N, K)."""
    t = tau[:, None]
    slope = c0b + t * vb
    s2 = v0 + t * (c0b + slope)
    s = np.sqrt(np.maximum(s2, 1e-300))
    num = m0 + mb * t - a[:, None]
    z = num / s
    dz = (mb - z * slope / s) / s
    e = z * z
    e *= -0.5
    np.exp(e, out=e)
    fval = np.einsum("ij,ij->i", w, ndtr_e(z, e))
    dens = np.einsum("ij,ij->i", w, e * dz) / np.sqrt(2 * np.pi)
    return fval, dens


def _crossing_start(q, w, m0, v0, mb, c0b, vb, a, horizon):
    """Start for F(tau) = q: the exact root for the one normal with the mixture's mean and
    covariance of (theta_last, beta), i.e. (M - a + B tau)^2 = z_q^2 (V0 + 2 C tau + VB tau^2)
    on the side sign(M - a + B tau) = sign(z_q); the middle of [0, horizon] when none fits."""
    mm = np.einsum("ij,ij->i", w, m0)
    bb = np.einsum("ij,ij->i", w, mb)
    dm = m0 - mm[:, None]
    db = mb - bb[:, None]
    vv0 = np.einsum("ij,ij->i", w, v0 + dm * dm)
    cc = np.einsum("ij,ij->i", w, c0b + dm * db)
    vvb = np.einsum("ij,ij->i", w, vb + db * db)
    z = float(special.ndtri(q))
    d = mm - a
    a2 = bb * bb - z * z * vvb
    a1 = d * bb - z * z * cc
    a0 = d * d - z * z * vv0
    x = np.full(mm.shape, 0.5 * horizon)
    with np.errstate(divide="ignore", invalid="ignore"):
        root = np.sqrt(a1 * a1 - a2 * a0)
        for r in ((-a1 + root) / a2, (-a1 - root) / a2, -a0 / (2.0 * a1)):
            fits = (r > 0) & (r < horizon) & (np.sign(d + bb * r) == np.sign(z))
            take = fits & (x == 0.5 * horizon)
            x[take] = r[take]
    return x


def _crossing_quantiles(qs, w, m0, v0, mb, c0b, vb, a, horizon, tol=1e-7, max_iter=80):
    """For each q in ``qs``: the smallest tau in [0, horizon] with F(tau) = sum_k w_k
    Phi((m0 + mb tau - a) / s_k(tau)) = q, s_k^2 = v0 + 2 tau c0b + tau^2 vb ("set point above a
    at tau years"). 0 where F(0) >= q, +inf where F(horizon) < q. Safeguarded Newton inside a
    bisection bracket from the one-normal root, iterating only on the rows not yet converged;
    F(0) and F(horizon) are shared by the quantiles."""
    n = m0.shape[0]
    a = np.broadcast_to(np.asarray(a, float), (n,))
    args = (w, m0, v0, mb, c0b, vb)
    f0, _ = _crossing_cdf(np.zeros(n), *args, a)
    fh, _ = _crossing_cdf(np.full(n, float(horizon)), *args, a)
    res = []
    for q in qs:
        out = np.full(n, np.nan)
        at0 = f0 >= q
        beyond = (~at0) & (fh < q)
        out[at0] = 0.0
        out[beyond] = np.inf
        act = np.nonzero(~(at0 | beyond))[0]
        if act.size:
            sub = tuple(v[act] for v in args)
            out[act] = _crossing_newton(q, sub, a[act], horizon, tol, max_iter)
        res.append(out)
    return res


def _crossing_newton(q, args, a, horizon, tol, max_iter):
    """Safeguarded Newton for :func:`_crossing_quantiles` on rows with F(0) < q <= F(horizon)."""
    n = a.size
    lo = np.zeros(n)
    hi = np.full(n, float(horizon))
    x = _crossing_start(q, *args, a, horizon)
    act = np.arange(n)
    sub, aa = args, a
    for _ in range(max_iter):
        xa = x[act]
        fv, dv = _crossing_cdf(xa, *sub, aa)
        g = fv - q
        lo[act] = np.where(g < 0, xa, lo[act])
        hi[act] = np.where(g >= 0, xa, hi[act])
        with np.errstate(divide="ignore", invalid="ignore"):
            step = g / dv
        x_new = xa - step
        ok = np.isfinite(x_new) & (x_new >= lo[act]) & (x_new <= hi[act])
        x_new = np.where(ok, x_new, 0.5 * (lo[act] + hi[act]))
        done = (ok & (np.abs(step) <= tol)) | (hi[act] - lo[act] <= tol)
        x[act] = x_new
        if done.all():
            break
        if not done.any():
            continue
        keep = ~done
        act = act[keep]
        sub = tuple(v[keep] for v in sub)
        aa = aa[keep]
    return x


def _summarise(p, f, prior_drift, ci_prob, limit_upper, limit_lower, horizon, prune=1e-13,
               intervals=True):
    """Posterior summaries for eligible series (all arrays (C,) or (C,K))."""
    c = p["y"].shape[0]
    lp0 = _logsumexp(f["ml0"])
    lp1 = _logsumexp(f["ml1"])
    log_bf = lp1 - lp0
    pi = np.broadcast_to(np.asarray(prior_drift, float), (c,))
    with np.errstate(divide="ignore"):
        p_drift = special.expit(np.log(pi) - np.log1p(-pi) + log_bf)
    w1 = np.exp(f["ml1"] - lp1[:, None])
    if prune > 0 and w1.shape[1] > 1:
        # drop nodes negligible for every series of the chunk (total weight < prune * K)
        keep = np.nonzero(np.max(w1, axis=0) > prune)[0]
        if keep.size < w1.shape[1]:  # np.take keeps the arrays C-ordered for the compiled loops
            f = {k: np.take(v, keep, axis=1) for k, v in f.items()}
            w1 = np.take(w1, keep, axis=1)
            w1 /= w1.sum(-1, keepdims=True)
    mb, vb = f["m_b"], f["v_bb"]
    sb = np.sqrt(vb)
    out = {}
    out["log_bf10"] = log_bf
    out["bf10"] = np.exp(log_bf)
    out["p_drift"] = p_drift
    p_pos = ndtr(mb / sb)
    out["p_increase"] = np.einsum("ij,ij->i", w1, p_pos)
    slope_mean = np.sum(w1 * mb, -1)
    out["slope_mean"] = slope_mean
    out["slope_sd"] = np.sqrt(np.maximum(np.sum(w1 * (vb + mb * mb), -1) - slope_mean**2, 0.0))
    a = 0.5 * (1.0 - ci_prob)
    out["pct_per_year_mean"] = 100.0 * (np.sum(w1 * np.exp(mb + 0.5 * vb), -1) - 1.0)
    out["pct_per_year_avg_mean"] = p_drift * out["pct_per_year_mean"]
    if not intervals:
        return out
    lo = mixture_quantile(np.full(c, a), w1, mb, sb)
    hi = mixture_quantile(np.full(c, 1.0 - a), w1, mb, sb)
    out["slope_lower"], out["slope_upper"] = lo, hi
    out["pct_per_year_lower"] = 100.0 * np.expm1(lo)
    out["pct_per_year_upper"] = 100.0 * np.expm1(hi)
    # model-averaged: point mass 1 - P(drift) at 0 plus P(drift) x the H1 posterior
    f1_0 = np.einsum("ij,ij->i", w1, 1.0 - p_pos)  # P(beta < 0 | H1)
    for key, qv in (("pct_per_year_avg_lower", a), ("pct_per_year_avg_upper", 1.0 - a)):
        below = p_drift * f1_0  # averaged CDF just below 0
        above = below + (1.0 - p_drift)  # averaged CDF at 0
        val = np.zeros(c)
        neg = qv < below
        pos = qv > above
        if np.any(neg):
            val[neg] = mixture_quantile(qv / p_drift[neg], w1[neg], mb[neg], sb[neg])
        if np.any(pos):
            qq = (qv - (1.0 - p_drift[pos])) / p_drift[pos]
            val[pos] = mixture_quantile(np.minimum(qq, 1 - 1e-15), w1[pos], mb[pos], sb[pos])
        out[key] = 100.0 * np.expm1(val)

    # set point at the last specimen, and time to the population limit
    tcl = (p["t_last"] - p["t_ref"])[:, None]
    m_last, v_last = _line_at(f, tcl)
    c_lb = f["v_tb"] + tcl * f["v_bb"]
    out["theta_last_mean"] = np.sum(w1 * m_last, -1)
    side = np.full(c, "", dtype=object)
    lu = np.broadcast_to(np.asarray(np.nan if limit_upper is None else limit_upper, float), (c,))
    ll = np.broadcast_to(np.asarray(np.nan if limit_lower is None else limit_lower, float), (c,))
    up = np.isfinite(lu) & (slope_mean > 0)
    dn = np.isfinite(ll) & (slope_mean < 0)
    side[up] = "upper"
    side[dn] = "lower"
    has_limit = np.isfinite(lu) | np.isfinite(ll)
    yrs = {k: np.where(has_limit, np.inf, np.nan) for k in ("mid", "lo", "hi")}
    p_beyond = np.full(c, np.nan)
    for sel, sign, lim in ((up, 1.0, lu), (dn, -1.0, ll)):
        if not np.any(sel):
            continue
        args = (w1[sel], sign * m_last[sel], v_last[sel], sign * mb[sel], c_lb[sel], vb[sel])
        aa = sign * lim[sel]
        sl = np.sqrt(v_last[sel])
        p_beyond[sel] = np.einsum("ij,ij->i", w1[sel], ndtr((sign * m_last[sel] - aa[:, None]) / sl))
        qs = (("mid", 0.5), ("lo", a), ("hi", 1.0 - a))
        found = _crossing_quantiles([qv for _, qv in qs], *args, aa, horizon)
        for (key, _), val in zip(qs, found):
            yrs[key][sel] = val
    out["years_to_limit"] = yrs["mid"]
    out["years_to_limit_lower"] = yrs["lo"]
    out["years_to_limit_upper"] = yrs["hi"]
    out["p_beyond_limit"] = p_beyond
    out["limit_side"] = side
    return out


# ------------------------------------------------------------------------ compiled path
_K = None  # the compiled loops (module _jit_trend), False when numba is unavailable


def _kernels(size=None):
    """The compiled drift loops, or None/False for the numpy path: jobs below
    ``normal.NUMBA_MIN_ELEMS`` (series, node) elements before they were loaded (loading them
    costs a fixed time per process that small jobs do not repay), or no numba."""
    global _K
    if _K is None:
        if size is not None and size < normal.NUMBA_MIN_ELEMS:
            return None
        try:
            from . import _jit_trend as _K
        except ImportError:  # pragma: no cover - numba is a declared dependency
            _K = False
    return _K


def have_numba() -> bool:
    """True when the compiled drift loops are available (loading them if needed), as
    :func:`.normal.have_numba` for the exact engine's."""
    return bool(_kernels())


def _c_array(a, dtype=float):
    return np.ascontiguousarray(a, dtype=dtype)


def _shared_rows(p):
    """``times``, ``y``, ``r``, ``extra_var`` for the compiled pass, with the row steps of times,
    r and extra_var: one row and step 0 where every series has the same row (times broadcast
    from one row; r / extra_var not given: 1 and 0), else the (C, J) array and step 1."""
    j = p["y"].shape[1]
    times = p["times"]
    shared = times.shape[0] > 0 and times.strides[0] == 0
    cols = [_c_array(times[:1] if shared else times), _c_array(p["y"])]
    steps = [0 if shared else 1]
    for name, fill in (("r", 1.0), ("extra_var", 0.0)):
        steps.append(0 if p[name] is None else 1)
        cols.append(np.full((1, j), fill) if p[name] is None else _c_array(p[name]))
    return cols, np.array(steps, dtype=np.int64)


def _trend_compiled(k, p, idx, x_nodes, w_nodes, pi, ci_prob, lu, ll, horizon, prune,
                    intervals, out):
    """:func:`trend_exact`'s summaries for the series ``idx`` in one compiled pass
    (:func:`bayesbase.model._jit_trend.trend_k`), written into ``out``; ``out`` None when
    ``idx`` is every series (0..C-1): then the summary arrays are made from the kernel's rows
    (no NaN-filled arrays to overwrite) and returned."""
    a = 0.5 * (1.0 - ci_prob)
    zq = special.ndtri(np.array([0.5, a, 1.0 - a]))
    res = np.empty((len(k.ROWS), idx.size))  # the kernel writes every row of every column
    side = np.empty(idx.size, dtype=np.int8)
    cols, steps = _shared_rows(p)
    per = [_c_array(v) for v in (p["t_ref"], p["t_last"], p["prior_mean"], p["sg"], p["slope_sd"],
                                  p["cvi"], p["cvi_log_sd"], p["sa"], pi, lu, ll)]
    with np.errstate(all="ignore"):
        k.trend_k(_c_array(idx, np.int64), *cols, steps, _c_array(p["mask"], np.bool_), *per,
                  _c_array(x_nodes), np.log(w_nodes), float(a), zq, float(horizon),
                  float(prune), bool(intervals), np.array(k.EARLY, float), res, side)
    r = dict(zip(k.ROWS, res))
    pct_mean = 100.0 * (r["exp_slope_mean"] - 1.0)
    got = {key: r[key] for key in ("log_bf10", "p_drift", "p_increase", "slope_mean", "slope_sd")}
    got["bf10"] = np.exp(r["log_bf10"])
    got["pct_per_year_mean"] = pct_mean
    got["pct_per_year_avg_mean"] = r["p_drift"] * pct_mean
    if intervals:
        for key, row in (("slope_lower", "slope_lower"), ("slope_upper", "slope_upper"),
                         ("theta_last_mean", "theta_last_mean"), ("years_to_limit", "years_mid"),
                         ("years_to_limit_lower", "years_lo"), ("years_to_limit_upper", "years_hi"),
                         ("p_beyond_limit", "p_beyond_limit")):
            got[key] = r[row]
        for key, row in (("pct_per_year_lower", "slope_lower"),
                         ("pct_per_year_upper", "slope_upper"),
                         ("pct_per_year_avg_lower", "avg_lower"),
                         ("pct_per_year_avg_upper", "avg_upper")):
            got[key] = 100.0 * np.expm1(r[row])
        got["limit_side"] = np.array(["lower", "", "upper"], dtype=object)[side + 1]
    if out is None:  # every series: the rows are the outputs; what bulk scoring skips is NaN
        out = {key: got.get(key) for key in SUMMARY_KEYS}
        for key in SUMMARY_KEYS:
            if out[key] is None:
                out[key] = np.full(idx.size, np.nan)
        out["limit_side"] = got.get("limit_side", np.full(idx.size, "", dtype=object))
        return out
    for key, val in got.items():
        out[key][idx] = val
    return out


# ------------------------------------------------------------------------------- public API
def trend_exact(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa, slope_sd,
                prior_drift=DEFAULT_PRIOR_DRIFT, limit_upper=None, limit_lower=None,
                nodes=DEFAULT_QUAD_NODES, ci_prob=DEFAULT_CI_PROB, seed=0,
                horizon=TREND_HORIZON_YEARS, chunk=20_000, prune=1e-13, intervals=True):
    """Drift model for C series at once; returns a dict of (C,) arrays.

    Inputs (log scale): ``times`` (C, J) years (any origin); ``y`` (C, J) mean log value of
    each specimen; ``r`` (C, J) replicates (0 = padding); ``extra_var`` (C, J) extra variance
    per specimen (0 if none); ``prior_mean`` mu, ``sg`` (log SD of set points), ``cvi``
    (fraction), ``cvi_log_sd`` (SD of ln CVI), ``sa`` (log analytical SD), ``slope_sd`` sB
    (log units/year; None/NaN -> :data:`DEFAULT_SLOPE_SD`), ``prior_drift`` pi_d,
    ``limit_upper`` / ``limit_lower``: natural log of the population limits (NaN/None = none).

    Keys: ``p_drift``, ``bf10``, ``log_bf10``, ``p_increase`` (P(beta > 0 | data, H1));
    ``slope_mean``, ``slope_sd``, ``slope_lower``, ``slope_upper`` (log units/year, under H1,
    i.e. conditional on drift); ``pct_per_year_mean/lower/upper`` (100 (exp(beta) - 1) under
    H1: posterior mean and central ``ci_prob`` interval); ``pct_per_year_avg_mean/lower/upper``
    (model-averaged over H0 and H1: a point mass 1 - P(drift) at 0 %); ``years_to_limit``
    (posterior median years from the last specimen until the set point reaches the limit on
    ``limit_side``), ``years_to_limit_lower/upper`` (central ``ci_prob`` interval; +inf = not
    within ``horizon`` years or the slope points away); ``p_beyond_limit`` (P(set point at the
    last specimen already beyond that limit)); ``limit_side`` ("upper", "lower" or "", object);
    ``theta_last_mean`` (posterior mean of the set point at the last specimen, under H1);
    ``eligible`` (bool), ``reason`` (object: why not computed, "" if computed), ``n_used``,
    ``span_years``, ``t_ref`` (mean time of the usable specimens, the input's time origin).

    Jobs of at least ``normal.NUMBA_MIN_ELEMS`` (series, node) elements run in one compiled pass
    (:mod:`bayesbase.model._jit_trend`); smaller ones in numpy, in blocks of at most ``chunk``
    series (fewer when the nodes are many, so a block stays in cache). ``prune``: quadrature
    nodes whose H1 posterior weight is at most ``prune`` are left out of the summaries (the
    Bayes factor always uses every node): per series on the compiled path, when negligible in
    every series of a block on the numpy path; the default 1e-13 moves no output by more than
    about 1e-10 (probabilities about 1e-13) from the unpruned value on the benchmark's series.
    ``intervals=False`` (bulk scoring) skips every quantile: the slope and percentage limits,
    the model-averaged limits and the time to limit are then NaN and ``limit_side`` is "".
    ``seed`` is unused by this exact path (kept so the exact and MCMC calls share a signature).
    """
    del seed
    if not 0 < ci_prob < 1:
        raise ValueError("ci_prob must lie in (0, 1)")
    pd_arr = np.asarray(prior_drift, float)
    if np.any(~((pd_arr > 0) & (pd_arr < 1))):
        raise ValueError("prior_drift must lie in (0, 1)")
    p = _prepare(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa, slope_sd)
    c = p["y"].shape[0]
    pi = np.broadcast_to(pd_arr, (c,))
    lu = np.broadcast_to(np.asarray(np.nan if limit_upper is None else limit_upper, float), (c,))
    ll = np.broadcast_to(np.asarray(np.nan if limit_lower is None else limit_lower, float), (c,))
    x_nodes, w_nodes = quadrature(nodes)
    idx_all = np.nonzero(p["eligible"])[0]
    k = _kernels(idx_all.size * x_nodes.size)
    out = None
    if not (k and idx_all.size == c):  # else the compiled pass makes the summary arrays
        out = {key: np.full(c, np.nan) for key in SUMMARY_KEYS}
        out["limit_side"] = np.full(c, "", dtype=object)
    if k:
        out = _trend_compiled(k, p, idx_all, x_nodes, w_nodes, pi, ci_prob, lu, ll, horizon,
                              prune, intervals, out)
        idx_all = idx_all[:0]
    else:
        _densify(p)
    block = max(1, min(int(chunk), _BLOCK_ELEMS // x_nodes.size))  # (series, node) arrays in cache
    for s in range(0, idx_all.size, block):
        idx = idx_all[s : s + block]
        ps = _subset(p, idx)
        f = _node_fits(ps, x_nodes, w_nodes)
        res = _summarise(ps, f, pi[idx], ci_prob, lu[idx], ll[idx], horizon, prune, intervals)
        for k, v in res.items():
            out[k][idx] = v
    out["eligible"] = p["eligible"].copy()
    out["reason"] = p["reason"]
    out["n_used"] = p["n_used"]
    out["span_years"] = p["span_years"]
    out["t_ref"] = p["t_ref"]
    return out


def trend_path(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa, slope_sd, at_times,
               nodes=DEFAULT_QUAD_NODES, ci_prob=DEFAULT_CI_PROB):
    """Fitted set-point path of ONE series under H1 (drift), log scale, for plotting.

    Returns dict(time, mean, lower, upper, eligible, reason): posterior mean and central
    ``ci_prob`` credible band of theta(t) at ``at_times`` (years, same origin as ``times``).
    When the trend rule is not met the path is NaN and ``reason`` says why.
    """
    at = np.atleast_1d(np.asarray(at_times, float))
    p = prepare_series(times, y, r, extra_var, prior_mean, sg, cvi, cvi_log_sd, sa, slope_sd)
    if p["y"].shape[0] != 1:
        raise ValueError("trend_path takes one series; use trend_exact for many")
    nan = np.full(at.size, np.nan)
    base = dict(time=at, eligible=bool(p["eligible"][0]), reason=str(p["reason"][0]))
    if not p["eligible"][0]:
        return dict(base, mean=nan, lower=nan.copy(), upper=nan.copy())
    x_nodes, w_nodes = quadrature(nodes)
    f = _node_fits(p, x_nodes, w_nodes)
    w1 = _normalise(f["ml1"])[0]  # (K,)
    f1 = {k: v[0][None, :] for k, v in f.items()}  # (1,K)
    tc = (at - p["t_ref"][0])[:, None]  # (T,1)
    mean, var = _line_at(f1, tc)  # (T,K)
    ww = np.broadcast_to(w1, mean.shape)
    a = 0.5 * (1.0 - ci_prob)
    sd = np.sqrt(var)
    return dict(
        base,
        mean=np.sum(ww * mean, -1),
        lower=mixture_quantile(np.full(at.size, a), ww, mean, sd),
        upper=mixture_quantile(np.full(at.size, 1 - a), ww, mean, sd),
    )


# ----------------------------------------------------------------------- simulation helpers
def _simulate(rng, n_series, times, beta, theta0, si, sa):
    """Log values on a fixed design: theta0 + beta (t - mean t) + N(0, sI^2 + sA^2)."""
    tc = times - times.mean()
    sd = np.sqrt(si**2 + sa**2)
    return theta0[:, None] + beta[:, None] * tc[None, :] + rng.normal(0.0, 1.0, (n_series, times.size)) * sd


def drift_power(n_specimens=(3, 4, 6), pct_per_year=10.0, n_series=20_000, seed=20261,
                cvi=0.10, cva=0.03, cvg=0.20, slope_sd=DEFAULT_SLOPE_SD,
                prior_drift=DEFAULT_PRIOR_DRIFT, p_drift_cut=0.9, p_increase_cut=0.95,
                centre=90.0):
    """Power of the drift rules vs the classical RCV on consecutive pairs, by simulation.

    For each n in ``n_specimens``: n annual specimens; the set point at mid-series is drawn
    from the population N(ln ``centre``, sG^2) and drifts by ``pct_per_year`` (or 0 for the
    false-alarm columns); each result adds N(0, sI^2 + sA^2) (known CVI: ``cvi_log_sd`` = 0).
    Rules: "P(drift) > ``p_drift_cut``"; "P(beta > 0 | H1) > ``p_increase_cut``"; "any
    consecutive pair differs by more than the classical two-sided 95 % RCV" = sqrt(2) * 1.96 *
    sqrt(CVA^2 + CVI^2) (Fraser CG, Clin Chem Lab Med 2012;50:807, via
    :func:`bayesbase.classical.rcv_classical`).

    Defaults are creatinine-like: CVI 0.10 (from memory), CVA 0.03 (common practice),
    CVG 0.20 (from memory); ``centre`` 90 umol/L is invented for this demo.
    Returns a pandas DataFrame, one row per n: ``rcv_pct``; ``power_*`` (true drift of
    ``pct_per_year``) and ``false_alarm_*`` (no drift) for the rules ``p_drift``,
    ``p_drift_rising`` (P(drift) > cut and P(beta > 0 | H1) > 0.5), ``p_increase`` and
    ``rcv_any_pair``. Trend columns are NaN when n is below the trend rule.
    """
    import pandas as pd  # local: the numeric core stays importable without pandas

    rng = np.random.default_rng(seed)
    si = float(cv_to_sigma(cvi))
    sa = float(cv_to_sigma(cva))
    sg = float(cv_to_sigma(cvg))
    rcv = float(rcv_classical(cva, cvi))
    beta1 = np.log1p(pct_per_year / 100.0)
    rows = []
    for n in n_specimens:
        times = np.arange(float(n))
        row = {"n_specimens": int(n), "pct_per_year": float(pct_per_year), "rcv_pct": 100 * rcv}
        eligible_n = n >= TREND_MIN_SPECIMENS and (n - 1) >= TREND_MIN_SPAN_YEARS
        for label, b in (("power", beta1), ("false_alarm", 0.0)):
            theta0 = np.log(centre) + sg * rng.normal(size=n_series)
            y = _simulate(rng, n_series, times, np.full(n_series, b), theta0, si, sa)
            res = trend_exact(
                np.broadcast_to(times, y.shape), y, None, None, np.log(centre), sg, cvi, 0.0, sa,
                slope_sd, prior_drift=prior_drift, nodes=1,
            )
            x = np.exp(y)
            pair = np.any(np.abs(x[:, 1:] / x[:, :-1] - 1.0) > rcv, axis=-1)
            nan = float("nan")
            row[f"{label}_p_drift"] = (
                float(np.mean(res["p_drift"] > p_drift_cut)) if eligible_n else nan
            )
            row[f"{label}_p_drift_rising"] = float(
                np.mean((res["p_drift"] > p_drift_cut) & (res["p_increase"] > 0.5))
            ) if eligible_n else nan
            row[f"{label}_p_increase"] = (
                float(np.mean(res["p_increase"] > p_increase_cut)) if eligible_n else nan
            )
            row[f"{label}_rcv_any_pair"] = float(np.mean(pair))
        rows.append(row)
    return pd.DataFrame(rows)
