"""The compiled exact engine's quantile solve (one Taylor step of order 6 with a proven stop rule,
:func:`bayesbase.model._jit._quantile`): its two derivative bounds against numpy's Hermite
polynomials, and the four quantiles of every case against scipy's brentq on the mixture CDF.

References: Abramowitz M, Stegun IA, Handbook of Mathematical Functions, 22.14.17 (Cramer's
inequality for Hermite polynomials); numpy.polynomial.hermite_e (He_n); scipy.stats.norm and
scipy.optimize.brentq (the mixture CDF and its root); McIntosh & Urban, Biostatistics
2003;4:27-40 (the normal-normal posterior per node).
"""
import math

import numpy as np
import pytest
from scipy import optimize, special, stats

from bayesbase.model import normal
from bayesbase.model.engine import CaseArrays, exact_assess

pytest.importorskip("numba")


def test_derivative_bounds_hold_on_a_fine_grid():
    """sup |z phi(z)| = phi(1) and sup |He_6(z) phi(z)| <= the Cramer bound used by the stop
    rule (reference: numpy's hermite_e evaluated on a grid of 2,000,001 points in [-40, 40])."""
    from bayesbase.model import _jit

    z = np.linspace(-40.0, 40.0, 2_000_001)
    pdf = stats.norm.pdf(z)
    assert np.max(np.abs(z * pdf)) == pytest.approx(_jit._PHI1, rel=1e-9)
    assert _jit._PHI1 == pytest.approx(math.exp(-0.5) / math.sqrt(2 * math.pi), rel=1e-15)
    he6 = np.polynomial.hermite_e.hermeval(z, [0] * 6 + [1])
    sup6 = np.max(np.abs(he6 * pdf))
    assert sup6 <= _jit._HE6PHI
    # the bound is Cramer's K sqrt(6!) / sqrt(2 pi) with K = 1.086435 rounded up
    assert _jit._HE6PHI == pytest.approx(1.086435 * math.sqrt(720) / math.sqrt(2 * math.pi), rel=1e-4)
    assert _jit._QORD == 6 and _jit._FACT7 == math.factorial(7)


def _cases(n, seed):
    """Invented cases: 0 to 4 baselines, unequal replicates and extra variance, extreme or
    missing new values, CVI uncertainty from none to 1 (log SD), small to large sG and sA."""
    rng = np.random.default_rng(seed)
    j = 4
    mu = np.log(rng.uniform(1.0, 500.0, n))
    sg = rng.uniform(0.02, 0.8, n)
    nb = rng.integers(0, j + 1, n)
    base = mu[:, None] + rng.normal(0, 1, (n, j)) * sg[:, None] * rng.choice([0.3, 1.0, 4.0], (n, 1))
    used = np.arange(j)[None, :] < nb[:, None]
    base[~used] = np.nan
    r = np.where(used, rng.choice([1.0, 1.0, 2.0, 3.0], (n, j)), 0.0)
    extra = np.where(rng.random((n, j)) < 0.2, rng.uniform(0, 0.01, (n, j)), 0.0)
    new = mu + rng.choice([0.0, 0.1, 1.0, 30.0, -30.0], n) + rng.normal(0, 0.2, n)
    new[rng.random(n) < 0.05] = np.nan
    return CaseArrays(
        prior_mean=mu, sg=sg, cvi=rng.uniform(0.01, 0.6, n), cvi_log_sd=rng.choice([0.0, 0.05, 0.3, 0.6, 1.0], n),
        sa=rng.choice([0.0, 0.01, 0.05, 0.2], n), base_y=base, base_r=r, base_extra_var=extra,
        base_censor=np.zeros((n, j)), new_y=new, new_r=rng.choice([1.0, 2.0], n), new_extra_var=np.zeros(n),
        new_censor=np.zeros(n), tau=rng.uniform(0.1, 0.5, n), delta=np.full(n, np.nan),
        prior_change=np.full(n, 0.1),
    )


def _brentq(q, w, m, s):
    # reference: scipy.optimize.brentq on the mixture CDF built from scipy.stats.norm.cdf
    lo, hi = np.min(m - 40 * s), np.max(m + 40 * s)
    return optimize.brentq(lambda x: np.sum(w * stats.norm.cdf(x, m, s)) - q, lo, hi, xtol=1e-15, rtol=1e-15)


def _reference(c, i, nodes, levels):
    """The four quantiles of case i the plain way: per node the baselines' joint normal marginal
    (scipy.stats.multivariate_normal) and the normal-normal posterior, then brentq."""
    x, wn = np.polynomial.hermite_e.hermegauss(nodes)
    cvi_k = c.cvi[i] * np.exp(c.cvi_log_sd[i] * x)
    si2 = np.log1p(cvi_k**2)
    used = c.base_r[i] > 0
    y, mu, sg2 = c.base_y[i][used], c.prior_mean[i], c.sg[i] ** 2
    lw, m, pv = np.log(wn / wn.sum()), np.zeros(nodes), np.zeros(nodes)
    for k in range(nodes):
        v = si2[k] + c.sa[i] ** 2 / c.base_r[i][used] + c.base_extra_var[i][used]
        if y.size:
            lw[k] += stats.multivariate_normal(np.full(y.size, mu), sg2 + np.diag(v)).logpdf(y)
        pv[k] = 1.0 / (1.0 / sg2 + np.sum(1.0 / v))
        m[k] = pv[k] * (mu / sg2 + np.sum(y / v))
    w = np.exp(lw - special.logsumexp(lw))
    nv = pv + si2 + c.sa[i] ** 2 / max(c.new_r[i], 1.0) + c.new_extra_var[i]
    sds = (np.sqrt(pv), np.sqrt(pv), np.sqrt(nv), np.sqrt(nv))
    return [_brentq(q, w, m, s) for q, s in zip(levels, sds)], float(np.max(np.sqrt(nv)))


@pytest.mark.parametrize("coverage, ci_prob", [(0.95, 0.95), (0.9, 0.8), (0.999, 0.5)])
def test_compiled_quantiles_equal_brentq(coverage, ci_prob):
    """Set-point credible limits and personal-interval limits of the compiled pass (no node
    pruning, so the mixture is the reference's) within 1e-10 x max(1, s) of brentq (the stop
    rule proves 1e-10; the reference's own posterior differs by rounding only)."""
    assert normal.prepare(10**9)
    cases = _cases(60, seed=12)
    out = exact_assess(cases, coverage=coverage, ci_prob=ci_prob, nodes=16, prune=0.0)
    a, b = 0.5 * (1 - ci_prob), 0.5 * (1 - coverage)
    keys = ("theta_lower", "theta_upper", "pi_lower", "pi_upper")
    for i in range(cases.n_cases):
        ref, smax = _reference(cases, i, 16, (a, 1 - a, b, 1 - b))
        for key, val in zip(keys, ref):
            assert abs(out[key][i] - val) <= 1e-10 * max(1.0, smax), (key, i, out[key][i] - val)
