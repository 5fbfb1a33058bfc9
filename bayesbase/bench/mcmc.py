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


def _sampler_kw(draws, tune, target_accept) -> dict:
    """The sampler settings given (None: the engine's default for the model kind)."""
    given = dict(draws=draws, tune=tune, target_accept=target_accept)
    return {k: v for k, v in given.items() if v is not None}


def bench_mcmc_panel(n_analytes: int = 25, chains: int = 4, draws: int | None = None,
                     tune: int | None = None, seed: int = 0, sampler: str = "pymc",
                     cores: int | None = None, target_accept: float | None = None) -> dict:
    """Wall time of one ``n_analytes``-case panel: ``cold`` is the first call in this process
    for a model of this structure (includes building and compiling), ``warm`` a second call
    on new data (another invented panel of the same size) reusing the cached model and its
    compiled functions. With the CPU time (this process and its chain processes) and the load
    average when it ran (the machine may be shared). ``draws``, ``tune``, ``target_accept``,
    ``cores``: None takes the engine's default for the model kind (the demo panel: plain
    normal, so PyMC's NUTS runs its chains in one process from the informed start).
    ``leapfrog_steps``: the warm fit's leapfrog steps over its kept draws (sample stat
    ``n_steps``; tuning not included), a load-independent measure of the sampler's work."""
    from ..mcmc.engine import _demo_panel, mcmc_assess

    kw = dict(chains=chains, sampler=sampler, cores=cores,
              **_sampler_kw(draws, tune, target_accept))
    load = _load()
    r1, cold, cold_cpu = _timed(lambda: mcmc_assess(_demo_panel(n_analytes), seed=seed, **kw))
    new_data = _demo_panel(n_analytes, seed=20240602)
    r2, warm, warm_cpu = _timed(lambda: mcmc_assess(new_data, seed=seed + 1, **kw))
    st = r2.settings
    return dict(
        n_analytes=n_analytes, chains=chains, draws=st["draws"], tune=st["tune"],
        target_accept=st["target_accept"], sampler=sampler,
        cores=st["cores"], cold_seconds=cold, warm_seconds=warm, cold_cpu_seconds=cold_cpu,
        warm_cpu_seconds=warm_cpu, converged=(r1.converged, r2.converged),
        max_r_hat=r2.diagnostics["max_r_hat"], min_ess_bulk=r2.diagnostics["min_ess_bulk"],
        min_ess_tail=r2.diagnostics["min_ess_tail"], divergences=r2.diagnostics["divergences"],
        leapfrog_steps=_leapfrog_steps(r2), load_average=load, load_average_after=_load(),
        cpu_count=os.cpu_count(),
    )


def _leapfrog_steps(result) -> int | None:
    stats = result.idata.sample_stats
    return int(stats["n_steps"].values.sum()) if "n_steps" in stats else None


def bench_mcmc_case(n_cases: int = 400_000, chains: int = 4, draws: int | None = None,
                    tune: int | None = None, seed: int = 0, sampler: str = "pymc") -> dict:
    """One warm PyMC fit of ONE case: the first of the ``n_cases`` invented cases of the exact
    engine's benchmark rows (:func:`bayesbase.bench.model.bench_engine`, same seed). A first
    fit warms up (model and compile); the second, on the same case with another seed, is
    timed (wall and CPU)."""
    from ..mcmc.engine import mcmc_assess

    case = engine_case(n_cases, seed)
    kw = dict(chains=chains, sampler=sampler, **_sampler_kw(draws, tune, None))
    mcmc_assess(case, seed=seed, **kw)
    r, warm, warm_cpu = _timed(lambda: mcmc_assess(case, seed=seed + 1, **kw))
    st = r.settings
    return dict(chains=chains, draws=st["draws"], tune=st["tune"], sampler=sampler,
                target_accept=st["target_accept"], warm_seconds=warm,
                warm_cpu_seconds=warm_cpu, converged=r.converged, load_average=_load())


def engine_case(n_cases: int = 400_000, seed: int = 0):
    """The first case of the exact engine benchmark's ``n_cases`` invented cases."""
    from .model import _engine_cases

    return _engine_cases(n_cases, seed).subset(slice(0, 1))
