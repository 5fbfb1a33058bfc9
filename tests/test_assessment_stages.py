"""Each stage of the assessment pipeline alone (bayesbase.assessment.*), then the whole.

The scenario is invented demo data: a young greyhound (P1) with a fasted healthy visit, an
unwell visit, a blank-state visit with a haemolysed, non-fasted specimen, an assessed specimen
on a new analyser with duplicate creatinine, and a later visit; a second dog (P2) whose last
creatinine is reported in mg/dL. Outside references: Fraser CG, Clin Chem Lab Med 2012;50:807
(classical RCV); Fokkema MR et al., Clin Chem 2006;52:1602 (log-normal RCV); Coskun A et al.,
Clin Chem 2021;67:374 (model-2 interval); Harris EK, Clin Chem 1974;20:1535 (CVI/CVG); normal
quantiles from scipy.stats.
"""
from __future__ import annotations

import ast
import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from bayesbase import classical, contract
from bayesbase.io import read_results
from bayesbase.validate import validate
from bayesbase.assessment import Assessment, assess
from bayesbase.assessment import cases as cases_mod
from bayesbase.assessment import comparisons, engine_step, flags, frame, packs, result, roles
from bayesbase.assessment.options import Options
from bayesbase.assessment.trend_cols import TREND_RULE, trend_columns
from bayesbase.errors import AnalyteNotInPack, BayesbaseError
from bayesbase.model.engine import exact_assess

from conftest import CASE_DIR, case_dirs, load_case

NOW = "2027-01-01"
COLS = ("patient,species,breed,birth_date,specimen,collected_at,analyte,value,unit,method,replicate,fasted,"
        "haemolysis,state")
ROWS = """
P1,dog,greyhound,2025-09-01,A1,2026-01-10 09:00,creatinine,100,umol/L,analyser-A,1,yes,10,healthy
P1,dog,greyhound,2025-09-01,A1,2026-01-10 09:00,glucose,5.0,mmol/L,analyser-A,1,yes,10,healthy
P1,dog,greyhound,2025-09-01,A1,2026-01-10 09:00,potassium,4.5,mmol/L,analyser-A,1,yes,10,healthy
P1,dog,greyhound,2025-09-01,A2,2026-02-10 09:00,creatinine,150,umol/L,analyser-A,1,yes,10,unwell
P1,dog,greyhound,2025-09-01,A2,2026-02-10 09:00,glucose,6.0,mmol/L,analyser-A,1,yes,10,unwell
P1,dog,greyhound,2025-09-01,A2,2026-02-10 09:00,potassium,4.4,mmol/L,analyser-A,1,yes,10,unwell
P1,dog,greyhound,2025-09-01,A3,2026-03-10 09:00,creatinine,105,umol/L,analyser-A,1,no,300,
P1,dog,greyhound,2025-09-01,A3,2026-03-10 09:00,glucose,5.5,mmol/L,analyser-A,1,no,300,
P1,dog,greyhound,2025-09-01,A3,2026-03-10 09:00,potassium,4.6,mmol/L,analyser-A,1,no,300,
P1,dog,greyhound,2025-09-01,A4,2026-04-10 09:00,creatinine,128,umol/L,analyser-B,1,no,150,healthy
P1,dog,greyhound,2025-09-01,A4,2026-04-10 09:00,creatinine,132,umol/L,analyser-B,2,no,150,healthy
P1,dog,greyhound,2025-09-01,A4,2026-04-10 09:00,glucose,5.2,mmol/L,analyser-B,1,no,150,healthy
P1,dog,greyhound,2025-09-01,A4,2026-04-10 09:00,potassium,5.0,mmol/L,analyser-B,1,no,150,healthy
P1,dog,greyhound,2025-09-01,A5,2026-05-10 09:00,creatinine,120,umol/L,analyser-B,1,yes,10,healthy
P2,dog,,,B1,2026-01-05 10:00,creatinine,90,umol/L,,1,yes,,healthy
P2,dog,,,B1,2026-01-05 10:00,glucose,5.1,mmol/L,,1,yes,,healthy
P2,dog,,,B2,2026-02-05 10:00,creatinine,1.1,mg/dL,,1,yes,,
"""
AT = "2026-04-10"  # P1: A4 (a bare date means the whole day); P2: B2


@pytest.fixture(scope="module")
def raw() -> pd.DataFrame:
    lines = [ln.split(",") for ln in ROWS.strip().splitlines()]
    return pd.DataFrame(lines, columns=COLS.split(",")).replace("", np.nan)


@pytest.fixture(scope="module")
def canon(raw) -> pd.DataFrame:
    return validate(raw, source="scenario.csv", now=NOW)


def _stages(canon, **kw):
    """Run the stages of assess up to the case batch (as pipeline.run does)."""
    opts = Options(at=kw.pop("at", AT), **kw)
    hist = frame.history_frame(canon, opts.patients)
    pk = packs.packs_by_species(hist, opts.pack, opts.priors)
    targets = roles.assessed_specimens(hist, opts.at)
    rows = roles.case_rows(hist, targets)
    pri = packs.row_priors(hist, rows.in_case, pk)
    ctx = roles.rule_context(hist, rows, pri, opts.keep_compromised)
    rl = roles.assign_roles(rows, ctx)
    hist["role"], hist["reason"] = rl.role, rl.reason
    batch = cases_mod.build_cases(hist, rows, rl, pri, pk, opts)
    return dict(opts=opts, hist=hist, packs=pk, targets=targets, rows=rows, priors=pri, ctx=ctx,
                roles=rl, batch=batch)


@pytest.fixture(scope="module")
def st(canon):
    return _stages(canon)


def _case(batch, patient, analyte) -> int:
    return [i for i, (p, a) in enumerate(zip(batch.patient, batch.analyte)) if (p, a) == (patient, analyte)][0]


def _row(hist, specimen, analyte):
    r = hist[(hist["specimen"] == specimen) & (hist["analyte"] == analyte)]
    assert len(r) >= 1
    return r.iloc[0]


# ------------------------------------------------------------------------------ contract
def test_contract_columns_are_the_readers_and_the_stores(canon):
    from bayesbase import store

    # store.py still declares its own copy (to be replaced by the contract)
    assert contract.CANONICAL_COLUMNS == store.CANONICAL_COLUMNS
    assert tuple(canon.columns) == contract.CANONICAL_COLUMNS
    assert {c: str(t) for c, t in canon.dtypes.items()} == contract.CANONICAL_DTYPES
    assert set(contract.ROLES) >= {"assessed", "baseline", "unwell", "excluded", "later"}


def test_is_canonical_accepts_reader_output_only(raw, canon):
    assert contract.is_canonical(canon)
    assert not contract.is_canonical(raw)
    assert not contract.is_canonical(canon.drop(columns=["source_row"]))
    assert not contract.is_canonical([1, 2, 3])
    # an assessment's history (extra columns role, reason, age_years) is canonical too
    a = assess(canon, at=AT, trend=False)
    assert contract.is_canonical(a.history)


# ------------------------------------------------------------------------------- options
def test_options_checked_once_and_frozen():
    with pytest.raises(BayesbaseError, match="unknown engine 'fast'"):
        Options(engine="fast")
    with pytest.raises(BayesbaseError, match="coverage"):
        Options(coverage=1.0)
    with pytest.raises(BayesbaseError, match="prior probability of change"):
        Options(prior_change=1.0)
    o = Options(patient=["P1", 2], method_bias=None)
    assert o.patients == {"P1", "2"} and o.method_bias == {} and o.mcmc_options == {}
    assert Options(patient=7).patients == {"7"} and Options().patients is None
    with pytest.raises(dataclasses.FrozenInstanceError):
        o.engine = "mcmc"


# --------------------------------------------------------------------------------- frame
def test_canonical_frame_from_path_frame_and_raw(tmp_path, raw, canon):
    f = tmp_path / "r.csv"
    raw.to_csv(f, index=False)
    from_path = frame.canonical_frame(f, now=NOW)
    assert from_path["source_file"].iloc[0] == "r.csv"
    as_is = frame.canonical_frame(canon)  # canonical: used as it is (copied), not re-validated
    assert as_is is not canon and as_is["source_file"].iloc[0] == "scenario.csv"
    pd.testing.assert_frame_equal(as_is, canon)
    validated = frame.canonical_frame(raw, now=NOW)
    assert contract.is_canonical(validated)
    with pytest.raises(BayesbaseError, match="file path or a pandas DataFrame"):
        frame.canonical_frame(42)


def test_history_frame_selects_sorts_and_ages(canon):
    shuffled = canon.sample(frac=1.0, random_state=np.random.default_rng(3).integers(1 << 30))
    hist = frame.history_frame(shuffled, {"P1"})
    assert set(hist["patient"]) == {"P1"}
    assert list(hist.index) == list(range(len(hist)))
    key = list(zip(hist["collected_at"], hist["specimen"], hist["analyte"], hist["replicate"]))
    assert key == sorted(key)
    # age in Julian years (365.25 days, common practice): 2025-09-01 -> 2026-04-10 is 221 days
    a4 = hist[hist["specimen"] == "A4"]["age_years"].iloc[0]
    assert a4 == pytest.approx(221 / 365.25, rel=1e-12)
    assert frame.history_frame(canon)["age_years"][canon["patient"].eq("P2").to_numpy()].isna().all()
    with pytest.raises(BayesbaseError, match="patient nobody not found"):
        frame.history_frame(canon, {"nobody"})
    with pytest.raises(BayesbaseError, match="no results to assess"):
        frame.history_frame(canon.iloc[0:0])


# --------------------------------------------------------------------------------- packs
def test_packs_loaded_once_per_species_and_checked(canon):
    cache: dict = {}
    a = packs.resolve_pack(None, "dog", None, cache)
    b = packs.resolve_pack(None, "dog", None, cache)
    assert a is b and len(cache) == 1 and a.species == "dog"
    assert packs.resolve_pack(a, "dog", None, cache) is a
    hist = frame.history_frame(canon)
    cat = hist.copy()
    cat.loc[cat["patient"] == "P2", "species"] = "cat"
    with pytest.raises(BayesbaseError, match="patient P2 is a cat but pack 'dog' is for dog"):
        packs.packs_by_species(cat, "dog")


def test_row_priors_name_the_patient_of_a_missing_analyte(canon, st):
    hist, rows, pk = st["hist"], st["rows"], st["packs"]
    si = st["priors"].column(lambda p: p.si, -1.0)
    for i in np.flatnonzero(rows.in_case):
        assert si[i] == pk["dog"].get(hist["analyte"].iloc[i]).si
    # P2 alone: glucose (B1 only) is in no case, so its rows get the fill value
    p2 = _stages(canon, patient="P2")
    si2 = p2["priors"].column(lambda p: p.si, -1.0)
    glucose = (p2["hist"]["analyte"] == "glucose").to_numpy()
    assert glucose.any() and np.all(si2[glucose] == -1.0) and np.all(si2[~glucose] > 0)
    odd = hist.copy()
    odd["analyte"] = odd["analyte"].astype(object)
    odd.loc[odd["specimen"] == "B2", "analyte"] = "not_an_analyte"
    t = roles.assessed_specimens(odd, None)
    r = roles.case_rows(odd, t)
    with pytest.raises(AnalyteNotInPack, match=r"not_an_analyte.*patient P2.*--priors"):
        packs.row_priors(odd, r.in_case, pk)


# --------------------------------------------------------------------------------- roles
def test_pick_assessed_by_id_date_and_latest():
    spec = pd.DataFrame({"specimen": ["X1", "X2", "X3"],
                         "collected_at": pd.to_datetime(["2026-01-01 09:00", "2026-02-01 18:00", "2026-03-01 08:00"])})
    assert roles.pick_assessed(spec, None) == "X3"
    assert roles.pick_assessed(spec, "X1") == "X1"
    assert roles.pick_assessed(spec, "2026-02-01") == "X2"  # the whole day counts
    assert roles.pick_assessed(spec, "2026-02-01T12:00") == "X1"
    assert roles.pick_assessed(spec, "2026-02-01T20:00+02:00") == "X2"  # 18:00 UTC
    with pytest.raises(BayesbaseError, match="neither a specimen id"):
        roles.pick_assessed(spec, "Q9")
    with pytest.raises(BayesbaseError, match="on or before 2025-01-01"):
        roles.pick_assessed(spec, "2025-01-01")


def test_each_baseline_rule_alone(st):
    ctx, rows, hist = st["ctx"], st["rows"], st["hist"]
    earlier = rows.earlier
    unwell, why = roles.unwell_rule(ctx, earlier)
    assert set(hist.loc[unwell, "specimen"]) == {"A2"} and "never used" in why
    bad, why_q = roles.sample_quality_rule(ctx, earlier)
    assert list(hist.loc[bad, ["specimen", "analyte"]].itertuples(index=False, name=None)) == [("A3", "potassium")]
    # dog pack: potassium haemolysis threshold 100, interference up
    assert why_q[bad].tolist() == ["sample quality: haemolysis index 300 above 100 (interference: up)"]
    kept_ctx = dataclasses.replace(ctx, keep_compromised=True)
    assert not roles.sample_quality_rule(kept_ctx, earlier)[0].any()
    fasting, why_f = roles.fasting_rule(ctx, earlier & ~unwell & ~bad)
    assert list(hist.loc[fasting, ["specimen", "analyte"]].itertuples(index=False, name=None)) == [("A3", "glucose")]
    # no fasted result left in the case: the non-fasted one stays
    only_a3 = earlier & (hist["specimen"] == "A3").to_numpy()
    assert not roles.fasting_rule(ctx, only_a3)[0].any()
    assert [r for _, r in roles.BASELINE_RULES] == [roles.unwell_rule, roles.sample_quality_rule, roles.fasting_rule]


def test_roles_and_reasons_of_every_row(canon):
    a = assess(canon, at=AT, trend=False)
    h = a.history
    expect = {
        ("A1", "creatinine"): ("baseline", ""),
        ("A2", "creatinine"): ("unwell", "state unwell: shown, never used for the set point"),
        ("A3", "creatinine"): ("baseline", "assumed healthy (state blank)"),
        ("A3", "glucose"): ("excluded", "not fasted (feeding-sensitive analyte; fasted baselines exist)"),
        ("A3", "potassium"): ("excluded", "sample quality: haemolysis index 300 above 100 (interference: up)"),
        ("A4", "creatinine"): ("assessed", ""),
        ("A5", "creatinine"): ("later", "collected with or after the assessed specimen"),
        ("B1", "creatinine"): ("baseline", ""),
        ("B1", "glucose"): ("not assessed", "analyte not measured in the assessed specimen"),
        ("B2", "creatinine"): ("assessed", ""),
    }
    for (spec, an), (role, reason) in expect.items():
        r = _row(h, spec, an)
        assert (r["role"], r["reason"]) == (role, reason), (spec, an)
    assert list(h.columns[-3:]) == ["age_years", "role", "reason"]
    kept = assess(canon, at=AT, trend=False, keep_compromised=True).history
    r = _row(kept, "A3", "potassium")
    assert (r["role"], r["reason"]) == ("baseline", "kept with inflated variance: haemolysis index 300 above 100 "
                                                    "(interference: up)")


# --------------------------------------------------------------------------------- cases
def test_case_batch_pads_baselines_and_averages_replicates(st):
    b = st["batch"]
    assert len(b) == 4
    i = _case(b, "P1", "creatinine")
    base = b.baselines
    assert base.n[i] == 2 and base.n_assumed[i] == 1 and base.specimens[i] == "A1;A3"
    np.testing.assert_allclose(base.y[i, :2], np.log([100.0, 105.0]), rtol=1e-15)
    assert base.r[i, :2].tolist() == [1.0, 1.0]
    assert b.assessed.n_rep[i] == 2
    assert math.exp(b.assessed.log_mean[i]) == pytest.approx(math.sqrt(128 * 132), rel=1e-14)
    assert b.breed[i] == "greyhound" and b.center[i] == b.prior[i].breed_centers["greyhound"]
    assert b.scalars["prior_mean"][i] == math.log(b.center[i])
    k = _case(b, "P1", "potassium")
    assert base.n[k] == 1 and np.isnan(base.y[k, 1]) and base.r[k, 1] == 0  # padding
    ca = b.case_arrays()
    assert ca.n_cases == 4 and ca.base_y.shape == base.y.shape


def test_kept_compromised_baseline_has_inflated_variance(canon):
    b = _stages(canon, keep_compromised=True)["batch"]
    k = _case(b, "P1", "potassium")
    assert b.baselines.n[k] == 2
    # variance inflated by sI^2 with sI = sqrt(ln(1 + CVI^2))
    si2 = math.log1p(b.prior[k].cvi ** 2)
    assert b.baselines.e[k, :2].tolist() == pytest.approx([0.0, si2], rel=1e-12)


def test_method_change_with_and_without_a_stated_bias(canon, st):
    b = st["batch"]
    i = _case(b, "P1", "creatinine")
    assert b.method.changed[i] and not b.method.corrected[i]
    assert b.scalars["new_y"][i] == b.assessed.log_mean[i] and b.scalars["new_extra_var"][i] == 0
    fixed = _stages(canon, method_bias={"creatinine": (0.05, 0.02)})["batch"]
    assert fixed.method.corrected[i]
    assert fixed.scalars["new_y"][i] == pytest.approx(fixed.assessed.log_mean[i] - math.log(1.05), abs=1e-15)
    assert fixed.scalars["new_extra_var"][i] == pytest.approx(math.log(1 + 0.02**2), rel=1e-14)
    assert not b.method.changed[_case(b, "P2", "creatinine")]  # no method recorded


# --------------------------------------------------------------------------------- flags
def _flag(name):
    return next(f for f in flags.CASE_FLAGS if f.__name__ == name)


def test_each_flag_alone(canon, st):
    b = st["batch"]
    cre, glu, pot, p2 = (_case(b, *k) for k in (("P1", "creatinine"), ("P1", "glucose"),
                                                 ("P1", "potassium"), ("P2", "creatinine")))
    assert flags.assumed_healthy(b)[cre] == "1 baseline(s) assumed healthy (state blank)"
    assert flags.assumed_healthy(b)[glu] == ""
    hae = _flag("haemolysis_over_threshold")(b)
    # the dog pack's potassium: haemolysis threshold 100, interference up (sourced in models/dog.toml)
    assert hae[pot] == flags.hil_words("haemolysis", 150, 100, "up")
    assert "falsely high" in hae[pot] and "clean, promptly separated specimen" in hae[pot]
    assert hae[glu] == ""  # 150 under the glucose threshold (500)
    assert flags.quality(b)[pot] == "haemolysis" and flags.quality(b)[glu] == "ok"
    assert flags.not_fasted(b)[glu] == "assessed specimen not fasted (feeding-sensitive analyte)"
    assert flags.not_fasted(b)[cre] == ""
    assert flags.method_changed(b)[cre] == ("not directly comparable: method changed (analyser-A -> analyser-B) "
                                            "and no between-method bias is given")
    assert flags.mixed_units(b)[p2] == "reported in different units (mg/dL, umol/L); converted to umol/L"
    assert flags.young_animal(b)[cre].startswith("young animal (")
    assert flags.young_animal(b)[cre].endswith(f"age rule under 1.5 years): {b.prior[cre].age_dependent}")
    assert flags.young_animal(b)[p2] == ""  # no birth date
    assert flags.breed_centre(b)[cre] == "breed-specific centre used (greyhound)"
    assert flags.breed_centre(b)[glu] == ""  # no greyhound centre for glucose
    assert flags.no_baseline(b).tolist() == [""] * 4
    # CVA above half the CVI: desirable imprecision (Fraser & Petersen), as bayesbase.classical says
    cva, cvi, _ = comparisons.classical_cvs(b)
    assert (flags.cva_high(b) != "").tolist() == classical.cva_too_high(cva, cvi).tolist()
    fixed = _stages(canon, method_bias={"creatinine": (0.05, 0.02)})["batch"]
    assert flags.method_changed(fixed)[cre] == ("method changed (analyser-A -> analyser-B); corrected by a stated "
                                                "bias of +5.0 % (SD 2.0 %)")


def test_censored_flags(raw):
    r = raw.copy()
    r.loc[(r["specimen"] == "B1") & (r["analyte"] == "creatinine"), "value"] = "<95"
    r.loc[(r["specimen"] == "B2") & (r["analyte"] == "creatinine"), "value"] = "<1.1"
    b = _stages(validate(r, now=NOW), patient="P2")["batch"]
    assert flags.censored_assessed(b).tolist() == ["assessed value is censored (<1.1)"]
    assert flags.censored_baseline(b).tolist() == [
        "censored baseline value used at its limit (exact engine; use --engine mcmc to model it)"]
    assert b.censor == ["left"] and b.baselines.c[0, 0] == -1.0


def test_flags_are_listed_in_order(st):
    b = st["batch"]
    pot = _case(b, "P1", "potassium")
    assert [f.__name__ for f in flags.CASE_FLAGS[:6]] == [
        "assumed_healthy", "censored_baseline", "censored_assessed", "haemolysis_over_threshold",
        "lipaemia_over_threshold", "icterus_over_threshold"]
    assert flags.case_flags(b)[pot] == [
        flags.hil_words("haemolysis", 150, 100, "up"),
        "not directly comparable: method changed (analyser-A -> analyser-B) and no between-method bias is given",
        flags.young_animal(b)[pot],
    ]


def test_first_specimen_has_no_baseline_flag(canon):
    a = assess(canon, at="2026-01-10", patient="P1", trend=False)
    assert all("no baseline: population prior alone" in f for f in a.table["flags"])
    assert a.table["n_baseline"].eq(0).all()


# --------------------------------------------------------------------------- engine step
def test_exact_engine_step_is_the_exact_engine(st):
    b, opts = st["batch"], st["opts"]
    res = engine_step.run_engine(b.case_arrays(), opts, b.patient, b.analyte)
    direct = exact_assess(b.case_arrays(), coverage=opts.coverage, ci_prob=opts.ci_prob, nodes=opts.nodes)
    for k in ("theta_mean", "pi_lower", "pi_upper", "p_change"):
        np.testing.assert_array_equal(res.summary[k], direct[k])
    assert res.converged.all() and res.mcmc is None
    assert list(res.settings) == ["coverage", "ci_prob", "shift_scale", "keep_compromised", "nodes", "quadrature"]


@pytest.mark.slow
def test_mcmc_engine_step_runs_pymc_and_flags_non_convergence(canon):
    """Dispatch to bayesbase.mcmc (a few draws on purpose: the flag must follow the diagnostics)."""
    a = assess(canon, at=AT, engine="mcmc", trend=False, seed=5,
               mcmc_options={"draws": 30, "tune": 30, "chains": 2, "cores": 1})
    assert a.attrs["engine"] == "mcmc" and a.mcmc is not None
    assert a.attrs["settings"]["draws"] == 30
    conv = bool(a.mcmc.diagnostics.get("converged", False))
    assert a.converged == conv
    warned = ["MCMC DID NOT CONVERGE" in " ".join(f) for f in a.table["flags"]]
    assert all(warned) if not conv else not any(warned)


# --------------------------------------------------------------------------- comparisons
def test_classical_comparisons_match_the_published_formulas(st):
    b = st["batch"]
    cols = comparisons.classical_comparisons(b, 0.95)
    i = _case(b, "P1", "creatinine")
    p = b.prior[i]
    z = stats.norm.ppf(0.975)
    # Fraser 2012: RCV = sqrt(2) z sqrt(CVA^2 + CVI^2)
    assert cols["rcv_classical_pct"][i] == pytest.approx(100 * math.sqrt(2) * z * math.hypot(p.cva, p.cvi), rel=1e-12)
    # Fokkema 2006: up = exp(z sqrt(2) sigma) - 1, sigma^2 = ln(1+CVA^2) + ln(1+CVI^2)
    sig = math.sqrt(math.log1p(p.cva**2) + math.log1p(p.cvi**2))
    assert cols["rcv_lognormal_up_pct"][i] == pytest.approx(100 * math.expm1(z * math.sqrt(2) * sig), rel=1e-12)
    v = math.sqrt(128 * 132)
    assert cols["change_vs_last_pct"][i] == pytest.approx(100 * (v / 105 - 1), rel=1e-12)
    assert cols["change_vs_mean_pct"][i] == pytest.approx(100 * (v / math.sqrt(100 * 105) - 1), rel=1e-12)
    # Coskun 2021 model 2 (published, arithmetic): HSP = 102.5, HSP (1 -/+ z sqrt(1 + 1/n) CVT)
    k = z * math.sqrt(1 + 1 / 2) * math.hypot(p.cva, p.cvi)
    assert cols["model2_lower"][i] == pytest.approx(102.5 * (1 - k), rel=1e-12)
    assert cols["model2_upper"][i] == pytest.approx(102.5 * (1 + k), rel=1e-12)
    # its log form: exp(mean ln x -/+ z sigma_T sqrt(1 + 1/n))
    m, h = np.mean(np.log([100.0, 105.0])), z * sig * math.sqrt(1 + 1 / 2)
    assert cols["model2_log_lower"][i] == pytest.approx(math.exp(m - h), rel=1e-12)
    assert cols["model2_log_upper"][i] == pytest.approx(math.exp(m + h), rel=1e-12)
    assert cols["ii"][i] == pytest.approx(p.cvi / p.cvg, rel=1e-12)  # Harris 1974
    assert cols["rcv_exceeded_last"].dtype == "boolean"


def test_comparisons_without_baseline_are_missing(canon):
    b = _stages(canon, at="2026-01-10", patient="P1")["batch"]
    cols = comparisons.classical_comparisons(b, 0.95)
    assert np.isnan(cols["model2_lower"]).all() and np.isnan(cols["change_vs_mean_pct"]).all()
    assert cols["rcv_exceeded_mean"].isna().all()
    assert np.isfinite(cols["rcv_classical_pct"]).all()


# --------------------------------------------------------------------------------- trend
def test_trend_needs_three_specimens_over_half_a_year(st):
    b = st["batch"]
    cols = trend_columns(b, 0.1, 24)
    i = _case(b, "P1", "creatinine")  # A1, A3, A4: three specimens over three months
    assert np.isnan(cols["trend_p_drift"][i])
    assert cols["trend_note"][i] == f"trend not computed: needs {TREND_RULE}"
    assert TREND_RULE == ">= 3 usable specimens spanning >= 0.5 years"


def test_trend_eligibility_follows_the_rule_on_every_case():
    """Independent count over each case-library history: usable specimens (baseline + assessed)."""
    for d in case_dirs():
        case = load_case(d)
        a = assess(read_results(d / "results.csv"), patient=case["patient"], at=case.get("at"))
        h = a.history[a.history["role"].isin(["baseline", "assessed"])]
        for r in a.table.itertuples():
            used = h[h["analyte"] == r.analyte].drop_duplicates("specimen")["collected_at"]
            span = (used.max() - used.min()).days / 365.25
            assert np.isfinite(r.trend_p_drift) == (len(used) >= 3 and span >= 0.5), (case["id"], r.analyte)


# ----------------------------------------------------------------------- table and result
def test_table_row_and_json_record(canon):
    a = assess(canon, at=AT)
    assert isinstance(a, Assessment)
    t = a.table.set_index(["patient", "analyte"])
    assert t.loc[("P1", "creatinine"), "value"] == pytest.approx(math.sqrt(128 * 132), rel=1e-14)
    assert t.loc[("P2", "creatinine"), "value"] == pytest.approx(1.1 * 88.4, rel=1e-9)  # 88.4 umol/L per mg/dL
    assert t.loc[("P1", "creatinine"), "specimen"] == "A4" and not t.loc[("P1", "creatinine"), "comparable"]
    assert t.loc[("P2", "creatinine"), "specimen"] == "B2"
    recs = json.loads(a.to_json())
    assert [r["patient"] for r in recs] == list(a.table["patient"])
    r0 = recs[0]
    assert list(r0)[:6] == ["patient", "analyte", "label", "unit", "specimen", "collected_at"]
    assert r0["pack"] == a.attrs["pack_id"] == "dog" and len(r0["pack_sha256"]) == 64
    assert set(r0["rcv"]) >= {"classical_pct", "exceeded", "p_significant"} and "trend" in r0
    assert a.attrs["settings"]["trend_rule"] == TREND_RULE and a.attrs["prior_change"] == [0.1]


def test_json_number():
    assert result.json_number(None) is None and result.json_number(float("nan")) is None
    assert result.json_number(pd.NA) is None and result.json_number(np.inf) is None
    assert result.json_number(np.int64(3)) == 3 and type(result.json_number(np.int64(3))) is int
    assert result.json_number(np.bool_(True)) is True
    assert result.json_number(np.float32(0.5)) == 0.5


def test_dataset_has_named_dims(canon):
    ds = assess(canon, at=AT, trend=False).dataset
    assert set(ds["personal_interval"].dims) == {"patient", "analyte", "ci_bound"}
    assert "sample" not in ds.dims
    assert list(ds["ci_bound"].values) == ["lower", "upper"]
    assert ds.attrs["engine"] == "exact"


# -------------------------------------------------------- specimens keyed by patient and id
def _renumber(f: pd.DataFrame) -> pd.DataFrame:
    f = f.copy()
    order = {s: f"S{i + 1}" for i, s in enumerate(dict.fromkeys(f.sort_values("collected_at")["specimen"]))}
    f["specimen"] = f["specimen"].map(order).astype(f["specimen"].dtype)
    return f


@pytest.mark.parametrize("at", [None, "S2"])
def test_two_patients_sharing_specimen_ids_are_assessed_apart(at):
    """Two dogs whose specimens are both called S1, S2, ... (specimen ids are per patient):
    assessed together, each gets what it gets alone."""
    names = ["dog_stable_wellness", "dog_alp_personal_change"]
    frames = [_renumber(read_results(CASE_DIR / n / "results.csv")) for n in names]
    both = pd.concat(frames, ignore_index=True)
    assert contract.is_canonical(both)
    assert set(frames[0]["specimen"]) & set(frames[1]["specimen"]) >= {"S1", "S2"}
    together = assess(both, at=at)
    for f in frames:
        alone = assess(f, at=at)
        pid = f["patient"].iloc[0]
        got = together.table[together.table["patient"] == pid].reset_index(drop=True)
        # the exact engine drops quadrature nodes of negligible weight in every case of a batch
        # (prune=1e-10), so a batch changes the answers in the 9th digit (as before the split)
        pd.testing.assert_frame_equal(got, alone.table, check_exact=False, rtol=1e-7, atol=0)
        gh = together.history[together.history["patient"] == pid].reset_index(drop=True)
        assert gh["role"].tolist() == alone.history["role"].tolist()
        assert gh["reason"].tolist() == alone.history["reason"].tolist()


# ------------------------------------------------------------------------------ sizes
def test_assessment_functions_stay_short():
    """The stages stay readable: no function in bayesbase/assessment or contract over 60 lines."""
    pkg = Path(__file__).resolve().parents[1] / "bayesbase"
    long = []
    for p in sorted((pkg / "assessment").glob("*.py")) + [pkg / "contract.py"]:
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                n = node.end_lineno - node.lineno + 1
                if n > 60:
                    long.append((f"{p.name}:{node.name}", n))
    assert not long, long


# ------------------------------------------------- vectorised stages against per-case loops
def _random_history(seed: int = 11, n_patients: int = 40) -> pd.DataFrame:
    """Invented demo results with every rule at work: random states, fasting, H/L/I indices,
    methods, reported units, censored values and replicates (seeded)."""
    from bayesbase.testing import synthetic_canonical

    rng = np.random.default_rng(seed)
    from bayesbase.priors import load_pack

    f = synthetic_canonical(n_patients, 5, 25, seed=seed)
    f = f[f["analyte"].isin(set(load_pack("dog").analytes))].reset_index(drop=True)
    n = len(f)
    spec = f["specimen"].to_numpy()
    per_spec = {s: i for i, s in enumerate(pd.unique(spec))}
    k = np.array([per_spec[s] for s in spec])
    f["state"] = pd.array(np.array(["", "healthy", "unwell", ""], dtype=object)[rng.integers(0, 4, len(per_spec))][k],
                          dtype="string")
    f["fasted"] = pd.array(np.array([True, False, None], dtype=object)[rng.integers(0, 3, len(per_spec))][k],
                           dtype="boolean")
    f["haemolysis"] = np.where(rng.random(len(per_spec)) < 0.3, rng.exponential(150, len(per_spec)), np.nan)[k]
    f["method"] = pd.array(np.where(rng.random(n) < 0.1, "analyser B", "demo analyser"), dtype="string")
    f["reported_unit"] = pd.array(np.where(rng.random(n) < 0.05, "other unit", f["unit"].to_numpy(dtype=object)),
                                  dtype="string")
    cen = np.where(rng.random(n) < 0.03, "left", "")
    f["censor"] = pd.array(cen, dtype="string")
    rep = f[rng.random(n) < 0.05].copy()
    rep["replicate"] = pd.array(np.full(len(rep), 2), dtype="Int64")
    f = pd.concat([f, rep], ignore_index=True)
    return f.sort_values(["patient", "collected_at", "specimen", "analyte", "replicate"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def random_stages():
    return _stages(_random_history(), at=None)


def test_case_rows_match_text_keys(random_stages):
    """The integer case of every row is the one a "patient\\x1fanalyte" text key names."""
    hist, rows, targets = random_stages["hist"], random_stages["rows"], random_stages["targets"]
    key = (hist["patient"].astype(str) + "\x1f" + hist["analyte"].astype(str)).to_numpy(dtype=object)
    assessed = (hist["specimen"] == hist["patient"].map(targets.specimen)).to_numpy()
    assert np.array_equal(rows.is_assessed, assessed)
    cases = list(pd.unique(key[assessed]))
    index = {k: i for i, k in enumerate(cases)}
    assert rows.case.tolist() == [index.get(k, -1) for k in key]
    assert random_stages["batch"].keys.tolist() == cases


def test_case_sets_match_a_dict_of_sets():
    rng = np.random.default_rng(5)
    names = np.array(["m1", "m2", "", "m3", None], dtype=object)
    case = rng.integers(0, 30, 400)
    code = rng.integers(-1, len(names), 400)
    sets = cases_mod.CaseSets.of_rows(case, code, names)
    expect: dict = {}
    for c, k in zip(case, code):
        v = names[k] if k >= 0 else None
        if isinstance(v, str) and v:
            expect.setdefault(int(c), set()).add(v)
    assert {i: sets.get(i) for i in range(30) if sets.get(i, None) is not None} == expect
    assessed = rng.integers(-2, len(names), 30)
    want = [any(v != (names[a] if a >= 0 else object()) for v in expect.get(i, ())) for i, a in enumerate(assessed)]
    assert sets.differs(assessed).tolist() == want
    assert sets.texts(3, "zz") == sorted(expect.get(3, set()) | {"zz"})


def test_baselines_match_a_groupby_per_specimen(random_stages):
    """Padded baselines against pandas groupby over (case, specimen), sorted by time."""
    hist, rows, rl, b = (random_stages[k] for k in ("hist", "rows", "roles", "batch"))
    base = rl.baseline
    bl = pd.DataFrame({"case": rows.case[base], "specimen": hist["specimen"].to_numpy(dtype=object)[base],
                       "y": np.log(hist["value"].to_numpy(dtype=float))[base],
                       "t": frame.years_of(hist["collected_at"])[base]})
    agg = (bl.groupby(["case", "specimen"], sort=False).agg(y=("y", "mean"), r=("y", "size"), t=("t", "first"))
           .reset_index().sort_values(["case", "t"], kind="stable"))
    for c, g in agg.groupby("case"):
        n = len(g)
        assert b.baselines.n[c] == n
        np.testing.assert_allclose(b.baselines.y[c, :n], g["y"].to_numpy(), rtol=1e-14)
        assert b.baselines.r[c, :n].tolist() == g["r"].astype(float).tolist()
        assert b.baselines.specimens[c] == ";".join(g["specimen"])
        assert np.isnan(b.baselines.y[c, n:]).all()
    assert set(np.flatnonzero(b.baselines.n == 0)) == set(range(len(b))) - set(agg["case"])


def test_flags_and_quality_match_per_case_loops(random_stages):
    b = random_stages["batch"]
    columns = [f(b) for f in flags.CASE_FLAGS]
    assert flags.case_flags(b) == [[w for w in words if w] for words in zip(*columns)]
    over = [flags.hil_over(b, i)[0] for i in contract.HIL_INDICES]
    assert flags.quality(b) == [",".join(n for n, o in zip(contract.HIL_INDICES, r) if o) or "ok" for r in zip(*over)]
    for get in (lambda p: p.cva, lambda p: p.hil_thresholds.get("haemolysis", np.nan), lambda p: p.unit):
        got = b.prior_attr(get, object)
        assert got.tolist() == [get(p) for p in b.prior]
    fasted = b.assessed.col("fasted")
    assert (flags.not_fasted(b) != "").tolist() == [roles.is_feeding_sensitive(p) and f is False
                                                    for p, f in zip(b.prior, fasted)]
    units = [set(b.baselines.units.get(i, ())) | {u} for i, u in enumerate(b.assessed.unit)]
    assert (flags.mixed_units(b) != "").tolist() == [len(s) > 1 for s in units]
    assert (flags.method_changed(b) != "").any() and (flags.mixed_units(b) != "").any()
    assert (flags.censored_assessed(b) != "").tolist() == [bool(c) for c in b.censor]


def test_trend_notes_match_a_loop(random_stages):
    from bayesbase.assessment.frame import YEAR_DAYS
    from bayesbase.assessment.trend_cols import GROWING_YEARS, trend_notes

    b = random_stages["batch"]
    rng = np.random.default_rng(2)
    eligible = rng.random(len(b)) < 0.6
    ytl = np.where(rng.random(len(b)) < 0.5, 3.0, np.nan)
    first_t = b.assessed.years - rng.uniform(0, 3, len(b))
    got = trend_notes(b, eligible, ytl, first_t)
    birth = b.assessed.col("birth_date")
    for i, p in enumerate(b.prior):
        if not eligible[i]:
            assert got[i].startswith("trend not computed")
            continue
        age0 = None if pd.isna(birth[i]) else first_t[i] - pd.Timestamp(birth[i]).value / 1e9 / 86400 / YEAR_DAYS
        young = bool(p.age_dependent) and (age0 is None or age0 < GROWING_YEARS)
        assert got[i].startswith("young or unknown age") == young
        if not young:
            assert (got[i] != "") == bool(np.isnan(ytl[i]))
