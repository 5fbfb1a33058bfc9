"""Robustness of the tabular reader and of validation (issues 11 and 21).

Every animal, id and value below is invented for these tests. Outside references named beside
the checks: conversion factors are the registry's published ones (creatinine mg/dL x 88.4,
UCSF lab manual test 265); the CSV-injection characters (=, +, -, @, tab, carriage return) are
the OWASP "CSV Injection" guidance; the horse creatine kinase of 381,790 U/L is the highest
value reported by Wilberger et al., Equine Vet J 2015;47:165-170 (exertional rhabdomyolysis in
endurance horses); Unicode code points and names are checked against Python's unicodedata.

The property tests use hypothesis (derandomized, bounded): any bytes given to the reader give a
canonical frame or a ValidationError, and a valid frame written as CSV (every supported
delimiter, encoding and decimal mark) reads back as the same frame.
"""
from __future__ import annotations

import codecs
import csv
import io
import math
import tempfile
import tomllib
import unicodedata
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bayesbase import io as bio
from bayesbase import units
from bayesbase.contract import CANONICAL_COLUMNS
from bayesbase.errors import ValidationError
from bayesbase.validate import validate

NOW = "2024-06-01T00:00:00"
HEADER = "patient,species,specimen,collected_at,analyte,value,unit"
GOOD_ROWS = [
    "Rex,dog,S1,2024-03-05,creatinine,100,umol/L",
    "Rex,dog,S1,2024-03-05,alt,40,U/L",
    "Rex,dog,S2,2024-04-05,creatinine,110,umol/L",
]


def write(tmp_path, text, name="results.csv", encoding="utf-8"):
    path = tmp_path / name
    path.write_bytes(text.encode(encoding) if isinstance(text, str) else text)
    return path


def good_csv(extra_rows=()):
    return "\n".join([HEADER, *GOOD_ROWS, *extra_rows]) + "\n"


def load(path):
    """load_results with every warning turned into an error (no warning may reach a user)."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return bio.read_results(path, now=NOW)


def problems_of(path):
    with pytest.raises(ValidationError) as exc:
        load(path)
    return exc.value.problems


def _is_invisible(ch: str) -> bool:
    return unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp")


def assert_no_invisible(text: str) -> None:
    bad = [f"U+{ord(c):04X}" for c in text if _is_invisible(c)]
    assert not bad, f"invisible/control characters {bad} in {text!r}"


# =========================================================================== A: plausibility


def _registry_toml() -> dict:
    with open(units._registry_path(), "rb") as fh:
        return tomllib.load(fh)


@pytest.mark.parametrize("analyte,value,unit", [
    ("creatinine", "1e308", "mg/dL"),  # 1e308 x 88.4 overflows to inf
    ("alt", "1e300", "U/L"),
    ("alt", "1e-300", "U/L"),
    ("alt", "4.9e-324", "U/L"),  # the smallest subnormal double
    ("creatinine", ">1e308", "mg/dL"),
    ("haematocrit", "45", "L/L"),  # a percentage labelled as a volume fraction (max 1 L/L)
])
def test_values_outside_the_plausible_envelope_are_refused(tmp_path, analyte, value, unit):
    path = write(tmp_path, good_csv([f"Rex,dog,S3,2024-05-05,{analyte},{value},{unit}"]))
    (p,) = problems_of(path)
    assert (p.file, p.row, p.column) == ("results.csv", 5, "value")
    env = units.plausible_range(analyte)
    canon = units.canonical_unit(analyte)
    assert "outside the plausible range" in p.message
    assert f"{env['min']:g}" in p.message and f"{env['max']:g}" in p.message and canon in p.message
    for text in (p.message, p.hint or ""):
        assert "inf" not in text.lower().replace("info", "")  # never shows a non-finite number


def test_envelope_edges_are_accepted_and_beyond_refused(tmp_path):
    env = units.plausible_range("creatinine")
    lo, hi = env["min"], env["max"]
    ok = write(tmp_path, good_csv([f"Rex,dog,S3,2024-05-05,creatinine,{lo!r},umol/L",
                                   f"Rex,dog,S4,2024-05-06,creatinine,{hi!r},umol/L"]), "ok.csv")
    frame = load(ok)
    assert set(frame["value"]) >= {lo, hi}
    bad = write(tmp_path, good_csv([f"Rex,dog,S3,2024-05-05,creatinine,{lo * 0.999!r},umol/L",
                                    f"Rex,dog,S4,2024-05-06,creatinine,{hi * 1.001!r},umol/L"]),
                "bad.csv")
    assert [(p.row, p.column) for p in problems_of(bad)] == [(5, "value"), (6, "value")]


def test_envelope_applies_after_conversion(tmp_path):
    # creatinine max in umol/L divided by the published 88.4 (UCSF) is the largest mg/dL accepted
    hi = units.plausible_range("creatinine")["max"]
    ok = write(tmp_path, good_csv([f"Rex,dog,S3,2024-05-05,creatinine,{hi / 88.4 * 0.99!r},mg/dL"]))
    assert load(ok)["value"].max() == pytest.approx(hi * 0.99)
    bad = write(tmp_path, good_csv([f"Rex,dog,S3,2024-05-05,creatinine,{hi / 88.4 * 1.01!r},mg/dL"]),
                "bad.csv")
    (p,) = problems_of(bad)
    assert "mg/dL" in p.message  # the range is also given in the unit as reported


def test_highest_published_horse_ck_is_accepted(tmp_path):
    # 381,790 U/L: Wilberger et al., Equine Vet J 2015;47:165 (exertional rhabdomyolysis)
    path = write(tmp_path, good_csv(["Bella,horse,H1,2024-05-05,CK,381790,U/L"]))
    assert load(path).query("patient == 'Bella'")["value"].item() == 381790.0


def test_every_analyte_has_a_cited_envelope_wider_than_every_pack_interval():
    from bayesbase import priors

    raw = _registry_toml()["analytes"]
    for aid in units.analyte_ids():
        env = units.plausible_range(aid)
        entry = raw[aid]["plausible"]
        assert set(entry) <= {"min", "max", "source", "provenance", "note"}
        assert entry["source"].strip() and entry["provenance"].strip()
        assert 0 < env["min"] < env["max"] and math.isfinite(env["max"])
        assert env["min"] == entry["min"] and env["max"] == entry["max"]
    for name in priors.available_packs():
        pack = priors.load_pack(name)
        for aid, pr in pack.analytes.items():
            env = units.plausible_range(aid)
            assert pr.unit == units.canonical_unit(aid)
            # a wide envelope: at least 2x below the lowest and 1.5x above the highest
            # population reference limit of the pack (haematocrit is capped at 1 L/L)
            assert env["min"] <= pr.ri_lower / 2, (name, aid)
            assert env["max"] >= pr.ri_upper * 1.5, (name, aid)


def _registry_with(monkeypatch, tmp_path, edit):
    text = units._registry_path().read_text(encoding="utf-8")
    path = tmp_path / "analytes.toml"
    path.write_text(edit(text), encoding="utf-8")
    monkeypatch.setattr(units, "_registry_path", lambda: path)
    units._registry.cache_clear()


@pytest.mark.parametrize("bad,needle", [
    ('plausible = { min = 1.0, max = 20000.0, source = "x", provenance = "y", colour = 1 }',
     "colour"),
    ('plausible = { min = 1.0, max = 20000.0, provenance = "y" }', "source"),
    ('plausible = { min = 30000.0, max = 20000.0, source = "x", provenance = "y" }', "min < max"),
    ('plausible = { min = 0.0, max = 20000.0, source = "x", provenance = "y" }', "min < max"),
])
def test_registry_schema_refuses_a_bad_envelope(monkeypatch, tmp_path, bad, needle):
    def edit(text):
        start = text.index("[analytes.creatinine]")
        i = text.index("plausible = ", start)
        j = text.index("\n", i)
        return text[:i] + bad + text[j:]

    try:
        _registry_with(monkeypatch, tmp_path, edit)
        with pytest.raises(units.RegistryError, match="creatinine.plausible") as exc:
            units.analyte_ids()
        assert needle in str(exc.value)
    finally:
        monkeypatch.undo()
        units._registry.cache_clear()


# =========================================================================== B: columns, BOM


@pytest.mark.parametrize("first,second", [
    ("unit", "units"), ("collected_at", "date"), ("value", "result"), ("specimen", "sample"),
    ("patient", "patient_id"), ("patient", "Patient"),
])
def test_two_columns_meaning_the_same_are_a_problem_not_a_crash(tmp_path, first, second):
    cols = HEADER.split(",")
    cells = GOOD_ROWS[0].split(",")
    i = cols.index(first)
    header = ",".join(cols + [second])
    path = write(tmp_path, header + "\n" + ",".join(cells + [cells[i]]) + "\n")
    problems = problems_of(path)
    dup = [p for p in problems if "duplicates column" in p.message]
    assert len(dup) == 1 and dup[0].row == 1 and dup[0].column == second
    assert f"column '{first}'" in dup[0].message


def test_utf8_bom_then_cp1252_bytes_read_with_a_note(tmp_path):
    body = good_csv(["René,cat,S9,2024-05-05,creatinine,150,µmol/L"]).encode("cp1252")
    path = write(tmp_path, b"\xef\xbb\xbf" + body)
    frame = load(path)
    assert "René" in set(frame["patient"])
    assert frame.query("specimen == 'S9'")["unit"].item() == "umol/L"
    assert any("byte-order mark" in n and "cp1252" in n for n in frame.attrs["notes"])


# =========================================================================== C: look-alikes


@pytest.mark.parametrize("text,name", [
    ("\u0664\u0665", "ARABIC-INDIC DIGIT FOUR"),
    ("\uff14\uff15", "FULLWIDTH DIGIT FOUR"),
    ("\U0001d7d2\U0001d7d3", "MATHEMATICAL BOLD DIGIT FOUR"),
    ("4\u06f5", "EXTENDED ARABIC-INDIC DIGIT FIVE"),
])
def test_look_alike_digits_are_refused_with_a_hint(tmp_path, text, name):
    assert unicodedata.name(text[-1]).startswith(name.rsplit(" ", 1)[0])
    path = write(tmp_path, good_csv([f"Rex,dog,S3,2024-05-05,alt,{text},U/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (5, "value")
    assert name.rsplit(" ", 1)[0] in p.message
    assert "0-9" in p.hint


@pytest.mark.parametrize("column,cell", [("replicate", "\uff12"), ("haemolysis", "\u0661\u0660")])
def test_look_alike_digits_refused_in_other_number_columns(tmp_path, column, cell):
    rows = [r + "," for r in GOOD_ROWS] + [f"Rex,dog,S3,2024-05-05,alt,40,U/L,{cell}"]
    path = write(tmp_path, "\n".join([HEADER + f",{column}", *rows]) + "\n")
    (p,) = [p for p in problems_of(path) if p.column == column]
    assert p.row == 5 and "digit" in p.message


@pytest.mark.parametrize("date", ["0001-01-01", "1899-12-31", "1000-06-15T10:00"])
def test_dates_before_1900_are_not_called_future(tmp_path, date):
    (p,) = problems_of(write(tmp_path, good_csv([f"Rex,dog,S3,{date},alt,40,U/L"])))
    assert (p.row, p.column) == (5, "collected_at")
    assert "before 1900: not a plausible collection date" in p.message
    assert "future" not in p.message


def test_year_9999_is_in_the_future(tmp_path):
    (p,) = problems_of(write(tmp_path, good_csv(["Rex,dog,S3,9999-12-31,alt,40,U/L"])))
    assert "in the future" in p.message


@pytest.mark.parametrize("date", ["2024-03", "2024", "2024-3"])
def test_partial_collection_dates_are_refused(tmp_path, date):
    (p,) = problems_of(write(tmp_path, good_csv([f"Rex,dog,S3,{date},alt,40,U/L"])))
    assert (p.row, p.column) == (5, "collected_at")
    assert "partial date" in p.message and "day" in p.hint


def test_partial_birth_date_is_refused(tmp_path):
    header = HEADER + ",birth_date"
    rows = [r + ",2019-06-01" for r in GOOD_ROWS] + ["Rex,dog,S3,2024-05-05,alt,40,U/L,2019"]
    problems = problems_of(write(tmp_path, "\n".join([header, *rows]) + "\n"))
    assert [(p.row, p.column) for p in problems] == [(5, "birth_date")]
    assert "partial date" in problems[0].message


@pytest.mark.parametrize("column", ["patient", "specimen"])
@pytest.mark.parametrize("char", ["\u202e", "\x00", "\u200d", "\ufeff", "\u200b", "\x07"])
def test_invisible_characters_inside_ids_are_refused(tmp_path, column, char):
    row = {"patient": f"Re{char}x", "specimen": f"S{char}3"}
    line = f"{row['patient'] if column == 'patient' else 'Rex'},dog," \
           f"{row['specimen'] if column == 'specimen' else 'S3'},2024-05-05,alt,40,U/L"
    problems = problems_of(write(tmp_path, good_csv([line])))
    mine = [p for p in problems if p.column == column]
    assert mine and mine[0].row == 5
    assert f"U+{ord(char):04X}" in mine[0].message
    for p in problems:  # the message shows the code point, never the raw character
        assert_no_invisible(str(p))


def test_ansi_escapes_stripped_from_free_text_and_never_echoed(tmp_path):
    header = HEADER + ",breed,method"
    rows = [r + ",beagle,Chem A" for r in GOOD_ROWS] + [
        "Rex,dog,S3,2024-05-05,alt,40,U/L,\x1b[31mbeagle\x1b[0m,Chem\x1b[2J A\x07"]
    frame = load(write(tmp_path, "\n".join([header, *rows]) + "\n"))
    s3 = frame.query("specimen == 'S3'").iloc[0]
    assert s3["breed"] == "beagle" and s3["method"] == "Chem A"
    for col in ("patient", "specimen", "breed", "method", "reported_value", "reported_unit"):
        for v in frame[col].dropna():
            assert_no_invisible(v)
    assert any("control character" in n for n in frame.attrs["notes"])
    # a control character in a field that is looked up is reported, escaped
    bad = write(tmp_path, good_csv(["Rex,\x1b[31mdog,S3,2024-05-05,alt,40,U/L"]), "bad.csv")
    (p,) = problems_of(bad)
    assert p.column == "species" and "U+001B" in p.message
    assert_no_invisible(str(p))


@pytest.mark.parametrize("argv,dest", [
    (["history", "--db", "s.sqlite", "--", "-REX-1"], "patient"),
    (["forget", "--db", "s.sqlite", "--", "-REX-1"], "patient"),
    (["export", "--out", "o.csv", "--patient=-REX-1"], "patient"),
])
def test_ids_beginning_with_a_dash_are_documented_and_parse(argv, dest, capsys):
    from bayesbase import cli

    ap = cli.build_parser()
    assert getattr(ap.parse_args(argv), dest) == "-REX-1"
    with pytest.raises(SystemExit):
        ap.parse_args([argv[0], "--help"])
    out = capsys.readouterr().out
    documented = "-- -REX-1" if argv[0] != "export" else "--patient=-REX-1"
    assert documented in " ".join(out.split())


# =========================================================================== D: reading


@pytest.mark.parametrize("lead", ["\n\n", "\r\n\r\n\r\n", ",,,,,,\n\n", "  \n\t\n"])
def test_leading_and_trailing_blank_lines_are_skipped(tmp_path, lead):
    text = lead + good_csv() + "\n\n,,,,,,\n  \n , ,\t\n\n"
    frame = load(write(tmp_path, text))
    assert len(frame) == 3
    n_lead = lead.count("\n")
    # row numbers stay the lines a user sees: first data line is line n_lead + 2
    assert sorted(frame["source_row"]) == [n_lead + 2, n_lead + 3, n_lead + 4]


def test_leading_blank_lines_keep_row_numbers_in_problems(tmp_path):
    text = "\n\n" + good_csv(["Rex,dog,S3,2024-05-05,alt,x,U/L"])
    (p,) = problems_of(write(tmp_path, text))
    assert p.row == 7  # 2 blank lines, header on line 3, bad row on line 7
    text = "\n\npatient,species,specimen,collected_at,analyte,value\nRex,dog,S1,2024-03-05,alt,4\n"
    (p,) = problems_of(write(tmp_path, text, "nounit.csv"))
    assert (p.row, p.column) == (3, "unit")  # the header's own line


@pytest.mark.parametrize("text", ["\n\n\n", " \n\t\n", ",,,\n;;\n"])
def test_only_blank_lines_is_the_empty_file_message(tmp_path, text):
    (p,) = problems_of(write(tmp_path, text))
    assert "the file is empty" in p.message


@pytest.mark.parametrize("encoding", ["utf-16-le", "utf-16-be"])
def test_utf16_without_bom_is_detected(tmp_path, encoding):
    text = good_csv(["Tom,cat,S9,2024-05-05,creatinine,150,µmol/L"])
    path = write(tmp_path, text, encoding=encoding)
    assert not path.read_bytes().startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE))
    frame = load(path)
    assert len(frame) == 4 and frame.query("specimen == 'S9'")["value"].item() == 150.0
    assert any("UTF-16" in n for n in frame.attrs["notes"])


@pytest.mark.parametrize("encoding,bom", [("utf-32", True), ("utf-32-le", False),
                                          ("utf-32-be", False)])
def test_utf32_is_read_with_or_without_bom(tmp_path, encoding, bom):
    # Unicode standard: UTF-32 LE's byte-order mark FF FE 00 00 begins with UTF-16 LE's FF FE,
    # so UTF-32 is recognised first; without a mark, by three zero bytes per ASCII character
    text = good_csv(["Tom,cat,S9,2024-05-05,creatinine,150,\u00b5mol/L"])
    path = write(tmp_path, text, encoding=encoding)
    assert path.read_bytes().startswith((codecs.BOM_UTF32_LE, codecs.BOM_UTF32_BE)) == bom
    frame = load(path)
    assert frame.query("specimen == 'S9'")["value"].item() == 150.0
    assert frame.query("specimen == 'S9'")["reported_unit"].item() == "\u00b5mol/L"


@pytest.mark.parametrize("encoding,cut,needle", [
    ("utf-16-le", 1, "looks like"), ("utf-16-be", 1, "looks like"),
    ("utf-16", 1, "byte-order mark"), ("utf-32", 2, "byte-order mark")])
def test_wide_text_cut_mid_character_is_a_plain_problem(tmp_path, encoding, cut, needle):
    # a UTF-16/UTF-32 file cut off inside its last character (an odd number of bytes) was
    # read as single bytes, giving columns named 'p<U+0000>a<U+0000>t...'
    data = good_csv().encode(encoding)[:-cut]
    for read in (bio.read_results, lambda p: bio.read_results_chunked(p, chunksize=2)):
        with pytest.raises(ValidationError) as exc:
            read(write(tmp_path, data))
        (p,) = exc.value.problems
        assert p.file == "results.csv" and needle in p.message and "not valid UTF" in p.message
        assert "UTF-8" in p.hint


def test_formula_like_text_values_are_noted(tmp_path):
    header = HEADER + ",breed,method"
    rows = [
        "=HYPERLINK(\"x\"),dog,S1,2024-03-05,alt,40,U/L,beagle,Chem A",
        "Rex,dog,+S2,2024-03-06,alt,+41,U/L,@cmd,Chem A",
        "Rex,dog,S3,2024-03-07,alt,42,U/L,beagle,-2+3",
        "Rex,dog,S4,2024-03-08,alt,43,U/L,beagle,Chem A",
    ]
    frame = load(write(tmp_path, "\n".join([header, *rows]) + "\n"))
    notes = [n for n in frame.attrs["notes"] if "formula" in n]
    assert len(notes) == 4, frame.attrs["notes"]  # patient, specimen, breed, method
    text = " ".join(notes)
    assert "row 2" in text and "row 3" in text and "row 4" in text
    assert "'patient'" in text and "'specimen'" in text and "'breed'" in text and "'method'" in text
    clean = load(write(tmp_path, good_csv(["Rex,dog,S3,2024-05-05,alt,+40,U/L"]), "clean.csv"))
    assert not [n for n in clean.attrs["notes"] if "formula" in n]  # '+40' is a number


def test_same_specimen_id_under_two_patients_is_valid(tmp_path):
    path = write(tmp_path, good_csv(["Tom,cat,S1,2024-03-06,alt,30,U/L",
                                     "Tom,cat,S2,2024-04-07,alt,35,U/L"]))
    frame = load(path)
    assert sorted(frame.loc[frame.patient == "Tom", "specimen"]) == ["S1", "S2"]
    assert frame.loc[frame.patient == "Tom", "collected_at"].min() == pd.Timestamp("2024-03-06")


def test_one_specimen_of_one_patient_still_has_one_collection_time(tmp_path):
    path = write(tmp_path, good_csv(["Tom,cat,S1,2024-03-06,alt,30,U/L",
                                     "Tom,cat,S1,2024-03-07,ast,35,U/L"]))
    (p,) = problems_of(path)
    assert (p.row, p.column) == (6, "collected_at")
    assert "specimen 'S1' of patient 'Tom'" in p.message


def test_duplicates_are_keyed_by_patient_and_specimen(tmp_path):
    # the same specimen id, analyte and replicate under two patients is not a duplicate
    path = write(tmp_path, good_csv(["Tom,cat,S1,2024-03-05,alt,99,U/L"]))
    frame = load(path)
    assert frame.attrs["n_duplicates_dropped"] == 0 and len(frame) == 4


def test_assess_keys_specimens_by_patient(tmp_path):
    """Two animals numbering their draws S1, S2, S3 get the same answers as each alone."""
    from bayesbase.assessment import assess

    def rows(pid, vals):
        return [f"{pid},dog,S{i + 1},2024-0{i + 1}-10,creatinine,{v},umol/L"
                for i, v in enumerate(vals)]

    a, b = rows("Ace", [90, 95, 120]), rows("Bo", [70, 72, 71])
    both = load(write(tmp_path, "\n".join([HEADER, *a, *b]) + "\n", "both.csv"))
    alone_a = load(write(tmp_path, "\n".join([HEADER, *a]) + "\n", "a.csv"))
    alone_b = load(write(tmp_path, "\n".join([HEADER, *b]) + "\n", "b.csv"))
    t_both = assess(both, engine="exact", seed=1).table.set_index("patient")
    for alone in (alone_a, alone_b):
        t1 = assess(alone, engine="exact", seed=1).table.set_index("patient")
        pid = t1.index[0]
        for col in ("specimen", "n_baseline", "baseline_specimens", "set_point_mean", "p_change"):
            assert t_both.loc[pid, col] == pytest.approx(t1.loc[pid, col]) \
                if isinstance(t1.loc[pid, col], float) else t_both.loc[pid, col] == t1.loc[pid, col]
    assert t_both.loc["Ace", "baseline_specimens"] == "S1;S2"
    assert t_both.loc["Ace", "n_baseline"] == 2


# =========================================================================== E: properties

VALID_BYTES = good_csv(["Tom,cat,T1,2024-05-05,creatinine,1.5,mg/dL",
                        "Tom,cat,T1,2024-05-05,alt,<10,U/L"]).encode("utf-8")


def _check_frame(frame: pd.DataFrame) -> None:
    assert tuple(frame.columns) == CANONICAL_COLUMNS
    v = frame["value"].to_numpy(dtype=float)
    assert np.isfinite(v).all() and (v > 0).all()
    for col in ("patient", "specimen"):
        for s in frame[col]:
            assert s and s == s.strip()
            assert_no_invisible(s)


def _read_bytes(blob: bytes, suffix: str = ".csv"):
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / f"fuzz{suffix}"
        path.write_bytes(blob)
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            try:
                frame = bio.read_results(path, now=NOW)
            except ValidationError as exc:
                assert exc.problems and all(p.file == path.name for p in exc.problems)
                for p in exc.problems:
                    assert_no_invisible(str(p))
                return None
    _check_frame(frame)
    return frame


@st.composite
def mutated_file(draw):
    """A valid file with a few byte-level edits (insert, delete, replace, truncate, splice)."""
    blob = bytearray(draw(st.sampled_from([
        VALID_BYTES, VALID_BYTES.decode().encode("utf-16"), b"\xef\xbb\xbf" + VALID_BYTES,
        VALID_BYTES.replace(b",", b";"), VALID_BYTES.decode().encode("utf-16-le")])))
    tokens = [b"1e308", b"1e400", b"NaN", b"inf", b"-0", b"\x00", b"\r", b"\n", b'"', b",", b";",
              b"\xef\xbb\xbf", b"\xff\xfe", "\u0665".encode(), "\u202e".encode(), b"0000-00-00",
              b"9999-12-31", b"2023-02-29", b"=cmd", b"\x1b[31m", b"\x80\x81", b"2025-09",
              b"units", b"Patient"]
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["insert", "delete", "replace", "truncate", "token"]))
        pos = draw(st.integers(0, max(len(blob) - 1, 0)))
        if kind == "insert":
            blob[pos:pos] = draw(st.binary(min_size=1, max_size=4))
        elif kind == "delete":
            del blob[pos:pos + draw(st.integers(1, 8))]
        elif kind == "replace" and blob:
            blob[pos] = draw(st.integers(0, 255))
        elif kind == "truncate":
            del blob[pos:]
        else:
            blob[pos:pos] = draw(st.sampled_from(tokens))
    return bytes(blob)


@settings(max_examples=200, derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(st.one_of(st.binary(max_size=400), mutated_file(),
                 st.text(max_size=200).map(lambda t: (HEADER + "\n" + t).encode("utf-8"))))
def test_any_bytes_give_a_frame_or_a_validation_error(blob):
    _read_bytes(blob)


# -- round trip


_ID_ALPHABET = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789 -_/.éü"
_ENCODINGS = ["utf-8", "utf-8-sig", "utf-16", "utf-16-le", "utf-16-be", "cp1252"]


def _ident(draw):
    text = draw(st.text(alphabet=_ID_ALPHABET, min_size=1, max_size=10)).strip()
    return text or "X"


@st.composite
def canonical_frames(draw):
    analytes = units.analyte_ids()
    n_pat = draw(st.integers(1, 3))
    rows = []
    for _ in range(n_pat):
        pid = _ident(draw)
        species = draw(st.sampled_from(["dog", "cat", "horse"]))
        breed = draw(st.sampled_from(["", "beagle", "border collie", "=formula"]))
        for _ in range(draw(st.integers(1, 3))):
            sid = _ident(draw)
            day = draw(st.datetimes(min_value=pd.Timestamp("1990-01-01").to_pydatetime(),
                                    max_value=pd.Timestamp("2024-05-01").to_pydatetime()))
            when = pd.Timestamp(day).floor("s").isoformat()
            for aid in draw(st.lists(st.sampled_from(analytes), min_size=1, max_size=3,
                                     unique=True)):
                env = units.plausible_range(aid)
                logv = draw(st.floats(math.log(env["min"]), math.log(env["max"])))
                value = float(np.clip(float(f"{math.exp(logv):.6g}"), env["min"], env["max"]))
                censor = draw(st.sampled_from(["", "", "", "<", ">"]))
                hil = draw(st.sampled_from(["", "0", "12.5"]))
                rows.append({"patient": pid, "species": species, "breed": breed,
                             "specimen": sid, "collected_at": when, "analyte": aid,
                             "value": f"{censor}{value!r}", "unit": units.canonical_unit(aid),
                             "haemolysis": hil, "fasted": draw(st.sampled_from(["", "yes", "no"])),
                             "state": draw(st.sampled_from(["", "healthy", "unwell"]))})
    raw = pd.DataFrame(rows, dtype=object)
    # one patient id may carry one species only; ids within a patient are unique draws
    raw = raw.drop_duplicates(["patient", "specimen", "analyte"])
    raw["species"] = raw.groupby("patient")["species"].transform("first")
    raw["breed"] = raw.groupby("patient")["breed"].transform("first")
    raw["collected_at"] = raw.groupby(["patient", "specimen"])["collected_at"].transform("first")
    return validate(raw.reset_index(drop=True), source="gen", now=NOW)


def _write_canonical(frame: pd.DataFrame, delimiter: str, decimal: str, encoding: str) -> bytes:
    """A canonical frame as delimited text, written with the standard library's csv module
    (independent of the project's writer), encoded and with the decimal mark asked for."""
    def cell(c, v):
        if v is None or v is pd.NA or v is pd.NaT or (isinstance(v, float) and math.isnan(v)):
            return ""
        if c in ("value", "haemolysis", "lipaemia", "icterus"):
            return repr(float(v)).replace(".", decimal)
        if c == "collected_at":
            return pd.Timestamp(v).strftime("%Y-%m-%dT%H:%M:%S")
        if c == "birth_date":
            return pd.Timestamp(v).strftime("%Y-%m-%d")
        if c == "fasted":
            return "yes" if v else "no"
        return str(v)

    buf = io.StringIO()
    writer = csv.writer(buf, delimiter=delimiter, lineterminator="\n")
    writer.writerow(CANONICAL_COLUMNS)
    cols = [frame[c].tolist() for c in CANONICAL_COLUMNS]
    for row in zip(*cols):
        writer.writerow([cell(c, v) for c, v in zip(CANONICAL_COLUMNS, row)])
    return buf.getvalue().encode(encoding)


def _assert_same(again: pd.DataFrame, frame: pd.DataFrame, skip=("source_file", "source_row")):
    cols = [c for c in CANONICAL_COLUMNS if c not in skip]
    pd.testing.assert_frame_equal(again[cols].reset_index(drop=True),
                                  frame[cols].reset_index(drop=True))


_FIXED = validate(pd.DataFrame({
    "patient": ["Rex", "Rex", "Zoé", "Zoé"], "species": ["dog", "dog", "cat", "cat"],
    "breed": ["border collie", "border collie", "", ""], "specimen": ["S1", "S1", "S1", "S2"],
    "collected_at": ["2024-03-05T09:30:00", "2024-03-05T09:30:00", "2024-03-06", "2024-04-06"],
    "analyte": ["creatinine", "alt", "glucose", "ggt"], "value": ["1.25", "<10", "5.55", ">0.5"],
    "unit": ["mg/dL", "U/L", "mmol/L", "U/L"], "haemolysis": ["", "0.5", "", "12"],
    "fasted": ["yes", "yes", "", "no"], "state": ["", "healthy", "unwell", ""],
    "method": ["Chem A", "Chem A", "", "=1+2"],
}, dtype=object), source="fixed", now=NOW)


@pytest.mark.parametrize("encoding", _ENCODINGS)
@pytest.mark.parametrize("delimiter,decimal", [  # a decimal comma only in files not comma-delimited
    (",", "."), (";", "."), (";", ","), ("\t", "."), ("\t", ","), ("|", "."), ("|", ",")])
def test_fixed_frame_round_trips_in_every_format(delimiter, decimal, encoding):
    again = _read_bytes(_write_canonical(_FIXED, delimiter, decimal, encoding))
    assert again is not None
    _assert_same(again, _FIXED, skip=("source_file", "source_row", "reported_value"))


@pytest.mark.slow
@settings(max_examples=200, derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(canonical_frames(), st.sampled_from([",", ";", "\t", "|"]), st.sampled_from([".", ","]),
       st.sampled_from(_ENCODINGS))
def test_valid_frame_round_trips_through_csv(frame, delimiter, decimal, encoding):
    if delimiter == "," and decimal == ",":
        decimal = "."  # a decimal comma is read only in files not delimited by commas
    blob = _write_canonical(frame, delimiter, decimal, encoding)
    again = _read_bytes(blob)
    assert again is not None
    # reported_value keeps the decimal mark as written; every other column reads back the same
    _assert_same(again, frame, skip=("source_file", "source_row", "reported_value"))


@settings(max_examples=15, derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(canonical_frames())
def test_to_tidy_csv_round_trips(frame):
    with tempfile.TemporaryDirectory() as d:
        path = bio.to_tidy_csv(frame, Path(d) / "tidy.csv")
        again = load(path)
    _assert_same(again, frame)
