"""The optional age term of ``bayesbase calibrate`` (issue 15): ages and reference ages of the
layout, the age-adjusted density of the specimen means, recovery of a simulated slope.

Outside references named beside each check: Python's ``datetime`` (age in whole days / 365.25,
the Julian year of the assessment), ``scipy.stats.multivariate_normal`` (the density with the
set point integrated out: covariance diag(v) + sigma_g^2 J), statsmodels ``MixedLM`` (REML
slope of ln value on age with a random intercept per animal). Invented stores only
(``bayesbase.calibrate.simulate``).
"""
from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pandas as pd
import pytest

from bayesbase.calibrate.core import age_analytes, prepare, reference_methods, select_specimens
from bayesbase.calibrate.simulate import simulate_store
from bayesbase.priors import load_pack

SLOPE = 0.03  # invented true ln slope per year (demo number)


def _layout(frame, analytes=("creatinine",), age=True):
    pack = load_pack("dog")
    sel = select_specimens(frame, "dog", pack, list(analytes))
    return sel, prepare(sel.usable, reference_methods(sel.usable), age_analytes(pack, sel.analytes) if age else ())


def test_ages_reference_age_and_animals_without_birth_date():
    """Age of each specimen = whole days from birth to collection / 365.25 (Python datetime), the
    reference age is the median age of the specimens with a birth date, a specimen without one
    has x = 0, and the counts say how many animals have none."""
    frame, _ = simulate_store(seed=3, n_animals=30, n_specimens=3, age_years=(1, 12), p_no_birth_date=0.2)
    sel, data = _layout(frame)
    assert data.age_analytes == ["creatinine"]
    spec = sel.usable.drop_duplicates(["patient", "specimen"]).sort_values(["patient", "specimen"])
    want = np.array([np.nan if pd.isna(b) else (c.to_pydatetime() - b.to_pydatetime()).days / 365.25
                     for b, c in zip(spec["birth_date"], spec["collected_at"])])
    known = np.isfinite(want)
    assert 0 < (~known).sum() < len(want)  # some animals have no birth date
    ref = float(np.median(want[known]))
    assert data.age_ref["creatinine"] == pytest.approx(ref, abs=1e-12)
    np.testing.assert_allclose(data.age_x[known], want[known] - ref, atol=1e-12)
    assert np.all(data.age_x[~known] == 0.0)
    no_bd = spec.loc[~known, "patient"].nunique()
    assert data.age_counts["creatinine"] == (spec["patient"].nunique() - no_bd, no_bd, int(known.sum()))
    # the ages the assessment computes for the same rows (bayesbase.assessment.frame.history_frame)
    from bayesbase.assessment.frame import history_frame

    hist = history_frame(sel.usable).drop_duplicates(["patient", "specimen"]).sort_values(["patient", "specimen"])
    np.testing.assert_allclose(hist["age_years"].to_numpy(float)[known], want[known], atol=1e-12)


def test_age_term_only_for_age_dependent_analytes_with_birth_dates():
    """alt carries no age rule in the dog pack, creatinine does; without any birth date, or with
    the term switched off, creatinine has none and the layout says why."""
    pack = load_pack("dog")
    assert pack.analytes["creatinine"].age_dependent and not pack.analytes["alt"].age_dependent
    frame, _ = simulate_store(seed=4, n_animals=12, n_specimens=3, analytes=("creatinine", "alt"), age_years=(1, 9))
    _, data = _layout(frame, ("creatinine", "alt"))
    assert data.age_analytes == ["creatinine"]
    alt = data.cell_analyte[data.obs_cell] == data.analytes.index("alt")
    assert np.all(data.age_x[alt] == 0.0) and np.any(data.age_x[~alt] != 0.0)
    _, off = _layout(frame, ("creatinine", "alt"), age=False)
    assert off.age_analytes == [] and np.all(off.age_x == 0.0)
    blank = frame.assign(birth_date=pd.NaT).astype({"birth_date": "datetime64[ns]"})
    _, none = _layout(blank)
    assert none.age_analytes == [] and none.age_notes == {"creatinine": "no specimen has a birth date"}


def test_cli_age_term_reaches_calibrate(monkeypatch, tmp_path):
    """``--age-term`` calls calibrate with age_term=True (default False)."""
    import argparse

    from bayesbase.calibrate import cli, job
    from bayesbase.errors import BayesbaseError

    seen = []

    def fake(*args, **kw):
        seen.append(kw["age_term"])
        raise BayesbaseError("stop here")

    monkeypatch.setattr(job, "calibrate", fake)
    ap = argparse.ArgumentParser()
    cli.add_parser(ap.add_subparsers(dest="command"))
    for extra, want in (([], False), (["--age-term"], True)):
        assert cli.run(ap.parse_args(["calibrate", "--db", "x.sqlite", "--out", str(tmp_path), *extra])) == 2
        assert seen[-1] is want


# --------------------------------------------------------------------------- model (compiles PyTensor)
@pytest.mark.slow
def test_age_adjusted_density_matches_scipy_multivariate_normal():
    """With the age term, the potential of the specimen means, per specimen and per animal
    through its sufficient statistics (with the age moments sum x, sum x^2, sum x dev and per
    method sum x), equals the sum over cells of scipy.stats.multivariate_normal's log density
    with mean mu + breed offset + bias_j + beta x_j and covariance diag(v) + sigma_g^2 J. Two
    methods (the b_j x_j term counts), one animal without a birth date; the same density with
    beta = 0 differs (the check can fail)."""
    from scipy import stats

    from bayesbase.calibrate import model as M

    frame, _ = simulate_store(seed=6, n_animals=6, n_specimens=3, analytes=("creatinine", "alt"),
                              age_years=(1, 12), age_log_slopes={"creatinine": SLOPE}, p_no_birth_date=0.2)
    assert frame["birth_date"].isna().any()
    pack = load_pack("dog")
    _, data = _layout(frame, ("creatinine", "alt"))
    assert data.age_analytes == ["creatinine"] and data.bias_pairs
    pri = M.prior_values(pack, data.analytes)
    kw = {"cvi": "latent"} if "latent" in getattr(M, "CVI_FORMS", ()) else {}
    models = [M.build_model(data, pri, likelihood=lk, **kw) for lk in ("specimens", "animal_stats")]
    rng = np.random.default_rng(2)
    point = {k: rng.normal(0, 0.3, np.shape(v)) + (v if k.startswith("mu") else 0)
             for k, v in models[0].initial_point().items()}
    point["age_log_slope"] = np.array([0.04])

    def at_point(names, model):
        outs = model.replace_rvs_by_values([model[n] for n in names])
        return model.compile_fn(outs, inputs=model.value_vars, point_fn=True, on_unused_input="ignore")(point)

    got = [float(at_point(["specimen_means"], m)[0]) for m in models]
    offset = at_point(["breed_offset"], models[0])[0]
    breeds = sorted({b for _, b in data.breed_pairs})
    sa = np.array([math.sqrt(math.log1p(pack.analytes[a].cva ** 2)) for a in data.analytes])
    sg = np.exp(point["sigma_g_log__"])
    beta = np.zeros(len(data.analytes))
    beta[data.analytes.index("creatinine")] = 0.04

    def scipy_logp(beta):
        total = 0.0
        for c in range(len(data.cell_animal)):
            a = data.cell_analyte[c]
            b = breeds.index(data.breed_pairs[data.cell_breed[c]][1])
            obs = np.flatnonzero(data.obs_cell == c)
            cvi = np.exp(point["ln_cvi_median"][a] + np.exp(point["cvi_log_sd_log__"][a]) * point["cvi_z"][c])
            v = np.log1p(cvi**2) + sa[a] ** 2 / data.n_rep[obs]
            mean = (point["mu"][a] + offset[a, b] + np.append(point["method_log_bias"], 0.0)[data.obs_bias[obs]]
                    + beta[a] * data.age_x[obs])
            total += stats.multivariate_normal(mean, np.diag(v) + sg[a] ** 2).logpdf(data.y[obs])
        return total

    want = scipy_logp(beta)
    assert got[0] == pytest.approx(want, rel=1e-9, abs=1e-9)  # per specimen
    assert got[1] == pytest.approx(want, rel=1e-9, abs=1e-9)  # per animal (sufficient statistics)
    assert abs(scipy_logp(np.zeros_like(beta)) - want) > 1e-3


def _mixedlm_slope(usable) -> float:
    """statsmodels MixedLM (REML): ln value ~ breed + method + age, random intercept per animal,
    on the specimens with a birth date."""
    import statsmodels.formula.api as smf

    age = (usable["collected_at"] - usable["birth_date"]).dt.days / 365.25
    d = pd.DataFrame({"y": np.log(usable["value"].to_numpy(float)), "age": age, "breed": usable["breed"].astype(str),
                      "method": usable["method"].astype(str), "animal": usable["patient"].astype(str)}).dropna()
    fit = smf.mixedlm("y ~ 0 + C(breed) + C(method) + age", d, groups=d["animal"]).fit(reml=True)
    return float(fit.fe_params["age"])


@pytest.mark.slow
def test_recovers_a_simulated_age_slope(tmp_path):
    """Invented store: 80 dogs x 3 specimens, ages 1-12 years, creatinine ln slope 0.03 per year
    (3.05 % per year), 10 % of the dogs without a birth date. The 95 % credible interval of the
    age slope covers the truth and excludes 0; the classical REML slope (statsmodels MixedLM)
    lies inside it. The outputs carry it: a calibration.csv row, the page's age section with the
    reference age, and ``age_log_slope`` in idata.nc."""
    import arviz as az

    from bayesbase.calibrate.job import calibrate
    from bayesbase.calibrate.output import write_outputs

    frame, truth = simulate_store(seed=11, n_animals=80, n_specimens=3, age_years=(1, 12),
                                  age_log_slopes={"creatinine": SLOPE}, p_no_birth_date=0.1)
    cal = calibrate(frame, species="dog", draws=300, tune=300, chains=2, seed=1, cores=1, age_term=True)
    row = cal.table[cal.table["parameter"] == "age_slope"].iloc[0]
    assert row["lower"] <= math.expm1(SLOPE) <= row["upper"], row.to_dict()
    assert row["lower"] > 0.0, row.to_dict()
    ref = cal.data.age_ref["creatinine"]
    assert row["group"] == f"per year from age {ref:.2f} y" and abs(ref - truth["age_ref"]["creatinine"]) < 1.0
    assert 0 < cal.attrs["age_animals_without_birth_date"]["creatinine"] < 80
    reml = math.expm1(_mixedlm_slope(cal.selection.usable))
    assert row["lower"] <= reml <= row["upper"], (reml, row.to_dict())
    paths = write_outputs(cal, tmp_path, force=True, figure=False)
    csv = pd.read_csv(paths["calibration.csv"])
    assert list(csv.loc[csv["parameter"] == "age_slope", "analyte"]) == ["creatinine"]
    page = paths["calibration.html"].read_text(encoding="utf-8")
    assert "<h2>Age term</h2>" in page and f"<td>{ref:.2f}</td>" in page
    assert "age_log_slope" in az.from_netcdf(paths["idata.nc"]).posterior
