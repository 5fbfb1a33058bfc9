"""The store's import stages alone (prepare -> plan -> apply), the dry run they give
(``Store.import_frame(dry_run=True)``, ``bayesbase import --dry-run``), and property tests of the
store round trip (hypothesis).

The expected counts are computed independently of the store, by pandas merges of the input
with the stored frame on the result key (patient, specimen, analyte, replicate): a key not
stored is a row to add, a key stored with the same value is a row already stored, a key stored
with another value is a row to replace (and a conflict). Demo data are invented
(:func:`bayesbase.testing.synthetic_canonical`).
"""
from __future__ import annotations

import dataclasses
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pandas.testing as pdt
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as hst

from bayesbase.io import to_tidy_csv
from bayesbase.cli import main
from bayesbase.store import (VALUE_RTOL, ImportConflict, ImportPlan, Store, coerce_canonical,
                             importer)
from bayesbase.testing import synthetic_canonical

KEY = ["patient", "specimen", "analyte", "replicate"]
TABLES = ("patients", "owners", "specimens", "results", "import_log", "import_patients",
          "replaced", "meta", "schema_version")


def _snapshot(conn) -> dict:
    """Every row of every table of the main database."""
    return {t: conn.execute(f"SELECT * FROM main.{t} ORDER BY 1").fetchall() for t in TABLES}


def _expected_counts(stored, new) -> tuple[int, int, int]:
    """(to add, already stored, to replace) by a pandas merge on the result key; two values
    are the same within the store's documented relative tolerance (``VALUE_RTOL``)."""
    m = new[KEY + ["value"]].merge(stored[KEY + ["value"]], on=KEY, how="left",
                                   suffixes=("", "_stored"), indicator=True)
    found = (m["_merge"] == "both").to_numpy()
    a, b = m["value"].to_numpy(), m["value_stored"].to_numpy()
    same = found & (np.abs(a - b) <= VALUE_RTOL * np.maximum(np.abs(a), np.abs(b)))
    return int((~found).sum()), int(same.sum()), int((found & ~same).sum())


def _bigger(first):
    """``first`` and 28 results more: a third patient (5 specimens x 4 analytes) and a fifth
    specimen of the two stored patients (invented like ``first``, same attributes)."""
    more = synthetic_canonical(3, 5, 4)
    m = more[KEY].merge(first[KEY], on=KEY, how="left", indicator=True)
    extra = more[(m["_merge"] == "left_only").to_numpy()]
    return coerce_canonical(pd.concat([first, extra], ignore_index=True))


def _second_import(first):
    """An input overlapping ``first``: three stored results changed, 28 new, the rest the same."""
    new = _bigger(first)
    changed = new.index[[1, 6, 11]]  # patient DEMO-0000, specimens 0-2: stored
    new.loc[changed, "value"] = new.loc[changed, "value"] * 1.5
    new.loc[changed, "reported_value"] = [f"{v:g}" for v in new.loc[changed, "value"]]
    return new


@pytest.fixture
def stored(tmp_path):
    first = synthetic_canonical(2, 4, 4)
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        s.import_frame(first, "first.csv", "1" * 64)
    return db, first


# ------------------------------------------------------------------------------- plan alone
def test_plan_alone_predicts_rows_and_conflicts_and_writes_nothing(stored):
    db, first = stored
    new = _second_import(first)
    with Store(db) as s:
        c = s.connection
        before = _snapshot(c)
        c.execute("BEGIN")
        try:
            plan = importer.plan(c, new)
        finally:
            c.execute("ROLLBACK")
            importer.drop_staging(c)
        assert _snapshot(c) == before
        assert c.execute("SELECT count(*) FROM temp.sqlite_master").fetchone()[0] == 0
    assert isinstance(plan, ImportPlan)
    add, same, replace = _expected_counts(first, new)
    assert (add, same, replace) == (28, 32 - 3, 3)  # by construction (_second_import)
    assert (plan.rows_added, plan.rows_skipped, plan.rows_replaced) == (add, same, replace)
    assert [p[0] for p in plan.new_patients] == ["DEMO-0002"]
    assert len(plan.new_specimens) == 5 + 2  # patient 2's five, and specimen 4 of patients 0, 1
    assert sorted((c.kind, c.field, c.analyte) for c in plan.conflicts) == sorted(
        ("result", "value", a) for a in new.loc[new.index[[1, 6, 11]], "analyte"])
    # the new results are the input rows whose key is not stored, in the input's order
    expect = new.merge(first[KEY], on=KEY, how="left", indicator=True)
    expect_keys = expect.loc[expect["_merge"] == "left_only", KEY].reset_index(drop=True)
    got_keys = plan.new_results[KEY].reset_index(drop=True)
    pdt.assert_frame_equal(got_keys.sort_values(KEY).reset_index(drop=True),
                           expect_keys.sort_values(KEY).reset_index(drop=True))


def test_plan_of_an_empty_store_adds_everything(tmp_path):
    frame = synthetic_canonical(2, 3, 5)
    with Store(tmp_path / "s.sqlite") as s:
        c = s.connection
        c.execute("BEGIN")
        plan = importer.plan(c, frame)
        c.execute("ROLLBACK")
        importer.drop_staging(c)
    assert (plan.rows_added, plan.rows_skipped, plan.rows_replaced) == (30, 0, 0)
    assert (len(plan.new_patients), len(plan.new_specimens)) == (2, 6)
    assert not plan.conflicts and not plan.result_updates and not plan.changes


def test_plan_tells_a_filled_field_from_a_changed_one(tmp_path):
    first = synthetic_canonical(2, 2, 2)
    first["breed"] = pd.array([pd.NA] * len(first), dtype="string")  # both stored without
    first.loc[first["patient"] == "DEMO-0001", "breed"] = "labrador retriever"
    new = first.copy()
    new["breed"] = pd.array(["beagle"] * len(new), dtype="string")
    with Store(tmp_path / "s.sqlite") as s:
        s.import_frame(first, "first.csv")
        c = s.connection
        c.execute("BEGIN")
        plan = importer.plan(c, new)
        c.execute("ROLLBACK")
        importer.drop_staging(c)
    # DEMO-0000 had no breed: filled, no conflict; DEMO-0001's breed changes: a conflict
    assert [(x.kind, x.patient, x.field, x.stored, x.new) for x in plan.conflicts] == [
        ("patient", "DEMO-0001", "breed", "labrador retriever", "beagle")]
    assert [(u[0], u[1]) for u in plan.patient_updates] == [("breed", "beagle")] * 2
    assert [(ch[5], ch[6], ch[7]) for ch in plan.changes] == [
        ("breed", None, "beagle"), ("breed", "labrador retriever", "beagle")]
    assert (plan.rows_added, plan.rows_skipped, plan.rows_replaced) == (0, len(first), 0)


def test_prepare_validates_a_raw_frame_and_splits_owners(tmp_path):
    raw = pd.DataFrame({
        "patient": ["A1", "A1"], "species": ["dog", "dog"], "specimen": ["s1", "s1"],
        "collected_at": ["2024-01-02", "2024-01-02"], "analyte": ["creatinine", "urea"],
        "value": ["1.2", "5"], "unit": ["mg/dL", "mmol/L"], "owner": ["Invented Owner", ""],
    })
    canon, owners = importer.prepare(raw, "raw.csv")
    assert owners == {"A1": "Invented Owner"} and "owner" not in canon.columns
    # 1 mg/dL creatinine = 88.4 umol/L (molar mass 113.12 g/mol; common practice)
    assert canon.set_index("analyte").loc["creatinine", "value"] == pytest.approx(1.2 * 88.4,
                                                                                 rel=1e-3)


# ------------------------------------------------------------------------------ apply alone
def test_apply_writes_the_plan_and_returns_its_summary(stored):
    db, first = stored
    new = _second_import(first)
    with Store(db) as s:
        c = s.connection
        c.execute("BEGIN IMMEDIATE")
        plan = importer.plan(c, new)
        summary = importer.apply(c, plan, "second.csv", "2" * 64, {"DEMO-0002": "Invented"})
        c.execute("COMMIT")
        importer.drop_staging(c)
        assert summary == plan.summary("second.csv", summary.import_id) and summary.import_id == 2
        got = s.results()
        log = s.imports()
        owners = c.execute("SELECT owner FROM owners").fetchall()
    # the store now holds exactly the new input (every key of `first` is in `new`)
    assert set(map(tuple, first[KEY].astype(str).to_numpy())) <= set(
        map(tuple, new[KEY].astype(str).to_numpy()))
    cols = [c for c in new.columns if c not in ("source_file", "source_row")]
    pdt.assert_frame_equal(got[cols], new[cols])
    assert log["rows_added"].tolist() == [32, summary.rows_added]
    assert log["rows_replaced"].tolist() == [0, 3] and owners == [("Invented",)]


# --------------------------------------------------------------------------------- dry run
def _dry_then_real(s, frame, replace=False):
    dry = s.import_frame(frame, "next.csv", "9" * 64, replace=replace, dry_run=True)
    real = s.import_frame(frame, "next.csv", "9" * 64, replace=replace)
    return dry, real


def test_dry_run_writes_no_byte_and_predicts_the_import(stored):
    db, first = stored
    new = _second_import(first)
    before = db.read_bytes()
    with Store(db) as s:
        dry = s.import_frame(new, "next.csv", "9" * 64, replace=True, dry_run=True)
    assert db.read_bytes() == before
    wal = Path(str(db) + "-wal")
    assert not wal.exists() or wal.stat().st_size == 0
    assert dry.dry_run and dry.import_id is None
    assert (dry.rows_added, dry.rows_skipped, dry.rows_replaced) == _expected_counts(first, new)
    with Store(db) as s:
        real = s.import_frame(new, "next.csv", "9" * 64, replace=True)
    assert db.read_bytes() != before
    assert dataclasses.replace(dry, import_id=real.import_id, dry_run=False) == real


def test_dry_run_lists_conflicts_the_import_refuses(stored):
    db, first = stored
    new = _second_import(first)
    with Store(db) as s:
        dry = s.import_frame(new, "next.csv", dry_run=True)  # no replace: listed, not raised
        with pytest.raises(ImportConflict) as err:
            s.import_frame(new, "next.csv")
    assert [str(c) for c in dry.conflicts] == [str(c) for c in err.value.conflicts]
    assert len(dry.conflicts) == 3


def test_dry_run_of_a_file_then_import_of_it(stored, tmp_path):
    db, first = stored
    path = to_tidy_csv(_bigger(first), tmp_path / "more.csv")
    with Store(db) as s:
        dry = s.import_file(path, dry_run=True)
        real = s.import_file(path)
    assert dataclasses.replace(dry, import_id=real.import_id, dry_run=False) == real
    assert (real.rows_added, real.rows_skipped, real.rows_replaced) == (28, 32, 0)
    assert (real.patients_added, real.specimens_added) == (1, 7)


def test_cli_dry_run_prints_the_counts_and_writes_nothing(stored, tmp_path, capsys):
    db, first = stored
    new = _second_import(first)
    path = to_tidy_csv(new, tmp_path / "next.csv")
    before = db.read_bytes()
    assert main(["import", str(path), "--db", str(db), "--dry-run"]) == 0
    out = capsys.readouterr().out
    add, same, replace = _expected_counts(first, new)
    assert (f"next.csv (dry run, nothing written): {add} rows to add, {same} already stored, "
            f"{replace} to replace, 3 conflicts") in out
    assert "without --replace this import would be refused" in out
    assert db.read_bytes() == before
    # a store not yet created stays not created
    missing = tmp_path / "none" / "new.sqlite"
    assert main(["import", str(path), "--db", str(missing), "--dry-run"]) == 0
    assert f"{len(new)} rows to add, 0 already stored" in capsys.readouterr().out
    assert not missing.exists() and not missing.parent.exists()


# ------------------------------------------------------------------ property: round trips
_FRAMES = hst.tuples(hst.integers(1, 3), hst.integers(1, 4), hst.integers(1, 6),
                     hst.integers(0, 2**32 - 1))


@settings(max_examples=8, derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(shape=_FRAMES, drop=hst.integers(0, 5), scale=hst.floats(0.5, 2.0), bare=hst.booleans())
def test_store_round_trip_and_dry_run_property(shape, drop, scale, bare):
    """Whatever the frame: what is stored reads back unchanged; a dry run predicts the next
    import exactly; importing the same rows again adds nothing."""
    n_pat, n_spec, n_an, seed = shape
    frame = synthetic_canonical(n_pat, n_spec, n_an, seed=seed)
    if bare:  # every optional attribute missing: stored as NULL, read back as missing
        frame = frame.assign(breed=pd.NA, sex=pd.NA, method=pd.NA, birth_date=pd.NaT,
                             fasted=pd.NA, haemolysis=np.nan).astype(
            {"breed": "string", "sex": "string", "method": "string",
             "birth_date": "datetime64[ns]", "fasted": "boolean"})
    part = frame.iloc[drop:].reset_index(drop=True)  # a first import missing a few rows
    second = frame.copy()
    second["value"] = second["value"] * scale
    second["reported_value"] = pd.array([f"{v:.12g}" for v in second["value"]], dtype="string")
    with tempfile.TemporaryDirectory() as d, Store(Path(d) / "s.sqlite") as s:
        s.import_frame(part, "part.csv")
        cols = [c for c in frame.columns if c != "source_file"]
        pdt.assert_frame_equal(s.results()[cols], part[cols])
        dry, real = _dry_then_real(s, second, replace=True)
        assert dataclasses.replace(dry, import_id=real.import_id, dry_run=False) == real
        assert (real.rows_added, real.rows_skipped, real.rows_replaced) == _expected_counts(
            part, second)
        pdt.assert_frame_equal(s.results()[cols], second[cols])
        again = s.import_frame(second, "again.csv")
        assert again.nothing_new and again.rows_skipped == len(second)
        assert s.integrity_check() == "ok"
