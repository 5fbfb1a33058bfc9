"""Benchmarks of the PyMC engine (imports PyMC when they run): one panel cold and warm, and one
warm fit of a single case (the reference of the speed table's exact-engine rows)."""
from __future__ import annotations

import os
import time


def _cpu() -> float:
    """CPU seconds of this process and its finished children (PyMC's chain processes)."""
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def _load() -> tuple:
    return tuple(float(x) for x in os.getloadavg()) if hasattr(os, "getloadavg") \
        else (float("nan"),) * 3


def _timed(fn):
    w, c = time.perf_counter(), _cpu()
    out = fn()
    return out, time.perf_counter() - w, _cpu() - c


def bench_mcmc_panel(n_analytes: int = 25, chains: int = 4, draws: int = 1000,
                     tune: int = 1000, seed: int = 0, sampler: str = "pymc",
                     cores: int | None = None) -> dict:
    """Wall time of one ``n_analytes``-case panel: ``cold`` is the first call in this process
    for a model of this structure (includes building and compiling), ``warm`` a second call
    on new data (another invented panel of the same size) reusing the cached model and its
    compiled functions. With the CPU time (this process and its chain processes) and the load
    average when it ran (the machine may be shared)."""
    from ..mcmc.engine import _demo_panel, mcmc_assess

    kw = dict(draws=draws, tune=tune, chains=chains, sampler=sampler, cores=cores)
    load = _load()
    r1, cold, cold_cpu = _timed(lambda: mcmc_assess(_demo_panel(n_analytes), seed=seed, **kw))
    new_data = _demo_panel(n_analytes, seed=20240602)
    r2, warm, warm_cpu = _timed(lambda: mcmc_assess(new_data, seed=seed + 1, **kw))
    return dict(
        n_analytes=n_analytes, chains=chains, draws=draws, tune=tune, sampler=sampler,
        cores=r2.settings["cores"], cold_seconds=cold, warm_seconds=warm, cold_cpu_seconds=cold_cpu,
        warm_cpu_seconds=warm_cpu, converged=(r1.converged, r2.converged),
        max_r_hat=r2.diagnostics["max_r_hat"], min_ess_bulk=r2.diagnostics["min_ess_bulk"],
        load_average=load, load_average_after=_load(), cpu_count=os.cpu_count(),
    )


def bench_mcmc_case(n_cases: int = 400_000, chains: int = 4, draws: int = 1000,
                    tune: int = 1000, seed: int = 0, sampler: str = "pymc") -> dict:
    """One warm PyMC fit of ONE case: the first of the ``n_cases`` invented cases of the exact
    engine's benchmark rows (:func:`bayesbase.bench.model.bench_engine`, same seed). A first
    fit warms up (model and compile); the second, on the same case with another seed, is
    timed (wall and CPU)."""
    from ..mcmc.engine import mcmc_assess

    case = engine_case(n_cases, seed)
    kw = dict(draws=draws, tune=tune, chains=chains, sampler=sampler)
    mcmc_assess(case, seed=seed, **kw)
    r, warm, warm_cpu = _timed(lambda: mcmc_assess(case, seed=seed + 1, **kw))
    return dict(chains=chains, draws=draws, tune=tune, sampler=sampler, warm_seconds=warm,
                warm_cpu_seconds=warm_cpu, converged=r.converged, load_average=_load())


def engine_case(n_cases: int = 400_000, seed: int = 0):
    """The first case of the exact engine benchmark's ``n_cases`` invented cases."""
    from .model import _engine_cases

    return _engine_cases(n_cases, seed).subset(slice(0, 1))
