"""The speed issue's table in one run (``bayesbase bench --only speed_issue``).

Every row of the project's speed issue (issue 12), under the issue's own row name, with the
figure measured in this run, its unit, the issue's floor and aim, and the ratio to the floor.
Ratio convention: above 1 is better than the floor (throughput rows: figure / floor; seconds
rows: floor / figure). The two exact-engine rows also give their ratio to one warm per-case
PyMC fit of the same case (the first case of those rows' invented cases, fitted in this run
after a warm-up fit): PyMC seconds per case x exact-engine cases per second, i.e. how many
times faster the exact engine is per case. Their figure is one thread; the same job over
``os.cpu_count()`` threads of the one process is given beside it, in the ``measured on`` text.

The measurements are the other benchmarks of ``bayesbase bench``, called here (sizes: theirs;
``quick``: the quick sizes of their ``PLAN`` entries, so the figures of a quick table are not
comparable with the floors; the ``measured on`` column says what was measured). Nothing here
asserts a time; the 1-minute load average is reported beside the table (the machine may be
shared).
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass

#: the issue's rows: (name, unit, floor, aim); the floors and aims are the issue's targets
ROWS = (
    ("exact engine, P(change) + BF + percentile, one process", "cases/s", 1_000_000, 3_000_000),
    ("exact engine, full output incl. set-point CrI and personal-interval quantiles", "cases/s",
     1_000_000, 2_000_000),
    ("`assess` of a 10,000-patient store (200,000 patient-analyte cases), after the read", "s",
     2.0, 0.5),
    ("store read of those 10,000 patients", "s", 1.0, 0.3),
    ("trend, full output incl. time-to-limit quantiles (100,000 series x 6)", "series/s",
     200_000, 500_000),
    ("one 25-analyte report, HTML + PDF, in process", "s", 1.0, 0.5),
    ("`bayesbase demo` (8 cases, HTML + PDF + JSON each)", "s", 10.0, 5.0),
    ("PyMC engine, one 25-analyte panel, compile cache warm", "s", 5.0, 1.0),
)
ENGINE_ROWS = ROWS[0][0], ROWS[1][0]

#: keyword arguments of each measurement, full and quick (quick: the sizes of the PLAN entries)
SIZES = {
    "engine": ({"n_cases": 400_000}, {"n_cases": 100_000, "repeat": 1}),
    "store": ({"n_patients": 10_000, "jobs": 2}, {"n_patients": 1_000}),
    "trend": ({"n_series": 100_000}, {"n_series": 20_000}),
    "report": ({}, {"repeat": 1}),
    "demo": ({}, {}),
    "mcmc": ({}, {"draws": 200, "tune": 200}),
}


@dataclass(frozen=True)
class Row:
    """One row of the table: ``ratio_to_floor`` above 1 is better than the floor;
    ``ratio_to_pymc`` (exact-engine rows only, else None): how many times faster per case than
    one warm PyMC fit of the same case."""

    name: str
    figure: float
    unit: str
    floor: float
    aim: float
    ratio_to_floor: float
    measured_on: str
    ratio_to_pymc: float | None = None


def ratio_to_floor(figure: float, floor: float, unit: str) -> float:
    """Above 1: better than the floor (seconds: floor / figure; a rate: figure / floor). A time
    of 0 (below the clock's resolution) is infinitely better than the floor."""
    if unit == "s":
        return floor / figure if figure > 0 else math.inf
    return figure / floor


def best_sampler() -> str:
    """``"nutpie"`` when the optional package is installed, else ``"pymc"``."""
    import importlib.util

    return "nutpie" if importlib.util.find_spec("nutpie") is not None else "pymc"


def measure(quick: bool = False, sampler: str = "pymc") -> dict:
    """Run every measurement of the table once; returns the benchmarks' dicts by key."""
    from .core import resolve

    k = 1 if quick else 0
    calls = {
        "engine": ("bench.model", "bench_engine"), "store": ("bench.store", "bench_assess_store"),
        "trend": ("bench.model", "bench_trend"), "report": ("bench.pipeline", "bench_report_best"),
        "demo": ("bench.pipeline", "bench_demo"), "mcmc": ("bench.mcmc", "bench_mcmc_panel"),
    }
    extra = {"mcmc": {"sampler": sampler}, "engine": {"threads": engine_threads()}}
    out = {key: resolve(mod, fn)(**SIZES[key][k], **extra.get(key, {}))
           for key, (mod, fn) in calls.items()}
    # the same case: the first of the exact engine rows' cases (same count, same seed)
    out["pymc_case"] = resolve("bench.mcmc", "bench_mcmc_case")(
        n_cases=SIZES["engine"][k]["n_cases"], sampler=sampler, **SIZES["mcmc"][k])
    return out


def engine_threads() -> tuple:
    """Thread counts of the exact-engine rows: one (the rows' figure) and, beside it in the
    ``measured on`` text, every CPU of the machine (threads of the same process)."""
    n = os.cpu_count() or 1
    return (1, n) if n > 1 else (1,)


def _engine_on(e: dict, key: str) -> str:
    """``measured on`` text of an exact-engine row: the cases, and the same job over every
    CPU's thread when measured (``key``: scores or full)."""
    on = f"{e['cases']:,} cases, 1 thread"
    more = sorted((int(k.rsplit("_", 1)[1][:-7]), v) for k, v in e.items()
                  if k.startswith(f"{key}_cases_per_s_") and k.endswith("threads"))
    return on + "".join(f"; {n} threads: {_fmt(float(v))} cases/s" for n, v in more)


def rows_from(m: dict) -> list[Row]:
    """The table's rows from the measurements ``m`` (as :func:`measure` returns them)."""
    e, s, t, mc = m["engine"], m["store"], m["trend"], m["mcmc"]
    nan = float("nan")
    pymc_s = float(m["pymc_case"]["warm_seconds"])
    figures = (
        (e["scores_cases_per_s"], _engine_on(e, "scores")),
        (e["full_cases_per_s"], _engine_on(e, "full")),
        (s["assess_s"], f"{s['patients']:,} patients, {s['cases']:,} cases"
                        + (f"; {s['jobs']} workers (--jobs): {s['assess_jobs_s']} s, same table: "
                           f"{s['jobs_same']}" if "assess_jobs_s" in s else "")),
        (s["read_s"], f"{s['patients']:,} patients"),
        (t["full_series_per_second"], f"{t['n_series']:,} series x {t['n_specimens']}"),
        (m["report"]["report_html_pdf_s"], f"{m['report']['analytes']} analytes, best run"),
        (m["demo"]["demo_wall_s"], f"{m['demo']['cases']} cases, wall"),
        (mc["warm_seconds"], f"{mc['sampler']}, {mc['chains']}x{mc['draws']} draws"
                             f" (tune {mc.get('tune', '?')}, target_accept"
                             f" {mc.get('target_accept', '?')}), cold "
                             f"{mc['cold_seconds']:.1f} s, warm CPU "
                             f"{mc.get('warm_cpu_seconds', nan):.1f} s"),
    )
    rows = []
    for (name, unit, floor, aim), (fig, on) in zip(ROWS, figures):
        fig = float(fig)
        rows.append(Row(name, fig, unit, floor, aim, ratio_to_floor(fig, floor, unit), on,
                        fig * pymc_s if name in ENGINE_ROWS else None))
    return rows


def _fmt(x: float) -> str:
    return f"{x:,.0f}" if abs(x) >= 1000 else f"{x:.3g}"


def format_table(rows: list[Row], note: str = "") -> str:
    """The rows as an aligned text table (returned, not printed)."""
    head = ("row of the speed issue", "figure", "unit", "floor", "aim", "x floor", "x PyMC/case",
            "measured on")
    body = [(r.name, _fmt(r.figure), r.unit, _fmt(r.floor), _fmt(r.aim), f"{r.ratio_to_floor:.3f}",
             "" if r.ratio_to_pymc is None else f"{r.ratio_to_pymc:,.0f}", r.measured_on)
            for r in rows]
    widths = [max(len(x[i]) for x in (head, *body)) for i in range(len(head))]
    right = {1, 3, 4, 5, 6}

    def line(cells):
        return "  ".join(c.rjust(w) if i in right else c.ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    out = [line(head), line(tuple("-" * w for w in widths))] + [line(b) for b in body]
    out.append("x floor: ratio to the issue's floor, above 1 is better than the floor "
               "(rates: figure / floor; seconds: floor / figure).")
    out.append("x PyMC/case: warm PyMC seconds for one fit of the same case"
               " x exact-engine cases/s.")
    return "\n".join(out + ([note] if note else []))


def bench_speed_issue(quick: bool = False, sampler: str | None = None) -> dict:
    """Every row of the speed issue in one run: ``rows`` (:class:`Row` as dicts), ``table``
    (aligned text), the sampler of the PyMC rows (default: nutpie when installed) and the
    1-minute load average before and after."""
    from .pipeline import load_average

    sampler = sampler or best_sampler()
    load0 = load_average()
    m = measure(quick, sampler)
    rows = rows_from(m)
    load1 = load_average()
    case_s = float(m["pymc_case"]["warm_seconds"])
    note = (f"{'quick (smaller sizes: not comparable with the floors); ' if quick else ''}"
            f"PyMC sampler {sampler}; one warm PyMC fit of one case took {case_s:.2f} s; "
            f"load average (1 min) {load0} before, {load1} after; {os.cpu_count()} CPUs.")
    return {"rows": [r.__dict__ for r in rows], "table": format_table(rows, note),
            "sampler": sampler, "pymc_case_seconds": case_s, "load_average_before": load0,
            "load_average_after": load1}
