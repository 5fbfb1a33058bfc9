"""Benchmarks for ``bayesbase bench`` (speed and memory targets live here, never in tests).

Each benchmark returns a dict of measured numbers; nothing here asserts a time.
"""
from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def bench_exact(n_cases: int = 1_000_000, seed: int = 0) -> dict:
    """Exact engine throughput on invented cases with three baselines each."""
    from ..model.engine import CaseArrays, cv_to_sigma, exact_assess

    rng = np.random.default_rng(seed)
    n = n_cases
    mu = np.log(90.0)
    cases = CaseArrays(
        prior_mean=np.full(n, mu), sg=np.full(n, cv_to_sigma(0.25)), cvi=np.full(n, 0.1),
        cvi_log_sd=np.full(n, 0.3), sa=np.full(n, cv_to_sigma(0.03)),
        base_y=rng.normal(mu, 0.1, (n, 3)), base_r=np.ones((n, 3)), base_extra_var=np.zeros((n, 3)),
        base_censor=np.zeros((n, 3)), new_y=rng.normal(mu, 0.15, n), new_r=np.ones(n),
        new_extra_var=np.zeros(n), new_censor=np.zeros(n), tau=np.full(n, 0.27),
        delta=np.full(n, np.nan), prior_change=np.full(n, 0.1),
    )
    exact_assess(cases.subset(slice(0, min(n, 5_000))))  # warm-up: loads the compiled loops once
    t = time.perf_counter()
    exact_assess(cases, intervals=False)
    t_scores = time.perf_counter() - t
    m = min(n, 200_000)
    sub = cases.subset(slice(0, m))
    t = time.perf_counter()
    exact_assess(sub, intervals=True)
    t_full = time.perf_counter() - t
    return {
        "cases": n,
        "scores_per_s (P(change), BF, percentile)": round(n / t_scores),
        "full_per_s (plus set-point and personal-interval quantiles)": round(m / t_full),
    }


def _panel_csv(path: Path, n_analytes: int = 25) -> Path:
    from ..priors import load_pack

    pack = load_pack("dog")
    analytes = list(pack.analytes)[:n_analytes]
    rng = np.random.default_rng(5)
    lines = ["patient,species,specimen,collected_at,analyte,value,unit,state"]
    for k, date in enumerate(["2023-03-01", "2024-03-04", "2025-03-03", "2026-03-02"]):
        for a in analytes:
            p = pack.analytes[a]
            v = p.center * float(np.exp(rng.normal(0, p.si)))
            lines.append(f"BENCH-1,dog,S{k},{date},{a},{v:.4g},{p.unit},healthy")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def bench_cli_panel(n_analytes: int = 25) -> dict:
    """Wall time of ``bayesbase assess`` on one 25-analyte panel (exact engine) from a shell."""
    with tempfile.TemporaryDirectory() as d:
        csv = _panel_csv(Path(d) / "panel.csv", n_analytes)
        cmd = [sys.executable, "-m", "bayesbase.cli", "assess", str(csv), "--format", "json"]
        t = time.perf_counter()
        subprocess.run(cmd, check=True, capture_output=True)
        wall = time.perf_counter() - t
        t = time.perf_counter()
        subprocess.run([sys.executable, "-m", "bayesbase.cli", "--help"], check=True, capture_output=True)
        help_s = time.perf_counter() - t
    return {"assess_panel_wall_s": round(wall, 3), "help_wall_s": round(help_s, 3), "analytes": n_analytes}


def bench_report(n_analytes: int = 25) -> dict:
    """Wall time of one 25-analyte report (HTML + PDF) with the exact engine, in process."""
    from .. import report
    from ..io import read_results as load_results

    with tempfile.TemporaryDirectory() as d:
        csv = _panel_csv(Path(d) / "panel.csv", n_analytes)
        frame = load_results(csv)
        t = time.perf_counter()
        report.report_for_file(frame, "BENCH-1", None, Path(d) / "r.html", pdf=Path(d) / "r.pdf")
        return {"report_html_pdf_s": round(time.perf_counter() - t, 3), "analytes": n_analytes}


#: every benchmark: (name, module under bayesbase, function, keyword arguments when --quick)
PLAN = (
    ("exact_engine", "bench.core", "bench_exact", {"n_cases": 100_000}),
    ("engine_kernels", "bench.model", "bench_engine", {"n_cases": 100_000, "repeat": 1}),
    ("cli_panel", "bench.core", "bench_cli_panel", {}),
    ("report", "bench.core", "bench_report", {}),
    ("report_best", "bench.pipeline", "bench_report_best", {"repeat": 1}),
    ("demo", "bench.pipeline", "bench_demo", {}),
    ("validate", "bench.validate", "bench_validate", {"n_rows": 100_000}),
    ("validate_file", "bench.validate", "bench_validate_file",
     {"n_rows": 500_000, "whole_file_rows": 100_000}),
    ("import_file", "bench.validate", "bench_import_file",
     {"n_rows": 200_000, "chunk_rows": 50_000}),
    ("trend", "bench.model", "bench_trend", {"n_series": 20_000}),
    ("store_import", "bench.store", "bench_import", {"n_rows": 100_000}),
    ("store_history", "bench.store", "bench_history", {}),
    ("assess_store", "bench.store", "bench_assess_store", {"n_patients": 1_000}),
    ("compare", "bench.research", "bench_compare", {"animals": 100_000}),
    ("mcmc_panel", "bench.mcmc", "bench_mcmc_panel", {"draws": 200}),
    ("interval", "bench.interval", "bench_interval", {"n_animals": 130, "n_boot": 300}),
    # issue 13: 25 analytes x 20 animals x 10 specimens x 2 replicates, classical and Bayesian
    ("study", "bench.study", "bench_study_both", {"n_analytes": 5, "draws": 300, "tune": 300}),
    ("study_coverage", "bench.study", "bench_study_coverage",
     {"n_studies": 10, "draws": 300, "tune": 300, "batch_size": 10}),
    ("web", "bench.web", "bench_web", {"n_patients": 2_000, "n_requests": 10}),
    ("calibrate", "bench.calibrate", "bench_calibrate", {"n_animals": 100, "draws": 300, "tune": 300, "chains": 2}),
    ("calibrate_large", "bench.calibrate", "bench_calibrate_large",
     {"n_animals": 1_000, "draws": 300, "tune": 300, "chains": 2}),
    ("scale", "bench.scale", "bench_scale", {"n_patients": 2_000, "n_partitions": 8}),
    # issue 12: every row of the speed issue's table, with ratios to its floors, in one run
    ("speed_issue", "bench.speed", "bench_speed_issue", {"quick": True}),
)


def resolve(module: str, func: str):
    """The benchmark function ``bayesbase.<module>.<func>`` (imported when asked for)."""
    import importlib

    return getattr(importlib.import_module(f"bayesbase.{module}"), func)


def run(quick: bool = False, only=None):
    """Yield (name, result dict) for each benchmark (all, or the names in ``only``)."""
    for name, module, func, quick_kw in PLAN:
        if only and name not in only:
            continue
        yield name, resolve(module, func)(**(quick_kw if quick else {}))
