"""The command line as a user meets it: clear messages naming row and column, no tracebacks,
and the main job end to end."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import CASE_DIR

HEADER = "patient,species,specimen,collected_at,analyte,value,unit\n"


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "bayesbase.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd)


BAD = {
    "missing_column": ("patient,species,specimen,collected_at,analyte,value\nA,dog,s1,2024-01-01,ALT,40\n", "unit"),
    "non_numeric": (HEADER + "A,dog,s1,2024-01-01,ALT,abc,U/L\n", "row 2"),
    "negative": (HEADER + "A,dog,s1,2024-01-01,ALT,-4,U/L\n", "row 2"),
    "zero": (HEADER + "A,dog,s1,2024-01-01,ALT,0,U/L\n", "row 2"),
    "unknown_analyte": (HEADER + "A,dog,s1,2024-01-01,creatinin,90,umol/L\n", "did you mean"),
    "impossible_unit": (HEADER + "A,dog,s1,2024-01-01,ALT,40,mg/dL\n", "mg/dL"),
    "bad_date": (HEADER + "A,dog,s1,not-a-date,ALT,40,U/L\n", "collected_at"),
    "future_date": (HEADER + "A,dog,s1,2999-01-01,ALT,40,U/L\n", "future"),
    "two_species": (HEADER + "A,dog,s1,2024-01-01,ALT,40,U/L\nA,cat,s2,2024-02-01,ALT,41,U/L\n", "species"),
    "conflicting_duplicate": (HEADER + "A,dog,s1,2024-01-01,ALT,40,U/L\nA,dog,s1,2024-01-01,ALT,55,U/L\n", "row 3"),
    "empty": ("", "empty"),
}


@pytest.mark.parametrize("name", sorted(BAD))
def test_check_reports_problem_without_traceback(tmp_path, name):
    text, needle = BAD[name]
    f = tmp_path / f"{name}.csv"
    f.write_text(text, encoding="utf-8")
    out = run("check", f)
    assert out.returncode != 0
    assert "Traceback" not in out.stderr
    msg = out.stderr + out.stdout
    assert needle.lower() in msg.lower(), msg
    assert f.name in msg


def test_check_reads_conventional_units_and_censored(tmp_path):
    f = tmp_path / "ok.csv"
    f.write_text("patient;species;specimen;collected_at;analyte;value;unit\n"
                 "A;dog;s1;2024-01-01;creatinine;1.2;mg/dL\nA;dog;s1;2024-01-01;BUN;20;mg/dL\n"
                 "A;dog;s1;2024-01-01;ALT;<10;U/L\n", encoding="utf-8")
    out = run("check", f)
    assert out.returncode == 0, out.stderr
    # creatinine 1.2 mg/dL x 88.4 = 106.08 umol/L; BUN 20 mg/dL x 0.357 = 7.14 mmol/L urea (units.csv sources)
    assert "106.08" in out.stdout and "7.14" in out.stdout


def test_assess_json_contract():
    f = CASE_DIR / "dog_liver_enzymes_after_anticonvulsant" / "results.csv"
    out = run("assess", f, "--format", "json")
    assert out.returncode == 0, out.stderr
    recs = json.loads(out.stdout)
    keys = {"patient", "analyte", "unit", "value", "n_baseline", "set_point", "personal_interval",
            "percentile", "bayes_factor", "p_change", "p_increase", "rcv", "population_interval", "flags"}
    for r in recs:
        assert keys <= set(r)
        assert {"mean", "lower", "upper"} <= set(r["set_point"])
        assert {"lower", "upper", "coverage"} <= set(r["personal_interval"])
        assert {"classical_pct", "lognormal_up_pct", "lognormal_down_pct", "exceeded"} <= set(r["rcv"])
        assert 0 <= r["percentile"] <= 1
    alp = next(r for r in recs if r["analyte"] == "alp")
    assert alp["p_change"] > 0.9


def test_assess_unknown_analyte_in_pack_is_clear_error(tmp_path):
    f = tmp_path / "x.csv"
    f.write_text(HEADER + "A,dog,s1,2024-01-01,cortisol,100,nmol/L\n", encoding="utf-8")
    out = run("assess", f)
    assert out.returncode != 0 and "Traceback" not in out.stderr
    assert "cortisol" in out.stderr and "pack" in out.stderr


def test_priors_show_and_check(tmp_path):
    out = run("priors", "show", "dog", "--analyte", "creatinine")
    assert out.returncode == 0, out.stderr
    assert "cvi" in out.stdout and "CVI/CVG" in out.stdout
    bad = tmp_path / "lab.csv"
    bad.write_text("analyte,cvi_pctt\ncreatinine,9\n", encoding="utf-8")
    out = run("priors", "check", bad)
    assert out.returncode != 0 and "Traceback" not in out.stderr


def test_help_is_fast_path_and_lists_commands():
    out = run("--help")
    assert out.returncode == 0
    for cmd in ("demo", "check", "priors", "assess", "report", "import", "compare", "bench"):
        assert cmd in out.stdout
    assert "not a diagnosis" in out.stdout
