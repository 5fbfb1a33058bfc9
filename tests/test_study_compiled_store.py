"""study.bayes keeps its built models and their compiled pieces in one
``bayesbase.mcmc.compiled.CompiledStore`` (``_KEPT``), one per (robust, animals, specimens),
shared by PyMC's and nutpie's samplers. A fit of a kept shape must draw exactly what the same
fit draws with the sampler's own fresh compile (references: ``pymc.sample`` building its own
start, step and trace; ``nutpie.compile_pymc_model`` on a freshly built model), bit for bit.
The studies are invented (``simulate_study``)."""
from __future__ import annotations

import numpy as np
import pytest

from bayesbase.study import bayes


def _frames(n_animals=6, n_specimens=4):
    rng = np.random.default_rng(20261204)
    return [bayes.simulate_study(rng, n_animals=n_animals, n_specimens=n_specimens,
                                 n_replicates=2, cvi=c)[0] for c in (0.06, 0.15)]


def _assert_same_draws(a, b):
    pa, pb = a.idata.posterior, b.idata.posterior
    assert sorted(pa.data_vars) == sorted(pb.data_vars)
    for name in pa.data_vars:
        np.testing.assert_array_equal(pa[name].values, pb[name].values, err_msg=name)


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["pymc", "nutpie"])
@pytest.mark.parametrize("robust", [False, True])
def test_kept_model_draws_what_a_fresh_build_draws(sampler, robust):
    """Second analyte of a kept shape against a freshly built model of that analyte
    (``reuse_model=False``). PyMC: start, step and trace compiled once, the data swapped in,
    against ``pymc.sample``'s own compile. nutpie: its compile kept for the shape, the second
    analyte's data swapped in (and set on the PyMC model, whose containers nutpie's initial point
    reads), against nutpie's compile of the fresh model; skipped without nutpie."""
    if sampler == "nutpie":
        pytest.importorskip("nutpie")
    a, b = _frames()
    kw = dict(draws=40, tune=40, chains=2, cores=1, seed=5, robust=robust, sampler=sampler)
    bayes.fit_bayes(a, **kw)
    kept = bayes.fit_bayes(b, **kw)
    fresh = bayes.fit_bayes(b, reuse_model=False, **kw)
    assert kept.settings["model_reused"] and not fresh.settings["model_reused"]
    _assert_same_draws(kept, fresh)


@pytest.mark.slow
def test_one_kept_model_per_shape_serves_both_samplers():
    """One store entry per (robust, animals, specimens), built once and shared by the two
    samplers; ``reuse_model=False`` keeps nothing."""
    pytest.importorskip("nutpie")
    a, _ = _frames(n_animals=5, n_specimens=3)
    key = (False, 5, 15)  # 5 animals x 3 specimens each
    bayes._KEPT.clear()
    kw = dict(draws=10, tune=10, chains=1, cores=1, seed=1)
    bayes.fit_bayes(a, reuse_model=False, **kw)
    assert len(bayes._KEPT) == 0
    bayes.fit_bayes(a, sampler="pymc", **kw)
    assert bayes._KEPT.keys() == [key]
    model = bayes._KEPT.entry(key, lambda: pytest.fail("rebuilt")).model
    fit = bayes.fit_bayes(a, sampler="nutpie", **kw)
    assert not fit.settings["model_reused"]  # nutpie compiles once for the shape...
    assert bayes._KEPT.keys() == [key] and bayes._KEPT.entry(key, None).model is model
    assert bayes.fit_bayes(a, sampler="nutpie", **kw).settings["model_reused"]  # ...then reuses
