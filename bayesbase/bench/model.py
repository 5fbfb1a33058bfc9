"""Benchmarks of the model's numerics: the drift kernels (the exact engine's own benchmark is in
:mod:`.core`)."""
from __future__ import annotations

import os
import time

import numpy as np

from ..constants import DEFAULT_QUAD_NODES
from ..model.engine import cv_to_sigma
from ..model.trend import DEFAULT_SLOPE_SD, _simulate, trend_exact


def bench_trend(n_series=100_000, n_specimens=6, nodes=DEFAULT_QUAD_NODES, seed=20262):
    """Throughput of :func:`trend_exact` on simulated annual series with both population limits
    (invented creatinine-like demo values): full output (``intervals=True``) and bulk scoring
    (``intervals=False``). Returns a dict; the machine may be shared, so the 1-minute load
    average is reported beside the speed."""
    rng = np.random.default_rng(seed)
    times = np.arange(float(n_specimens))
    si, sa, sg = (float(cv_to_sigma(v)) for v in (0.10, 0.03, 0.20))
    beta = rng.normal(0.0, DEFAULT_SLOPE_SD, n_series) * (rng.random(n_series) < 0.3)
    theta0 = np.log(90.0) + sg * rng.normal(size=n_series)
    y = _simulate(rng, n_series, times, beta, theta0, si, sa)
    t = np.broadcast_to(times, y.shape)
    res = {"n_series": int(n_series), "n_specimens": int(n_specimens), "nodes": int(nodes)}
    for label, intervals in (("full", True), ("bulk", False)):
        t0 = time.perf_counter()
        out = trend_exact(t, y, None, None, np.log(90.0), sg, 0.10, 0.2, sa, DEFAULT_SLOPE_SD,
                          limit_upper=np.log(159.0), limit_lower=np.log(44.0), nodes=nodes,
                          intervals=intervals)
        dt = time.perf_counter() - t0
        res[f"{label}_seconds"] = dt
        res[f"{label}_series_per_second"] = n_series / dt
        if intervals:
            res["with_limit"] = int(np.sum(out["limit_side"] != ""))
    res["load_average_1min"] = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    return res
