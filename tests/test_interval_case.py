"""The case library's invented reference sample (case_library/dog_reference_sample) meets the
expectations written in its case.toml: nonparametric rows recomputed here with numpy, breed
groups with scipy's Box-Cox, the rest as recorded."""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import special, stats

from bayesbase.interval import estimate

from conftest import CASE_DIR, load_case

CASE = CASE_DIR / "dog_reference_sample"


@pytest.fixture(scope="module")
def case():
    return load_case(CASE)


@pytest.fixture(scope="module")
def result(case):
    return estimate(CASE / "results.csv", partition=case["interval"]["partition"], seed=0)


@pytest.fixture(scope="module")
def values(case):
    """Independent reading of the sample with pandas: healthy (or blank) specimens, first per dog,
    the excluded outliers of case.toml removed."""
    d = pd.read_csv(CASE / "results.csv", keep_default_na=False)
    d = d[d["state"] != "unwell"].sort_values(["patient", "analyte", "collected_at"])
    d = d.drop_duplicates(["patient", "analyte"], keep="first")
    drop = {(o["analyte"], o["specimen"]) for o in case["interval"]["excluded_outliers"]}
    keep = [(a, s) not in drop for a, s in zip(d["analyte"], d["specimen"])]
    return d[keep]


def _row(result, analyte, group):
    t = result.table
    r = t[(t["analyte"] == analyte) & (t["group"] == group)]
    assert len(r) == 1, (analyte, group)
    return r.iloc[0]


def test_input_steps_as_stated(case, result):
    notes = " ".join(result.notes)
    for p in case["interval"]["unwell_left_out"]:
        assert p in notes and "unwell" in notes
    for p in case["interval"]["second_specimen_left_out"]:
        assert p in notes and "first specimen" in notes
    excluded = result.outliers[result.outliers["action"] == "excluded"]
    got = set(zip(excluded["analyte"], excluded["specimen"]))
    want = {(o["analyte"], o["specimen"]) for o in case["interval"]["excluded_outliers"]}
    assert want <= got
    assert set(excluded.loc[excluded["group"] == "all", "specimen"]) == {o["specimen"] for o in case["interval"]["excluded_outliers"]}


EXP = [(e["analyte"], e["group"], e) for e in load_case(CASE)["interval_expect"]]


@pytest.mark.parametrize("analyte,group,exp", EXP, ids=[f"{a}-{g}" for a, g, _ in EXP])
def test_expected_interval(result, values, analyte, group, exp):
    r = _row(result, analyte, group)
    assert r["method"] == exp["method"] and r["n"] == exp["n"] and r["n_outliers"] == exp["n_outliers"]
    if exp["method"] == "none":
        assert math.isnan(r["lower"]) and math.isnan(r["upper"])
        return
    for k in ("lower", "upper", "center"):
        assert r[k] == pytest.approx(exp[k], rel=1e-5), k
    assert (r["lower_ci_low"], r["lower_ci_high"]) == pytest.approx(tuple(exp["lower_ci"]), rel=1e-4)
    assert (r["upper_ci_low"], r["upper_ci_high"]) == pytest.approx(tuple(exp["upper_ci"]), rel=1e-4)
    v = values[values["analyte"] == analyte]
    if group != "all":
        v = v[("breed=" + v["breed"]) == group]
    x = np.sort(v["value"].to_numpy(dtype=float))
    assert x.size == exp["n"]
    if exp["method"] == "nonparametric":
        # numpy: rank p(n + 1) quantiles ("weibull"); order statistics from the binomial ranks
        # (CLSI EP28-A3c): 1-7 and n-6..n for n = 129-130 (scipy.stats.binom)
        np.testing.assert_allclose([r["lower"], r["upper"]], np.quantile(x, [0.025, 0.975], method="weibull"))
        assert r["center"] == pytest.approx(np.median(x))
        n = x.size
        F = stats.binom.cdf(np.arange(n + 1), n, 0.025)
        r1 = max(k for k in range(1, n + 1) if F[k - 1] <= 0.05)
        r2 = min(k for k in range(1, n + 1) if F[k - 1] >= 0.95)
        assert (r1, r2) == (1, 7)
        assert (r["lower_ci_low"], r["lower_ci_high"]) == (x[r1 - 1], x[r2 - 1])
        assert (r["upper_ci_low"], r["upper_ci_high"]) == (x[n - r2], x[n - r1])
    else:
        # scipy.stats.boxcox + mean -/+ 1.96 SD + scipy.special.inv_boxcox
        y, lam = stats.boxcox(x)
        z = stats.norm.ppf(0.975)
        assert r["lower"] == pytest.approx(special.inv_boxcox(y.mean() - z * y.std(ddof=1), lam), rel=1e-6)
        assert r["upper"] == pytest.approx(special.inv_boxcox(y.mean() + z * y.std(ddof=1), lam), rel=1e-6)
        # bootstrap CI half-width near 1.645 x the normal-theory SE of a limit,
        # SE = s sqrt(1/n + z^2 / (2 (n - 1))) on the transformed scale (CLSI EP28-A3c; Harris &
        # Boyd 1995 [from memory]); lambda's own uncertainty widens it, hence the broad band
        se = y.std(ddof=1) * math.sqrt(1 / x.size + z * z / (2 * (x.size - 1)))
        for lo, hi in ((r["lower_ci_low"], r["lower_ci_high"]), (r["upper_ci_low"], r["upper_ci_high"])):
            half = (stats.boxcox(np.array([hi]), lam)[0] - stats.boxcox(np.array([lo]), lam)[0]) / 2
            assert 0.6 < half / (1.645 * se) < 1.7


def test_partition_and_pack_fragment(case, result):
    import tomllib

    sep = result.partitions.groupby("analyte")["separate"].any()
    assert sorted(sep[sep].index) == sorted(case["interval"]["separate_by_breed"])
    frag = tomllib.loads(result.pack_fragment())
    for analyte, breeds in case["interval"]["breed_centers"].items():
        for b, v in breeds.items():
            assert frag["analytes"][analyte]["breed_centers"][b]["value"] == pytest.approx(v, rel=1e-5)
    for a in case["interval"]["cvg_empty"]:
        assert math.isnan(_row(result, a, "all")["cvg_pct"])
        assert "cvg" not in frag["analytes"][a]
    assert "total_t4" not in frag["analytes"]  # no interval, nothing to write
