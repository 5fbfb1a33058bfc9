"""The case-library study (case_library/dog_bv_study_example): its recorded expectations, the
simulation truth inside the 95 % intervals, statsmodels MixedLM agreement on its data, and (slow)
the Bayesian model on it end to end."""
from __future__ import annotations

import math
import tomllib
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from bayesbase.study import estimate, write_outputs

ROOT = Path(__file__).resolve().parents[1]
CASE_DIR = ROOT / "case_library" / "dog_bv_study_example"
with open(CASE_DIR / "case.toml", "rb") as _fh:
    CASE = tomllib.load(_fh)
EXPECT = CASE["study_expect"]


@pytest.fixture(scope="module")
def result():
    return estimate(CASE_DIR / "results.csv")


def test_case_file_is_a_study_case():
    assert CASE["kind"] == "study" and CASE["species"] == "dog"
    assert "expect" not in CASE  # assessment expectations do not apply to a study case
    raw = pd.read_csv(CASE_DIR / "results.csv")
    assert raw["patient"].nunique() == 12
    assert raw.groupby(["patient", "analyte"])["specimen"].nunique().eq(6).all()
    assert raw.groupby(["specimen", "analyte"])["replicate"].count().eq(2).all()
    assert CASE["patient"] in set(raw["patient"])


@pytest.mark.parametrize("exp", EXPECT, ids=[e["analyte"] for e in EXPECT])
def test_recorded_estimates_and_removals(result, exp):
    row = result.estimates.set_index("analyte").loc[exp["analyte"]]
    assert row["n_animals"] == exp["n_animals"]
    assert row["n_removed"] == exp["n_removed"]
    for c in ("cva", "cvi", "cvg"):
        assert row[f"{c}_pct"] == pytest.approx(exp[f"{c}_pct"], rel=exp["rel_tol"]), c
    rem = result.removed[result.removed["analyte"] == exp["analyte"]]
    got = sorted(f"step {r.step} {r.animal}" + (f" {r.specimen}" if r.specimen else "") for r in rem.itertuples())
    assert got == sorted(exp["removed"])


@pytest.mark.parametrize("exp", EXPECT, ids=[e["analyte"] for e in EXPECT])
def test_simulation_truth_inside_the_intervals(result, exp):
    """The case was simulated with known CVA, CVI and CVG (case.toml story): each 95 % interval
    contains its simulated value."""
    row = result.estimates.set_index("analyte").loc[exp["analyte"]]
    for c in ("cva", "cvi", "cvg"):
        assert row[f"{c}_lower"] <= exp[f"true_{c}_pct"] <= row[f"{c}_upper"], c


def test_case_agrees_with_statsmodels_reml(result):
    """On the case's retained results (after the outlier steps; the two analytes with a removal,
    so nearly balanced data), the classical CVs agree with statsmodels MixedLM REML within 5 %
    (relative)."""
    pytest.importorskip("statsmodels")
    import statsmodels.formula.api as smf

    s = result.series[result.series["kept"] & result.series["analyte"].isin(["creatinine", "urea"])]
    for aid, d in s.groupby("analyte"):
        c = 20.0
        df = pd.DataFrame({"animal": d["animal"].to_numpy(), "specimen": (d["animal"] + "/" + d["specimen"]).to_numpy(),
                           "z": (d["ln_value"] - d["ln_value"].mean()).to_numpy() * c})
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            m = smf.mixedlm("z ~ 1", df, groups="animal", re_formula="1", vc_formula={"specimen": "0 + C(specimen)"})
            r = m.fit(reml=True, method="bfgs", gtol=1e-8, maxiter=5000)
        ref = {"cvg": float(r.cov_re.iloc[0, 0]) / c**2, "cvi": float(r.vcomp[0]) / c**2, "cva": float(r.scale) / c**2}
        row = result.estimates.set_index("analyte").loc[aid]
        for comp, v in ref.items():
            assert row[f"{comp}_pct"] == pytest.approx(100 * math.sqrt(math.expm1(v)), rel=0.05), (aid, comp)


def test_case_still_assesses_as_a_patient_record():
    """The case library's assessment test runs every case folder through assess(); the study case
    must stay a valid patient record for its named patient."""
    from bayesbase.assessment import assess
    from bayesbase.io import read_results as load_results

    a = assess(load_results(CASE_DIR / "results.csv"), patient=CASE["patient"])
    assert len(a.table) == 4
    assert np.isfinite(a.table["p_change"]).all()


@pytest.mark.slow
def test_bayesian_model_on_the_case_end_to_end(tmp_path):
    """The real Bayesian model (bayesbase.study.bayes) on one analyte of the case, small sampling:
    rows present, convergence reported, the interval of the median CVI contains the simulated
    6 %, and a converged fit feeds the pack fragment with its spread."""
    try:
        import bayesbase.study.bayes  # noqa: F401
    except ImportError as exc:  # the model is built in parallel; skip until it lands
        pytest.skip(f"bayesbase.study.bayes not importable: {exc}")
    r = estimate(CASE_DIR / "results.csv", analytes=["creatinine"], method="both", draws=300, tune=300, chains=2,
                 seed=1)
    est = r.estimates.set_index("method")
    assert {"anova"} < set(est.index)
    brow = est.loc["bayes"] if "bayes" in est.index else est.loc["bayes (not converged)"]
    assert brow["cvi_lower"] <= 6.0 <= brow["cvi_upper"]
    assert np.isfinite(brow["cvi_spread_log_sd"])
    paths = write_outputs(r, tmp_path, figures=False)
    frag = tomllib.loads(paths["pack.toml"].read_text())
    src = frag["analytes"]["creatinine"]["cvi"]["source"]
    assert ("Bayesian" in src) == ("bayes" in est.index)
