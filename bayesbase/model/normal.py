"""Fast standard-normal CDF and normal-mixture quantiles for the exact kernels.

Phi(z) is evaluated from ``e = exp(-z^2 / 2)`` (computed by numpy's vectorised ``exp``) and the
rational approximations of the Cephes library (Moshier SL, Cephes Math Library 2.9, ``ndtr.c``:
erf on |x| < 1, erfc on 1 <= x < 8 and x >= 8, x = z / sqrt(2)), the same tables
``scipy.special.ndtr`` uses; agreement with scipy is tested to 1e-13. The loops run compiled
(numba, :mod:`._jit`, cached on disk) for jobs of at least :data:`NUMBA_MIN_ELEMS` (row,
component) elements (:func:`prepare`); smaller jobs, or an install without numba, use numpy and
``scipy.special.ndtr`` (the same results to rounding).

:func:`mixture_quantile` solves F(x) = q for a normal mixture F with fourth-order steps (the
reversion of the Taylor series of F, whose derivatives are Hermite polynomials times the normal
density), started from the Cornish-Fisher approximation with the mixture's own mean, variance,
skewness and kurtosis and kept inside a bisection bracket; a row stops when its Newton step is
at most ``tol``. Only the rows not yet converged are iterated.
"""
from __future__ import annotations

import numpy as np
from scipy import special

__all__ = ["ndtr_e", "ndtr", "mixture_moments", "mixture_quantile", "prepare", "have_numba"]

_SQRTH = 0.70710678118654752440  # sqrt(1/2)
_INV_SQRT_2PI = 0.39894228040143267794
_K = None  # the compiled kernels (module _jit), False when numba is unavailable

#: below this many (row, component) elements a call uses numpy/scipy only: importing numba and
#: loading its compiled loops costs a fixed time per process that small inputs do not repay
NUMBA_MIN_ELEMS = 100_000


def _kernels(size=None):
    """The compiled kernels, or None/False for the numpy/scipy path (small inputs before the
    kernels were loaded, or no numba)."""
    global _K
    if _K is None:
        if size is not None and size < NUMBA_MIN_ELEMS:
            return None
        try:
            from . import _jit as _K
        except ImportError:  # pragma: no cover - numba is a declared dependency
            _K = False
    return _K


def prepare(total_elems: int) -> bool:
    """Load the compiled kernels when a whole job has at least :data:`NUMBA_MIN_ELEMS`
    (row, component) elements (the job may then call in smaller blocks); True when in use."""
    return bool(_kernels(total_elems))


def have_numba() -> bool:
    """True when the compiled kernels are available (loading them if needed)."""
    return bool(_kernels())


def ndtr_e(z, e, out=None):
    """Phi(z) for a float64 array ``z`` given ``e = exp(-z^2 / 2)`` (same shape)."""
    z = np.ascontiguousarray(z, dtype=float)
    if out is None:
        out = np.empty_like(z)
    k = _kernels(z.size)
    if not k:
        return special.ndtr(z, out=out)
    e = np.ascontiguousarray(e, dtype=float)
    k.ndtr_e_k(z.reshape(-1), e.reshape(-1), out.reshape(-1))
    return out


def ndtr(z):
    """Phi(z), float64 (the standard-normal CDF; scipy.special.ndtr to 1e-13)."""
    z = np.ascontiguousarray(z, dtype=float)
    e = np.multiply(z, z)
    e *= -0.5
    np.exp(e, out=e)
    return ndtr_e(z, e, out=e)


def mixture_moments(w, m, s):
    """Mean, variance, third and fourth central moments of the rows of a normal mixture
    (N, K), and the bracket min(m - 12 s), max(m + 12 s) of each row."""
    k = _kernels(m.size)
    n = m.shape[0]
    if k:
        res = [np.empty(n) for _ in range(6)]
        k.moments_k(w, m, s, *res)
        return tuple(res)
    mu = np.sum(w * m, -1)
    d = m - mu[:, None]
    d2 = d * d
    s2 = s * s
    return (mu, np.sum(w * (s2 + d2), -1), np.sum(w * d * (3.0 * s2 + d2), -1),
            np.sum(w * (d2 * d2 + 6.0 * d2 * s2 + 3.0 * s2 * s2), -1),
            np.min(m - 12.0 * s, -1), np.max(m + 12.0 * s, -1))


def _evaluate(x, q, w, m, inv_s):
    """g = F(x) - q for each row, the fourth-order step h and the Newton step t (see
    :func:`_step`), as three (N,) arrays; numpy/scipy (the compiled path is in
    :func:`_solve_compiled`)."""
    z = (x[:, None] - m) * inv_s
    e = np.exp(-0.5 * z * z) * _INV_SQRT_2PI
    g = np.sum(w * special.ndtr(z), -1) - q
    u = w * e * inv_s
    d1 = u.sum(-1)
    u *= inv_s
    d2 = -(u * z).sum(-1)
    u *= inv_s
    d3 = (u * (z * z - 1.0)).sum(-1)
    u *= inv_s
    d4 = -(u * z * (z * z - 3.0)).sum(-1)
    h, t = _step(g, d1, d2, d3, d4)
    return g, h, t


def _step(g, d1, d2, d3, d4):
    """Fourth-order step h solving g + d1 h + d2 h^2/2 + d3 h^3/6 + d4 h^4/24 = 0 (series
    reversion around the Newton step t = -g/d1): h = t - a t^2 + (2a^2 - b) t^3
    + (5ab - 5a^3 - c) t^4, a = d2/(2 d1), b = d3/(6 d1), c = d4/(24 d1); the Newton step where
    |a t| > 0.1 (far from the root the series is no better). Returns (h, t)."""
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        d1 = np.maximum(d1, 1e-300)
        t = -g / d1
        a = d2 / (2.0 * d1)
        b = d3 / (6.0 * d1)
        c = d4 / (24.0 * d1)
        h = t * (1.0 + t * (-a + t * ((2.0 * a * a - b) + t * (5.0 * a * b - 5.0 * a**3 - c))))
        far = (np.abs(a * t) > 0.1) | np.isnan(h)
    return np.where(far, t, h), t


def mixture_quantile(q, weights, means, sds, tol=1e-9, max_iter=60):
    """Quantile ``q`` of the normal mixture sum_k weights[..., k] N(means, sds^2), vectorised.

    ``weights`` are normalised along the last axis. Fourth-order steps from the Cornish-Fisher
    start, kept inside a bisection bracket so every row converges; a row stops when its Newton
    step is at most ``tol`` (that last step is applied).
    """
    weights, means, sds = np.broadcast_arrays(
        np.asarray(weights, float), np.asarray(means, float), np.asarray(sds, float))
    lead = means.shape[:-1]
    kk = means.shape[-1]
    w = np.ascontiguousarray(weights.reshape(-1, kk))
    m = np.ascontiguousarray(means.reshape(-1, kk))
    s = np.ascontiguousarray(sds.reshape(-1, kk))
    qq = np.broadcast_to(np.asarray(q, float), lead).reshape(-1).copy()
    x = _solve(qq, w, m, s, tol, max_iter)
    return x.reshape(lead)


def _start(q, w, m, s):
    """Cornish-Fisher start (terms in skewness and excess kurtosis; Cornish EA, Fisher RA,
    Rev Inst Int Stat 1938;5:307-320) and the bisection bracket."""
    mu, var, m3, m4, lo, hi = mixture_moments(w, m, s)
    sd = np.sqrt(np.maximum(var, 1e-300))
    z = special.ndtri(q)
    with np.errstate(divide="ignore", invalid="ignore"):
        g1 = m3 / (var * sd)
        g2 = m4 / (var * var) - 3.0
    z2 = z * z
    x = mu + sd * (z + g1 / 6.0 * (z2 - 1.0) + g2 / 24.0 * z * (z2 - 3.0)
                   - g1 * g1 / 36.0 * z * (2.0 * z2 - 5.0))
    bad = ~((x > lo) & (x < hi))
    x[bad] = (mu + sd * z)[bad]
    return x, lo, hi


def _solve(q, w, m, s, tol, max_iter):
    k = _kernels(m.size)
    if k:
        return _solve_compiled(k, q, w, m, s, tol, max_iter)
    x, lo, hi = _start(q, w, m, s)
    inv_s = 1.0 / s
    act = np.arange(q.size)
    wa, ma, ia = w, m, inv_s
    for _ in range(max_iter):
        xa = x[act]
        g, h, t = _evaluate(xa, q[act], wa, ma, ia)
        lo_a = np.where(g < 0, np.maximum(lo[act], xa), lo[act])
        hi_a = np.where(g > 0, np.minimum(hi[act], xa), hi[act])
        x_new = xa + h
        done = np.abs(t) <= tol
        # a step leaving the bracket falls back to bisection (never for converged points,
        # whose bracket may have collapsed onto them by rounding)
        bad = ~done & ~((x_new > lo_a) & (x_new < hi_a))
        x_new[bad] = 0.5 * (lo_a + hi_a)[bad]
        x[act] = x_new
        lo[act] = lo_a
        hi[act] = hi_a
        keep = ~done
        if not keep.any():
            break
        # gather the unconverged rows once enough have converged; until then converged rows
        # are recomputed and stay put (their next step is far below tol)
        if keep.sum() < 0.75 * act.size:
            act = act[keep]
            wa, ma, ia = w[act], m[act], inv_s[act]
    return x


def _solve_compiled(k, q, w, m, s, tol, max_iter):
    """:func:`_solve` with the start, evaluation and update in compiled loops."""
    n = q.size
    x, lo, hi = np.empty(n), np.empty(n), np.empty(n)
    k.start_k(w, m, s, special.ndtri(q), x, lo, hi)
    inv_s = 1.0 / s
    act = np.arange(n)
    wa, ma, ia, qa = w, m, inv_s, q
    z = np.empty_like(m)
    e = np.empty_like(m)
    res = np.empty((n, 3))
    done = np.empty(n, dtype=np.bool_)
    for _ in range(max_iter):
        na = act.size
        zz, ee, rr, dd = z[:na], e[:na], res[:na], done[:na]
        k.prep_act_k(act, x, ma, ia, zz, ee)
        np.exp(ee, out=ee)
        k.eval_k(zz, ee, wa, ia, qa, rr)
        k.update_k(act, rr, tol, x, lo, hi, dd)
        if dd.all():
            break
        keep = ~dd
        if keep.sum() < 0.75 * na:
            act = act[keep]
            wa, ma, ia, qa = w[act], m[act], inv_s[act], q[act]
    return x
