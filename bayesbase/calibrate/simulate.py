"""Invented stores for tests, benchmarks and demos of ``bayesbase calibrate`` (no real animal).

:func:`simulate_store` draws a canonical results frame from the calibration model itself
(:mod:`bayesbase.calibrate.model`) with known truth: breed offsets, a method bias, animal set
points with CVG, animal-specific CVIs log-normal across animals, CVA; patients ``SIM-0000`` ...,
methods ``demo analyser A`` (reference, most frequent) and ``demo analyser B``. The truth values
are demo numbers chosen here, not reference values.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..contract import CANONICAL_COLUMNS, CANONICAL_DTYPES

__all__ = ["Truth", "DEMO_TRUTH", "simulate_store"]


@dataclass(frozen=True)
class Truth:
    """Simulated truth of one analyte (fractions; breed offsets on the ln scale)."""

    analyte: str
    unit: str
    center: float
    cvg: float
    cvi_median: float
    cvi_log_sd: float
    cva: float
    method_bias: float  # fraction: method B reads (1 + bias) x method A
    breed_log_offsets: dict = field(default_factory=dict)

    def breed_center(self, breed: str) -> float:
        return self.center * math.exp(self.breed_log_offsets.get(breed, 0.0))


#: Demo truths (invented; CVA equal to the dog pack's value so a fit without replicates, which
#: fixes CVA at the pack's, is correctly specified).
DEMO_TRUTH = {
    "creatinine": Truth("creatinine", "umol/L", 95.0, 0.20, 0.09, 0.35, 0.03, 0.08,
                        {"beagle": -0.15, "labrador retriever": 0.0, "border collie": 0.12}),
    "alt": Truth("alt", "U/L", 35.0, 0.35, 0.18, 0.30, 0.05, -0.10,
                 {"beagle": 0.10, "labrador retriever": 0.0, "border collie": -0.10}),
    "urea": Truth("urea", "mmol/L", 5.5, 0.18, 0.13, 0.30, 0.03, 0.05,
                  {"beagle": 0.05, "labrador retriever": -0.05, "border collie": 0.0}),
}


def _sig(cv: float) -> float:
    return math.sqrt(math.log1p(cv * cv))


def _one_analyte(rng, t: Truth, breeds, methods_of, n_specimens):
    n = len(breeds)
    off = np.array([t.breed_log_offsets.get(b, 0.0) for b in breeds])
    theta = math.log(t.center) + off + _sig(t.cvg) * rng.standard_normal(n)
    cvi = np.exp(math.log(t.cvi_median) + t.cvi_log_sd * rng.standard_normal(n))
    si = np.sqrt(np.log1p(cvi**2))
    bias = np.where(methods_of == 1, math.log1p(t.method_bias), 0.0)
    eps = si[:, None] * rng.standard_normal((n, n_specimens)) + _sig(t.cva) * rng.standard_normal((n, n_specimens))
    return np.exp(theta[:, None] + bias + eps), cvi


def simulate_store(seed: int = 0, n_animals: int = 60, n_specimens: int = 4, analytes=("creatinine",),
                   truths: dict | None = None, p_method_b: float = 0.3, n_unwell: int = 0,
                   source: str = "simulated calibration store") -> tuple[pd.DataFrame, dict]:
    """(canonical frame, {analyte: Truth, "cvi_animal": {analyte: array}}) of an invented store.

    Breeds cycle through the truth's breeds; each specimen's method is B with probability
    ``p_method_b``. ``n_unwell`` extra specimens (state ``unwell``, values doubled) are added to
    the first animals: usable-specimen selection must leave them out.
    """
    rng = np.random.default_rng(seed)
    truths = truths or DEMO_TRUTH
    names = list(next(iter(truths[a] for a in analytes)).breed_log_offsets)
    breeds = [names[i % len(names)] for i in range(n_animals)]
    methods_of = (rng.random((n_animals, n_specimens)) < p_method_b).astype(int)
    rows, cvis = [], {}
    for a in analytes:
        t = truths[a]
        vals, cvis[a] = _one_analyte(rng, t, breeds, methods_of, n_specimens)
        for i in range(n_animals):
            for j in range(n_specimens):
                rows.append((i, j, a, t.unit, float(vals[i, j]), methods_of[i, j], ""))
            if i < n_unwell:
                rows.append((i, n_specimens, a, t.unit, float(2.0 * vals[i, -1]), 0, "unwell"))
    frame = _frame(rows, breeds, source)
    return frame, {**{a: truths[a] for a in analytes}, "cvi_animal": cvis}


def _frame(rows, breeds, source) -> pd.DataFrame:
    i, j, a, unit, value, m, state = (np.array(c, dtype=object) for c in zip(*rows))
    i, j = i.astype(int), j.astype(int)
    value = np.round(value.astype(float), 4)
    pat = np.array([f"SIM-{k:04d}" for k in i])
    n = len(rows)
    df = pd.DataFrame({
        "patient": pat, "species": "dog", "breed": np.array(breeds, dtype=object)[i], "sex": "female_neutered",
        "birth_date": np.datetime64("2018-03-01", "ns"),
        "specimen": [f"{p}-{k:02d}" for p, k in zip(pat, j)],
        "collected_at": np.datetime64("2024-01-05T09:00:00", "ns") + (j * 30 + i % 11).astype("timedelta64[D]"),
        "analyte": a, "value": value, "unit": unit, "reported_value": [f"{v:g}" for v in value],
        "reported_unit": unit, "censor": "",
        "method": np.where(m.astype(int) == 1, "demo analyser B", "demo analyser A"),
        "replicate": 1, "fasted": True, "haemolysis": np.nan, "lipaemia": np.nan, "icterus": np.nan,
        "state": state, "source_file": source, "source_row": np.arange(2, n + 2),
    })
    df = df[list(CANONICAL_COLUMNS)].astype(CANONICAL_DTYPES)
    return df.sort_values(["patient", "collected_at", "specimen", "analyte", "replicate"],
                          kind="mergesort").reset_index(drop=True)
