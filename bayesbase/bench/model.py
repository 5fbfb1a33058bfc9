"""Benchmarks of the model's numerics: the exact engine's kernels and the drift kernels (the exact
engine's end-to-end row is in :mod:`.core`). Floors are the targets of the project's speed issue
(cases or series per second, one process)."""
from __future__ import annotations

import os
import time

import numpy as np

from ..constants import DEFAULT_QUAD_NODES
from ..model.engine import CaseArrays, cv_to_sigma, exact_assess
from ..model.trend import DEFAULT_SLOPE_SD, _simulate, trend_exact

#: floors of the speed issue: exact engine scores and full output (cases/s), trend full (series/s)
FLOOR_SCORES, FLOOR_FULL, FLOOR_TREND = 1_000_000, 1_000_000, 200_000


def _load():
    return os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")


def _best(fn, repeat):
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _engine_cases(n, seed):
    """Invented cases: three baselines each, CVI 10 % with log-SD 0.3 uncertainty (the
    exact_engine row's design in :mod:`.core`)."""
    rng = np.random.default_rng(seed)
    mu = np.log(90.0)
    return CaseArrays(
        prior_mean=np.full(n, mu), sg=np.full(n, cv_to_sigma(0.25)), cvi=np.full(n, 0.1),
        cvi_log_sd=np.full(n, 0.3), sa=np.full(n, cv_to_sigma(0.03)),
        base_y=rng.normal(mu, 0.1, (n, 3)), base_r=np.ones((n, 3)), base_extra_var=np.zeros((n, 3)),
        base_censor=np.zeros((n, 3)), new_y=rng.normal(mu, 0.15, n), new_r=np.ones(n),
        new_extra_var=np.zeros(n), new_censor=np.zeros(n), tau=np.full(n, 0.27),
        delta=np.full(n, np.nan), prior_change=np.full(n, 0.1),
    )


def bench_engine(n_cases=400_000, repeat=3, seed=0, threads=(1, 2)):
    """Throughput of :func:`exact_assess` (warm: the compiled loops are loaded first and that
    one-off time is reported as ``kernel_load_s``): scores only (P(change), BF, percentile) and
    full output (plus set-point CrI and personal-interval quantiles); best of ``repeat``, with
    the ratio to the issue's floor and the 1-minute load average (the machine may be shared).
    ``scores_cases_per_s`` and ``full_cases_per_s`` are one thread; each further count in
    ``threads`` (threads of the same process) adds ``..._cases_per_s_<n>threads`` keys."""
    from ..model import normal

    cases = _engine_cases(n_cases, seed)
    t0 = time.perf_counter()
    exact_assess(cases.subset(slice(0, min(n_cases, 5_000))))
    load_s = time.perf_counter() - t0
    res = {"cases": int(n_cases), "compiled_loops": normal.have_numba(), "kernel_load_s": round(load_s, 3)}
    for nt in threads:
        suffix = "" if nt == 1 else f"_{nt}threads"
        for label, intervals, floor in (("scores", False, FLOOR_SCORES), ("full", True, FLOOR_FULL)):
            dt = _best(lambda: exact_assess(cases, intervals=intervals, threads=nt), repeat)
            res[f"{label}_cases_per_s{suffix}"] = round(n_cases / dt)
            res[f"{label}_ratio_to_floor{suffix}"] = round(n_cases / dt / floor, 3)
    res["load_average_1min"] = _load()
    return res


def bench_trend(n_series=100_000, n_specimens=6, nodes=DEFAULT_QUAD_NODES, seed=20262, repeat=2):
    """Throughput of :func:`trend_exact` on simulated annual series with both population limits
    (invented creatinine-like demo values): full output (``intervals=True``, with the ratio to
    the issue's floor) and bulk scoring (``intervals=False``), best of ``repeat`` after a warm-up
    that loads the compiled loops. Returns a dict; the machine may be shared, so the 1-minute
    load average is reported beside the speed."""
    rng = np.random.default_rng(seed)
    times = np.arange(float(n_specimens))
    si, sa, sg = (float(cv_to_sigma(v)) for v in (0.10, 0.03, 0.20))
    beta = rng.normal(0.0, DEFAULT_SLOPE_SD, n_series) * (rng.random(n_series) < 0.3)
    theta0 = np.log(90.0) + sg * rng.normal(size=n_series)
    y = _simulate(rng, n_series, times, beta, theta0, si, sa)
    t = np.broadcast_to(times, y.shape)
    res = {"n_series": int(n_series), "n_specimens": int(n_specimens), "nodes": int(nodes)}

    def run(intervals, rows=slice(None)):
        return trend_exact(t[rows], y[rows], None, None, np.log(90.0), sg, 0.10, 0.2, sa,
                           DEFAULT_SLOPE_SD, limit_upper=np.log(159.0), limit_lower=np.log(44.0),
                           nodes=nodes, intervals=intervals)

    run(True, slice(0, min(n_series, 5_000)))  # warm-up: loads the compiled loops once
    for label, intervals in (("full", True), ("bulk", False)):
        dt = _best(lambda: run(intervals), repeat)
        res[f"{label}_seconds"] = dt
        res[f"{label}_series_per_second"] = n_series / dt
        if intervals:
            res["full_ratio_to_floor"] = round(n_series / dt / FLOOR_TREND, 3)
    res["with_limit"] = int(np.sum(run(True, slice(0, min(n_series, 2_000)))["limit_side"] != ""))
    res["load_average_1min"] = _load()
    return res
