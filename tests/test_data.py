"""Tests of the tidy results contract (bayesbase.io reading, bayesbase.validate).

All results below are invented for these tests (no real patients). Expected converted values
come from the published conversion factors named beside each check (the same sources the
registry cites): creatinine mg/dL x 88.4 = umol/L (UCSF lab manual, test 265); urea nitrogen
(BUN) mg/dL x 0.357 = urea mmol/L (IASRI course conversion table); ALP/ALT U/L = IU/L
(elephantcare.org conversion page); haematocrit % x 0.01 = L/L (definition of percent).
"""
from __future__ import annotations

import pandas as pd
import pytest

from bayesbase import io as bio
from bayesbase.contract import CANONICAL_COLUMNS
from bayesbase.errors import ValidationError
from bayesbase.validate import validate

NOW = "2024-06-01T00:00:00"
HEADER = "patient,species,specimen,collected_at,analyte,value,unit"


def write(tmp_path, text, name="results.csv", encoding="utf-8"):
    path = tmp_path / name
    path.write_bytes(text.encode(encoding))
    return path


def problems_of(path_or_frame, **kw):
    with pytest.raises(ValidationError) as exc:
        if isinstance(path_or_frame, pd.DataFrame):
            validate(path_or_frame, now=NOW, **kw)
        else:
            bio.read_results(path_or_frame, now=NOW)
    return exc.value.problems


def only(problems, column):
    found = [p for p in problems if p.column == column]
    assert found, f"no problem in column {column}: {problems}"
    return found


GOOD_ROWS = [
    "Rex,dog,S1,2024-03-05,creatinine,100,umol/L",
    "Rex,dog,S1,2024-03-05,alt,40,U/L",
    "Rex,dog,S2,2024-04-05,creatinine,110,umol/L",
]


def good_csv(extra_rows=(), header=HEADER):
    return "\n".join([header, *GOOD_ROWS, *extra_rows]) + "\n"


# --------------------------------------------------------------------------- acceptance: problems


def test_missing_required_column(tmp_path):
    path = write(tmp_path, "patient,species,specimen,collected_at,analyte,value\n"
                           "Rex,dog,S1,2024-03-05,creatinine,100\n")
    (p,) = problems_of(path)
    assert (p.file, p.row, p.column) == ("results.csv", 1, "unit")
    assert "required column 'unit' is missing" in p.message
    assert "results.csv, row 1, column 'unit'" in str(p)


def test_non_numeric_value(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05,creatinine,high,umol/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "value")
    assert "non-numeric value 'high'" in p.message
    assert "<5" in p.hint  # says what was expected


@pytest.mark.parametrize("bad", ["0", "-3", "<0"])
def test_zero_or_negative_value(tmp_path, bad):
    path = write(tmp_path, good_csv([f"Rex,dog,S3,2024-05-05,creatinine,{bad},umol/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "value")
    assert "not greater than 0" in p.message


def test_unknown_analyte_with_hint(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05,creatinin,100,umol/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "analyte")
    assert p.message == "unknown analyte 'creatinin'"
    assert p.hint.startswith("did you mean 'creatinine'")


def test_unit_impossible_for_analyte(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05,ALT,40,mg/dL"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "unit")
    assert "not accepted for ALT" in p.message
    assert "U/L" in p.hint  # lists the accepted units


def test_unknown_unit(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05,creatinine,100,umol/K"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "unit")
    assert "did you mean 'umol/L'" in p.hint


@pytest.mark.parametrize("bad", ["2024-13-45", "yesterday", "31/02/2024"])
def test_unparsable_date(tmp_path, bad):
    path = write(tmp_path, good_csv([f"Rex,dog,S3,{bad},creatinine,100,umol/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "collected_at")
    assert f"unparsable date '{bad}'" in p.message


def test_date_in_the_future(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-07-01,creatinine,100,umol/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "collected_at")
    assert "in the future" in p.message


def test_future_uses_utc_offset(tmp_path):
    # 2024-06-01T10:00+14:00 is 2024-05-31T20:00 UTC: not in the future at NOW
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-06-01T10:00+14:00,creatinine,100,umol/L"]))
    frame = bio.read_results(path, now=NOW)
    assert frame["collected_at"].max() == pd.Timestamp("2024-05-31T20:00")


def test_patient_with_two_species(tmp_path):
    path = write(tmp_path, good_csv(["Rex,cat,S3,2024-05-05,creatinine,100,umol/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "species")
    assert "patient 'Rex'" in p.message and "dog" in p.message and "cat" in p.message


def test_same_specimen_and_analyte_twice_with_different_values(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S1,2024-03-05,creatinine,130,umol/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "value")
    assert "S1" in p.message and "creatinine" in p.message
    assert "row 2" in p.message and "row 5" in p.message


def test_bun_and_urea_in_one_specimen_are_different_values(tmp_path):
    # BUN 20 mg/dL = 7.14 mmol/L urea (x 0.357), urea 20 mg/dL = 3.33 mmol/L (x 0.1665), IASRI
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05,BUN,20,mg/dL",
                                     "Rex,dog,S3,2024-05-05,urea,20,mg/dL"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (6, "value")
    assert "BUN 20 mg/dL (row 5)" in p.message and "urea 20 mg/dL (row 6)" in p.message


def test_identical_duplicates_dropped_and_counted(tmp_path):
    # 1.1312 mg/dL x 88.4 (UCSF factor) = 100.0 umol/L: the same result in another unit
    path = write(tmp_path, good_csv(["Rex,dog,S1,2024-03-05,creatinine,100,umol/L",
                                     "Rex,dog,S1,2024-03-05,creatinine,1.131221719,mg/dL"]))
    frame = bio.read_results(path, now=NOW)
    assert len(frame) == 3
    assert frame.attrs["n_duplicates_dropped"] == 2
    assert any("duplicate" in note for note in frame.attrs["notes"])


def test_specimen_ids_are_per_patient_but_one_draw_has_one_time(tmp_path):
    # specimens are keyed by (patient, specimen): Tom's S1 is not Rex's S1 (issue 11)
    path = write(tmp_path, good_csv(["Tom,cat,S1,2024-03-05,ast,30,U/L",
                                     "Rex,dog,S2,2024-04-06,alt,30,U/L"]))
    problems = problems_of(path)
    assert [(p.row, p.column) for p in problems] == [(6, "collected_at")]
    assert "specimen 'S2' of patient 'Rex'" in problems[0].message


@pytest.mark.parametrize("text", ["", "\n\n", "\ufeff"])
def test_empty_file(tmp_path, text):
    path = write(tmp_path, text)
    (p,) = problems_of(path)
    assert (p.file, p.row) == ("results.csv", 1)
    assert "empty" in p.message


def test_header_only(tmp_path):
    path = write(tmp_path, HEADER + "\n")
    (p,) = problems_of(path)
    assert p.row == 2 and "no data rows" in p.message


def test_all_problems_in_one_error_sorted_by_row(tmp_path):
    path = write(tmp_path, good_csv([
        "Rex,dog,S3,2024-05-05,creatinin,100,umol/L",
        "Rex,dog,S4,2030-01-01,alt,x,mg/dL",
        "Rex,dog,S5,05/13/2024,alt,5,U/L",
    ]))
    problems = problems_of(path)
    where = [(p.row, p.column) for p in problems]
    assert where == [(5, "analyte"), (6, "collected_at"), (6, "value"), (6, "unit"),
                     (7, "collected_at")]
    text = str(ValidationError(problems))
    assert text.startswith("5 problem(s) in the input:")


def test_other_row_problems(tmp_path):
    header = HEADER + ",state,fasted,haemolysis,lipaemia,icterus,replicate,birth_date"
    rows = [
        "Rex,dog,S1,2024-03-05,creatinine,100,umol/L,happy,,,,,,",
        "Rex,dog,S2,2024-03-06,creatinine,100,umol/L,,maybe,,,,,",
        "Rex,dog,S3,2024-03-07,creatinine,100,umol/L,,,-2,,,,",
        "Rex,dog,S4,2024-03-08,creatinine,100,umol/L,,,,lots,,,",
        "Rex,dog,S5,2024-03-09,creatinine,100,umol/L,,,,,,1.5,",
        "Rex,dog,S6,2024-03-10,creatinine,100,umol/L,,,,,,,2024-04-01",
        "Rex,doge,S7,2024-03-11,creatinine,100,umol/L,,,,,,,",
    ]
    problems = problems_of(write(tmp_path, "\n".join([header, *rows]) + "\n"))
    assert [(p.row, p.column) for p in problems] == [
        (2, "state"), (3, "fasted"), (4, "haemolysis"), (5, "lipaemia"), (6, "replicate"),
        (7, "birth_date"), (8, "species")]
    assert problems[-1].hint == "did you mean 'dog'?"


def test_misspelt_column_is_refused_unrelated_column_ignored(tmp_path):
    path = write(tmp_path, "patient,species,specimn,collected_at,analyte,value,unit,owner\n"
                           "Rex,dog,S1,2024-03-05,creatinine,100,umol/L,Jane Example\n")
    (p,) = problems_of(path)
    assert (p.row, p.column) == (1, "specimn")
    assert p.hint == "did you mean 'specimen'?"
    ok = write(tmp_path, good_csv(header=HEADER + ",owner").replace("umol/L\n", "umol/L,x\n"),
               name="ok.csv")
    frame = bio.read_results(ok, now=NOW)
    assert "owner" not in frame.columns
    assert any("'owner'" in n and "ignored" in n for n in frame.attrs["notes"])


# --------------------------------------------------------------------------- acceptance: reading


def test_semicolon_file_with_decimal_comma_and_synonyms(tmp_path):
    text = ("Patient ID;Species;Sample ID;Date;Test;Result;Units;Analyser\n"
            "Rex;Canine;S1;05/03/2024;CREA;1,2;mg/dL;Chem A\n"
            "Rex;Canine;S1;05/03/2024;ALKP;40;IU/L;Chem A\n")
    frame = bio.read_results(write(tmp_path, text), now=NOW)
    assert list(frame["analyte"]) == ["alp", "creatinine"]
    assert list(frame["species"]) == ["dog", "dog"]
    # creatinine 1.2 mg/dL x 88.4 = 106.08 umol/L (UCSF lab manual factor)
    assert frame.loc[frame.analyte == "creatinine", "value"].item() == pytest.approx(106.08)
    # day first: 05/03/2024 is 5 March 2024
    assert frame["collected_at"].iloc[0] == pd.Timestamp("2024-03-05")
    assert frame["method"].iloc[0] == "Chem A"


@pytest.mark.parametrize("delim", ["\t", "|"])
def test_tab_and_pipe_files(tmp_path, delim):
    text = good_csv().replace(",", delim)
    frame = bio.read_results(write(tmp_path, text, name="r.txt"), now=NOW)
    assert len(frame) == 3


def test_latin1_file_with_micro_sign(tmp_path):
    text = good_csv(["Tom,cat,S9,2024-05-05,creatinine,150,µmol/L"])
    path = write(tmp_path, text, encoding="latin-1")
    assert "µ".encode("latin-1") in path.read_bytes()  # really Latin-1 (0xB5), not UTF-8
    frame = bio.read_results(path, now=NOW)
    row = frame[frame.specimen == "S9"].iloc[0]
    assert row["reported_unit"] == "µmol/L"
    assert row["unit"] == "umol/L" and row["value"] == 150.0


def test_utf8_bom_file(tmp_path):
    path = write(tmp_path, good_csv(), encoding="utf-8-sig")
    assert path.read_bytes().startswith(b"\xef\xbb\xbf")
    frame = bio.read_results(path, now=NOW)
    assert list(frame["patient"].unique()) == ["Rex"]  # first column name not spoilt by the BOM


@pytest.mark.parametrize("text,value,censor", [("<10", 10.0, "left"), ("< 10", 10.0, "left"),
                                               ("<=10", 10.0, "left"), (">2000", 2000.0, "right"),
                                               (">= 2000", 2000.0, "right"), ("10", 10.0, "")])
def test_censored_values(tmp_path, text, value, censor):
    path = write(tmp_path, good_csv([f"Rex,dog,S3,2024-05-05,alt,{text},U/L"]))
    row = bio.read_results(path, now=NOW).query("specimen == 'S3'").iloc[0]
    assert row["value"] == value and row["censor"] == censor and row["reported_value"] == text


def test_conventional_units_converted(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05,creatinine,1.2,mg/dL",
                                     "Rex,dog,S3,2024-05-05,BUN,20,mg/dL",
                                     "Rex,dog,S4,2024-05-06,urea,20,mg/dL",
                                     "Rex,dog,S3,2024-05-05,PCV,45,%"]))
    frame = bio.read_results(path, now=NOW).set_index(["specimen", "analyte", "reported_value"])
    # creatinine 1.2 mg/dL x 88.4 = 106.08 umol/L (UCSF lab manual, per the project's units table)
    assert frame.loc[("S3", "creatinine", "1.2"), "value"] == pytest.approx(106.08)
    assert frame.loc[("S3", "creatinine", "1.2"), "unit"] == "umol/L"
    # BUN 20 mg/dL x 0.357 = 7.14 mmol/L urea (IASRI table), not x 0.714 (N atoms)
    assert frame.loc[("S3", "urea", "20"), "value"] == pytest.approx(7.14)
    # urea reported as urea: 20 mg/dL x 0.1665 = 3.33 mmol/L (IASRI table)
    assert frame.loc[("S4", "urea", "20"), "value"] == pytest.approx(3.33)
    # haematocrit 45 % = 0.45 L/L (definition of percent)
    assert frame.loc[("S3", "haematocrit", "45"), "value"] == pytest.approx(0.45)


def test_xlsx_read(tmp_path):
    from openpyxl import Workbook

    wb = Workbook()
    ws = wb.active
    ws.append(["Patient", "Species", "Specimen", "Collected", "Analyte", "Result", "Unit", "Fasted"])
    ws.append(["Rex", "dog", "S1", pd.Timestamp("2024-03-05 09:30").to_pydatetime(), "ALT", 40, "U/L",
               True])
    ws.append([1001, "cat", "S2", "05/03/2024", "Creatinine", 1.2, "mg/dL", "no"])
    path = tmp_path / "results.xlsx"
    wb.save(path)
    frame = bio.read_results(path, now=NOW).set_index("specimen")
    assert frame.loc["S1", "collected_at"] == pd.Timestamp("2024-03-05 09:30")
    assert frame.loc["S1", "value"] == 40.0 and bool(frame.loc["S1", "fasted"]) is True
    assert frame.loc["S2", "patient"] == "1001"  # a numeric id cell stays an id
    assert frame.loc["S2", "value"] == pytest.approx(1.2 * 88.4)  # UCSF factor
    assert frame.loc["S2", "source_row"] == 3


def test_validate_does_not_mutate_input():
    raw = pd.DataFrame({
        "Patient ID": ["Rex", "Rex"], "species": ["Canine", "dog"], "specimen": ["S2", "S1"],
        "date": ["2024-04-05", "2024-03-05"], "analyte": ["CREA", "alt"],
        "value": ["1.2", "<10"], "unit": ["mg/dL", "U/L"],
    })
    before = raw.copy(deep=True)
    frame = validate(raw, now=NOW)
    pd.testing.assert_frame_equal(raw, before)
    assert list(frame["specimen"]) == ["S1", "S2"]  # sorted by collection time
    assert list(frame["source_row"]) == [3, 2]


# --------------------------------------------------------------------------- contract details


def test_canonical_dtypes_and_order(tmp_path):
    frame = bio.read_results(write(tmp_path, good_csv()), now=NOW)
    assert tuple(frame.columns) == CANONICAL_COLUMNS
    dtypes = {c: str(t) for c, t in frame.dtypes.items()}
    assert dtypes["patient"] == dtypes["unit"] == dtypes["state"] == "string"
    assert dtypes["collected_at"] == dtypes["birth_date"] == "datetime64[ns]"
    assert dtypes["value"] == "float64" and dtypes["haemolysis"] == "float64"
    assert dtypes["replicate"] == dtypes["source_row"] == "Int64"
    assert dtypes["fasted"] == "boolean"
    assert list(frame["replicate"]) == [1, 1, 1]
    assert list(frame["state"]) == ["", "", ""]
    keys = frame[["patient", "collected_at", "specimen", "analyte", "replicate"]]
    pd.testing.assert_frame_equal(keys, keys.sort_values(list(keys.columns)))


def test_optional_columns_parsed(tmp_path):
    header = HEADER + ",breed,sex,birth_date,state,fasted,hemolysis,lipemia,icterus,replicate"
    rows = ["Rex,dog,S1,2024-03-05,alt,40,U/L, Border  Collie ,FS,2019-06-01,sick,y,12,0,1,2",
            "Rex,dog,S1,2024-03-05,alt,42,U/L,border collie,FS,2019-06-01,sick,y,12,0,1,1"]
    frame = bio.read_results(write(tmp_path, "\n".join([header, *rows]) + "\n"), now=NOW)
    first = frame.iloc[0]
    assert first["breed"] == "border collie" and first["sex"] == "female_neutered"
    assert first["state"] == "unwell" and bool(first["fasted"]) is True
    assert first["haemolysis"] == 12.0 and first["icterus"] == 1.0
    assert list(frame["replicate"]) == [1, 2] and list(frame["value"]) == [42.0, 40.0]
    assert first["birth_date"] == pd.Timestamp("2019-06-01")


def test_round_trip_through_tidy_csv(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05T10:15,BUN,20,mg/dL",
                                     "Rex,dog,S3,2024-05-05T10:15,alt,<10,IU/L"]))
    frame = bio.read_results(path, now=NOW)
    out = bio.to_tidy_csv(frame, tmp_path / "tidy.csv")
    again = bio.read_results(out, now=NOW)
    cols = [c for c in CANONICAL_COLUMNS if c not in ("source_file", "source_row")]
    pd.testing.assert_frame_equal(again[cols], frame[cols])
    assert set(again["source_file"]) == {"tidy.csv"}


def test_parser_error_names_row(tmp_path):
    path = write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05,alt,40,U/L,extra"]))
    (p,) = problems_of(path)
    assert p.row == 5


def test_blank_lines_keep_spreadsheet_rows(tmp_path):
    text = HEADER + "\n" + GOOD_ROWS[0] + "\n\n,,,,,,\n" + "Rex,dog,S3,2024-05-05,alt,x,U/L\n"
    (p,) = problems_of(write(tmp_path, text))
    assert p.row == 5  # header 1, data 2, blank 3, empty cells 4, bad row 5


def test_file_not_found(tmp_path):
    with pytest.raises(ValidationError) as exc:
        bio.read_results(tmp_path / "nope.csv")
    assert "file not found" in str(exc.value)
