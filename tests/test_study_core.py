"""bayesbase.study.estimate, its files and its command line: outputs, provenance, never-silent
handling of the Bayesian fit (with a stand-in fit object), bad input, the pack fragment."""
from __future__ import annotations

import argparse
import hashlib
import math
import re
import sys
import tomllib
import types
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from bayesbase.errors import BayesbaseError, ValidationError
from bayesbase.study import StudyError, estimate, write_outputs
from bayesbase.study.cli import add_parser, run
from bayesbase.study.common import COMPONENTS, ESTIMATE_COLUMNS, REMOVED_COLUMNS

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "case_library" / "dog_bv_study_example" / "results.csv"


@pytest.fixture(scope="module")
def result():
    return estimate(CASE)


def test_dataset_dims_and_provenance(result):
    ds = result.dataset
    assert set(ds.dims) == {"analyte", "component", "ci_bound"}
    assert "sample" not in ds.dims
    assert list(ds["component"].values) == list(COMPONENTS)
    assert set(ds["anova_interval"].dims) == {"analyte", "component", "ci_bound"}
    assert ds.attrs["source_sha256"] == hashlib.sha256(CASE.read_bytes()).hexdigest()
    for key in ("source_file", "method", "seed", "version", "engine", "species"):
        assert ds.attrs[key] not in (None, "")
    # the dataset holds the same numbers as the tidy table
    t = result.table.set_index(["analyte", "method", "component"])
    for a in ds["analyte"].values:
        assert float(ds["anova_estimate"].sel(analyte=a, component="cvi")) == t.loc[(a, "anova", "cvi"), "estimate"]
        assert float(ds["anova_interval"].sel(analyte=a, component="cvi", ci_bound="upper")) == \
            t.loc[(a, "anova", "cvi"), "upper"]


def test_estimates_frame_has_exactly_the_issue_columns(result):
    assert list(result.estimates.columns) == list(ESTIMATE_COLUMNS)
    assert list(result.removed.columns) == list(REMOVED_COLUMNS)
    assert set(result.estimates["method"]) == {"anova"}
    assert result.estimates["cvi_spread_log_sd"].isna().all()  # Bayesian only


def test_derived_numbers_follow_the_published_formulas(result):
    """II = CVI/CVG (Harris 1974); RCV = sqrt(2) Z sqrt(CVA^2 + CVI^2) with Z the two-sided 95 %
    normal quantile (Fraser, Clin Chem Lab Med 2012;50:807); n = ceil((Z CVT / 0.10)^2) (Fraser &
    Harris 1989). Z from scipy.stats.norm."""
    z = stats.norm.ppf(0.975)
    for r in result.estimates.itertuples(index=False):
        cva, cvi, cvg = r.cva_pct / 100, r.cvi_pct / 100, r.cvg_pct / 100
        assert r.ii == pytest.approx(cvi / cvg)
        assert r.rcv_pct == pytest.approx(100 * math.sqrt(2) * z * math.hypot(cva, cvi))
        assert r.n_for_setpoint == math.ceil((z * math.hypot(cva, cvi) / 0.10) ** 2)
    des = result.table[result.table["component"] == "desirable_cva"]
    cvi = result.table[result.table["component"] == "cvi"].set_index("analyte")["estimate"]
    for r in des.itertuples(index=False):
        assert r.estimate == pytest.approx(0.5 * cvi[r.analyte])  # common practice: CVA <= 0.5 CVI


def test_every_removal_is_listed_with_its_test(result):
    rem = result.removed
    assert len(rem) >= 2
    assert rem["test"].str.len().gt(0).all()
    assert (rem["statistic"] > rem["critical_value"]).all()
    n_listed = rem.groupby("analyte")["n_results"].sum()
    est = result.estimates.set_index("analyte")
    for a, n in n_listed.items():
        assert est.loc[a, "n_removed"] == n
    s = result.series
    for a in est.index:
        assert (~s[s["analyte"] == a]["kept"]).sum() == est.loc[a, "n_removed"]


def test_no_outlier_removal_keeps_every_result():
    r = estimate(CASE, analytes=["creatinine", "urea"], outlier_removal=False)
    assert (r.estimates["n_removed"] == 0).all()
    assert len(r.removed) >= 2 and r.removed["action"].str.startswith("kept").all()
    assert r.series["kept"].all()


def test_input_exclusions_are_listed(tmp_path):
    df = pd.read_csv(CASE)
    df["value"] = df["value"].astype(str)
    i = df.index[(df["analyte"] == "alt")][0]
    df.loc[i, "value"] = "<10"
    j = df.index[(df["analyte"] == "alt")][5]
    df.loc[df["specimen"] == df.loc[j, "specimen"], "state"] = "unwell"
    path = tmp_path / "study.csv"
    df.to_csv(path, index=False)
    r = estimate(path, analytes=["alt"])
    inp = r.removed[r.removed["step"] == 0]
    assert inp["reason"].str.contains("censored").sum() == 1
    assert inp["reason"].str.contains("unwell").sum() >= 1
    assert r.estimates["n_removed"].iloc[0] >= len(inp)


@pytest.mark.parametrize("kwargs,msg", [
    ({"analytes": ["sdma"]}, "no results"),
    ({"analytes": ["creatinin"]}, "creatinine"),
    ({"species": "cat"}, "no results for species 'cat'"),
    ({"method": "mcmc"}, "method must be one of"),
])
def test_bad_requests_are_clear_errors(kwargs, msg):
    with pytest.raises(StudyError, match=msg):
        estimate(CASE, **kwargs)


def test_bad_file_names_row_and_column(tmp_path):
    df = pd.read_csv(CASE)
    df["value"] = df["value"].astype(str)
    df.loc[3, "value"] = "abc"
    path = tmp_path / "bad.csv"
    df.to_csv(path, index=False)
    with pytest.raises(ValidationError) as exc:
        estimate(path)
    assert "bad.csv" in str(exc.value) and "row 5" in str(exc.value) and "'value'" in str(exc.value)


def test_several_species_need_a_choice(tmp_path):
    df = pd.read_csv(CASE)
    df.loc[df["patient"] == "BV-D12", "species"] = "cat"
    path = tmp_path / "mixed.csv"
    df.to_csv(path, index=False)
    with pytest.raises(StudyError, match="several species"):
        estimate(path)
    r = estimate(path, species="dog", analytes=["glucose"])
    assert r.estimates["n_animals"].iloc[0] == 11


# --------------------------------------------------------------------------- files

def test_write_outputs(result, tmp_path):
    paths = write_outputs(result, tmp_path / "out", figures=False)
    assert set(paths) == {"estimates.csv", "removed.csv", "steps.csv", "study.html", "pack.toml"}
    head = (tmp_path / "out" / "estimates.csv").read_text().splitlines()[0]
    assert head == ",".join(ESTIMATE_COLUMNS)
    back = pd.read_csv(tmp_path / "out" / "estimates.csv")
    assert np.allclose(back["cvi_pct"], result.estimates["cvi_pct"], rtol=1e-5)
    html = (tmp_path / "out" / "study.html").read_text()
    assert html.index("Cautions") < html.index("Estimates")
    assert "Decision support, not a diagnosis" in html
    assert not re.search(r"(src|href)=['\"](?!data:)", html)  # self-contained
    assert "http://" not in html and "https://" not in html
    assert [p.name for p in (tmp_path / "out").iterdir() if p.name.startswith(".")] == []


def test_html_figures_are_embedded(tmp_path):
    r = estimate(CASE, analytes=["urea"])
    html = write_outputs(r, tmp_path)["study.html"].read_text()
    assert html.count("data:image/png;base64,") == 1
    assert not re.search(r"(src|href)=['\"](?!data:)", html)


def test_html_escapes_user_text(tmp_path):
    df = pd.read_csv(CASE)
    df.loc[df["patient"] == "BV-D05", "patient"] = "<script>x</script>"
    path = tmp_path / "esc.csv"
    df.to_csv(path, index=False)
    r = estimate(path, analytes=["creatinine"])
    paths = write_outputs(r, tmp_path / "o", figures=False)
    html = paths["study.html"].read_text()
    assert "<script>" not in html and "&lt;script&gt;" in html


def test_nothing_half_written(result, tmp_path, monkeypatch):
    from bayesbase.study import output

    def boom(_):
        raise OSError("disk full")

    monkeypatch.setattr(output, "study_html", lambda *a, **k: boom(None))
    with pytest.raises(OSError):
        write_outputs(result, tmp_path / "o")
    assert list((tmp_path / "o").iterdir()) == []


def test_pack_fragment_numbers_and_provenance(result, tmp_path):
    paths = write_outputs(result, tmp_path / "o", figures=False)
    frag = tomllib.loads(paths["pack.toml"].read_text())
    sha = hashlib.sha256(CASE.read_bytes()).hexdigest()
    assert frag["pack"]["extends"] == "dog" and frag["pack"]["species"] == "dog"
    est = result.estimates.set_index("analyte")
    assert set(frag["analytes"]) == set(est.index)
    for aid, a in frag["analytes"].items():
        for fld in ("cvi", "cvi_log_sd", "cvg", "cva"):
            cn = a[fld]
            assert cn["provenance"] == "estimated"
            assert "results.csv" in cn["source"] and sha in cn["source"]
        assert a["cvi"]["value"] == pytest.approx(est.loc[aid, "cvi_pct"] / 100, rel=1e-5)
        assert a["cvg"]["value"] == pytest.approx(est.loc[aid, "cvg_pct"] / 100, rel=1e-5)
        # ANOVA fragment: cvi_log_sd = ln(upper/lower)/(2 x 1.96) of the CVI interval
        se = math.log(est.loc[aid, "cvi_upper"] / est.loc[aid, "cvi_lower"]) / (2 * stats.norm.ppf(0.975))
        assert a["cvi_log_sd"]["value"] == pytest.approx(se, rel=1e-4)


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(type(v))


def _as_full_pack(fragment_text: str, provenance: str) -> str:
    """The fragment's numbers as a complete pack: [pack], [defaults] and [retest_groups] of the
    dog pack, and for each fragment analyte the dog pack's required non-CV keys (unit, group,
    centre, interval) plus the fragment's cited numbers with the provenance word replaced."""
    frag = tomllib.loads(fragment_text)
    with open(ROOT / "models" / "dog.toml", "rb") as fh:
        dog = tomllib.load(fh)
    out = ["[pack]"] + [f"{k} = {_toml_value(v)}" for k, v in dog["pack"].items()]
    out += ["", "[defaults]"] + [f"{k} = {_toml_value(v)}" for k, v in dog["defaults"].items()]
    for gid, g in dog["retest_groups"].items():
        out += ["", f"[retest_groups.{gid}]"] + [f"{k} = {_toml_value(v)}" for k, v in g.items()]
    for aid, a in frag["analytes"].items():
        base = dog["analytes"][aid]
        out += ["", f"[analytes.{aid}]"]
        out += [f"{k} = {_toml_value(base[k])}" for k in ("unit", "group", "center", "ri_lower", "ri_upper")]
        for k in ("cvi", "cvi_log_sd", "cvg", "cva"):
            out.append(f"{k} = {_toml_value(dict(a[k], provenance=provenance))}")
    return "\n".join(out) + "\n"


def test_fragment_numbers_pass_the_pack_schema_ranges(result, tmp_path):
    """Today's schema knows neither 'estimated' nor partial packs; with the provenance word set
    to 'derived' and the dog pack's required non-CV keys added, the schema accepts every number
    of the fragment (ranges, types, cited-number keys) - so the fragment needs only the two
    schema changes described in the report."""
    from bayesbase.priors import check_file

    paths = write_outputs(result, tmp_path / "o", figures=False)
    full = tmp_path / "dog_with_study.toml"
    full.write_text(_as_full_pack(paths["pack.toml"].read_text(), "derived"), encoding="utf-8")
    assert check_file(full) == []
    from bayesbase.priors import load_pack

    pack = load_pack(full)
    assert pack.get("creatinine").cvi == pytest.approx(
        result.estimates.set_index("analyte").loc["creatinine", "cvi_pct"] / 100, rel=1e-5)


def test_fragment_loads_as_a_pack_and_assesses_end_to_end(result, tmp_path):
    from bayesbase.assessment import assess
    from bayesbase.io import read_results as load_results
    from bayesbase.priors import load_pack

    paths = write_outputs(result, tmp_path / "o", figures=False)
    pack = load_pack(paths["pack.toml"])
    est = result.estimates.set_index("analyte")
    assert pack.get("urea").cvi == pytest.approx(est.loc["urea", "cvi_pct"] / 100, rel=1e-5)
    assert pack.cited["urea"]["cvi"].provenance == "estimated"
    assert pack.get("sdma").cvi == load_pack("dog").get("sdma").cvi  # layered over the base pack
    a = assess(load_results(CASE), patient="BV-D01", pack=str(paths["pack.toml"]))
    assert a.attrs["pack_sha256"] and len(a.table) >= 4


# --------------------------------------------------------------------------- Bayesian plumbing

class _FakeFit:
    """Stand-in with the documented BayesStudyFit interface (the model itself is tested in
    tests/test_study_bayes.py); it records the data it was given."""

    def __init__(self, data, converged):
        self.data = data
        y = data["y"].to_numpy()
        self.table = pd.DataFrame(
            {"component": list(COMPONENTS), "estimate": [0.03, 0.06, 0.25, 0.07, 0.19],
             "lower": [0.025, 0.05, 0.10, 0.04, 0.13], "upper": [0.035, 0.075, 0.45, 0.12, 0.30]})
        self.diagnostics = {"max_r_hat": 1.0 if converged else 1.2, "min_ess_bulk": 900 if converged else 40,
                            "min_ess_tail": 800 if converged else 30, "divergences": 0 if converged else 7,
                            "converged": converged}
        self.priors = {"cva": "half-normal scaled to the data"}
        self.idata = None
        self.n = len(y)


def _fake_module(monkeypatch, converged=True):
    calls = []

    def fit_bayes(data, *, robust=False, draws=1000, tune=1000, chains=2, seed=0):
        calls.append(dict(n=len(data), seed=seed, robust=robust, cols=list(data.columns), data=data))
        return _FakeFit(data, converged)

    mod = types.ModuleType("bayesbase.study.bayes")
    mod.fit_bayes = fit_bayes
    monkeypatch.setitem(sys.modules, "bayesbase.study.bayes", mod)
    return calls


def test_both_methods_with_a_converged_fit(monkeypatch, tmp_path):
    calls = _fake_module(monkeypatch, converged=True)
    r = estimate(CASE, analytes=["creatinine", "urea"], method="both", seed=7)
    assert [c["seed"] for c in calls] == [7, 8]
    assert calls[0]["cols"][:4] == ["animal", "specimen", "replicate", "y"]
    est = r.estimates.set_index(["analyte", "method"])
    # the model sees the same results as the ANOVA (after the outlier steps), as log values
    assert calls[0]["n"] == est.loc[("creatinine", "anova"), "n_results"]
    raw = pd.read_csv(CASE)
    cr = raw[raw["analyte"] == "creatinine"]
    assert np.isclose(np.exp(calls[0]["data"]["y"]).sum(), cr["value"].sum() - cr[cr["specimen"] == "D05-W4"]["value"].sum())
    assert est.loc[("urea", "bayes"), "cvi_spread_log_sd"] == pytest.approx(0.25)
    assert est.loc[("urea", "bayes"), "cvi_pct"] == pytest.approx(6.0)
    assert "bayes_estimate" in r.dataset and "anova_estimate" in r.dataset
    assert r.dataset["bayes_converged"].values.tolist() == [1, 1]
    frag = tomllib.loads(write_outputs(r, tmp_path, figures=False)["pack.toml"].read_text())
    cvi = frag["analytes"]["urea"]["cvi_log_sd"]
    se = math.log(0.075 / 0.05) / (2 * stats.norm.ppf(0.975))
    assert cvi["value"] == pytest.approx(math.hypot(0.25, se), rel=1e-4)  # spread and se combined
    assert "Bayesian" in frag["analytes"]["urea"]["cvi"]["source"]


def test_unconverged_fit_is_marked_warned_and_not_used_for_the_pack(monkeypatch, tmp_path, capsys):
    _fake_module(monkeypatch, converged=False)
    r = estimate(CASE, analytes=["glucose"], method="both")
    assert set(r.estimates["method"]) == {"anova", "bayes (not converged)"}
    t = r.table[r.table["method"] == "bayes (not converged)"]
    assert (t["converged"] == False).all() and t["note"].str.contains("R-hat").all()  # noqa: E712
    assert any("did not converge" in w for w in r.warnings)
    assert r.dataset["bayes_converged"].values.tolist() == [0]
    paths = write_outputs(r, tmp_path, figures=False)
    frag = tomllib.loads(paths["pack.toml"].read_text())
    est = r.estimates.set_index("method")
    assert frag["analytes"]["glucose"]["cvi"]["value"] == pytest.approx(est.loc["anova", "cvi_pct"] / 100, rel=1e-5)
    assert "nested ANOVA" in frag["analytes"]["glucose"]["cvi"]["source"]
    html = paths["study.html"].read_text()
    assert "did not converge" in html and "bayes (not converged)" in html
    # Bayesian only and not converged: no pack fragment at all, and the CLI says so
    args = _args(["study", str(CASE), "--out", str(tmp_path / "b"), "--method", "bayes", "--analytes", "glucose",
                  "--no-figures"])
    assert run(args) == 0
    out = capsys.readouterr().out
    assert "WARNING" in out and "No pack fragment" in out
    assert not (tmp_path / "b" / "pack.toml").exists()


# --------------------------------------------------------------------------- CLI

def _args(argv):
    ap = argparse.ArgumentParser()
    sub = ap.add_subparsers(dest="command")
    add_parser(sub)
    return ap.parse_args(argv)


def test_cli_study_writes_every_file(tmp_path, capsys):
    args = _args(["study", str(CASE), "--out", str(tmp_path / "o"), "--analytes", "creatinine,urea", "--seed", "3",
                  "--no-figures"])
    assert run(args) == 0
    out = capsys.readouterr().out
    assert "creatinine" in out and "removal(s) listed in removed.csv" in out and "Decision support" in out
    for name in ("estimates.csv", "removed.csv", "steps.csv", "study.html", "pack.toml"):
        assert (tmp_path / "o" / name).is_file()


@pytest.mark.parametrize("argv,msg", [
    (["study", "missing.csv", "--out", "x"], "not found"),
    (["study"], "give a study results FILE"),
    (["study", str(CASE)], "--out"),
    (["study", str(CASE), "--out", "x", "--analytes", "nonsense"], "unknown analyte"),
])
def test_cli_user_errors(argv, msg, capsys, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert run(_args(argv)) == 2
    err = capsys.readouterr().err
    assert err.startswith("bayesbase: error:") and msg in err
    assert not (tmp_path / "x").exists()


def test_errors_derive_from_the_project_base():
    assert issubclass(StudyError, BayesbaseError)


def test_bench_study_returns_timings():
    from bayesbase.bench.study import bench_study

    res = bench_study(n_animals=6, n_specimens=4, n_replicates=2, n_analytes=3)
    assert res["results"] == 6 * 4 * 2 * 3
    assert res["estimate_anova_s"] >= 0 and res["design"] == "6x4x2"


# --------------------------------------------------------------------------- stages of estimate(), one by one

from bayesbase.io import read_results, read_results_hashed  # noqa: E402
from bayesbase.study import core as C  # noqa: E402


def _tiny_study() -> pd.DataFrame:
    """3 animals x 3 specimens x 2 replicates of one analyte, balanced, in the canonical row order;
    a fourth animal's censored result and specimen taken while unwell last (invented numbers)."""
    rng = np.random.default_rng(11)
    rows = []
    for a in range(3):
        for s in range(3):
            for r in (1, 2):
                rows.append(dict(patient=f"T{a}", species="dog", specimen=f"T{a}-{s}",
                                 collected_at=f"2025-03-0{s + 1} 0{a + 7}:00", analyte="creatinine",
                                 value=f"{90 * math.exp(0.2 * a + 0.05 * rng.standard_normal()):.2f}",
                                 unit="umol/L", replicate=r, state="healthy"))
    rows.append(dict(rows[0], patient="T9", specimen="T9-0", value="<40", collected_at="2025-03-05 07:00"))
    rows.append(dict(rows[0], patient="T9", specimen="T9-1", value="300", state="unwell",
                     collected_at="2025-03-06 07:00"))
    return pd.DataFrame(rows)


def test_stage_check_options():
    C._check_options("both", 0.05, 0.9)  # accepted
    for args, msg in [(("mcmc", 0.05, 0.95), "method must be one of"), (("anova", 0.0, 0.95), "alpha"),
                      (("anova", 0.05, 1.0), "ci_prob")]:
        with pytest.raises(StudyError, match=msg):
            C._check_options(*args)


def test_read_results_hashed_is_read_results_plus_the_file_digest():
    """The SHA-256 is hashlib's digest of the file's bytes (Python standard library)."""
    frame, sha = read_results_hashed(CASE)
    assert sha == hashlib.sha256(CASE.read_bytes()).hexdigest()
    pd.testing.assert_frame_equal(frame, read_results(CASE))


def test_stage_read_aligns_arrays_and_days():
    st = C._read(_tiny_study(), species="canine", analytes=["creatinine"])
    assert st.species == "dog" and st.analytes == ["creatinine"] and len(st.frame) == 20
    raw = _tiny_study()
    assert list(st.patient) == list(raw["patient"]) and list(st.specimen) == list(raw["specimen"])
    t = pd.to_datetime(raw["collected_at"])
    np.testing.assert_allclose(st.days, ((t - t.min()) / pd.Timedelta(days=1)).to_numpy())
    assert list(st.patient[:2]) == ["T0", "T0"] and st.censor[18] == "left" and st.state[19] == "unwell"
    st_file = C._read(CASE, None, ["urea"])
    assert st_file.sha == hashlib.sha256(CASE.read_bytes()).hexdigest() and st_file.source == CASE.name
    assert set(st_file.analyte) == {"urea"}


def test_stage_input_exclusions_and_codes():
    st = C._read(_tiny_study(), None, None)
    out = C._Collect()
    an = C._exclude_inputs(st, "creatinine", out)
    assert [r["reason"].split(";")[0] for r in out.removed_rows] == ["censored value (left)",
                                                                     "specimen taken while unwell"]
    assert all(r["step"] == 0 and r["action"] == "removed" for r in out.removed_rows)
    assert an.use.size == 18 and an.keep.all() and an.unit == "umol/L"
    np.testing.assert_allclose(an.y, np.log(st.value[:18]))
    assert len(set(an.a_codes)) == 3 and len(set(an.s_codes)) == 9
    assert list(an.spec_names[an.s_codes[:4]]) == ["T0-0", "T0-0", "T0-1", "T0-1"]
    assert an.counts == dict(n_animals=3, n_specimens=9, n_results=18, n_removed=2)


def test_stage_screen_and_series_match_the_whole_estimate(result):
    st = C._read(CASE, None, ["creatinine"])
    out = C._Collect(notes={"creatinine": []})
    an = C._exclude_inputs(st, "creatinine", out)
    C._screen_analyte(an, st.days, C.DEFAULT_ALPHA, True, out)
    whole_removed = result.removed[result.removed["analyte"] == "creatinine"].reset_index(drop=True)
    pd.testing.assert_frame_equal(pd.DataFrame(out.removed_rows, columns=list(REMOVED_COLUMNS)), whole_removed)
    assert len(out.step_rows) == (result.steps["analyte"] == "creatinine").sum()
    est = result.estimates.set_index("analyte").loc["creatinine"]
    assert an.counts["n_removed"] == est["n_removed"] and an.counts["n_results"] == est["n_results"]
    part = C._series_part(st, an)
    assert int((~part["kept"]).sum()) == est["n_removed"]
    np.testing.assert_allclose(part["ln_value"], np.log(part["value"]))


def test_stage_screen_warnings_words():
    sc = types.SimpleNamespace(
        records=[dict(step=3, animal=1, action="removed", reason="Reed; gap 2.1 x range")],
        tests=[dict(step=4, test="Cochran C", p_value=0.001, flagged=True, detail=""),
               dict(step=6, test="mean slope", p_value=0.02, flagged=True, detail="+1 %/week"),
               dict(step=5, test="Shapiro-Wilk", p_value=0.01, flagged=True, detail="")])
    w = C._screen_warnings("alt", sc, np.array(["A", "B"], dtype=object))
    assert len(w) == 3
    assert "animal B" in w[0] and "gap 2.1 x range" in w[0]
    assert "Cochran C p = 0.001" in w[1] and "drift together (+1 %/week, p = 0.02)" in w[2]


def test_stage_classical_against_the_balanced_moment_formulas():
    """Balanced nested ANOVA by hand (method of moments, e.g. Searle, Casella & McCulloch 1992,
    Variance Components, ch. 3): s2_A = MS_E, s2_I = (MS_S - MS_E)/n_r, s2_G = (MS_A - MS_S)/(n_s n_r);
    CV = sqrt(exp(s2) - 1) on the log scale."""
    st = C._read(_tiny_study(), None, None)
    out = C._Collect(notes={"creatinine": []})
    an = C._exclude_inputs(st, "creatinine", out)
    C._classical(an, "tiny", 0.95, True, False, out)
    y = an.y.reshape(3, 3, 2)  # animal x specimen x replicate, in file order
    ms_e = ((y - y.mean(2, keepdims=True)) ** 2).sum() / (3 * 3 * 1)
    ms_s = 2 * ((y.mean(2) - y.mean((1, 2))[:, None]) ** 2).sum() / (3 * 2)
    ms_a = 6 * ((y.mean((1, 2)) - y.mean()) ** 2).sum() / 2
    var = dict(cva=ms_e, cvi=max((ms_s - ms_e) / 2, 0.0), cvg=(ms_a - ms_s) / 6)
    t = pd.DataFrame(out.table_rows).set_index("component")
    for c, v in var.items():
        assert t.at[c, "estimate"] == pytest.approx(math.sqrt(math.expm1(v)), rel=1e-9)
        assert t.at[c, "lower"] <= t.at[c, "estimate"] <= t.at[c, "upper"]
    assert out.est_rows[0]["method"] == "anova" and "anova" in out.used_fits["creatinine"]


def test_stage_classical_on_the_case_matches_the_whole_estimate(result):
    st = C._read(CASE, None, None)
    out = C._Collect()
    for aid in st.analytes:
        out.notes[aid] = []
        an = C._exclude_inputs(st, aid, out)
        C._screen_analyte(an, st.days, C.DEFAULT_ALPHA, True, out)
        C._classical(an, st.source, C.DEFAULT_CI_PROB, True, False, out)
    pd.testing.assert_frame_equal(C._tables(out)["table"], result.table)
    pd.testing.assert_frame_equal(C._tables(out)["estimates"], result.estimates)


@pytest.mark.parametrize("converged", [True, False])
def test_stage_bayesian_is_never_silent(monkeypatch, converged):
    calls = _fake_module(monkeypatch, converged=converged)
    st = C._read(_tiny_study(), None, None)
    out = C._Collect(notes={"creatinine": []})
    an = C._exclude_inputs(st, "creatinine", out)
    C._bayesian(an, st.replicate, C._bayes_module(), 9, dict(robust=False, draws=10, tune=10, chains=1), out)
    assert calls[0]["seed"] == 9 and calls[0]["n"] == 18
    methods = {r["method"] for r in out.table_rows}
    assert methods == ({"bayes"} if converged else {C.UNCONVERGED})
    assert ("bayes" in out.used_fits.get("creatinine", {})) is converged
    assert any("did not converge" in w and "R-hat 1.200" in w for w in out.warnings) is not converged


def test_stage_bayesian_failure_is_a_note_and_a_warning(monkeypatch):
    mod = types.ModuleType("bayesbase.study.bayes")

    def fit_bayes(data, **kw):
        raise BayesbaseError("too few animals")

    mod.fit_bayes = fit_bayes
    st = C._read(_tiny_study(), None, None)
    out = C._Collect(notes={"creatinine": []})
    an = C._exclude_inputs(st, "creatinine", out)
    C._bayesian(an, st.replicate, mod, 0, {}, out)
    assert out.bayes_fits == {"creatinine": None} and not out.table_rows
    assert out.warnings == ["creatinine: no Bayesian estimate (too few animals)"]
    assert out.notes["creatinine"] == ["Bayesian estimate not possible: too few animals"]


def test_stage_desirable_cva_warning():
    """Desirable CVA <= 0.5 CVI (common practice); the converged Bayesian fit is preferred."""
    fit = lambda cva, cvi: dict(comps={"cva": (cva, 0, 0), "cvi": (cvi, 0, 0)})  # noqa: E731
    assert C._desirable_warning("alt", {}) is None
    assert C._desirable_warning("alt", {"anova": fit(0.02, 0.06)}) is None
    w = C._desirable_warning("alt", {"anova": fit(0.04, 0.06)})
    assert "CVA 4.0 %" in w and "0.5 x CVI = 3.0 %" in w
    assert C._desirable_warning("alt", {"anova": fit(0.04, 0.06), "bayes": fit(0.02, 0.06)}) is None


def test_stage_tables_and_attrs():
    frames = C._tables(C._Collect())
    assert list(frames["estimates"].columns) == list(ESTIMATE_COLUMNS)
    assert list(frames["removed"].columns) == list(REMOVED_COLUMNS)
    assert frames["table"].empty and frames["series"].empty
    st = C._read(_tiny_study(), None, None)
    engines = {m: C._attrs(st, m, 1, 0.05, 0.95, True, False, False, 10, 10, 1)["engine"]
               for m in ("anova", "bayes", "both")}
    assert engines["both"] == engines["anova"] + " | " + engines["bayes"]
    a = C._attrs(st, "anova", 1, 0.05, 0.95, True, False, False, 10, 10, 1)
    assert a["source_sha256"] == st.sha and re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", a["created"])
