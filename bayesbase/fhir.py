"""FHIR R4 import and export of laboratory results (standard library ``json`` only).

Layer 4: imports ``bayesbase.constants``, ``errors``, ``units`` and (for validation) ``data``.

Reading (:func:`read_bundle`)
-----------------------------
Input: a ``Bundle`` (any ``type``; ``collection`` is what files usually carry) of ``Patient``,
``Observation`` and optionally ``Specimen`` resources, as a path, JSON text, or an already
parsed ``dict``. Output: a raw frame in the tidy results contract (columns ``patient, species,
breed, sex, birth_date, specimen, collected_at, analyte, value, unit, method, replicate,
fasted, haemolysis, lipaemia, icterus, state``) to be validated by
:func:`bayesbase.data.validate`, so that names and units are checked in one place
(:func:`load_bundle` does both and points every problem at its FHIR resource).

* ``Patient``: the patient id is the first ``identifier.value`` (else the resource ``id``);
  the extension ``http://hl7.org/fhir/StructureDefinition/patient-animal`` gives ``species``
  (required), ``breed`` and ``genderStatus``. Species is read from a SNOMED CT code
  (dog 448771007, third-party code only; cat 448169003; source: the project's interoperability
  notes), an NCBI Taxonomy id (dog 9615, cat 9685, horse 9796; from memory), or the text /
  display ("dog", "canine", "Canis familiaris", ...). ``gender`` + ``genderStatus`` make
  ``sex`` (``female_neutered``, ``male_intact``, ``female`` ...). ``birthDate`` -> birth_date.
* ``Observation``: ``code`` (LOINC coding mapped by :data:`LOINC_TO_ANALYTE`, else the
  project's analyte registry's LOINC codes, else ``code.text`` / ``coding.display`` resolved by
  :func:`bayesbase.units.resolve_analyte`), ``subject`` (must be a Patient in the bundle),
  ``effectiveDateTime`` (collection time; else ``effectivePeriod.start``; else the Specimen's
  ``collection.collectedDateTime``), ``valueQuantity`` {``value``, ``code`` (UCUM; else
  ``unit``), ``comparator`` ``<``/``<=`` -> left-censored, ``>``/``>=`` -> right-censored},
  ``specimen`` (reference; the specimen id is the Specimen's first identifier, else its id,
  else the reference's id part; without a reference the specimen is
  ``<patient>|<effectiveDateTime>``), ``method`` (text / display; else ``device.display``).
* ``status``: ``final``, ``amended``, ``corrected`` and ``preliminary`` are read (and a missing
  status); ``entered-in-error``, ``cancelled``, ``registered`` and ``unknown`` are skipped.
  An Observation with ``dataAbsentReason`` and no value is skipped; one with neither value nor
  reason is an error.
* Sample-quality indices: an Observation whose code text / display names a haemolysis
  (hemolysis), lipaemia (lipemia) or icterus (icteric) index, or whose coding is in
  :data:`QUALITY_SYSTEM`, gives that index (``valueQuantity.value``, ``valueInteger`` or
  ``valueString`` as a number) to every result of the same specimen. No LOINC code is used for
  them (none confirmed in the project's notes).
* ``Specimen`` (optional): ``collection.fastingStatusCodeableConcept`` (HL7 v2 table 0916:
  ``F`` fasting, ``NF`` not fasting, ``NG`` not given) -> fasted; the extension
  :data:`STATE_EXTENSION` (``healthy`` / ``unwell``) -> state.
* Replicates: the extension :data:`REPLICATE_EXTENSION` (valueInteger) if present, else
  repeats of one analyte on one specimen are numbered 1, 2, ... in bundle order.
* Times are passed to :func:`bayesbase.data.validate` as written: a time with a UTC offset is
  converted to UTC there, a time without one is taken as it is (the contract's rule).

Every problem is a :class:`~bayesbase.errors.Problem` whose ``column`` is the resource path,
e.g. ``Bundle.entry[3].resource(Observation/obs-12).valueQuantity.code``; all problems are
collected and raised together as :class:`~bayesbase.errors.ValidationError`.

Writing (:func:`write_bundle`)
------------------------------
A ``Bundle`` of type ``collection``: one Patient per patient (patient-animal extension with
species coded and as text, breed text, genderStatus), one Specimen per specimen (collection
time, fasting status, state extension), one Observation per result (status ``final``, category
laboratory, LOINC code where the registry has one plus the analyte label as text,
valueQuantity in the canonical UCUM unit with a comparator for a censored value, method text,
replicate extension) and one Observation per sample-quality index. Times are written with the
suffix ``utc_offset`` (default ``Z``: canonical times are UTC, or taken as UTC when a file gave
no offset, per :mod:`bayesbase.data`); ``utc_offset=""`` writes them bare.
"""
from __future__ import annotations

import json
import re
from pathlib import Path

from .errors import Problem, ValidationError

__all__ = [
    "LOINC_TO_ANALYTE",
    "read_bundle",
    "load_bundle",
    "write_bundle",
    "bundle_dict",
    "RAW_COLUMNS",
]

PATIENT_ANIMAL = "http://hl7.org/fhir/StructureDefinition/patient-animal"
UCUM = "http://unitsofmeasure.org"
LOINC = "http://loinc.org"
SNOMED = "http://snomed.info/sct"
NCBI_TAXON = "http://www.ncbi.nlm.nih.gov/taxonomy"  # from memory (system URI used for NCBI ids)
GENDER_STATUS = "http://hl7.org/fhir/animal-genderstatus"
FASTING_SYSTEM = "http://terminology.hl7.org/CodeSystem/v2-0916"
OBS_CATEGORY = "http://terminology.hl7.org/CodeSystem/observation-category"
#: Project code system for sample-quality index Observations (no standard code used).
QUALITY_SYSTEM = "urn:bayesbase:fhir:sample-quality"
#: Project extensions (no standard element exists for these).
STATE_EXTENSION = "urn:bayesbase:fhir:health-state"
REPLICATE_EXTENSION = "urn:bayesbase:fhir:replicate"
ID_SYSTEM_PATIENT = "urn:bayesbase:patient"
ID_SYSTEM_SPECIMEN = "urn:bayesbase:specimen"

#: Raw tidy columns produced by :func:`read_bundle`.
RAW_COLUMNS = ("patient", "species", "breed", "sex", "birth_date", "specimen", "collected_at",
               "analyte", "value", "unit", "method", "replicate", "fasted", "haemolysis",
               "lipaemia", "icterus", "state")

#: LOINC code -> analyte name as the laboratory reports it (resolved by bayesbase.units; the
#: name matters for urea nitrogen, whose mg/dL converts with the BUN factor). Codes: the
#: project's interoperability notes ("confirmed on stored pages"), except where marked.
LOINC_TO_ANALYTE = {
    "2160-0": "creatinine", "14682-9": "creatinine",
    "3094-0": "urea nitrogen",
    "2345-7": "glucose", "14749-6": "glucose",
    "1742-6": "alt", "1920-8": "ast", "6768-6": "alp", "2324-2": "ggt",
    "1751-7": "albumin", "2885-2": "total_protein",
    "2093-3": "cholesterol", "14647-2": "cholesterol",
    "17861-6": "calcium", "2951-2": "sodium", "2823-3": "potassium", "2075-0": "chloride",
    "1975-2": "total_bilirubin",
    "2028-9": "bicarbonate",  # total CO2
    "2777-1": "phosphate", "2571-8": "triglycerides", "3026-2": "total_t4",  # from memory
    "15069-8": "fructosamine",  # from memory
}

#: Species codes -> canonical species (SNOMED: project's interoperability notes; NCBI: memory).
SPECIES_CODES = {
    (SNOMED, "448771007"): "dog", (SNOMED, "448169003"): "cat",
    (NCBI_TAXON, "9615"): "dog", (NCBI_TAXON, "9685"): "cat", (NCBI_TAXON, "9796"): "horse",
}
_SPECIES_TEXT = {
    "dog": "dog", "canine": "dog", "canis familiaris": "dog", "canis lupus familiaris": "dog",
    "canis lupus subsp. familiaris": "dog", "cat": "cat", "feline": "cat", "felis catus": "cat",
    "felis silvestris catus": "cat", "domestic cat": "cat", "domestic dog": "dog",
    "horse": "horse", "equine": "horse", "equus caballus": "horse",
}
_EXPORT_SPECIES = {
    "dog": [(SNOMED, "448771007", "Canis lupus subsp. familiaris"),
            (NCBI_TAXON, "9615", "Canis lupus familiaris")],
    "cat": [(SNOMED, "448169003", "Felis catus"), (NCBI_TAXON, "9685", "Felis catus")],
    "horse": [(NCBI_TAXON, "9796", "Equus caballus")],
}
_SKIP_STATUS = {"entered-in-error", "cancelled", "registered", "unknown"}
_READ_STATUS = {"final", "amended", "corrected", "preliminary"}
_QUALITY = (
    ("haemolysis", re.compile(r"ha?emoly[sz]", re.I)),
    ("lipaemia", re.compile(r"lipa?emi|lipemic|lipaemic", re.I)),
    ("icterus", re.compile(r"icter", re.I)),
)
_COMPARATOR = {"<": "left", "<=": "left", ">": "right", ">=": "right"}


# ---------------------------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------------------------
class _Ctx:
    def __init__(self, source: str):
        self.source = source
        self.problems: list[Problem] = []

    def add(self, where: str, message: str, hint: str | None = None) -> None:
        self.problems.append(Problem(self.source, None, where, message, hint))


def _load_json(path_or_obj, source):
    if isinstance(path_or_obj, dict):
        return path_or_obj, source or "<bundle>"
    if isinstance(path_or_obj, (str, Path)) and not str(path_or_obj).lstrip().startswith("{"):
        path = Path(path_or_obj)
        src = source or str(path)
        try:
            text = path.read_text(encoding="utf-8-sig")
        except FileNotFoundError:
            raise ValidationError([Problem(src, None, None, "file not found")]) from None
        except UnicodeDecodeError as exc:
            raise ValidationError([Problem(src, None, None,
                                           f"not UTF-8 text, so not FHIR JSON ({exc.reason})")]) \
                from None
    else:
        text = str(path_or_obj)
        src = source or "<bundle>"
    try:
        return json.loads(text), src
    except json.JSONDecodeError as exc:
        raise ValidationError([Problem(
            src, None, None, f"not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})",
            "a FHIR Bundle in JSON format is expected")]) from None


def _codings(concept) -> list[dict]:
    if not isinstance(concept, dict):
        return []
    return [c for c in concept.get("coding") or [] if isinstance(c, dict)]


def _texts(concept) -> list[str]:
    if not isinstance(concept, dict):
        return []
    out = [concept.get("text")] + [c.get("display") for c in _codings(concept)]
    return [str(t).strip() for t in out if t and str(t).strip()]


def _ext(resource, url):
    for e in (resource or {}).get("extension") or []:
        if isinstance(e, dict) and e.get("url") == url:
            return e
    return None


def _sub_ext(ext, url):
    for e in (ext or {}).get("extension") or []:
        if isinstance(e, dict) and e.get("url") == url:
            return e
    return None


def _first_identifier(resource) -> str | None:
    for ident in resource.get("identifier") or []:
        if isinstance(ident, dict) and ident.get("value") not in (None, ""):
            return str(ident["value"])
    return None


def _time(text) -> str | None:
    """FHIR dateTime -> naive ISO text (offset dropped: wall-clock time kept)."""
    if not isinstance(text, str) or not text.strip():
        return None
    t = text.strip()
    m = re.fullmatch(r"(\d{4}(?:-\d{2}(?:-\d{2})?)?)(?:T(\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?)"
                     r"(Z|[+-]\d{2}:\d{2})?)?", t)
    if not m:
        return None
    date, clock = m.group(1), m.group(2)
    return f"{date}T{clock}" if clock else date


def _species(ext, ctx, where) -> str | None:
    sp = _sub_ext(ext, "species")
    if sp is None:
        ctx.add(f"{where}.extension(patient-animal).species",
                "Patient has no species (the patient-animal extension's species is required)")
        return None
    concept = sp.get("valueCodeableConcept")
    for c in _codings(concept):
        hit = SPECIES_CODES.get((str(c.get("system", "")).rstrip("/"), str(c.get("code", ""))))
        if hit:
            return hit
    for t in _texts(concept):
        hit = _SPECIES_TEXT.get(t.lower())
        if hit:
            return hit
    shown = ", ".join(_texts(concept) or [f"{c.get('system')}|{c.get('code')}"
                                          for c in _codings(concept)]) or "nothing"
    ctx.add(f"{where}.extension(patient-animal).species",
            f"species not recognised ({shown})",
            "use SNOMED CT 448771007 (dog) / 448169003 (cat), NCBI taxonomy 9615 / 9685 / 9796, "
            "or the text dog, cat, horse")
    return None


def _patient(res, ctx, where) -> dict:
    pid = _first_identifier(res) or res.get("id")
    if not pid:
        ctx.add(f"{where}.id", "Patient has neither an identifier nor an id")
    ext = _ext(res, PATIENT_ANIMAL)
    if ext is None:
        ctx.add(f"{where}.extension", "Patient has no species: the patient-animal extension "
                f"({PATIENT_ANIMAL}) is missing")
        species = None
    else:
        species = _species(ext, ctx, where)
    breed = None
    if ext is not None:
        b = _sub_ext(ext, "breed")
        if b is not None:
            texts = _texts(b.get("valueCodeableConcept"))
            breed = texts[0] if texts else None
    gender = str(res.get("gender") or "").lower() or None
    status = None
    if ext is not None:
        g = _sub_ext(ext, "genderStatus")
        if g is not None:
            concept = g.get("valueCodeableConcept")
            codes = [str(c.get("code", "")).lower() for c in _codings(concept)]
            codes += [t.lower() for t in _texts(concept)]
            for code in codes:
                if code in ("neutered", "intact"):
                    status = code
                    break
    if gender in ("male", "female"):
        sex = f"{gender}_{status}" if status else gender
    else:
        sex = None
    birth = res.get("birthDate")
    return {"id": str(pid) if pid else None, "species": species, "breed": breed, "sex": sex,
            "birth_date": _time(birth) if birth else None}


def _ref_keys(ref: str) -> list[str]:
    ref = ref.strip()
    keys = [ref]
    m = re.search(r"([A-Za-z]+)/([^/]+?)(?:/_history/.*)?$", ref)
    if m:
        keys.append(f"{m.group(1)}/{m.group(2)}")
    return keys


def _number(v):
    if isinstance(v, bool):
        return None
    if isinstance(v, (int, float)):
        return float(v)
    if isinstance(v, str):
        try:
            return float(v.strip())
        except ValueError:
            return None
    return None


def _fmt(v) -> str:
    """JSON number -> text without a float artefact (1.0 -> '1.0', 12 -> '12')."""
    if isinstance(v, str):
        return v.strip()
    return repr(v) if isinstance(v, float) else str(v)


def _quality_kind(res) -> str | None:
    code = res.get("code") or {}
    for c in _codings(code):
        if c.get("system") == QUALITY_SYSTEM and c.get("code") in ("haemolysis", "lipaemia",
                                                                    "icterus"):
            return c["code"]
    for t in _texts(code):
        for kind, rx in _QUALITY:
            if rx.search(t) and ("index" in t.lower() or "indices" in t.lower()
                                 or len(t.split()) == 1):
                return kind
    return None


def _analyte_name(res, ctx, where):
    """Analyte name as reported (a name bayesbase.units resolves), or None with a problem."""
    from . import units

    code = res.get("code")
    if not isinstance(code, dict):
        ctx.add(f"{where}.code", "Observation has no code")
        return None
    loinc_codes = [str(c.get("code")) for c in _codings(code)
                   if str(c.get("system", "")).rstrip("/") == LOINC and c.get("code")]
    for lc in loinc_codes:
        if lc in LOINC_TO_ANALYTE:
            return LOINC_TO_ANALYTE[lc]
    registry = _registry_loinc()
    for lc in loinc_codes:
        if lc in registry:
            return registry[lc]
    texts = _texts(code)
    for t in texts:
        try:
            units.resolve_analyte(t)
        except KeyError:
            continue
        return t
    if texts:
        try:
            units.resolve_analyte(texts[0])
        except KeyError as exc:
            hint = getattr(exc, "hint", None)
            ctx.add(f"{where}.code", f"unknown analyte '{texts[0]}'"
                    + (f" (LOINC {', '.join(loinc_codes)})" if loinc_codes else ""), hint)
            return None
    ctx.add(f"{where}.code", "Observation code is not recognised"
            + (f" (LOINC {', '.join(loinc_codes)})" if loinc_codes else "")
            + " and has no text", "give a LOINC code the project knows or code.text")
    return None


_REG_LOINC: dict | None = None


def _registry_loinc() -> dict:
    """LOINC code -> reported analyte name, from the project's analyte registry."""
    global _REG_LOINC
    if _REG_LOINC is None:
        from . import units

        out = {}
        for aid in units.analyte_ids():
            info = units.analyte_info(aid)
            if info.get("loinc"):
                out[str(info["loinc"])] = aid
            for group in (info.get("reported_as") or {}).values():
                if group.get("loinc") and group.get("names"):
                    out[str(group["loinc"])] = group["names"][0]
        _REG_LOINC = out
    return _REG_LOINC


def _parse(bundle, ctx: _Ctx):
    """Bundle dict -> (rows, paths) with problems collected in ctx."""
    from . import units

    if not isinstance(bundle, dict) or bundle.get("resourceType") != "Bundle":
        rt = bundle.get("resourceType") if isinstance(bundle, dict) else type(bundle).__name__
        ctx.add("resourceType", f"not a FHIR Bundle (resourceType is {rt!r})",
                "export the results as a Bundle of Observation and Patient resources")
        return [], []
    entries = bundle.get("entry") or []
    if not isinstance(entries, list):
        ctx.add("Bundle.entry", "Bundle.entry must be a list")
        return [], []
    refs: dict[str, tuple[str, int, dict]] = {}
    observations, patients, specimens = [], {}, {}
    for i, entry in enumerate(entries):
        res = entry.get("resource") if isinstance(entry, dict) else None
        if not isinstance(res, dict):
            ctx.add(f"Bundle.entry[{i}]", "entry has no resource")
            continue
        rt = res.get("resourceType")
        where = f"Bundle.entry[{i}].resource({rt}/{res.get('id', '?')})"
        keys = []
        if entry.get("fullUrl"):
            keys.append(str(entry["fullUrl"]))
        if res.get("id"):
            keys.append(f"{rt}/{res['id']}")
        for k in keys:
            refs[k] = (rt, i, res)
        if rt == "Observation":
            observations.append((i, where, res))
        elif rt == "Patient":
            patients[i] = _patient(res, ctx, where)
        elif rt == "Specimen":
            specimens[i] = res
    if not observations:
        ctx.add("Bundle.entry", "the Bundle holds no Observation resources",
                "each result must be an Observation")
        return [], []

    def resolve(ref_obj, want):
        if not isinstance(ref_obj, dict) or not ref_obj.get("reference"):
            return None
        for k in _ref_keys(str(ref_obj["reference"])):
            hit = refs.get(k)
            if hit and hit[0] == want:
                return hit
        return None

    rows, paths, quality = [], [], {}
    for i, where, res in observations:
        status = str(res.get("status") or "").lower()
        if status in _SKIP_STATUS:
            continue
        if status and status not in _READ_STATUS:
            ctx.add(f"{where}.status", f"unknown status '{status}'",
                    "final, amended, corrected, preliminary are read; entered-in-error, "
                    "cancelled are skipped")
            continue
        subj = res.get("subject")
        hit = resolve(subj, "Patient")
        if hit is None:
            ref = subj.get("reference") if isinstance(subj, dict) else None
            ctx.add(f"{where}.subject",
                    f"subject {ref!r} is not a Patient in this Bundle" if ref else
                    "Observation has no subject", "include the Patient resource in the Bundle")
            continue
        pat = patients.get(hit[1])
        if pat is None or pat["id"] is None:
            continue
        spec_hit = resolve(res.get("specimen"), "Specimen")
        spec_res = spec_hit[2] if spec_hit else None
        when = res.get("effectiveDateTime")
        if _time(when) is None and isinstance(res.get("effectivePeriod"), dict):
            when = res["effectivePeriod"].get("start")
        if _time(when) is None and spec_res is not None:
            when = (spec_res.get("collection") or {}).get("collectedDateTime")
        when = when.strip() if _time(when) is not None else None
        if when is None:
            bad = res.get("effectiveDateTime")
            ctx.add(f"{where}.effectiveDateTime",
                    f"collection time {bad!r} is not a FHIR dateTime" if bad else
                    "Observation has no effectiveDateTime (collection time)")
            continue
        if spec_res is not None:
            specimen = _first_identifier(spec_res) or str(spec_res.get("id"))
        elif isinstance(res.get("specimen"), dict) and res["specimen"].get("reference"):
            specimen = _ref_keys(str(res["specimen"]["reference"]))[-1].split("/")[-1]
        elif isinstance(res.get("specimen"), dict) and res["specimen"].get("display"):
            specimen = str(res["specimen"]["display"])
        else:
            specimen = f"{pat['id']}|{res.get('effectiveDateTime') or when}"
        qkind = _quality_kind(res)
        if qkind is not None:
            vq = res.get("valueQuantity") if isinstance(res.get("valueQuantity"), dict) else {}
            v = _number(vq.get("value"))
            if v is None:
                v = _number(res.get("valueInteger"))
            if v is None:
                v = _number(res.get("valueString"))
            if v is None:
                ctx.add(f"{where}.value[x]", f"{qkind} index has no numeric value")
                continue
            quality[(pat["id"], specimen, qkind)] = v
            continue
        name = _analyte_name(res, ctx, where)
        vq = res.get("valueQuantity")
        if not isinstance(vq, dict):
            if res.get("dataAbsentReason") is not None:
                continue
            other = [k for k in res if k.startswith("value")]
            ctx.add(f"{where}.valueQuantity",
                    "Observation has no valueQuantity" + (f" (it has {other[0]})" if other else ""),
                    "a quantitative result needs valueQuantity {value, unit, system, code}")
            continue
        value = vq.get("value")
        if _number(value) is None or isinstance(value, str):
            ctx.add(f"{where}.valueQuantity.value", f"value {value!r} is not a number")
            continue
        comparator = vq.get("comparator")
        if comparator is not None and comparator not in _COMPARATOR:
            ctx.add(f"{where}.valueQuantity.comparator", f"unknown comparator {comparator!r}",
                    "use <, <=, >= or >")
            continue
        system = vq.get("system")
        code = vq.get("code")
        unit_field = "code"
        if code in (None, "") or (system not in (None, UCUM)):
            code, unit_field = vq.get("unit"), "unit"
        if code in (None, ""):
            ctx.add(f"{where}.valueQuantity.code", "valueQuantity has no UCUM code or unit")
            continue
        if name is None:
            continue
        try:
            units.conversion_factor(name, str(code), reported_name=name)
        except KeyError as exc:
            ctx.add(f"{where}.code", str(exc))
            continue
        except ValueError as exc:
            hint = getattr(exc, "hint", None)
            message = getattr(exc, "message", str(exc))
            ctx.add(f"{where}.valueQuantity.{unit_field}",
                    f"UCUM code {code!r} is not a valid unit for {name}: {message}", hint)
            continue
        method = None
        m = res.get("method")
        if _texts(m):
            method = _texts(m)[0]
        elif isinstance(res.get("device"), dict) and res["device"].get("display"):
            method = str(res["device"]["display"])
        rep_ext = _ext(res, REPLICATE_EXTENSION)
        replicate = rep_ext.get("valueInteger") if rep_ext else None
        fasted, state = None, None
        if spec_res is not None:
            coll = spec_res.get("collection") or {}
            for c in _codings(coll.get("fastingStatusCodeableConcept")):
                fasted = {"F": "yes", "NF": "no"}.get(str(c.get("code")).upper(), fasted)
            se = _ext(spec_res, STATE_EXTENSION)
            if se is not None:
                state = se.get("valueCode") or se.get("valueString")
        rows.append({
            "patient": pat["id"], "species": pat["species"], "breed": pat["breed"],
            "sex": pat["sex"], "birth_date": pat["birth_date"], "specimen": specimen,
            "collected_at": when, "analyte": name,
            "value": (comparator or "") + _fmt(value), "unit": str(code), "method": method,
            "replicate": replicate, "fasted": fasted, "state": state or "",
        })
        paths.append(where)
    # replicate numbering, sample-quality indices
    seen: dict[tuple, int] = {}
    for r in rows:
        key = (r["patient"], r["specimen"], units.resolve_analyte(r["analyte"]))
        if r["replicate"] is None:
            seen[key] = seen.get(key, 0) + 1
            r["replicate"] = seen[key]
        for kind in ("haemolysis", "lipaemia", "icterus"):
            r[kind] = quality.get((r["patient"], r["specimen"], kind))
    return rows, paths


def read_bundle(path_or_obj, source=None):
    """Read a FHIR R4 Bundle into a raw tidy frame (see the module docstring).

    ``path_or_obj``: a path, JSON text or a parsed dict. ``source`` names the input in
    messages (default: the path). Raises :class:`~bayesbase.errors.ValidationError` listing
    every problem, each naming the resource path and field. The frame's ``attrs["fhir_paths"]``
    gives each row's resource path.
    """
    import pandas as pd

    bundle, src = _load_json(path_or_obj, source)
    ctx = _Ctx(src)
    rows, paths = _parse(bundle, ctx)
    if ctx.problems:
        raise ValidationError(ctx.problems)
    frame = pd.DataFrame(rows, columns=list(RAW_COLUMNS))
    for col in RAW_COLUMNS:
        if col in ("haemolysis", "lipaemia", "icterus"):
            frame[col] = frame[col].astype("float64")
        elif col == "replicate":
            frame[col] = frame[col].astype("Int64")
        else:
            frame[col] = frame[col].astype("str")
    frame.attrs["fhir_paths"] = list(paths)
    frame.attrs["source"] = src
    return frame


def load_bundle(path_or_obj, source=None):
    """:func:`read_bundle` then :func:`bayesbase.data.validate`: the canonical frame. A
    validation problem on a row is re-pointed at its Observation's resource path."""
    from . import data

    raw = read_bundle(path_or_obj, source=source)
    src = raw.attrs.get("source", source or "<bundle>")
    paths = raw.attrs.get("fhir_paths", [])
    try:
        return data.validate(raw, source=src)
    except ValidationError as exc:
        out = []
        for p in exc.problems:
            if p.row is not None and 0 <= p.row - 2 < len(paths):
                column = f"{paths[p.row - 2]}" + (f" [{p.column}]" if p.column else "")
                out.append(Problem(p.file, None, column, p.message, p.hint))
            else:
                out.append(p)
        raise ValidationError(out) from None


# ---------------------------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------------------------
def _fhir_id(text: str, prefix: str, used: dict) -> str:
    """A FHIR resource id ([A-Za-z0-9-.]{1,64}) for a text id, unique within the bundle
    (``used`` maps text -> id; its key ``None`` holds the set of ids given out)."""
    import hashlib

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
    import pandas as pd

    if ts is None or pd.isna(ts):
        return None
    ts = pd.Timestamp(ts)
    text = ts.isoformat()
    return text + (utc_offset or "")


def _num(v):
    """A float for JSON: integral values stay floats (12.0) so the reading side gets '12.0'."""
    return float(v)


def bundle_dict(frame, *, utc_offset: str = "Z") -> dict:
    """Canonical frame -> FHIR Bundle (type collection) as a dict (no pseudonymisation)."""
    import pandas as pd

    used_p: dict = {}
    used_s: dict = {}
    entries = []
    df = frame.reset_index(drop=True)
    for pid, pf in df.groupby("patient", sort=True):
        first = pf.iloc[0]
        rid = _fhir_id(str(pid), "patient", used_p)
        species = str(first["species"])
        coding = [{"system": s, "code": c, "display": d}
                  for s, c, d in _EXPORT_SPECIES.get(species, [])]
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
        entries.append({"fullUrl": f"Patient/{rid}", "resource": patient})
        for sid, sf in pf.groupby("specimen", sort=False):
            s0 = sf.iloc[0]
            srid = _fhir_id(f"{pid}.{sid}", "specimen", used_s)
            when = _dt(s0["collected_at"], utc_offset)
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
            entries.append({"fullUrl": f"Specimen/{srid}", "resource": spec})
            for k, row in enumerate(sf.itertuples(index=False)):
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
                obs = {"resourceType": "Observation", "id": f"{srid}-{k + 1}"[:64],
                       "status": "final",
                       "category": [{"coding": [{"system": OBS_CATEGORY, "code": "laboratory"}]}],
                       "code": code, "subject": {"reference": f"Patient/{rid}"},
                       "effectiveDateTime": when, "valueQuantity": vq,
                       "specimen": {"reference": f"Specimen/{srid}"}}
                if not pd.isna(row.method) and str(row.method):
                    obs["method"] = {"text": str(row.method)}
                if not pd.isna(row.replicate) and int(row.replicate) != 1:
                    obs["extension"] = [{"url": REPLICATE_EXTENSION,
                                         "valueInteger": int(row.replicate)}]
                entries.append({"fullUrl": f"Observation/{obs['id']}", "resource": obs})
            for kind in ("haemolysis", "lipaemia", "icterus"):
                v = s0[kind]
                if pd.isna(v):
                    continue
                oid = f"{srid}-{kind}"[:64]
                entries.append({"fullUrl": f"Observation/{oid}", "resource": {
                    "resourceType": "Observation", "id": oid, "status": "final",
                    "code": {"coding": [{"system": QUALITY_SYSTEM, "code": kind}],
                             "text": f"{kind.capitalize()} index"},
                    "subject": {"reference": f"Patient/{rid}"}, "effectiveDateTime": when,
                    "valueQuantity": {"value": float(v)},
                    "specimen": {"reference": f"Specimen/{srid}"}}})
    return {"resourceType": "Bundle", "type": "collection", "entry": entries}


def _label(analyte: str) -> str:
    from . import units

    try:
        return units.label(analyte)
    except KeyError:
        return analyte


def _display_unit(analyte: str, unit: str) -> str:
    from . import units

    try:
        if units.canonical_unit(analyte) == unit:
            return units.display_unit(analyte)
    except KeyError:
        pass
    return unit


def _loinc_for(analyte: str) -> str | None:
    from . import units

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


def write_bundle(canonical_frame, path, pseudonymise: bool = True, *, salt: bytes | None = None,
                 utc_offset: str = "Z") -> Path:
    """Write a canonical frame as a FHIR R4 Bundle (type collection) in JSON.

    With ``pseudonymise`` patient and specimen ids are replaced by ``P-``/``S-`` HMAC pseudonyms
    (see :mod:`bayesbase.store`); ``salt`` makes them stable across exports (the store passes
    its own); without one a fresh random salt is used, so two exports cannot be linked.
    """
    frame = canonical_frame
    if pseudonymise:
        import secrets

        from .store import pseudonymise_frame
        frame = pseudonymise_frame(frame, salt if salt is not None else secrets.token_bytes(32))
    bundle = bundle_dict(frame, utc_offset=utc_offset)
    path = Path(path)
    path.write_text(json.dumps(bundle, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    return path
