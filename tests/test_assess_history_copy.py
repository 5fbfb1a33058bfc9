"""The assessment's history is taken from the caller's canonical frame by pandas' lazy copy
(Copy-on-Write) instead of a deep copy (:func:`bayesbase.assessment.frame.canonical_frame`); it must
behave as the deep copy did (the reference: ``DataFrame.copy(deep=True)`` snapshots compared with
``assert_frame_equal(check_exact=True)``): writes into the caller's frame after the assessment
leave the history as it was, and writes into the history leave the caller's frame as it was."""
from __future__ import annotations

import pandas as pd

from bayesbase.assessment import assess
from bayesbase.assessment.frame import _copy_on_write, canonical_frame
from bayesbase.io import read_results

from conftest import case_dirs


def _frame():
    return read_results(case_dirs()[0] / "results.csv")


def test_lazy_copy_only_where_pandas_copies_on_write():
    frame = _frame()
    got = canonical_frame(frame)
    pd.testing.assert_frame_equal(got, frame.copy(deep=True), check_exact=True)
    assert got is not frame
    major = int(pd.__version__.split(".")[0])
    assert _copy_on_write() is (True if major >= 3 else pd.options.mode.copy_on_write is True)


def test_writes_to_the_callers_frame_do_not_reach_the_history():
    frame = _frame()
    a = assess(frame)
    history_then = a.history.copy(deep=True)
    frame.loc[frame.index[0], "value"] = -1.0
    frame.loc[frame.index[1], "patient"] = "someone else"
    frame.iloc[:, frame.columns.get_loc("analyte")] = "x"
    frame["extra"] = 1
    pd.testing.assert_frame_equal(a.history, history_then, check_exact=True)


def test_writes_to_the_history_do_not_reach_the_callers_frame():
    frame = _frame()
    frame_then = frame.copy(deep=True)
    a = assess(frame)
    a.history.loc[0, "value"] = -1.0
    a.history.loc[1, "patient"] = "someone else"
    a.history["analyte"] = "x"
    pd.testing.assert_frame_equal(frame, frame_then, check_exact=True)
