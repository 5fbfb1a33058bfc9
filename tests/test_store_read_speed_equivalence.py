"""The fast store read (every column aggregated by SQLite into one string, REAL columns read as
rows, joined in numpy/Arrow: :mod:`bayesbase.store.queries`) against a reference reader written
here and independent of the project's read code: ``pandas.read_sql`` of the plain SQL join of the
tables, converted to the canonical dtypes with pandas and sorted with ``sort_values``
(the outside reference is pandas' own SQL reader). Frames must be identical
(``assert_frame_equal(check_exact=True)``, dtypes included), on an invented store with blanks,
censored values, several units and methods, owners, non-ASCII and awkward texts; on the fallback
paths (a text holding the separator, a string over SQLite's length limit, reads in several
primary-key ranges); and (slow) on a store built like the benchmark's, with 2,000 invented patients."""
from __future__ import annotations

import sqlite3

import numpy as np
import pandas as pd
import pytest

from bayesbase.contract import CANONICAL_COLUMNS
from bayesbase.store import Store, frames, queries
from bayesbase.testing import synthetic_canonical

#: the plain join of the store's tables (written for this test, from the schema)
REFERENCE_SQL = (
    "SELECT p.id AS patient, p.species, p.breed, p.sex, p.birth_date, s.id AS specimen, "
    "s.collected_at, r.analyte, r.value, r.unit, r.reported_value, r.reported_unit, r.censor, "
    "r.method, r.replicate, s.fasted, s.haemolysis, s.lipaemia, s.icterus, s.state, "
    "coalesce(r.source_file, l.file) AS source_file, r.source_row "
    "FROM results r JOIN specimens s ON s.pk = r.specimen JOIN patients p ON p.pk = s.patient "
    "LEFT JOIN import_log l ON l.id = r.import")
TEXTS = ("patient", "species", "breed", "sex", "specimen", "analyte", "unit", "reported_value",
         "reported_unit", "censor", "method", "state", "source_file")


def reference(conn, where: str = "", params: tuple = ()) -> pd.DataFrame:
    """The canonical frame by the plainest route: pandas.read_sql, then pandas conversions."""
    df = pd.read_sql(REFERENCE_SQL + where, conn, params=params)
    out = {}
    for name in CANONICAL_COLUMNS:
        s = df[name]
        if name in TEXTS:
            out[name] = s.astype("string")
        elif name in ("birth_date", "collected_at"):
            out[name] = pd.to_datetime(s, format="ISO8601").astype("datetime64[ns]")
        elif name in ("replicate", "source_row"):
            out[name] = s.astype("Int64")
        elif name == "fasted":
            out[name] = s.map({1: True, 0: False}).astype("boolean")
        else:
            out[name] = s.astype("float64")
    return (pd.DataFrame(out).sort_values(["patient", "collected_at", "specimen", "analyte", "replicate"])
            .reset_index(drop=True))


def _invented(seed: int = 47) -> pd.DataFrame:
    """Invented results with every kind of blank and variant the store keeps."""
    rng = np.random.default_rng(seed)
    f = synthetic_canonical(24, 5, 10, seed=seed)
    n = len(f)
    ids = {p: p for p in f["patient"].unique()}
    ids.update({"DEMO-0001": "Zoë-7", "DEMO-0002": "Ärger, 2", "DEMO-0003": "b'quote\"d", "DEMO-0004": "犬-4"})
    f["patient"] = pd.array(f["patient"].map(ids), dtype="string")
    f["specimen"] = pd.array(f["specimen"].astype(str) + np.where(rng.random(n) < 0.5, "", "·é"), dtype="string")
    f["specimen"] = f.groupby(["patient", "collected_at"])["specimen"].transform("first")
    pids = f["patient"].unique()
    for k in ("breed", "sex"):  # a third of the patients without one
        f[k] = pd.array(np.where(f["patient"].isin(pids[rng.random(len(pids)) < 0.3]), None,
                                 f[k].to_numpy(dtype=object)), dtype="string")
    bd = f["birth_date"].copy()
    bd[f["patient"].isin(["Zoë-7", "DEMO-0009"])] = pd.NaT
    f["birth_date"] = bd
    f["fasted"] = pd.array(np.array([True, False, None], dtype=object)[rng.integers(0, 3, n)], dtype="boolean")
    f["fasted"] = f.groupby("specimen")["fasted"].transform(lambda s: s.iloc[0])
    for k in ("haemolysis", "lipaemia", "icterus"):
        f[k] = np.array([np.nan, 5.0, 900.0])[rng.integers(0, 3, n)] * rng.uniform(0.5, 1.5, n)
        f[k] = f.groupby("specimen")[k].transform(lambda s: s.iloc[0])
    f["state"] = pd.array(np.array(["", "healthy", "unwell"])[rng.integers(0, 3, n)], dtype="string")
    f["state"] = f.groupby("specimen")["state"].transform("first")
    cens = rng.integers(0, 8, n)
    f["censor"] = pd.array(np.where(cens == 0, "left", np.where(cens == 1, "right", "")), dtype="string")
    f["reported_value"] = pd.array(np.where(cens == 0, "<", np.where(cens == 1, ">", ""))
                                   + f["value"].map(lambda v: f"{v:.4g}").str.replace(".", ",", regex=False)
                                   .to_numpy(dtype=str), dtype="string")
    # every bit of a double (a unit conversion's round-off), tiny and huge magnitudes, negatives
    f["value"] = f["value"].to_numpy() * (1.0 + rng.uniform(-1e-12, 1e-12, n)) / 3.0
    f.loc[::17, "value"] = -f.loc[::17, "value"] * 1e-200
    f.loc[::19, "value"] = f.loc[::19, "value"] * 1e250
    f.loc[::23, "value"] = 0.0
    f["reported_unit"] = pd.array(np.array(["mg/dL", "µmol/L", "g/L", None], dtype=object)[rng.integers(0, 4, n)],
                                  dtype="string").fillna(f["reported_unit"])
    f["method"] = pd.array(np.array(["demo analyser", "other, wet", None], dtype=object)[rng.integers(0, 3, n)],
                           dtype="string")
    f["replicate"] = pd.array(np.where(rng.random(n) < 0.1, 2, 1), dtype="Int64")
    f["source_file"] = pd.array(np.where(rng.random(n) < 0.5, None, "clinic 'A'.csv"), dtype="string")
    f["source_row"] = pd.array(np.where(rng.random(n) < 0.1, None, np.arange(n) * 7919), dtype="Int64")
    return f.drop_duplicates(["patient", "specimen", "analyte", "replicate"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    f = _invented()
    owners = {pid: f"Owner of {pid}" for pid in f["patient"].unique()[::3]}
    path = tmp_path_factory.mktemp("fastread") / "s.sqlite"
    half = f["patient"].isin(f["patient"].unique()[::2])
    with Store(path) as st:
        st.import_frame(f[half], source="first.csv", owners=owners)
        st.import_frame(f[~half], source="second.csv")
    return path


def _spy(monkeypatch) -> list:
    """Count the tables read row by row (the fallback)."""
    calls = []
    real = queries.columns_from_rows

    def counted(rows, kinds):
        calls.append(len(rows))
        return real(rows, kinds)

    monkeypatch.setattr(queries, "columns_from_rows", counted)
    return calls


def test_fast_read_equals_read_sql(store, monkeypatch):
    fallback = _spy(monkeypatch)
    with Store(store) as st:
        got = st.results()
        want = reference(st.connection)
        pd.testing.assert_frame_equal(got, want, check_exact=True)
        assert fallback == []  # every table came through the aggregated read
        assert len(got) > 1000 and got["method"].isna().any() and got["breed"].isna().any()
        assert got["birth_date"].isna().any() and got["fasted"].isna().any() and got["source_row"].isna().any()
        assert {"left", "right", ""} == set(got["censor"]) and got["reported_unit"].nunique() >= 4
        assert set(got["source_file"]) == {"first.csv", "second.csv", "clinic 'A'.csv"}
        assert (got["value"] == 0).any() and (got["value"] < 0).any() and (got["value"].abs() > 1e200).any()
        assert {"Zoë-7", "Ärger, 2", "犬-4"} <= set(got["patient"])
        assert st.connection.execute("SELECT count(*) FROM owners").fetchone()[0] > 0 and "owner" not in got


def test_one_patient_and_one_analyte_equal_read_sql(store):
    with Store(store) as st:
        for pid in ("Zoë-7", "Ärger, 2", "DEMO-0010"):
            pd.testing.assert_frame_equal(st.results(pid), reference(st.connection, " WHERE p.id = ?", (pid,)),
                                          check_exact=True)
            pd.testing.assert_frame_equal(
                st.history(pid, "creatinine"),
                reference(st.connection, " WHERE p.id = ? AND r.analyte = ?", (pid, "creatinine")), check_exact=True)


def test_read_in_several_primary_key_ranges(store, monkeypatch):
    monkeypatch.setattr(queries, "_CHUNK_PKS", 37)
    fallback = _spy(monkeypatch)
    with Store(store) as st:
        pd.testing.assert_frame_equal(st.results(), reference(st.connection), check_exact=True)
    assert fallback == []


def test_text_holding_the_separator_falls_back_to_rows(tmp_path, monkeypatch):
    f = _invented(seed=5)
    path = tmp_path / "sep.sqlite"
    with Store(path) as st:
        st.import_frame(f, source="sep.csv")
    conn = sqlite3.connect(path)  # a text written by another tool, holding the separator
    conn.execute("UPDATE results SET method = ? WHERE pk % 11 = 0", (f"odd{frames.AGG_SEP}method",))
    conn.execute("UPDATE specimens SET state = ? WHERE pk = 3", (f"x{frames.AGG_SEP}",))
    conn.commit()
    conn.close()
    fallback = _spy(monkeypatch)
    with Store(path) as st:
        got = st.results()
        pd.testing.assert_frame_equal(got, reference(st.connection), check_exact=True)
    assert len(fallback) == 2  # results and specimens read row by row, patients aggregated
    assert got["method"].str.contains(frames.AGG_SEP, regex=False).any()


def test_string_over_the_length_limit_falls_back_to_rows(store, monkeypatch):
    fallback = _spy(monkeypatch)
    with Store(store) as st:
        st.connection.setlimit(sqlite3.SQLITE_LIMIT_LENGTH, 4000)
        got = st.results()
        st.connection.setlimit(sqlite3.SQLITE_LIMIT_LENGTH, 1_000_000_000)
        pd.testing.assert_frame_equal(got, reference(st.connection), check_exact=True)
    assert len(got) in fallback  # the results table (its strings over 4,000 bytes) read row by row


def test_empty_store(tmp_path):
    with Store(tmp_path / "empty.sqlite") as st:
        got = st.results()
        assert got.empty
        pd.testing.assert_frame_equal(got, reference(st.connection), check_exact=True)


@pytest.mark.slow
def test_bench_like_store_of_2000_patients_equals_read_sql(tmp_path):
    """A store built as ``bayesbase bench --only assess_store`` builds its own (invented dogs x 3
    specimens x 20 analytes of the dog pack), at 2,000 patients instead of the bench's 10,000 to
    keep the suite's time (the read path is the same; block reads are checked above)."""
    from bayesbase.priors import load_pack

    frame = synthetic_canonical(2_000, 3, 40)
    frame = frame[frame["analyte"].isin(set(load_pack("dog").analytes))]
    keep = list(dict.fromkeys(frame["analyte"]))[:20]
    frame = frame[frame["analyte"].isin(keep)].reset_index(drop=True)
    with Store(tmp_path / "bench.sqlite") as st:
        st.import_frame(frame, source="bench")
        got = st.results()
        assert len(got) == 120_000
        pd.testing.assert_frame_equal(got, reference(st.connection), check_exact=True)
