"""Compiled (numba) loops behind :mod:`bayesbase.model.normal`; imported on first use only, so
importing the model stays light. Compiled once and cached on disk (numba ``cache=True``).

The exact engine's one-pass kernel (:func:`engine_cases_k`) scores one case at a time with
every per-node quantity in a small scratch array, and the per-node quantities that depend on the
case's design only (not its values) in a small table filled once per design
(:func:`_case_design`); its exp is a branch-free polynomial (:func:`_exp1`, accurate to a few
units in the last place, inlined into the loops that use it; :func:`vlog` a loop of the same
kind for the logarithm) that the compiler vectorises, where a library call per element would
not be. Its sums run over whole vectors: node rows padded to a multiple of :data:`_PAD`, the
nodes left out at weight 0.

Sums over mixture components may be reordered so the CPU can vectorise them
(``fastmath={"reassoc", "contract"}``): rounding-level differences only, as with numpy's own
pairwise sums; no other fast-math assumption is made (NaN and inf keep their meaning).
"""
from __future__ import annotations

import numba
import numpy as np
from numba import types
from numba.extending import intrinsic

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
def _ndtr_parts(z):
    """x = z / sqrt 2, a = |x| and Cephes ndtr's rational parts shared by :func:`phi` and
    :func:`phi_pq`: the erf ratio's numerator and denominator (T/U) and the erfc tail's (P/Q)."""
    x = z * _SQRTH
    a = abs(x)
    x2 = x * x
    num = x * ((((_T[0] * x2 + _T[1]) * x2 + _T[2]) * x2 + _T[3]) * x2 + _T[4])
    den = ((((x2 + _U[0]) * x2 + _U[1]) * x2 + _U[2]) * x2 + _U[3]) * x2 + _U[4]
    p = (((((((_P[0] * a + _P[1]) * a + _P[2]) * a + _P[3]) * a + _P[4]) * a + _P[5]) * a
          + _P[6]) * a + _P[7]) * a + _P[8]
    q = (((((((a + _Q[0]) * a + _Q[1]) * a + _Q[2]) * a + _Q[3]) * a + _Q[4]) * a + _Q[5]) * a
         + _Q[6]) * a + _Q[7]
    return x, a, num, den, p, q


@numba.njit(inline="always", error_model="numpy")
def phi(z, e):
    """Phi(z) given e = exp(-z^2/2): Cephes' three branches, written as selects so the loops
    that call it vectorise. As scipy.special.ndtr (Cephes ndtr, whose erfc takes 1 - erf below
    1), 0.5 + 0.5 erf(z / sqrt 2) for |z| < sqrt 2 and the erfc tail beyond: within 2e-16 of
    ndtr (the tests); the tail formula from |z| = 1 on was off by up to 3.1e-14 there."""
    x, a, num, den, p, q = _ndtr_parts(z)
    r = ((((_R[0] * a + _R[1]) * a + _R[2]) * a + _R[3]) * a + _R[4]) * a + _R[5]
    s = (((((a + _S[0]) * a + _S[1]) * a + _S[2]) * a + _S[3]) * a + _S[4]) * a + _S[5]
    small = a < 1.0  # |z| < sqrt 2
    far = a >= 8.0
    n = num if small else (r if far else p)
    d = den if small else (s if far else q)
    ratio = n / d
    tail = 0.5 * e * ratio if e > 0.0 else 0.0 * e  # |z| = inf: ratio is inf/inf; NaN stays
    big = 1.0 - tail if x > 0 else tail
    return 0.5 + 0.5 * ratio if small else big


@numba.njit(inline="always", error_model="numpy")
def phi_pq(z, e):
    """:func:`phi` without Cephes' R/S branch (|z| >= 8 sqrt 2, where P/Q is taken as well): for
    the mixture CDF of the quantile solves, which needs Phi in absolute terms only. There Phi or
    1 - Phi is below 1e-29 and the error of e P/Q / 2 below 1e-42, so the value differs from
    :func:`phi`'s by less than that (checked against scipy.special.ndtr and phi in the tests),
    with one rational function less per node. erf below |z| = sqrt 2, as :func:`phi`."""
    x, a, num, den, p, q = _ndtr_parts(z)
    small = a < 1.0  # |z| < sqrt 2
    ratio = (num if small else p) / (den if small else q)
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




# ------------------------------------------------------------------ exact engine, one pass per case
_LOG2E = 1.4426950408889634
_LN2_HI = 6.93147180369123816490e-01  # ln 2 split in two (fdlibm's e_exp.c constants)
_LN2_LO = 1.90821492927058770002e-10
_SQRT2 = 1.4142135623730951
#: rows of the fused kernel's output, in the order of :data:`bayesbase.model.engine.OUTPUT_KEYS`
(_O_NB, _O_TM, _O_TL, _O_TU, _O_CVI, _O_PL, _O_PU, _O_PCT, _O_LBF, _O_BF, _O_PCH, _O_PINC,
 _O_PEX) = range(13)
_CACHE = 64  # slots of the per-call table of node CVIs keyed by (CVI, uncertainty)
# rows of the per-call scratch array (one value per quadrature node)
(_S_M, _S_LW, _S_W, _S_WS, _S_WC, _S_VC, _S_T0, _S_T1, _S_E0, _S_E1, _S_E2, _S_EA, _S_EB, _S_E,
 _S_N_SCRATCH) = range(15)
# no reference counting in these loops (they take views of the caller's scratch per case and
# never allocate): the scratch arrays come from the caller
_jit_vec = numba.njit(cache=True, error_model="numpy", nogil=True, fastmath={"contract"}, _nrt=False)
_jit_e = numba.njit(cache=True, error_model="numpy", nogil=True, _nrt=False)
_jit_e_sum = numba.njit(cache=True, error_model="numpy", nogil=True, _nrt=False,
                        fastmath={"reassoc", "contract"})
#: small scalar steps inlined into their caller (no call; the two limits' steps interleave)
_inline = numba.njit(inline="always", error_model="numpy")


#: 1.5 * 2^52: adding and subtracting it rounds a double below 2^51 in magnitude to the nearest
#: integer (ties to even) without a library call
_ROUND = 6755399441055744.0


@intrinsic
def _as_f64(typingctx, i):
    """The float64 whose bits are the int64 i (a bit cast: no library call, vectorises)."""
    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.float64))
    return types.float64(types.int64), codegen


@numba.njit(inline="always", error_model="numpy")
def _exp1(x):
    """exp(x) without a library call, so the loops that use it vectorise: x = k ln 2 + r,
    |r| <= ln2 / 2, exp(r) by its Taylor polynomial to r^13 (remainder below 1e-17 relative) in
    Estrin's scheme (a short dependency chain: the terms in pairs, then by r^2, r^4, r^8), times
    2^k built from its exponent bits (exact: 2^k is a normal double for every k in reach).
    Relative error below 5e-16 (4.3e-16 on a fine grid over [-720, 0]; checked against
    numpy.exp in the tests); arguments below -708 give 0 (the callers read anything below
    1e-250 as an underflow). Inlined into the callers' loops (no call, no scratch row)."""
    xx = min(max(x, -708.0), 709.0)
    kf = (xx * _LOG2E + _ROUND) - _ROUND
    r = (xx - kf * _LN2_HI) - kf * _LN2_LO
    r2 = r * r
    r4 = r2 * r2
    b0 = (1.0 + r) + r2 * (0.5 + r * (1.0 / 6))
    b1 = (1.0 / 24 + r * (1.0 / 120)) + r2 * (1.0 / 720 + r * (1.0 / 5040))
    b2 = (1.0 / 40320 + r * (1.0 / 362880)) + r2 * (1.0 / 3628800 + r * (1.0 / 39916800))
    b3 = 1.0 / 479001600 + r * (1.0 / 6227020800)
    p = (b0 + r4 * b1) + (r4 * r4) * (b2 + r4 * b3)
    return p * _as_f64((np.int64(kf) + 1023) << 52) if x >= -708.0 else 0.0


@_jit_vec
def vexp(x, out, n):
    """exp(x[:n]) into out[:n] by :func:`_exp1` in a loop the compiler vectorises."""
    for i in range(n):
        out[i] = _exp1(x[i])


@_jit_vec
def vlog(x, out, n, tmp):
    """ln x[:n] into out[:n] (x positive; ``tmp``: scratch of n floats; none of the three may
    overlap) in loops the compiler vectorises: x = 2^e m with m in [sqrt(1/2), sqrt(2)),
    ln m = 2 atanh(s), s = (m - 1) / (m + 1), by its series to s^23 (|s| < 0.172: remainder below
    1e-17); x outside the normal range takes the library log."""
    xb = x.view(np.int64)
    ob = out.view(np.int64)
    for i in range(n):
        b = xb[i]
        ob[i] = (b & 0x000FFFFFFFFFFFFF) | 0x3FF0000000000000
        tmp[i] = float((b >> 52) - 1023)
    for i in range(n):
        mm = out[i]
        e = tmp[i]
        big = mm > _SQRT2
        mm = 0.5 * mm if big else mm
        e = e + 1.0 if big else e
        s = (mm - 1.0) / (mm + 1.0)
        s2 = s * s
        lm = 1.0 / 23
        lm = lm * s2 + 1.0 / 21
        lm = lm * s2 + 1.0 / 19
        lm = lm * s2 + 1.0 / 17
        lm = lm * s2 + 1.0 / 15
        lm = lm * s2 + 1.0 / 13
        lm = lm * s2 + 1.0 / 11
        lm = lm * s2 + 1.0 / 9
        lm = lm * s2 + 1.0 / 7
        lm = lm * s2 + 1.0 / 5
        lm = lm * s2 + 1.0 / 3
        lm = lm * s2 + 1.0
        out[i] = e * _LN2_HI + (2.0 * s * lm + e * _LN2_LO)
    for i in range(n):
        if not (x[i] >= 2.3e-308 and x[i] < 1.7e308):
            out[i] = np.log(x[i])


@_jit_e
def _cvi_slot(cvi, s, xn, key, ck, si2):
    """Row of the (CVI, uncertainty) table holding CVI_k = CVI exp(s x_k) and sI^2 = ln(1 + CVI_k^2)
    for this pair (filled on first use; a slot collision only recomputes)."""
    h = cvi * 7919.0 + s * 104729.0
    slot = int(h * 64.0 - 64.0 * np.floor(h)) % _CACHE if np.isfinite(h) else 0
    if not (key[slot, 0] == cvi and key[slot, 1] == s):
        for k in range(xn.size):
            c = cvi * np.exp(s * xn[k])
            ck[slot, k] = c
            si2[slot, k] = np.log1p(c * c)
        key[slot, 0] = cvi
        key[slot, 1] = s
    return slot


@_jit_e
def _baseline_sums(i, pm, sa, by, br, bev):
    """Count, centred sum and sum of squares of case i's baselines, their common variance
    sA^2 / r + extra and whether every baseline has it."""
    sa2 = sa[i] * sa[i]
    nb = 0
    sy = 0.0
    syy = 0.0
    ev0 = 0.0
    uniform = True
    for j in range(by.shape[1]):
        if br[i, j] > 0 and by[i, j] == by[i, j]:
            ev = sa2 / br[i, j] + bev[i, j]
            if nb == 0:
                ev0 = ev
            elif ev != ev0:
                uniform = False
            yc = by[i, j] - pm[i]
            sy += yc
            syy += yc * yc
            nb += 1
    return nb, sy, syy, ev0, uniform


@_jit_e_sum
def _general_posterior(i, pm, sg, sa, by, br, bev, si2, lwn, m, pv, lw):
    """Per node of case i, baselines of unequal variance: set-point posterior mean m and variance
    pv, and the unnormalised log weight lw = ln w_node + log marginal likelihood of the baselines,
    -0.5 (sum ln v_j + ln(sG^2 prec) + sum yc_j^2 / v_j - m_c b), constants dropped (the
    normal-normal algebra of the module docstring)."""
    sg2 = sg[i] * sg[i]
    isg = 1.0 / sg2
    sa2 = sa[i] * sa[i]
    for k in range(lwn.size):
        prec = isg
        bb = 0.0
        qq = 0.0
        lg = 0.0
        for j in range(by.shape[1]):
            if br[i, j] > 0 and by[i, j] == by[i, j]:
                v = si2[k] + sa2 / br[i, j] + bev[i, j]
                yc = by[i, j] - pm[i]
                prec += 1.0 / v
                bb += yc / v
                qq += yc * yc / v
                lg += np.log(v)
        p = 1.0 / prec
        mc = bb * p
        m[k] = mc + pm[i]
        pv[k] = p
        lw[k] = lwn[k] - 0.5 * (lg + np.log(sg2 * prec) + qq - mc * bb)


#: slots of the per-call table of per-node design constants, keyed by (CVI, uncertainty, sG,
#: baseline variance, number of baselines, new-result variance, tau): every case of one design
#: shares them; the extra last slot holds a case whose baselines differ in variance (never kept)
_DCACHE = 64
# rows of a design slot (one value per node): the posterior's log-weight constant, sum
# weight 1/v0 p, 1/v0 (uniform designs only), posterior variance, H0 predictive variance V0,
# 1/V0, 1/V1 (V1 = V0 + tau^2), 1/sqrt(V0), 1/sqrt(V1), tau / sqrt(V0 V1), tau^2 / V1,
# 1 / sqrt(tau^2 V0 / V1), the node's CVI, sqrt(V0), sqrt(posterior variance) and its inverse
(_D_C, _D_G, _D_I0, _D_PV, _D_NV, _D_IV0, _D_IV1, _D_IS0, _D_IS1, _D_RZ, _D_F1, _D_IDS, _D_CK,
 _D_S0, _D_SP, _D_ISP, _D_N) = range(17)


@_jit_e
def _design_key(cvi, s, sg, ev0, nb, evn, tau, dkey):
    """Slot of the design table for this key (filled by the caller on a miss, a collision only
    recomputes) and whether it holds the key already."""
    h = (cvi * 7919.0 + s * 104729.0 + sg * 1299709.0 + ev0 * 15485863.0 + nb * 0.6180339887
         + evn * 32452843.0 + tau * 49979687.0)
    slot = int(h * 64.0 - 64.0 * np.floor(h)) % _DCACHE if np.isfinite(h) else 0
    hit = (dkey[slot, 0] == cvi and dkey[slot, 1] == s and dkey[slot, 2] == sg
           and dkey[slot, 3] == ev0 and dkey[slot, 4] == nb and dkey[slot, 5] == evn
           and dkey[slot, 6] == tau)
    return slot, hit


@_jit_e
def _fill_uniform(d, si2, ev0, sg2, nb, lwn):
    """Posterior rows of a design slot whose baselines share one variance ev0: per node
    v0 = sI^2 + ev0, prec = 1/sG^2 + nb / v0, p = 1 / prec, and the log weight's constant
    ln w_node - 0.5 (nb ln v0 + ln(sG^2 prec)); the case's part is -0.5 (syy - sy^2 p / v0) / v0
    and its posterior mean (centred) sy p / v0 (see :func:`engine_cases_k`)."""
    isg = 1.0 / sg2
    for k in range(lwn.size):
        v0 = si2[k] + ev0
        inv0 = 1.0 / v0
        p = 1.0 / (isg + nb * inv0)
        d[_D_C, k] = lwn[k] - 0.5 * (nb * np.log(v0) + np.log(sg2 * isg + sg2 * nb / v0))
        d[_D_I0, k] = inv0
        d[_D_G, k] = inv0 * p
        d[_D_PV, k] = p


@_jit_e
def _fill_scores(d, si2, ck, evn, tau2):
    """The scores' rows of a design slot from its posterior variances d[_D_PV]."""
    tau = np.sqrt(tau2)
    for k in range(si2.size):
        nv = d[_D_PV, k] + si2[k] + evn
        v1 = nv + tau2
        s0 = np.sqrt(nv)
        s1 = np.sqrt(v1)
        d[_D_NV, k] = nv
        d[_D_IV0, k] = 1.0 / nv
        d[_D_IV1, k] = 1.0 / v1
        d[_D_IS0, k] = 1.0 / s0
        d[_D_IS1, k] = 1.0 / s1
        d[_D_RZ, k] = tau / (s0 * s1)
        d[_D_F1, k] = tau2 / v1
        d[_D_IDS, k] = 1.0 / np.sqrt(tau2 * nv / v1)
        d[_D_CK, k] = ck[k]
        d[_D_S0, k] = s0
        sp = np.sqrt(d[_D_PV, k])
        d[_D_SP, k] = sp
        d[_D_ISP, k] = 1.0 / sp
    for k in range(si2.size, d.shape[1]):  # padding for the scores and quantiles (see _PAD)
        for r in range(_D_NV, _D_N):
            d[r, k] = d[r, 0]


@_jit_e_sum
def _normalise(sc, kk):
    """sc[_S_W] = exp(sc[_S_LW]) normalised, sc[_S_LW] its logarithm; returns the largest weight."""
    lw, w = sc[_S_LW], sc[_S_W]
    mx = -np.inf
    for k in range(kk):
        mx = max(mx, lw[k])
    for k in range(kk):
        w[k] = _exp1(lw[k] - mx)
    tot = 0.0
    for k in range(kk):
        tot += w[k]
    lt = np.log(tot)
    wmax = 0.0
    for k in range(kk):
        w[k] /= tot
        lw[k] -= mx + lt
        wmax = max(wmax, w[k])
    return wmax


@_jit_e_sum
def _score_terms(y, delta, w, m, d, lo, hi, sc, acc):
    """Sums over the nodes lo..hi-1 (weights w, means m, design rows d) into acc[0:5]:
    sum w e0/sqrt(V0), sum w e1/sqrt(V1) (the two predictive densities times sqrt(2 pi)),
    sum w Phi(z0) (the percentile), sum w e1/sqrt(V1) Phi(zi) and, for a finite delta,
    sum w e1/sqrt(V1) P(|D| > delta | node); V1 = V0 + tau^2, zi the H1 posterior mean of the
    change over its SD (tau^2 r / V1 over sqrt(tau^2 V0 / V1)), exp(-zi^2/2) = e0 / e1."""
    n = hi - lo
    wv, mv = w[lo:hi], m[lo:hi]
    iv0, iv1, is0, is1, rz = (d[_D_IV0, lo:hi], d[_D_IV1, lo:hi], d[_D_IS0, lo:hi],
                              d[_D_IS1, lo:hi], d[_D_RZ, lo:hi])
    e0, e1, u1 = sc[_S_E0], sc[_S_E1], sc[_S_E2]
    # few output arrays per loop (the compiler then vectorises); the last loop only reads
    for j in range(n):
        res = y - mv[j]
        r2 = res * res
        e0[j] = _exp1(-0.5 * r2 * iv0[j])
        e1[j] = _exp1(-0.5 * r2 * iv1[j])
    for j in range(n):
        u1[j] = wv[j] * e1[j] * is1[j]
    a = 0.0
    b = 0.0
    c = 0.0
    dd = 0.0
    for j in range(n):
        res = y - mv[j]
        ee0 = e0[j]
        ee1 = e1[j]
        e2 = ee0 / ee1 if ee1 > 0.0 else 0.0  # both below 1e-307: the node adds nothing
        a += wv[j] * ee0 * is0[j]
        b += u1[j]
        c += wv[j] * phi(res * is0[j], ee0)
        dd += u1[j] * phi(res * rz[j], e2)
    acc[0] = a
    acc[1] = b
    acc[2] = c
    acc[3] = dd
    acc[4] = _tail_terms(y, delta, mv, d, lo, hi, sc) if np.isfinite(delta) else 0.0


@_jit_e_sum
def _tail_terms(y, delta, mv, d, lo, hi, sc):
    """sum w e1 / sqrt(V1) P(|D| > delta | node) over the nodes lo..hi-1 (w e1 / sqrt(V1) in
    sc[_S_E2] from :func:`_score_terms`)."""
    n = hi - lo
    f1, ids = d[_D_F1, lo:hi], d[_D_IDS, lo:hi]
    u1 = sc[_S_E2]
    ea, eb = sc[_S_EA], sc[_S_EB]
    for j in range(n):
        dm = f1[j] * (y - mv[j])
        za = (dm - delta) * ids[j]
        zb = (-delta - dm) * ids[j]
        ea[j] = _exp1(-0.5 * za * za)
        eb[j] = _exp1(-0.5 * zb * zb)
    t = 0.0
    for j in range(n):
        dm = f1[j] * (y - mv[j])
        t += u1[j] * (phi((dm - delta) * ids[j], ea[j]) + phi((-delta - dm) * ids[j], eb[j]))
    return t


@_jit_e
def _score_logs(y, tau2, delta, lw, m, nv, l0, l1, acc, kk):
    """The log-sum-exp form of :func:`_score_terms` over the kk nodes for a case whose densities
    underflow (an extreme new value): acc[0:2] = log densities, acc[3], acc[4] = P(increase) and
    P(|D| > delta) given a change (acc[2] is left as it is). ``kk`` is the node count, never a
    scratch row's length (the rows are padded for the quantile solve; the padding is unwritten)."""
    mx0 = -np.inf
    mx1 = -np.inf
    for k in range(kk):
        res = y - m[k]
        v1 = nv[k] + tau2
        l0[k] = lw[k] - 0.5 * (np.log(nv[k]) + res * res / nv[k])
        l1[k] = lw[k] - 0.5 * (np.log(v1) + res * res / v1)
        mx0 = max(mx0, l0[k])
        mx1 = max(mx1, l1[k])
    s0 = 0.0
    s1 = 0.0
    for k in range(kk):
        s0 += np.exp(l0[k] - mx0)
        s1 += np.exp(l1[k] - mx1)
    lp1 = np.log(s1) + mx1
    acc[0] = np.log(s0) + mx0
    acc[1] = lp1
    pinc = 0.0
    tail = 0.0
    for k in range(kk):
        res = y - m[k]
        v1 = nv[k] + tau2
        w1 = np.exp(l1[k] - lp1)
        dm = tau2 / v1 * res
        dsd = np.sqrt(tau2 * nv[k] / v1)
        z = dm / dsd
        pinc += w1 * phi(z, np.exp(-0.5 * z * z))
        if np.isfinite(delta):
            za = (dm - delta) / dsd
            zb = (-delta - dm) / dsd
            tail += w1 * (phi(za, np.exp(-0.5 * za * za)) + phi(zb, np.exp(-0.5 * zb * zb)))
    acc[3] = pinc
    acc[4] = tail


@_jit_e
def _keep(w, m, sp, s0, thr, kk, npad, wz, br):
    """Weights of the kk nodes at least ``thr`` in wz (the others 0, renormalised over the kept;
    zero-weight copies of the first node pad wz and the means m to npad); the bracket
    min(m - 12 s), max(m + 12 s) over the kept nodes for the SDs sp (br[0:2]) and s0 (br[2:4]).
    Returns the number kept. ``kk`` is the node count: ``w`` and ``m`` are scratch rows padded
    beyond it, and the padding is written here before any read."""
    n = 0
    wp = 0.0
    mn0 = mn1 = np.inf
    mx0 = mx1 = -np.inf
    for k in range(kk):
        if w[k] >= thr:
            wz[k] = w[k]
            n += 1
            mn0 = min(mn0, m[k] - 12.0 * sp[k])
            mx0 = max(mx0, m[k] + 12.0 * sp[k])
            mn1 = min(mn1, m[k] - 12.0 * s0[k])
            mx1 = max(mx1, m[k] + 12.0 * s0[k])
        else:
            wz[k] = 0.0
            wp += w[k]
    tot = 1.0 - wp
    for k in range(kk):
        wz[k] /= tot
    for k in range(kk, npad):
        wz[k] = 0.0
        m[k] = m[0]
    br[0] = mn0
    br[1] = mx0
    br[2] = mn1
    br[3] = mx1
    return n


#: the quantile solves run over the nodes padded with zero-weight copies of the first to a
#: multiple of _PAD, so the compiler's vector loops leave no scalar remainder (8 looked best
#: of 4, 8 and 16 in measurements); the copies add exact zeros, as do the pruned nodes, which
#: keep their place with weight 0. The scores run over a window of a multiple of _PAD nodes
#: in the same way (:func:`_score_window`; their scalar remainder of up to 7 nodes, two Phi
#: each, cost more than the padded vector)
_PAD = 8


@_jit_e
def _node_range(w, nv, thr, kk):
    """Of the kk nodes, lo..hi-1 from the first to the last whose weight is at least ``thr``
    (the nodes between them are kept whatever their weight), the weight outside and the smallest
    variance nv outside. ``kk`` is the node count (``w`` is a scratch row padded beyond it)."""
    lo = 0
    while lo < kk - 1 and w[lo] < thr:
        lo += 1
    hi = kk
    while hi > lo + 1 and w[hi - 1] < thr:
        hi -= 1
    wp = 0.0
    vmin = np.inf
    for k in range(lo):
        wp += w[k]
        vmin = min(vmin, nv[k])
    for k in range(hi, kk):
        wp += w[k]
        vmin = min(vmin, nv[k])
    return lo, hi, wp, vmin


@_jit_e
def _score_window(w, wz, m, lo, hi, kk):
    """The nodes lo..hi-1 of the kk as a window a..b-1 of a multiple of :data:`_PAD` nodes
    (within the padded scratch rows): wz = the weights w on lo..hi-1 and 0 elsewhere in the
    window, so the score loops run whole vectors (no scalar remainder) and the extra nodes add
    exact zeros; the means' padding beyond kk is set to m[0] (the design rows' padding is
    :func:`_fill_scores`'s). Returns (a, b)."""
    row = wz.shape[0]
    for k in range(kk, row):
        m[k] = m[0]
    size = min(-(-(hi - lo) // _PAD) * _PAD, row)
    a = min(lo, row - size)
    b = a + size
    for k in range(a, b):
        wz[k] = w[k] if (k >= lo and k < hi) else 0.0
    return a, b


@_jit_e
def _scores_case(i, y, tau2, delta, pchg, sc, d, kk, wmax, acc, out):
    """P(change), Bayes factor, percentile, P(increase), P(|D| > delta) of case i. The nodes
    before the first and after the last of at least 1e-13 of the largest weight are left out
    unless their largest possible share of either predictive density exceeds 1e-12 (an extreme
    new value can revive a node). The sums run over a window of whole vectors with the nodes
    left out at weight 0 (:func:`_score_window`)."""
    w, m, wz = sc[_S_W], sc[_S_M], sc[_S_WS]
    lo, hi, wp, vmin = _node_range(w, d[_D_NV], 1e-13 * wmax, kk)
    a, b = _score_window(w, wz, m, lo, hi, kk)
    _score_terms(y, delta, wz, m, d, a, b, sc, acc)
    if hi - lo < kk and not (wp <= 1e-12 * acc[0] * np.sqrt(vmin) and
                             wp <= 1e-12 * acc[1] * np.sqrt(vmin + tau2)):
        a, b = _score_window(w, wz, m, 0, kk, kk)
        _score_terms(y, delta, wz, m, d, a, b, sc, acc)
    pct = acc[2]
    if acc[0] > 1e-250 and acc[1] > 1e-250:
        lbf = np.log(acc[1]) - np.log(acc[0])
        pinc = acc[3] / acc[1]
        ptail = acc[4] / acc[1]
    else:
        _score_logs(y, tau2, delta, sc[_S_LW], m, d[_D_NV], sc[_S_T0], sc[_S_T1], acc, kk)
        lbf = acc[1] - acc[0]
        pinc = acc[3]
        ptail = acc[4]
    logit = np.log(pchg) - np.log1p(-pchg) + lbf
    pc = 1.0 / (1.0 + np.exp(-logit)) if logit >= 0 else np.exp(logit) / (1.0 + np.exp(logit))
    out[_O_PCT, i] = pct
    out[_O_LBF, i] = lbf
    out[_O_BF, i] = np.exp(lbf)
    out[_O_PCH, i] = pc
    out[_O_PINC, i] = pinc
    out[_O_PEX, i] = pc * ptail if np.isfinite(delta) else np.nan


#: Taylor order of the quantile solve (derivatives of the mixture CDF up to F^(6)) and the
#: bounds of its remainder: sup |z phi(z)| = phi(1) = exp(-1/2) / sqrt(2 pi) (exact), and
#: Cramer's inequality |He_n(z)| exp(-z^2/4) <= K sqrt(n!), K = 1.086435 (Abramowitz & Stegun,
#: Handbook of Mathematical Functions 22.14.17, for H_n; He_n(z) = 2^(-n/2) H_n(z / sqrt 2)),
#: so sup |He_6(z) phi(z)| <= K sqrt(6!) / sqrt(2 pi) (K rounded up to 1.0865; checked on a
#: grid against numpy's hermite_e in the tests)
_QORD = 6
_PHI1 = 0.24197072451914337
_HE6PHI = 1.0865 * 26.832815729997478 / 2.5066282746310002  # sqrt(6!) = 26.83...
_FACT7 = 5040.0


@numba.njit(inline="always", error_model="numpy")
def _node_derivs(zz, e, w, si):
    """One node's terms of :func:`_cdf_derivs` at z = (x - m) / s given e = exp(-z^2/2):
    w Phi(z) and w (-1)^j He_j(z) e / s^(j+1), j = 0..5 (F^(j+1) over phi's constant), He by
    its recurrence He_(j+1) = z He_j - j He_(j-1)."""
    u = w * e * si
    t1 = u
    u *= si
    t2 = -(u * zz)
    h2 = zz * zz - 1.0
    u *= si
    t3 = u * h2
    h3 = zz * h2 - 2.0 * zz
    u *= si
    t4 = -(u * h3)
    h4 = zz * h3 - 3.0 * h2
    u *= si
    t5 = u * h4
    h5 = zz * h4 - 4.0 * h3
    u *= si
    t6 = -(u * h5)
    return w * phi_pq(zz, e), t1, t2, t3, t4, t5, t6


_ZERO7 = (0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0)


@numba.njit(inline="always", error_model="numpy")
def _add_derivs(acc, t):
    """The running sums of :func:`_node_derivs`' seven terms over the nodes, plus one node's."""
    return (acc[0] + t[0], acc[1] + t[1], acc[2] + t[2], acc[3] + t[3], acc[4] + t[4], acc[5] + t[5],
            acc[6] + t[6])


@numba.njit(inline="always", error_model="numpy")
def _put_derivs(d, acc):
    """d[0] = F, d[j] = F^(j) / j! from the sums ``acc`` of :func:`_node_derivs`."""
    c0 = 0.39894228040143267794  # 1 / sqrt(2 pi)
    f, d1, d2, d3, d4, d5, d6 = acc
    d[0] = f
    d[1], d[2], d[3], d[4] = c0 * d1, c0 * d2 / 2.0, c0 * d3 / 6.0, c0 * d4 / 24.0
    d[5], d[6] = c0 * d5 / 120.0, c0 * d6 / 720.0


@_jit_e_sum
def _cdf_derivs(x, wc, mc, isd, sc, n, d):
    """d[0] = F(x) and d[j] = F^(j)(x) / j!, j = 1.._QORD, of the mixture over the n nodes
    (weights wc, means mc, 1/s in isd): F^(j+1) = sum w (-1)^j He_j(z) phi(z) / s^(j+1)
    (:func:`_node_derivs`)."""
    e = sc[_S_E]
    for j in range(n):
        zz = (x - mc[j]) * isd[j]
        e[j] = _exp1(-0.5 * zz * zz)
    acc = _ZERO7
    for j in range(n):
        si = isd[j]
        acc = _add_derivs(acc, _node_derivs((x - mc[j]) * si, e[j], wc[j], si))
    _put_derivs(d, acc)


@_jit_e_sum
def _cdf_derivs2(x0, x1, wc, mc, isd, sc, n, d0, d1):
    """:func:`_cdf_derivs` at two points x0, x1 (into d0, d1) in one pass over the nodes."""
    ea, eb = sc[_S_E], sc[_S_E0]
    for j in range(n):
        za = (x0 - mc[j]) * isd[j]
        zb = (x1 - mc[j]) * isd[j]
        ea[j] = _exp1(-0.5 * za * za)
        eb[j] = _exp1(-0.5 * zb * zb)
    acc0 = acc1 = _ZERO7
    for j in range(n):
        si = isd[j]
        acc0 = _add_derivs(acc0, _node_derivs((x0 - mc[j]) * si, ea[j], wc[j], si))
        acc1 = _add_derivs(acc1, _node_derivs((x1 - mc[j]) * si, eb[j], wc[j], si))
    _put_derivs(d0, acc0)
    _put_derivs(d1, acc1)


@_inline
def _taylor_root(g, d):
    """Root h of the Taylor polynomial P(h) = g + sum_j d[j] h^j (d[j] = F^(j) / j!) by Newton
    from the series reversion of its first four terms around the Newton step t = -g / d[1]
    (h0 = t - a t^2 + (2a^2 - b) t^3 + (5ab - 5a^3 - c) t^4, a, b, c = d[2], d[3], d[4] over d[1];
    t where |a t| > 0.1), at most five steps, done once a step is at most 1e-6 |t|: Newton's
    convergence is quadratic and |P''/P'| |t| <= 0.2 here, so what is left is below about
    1e-13 |t|, and |t| is below 0.03 SD on the bench's cases after the Cornish-Fisher start
    (measured: the first step is at most 1.5e-6 |t|, so one step is the rule, where the previous
    stop at 1e-15 of h took 2.3 on average). The stop rule of :func:`_quantile` checks P(h)
    itself, so a looser h costs at most another CDF evaluation, never a wrong answer. t itself
    where that fails (h not finite or more than t/2 away from t). Returns (h, t, P(h))."""
    r1 = 1.0 / max(d[1], 1e-300)
    t = -g * r1
    a = d[2] * r1
    b = d[3] * r1
    c = d[4] * r1
    h = t * (1.0 + t * (-a + t * ((2.0 * a * a - b) + t * (5.0 * a * b - 5.0 * a * a * a - c))))
    if not (abs(a * t) <= 0.1):
        h = t
    for _ in range(5):
        p = d[_QORD]
        dp = _QORD * d[_QORD]
        for j in range(_QORD - 1, 0, -1):
            p = p * h + d[j]
            dp = dp * h + j * d[j]
        p = p * h + g
        st = p / max(dp, 1e-300)
        h -= st
        if abs(st) <= 1e-6 * abs(t):
            break
    if not (abs(h - t) <= 0.5 * abs(t)):
        h = t
    p = d[_QORD]
    for j in range(_QORD - 1, 0, -1):
        p = p * h + d[j]
    return h, t, p * h + g


@_inline
def _cf_start(zq, mom):
    """Cornish-Fisher start of :func:`_quantile` from the moments (the mean where it falls
    outside the bracket)."""
    a, b, c, ee, lo, hi = mom[0], mom[1], mom[2], mom[3], mom[4], mom[5]
    sd = np.sqrt(max(b, 1e-300))
    z2 = zq * zq
    g1 = c / (b * sd)
    g2 = ee / (b * b) - 3.0
    x = a + sd * (zq + g1 / 6.0 * (z2 - 1.0) + g2 / 24.0 * zq * (z2 - 3.0)
                  - g1 * g1 / 36.0 * zq * (2.0 * z2 - 5.0))
    if not (x > lo and x < hi):
        x = a + sd * zq
    return x


@_inline
def _solve_step(x, q, d, mom, lo, hi, tol):
    """One step of :func:`_quantile` from x with d the CDF and its derivatives there: the next
    point, whether the stop rule holds, and the updated bracket."""
    eps = 0.1 * tol
    g = d[0] - q
    h, t, p = _taylor_root(g, d)
    if g < 0:
        lo = max(lo, x)
    if g > 0:
        hi = min(hi, x)
    ah = abs(h)
    ah2 = ah * ah
    rem = mom[7] * (ah2 * ah2 * ah2 * ah) / _FACT7
    dens = d[1] - mom[6] * (ah + eps)
    done = abs(t) <= tol or (dens > 0 and abs(p) + rem + 1e-14 <= dens * eps)
    xn = x + h
    if not done and not (xn > lo and xn < hi):
        xn = 0.5 * (lo + hi)
    return xn, done, lo, hi


@_jit_e
def _quantile(x, q, lo, hi, it0, wc, mc, isd, sc, n, d, mom, tol, max_iter):
    """Quantile q of the mixture sum w N(m, s^2) over the n nodes (weights wc, means mc, 1/s
    in isd): iterations it0..max_iter-1 from x (the Cornish-Fisher start of :func:`_cf_start`
    from the moments mom = (mean, var, m3, m4, lo, hi, M2, M7); see :func:`_quantile_pair`
    for iteration 0) inside the bisection bracket [lo, hi]; at each point x the root h of the
    order-6 Taylor polynomial P of F(x + h) - q (d: scratch of 7 for F and its derivatives).

    Stop rule (a proof, not a heuristic): F(x + h) - q = P(h) + R, |R| <= M7 |h|^7 / 7! with
    M7 >= sup |F^(7)| (mom[7]); on [x + h - eps, x + h + eps] (eps = tol / 10) the density is at
    least D = F'(x) - M2 (|h| + eps), M2 >= sup |F''| (mom[6]). When |P(h)| + |R| + 1e-14 (a bound
    on the rounding of F: each node's Phi within 2e-16 of scipy.special.ndtr, the weights
    summing to 1) <= D eps with D > 0, F - q changes sign on that interval, so the quantile is
    within eps of x + h, which is returned. Also stops (as the previous solver) when the Newton
    step is at most ``tol``."""
    for _ in range(it0, max_iter):
        _cdf_derivs(x, wc, mc, isd, sc, n, d)
        x, done, lo, hi = _solve_step(x, q, d, mom, lo, hi, tol)
        if done:
            break
    return x


@_inline
def _pair_start(z0, z1, wc, mc, isd, sc, n, mom, dd, max_iter):
    """First half of :func:`_quantile_pair`: both Cornish-Fisher starts and, unless
    ``max_iter`` < 1, the CDF and its derivatives there in one pass over the nodes (into dd)."""
    x0 = _cf_start(z0, mom)
    x1 = _cf_start(z1, mom)
    if max_iter >= 1:
        _cdf_derivs2(x0, x1, wc, mc, isd, sc, n, dd[0:_QORD + 1], dd[_QORD + 1:2 * _QORD + 2])
    return x0, x1


@_inline
def _pair_finish(x0, x1, q0, q1, wc, mc, isd, sc, n, mom, dd, tol, max_iter):
    """Second half of :func:`_quantile_pair`: the step from each start, then :func:`_quantile`
    for a level whose stop rule does not hold yet."""
    if max_iter < 1:
        return x0, x1
    d0 = dd[0:_QORD + 1]
    d1 = dd[_QORD + 1:2 * _QORD + 2]
    x0, done0, lo0, hi0 = _solve_step(x0, q0, d0, mom, mom[4], mom[5], tol)
    x1, done1, lo1, hi1 = _solve_step(x1, q1, d1, mom, mom[4], mom[5], tol)
    if not done0:
        x0 = _quantile(x0, q0, lo0, hi0, 1, wc, mc, isd, sc, n, d0, mom, tol, max_iter)
    if not done1:
        x1 = _quantile(x1, q1, lo1, hi1, 1, wc, mc, isd, sc, n, d1, mom, tol, max_iter)
    return x0, x1


@_jit_e
def _quantile_pair(q0, z0, q1, z1, wc, mc, isd, sc, n, mom, dd, tol, max_iter):
    """Quantiles q0, q1 (standard normal deviates z0, z1) of the mixture over the n nodes
    (weights wc, means mc, 1/s in isd; moments mom as in :func:`_quantile`, dd scratch of 14):
    both Cornish-Fisher starts, their first iteration evaluated in one pass over the nodes
    (:func:`_cdf_derivs2`; one iteration is the rule on the bench's cases), then
    :func:`_quantile` for a level whose stop rule does not hold yet. The engine calls its two
    halves (:func:`_pair_start`, :func:`_pair_finish`) for both intervals in turn."""
    x0, x1 = _pair_start(z0, z1, wc, mc, isd, sc, n, mom, dd, max_iter)
    return _pair_finish(x0, x1, q0, q1, wc, mc, isd, sc, n, mom, dd, tol, max_iter)


@_jit_e_sum
def _moments(wc, mc, sd, isd, n, mom):
    """Mean, variance, third and fourth central moments of the mixture over the n nodes
    (weights wc, means mc, SDs sd, their inverses isd; mom[0:4]) and the bounds
    M2 >= sup |F''|, M7 >= sup |F^(7)| of its CDF (mom[6:8]; see :func:`_quantile`). The
    bracket mom[4:6] is the caller's (:func:`_keep`, over the kept nodes only)."""
    a = 0.0
    for j in range(n):
        a += wc[j] * mc[j]
    b = 0.0
    c = 0.0
    e = 0.0
    m2 = 0.0
    m7 = 0.0
    for j in range(n):
        s = sd[j]
        d = mc[j] - a
        d2 = d * d
        s2 = s * s
        b += wc[j] * (s2 + d2)
        c += wc[j] * d * (3.0 * s2 + d2)
        e += wc[j] * (d2 * d2 + 6.0 * d2 * s2 + 3.0 * s2 * s2)
        i2 = isd[j] * isd[j]
        i4 = i2 * i2
        m2 += wc[j] * i2
        m7 += wc[j] * i4 * i2 * isd[j]
    mom[0] = a
    mom[1] = b
    mom[2] = c
    mom[3] = e
    mom[6] = _PHI1 * m2 * 1.000001  # rounded up against the sum's rounding
    mom[7] = _HE6PHI * m7 * 1.000001


@_jit_e
def _intervals_case(i, levels, zl, sc, d, kk, wmax, prune, tol, max_iter, mom, out):
    """Set-point credible limits and personal-interval limits of case i from the nodes whose
    weight is at least ``prune`` times the largest (weights renormalised over them, the others
    kept in place with weight 0, all padded to a multiple of :data:`_PAD`; the SDs and their
    inverses from the design rows ``d``, padded by :func:`_fill_scores`). No node passing
    (weights NaN from NaN inputs, or ``prune`` > 1) gives NaN limits. The two intervals' steps
    are taken in turn (moments, starts and evaluations of both, then both solves), so the
    scalar work of one overlaps the other's (mom: 2 x 22, one moments row and scratch each)."""
    npad = min(-(-kk // _PAD) * _PAD, sc.shape[1])
    wz, m = sc[_S_WC], sc[_S_M]
    br = sc[_S_VC]
    n = _keep(sc[_S_W], m, d[_D_SP], d[_D_S0], prune * wmax, kk, npad, wz, br)
    if n == 0:
        for o in (_O_TL, _O_TU, _O_PL, _O_PU):
            out[o, i] = np.nan
        return
    ma, mb = mom[0:22], mom[22:44]
    _moments(wz, m, d[_D_SP], d[_D_ISP], npad, ma)
    _moments(wz, m, d[_D_S0], d[_D_IS0], npad, mb)
    ma[4], ma[5], mb[4], mb[5] = br[0], br[1], br[2], br[3]
    da, db = ma[8:8 + 2 * _QORD + 2], mb[8:8 + 2 * _QORD + 2]
    a0, a1 = _pair_start(zl[0], zl[1], wz, m, d[_D_ISP], sc, npad, ma, da, max_iter)
    b0, b1 = _pair_start(zl[2], zl[3], wz, m, d[_D_IS0], sc, npad, mb, db, max_iter)
    a0, a1 = _pair_finish(a0, a1, levels[0], levels[1], wz, m, d[_D_ISP], sc, npad, ma, da, tol,
                          max_iter)
    b0, b1 = _pair_finish(b0, b1, levels[2], levels[3], wz, m, d[_D_IS0], sc, npad, mb, db, tol,
                          max_iter)
    out[_O_TL, i] = a0
    out[_O_TU, i] = a1
    out[_O_PL, i] = b0
    out[_O_PU, i] = b1


@_jit_e
def _case_design(i, xn, lwn, pm, sg, cvi, cs, sa, by, br, bev, nr, nev, tau, key, ck, si2, dkey,
                 dtab, sc):
    """Node posteriors of case i (means sc[_S_M], unnormalised log weights sc[_S_LW]) and the
    slot of ``dtab`` holding its design's per-node constants (filled on a miss; a case whose
    baselines differ in variance takes the last slot, filled every time). Returns (slot,
    number of baselines)."""
    kk = xn.size
    nb, sy, syy, ev0, uniform = _baseline_sums(i, pm, sa, by, br, bev)
    evn = sa[i] * sa[i] / max(nr[i], 1.0) + nev[i]
    m, lw = sc[_S_M], sc[_S_LW]
    if uniform:
        slot, hit = _design_key(cvi[i], cs[i], sg[i], ev0, nb, evn, tau[i], dkey)
        d = dtab[slot]
        if not hit:
            cslot = _cvi_slot(cvi[i], cs[i], xn, key, ck, si2)
            _fill_uniform(d, si2[cslot], ev0, sg[i] * sg[i], nb, lwn)
            _fill_scores(d, si2[cslot], ck[cslot], evn, tau[i] * tau[i])
            dkey[slot, 0] = cvi[i]
            dkey[slot, 1] = cs[i]
            dkey[slot, 2] = sg[i]
            dkey[slot, 3] = ev0
            dkey[slot, 4] = nb
            dkey[slot, 5] = evn
            dkey[slot, 6] = tau[i]
        c, g, i0 = d[_D_C], d[_D_G], d[_D_I0]
        p = pm[i]
        for k in range(kk):
            lw[k] = c[k] - 0.5 * (syy - sy * sy * g[k]) * i0[k]
        for k in range(kk):
            m[k] = sy * g[k] + p
        return slot, nb
    slot = dtab.shape[0] - 1
    d = dtab[slot]
    cslot = _cvi_slot(cvi[i], cs[i], xn, key, ck, si2)
    _general_posterior(i, pm, sg, sa, by, br, bev, si2[cslot], lwn, m, d[_D_PV], lw)
    _fill_scores(d, si2[cslot], ck[cslot], evn, tau[i] * tau[i])
    return slot, nb


@_jit_e
def engine_cases_k(start, stop, xn, lwn, pm, sg, cvi, cs, sa, by, br, bev, ny, nr, nev, tau,
                   delta, pchg, levels, zl, intervals, prune, tol, max_iter, out, key, ck, si2,
                   dkey, dtab, sc, acc):
    """Every output of the exact engine for cases start..stop-1, one case at a time (the rows
    of ``out`` follow ``OUTPUT_KEYS``): node posteriors and weights, the scores, and with
    ``intervals`` the four mixture quantiles (levels, with their normal deviates zl). Scratch
    (one set per thread, see :func:`engine_scratch`): key, ck, si2 the (CVI, uncertainty)
    table, dkey, dtab the design table (:data:`_DCACHE`), sc (_S_N_SCRATCH, nodes), acc (49,)."""
    kk = xn.size
    mom = acc[5:49]
    for i in range(start, stop):
        slot, nb = _case_design(i, xn, lwn, pm, sg, cvi, cs, sa, by, br, bev, nr, nev, tau, key,
                                ck, si2, dkey, dtab, sc)
        d = dtab[slot]
        wmax = _normalise(sc, kk)
        w, m, ckd = sc[_S_W], sc[_S_M], d[_D_CK]
        tm = 0.0
        cm = 0.0
        for k in range(kk):
            tm += w[k] * m[k]
            cm += w[k] * ckd[k]
        out[_O_NB, i] = nb
        out[_O_TM, i] = tm
        out[_O_CVI, i] = cm
        if np.isfinite(ny[i]):
            _scores_case(i, ny[i], tau[i] * tau[i], delta[i], pchg[i], sc, d, kk, wmax, acc, out)
        else:
            for o in (_O_PCT, _O_LBF, _O_BF, _O_PCH, _O_PINC, _O_PEX):
                out[o, i] = np.nan
        if intervals:
            _intervals_case(i, levels, zl, sc, d, kk, wmax, prune, tol, max_iter, mom, out)
        else:
            for o in (_O_TL, _O_TU, _O_PL, _O_PU):
                out[o, i] = np.nan


def engine_scratch(nodes):
    """Scratch arrays for one thread of :func:`engine_cases_k` (key, ck, si2, dkey, dtab, sc,
    acc)."""
    return (np.full((_CACHE, 2), np.nan), np.empty((_CACHE, nodes)), np.empty((_CACHE, nodes)),
            np.full((_DCACHE + 1, 7), np.nan), np.empty((_DCACHE + 1, _D_N, -(-nodes // _PAD) * _PAD)),
            np.empty((_S_N_SCRATCH, -(-nodes // _PAD) * _PAD)), np.empty(49))
