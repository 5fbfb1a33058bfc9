"""The marginal location density of the calibration model as one compiled operation, with its
gradient in closed form (imported only where a graph is built: it loads PyTensor and numba).

:func:`bayesbase.calibrate.model._location_marginal` puts this operation into the model. The
density (module docstring of :mod:`bayesbase.calibrate.model`) was first written as a PyTensor
graph of per-cell products, a D x D solve and a log determinant, whose gradient by automatic
differentiation cost about 92 us per call in numba on the benchmark's analyte (500 cells), most
of it the per-node overhead of some 60 small array operations. Here the latent CVI layer, the same
density and its exact gradient are one pass over the cells, one Cholesky factor per analyte, and
a second pass over the cells:

Per cell c (m specimens, w = 1 / v, s = sigma_g^2 of its analyte), t = s w^2 / (1 + s m w):
M_c = w G_c - t u_c u_c', b_c = w g_c - t s1_c u_c, yy_c = w s2_c - t s1_c^2 and
const_c = -0.5 (m ln 2pi - m ln w + ln(1 + s m w)), over the cell's q coordinates (mu, method
slots, age; :func:`bayesbase.calibrate.model.location_design`), the mu row also standing for the
cell's breed row. With A = sum_c M_c + P (full D coordinates), mu_hat = A^-1 b:

    log p = sum_c const_c - 0.5 sum_c yy_c + 0.5 b' mu_hat - 0.5 ln det A + 0.5 sum ln P.

Gradient: dlogp/dA = -0.5 Q with Q = mu_hat mu_hat' + A^-1, dlogp/db = mu_hat, dlogp/dP_d =
-0.5 Q_dd + 0.5 / P_d. Folding Q and mu_hat onto a cell's q coordinates (Q~, mu~: the mu and
breed rows of the cell summed), with r_c = 0.5 s1^2 - s1 mu~'u + 0.5 u'Q~u,
t_w = s w (2 + s m w) / (1 + s m w)^2 and t_s = w^2 / (1 + s m w)^2:

    dlogp/dw_c = 0.5 m / w - 0.5 s m / (1 + s m w) - 0.5 s2 + mu~'g - 0.5 <Q~, G> + t_w r_c
    dlogp/ds_c = -0.5 m w / (1 + s m w) + t_s r_c   (summed over the analyte's cells).

``tests/test_calibrate_locop.py`` checks the value and the gradient against that earlier PyTensor
graph (kept there; automatic differentiation) and against finite differences;
``tests/test_calibrate_marginal.py`` checks the model's density against scipy's multivariate
normal.
"""
from __future__ import annotations

import numba
import numpy as np
import pytensor.tensor as pt
from pytensor.gradient import DisconnectedType, disconnected_type, grad_not_implemented
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key

_LOG_2PI = float(np.log(2.0 * np.pi))


@numba.njit(cache=True)
def _accumulate(w, v, sg2, m, H, uq, gq, s1, s2, ca, br, n_an, nb):
    """First pass: per group g = (analyte, breed) the sums of M_c and b_c over its cells (q
    coordinates), the constant plus -0.5 yy over every cell, and 1 / (1 + s m w) per cell (``v`` =
    1 / w, so that the cell's log term takes products, not a chain of divisions)."""
    C, dq = uq.shape
    mg, bg = np.zeros((n_an * nb, dq, dq)), np.zeros((n_an * nb, dq))
    inv_den = np.empty(C)
    tot = 0.0
    for c in range(C):
        g, wc, s, mc, sc = ca[c] * nb + br[c], w[c], sg2[ca[c]], m[c], s1[c]
        den = 1.0 + s * mc * wc
        idn = 1.0 / den
        inv_den[c] = idn
        t = s * wc * wc * idn
        # ln(1 + s m w) - m ln w = ln((1 + s m w) v^m), one logarithm while the product stays in range
        if mc <= 8.0 and mc == int(mc):
            prod = den
            for _ in range(int(mc)):
                prod *= v[c]
            lv = np.log(prod)
        else:
            lv = np.log(den) + mc * np.log(v[c])
        tot -= 0.5 * (mc * _LOG_2PI + lv + wc * s2[c] - t * sc * sc)
        for i in range(dq):
            bg[g, i] += wc * gq[c, i] - t * sc * uq[c, i]
            for j in range(dq):
                mg[g, i, j] += wc * H[c, i, j] - t * uq[c, i] * uq[c, j]
    return mg, bg, tot, inv_den


@numba.njit(cache=True)
def _expand(mg, bg, n_an, nb, B, D):
    """A (without P) and b per analyte in full coordinates (mu, B breed rows, method slots, age)
    from the groups' q sums: q coordinate 0 is mu and also the group's breed row; q coordinate
    i >= 1 is full coordinate B + i."""
    dq = bg.shape[1]
    amat, bvec = np.zeros((n_an, D, D)), np.zeros((n_an, D))
    for a in range(n_an):
        for b in range(nb):
            g = a * nb + b
            for i in range(dq):
                fi = B + i if i > 0 else 0
                bvec[a, fi] += bg[g, i]
                if B:
                    bvec[a, 1 + b] += bg[g, i] if i == 0 else 0.0
                for j in range(dq):
                    fj = B + j if j > 0 else 0
                    amat[a, fi, fj] += mg[g, i, j]
                    if B and i == 0:
                        amat[a, 1 + b, fj] += mg[g, i, j]
                    if B and j == 0:
                        amat[a, fi, 1 + b] += mg[g, i, j]
                    if B and i == 0 and j == 0:
                        amat[a, 1 + b, 1 + b] += mg[g, i, j]
    return amat, bvec


@numba.njit(cache=True)
def _cholesky(mat, L):
    """Lower Cholesky factor of the symmetric positive definite ``mat`` into ``L`` (written out:
    D is at most about 12); False when a pivot is not positive."""
    D = mat.shape[0]
    for j in range(D):
        s = mat[j, j]
        for k in range(j):
            s -= L[j, k] * L[j, k]
        if not s > 0.0:
            return False
        L[j, j] = np.sqrt(s)
        for i in range(j + 1, D):
            t = mat[i, j]
            for k in range(j):
                t -= L[i, k] * L[j, k]
            L[i, j] = t / L[j, j]
    return True


@numba.njit(cache=True)
def _solve(amat, bvec, prec):
    """Per analyte: A + P's Cholesky factor L, mu_hat = (A + P)^-1 b, Q = mu_hat mu_hat' + (A +
    P)^-1 (from L^-1), and b' mu_hat - ln det(A + P) + sum ln P (NaN if A + P is not positive
    definite)."""
    n_an, D = bvec.shape
    chol, mean, q = np.zeros((n_an, D, D)), np.zeros((n_an, D)), np.zeros((n_an, D, D))
    linv = np.zeros((D, D))
    part = 0.0
    for a in range(n_an):
        mat = amat[a].copy()
        for k in range(D):
            mat[k, k] += prec[a, k]
        L = chol[a]
        if not _cholesky(mat, L):
            return chol, mean, q, np.nan
        linv[:, :] = 0.0
        for j in range(D):  # L^-1 by forward substitution
            linv[j, j] = 1.0 / L[j, j]
            for i in range(j + 1, D):
                t = 0.0
                for k in range(j, i):
                    t -= L[i, k] * linv[k, j]
                linv[i, j] = t / L[i, i]
        for i in range(D):  # (A + P)^-1 = L^-T L^-1
            for j in range(i + 1):
                t = 0.0
                for k in range(i, D):
                    t += linv[k, i] * linv[k, j]
                q[a, i, j] = q[a, j, i] = t
        for i in range(D):
            t = 0.0
            for k in range(D):
                t += q[a, i, k] * bvec[a, k]
            mean[a, i] = t
        for i in range(D):
            part += bvec[a, i] * mean[a, i] - 2.0 * np.log(L[i, i]) + np.log(prec[a, i])
            for j in range(D):
                q[a, i, j] += mean[a, i] * mean[a, j]
    return chol, mean, q, part


@numba.njit(cache=True)
def _fold(mean, q, nb, B, dq):
    """mu_hat and Q folded onto each group's q coordinates (the mu and breed rows summed)."""
    n_an = mean.shape[0]
    mt, qt = np.zeros((n_an * nb, dq)), np.zeros((n_an * nb, dq, dq))
    for a in range(n_an):
        for b in range(nb):
            g = a * nb + b
            for i in range(dq):
                fi = B + i if i > 0 else 0
                mt[g, i] = mean[a, fi] + (mean[a, 1 + b] if B and i == 0 else 0.0)
                for j in range(dq):
                    fj = B + j if j > 0 else 0
                    v = q[a, fi, fj]
                    if B and i == 0:
                        v += q[a, 1 + b, fj]
                    if B and j == 0:
                        v += q[a, fi, 1 + b]
                    if B and i == 0 and j == 0:
                        v += q[a, 1 + b, 1 + b]
                    qt[g, i, j] = v
    return mt, qt


@numba.njit(cache=True)
def _gradient(w, v, inv_den, sg2, m, H, uq, gq, s1, s2, ca, br, nb, mt, qt):
    """Second pass: dlogp/dv per cell (= -w^2 dlogp/dw) and dlogp/d sigma_g^2 per analyte (module
    docstring)."""
    C, dq = uq.shape
    gv, gs = np.empty(C), np.zeros(sg2.shape[0])
    for c in range(C):
        a, wc, mc, sc, idn = ca[c], w[c], m[c], s1[c], inv_den[c]
        g, s = a * nb + br[c], sg2[a]
        mg, mu_u, uqu, qg = 0.0, 0.0, 0.0, 0.0
        for i in range(dq):
            mg += mt[g, i] * gq[c, i]
            mu_u += mt[g, i] * uq[c, i]
            for j in range(dq):
                uqu += uq[c, i] * qt[g, i, j] * uq[c, j]
                qg += qt[g, i, j] * H[c, i, j]
        r = (0.5 * sc * sc - sc * mu_u + 0.5 * uqu) * idn * idn
        gw = 0.5 * mc * v[c] - 0.5 * s * mc * idn - 0.5 * s2[c] + mg - 0.5 * qg + s * wc * (2.0 + s * mc * wc) * r
        gv[c] = -wc * wc * gw
        gs[a] += -0.5 * mc * wc * idn + wc * wc * r
    return gv, gs


@numba.njit(cache=True)
def _marginal(w, v, sg2, prec, m, H, uq, gq, s1, s2, ca, br):
    """The marginal location density of cells with precisions w (v = 1 / w, both given): (log p,
    mu_hat (analyte, D), L (analyte, D, D), dlogp/dv per cell, dlogp/dsg2, dlogp/dP)."""
    n_an, D = prec.shape
    dq = uq.shape[1]
    B = D - dq  # D = 1 + B + K (+ age); q = (mu, K slots, age)
    nb = max(B, 1)
    mg, bg, tot, inv_den = _accumulate(w, v, sg2, m, H, uq, gq, s1, s2, ca, br, n_an, nb)
    amat, bvec = _expand(mg, bg, n_an, nb, B, D)
    chol, mean, q, part = _solve(amat, bvec, prec)
    mt, qt = _fold(mean, q, nb, B, dq)
    gv, gs = _gradient(w, v, inv_den, sg2, m, H, uq, gq, s1, s2, ca, br, nb, mt, qt)
    gp = np.empty((n_an, D))
    for a in range(n_an):
        for k in range(D):
            gp[a, k] = -0.5 * q[a, k, k] + 0.5 / prec[a, k]
    return np.array(tot + 0.5 * part), mean, chol, gv, gs, gp


@numba.njit(cache=True)
def latent_marginal_k(z, lm, sp, sa, sg2, prec, nrep, m, H, uq, gq, s1, s2, ca, br):
    """The latent CVI layer and the marginal location density in one pass: per cell ln CVI = lm
    + sp z, sigma_i^2 = softplus(2 ln CVI) = ln(1 + CVI^2), v = sigma_i^2 + sa^2 / n_rep, w = 1 / v
    (lm, sp, sa per analyte), then :func:`_marginal`. Returns (log p, mu_hat, L,
    dlogp/dz, dlogp/dlm, dlogp/dsp, dlogp/dsa, dlogp/dsg2, dlogp/dP) by the chain rule:
    dlogp/dv = -w^2 dlogp/dw, d sigma_i^2 / d ln CVI = 2 sigmoid(2 ln CVI)."""
    C = z.shape[0]
    w, v, dsi, van = np.empty(C), np.empty(C), np.empty(C), np.empty(C)
    for c in range(C):
        a = ca[c]
        u2 = 2.0 * (lm[a] + sp[a] * z[c])
        if u2 > 0.0:  # softplus and its slope without overflow
            e = np.exp(-u2)
            si2, dsi[c] = u2 + np.log1p(e), 2.0 / (1.0 + e)
        else:
            e = np.exp(u2)
            si2, dsi[c] = np.log1p(e), 2.0 * e / (1.0 + e)
        van[c] = sa[a] * sa[a] / nrep[c]
        v[c] = si2 + van[c]
        w[c] = 1.0 / v[c]
    logp, mean, chol, gv, gs, gp = _marginal(w, v, sg2, prec, m, H, uq, gq, s1, s2, ca, br)
    n_an = lm.shape[0]
    gz, glm, gsp, gsa = np.empty(C), np.zeros(n_an), np.zeros(n_an), np.zeros(n_an)
    for c in range(C):
        a = ca[c]
        gu = gv[c] * dsi[c]
        gz[c] = gu * sp[a]
        glm[a] += gu
        gsp[a] += gu * z[c]
        gsa[a] += gv[c] * van[c]
    for a in range(n_an):
        gsa[a] *= 2.0 / sa[a]  # d(sa^2 / n_rep) / d sa = 2 sa / n_rep = (2 / sa) (sa^2 / n_rep)
    return logp, mean, chol, gz, glm, gsp, gsa, gs, gp


class LatentMarginal(Op):
    """Inputs z (cell), ln CVI median, CVI spread, sigma_a, sigma_g^2 (per analyte), P (analyte,
    D) (the differentiable ones), then the data n_rep, m, G, u, g, s1, s2 (per cell), cell
    analyte and cell breed; outputs log p, mu_hat, L and one gradient per differentiable input
    (for :meth:`grad`), all from :func:`latent_marginal_k`."""

    __props__ = ()
    n_diff = 6

    def make_node(self, *inputs):
        n_int = 2  # cell analyte, cell breed
        ins = [pt.cast(pt.as_tensor_variable(x), "float64") for x in inputs[:-n_int]]
        ins += [pt.cast(pt.as_tensor_variable(x), "int64") for x in inputs[-n_int:]]
        outs = [pt.dscalar(), pt.dmatrix(), pt.dtensor3()] + [x.type() for x in ins[:self.n_diff]]
        return Apply(self, ins, outs)

    def perform(self, node, inputs, output_storage):
        for store, value in zip(output_storage, latent_marginal_k(*inputs)):
            store[0] = value

    def grad(self, inputs, output_grads):
        if any(not isinstance(o.type, DisconnectedType) for o in output_grads[1:]):
            return [grad_not_implemented(self, k, x, "only log p has a gradient") for k, x in enumerate(inputs)]
        g = output_grads[0]
        grads = self(*inputs)[3:]
        return [g * gx for gx in grads] + [disconnected_type() for _ in inputs[self.n_diff:]]

    def connection_pattern(self, node):
        n_out = 3 + self.n_diff
        return [[True] * n_out] * self.n_diff + [[False] * n_out] * (len(node.inputs) - self.n_diff)


@register_funcify_default_op_cache_key(LatentMarginal)
def _funcify(op, node, **kwargs):
    """nutpie's numba backend calls the kernel itself."""
    return latent_marginal_k


latent_marginal = LatentMarginal()
