"""The store read (one query per table, joined in numpy) against the plain SQL join of the three
tables read row by row (pandas, ``coerce_canonical``), on invented demo data with missing values
(breed, method, H/L/I indices, fasting, source row) and two imports (source file)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from bayesbase.store import Store, queries
from bayesbase.store.frames import coerce_canonical
from bayesbase.testing import synthetic_canonical


def _joined(conn, where: str = "", params: tuple = ()):
    """The straightforward read: one SQL join, row by row, coerced to the canonical frame."""
    return coerce_canonical(queries._records(conn.execute(queries._SELECT + where, params)))


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    rng = np.random.default_rng(31)
    f = synthetic_canonical(30, 4, 12, seed=31)
    n = len(f)
    f["breed"] = pd.array(np.where(rng.random(n) < 0.3, None, f["breed"].to_numpy(dtype=object)), dtype="string")
    f["breed"] = f.groupby("patient")["breed"].transform("first")
    bd = f["birth_date"].copy()
    bd[f["patient"].isin(["DEMO-0003", "DEMO-0007"])] = pd.NaT
    f["birth_date"] = bd
    f["method"] = pd.array(np.where(rng.random(n) < 0.2, None, "demo analyser"), dtype="string")
    f["fasted"] = pd.array(np.array([True, False, None], dtype=object)[rng.integers(0, 3, n)], dtype="boolean")
    f["fasted"] = f.groupby("specimen")["fasted"].transform(lambda s: s.iloc[0])
    f["source_file"] = pd.array(np.where(rng.random(n) < 0.5, None, "synthetic"), dtype="string")
    f["source_row"] = pd.array(np.where(rng.random(n) < 0.1, None, np.arange(n)), dtype="Int64")
    path = tmp_path_factory.mktemp("read") / "s.sqlite"
    with Store(path) as st:
        st.import_frame(f.iloc[: n // 2], source="first.csv")
        st.import_frame(f.iloc[n // 2:], source="second.csv")
    return path


def test_read_equals_the_plain_join(store):
    with Store(store) as st:
        got = st.results()
        pd.testing.assert_frame_equal(got, _joined(st.connection), check_exact=True)
        assert got["method"].isna().any() and got["source_row"].isna().any()
        assert set(got["source_file"]) == {"first.csv", "second.csv", "synthetic"}  # import log when blank


def test_one_patient_and_one_analyte_equal_the_plain_join(store):
    with Store(store) as st:
        for pid in ("DEMO-0003", "DEMO-0010"):
            pd.testing.assert_frame_equal(st.results(pid), _joined(st.connection, " WHERE p.id = ?", (pid,)),
                                          check_exact=True)
            pd.testing.assert_frame_equal(
                st.history(pid, "creatinine"),
                _joined(st.connection, " WHERE p.id = ? AND r.analyte = ?", (pid, "creatinine")), check_exact=True)


def test_empty_store_reads_an_empty_canonical_frame(tmp_path):
    with Store(tmp_path / "empty.sqlite") as st:
        got = st.results()
        assert got.empty
        pd.testing.assert_frame_equal(got, _joined(st.connection), check_exact=True)
