"""Every case of case_library/ meets the outcomes a careful clinician would expect
(written in each case.toml before the engine existed), with the exact engine."""
from __future__ import annotations

import math
import re

import pytest

from bayesbase import classical
from bayesbase.assessment import assess
from bayesbase.io import read_results as load_results
from bayesbase.priors import load_pack

from conftest import case_dirs, load_case

CASES = [(d, load_case(d)) for d in case_dirs()]


def test_at_least_seven_cases_cover_the_required_scenarios():
    ids = {c["id"] for _, c in CASES}
    assert len(ids) >= 7
    species = {c["species"] for _, c in CASES}
    assert {"dog", "cat"} <= species


@pytest.fixture(scope="module")
def assessed():
    out = {}
    for d, case in CASES:
        frame = load_results(d / "results.csv")
        out[case["id"]] = (frame, assess(frame, patient=case["patient"], at=case.get("at")))
    return out


def _row(a, analyte):
    t = a.table[a.table["analyte"] == analyte]
    assert len(t) == 1, f"analyte {analyte} not assessed"
    return t.iloc[0]


EXPECTATIONS = [(case["id"], i, e) for _, case in CASES for i, e in enumerate(case.get("expect", []))]


@pytest.mark.parametrize("case_id,i,exp", EXPECTATIONS, ids=[f"{c}-{i}-{e['analyte']}" for c, i, e in EXPECTATIONS])
def test_case_expectation(assessed, case_id, i, exp):
    frame, a = assessed[case_id]
    r = _row(a, exp["analyte"])
    flags = " | ".join(r["flags"])
    checked = 0
    if "p_change_min" in exp:
        assert r["p_change"] >= exp["p_change_min"], (r["p_change"], flags)
        checked += 1
    if "p_change_max" in exp:
        assert r["p_change"] <= exp["p_change_max"], (r["p_change"], flags)
        checked += 1
    if "direction" in exp:
        assert (r["p_increase"] >= 0.5) == (exp["direction"] == "increase")
        checked += 1
    if "inside_population" in exp:
        assert (not r["outside_population"]) == exp["inside_population"]
        checked += 1
    if "rcv_exceeded_last" in exp:
        assert bool(r["rcv_exceeded_last"]) == exp["rcv_exceeded_last"]
        checked += 1
    if "flag_contains" in exp:
        assert exp["flag_contains"].lower() in flags.lower(), flags
        checked += 1
    if "n_baseline" in exp:
        assert r["n_baseline"] == exp["n_baseline"]
        checked += 1
    if "in_summary" in exp:
        from bayesbase.report import select_changes

        mask = select_changes(a.table["p_change"].to_numpy())
        listed = set(a.table.loc[mask, "analyte"])
        assert (exp["analyte"] in listed) == exp["in_summary"], listed
        checked += 1
    if "trend_p_increase_min" in exp:
        assert r["trend_p_increase"] >= exp["trend_p_increase_min"], r["trend_p_increase"]
        checked += 1
    sub = a.history[(a.history["analyte"] == exp["analyte"]) & a.history["role"].isin(["baseline", "assessed"])]
    pack = load_pack(r["pack"])
    prior = pack.get(exp["analyte"])
    if "all_inside_population" in exp:
        inside = sub["value"].between(prior.ri_lower, prior.ri_upper)
        assert bool(inside.all()) == exp["all_inside_population"]
        checked += 1
    if "no_consecutive_rcv" in exp:
        # classical two-sided RCV (Fraser CG, Clin Chem Lab Med 2012;50:807) between consecutive specimens
        rcv = float(classical.rcv_classical(prior.cva, prior.cvi))
        v = sub.sort_values("collected_at")["value"].to_numpy()
        ratios = [abs(b / a_ - 1) for a_, b in zip(v[:-1], v[1:])]
        assert (max(ratios) <= rcv) == exp["no_consecutive_rcv"], (ratios, rcv)
        checked += 1
    assert checked > 0, f"expectation with no known key: {exp}"


def test_unwell_specimen_never_in_baseline(assessed):
    for case_id, (frame, a) in assessed.items():
        h = a.history
        unwell_spec = set(h.loc[(h["state"] == "unwell") & (h["role"] != "assessed"), "specimen"])
        for spec_list in a.table["baseline_specimens"]:
            assert not (set(filter(None, spec_list.split(";"))) & unwell_spec), case_id


def test_results_are_stamped_with_provenance(assessed):
    for _, a in assessed.values():
        for key in ("pack_id", "pack_sha256", "engine", "seed", "version"):
            assert a.attrs[key] is not None
        assert len(a.attrs["pack_sha256"]) >= 64
        ds = a.dataset
        assert set(ds["personal_interval"].dims) == {"patient", "analyte", "ci_bound"}
        assert "sample" not in ds.dims
        assert ds.attrs["engine"] == "exact"
        assert all(math.isfinite(x) for x in a.table["p_change"])


def test_every_case_folder_is_packaged():
    """Each case folder must be listed in pyproject.toml so a non-editable install ships it."""
    import tomllib

    from conftest import ROOT

    with open(ROOT / "pyproject.toml", "rb") as fh:
        packages = set(tomllib.load(fh)["tool"]["setuptools"]["packages"])
    for d, _ in CASES:
        assert f"bayesbase.case_library.{d.name}" in packages, f"add bayesbase.case_library.{d.name} to pyproject.toml"


# ------------------------------------------------------------------------ recheck advice
#: advice to recheck with a time window, e.g. "repeat ALP in ... (9-15 days"
RECHECK_ADVICE = re.compile(r"\b(repeat|recheck|re-check|retest|confirm)\w*\b[^.]*?\d+\s*-\s*\d+\s*"
                            r"(h|hours|days|weeks|months)\b", re.I)


def _window_text(hmin: float, hmax: float) -> str:
    """A retest window as the case stories write it: hours up to 4 days, else whole days."""
    if hmax <= 96:
        return f"{hmin:g}-{hmax:g} h"
    return f"{hmin / 24:g}-{hmax / 24:g} days"


@pytest.mark.parametrize("case", [c for _, c in CASES], ids=[c["id"] for _, c in CASES])
def test_recheck_advice_agrees_with_the_pack(case):
    """A story that advises a recheck gives the pack's retest window for the analyte's group and
    the same source as the pack (the packs derive the windows from the analytes' kinetics)."""
    text = " ".join(case["conclusion"].split())
    rechecks = case.get("recheck", [])
    if RECHECK_ADVICE.search(text):
        assert rechecks, f"{case['id']}: the conclusion advises a recheck; add a [[recheck]] table"
    pack = load_pack(case["species"])
    for rc in rechecks:
        prior = pack.get(rc["analyte"])
        group = pack.retest_groups[prior.group]
        assert _window_text(group.hours_min, group.hours_max) == rc["window"], (case["id"], prior.group)
        assert rc["window"] in text and rc["source_contains"] in text, case["id"]
        for key in ("hours_min", "hours_max"):
            assert rc["source_contains"] in pack.sources[f"retest_groups.{prior.group}.{key}"]


def test_the_drift_showpiece_is_not_creatinine():
    """The library's slow-drift case (a trend expectation with every value inside the population
    interval and no consecutive step beyond the RCV) is on an analyte other than creatinine."""
    drift = [(c["id"], e["analyte"]) for _, c in CASES for e in c.get("expect", [])
             if "trend_p_increase_min" in e and e.get("all_inside_population") and e.get("no_consecutive_rcv")]
    assert drift and all(a != "creatinine" for _, a in drift), drift
    assert ("cat_total_t4_slow_rise", "total_t4") in drift
