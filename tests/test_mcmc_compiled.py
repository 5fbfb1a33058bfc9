"""bayesbase.mcmc.compiled: the one store of built PyMC models and their compiled pieces.

Outside references named beside each check:
* a plain Python dict: without a bound the store keeps what ``dict.setdefault`` keeps (the same
  keys in the same order, one build per key, the same object for a key); with a bound it keeps
  what the first-in-first-out rule written out on a plain dict keeps (the rule
  ``bayesbase.calibrate.split`` kept by hand before the store);
* ``scipy.stats.norm.logpdf`` and the normal model's gradient written out: the compiled log
  density and gradient kept under each shape evaluate the density of their own data;
* PyMC's own sampler (slow tier): :func:`nuts_start` and :func:`kept_trace` given to
  ``pymc.sample`` draw what ``pymc.sample(random_seed=seed)`` draws with its own compile.
"""
from __future__ import annotations

import copy
import itertools

import numpy as np
import pytest
import scipy.stats

from bayesbase.mcmc.compiled import CompiledStore, KeptModel


def _counter():
    """A build function returning a new object each call, and the list of what it built."""
    built = []

    def build():
        built.append(object())
        return built[-1]

    return build, built


def _keys(seed: int, n: int = 200) -> list:
    """Seeded keys shaped like the project's: (structure flags, patients, analytes)."""
    rng = np.random.default_rng(seed)
    return [(bool(a), int(p), int(q)) for a, p, q in zip(rng.integers(0, 2, n), rng.integers(1, 4, n),
                                                         rng.integers(1, 4, n))]


def _reference(keys, max_entries):
    """A plain dict with the first-in-first-out bound: per key, (the kept keys in order, the index
    of the build that made the key's model), and the keys in the order they were built."""
    kept, order, states = {}, [], []
    for k in keys:
        if k not in kept:
            kept[k] = len(order)
            order.append(k)
            while max_entries is not None and len(kept) > max_entries:
                kept.pop(next(iter(kept)))
        states.append((list(kept), kept[k]))
    return states, order


@pytest.mark.parametrize("max_entries", [None, 1, 2, 4, 7])
def test_store_keeps_what_a_plain_dict_keeps(max_entries):
    """Same keys, same order, the same object for a key while it is kept, one build per miss,
    never more than the bound (reference: ``_reference``; None: ``dict.setdefault``)."""
    keys = _keys(seed=20261204)
    assert len(set(keys)) == 18  # 2 x 3 x 3 distinct keys, each met many times
    store = CompiledStore(max_entries)
    build, built = _counter()
    want, order = _reference(keys, max_entries)
    plain: dict = {}
    for k, (kept_keys, n_build) in zip(keys, want):
        entry = store.entry(k, build)
        assert isinstance(entry, KeptModel) and entry.model is built[n_build]
        assert store.keys() == kept_keys and len(store) == len(kept_keys) and k in store
        if max_entries is None:
            assert entry is plain.setdefault(k, entry)  # the same object for a key, ever
        else:
            assert len(store) <= max_entries
    assert len(built) == len(order)
    if max_entries is None:
        assert store.keys() == list(plain) and len(built) == 18


def test_a_hit_does_not_refresh_a_key():
    """First in, first out: a, b, a, c with room for 2 keeps b and c (a least-recently-used
    rule would keep a and c; the reference rule tells them apart)."""
    store = CompiledStore(2)
    build, built = _counter()
    a = store.entry("a", build)
    store.entry("b", build)
    assert store.entry("a", build) is a and len(built) == 2
    store.entry("c", build)
    assert store.keys() == ["b", "c"] == _reference(["a", "b", "a", "c"], 2)[0][-1][0]
    assert "a" not in store
    assert store.entry("a", build) is not a and len(built) == 4  # built again once dropped
    store.clear()
    assert len(store) == 0 and store.keys() == []


@pytest.mark.parametrize("bad", [0, -1])
def test_a_bound_below_one_is_refused(bad):
    with pytest.raises(ValueError, match="max_entries"):
        CompiledStore(bad)


def test_kept_model_makes_each_piece_once_per_name():
    kept = KeptModel("model")
    calls = itertools.count()
    first = kept.get(("fit", (2, 3)), lambda: (next(calls), "piece"))
    assert kept.get(("fit", (2, 3)), lambda: (next(calls), "other")) is first
    other = kept.get(("fit", (3, 2)), lambda: (next(calls), "piece"))
    assert other is not first and next(calls) == 2  # two names, two makes
    shared: dict = {}
    KeptModel("model", shared).get("x", lambda: 1)
    assert shared == {"x": 1}  # an existing dict holds the pieces


# ---------------------------------------------------------------- compiled pieces of a PyMC model
def _normal_model(m0, y, idx):
    """mu[p] ~ N(m0[p], 1), y[i] ~ N(mu[idx[i]], 1): every value in a pm.Data container."""
    import pymc as pm

    import bayesbase.mcmc.engine  # noqa: F401  (reads PyTensor's BLAS flag once, its notice silenced)

    with pm.Model(coords={"patient": np.arange(len(m0))}) as model:
        m0_ = pm.Data("m0", m0, dims="patient")
        y_ = pm.Data("y", y)
        idx_ = pm.Data("idx", idx)
        mu = pm.Normal("mu", m0_, 1.0, dims="patient")
        pm.Normal("obs", mu[idx_], 1.0, observed=y_)
    return model


def _density(mu, m0, y, idx):
    """The normal model's log density (scipy.stats.norm.logpdf) and its gradient in mu."""
    lp = scipy.stats.norm.logpdf(mu, m0, 1.0).sum() + scipy.stats.norm.logpdf(y, mu[idx], 1.0).sum()
    grad = -(mu - m0) + np.bincount(idx, weights=y - mu[idx], minlength=len(mu))
    return lp, grad


def test_compiled_pieces_of_different_shapes_do_not_collide():
    """One model refilled with 2 then 3 patients (``pm.set_data`` with coords): the log density
    and gradient kept under each shape is compiled once, is its own object, and evaluates the
    density of data of its shape (reference: scipy.stats.norm.logpdf, gradient written out)."""
    import pymc as pm

    from bayesbase.mcmc.compiled import initial_point_fn, logp_dlogp

    two = (np.array([0.0, 1.0]), np.array([0.5, -0.2, 1.0]), np.array([0, 1, 1]))
    three = (np.array([0.0, 1.0, 2.0]), np.array([0.5, -0.2, 1.0, 2.0]), np.array([0, 1, 2, 2]))
    kept = KeptModel(_normal_model(*two))

    def refill(data):
        pm.set_data(dict(zip(("m0", "y", "idx"), data)), model=kept.model,
                    coords={"patient": np.arange(len(data[0]))})

    fn2 = logp_dlogp(kept, (2,))
    refill(three)
    fn3 = logp_dlogp(kept, (3,))
    assert fn3 is not fn2 and logp_dlogp(kept, (3,)) is fn3
    for fn, data in ((fn3, three), (fn2, two)):
        refill(data)
        assert logp_dlogp(kept, (len(data[0]),)) is fn  # the same key: the same compiled object
        mu = np.linspace(-0.3, 0.4, len(data[0]))
        lp, grad = fn([mu], extra_vars={})
        want_lp, want_grad = _density(mu, *data)
        assert float(lp) == pytest.approx(want_lp, rel=1e-12)
        np.testing.assert_allclose(grad, want_grad, rtol=1e-12)
    ip = initial_point_fn(kept, (2,), jitter=False)
    assert initial_point_fn(kept, (2,), jitter=False) is ip
    assert initial_point_fn(kept, (2,), jitter=True) is not ip
    np.testing.assert_array_equal(ip(0)["mu"], two[0])  # unjittered start: the prior means


def test_kept_trace_copies_do_not_share_storage():
    """``pymc.sample`` takes one copy of the trace per chain: each copy is a plain NDArray with
    its own empty storage, the kept trace is the same object under its name."""
    from pymc.backends.ndarray import NDArray

    from bayesbase.mcmc.compiled import kept_trace

    kept = KeptModel(_normal_model(np.array([0.0, 1.0]), np.array([0.5]), np.array([1])))
    point = kept.model.initial_point()
    trace = kept_trace(kept, "fit", point)
    assert kept_trace(kept, "fit", point) is trace and kept_trace(kept, "other", point) is not trace
    a, b = copy.copy(trace), copy.copy(trace)
    assert type(a) is NDArray and type(b) is NDArray
    assert a.samples is not b.samples and a.samples == {} and a.draw_idx == 0


@pytest.mark.slow
def test_nuts_start_and_kept_trace_draw_what_pymc_sample_draws():
    """Two data sets of one shape through one kept model: ``pymc.sample`` given the kept start,
    step and trace draws bit for bit what ``pymc.sample(random_seed=seed)`` draws on a model
    built for those data with its own compile (reference: PyMC's sampler)."""
    import pymc as pm

    from bayesbase.mcmc.compiled import kept_trace, nuts_start

    data = [(np.array([0.0, 1.0]), np.array([0.5, -0.2, 1.0]), np.array([0, 1, 1])),
            (np.array([0.5, -1.0]), np.array([0.1, 0.9, -2.0, 0.3]), np.array([0, 0, 1, 1]))]
    kept = KeptModel(_normal_model(*data[0]))
    kw = dict(draws=40, tune=40, chains=2, cores=1, progressbar=False, compute_convergence_checks=False)
    for seed, d in zip((3, 4), data):
        pm.set_data(dict(zip(("m0", "y", "idx"), d)), model=kept.model)
        start, step = nuts_start(kept, (2,), 2, seed, 0.8)
        mine = pm.sample(step=step, initvals=start, trace=kept_trace(kept, (2,), start[0]),
                         random_seed=seed, model=kept.model, **kw)
        ref = pm.sample(random_seed=seed, target_accept=0.8, model=_normal_model(*d), **kw)
        np.testing.assert_array_equal(mine.posterior["mu"].values, ref.posterior["mu"].values)
        assert np.ptp(mine.posterior["mu"].values) > 0  # the chains moved


def test_entry_with_data_refills_a_kept_model_and_only_its_containers():
    """:meth:`CompiledStore.entry_with_data`: the first call builds (the build's own data stay),
    a later call with the same key returns the same kept model with the new data in its
    containers (read back with the shared variables' ``get_value``, against the arrays given)
    and the patient dim resized; an entry that names no container is left out of what
    :meth:`KeptModel.set_data` returns and sets (``pm.set_data`` would refuse it)."""
    two = (np.array([0.0, 1.0]), np.array([0.5, -0.2, 1.0]), np.array([0, 1, 1]))
    three = (np.array([0.0, 1.0, 2.0]), np.array([0.5, -0.2, 1.0, 2.0]), np.array([0, 1, 2, 2]))
    store, builds = CompiledStore(), []

    def build():
        builds.append(_normal_model(*two))
        return builds[-1]

    data3 = dict(zip(("m0", "y", "idx"), three), not_a_container=np.ones(2))
    kept, reused = store.entry_with_data("k", build, data3, {"patient": np.arange(3)})
    assert not reused and len(builds) == 1 and kept.model is builds[0]
    np.testing.assert_array_equal(kept.model["y"].get_value(), two[1])  # built with its own data
    again, reused = store.entry_with_data("k", build, data3, {"patient": np.arange(3)})
    assert reused and again is kept and len(builds) == 1
    for name, want in zip(("m0", "y", "idx"), three):
        np.testing.assert_array_equal(kept.model[name].get_value(), want)
    assert len(kept.model.coords["patient"]) == 3
    assert set(kept.set_data(data3, {"patient": np.arange(3)})) == {"m0", "y", "idx"}
