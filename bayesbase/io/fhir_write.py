"""Writing a canonical results frame as a FHIR R4 Bundle (type ``collection``) in JSON.

One Patient per patient (patient-animal extension with species coded and as text, breed text,
genderStatus), one Specimen per specimen (collection time, fasting status, state extension),
one Observation per result (status ``final``, category laboratory, LOINC code where the
registry has one plus the analyte label as text, valueQuantity in the canonical UCUM unit with a
comparator for a censored value, method text, replicate extension) and one Observation per
sample-quality index. Times are written with the suffix ``utc_offset`` (default ``Z``:
canonical times are UTC, or taken as UTC when a file gave no offset, per
:mod:`bayesbase.validate`); ``utc_offset=""`` writes them bare.
"""
from __future__ import annotations

import hashlib
import json
import re
import secrets
from pathlib import Path

import pandas as pd

from .. import units
from ..contract import HIL_INDICES
from ..privacy import pseudonymise_frame
from .fhir_codes import (
    EXPORT_SPECIES,
    FASTING_SYSTEM,
    GENDER_STATUS,
    ID_SYSTEM_PATIENT,
    ID_SYSTEM_SPECIMEN,
    LOINC,
    LOINC_TO_ANALYTE,
    OBS_CATEGORY,
    PATIENT_ANIMAL,
    QUALITY_SYSTEM,
    REPLICATE_EXTENSION,
    STATE_EXTENSION,
    UCUM,
)

__all__ = ["bundle_dict", "write_bundle"]


def _fhir_id(text: str, prefix: str, used: dict) -> str:
    """A FHIR resource id ([A-Za-z0-9-.]{1,64}) for a text id, unique within the bundle
    (``used`` maps text -> id; its key ``None`` holds the set of ids given out)."""
    if text in used:
        return used[text]
    taken = used.setdefault(None, set())
    clean = re.sub(r"[^A-Za-z0-9\-.]", "-", str(text))[:48].strip("-") or prefix
    if clean in taken:
        clean = f"{clean}-{hashlib.sha256(text.encode()).hexdigest()[:12]}"
    used[text] = clean
    taken.add(clean)
    return clean


def _dt(ts, utc_offset):
    if ts is None or pd.isna(ts):
        return None
    ts = pd.Timestamp(ts)
    text = ts.isoformat()
    return text + (utc_offset or "")


def _num(v):
    """A float for JSON: integral values stay floats (12.0) so the reading side gets '12.0'."""
    return float(v)


def _label(analyte: str) -> str:
    try:
        return units.label(analyte)
    except KeyError:
        return analyte


def _display_unit(analyte: str, unit: str) -> str:
    try:
        if units.canonical_unit(analyte) == unit:
            return units.display_unit(analyte)
    except KeyError:
        pass
    return unit


def _loinc_for(analyte: str) -> str | None:
    try:
        code = units.loinc(analyte)
    except KeyError:
        code = None
    if code:
        return str(code)
    for lc, name in LOINC_TO_ANALYTE.items():
        try:
            if units.resolve_analyte(name) == analyte and name != "urea nitrogen":
                return lc
        except KeyError:
            continue
    return None


def _patient_resource(pid, first, rid: str) -> dict:
    """The Patient of one patient (``first``: its first row)."""
    species = str(first["species"])
    coding = [{"system": s, "code": c, "display": d}
              for s, c, d in EXPORT_SPECIES.get(species, [])]
    animal = {"url": PATIENT_ANIMAL, "extension": [{
        "url": "species", "valueCodeableConcept": {"coding": coding, "text": species}}]}
    if not pd.isna(first["breed"]) and str(first["breed"]):
        animal["extension"].append({"url": "breed",
                                    "valueCodeableConcept": {"text": str(first["breed"])}})
    sex = "" if pd.isna(first["sex"]) else str(first["sex"])
    gender, _, status = sex.partition("_")
    if status in ("neutered", "intact", "spayed", "castrated"):
        code = "neutered" if status in ("neutered", "spayed", "castrated") else "intact"
        animal["extension"].append({"url": "genderStatus", "valueCodeableConcept": {
            "coding": [{"system": GENDER_STATUS, "code": code}], "text": code}})
    patient = {"resourceType": "Patient", "id": rid,
               "identifier": [{"system": ID_SYSTEM_PATIENT, "value": str(pid)}],
               "extension": [animal]}
    if gender in ("male", "female"):
        patient["gender"] = gender
    if not pd.isna(first["birth_date"]):
        patient["birthDate"] = pd.Timestamp(first["birth_date"]).strftime("%Y-%m-%d")
    return patient


def _specimen_resource(sid, s0, srid: str, rid: str, when) -> dict:
    """The Specimen of one draw (``s0``: its first row)."""
    spec = {"resourceType": "Specimen", "id": srid,
            "identifier": [{"system": ID_SYSTEM_SPECIMEN, "value": str(sid)}],
            "subject": {"reference": f"Patient/{rid}"},
            "collection": {"collectedDateTime": when}}
    if not pd.isna(s0["fasted"]):
        code = "F" if bool(s0["fasted"]) else "NF"
        spec["collection"]["fastingStatusCodeableConcept"] = {
            "coding": [{"system": FASTING_SYSTEM, "code": code}]}
    state = "" if pd.isna(s0["state"]) else str(s0["state"])
    if state:
        spec["extension"] = [{"url": STATE_EXTENSION, "valueCode": state}]
    return spec


def _observation_resource(row, oid: str, srid: str, rid: str, when) -> dict:
    """The Observation of one result (a row of the canonical frame)."""
    analyte = str(row.analyte)
    code = {"text": _label(analyte)}
    lc = _loinc_for(analyte)
    if lc:
        code["coding"] = [{"system": LOINC, "code": lc}]
    vq = {"value": _num(row.value), "unit": _display_unit(analyte, str(row.unit)),
          "system": UCUM, "code": str(row.unit)}
    if row.censor == "left":
        vq["comparator"] = "<=" if str(row.reported_value).startswith("<=") else "<"
    elif row.censor == "right":
        vq["comparator"] = ">=" if str(row.reported_value).startswith(">=") else ">"
    obs = {"resourceType": "Observation", "id": oid,
           "status": "final",
           "category": [{"coding": [{"system": OBS_CATEGORY, "code": "laboratory"}]}],
           "code": code, "subject": {"reference": f"Patient/{rid}"},
           "effectiveDateTime": when, "valueQuantity": vq,
           "specimen": {"reference": f"Specimen/{srid}"}}
    if not pd.isna(row.method) and str(row.method):
        obs["method"] = {"text": str(row.method)}
    if not pd.isna(row.replicate) and int(row.replicate) != 1:
        obs["extension"] = [{"url": REPLICATE_EXTENSION, "valueInteger": int(row.replicate)}]
    return obs


def _quality_resource(kind: str, v, oid: str, srid: str, rid: str, when) -> dict:
    """The Observation of one sample-quality index of a draw."""
    return {
        "resourceType": "Observation", "id": oid, "status": "final",
        "code": {"coding": [{"system": QUALITY_SYSTEM, "code": kind}],
                 "text": f"{kind.capitalize()} index"},
        "subject": {"reference": f"Patient/{rid}"}, "effectiveDateTime": when,
        "valueQuantity": {"value": float(v)},
        "specimen": {"reference": f"Specimen/{srid}"}}


def _specimen_entries(pid, sid, sf: pd.DataFrame, rid: str, used_s: dict,
                      utc_offset: str) -> list[dict]:
    """The entries of one draw: its Specimen, its results and its sample-quality indices."""
    s0 = sf.iloc[0]
    srid = _fhir_id(f"{pid}.{sid}", "specimen", used_s)
    when = _dt(s0["collected_at"], utc_offset)
    entries = [{"fullUrl": f"Specimen/{srid}",
                "resource": _specimen_resource(sid, s0, srid, rid, when)}]
    for k, row in enumerate(sf.itertuples(index=False)):
        oid = f"{srid}-{k + 1}"[:64]
        entries.append({"fullUrl": f"Observation/{oid}",
                        "resource": _observation_resource(row, oid, srid, rid, when)})
    for kind in HIL_INDICES:
        v = s0[kind]
        if pd.isna(v):
            continue
        oid = f"{srid}-{kind}"[:64]
        entries.append({"fullUrl": f"Observation/{oid}",
                        "resource": _quality_resource(kind, v, oid, srid, rid, when)})
    return entries


def bundle_dict(frame, *, utc_offset: str = "Z") -> dict:
    """Canonical frame -> FHIR Bundle (type collection) as a dict (no pseudonymisation)."""
    used_p: dict = {}
    used_s: dict = {}
    entries = []
    df = frame.reset_index(drop=True)
    for pid, pf in df.groupby("patient", sort=True):
        rid = _fhir_id(str(pid), "patient", used_p)
        entries.append({"fullUrl": f"Patient/{rid}",
                        "resource": _patient_resource(pid, pf.iloc[0], rid)})
        for sid, sf in pf.groupby("specimen", sort=False):
            entries.extend(_specimen_entries(pid, sid, sf, rid, used_s, utc_offset))
    return {"resourceType": "Bundle", "type": "collection", "entry": entries}


def write_bundle(canonical_frame, path, pseudonymise: bool = True, *, salt: bytes | None = None,
                 utc_offset: str = "Z") -> Path:
    """Write a canonical frame as a FHIR R4 Bundle (type collection) in JSON.

    With ``pseudonymise`` patient and specimen ids are replaced by ``P-``/``S-`` HMAC pseudonyms
    (see :mod:`bayesbase.privacy`); ``salt`` makes them stable across exports (the store passes
    its own); without one a fresh random salt is used, so two exports cannot be linked.
    """
    frame = canonical_frame
    if pseudonymise:
        frame = pseudonymise_frame(frame, salt if salt is not None else secrets.token_bytes(32))
    bundle = bundle_dict(frame, utc_offset=utc_offset)
    path = Path(path)
    path.write_text(json.dumps(bundle, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    return path
