"""Assessing in worker processes (:mod:`bayesbase.assessment.pool`) gives exactly what one process
gives: the table and the annotated history (pandas ``assert_frame_equal`` with ``check_exact``),
the flags, the attrs and the JSON, on an invented store of 4,200 dogs x 2 specimens x 5 analytes
(:func:`bayesbase.testing.synthetic_canonical`), the smallest that reaches both of the pool's
thresholds (patients x quadrature nodes >= ``NUMBA_MIN_ELEMS``, rows >= 2 x ``MIN_ROWS_PER_JOB``;
checked in the fixture). The reference is the same assessment in this
process (``jobs=1``), with the compiled loops loaded as the pool loads them; the parts' row
ranges are checked against a plain loop over the patients, and the joined text columns against
the column pandas itself infers from the whole list of values (pandas' DataFrame constructor)."""
from __future__ import annotations

import multiprocessing as mp

import numpy as np
import pandas as pd
import pytest

from bayesbase.assessment import assess, pool
from bayesbase.assessment.cases import text_column
from bayesbase.errors import BayesbaseError
from bayesbase.testing import synthetic_canonical

FORK = "fork" in mp.get_all_start_methods()
N_DOGS, N_ANALYTES = 4_200, 5


def _plain_bounds(patients: list, jobs: int) -> list[tuple[int, int]]:
    """The parts by a loop: a new part starts at the first row of a patient once the rows so far
    reach the next multiple of n / jobs (the reference for :func:`pool.part_bounds`)."""
    n, edges, j = len(patients), [0], 1
    for i in range(1, n):
        if patients[i] != patients[i - 1]:
            while j < jobs and i >= n * j / jobs:
                if edges[-1] != i:
                    edges.append(i)
                j += 1
    return list(zip(edges, edges[1:] + [n]))


@pytest.mark.parametrize("sizes,jobs", [([5, 5, 5, 5], 2), ([1, 9, 1, 1], 2), ([3, 1, 2, 7, 1, 4], 3),
                                        ([10], 4), ([2, 2], 5), ([1, 1, 1], 3)])
def test_parts_cut_where_the_patient_changes(sizes, jobs):
    patients = np.repeat(np.arange(len(sizes)), sizes)
    got = pool.part_bounds(patients, jobs)
    assert got == _plain_bounds(patients.tolist(), jobs)
    assert got[0][0] == 0 and got[-1][1] == len(patients)  # every row in one part, in order
    assert all(b == c for (_, b), (c, _) in zip(got, got[1:]))
    assert all(patients[a] != patients[a - 1] for a, _ in got[1:])  # no patient split
    assert len(got) <= jobs


@pytest.mark.parametrize("parts", [[["a", None], [None, None]], [[None], ["b", "c"]], [[None], [None]],
                                   [["a"], ["b"]]])
def test_joined_text_columns_are_the_column_pandas_infers(parts):
    frames = []
    for values in parts:
        uniq = sorted({v for v in values if v is not None})
        codes = np.array([uniq.index(v) if v is not None else -1 for v in values])
        frames.append(pd.DataFrame({"x": text_column(codes, uniq)}))
    whole = pd.DataFrame({"x": [v for values in parts for v in values]})
    pd.testing.assert_frame_equal(pool.concat_parts(frames), whole, check_exact=True)


def test_parts_whose_dtypes_disagree_are_not_joined():
    frames = [pd.DataFrame({"x": [1.0, 2.0]}), pd.DataFrame({"x": ["a", "b"]})]
    assert pool.concat_parts(frames) is None


def test_jobs_must_be_a_whole_number_of_at_least_one():
    with pytest.raises(BayesbaseError, match="jobs"):
        assess(synthetic_canonical(2, 2, 3), jobs=0)


@pytest.fixture(scope="module")
def store_frame():
    """4,200 invented dogs x 2 specimens x 5 analytes (42,000 rows: two parts of at least
    ``MIN_ROWS_PER_JOB``; 4,200 x 24 quadrature nodes reach the compiled loops' threshold
    ``NUMBA_MIN_ELEMS``); the first third without a method, so one part's method column holds
    no text."""
    from bayesbase.constants import DEFAULT_QUAD_NODES
    from bayesbase.model.normal import NUMBA_MIN_ELEMS

    frame = synthetic_canonical(N_DOGS, 2, N_ANALYTES)
    # the store is just big enough for the pool to run (a smaller one makes the test vacuous)
    assert len(frame) >= 2 * pool.MIN_ROWS_PER_JOB and N_DOGS * DEFAULT_QUAD_NODES >= NUMBA_MIN_ELEMS
    first = frame["patient"].isin(frame["patient"].drop_duplicates().iloc[:1_400])
    frame["method"] = frame["method"].astype(object).where(~first, None).astype(frame["method"].dtype)
    return frame


@pytest.mark.skipif(not FORK, reason="worker processes are forked")
def test_two_workers_give_what_one_process_gives(store_frame, monkeypatch):
    from bayesbase.model import normal, trend

    normal.have_numba(), trend.have_numba()  # as the pool loads them before the fork
    ran = []
    real = pool._run_parts
    monkeypatch.setattr(pool, "_run_parts", lambda *a: ran.append(len(a[1])) or real(*a))
    one = assess(store_frame)
    two = assess(store_frame, jobs=2)
    assert ran == [2], "the assessment did not run in two worker processes"
    pd.testing.assert_frame_equal(two.table, one.table, check_exact=True)
    pd.testing.assert_frame_equal(two.history, one.history, check_exact=True)
    assert two.table["flags"].tolist() == one.table["flags"].tolist()
    assert two.attrs == one.attrs and list(two.packs) == list(one.packs)
    assert two.to_json() == one.to_json()
    assert len(one.table) == N_DOGS * N_ANALYTES


def test_pool_is_not_used_where_it_does_not_apply(store_frame, monkeypatch):
    called = []
    monkeypatch.setattr(pool, "_run_parts", lambda *a: called.append(1))
    small = store_frame[store_frame["patient"].isin(store_frame["patient"].unique()[:100])]
    one = assess(small)
    pd.testing.assert_frame_equal(assess(small, jobs=2).table, one.table, check_exact=True)  # too few rows
    at = str(store_frame["collected_at"].max().date())
    assess(store_frame, jobs=2, at=at)  # a date asked for
    assert called == []
