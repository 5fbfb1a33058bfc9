"""The compiled exact engine's paired quantile solve (:func:`bayesbase.model._jit._quantile_pair`:
the lower and upper limit of one interval, their first iteration evaluated in one pass over the
nodes by :func:`bayesbase.model._jit._cdf_derivs2`, further iterations by ``_quantile``), on
mixtures with pruned (weight 0) nodes in place and padding, as the engine calls it.

References: scipy.stats.norm (the mixture CDF and density), scipy.optimize.brentq (its root),
numpy.polynomial.hermite_e (He_n, for the derivatives F^(j+1) = sum w (-1)^j He_j(z) phi(z) / s^(j+1)).
"""
import math

import numpy as np
import pytest
from numpy.polynomial import hermite_e
from scipy import optimize, special, stats

pytest.importorskip("numba")


def _mixture(rng, n, bimodal):
    """n nodes (a multiple of 8), the first and last two pruned to weight 0 as the engine does,
    weights renormalised; a bimodal mixture (two far groups) defeats the Cornish-Fisher start."""
    w = rng.uniform(0.1, 1.0, n)
    w[:2] = 0.0
    w[-2:] = 0.0
    w /= w.sum()
    m = rng.normal(0.0, 0.05, n)
    if bimodal:
        m[n // 2:] += 1.0
    s = rng.uniform(0.03, 0.08, n)
    return w, m, s


def _solve(w, m, s, q0, q1, max_iter=60):
    from bayesbase.model import _jit

    n = w.size
    sc = np.full((_jit._S_N_SCRATCH, n), np.nan)
    mom = np.full(22, np.nan)
    isd = 1.0 / s
    _jit._moments(w, m, s, isd, n, mom)
    keep = w > 0
    mom[4] = np.min(m[keep] - 12 * s[keep])
    mom[5] = np.max(m[keep] + 12 * s[keep])
    return _jit._quantile_pair(q0, special.ndtri(q0), q1, special.ndtri(q1), w, m, isd, sc, n,
                               mom, mom[8:22], 1e-9, max_iter), mom


@pytest.mark.parametrize("bimodal", [False, True])
@pytest.mark.parametrize("levels", [(0.025, 0.975), (0.1, 0.9), (0.0005, 0.9995)])
def test_pair_equals_brentq(bimodal, levels):
    """Both limits within 1e-10 of brentq on the scipy mixture CDF (the stop rule proves
    tol / 10 = 1e-10), with the continuation taken in the bimodal case."""
    rng = np.random.default_rng(7)
    for _ in range(20):
        w, m, s = _mixture(rng, 24, bimodal)
        (x0, x1), _ = _solve(w, m, s, *levels)
        for q, x in zip(levels, (x0, x1)):
            ref = optimize.brentq(lambda x: np.sum(w * stats.norm.cdf((x - m) / s)) - q,
                                  -5.0, 6.0, xtol=1e-14, rtol=1e-15)
            assert abs(x - ref) <= 1e-10, (q, x - ref)


def test_first_iteration_alone_is_not_enough_when_bimodal():
    """The bimodal cases do need the continuation: one iteration from the start (max_iter=1)
    leaves some limit further than 1e-6 from brentq's, so the test above checks that path."""
    rng = np.random.default_rng(7)
    worst = 0.0
    for _ in range(20):
        w, m, s = _mixture(rng, 24, True)
        (x0, x1), _ = _solve(w, m, s, 0.025, 0.975, max_iter=1)
        for q, x in ((0.025, x0), (0.975, x1)):
            ref = optimize.brentq(lambda x: np.sum(w * stats.norm.cdf((x - m) / s)) - q,
                                  -5.0, 6.0, xtol=1e-14, rtol=1e-15)
            worst = max(worst, abs(x - ref))
    assert worst > 1e-6


def test_fused_derivatives_equal_hermite_reference():
    """_cdf_derivs2 at two points equals F and F^(j) / j!, j = 1..6, from scipy's normal CDF and
    numpy's hermite_e (rel. 1e-12 of the largest term), and equals _cdf_derivs at each point."""
    from bayesbase.model import _jit

    rng = np.random.default_rng(3)
    w, m, s = _mixture(rng, 16, True)
    isd = 1.0 / s
    sc = np.full((_jit._S_N_SCRATCH, 16), np.nan)
    d0, d1, d = np.full(7, np.nan), np.full(7, np.nan), np.full(7, np.nan)
    x0, x1 = 0.02, 0.97
    _jit._cdf_derivs2(x0, x1, w, m, isd, sc, 16, d0, d1)
    for x, got in ((x0, d0), (x1, d1)):
        z = (x - m) / s
        ref = [np.sum(w * stats.norm.cdf(z))]
        for j in range(6):
            he = hermite_e.hermeval(z, [0] * j + [1])
            ref.append(np.sum(w * (-1) ** j * he * stats.norm.pdf(z) / s ** (j + 1))
                       / math.factorial(j + 1))
        for j in range(7):
            scale = np.sum(w / s ** j) / math.factorial(j) if j else 1.0
            assert abs(got[j] - ref[j]) <= 1e-12 * scale, (x, j, got[j], ref[j])
        _jit._cdf_derivs(x, w, m, isd, sc, 16, d)
        np.testing.assert_allclose(d, got, rtol=1e-13, atol=0)
