"""Method biases in a pack (``analytes.<id>.method_biases``) and their use by ``assess``.

* the pack schema (``bayesbase.priors``): unknown keys with a did-you-mean hint, one reference
  method per analyte, SD > 0, a calibrated bias names its store's SHA-256; the TOML writer
  (``bayesbase.priors.toml_out``) round-trips the table (read back with Python's ``tomllib``);
* outside reference for the calibrated correction: P(change) computed by hand with
  ``scipy.stats.norm`` (normal-normal update of the set point, McIntosh & Urban, Biostatistics
  2003;4:27-40; Bayes factor of a normal shift tau^2 under H1) for a pack fragment with no CVI
  uncertainty (cvi_log_sd = 0, so the exact engine's posterior is one normal), baselines on method
  A and the new result on method B, the variance of the correction s_A^2 + s_B^2 (biases taken as
  independent, both against one reference; see ``bayesbase.assessment.cases``);
* end to end (slow): ``bayesbase calibrate`` on an invented store, then ``bayesbase assess --db
  --pack DIR/pack.toml``; the pack's bias is the mean of the posterior draws (numpy over the
  ArviZ dataset) and the assessment applies it.

Every number below is invented for these tests (demo analysers, demo biases), not a reference value.
"""
from __future__ import annotations

import io
import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from bayesbase.assessment import assess
from bayesbase.errors import BayesbaseError, PackError
from bayesbase.priors import load_pack, merge
from bayesbase.priors.toml_out import dumps

SRC = "invented for a bayesbase test"
REF = "demo analyser R"
#: invented demo biases (ln scale) and their SDs, against REF
BIAS = {"demo analyser A": (-0.04, 0.015), "demo analyser B": (0.09, 0.02), "demo analyser C": (0.03, 0.05)}


def _entry(method, b, sd, ref=REF, **extra):
    fields = {"log_bias": b, "log_sd": sd, "reference": ref, "source": SRC, "provenance": "derived", **extra}
    inner = ", ".join(f"{k} = {_val(v)}" for k, v in fields.items())
    return f"{json.dumps(method)} = {{ {inner} }}"


def _val(v):
    return json.dumps(v) if isinstance(v, str) else repr(v)


def _fragment(tmp_path: Path, entries: list[str], extra_analyte: str = "", name="frag.toml") -> Path:
    """A pack fragment over dog: creatinine with no CVI uncertainty and the given bias entries."""
    text = "\n".join([
        "[pack]", 'id = "dog+method-test"', 'species = "dog"', 'title = "method bias test"', 'version = "1"',
        'extends = "dog"', "", "[analytes.creatinine]",
        f'cvi_log_sd = {{ value = 0.0, source = "{SRC}: no CVI uncertainty, so the posterior is one normal", '
        'provenance = "derived" }', extra_analyte, "", "[analytes.creatinine.method_biases]", *entries, ""])
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _good(tmp_path):
    return _fragment(tmp_path, [_entry(m, b, s) for m, (b, s) in BIAS.items()])


# --------------------------------------------------------------------------- schema
def test_pack_carries_the_biases(tmp_path):
    cr = load_pack(_good(tmp_path)).analytes["creatinine"]
    assert cr.method_reference == REF
    assert cr.method_log_bias(REF) == (0.0, 0.0)
    assert cr.method_log_bias("demo analyser B") == (0.09, 0.02)
    assert cr.method_log_bias("an analyser the pack does not know") is None
    assert cr.sources["method_biases.demo analyser B"] == SRC
    assert load_pack("dog").analytes["creatinine"].method_log_bias("demo analyser B") is None  # no biases


def test_unknown_keys_get_a_hint(tmp_path):
    bad = _fragment(tmp_path, [_entry("demo analyser B", 0.09, 0.02, log_sdd=0.1)])
    with pytest.raises(PackError, match=r"method_biases\.demo analyser B\.log_sdd: "
                                        r"unknown key \(did you mean 'log_sd'\?\)"):
        load_pack(bad)
    typo = tmp_path / "typo.toml"
    typo.write_text(_good(tmp_path).read_text().replace("[analytes.creatinine.method_biases]",
                                                        "[analytes.creatinine.method_bias]"), encoding="utf-8")
    with pytest.raises(PackError, match=r"creatinine\.method_bias: unknown key \(did you mean 'method_biases'\?\)"):
        load_pack(typo)


def test_mixed_references_are_refused(tmp_path):
    bad = _fragment(tmp_path, [_entry("demo analyser A", -0.04, 0.015),
                               _entry("demo analyser B", 0.09, 0.02, ref="demo analyser C")])
    with pytest.raises(PackError, match=r"method_biases: mixed references: every bias of an analyte is relative to "
                                        r"one reference method, found 'demo analyser R' \(demo analyser A\); "
                                        r"'demo analyser C' \(demo analyser B\)"):
        load_pack(bad)


@pytest.mark.parametrize("entry, message", [
    (_entry("demo analyser B", 0.09, 0.0), r"log_sd: 0\.0 out of range \(0, 3\] \(the SD of a bias must be > 0\)"),
    (_entry("demo analyser B", 0.09, -0.1), r"log_sd: -0\.1 out of range"),
    (_entry("demo analyser B", "high", 0.02), r"log_bias: expected a finite number"),
    (_entry("demo analyser B", 3.5, 0.02), r"log_bias: 3\.5 out of range \[-3, 3\]"),
    (_entry(REF, 0.0, 0.01), r"'demo analyser R' is the reference method of the other biases"),
    ('"demo analyser B" = { log_bias = 0.09, log_sd = 0.02, source = "x", provenance = "derived" }',
     r"demo analyser B\.reference: missing required key"),
    (_entry("demo analyser B", 0.09, 0.02).replace('"derived"', '"calibrated"'),
     r"an 'calibrated' number names the file \(or store\) it comes from and its SHA-256"),
])
def test_bad_entries_are_refused(tmp_path, entry, message):
    with pytest.raises(PackError, match=message):
        load_pack(_fragment(tmp_path, [entry]))


def test_biases_round_trip_through_the_toml_writer(tmp_path):
    """Outside reference: Python's tomllib reads back what bayesbase.priors.toml_out wrote."""
    path = _fragment(tmp_path, [_entry(m, b, s) for m, (b, s) in BIAS.items()]
                     + [_entry('analyser "Q" / 2', 0.01, 0.01)])
    text = merge("dog", path)  # merge itself refuses a text that does not read back the same
    data = tomllib.loads(text)
    biases = data["analytes"]["creatinine"]["method_biases"]
    assert set(biases) == set(BIAS) | {'analyser "Q" / 2'}
    assert tomllib.loads(dumps(data)) == data
    full = tmp_path / "full.toml"
    full.write_text(text, encoding="utf-8")
    a, b = load_pack(full).analytes["creatinine"], load_pack(path).analytes["creatinine"]
    assert a.method_biases == b.method_biases


# --------------------------------------------------------------------------- assess: hand computation
HEAD = "patient,species,specimen,collected_at,analyte,value,unit,method,state"


def _frame(series: dict) -> pd.DataFrame:
    """{patient: [(value, method), ...]} -> raw tidy results, one specimen a month, last = assessed."""
    lines = [HEAD]
    for pid, rows in series.items():
        for k, (value, method) in enumerate(rows):
            lines.append(f"{pid},dog,{pid}-S{k},2026-{k + 1:02d}-10 09:00,creatinine,{value},umol/L,{method},healthy")
    return pd.read_csv(io.StringIO("\n".join(lines) + "\n"))


def _p_change_by_hand(prior, prior_change, base_y, new_y, extra_var):
    """P(change) of one case with a known CVI (one normal posterior), with scipy.stats.norm."""
    mu, sg2 = math.log(prior.center), prior.sg ** 2
    v = prior.si ** 2 + prior.sa ** 2  # one replicate per specimen, no extra variance
    prec = 1 / sg2 + len(base_y) / v
    m = (mu / sg2 + sum(base_y) / v) / prec
    var0 = 1 / prec + prior.si ** 2 + prior.sa ** 2 + extra_var
    tau2 = prior.shift_sd ** 2 if prior.shift_sd else prior.sg ** 2 + prior.si ** 2
    log_bf = (stats.norm.logpdf(new_y, m, math.sqrt(var0 + tau2)) - stats.norm.logpdf(new_y, m, math.sqrt(var0)))
    odds = prior_change / (1 - prior_change) * math.exp(log_bf)
    return odds / (1 + odds)


SERIES = {
    "T1": [(90, "demo analyser A"), (95, "demo analyser A"), (92, "demo analyser A"), (112, "demo analyser B")],
    "T2": [(90, "demo analyser A"), (99, "demo analyser C"), (93, "demo analyser A"), (112, "demo analyser B")],
    "T3": [(88, REF), (91, REF), (118, "demo analyser B")],
    "T4": [(88, "demo analyser B"), (91, "demo analyser B"), (100, "demo analyser B")],
}


def test_p_change_matches_a_hand_computation_with_scipy(tmp_path):
    path = _good(tmp_path)
    pk = load_pack(path)
    prior, pc = pk.analytes["creatinine"], pk.defaults["prior_change"]
    assert prior.cvi_log_sd == 0.0 and not prior.breed_centers.get("")
    t = assess(_frame(SERIES), pack=path, now="2027-01-01", trend=False).table.set_index("patient")
    b = {m: bs for m, bs in BIAS.items()}
    b[REF] = (0.0, 0.0)
    for pid, rows in SERIES.items():
        new_value, new_m = rows[-1]
        base = rows[:-1]
        # each result corrected to the reference by its method's bias, read on the new method's scale
        base_y = [math.log(v) - b[m][0] + b[new_m][0] for v, m in base]
        n = len(base)
        counts = pd.Series([m for _, m in base]).value_counts()
        var = b[new_m][1] ** 2 + sum((k / n) ** 2 * b[m][1] ** 2 for m, k in counts.items())
        changed = any(m != new_m for _, m in base)
        if not changed:  # one method throughout: nothing to correct
            base_y, var = [math.log(v) for v, _ in base], 0.0
        want = _p_change_by_hand(prior, pc, base_y, math.log(new_value), var)
        assert t.loc[pid, "p_change"] == pytest.approx(want, rel=1e-9, abs=1e-12), pid
        assert bool(t.loc[pid, "comparable"])
        flags = " ".join(t.loc[pid, "flags"])
        assert ("calibrated correction applied" in flags) == changed, pid
    # T1: one baseline method, Var = s_A^2 + s_B^2 (the flag states its root)
    assert f"log SD {math.hypot(0.015, 0.02):.3f}" in " ".join(t.loc["T1", "flags"])
    assert "demo analyser R reference" in " ".join(t.loc["T3", "flags"])
    # the model's set point is on B's scale: T1's change against it is the corrected one
    t_raw = assess(_frame(SERIES), pack="dog", now="2027-01-01", trend=False).table.set_index("patient")
    assert not bool(t_raw.loc["T1", "comparable"]) and t.loc["T1", "change_pct"] < t_raw.loc["T1", "change_pct"]


def test_a_stated_bias_wins_over_the_pack(tmp_path):
    path = _good(tmp_path)
    prior = load_pack(path).analytes["creatinine"]
    pc = load_pack(path).defaults["prior_change"]
    t = assess(_frame({"T1": SERIES["T1"]}), pack=path, now="2027-01-01", trend=False,
               method_bias={"creatinine": (0.05, 0.02)}).table
    assert t["flags"][0] == ["method changed (demo analyser A -> demo analyser B); corrected by a stated bias of "
                             "+5.0 % (SD 2.0 %)"]
    want = _p_change_by_hand(prior, pc, [math.log(v) for v, _ in SERIES["T1"][:-1]],
                             math.log(112) - math.log1p(0.05), math.log1p(0.02 ** 2))
    assert t["p_change"][0] == pytest.approx(want, rel=1e-9)


def test_a_method_the_pack_does_not_cover_stays_not_comparable(tmp_path):
    t = assess(_frame({"T9": [(90, "demo analyser A"), (95, "analyser Z"), (112, "demo analyser B")]}),
               pack=_good(tmp_path), now="2027-01-01", trend=False).table
    assert not t["comparable"][0]
    assert t["flags"][0] == ["not directly comparable: method changed (analyser Z, demo analyser A -> demo analyser B) "
                             "and the pack's calibrated biases do not cover analyser Z"]


def test_bad_stated_bias_is_refused():
    with pytest.raises(BayesbaseError, match=r"method_bias\['creatinine'\]: need a bias > -1 and an SD >= 0"):
        assess(_frame({"T1": SERIES["T1"]}), now="2027-01-01", method_bias={"creatinine": (0.05, -0.1)})


# --------------------------------------------------------------------------- end to end
@pytest.mark.slow
def test_calibrate_then_assess_applies_the_biases(tmp_path, capsys):
    """Invented store (40 dogs x 4 specimens, creatinine, demo analyser B reads 8 % above A), a
    small real calibration (2 chains x 300 draws, in parallel on a 2-core machine), then ``bayesbase
    assess --db --pack``. Measured on the shared 2-core machine with a warm compile cache: about 70 s
    of CPU with the chains in one process (calibrate about 40 s of it); the run is too short for the
    ESS bar (bulk ESS about 150 < 400), so the fragment is forced: this checks the plumbing, not
    the fit (``tests/test_calibrate.py`` checks recovery)."""
    from bayesbase.calibrate import calibrate, simulate_store, write_outputs
    from bayesbase.cli.main import main
    from bayesbase.store import Store

    frame, _ = simulate_store(seed=11, n_animals=40, n_specimens=4)
    db = tmp_path / "store.sqlite"
    with Store(db) as st:
        st.import_frame(frame, "simulated")
    cal = calibrate(db, species="dog", analytes=["creatinine"], draws=300, tune=300, chains=2, seed=5)
    out = tmp_path / "cal"
    paths = write_outputs(cal, out, force=True, figure=False)  # forced: a short run may miss the ESS bar
    pk = load_pack(paths["pack.toml"])
    mb = pk.analytes["creatinine"].method_biases["demo analyser B"]
    draws = cal.idata.posterior["method_log_bias"].values.reshape(-1)  # the only non-reference method
    assert mb.reference == "demo analyser A" and mb.provenance == "calibrated"
    assert cal.attrs["source_sha256"] in mb.source and "specimens on this method" in mb.note
    assert cal.attrs["date"] in mb.note
    assert mb.log_bias == pytest.approx(np.mean(draws), rel=1e-5)
    assert mb.log_sd == pytest.approx(np.std(draws, ddof=1), rel=1e-5)
    out_json = tmp_path / "a.json"
    assert main(["assess", "--db", str(db), "--pack", str(paths["pack.toml"]), "--format", "json",
                 "--out", str(out_json)]) == 0
    assert "calibrated correction applied" in out_json.read_text(encoding="utf-8")
    with Store(db) as st:
        results = st.results()
    a = assess(results, pack=paths["pack.toml"], trend=False).table
    changed = [f for f in a["flags"] if any("method changed" in w for w in f)]
    assert changed, "the invented store has method changes"
    assert all("calibrated correction applied" in " ".join(f) for f in changed)
    assert a["comparable"].all()
    # with the built-in pack the same changes are not comparable
    plain = assess(results, pack="dog", trend=False).table
    assert (~plain["comparable"]).sum() == len(changed)


# --------------------------------------------------------------------------- priors show
def test_priors_show_lists_the_biases(tmp_path):
    """``bayesbase priors show`` prints each method's ratio exp(log_bias) and its 95 % range
    exp(log_bias -/+ 1.96 log_sd) (normal quantile 1.96 from scipy), and the tidy view has both."""
    from bayesbase.priors import describe, describe_text
    pk = load_pack(_good(tmp_path))
    text = describe_text(pk, "creatinine", full=True)
    assert f"method biases against {REF}" in text
    z = stats.norm.ppf(0.975)
    for m, (b, s) in BIAS.items():
        expect = f"{m}: x{math.exp(b):.4g} ({math.exp(b - z * s):.4g}-{math.exp(b + z * s):.4g})"
        assert expect in text
    assert max(len(line) for line in text.splitlines()) <= 100
    table = describe(pk, "creatinine").set_index("field")
    assert table.loc["method_biases.demo analyser B.log_bias", "value"] == 0.09
    assert table.loc["method_biases.demo analyser B.log_sd", "value"] == 0.02
