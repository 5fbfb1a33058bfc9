"""``bayesbase calibrate``: usable-result selection, reference method, the pack fragment and its
round trip through the pack schema, the exact marginal likelihood, and (slow) recovery of a
simulated store's truth.

Outside references named beside each check:
* the assessment's own history roles (``bayesbase.assess``): the selection must agree row by row;
* hashlib: the SHA-256 of the input file;
* the pack schema (``bayesbase.priors.load_pack``): the fragment must load and carry its numbers;
* scipy.stats.multivariate_normal: the marginal density of a cell's specimen means with the set
  point integrated out;
* statsmodels MixedLM (REML; fixed effects breed and method, random intercept per animal): a
  classical estimate of the breed centres, the method bias and sigma_g against which the
  posterior is compared; the simulated truth (invented demo data) for coverage.
"""
from __future__ import annotations

import hashlib
import math

import numpy as np
import pandas as pd
import pytest

from bayesbase.calibrate.core import (
    UNKNOWN_BREED,
    load_input,
    prepare,
    reference_methods,
    select_specimens,
)
from bayesbase.calibrate.simulate import simulate_store
from bayesbase.contract import CANONICAL_COLUMNS, CANONICAL_DTYPES
from bayesbase.errors import BayesbaseError
from bayesbase.priors import load_pack


def _frame(rows):
    """Canonical frame from (patient, specimen, day, analyte, value, method, state, extra) rows."""
    recs = []
    for k, (pat, spec, day, analyte, value, method, state, extra) in enumerate(rows):
        unit = {"creatinine": "umol/L", "alt": "U/L", "glucose": "mmol/L"}[analyte]
        rec = dict(patient=pat, species="dog", breed="beagle", sex="female_neutered",
                   birth_date=pd.Timestamp("2018-01-01"), specimen=spec,
                   collected_at=pd.Timestamp("2024-01-01") + pd.Timedelta(days=day), analyte=analyte,
                   value=value, unit=unit, reported_value=f"{value:g}", reported_unit=unit, censor="",
                   method=method, replicate=1, fasted=pd.NA, haemolysis=np.nan, lipaemia=np.nan,
                   icterus=np.nan, state=state, source_file="invented", source_row=k + 2)
        rec.update(extra)
        recs.append(rec)
    df = pd.DataFrame(recs)[list(CANONICAL_COLUMNS)].astype(CANONICAL_DTYPES)
    return df.sort_values(["patient", "collected_at", "specimen", "analyte", "replicate"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def mixed_frame():
    """Invented: two dogs, healthy/blank/unwell visits, an icteric creatinine, a censored ALT."""
    A, B = "analyser A", "analyser B"
    rows = [
        ("D1", "S1", 0, "creatinine", 90.0, A, "healthy", {}),
        ("D1", "S1", 0, "alt", 30.0, A, "healthy", {}),
        ("D1", "S2", 30, "creatinine", 95.0, A, "", {}),
        ("D1", "S2", 30, "alt", 33.0, A, "", {}),
        ("D1", "S3", 60, "creatinine", 180.0, A, "unwell", {}),
        ("D1", "S3", 60, "alt", 90.0, A, "unwell", {}),
        ("D1", "S4", 90, "creatinine", 70.0, B, "healthy", {"icterus": 9.0}),
        ("D1", "S4", 90, "alt", 31.0, B, "healthy", {"icterus": 9.0}),
        ("D2", "T1", 0, "creatinine", 100.0, B, "healthy", {}),
        ("D2", "T1", 0, "alt", 10.0, B, "healthy", {"censor": "left", "reported_value": "<10"}),
        ("D2", "T2", 40, "creatinine", 104.0, A, "healthy", {}),
        ("D2", "T2", 40, "alt", 25.0, A, "healthy", {}),
        ("D2", "T3", 80, "creatinine", 99.0, A, "", {}),
        ("D2", "T3", 80, "alt", 27.0, A, "", {}),
    ]
    return _frame(rows)


def test_selection_leaves_out_unwell_compromised_and_censored(mixed_frame):
    sel = select_specimens(mixed_frame, "dog", load_pack("dog"))
    h = sel.history.set_index(["specimen", "analyte"])
    assert h.loc[("S3", "creatinine"), "role"] == "unwell"
    assert h.loc[("S3", "alt"), "role"] == "unwell"
    # dog pack: creatinine icterus threshold 5 (index 9 is above), ALT has no icterus threshold
    assert h.loc[("S4", "creatinine"), "role"] == "excluded"
    assert "sample quality" in h.loc[("S4", "creatinine"), "reason"]
    assert h.loc[("S4", "alt"), "role"] == "baseline"
    assert h.loc[("T1", "alt"), "role"] == "excluded" and "censored" in h.loc[("T1", "alt"), "reason"]
    assert len(sel.usable) == 14 - 2 - 1 - 1
    assert set(sel.usable["state"]) == {"healthy", ""}


def test_selection_agrees_with_the_assessment_history(mixed_frame):
    """Outside reference: ``bayesbase.assess`` run on the same rows. Every earlier row the
    assessment calls unwell, excluded or baseline gets the same role here (censored rows aside,
    which the assessment keeps as censored baselines and the calibration leaves out)."""
    from bayesbase.assessment import assess

    a = assess(mixed_frame, engine="exact")
    hist = a.history
    earlier = hist[hist["role"].isin(["baseline", "unwell", "excluded"])]
    sel = select_specimens(mixed_frame, "dog", load_pack("dog")).history.set_index(["specimen", "analyte"])
    assert len(earlier) >= 8
    for r in earlier.itertuples():
        mine = sel.loc[(r.specimen, r.analyte)]
        if r.censor:
            assert mine["role"] == "excluded"
        else:
            assert mine["role"] == r.role, (r.specimen, r.analyte)


def test_reference_method_is_the_most_frequent_or_the_named_one(mixed_frame):
    sel = select_specimens(mixed_frame, "dog", load_pack("dog"))
    assert reference_methods(sel.usable) == {"alt": "analyser A", "creatinine": "analyser A"}
    assert reference_methods(sel.usable, "analyser B") == {"alt": "analyser B", "creatinine": "analyser B"}
    with pytest.raises(BayesbaseError, match="reference method 'analyser C'"):
        reference_methods(sel.usable, "analyser C")
    # a tie goes to the first name in alphabetical order
    tie = sel.usable[sel.usable["analyte"] == "creatinine"].iloc[:4].copy()
    tie["method"] = ["zeta", "alpha", "zeta", "alpha"]
    assert reference_methods(tie) == {"creatinine": "alpha"}


def test_layout_counts_and_indices(mixed_frame):
    sel = select_specimens(mixed_frame, "dog", load_pack("dog"), analytes=["creatinine"])
    data = prepare(sel.usable, reference_methods(sel.usable))
    assert data.analytes == ["creatinine"]
    assert data.n_obs == 5 and len(data.cell_animal) == 2
    assert data.bias_pairs == [("creatinine", "analyser B")]
    # the one analyser-B specimen points to the bias, the others to the reference slot (K = 1)
    assert sorted(data.obs_bias.tolist()) == [0, 1, 1, 1, 1]
    assert np.allclose(np.sort(data.y), np.sort(np.log([90, 95, 100, 104, 99])))
    assert data.counts[("creatinine", "analyte", "")] == (2, 5)


def test_bad_requests_are_refused(mixed_frame):
    pack = load_pack("dog")
    with pytest.raises(BayesbaseError, match="species 'cat'"):
        select_specimens(mixed_frame, "cat", pack)
    with pytest.raises(BayesbaseError, match="'glucose' has no result"):
        select_specimens(mixed_frame, "dog", pack, analytes=["glucose"])


def test_input_kinds_and_their_hashes(tmp_path, mixed_frame):
    """Outside reference: hashlib over the file's bytes; a store is recognised by its SQLite header."""
    from bayesbase.io import to_tidy_csv
    from bayesbase.store import Store

    csv = tmp_path / "results.csv"
    to_tidy_csv(mixed_frame, csv)
    frame, src = load_input(csv)
    assert src.kind == "file" and src.sha256 == hashlib.sha256(csv.read_bytes()).hexdigest()
    db = tmp_path / "store.db"
    with Store(db) as st:
        st.import_frame(mixed_frame, "invented")
    f2, s2 = load_input(db)
    assert s2.kind == "store" and len(f2) == len(mixed_frame)
    _, s3 = load_input(mixed_frame)
    assert s3.kind == "frame" and s3.sha256 == s2.sha256  # same results, same content hash


# --------------------------------------------------------------------------- fragment
def _fake_calibration(tmp_path, converged=True, center=95.0):
    """A Calibration built by hand (no sampling) around the dog pack's creatinine."""
    import arviz as az

    from bayesbase.calibrate.job import Calibration, TABLE_COLUMNS, to_dataset

    frame, _ = simulate_store(seed=3, n_animals=6, n_specimens=2)
    pack = load_pack("dog")
    sel = select_specimens(frame, "dog", pack)
    data = prepare(sel.usable, reference_methods(sel.usable))
    rows = [("creatinine", "center", "", 88.4, center, center * 0.95, center * 1.05, 6, 12),
            ("creatinine", "cvg", "", 0.286, 0.2, 0.15, 0.26, 6, 12),
            ("creatinine", "cvi", "", 0.0801, 0.09, 0.07, 0.11, 6, 12),
            ("creatinine", "cvi_log_sd", "", 0.219, 0.3, 0.1, 0.6, 6, 12),
            ("creatinine", "cva", "fixed (no replicates)", 0.03, 0.03, np.nan, np.nan, 6, 12),
            ("creatinine", "breed_center", "beagle", 88.4, 85.0, 80.0, 90.0, 2, 4),
            ("creatinine", "breed_center", "border collie", 88.4, 105.0, 99.0, 111.0, 2, 4),
            ("creatinine", "breed_center", UNKNOWN_BREED, 88.4, 96.0, 90.0, 101.0, 2, 4),
            ("creatinine", "method_bias", "demo analyser A", 0.0, 0.0, 0.0, 0.0, 6, 9),
            ("creatinine", "method_bias", "demo analyser B", 0.0, 0.08, 0.05, 0.11, 3, 3)]
    table = pd.DataFrame(rows, columns=list(TABLE_COLUMNS))
    sha = hashlib.sha256(b"invented store").hexdigest()
    attrs = dict(pack_id="dog", pack_sha256=pack.sha256, pack_ref="dog", species="dog", engine="mcmc-calibrate",
                 seed=7, sampler="pymc", draws=10, tune=10, chains=2, seconds=1.0, source_kind="store",
                 source_label=str(tmp_path / "store.db"), source_sha256=sha, n_animals=6, n_specimens=12, n_results=12,
                 n_cells=6, analytes=["creatinine"], reference_methods={"creatinine": "demo analyser A"},
                 converged=converged, date="2026-12-03", bayesbase_version="x", ci_prob=0.95,
                 priors={"creatinine": "invented"}, cvi_predictive_log_sd={"creatinine": 0.33})
    rng = np.random.default_rng(0)
    idata = az.from_dict(posterior={"cvi": np.exp(rng.normal(np.log(0.09), 0.05, (2, 10, 1)))},
                         coords={"analyte": ["creatinine"]}, dims={"cvi": ["analyte"]})
    diag = dict(max_r_hat=1.0 if converged else 1.2, min_ess_bulk=500.0, min_ess_tail=500.0, divergences=0,
                converged=converged, checks={"r_hat_ok": converged}, thresholds=dict(r_hat_max=1.01, ess_min=400.0))
    return Calibration(table=table, dataset=to_dataset(table, attrs), idata=idata, diagnostics=diag,
                       selection=sel, data=data, attrs=attrs)


def test_fragment_round_trips_through_the_pack_schema(tmp_path):
    """Outside reference: the pack schema (``load_pack``) reads the fragment layered over dog."""
    from bayesbase.calibrate.output import fragment_toml

    cal = _fake_calibration(tmp_path)
    path = tmp_path / "pack.toml"
    path.write_text(fragment_toml(cal), encoding="utf-8")
    pk = load_pack(path)
    base = load_pack("dog")
    cr = pk.analytes["creatinine"]
    assert pk.id.startswith("dog+calibrated-")
    assert cr.center == pytest.approx(95.0) and cr.cvg == pytest.approx(0.2) and cr.cvi == pytest.approx(0.09)
    assert cr.cvi_log_sd == pytest.approx(0.33)  # the predictive SD, not the spread alone
    assert cr.cva == pytest.approx(base.analytes["creatinine"].cva)  # fixed CVA is not written
    assert cr.breed_centers["beagle"] == pytest.approx(85.0)
    assert cr.breed_centers["border_collie"] == pytest.approx(105.0)
    assert cr.breed_centers["greyhound"] == base.analytes["creatinine"].breed_centers["greyhound"]  # inherited
    assert UNKNOWN_BREED not in cr.breed_centers and "(unknown)" not in str(cr.breed_centers)
    for fld in ("center", "cvg", "cvi", "cvi_log_sd", "breed_centers.beagle"):
        cn = pk.cited["creatinine"][fld]
        assert cn.provenance == "calibrated"
        assert cal.attrs["source_sha256"] in cn.source
    assert "prior: pack dog value 88.4" in pk.cited["creatinine"]["center"].note
    assert pk.analytes["alt"].center == base.analytes["alt"].center  # untouched analytes inherited


def test_fragment_refused_by_the_schema_is_not_written(tmp_path):
    """A centre outside the base pack's population interval (61.88-114.92 umol/L) breaks the
    schema rule ri_lower < center < ri_upper: nothing is left in the folder."""
    from bayesbase.calibrate.output import write_outputs
    from bayesbase.errors import PackError

    cal = _fake_calibration(tmp_path, center=150.0)
    out = tmp_path / "out"
    with pytest.raises(PackError, match="ri_lower < center < ri_upper"):
        write_outputs(cal, out, figure=False)
    assert not (out / "pack.toml").exists() and not (out / ".pack.toml.tmp").exists()


def test_unconverged_fit_writes_no_fragment_unless_forced(tmp_path):
    from bayesbase.calibrate.output import write_outputs

    cal = _fake_calibration(tmp_path, converged=False)
    out = tmp_path / "out"
    paths = write_outputs(cal, out, figure=True)
    assert "pack.toml" not in paths and not (out / "pack.toml").exists()
    assert {"calibration.csv", "idata.nc", "calibration.html", "cvi_prior_posterior.png"} <= set(paths)
    page = (out / "calibration.html").read_text(encoding="utf-8")
    assert "did not converge" in page and "Decision support, not a diagnosis." in page
    back = pd.read_csv(out / "calibration.csv")
    assert list(back.columns) == ["analyte", "parameter", "group", "prior_value", "estimate", "lower", "upper",
                                  "n_animals", "n_specimens"]
    forced = write_outputs(cal, out, force=True, figure=False)
    text = forced["pack.toml"].read_text(encoding="utf-8")
    assert text.startswith("# WARNING: THE FIT DID NOT CONVERGE") and "NOT CONVERGED" in load_pack(forced["pack.toml"]).description
    # the mark travels in the pack id and title, which every assessment and report made with it prints
    pk = load_pack(forced["pack.toml"])
    assert pk.id.endswith("-not-converged") and "NOT CONVERGED (forced)" in pk.title
    ok = load_pack(write_outputs(_fake_calibration(tmp_path, converged=True), tmp_path / "ok",
                                 figure=False)["pack.toml"])
    assert "not-converged" not in ok.id and "NOT CONVERGED" not in ok.title


def test_dataset_has_named_dims(tmp_path):
    ds = _fake_calibration(tmp_path).dataset
    assert set(ds["center_ci"].dims) == {"analyte", "ci_bound"}
    assert ds["breed_center"].dims == ("analyte", "breed")
    assert float(ds["method_bias"].sel(analyte="creatinine", method_name="demo analyser B")) == pytest.approx(0.08)
    assert "sample" not in ds.dims


def test_cli_needs_exactly_one_input(capsys):
    import argparse

    from bayesbase.calibrate import cli

    ap = argparse.ArgumentParser()
    cli.add_parser(ap.add_subparsers(dest="command"))
    assert cli.run(ap.parse_args(["calibrate", "--out", "x"])) == 2
    assert "either a results FILE or --db" in capsys.readouterr().err


# --------------------------------------------------------------------------- model (compiles PyTensor)
@pytest.mark.slow
def test_marginal_density_matches_scipy_multivariate_normal():
    """The potential of the specimen means (set points integrated out), written per specimen and
    per animal through its sufficient statistics, equals the sum over cells of scipy's
    multivariate normal log density with covariance diag(v) + sigma_g^2 J (outside reference:
    scipy.stats.multivariate_normal). Two methods, so the bias terms of the statistics count."""
    from scipy import stats

    from bayesbase.calibrate import model as M

    frame, _ = simulate_store(seed=4, n_animals=5, n_specimens=3, analytes=("creatinine", "alt"))
    frame = frame.drop(index=[1, 7]).reset_index(drop=True)  # unbalanced cells
    pack = load_pack("dog")
    sel = select_specimens(frame, "dog", pack)
    data = prepare(sel.usable, reference_methods(sel.usable))
    pri = M.prior_values(pack, data.analytes)
    m = M.build_model(data, pri, likelihood="specimens", cvi="latent")  # one latent CVI z per animal
    m_stats = M.build_model(data, pri, likelihood="animal_stats", cvi="latent")
    rng = np.random.default_rng(1)
    point = {k: rng.normal(0, 0.3, np.shape(v)) + (v if k.startswith("mu") else 0)
             for k, v in m.initial_point().items()}

    def at_point(names, model):
        outs = model.replace_rvs_by_values([model[n] for n in names])
        return model.compile_fn(outs, inputs=model.value_vars, point_fn=True, on_unused_input="ignore")(point)

    got, offset = at_point(["specimen_means", "breed_offset"], m)
    got_stats = float(at_point(["specimen_means"], m_stats)[0])
    mu = point["mu"]
    sg = np.exp(point["sigma_g_log__"])
    ln_med, spread = point["ln_cvi_median"], np.exp(point["cvi_log_sd_log__"])
    bias = point["method_log_bias"]
    breeds = sorted({b for _, b in data.breed_pairs})
    sa = np.array([math.sqrt(math.log1p(pack.analytes[a].cva ** 2)) for a in data.analytes])
    want = 0.0
    for c in range(len(data.cell_animal)):
        a = data.cell_analyte[c]
        b = breeds.index(data.breed_pairs[data.cell_breed[c]][1])
        obs = np.flatnonzero(data.obs_cell == c)
        cvi = np.exp(ln_med[a] + spread[a] * point["cvi_z"][c])
        v = np.log1p(cvi**2) + sa[a] ** 2 / data.n_rep[obs]
        mean = mu[a] + offset[a, b] + np.append(bias, 0.0)[data.obs_bias[obs]]
        cov = np.diag(v) + sg[a] ** 2
        want += stats.multivariate_normal(mean, cov).logpdf(data.y[obs])
    assert got == pytest.approx(want, rel=1e-9, abs=1e-9)
    assert got_stats == pytest.approx(want, rel=1e-9, abs=1e-9)  # per-animal sufficient statistics


@pytest.mark.slow
def test_marginal_form_equals_the_integral_over_the_set_point():
    """Exact agreement of the two forms of one animal's likelihood on a small case: the
    marginalised form (``model._cell_logp``, set point integrated out in closed form) against the
    non-marginalised form, prod_j Normal(y_j | theta + b_j, v_j) x Normal(theta | m, sigma_g^2),
    integrated over theta numerically (outside reference: scipy.integrate.quad with
    scipy.stats.norm). Unequal variances (replicates, animal CVI) and a method bias on one
    specimen; two animals, to check the sum over cells."""
    import pytensor.tensor as pt
    from scipy import integrate, stats

    from bayesbase.calibrate import model as M

    y = np.array([4.52, 4.61, 4.40, 4.70, 3.41, 3.38])  # invented ln values
    v = np.array([0.010, 0.006, 0.010, 0.004, 0.030, 0.025])
    bias = np.array([0.0, 0.0, 0.07, 0.0, 0.0, -0.05])
    cell = np.array([0, 0, 0, 0, 1, 1])
    m = np.array([4.45, 3.50])
    sg = np.array([0.20, 0.12])
    r = y - m[cell] - bias
    got = float(M._cell_logp(pt.as_tensor(r), pt.as_tensor(v), pt.as_tensor(sg**2), cell, 2).eval())

    def integral(c):
        k = cell == c

        def joint(theta):
            return math.exp(stats.norm.logpdf(y[k], theta + bias[k], np.sqrt(v[k])).sum()
                            + stats.norm.logpdf(theta, m[c], sg[c]))

        val, err = integrate.quad(joint, m[c] - 12 * sg[c], m[c] + 12 * sg[c], epsabs=0, epsrel=1e-12, limit=200)
        assert err < 1e-9 * val
        return math.log(val)

    want = integral(0) + integral(1)
    assert got == pytest.approx(want, rel=1e-9)
    # a wrong set-point variance must break the agreement (the check can fail)
    off = float(M._cell_logp(pt.as_tensor(r), pt.as_tensor(v), pt.as_tensor((1.1 * sg) ** 2), cell, 2).eval())
    assert abs(off - want) > 1e-3


def test_breed_layer_is_centred_for_large_breeds_only():
    """The per-level choice of parameterisation follows the animal counts of the layout."""
    from bayesbase.calibrate import model as M
    from bayesbase.calibrate.simulate import breed_list

    breeds = breed_list(40, {"big": 1.0, "small": 3})
    assert breeds.count("small") == 3 and breeds.count("big") == 37
    frame, _ = simulate_store(seed=2, n_animals=40, n_specimens=2, breed_counts={"beagle": 1.0, "border collie": 3})
    sel = select_specimens(frame, "dog", load_pack("dog"))
    data = prepare(sel.usable, reference_methods(sel.usable))
    flags = M.centred_breeds(data, ["beagle", "border collie"])
    assert flags.tolist() == [[True, False]]
    assert not M.centred_breeds(data, ["beagle", "border collie"], "noncentred").any()
    with pytest.raises(ValueError, match="breed_param"):
        M.centred_breeds(data, ["beagle"], "sideways")


def _mixedlm_reference(frame):
    """statsmodels MixedLM (REML): ln value ~ breed + method, random intercept per animal."""
    import statsmodels.formula.api as smf

    d = pd.DataFrame({"y": np.log(frame["value"].to_numpy(float)), "breed": frame["breed"].astype(str),
                      "method": frame["method"].astype(str), "animal": frame["patient"].astype(str)})
    fit = smf.mixedlm("y ~ 0 + C(breed) + C(method)", d, groups=d["animal"]).fit(reml=True)
    breed_log = {b: fit.fe_params[f"C(breed)[{b}]"] for b in sorted(d["breed"].unique())}
    bias = fit.fe_params["C(method)[T.demo analyser B]"]
    return breed_log, math.expm1(bias), math.sqrt(math.expm1(float(fit.cov_re.iloc[0, 0])))


@pytest.mark.slow
def test_recovers_a_simulated_store():
    """Invented store: 60 dogs x 4 specimens, 3 breeds, 2 methods (B reads 8 % high), creatinine
    with CVI median 9 %, spread 0.35 on ln CVI, CVG 20 %. Check: the 95 % credible interval
    covers the simulated truth of CVI median, its spread, CVG, every breed centre and the method
    bias; and the classical REML fit (statsmodels MixedLM) gives a method bias, breed centres
    and a CVG inside the same intervals."""
    from bayesbase.calibrate.job import calibrate

    frame, truth = simulate_store(seed=5, n_animals=60, n_specimens=4, analytes=("creatinine",), n_unwell=4)
    # target_accept 0.95: at 0.9 this 60-dog store gave 1 divergence in 500 draws after a change
    # that moved the model's log density by ~1e-14 only (same density, other rounding)
    cal = calibrate(frame, species="dog", draws=250, tune=300, chains=2, seed=3, target_accept=0.95)
    t = cal.table.set_index(["parameter", "group"])
    tr = truth["creatinine"]

    def covers(param, group, value):
        r = t.loc[(param, group)]
        assert r["lower"] <= value <= r["upper"], (param, group, value, r["lower"], r["upper"])

    covers("cvi", "", tr.cvi_median)
    covers("cvi_log_sd", "", tr.cvi_log_sd)
    covers("cvg", "", tr.cvg)
    covers("method_bias", "demo analyser B", tr.method_bias)
    for b in tr.breed_log_offsets:
        covers("breed_center", b, tr.breed_center(b))
    assert cal.selection.history["role"].eq("unwell").sum() == 4  # the unwell specimens were left out
    assert cal.diagnostics["max_r_hat"] < 1.05 and cal.diagnostics["divergences"] == 0
    usable = cal.selection.usable
    breed_log, bias, cvg = _mixedlm_reference(usable)
    covers("method_bias", "demo analyser B", bias)
    covers("cvg", "", cvg)
    for b, lb in breed_log.items():
        covers("breed_center", b, math.exp(lb))
    covers("center", "", math.exp(np.mean(list(breed_log.values()))))


def test_printed_intervals_stay_readable_when_bounds_are_negative(capsys):
    """A method bias's 95 % CrI often has negative bounds: "-0.08 to -0.02", never "-0.08--0.02"."""
    import types

    import pandas as pd

    from bayesbase.calibrate import cli as ccli

    table = pd.DataFrame([{"analyte": "creatinine", "parameter": "method_bias", "group": "analyser B",
                           "prior_value": 0.0, "estimate": -0.05, "lower": -0.08108, "upper": -0.01832}])
    ccli._print_table(types.SimpleNamespace(table=table))
    out = capsys.readouterr().out
    assert "-0.08108 to -0.01832" in out and "--" not in out
