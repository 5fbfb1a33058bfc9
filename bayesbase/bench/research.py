"""Benchmark of the method-comparison simulator."""
from __future__ import annotations

import time
from collections.abc import Sequence

from ..research.compare import compare


def bench_compare(animals: int = 1_000_000, analyte: str = "creatinine", n_baseline: int = 3,
                  shifts: Sequence[float] = (0, 10, 20, 30, 50), species: str = "dog") -> dict:
    """Benchmark (not a test): ``animals`` simulated animals for one analyte and one design
    (one number of baselines, the given shifts, every method, scenario ``model``)."""
    t0 = time.perf_counter()
    comp = compare(species=species, analytes=(analyte,), baselines=(n_baseline,), shifts=shifts,
                   animals=animals, seed=1, scenarios=("model",))
    dt = time.perf_counter() - t0
    return {
        "name": "compare",
        "animals": animals,
        "analyte": analyte,
        "n_baseline": n_baseline,
        "shifts": len(comp.attrs["shifts_pct"]),
        "engine_calls_per_animal": len(comp.attrs["shifts_pct"]),
        "seconds": round(dt, 2),
        "animal_evaluations_per_s": round(animals * len(comp.attrs["shifts_pct"]) / dt),
        "target_s": 60.0,
    }
