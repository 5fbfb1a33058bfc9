"""Pack fragments layered over a base (``[pack] extends``), ``priors merge``, the provenance words
"estimated" and "calibrated", and the consistency warning between a pack's CVs and its own
population interval. Fragment numbers here are invented test inputs; their sources name a file
written by the test and its real SHA-256 (hashlib)."""
from __future__ import annotations

import argparse
import hashlib
import math
import tomllib
from importlib import resources

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from bayesbase import priors
from bayesbase.cli import priors_cmd
from bayesbase.errors import PackError
from bayesbase.priors.toml_out import dumps

from conftest import CASE_DIR


def _raw(name: str) -> bytes:
    return resources.files("bayesbase.models").joinpath(f"{name}.toml").read_bytes()


def _study_file(tmp_path, name="study.csv") -> tuple[str, str]:
    """An (invented) study file and its SHA-256, for the sources of estimated numbers."""
    p = tmp_path / name
    p.write_text("animal,specimen,analyte,value\nA,1,creatinine,90\n", encoding="utf-8")
    return p.name, hashlib.sha256(p.read_bytes()).hexdigest()


def _est(value, src, note="invented test input"):
    return f'{{ value = {value!r}, source = "{src}", provenance = "estimated", note = "{note}" }}'


def _fragment(tmp_path, body: str, name="frag.toml", extends="dog", fid="frag", species="dog") -> str:
    path = tmp_path / name
    path.write_text(f'[pack]\nid = "{fid}"\nspecies = "{species}"\ntitle = "test fragment"\n'
                    f'version = "1"\nextends = "{extends}"\n\n{body}', encoding="utf-8")
    return str(path)


@pytest.fixture
def src(tmp_path):
    file, sha = _study_file(tmp_path)
    return f"bayesbase study of {file} (sha256 {sha})"


# --------------------------------------------------------------------------- provenance words

def test_estimated_and_calibrated_numbers_need_the_input_sha256(tmp_path, src):
    good = _fragment(tmp_path, f"[analytes.creatinine]\ncvg = {_est(0.2, src)}\n")
    assert priors.check_file(good) == []
    calibrated = src.replace("bayesbase study of", "bayesbase calibrate on store")
    cal = _fragment(tmp_path, "[analytes.creatinine]\ncvg = { value = 0.2, source = "
                              f'"{calibrated}", provenance = "calibrated" }}\n', name="cal.toml")
    assert priors.check_file(cal) == []
    bad = _fragment(tmp_path, '[analytes.creatinine]\ncvg = { value = 0.2, source = "study.csv", '
                              'provenance = "estimated" }\n', name="bad.toml")
    problems = priors.check_file(bad)
    assert problems == [f"{bad}: analytes.creatinine.cvg.source: an 'estimated' number names the file "
                        "(or store) it comes from and its SHA-256 (64 hex digits)"]
    assert {"estimated", "calibrated"} <= set(priors.PROVENANCES)


# --------------------------------------------------------------------------- layering

def test_fragment_layers_over_its_base(tmp_path, src):
    path = _fragment(tmp_path, f"""[analytes.creatinine]
unit = "umol/L"
cvi = {_est(0.07, src)}
cvi_log_sd = {_est(0.12, src)}

[analytes.creatinine.breed_centers]
beagle = {_est(80.0, src)}
""", fid="dog+study-x")
    base, pack = priors.load_pack("dog"), priors.load_pack(path)
    assert pack.id == "dog+study-x"  # the fragment's own "dog+" is not repeated
    assert pack.species == "dog" and pack.title.startswith(base.title)
    assert pack.sha256 == hashlib.sha256(_raw("dog") + (tmp_path / "frag.toml").read_bytes()).hexdigest()
    a, b = pack.get("creatinine"), base.get("creatinine")
    assert (a.cvi, a.cvi_log_sd) == (0.07, 0.12)
    assert pack.cited["creatinine"]["cvi"].provenance == "estimated"
    assert (a.cvg, a.cva, a.center, a.group) == (b.cvg, b.cva, b.center, b.group)  # inherited
    assert a.breed_centers == {**b.breed_centers, "beagle": 80.0}  # merged per breed
    assert pack.get("alt") == base.get("alt")
    assert pack.retest_groups == base.retest_groups and pack.defaults == base.defaults
    # the base's literature studies stay listed, no longer pooled: the CVI comes from the fragment
    assert b.cvi_studies and all(s.pooled for s in b.cvi_studies)
    assert a.cvi_studies and not any(s.pooled for s in a.cvi_studies)
    assert all(str(path) in s.note for s in a.cvi_studies)
    assert "sha256 " + hashlib.sha256((tmp_path / "frag.toml").read_bytes()).hexdigest() in pack.description


def test_fragment_chain_relative_extends_and_circle(tmp_path, src):
    first = _fragment(tmp_path, f"[analytes.alt]\ncvg = {_est(0.3, src)}\n", name="first.toml", fid="one")
    second = _fragment(tmp_path, f"[analytes.alt]\ncvi = {_est(0.11, src)}\n", name="second.toml",
                       extends="first.toml", fid="two")  # relative to the fragment's folder
    assert priors.load_pack(first).get("alt").cvi == priors.load_pack("dog").get("alt").cvi
    pack = priors.load_pack(second)
    assert pack.id == "dog+one+two"
    assert (pack.get("alt").cvg, pack.get("alt").cvi) == (0.3, 0.11)
    raws = _raw("dog") + (tmp_path / "first.toml").read_bytes() + (tmp_path / "second.toml").read_bytes()
    assert pack.sha256 == hashlib.sha256(raws).hexdigest()
    loop = _fragment(tmp_path, f"[analytes.alt]\ncvi = {_est(0.11, src)}\n", name="loop.toml",
                     extends="loop.toml", fid="loop")
    with pytest.raises(PackError, match="pack.extends: 'loop.toml' leads back to this file"):
        priors.load_pack(loop)


def test_fragment_problems_name_the_fragment_and_key_path(tmp_path, src):
    path = _fragment(tmp_path, f"""[analytes.creatinine]
cvii = {_est(0.07, src)}
cvg = {_est(7.0, src)}

[analytes.cortisol]
cvi = {_est(0.2, src)}
""")
    problems = priors.check_file(path)
    assert f"{path}: analytes.creatinine.cvii: unknown key (did you mean 'cvi'?)" in problems
    assert f"{path}: analytes.creatinine.cvg.value: 7.0 out of range (0, 2)" in problems
    # a fragment may add an analyte only with every required key
    assert f"{path}: analytes.cortisol.cva: missing required key (cited number)" in problems
    wrong = _fragment(tmp_path, f"[analytes.alt]\ncvg = {_est(0.3, src)}\n", name="w.toml", species="cat")
    assert any("pack.species: 'cat' but the base pack 'dog' is for dog" in p for p in priors.check_file(wrong))
    typo = _fragment(tmp_path, f"[analytes.alt]\ncvg = {_est(0.3, src)}\n", name="t.toml", extends="dgo")
    assert priors.check_file(typo) == [f"{tmp_path / 't.toml'}: pack.extends: unknown pack 'dgo' (did you mean "
                                       "'dog'?); available packs: " + ", ".join(priors.available_packs())]


def test_full_schema_rules_apply_to_the_layered_pack(tmp_path, src):
    # a centre above the base's upper limit breaks ri_lower < center < ri_upper of the result
    path = _fragment(tmp_path, f"[analytes.creatinine]\ncenter = {_est(500.0, src)}\n")
    problems = priors.check_file(path)
    assert len(problems) == 1 and "analytes.creatinine: need ri_lower < center < ri_upper" in problems[0]
    assert problems[0].startswith(f"{path} (over models/dog.toml): ")


# --------------------------------------------------------------------------- merge

def test_merge_of_nothing_rewrites_the_pack_identically(tmp_path):
    for name in priors.available_packs():
        out = tmp_path / f"{name}.toml"
        out.write_text(priors.merge(name), encoding="utf-8")
        assert tomllib.loads(out.read_text()) == tomllib.loads(_raw(name).decode())
        a, b = priors.load_pack(out), priors.load_pack(name)
        assert a.analytes == b.analytes and a.cited == b.cited and a.retest_groups == b.retest_groups


def test_merge_later_fragment_wins_and_says_so(tmp_path, src):
    f1 = _fragment(tmp_path, f"[analytes.urea]\ncvi = {_est(0.10, src)}\ncvg = {_est(0.25, src)}\n",
                   name="f1.toml", fid="one")
    f2 = _fragment(tmp_path, f"[analytes.urea]\ncvi = {_est(0.14, src, 'second study')}\n", name="f2.toml",
                   fid="two")
    text = priors.merge("dog", f1, f2)
    out = tmp_path / "merged.toml"
    out.write_text(text, encoding="utf-8")
    assert priors.check_file(out) == []
    data = tomllib.loads(text)
    assert "extends" not in data["pack"] and data["pack"]["id"] == "dog+one+two"
    cvi = data["analytes"]["urea"]["cvi"]
    assert cvi["value"] == 0.14
    assert cvi["note"] == f"second study; later layer wins: {f2} replaces the value 0.1 set by {f1}"
    assert data["analytes"]["urea"]["cvg"]["value"] == 0.25 and "later" not in data["analytes"]["urea"]["cvg"]["note"]
    for p in (tmp_path / "f1.toml", tmp_path / "f2.toml"):
        assert hashlib.sha256(p.read_bytes()).hexdigest() in text
    # the same numbers as loading the chain f2 -> f1 -> dog
    chain = _fragment(tmp_path, f"[analytes.urea]\ncvi = {_est(0.14, src, 'second study')}\n",
                      name="f2c.toml", extends="f1.toml", fid="two")
    merged, layered = priors.load_pack(out), priors.load_pack(chain)
    assert merged.analytes["urea"].cvi == layered.analytes["urea"].cvi == 0.14
    assert merged.analytes == layered.analytes


def test_merge_refuses_an_invalid_result_and_cli_writes_nothing(tmp_path, src, capsys):
    bad = _fragment(tmp_path, f"[analytes.urea]\ncvi = {_est(5.0, src)}\n", name="bad.toml")
    with pytest.raises(PackError, match="analytes.urea.cvi.value: 5.0 out of range"):
        priors.merge("dog", bad)
    ap = argparse.ArgumentParser()
    priors_cmd.add_parsers(ap.add_subparsers(dest="command"))
    out = tmp_path / "out.toml"
    from bayesbase.cli.main import main
    assert main(["priors", "merge", "dog", bad, "--out", str(out)]) == 2
    assert not out.exists() and "bayesbase: error:" in capsys.readouterr().err
    good = _fragment(tmp_path, f"[analytes.urea]\ncvi = {_est(0.12, src)}\n", name="good.toml")
    args = ap.parse_args(["priors", "merge", "dog", good, "--out", str(out)])
    assert args.run(args) == 0
    assert priors.load_pack(out).get("urea").cvi == 0.12
    assert f"{out}: pack dog+frag, 28 analytes" in capsys.readouterr().out
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


@settings(max_examples=200, deadline=None)
@given(text=st.text(), number=st.floats(allow_nan=False, allow_infinity=False), whole=st.integers(),
       flag=st.booleans(), key=st.text(min_size=1))
def test_toml_writer_round_trips_any_text_and_number(text, number, whole, flag, key):
    data = {"pack": {"id": text, key: number}, "analytes": {key: {"x": {"value": number, "note": text},
                                                                  "n": whole, "b": flag,
                                                                  "cvi_studies": [{"value": whole, "s": text}]}}}
    assert tomllib.loads(dumps(data, ["# header"])) == data


# --------------------------------------------------------------------------- fragments of other commands

def test_interval_fragment_with_breed_centres_layers_and_merges(tmp_path):
    from bayesbase.interval import estimate

    res = estimate(CASE_DIR / "dog_reference_sample" / "results.csv", partition="breed", seed=0, n_boot=200)
    path = tmp_path / "interval" / "pack.toml"
    path.parent.mkdir()
    path.write_text(res.pack_fragment(), encoding="utf-8")
    frag = tomllib.loads(path.read_text())
    pack, base = priors.load_pack(path), priors.load_pack("dog")
    assert pack.id == frag["pack"]["id"]  # "dog+interval-<sha>" keeps one "dog+"
    for aid, a in frag["analytes"].items():
        got = pack.get(aid)
        assert got.center == a["center"]["value"] and pack.cited[aid]["center"].provenance == "estimated"
        assert got.cvi == base.get(aid).cvi  # not in an interval fragment: inherited
        for b, cn in a.get("breed_centers", {}).items():
            assert got.breed_centers[b] == cn["value"]
        assert set(base.get(aid).breed_centers) <= set(got.breed_centers)


def test_fragment_pack_assesses_end_to_end(tmp_path, src):
    from bayesbase.assessment import assess
    from bayesbase.io import read_results as load_results

    path = _fragment(tmp_path, f"[analytes.creatinine]\ncvi = {_est(0.05, src)}\ncvi_log_sd = {_est(0.1, src)}\n",
                     fid="study-x")
    results = load_results(CASE_DIR / "dog_stable_wellness" / "results.csv")
    a = assess(results, pack=path)
    pack = priors.load_pack(path)
    assert a.attrs["pack_id"] == "dog+study-x" and a.attrs["pack_sha256"] == pack.sha256
    row = a.table[a.table["analyte"] == "creatinine"].iloc[0]
    assert row["cvi_pct"] == pytest.approx(5.0)
    # classical RCV of the table from the fragment's CVI: 1.96 sqrt(2) sqrt(CVA^2 + CVI^2) (Fraser & Harris 1989)
    rcv = stats.norm.ppf(0.975) * math.sqrt(2) * math.hypot(0.05, pack.get("creatinine").cva)
    assert row["rcv_classical_pct"] == pytest.approx(100 * rcv, rel=1e-6)


# --------------------------------------------------------------------------- consistency warnings

#: analytes whose CVs and population interval disagree by more than 25 % (issue 20 audit: 8 of 56);
#: each is now kept on purpose, with ``interval_gap = { ratio, reason }`` in the pack
EXPECTED_ACKNOWLEDGED = {"dog": {"creatinine", "chloride", "fructosamine"},
                         "cat": {"creatinine", "glucose", "albumin", "cholesterol", "chloride"}}


def _independent_ratio(a) -> float:
    """CV-implied over interval-implied total log-SD, computed with scipy: a log-normal whose
    central 95 % is [lo, hi] has sigma = ln(hi/lo) / (2 z_0.975); each CV's log-SD is the s of the
    scipy log-normal whose std/mean equals that CV."""
    sigma_interval = math.log(a.ri_upper / a.ri_lower) / (2 * stats.norm.ppf(0.975))
    sig = [float(np.sqrt(np.log1p(cv * cv))) for cv in (a.cvg, a.cvi, a.cva)]
    for cv, s in zip((a.cvg, a.cvi, a.cva), sig):
        d = stats.lognorm(s=s)
        assert d.std() / d.mean() == pytest.approx(cv, rel=1e-9)
    return math.sqrt(sum(s * s for s in sig)) / sigma_interval


@pytest.mark.parametrize("name", sorted(EXPECTED_ACKNOWLEDGED))
def test_consistency_of_the_shipped_packs(name):
    pack = priors.load_pack(name)
    assert pack.warnings == ()
    acknowledged = {w.split(":", 1)[0].removeprefix("analytes.") for w in pack.acknowledged}
    assert acknowledged == EXPECTED_ACKNOWLEDGED[name]
    for aid, a in pack.analytes.items():
        r = _independent_ratio(a)
        assert (abs(r - 1) > 0.25) == (aid in acknowledged), aid
        if aid in acknowledged:
            # the acknowledgement states the ratio the numbers give (scipy recomputation) and a reason
            assert a.interval_gap.ratio == pytest.approx(r, rel=priors.GAP_RATIO_RTOL)
            assert len(a.interval_gap.reason) > 80
        else:
            assert a.interval_gap is None, f"{aid}: interval_gap on a consistent analyte"
    assert priors.check_file(resources.files("bayesbase.models").joinpath(f"{name}.toml")) == []


def test_an_acknowledgement_goes_stale_when_the_numbers_move(tmp_path, src):
    # dog creatinine's gap is acknowledged at its ratio; a study fragment that raises CVG by half moves the
    # ratio (sqrt(sG^2 + sI^2 + sA^2) / (ln(upper/lower)/3.92)) and the warning comes back
    base = priors.load_pack("dog").get("creatinine")
    path = _fragment(tmp_path, f"[analytes.creatinine]\ncvg = {_est(base.cvg * 1.5, src)}\n")
    pack = priors.load_pack(path)
    (w,) = [w for w in pack.warnings if w.startswith("analytes.creatinine:")]
    assert f"acknowledges a ratio of {base.interval_gap.ratio:g}, which no longer matches" in w
    assert not any(a.startswith("analytes.creatinine:") for a in pack.acknowledged)
    # restating the new ratio (computed here with scipy, independently of the schema) acknowledges it
    moved = _independent_ratio(pack.get("creatinine"))
    path = _fragment(tmp_path, f"[analytes.creatinine]\ncvg = {_est(base.cvg * 1.5, src)}\n"
                               f'interval_gap = {{ ratio = {moved:.3f}, reason = "test: both kept" }}\n',
                     name="frag2.toml")
    pack = priors.load_pack(path)
    assert not any(w.startswith("analytes.creatinine:") for w in pack.warnings)
    assert any(a.startswith("analytes.creatinine:") and a.endswith("both kept: test: both kept")
               for a in pack.acknowledged)


@pytest.mark.parametrize("gap,problem", [
    ('{ ratio = 1.86 }', "interval_gap.reason: missing required key"),
    ('{ ratio = 0, reason = "x" }', "interval_gap.ratio: expected a positive number"),
    ('{ ratio = "big", reason = "x" }', "interval_gap.ratio: expected a positive number"),
    ('{ ratio = 1.86, reason = "x", why = "y" }', "interval_gap.why: unknown key"),
    ('"kept on purpose"', "interval_gap: expected a table"),
])
def test_interval_gap_is_checked_by_the_strict_schema(tmp_path, gap, problem):
    path = _fragment(tmp_path, f"[analytes.creatinine]\ninterval_gap = {gap}\n")
    problems = priors.check_file(path)
    assert any(f"analytes.creatinine.{problem}" in p for p in problems), problems


def test_breed_notes_are_checked_by_the_strict_schema(tmp_path):
    ok = ('{ akita = { text = "t", source = "Conrado FO et al. Vet Clin Pathol 2014;43(1):50-54", '
          'provenance = "read", locator = "abstract" } }')
    assert priors.check_file(_fragment(tmp_path, f"[analytes.potassium]\nbreed_notes = {ok}\n")) == []
    for notes, problem in (
            ('{ Akita = { text = "t", source = "s", provenance = "read", locator = "abstract" } }',
             "breed_notes.Akita: breed keys are lower case"),
            ('{ akita = { source = "s", provenance = "read", locator = "abstract" } }', "breed_notes.akita.text"),
            ('{ akita = { text = "t", source = "s", provenance = "read" } }', "breed_notes.akita.locator"),
            ('{ akita = { text = "t", source = "s", provenance = "from memory" } }', "breed_notes.akita.note"),
            ('{ akita = { text = "t", source = "s", provenance = "read", locator = "a", colour = 1 } }',
             "breed_notes.akita.colour: unknown key")):
        problems = priors.check_file(_fragment(tmp_path, f"[analytes.potassium]\nbreed_notes = {notes}\n"))
        assert any(f"analytes.potassium.{problem}" in p for p in problems), (notes, problems)


def test_shipped_breed_notes_are_sourced_and_apart_from_the_age_rules():
    dog = priors.load_pack("dog")
    assert set(dog.get("potassium").breed_notes) == {"akita"}
    assert set(dog.get("creatinine").breed_notes) == {"greyhound"} == set(dog.get("total_t4").breed_notes)
    for aid, a in dog.analytes.items():
        for b in a.breed_notes:
            assert a.sources[f"breed_notes.{b}"].strip() and a.sources[f"breed_notes.{b}.provenance"]
        raw = tomllib.loads(_raw("dog").decode())["analytes"][aid].get("note", "")
        assert "Breed note" not in raw and "sighthounds:" not in raw, aid


def test_planted_inconsistency_warns_and_a_consistent_pack_does_not(tmp_path, src):
    # narrow ALT's interval so that sqrt(sG^2 + sI^2 + sA^2) is far wider than the interval implies
    a = priors.load_pack("dog").get("alt")
    path = _fragment(tmp_path, f"[analytes.alt]\nri_lower = {_est(a.center * 0.95, src)}\n"
                               f"ri_upper = {_est(a.center * 1.05, src)}\n")
    pack = priors.load_pack(path)
    assert [w.split(":")[0] for w in pack.warnings if w.startswith("analytes.alt")] == ["analytes.alt"]
    # an interval built from the CVs themselves (centre x exp(+/- 1.96 s_total)) does not warn
    s = math.sqrt(a.sg ** 2 + a.si ** 2 + a.sa ** 2)
    z = stats.norm.ppf(0.975)
    ok = _fragment(tmp_path, f"[analytes.alt]\nri_lower = {_est(a.center * math.exp(-z * s), src)}\n"
                             f"ri_upper = {_est(a.center * math.exp(z * s), src)}\n", name="ok.toml")
    assert not [w for w in priors.load_pack(ok).warnings if w.startswith("analytes.alt")]
    s_int, s_cvs, bad = priors.interval_consistency(a.center * math.exp(-z * s), a.center * math.exp(z * s),
                                                    a.cvg, a.cvi, a.cva)
    assert s_int == pytest.approx(s_cvs, rel=1e-12) and not bad


def test_priors_check_and_show_print_the_warnings(tmp_path, capsys):
    ap = argparse.ArgumentParser()
    priors_cmd.add_parsers(ap.add_subparsers(dest="command"))
    dog = str(resources.files("bayesbase.models").joinpath("dog.toml"))
    args = ap.parse_args(["priors", "check", dog])
    assert args.run(args) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == f"{dog}: valid"
    assert lines[1:] == []  # every gap of the shipped pack is acknowledged (interval_gap)
    args = ap.parse_args(["priors", "show", "cat", "--analyte", "albumin"])
    assert args.run(args) == 0
    out = capsys.readouterr().out
    assert "CVs vs interval: the CVs give a total log-SD" in out and "acknowledged (interval_gap)" in out
    assert "WARNING" not in out and max(map(len, out.splitlines())) <= 100
    # a pack whose gap is not acknowledged prints it as a warning, in check and in show
    frag = _fragment(tmp_path, "[analytes.alt]\nri_lower = { value = 28.5, source = \"test\", provenance = "
                               "\"common practice\" }\nri_upper = { value = 31.5, source = \"test\", "
                               "provenance = \"common practice\" }\n")
    args = ap.parse_args(["priors", "check", frag])
    assert args.run(args) == 0
    lines = capsys.readouterr().out.splitlines()
    assert [ln.split(": ")[2] for ln in lines[1:]] == ["analytes.alt"]
    assert all(ln.startswith(f"{frag}: warning: analytes.") for ln in lines[1:])
    args = ap.parse_args(["priors", "show", frag, "--analyte", "alt"])
    assert args.run(args) == 0 and "WARNING: the CVs give a total log-SD" in capsys.readouterr().out
    args = ap.parse_args(["priors", "show", "cat", "--analyte", "sodium"])
    assert args.run(args) == 0 and "WARNING" not in capsys.readouterr().out
