"""Robustness of the FHIR reader (bayesbase.io.fhir_read) against malformed bundles.

Every malformed input must give the project's ValidationError whose problems name the resource
path and field (the same located error the reader gives for other problems), never a Python
traceback; on the command line the exit code of every other validation error (2).

External references: the HL7 FHIR R4 JSON representation (arrays such as ``identifier``,
``extension`` and ``coding`` are JSON arrays; ``Specimen.collection`` and ``valueQuantity`` are
objects; ``valueQuantity.comparator`` is one of the codes ``<``, ``<=``, ``>=``, ``>``;
``valueInteger`` is an integer), RFC 8259 (JSON numbers have no NaN or Infinity), IEEE 754
binary64 (the largest finite double is about 1.8e308) and CPython's documented limit on
int/str conversion (4300 digits by default, ``sys.get_int_max_str_digits``).
The base bundle is invented: one Patient (patient-animal extension), one Specimen and one ALT
Observation (LOINC 1742-6, as in the project's interoperability notes).
"""
from __future__ import annotations

import copy
import json
import math
import subprocess
import sys

import pandas as pd
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from bayesbase.io import load_bundle, read_bundle
from bayesbase.io.fhir_codes import QUALITY_SYSTEM, REPLICATE_EXTENSION, STATE_EXTENSION
from bayesbase.errors import ValidationError

ANIMAL = "http://hl7.org/fhir/StructureDefinition/patient-animal"
PAT = "Bundle.entry[0].resource(Patient/rex)"
SPEC = "Bundle.entry[1].resource(Specimen/s1)"
OBS = "Bundle.entry[2].resource(Observation/o1)"


def base_bundle() -> dict:
    """One Patient (patient-animal extension), one Specimen, one ALT Observation (invented)."""
    return {"resourceType": "Bundle", "type": "collection", "entry": [
        {"fullUrl": "Patient/rex", "resource": {
            "resourceType": "Patient", "id": "rex", "identifier": [{"value": "REX-1"}],
            "extension": [{"url": ANIMAL, "extension": [{"url": "species", "valueCodeableConcept": {
                "coding": [{"system": "http://snomed.info/sct", "code": "448771007"}]}}]}]}},
        {"fullUrl": "Specimen/s1", "resource": {
            "resourceType": "Specimen", "id": "s1", "identifier": [{"value": "S1"}],
            "collection": {"collectedDateTime": "2024-03-05T09:30:00Z"}}},
        {"fullUrl": "Observation/o1", "resource": {
            "resourceType": "Observation", "id": "o1", "status": "final",
            "code": {"coding": [{"system": "http://loinc.org", "code": "1742-6"}]},
            "subject": {"reference": "Patient/rex"}, "effectiveDateTime": "2024-03-05T09:30:00Z",
            "valueQuantity": {"value": 42, "unit": "U/L", "system": "http://unitsofmeasure.org",
                              "code": "U/L"},
            "specimen": {"reference": "Specimen/s1"}}},
    ]}


def rich_bundle() -> dict:
    """The base bundle plus every optional element the reader looks at (invented values)."""
    b = base_bundle()
    pat = b["entry"][0]["resource"]
    pat.update({"gender": "female", "birthDate": "2016-05-01"})
    pat["extension"][0]["extension"] += [
        {"url": "breed", "valueCodeableConcept": {"text": "Beagle"}},
        {"url": "genderStatus", "valueCodeableConcept": {"coding": [
            {"system": "http://hl7.org/fhir/animal-genderstatus", "code": "neutered"}]}}]
    spec = b["entry"][1]["resource"]
    spec["collection"]["fastingStatusCodeableConcept"] = {"coding": [
        {"system": "http://terminology.hl7.org/CodeSystem/v2-0916", "code": "F"}]}
    spec["extension"] = [{"url": STATE_EXTENSION, "valueCode": "healthy"}]
    obs = b["entry"][2]["resource"]
    obs["method"] = {"text": "analyser A"}
    obs["extension"] = [{"url": REPLICATE_EXTENSION, "valueInteger": 1}]
    obs["valueQuantity"]["comparator"] = "<"
    b["entry"].append({"fullUrl": "Observation/q1", "resource": {
        "resourceType": "Observation", "id": "q1", "status": "final",
        "code": {"coding": [{"system": QUALITY_SYSTEM, "code": "haemolysis"}],
                 "text": "Haemolysis index"},
        "subject": {"reference": "Patient/rex"}, "effectiveDateTime": "2024-03-05T09:30:00Z",
        "valueQuantity": {"value": 1}, "specimen": {"reference": "Specimen/s1"}}})
    b["entry"].append({"fullUrl": "Observation/o2", "resource": {
        "resourceType": "Observation", "id": "o2", "status": "amended",
        "code": {"text": "creatinine"}, "subject": {"reference": "Patient/rex"},
        "effectivePeriod": {"start": "2024-04-05T09:30:00+01:00"},
        "valueQuantity": {"value": 1.1, "unit": "mg/dL", "code": "mg/dL"}}})
    return b


def _problems(obj, **kw):
    with pytest.raises(ValidationError) as err:
        read_bundle(obj, source="in.json", **kw)
    return err.value.problems


def test_base_bundles_are_valid():
    frame = load_bundle(base_bundle(), source="base.json")
    assert frame[["patient", "specimen", "analyte", "value", "unit"]].values.tolist() == [
        ["REX-1", "S1", "alt", 42.0, "U/L"]]
    rich = load_bundle(rich_bundle(), source="rich.json")
    assert sorted(rich["analyte"]) == ["alt", "creatinine"]
    alt = rich[rich["analyte"] == "alt"].iloc[0]
    assert (alt["censor"], alt["haemolysis"], bool(alt["fasted"]), alt["sex"]) == (
        "left", 1.0, True, "female_neutered")


# ------------------------------------------------------------------ one test per mutation
def _set(path):
    """Mutation that sets the node at ``path`` (keys / indices from the bundle root)."""
    def mutate(b, value):
        node = b
        for k in path[:-1]:
            node = node[k]
        node[path[-1]] = value
    return mutate


R = ("entry",)
MUTATIONS = [
    # (id, path, new value, expected problem column, words expected in the message)
    ("code.coding-number", R + (2, "resource", "code", "coding"), 5,
     f"{OBS}.code.coding", "array"),
    ("patient-extension-number", R + (0, "resource", "extension"), 5,
     f"{PAT}.extension", "array"),
    ("observation-extension-number", R + (2, "resource", "extension"), 5,
     f"{OBS}.extension", "array"),
    ("patient-animal-extension-number", R + (0, "resource", "extension", 0, "extension"), 5,
     f"{PAT}.extension(patient-animal).extension", "array"),
    ("patient-identifier-number", R + (0, "resource", "identifier"), 5,
     f"{PAT}.identifier", "array"),
    ("specimen-identifier-number", R + (1, "resource", "identifier"), 5,
     f"{SPEC}.identifier", "array"),
    ("value-400-digits", R + (2, "resource", "valueQuantity", "value"), 10 ** 400,
     f"{OBS}.valueQuantity.value", "finite"),
    ("value-5000-digits-as-object", R + (2, "resource", "valueQuantity", "value"), 10 ** 5000,
     f"{OBS}.valueQuantity.value", "finite"),
    ("value-infinity", R + (2, "resource", "valueQuantity", "value"), math.inf,
     f"{OBS}.valueQuantity.value", "finite"),
    ("value-nan", R + (2, "resource", "valueQuantity", "value"), math.nan,
     f"{OBS}.valueQuantity.value", "finite"),
    ("comparator-list", R + (2, "resource", "valueQuantity", "comparator"), ["<"],
     f"{OBS}.valueQuantity.comparator", "comparator"),
    ("comparator-object", R + (2, "resource", "valueQuantity", "comparator"), {"code": "<"},
     f"{OBS}.valueQuantity.comparator", "comparator"),
    ("replicate-text", R + (2, "resource", "extension"),
     [{"url": REPLICATE_EXTENSION, "valueInteger": "x"}],
     f"{OBS}.extension(replicate).valueInteger", "positive integer"),
    ("replicate-fraction", R + (2, "resource", "extension"),
     [{"url": REPLICATE_EXTENSION, "valueInteger": 1.5}],
     f"{OBS}.extension(replicate).valueInteger", "positive integer"),
    ("specimen-collection-string", R + (1, "resource", "collection"), "2024-03-05",
     f"{SPEC}.collection", "object"),
]


@pytest.mark.parametrize("path,value,column,words", [m[1:] for m in MUTATIONS],
                         ids=[m[0] for m in MUTATIONS])
def test_mutation_gives_a_located_error(path, value, column, words):
    b = base_bundle()
    _set(path)(b, value)
    problems = _problems(b)
    assert [p.column for p in problems] == [column]
    (p,) = problems
    assert p.file == "in.json" and p.row is None
    assert words in p.message
    # the message stays short even for a 5000-digit number (no giant echo of the input)
    assert len(str(p)) < 400


def test_5000_digit_value_in_json_text(tmp_path):
    # CPython refuses int('9' * 5000) by default (4300-digit limit); the reader must not.
    text = json.dumps(base_bundle()).replace('"value": 42', '"value": ' + "9" * 5000)
    path = tmp_path / "big.json"
    path.write_text(text, encoding="utf-8")
    for obj, src in ((text, "<bundle>"), (path, str(path))):
        with pytest.raises(ValidationError) as err:
            load_bundle(obj)
        (p,) = err.value.problems
        assert p.file == src and p.column == f"{OBS}.valueQuantity.value"
        assert "finite" in p.message and "5000 digits" in p.message and len(str(p)) < 400


def test_bad_birth_date_and_wrong_type_codes_are_located():
    b = base_bundle()
    b["entry"][0]["resource"]["birthDate"] = "last spring"
    b["entry"][2]["resource"]["code"]["coding"][0]["code"] = ["1742-6"]
    b["entry"][2]["resource"]["valueQuantity"]["code"] = {"ucum": "U/L"}
    problems = {p.column: p.message for p in _problems(b)}
    assert "not a FHIR date" in problems[f"{PAT}.birthDate"]
    assert "JSON string" in problems[f"{OBS}.code.coding[0].code"]
    assert "JSON string" in problems[f"{OBS}.valueQuantity.code"]
    assert len(problems) == 3


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity", "1e400"])
def test_non_finite_json_literals_are_refused(literal):
    text = json.dumps(base_bundle()).replace('"value": 42', f'"value": {literal}')
    (p,) = _problems(text)
    assert p.column == f"{OBS}.valueQuantity.value" and "finite" in p.message


def test_400_digit_quality_index_is_refused():
    b = rich_bundle()
    b["entry"][3]["resource"]["valueQuantity"]["value"] = 10 ** 400
    (p,) = _problems(b)
    assert p.column == "Bundle.entry[3].resource(Observation/q1).valueQuantity.value"
    assert "finite" in p.message


def _deep_text(depth: int) -> str:
    return ('{"resourceType": "Bundle", "entry": [' + '{"extension": [' * depth
            + "]}" * depth + "]}")


def test_extension_nested_100000_deep_names_the_file(tmp_path):
    path = tmp_path / "deep.json"
    path.write_text(_deep_text(100_000), encoding="utf-8")
    with pytest.raises(ValidationError) as err:
        read_bundle(path, source="deep.json")
    (p,) = err.value.problems
    assert p.file == "deep.json" and "nested too deeply" in p.message
    (p2,) = _problems(_deep_text(100_000))
    assert p2.file == "in.json" and "nested too deeply" in p2.message


def test_unreadable_path_is_a_validation_error(tmp_path):
    (p,) = _problems(tmp_path)  # a directory
    assert p.file == "in.json" and "cannot read" in p.message
    (p2,) = _problems("x" * 5000 + ".json")  # a name longer than the file system allows
    assert p2.file == "in.json"


# ------------------------------------------------------------------ command line
def _cli(*args, cwd):
    return subprocess.run([sys.executable, "-m", "bayesbase.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, timeout=120)


@pytest.mark.parametrize("name,text,needle", [
    ("coding.json", None, f"{OBS}.code.coding"),
    ("deep.json", "deep", "nested too deeply"),
])
def test_import_gives_exit_2_and_a_located_message(tmp_path, name, text, needle):
    if text == "deep":
        body = _deep_text(100_000)
    else:
        b = base_bundle()
        b["entry"][2]["resource"]["code"]["coding"] = 5
        body = json.dumps(b)
    (tmp_path / name).write_text(body, encoding="utf-8")
    out = _cli("import", name, "--db", "s.sqlite", cwd=tmp_path)
    assert out.returncode == 2, out.stderr
    assert "Traceback" not in out.stderr and "Error:" not in out.stderr
    assert name in out.stderr and needle in out.stderr


def test_assess_gives_exit_2_and_a_located_message(tmp_path):
    b = base_bundle()
    b["entry"][1]["resource"]["collection"] = "2024-03-05"
    (tmp_path / "coll.json").write_text(json.dumps(b), encoding="utf-8")
    out = _cli("assess", "coll.json", cwd=tmp_path)
    assert out.returncode == 2, out.stderr
    assert "Traceback" not in out.stderr and f"{SPEC}.collection" in out.stderr


def test_check_reads_a_fhir_bundle(tmp_path, capsys):
    from bayesbase.cli import main

    b = base_bundle()
    b["entry"][2]["resource"]["code"]["coding"] = 5
    path = tmp_path / "coding.json"
    path.write_text(json.dumps(b), encoding="utf-8")
    assert main(["check", str(path)]) == 2
    assert f"{OBS}.code.coding" in capsys.readouterr().err


# ------------------------------------------------------------------ property tests
# Any JSON value gives either a frame or a ValidationError whose problems are located.
FHIR_KEYS = ["resourceType", "entry", "resource", "fullUrl", "id", "identifier", "value",
             "extension", "url", "valueCodeableConcept", "coding", "system", "code", "text",
             "display", "subject", "reference", "specimen", "valueQuantity", "comparator",
             "unit", "effectiveDateTime", "effectivePeriod", "start", "status", "collection",
             "collectedDateTime", "valueInteger", "birthDate", "gender", "method", "device"]
FHIR_TEXT = ["Bundle", "Patient", "Observation", "Specimen", "Patient/rex", "Specimen/s1",
             ANIMAL, "species", "breed", "genderStatus", "final", "1742-6",
             "http://loinc.org", "U/L", "<", ">=", "2024-03-05T09:30:00Z", "Haemolysis index",
             REPLICATE_EXTENSION, STATE_EXTENSION, QUALITY_SYSTEM, "alt",
             "mg/dL", "umol/L", "creatinine", "2160-0", "0001-01-01", "0000-00-00",
             "2023-02-29", "9999-12-31T23:59:59+14:00", "2024-03-05T25:61:00Z", "2024",
             "1e308", "-1", "0", "NaN", "healthy", "unwell", "F", "NF", "neutered", "male"]
NASTY = [10 ** 400, -(10 ** 400), math.inf, -math.inf, math.nan, 1e308, 5e-324,
         -0.0, 0, -1, 2 ** 63, True, False, None, "", " ", "\x00", "\u202e", [], {}, [[[[]]]]]

scalars = (st.none() | st.booleans() | st.integers() | st.floats()
           | st.text(max_size=12) | st.sampled_from(FHIR_TEXT) | st.sampled_from(NASTY)
           # built lazily: hypothesis shows its strategies with repr(), which CPython refuses
           # for an int of more than 4300 digits
           | st.builds(pow, st.just(10), st.sampled_from([4301, 5000])))
json_values = st.recursive(
    scalars,
    lambda kids: st.lists(kids, max_size=4)
    | st.dictionaries(st.sampled_from(FHIR_KEYS) | st.text(max_size=8), kids, max_size=5),
    max_leaves=25)

PROPERTY = settings(max_examples=200, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow])


def _located(problems, source):
    assert problems
    for p in problems:
        assert p.file == source
        assert p.message
        assert len(str(p)) < 2000


def _read_or_refuse(obj, load=False):
    """read_bundle (or load_bundle): a frame, or a ValidationError with located problems."""
    reader = load_bundle if load else read_bundle
    try:
        frame = reader(obj, source="prop.json")
    except ValidationError as exc:
        _located(exc.problems, "prop.json")
        if isinstance(obj, (dict, list)) and not load:
            # a parsed bundle: every problem names a place in it
            assert all(p.column for p in exc.problems), exc.problems
        event("refused with a ValidationError")
        return None
    assert isinstance(frame, pd.DataFrame)
    event("read into a frame")
    return frame


@PROPERTY
@given(json_values)
def test_any_json_value_gives_a_frame_or_a_located_error(value):
    _read_or_refuse(value)
    if isinstance(value, (dict, list)):
        try:
            text = json.dumps(value)
        except ValueError:  # a number beyond CPython's int-to-text limit cannot be written
            return
        _read_or_refuse(text)


@PROPERTY
@given(json_values)
def test_any_json_under_a_bundle_gives_a_frame_or_a_located_error(value):
    # the random value becomes the entries (or one entry) of a Bundle, reaching deeper code
    _read_or_refuse({"resourceType": "Bundle", "entry": value})
    _read_or_refuse({"resourceType": "Bundle", "entry": [value, {"resource": value}]})


def _node_paths(node, prefix=()):
    out = [prefix] if prefix else []
    if isinstance(node, dict):
        for k, v in node.items():
            out += _node_paths(v, prefix + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            out += _node_paths(v, prefix + (i,))
    return out


RICH_PATHS = _node_paths(rich_bundle())


@PROPERTY
@given(st.lists(st.tuples(st.sampled_from(RICH_PATHS), json_values | st.just(KeyError)),
                min_size=1, max_size=3))
def test_mutated_bundle_gives_a_frame_or_a_located_error(edits):
    b = copy.deepcopy(rich_bundle())
    for path, value in edits:
        node = b
        try:
            for k in path[:-1]:
                node = node[k]
            if value is KeyError:
                del node[path[-1]]
            else:
                node[path[-1]] = value
        except (KeyError, IndexError, TypeError):
            continue  # an earlier edit removed or replaced this node
    _read_or_refuse(b)
    _read_or_refuse(b, load=True)
