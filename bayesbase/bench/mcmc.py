"""Benchmark of the PyMC engine on one panel (imports PyMC when it runs)."""
from __future__ import annotations

import os
import time


def bench_mcmc_panel(n_analytes: int = 25, chains: int = 4, draws: int = 1000,
                     tune: int = 1000, seed: int = 0, sampler: str = "pymc") -> dict:
    """Wall time of one ``n_analytes``-case panel: ``cold`` is the first call in this process
    for a model of this structure (includes building and compiling), ``warm`` a second call
    reusing the cached model. Also reports the load average when it ran."""
    from ..mcmc.engine import _demo_panel, mcmc_assess

    cases = _demo_panel(n_analytes)
    t0 = time.perf_counter()
    r1 = mcmc_assess(cases, draws=draws, tune=tune, chains=chains, seed=seed, sampler=sampler)
    cold = time.perf_counter() - t0
    t0 = time.perf_counter()
    r2 = mcmc_assess(cases, draws=draws, tune=tune, chains=chains, seed=seed + 1,
                     sampler=sampler)
    warm = time.perf_counter() - t0
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    return dict(
        n_analytes=n_analytes, chains=chains, draws=draws, tune=tune, sampler=sampler,
        cold_seconds=cold, warm_seconds=warm, converged=(r1.converged, r2.converged),
        max_r_hat=r2.diagnostics["max_r_hat"], min_ess_bulk=r2.diagnostics["min_ess_bulk"],
        load_average=tuple(float(x) for x in load), cpu_count=os.cpu_count(),
    )
