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
are found by safeguarded fourth-order iterations (bisection fallback; :mod:`.normal`); the
compiled pass takes the root of the mixture CDF's order-6 Taylor polynomial and stops when a
bound on the remainder proves the quantile within tol / 10 (:func:`._jit._quantile`; one
evaluation per quantile in the usual case).

Large jobs run one compiled pass per case (:func:`._jit.engine_cases_k`: node posteriors and
weights, the scores, then the four quantiles, with the nodes of negligible weight left out per
case), optionally over several threads of the process. Small jobs (and an install without
numba) use numpy: cases in blocks of about ``_BLOCK_ELEMS / nodes`` rows so every (case, node)
array stays in the CPU cache. On both paths the usual case (baselines of equal variance) reduces
to counts, sums and sums of squares, and the per-node CVI terms are computed once per distinct
(CVI, uncertainty). The compiled pass also keeps every per-node quantity that does not depend on
the values (posterior variances, the log weights' constant part, the predictive variances, their
square roots and inverses) once per design (CVI, uncertainty, sG, baseline variance, number of
baselines, new-result variance, tau), so a case of a known design costs a few multiply-adds per
node before the exponentials and normal CDFs of its scores.

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
from . import normal
from .normal import mixture_quantile, ndtr, ndtr_e

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



#: (case, node) elements per block: about 0.5 MB per float64 array, within a core's L2 cache
_BLOCK_ELEMS = 65_536

#: the keys of :func:`exact_assess`, in order
OUTPUT_KEYS = (
    "n_baseline", "theta_mean", "theta_lower", "theta_upper", "cvi_post_mean", "pi_lower",
    "pi_upper", "percentile", "log_bf10", "bf10", "p_change", "p_increase", "p_exceed_delta",
)


def _logsumexp(a, axis=-1):
    """log(sum(exp(a))) along the last axis (rows of -inf give -inf)."""
    mx = np.max(a, axis=axis, keepdims=True)
    mx[~np.isfinite(mx)] = 0.0
    with np.errstate(divide="ignore"):
        return np.log(np.sum(np.exp(a - mx), axis=axis)) + mx[..., 0]


def _node_cvi(cvi, s, x_nodes):
    """CVI and sI^2 = ln(1 + CVI^2) at each node, (C, K); computed once per distinct
    (CVI, uncertainty) pair of the block."""
    key = cvi + 1j * s
    uniq, inv = np.unique(key, return_inverse=True)
    if uniq.size * 4 <= key.size:
        cvi_k = uniq.real[:, None] * np.exp(uniq.imag[:, None] * x_nodes[None, :])
        si2 = np.log1p(cvi_k * cvi_k)
        return cvi_k[inv], si2[inv]
    cvi_k = cvi[:, None] * np.exp(s[:, None] * x_nodes[None, :])
    return cvi_k, np.log1p(cvi_k * cvi_k)


def _uniform_terms(si2, ev0, yc, n_b, sg2):
    """Posterior mean (centred), variance and log marginal likelihood (up to a per-case
    constant) per node when every baseline of a case has the same variance ``ev0``."""
    nb = n_b[:, None]
    sy = yc.sum(-1)[:, None]
    syy = np.einsum("ij,ij->i", yc, yc)[:, None]
    v0 = si2 + ev0[:, None]
    inv0 = 1.0 / v0
    prec = inv0 * nb
    prec += 1.0 / sg2[:, None]
    pv = 1.0 / prec
    m_c = inv0 * sy
    m_c *= pv
    # log ml = -0.5 (n ln v0 + ln(sG^2 prec) + (syy - m_c sy) / v0), constants dropped
    lml = np.log(v0)
    lml *= nb
    prec *= sg2[:, None]
    lml += np.log(prec)
    t = m_c * sy
    np.subtract(syy, t, out=t)
    t *= inv0
    lml += t
    lml *= -0.5
    return m_c, pv, lml


def _general_terms(si2, ev, yc, mask, sg2):
    """As :func:`_uniform_terms` for baselines of unequal variance (replicates, extra variance)."""
    v = si2[:, :, None] + ev[:, None, :]  # (C,K,J)
    mg = mask[:, None, :]
    inv_v = np.where(mg, 1.0 / v, 0.0)
    yg = yc[:, None, :]
    prec = 1.0 / sg2[:, None] + inv_v.sum(-1)
    b = (inv_v * yg).sum(-1)
    sum_logv = np.where(mg, np.log(v), 0.0).sum(-1)
    m_c = b / prec
    lml = -0.5 * (sum_logv + np.log(sg2[:, None] * prec) + (inv_v * yg**2).sum(-1) - m_c * b)
    return m_c, 1.0 / prec, lml


def _node_posterior(f, x_nodes, log_w_nodes):
    """Per case and node of a block: set-point posterior mean and variance, CVI, sI^2, and the
    normalised posterior log weights and weights of the nodes."""
    cvi_k, si2 = _node_cvi(f["cvi"], f["cvi_log_sd"], x_nodes)
    sg2 = f["sg"] ** 2
    mask = f["base_r"] > 0
    r = np.where(mask, f["base_r"], 1.0)
    yc = np.where(mask, f["base_y"] - f["prior_mean"][:, None], 0.0)
    ev = (f["sa"][:, None] ** 2) / r + f["base_extra_var"]
    n_b = mask.sum(-1).astype(float)
    ev0 = ev[:, 0]
    uniform = np.all((ev == ev0[:, None]) | ~mask, axis=-1)
    if uniform.all():
        m_c, pv, lml = _uniform_terms(si2, ev0, yc, n_b, sg2)
    else:
        m_c, pv, lml = (np.empty_like(si2) for _ in range(3))
        for sel, fn in ((uniform, _uniform_terms), (~uniform, _general_terms)):
            if sel.any():
                args = (ev0[sel], yc[sel], n_b[sel]) if fn is _uniform_terms else (
                    ev[sel], yc[sel], mask[sel])
                m_c[sel], pv[sel], lml[sel] = fn(si2[sel], *args, sg2[sel])
    lml += log_w_nodes[None, :]
    # normalised weights and their logs with one exp pass (the maximum weight of a row is 1
    # before normalising, so the sum never underflows)
    lml -= np.max(lml, axis=-1, keepdims=True)
    w = np.exp(lml)
    tot = w.sum(-1, keepdims=True)
    w /= tot
    lml -= np.log(tot)
    m_c += f["prior_mean"][:, None]
    return m_c, pv, cvi_k, si2, lml, w


def _prune(prune, w, logw, *arrays):
    """Drop the nodes whose weight is below ``prune`` times the case's largest weight in every
    case of the block."""
    if not (prune > 0 and w.shape[1] > 1):
        return (w, logw) + arrays
    keep = np.max(w / np.max(w, axis=1, keepdims=True), axis=0) >= prune
    if keep.all():
        return (w, logw) + arrays
    idx = np.nonzero(keep)[0]  # np.take keeps the arrays C-ordered (the compiled loops want it)
    w = np.take(w, idx, axis=1)
    tot = w.sum(-1, keepdims=True)
    w /= tot
    logw = np.take(logw, idx, axis=1) - np.log(tot)
    return (w, logw) + tuple(np.take(a, idx, axis=1) for a in arrays)


def _mix_log_density(w, logw, a2, var):
    """log sum_k w_k N(r_k; 0, var_k) with a2 = r^2 / var (up to -0.5 ln 2 pi), and the
    component posterior weights; falls back to log-sum-exp for rows that underflow."""
    e = np.exp(-0.5 * a2)
    u = e / np.sqrt(var)
    u *= w
    tot = u.sum(-1)
    ok = tot > 1e-250
    with np.errstate(divide="ignore"):
        lp = np.log(tot)
    post = u / np.where(ok, tot, 1.0)[:, None]
    if not ok.all():
        bad = ~ok
        lb = logw[bad] - 0.5 * (np.log(var[bad]) + a2[bad])
        lp[bad] = _logsumexp(lb)
        post[bad] = np.exp(lb - lp[bad][:, None])
    return lp, post, e


def _score_sums(w, logw, m, new_var, yy, tau2):
    """Per case: log predictive densities under H0 and H1 (up to -0.5 ln 2 pi), the percentile
    and P(D > 0 | y*, H1), with numpy and scipy."""
    tau2 = tau2[:, None]
    yy = yy[:, None]
    v1 = new_var + tau2
    resid = yy - m
    r2 = resid * resid
    lp0, _, e0 = _mix_log_density(w, logw, r2 / new_var, new_var)
    lp1, w1, _ = _mix_log_density(w, logw, r2 / v1, v1)
    pct = np.einsum("ij,ij->i", w, ndtr_e(resid / np.sqrt(new_var), e0))
    d_mean = tau2 / v1 * resid
    d_sd = np.sqrt(tau2 * new_var / v1)
    p_inc = np.einsum("ij,ij->i", w1, ndtr(d_mean / d_sd))
    return lp0, lp1, pct, p_inc


def _tail(w, logw, m, new_var, yy, tau2, delta):
    """P(|D| > delta | y*, H1) per case (cases with a finite ``delta``)."""
    tau2 = tau2[:, None]
    v1 = new_var + tau2
    resid = yy[:, None] - m
    lp1, w1, _ = _mix_log_density(w, logw, resid * resid / v1, v1)
    d_mean = tau2 / v1 * resid
    d_sd = np.sqrt(tau2 * new_var / v1)
    dl = delta[:, None]
    tail = ndtr((d_mean - dl) / d_sd) + ndtr((-dl - d_mean) / d_sd)
    return np.einsum("ij,ij->i", w1, tail)


def _scores(f, w, logw, m, new_var, theta_mean, out):
    """Percentile, Bayes factor, P(change), P(increase), P(|D| > delta) of a block."""
    y = f["new_y"]
    has_y = np.isfinite(y)
    yy = np.where(has_y, y, theta_mean)
    tau2 = f["tau"] ** 2
    lp0, lp1, pct, p_inc = _score_sums(w, logw, m, new_var, yy, tau2)
    log_bf = lp1 - lp0
    pi = f["prior_change"]
    with np.errstate(divide="ignore"):
        logit = np.log(pi) - np.log1p(-pi) + log_bf
    p_change = special.expit(logit)
    has_delta = np.isfinite(f["delta"]) & has_y
    p_tail = np.full(y.shape, np.nan)
    if has_delta.any():
        d = has_delta
        p_tail[d] = _tail(w[d], logw[d], m[d], new_var[d], yy[d], tau2[d], f["delta"][d])
    nan = np.nan
    out["percentile"] = np.where(has_y, pct, nan)
    out["log_bf10"] = np.where(has_y, log_bf, nan)
    with np.errstate(over="ignore"):  # an overwhelming change: BF = inf, P(change) = 1
        out["bf10"] = np.exp(out["log_bf10"])
    out["p_change"] = np.where(has_y, p_change, nan)
    out["p_increase"] = np.where(has_y, p_inc, nan)
    out["p_exceed_delta"] = np.where(has_delta, p_change * p_tail, nan)


_FIELDS = ("prior_mean", "sg", "cvi", "cvi_log_sd", "sa", "base_y", "base_r", "base_extra_var",
           "new_y", "new_r", "new_extra_var", "tau", "delta", "prior_change")


def _assess_block(f, x_nodes, log_w_nodes, coverage, ci_prob, intervals, prune):
    """Every output of :func:`exact_assess` for one block of cases (``f``: sliced fields)."""
    m, pv, cvi_k, si2, logw, w = _node_posterior(f, x_nodes, log_w_nodes)
    n = m.shape[0]
    out: dict[str, np.ndarray] = {}
    out["n_baseline"] = (f["base_r"] > 0).sum(-1).astype(float)
    theta_mean = np.einsum("ij,ij->i", w, m)
    out["theta_mean"] = theta_mean
    # sqrt(expm1(sI^2)) is the node's CVI itself
    out["cvi_post_mean"] = np.einsum("ij,ij->i", w, cvi_k)
    new_var = pv + si2
    new_var += (f["sa"] ** 2 / np.maximum(f["new_r"], 1.0) + f["new_extra_var"])[:, None]
    # the scores use every node: an extreme new result can revive a node of negligible weight
    _scores(f, w, logw, m, new_var, theta_mean, out)
    a, b = 0.5 * (1.0 - ci_prob), 0.5 * (1.0 - coverage)
    if intervals:
        w, _, m, pv, new_var = _prune(prune, w, logw, m, pv, new_var)
        sd_theta = np.sqrt(pv)
        sd0 = np.sqrt(new_var)
        out["theta_lower"] = mixture_quantile(np.full(n, a), w, m, sd_theta)
        out["theta_upper"] = mixture_quantile(np.full(n, 1 - a), w, m, sd_theta)
        out["pi_lower"] = mixture_quantile(np.full(n, b), w, m, sd0)
        out["pi_upper"] = mixture_quantile(np.full(n, 1 - b), w, m, sd0)
    else:
        for key in ("theta_lower", "theta_upper", "pi_lower", "pi_upper"):
            out[key] = np.full(n, np.nan)
    return out


def _assess_compiled(f, x_nodes, log_w_nodes, coverage, ci_prob, intervals, prune, threads):
    """:func:`exact_assess` by the compiled one-pass kernel, the cases split over ``threads``
    threads (the kernel releases the GIL)."""
    k = normal._kernels()
    n = f["prior_mean"].shape[0]
    a, b = 0.5 * (1.0 - ci_prob), 0.5 * (1.0 - coverage)
    levels = np.array([a, 1.0 - a, b, 1.0 - b])
    out = np.empty((len(OUTPUT_KEYS), n))
    c = {key: np.ascontiguousarray(v, dtype=float) for key, v in f.items()}
    args = (x_nodes, log_w_nodes, c["prior_mean"], c["sg"], c["cvi"], c["cvi_log_sd"], c["sa"],
            c["base_y"], c["base_r"], c["base_extra_var"], c["new_y"], c["new_r"],
            c["new_extra_var"], c["tau"], c["delta"], c["prior_change"], levels,
            special.ndtri(levels), bool(intervals), float(prune), 1e-9, 60, out)
    nt = max(1, min(int(threads), n // 2_000 or 1))
    if nt == 1:
        k.engine_cases_k(0, n, *args, *k.engine_scratch(x_nodes.size))
    else:
        from concurrent.futures import ThreadPoolExecutor

        edges = np.linspace(0, n, nt + 1).astype(int)
        with ThreadPoolExecutor(nt) as pool:
            list(pool.map(lambda j: k.engine_cases_k(edges[j], edges[j + 1], *args,
                                                     *k.engine_scratch(x_nodes.size)), range(nt)))
    return dict(zip(OUTPUT_KEYS, out))


def exact_assess(
    cases: CaseArrays,
    coverage: float = DEFAULT_COVERAGE,
    ci_prob: float = DEFAULT_CI_PROB,
    nodes: int = DEFAULT_QUAD_NODES,
    kind: str = "gh",
    chunk: int = 50_000,
    intervals: bool = True,
    prune: float = 1e-13,
    threads: int = 1,
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
    Jobs of at least :data:`.normal.NUMBA_MIN_ELEMS` (case, node) elements (or any job once
    the compiled loops are loaded) run one compiled pass per case (:func:`._jit.engine_cases_k`),
    split over ``threads`` threads of this process (same numbers for any count); smaller jobs
    use numpy in blocks of at most ``chunk`` rows (fewer when the nodes are many, so the block
    stays in cache). ``prune``: the four quantiles leave out the quadrature nodes whose
    posterior weight is below ``prune`` times the largest weight (of the case; on the numpy
    path, in every case of the block), so their total share is below ``prune * nodes``. The
    compiled scores leave out the nodes before the first and after the last of at least 1e-13 of
    the largest weight only while their largest possible share of either predictive density is
    below 1e-12 (a node an extreme new result revives is kept); the numpy scores use every node.
    """
    if not 0 < coverage < 1 or not 0 < ci_prob < 1:
        raise ValueError("coverage and ci_prob must lie in (0, 1)")
    n = cases.n_cases
    x_nodes, w_nodes = quadrature(nodes, kind)
    with np.errstate(divide="ignore"):
        log_w_nodes = np.log(w_nodes)
    block = max(1, min(int(chunk), _BLOCK_ELEMS // x_nodes.size))
    fields = {k: getattr(cases, k) for k in _FIELDS}
    if normal.prepare(n * x_nodes.size):
        return _assess_compiled(fields, x_nodes, log_w_nodes, coverage, ci_prob, intervals, prune,
                                threads)
    out = {k: np.empty(n) for k in OUTPUT_KEYS}
    for i in range(0, n, block):
        sl = slice(i, min(i + block, n))
        res = _assess_block({k: v[sl] for k, v in fields.items()}, x_nodes, log_w_nodes,
                            coverage, ci_prob, intervals, prune)
        for k, v in res.items():
            out[k][sl] = v
    return out
