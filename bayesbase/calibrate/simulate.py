"""Invented stores for tests, benchmarks and demos of ``bayesbase calibrate`` (no real animal).

:func:`simulate_store` draws a canonical results frame from the calibration model itself
(:mod:`bayesbase.calibrate.model`) with known truth: breed offsets, a method bias, animal set
points with CVG, animal-specific CVIs log-normal across animals, CVA; patients ``SIM-0000`` ...,
methods ``demo analyser A`` (reference, most frequent) and ``demo analyser B``. The truth values
are demo numbers chosen here, not reference values.

:func:`demo_truths` builds invented truths for any analytes of a pack (centre, CVG and CVA
taken from the pack so the priors are well placed; CVI medians, spreads, breed offsets and
method biases drawn at random, demo numbers), and ``breed_counts`` gives breeds of unequal
sizes (:data:`BENCH_BREEDS`: three large breeds, a middling one and breeds of 3 animals).

Age (optional): with ``age_years=(lo, hi)`` each animal's age at its first specimen is drawn
uniformly in [lo, hi] and its birth date set accordingly (else every animal is born 2018-03-01);
``age_log_slopes`` {analyte: ln change per year} shifts each specimen's ln value by slope x (age
- the median age of the simulated specimens), so ``center`` stays the centre at that age (returned
as ``truth["age_ref"][analyte]``); a share ``p_no_birth_date`` of the animals has no birth date
recorded (their values still follow their true age).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..contract import CANONICAL_COLUMNS, CANONICAL_DTYPES

__all__ = ["Truth", "DEMO_TRUTH", "BENCH_BREEDS", "demo_truths", "breed_list", "simulate_store"]


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


#: Breed sizes of the benchmark store, out of 500 animals (invented): large breeds beside breeds of
#: 3 animals, the case where a single parameterisation of the breed layer fails.
BENCH_BREEDS = {"labrador retriever": 0.40, "border collie": 0.25, "beagle": 0.16, "greyhound": 0.08,
                "dachshund": 0.05, "whippet": 3, "basenji": 3, "saluki": 3, "(unknown)": 0.04}


def breed_list(n_animals: int, breed_counts: dict) -> list[str]:
    """Breed of each animal: an int is a number of animals, a float a share of ``n_animals``
    (rounded; the largest breed takes the remainder). An ``(unknown)`` breed is left blank."""
    fixed = {b: int(c) for b, c in breed_counts.items() if isinstance(c, int)}
    left = n_animals - sum(fixed.values())
    shares = {b: float(c) for b, c in breed_counts.items() if not isinstance(c, int)}
    tot = sum(shares.values()) or 1.0
    counts = {**fixed, **{b: int(round(left * f / tot)) for b, f in shares.items()}}
    big = max(shares or fixed, key=lambda b: counts[b])
    counts[big] += n_animals - sum(counts.values())
    if min(counts.values()) < 0:
        raise ValueError("breed_counts asks for more animals than n_animals")
    return [b for b, c in counts.items() for _ in range(c)]


def demo_truths(analytes, pack="dog", seed: int = 0, breeds=tuple(BENCH_BREEDS)) -> dict:
    """Invented truths for ``analytes`` of ``pack``: centre, CVG and CVA from the pack; CVI median
    = pack CVI x U(0.7, 1.4), spread U(0.2, 0.45) on ln CVI, breed offsets N(0, (0.6 sigma_g)^2),
    method bias U(-0.08, 0.08) (all demo numbers, seeded)."""
    from ..priors import Pack, load_pack

    pk = pack if isinstance(pack, Pack) else load_pack(pack)
    rng = np.random.default_rng(seed)
    out = {}
    for a in analytes:
        p = pk.analytes[a]
        sg = _sig(p.cvg)
        offs = {b: (0.0 if b == "(unknown)" else float(rng.normal(0.0, 0.6 * sg))) for b in breeds}
        out[a] = Truth(a, p.unit, float(p.center), float(p.cvg), float(p.cvi * rng.uniform(0.7, 1.4)),
                       float(rng.uniform(0.2, 0.45)), float(p.cva), float(rng.uniform(-0.08, 0.08)), offs)
    return out


def _sig(cv: float) -> float:
    return math.sqrt(math.log1p(cv * cv))


def _one_analyte(rng, t: Truth, breeds, methods_of, n_specimens, age_shift=0.0):
    n = len(breeds)
    off = np.array([t.breed_log_offsets.get(b, 0.0) for b in breeds])
    theta = math.log(t.center) + off + _sig(t.cvg) * rng.standard_normal(n)
    cvi = np.exp(math.log(t.cvi_median) + t.cvi_log_sd * rng.standard_normal(n))
    si = np.sqrt(np.log1p(cvi**2))
    bias = np.where(methods_of == 1, math.log1p(t.method_bias), 0.0)
    eps = si[:, None] * rng.standard_normal((n, n_specimens)) + _sig(t.cva) * rng.standard_normal((n, n_specimens))
    return np.exp(theta[:, None] + bias + eps + age_shift), cvi


def simulate_store(seed: int = 0, n_animals: int = 60, n_specimens: int = 4, analytes=("creatinine",),
                   truths: dict | None = None, p_method_b: float = 0.3, n_unwell: int = 0,
                   source: str = "simulated calibration store",
                   breed_counts: dict | None = None, age_years: tuple | None = None,
                   age_log_slopes: dict | None = None, p_no_birth_date: float = 0.0) -> tuple[pd.DataFrame, dict]:
    """(canonical frame, {analyte: Truth, "cvi_animal": {analyte: array}}) of an invented store.

    Breeds cycle through the truth's breeds, or follow ``breed_counts`` (:func:`breed_list`; a
    breed missing from a truth has offset 0); each specimen's method is B with probability
    ``p_method_b``. ``n_unwell`` extra specimens (state ``unwell``, values doubled) are added to
    the first animals: usable-specimen selection must leave them out. ``age_years``,
    ``age_log_slopes`` and ``p_no_birth_date``: the optional age effect (module docstring).
    """
    rng = np.random.default_rng(seed)
    truths = truths or DEMO_TRUTH
    if breed_counts is None:
        names = list(next(iter(truths[a] for a in analytes)).breed_log_offsets)
        breeds = [names[i % len(names)] for i in range(n_animals)]
    else:
        breeds = breed_list(n_animals, breed_counts)
    methods_of = (rng.random((n_animals, n_specimens)) < p_method_b).astype(int)
    age, birth = _ages(rng, n_animals, n_specimens, age_years, p_no_birth_date)
    ref = float(np.median(age))
    rows, cvis = [], {}
    for a in analytes:
        t = truths[a]
        shift = (age_log_slopes or {}).get(a, 0.0) * (age - ref)
        vals, cvis[a] = _one_analyte(rng, t, breeds, methods_of, n_specimens, shift)
        for i in range(n_animals):
            for j in range(n_specimens):
                rows.append((i, j, a, t.unit, float(vals[i, j]), methods_of[i, j], ""))
            if i < n_unwell:
                rows.append((i, n_specimens, a, t.unit, float(2.0 * vals[i, -1]), 0, "unwell"))
    frame = _frame(rows, breeds, source, birth)
    return frame, {**{a: truths[a] for a in analytes}, "cvi_animal": cvis, "age_ref": {a: ref for a in analytes},
                   "age_log_slopes": dict(age_log_slopes or {})}


_FIRST = np.datetime64("2024-01-05T09:00:00", "ns")
_DAY_NS = 86_400 * 10**9


def _days(i, j):
    """Days from the first collection date of the store to specimen j of animal i."""
    return j * 30 + i % 11


def _ages(rng, n_animals, n_specimens, age_years, p_no_birth_date):
    """True age (years) at each specimen (n_animals x n_specimens) and each animal's recorded birth
    date (NaT for the share without one)."""
    i, j = np.meshgrid(np.arange(n_animals), np.arange(n_specimens), indexing="ij")
    if age_years is None:
        birth = np.full(n_animals, np.datetime64("2018-03-01", "ns"))
    else:
        age0 = rng.uniform(age_years[0], age_years[1], n_animals)  # age at the store's first date
        birth = (_FIRST - (age0 * 365.25 * _DAY_NS).astype("timedelta64[ns]")).astype("datetime64[D]").astype("datetime64[ns]")
    age = (_FIRST - birth[:, None] + (_days(i, j) * _DAY_NS).astype("timedelta64[ns]")).astype(float) / _DAY_NS / 365.25
    missing = rng.random(n_animals) < p_no_birth_date if p_no_birth_date > 0 else np.zeros(n_animals, dtype=bool)
    return age, np.where(missing, np.datetime64("NaT", "ns"), birth)


def _frame(rows, breeds, source, birth) -> pd.DataFrame:
    i, j, a, unit, value, m, state = (np.array(c, dtype=object) for c in zip(*rows))
    i, j = i.astype(int), j.astype(int)
    value = np.round(value.astype(float), 4)
    pat = np.array([f"SIM-{k:04d}" for k in i])
    n = len(rows)
    df = pd.DataFrame({
        "patient": pat, "species": "dog",
        "breed": np.array([None if b == "(unknown)" else b for b in breeds], dtype=object)[i], "sex": "female_neutered",
        "birth_date": birth[i],
        "specimen": [f"{p}-{k:02d}" for p, k in zip(pat, j)],
        "collected_at": _FIRST + _days(i, j).astype("timedelta64[D]"),
        "analyte": a, "value": value, "unit": unit, "reported_value": [f"{v:g}" for v in value],
        "reported_unit": unit, "censor": "",
        "method": np.where(m.astype(int) == 1, "demo analyser B", "demo analyser A"),
        "replicate": 1, "fasted": True, "haemolysis": np.nan, "lipaemia": np.nan, "icterus": np.nan,
        "state": state, "source_file": source, "source_row": np.arange(2, n + 2),
    })
    df = df[list(CANONICAL_COLUMNS)].astype(CANONICAL_DTYPES)
    return df.sort_values(["patient", "collected_at", "specimen", "analyte", "replicate"],
                          kind="mergesort").reset_index(drop=True)
