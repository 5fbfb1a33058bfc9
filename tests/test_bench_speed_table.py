"""The speed issue's table (``bayesbase bench --only speed_issue``): every row of the issue under
its own name, the issue's floors and aims, and ratios computed as stated (above 1 = better than
the floor: a rate / floor, floor / seconds). The row names, floors and aims below are copied
from the project's speed issue (issue 12). The cheap measurements run for real at tiny sizes
(exact engine, trend, store); the slow ones (report, demo, PyMC fits) are replaced by fixed
stand-ins, so the test checks names and arithmetic, never a time. The slow tests at the end
check that the warm PyMC paths measured by the table's last row (one compile kept across fits)
draw exactly what PyMC's own ``pymc.sample`` and nutpie's own compile draw."""
from __future__ import annotations

import numpy as np
import pytest

from bayesbase.bench import core, speed

#: issue 12's table: (row name, unit, floor, aim)
ISSUE_ROWS = [
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
]

ENGINE_NAMES = [r[0] for r in ISSUE_ROWS[:2]]

STAND_INS = {  # invented figures for the slow measurements
    "bench_report_best": {"analytes": 25, "report_html_pdf_s": 2.5},
    "bench_demo": {"cases": 8, "demo_wall_s": 12.5},
    "bench_mcmc_panel": {"sampler": "pymc", "chains": 4, "draws": 200, "cold_seconds": 30.0,
                         "warm_seconds": 4.0},
    "bench_mcmc_case": {"warm_seconds": 0.8},
}


@pytest.fixture(scope="module")
def quick_result():
    real = core.resolve
    mp = pytest.MonkeyPatch()
    tiny = {"engine": {"n_cases": 2_000, "repeat": 1}, "store": {"n_patients": 5},
            "trend": {"n_series": 300}}
    mp.setattr(speed, "SIZES", {k: (v, tiny.get(k, v[1])) for k, v in speed.SIZES.items()})

    calls = {}

    def resolve(module, func):
        def stand_in(**kw):
            calls[func] = kw
            return dict(STAND_INS[func])

        return stand_in if func in STAND_INS else real(module, func)

    mp.setattr(core, "resolve", resolve)
    captured = {}
    real_measure = speed.measure

    def measure(quick, sampler):
        captured.update(real_measure(quick, sampler))
        return captured

    mp.setattr(speed, "measure", measure)
    try:
        res = speed.bench_speed_issue(quick=True, sampler="pymc")
    finally:
        mp.undo()
    captured["calls"] = calls
    return res, captured


def test_quick_table_has_the_issue_rows_with_floors_and_aims(quick_result):
    res, _ = quick_result
    got = [(r["name"], r["unit"], r["floor"], r["aim"]) for r in res["rows"]]
    assert got == ISSUE_ROWS
    lines = res["table"].splitlines()
    for name, *_ in ISSUE_ROWS:
        assert sum(line.startswith(name) for line in lines) == 1, name
    assert "quick" in res["table"] and "above 1 is better" in res["table"]
    assert "one warm PyMC fit of one case took 0.80 s" in res["table"]


def test_figures_and_ratios_follow_the_stated_convention(quick_result):
    res, m = quick_result
    rows = {r["name"]: r for r in res["rows"]}
    expected_figures = [
        m["engine"]["scores_cases_per_s"], m["engine"]["full_cases_per_s"], m["store"]["assess_s"],
        m["store"]["read_s"], m["trend"]["full_series_per_second"], 2.5, 12.5, 4.0,
    ]
    pymc_s = 0.8
    for (name, unit, floor, _), fig in zip(ISSUE_ROWS, expected_figures):
        r = rows[name]
        assert r["figure"] == pytest.approx(fig, rel=1e-12)
        want = floor / fig if unit == "s" else fig / floor
        assert r["ratio_to_floor"] == pytest.approx(want, rel=1e-12), name
        if name.startswith("exact engine"):
            # cases/s x seconds per case of one warm PyMC fit = times faster per case
            assert r["ratio_to_pymc"] == pytest.approx(fig * pymc_s, rel=1e-12)
            assert f"{fig * pymc_s:,.0f}" in res["table"]
        else:
            assert r["ratio_to_pymc"] is None
    # the stand-ins' seconds rows: 2.5 s report -> 0.4, 12.5 s demo -> 0.8, 4 s panel -> 1.25
    seconds_rows = [rows[n]["ratio_to_floor"] for n, *_ in ISSUE_ROWS[5:]]
    assert seconds_rows == pytest.approx([0.4, 0.8, 1.25])
    # the PyMC reference fits the first of the engine rows' cases (same count), same sampler
    assert m["calls"]["bench_mcmc_case"]["n_cases"] == m["engine"]["cases"] == 2_000
    assert m["calls"]["bench_mcmc_case"]["sampler"] == m["calls"]["bench_mcmc_panel"]["sampler"]
    # the engine rows' figure is one thread; every CPU's threads are given beside it, in the
    # "measured on" text, from the same measurement
    nt = speed.engine_threads()[-1]
    for name, key in zip(ENGINE_NAMES, ("scores", "full")):
        on = rows[name]["measured_on"]
        assert on.startswith("2,000 cases, 1 thread"), on
        if nt > 1:
            assert f"{key}_cases_per_s_{nt}threads" in m["engine"]
            assert f"; {nt} threads: {speed._fmt(m['engine'][f'{key}_cases_per_s_{nt}threads'])}" \
                f" cases/s" in on
            assert on in res["table"]
    # the real tiny store: 5 patients were measured, and the table says so
    assert m["store"]["patients"] == 5 and "5 patients" in res["table"]


def test_pymc_reference_case_is_the_engine_rows_first_case():
    from bayesbase.bench import mcmc as bench_mcmc
    from bayesbase.bench.model import _engine_cases

    one = bench_mcmc.engine_case(1_000, seed=0)
    all_cases = _engine_cases(1_000, 0)
    assert one.n_cases == 1
    for name in ("base_y", "new_y", "prior_mean", "cvi", "cvi_log_sd", "tau", "prior_change"):
        np.testing.assert_array_equal(getattr(one, name), getattr(all_cases, name)[:1])


def test_speed_issue_is_in_the_plan_with_quick_arguments():
    entry = [e for e in core.PLAN if e[0] == "speed_issue"]
    assert entry and entry[0][3] == {"quick": True}
    assert core.resolve(entry[0][1], entry[0][2]) is speed.bench_speed_issue


# ---------------------------------------- the warm PyMC path draws exactly what pm.sample draws
@pytest.mark.slow
def test_warm_pymc_path_draws_what_pm_sample_draws():
    """The cached compile of the PyMC engine (the table's last row) draws what ``pymc.sample``
    draws with its own compile (reference: ``reuse_model=False``: the same NUTS step and starts,
    for this plain normal panel the informed start written out with PyMC's public API in
    tests/test_mcmc.py, given to ``pymc.sample``, which compiles): bit-identical draws, also
    for a second panel with another number of baseline results reusing the first panel's
    compiled function."""
    from bayesbase.mcmc import engine as E

    kw = dict(draws=30, tune=30, chains=2, cores=1, seed=7)
    a, b = E._demo_panel(4, seed=1), E._demo_panel(4, seed=2)
    assert a.mask.sum() != b.mask.sum()
    E.mcmc_assess(a, **kw)  # compiles and caches
    warm = E.mcmc_assess(b, **kw)
    ref = E.mcmc_assess(b, reuse_model=False, **kw)
    np.testing.assert_array_equal(warm.idata.posterior["theta"].values,
                                  ref.idata.posterior["theta"].values)
    for key in ("theta_mean", "p_change", "pi_upper"):
        np.testing.assert_array_equal(warm.summary[key], ref.summary[key])


@pytest.mark.slow
def test_trend_mcmc_with_one_compile_draws_what_pm_sample_draws(monkeypatch):
    """The drift model's series share one compiled log density; the draws are those of
    ``pymc.sample`` compiling per series (reference: the per-series path)."""
    from bayesbase.mcmc import trend as T

    times = np.array([[0.0, 1.0, 2.0, 3.0], [0.0, 1.0, 2.0, np.nan]])
    y = np.log(np.array([[90.0, 95.0, 99.0, 104.0], [80.0, 82.0, 79.0, np.nan]]))
    args = (times, y, None, None, np.log(90.0), 0.2, 0.1, 0.3, 0.03, 0.05)
    kw = dict(draws=40, tune=40, chains=2, seed=11)
    fast = T.trend_mcmc(*args, **kw)
    real = T._sample_series
    monkeypatch.setattr(T, "_sample_series", lambda *a: real(*a[:-1], None))
    ref = T.trend_mcmc(*args, **kw)
    assert np.all(fast["eligible"]) and np.all(np.isfinite(fast["slope_mean"]))
    for key in ("slope_mean", "log_bf10", "r_hat", "ess"):
        np.testing.assert_array_equal(fast[key], ref[key])


@pytest.mark.slow
def test_nutpie_compiled_model_serves_another_number_of_baselines():
    """The optional nutpie sampler (skipped without it) reuses one compile for panels of the
    same analytes whatever their number of baseline results: the draws equal those of a fresh
    compile for that panel (reference: nutpie's own compile of the second panel)."""
    pytest.importorskip("nutpie")
    from bayesbase.mcmc import engine as E

    kw = dict(draws=50, tune=50, chains=2, cores=1, seed=7, sampler="nutpie")
    a, b = E._demo_panel(3, seed=1), E._demo_panel(3, seed=4)
    assert a.mask.sum() != b.mask.sum()
    ref = E.mcmc_assess(b, reuse_model=False, **kw)
    E.mcmc_assess(a, **kw)  # compiles and caches for 1 patient x 3 analytes
    warm = E.mcmc_assess(b, **kw)
    np.testing.assert_array_equal(warm.idata.posterior["theta"].values,
                                  ref.idata.posterior["theta"].values)


def test_ratio_to_floor_of_a_time_below_the_clock_resolution():
    """A seconds row measured as 0 (a tiny store's read on a fast machine) is infinitely better
    than its floor instead of a division by zero; rates and positive times keep the stated
    convention (floor / figure for seconds, figure / floor for rates)."""
    import math

    assert speed.ratio_to_floor(0.0, 1.0, "s") == math.inf
    assert speed.ratio_to_floor(0.5, 1.0, "s") == pytest.approx(2.0)
    assert speed.ratio_to_floor(0.0, 1_000_000, "cases/s") == 0.0
    assert speed.ratio_to_floor(2_000_000, 1_000_000, "cases/s") == pytest.approx(2.0)
