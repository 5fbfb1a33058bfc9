"""FHIR R4 import and export of laboratory results (standard library ``json`` only).

Layer 4: imports ``bayesbase.constants``, ``errors``, ``units``, ``privacy`` (pseudonyms on
export) and (for validation) ``data``; never ``bayesbase.store``.

Reading (:func:`read_bundle`)
-----------------------------
Input: a ``Bundle`` (any ``type``; ``collection`` is what files usually carry) of ``Patient``,
``Observation`` and optionally ``Specimen`` resources, as a path (``str`` or ``Path``; a
``str`` beginning with ``{`` or ``[`` is JSON text), JSON text as ``bytes``, or already parsed
JSON. Output: a raw frame in the tidy results contract (columns ``patient, species,
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

Malformed input never raises anything else (tests/test_fhir_robustness.py, with property
tests over arbitrary JSON):

* an element of the wrong JSON type (``identifier``, ``extension`` or ``coding`` that is not an
  array, ``collection`` or ``valueQuantity`` that is not an object, a code that is not a
  string, ...) is a problem at its path (``...extension(patient-animal).extension``); what
  merely follows from it (e.g. "no species" after a broken extension array) is not repeated;
* ``valueQuantity.value`` must be a finite JSON number: NaN, +-Infinity, and numbers beyond
  double precision (``1e400``, a 400-digit integer) are refused at ``valueQuantity.value``; an
  integer longer than CPython's int/str conversion limit (4300 digits by default) is read as
  out of range rather than raising; messages describe huge values instead of echoing them;
* ``comparator`` must be one of the four codes; the replicate extension's ``valueInteger`` a
  positive integer (at most 2**31 - 1, a sanity bound of the project); ``birthDate`` a FHIR date;
* JSON nested beyond the parser's depth limit is refused as "nested too deeply" naming the
  file; an unreadable path (a directory, a name too long) is refused as "cannot read the file".

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
import math
import re
import sys
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
    """Problems found so far (each once: a concept read twice reports its fault once)."""

    def __init__(self, source: str):
        self.source = source
        self.problems: list[Problem] = []
        self._seen: set[tuple[str, str]] = set()
        self._under: set[str] = set()  # every path prefix of a reported problem
        self.analyte_errors: dict[str, KeyError | None] = {}  # name -> resolve_analyte outcome

    def add(self, where: str, message: str, hint: str | None = None) -> None:
        if (where, message) in self._seen:
            return
        self._seen.add((where, message))
        self.problems.append(Problem(self.source, None, where, message, hint))
        self._under.add(where)
        self._under.update(where[:m.start()] for m in re.finditer(r"[.\[]", where))

    def has_under(self, path: str) -> bool:
        """True when a problem was already reported at ``path`` or inside it (a consequence
        of that fault is then not reported again)."""
        return path in self._under

    # typed access: a field of the wrong JSON type is a located problem, never an exception
    def obj(self, parent, key: str, where: str) -> dict | None:
        """``parent[key]`` when it is a JSON object; None when absent (or of the wrong type,
        which is reported at ``where.key``)."""
        v = parent.get(key) if isinstance(parent, dict) else None
        if v is None or isinstance(v, dict):
            return v
        self.add(f"{where}.{key}", f"{key} must be a JSON object, not {_jtype(v)}",
                 "see the FHIR R4 JSON representation of this element")
        return None

    def arr(self, parent, key: str, where: str) -> list[tuple[str, dict]]:
        """The objects of the JSON array ``parent[key]`` as (path, object) pairs; an array
        of the wrong type, or an item that is not an object, is reported."""
        v = parent.get(key) if isinstance(parent, dict) else None
        if v is None:
            return []
        if not isinstance(v, list):
            self.add(f"{where}.{key}", f"{key} must be a JSON array, not {_jtype(v)}",
                     "FHIR JSON writes repeating elements as arrays, even with one item")
            return []
        out = []
        for i, item in enumerate(v):
            if isinstance(item, dict):
                out.append((f"{where}.{key}[{i}]", item))
            else:
                self.add(f"{where}.{key}[{i}]", f"{key} item must be a JSON object, "
                         f"not {_jtype(item)}")
        return out

    def text(self, parent, key: str, where: str, *, integer_ok: bool = False) -> str | None:
        """``parent[key]`` as text (None when absent or empty); an integer is accepted where
        ``integer_ok`` (ids and codes some systems write as numbers); other types are reported."""
        v = parent.get(key) if isinstance(parent, dict) else None
        if v is None:
            return None
        if isinstance(v, str):
            return v if v.strip() else None
        if integer_ok and isinstance(v, int) and not isinstance(v, bool) and _int_text_ok(v):
            return str(v)
        self.add(f"{where}.{key}", f"{key} must be a JSON string, not {_jtype(v)}")
        return None


def _max_digits() -> int:
    """Digits beyond which CPython refuses int <-> text conversion
    (``sys.get_int_max_str_digits``: 4300 by default, 0 for no limit)."""
    return getattr(sys, "get_int_max_str_digits", lambda: 0)() or 10 ** 9


def _int_text_ok(v: int) -> bool:
    # bit_length * log10(2) bounds the number of digits from below; stay well inside the limit
    return v.bit_length() * 0.30103 < _max_digits() - 2


class _Overflowed(float):
    """A JSON number beyond double precision, kept as +-inf with the text it was written as
    (every reader of a value refuses it with a located message that shows that text)."""

    written: str = ""


def _overflowed(text: str) -> _Overflowed:
    out = _Overflowed(float(text))
    out.written = text
    return out


def _json_int(text: str):
    """``parse_int`` hook: an integer too long for CPython's int conversion becomes +-inf."""
    if len(text) - text.startswith("-") >= _max_digits():
        return _overflowed(text)
    return int(text)


def _json_float(text: str):
    """``parse_float`` hook: a number that overflows double precision keeps its text."""
    value = float(text)
    return _overflowed(text) if math.isinf(value) else value


def _jtype(v) -> str:
    """A short description of a JSON value for a message (never the whole value)."""
    if v is None:
        return "null"
    if isinstance(v, bool):
        return f"the boolean {'true' if v else 'false'}"
    if isinstance(v, (int, float)):
        return f"the number {_show(v)}"
    if isinstance(v, str):
        return f"the text {_show(v)}"
    if isinstance(v, list):
        return f"an array of {len(v)} item(s)"
    if isinstance(v, dict):
        return "an object"
    return type(v).__name__


def _show(v, limit: int = 48) -> str:
    """repr-like text of a JSON scalar, shortened; huge integers are described, not printed."""
    if isinstance(v, bool) or v is None:
        return json.dumps(v)
    if isinstance(v, int):
        if not _int_text_ok(v) or v.bit_length() > 160:
            return f"(an integer of about {int(v.bit_length() * 0.30103) + 1} digits)"
        return str(v)
    if isinstance(v, _Overflowed):
        w = v.written.lstrip("-")
        digits = len(w) if w.isdigit() else 0
        shown = v.written if len(v.written) <= 24 else f"{v.written[:12]}..."
        return f"{shown} (a number of {digits} digits)" if digits > 24 else shown
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, str):
        r = repr(v)
        return r if len(r) <= limit else r[:limit - 4] + "...'"
    return _jtype(v)


def _pathpart(v) -> str:
    """A resource type or id as shown inside a resource path."""
    if isinstance(v, str):
        return v if len(v) <= 64 else v[:61] + "..."
    return "?" if v is None else _show(v, 24)


def _load_json(path_or_obj, source):
    if isinstance(path_or_obj, (dict, list)):
        return path_or_obj, source or "<bundle>"
    if isinstance(path_or_obj, (bytes, bytearray)):
        src = source or "<bundle>"
        try:
            text = bytes(path_or_obj).decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            raise ValidationError([Problem(src, None, None,
                                           f"not UTF-8 text, so not FHIR JSON ({exc.reason})")]) \
                from None
    elif isinstance(path_or_obj, Path) or (
            isinstance(path_or_obj, str) and path_or_obj.lstrip()[:1] not in ("{", "[")):
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
        except (OSError, ValueError) as exc:  # a directory, no permission, name too long, NUL
            reason = getattr(exc, "strerror", None) or str(exc)
            raise ValidationError([Problem(src, None, None,
                                           f"cannot read the file ({reason})")]) from None
    elif isinstance(path_or_obj, str):
        text = path_or_obj
        src = source or "<bundle>"
    else:  # an already parsed JSON scalar (number, boolean, null)
        return path_or_obj, source or "<bundle>"
    try:
        return json.loads(text, parse_int=_json_int, parse_float=_json_float), src
    except json.JSONDecodeError as exc:
        raise ValidationError([Problem(
            src, None, None, f"not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})",
            "a FHIR Bundle in JSON format is expected")]) from None
    except RecursionError:
        raise ValidationError([Problem(
            src, None, None, "the JSON is nested too deeply to read (arrays or objects inside "
            "one another beyond the JSON reader's depth limit)",
            "a FHIR Bundle nests a few levels deep; this file is not one")]) from None


def _codings(ctx: _Ctx, concept, where: str) -> list[tuple[str, dict]]:
    """(path, coding) pairs of a CodeableConcept at ``where``."""
    return ctx.arr(concept, "coding", where)


def _texts(ctx: _Ctx, concept, where: str) -> list[str]:
    """``text`` then every coding's ``display`` of a CodeableConcept, stripped, non-empty."""
    if not isinstance(concept, dict):
        return []
    out = [ctx.text(concept, "text", where)]
    out += [ctx.text(c, "display", cw) for cw, c in _codings(ctx, concept, where)]
    return [t.strip() for t in out if t and t.strip()]


def _concept(ctx: _Ctx, parent, key: str, where: str) -> tuple[dict | None, str]:
    return ctx.obj(parent, key, where), f"{where}.{key}"


def _ext(ctx: _Ctx, resource, url: str, where: str, label: str):
    """(extension, its path) of the first extension of ``resource`` with this url, or
    (None, path). ``label`` names it in paths, e.g. ``extension(patient-animal)``."""
    for _, e in ctx.arr(resource, "extension", where):
        if e.get("url") == url:
            return e, f"{where}.extension({label})"
    return None, f"{where}.extension({label})"


def _identifier(ctx: _Ctx, resource, where: str) -> str | None:
    """The first non-empty ``identifier[].value`` (text, or an integer written as a number)."""
    for iw, ident in ctx.arr(resource, "identifier", where):
        value = ctx.text(ident, "value", iw, integer_ok=True)
        if value is not None:
            return value
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


def _species(ctx: _Ctx, ext, ext_where: str) -> str | None:
    sp, sw = _ext_sub(ctx, ext, "species", ext_where)
    if sp is None:
        if ctx.has_under(f"{ext_where}.extension"):
            return None
        ctx.add(f"{ext_where}.species",
                "Patient has no species (the patient-animal extension's species is required)")
        return None
    concept, cw = _concept(ctx, sp, "valueCodeableConcept", sw)
    codings = _codings(ctx, concept, cw)
    shown = []
    for kw, c in codings:
        system = ctx.text(c, "system", kw) or ""
        code = ctx.text(c, "code", kw, integer_ok=True) or ""
        hit = SPECIES_CODES.get((system.rstrip("/"), code))
        if hit:
            return hit
        shown.append(f"{_show(system)}|{_show(code)}")
    texts = _texts(ctx, concept, cw)
    for t in texts:
        hit = _SPECIES_TEXT.get(t.lower())
        if hit:
            return hit
    if ctx.has_under(sw):
        return None
    shown = ", ".join(_show(t) for t in texts) or ", ".join(shown) or "nothing"
    ctx.add(f"{ext_where}.species",
            f"species not recognised ({shown})",
            "use SNOMED CT 448771007 (dog) / 448169003 (cat), NCBI taxonomy 9615 / 9685 / 9796, "
            "or the text dog, cat, horse")
    return None


def _ext_sub(ctx: _Ctx, ext, url: str, ext_where: str):
    """(sub-extension, its path) with this url inside a complex extension, or (None, path)."""
    for _, e in ctx.arr(ext, "extension", ext_where):
        if e.get("url") == url:
            return e, f"{ext_where}.{url}"
    return None, f"{ext_where}.{url}"


def _patient(res, ctx, where) -> dict:
    pid = _identifier(ctx, res, where) or ctx.text(res, "id", where, integer_ok=True)
    if not pid:
        ctx.add(f"{where}.id", "Patient has neither an identifier nor an id")
    ext, ext_where = _ext(ctx, res, PATIENT_ANIMAL, where, "patient-animal")
    breed = status = None
    if ext is None:
        if not ctx.has_under(f"{where}.extension"):
            ctx.add(f"{where}.extension", "Patient has no species: the patient-animal extension "
                    f"({PATIENT_ANIMAL}) is missing")
        species = None
    else:
        species = _species(ctx, ext, ext_where)
        b, bw = _ext_sub(ctx, ext, "breed", ext_where)
        if b is not None:
            texts = _texts(ctx, *_concept(ctx, b, "valueCodeableConcept", bw))
            breed = texts[0] if texts else None
        g, gw = _ext_sub(ctx, ext, "genderStatus", ext_where)
        if g is not None:
            concept, cw = _concept(ctx, g, "valueCodeableConcept", gw)
            codes = [ctx.text(c, "code", kw) for kw, c in _codings(ctx, concept, cw)]
            codes = [c.lower() for c in codes if c] + [t.lower() for t in _texts(ctx, concept, cw)]
            status = next((c for c in codes if c in ("neutered", "intact")), None)
    gender = (ctx.text(res, "gender", where) or "").lower() or None
    if gender in ("male", "female"):
        sex = f"{gender}_{status}" if status else gender
    else:
        sex = None
    birth = ctx.text(res, "birthDate", where)
    if birth is not None and _time(birth) is None:
        ctx.add(f"{where}.birthDate", f"birthDate {_show(birth)} is not a FHIR date",
                "write it as YYYY-MM-DD")
    return {"id": pid, "species": species, "breed": breed, "sex": sex,
            "birth_date": _time(birth) if birth else None}


def _specimen(res, ctx, where) -> dict:
    """What the reader takes from a Specimen: id, collection time, fasting status, state."""
    sid = _identifier(ctx, res, where) or ctx.text(res, "id", where, integer_ok=True)
    coll = ctx.obj(res, "collection", where)
    cw = f"{where}.collection"
    collected = ctx.text(coll, "collectedDateTime", cw)
    fasted = None
    concept, fw = _concept(ctx, coll, "fastingStatusCodeableConcept", cw)
    for kw, c in _codings(ctx, concept, fw):
        code = ctx.text(c, "code", kw)
        fasted = {"F": "yes", "NF": "no"}.get((code or "").upper(), fasted)
    state = None
    se, sw = _ext(ctx, res, STATE_EXTENSION, where, "health-state")
    if se is not None:
        state = ctx.text(se, "valueCode", sw) or ctx.text(se, "valueString", sw)
    return {"id": sid, "collected": collected, "fasted": fasted, "state": state}


def _ref_keys(ref: str) -> list[str]:
    ref = ref.strip()
    keys = [ref]
    m = re.search(r"([A-Za-z]+)/([^/]+?)(?:/_history/.*)?$", ref)
    if m:
        keys.append(f"{m.group(1)}/{m.group(2)}")
    return keys


def _as_float(v) -> float | None:
    """A JSON number as a float (+-inf when it overflows); None for anything else."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    try:
        return float(v)
    except OverflowError:
        return math.inf if v > 0 else -math.inf


def _number(v) -> float | None:
    """A JSON number, or text holding one, as a float (possibly non-finite); else None."""
    if isinstance(v, str):
        try:
            return float(v.strip())
        except ValueError:
            return None
    return _as_float(v)


def _fmt(v) -> str:
    """JSON number -> text without a float artefact (1.0 -> '1.0', 12 -> '12')."""
    if isinstance(v, str):
        return v.strip()
    return repr(v) if isinstance(v, float) else str(v)


def _quality_kind(ctx: _Ctx, res, where: str) -> str | None:
    code, cw = _concept(ctx, res, "code", where)
    for kw, c in _codings(ctx, code, cw):
        if c.get("system") == QUALITY_SYSTEM and c.get("code") in ("haemolysis", "lipaemia",
                                                                    "icterus"):
            return c["code"]
    for t in _texts(ctx, code, cw):
        for kind, rx in _QUALITY:
            if rx.search(t) and ("index" in t.lower() or "indices" in t.lower()
                                 or len(t.split()) == 1):
                return kind
    return None


def _analyte_name(res, ctx, where):
    """Analyte name as reported (a name bayesbase.units resolves), or None with a problem."""
    from . import units

    code, cw = _concept(ctx, res, "code", where)
    if code is None:
        if res.get("code") is None:
            ctx.add(cw, "Observation has no code")
        return None
    loinc_codes = []
    for kw, c in _codings(ctx, code, cw):
        system = ctx.text(c, "system", kw) or ""
        lc = ctx.text(c, "code", kw)
        if system.rstrip("/") == LOINC and lc:
            loinc_codes.append(lc.strip())
    for lc in loinc_codes:
        if lc in LOINC_TO_ANALYTE:
            return LOINC_TO_ANALYTE[lc]
    registry = _registry_loinc()
    for lc in loinc_codes:
        if lc in registry:
            return registry[lc]
    shown = f" (LOINC {', '.join(_show(c, 24) for c in loinc_codes)})" if loinc_codes else ""
    texts = _texts(ctx, code, cw)
    first_error = None
    for t in texts:
        if t not in ctx.analyte_errors:  # one look-up per distinct name (suggestions are slow)
            try:
                units.resolve_analyte(t)
                ctx.analyte_errors[t] = None
            except KeyError as exc:
                ctx.analyte_errors[t] = exc
        if ctx.analyte_errors[t] is None:
            return t
        first_error = first_error or ctx.analyte_errors[t]
    if ctx.has_under(cw):
        return None
    if texts:
        hint = getattr(first_error, "hint", None)
        ctx.add(cw, f"unknown analyte {_show(texts[0])}{shown}", hint)
        return None
    ctx.add(cw, f"Observation code is not recognised{shown} and has no text",
            "give a LOINC code the project knows or code.text")
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


#: Replicate numbers accepted (a sanity bound of the project: a 32-bit positive integer).
_MAX_REPLICATE = 2 ** 31 - 1


def _replicate(ctx: _Ctx, res, where: str) -> int | None:
    ext, ew = _ext(ctx, res, REPLICATE_EXTENSION, where, "replicate")
    if ext is None:
        return None
    v = ext.get("valueInteger")
    if isinstance(v, int) and not isinstance(v, bool) and 1 <= v <= _MAX_REPLICATE:
        return v
    ctx.add(f"{ew}.valueInteger", f"replicate number {_show(v)} is not a positive integer",
            f"number the replicates of one analyte on one specimen 1, 2, ... "
            f"up to {_MAX_REPLICATE}")
    return None


def _quality_value(ctx: _Ctx, res, where: str, kind: str) -> float | None:
    """The value of a sample-quality index Observation (valueQuantity.value, valueInteger or
    valueString), finite; else None with a located problem."""
    vq = ctx.obj(res, "valueQuantity", where)
    for field, raw in ((f"{where}.valueQuantity.value", (vq or {}).get("value")),
                       (f"{where}.valueInteger", res.get("valueInteger")),
                       (f"{where}.valueString", res.get("valueString"))):
        v = _number(raw)
        if v is None:
            continue
        if not math.isfinite(v):
            ctx.add(field, f"{kind} index {_show(raw)} is out of range: not a finite number")
            return None
        return v
    ctx.add(f"{where}.value[x]", f"{kind} index has no numeric value")
    return None


def _parse(bundle, ctx: _Ctx):
    """Bundle dict -> (rows, paths) with problems collected in ctx."""
    from . import units

    if not isinstance(bundle, dict) or bundle.get("resourceType") != "Bundle":
        what = (_show(bundle.get("resourceType")) if isinstance(bundle, dict)
                else f"absent: the JSON is {_jtype(bundle)}")
        ctx.add("resourceType", f"not a FHIR Bundle (resourceType is {what})",
                "export the results as a Bundle of Observation and Patient resources")
        return [], []
    entries = bundle.get("entry")
    if entries is not None and not isinstance(entries, list):
        ctx.add("Bundle.entry", f"Bundle.entry must be a JSON array, not {_jtype(entries)}")
        return [], []
    refs: dict[str, tuple[str, int, dict]] = {}
    observations, patients, specimens = [], {}, {}
    for i, entry in enumerate(entries or []):
        res = entry.get("resource") if isinstance(entry, dict) else None
        if not isinstance(res, dict):
            ctx.add(f"Bundle.entry[{i}]", "entry has no resource")
            continue
        rt = res.get("resourceType")
        where = f"Bundle.entry[{i}].resource({_pathpart(rt)}/{_pathpart(res.get('id', '?'))})"
        if not isinstance(rt, str):
            ctx.add(f"{where}.resourceType",
                    f"resourceType must be a JSON string, not {_jtype(rt)}")
            continue
        keys = []
        full = ctx.text(entry, "fullUrl", f"Bundle.entry[{i}]")
        if full:
            keys.append(full)
        rid = ctx.text(res, "id", where, integer_ok=True)
        if rid:
            keys.append(f"{rt}/{rid}")
        for k in keys:
            refs[k] = (rt, i, res)
        if rt == "Observation":
            observations.append((i, where, res))
        elif rt == "Patient":
            patients[i] = _patient(res, ctx, where)
        elif rt == "Specimen":
            specimens[i] = _specimen(res, ctx, where)
    if not observations:
        ctx.add("Bundle.entry", "the Bundle holds no Observation resources",
                "each result must be an Observation")
        return [], []

    def resolve(ref_obj, want, ref_where):
        ref = ctx.text(ref_obj, "reference", ref_where)
        if not ref:
            return None, None
        for k in _ref_keys(ref):
            hit = refs.get(k)
            if hit and hit[0] == want:
                return hit, ref
        return None, ref

    rows, paths, quality = [], [], {}
    for i, where, res in observations:
        status = (ctx.text(res, "status", where) or "").lower()
        if status in _SKIP_STATUS:
            continue
        if status and status not in _READ_STATUS:
            ctx.add(f"{where}.status", f"unknown status {_show(status)}",
                    "final, amended, corrected, preliminary are read; entered-in-error, "
                    "cancelled are skipped")
            continue
        ref_where = f"{where}.subject"
        subj = ctx.obj(res, "subject", where)
        hit, ref = resolve(subj, "Patient", ref_where)
        if hit is None:
            ctx.add(ref_where,
                    f"subject {_show(ref)} is not a Patient in this Bundle" if ref else
                    "Observation has no subject", "include the Patient resource in the Bundle")
            continue
        pat = patients.get(hit[1])
        if pat is None or pat["id"] is None:
            continue
        ref_where = f"{where}.specimen"
        spec_obj = ctx.obj(res, "specimen", where)
        spec_hit, spec_ref = resolve(spec_obj, "Specimen", ref_where)
        spec = specimens.get(spec_hit[1]) if spec_hit else None
        when = ctx.text(res, "effectiveDateTime", where)
        if _time(when) is None:
            period = ctx.obj(res, "effectivePeriod", where)
            if period is not None:
                when = ctx.text(period, "start", f"{where}.effectivePeriod")
        if _time(when) is None and spec is not None:
            when = spec["collected"]
        when = when.strip() if _time(when) is not None else None
        if when is None:
            bad = res.get("effectiveDateTime")
            ctx.add(f"{where}.effectiveDateTime",
                    f"collection time {_show(bad)} is not a FHIR dateTime" if bad else
                    "Observation has no effectiveDateTime (collection time)")
            continue
        if spec is not None and spec["id"]:
            specimen = spec["id"]
        elif spec_ref:
            specimen = _ref_keys(spec_ref)[-1].split("/")[-1]
        elif spec_obj is not None and ctx.text(spec_obj, "display", ref_where):
            specimen = ctx.text(spec_obj, "display", ref_where)
        else:
            specimen = f"{pat['id']}|{ctx.text(res, 'effectiveDateTime', where) or when}"
        qkind = _quality_kind(ctx, res, where)
        if qkind is not None:
            v = _quality_value(ctx, res, where, qkind)
            if v is not None:
                quality[(pat["id"], specimen, qkind)] = v
            continue
        name = _analyte_name(res, ctx, where)
        vq = ctx.obj(res, "valueQuantity", where)
        vw = f"{where}.valueQuantity"
        if vq is None:
            if res.get("dataAbsentReason") is not None or res.get("valueQuantity") is not None:
                continue
            other = [k for k in res if k.startswith("value")]
            ctx.add(vw, "Observation has no valueQuantity"
                    + (f" (it has {_show(other[0])})" if other else ""),
                    "a quantitative result needs valueQuantity {value, unit, system, code}")
            continue
        value = vq.get("value")
        number = _as_float(value)
        if number is None:
            ctx.add(f"{vw}.value", "valueQuantity has no value" if value is None else
                    f"value {_show(value)} is not a number", "FHIR JSON writes it as a number")
            continue
        if not math.isfinite(number):
            ctx.add(f"{vw}.value", f"value {_show(value)} is out of range: not a finite number",
                    "a result must be a finite number no larger than about 1.8e308, the limit "
                    "of double precision")
            continue
        comparator = vq.get("comparator")
        if comparator is not None and not (isinstance(comparator, str)
                                           and comparator in _COMPARATOR):
            ctx.add(f"{vw}.comparator", f"unknown comparator {_show(comparator)}",
                    "use <, <=, >= or >")
            continue
        system = vq.get("system")
        code = ctx.text(vq, "code", vw)
        unit_field = "code"
        if code is None or (system not in (None, UCUM)):
            code, unit_field = ctx.text(vq, "unit", vw), "unit"
        if code is None:
            ctx.add(f"{vw}.code", "valueQuantity has no UCUM code or unit")
            continue
        if name is None:
            continue
        try:
            units.conversion_factor(name, code, reported_name=name)
        except KeyError as exc:
            ctx.add(f"{where}.code", str(exc))
            continue
        except ValueError as exc:
            hint = getattr(exc, "hint", None)
            message = getattr(exc, "message", str(exc))
            ctx.add(f"{vw}.{unit_field}",
                    f"UCUM code {_show(code)} is not a valid unit for {name}: {message}", hint)
            continue
        method = None
        m, mw = _concept(ctx, res, "method", where)
        device = ctx.obj(res, "device", where)
        if _texts(ctx, m, mw):
            method = _texts(ctx, m, mw)[0]
        elif device is not None and ctx.text(device, "display", f"{where}.device"):
            method = ctx.text(device, "display", f"{where}.device")
        replicate = _replicate(ctx, res, where)
        rows.append({
            "patient": pat["id"], "species": pat["species"], "breed": pat["breed"],
            "sex": pat["sex"], "birth_date": pat["birth_date"], "specimen": specimen,
            "collected_at": when, "analyte": name,
            "value": (comparator or "") + _fmt(value), "unit": code, "method": method,
            "replicate": replicate,
            "fasted": spec["fasted"] if spec else None,
            "state": (spec["state"] if spec else None) or "",
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
    (see :mod:`bayesbase.privacy`); ``salt`` makes them stable across exports (the store passes
    its own); without one a fresh random salt is used, so two exports cannot be linked.
    """
    frame = canonical_frame
    if pseudonymise:
        import secrets

        from .privacy import pseudonymise_frame
        frame = pseudonymise_frame(frame, salt if salt is not None else secrets.token_bytes(32))
    bundle = bundle_dict(frame, utc_offset=utc_offset)
    path = Path(path)
    path.write_text(json.dumps(bundle, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    return path
