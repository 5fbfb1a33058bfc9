"""Benchmark of ``bayesbase calibrate`` for ``bayesbase bench`` (measures, never asserts a time)."""
from __future__ import annotations

import time


def bench_calibrate(n_animals: int = 500, n_specimens: int = 4,
                    analytes: tuple[str, ...] = ("creatinine", "alt", "urea"), draws: int = 1000,
                    tune: int = 1000, chains: int = 4, sampler: str = "pymc", seed: int = 0) -> dict:
    """Wall time of :func:`bayesbase.calibrate.calibrate` (model build, compile and sampling) on an
    invented store (:func:`bayesbase.calibrate.simulate_store`: 3 breeds, 2 methods), with the
    convergence figures of the fit."""
    from ..calibrate.job import calibrate
    from ..calibrate.simulate import simulate_store

    frame, _ = simulate_store(seed=seed, n_animals=n_animals, n_specimens=n_specimens, analytes=tuple(analytes))
    t = time.perf_counter()
    cal = calibrate(frame, species="dog", draws=draws, tune=tune, chains=chains, seed=seed, sampler=sampler)
    wall = time.perf_counter() - t
    d = cal.diagnostics
    return {"animals": n_animals, "specimens_per_animal": n_specimens, "analytes": len(analytes),
            "results": len(frame), "sampler": sampler, "chains x draws (tune)": f"{chains} x {draws} ({tune})",
            "calibrate_wall_s": round(wall, 1), "fit_s (build, compile, sample)": round(cal.attrs["seconds"], 1),
            "max_r_hat": round(d["max_r_hat"], 4), "min_ess_bulk": round(d["min_ess_bulk"]),
            "min_ess_tail": round(d["min_ess_tail"]), "divergences": d["divergences"], "converged": d["converged"]}
