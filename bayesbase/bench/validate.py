"""Benchmark of ``validate`` for ``bayesbase bench`` (timings only, no assertions)."""
from __future__ import annotations

import time

import numpy as np
import pandas as pd

__all__ = ["bench_validate"]


def _bench_frame(n_rows: int, seed: int) -> pd.DataFrame:
    """Invented results (demo data for the benchmark only): 10 analytes per specimen."""
    rng = np.random.default_rng(seed)
    panel = [("CREA", "mg/dL", 0.5, 2.0), ("BUN", "mg/dL", 8, 30), ("ALT", "U/L", 20, 120),
             ("ALKP", "U/L", 20, 150), ("GLU", "mmol/L", 3.5, 7.0), ("TP", "g/dL", 5.5, 7.5),
             ("ALB", "g/L", 25, 40), ("Na", "mEq/L", 140, 155), ("K", "mmol/L", 3.6, 5.6),
             ("HCT", "%", 35, 55)]
    n_spec = -(-n_rows // len(panel))
    spec = np.repeat(np.arange(n_spec), len(panel))[:n_rows]
    k = np.tile(np.arange(len(panel)), n_spec)[:n_rows]
    patient = spec // 5
    visit = spec % 5
    days = (patient % 365) + visit * 60
    base = np.datetime64("2018-01-01T08:00")
    when = base + days.astype("timedelta64[D]") + (patient % 600).astype("timedelta64[m]")
    lo = np.array([p[2] for p in panel])[k]
    hi = np.array([p[3] for p in panel])[k]
    vals = np.round(rng.uniform(lo, hi), 2)
    vtext = np.char.mod("%.2f", vals).astype(object)
    # a few censored enzyme results (ALT, ALKP): '<5' is plausible only for analytes that low
    vtext[(rng.random(n_rows) < 0.01) & np.isin(k, (2, 3))] = "<5"
    return pd.DataFrame({
        "patient": np.char.add("P", patient.astype(str)).astype(object),
        "species": np.where(patient % 3 == 0, "cat", "dog").astype(object),
        "specimen": np.char.add("S", spec.astype(str)).astype(object),
        "collected_at": np.datetime_as_string(when, unit="m").astype(object),
        "analyte": np.array([p[0] for p in panel], dtype=object)[k],
        "value": vtext,
        "unit": np.array([p[1] for p in panel], dtype=object)[k],
        "state": np.where(visit == 4, "unwell", "").astype(object),
        "fasted": np.where(visit % 2 == 0, "yes", "no").astype(object),
        "haemolysis": np.char.mod("%d", rng.integers(0, 50, n_rows)).astype(object),
    })


def bench_validate(n_rows: int = 1_000_000, seed: int = 20240601) -> dict:
    """Time ``validate`` on ``n_rows`` invented rows (a benchmark, not a test)."""
    from ..validate import validate

    raw = _bench_frame(n_rows, seed)
    t0 = time.perf_counter()
    frame = validate(raw, source="<bench>", now="2030-01-01")
    seconds = time.perf_counter() - t0
    return {"n_rows": int(len(frame)), "seconds": seconds, "rows_per_second": len(frame) / seconds}
