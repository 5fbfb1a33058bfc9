"""The compiled exact engine's whole-vector paths (:mod:`bayesbase.model._jit`): the scores
summed over a window of whole vectors with the nodes left out at weight 0 (``_score_window``),
node counts that are not a multiple of the vector padding, and the normal CDF of the quantile
solves without Cephes' far-tail branch (``phi_pq``).

References: scipy.special.ndtr (Phi), scipy.stats.norm and scipy.stats.multivariate_normal
(the per-node predictive densities and the baselines' joint marginal), scipy.special.logsumexp
and expit (Bayes factor and P(change)), numpy.polynomial.hermite_e.hermegauss (the nodes).
"""
import math

import numpy as np
import pytest
from scipy import special, stats

from bayesbase.model import normal
from bayesbase.model.engine import CaseArrays, exact_assess

pytest.importorskip("numba")


def _phi_both(z):
    """phi and phi_pq of the kernel at every z, each with e = exp(-z^2 / 2) (compiled once)."""
    import numba

    from bayesbase.model import _jit

    global _BOTH
    if _BOTH is None:
        @numba.njit
        def both(z, a, b):
            for i in range(z.size):
                e = np.exp(-0.5 * z[i] * z[i])
                a[i] = _jit.phi(z[i], e)
                b[i] = _jit.phi_pq(z[i], e)

        _BOTH = both
    a, b = np.empty_like(z), np.empty_like(z)
    _BOTH(z, a, b)
    return a, b


_BOTH = None


def test_phi_pq_equals_phi_and_scipy_ndtr():
    """phi_pq equals phi bit for bit for |z| < 8 sqrt 2 and within 1e-42 of it and of
    scipy.special.ndtr beyond (where the R/S branch is left out); within 2e-16 of ndtr
    everywhere (erf below |z| = sqrt 2, as ndtr); inf and NaN as phi."""
    z = np.concatenate([np.linspace(-40.0, 40.0, 800_001), [np.inf, -np.inf, np.nan]])
    a, b = _phi_both(z)
    ref = special.ndtr(z)
    near = np.abs(z) < 8.0 * math.sqrt(2.0)
    np.testing.assert_array_equal(b[near], a[near])
    far = np.isfinite(z) & ~near
    assert far.sum() > 100_000
    assert np.max(np.abs(b[far] - a[far])) < 1e-42
    assert np.max(np.abs(b[far] - ref[far])) < 1e-42
    fin = np.isfinite(z)
    assert np.max(np.abs(b[fin] - ref[fin])) < 2e-16
    assert b[-3] == 1.0 and b[-2] == 0.0 and np.isnan(b[-1])


def test_phi_and_phi_pq_match_ndtr_where_it_switches_to_erf():
    """phi and phi_pq against scipy.special.ndtr (Cephes ndtr: 0.5 + 0.5 erf(z / sqrt 2) for
    |z| < sqrt 2, as its erfc takes 1 - erf below 1, the erfc tail beyond) on a grid dense in
    1 < |z| < sqrt 2, where a switch to the tail formula at |z| = 1 is off by up to 3.1e-14:
    within 2e-16 absolute everywhere; in the lower tail (z < 0) relative within 2.6e-15 for
    |z| < sqrt 2 (2e-16 over ndtr(-sqrt 2) = 0.0786) and, for phi, within 1e-12 down to
    z = -40 (the rounding of z^2 / 2 in exp(-z^2 / 2): 2.8e-13 relative near z = -38;
    phi_pq, absolute only, is held to it where it equals phi, |z| < 8 sqrt 2)."""
    r2 = math.sqrt(2.0)
    band = np.linspace(1.0, r2, 1_000_001)
    z = np.concatenate([np.linspace(-40.0, 40.0, 400_001), band, -band,
                        np.nextafter([1.0, r2, -1.0, -r2], 0.0)])
    a, b = _phi_both(z)
    ref = special.ndtr(z)
    inband = (np.abs(z) > 1.0) & (np.abs(z) < r2)
    assert inband.sum() > 1_900_000
    for got in (a, b):
        assert np.max(np.abs(got - ref)) < 2e-16
        low = (z < 0) & (np.abs(z) < r2)
        assert np.max(np.abs(got[low] - ref[low]) / ref[low]) < 2.6e-15
    low = (z < 0) & (ref > 0)
    assert np.max(np.abs(a[low] - ref[low]) / ref[low]) < 1e-12
    low &= z > -8.0 * r2
    assert np.max(np.abs(b[low] - ref[low]) / ref[low]) < 1e-12


def test_score_window_whole_vectors_zero_outside():
    """Every (lo, hi, kk): the window is a multiple of _PAD inside the padded row and covers
    lo..hi-1; the window's weights are the nodes' own on lo..hi-1 and exactly 0 elsewhere; the
    means' padding beyond kk is the first mean (finite, so 0 x term stays 0)."""
    from bayesbase.model import _jit

    rng = np.random.default_rng(8)
    for kk in (1, 5, 8, 13, 16, 20, 24, 31):
        row = -(-kk // _jit._PAD) * _jit._PAD
        for lo in range(kk):
            for hi in range(lo + 1, kk + 1):
                w = rng.uniform(0.1, 1.0, row)
                wz = np.full(row, np.nan)
                m = np.concatenate([rng.normal(size=kk), np.full(row - kk, np.nan)])
                a, b = _jit._score_window(w, wz, m, lo, hi, kk)
                assert (b - a) % _jit._PAD == 0 and 0 <= a <= lo and hi <= b <= row
                np.testing.assert_array_equal(wz[lo:hi], w[lo:hi])
                assert np.all(wz[a:lo] == 0.0) and np.all(wz[hi:b] == 0.0)
                assert np.all(m[kk:] == m[0])


def _cases(n, seed):
    """Invented cases: 0 to 3 baselines, CVI uncertainty none to large, new values near and far
    (the far ones revive nodes the scores' window left out), a finite delta for half."""
    rng = np.random.default_rng(seed)
    j = 3
    mu = math.log(90.0)
    nb = rng.integers(0, j + 1, n)
    base = rng.normal(mu, 0.15, (n, j))
    base[np.arange(j)[None, :] >= nb[:, None]] = np.nan
    r = np.where(np.isfinite(base), rng.choice([1.0, 2.0], (n, j)), 0.0)
    new = mu + rng.normal(0, 0.3, n)
    far = rng.random(n) < 0.2
    new[far] = mu + rng.choice([-1.0, 1.0], far.sum()) * rng.uniform(2.0, 30.0, far.sum())
    return CaseArrays(
        prior_mean=np.full(n, mu), sg=rng.uniform(0.05, 0.5, n), cvi=rng.uniform(0.02, 0.5, n),
        cvi_log_sd=rng.choice([0.0, 0.3, 1.0], n), sa=rng.uniform(0, 0.05, n), base_y=base,
        base_r=r, base_extra_var=np.zeros((n, j)), base_censor=np.zeros((n, j)), new_y=new,
        new_r=np.ones(n), new_extra_var=np.zeros(n), new_censor=np.zeros(n),
        tau=rng.uniform(0.1, 0.5, n), delta=np.where(rng.random(n) < 0.5, math.log(1.2), np.nan),
        prior_change=rng.uniform(0.01, 0.5, n),
    )


def _scores_reference(c, i, nodes):
    """Scores of case i the plain way: per node the baselines' joint normal marginal and the
    normal-normal posterior (McIntosh & Urban, Biostatistics 2003;4:27-40), then the predictive
    densities under no change (V0) and change (V0 + tau^2) with scipy.stats.norm."""
    x, wn = np.polynomial.hermite_e.hermegauss(nodes)
    si2 = np.log1p((c.cvi[i] * np.exp(c.cvi_log_sd[i] * x)) ** 2)
    used = c.base_r[i] > 0
    y, mu, sg2 = c.base_y[i][used], c.prior_mean[i], c.sg[i] ** 2
    lw, m, pv = np.log(wn), np.zeros(nodes), np.zeros(nodes)
    for k in range(nodes):
        v = si2[k] + c.sa[i] ** 2 / c.base_r[i][used]
        if y.size:
            lw[k] += stats.multivariate_normal(np.full(y.size, mu), sg2 + np.diag(v)).logpdf(y)
        pv[k] = 1.0 / (1.0 / sg2 + np.sum(1.0 / v))
        m[k] = pv[k] * (mu / sg2 + np.sum(y / v))
    lw -= special.logsumexp(lw)
    nv = pv + si2 + c.sa[i] ** 2
    yn, tau2 = c.new_y[i], c.tau[i] ** 2
    l0 = lw + stats.norm.logpdf(yn, m, np.sqrt(nv))
    l1 = lw + stats.norm.logpdf(yn, m, np.sqrt(nv + tau2))
    lbf = special.logsumexp(l1) - special.logsumexp(l0)
    pc = special.expit(special.logit(c.prior_change[i]) + lbf)
    w1 = np.exp(l1 - special.logsumexp(l1))
    d_mean, d_sd = tau2 / (nv + tau2) * (yn - m), np.sqrt(tau2 * nv / (nv + tau2))
    out = dict(percentile=np.sum(np.exp(lw) * stats.norm.cdf(yn, m, np.sqrt(nv))), log_bf10=lbf,
               p_change=pc, p_increase=np.sum(w1 * stats.norm.sf(0, d_mean, d_sd)))
    if np.isfinite(c.delta[i]):
        tail = stats.norm.sf(c.delta[i], d_mean, d_sd) + stats.norm.cdf(-c.delta[i], d_mean, d_sd)
        out["p_exceed_delta"] = pc * np.sum(w1 * tail)
    return out


@pytest.mark.parametrize("nodes", [13, 20, 24])
def test_compiled_scores_over_padded_windows_equal_scipy(nodes):
    """The compiled scores (windows of whole vectors, node counts 13 and 20 padded to 16 and
    24, far new values reviving left-out nodes) equal the plain scipy computation to 1e-9
    (log BF: 1e-9 x max(1, |log BF|))."""
    assert normal.prepare(10**9)
    cases = _cases(120, seed=31 + nodes)
    out = exact_assess(cases, nodes=nodes)
    for i in range(cases.n_cases):
        for key, val in _scores_reference(cases, i, nodes).items():
            tol = 1e-9 * max(1.0, abs(val)) if key == "log_bf10" else 1e-9
            assert out[key][i] == pytest.approx(val, abs=tol), (key, i, nodes)
