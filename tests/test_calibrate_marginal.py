"""The calibration model with its location parameters (mu, breed offsets, method biases, age
slope) integrated out exactly (``locations="marginal"``, bayesbase.calibrate.model).

Outside references: scipy.stats.multivariate_normal for the density of the stacked specimen
means with the locations integrated out (a normal with covariance blockdiag(Sigma_c) + X P^-1 X'),
numpy.linalg.solve for the conditional mean and covariance of the locations, and the sampled
form of the same model (whose posterior the marginal one must reproduce, slow tier).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from bayesbase.calibrate.core import UNKNOWN_BREED, CalibrationData
from bayesbase.priors import load_pack

ANALYTES = ["creatinine", "alt"]
BREEDS = ["beagle", "collie", UNKNOWN_BREED]
# invented layout: per analyte, per animal (breed, specimens, replicates per specimen, methods)
_METHODS = {"creatinine": ["M1", "M2"], "alt": ["M1"]}  # non-reference methods; "R" is the reference


def _invented_data(age: bool) -> CalibrationData:
    """8 animals, 3 breed levels (one unknown), 2 analytes; creatinine: 2 non-reference methods,
    replicates in some animals (equal within an animal), 1-4 specimens, optional age term; alt:
    1 non-reference method, no replicates. Values invented (seeded)."""
    rng = np.random.default_rng(7)
    bias_pairs = [(a, m) for a in ANALYTES for m in _METHODS[a]]
    breed_pairs = [(a, b) for a in ANALYTES for b in BREEDS]
    y, n_rep, oc, ob, ca, cb, animal, ax = [], [], [], [], [], [], [], []
    for ai, a in enumerate(ANALYTES):
        for i in range(8):
            c = len(ca)
            ca.append(ai)
            cb.append(breed_pairs.index((a, BREEDS[i % 3])))
            animal.append(f"dog{i}")
            reps = 2 if (a == "creatinine" and i % 2) else 1
            m = 1 + (3 * i + ai) % 4  # 1-4 specimens, unequal across animals
            for j in range(m):
                meth = ["R", *_METHODS[a]][(i + j) % (1 + len(_METHODS[a]))]
                ob.append(bias_pairs.index((a, meth)) if meth != "R" else len(bias_pairs))
                oc.append(c)
                n_rep.append(reps)
                y.append((4.5 if a == "creatinine" else 3.6) + rng.normal(0, 0.25))
                ax.append(rng.normal(0, 3.0) if (age and a == "creatinine") else 0.0)
    return CalibrationData(
        analytes=list(ANALYTES), y=np.array(y), n_rep=np.array(n_rep, float), obs_cell=np.array(oc),
        obs_bias=np.array(ob), cell_analyte=np.array(ca), cell_breed=np.array(cb), cell_animal=animal,
        breed_pairs=breed_pairs, bias_pairs=bias_pairs, reference={a: "R" for a in ANALYTES},
        ss_within=np.array([0.04, 0.0]), df_within=np.array([6.0, 0.0]), log_n_rep=np.array([4 * math.log(2), 0.0]),
        age_analytes=["creatinine"] if age else [], age_x=np.array(ax) if age else None,
        age_ref={"creatinine": 6.0} if age else {})


def _point(model, seed):
    rng = np.random.default_rng(seed)
    return {k: np.asarray(v) + rng.normal(0, 0.4, np.shape(v)) for k, v in model.initial_point().items()}


def _at(model, names, point):
    outs = model.replace_rvs_by_values([model[n] for n in names])
    return model.compile_fn(outs, inputs=model.value_vars, point_fn=True, on_unused_input="ignore")(point)


def _dense_system(data, pri, point, a):
    """Analyte ``a``: the stacked specimen means y, design X, covariance blockdiag(Sigma_c), prior
    mean m0 and diagonal prior precision P at the free values ``point`` (written out directly)."""
    from scipy.linalg import block_diag

    ai = data.analytes.index(a)
    sg = np.exp(point["sigma_g_log__"][ai])
    sa = math.sqrt(math.log1p(load_pack("dog").analytes[a].cva ** 2))
    if a == "creatinine":
        sa = np.exp(point["sigma_a_log__"][0])
    meths = [k for k, (ma, _) in enumerate(data.bias_pairs) if ma == a]
    age = a in data.age_analytes
    rows, ys, blocks = [], [], []
    for c in np.flatnonzero(data.cell_analyte == ai):
        obs = np.flatnonzero(data.obs_cell == c)
        cvi = np.exp(point["ln_cvi_median"][ai] + np.exp(point["cvi_log_sd_log__"][ai]) * point["cvi_z"][c])
        v = np.log1p(cvi**2) + sa**2 / data.n_rep[obs]
        blocks.append(np.diag(v) + sg**2)
        for j in obs:
            x = [1.0] + [float(data.breed_pairs[data.cell_breed[c]][1] == b) for b in sorted(BREEDS)]  # model order
            x += [float(data.obs_bias[j] == k) for k in meths] + ([data.age_x[j]] if age else [])
            rows.append(x)
            ys.append(data.y[j])
    prec = ([1 / pri["mu_sd"][ai] ** 2] + [1 / np.exp(point["breed_sd_log__"][ai]) ** 2] * len(BREEDS)
            + [1 / np.exp(point["method_sd_log__"][ai]) ** 2] * len(meths)
            + ([(5.0 / pri["sg"][ai]) ** 2] if age else []))  # AGE_SLOPE_YEARS = 5 (model constant)
    m0 = np.zeros(len(prec))
    m0[0] = pri["mu_loc"][ai]
    return np.array(ys), np.array(rows), block_diag(*blocks), m0, np.diag(prec)


@pytest.mark.parametrize("age", [False, True])
def test_marginal_density_matches_scipy_multivariate_normal(age):
    """The potential of the marginal form at random scale values equals, per analyte, scipy's
    multivariate normal log density of all its specimen means with mean X m0 and covariance
    blockdiag(Sigma_c) + X P^-1 X' (outside reference: scipy.stats.multivariate_normal); the same
    for a one-analyte part padded with empty cells, method slots and breed pairs (padding adds
    exactly nothing); a wrong breed SD breaks the agreement (the check can fail)."""
    from scipy import stats

    from bayesbase.calibrate import model as M
    from bayesbase.calibrate.split import analyte_part

    data = _invented_data(age)
    pri = M.prior_values(load_pack("dog"), data.analytes)
    model = M.build_model(data, pri, locations="marginal")
    assert "mu" not in model.named_vars and "breed_raw" not in model.named_vars
    point = _point(model, 3)
    got = float(_at(model, ["specimen_means"], point)[0])
    want = {}
    for a in ANALYTES:
        y, X, S, m0, P = _dense_system(data, pri, point, a)
        want[a] = stats.multivariate_normal(X @ m0, S + X @ np.linalg.inv(P) @ X.T).logpdf(y)
    assert got == pytest.approx(sum(want.values()), rel=1e-10, abs=1e-9)

    for i, a in enumerate(ANALYTES):  # the per-analyte part of bayesbase.calibrate.split, padded
        part = analyte_part(data, i)
        pad = {"cell": len(part.cell_analyte) + 3, "method_level": len(part.bias_pairs) + 2,
               "breed_pair": len(part.breed_pairs) + 1}
        pm_part = M.build_model(part, {k: v[i:i + 1] for k, v in pri.items()}, locations="marginal", pad=pad)
        sub = {k: np.atleast_1d(point[k])[[i]] for k in point if k not in ("cvi_z", "sigma_a_log__")}
        sub["cvi_z"] = np.concatenate([point["cvi_z"][data.cell_analyte == i], [0.3, -1.0, 2.0]])
        if a == "creatinine":
            sub["sigma_a_log__"] = point["sigma_a_log__"]
        assert float(_at(pm_part, ["specimen_means"], sub)[0]) == pytest.approx(want[a], rel=1e-10, abs=1e-9)

    wrong = dict(point, breed_sd_log__=point["breed_sd_log__"] + 0.2)
    assert abs(float(_at(model, ["specimen_means"], wrong)[0]) - got) > 1e-3


def test_conditional_locations_match_numpy_solve():
    """The conditional of the locations given the scales, N((A+P)^-1 (b + P m0), (A+P)^-1), from
    the graph's ``loc_mean`` and ``loc_chol`` equals numpy.linalg.solve of the dense system
    X' S^-1 X + P, X' S^-1 y + P m0 (outside reference: numpy.linalg); and the draws that
    ``draw_locations`` makes from it (mu, breed_offset, method_log_bias, age_log_slope, 40,000
    seeded draws) have that mean and covariance within Monte Carlo error."""
    import arviz as az
    import xarray as xr

    from bayesbase.calibrate import model as M

    data = _invented_data(True)
    pri = M.prior_values(load_pack("dog"), data.analytes)
    model = M.build_model(data, pri, locations="marginal")
    point = _point(model, 5)
    mean, chol = _at(model, ["loc_mean", "loc_chol"], point)
    n = 40_000
    post = xr.Dataset({"loc_mean": (("chain", "draw", "a", "d"), np.broadcast_to(mean, (1, n) + mean.shape)),
                       "loc_chol": (("chain", "draw", "a", "d", "e"), np.broadcast_to(chol, (1, n) + chol.shape))},
                      coords={"chain": [0], "draw": np.arange(n)})
    idata = M.draw_locations(az.InferenceData(posterior=post), M.model_values(data, pri, locations="marginal"),
                             data, {k: list(v) for k, v in model.coords.items()}, seed=11)
    p = idata.posterior
    for ai, a in enumerate(ANALYTES):
        y, X, S, m0, P = _dense_system(data, pri, point, a)
        Si = np.linalg.inv(S)
        prec = X.T @ Si @ X + P
        want_mean = np.linalg.solve(prec, X.T @ Si @ y + P @ m0)
        want_cov = np.linalg.solve(prec, np.eye(len(prec)))
        D = len(want_mean)
        got_mean = mean[ai, :D] + np.eye(D)[0] * pri["mu_loc"][ai]
        np.testing.assert_allclose(got_mean, want_mean, rtol=1e-9, atol=1e-10)
        L = chol[ai]
        got_cov = np.linalg.inv(L @ L.T)
        # slots past D (alt has one method slot and no age slot fewer) are prior-only, unit precision
        np.testing.assert_allclose(got_cov[:D, :D], want_cov, rtol=1e-8, atol=1e-12)
        meths = [k for k, (ma, _) in enumerate(data.bias_pairs) if ma == a]
        draws = [p["mu"].values[0, :, ai]] + [p["breed_offset"].values[0, :, ai, b] for b in range(len(BREEDS))]
        draws += [p["method_log_bias"].values[0, :, k] for k in meths]
        if a in data.age_analytes:
            draws.append(p["age_log_slope"].values[0, :, 0])
        draws = np.array(draws)
        se = np.sqrt(np.diag(want_cov) / n)
        assert np.all(np.abs(draws.mean(axis=1) - want_mean) < 5 * se)
        emp = np.cov(draws)
        # SE of a sample covariance entry ~ sqrt((s_ii s_jj + s_ij^2) / n)
        tol = 5 * np.sqrt((np.outer(np.diag(want_cov), np.diag(want_cov)) + want_cov**2) / n)
        assert np.all(np.abs(emp - want_cov) < tol)
    assert np.allclose(p["center"].values, np.exp(p["mu"].values))
    assert "loc_mean" not in p and "loc_chol" not in p


def test_marginal_form_is_refused_where_it_is_not_exact():
    """With the CVI integrated out by quadrature a cell's density is a mixture of normals (the
    locations do not integrate out in closed form): refused, as is the per-specimen likelihood;
    ``auto`` falls back to the sampled form there."""
    from bayesbase.calibrate import model as M

    data = _invented_data(False)
    with pytest.raises(ValueError, match="latent"):
        M.locations_used(data, cvi="quadrature", locations="marginal")
    with pytest.raises(ValueError, match="sufficient statistics"):
        M.locations_used(data, likelihood="specimens", locations="marginal")
    assert M.locations_used(data, cvi="quadrature", locations="auto") == "sampled"
    assert M.locations_used(data, locations="auto") == "marginal"
    with pytest.raises(ValueError, match="locations must be"):
        M.locations_used(data, locations="integrated")


@pytest.mark.slow
def test_marginal_and_sampled_forms_agree_on_a_simulated_store():
    """Both forms sample the same posterior (the marginal one integrates the locations out and
    draws them back exactly): on an invented store (30 dogs, 3 breeds, 2 methods, creatinine;
    PyMC's NUTS, 2 x 1000 draws each) every scale and location parameter's posterior mean agrees
    within 4 combined Monte Carlo standard errors (outside reference: arviz.mcse of the sampled
    form's own draws) and its posterior SD within 15 % (an SD's MC error at ESS >= 200 is about 5 %)."""
    import arviz as az

    from bayesbase.calibrate.job import calibrate
    from bayesbase.calibrate.simulate import simulate_store

    frame, _ = simulate_store(seed=3, n_animals=30, n_specimens=4, analytes=("creatinine",))
    fits = {loc: calibrate(frame, species="dog", draws=1000, tune=1000, chains=2, cores=1, seed=5, sampler="pymc",
                           locations=loc) for loc in ("sampled", "marginal")}
    assert fits["marginal"].idata.posterior.attrs["locations"] == "marginal"
    names = ["mu", "sigma_g", "ln_cvi_median", "cvi_log_sd", "breed_sd", "method_sd", "breed_offset",
             "method_log_bias", "breed_center_all"]
    checked = 0
    for n in names:
        post = {k: f.idata.posterior[n] for k, f in fits.items()}
        mean = {k: p.mean(("chain", "draw")).values.ravel() for k, p in post.items()}
        sd = {k: p.std(("chain", "draw")).values.ravel() for k, p in post.items()}
        se = {k: az.mcse(f.idata.posterior[[n]], method="mean")[n].values.ravel() for k, f in fits.items()}
        tol = 4 * np.sqrt(se["sampled"] ** 2 + se["marginal"] ** 2)
        assert np.all(np.abs(mean["marginal"] - mean["sampled"]) < tol), n
        np.testing.assert_allclose(sd["marginal"], sd["sampled"], rtol=0.15, err_msg=n)
        checked += mean["sampled"].size
    assert checked >= 12
