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
    # H/L/I indices per specimen: missing, ordinary, or far above any threshold (compromised)
    for k in ("haemolysis", "lipaemia", "icterus"):
        f[k] = np.array([np.nan, 5.0, 900.0])[rng.integers(0, 3, n)] * rng.uniform(0.5, 1.5, n)
        f[k] = f.groupby("specimen")[k].transform(lambda s: s.iloc[0])
    f["state"] = pd.array(np.array(["", "healthy", "unwell"])[rng.integers(0, 3, n)], dtype="string")
    f["state"] = f.groupby("specimen")["state"].transform("first")
    cens = rng.integers(0, 10, n)  # a few censored results, reported as "<x" / ">x"
    f["censor"] = pd.array(np.where(cens == 0, "left", np.where(cens == 1, "right", "")), dtype="string")
    f["reported_value"] = pd.array(np.where(cens == 0, "<", np.where(cens == 1, ">", ""))
                                   + f["value"].map(repr).to_numpy(dtype=str), dtype="string")
    # values with every bit of a double (a unit conversion's round-off) and another reported unit
    f["value"] = f["value"].to_numpy() * (1.0 + rng.uniform(-1e-12, 1e-12, n)) / 3.0
    f["reported_unit"] = pd.array(np.where(rng.random(n) < 0.3, "mg/dL", f["reported_unit"]), dtype="string")
    f["method"] = pd.array(np.where(rng.random(n) < 0.2, "other analyser", f["method"].astype(object)), dtype="string")
    owners = {pid: f"Owner of {pid}" for pid in f["patient"].unique()[::3]}
    path = tmp_path_factory.mktemp("read") / "s.sqlite"
    with Store(path) as st:
        st.import_frame(f.iloc[: n // 2], source="first.csv", owners=owners)
        st.import_frame(f.iloc[n // 2:], source="second.csv")
    return path


def test_read_equals_the_plain_join(store):
    with Store(store) as st:
        got = st.results()
        pd.testing.assert_frame_equal(got, _joined(st.connection), check_exact=True)
        assert got["method"].isna().any() and got["source_row"].isna().any()
        assert got["haemolysis"].isna().any() and (got["haemolysis"] > 400).any()
        assert set(got["censor"]) == {"", "left", "right"} and set(got["state"]) == {"", "healthy", "unwell"}
        assert st.connection.execute("SELECT count(*) FROM owners").fetchone()[0] > 0
        assert "owner" not in got.columns
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


def test_assessed_specimen_at_a_date_or_id_equals_the_per_patient_rule(store):
    """``--at`` over a whole store (one vectorised pass) gives, patient by patient, the specimen
    :func:`bayesbase.assessment.roles.pick_assessed` chooses for that patient alone."""
    from bayesbase.assessment import roles
    from bayesbase.assessment.frame import history_frame
    from bayesbase.errors import BayesbaseError

    with Store(store) as st:
        hist = history_frame(st.results(), None)
    spec = hist.drop_duplicates(["patient", "specimen"])[["patient", "specimen", "collected_at"]]
    some = str(spec["specimen"].iloc[5])
    for at in ("2004-02-20", "2004-02-20T09:00", "2004-03-01T12:00+02:00", "2030-01-01", some):
        if at == some:
            with pytest.raises(BayesbaseError, match="neither a specimen id"):
                roles.assessed_specimens(hist, at)
            one = hist[hist["patient"] == spec["patient"].iloc[5]]
            got = roles.assessed_specimens(one, at)
            assert got.specimen == {str(spec["patient"].iloc[5]): some}
            continue
        got = roles.assessed_specimens(hist, at)
        want = {pid: roles.pick_assessed(g, at) for pid, g in spec.groupby("patient", sort=False)}
        assert got.specimen == want and list(got.collected_at.index) == list(want)
        t_of = dict(zip(zip(spec["patient"], spec["specimen"]), spec["collected_at"]))
        assert list(got.collected_at) == [t_of[(p, s)] for p, s in want.items()]
    with pytest.raises(BayesbaseError, match="on or before 2003-01-01"):
        roles.assessed_specimens(hist, "2003-01-01")
