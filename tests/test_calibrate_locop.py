"""The compiled operation of the calibration model's marginal location density
(bayesbase.calibrate._locop): its value and its closed-form gradient.

Outside references: PyTensor's automatic differentiation of the same density written as a graph of
array operations (the form the model used before the operation; written out below, its density
checked against scipy.stats.multivariate_normal in tests/test_calibrate_marginal.py), and central
finite differences of the model's log density (numerical differentiation). The model-level density
against scipy's multivariate normal is tests/test_calibrate_marginal.py, which now goes through
this operation.
"""
from __future__ import annotations

import numpy as np
import pytest

pytensor = pytest.importorskip("pytensor")
import pytensor.tensor as pt  # noqa: E402

from bayesbase.calibrate import _locop  # noqa: E402
from bayesbase.calibrate import model as M  # noqa: E402
from bayesbase.priors import load_pack  # noqa: E402

from test_calibrate_marginal import _invented_data  # noqa: E402

_LOG_2PI = float(np.log(2.0 * np.pi))

with __import__("warnings").catch_warnings():  # read once: a pip-installed PyTensor says it links no BLAS
    __import__("warnings").filterwarnings("ignore", message="PyTensor could not link to a BLAS")
    _ = pytensor.config.blas__ldflags


def _reference_logp(d, w, sg2_cell, prec, n_analytes, D, B):
    """The marginal density as the PyTensor graph the model used before the compiled operation
    (per cell Sigma_c^-1 = w I - h w^2 J; A, b, yy summed over cells; breed rows put back; solve
    and slogdet): differentiated by PyTensor."""
    from pytensor.tensor.linalg import slogdet, solve

    m, s1 = d["stat_m"], d["loc_s1"]
    uq = d["loc_uq"]
    uu = uq[:, :, None] * uq[:, None, :]
    hw2 = sg2_cell / (1.0 + sg2_cell * m * w) * w * w
    const = -0.5 * pt.sum(m * _LOG_2PI - m * pt.log(w) + pt.log1p(sg2_cell * m * w))
    mc = w[:, None, None] * d["loc_H"] - hw2[:, None, None] * uu
    bc = w[:, None] * d["loc_gq"] - (hw2 * s1)[:, None] * uq
    yy = pt.sum(w * d["loc_s2"] - hw2 * s1 * s1)
    onehot = (d["cell_analyte"][:, None] == np.arange(n_analytes)[None, :]).astype(float)
    aqq, bq = pt.tensordot(onehot, mc, axes=[[0], [0]]), pt.dot(onehot.T, bc)
    quad, logdet = 0.0, 0.0
    for a in range(n_analytes):
        amat, bvec = aqq[a], bq[a]
        if B:
            cab = np.zeros((len(m), B))
            rows = d["cell_analyte"] == a
            cab[np.flatnonzero(rows), d["cell_breed"][rows]] = 1.0
            ab, bb = pt.dot(cab.T * rows[None, :], mc[:, 0, :]), pt.dot(cab.T * rows[None, :], bc[:, 0])
            top = pt.concatenate([amat[0:1, 0:1], ab[:, 0][None, :], amat[0:1, 1:]], axis=1)
            mid = pt.concatenate([ab[:, 0:1], np.eye(B) * ab[:, 0][None, :], ab[:, 1:]], axis=1)
            bot = pt.concatenate([amat[1:, 0:1], ab[:, 1:].T, amat[1:, 1:]], axis=1)
            amat, bvec = pt.concatenate([top, mid, bot], axis=0), pt.concatenate([bvec[0:1], bb, bvec[1:]])
        mat = amat + np.eye(D) * prec[a][None, :]
        quad = quad + pt.dot(bvec, solve(mat, bvec, assume_a="pos"))
        logdet = logdet + slogdet(mat)[1]
    return const - 0.5 * (yy - quad) - 0.5 * logdet + 0.5 * pt.sum(pt.log(prec))


def _case(kind):
    """Data of the marginal form: the invented 2-analyte store of test_calibrate_marginal (3 breed
    levels, methods, replicates, age term), or one analyte of a simulated store of 60 animals."""
    pack = load_pack("dog")
    if kind == "invented":
        data = _invented_data(age=True)
        data.y = data.y.copy()
        # equal replicate counts within each animal hold there (the marginal form's condition)
    else:
        from bayesbase.calibrate.core import prepare, reference_methods, select_specimens
        from bayesbase.calibrate.simulate import BENCH_BREEDS, demo_truths, simulate_store

        an = ("creatinine",)
        frame, _ = simulate_store(seed=3, n_animals=60, n_specimens=3, analytes=an,
                                  truths=demo_truths(an, pack, seed=3), breed_counts=BENCH_BREEDS)
        sel = select_specimens(frame, "dog", pack, list(an))
        data = prepare(sel.usable, reference_methods(sel.usable, None))
    pri = M.prior_values(pack, data.analytes)
    return data, pri, M.model_values(data, pri, locations="marginal")


def _inputs(data, vals, rng):
    """Random scale values around plausible ones (log scale): z per cell, and per analyte ln CVI
    median, CVI spread, sigma_a, sigma_g^2, the prior precision P (analyte, D)."""
    A, C = len(data.analytes), len(vals["stat_m"])
    D = M.location_layout(data)["D"]
    return dict(z=rng.normal(0, 1, C), lm=np.log(rng.uniform(0.05, 0.2, A)), sp=rng.uniform(0.1, 0.5, A),
                sa=rng.uniform(0.01, 0.06, A), sg2=rng.uniform(0.01, 0.2, A), prec=rng.uniform(0.5, 40.0, (A, D)))


def _data_args(vals):
    return [vals[k] for k in ("stat_n_rep", "stat_m", "loc_H", "loc_uq", "loc_gq", "loc_s1", "loc_s2")] + [
        vals["cell_analyte"].astype(np.int64), vals["cell_breed"].astype(np.int64)]


def _symbolic(x):
    return {k: pt.as_tensor_variable(np.asarray(v, dtype=float)).type() for k, v in x.items()}


@pytest.mark.parametrize("kind", ["invented", "simulated"])
def test_value_and_gradient_match_pytensor_autodiff_of_the_reference_graph(kind):
    """Reference: PyTensor's gradient of the earlier graph (solve/slogdet differentiated
    automatically), with the same softplus CVI layer; rel 1e-9 at 5 random points (PyTensor's
    Python implementations, FAST_COMPILE: no C compile needed)."""
    mode = "FAST_COMPILE"
    data, pri, vals = _case(kind)
    lay = M.location_layout(data)
    sym = _symbolic(_inputs(data, vals, np.random.default_rng(0)))
    ca = vals["cell_analyte"]
    si2 = pt.softplus(2.0 * (sym["lm"][ca] + sym["sp"][ca] * sym["z"]))
    w = 1.0 / (si2 + sym["sa"][ca] ** 2 / vals["stat_n_rep"])
    ref = _reference_logp(vals, w, sym["sg2"][ca], sym["prec"], len(data.analytes), lay["D"], lay["B"])
    new = _locop.latent_marginal(*sym.values(), *_data_args(vals))[0]
    names = list(sym)
    f = pytensor.function(list(sym.values()), [ref, new] + pytensor.grad(ref, list(sym.values()))
                          + pytensor.grad(new, list(sym.values())), mode=mode)
    rng = np.random.default_rng(1)
    for _ in range(5):
        x = _inputs(data, vals, rng)
        out = f(*x.values())
        np.testing.assert_allclose(out[1], out[0], rtol=1e-9)
        for k, name in enumerate(names):
            g_ref, g_new = out[2 + k], out[2 + len(names) + k]
            np.testing.assert_allclose(g_new, g_ref, rtol=1e-9, atol=1e-9 * np.max(np.abs(g_ref)), err_msg=name)


def test_gradient_matches_central_finite_differences():
    """Numerical differentiation of the kernel's log density (central differences, h = 1e-6 on
    each input, rel 1e-6) against its closed-form gradient: independent of PyTensor."""
    data, pri, vals = _case("invented")
    x = _inputs(data, vals, np.random.default_rng(4))
    rest = _data_args(vals)
    out = _locop.latent_marginal_k(*x.values(), *rest)
    grads = dict(zip(x, out[3:]))
    for name, v in x.items():
        num = np.zeros_like(v)
        for idx in np.ndindex(v.shape):
            h = 1e-6 * max(1.0, abs(v[idx]))
            hi, lo = {k: a.copy() for k, a in x.items()}, {k: a.copy() for k, a in x.items()}
            hi[name][idx] += h
            lo[name][idx] -= h
            num[idx] = (float(_locop.latent_marginal_k(*hi.values(), *rest)[0])
                        - float(_locop.latent_marginal_k(*lo.values(), *rest)[0])) / (2 * h)
        np.testing.assert_allclose(grads[name], num, rtol=1e-6, atol=1e-6 * np.max(np.abs(num)), err_msg=name)


def test_wrong_gradient_would_be_caught():
    """The finite-difference check can fail: a gradient off by 1 % in one cell is outside its
    tolerance."""
    data, pri, vals = _case("invented")
    x = _inputs(data, vals, np.random.default_rng(4))
    rest = _data_args(vals)
    gz = _locop.latent_marginal_k(*x.values(), *rest)[3].copy()
    h = 1e-6
    hi, lo = {k: a.copy() for k, a in x.items()}, {k: a.copy() for k, a in x.items()}
    hi["z"][2] += h
    lo["z"][2] -= h
    num = (float(_locop.latent_marginal_k(*hi.values(), *rest)[0])
           - float(_locop.latent_marginal_k(*lo.values(), *rest)[0])) / (2 * h)
    assert abs(gz[2] - num) < 1e-6 * max(1.0, abs(num))
    assert abs(1.01 * gz[2] - num) > 1e-6 * max(1.0, abs(num))


def test_model_gradient_matches_finite_differences_of_the_model_density():
    """The whole marginal model (PyMC's logp and dlogp on the unconstrained values) against central
    differences of its own logp: the operation's gradient reaches every free parameter."""
    data, pri, _ = _case("simulated")
    model = M.build_model(data, pri, locations="marginal")
    logp, dlogp = model.compile_logp(), model.compile_dlogp()
    rng = np.random.default_rng(5)
    point = {k: np.asarray(v) + rng.normal(0, 0.3, np.shape(v)) for k, v in model.initial_point().items()}
    g = dlogp(point)
    flat, k = [], 0
    for v in model.value_vars:
        for idx in np.ndindex(np.shape(point[v.name])):
            h = 1e-6
            hi, lo = {n: a.copy() for n, a in point.items()}, {n: a.copy() for n, a in point.items()}
            hi[v.name][idx] += h
            lo[v.name][idx] -= h
            flat.append((logp(hi) - logp(lo)) / (2 * h))
            k += 1
    np.testing.assert_allclose(g, np.array(flat), rtol=1e-5, atol=1e-5 * np.max(np.abs(flat)))


@pytest.mark.parametrize("mode", ["FAST_RUN", "NUMBA"])
def test_backends_give_the_kernel_outputs(mode):
    """PyMC's own sampler runs the operation through its perform (C backend), nutpie through the
    numba dispatch: both give the kernel's outputs and gradients, to 1e-12 (of the largest entry)."""
    data, pri, vals = _case("invented")
    x = _inputs(data, vals, np.random.default_rng(2))
    sym = _symbolic(x)
    out = _locop.latent_marginal(*sym.values(), *_data_args(vals))
    f = pytensor.function(list(sym.values()), [out[0], out[1], out[2]] + pytensor.grad(out[0], list(sym.values())),
                          mode=mode)
    got = f(*x.values())
    want = _locop.latent_marginal_k(*x.values(), *_data_args(vals))
    for g, w in zip(got, want[:3] + want[3:]):
        np.testing.assert_allclose(g, w, rtol=1e-12, atol=1e-12 * np.max(np.abs(w)))


def test_cholesky_and_inverse_match_numpy():
    """The written-out Cholesky factor, mean and (A + P)^-1 against numpy.linalg (rel 1e-12) on a
    random positive definite 12 x 12 system; a matrix that is not positive definite gives NaN."""
    rng = np.random.default_rng(6)
    g = rng.normal(size=(12, 30))
    amat, bvec, prec = (g @ g.T)[None], rng.normal(size=(1, 12)), rng.uniform(0.5, 5, (1, 12))
    chol, mean, q, part = _locop._solve(amat, bvec, prec)
    mat = amat[0] + np.diag(prec[0])
    np.testing.assert_allclose(chol[0], np.linalg.cholesky(mat), rtol=1e-12, atol=1e-12)
    mu = np.linalg.solve(mat, bvec[0])
    np.testing.assert_allclose(mean[0], mu, rtol=1e-12)
    np.testing.assert_allclose(q[0], np.outer(mu, mu) + np.linalg.inv(mat), rtol=1e-10, atol=1e-14)
    want = bvec[0] @ mu - np.linalg.slogdet(mat)[1] + np.log(prec[0]).sum()
    assert part == pytest.approx(want, rel=1e-12)
    assert np.isnan(_locop._solve(-amat, bvec, prec)[3])


def test_cell_constants_match_numpy_for_every_specimen_count():
    """The first pass's constant (one logarithm per cell while m <= 8, two beyond) against the
    formula written with numpy: -0.5 sum(m ln 2pi - m ln w + ln(1 + s m w) + w s2 - t s1^2), t = s
    w^2 / (1 + s m w), for m = 0 (a padded cell) to 40 and w from 1e-2 to 1e5 (rel 1e-12)."""
    rng = np.random.default_rng(8)
    m = np.array([0, 1, 2, 4, 8, 9, 12, 40] * 4, dtype=float)
    C = len(m)
    w = 10.0 ** rng.uniform(-2, 5, C)
    s1, s2 = rng.normal(0, 1, C) * m, rng.uniform(0, 3, C) * m
    uq, gq, H = np.zeros((C, 1)), np.zeros((C, 1)), np.zeros((C, 1, 1))
    ca, br, sg2 = np.zeros(C, dtype=np.int64), np.zeros(C, dtype=np.int64), np.array([0.05])
    _, _, tot, _ = _locop._accumulate(w, 1.0 / w, sg2, m, H, uq, gq, s1, s2, ca, br, 1, 1)
    t = sg2[0] * w * w / (1 + sg2[0] * m * w)
    want = -0.5 * np.sum(m * _LOG_2PI - m * np.log(w) + np.log1p(sg2[0] * m * w) + w * s2 - t * s1 * s1)
    assert tot == pytest.approx(want, rel=1e-12)
