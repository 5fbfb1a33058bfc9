"""While :func:`bayesbase.assess` runs, numpy does not advise huge pages for its arrays, and the
setting it had comes back when the last running assessment ends (the reference: numpy's own
runtime switch, ``numpy._core.multiarray._set_madvise_hugepage``, which returns the setting it
replaces); the assessment's numbers do not depend on it (the reference: the same assessment with
numpy's advice left on, compared with pandas' ``assert_frame_equal(check_exact=True)``)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from bayesbase.assessment import assess, pipeline
from bayesbase.io import read_results

from _threaded import observe_threaded_runs
from conftest import case_dirs

_SWITCH = getattr(getattr(getattr(np, "_core", None), "multiarray", None), "_set_madvise_hugepage", None)
pytestmark = pytest.mark.skipif(_SWITCH is None, reason="this numpy has no runtime hugepage switch")


def _advice() -> bool:
    """numpy's current setting, read through its switch (set to itself again)."""
    now = bool(_SWITCH(True))
    _SWITCH(now)
    return now


@pytest.mark.parametrize("start", [True, False])
def test_advice_off_inside_and_restored_after_nested_and_threaded_runs(start):
    before = bool(_SWITCH(start))
    try:
        seen = observe_threaded_runs(pipeline._heap_frozen, probe_inside=_advice, probe_main=_advice)
    finally:
        _SWITCH(before)
    assert seen.meanwhile is False and seen.inside == [False, False]
    assert seen.after is start  # the last assessment's end gives the setting back
    assert seen.after_failure is start


def test_same_table_with_numpy_advice_forced_on():
    d = case_dirs()[0]
    frame = read_results(d / "results.csv")
    plain = assess(frame)
    real = pipeline._hugepage_advice
    try:
        pipeline._hugepage_advice = lambda on: None  # numpy keeps advising huge pages
        before = bool(_SWITCH(True))
        advised = assess(frame)
    finally:
        pipeline._hugepage_advice = real
        _SWITCH(before)
    pd.testing.assert_frame_equal(plain.table, advised.table, check_exact=True)
    pd.testing.assert_frame_equal(plain.history, advised.history, check_exact=True)
