"""The assessment's code-based shortcuts give exactly what the plain forms they replace give
(references: pandas' own ``tolist``, ``groupby(...).transform("any")``, ``np.unique``, and the
column pandas infers from a list of texts): columns factorized once and shared by the stages,
roles and reasons held as codes, texts of the assessed rows gathered per distinct value, and the
whole assessment against the stages run without the shared codes. Invented data only."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from bayesbase.assessment import assess, cases, flags, frame, packs, pipeline, roles
from bayesbase.assessment.options import Options

from test_assessment_stages import _random_history


def _stages(hist: pd.DataFrame, cache, keep_compromised=False):
    opts = Options(keep_compromised=keep_compromised)
    pk = packs.packs_by_species(hist)
    targets = roles.assessed_specimens(hist, None, cache)
    rows = roles.case_rows(hist, targets, cache)
    pri = packs.row_priors(hist, rows.in_case, pk, cache)
    rl = roles.assign_roles(rows, roles.rule_context(hist, rows, pri, keep_compromised))
    batch = cases.build_cases(hist, rows, rl, pri, pk, opts, cache)
    return rows, rl, batch


@pytest.fixture(scope="module", params=[False, True], ids=["leave out", "keep compromised"])
def both(request):
    hist = frame.history_frame(_random_history(seed=3, n_patients=30))
    return (_stages(hist.copy(), None, request.param), _stages(hist.copy(), {}, request.param))


def test_roles_from_codes_are_the_plain_columns(both):
    (_, plain, _), (_, coded, _) = both
    assert coded.coded is not None
    assert plain.role.tolist() == coded.role.tolist() and plain.reason.tolist() == coded.reason.tolist()
    role, reason = pipeline._role_columns(coded)
    for got, values in ((role, coded.role), (reason, coded.reason)):
        want = pd.DataFrame({"x": list(values)})["x"]  # the column pandas infers (reference)
        pd.testing.assert_series_equal(pd.DataFrame({"x": got})["x"], want, check_exact=True)


def test_assessed_texts_through_codes_are_pandas_tolist(both):
    (_, _, plain), (_, _, coded) = both
    a = coded.assessed
    assert a.coded is not None
    for name in ("patient", "species", "analyte", "method", "breed", "censor", "reported_unit", "fasted"):
        assert a.col(name) == a.first[name].tolist(), name  # reference: pandas' tolist
    for name in ("method", "breed"):
        values, nonempty = a.texts(name)
        col = a.first[name]
        assert values.tolist() == col.to_numpy(dtype=object, na_value=None).tolist()
        assert nonempty.tolist() == (col.notna() & col.ne("")).to_numpy(dtype=bool).tolist()
    assert a.unit == a.first["reported_unit"].tolist()
    for field in ("patient", "species", "analyte", "breed", "censor", "keys", "center"):
        assert list(getattr(plain, field)) == list(getattr(coded, field)), field
    assert plain.baselines.specimens.tolist() == coded.baselines.specimens.tolist()
    assert flags.case_flags(plain) == flags.case_flags(coded)


def test_any_per_key_is_groupby_any():
    rng = np.random.default_rng(8)
    key = rng.integers(0, 50, 2_000)
    flag = rng.random(2_000) < 0.02
    want = pd.Series(flag).groupby(key).transform("any").to_numpy(dtype=bool)  # reference
    assert roles._any_per_key(flag, key).tolist() == want.tolist()
    texts = np.array([f"k{k}" for k in key], dtype=object)  # not codes: pandas' groupby itself
    assert roles._any_per_key(flag, texts).tolist() == want.tolist()


def test_specimen_rows_in_runs_are_the_first_rows_unique_gives():
    hist = frame.history_frame(_random_history(seed=5, n_patients=12))
    shuffled = hist.iloc[np.random.default_rng(1).permutation(len(hist))].reset_index(drop=True)
    for h in (hist, shuffled):
        pc, _, sc, su, first = roles._specimen_rows(h, {})
        pair = pc.astype(np.int64) * (len(su) + 1) + sc
        assert first.tolist() == np.sort(np.unique(pair, return_index=True)[1]).tolist()  # reference


def test_words_by_integer_keys_as_by_objects():
    rng = np.random.default_rng(2)
    keys = rng.integers(0, 6, 300)
    mask = rng.random(300) < 0.5
    got = flags._words_by(mask, keys, lambda k: f"{k} of type {type(k).__name__}")
    want = [f"{k} of type int" if m else "" for k, m in zip(keys.tolist(), mask.tolist())]
    assert got.tolist() == want


def test_whole_assessment_with_shared_codes_is_the_plain_stages():
    """assess (shared codes, roles as codes, heap frozen again before the flags) against the
    same stages run with no shared codes."""
    hist = frame.history_frame(_random_history(seed=11, n_patients=25))
    a = assess(hist)
    _, rl, batch = _stages(hist.copy(), None)
    t = a.table
    assert t["flags"].tolist() == flags.case_flags(batch)
    assert a.history["role"].tolist() == rl.role.tolist()
    assert a.history["reason"].tolist() == rl.reason.tolist()
    assert t["baseline_specimens"].tolist() == batch.baselines.specimens.tolist()
    assert t["comparable"].dtype == bool
