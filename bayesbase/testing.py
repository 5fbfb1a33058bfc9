"""Invented demo data for tests and benchmarks (layer 1: imports only ``bayesbase.contract``).

Nothing here is a real patient or a reference value: the panel's typical values are demo
numbers, and every frame is labelled as invented (patients ``DEMO-0000`` ..., method
"demo analyser").
"""
from __future__ import annotations

from .contract import CANONICAL_COLUMNS, CANONICAL_DTYPES

__all__ = ["DEMO_PANEL", "synthetic_canonical"]

#: Invented demo panel (analyte id, canonical unit, typical value): demo numbers, not reference
#: values.
DEMO_PANEL = (
    ("creatinine", "umol/L", 90.0), ("urea", "mmol/L", 5.0), ("glucose", "mmol/L", 5.5),
    ("alt", "U/L", 40.0), ("ast", "U/L", 30.0), ("alp", "U/L", 60.0), ("ggt", "U/L", 4.0),
    ("albumin", "g/L", 32.0), ("total_protein", "g/L", 62.0), ("cholesterol", "mmol/L", 6.0),
    ("calcium", "mmol/L", 2.5), ("sodium", "mmol/L", 147.0), ("potassium", "mmol/L", 4.5),
    ("chloride", "mmol/L", 112.0), ("total_bilirubin", "umol/L", 3.0),
    ("phosphate", "mmol/L", 1.2), ("triglycerides", "mmol/L", 0.8),
    ("globulin", "g/L", 30.0), ("magnesium", "mmol/L", 0.85), ("bicarbonate", "mmol/L", 22.0),
    ("lipase", "U/L", 300.0), ("sdma", "umol/L", 0.6), ("ck", "U/L", 120.0),
    ("cortisol", "nmol/L", 80.0), ("fructosamine", "umol/L", 300.0),
)
#: Row order of a canonical frame read back from the store (and of these demo frames).
_SORT = ["patient", "collected_at", "specimen", "analyte", "replicate"]


def synthetic_canonical(n_patients: int, n_specimens: int, n_analytes: int = 25,
                        seed: int = 20240611, source: str = "synthetic"):
    """Invented demo results (labelled as such): a canonical frame of ``n_patients`` dogs x
    ``n_specimens`` monthly specimens x ``n_analytes`` analytes (at most the
    :data:`DEMO_PANEL`'s 25), with the canonical dtypes, sorted by patient, collection time,
    specimen, analyte and replicate. Seeded: the same arguments give the same frame."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    panel = DEMO_PANEL[:n_analytes]
    n_a = len(panel)
    n = n_patients * n_specimens * n_a
    p_idx = np.repeat(np.arange(n_patients), n_specimens * n_a)
    s_idx = np.tile(np.repeat(np.arange(n_specimens), n_a), n_patients)
    a_idx = np.tile(np.arange(n_a), n_patients * n_specimens)
    base = np.array([v for _, _, v in panel])
    value = np.round(base[a_idx] * np.exp(rng.normal(0.0, 0.1, n)), 3)
    days = (s_idx * 30 + (p_idx % 17)).astype("timedelta64[D]")
    width = max(len(str(n_patients)), 4)
    pat = np.char.add("DEMO-", np.char.zfill(p_idx.astype(str), width))
    unit = np.array([u for _, u, _ in panel])[a_idx]
    df = pd.DataFrame({
        "patient": pat,
        "species": np.full(n, "dog"),
        "breed": np.where(p_idx % 3 == 0, "beagle", "labrador retriever"),
        "sex": np.where(p_idx % 2 == 0, "female_neutered", "male_intact"),
        "birth_date": np.datetime64("2002-03-01", "ns") + (p_idx % 300).astype("timedelta64[D]"),
        "specimen": np.char.add(np.char.add(pat, "-"), np.char.zfill(s_idx.astype(str), 4)),
        "collected_at": np.datetime64("2004-01-05T09:00:00", "ns") + days,
        "analyte": np.array([a for a, _, _ in panel])[a_idx],
        "value": value,
        "unit": unit,
        "reported_value": np.array([f"{v:g}" for v in value]),
        "reported_unit": unit,
        "censor": np.full(n, ""),
        "method": np.full(n, "demo analyser"),
        "replicate": np.ones(n, dtype="int64"),
        "fasted": s_idx % 4 != 0,
        "haemolysis": np.where(s_idx % 10 == 0, 1.0, np.nan),
        "lipaemia": np.full(n, np.nan),
        "icterus": np.full(n, np.nan),
        "state": np.full(n, ""),
        "source_file": np.full(n, source),
        "source_row": np.arange(2, n + 2),
    })
    df = df[list(CANONICAL_COLUMNS)].astype(CANONICAL_DTYPES)
    return df.sort_values(_SORT, kind="mergesort").reset_index(drop=True)
