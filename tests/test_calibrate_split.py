"""The calibration model fitted one analyte at a time (bayesbase.calibrate.split).

The joint density factorises over analytes (no shared parameter), so the per-analyte graphs
must add up to the joint graph's log density exactly, padding must add only the standard
normal priors of the padded parameters (scipy.stats.norm.logpdf), and a per-analyte fit must
agree with the joint fit within Monte Carlo error (ArviZ's MCSE) with the same variables, dims
and coords. The joint density itself is checked against scipy in tests/test_calibrate.py."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from bayesbase.calibrate import model as M
from bayesbase.calibrate import split as S
from bayesbase.calibrate.core import prepare, reference_methods, select_specimens
from bayesbase.calibrate.simulate import demo_truths, simulate_store
from bayesbase.priors import load_pack


def _store(n_animals=24, seed=3, drop=True):
    """Three analytes; the last loses a third of its animals (unequal cells) and its second method."""
    pack = load_pack("dog")
    an = tuple(list(pack.analytes)[:3])
    frame, _ = simulate_store(seed=seed, n_animals=n_animals, analytes=an, truths=demo_truths(an, pack, seed=seed))
    if drop:
        last = frame["analyte"] == an[-1]
        animals = sorted(frame["patient"].unique())[: n_animals // 3]
        ref = frame.loc[last, "method"].mode()[0]
        frame = frame[~(last & (frame["patient"].isin(animals) | (frame["method"] != ref)))]
    sel = select_specimens(frame, "dog", pack, list(an))
    data = prepare(sel.usable, reference_methods(sel.usable))
    return frame, pack, data, M.prior_values(pack, data.analytes)


def _part_point(data, point, i, names):
    """The joint point's values of analyte i for a part's free variables."""
    a = data.analytes[i]
    k_of = [k for k, (ma, _) in enumerate(data.bias_pairs) if ma == a]
    out = {}
    for k in names:
        v = np.asarray(point[k])
        if k.startswith("cvi_z"):
            v = v[data.cell_analyte == i]
        elif k.startswith("method_log_bias"):
            v = v[k_of]
        else:
            v = v[i:i + 1]
        out[k] = v
    return out


def test_parts_add_up_to_the_joint_density_and_padding_adds_standard_normals():
    _, _, data, pri = _store()
    parts = [S.analyte_part(data, i) for i in range(len(data.analytes))]
    assert sorted(len(p.cell_analyte) for p in parts) == [16, 24, 24]
    assert sorted(len(p.bias_pairs) for p in parts) == [0, 1, 1]
    joint = M.build_model(data, pri)
    rng = np.random.default_rng(0)
    point = {k: v + rng.normal(0.0, 0.2, np.shape(v)) for k, v in joint.initial_point().items()}
    total = 0.0
    pad = {"cell": 24, "method_level": 1, "breed_pair": max(len(p.breed_pairs) for p in parts)}
    for i, part in enumerate(parts):
        pri_i = {k: v[i:i + 1] for k, v in pri.items()}
        m = M.build_model(part, pri_i)
        q = _part_point(data, point, i, m.initial_point())
        lp = float(m.compile_logp()(q))
        # padded: the padded cells' cvi_z and padded method levels at 0 add log N(0; 0, 1) each
        mp = M.build_model(part, pri_i, pad=pad)
        qp = {k: v for k, v in q.items()}
        n_cell, n_meth = 24 - len(part.cell_analyte), 1 - len(part.bias_pairs)
        qp["cvi_z"] = np.concatenate([q["cvi_z"], np.zeros(n_cell)])
        if n_meth:
            qp["method_log_bias"] = np.zeros(n_meth)
            qp["method_sd_log__"] = np.asarray(point["method_sd_log__"])[i:i + 1]
            # the analyte without a second method: its method_sd is a prior-only parameter
            extra = float(scipy.stats.gamma.logpdf(np.exp(qp["method_sd_log__"][0]), M.SD_GAMMA_SHAPE,
                                                   scale=M.METHOD_SD_SCALE / M.SD_GAMMA_SHAPE)
                          + qp["method_sd_log__"][0])  # + log-Jacobian of the log transform
        else:
            extra = 0.0
        lpp = float(mp.compile_logp()(qp))
        assert lpp - lp == pytest.approx((n_cell + n_meth) * scipy.stats.norm.logpdf(0.0) + extra, abs=1e-8)
        total += lp + extra  # the joint graph carries every analyte's method_sd
    assert total == pytest.approx(float(joint.compile_logp()(point)), abs=1e-8)


@pytest.mark.slow
def test_per_analyte_fit_agrees_with_the_joint_fit():
    from bayesbase.calibrate.job import calibrate
    import arviz as az

    frame, pack, _, _ = _store(n_animals=30, seed=5)
    kw = dict(species="dog", draws=500, tune=500, chains=2, seed=2, cores=1)
    joint = calibrate(frame, fit_form="joint", **kw)
    per = calibrate(frame, fit_form="auto", **kw)
    assert per.attrs["fit_form"] == "per analyte" and joint.attrs["fit_form"] == "joint"
    # (so small a run need not pass the gate: the point is that both forms sample the same posterior)
    assert per.diagnostics["divergences"] == int(per.idata.sample_stats["diverging"].values.sum())
    pj, pp = joint.idata.posterior, per.idata.posterior
    assert set(pj.data_vars) == set(pp.data_vars)
    for name in pj.data_vars:
        assert pj[name].dims == pp[name].dims and pj[name].shape == pp[name].shape, name
        for d in pj[name].dims:
            assert list(pj[name][d].values) == list(pp[name][d].values), (name, d)
    # posterior means within Monte Carlo error (ArviZ MCSE of each fit), 4.5 combined SEs
    for name in ("center", "cvg", "cvi", "cvi_log_sd", "breed_center_all", "method_bias"):
        mj, mp = pj[name].mean(("chain", "draw")).values, pp[name].mean(("chain", "draw")).values
        se = np.sqrt(az.mcse(pj[[name]])[name].values ** 2 + az.mcse(pp[[name]])[name].values ** 2)
        assert np.all(np.abs(mj - mp) <= 4.5 * se), (name, mj, mp, se)
    assert list(per.table.columns) == list(joint.table.columns)
    assert per.table[["analyte", "parameter", "group"]].equals(joint.table[["analyte", "parameter", "group"]])


@pytest.mark.slow
def test_per_analyte_fit_with_nutpie_compiles_once_per_structure():
    pytest.importorskip("nutpie")
    _, _, data, pri = _store(n_animals=24, seed=7)
    idata, diag, settings = S.fit_split(data, pri, draws=300, tune=300, chains=2, seed=1, sampler="nutpie", cores=1)
    assert settings["fit_form"] == "per analyte" and settings["compiled_graphs"] == 1
    assert idata.posterior["cvi_z"].shape[-1] == len(data.cell_analyte)
    assert idata.sample_stats["diverging"].dims == ("chain", "draw", "analyte")
    assert diag["divergences"] == int(idata.sample_stats["diverging"].values.sum())
    assert np.isfinite(diag["max_r_hat"])


def test_unequal_replicates_fall_back_to_the_joint_graph():
    _, _, data, _ = _store(drop=False)
    assert S.applies(data)
    assert not S.applies(data, likelihood="specimens")
    data.n_rep = data.n_rep.copy()
    data.n_rep[0] = 2.0  # one specimen with two replicates: the animal's specimens differ
    assert not S.applies(data)


def test_quadrature_parts_add_up_to_the_joint_density():
    """The CVI integrated out (``cvi="quadrature"``): a part's graph broadcasts the analyte's
    parameters instead of indexing them, and a padded cell (no specimen, plain nodes whose
    weights sum to 1) adds log 1 = 0, so the padded parts add up to the joint density."""
    _, _, data, pri = _store(drop=False)
    parts = [S.analyte_part(data, i) for i in range(len(data.analytes))]
    joint = M.build_model(data, pri, cvi="quadrature", nodes=8)
    rng = np.random.default_rng(2)
    point = {k: v + rng.normal(0.0, 0.2, np.shape(v)) for k, v in joint.initial_point().items()}
    pad = {"cell": max(len(p.cell_analyte) for p in parts) + 2, "method_level": 1,
           "breed_pair": max(len(p.breed_pairs) for p in parts)}
    total = 0.0
    for i, part in enumerate(parts):
        m = M.build_model(part, {k: v[i:i + 1] for k, v in pri.items()}, cvi="quadrature", nodes=8, pad=pad)
        total += float(m.compile_logp()(_part_point(data, point, i, m.initial_point())))
    assert total == pytest.approx(float(joint.compile_logp()(point)), abs=1e-8)
