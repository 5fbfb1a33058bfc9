"""The faster builders of the assessment give exactly what the plain forms they replace give:
text columns against the column pandas itself infers from the same values as a list (the
reference: pandas' DataFrame constructor), specimen lists against ``str.join``, the trend notes
and limits against per-case loops, and the heap freeze of :func:`assess` leaves Python's cycle
collector as it found it, from several threads at once (reference: the standard library's
``gc.get_freeze_count``)."""
from __future__ import annotations

import gc

import numpy as np
import pandas as pd
import pytest

from bayesbase.assessment import cases, pipeline, trend_cols

from _threaded import observe_threaded_runs


def _inferred(values: list) -> pd.Series:
    """The column pandas builds from a list (the reference)."""
    return pd.DataFrame({"x": values})["x"]


def _as_column(built) -> pd.Series:
    return pd.DataFrame({"x": built})["x"]


TEXT_CASES = [
    (["a", "b", "a"], [0, 1, 0, 2, -1]),
    (["a", None], [1, 1, 0]),
    ([None], [0, 0]),  # no text at all: pandas keeps objects
    (["", "x"], [0, 0, 1]),
    ([1.5, "x"], [0, 1]),  # not all texts
]


@pytest.mark.parametrize("uniques,codes", TEXT_CASES)
def test_text_column_is_the_column_pandas_infers(uniques, codes):
    codes = np.asarray(codes)
    table = list(uniques) + [None]
    want = _inferred([table[c] for c in codes])
    pd.testing.assert_series_equal(_as_column(cases.text_column(codes, uniques)), want, check_exact=True)


@pytest.mark.parametrize("storage", ["python", "pyarrow"])
@pytest.mark.parametrize("values", [["a", None, "", "b"], [None, None], ["", ""]])
def test_series_text_is_the_column_pandas_infers(storage, values):
    col = pd.Series(pd.array(values, dtype=pd.StringDtype(storage)))
    for how, plain in (({}, lambda v: v), ({"blank_missing": True}, lambda v: v if isinstance(v, str) and v else None),
                       ({"fill": ""}, lambda v: "" if v is None or v is pd.NA else v)):
        got = cases.series_text(col, **how)
        want = _inferred([plain(None if v is pd.NA else v) for v in col.tolist()])
        if got is None:  # the caller builds it from the list: only when pandas would not make text
            assert want.dtype == object
        else:
            pd.testing.assert_series_equal(_as_column(got), want, check_exact=True)


def test_object_texts_is_the_column_pandas_infers():
    for values in (["x", "y", None], [None, None], ["x", 2.0], ["", "b"]):
        arr = np.empty(len(values), dtype=object)
        arr[:] = values
        pd.testing.assert_series_equal(_as_column(cases.object_texts(arr)), _inferred(list(values)), check_exact=True)


def test_joined_rows_match_str_join():
    rng = np.random.default_rng(4)
    names = ["S1", "S2", "", "a;b", "S5"]
    rows = rng.integers(-1, len(names), size=(200, 5))
    got = cases._joined_rows(rows, names)
    assert got.tolist() == [";".join(names[c] for c in row if c >= 0) for row in rows.tolist()]


def test_limit_sides_match_the_loop():
    rng = np.random.default_rng(5)
    side = np.asarray(rng.choice(["lower", "", "upper"], 300), dtype=object)
    elig = rng.random(300) < 0.5
    want = [str(s) if e else "" for s, e in zip(side, elig)]
    assert list(trend_cols._limit_sides(side, elig)) == want
    odd = side.copy()
    odd[elig.argmax()] = "both"  # a side the fast path does not know: the loop's answer
    assert list(trend_cols._limit_sides(odd, elig)) == [str(s) if e else "" for s, e in zip(odd, elig)]


def test_heap_freeze_is_undone_after_nested_and_threaded_assessments():
    gc.unfreeze()
    assert gc.get_freeze_count() == 0
    seen = observe_threaded_runs(pipeline._heap_frozen, probe_inside=gc.isenabled,
                                 probe_main=lambda: (gc.get_freeze_count(), gc.isenabled()))
    assert seen.meanwhile[0] > 0  # objects left out of collections while assessments ran
    assert seen.inside == [True, True]  # the collector stayed on for every thread
    assert seen.after == (0, True)
    assert seen.after_failure == (0, True)


def _sort_frames():
    """Invented canonical frames: in order, shuffled, with a repeated key, with texts beyond
    ASCII (ordered by code point), with a missing key."""
    from bayesbase.testing import synthetic_canonical

    base = synthetic_canonical(6, 3, 4)
    rng = np.random.default_rng(7)
    names = pd.Series(["Z-1", "a-1", "é-1", "Ä-1", "z-1", "\U0001f415-1"], dtype=base["patient"].dtype)
    beyond = base.assign(patient=names.iloc[base["patient"].factorize()[0]].to_numpy())
    beyond = beyond.sort_values(pipeline_sort()).reset_index(drop=True)
    repeated = pd.concat([base, base.iloc[[5]]]).sort_values(pipeline_sort()).reset_index(drop=True)
    missing = base.copy()
    missing.loc[3, "replicate"] = pd.NA
    return {"in order": base, "shuffled": base.iloc[rng.permutation(len(base))], "beyond ascii": beyond,
            "repeated key": repeated, "missing key": missing, "one row": base.iloc[:1]}


def pipeline_sort():
    from bayesbase.assessment.frame import SORT_COLUMNS

    return SORT_COLUMNS


@pytest.mark.parametrize("name", ["in order", "shuffled", "beyond ascii", "repeated key", "missing key",
                                  "one row"])
def test_history_rows_in_order_are_what_sorting_gives(name):
    """Rows found in order are not sorted again: the history is what pandas' own
    ``sort_values`` gives (the reference), and only strictly ordered rows are found in order."""
    from bayesbase.assessment.frame import history_frame, in_sort_order

    frame = _sort_frames()[name]
    want = frame.sort_values(pipeline_sort()).reset_index(drop=True)
    got = history_frame(frame)
    pd.testing.assert_frame_equal(got.drop(columns="age_years"), want, check_exact=True)
    assert in_sort_order(frame) == (name in ("in order", "beyond ascii"))
