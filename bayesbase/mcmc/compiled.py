"""Built PyMC models and what was compiled from them, kept for reuse with new data.

Every graph of the project keeps its data in ``pm.Data`` containers, so one built model serves
any data set of its structure (``pm.set_data``), and what was compiled from it (PyMC's log
density and gradient, the initial-point function, the trace's point function; nutpie's numba
compile) reads the data at each call: compiling once and refilling is what makes the second and
later fits of a shape cheap. This module is the one place that keeps them:

* :class:`KeptModel`: a built model and its compiled pieces, each made once under a name;
* :class:`CompiledStore`: kept models under keys (a model's structure, its sizes, its settings),
  at most ``max_entries`` of them (the oldest key is dropped first; a hit does not refresh it);
* :func:`logp_dlogp`, :func:`initial_point_fn`, :func:`nuts_start`, :func:`kept_trace`,
  :func:`nutpie_compiled`: the compiled pieces PyMC's and nutpie's samplers need, kept on a
  :class:`KeptModel`, such that ``pymc.sample(step=..., initvals=..., trace=...)`` draws what
  ``pymc.sample(random_seed=seed)`` draws with its own compile (checked in
  ``tests/test_bench_speed_table.py`` and ``tests/test_mcmc_compiled.py``).

Users: :mod:`bayesbase.mcmc.engine` (one model per structure, its compiled pieces per number of
patients and analytes), :mod:`bayesbase.calibrate.split` (one graph per structure and padded
size, reused across analytes and later calibrations), :mod:`bayesbase.mcmc.trend` (one kept
model per call, shared by its series), :mod:`bayesbase.study.bayes` (one kept model per design
shape and robustness, both samplers), ``tests/test_calibrate_sbc.py``.

This module imports no PyMC at import time (PyMC, PyTensor and nutpie are imported inside the
functions that compile), so a module may hold a store from import on. A store is module-wide
state where a module keeps one: fits in concurrent threads of one process are not supported.
"""
from __future__ import annotations

import functools
from collections.abc import Callable, Hashable

import numpy as np

__all__ = ["KeptModel", "CompiledStore", "logp_dlogp", "initial_point_fn", "nuts_start",
           "kept_trace", "nutpie_compiled"]


class KeptModel:
    """A built model (``model``) and the pieces compiled from it (``compiled``: a dict, name ->
    piece; pass an existing dict to keep the pieces there)."""

    __slots__ = ("model", "compiled")

    def __init__(self, model, compiled: dict | None = None):
        self.model = model
        self.compiled = {} if compiled is None else compiled

    def get(self, name: Hashable, make: Callable[[], object]):
        """The piece kept under ``name``; ``make()`` builds it the first time."""
        piece = self.compiled.get(name)
        if piece is None:
            piece = self.compiled[name] = make()
        return piece

    def set_data(self, data: dict, coords: dict | None = None) -> dict:
        """Put the entries of ``data`` that name a data container of the model into it
        (``pm.set_data``; ``coords`` resizes dims) and return them. The compiled pieces read the
        containers at each call; so does nutpie's initial point, which its ``with_data`` does
        not reach."""
        import pymc as pm

        names = {v.name for v in self.model.data_vars}
        values = {k: v for k, v in data.items() if k in names}
        pm.set_data(values, model=self.model, coords=coords)
        return values


class CompiledStore:
    """:class:`KeptModel` s under hashable keys. ``max_entries``: at most that many are kept
    (None: no bound); past it the key stored first is dropped (first in, first out: a hit does
    not refresh a key). Read with :meth:`entry`."""

    def __init__(self, max_entries: int | None = None):
        if max_entries is not None and max_entries < 1:
            raise ValueError(f"max_entries must be None or >= 1, got {max_entries}")
        self.max_entries = max_entries
        self._entries: dict = {}

    def entry(self, key: Hashable, build: Callable[[], object]) -> KeptModel:
        """The kept model under ``key``; on a miss ``build()`` builds the model, which is kept
        (dropping the oldest keys beyond ``max_entries``)."""
        kept = self._entries.get(key)
        if kept is None:
            kept = self._entries[key] = KeptModel(build())
            while self.max_entries is not None and len(self._entries) > self.max_entries:
                self._entries.pop(next(iter(self._entries)))
        return kept

    def entry_with_data(self, key: Hashable, build: Callable[[], object], data: dict,
                        coords: dict | None = None) -> tuple[KeptModel, bool]:
        """(kept model under ``key``, reused): a model kept by an earlier call gets ``data`` (and
        ``coords``) by :meth:`KeptModel.set_data`; a new one is built by ``build()``, which
        builds it with those data."""
        reused = key in self._entries
        kept = self.entry(key, build)
        if reused:
            kept.set_data(data, coords)
        return kept, reused

    def __contains__(self, key) -> bool:
        return key in self._entries

    def __len__(self) -> int:
        return len(self._entries)

    def keys(self) -> list:
        """The kept keys, oldest first."""
        return list(self._entries)

    def clear(self) -> None:
        self._entries.clear()


def logp_dlogp(kept: KeptModel, name: Hashable):
    """PyMC's compiled log density and gradient of ``kept.model`` over its continuous free
    variables, raveled (``model.logp_dlogp_function(ravel_inputs=True)`` with ``trust_input``,
    what ``pymc.NUTS`` compiles for itself), kept under ``name``: one per shape of the free
    variables, since the raveling follows the shapes at compile time."""
    def make():
        fn = kept.model.logp_dlogp_function(ravel_inputs=True)
        fn.trust_input = True
        return fn

    return kept.get(name, make)


def initial_point_fn(kept: KeptModel, name: Hashable, jitter: bool = True):
    """PyMC's compiled initial-point function of ``kept.model`` (seed -> point of transformed
    values; ``jitter``: a uniform(-1, 1) jitter on every free variable, as ``pymc.sample``'s
    ``init="jitter+adapt_diag"``; without, the start ``pymc.sample`` takes for a given step),
    kept under ``name``."""
    from pymc.initial_point import make_initial_point_fn

    model = kept.model
    return kept.get((name, "start") if jitter else (name, "start", "no jitter"),
                    lambda: make_initial_point_fn(model=model, overrides=None,
                                                  jitter_rvs=set(model.free_RVs) if jitter else set(),
                                                  return_transformed=True))


def nuts_start(kept: KeptModel, name: Hashable, chains: int, seed, target_accept: float):
    """What :func:`pymc.init_nuts` builds for ``init="jitter+adapt_diag"`` (the chains'
    jittered starting points, a diagonal mass-matrix adaptation started at their mean, the NUTS
    step) from the seeds :func:`pymc.sample` derives from ``seed``, with the compiled pieces of
    ``kept`` under ``name``: ``pymc.sample(step=step, initvals=starts, random_seed=seed)`` then
    draws what ``pymc.sample(random_seed=seed)`` draws, without its compile. Returns (the
    chains' starting points, the step)."""
    import pymc as pm
    from pymc.blocking import DictToArrayBijection
    from pymc.step_methods.hmc import quadpotential
    from pymc.util import get_random_generator

    model = kept.model
    fn = logp_dlogp(kept, name)
    seeds = [r.integers(2**30) for r in get_random_generator(seed).spawn(chains)]

    def logp(point):
        return fn([DictToArrayBijection.map(point).data], extra_vars={})[0]

    points = _jittered_starts(kept, name, seeds, logp)
    mean = np.mean([DictToArrayBijection.map(p).data for p in points], axis=0)
    potential = quadpotential.QuadPotentialDiagAdapt(len(mean), mean, np.ones_like(mean), 10,
                                                     rng=seeds[0])
    step = pm.NUTS(potential=potential, model=model, rng=seeds[0], initial_point=points[0],
                   logp_dlogp_func=fn, target_accept=target_accept)
    names = {v.name for v in model.value_vars}
    return [{k: v for k, v in p.items() if k in names} for p in points], step


def _jittered_starts(kept: KeptModel, name, seeds, logp, max_retries=10):
    """``pymc.sampling.mcmc._init_jitter(model, None, seeds, jitter=True,
    jitter_max_retries=10, logp_fn=logp)`` (PyMC 5.28; the same points for the same seeds)
    with the kept initial-point function: the model's initial point plus a uniform(-1, 1)
    jitter on every free variable, redrawn with a new seed from ``default_rng(seed)`` while
    the log density is not finite."""
    ipfn = initial_point_fn(kept, name, jitter=True)
    points = []
    for seed in seeds:
        rng = np.random.default_rng(seed)
        for i in range(max_retries + 1):
            point = ipfn(seed)
            if np.isfinite(logp(point)):
                break
            if i == max_retries:
                kept.model.check_start_vals(point)  # raises, naming the variables at fault
            seed = rng.integers(2**30, dtype=np.int64)
        points.append(point)
    return points


@functools.lru_cache(maxsize=None)
def _kept_trace_class():
    """The trace class of :func:`kept_trace` (defined on first use: PyMC is imported here)."""
    from pymc.backends.ndarray import NDArray

    class KeptTrace(NDArray):
        """An empty NDArray trace whose compiled point function (free variables -> traced
        variables, deterministics included; it reads the data from the model's containers) is
        compiled once. ``pymc.sample(trace=...)`` takes a copy per chain (``copy.copy``): each
        copy is a plain NDArray with its own empty storage (a shallow copy of NDArray itself
        would share one ``samples`` dict between the chains)."""

        def __copy__(self):
            new = NDArray.__new__(NDArray)
            new.__dict__.update(self.__dict__)
            new.chain, new._is_base_setup, new.sampler_vars = None, False, None
            new.draw_idx, new.draws, new.samples, new._stats = 0, None, {}, None
            return new

    return KeptTrace


def kept_trace(kept: KeptModel, name: Hashable, point):
    """The empty trace of ``kept.model`` kept under ``name`` (built at ``point``, a starting
    point, on first use), for ``pymc.sample(trace=...)``."""
    return kept.get((name, "trace"), lambda: _kept_trace_class()(model=kept.model, test_point=point))


def nutpie_compiled(kept: KeptModel, name: Hashable, data: dict | None = None):
    """nutpie's compile of ``kept.model`` (numba backend, ``freeze_model=False``: the data stay
    swappable), kept under ``name``; it holds the model's data at compile time. When it was
    compiled by an earlier call and ``data`` is given, returns it with those of ``data`` that
    it holds swapped in (``with_data``; the number of baseline results may differ, the shapes
    of the free variables may not). The caller imports nutpie first (its missing-extra
    message is the caller's)."""
    import nutpie

    fresh = (name, "nutpie") not in kept.compiled
    cm = kept.get((name, "nutpie"),
                  lambda: nutpie.compile_pymc_model(kept.model, backend="numba", freeze_model=False))
    if fresh or data is None:
        return cm
    return cm.with_data(**{k: v for k, v in data.items() if k in cm.shared_data})
