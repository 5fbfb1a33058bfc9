"""bayesbase.interval.estimate end to end: method by sample size, outliers, partitions, outputs,
pack fragment, command line. Reference samples here are invented (seeded numpy draws)."""
from __future__ import annotations

import argparse
import ast
import hashlib
import math
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import special, stats

from bayesbase.interval import estimate
from bayesbase.interval.cli import add_parser, run
from bayesbase.interval.core import COLUMNS, OUTLIER_COLUMNS, IntervalError

PKG = Path(__file__).resolve().parents[1] / "bayesbase" / "interval"
NB = 300  # bootstrap resamples in these tests (the default is 1,000)


def _csv(path: Path, rows: list[dict]) -> Path:
    cols = ["patient", "species", "breed", "sex", "birth_date", "specimen", "collected_at", "analyte",
            "value", "unit", "state"]
    pd.DataFrame(rows).reindex(columns=cols).to_csv(path, index=False)
    return path


def _sample(path: Path, values: dict[str, np.ndarray], breeds=None, unit=None, extra=()) -> Path:
    """One specimen per animal; values[analyte] has one value per animal (in its canonical unit)."""
    units = {"creatinine": "umol/L", "glucose": "mmol/L", "alt": "U/L", "sodium": "mmol/L"}
    n = len(next(iter(values.values())))
    rows = []
    for i in range(n):
        for a, v in values.items():
            rows.append(dict(patient=f"T{i:03d}", species="dog", breed=(breeds[i] if breeds is not None else "beagle"),
                             sex="female_neutered", birth_date="2018-01-01", specimen=f"S{i:03d}",
                             collected_at="2026-03-02 09:00", analyte=a, value=f"{v[i]:.6g}",
                             unit=unit or units[a], state="healthy"))
    rows.extend(extra)
    return _csv(path, rows)


# --------------------------------------------------------------------------- method by sample size

def test_method_follows_sample_size(tmp_path):
    rng = np.random.default_rng(1)
    big = _sample(tmp_path / "big.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 150)})
    mid = _sample(tmp_path / "mid.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 60)})
    small = _sample(tmp_path / "small.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 30)})
    tiny = _sample(tmp_path / "tiny.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 15)})
    r = estimate(big, n_boot=NB).table.iloc[0]
    assert r["method"] == "nonparametric" and r["n"] == 150
    r = estimate(mid, n_boot=NB)
    assert r.table.iloc[0]["method"] == "parametric"  # log-normal data pass Anderson-Darling after Box-Cox
    assert "40-119" in r.details.iloc[0]["reason"] and "Anderson-Darling" in r.details.iloc[0]["reason"]
    r = estimate(small, n_boot=NB)
    assert r.table.iloc[0]["method"] in ("parametric", "robust")
    assert "caution" in r.details.iloc[0]["warnings"]
    r = estimate(tiny, n_boot=NB)
    row = r.table.iloc[0]
    assert row["method"] == "none" and math.isnan(row["lower"]) and math.isnan(row["upper"])
    assert "< 20: no interval" in r.details.iloc[0]["reason"]


def test_non_gaussian_mid_sample_gets_the_robust_method(tmp_path):
    # a bimodal sample cannot be made Gaussian by Box-Cox: Anderson-Darling fails -> robust method
    rng = np.random.default_rng(2)
    v = np.r_[rng.normal(100, 4, 40), rng.normal(140, 4, 40)]
    res = estimate(_sample(tmp_path / "bi.csv", {"sodium": v}), n_boot=NB)
    assert res.table.iloc[0]["method"] == "robust"
    assert "robust" in res.details.iloc[0]["reason"]


def test_parametric_limits_match_scipy_boxcox(tmp_path):
    rng = np.random.default_rng(3)
    v = np.round(rng.lognormal(np.log(40), 0.35, 70), 1)
    res = estimate(_sample(tmp_path / "p.csv", {"alt": v}), n_boot=NB)
    row = res.table.iloc[0]
    assert row["method"] == "parametric"
    # independent computation: scipy.stats.boxcox (MLE lambda), mean -/+ z SD, scipy.special.inv_boxcox
    y, lam = stats.boxcox(v)
    z = stats.norm.ppf(0.975)
    lo, hi = special.inv_boxcox(y.mean() - z * y.std(ddof=1), lam), special.inv_boxcox(y.mean() + z * y.std(ddof=1), lam)
    assert row["lower"] == pytest.approx(lo, rel=1e-6)
    assert row["upper"] == pytest.approx(hi, rel=1e-6)
    assert row["lower_ci_low"] < row["lower"] < row["lower_ci_high"]
    assert row["upper_ci_low"] < row["upper"] < row["upper_ci_high"]


def test_forced_methods_and_their_warnings(tmp_path):
    rng = np.random.default_rng(4)
    p = _sample(tmp_path / "f.csv", {"creatinine": rng.lognormal(np.log(90), 0.2, 130)})
    np_ = estimate(p, method="nonparametric", n_boot=NB).table.iloc[0]
    rob = estimate(p, method="robust", n_boot=NB)
    par = estimate(p, method="parametric", n_boot=NB)
    assert rob.table.iloc[0]["method"] == "robust" and par.table.iloc[0]["method"] == "parametric"
    assert "nonparametric" in rob.details.iloc[0]["warnings"]  # the guideline's method at n >= 120
    # three methods agree on a clean log-normal sample to within their CIs
    for r in (rob.table.iloc[0], par.table.iloc[0]):
        assert abs(math.log(r["upper"] / np_["upper"])) < 0.1
    small = _sample(tmp_path / "s.csv", {"creatinine": rng.lognormal(np.log(90), 0.2, 30)})
    assert estimate(small, method="nonparametric", n_boot=NB).table.iloc[0]["method"] == "none"
    mid = _sample(tmp_path / "m.csv", {"creatinine": rng.lognormal(np.log(90), 0.2, 80)})
    r = estimate(mid, method="nonparametric", n_boot=NB)
    assert r.table.iloc[0]["method"] == "nonparametric"
    assert "bootstrap" in r.details.iloc[0]["warnings"]  # rank-based CIs need n >= 119


# --------------------------------------------------------------------------- input rules

def test_first_specimen_kept_unwell_and_censored_left_out(tmp_path):
    rng = np.random.default_rng(5)
    v = rng.lognormal(np.log(90), 0.15, 125)
    extra = [
        dict(patient="T000", species="dog", breed="beagle", sex="female_neutered", birth_date="2018-01-01",
             specimen="S000b", collected_at="2026-05-02 09:00", analyte="creatinine", value="400", unit="umol/L",
             state="healthy"),
        dict(patient="U001", species="dog", breed="beagle", sex="male_intact", birth_date="2018-01-01",
             specimen="U1", collected_at="2026-03-02 09:00", analyte="creatinine", value="500", unit="umol/L",
             state="unwell"),
        dict(patient="C001", species="dog", breed="beagle", sex="male_intact", birth_date="2018-01-01",
             specimen="C1", collected_at="2026-03-02 09:00", analyte="creatinine", value="<20", unit="umol/L",
             state="healthy"),
    ]
    res = estimate(_sample(tmp_path / "i.csv", {"creatinine": v}, extra=extra), n_boot=NB)
    assert res.table.iloc[0]["n"] == 125
    notes = " ".join(res.notes)
    assert "first specimen of each animal is kept" in notes and "T000" in notes
    assert "unwell" in notes and "U001" in notes
    assert "censored" in notes
    # nonparametric limits equal numpy's rank-p(n+1) quantiles of the 125 first specimens
    np.testing.assert_allclose(res.table.iloc[0][["lower", "upper"]].astype(float),
                               np.quantile(np.round(v, 3).astype(float), [0.025, 0.975], method="weibull"),
                               rtol=1e-4)


def test_gross_outlier_listed_and_excluded_unless_kept(tmp_path):
    rng = np.random.default_rng(6)
    v = rng.lognormal(np.log(40), 0.3, 130)
    v[17] = 900.0
    p = _sample(tmp_path / "o.csv", {"alt": v})
    res = estimate(p, n_boot=NB)
    out = res.outliers
    assert list(out.columns) == list(OUTLIER_COLUMNS)
    hit = out[out["specimen"] == "S017"].iloc[0]
    assert hit["action"] == "excluded" and "dixon" in hit["flagged_by"] and hit["side"] == "high"
    assert res.table.iloc[0]["n"] == 130 - res.table.iloc[0]["n_outliers"]
    kept = estimate(p, keep_outliers=True, n_boot=NB)
    assert kept.table.iloc[0]["n"] == 130 and kept.table.iloc[0]["n_outliers"] == 0
    assert (kept.outliers["action"] == "kept (keep_outliers)").all()
    assert kept.table.iloc[0]["upper"] > res.table.iloc[0]["upper"]


def test_bad_input_gives_clear_errors(tmp_path):
    with pytest.raises(IntervalError, match="not found"):
        estimate(tmp_path / "nope.csv")
    p = _sample(tmp_path / "b.csv", {"creatinine": np.full(30, 90.0)})
    with pytest.raises(IntervalError, match="method"):
        estimate(p, method="magic")
    with pytest.raises(IntervalError, match="partition"):
        estimate(p, partition="colour")
    with pytest.raises(IntervalError, match="glucose"):
        estimate(p, analytes=["glucose"])
    rows = pd.read_csv(p).to_dict("records")
    rows.append(dict(rows[0], patient="CAT1", species="cat", specimen="K1"))
    _csv(tmp_path / "two.csv", rows)
    with pytest.raises(IntervalError, match="two.csv.*several species"):
        estimate(tmp_path / "two.csv")
    assert estimate(tmp_path / "two.csv", species="canine", n_boot=NB).attrs["species"] == "dog"


# --------------------------------------------------------------------------- partitions

def test_partition_by_breed_splits_only_when_groups_differ(tmp_path):
    rng = np.random.default_rng(7)
    breeds = np.array(["greyhound"] * 130 + ["beagle"] * 130)
    crea = np.where(breeds == "greyhound", rng.lognormal(np.log(130), 0.15, 260), rng.lognormal(np.log(85), 0.15, 260))
    glu = rng.normal(5.3, 0.45, 260)
    res = estimate(_sample(tmp_path / "pb.csv", {"creatinine": crea, "glucose": glu}, breeds=breeds),
                   partition="breed", n_boot=NB)
    groups = res.table.groupby("analyte")["group"].apply(list).to_dict()
    assert groups["creatinine"] == ["all", "breed=beagle", "breed=greyhound"]
    assert groups["glucose"] == ["all"]
    part = res.partitions.set_index("analyte")
    assert bool(part.loc["creatinine", "separate"]) and not bool(part.loc["glucose", "separate"])
    grey = res.table[(res.table["group"] == "breed=greyhound")].iloc[0]
    assert grey["method"] == "nonparametric" and 100 < grey["center"] < 160
    frag = tomllib.loads(res.pack_fragment())
    assert frag["analytes"]["creatinine"]["breed_centers"]["greyhound"]["value"] == pytest.approx(grey["center"], rel=1e-5)
    assert "breed_centers" not in frag["analytes"]["glucose"]


def test_age_group_partition_from_birth_dates(tmp_path):
    rng = np.random.default_rng(8)
    n = 60
    rows = []
    for i in range(n):
        old = i % 2 == 0
        rows.append(dict(patient=f"A{i}", species="dog", breed="beagle", sex="male_neutered",
                         birth_date="2014-01-01" if old else "2022-06-01", specimen=f"A{i}",
                         collected_at="2026-03-02", analyte="creatinine",
                         value=f"{rng.lognormal(np.log(120 if old else 80), 0.1):.1f}", unit="umol/L", state=""))
    res = estimate(_csv(tmp_path / "age.csv", rows), partition="age_group", n_boot=NB)
    assert set(res.table["group"]) == {"all", "age_group=8y_and_over", "age_group=1_to_7y"}


# --------------------------------------------------------------------------- result object

def test_result_shapes_provenance_and_silence(tmp_path, capsys):
    rng = np.random.default_rng(9)
    p = _sample(tmp_path / "r.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 125),
                                     "glucose": rng.normal(5.3, 0.4, 125)})
    res = estimate(p, seed=3, n_boot=NB)
    assert capsys.readouterr().out == ""
    assert tuple(res.table.columns) == COLUMNS
    ds = res.dataset
    assert set(ds.dims) == {"analyte", "group", "limit", "ci_bound"} and "sample" not in ds.dims
    assert ds["limit_ci"].dims == ("analyte", "group", "limit", "ci_bound")
    assert float(ds["limit_value"].sel(analyte="creatinine", group="all", limit="upper")) == \
        pytest.approx(res.table.iloc[0]["upper"])
    sha = hashlib.sha256(p.read_bytes()).hexdigest()
    for key in ("version", "seed", "source_sha256", "pack_id", "pack_sha256", "method"):
        assert key in res.attrs and key in ds.attrs
    assert res.attrs["source_sha256"] == sha and res.attrs["seed"] == 3
    # the pack's CVI/CVA go into CVG (creatinine: CVI 8 %, CVA 3 % in the dog pack)
    assert res.table.set_index("analyte").loc["creatinine", "cvg_pct"] > 0
    assert "sG^2" in res.details.set_index("analyte").loc["creatinine", "cvg_note"]


def test_seeded_bootstrap_is_reproducible(tmp_path):
    rng = np.random.default_rng(10)
    p = _sample(tmp_path / "s.csv", {"alt": rng.lognormal(np.log(40), 0.3, 60)})
    a, b, c = (estimate(p, seed=s, n_boot=NB).table for s in (1, 1, 2))
    pd.testing.assert_frame_equal(a, b)
    assert a["lower"].iloc[0] == c["lower"].iloc[0]  # the limit does not depend on the seed
    assert a["lower_ci_low"].iloc[0] != c["lower_ci_low"].iloc[0]  # its bootstrap CI does


# --------------------------------------------------------------------------- outputs

def test_write_outputs_html_escaped_and_pack_fragment(tmp_path):
    rng = np.random.default_rng(11)
    breeds = np.array(["<script>alert(1)</script>"] * 60 + ["beagle"] * 70)
    p = _sample(tmp_path / "w.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 130)}, breeds=breeds)
    res = estimate(p, partition="breed", n_boot=NB)
    paths = res.write(tmp_path / "out")
    assert set(paths) >= {"intervals.csv", "outliers.csv", "interval.html", "pack.toml"}
    header = (tmp_path / "out" / "intervals.csv").read_text().splitlines()[0]
    assert header == ",".join(COLUMNS)
    html = (tmp_path / "out" / "interval.html").read_text()
    assert html.index("Decision support, not a diagnosis") < html.index("<h1>")
    assert "<script>" not in html and "&lt;script&gt;" in html
    assert "http://" not in html.replace("http://www.w3.org", "") and 'src="http' not in html
    assert "data:image/png;base64," in html and "Q-Q" in html
    frag = tomllib.loads((tmp_path / "out" / "pack.toml").read_text())
    sha = hashlib.sha256(p.read_bytes()).hexdigest()
    assert frag["pack"]["extends"] == "dog" and frag["pack"]["species"] == "dog"
    assert sha in frag["pack"]["description"]
    cited = frag["analytes"]["creatinine"]
    for key in ("center", "ri_lower", "ri_upper", "cvg"):
        assert cited[key]["provenance"] == "estimated" and sha in cited[key]["source"]
    assert cited["ri_lower"]["value"] == pytest.approx(res.table.iloc[0]["lower"], rel=1e-5)


def test_nothing_half_written_on_failure(tmp_path, monkeypatch):
    rng = np.random.default_rng(12)
    res = estimate(_sample(tmp_path / "h.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 40)}), n_boot=NB)
    out = tmp_path / "out"
    out.mkdir()
    (out / "intervals.csv").write_text("old run\n")
    from bayesbase.interval import outputs, report

    def boom(*_):
        raise RuntimeError("disk on fire")

    # a failure while the outputs are built: the folder is left as it was
    monkeypatch.setattr(report, "interval_html", boom)
    with pytest.raises(RuntimeError):
        res.write(out)
    assert sorted(p.name for p in out.iterdir()) == ["intervals.csv"]
    assert (out / "intervals.csv").read_text() == "old run\n"
    monkeypatch.undo()
    # a failure while renaming into place: no temporary file is left behind
    calls = {"n": 0}
    real_replace = outputs.os.replace

    def flaky_replace(a, b):
        calls["n"] += 1
        if calls["n"] == 2:
            raise OSError("device full")
        real_replace(a, b)

    monkeypatch.setattr(outputs.os, "replace", flaky_replace)
    with pytest.raises(OSError):
        res.write(out)
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]


def test_pack_fragment_is_accepted_by_the_pack_schema(tmp_path):
    from bayesbase.priors import check_file

    rng = np.random.default_rng(13)
    res = estimate(_sample(tmp_path / "x.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 125)}), n_boot=NB)
    path = tmp_path / "pack.toml"
    path.write_text(res.pack_fragment())
    assert check_file(path) == []


# --------------------------------------------------------------------------- command line

def _parser():
    ap = argparse.ArgumentParser(prog="bayesbase")
    sub = ap.add_subparsers(dest="command")
    add_parser(sub)
    return ap


def test_cli_writes_files_and_prints_method_and_reason(tmp_path, capsys):
    rng = np.random.default_rng(14)
    p = _sample(tmp_path / "c.csv", {"creatinine": rng.lognormal(np.log(90), 0.15, 45)})
    args = _parser().parse_args(["interval", str(p), "--out", str(tmp_path / "o"), "--seed", "2",
                                 "--boot", "300", "--analytes", "creatinine"])
    assert run(args) == 0
    out = capsys.readouterr().out
    assert "creatinine [all] n=45" in out and "why:" in out and "Decision support" in out
    assert (tmp_path / "o" / "intervals.csv").is_file()


def test_cli_user_error_returns_2(tmp_path, capsys):
    args = _parser().parse_args(["interval", str(tmp_path / "missing.csv"), "--out", str(tmp_path / "o")])
    assert run(args) == 2
    err = capsys.readouterr().err
    assert err.startswith("bayesbase: error:") and "missing.csv" in err
    assert not (tmp_path / "o").exists()


def test_cli_module_import_is_light():
    code = ("import sys, argparse\nfrom bayesbase.interval.cli import add_parser\n"
            "ap = argparse.ArgumentParser(); add_parser(ap.add_subparsers())\n"
            "print(','.join(m for m in ('pandas', 'matplotlib', 'scipy', 'pymc') if m in sys.modules))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_import_rules_inside_the_package():
    # core numerics never import plotting; only report.py imports matplotlib; nothing imports PyMC
    for path in PKG.glob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        names = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names |= {a.name.split(".")[0] for a in node.names}
            elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
                names.add(node.module.split(".")[0])
        assert not names & {"pymc", "pytensor", "arviz"}, path.name
        if path.stem != "report":
            assert "matplotlib" not in names, path.name


def test_bench_interval_returns_timings():
    from bayesbase.bench.interval import bench_interval

    res = bench_interval(n_animals=130, n_analytes=2, n_boot=200)
    assert res["animals"] == 130 and all(v > 0 for k, v in res.items() if k.startswith("seconds"))
