"""Closed forms against published check values (sources named beside each check)."""
import math

import numpy as np
import pytest
from scipy import stats

from bayesbase import classical


def test_z_values_match_scipy():
    # Z quantiles (two-sided 95 % 1.960, one-sided 95 % 1.645): scipy.stats.norm.ppf is the reference
    assert classical.z_two_sided(0.95) == pytest.approx(stats.norm.ppf(0.975), abs=1e-12)
    assert classical.z_one_sided(0.95) == pytest.approx(stats.norm.ppf(0.95), abs=1e-12)
    assert classical.z_two_sided(0.99) == pytest.approx(2.5758, abs=1e-4)


def test_rcv_factor_2_77():
    # "RCV = 2.77 x CVT" for two-sided 95 % (sqrt(2) * 1.96; Fraser CG, Clin Chem Lab Med 2012;50:807)
    assert classical.rcv_classical(0.0, 1.0) == pytest.approx(2.77, abs=0.005)


@pytest.mark.parametrize(
    "cva,cvi,cvg,rcv_pct,ii",
    [
        # J Cyst Fibros 2017, Table 3 (open access PMC8179972), sweat chloride; one-sided Z = 1.65;
        # the table's II is CVT/CVG
        (3.9, 4.4, 8.9, 13.7, 0.7),
        (4.1, 6.0, 7.0, 17.0, 1.0),
    ],
)
def test_rcv_and_ii_published_table(cva, cvi, cvg, rcv_pct, ii):
    rcv = 100 * classical.rcv_classical(cva / 100, cvi / 100, z=1.65)
    assert rcv == pytest.approx(rcv_pct, abs=0.05)
    assert round(float(classical.index_of_individuality(cvi / 100, cvg / 100, cva / 100)), 1) == ii


def test_lognormal_rcv_identity_and_asymmetry():
    # (1 + RCV_up)(1 + RCV_down) = 1 (Fokkema MR et al., Clin Chem 2006;52:1602)
    up, down = classical.rcv_lognormal(0.05, 0.30)
    assert (1 + up) * (1 + down) == pytest.approx(1.0, abs=1e-12)
    assert up > -down  # rises allowed to be larger than falls
    # small CVs: log-normal RCV tends to the classical one
    up, down = classical.rcv_lognormal(0.01, 0.02)
    assert up == pytest.approx(classical.rcv_classical(0.01, 0.02), rel=0.05)
    assert -down == pytest.approx(classical.rcv_classical(0.01, 0.02), rel=0.05)


def test_index_of_individuality_orientation():
    # Harris II = CVI/CVG; the reciprocal CVG/CVI is what several veterinary papers report
    assert classical.index_of_individuality(0.1, 0.25) == pytest.approx(0.4)
    assert classical.ii_category(0.4) == "low"
    assert classical.ii_category(1.0) == "intermediate"
    assert classical.ii_category(1.5) == "high"


def test_n_for_setpoint():
    # n = (Z * CVT / D)^2 rounded up (Fraser & Harris 1989, from memory): CVT 10 %, D 10 % -> 3.84 -> 4
    assert classical.n_for_setpoint(0.0, 0.10, 0.10) == 4
    assert classical.n_for_setpoint(0.03, 0.2, 0.10) == math.ceil((1.959964 * math.hypot(0.03, 0.2) / 0.1) ** 2)


def test_prob_significant_change():
    # Fraser CG, Clin Chem 2011;57:1635: Z = |d| / (sqrt(2) CVT); at d = RCV the two-sided probability is 0.95
    rcv = classical.rcv_classical(0.03, 0.1)
    assert classical.prob_significant_change(rcv, 0.03, 0.1) == pytest.approx(0.95, abs=1e-12)


def test_model2_interval_formula():
    # Coskun A et al., Clin Chem 2021 model 2 (log form): exp(mean ln x +/- Z sigma_T sqrt(1 + 1/n))
    x = np.array([80.0, 90.0, 85.0])
    lo, hi = classical.model2_interval(x, 0.03, 0.10)
    st = math.sqrt(math.log1p(0.03**2) + math.log1p(0.1**2))
    m = np.mean(np.log(x))
    assert lo == pytest.approx(math.exp(m - stats.norm.ppf(0.975) * st * math.sqrt(4 / 3)), rel=1e-12)
    assert hi == pytest.approx(math.exp(m + stats.norm.ppf(0.975) * st * math.sqrt(4 / 3)), rel=1e-12)


def test_chance_any_outside():
    # Clin Chem Lab Med 2004;42:747: k = 10 -> 60 % with none outside; k = 15 -> 46 %; k = 20 -> 64 % with one+
    assert 1 - classical.chance_any_outside(10) == pytest.approx(0.60, abs=0.005)
    assert 1 - classical.chance_any_outside(15) == pytest.approx(0.46, abs=0.005)
    assert classical.chance_any_outside(20) == pytest.approx(0.64, abs=0.005)


def test_cva_flag():
    # desirable imprecision CVA <= 0.5 CVI (Fraser & Petersen hierarchy, from memory)
    assert classical.cva_too_high(0.06, 0.1)
    assert not classical.cva_too_high(0.04, 0.1)
