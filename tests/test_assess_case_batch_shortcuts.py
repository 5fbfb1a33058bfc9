"""Shortcuts of the case batch against the plain forms they replace: the case keys, now made
only when read, against ``f"{patient}\\x1f{analyte}"`` per case (the plain Python form); the ln
values made once per assessment against ``np.log`` of the value column (numpy, the reference),
and the baselines' extra variance summed over the baseline rows only against the sum over a
whole-history column (the plain numpy form)."""
from __future__ import annotations

import numpy as np
import pandas as pd

from bayesbase.assessment import assess, cases, pipeline
from bayesbase.io import read_results

from conftest import case_dirs


def _batch(monkeypatch, **kw):
    got = {}
    real = pipeline.case_flags

    def keep(b, *a, **k):
        got["b"] = b
        return real(b, *a, **k)

    monkeypatch.setattr(pipeline, "case_flags", keep)
    a = assess(read_results(case_dirs()[0] / "results.csv"), **kw)
    return got["b"], a


def test_keys_made_when_read_are_patient_and_analyte(monkeypatch):
    b, a = _batch(monkeypatch)
    want = [f"{p}\x1f{an}" for p, an in zip(b.patient, b.analyte)]
    assert b.keys.tolist() == want
    assert len(b) == len(want) == len(a.table)
    assert want == [f"{p}\x1f{an}" for p, an in zip(a.table["patient"], a.table["analyte"])]


def test_log_values_once_per_assessment():
    hist = pd.DataFrame({"value": [1.0, 2.5, np.nan, 1e-300, 7.0]})
    cache: dict = {}
    first = cases.log_values(hist, cache)
    np.testing.assert_array_equal(first, np.log(hist["value"].to_numpy()))
    assert cases.log_values(hist, cache) is first  # made once
    np.testing.assert_array_equal(cases.log_values(hist), np.log(hist["value"].to_numpy()))


def test_extra_variance_of_a_kept_compromised_baseline_is_si_squared(monkeypatch):
    """A baseline specimen kept although its haemolysis index is over the pack's limit carries
    sI^2 (the pack's within-animal SD, ln scale) as extra variance; every other baseline 0."""
    frame = read_results(case_dirs()[0] / "results.csv")
    base = assess(frame)
    hist = base.history
    pack = base.packs[base.attrs["pack_id"].split(",")[0]]
    limited = {an for an, pr in pack.analytes.items() if np.isfinite(pr.hil_thresholds.get("haemolysis", np.nan))}
    row = hist.index[(hist["role"] == "baseline") & hist["analyte"].isin(limited)][0]
    spec, analyte = hist.loc[row, "specimen"], hist.loc[row, "analyte"]
    hit = (frame["specimen"] == spec) & (frame["analyte"] == analyte)
    frame.loc[hit, "haemolysis"] = 1e6
    real = pipeline.case_flags
    got = {}
    monkeypatch.setattr(pipeline, "case_flags", lambda b, *a, **k: got.setdefault("b", b) and real(b, *a, **k))
    a = assess(frame, keep_compromised=True)
    b = got["b"]
    i = [k for k, (p, an) in enumerate(zip(b.patient, b.analyte))
         if an == analyte and p == hist.loc[row, "patient"]][0]
    j = b.baselines.specimens[i].split(";").index(spec)
    assert b.baselines.e[i, j] == float(b.prior[i].si) ** 2 > 0
    others = np.ones(b.baselines.e.shape, dtype=bool)
    others[i, j] = False
    assert not np.any(b.baselines.e[others])
    assert len(a.table) == len(base.table)
