"""Benchmark of the reference-interval job for ``bayesbase bench`` (timings only, no assertions)."""
from __future__ import annotations

import time

import numpy as np

__all__ = ["bench_interval"]


def _frame(n_animals: int, n_analytes: int, seed: int):
    """Invented reference sample (demo data for the benchmark only): log-normal values, 3 breeds."""
    import pandas as pd

    from ..validate import validate

    rng = np.random.default_rng(seed)
    analytes = ["creatinine", "urea", "glucose", "alt", "alp", "albumin", "total_protein", "potassium",
                "sodium", "calcium", "cholesterol", "haematocrit"][:n_analytes]
    units = {"creatinine": "umol/L", "urea": "mmol/L", "glucose": "mmol/L", "alt": "U/L", "alp": "U/L",
             "albumin": "g/L", "total_protein": "g/L", "potassium": "mmol/L", "sodium": "mmol/L",
             "calcium": "mmol/L", "cholesterol": "mmol/L", "haematocrit": "L/L"}
    centre = {"creatinine": 88, "urea": 5.7, "glucose": 5.0, "alt": 40, "alp": 45, "albumin": 32,
              "total_protein": 62, "potassium": 4.5, "sodium": 146, "calcium": 2.5, "cholesterol": 6.0,
              "haematocrit": 0.45}
    breeds = np.array(["labrador retriever", "beagle", "greyhound"])[rng.integers(0, 3, n_animals)]
    rows = []
    for i in range(n_animals):
        for a in analytes:
            v = centre[a] * float(np.exp(rng.normal(0.0, 0.15)))
            rows.append((f"B{i}", "dog", breeds[i], f"S{i}", "2026-03-02", a, f"{v:.4g}", units[a], "healthy"))
    raw = pd.DataFrame(rows, columns=["patient", "species", "breed", "specimen", "collected_at", "analyte",
                                      "value", "unit", "state"])
    return validate(raw, source="<bench>", now="2030-01-01")


def bench_interval(n_animals: int = 400, n_analytes: int = 12, n_boot: int = 1000, seed: int = 0) -> dict:
    """Time :func:`bayesbase.interval.estimate` on an invented sample (no partition, and by breed:
    groups of about 133 animals use the nonparametric method; the 40-119 path is timed on a
    subsample of 80 animals, where every limit needs a bootstrap)."""
    from ..interval.core import estimate

    frame = _frame(n_animals, n_analytes, seed)
    t = time.perf_counter()
    estimate(frame, seed=seed, n_boot=n_boot)
    t_plain = time.perf_counter() - t
    t = time.perf_counter()
    estimate(frame, partition="breed", seed=seed, n_boot=n_boot)
    t_part = time.perf_counter() - t
    small = frame[frame["patient"].isin([f"B{i}" for i in range(80)])]
    t = time.perf_counter()
    estimate(small, seed=seed, n_boot=n_boot)
    t_small = time.perf_counter() - t
    return {
        "animals": n_animals,
        "analytes": n_analytes,
        "seconds (nonparametric, all analytes)": round(t_plain, 3),
        "seconds (partition by breed)": round(t_part, 3),
        "seconds (80 animals, bootstrap CIs)": round(t_small, 3),
        "bootstrap resamples": n_boot,
    }
