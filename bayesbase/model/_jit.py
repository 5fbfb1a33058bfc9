"""Compiled (numba) loops behind :mod:`bayesbase.model.normal`; imported on first use only, so
importing the model stays light. Compiled once and cached on disk (numba ``cache=True``).

Sums over mixture components may be reordered so the CPU can vectorise them
(``fastmath={"reassoc", "contract"}``): rounding-level differences only, as with numpy's own
pairwise sums; no other fast-math assumption is made (NaN and inf keep their meaning).
"""
from __future__ import annotations

import numba
import numpy as np

_SQRTH = 0.70710678118654752440  # sqrt(1/2)
# Cephes ndtr.c coefficient tables (Moshier SL, Cephes Math Library 2.9, the tables of
# scipy.special.ndtr); the leading 1 of U, Q and S is implicit
_T = (9.60497373987051638749e0, 9.00260197203842689217e1, 2.23200534594684319226e3,
      7.00332514112805075473e3, 5.55923013010394962768e4)
_U = (3.35617141647503099647e1, 5.21357949780152679795e2, 4.59432382970980127987e3,
      2.26290000613890934246e4, 4.92673942608635921086e4)
_P = (2.46196981473530512524e-10, 5.64189564831068821977e-1, 7.46321056442269912687e0,
      4.86371970985681366614e1, 1.96520832956077098242e2, 5.26445194995477358631e2,
      9.34528527171957607540e2, 1.02755188689515710272e3, 5.57535335369399327526e2)
_Q = (1.32281951154744992508e1, 8.67072140885989742329e1, 3.54937778887819891062e2,
      9.75708501743205489753e2, 1.82390916687909736289e3, 2.24633760818710981792e3,
      1.65666309194161350182e3, 5.57535340817727675546e2)
_R = (5.64189583547755073984e-1, 1.27536670759978104416e0, 5.01905042251180477414e0,
      6.16021097993053585195e0, 7.40974269950448939160e0, 2.97886665372100240670e0)
_S = (2.26052863220117276590e0, 9.39603524938001434673e0, 1.20489539808096656605e1,
      1.70814450747565897222e1, 9.60896809063285878198e0, 3.36907645100081516050e0)

_jit = numba.njit(cache=True, error_model="numpy", nogil=True)
_jit_sum = numba.njit(cache=True, error_model="numpy", nogil=True,
                      fastmath={"reassoc", "contract"})


@numba.njit(inline="always", error_model="numpy")
def phi(z, e):
    """Phi(z) given e = exp(-z^2/2): Cephes' three branches, written as selects so the loops
    that call it vectorise."""
    x = z * _SQRTH
    a = abs(x)
    x2 = x * x
    num = x * ((((_T[0] * x2 + _T[1]) * x2 + _T[2]) * x2 + _T[3]) * x2 + _T[4])
    den = ((((x2 + _U[0]) * x2 + _U[1]) * x2 + _U[2]) * x2 + _U[3]) * x2 + _U[4]
    p = (((((((_P[0] * a + _P[1]) * a + _P[2]) * a + _P[3]) * a + _P[4]) * a + _P[5]) * a
          + _P[6]) * a + _P[7]) * a + _P[8]
    q = (((((((a + _Q[0]) * a + _Q[1]) * a + _Q[2]) * a + _Q[3]) * a + _Q[4]) * a + _Q[5]) * a
         + _Q[6]) * a + _Q[7]
    r = ((((_R[0] * a + _R[1]) * a + _R[2]) * a + _R[3]) * a + _R[4]) * a + _R[5]
    s = (((((a + _S[0]) * a + _S[1]) * a + _S[2]) * a + _S[3]) * a + _S[4]) * a + _S[5]
    small = a < _SQRTH
    far = a >= 8.0
    n = num if small else (r if far else p)
    d = den if small else (s if far else q)
    ratio = n / d
    tail = 0.5 * e * ratio if e > 0.0 else 0.0 * e  # |z| = inf: ratio is inf/inf; NaN stays
    big = 1.0 - tail if x > 0 else tail
    return 0.5 + 0.5 * ratio if small else big


@_jit
def ndtr_e_k(z, e, out):
    for i in range(z.size):
        out[i] = phi(z[i], e[i])


@_jit_sum
def moments_k(w, m, s, mu, var, m3, m4, lo, hi):
    """Per row of a normal mixture: mean, variance, third and fourth central moments, and the
    bracket min(m - 12 s), max(m + 12 s)."""
    n, k = m.shape
    for i in range(n):
        a = 0.0
        for j in range(k):
            a += w[i, j] * m[i, j]
        b = 0.0
        c = 0.0
        e = 0.0
        for j in range(k):
            d = m[i, j] - a
            d2 = d * d
            s2 = s[i, j] * s[i, j]
            b += w[i, j] * (s2 + d2)
            c += w[i, j] * d * (3.0 * s2 + d2)
            e += w[i, j] * (d2 * d2 + 6.0 * d2 * s2 + 3.0 * s2 * s2)
        mn = np.inf
        mx = -np.inf
        for j in range(k):
            mn = min(mn, m[i, j] - 12.0 * s[i, j])
            mx = max(mx, m[i, j] + 12.0 * s[i, j])
        mu[i] = a
        var[i] = b
        m3[i] = c
        m4[i] = e
        lo[i] = mn
        hi[i] = mx


@numba.njit(inline="always", error_model="numpy")
def step4(g, d1, d2, d3, d4):
    """Fourth-order step h solving g + d1 h + d2 h^2/2 + d3 h^3/6 + d4 h^4/24 = 0 by series
    reversion around the Newton step t = -g/d1: h = t - a t^2 + (2a^2 - b) t^3
    + (5ab - 5a^3 - c) t^4, a = d2/(2 d1), b = d3/(6 d1), c = d4/(24 d1); the Newton step
    alone where |a t| > 0.1 (far from the root the series is no better). Returns (h, t)."""
    d1 = max(d1, 1e-300)
    t = -g / d1
    a = d2 / (2.0 * d1)
    b = d3 / (6.0 * d1)
    c = d4 / (24.0 * d1)
    h = t * (1.0 + t * (-a + t * ((2.0 * a * a - b) + t * (5.0 * a * b - 5.0 * a * a * a - c))))
    if abs(a * t) > 0.1 or not (h == h):
        h = t
    return h, t


@_jit_sum
def eval_k(z, e, w, inv_s, q, out):
    """Per row: g = sum w Phi(z) - q and the fourth-order step (out[:, 0:3] = g, h, t); the
    derivatives of Phi are Hermite polynomials times the normal density."""
    n, k = z.shape
    c = 0.39894228040143267794  # 1 / sqrt(2 pi)
    for i in range(n):
        f = 0.0
        d1 = 0.0
        d2 = 0.0
        d3 = 0.0
        d4 = 0.0
        for j in range(k):
            zz = z[i, j]
            ee = e[i, j]
            f += w[i, j] * phi(zz, ee)
            si = inv_s[i, j]
            u = w[i, j] * ee * si
            d1 += u
            u *= si
            d2 -= u * zz
            u *= si
            d3 += u * (zz * zz - 1.0)
            u *= si
            d4 -= u * zz * (zz * zz - 3.0)
        g = f - q[i]
        h, t = step4(g, c * d1, c * d2, c * d3, c * d4)
        out[i, 0] = g
        out[i, 1] = h
        out[i, 2] = t


@_jit
def score_prep_k(m, nv, yy, tau2, t, z0, zi):
    """Exponents of the exact engine's scores per (case, node): t[0] = -r^2 / (2 V0),
    t[1] = -r^2 / (2 V1), t[2] = -zi^2 / 2 with r = y* - m, V1 = V0 + tau^2, z0 = r / sqrt(V0)
    and zi = (tau^2 / V1) r / sqrt(tau^2 V0 / V1) (the H1 posterior of the change over its SD)."""
    n, k = m.shape
    for i in range(n):
        y = yy[i]
        ta = tau2[i]
        for j in range(k):
            r = y - m[i, j]
            v0 = nv[i, j]
            v1 = v0 + ta
            r2 = r * r
            t[0, i, j] = -0.5 * r2 / v0
            t[1, i, j] = -0.5 * r2 / v1
            zz = r / np.sqrt(v0)
            z0[i, j] = zz
            zz = ta / v1 * r / np.sqrt(ta * v0 / v1)
            zi[i, j] = zz
            t[2, i, j] = -0.5 * zz * zz


@_jit_sum
def score_sum_k(w, nv, tau2, e, z0, zi, out):
    """Per case: out[:, 0] = sum w e0 / sqrt(V0), out[:, 1] = sum w e1 / sqrt(V1) (the two
    predictive densities times sqrt(2 pi)), out[:, 2] = sum w Phi(z0) (the percentile),
    out[:, 3] = sum w e1 / sqrt(V1) Phi(zi) (P(increase) times out[:, 1])."""
    n, k = w.shape
    for i in range(n):
        a = 0.0
        b = 0.0
        c = 0.0
        d = 0.0
        ta = tau2[i]
        for j in range(k):
            v0 = nv[i, j]
            u1 = w[i, j] * e[1, i, j] / np.sqrt(v0 + ta)
            a += w[i, j] * e[0, i, j] / np.sqrt(v0)
            b += u1
            c += w[i, j] * phi(z0[i, j], e[0, i, j])
            d += u1 * phi(zi[i, j], e[2, i, j])
        out[i, 0] = a
        out[i, 1] = b
        out[i, 2] = c
        out[i, 3] = d


@_jit_sum
def start_k(w, m, s, z, x, lo, hi):
    """Per row of a normal mixture: the Cornish-Fisher start for the quantile at standard
    normal deviate z[i] (terms in skewness g1 and excess kurtosis g2; the normal approximation
    when that leaves the bracket) and the bracket min(m - 12 s), max(m + 12 s)."""
    n, k = m.shape
    for i in range(n):
        a = 0.0
        for j in range(k):
            a += w[i, j] * m[i, j]
        b = 0.0
        c = 0.0
        e = 0.0
        mn = np.inf
        mx = -np.inf
        for j in range(k):
            d = m[i, j] - a
            d2 = d * d
            s2 = s[i, j] * s[i, j]
            b += w[i, j] * (s2 + d2)
            c += w[i, j] * d * (3.0 * s2 + d2)
            e += w[i, j] * (d2 * d2 + 6.0 * d2 * s2 + 3.0 * s2 * s2)
            mn = min(mn, m[i, j] - 12.0 * s[i, j])
            mx = max(mx, m[i, j] + 12.0 * s[i, j])
        sd = np.sqrt(max(b, 1e-300))
        zz = z[i]
        z2 = zz * zz
        g1 = c / (b * sd)
        g2 = e / (b * b) - 3.0
        xi = a + sd * (zz + g1 / 6.0 * (z2 - 1.0) + g2 / 24.0 * zz * (z2 - 3.0)
                       - g1 * g1 / 36.0 * zz * (2.0 * z2 - 5.0))
        if not (xi > mn and xi < mx):
            xi = a + sd * zz
        x[i] = xi
        lo[i] = mn
        hi[i] = mx


@_jit
def prep_act_k(act, x, m, inv_s, z, t):
    """z = (x - m) / s and t = -z^2 / 2 at each row's point x[act[r]] (m and inv_s hold the
    rows ``act`` only)."""
    n, k = m.shape
    for r in range(n):
        xi = x[act[r]]
        for j in range(k):
            zz = (xi - m[r, j]) * inv_s[r, j]
            z[r, j] = zz
            t[r, j] = -0.5 * zz * zz


@_jit
def update_k(act, res, tol, x, lo, hi, done):
    """One safeguarded step for the rows ``act``: shrink the bracket with the sign of
    g = res[:, 0], take the step res[:, 1] unless it leaves the bracket (then bisect; never for
    converged rows, whose bracket may have collapsed onto them by rounding); a row is done when
    its Newton step res[:, 2] is at most ``tol``."""
    for r in range(act.size):
        i = act[r]
        xa = x[i]
        g = res[r, 0]
        if g < 0:
            lo[i] = max(lo[i], xa)
        if g > 0:
            hi[i] = min(hi[i], xa)
        xn = xa + res[r, 1]
        d = abs(res[r, 2]) <= tol
        if not d and not (xn > lo[i] and xn < hi[i]):
            xn = 0.5 * (lo[i] + hi[i])
        x[i] = xn
        done[r] = d


@_jit
def cross_prep_k(act, x, m0, v0, mb, c0b, vb, a, z, dz, d2z, t):
    """For the time-to-limit solve, per (row, node) at tau = x[act[r]]: z = (m0 + mb tau - a)
    / s, s^2 = v0 + 2 tau c0b + tau^2 vb, its first two derivatives in tau, and t = -z^2/2."""
    n, k = m0.shape
    for r in range(n):
        tau = x[act[r]]
        ar = a[r]
        for j in range(k):
            sl = c0b[r, j] + tau * vb[r, j]
            s2 = max(v0[r, j] + tau * (c0b[r, j] + sl), 1e-300)
            s = np.sqrt(s2)
            ds = sl / s
            d2s = (vb[r, j] - ds * ds) / s
            zz = (m0[r, j] + mb[r, j] * tau - ar) / s
            z1 = (mb[r, j] - zz * ds) / s
            z[r, j] = zz
            dz[r, j] = z1
            d2z[r, j] = -(2.0 * z1 * ds + zz * d2s) / s
            t[r, j] = -0.5 * zz * zz


@_jit_sum
def cross_eval_k(z, dz, d2z, e, w, q, res):
    """Per row: g = sum w Phi(z) - q, the Halley step and the Newton step (res[:, 0:3])."""
    n, k = z.shape
    c = 0.39894228040143267794  # 1 / sqrt(2 pi)
    for i in range(n):
        f = 0.0
        d1 = 0.0
        d2 = 0.0
        for j in range(k):
            zz = z[i, j]
            u = w[i, j] * e[i, j]
            f += w[i, j] * phi(zz, e[i, j])
            d1 += u * dz[i, j]
            d2 += u * (d2z[i, j] - zz * dz[i, j] * dz[i, j])
        g = f - q[i]
        d1 *= c
        d2 *= c
        t = -g / d1
        den = 2.0 * d1 * d1 - g * d2
        h = -2.0 * g * d1 / den
        if not (abs(h) <= 2.0 * abs(t)):  # Halley unreliable far from the root (or NaN)
            h = t
        res[i, 0] = g
        res[i, 1] = h
        res[i, 2] = t


@_jit
def cross_update_k(act, res, tol, x, lo, hi, done):
    """One safeguarded step for the rows ``act`` (bracket [lo, hi] with F(lo) < q <= F(hi)):
    the step res[:, 1] unless it is not finite or leaves the bracket (then bisect); done when
    the Newton step res[:, 2] is at most ``tol`` or the bracket is narrower than ``tol``."""
    for r in range(act.size):
        i = act[r]
        xa = x[i]
        g = res[r, 0]
        if g < 0:
            lo[i] = xa
        else:
            hi[i] = xa
        xn = xa + res[r, 1]
        ok = np.isfinite(xn) and xn >= lo[i] and xn <= hi[i]
        if not ok:
            xn = 0.5 * (lo[i] + hi[i])
        x[i] = xn
        done[r] = (ok and abs(res[r, 2]) <= tol) or (hi[i] - lo[i] <= tol)


@_jit
def trend_fit_k(si2, ev0, gs, sg2, sb2, pm, out, lg):
    """Drift model, series whose specimens share one variance per node (v = sI^2 + ev0):
    the H1 posterior (out[0:5] = m_t - pm, m_b, v_tt, v_tb, v_bb), the quadratic parts of the
    two log marginal likelihoods (out[5] = q - h0^2/p0, out[6] = q - quadratic form) and the
    arguments of their logarithms (lg[0] = v, lg[1] = sG^2 p0, lg[2] = sG^2 sB^2 det).
    ``gs`` (C, 6) holds the plain sums of (1, t, t^2, y, t y, y^2) over specimens."""
    n, k = si2.shape
    for i in range(n):
        g0, g1, g2, g3, g4, g5 = gs[i, 0], gs[i, 1], gs[i, 2], gs[i, 3], gs[i, 4], gs[i, 5]
        isg = 1.0 / sg2[i]
        isb = 1.0 / sb2[i]
        for j in range(k):
            v = si2[i, j] + ev0[i]
            iv = 1.0 / v
            s1 = g1 * iv
            h0 = g3 * iv
            h1 = g4 * iv
            qq = g5 * iv
            p0 = isg + g0 * iv
            a11 = isb + g2 * iv
            det = p0 * a11 - s1 * s1
            idet = 1.0 / det
            out[0, i, j] = (a11 * h0 - s1 * h1) * idet
            out[1, i, j] = (p0 * h1 - s1 * h0) * idet
            out[2, i, j] = a11 * idet
            out[3, i, j] = -s1 * idet
            out[4, i, j] = p0 * idet
            out[5, i, j] = qq - h0 * h0 / p0
            out[6, i, j] = qq - (a11 * h0 * h0 - 2.0 * s1 * h0 * h1 + p0 * h1 * h1) * idet
            lg[0, i, j] = v
            lg[1, i, j] = sg2[i] * p0
            lg[2, i, j] = sg2[i] * sb2[i] * det


@_jit
def engine_post_k(si2, ev0, nb, sy, syy, sg2, m_c, pv, lg):
    """Exact engine, cases whose baselines share one variance per node (v0 = sI^2 + ev0):
    set-point posterior mean (centred) and variance, and for the log marginal likelihood
    -0.5 (n ln v0 + ln(sG^2 prec) + (syy - m sy) / v0) the arguments lg[0] = v0,
    lg[1] = sG^2 prec and, in lg[2], the quadratic part (syy - m sy) / v0."""
    n, k = si2.shape
    for i in range(n):
        isg = 1.0 / sg2[i]
        for j in range(k):
            v0 = si2[i, j] + ev0[i]
            inv0 = 1.0 / v0
            prec = isg + nb[i] * inv0
            p = 1.0 / prec
            m = sy[i] * inv0 * p
            m_c[i, j] = m
            pv[i, j] = p
            lg[0, i, j] = v0
            lg[1, i, j] = sg2[i] * prec
            lg[2, i, j] = (syy[i] - m * sy[i]) * inv0
