"""The results table is built without pandas' copy of every numpy column into one block
(:func:`bayesbase.assessment.table.frame_of_columns`) and is the very frame ``pd.DataFrame(cols)``
gives (the reference: pandas' own constructor, compared with ``assert_frame_equal(check_exact=True)``
and dtype by dtype); the frame still owns its arrays as the copy would: no column shares memory with
another column or with the arrays that live on outside it (the reference: numpy's
``np.shares_memory``), so writing into one never changes another."""
from __future__ import annotations

import numpy as np
import pandas as pd

from bayesbase.assessment import assess
from bayesbase.assessment.table import frame_of_columns
from bayesbase.io import read_results

from conftest import case_dirs


def _columns(rng):
    n = 50
    shared = rng.normal(size=n)
    block = rng.normal(size=(n, 2))
    kept = rng.normal(size=n)  # lives on outside the frame (as the PyMC engine's summary does)
    cols = {
        "a": shared, "b": shared,  # the same array twice
        "lo": block[:, 0], "hi": block[:, 1],  # two views of one array (disjoint)
        "lo_again": block[:, 0],  # a view overlapping an earlier column
        "kept": kept, "kept_scaled": kept * 2.0,
        "n": rng.integers(0, 5, n), "ok": rng.random(n) < 0.5, "scalar": 0.95,
        "text": pd.array(rng.choice(["x", "y", None], n).tolist(), dtype="str"),
        "lists": np.fromiter(([k] for k in range(n)), dtype=object, count=n),
        "when": pd.Series(pd.date_range("2024-01-01", periods=n, freq="D")),
    }
    return cols, kept


def test_frame_of_columns_is_the_frame_pandas_builds():
    cols, kept = _columns(np.random.default_rng(12))
    want = pd.DataFrame(cols)
    got = frame_of_columns(cols, keep_apart=[kept])
    pd.testing.assert_frame_equal(got, want, check_exact=True)
    assert list(got.dtypes) == list(want.dtypes)


def test_columns_do_not_share_memory_with_each_other_or_kept_arrays():
    cols, kept = _columns(np.random.default_rng(13))
    got = frame_of_columns(cols, keep_apart=[kept])
    arrays = {k: got[k].to_numpy() for k in got.columns if got[k].dtype.kind in "fib"}
    names = list(arrays)
    for i, a in enumerate(names):
        assert not np.shares_memory(arrays[a], kept), a
        for b in names[i + 1:]:
            assert not np.shares_memory(arrays[a], arrays[b]), (a, b)
    before_b, before_kept = got["b"].to_numpy().copy(), kept.copy()
    got.loc[0, "a"] = 1e9
    got.loc[0, "kept"] = 1e9
    assert got["b"].to_numpy().tolist() == before_b.tolist()
    assert kept.tolist() == before_kept.tolist()


def test_assessment_table_equals_the_consolidated_frame():
    frame = read_results(case_dirs()[0] / "results.csv")
    table = assess(frame).table
    plain = pd.DataFrame({k: table[k] for k in table.columns})  # pandas' copy, consolidated
    pd.testing.assert_frame_equal(table, plain, check_exact=True)
    floats = [table[k].to_numpy() for k in table.columns if table[k].dtype.kind == "f"]
    assert len(floats) > 20
    for i, a in enumerate(floats):
        assert not any(np.shares_memory(a, b) for b in floats[i + 1:])
