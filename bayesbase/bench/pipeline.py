"""Benchmarks of the whole pipeline as a user runs it (``bayesbase bench``): ``bayesbase demo``
from a shell, and one 25-analyte report in process. Nothing here asserts a time; the machine
may be shared, so the 1-minute load average and the CPU time are reported beside each wall
time, the best of ``repeat`` runs is kept, and each time is also given as its ratio to the
issue's floor (above 1: faster than the floor)."""
from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path


#: floors of the speed issue (seconds): one 25-analyte report (HTML + PDF, in process) and
#: ``bayesbase demo`` (8 cases, HTML + PDF + JSON each); the aims are half of these
FLOOR_REPORT_S, FLOOR_DEMO_S = 1.0, 10.0


def load_average() -> float:
    """The 1-minute load average (NaN where the system does not tell)."""
    return round(os.getloadavg()[0], 2) if hasattr(os, "getloadavg") else float("nan")


def bench_demo(repeat: int = 1, pdf: bool = True, jobs: int | None = None) -> dict:
    """Wall time of ``bayesbase demo`` (every patient case of the case library: HTML, PDF and
    JSON each) in a fresh process, best of ``repeat``; with the CPU time of that process and
    of its worker processes (``jobs``: the demo's ``--jobs``; None: the demo's default, 2
    worker processes)."""
    best_wall = best_cpu = float("inf")
    cases = 0
    for _ in range(max(1, repeat)):
        with tempfile.TemporaryDirectory() as d:
            cmd = ([sys.executable, "-m", "bayesbase.cli", "demo", "--out", d]
                   + ([] if jobs is None else ["--jobs", str(int(jobs))])
                   + ([] if pdf else ["--no-pdf"]))
            before = os.times()
            t = time.perf_counter()
            subprocess.run(cmd, check=True, capture_output=True)
            wall = time.perf_counter() - t
            after = os.times()
            cases = len(list(Path(d).glob("*.json")))
        best_wall = min(best_wall, wall)
        best_cpu = min(best_cpu, (after.children_user - before.children_user)
                       + (after.children_system - before.children_system))
    return {"cases": cases, "jobs": "default" if jobs is None else int(jobs),
            "demo_wall_s": round(best_wall, 2), "demo_cpu_s": round(best_cpu, 2),
            "wall_ratio_to_floor": round(FLOOR_DEMO_S / best_wall, 3),
            "cpu_ratio_to_floor": round(FLOOR_DEMO_S / best_cpu, 3),
            "load_average_1min": load_average()}


def bench_report_best(n_analytes: int = 25, repeat: int = 3) -> dict:
    """One ``n_analytes``-analyte report (HTML + PDF, exact engine) in process, best of
    ``repeat`` after one warm-up (fonts, templates and the pack loaded once)."""
    from .. import report
    from ..io import read_results
    from .core import _panel_csv

    walls, cpus = [], []
    with tempfile.TemporaryDirectory() as d:
        frame = read_results(_panel_csv(Path(d) / "panel.csv", n_analytes))
        for k in range(max(1, repeat) + 1):
            t, c = time.perf_counter(), time.process_time()
            report.report_for_file(frame, "BENCH-1", None, Path(d) / "r.html", pdf=Path(d) / "r.pdf")
            if k:  # the first run warms up
                walls.append(time.perf_counter() - t)
                cpus.append(time.process_time() - c)
    return {"analytes": n_analytes, "report_html_pdf_s": round(min(walls), 3),
            "report_cpu_s": round(min(cpus), 3),
            "wall_ratio_to_floor": round(FLOOR_REPORT_S / min(walls), 3),
            "cpu_ratio_to_floor": round(FLOOR_REPORT_S / min(cpus), 3),
            "load_average_1min": load_average()}
