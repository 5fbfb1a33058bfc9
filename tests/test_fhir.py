"""FHIR R4 import/export (bayesbase.io.fhir_read, bayesbase.io.fhir_write).

External references: the HL7 FHIR R4 specification (Bundle, Patient with the patient-animal
extension, Observation.valueQuantity with comparator, Specimen.collection.fastingStatus with HL7
v2 table 0916), UCUM codes, LOINC codes and species codes as listed in the project's
interoperability notes (SNOMED CT cat 448169003, dog 448771007; NCBI taxonomy 9615 / 9685 from
memory), and unit factors from published conversion tables (creatinine mg/dL -> umol/L x 88.4,
w3.csmu.edu.tw Int_unit_conversion; urea nitrogen mg/dL -> urea mmol/L x 0.357,
ecoursesonline.iasri.res.in conversion table). Demo data are invented.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pandas.testing as pdt
import pytest

from bayesbase.io import load_bundle, write_bundle
from bayesbase.contract import CANONICAL_COLUMNS
from bayesbase.errors import ValidationError
from bayesbase.store import Store
from bayesbase.testing import synthetic_canonical

ANIMAL = "http://hl7.org/fhir/StructureDefinition/patient-animal"
COMPARED = [c for c in CANONICAL_COLUMNS
            if c not in ("reported_value", "reported_unit", "source_file", "source_row")]


def _patient(pid="rex", species=("http://snomed.info/sct", "448771007"), gender="male",
             status="neutered"):
    ext = [{"url": "species", "valueCodeableConcept": {
        "coding": [{"system": species[0], "code": species[1]}]}}]
    if status:
        ext.append({"url": "genderStatus", "valueCodeableConcept": {
            "coding": [{"system": "http://hl7.org/fhir/animal-genderstatus", "code": status}]}})
    ext.append({"url": "breed", "valueCodeableConcept": {"text": "Beagle"}})
    return {"resourceType": "Patient", "id": pid, "gender": gender, "birthDate": "2015-04-01",
            "extension": [{"url": ANIMAL, "extension": ext}]}


def _obs(oid, loinc=None, text=None, value=1.0, code="mg/dL", comparator=None, subject="rex",
         when="2024-03-05T09:30:00Z", specimen="spec-1", status="final"):
    concept = {}
    if loinc:
        concept["coding"] = [{"system": "http://loinc.org", "code": loinc}]
    if text:
        concept["text"] = text
    vq = {"value": value, "unit": code, "system": "http://unitsofmeasure.org", "code": code}
    if comparator:
        vq["comparator"] = comparator
    res = {"resourceType": "Observation", "id": oid, "status": status, "code": concept,
           "subject": {"reference": f"Patient/{subject}"}, "effectiveDateTime": when,
           "valueQuantity": vq}
    if specimen:
        res["specimen"] = {"reference": f"Specimen/{specimen}"}
    return res


def _bundle(*resources):
    return {"resourceType": "Bundle", "type": "collection",
            "entry": [{"resource": r} for r in resources]}


def _panel():
    return _bundle(
        _patient(),
        _obs("o1", loinc="2160-0", value=1.2, code="mg/dL"),  # creatinine (mass code)
        _obs("o2", loinc="3094-0", value=20, code="mg/dL"),  # urea nitrogen
        _obs("o3", loinc="1742-6", value=10, code="U/L", comparator="<"),  # ALT censored
        _obs("o4", text="Haemolysis index", value=2, code="1"),
        _obs("o5", loinc="1742-6", value=10, code="U/L", status="entered-in-error"),
        _obs("o6", text="GLU", value=5.5, code="mmol/L", specimen=None,
             when="2024-03-06T08:00:00Z"),
    )


def _problems(bundle_or_text):
    with pytest.raises(ValidationError) as err:
        load_bundle(bundle_or_text, source="in.json")
    return err.value.problems


# --------------------------------------------------------------------------------- reading
def test_read_panel_maps_codes_units_and_censoring():
    frame = load_bundle(_panel(), source="panel.json")
    by = {a: frame[frame["analyte"] == a].iloc[0] for a in frame["analyte"]}
    assert set(by) == {"creatinine", "urea", "alt", "glucose"}  # entered-in-error skipped
    # creatinine 1.2 mg/dL x 88.4 = 106.08 umol/L (published factor, see module docstring)
    assert by["creatinine"]["unit"] == "umol/L"
    assert by["creatinine"]["value"] == pytest.approx(1.2 * 88.4, rel=1e-12)
    # urea nitrogen 20 mg/dL x 0.357 = 7.14 mmol/L urea (BUN factor, not urea's 0.1665)
    assert by["urea"]["value"] == pytest.approx(20 * 0.357, rel=1e-12)
    assert by["alt"]["censor"] == "left" and by["alt"]["value"] == 10.0
    assert by["alt"]["reported_value"] == "<10"
    pat = frame.iloc[0]
    assert (pat["patient"], pat["species"], pat["breed"], pat["sex"]) == (
        "rex", "dog", "beagle", "male_neutered")
    assert pat["birth_date"] == pd.Timestamp("2015-04-01")
    # haemolysis index attached to the results of the same specimen only
    assert frame.loc[frame["specimen"] == "spec-1", "haemolysis"].tolist() == [2.0, 2.0, 2.0]
    glu = by["glucose"]
    assert glu["specimen"] == "rex|2024-03-06T08:00:00Z"  # derived: subject|effectiveDateTime
    assert np.isnan(glu["haemolysis"])
    assert glu["collected_at"] == pd.Timestamp("2024-03-06T08:00:00")


@pytest.mark.parametrize("system,code,species", [
    ("http://snomed.info/sct", "448169003", "cat"),
    ("http://www.ncbi.nlm.nih.gov/taxonomy", "9615", "dog"),
    ("http://www.ncbi.nlm.nih.gov/taxonomy", "9685", "cat"),
])
def test_species_codes(system, code, species):
    b = _bundle(_patient(species=(system, code)), _obs("o1", loinc="1742-6", value=30, code="U/L"))
    assert load_bundle(b)["species"].tolist() == [species]


def test_species_as_text_and_offsets_to_utc():
    b = _panel()
    ext = b["entry"][0]["resource"]["extension"][0]["extension"][0]
    ext["valueCodeableConcept"] = {"text": "Felis catus"}
    b["entry"][1]["resource"]["effectiveDateTime"] = "2024-03-05T10:30:00+01:00"
    frame = load_bundle(b)
    assert set(frame["species"]) == {"cat"}
    # ISO 8601: 10:30+01:00 is 09:30 UTC
    cre = frame[frame["analyte"] == "creatinine"].iloc[0]
    assert cre["collected_at"] == pd.Timestamp("2024-03-05T09:30:00")


# --------------------------------------------------------------------------------- errors
def test_not_json():
    (p,) = _problems('{"resourceType": "Bundle", ')
    assert p.file == "in.json" and "not valid JSON" in p.message


def test_not_a_bundle():
    (p,) = _problems(_obs("o1", loinc="1742-6", value=3, code="U/L"))
    assert p.column == "resourceType" and "not a FHIR Bundle" in p.message


def test_bundle_without_observations():
    (p,) = _problems(_bundle(_patient()))
    assert p.column == "Bundle.entry" and "no Observation" in p.message


def test_observation_without_value_quantity():
    b = _panel()
    del b["entry"][2]["resource"]["valueQuantity"]
    b["entry"][2]["resource"]["valueString"] = "high"
    (p,) = _problems(b)
    assert p.column == "Bundle.entry[2].resource(Observation/o2).valueQuantity"
    assert "no valueQuantity" in p.message and "valueString" in p.message


def test_unknown_ucum_code_for_the_analyte():
    b = _panel()
    b["entry"][3]["resource"]["valueQuantity"]["code"] = "mg/dL"  # ALT in mg/dL is impossible
    (p,) = _problems(b)
    assert p.column == "Bundle.entry[3].resource(Observation/o3).valueQuantity.code"
    assert "'mg/dL'" in p.message and "U/L" in (p.hint or "")


def test_patient_without_species():
    b = _panel()
    animal = b["entry"][0]["resource"]["extension"][0]
    animal["extension"] = [e for e in animal["extension"] if e["url"] != "species"]
    (p,) = _problems(b)
    assert p.column == "Bundle.entry[0].resource(Patient/rex).extension(patient-animal).species"
    b2 = _panel()
    del b2["entry"][0]["resource"]["extension"]
    (p2,) = _problems(b2)
    assert p2.column == "Bundle.entry[0].resource(Patient/rex).extension"
    assert "species" in p2.message


def test_subject_not_in_bundle():
    b = _panel()
    b["entry"][1]["resource"]["subject"]["reference"] = "Patient/ghost"
    (p,) = _problems(b)
    assert p.column == "Bundle.entry[1].resource(Observation/o1).subject"
    assert "'Patient/ghost'" in p.message


def test_every_problem_listed_together():
    b = _panel()
    b["entry"][1]["resource"]["subject"]["reference"] = "Patient/ghost"
    b["entry"][3]["resource"]["valueQuantity"]["code"] = "mmol/L"
    problems = _problems(b)
    assert [p.column.rsplit(".", 1)[-1] for p in problems] == ["subject", "code"]


def test_validation_problem_is_pointed_at_the_resource():
    b = _panel()
    b["entry"][1]["resource"]["effectiveDateTime"] = "2999-01-01T00:00:00Z"  # in the future
    (p,) = _problems(b)
    assert p.row is None
    assert p.column.startswith("Bundle.entry[1].resource(Observation/o1)")
    assert "future" in p.message


# --------------------------------------------------------------------------------- writing
def test_write_read_round_trip(tmp_path):
    frame = synthetic_canonical(2, 4, 25)
    frame.loc[0, ["censor", "reported_value"]] = ["left", "<" + frame.loc[0, "reported_value"]]
    frame.loc[1, ["censor", "reported_value"]] = ["right", ">" + frame.loc[1, "reported_value"]]
    frame.loc[frame["specimen"] == frame.loc[5, "specimen"], "state"] = "unwell"
    path = write_bundle(frame, tmp_path / "b.json", pseudonymise=False)
    bundle = json.loads(path.read_text())
    assert bundle["resourceType"] == "Bundle" and bundle["type"] == "collection"
    kinds = pd.Series([e["resource"]["resourceType"] for e in bundle["entry"]]).value_counts()
    assert kinds["Patient"] == 2 and kinds["Specimen"] == 8
    obs = [e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "Observation"
           and "valueQuantity" in e["resource"] and "unit" in e["resource"]["valueQuantity"]]
    assert len(obs) == len(frame)
    assert {o["valueQuantity"]["system"] for o in obs} == {"http://unitsofmeasure.org"}
    codes = {o["code"]["coding"][0]["code"] for o in obs if "coding" in o["code"]}
    assert {"1742-6", "1920-8", "6768-6", "2324-2", "1751-7", "2885-2"} <= codes
    assert sorted(o["valueQuantity"].get("comparator", "") for o in obs)[-2:] == ["<", ">"]
    back = load_bundle(path)
    pdt.assert_frame_equal(back[COMPARED], frame[COMPARED])


def test_replicates_survive_the_round_trip(tmp_path):
    frame = synthetic_canonical(1, 2, 2)
    dup = frame.iloc[[0]].assign(replicate=pd.array([2], dtype="Int64"), value=91.5,
                                 reported_value="91.5")
    frame = pd.concat([frame, dup]).sort_values(
        ["patient", "collected_at", "specimen", "analyte", "replicate"]).reset_index(drop=True)
    back = load_bundle(write_bundle(frame, tmp_path / "r.json", pseudonymise=False))
    pdt.assert_frame_equal(back[COMPARED], frame[COMPARED])


def test_store_export_then_import_into_empty_store(tmp_path):
    frame = synthetic_canonical(3, 3, 25)
    with Store(tmp_path / "a.sqlite") as a:
        a.import_frame(frame, "demo.csv", "1" * 64)
        a.export_fhir(None, tmp_path / "all.json", pseudonymise=False)
        original = a.results()
    with Store(tmp_path / "b.sqlite") as b:
        summary = b.import_file(tmp_path / "all.json")
        assert summary.rows_added == len(frame)
        pdt.assert_frame_equal(b.results()[COMPARED], original[COMPARED])
        assert set(b.results()["source_file"]) == {"all.json"}
        assert b.import_file(tmp_path / "all.json").nothing_new


def test_pseudonymised_bundle_has_no_original_ids(tmp_path):
    frame = synthetic_canonical(2, 2, 3)
    text = write_bundle(frame, tmp_path / "p.json").read_text()
    assert "DEMO-" not in text
    back = load_bundle(tmp_path / "p.json")
    assert back["patient"].str.fullmatch(r"P-[0-9a-f]{10}").all()
    assert back["patient"].nunique() == 2
    np.testing.assert_allclose(np.sort(back["value"]), np.sort(frame["value"]), rtol=0)
    # same salt, same pseudonyms; no salt, unlinkable exports
    salt = b"\x01" * 32
    one = write_bundle(frame, tmp_path / "s1.json", salt=salt).read_text()
    two = write_bundle(frame, tmp_path / "s2.json", salt=salt).read_text()
    assert one == two and text != one
