"""Compiled (numba) loops of the drift model (:mod:`bayesbase.model.trend`); imported on first use
only (jobs of at least ``normal.NUMBA_MIN_ELEMS`` (series, node) elements), so importing the model
stays light. Compiled once and cached on disk (numba ``cache=True``).

:func:`trend_k` runs every eligible series in one pass, series by series, with that series' nodes
in a small scratch array: the node fits, the marginal likelihoods, the H1 weights (nodes whose
weight is below ``prune`` for this series are dropped), the summaries, the slope and model-averaged
quantiles (fourth-order steps from the Cornish-Fisher start, as :mod:`bayesbase.model.normal`) and
the three time-to-limit quantiles (Halley steps inside a bisection bracket). The formulas are
those of the numpy path of :mod:`bayesbase.model.trend`, written for one series.

Speed: the loops over a series' nodes vectorise (4 doubles at a time), so exp and ln are written
without library calls (:func:`vexp`, :func:`vlog`, within 2 ulp), node counts are padded to a
multiple of 4 with zero-weight nodes, and sums may be reordered (``fastmath={"reassoc",
"contract"}``: rounding-level differences only; NaN and inf keep their meaning). What depends on
the design only (the specimens' times and variances, the priors: precisions, determinants, their
logarithms, the slope SDs, the SDs of the set point at the last specimen and at the horizon) is
computed once per run of consecutive series sharing that design (:func:`_design_uniform`,
:func:`_derived`), and the functions called per series take the scratch array itself rather than
views of its rows (each view costs atomic reference-count updates).
"""
from __future__ import annotations

import numba
import numpy as np
from numba import types
from numba.extending import intrinsic

from ._jit import phi  # Cephes ndtr as scipy.special.ndtr, within 2e-16 (one copy for both kernels)

_C = 0.39894228040143267794  # 1 / sqrt(2 pi)

#: rows of the kernel's output array, in order
ROWS = ("log_bf10", "p_drift", "p_increase", "slope_mean", "slope_sd", "exp_slope_mean",
        "slope_lower", "slope_upper", "avg_lower", "avg_upper", "theta_last_mean",
        "years_mid", "years_lo", "years_hi", "p_beyond_limit")
#: early stops of the slope-quantile and time-to-limit solvers (``early`` of :func:`mix_quantile`
#: and :func:`cross_quantile`)
EARLY = (1e-2, 1e-4)
# scratch rows (per node of one series)
_ML0, _ML1, _MT, _MB, _VTT, _VTB, _VBB, _W, _SB, _ISB, _M0, _V0, _C0B, _MBS, _SI2 = range(15)
# the design's rows (per node, before pruning): what :func:`_fit_uniform` needs that does not
# depend on the values y, kept while consecutive series share the design (:func:`_design_uniform`)
_DIV, _DS1, _DP0, _DA11, _DIDET, _DLC, _DL0, _DL1 = range(15, 23)
# SDs of theta at the last specimen and at the horizon (:func:`_derived`), and the design's
# copies of the rows :func:`_derived` fills
_SD0, _SDH, _DSB, _DISB, _DV0, _DC0B, _DSD0, _DSDH = range(23, 31)
N_SCRATCH = 31
#: the rows :func:`_derived` fills, and their design copies (same order)
_DERIVED = (_SB, _ISB, _V0, _C0B, _SD0, _SDH)
_DESIGN_DERIVED = (_DSB, _DISB, _DV0, _DC0B, _DSD0, _DSDH)
#: the per-node rows read after pruning, which it compacts and padding copies (the covariance
#: rows vtt, vtb are read only by :func:`_derived`, before)
_NODE_ROWS = (_MT, _MB, _VBB, _SB, _ISB, _V0, _C0B, _SD0, _SDH)

_jit = numba.njit(cache=True, error_model="numpy", nogil=True)
# loops over a series' nodes: sums may be reordered so the CPU can vectorise them
_jit_sum = numba.njit(cache=True, error_model="numpy", nogil=True,
                      fastmath={"reassoc", "contract"})
_inline = numba.njit(inline="always", error_model="numpy")

_LOG2E = 1.4426950408889634  # 1 / ln 2
_LN2HI = 6.93147180369123816490e-01  # ln 2 split in two (fdlibm's e_exp.c constants)
_LN2LO = 1.90821492927058770002e-10
_SQRT2 = 1.41421356237309504880
_TINY = 2.2250738585072014e-308  # smallest normal float64
_INV_FACT = tuple(1.0 / float(np.prod(np.arange(1, k + 1, dtype=float))) for k in range(14))


@intrinsic
def _as_f64(typingctx, x):
    """The float64 whose bits are the int64 x."""
    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.float64))
    return types.float64(types.int64), codegen


@intrinsic
def _as_i64(typingctx, x):
    """The int64 whose bits are the float64 x."""
    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.int64))
    return types.int64(types.float64), codegen


@_inline
def vexp(x):
    """exp(x) within 1 ulp for x < 709 (+inf above; 0 below -708; NaN stays), written without
    calls so the loops that use it vectorise: x = n ln 2 + r, |r| <= ln(2)/2, exp(r) by its
    Taylor polynomial of degree 13 (truncation below 1e-17), times 2^n built from its bits."""
    xc = x if x > -708.0 else -708.0
    xc = xc if xc < 709.0 else 709.0
    n = np.floor(xc * _LOG2E + 0.5)
    r = (xc - n * _LN2HI) - n * _LN2LO
    p = _INV_FACT[13]
    for k in range(12, -1, -1):
        p = p * r + _INV_FACT[k]
    y = p * _as_f64((np.int64(n) + 1023) << 52)
    y = y if x > -708.0 else 0.0
    y = y if x < 709.0 else np.inf
    return y if x == x else x


@_inline
def vlog(x):
    """ln(x) within 2 ulp, written without calls so the loops that use it vectorise: x = 2^e m,
    m in [sqrt(1/2), sqrt(2)), ln m = 2 atanh(f), f = (m - 1) / (m + 1), by its series to
    f^23 (truncation below 1e-17); 0 -> -inf, inf -> inf, negative or NaN -> NaN."""
    sub = x < _TINY
    xs = x * 18014398509481984.0 if sub else x  # subnormal: scale by 2^54 first
    b = _as_i64(xs)
    e = (b >> 52) - 1023
    m = _as_f64((b & 0x000FFFFFFFFFFFFF) | 0x3FF0000000000000)  # [1, 2)
    big = m > _SQRT2
    m = m * 0.5 if big else m
    e = e + 1 if big else e
    f = (m - 1.0) / (m + 1.0)
    s = f * f
    p = 1.0 / 23.0
    for k in range(21, 1, -2):
        p = p * s + 1.0 / k
    ef = float(e) - 54.0 if sub else float(e)
    y = ef * _LN2HI + (2.0 * f + (ef * _LN2LO + 2.0 * f * s * p))
    y = y if x < np.inf else x
    return y if x > 0.0 else (-np.inf if x == 0.0 else np.nan)


@_jit
def ndtri_start(q):
    """Standard normal quantile for a solver's start only: Abramowitz M, Stegun IA, Handbook of
    Mathematical Functions 1964, 26.2.23 (|error| < 4.5e-4) in the nearer tail, then one Halley
    step on Phi there (error below 1e-8)."""
    p = min(q, 1.0 - q)
    if not p > 0.0:
        return -np.inf if q <= 0.5 else np.inf
    t = np.sqrt(-2.0 * np.log(p))
    z = (2.515517 + t * (0.802853 + t * 0.010328)) / (
        1.0 + t * (1.432788 + t * (0.189269 + t * 0.001308))) - t  # the p-quantile, p <= 0.5
    e = np.exp(-0.5 * z * z)
    if e > 0.0:
        f = phi(z, e) - p
        d = _C * e
        z -= f / (d * (1.0 + 0.5 * z * f / d))
    return -z if q > 0.5 else z


# ------------------------------------------------------------------------------ node fits
@_jit
def _node_si2(cvi, cvs, x, si2):
    """sI^2 = ln(1 + CVI_k^2), CVI_k = CVI exp(s x_k), at each node."""
    for j in range(x.size):
        c = cvi * np.exp(cvs * x[j])
        si2[j] = np.log1p(c * c)


@_jit
def _series_sums(i, times, y, r, ev_extra, steps, mask, t_ref, pm, sa2, gs, tj, yj, vj):
    """Plain sums of (1, t, t^2, y, t y, y^2) over the usable specimens (t, y centred) into
    gs; the usable specimens' centred t, y and extra variance sA^2 / r + e into tj, yj, vj.
    Row i of ``times``, ``r``, ``ev_extra`` is row i * steps[0], i * steps[1], i * steps[2]
    (step 0: one row shared by every series). Returns (number used, their largest extra
    variance, all extra variances equal)."""
    n = 0
    ev0 = -np.inf
    it, ir, ie = i * steps[0], i * steps[1], i * steps[2]
    for g in range(6):
        gs[g] = 0.0
    for j in range(times.shape[1]):
        if not mask[i, j]:
            continue
        tc = times[it, j] - t_ref
        yc = y[i, j] - pm
        ev = sa2 / r[ir, j] + ev_extra[ie, j]
        gs[0] += 1.0
        gs[1] += tc
        gs[2] += tc * tc
        gs[3] += yc
        gs[4] += tc * yc
        gs[5] += yc * yc
        tj[n] = tc
        yj[n] = yc
        vj[n] = ev
        ev0 = max(ev0, ev)
        n += 1
    uniform = True
    for j in range(n):
        if vj[j] != ev0:
            uniform = False
    return n, ev0, uniform


@_jit_sum
def _design_uniform(ev0, gs, sg2, sb2, kk, S):
    """The part of :func:`_fit_uniform` that depends on the design only (the specimens' times
    through the sums g0, g1, g2, their common extra variance ev0, sG^2, sB^2 and sI^2 per node),
    into the design rows: 1 / v, s1, the precisions p0 and a11, 1 / det, g0 ln v and the
    log-determinant terms."""
    isg = 1.0 / sg2
    isb = 1.0 / sb2
    si2 = S[_SI2]
    g0, g1, g2 = gs[0], gs[1], gs[2]
    for k in range(kk):
        v = si2[k] + ev0
        iv = 1.0 / v
        s1 = g1 * iv
        p0 = isg + g0 * iv
        a11 = isb + g2 * iv
        det = p0 * a11 - s1 * s1
        S[_DIV, k] = iv
        S[_DS1, k] = s1
        S[_DP0, k] = p0
        S[_DA11, k] = a11
        S[_DIDET, k] = 1.0 / det
        S[_DLC, k] = vlog(v) * g0
        S[_DL0, k] = vlog(sg2 * p0)
        S[_DL1, k] = vlog(sg2 * sb2 * det)


@_jit_sum
def _fit_uniform(gs, lw, S):
    """Per node, for a series whose specimens share one variance v = sI^2 + ev0 (design rows
    from :func:`_design_uniform`): log marginal likelihoods under H0 and H1 (the constant
    n ln(2 pi) left out, it cancels in every use) and the H1 posterior of (theta0 - mu, beta),
    into the scratch rows."""
    ml0, ml1 = S[_ML0], S[_ML1]
    mt, mb, vtt, vtb, vbb = S[_MT], S[_MB], S[_VTT], S[_VTB], S[_VBB]
    ivr, s1r, p0r, a11r, idr = S[_DIV], S[_DS1], S[_DP0], S[_DA11], S[_DIDET]
    lcr, l0r, l1r = S[_DLC], S[_DL0], S[_DL1]
    g3, g4, g5 = gs[3], gs[4], gs[5]
    for k in range(lw.size):
        iv = ivr[k]
        s1 = s1r[k]
        p0 = p0r[k]
        a11 = a11r[k]
        idet = idr[k]
        h0 = g3 * iv
        h1 = g4 * iv
        qq = g5 * iv
        mt[k] = (a11 * h0 - s1 * h1) * idet
        mb[k] = (p0 * h1 - s1 * h0) * idet
        vtt[k] = a11 * idet
        vtb[k] = -s1 * idet
        vbb[k] = p0 * idet
        common = lcr[k]
        o5 = qq - h0 * h0 / p0
        o6 = qq - (a11 * h0 * h0 - 2.0 * s1 * h0 * h1 + p0 * h1 * h1) * idet
        ml0[k] = lw[k] - 0.5 * (common + l0r[k] + o5)
        ml1[k] = lw[k] - 0.5 * (common + l1r[k] + o6)


@_jit_sum
def _fit_general(nj, tj, yj, vj, lw, sg2, sb2, S):
    """:func:`_fit_uniform` for a series whose specimens' variances differ (replicates, extra
    variance): the weighted sums per node over the specimens."""
    isg = 1.0 / sg2
    isb = 1.0 / sb2
    for k in range(lw.size):
        si2 = S[_SI2, k]
        s0 = s1 = s2 = h0 = h1 = qq = common = 0.0
        for j in range(nj):
            v = si2 + vj[j]
            iv = 1.0 / v
            s0 += iv
            s1 += tj[j] * iv
            s2 += tj[j] * tj[j] * iv
            h0 += yj[j] * iv
            h1 += tj[j] * yj[j] * iv
            qq += yj[j] * yj[j] * iv
            common += vlog(v)
        p0 = isg + s0
        a11 = isb + s2
        det = p0 * a11 - s1 * s1
        idet = 1.0 / det
        S[_MT, k] = (a11 * h0 - s1 * h1) * idet
        S[_MB, k] = (p0 * h1 - s1 * h0) * idet
        S[_VTT, k] = a11 * idet
        S[_VTB, k] = -s1 * idet
        S[_VBB, k] = p0 * idet
        o5 = qq - h0 * h0 / p0
        o6 = qq - (a11 * h0 * h0 - 2.0 * s1 * h0 * h1 + p0 * h1 * h1) * idet
        S[_ML0, k] = lw[k] - 0.5 * (common + vlog(sg2 * p0) + o5)
        S[_ML1, k] = lw[k] - 0.5 * (common + vlog(sg2 * sb2 * det) + o6)


@_jit_sum
def _derived(S, kk, tcl, horizon):
    """From the H1 posterior covariance rows: the slope SD and its inverse, the variance of
    theta at the last specimen (tcl years after t_ref) and its covariance with beta, and the SD
    of theta there and ``horizon`` years later (floored at 1e-150). Depends on the design only."""
    vtt, vtb, vbb = S[_VTT], S[_VTB], S[_VBB]
    for k in range(kk):
        vb = vbb[k]
        sb = np.sqrt(vb)
        S[_SB, k] = sb
        S[_ISB, k] = 1.0 / sb
        v0 = vtt[k] + 2.0 * tcl * vtb[k] + tcl * tcl * vb
        c0b = vtb[k] + tcl * vb
        S[_V0, k] = v0
        S[_C0B, k] = c0b
        S[_SD0, k] = np.sqrt(max(v0, 1e-300))
        S[_SDH, k] = np.sqrt(max(v0 + horizon * (2.0 * c0b + horizon * vb), 1e-300))


@_jit
def _copy_rows(S, src, dst, kk):
    for q in range(len(src)):
        for k in range(kk):
            S[dst[q], k] = S[src[q], k]


@_jit_sum
def _lse2(S, n):
    """log(sum(exp(.))) of the rows ml0 and ml1 (first n nodes) in one pass over the nodes: (log sum
    exp ml0, log sum exp ml1, sum exp(ml1 - max ml1)); the weight row = exp(ml1 - max ml1).
    Functions of the per-series loop take the scratch S itself, not views of its rows (a view
    costs an atomic reference count update per call)."""
    a0, a1, e = S[_ML0], S[_ML1], S[_W]
    mx0 = -np.inf
    mx1 = -np.inf
    for k in range(n):
        mx0 = max(mx0, a0[k])
        mx1 = max(mx1, a1[k])
    if not np.isfinite(mx0):
        mx0 = 0.0
    if not np.isfinite(mx1):
        mx1 = 0.0
    s0 = 0.0
    s1 = 0.0
    for k in range(n):
        s0 += vexp(a0[k] - mx0)
        t = vexp(a1[k] - mx1)
        e[k] = t
        s1 += t
    return vlog(s0) + mx0, vlog(s1) + mx1, s1


@_jit
def _pad(S, kn):
    """Zero-weight copies of node 0 up to a multiple of 4 nodes (the vector width of the loops;
    a remainder would run one node at a time). Returns the padded count."""
    kp = (kn + 3) // 4 * 4
    for k in range(kn, kp):
        for row in _NODE_ROWS:
            S[row, k] = S[row, 0]
        S[_W, k] = 0.0
    return kp


@_jit
def _weights(S, kn, tot, prune):
    """H1 weights exp(ml1 - lp1) from exp(ml1 - max) in the weight row and their sum ``tot``;
    nodes with weight <= prune are dropped (rows compacted, the kept weights renormalised when
    any was dropped), then padded by :func:`_pad`. Returns the number of nodes (padded)."""
    w = S[_W]
    inv = 1.0 / tot
    drop = False
    for k in range(kn):
        w[k] *= inv
        drop |= not w[k] > prune
    if not (drop and prune > 0 and kn > 1):
        return _pad(S, kn)
    kept = 0
    for k in range(kn):
        if not w[k] > prune:
            continue
        for row in _NODE_ROWS:
            S[row, kept] = S[row, k]
        w[kept] = w[k]
        kept += 1
    tot = 0.0
    for k in range(kept):
        tot += w[k]
    for k in range(kept):
        w[k] /= tot
    return _pad(S, kept)


# ------------------------------------------------------------------ normal-mixture quantile
@_jit_sum
def mix_moments(S, kn, mom):
    """Of the mixture sum_j w_j N(m_j, s_j^2): mean, SD, skewness, excess kurtosis, the bracket
    min(m - 12 s), max(m + 12 s) and the smallest s, into mom[0:7] (the moments of
    bayesbase.model._jit.start_k)."""
    w, m, s = S[_W], S[_MB], S[_SB]
    a = 0.0
    for j in range(kn):
        a += w[j] * m[j]
    b = 0.0
    c = 0.0
    e = 0.0
    mn = np.inf
    mx = -np.inf
    smin = np.inf
    for j in range(kn):
        d = m[j] - a
        d2 = d * d
        s2 = s[j] * s[j]
        b += w[j] * (s2 + d2)
        c += w[j] * d * (3.0 * s2 + d2)
        e += w[j] * (d2 * d2 + 6.0 * d2 * s2 + 3.0 * s2 * s2)
        mn = min(mn, m[j] - 12.0 * s[j])
        mx = max(mx, m[j] + 12.0 * s[j])
        smin = min(smin, s[j])
    sd = np.sqrt(max(b, 1e-300))
    mom[0] = a
    mom[1] = sd
    mom[2] = c / (b * sd)
    mom[3] = e / (b * b) - 3.0
    mom[4] = mn
    mom[5] = mx
    mom[6] = smin


@_jit
def _mix_start(mom, z):
    """Cornish-Fisher start at standard normal deviate z (the normal approximation when that
    leaves the bracket)."""
    a, sd, g1, g2, mn, mx = mom[0], mom[1], mom[2], mom[3], mom[4], mom[5]
    z2 = z * z
    xi = a + sd * (z + g1 / 6.0 * (z2 - 1.0) + g2 / 24.0 * z * (z2 - 3.0)
                   - g1 * g1 / 36.0 * z * (2.0 * z2 - 5.0))
    if not (xi > mn and xi < mx):
        xi = a + sd * z
    return xi


@_jit_sum
def _mix_step(x, q, S, kn):
    """g = F(x) - q, the fourth-order step h and the Newton step t (as bayesbase.model._jit
    eval_k and step4, one row)."""
    w, m, inv_s = S[_W], S[_MB], S[_ISB]
    f = d1 = d2 = d3 = d4 = 0.0
    for j in range(kn):
        si = inv_s[j]
        zz = (x - m[j]) * si
        ee = vexp(-0.5 * zz * zz)
        f += w[j] * phi(zz, ee)
        u = w[j] * ee * si
        d1 += u
        u *= si
        d2 -= u * zz
        u *= si
        d3 += u * (zz * zz - 1.0)
        u *= si
        d4 -= u * zz * (zz * zz - 3.0)
    g = f - q
    d1 = max(_C * d1, 1e-300)
    t = -g / d1
    a = _C * d2 / (2.0 * d1)
    b = _C * d3 / (6.0 * d1)
    c = _C * d4 / (24.0 * d1)
    h = t * (1.0 + t * (-a + t * ((2.0 * a * a - b) + t * (5.0 * a * b - 5.0 * a * a * a - c))))
    fine = abs(a * t) <= 0.1 and h == h
    if not fine:
        h = t
    return g, h, t, fine


@_jit
def mix_quantile(q, z, S, mom, kn, tol, max_iter, early):
    """Quantile q (standard normal deviate z, for the start) of sum_j w_j N(m_j, s_j^2) (the
    rows w, mb and 1 / sb of S; ``mom`` from :func:`mix_moments`): the algorithm of
    bayesbase.model.normal.mixture_quantile for one row (the last step applied); it also stops after a fourth-order step whose Newton step t is at most
    ``early`` times the smallest component SD s (the step's error is then of order
    s (t / s)^5, about 1e-10 s for early = 1e-2; on the benchmark's series the slope limits
    move by less than 1e-12 from the fully converged ones)."""
    x = _mix_start(mom, z)
    lo, hi, smin = mom[4], mom[5], mom[6]
    for _ in range(max_iter):
        g, h, t, fine = _mix_step(x, q, S, kn)
        if g < 0:
            lo = max(lo, x)
        if g > 0:
            hi = min(hi, x)
        xn = x + h
        done = abs(t) <= tol or (fine and abs(t) <= early * smin and xn > lo and xn < hi)
        if not done and not (xn > lo and xn < hi):
            xn = 0.5 * (lo + hi)
        x = xn
        if done:
            break
    return x


# ---------------------------------------------------------------------- time to a limit
@_jit_sum
def _cross_start(z, S, kn, a, horizon):
    """Start for F(tau) = q (standard normal deviate z of q): the root of the one normal with
    the mixture's mean and covariance of (theta_last, beta) (as the numpy path's start), the
    middle of [0, horizon] when none fits."""
    w, m0, v0, mb, c0b, vb = S[_W], S[_M0], S[_V0], S[_MBS], S[_C0B], S[_VBB]
    mm = bb = 0.0
    for j in range(kn):
        mm += w[j] * m0[j]
        bb += w[j] * mb[j]
    vv0 = cc = vvb = 0.0
    for j in range(kn):
        dm = m0[j] - mm
        db = mb[j] - bb
        vv0 += w[j] * (v0[j] + dm * dm)
        cc += w[j] * (c0b[j] + dm * db)
        vvb += w[j] * (vb[j] + db * db)
    d = mm - a
    z2 = z * z
    a2 = bb * bb - z2 * vvb
    a1 = d * bb - z2 * cc
    a0 = d * d - z2 * vv0
    root = np.sqrt(a1 * a1 - a2 * a0)
    for k in range(3):
        if k == 0:
            r = (-a1 + root) / a2
        elif k == 1:
            r = (-a1 - root) / a2
        else:
            r = -a0 / (2.0 * a1)
        if r > 0 and r < horizon and (z == 0.0 or np.sign(d + bb * r) == np.sign(z)):
            return r
    return 0.5 * horizon


@_jit_sum
def _cross_ends(S, kn, sign, pm, tcl, a, horizon):
    """The rows of the mean of theta at the last specimen m0 and of the slope mbs, signed so the
    limit lies above (``sign`` -1 for a lower limit), and F(0), F(horizon) of the crossing CDF
    F(tau) = sum_j w_j Phi((m0_j + mb_j tau - a) / s_j(tau)), s_j^2 = v0_j + 2 tau c0b_j + tau^2 vb_j
    (with the SDs of :func:`_derived`), in one pass over the nodes."""
    w, mt, mbr, v0r, c0r = S[_W], S[_MT], S[_MB], S[_V0], S[_C0B]
    sd0, sdh = S[_SD0], S[_SDH]
    m0r, mbs = S[_M0], S[_MBS]
    f0 = fh = 0.0
    for j in range(kn):
        mb = mbr[j]
        m0 = sign * (mt[j] + pm + mb * tcl)
        ms = sign * mb
        m0r[j] = m0
        mbs[j] = ms
        z0 = (m0 - a) / sd0[j]
        f0 += w[j] * phi(z0, vexp(-0.5 * z0 * z0))
        zh = (m0 + ms * horizon - a) / sdh[j]
        fh += w[j] * phi(zh, vexp(-0.5 * zh * zh))
    return f0, fh


@_jit_sum
def _cross_step(tau, q, S, kn, a):
    """g = F(tau) - q, the Halley step and the Newton step (as bayesbase.model._jit
    cross_prep_k and cross_eval_k, one row)."""
    w, m0, v0, mb, c0b, vb = S[_W], S[_M0], S[_V0], S[_MBS], S[_C0B], S[_VBB]
    f = d1 = d2 = 0.0
    for j in range(kn):
        sl = c0b[j] + tau * vb[j]
        si = 1.0 / np.sqrt(max(v0[j] + tau * (c0b[j] + sl), 1e-300))
        ds = sl * si
        d2s = (vb[j] - ds * ds) * si
        zz = (m0[j] + mb[j] * tau - a) * si
        z1 = (mb[j] - zz * ds) * si
        d2z = -(2.0 * z1 * ds + zz * d2s) * si
        e = vexp(-0.5 * zz * zz)
        u = w[j] * e
        f += w[j] * phi(zz, e)
        d1 += u * z1
        d2 += u * (d2z - zz * z1 * z1)
    g = f - q
    d1 *= _C
    d2 *= _C
    t = -g / d1
    h = -2.0 * g * d1 / (2.0 * d1 * d1 - g * d2)
    fine = abs(h) <= 2.0 * abs(t)
    if not fine:  # Halley unreliable far from the root (or NaN)
        h = t
    return g, h, t, fine


@_jit
def cross_quantile(q, z, S, kn, a, lo, hi, tol, max_iter, early):
    """Smallest tau in [lo, hi] with F(tau) = q (the rows w, m0, v0, mbs, c0b, vb of S), given
    F(lo) < q <= F(hi): Halley steps from the one-normal start, kept inside the bisection
    bracket; done when the Newton step or the bracket is at most ``tol`` (as the numpy path), or
    after a Halley step whose Newton step is at most ``early`` years (its error is then of order
    early^3: 1e-12 years for 1e-4)."""
    x = _cross_start(z, S, kn, a, hi)
    if not (x > lo and x < hi):
        x = 0.5 * (lo + hi)
    for _ in range(max_iter):
        g, h, t, fine = _cross_step(x, q, S, kn, a)
        if g < 0:
            lo = x
        else:
            hi = x
        xn = x + h
        ok = np.isfinite(xn) and xn >= lo and xn <= hi
        if not ok:
            xn = 0.5 * (lo + hi)
        x = xn
        if (ok and (abs(t) <= tol or (fine and abs(t) <= early))) or (hi - lo <= tol):
            break
    return x


# --------------------------------------------------------------------------- per series
@_jit_sum
def _summaries(S, kn, out, c):
    """P(beta > 0 | H1), slope mean and SD, E[exp(beta)] and P(beta < 0 | H1) of the kept nodes
    (slope SDs from :func:`_derived`)."""
    w, mbr, vbr, sbr = S[_W], S[_MB], S[_VBB], S[_SB]
    p_inc = mean = m2 = ex = f1_0 = 0.0
    for k in range(kn):
        mb = mbr[k]
        vb = vbr[k]
        sb = sbr[k]
        zz = mb / sb
        p_pos = phi(zz, vexp(-0.5 * zz * zz))
        p_inc += w[k] * p_pos
        f1_0 += w[k] * (1.0 - p_pos)
        mean += w[k] * mb
        m2 += w[k] * (vb + mb * mb)
        ex += w[k] * vexp(mb + 0.5 * vb)
    out[2, c] = p_inc
    out[3, c] = mean
    out[4, c] = np.sqrt(max(m2 - mean * mean, 0.0))
    out[5, c] = ex
    return f1_0


@_jit
def _slope_limits(S, kn, p_drift, f1_0, a, za, tol, max_iter, early, out, c, mom):
    """Central interval of the slope under H1 and of the model-averaged slope (point mass
    1 - P(drift) at 0 plus P(drift) x the H1 posterior), log units. ``mom``: scratch (7,)."""
    mix_moments(S, kn, mom)
    out[6, c] = mix_quantile(a, -za, S, mom, kn, tol, max_iter, early)
    out[7, c] = mix_quantile(1.0 - a, za, S, mom, kn, tol, max_iter, early)
    below = p_drift * f1_0  # averaged CDF just below 0
    above = below + (1.0 - p_drift)  # averaged CDF at 0
    for r, qv in ((8, a), (9, 1.0 - a)):
        val = 0.0
        if qv < below:
            qq = qv / p_drift
            val = mix_quantile(qq, ndtri_start(qq), S, mom, kn, tol, max_iter, early)
        elif qv > above:
            qq = min((qv - (1.0 - p_drift)) / p_drift, 1 - 1e-15)
            val = mix_quantile(qq, ndtri_start(qq), S, mom, kn, tol, max_iter, early)
        out[r, c] = val


@_jit
def _limit(S, kn, tcl, pm, lu, ll, zq, a, horizon, tol, max_iter, early, out, c):
    """Set point at the last specimen and the time to the population limit the H1 slope
    points to (quantiles a, 0.5, 1 - a; 0 when already reached, +inf when not within
    ``horizon``), and P(already beyond it)."""
    th = 0.0
    for k in range(kn):
        th += S[_W, k] * (S[_MT, k] + pm + S[_MB, k] * tcl)
    out[10, c] = th
    slope = out[3, c]
    has = np.isfinite(lu) or np.isfinite(ll)
    for r in (11, 12, 13):
        out[r, c] = np.inf if has else np.nan
    out[14, c] = np.nan
    if np.isfinite(lu) and slope > 0:
        sign, lim, side = 1.0, lu, 1
    elif np.isfinite(ll) and slope < 0:
        sign, lim, side = -1.0, ll, -1
    else:
        return 0
    aa = sign * lim
    f0, fh = _cross_ends(S, kn, sign, pm, tcl, aa, horizon)
    out[14, c] = f0
    for r, q, z in ((11, 0.5, zq[0]), (12, a, zq[1]), (13, 1.0 - a, zq[2])):
        if f0 >= q:
            out[r, c] = 0.0
        elif fh >= q:
            out[r, c] = cross_quantile(q, z, S, kn, aa, 0.0, horizon,
                                       tol, max_iter, early)
    return side


@_jit
def trend_k(idx, times, y, r, ev_extra, steps, mask, t_ref, t_last, pm, sg, sb, cvi, cvs, sa,
            pi, lu, ll, x_nodes, lw_nodes, a, zq, horizon, prune, intervals, early, out, side):
    """Every series idx[c] (eligible: at least one usable specimen): the drift model's outputs
    into out[:, c] (rows :data:`ROWS`; rows 6 on NaN when not ``intervals``) and the limit side
    (1 upper, -1 lower, 0 none) into side[c]. ``steps``: the row steps of ``times``, ``r`` and
    ``ev_extra`` (0: one row for every series, see :func:`_series_sums`). ``zq`` = the standard
    normal deviates of (0.5, a, 1 - a); ``early`` = the early stops of the slope and the
    time-to-limit solvers (:data:`EARLY`)."""
    kk = x_nodes.size
    S = np.empty((N_SCRATCH, (kk + 3) // 4 * 4))
    gs = np.empty(6)
    mom = np.empty(7)  # the slope mixture's moments (scratch, reused by every series)
    nj = times.shape[1]
    tj, yj, vj = np.empty(nj), np.empty(nj), np.empty(nj)
    last_cvi = np.nan
    last_cvs = np.nan
    dkey = np.zeros(7, dtype=np.int64)  # bits of (g0, g1, g2, ev0, sG^2, sB^2, tcl): design rows'
    have_design = False
    for c in range(idx.size):
        i = idx[c]
        if not (cvi[i] == last_cvi and cvs[i] == last_cvs):  # sI^2 per node, once per (CVI, s)
            _node_si2(cvi[i], cvs[i], x_nodes, S[_SI2])
            last_cvi, last_cvs = cvi[i], cvs[i]
            have_design = False
        n, ev0, uniform = _series_sums(i, times, y, r, ev_extra, steps, mask, t_ref[i], pm[i],
                                       sa[i] * sa[i], gs, tj, yj, vj)
        sg2 = sg[i] * sg[i]
        tcl = t_last[i] - t_ref[i]
        if uniform:
            sb2 = sb[i] * sb[i]
            same = have_design
            for q, val in enumerate((gs[0], gs[1], gs[2], ev0, sg2, sb2, tcl)):
                bits = _as_i64(val)
                same = same and dkey[q] == bits
                dkey[q] = bits
            if not same:  # a new design (times, variances, priors): its rows once
                _design_uniform(ev0, gs, sg2, sb2, kk, S)
            _fit_uniform(gs, lw_nodes, S)
            if not same:
                _derived(S, kk, tcl, horizon)
                _copy_rows(S, _DERIVED, _DESIGN_DERIVED, kk)
                have_design = True
            else:
                _copy_rows(S, _DESIGN_DERIVED, _DERIVED, kk)
        else:
            _fit_general(n, tj, yj, vj, lw_nodes, sg2, sb[i] * sb[i], S)
            _derived(S, kk, tcl, horizon)
        lp0, lp1, tot = _lse2(S, kk)
        log_bf = lp1 - lp0
        p_drift = 1.0 / (1.0 + np.exp(-(np.log(pi[i]) - np.log1p(-pi[i]) + log_bf)))
        out[0, c] = log_bf
        out[1, c] = p_drift
        kn = _weights(S, kk, tot, prune)
        f1_0 = _summaries(S, kn, out, c)
        side[c] = 0
        if not intervals:
            for row in range(6, out.shape[0]):
                out[row, c] = np.nan
            continue
        _slope_limits(S, kn, p_drift, f1_0, a, zq[2], 1e-9, 60, early[0], out, c,
                      mom)
        side[c] = _limit(S, kn, tcl, pm[i], lu[i], ll[i], zq, a, horizon,
                         1e-7, 80, early[1], out, c)
