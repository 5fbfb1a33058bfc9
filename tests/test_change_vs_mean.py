"""The change-against-the-baseline-mean columns of the assessment table (issue 20, items 4-5).

Invented demo scenario: three dogs with 3, 1 and 0 healthy baselines before the assessed visit.
Outside references: Coskun A et al., Clin Chem 2021;67:374 (model 2: arithmetic mean of the
previous results, limits HSP -/+ Z sqrt(1 + 1/n) CVT HSP); Fraser CG, Clin Chem Lab Med
2012;50:807 (classical RCV, sqrt(2) Z CVT); Fokkema MR et al., Clin Chem 2006;52:1602
(log-normal RCV); Fraser CG, Clin Chem 2011;57:1635 (probability of a significant change);
normal quantiles from scipy.stats. The variance of one result minus the mean of n independent
ones, (1 + 1/n) sigma^2, is the textbook variance of a difference of independent variables.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from bayesbase.validate import validate
from bayesbase.assessment import assess

NOW = "2027-01-01"
COLS = "patient,species,breed,specimen,collected_at,analyte,value,unit,state"
ROWS = """
D1,dog,beagle,S1,2026-01-10 09:00,creatinine,90,umol/L,healthy
D1,dog,beagle,S1,2026-01-10 09:00,glucose,5.0,mmol/L,healthy
D1,dog,beagle,S2,2026-02-10 09:00,creatinine,100,umol/L,healthy
D1,dog,beagle,S2,2026-02-10 09:00,glucose,5.4,mmol/L,healthy
D1,dog,beagle,S3,2026-03-10 09:00,creatinine,95,umol/L,healthy
D1,dog,beagle,S3,2026-03-10 09:00,glucose,5.2,mmol/L,healthy
D1,dog,beagle,S4,2026-04-10 09:00,creatinine,118,umol/L,
D1,dog,beagle,S4,2026-04-10 09:00,glucose,6.3,mmol/L,
D2,dog,collie,T1,2026-01-12 09:00,creatinine,80,umol/L,healthy
D2,dog,collie,T2,2026-04-10 10:00,creatinine,104,umol/L,
D3,dog,collie,U1,2026-04-10 11:00,creatinine,101,umol/L,
"""
AT = "2026-04-10"
EXACT = ["rcv_mean_exact_pct", "rcv_lognormal_mean_exact_up_pct", "rcv_lognormal_mean_exact_down_pct",
         "rcv_exceeded_mean_exact", "lognormal_exceeded_mean_exact", "p_significant_exact",
         "model2_lower", "model2_upper", "model2_log_lower", "model2_log_upper"]


@pytest.fixture(scope="module")
def table() -> pd.DataFrame:
    lines = [ln.split(",") for ln in ROWS.strip().splitlines()]
    raw = pd.DataFrame(lines, columns=COLS.split(",")).replace("", np.nan)
    canon = validate(raw, source="change_vs_mean.csv", now=NOW)
    return assess(canon, at=AT, trend=False).table.set_index(["patient", "analyte"])


def test_columns_present_in_table_order(table):
    cols = list(table.columns)
    assert all(c in cols for c in EXACT)
    # the exact block follows the convention's p_significant and precedes Harris's II
    assert cols.index("p_significant") < cols.index("rcv_mean_exact_pct") < cols.index("model2_lower") < cols.index("ii")
    assert table["rcv_exceeded_mean_exact"].dtype == "boolean"


def test_published_model2_and_exact_rcv_on_three_baselines(table):
    r = table.loc[("D1", "creatinine")]
    cva, cvi = r["cva_pct"] / 100, r["cvi_pct"] / 100
    z = stats.norm.ppf(0.975)
    base = np.array([90.0, 100.0, 95.0])
    assert r["n_baseline"] == 3
    # Coskun 2021 model 2, arithmetic form, n = 3
    k = z * math.sqrt(1 + 1 / 3) * math.hypot(cva, cvi)
    assert r["model2_lower"] == pytest.approx(base.mean() * (1 - k), rel=1e-12)
    assert r["model2_upper"] == pytest.approx(base.mean() * (1 + k), rel=1e-12)
    assert r["rcv_mean_exact_pct"] == pytest.approx(100 * k, rel=1e-12)
    # log form around the geometric mean, sigma_T^2 = ln(1+CVA^2) + ln(1+CVI^2)
    s = math.sqrt(math.log1p(cva**2) + math.log1p(cvi**2))
    h = z * math.sqrt(1 + 1 / 3) * s
    gm = math.exp(np.log(base).mean())
    assert r["model2_log_lower"] == pytest.approx(gm * math.exp(-h), rel=1e-12)
    assert r["model2_log_upper"] == pytest.approx(gm * math.exp(h), rel=1e-12)
    assert r["rcv_lognormal_mean_exact_up_pct"] == pytest.approx(100 * math.expm1(h), rel=1e-12)
    assert r["rcv_lognormal_mean_exact_down_pct"] == pytest.approx(100 * math.expm1(-h), rel=1e-12)
    # Fraser 2011 probability with the exact factor, change against the arithmetic mean
    d = 118.0 / base.mean() - 1
    p = 2 * stats.norm.cdf(abs(d) / (math.sqrt(1 + 1 / 3) * math.hypot(cva, cvi))) - 1
    assert r["p_significant_exact"] == pytest.approx(p, rel=1e-12)
    # the laboratory convention is untouched: sqrt(2) against the geometric mean
    assert r["rcv_classical_pct"] == pytest.approx(100 * math.sqrt(2) * z * math.hypot(cva, cvi), rel=1e-12)
    p_conv = 2 * stats.norm.cdf(abs(118.0 / gm - 1) / (math.sqrt(2) * math.hypot(cva, cvi))) - 1
    assert r["p_significant"] == pytest.approx(p_conv, rel=1e-12)


def test_exact_flags_say_the_same_as_the_model2_intervals(table):
    t = table[table["n_baseline"] > 0]
    assert len(t) == 3
    v = t["value"]
    out_arith = (v < t["model2_lower"]) | (v > t["model2_upper"])
    out_log = (v < t["model2_log_lower"]) | (v > t["model2_log_upper"])
    assert list(t["rcv_exceeded_mean_exact"]) == list(out_arith)
    assert list(t["lognormal_exceeded_mean_exact"]) == list(out_log)
    assert list(t["p_significant_exact"] > 0.95) == list(out_arith)
    # and with the exact RCV itself (change from the arithmetic mean)
    amean = {("D1", "creatinine"): 95.0, ("D1", "glucose"): 5.2, ("D2", "creatinine"): 80.0}
    for key, m in amean.items():
        beyond = abs(table.loc[key, "value"] / m - 1) > table.loc[key, "rcv_mean_exact_pct"] / 100
        assert bool(table.loc[key, "rcv_exceeded_mean_exact"]) == beyond, key
    # this scenario has both outcomes, so the check can fail either way
    assert set(t["rcv_exceeded_mean_exact"]) == {True, False}


def test_one_baseline_exact_equals_convention(table):
    r = table.loc[("D2", "creatinine")]
    assert r["n_baseline"] == 1
    assert r["rcv_mean_exact_pct"] == pytest.approx(r["rcv_classical_pct"], rel=1e-12)
    assert r["rcv_lognormal_mean_exact_up_pct"] == pytest.approx(r["rcv_lognormal_up_pct"], rel=1e-12)
    assert r["p_significant_exact"] == pytest.approx(r["p_significant"], rel=1e-12)
    assert bool(r["rcv_exceeded_mean_exact"]) == bool(r["rcv_exceeded_mean"])
    assert bool(r["lognormal_exceeded_mean_exact"]) == bool(r["lognormal_exceeded_mean"])


def test_without_baseline_everything_is_missing(table):
    r = table.loc[("D3", "creatinine")]
    assert r["n_baseline"] == 0
    for c in ("rcv_mean_exact_pct", "rcv_lognormal_mean_exact_up_pct", "p_significant_exact",
              "model2_lower", "model2_upper", "model2_log_lower", "model2_log_upper"):
        assert np.isnan(r[c]), c
    assert pd.isna(r["rcv_exceeded_mean_exact"]) and pd.isna(r["lognormal_exceeded_mean_exact"])
    assert np.isfinite(r["rcv_classical_pct"])
