"""Reading a FHIR R4 Bundle of laboratory results (standard library ``json``).

:func:`read_bundle` gives a raw frame in the tidy results contract; :func:`load_bundle`
validates it (:func:`bayesbase.validate.validate`, so that names and units are checked in one
place) and points every problem at its FHIR resource.

Input: a ``Bundle`` (any ``type``; ``collection`` is what files usually carry) of ``Patient``,
``Observation`` and optionally ``Specimen`` resources, as a path (``str`` or ``Path``; a
``str`` beginning with ``{`` or ``[`` is JSON text), JSON text as ``bytes``, or already parsed
JSON. Output: a raw frame with the columns :data:`RAW_COLUMNS`.

* ``Patient``: the patient id is the first ``identifier.value`` (else the resource ``id``);
  the extension ``http://hl7.org/fhir/StructureDefinition/patient-animal`` gives ``species``
  (required), ``breed`` and ``genderStatus``. Species is read from a SNOMED CT code
  (dog 448771007, third-party code only; cat 448169003; source: the project's interoperability
  notes), an NCBI Taxonomy id (dog 9615, cat 9685, horse 9796; from memory), or the text /
  display ("dog", "canine", "Canis familiaris", ...). ``gender`` + ``genderStatus`` make
  ``sex`` (``female_neutered``, ``male_intact``, ``female`` ...). ``birthDate`` -> birth_date.
* ``Observation``: ``code`` (LOINC coding mapped by
  :data:`~bayesbase.io.fhir_codes.LOINC_TO_ANALYTE`, else the project's analyte registry's LOINC
  codes, else ``code.text`` / ``coding.display`` resolved by
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
  ``QUALITY_SYSTEM``, gives that index (``valueQuantity.value``, ``valueInteger`` or
  ``valueString`` as a number) to every result of the same specimen. No LOINC code is used for
  them (none confirmed in the project's notes).
* ``Specimen`` (optional): ``collection.fastingStatusCodeableConcept`` (HL7 v2 table 0916:
  ``F`` fasting, ``NF`` not fasting, ``NG`` not given) -> fasted; the extension
  ``STATE_EXTENSION`` (``healthy`` / ``unwell``) -> state.
* Replicates: the extension ``REPLICATE_EXTENSION`` (valueInteger) if present, else
  repeats of one analyte on one specimen are numbered 1, 2, ... in bundle order.
* Times are passed to :func:`bayesbase.validate.validate` as written: a time with a UTC offset
  is converted to UTC there, a time without one is taken as it is (the contract's rule).

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
"""
from __future__ import annotations

import math
import re
from functools import lru_cache

from .. import units
from ..contract import HIL_INDICES
from ..errors import Problem, ValidationError
from ..validate import validate
from .fhir_codes import (
    COMPARATOR,
    LOINC,
    LOINC_TO_ANALYTE,
    PATIENT_ANIMAL,
    QUALITY_PATTERNS,
    QUALITY_SYSTEM,
    READ_STATUS,
    REPLICATE_EXTENSION,
    SKIP_STATUS,
    SPECIES_CODES,
    SPECIES_TEXT,
    STATE_EXTENSION,
    UCUM,
)
from .fhir_json import ReadContext, jtype, load_json, pathpart, show

__all__ = ["RAW_COLUMNS", "read_bundle", "load_bundle"]

#: Raw tidy columns produced by :func:`read_bundle`.
RAW_COLUMNS = ("patient", "species", "breed", "sex", "birth_date", "specimen", "collected_at",
               "analyte", "value", "unit", "method", "replicate", "fasted", "haemolysis",
               "lipaemia", "icterus", "state")


# ------------------------------------------------------------------------------ elements
def _codings(ctx: ReadContext, concept, where: str) -> list[tuple[str, dict]]:
    """(path, coding) pairs of a CodeableConcept at ``where``."""
    return ctx.arr(concept, "coding", where)


def _texts(ctx: ReadContext, concept, where: str) -> list[str]:
    """``text`` then every coding's ``display`` of a CodeableConcept, stripped, non-empty."""
    if not isinstance(concept, dict):
        return []
    out = [ctx.text(concept, "text", where)]
    out += [ctx.text(c, "display", cw) for cw, c in _codings(ctx, concept, where)]
    return [t.strip() for t in out if t and t.strip()]


def _concept(ctx: ReadContext, parent, key: str, where: str) -> tuple[dict | None, str]:
    return ctx.obj(parent, key, where), f"{where}.{key}"


def _ext(ctx: ReadContext, resource, url: str, where: str, label: str):
    """(extension, its path) of the first extension of ``resource`` with this url, or
    (None, path). ``label`` names it in paths, e.g. ``extension(patient-animal)``."""
    for _, e in ctx.arr(resource, "extension", where):
        if e.get("url") == url:
            return e, f"{where}.extension({label})"
    return None, f"{where}.extension({label})"


def _ext_sub(ctx: ReadContext, ext, url: str, ext_where: str):
    """(sub-extension, its path) with this url inside a complex extension, or (None, path)."""
    for _, e in ctx.arr(ext, "extension", ext_where):
        if e.get("url") == url:
            return e, f"{ext_where}.{url}"
    return None, f"{ext_where}.{url}"


def _identifier(ctx: ReadContext, resource, where: str) -> str | None:
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


def _species(ctx: ReadContext, ext, ext_where: str) -> str | None:
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
        shown.append(f"{show(system)}|{show(code)}")
    texts = _texts(ctx, concept, cw)
    for t in texts:
        hit = SPECIES_TEXT.get(t.lower())
        if hit:
            return hit
    if ctx.has_under(sw):
        return None
    shown = ", ".join(show(t) for t in texts) or ", ".join(shown) or "nothing"
    ctx.add(f"{ext_where}.species",
            f"species not recognised ({shown})",
            "use SNOMED CT 448771007 (dog) / 448169003 (cat), NCBI taxonomy 9615 / 9685 / 9796, "
            "or the text dog, cat, horse")
    return None


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
        ctx.add(f"{where}.birthDate", f"birthDate {show(birth)} is not a FHIR date",
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


def _quality_kind(ctx: ReadContext, res, where: str) -> str | None:
    code, cw = _concept(ctx, res, "code", where)
    for kw, c in _codings(ctx, code, cw):
        if c.get("system") == QUALITY_SYSTEM and c.get("code") in ("haemolysis", "lipaemia",
                                                                    "icterus"):
            return c["code"]
    for t in _texts(ctx, code, cw):
        for kind, rx in QUALITY_PATTERNS:
            if rx.search(t) and ("index" in t.lower() or "indices" in t.lower()
                                 or len(t.split()) == 1):
                return kind
    return None


def _analyte_name(res, ctx, where):
    """Analyte name as reported (a name bayesbase.units resolves), or None with a problem."""
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
    shown = f" (LOINC {', '.join(show(c, 24) for c in loinc_codes)})" if loinc_codes else ""
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
        ctx.add(cw, f"unknown analyte {show(texts[0])}{shown}", hint)
        return None
    ctx.add(cw, f"Observation code is not recognised{shown} and has no text",
            "give a LOINC code the project knows or code.text")
    return None


@lru_cache(maxsize=None)
def _registry_loinc() -> dict:
    """LOINC code -> reported analyte name, from the project's analyte registry."""
    out = {}
    for aid in units.analyte_ids():
        info = units.analyte_info(aid)
        if info.get("loinc"):
            out[str(info["loinc"])] = aid
        for group in (info.get("reported_as") or {}).values():
            if group.get("loinc") and group.get("names"):
                out[str(group["loinc"])] = group["names"][0]
    return out


#: Replicate numbers accepted (a sanity bound of the project: a 32-bit positive integer).
_MAX_REPLICATE = 2 ** 31 - 1


def _replicate(ctx: ReadContext, res, where: str) -> int | None:
    ext, ew = _ext(ctx, res, REPLICATE_EXTENSION, where, "replicate")
    if ext is None:
        return None
    v = ext.get("valueInteger")
    if isinstance(v, int) and not isinstance(v, bool) and 1 <= v <= _MAX_REPLICATE:
        return v
    ctx.add(f"{ew}.valueInteger", f"replicate number {show(v)} is not a positive integer",
            f"number the replicates of one analyte on one specimen 1, 2, ... "
            f"up to {_MAX_REPLICATE}")
    return None


def _quality_value(ctx: ReadContext, res, where: str, kind: str) -> float | None:
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
            ctx.add(field, f"{kind} index {show(raw)} is out of range: not a finite number")
            return None
        return v
    ctx.add(f"{where}.value[x]", f"{kind} index has no numeric value")
    return None


# ------------------------------------------------------------------------------ the bundle
class _Index:
    """The bundle's resources: references -> (type, entry, resource), the Observations to
    read, and what was read from each Patient and Specimen (by entry number)."""

    def __init__(self):
        self.refs: dict[str, tuple[str, int, dict]] = {}
        self.observations: list[tuple[int, str, dict]] = []
        self.patients: dict[int, dict] = {}
        self.specimens: dict[int, dict] = {}

    def resolve(self, ctx: ReadContext, ref_obj, want: str, ref_where: str):
        """(hit, reference text) of a Reference to a resource of type ``want``."""
        ref = ctx.text(ref_obj, "reference", ref_where)
        if not ref:
            return None, None
        for k in _ref_keys(ref):
            hit = self.refs.get(k)
            if hit and hit[0] == want:
                return hit, ref
        return None, ref


def _entries(bundle, ctx: ReadContext) -> list | None:
    """The bundle's entries, or None (with a problem) when it is not a Bundle."""
    if not isinstance(bundle, dict) or bundle.get("resourceType") != "Bundle":
        what = (show(bundle.get("resourceType")) if isinstance(bundle, dict)
                else f"absent: the JSON is {jtype(bundle)}")
        ctx.add("resourceType", f"not a FHIR Bundle (resourceType is {what})",
                "export the results as a Bundle of Observation and Patient resources")
        return None
    entries = bundle.get("entry")
    if entries is not None and not isinstance(entries, list):
        ctx.add("Bundle.entry", f"Bundle.entry must be a JSON array, not {jtype(entries)}")
        return None
    return entries or []


def _index(entries: list, ctx: ReadContext) -> _Index:
    """Every resource by its references; Patients and Specimens read, Observations listed."""
    index = _Index()
    for i, entry in enumerate(entries):
        res = entry.get("resource") if isinstance(entry, dict) else None
        if not isinstance(res, dict):
            ctx.add(f"Bundle.entry[{i}]", "entry has no resource")
            continue
        rt = res.get("resourceType")
        where = f"Bundle.entry[{i}].resource({pathpart(rt)}/{pathpart(res.get('id', '?'))})"
        if not isinstance(rt, str):
            ctx.add(f"{where}.resourceType",
                    f"resourceType must be a JSON string, not {jtype(rt)}")
            continue
        keys = []
        full = ctx.text(entry, "fullUrl", f"Bundle.entry[{i}]")
        if full:
            keys.append(full)
        rid = ctx.text(res, "id", where, integer_ok=True)
        if rid:
            keys.append(f"{rt}/{rid}")
        for k in keys:
            index.refs[k] = (rt, i, res)
        if rt == "Observation":
            index.observations.append((i, where, res))
        elif rt == "Patient":
            index.patients[i] = _patient(res, ctx, where)
        elif rt == "Specimen":
            index.specimens[i] = _specimen(res, ctx, where)
    return index


# ------------------------------------------------------------------------------ one Observation
def _status_read(ctx: ReadContext, res, where: str) -> bool:
    """False for a status that is skipped (entered in error, cancelled ...) or unknown."""
    status = (ctx.text(res, "status", where) or "").lower()
    if status in SKIP_STATUS:
        return False
    if status and status not in READ_STATUS:
        ctx.add(f"{where}.status", f"unknown status {show(status)}",
                "final, amended, corrected, preliminary are read; entered-in-error, "
                "cancelled are skipped")
        return False
    return True


def _subject(ctx: ReadContext, index: _Index, res, where: str) -> dict | None:
    """What was read from the Observation's Patient, or None (a problem when it is missing)."""
    ref_where = f"{where}.subject"
    subj = ctx.obj(res, "subject", where)
    hit, ref = index.resolve(ctx, subj, "Patient", ref_where)
    if hit is None:
        ctx.add(ref_where,
                f"subject {show(ref)} is not a Patient in this Bundle" if ref else
                "Observation has no subject", "include the Patient resource in the Bundle")
        return None
    pat = index.patients.get(hit[1])
    if pat is None or pat["id"] is None:
        return None
    return pat


def _collection_time(ctx: ReadContext, res, where: str, spec: dict | None) -> str | None:
    """effectiveDateTime, else effectivePeriod.start, else the Specimen's collection time."""
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
                f"collection time {show(bad)} is not a FHIR dateTime" if bad else
                "Observation has no effectiveDateTime (collection time)")
    return when


def _specimen_id(ctx: ReadContext, res, where: str, pat: dict, spec: dict | None, spec_ref,
                 spec_obj, when: str) -> str:
    """The Specimen's id, else the reference's id part or display, else patient|time."""
    ref_where = f"{where}.specimen"
    if spec is not None and spec["id"]:
        return spec["id"]
    if spec_ref:
        return _ref_keys(spec_ref)[-1].split("/")[-1]
    if spec_obj is not None and ctx.text(spec_obj, "display", ref_where):
        return ctx.text(spec_obj, "display", ref_where)
    return f"{pat['id']}|{ctx.text(res, 'effectiveDateTime', where) or when}"


def _quantity(ctx: ReadContext, res, where: str):
    """(value, comparator, unit code, the field it came from) of valueQuantity, or None (a
    problem unless the Observation says why it has no value)."""
    vq = ctx.obj(res, "valueQuantity", where)
    vw = f"{where}.valueQuantity"
    if vq is None:
        if res.get("dataAbsentReason") is not None or res.get("valueQuantity") is not None:
            return None
        other = [k for k in res if k.startswith("value")]
        ctx.add(vw, "Observation has no valueQuantity"
                + (f" (it has {show(other[0])})" if other else ""),
                "a quantitative result needs valueQuantity {value, unit, system, code}")
        return None
    value = vq.get("value")
    number = _as_float(value)
    if number is None:
        ctx.add(f"{vw}.value", "valueQuantity has no value" if value is None else
                f"value {show(value)} is not a number", "FHIR JSON writes it as a number")
        return None
    if not math.isfinite(number):
        ctx.add(f"{vw}.value", f"value {show(value)} is out of range: not a finite number",
                "a result must be a finite number no larger than about 1.8e308, the limit "
                "of double precision")
        return None
    comparator = vq.get("comparator")
    if comparator is not None and not (isinstance(comparator, str)
                                       and comparator in COMPARATOR):
        ctx.add(f"{vw}.comparator", f"unknown comparator {show(comparator)}",
                "use <, <=, >= or >")
        return None
    system = vq.get("system")
    code = ctx.text(vq, "code", vw)
    unit_field = "code"
    if code is None or (system not in (None, UCUM)):
        code, unit_field = ctx.text(vq, "unit", vw), "unit"
    if code is None:
        ctx.add(f"{vw}.code", "valueQuantity has no UCUM code or unit")
        return None
    return value, comparator, code, unit_field


def _unit_ok(ctx: ReadContext, name: str, code: str, unit_field: str, where: str) -> bool:
    """True when ``code`` converts for the analyte; else a problem at the unit's field."""
    try:
        units.conversion_factor(name, code, reported_name=name)
    except KeyError as exc:
        ctx.add(f"{where}.code", str(exc))
        return False
    except ValueError as exc:
        hint = getattr(exc, "hint", None)
        message = getattr(exc, "message", str(exc))
        ctx.add(f"{where}.valueQuantity.{unit_field}",
                f"UCUM code {show(code)} is not a valid unit for {name}: {message}", hint)
        return False
    return True


def _method(ctx: ReadContext, res, where: str) -> str | None:
    """method text / display, else device.display."""
    m, mw = _concept(ctx, res, "method", where)
    device = ctx.obj(res, "device", where)
    if _texts(ctx, m, mw):
        return _texts(ctx, m, mw)[0]
    if device is not None and ctx.text(device, "display", f"{where}.device"):
        return ctx.text(device, "display", f"{where}.device")
    return None


def _observation(ctx: ReadContext, index: _Index, where: str, res, quality: dict) -> dict | None:
    """The raw row of one Observation, or None (skipped, a problem, or a sample-quality index,
    which goes into ``quality`` by (patient, specimen, index))."""
    if not _status_read(ctx, res, where):
        return None
    pat = _subject(ctx, index, res, where)
    if pat is None:
        return None
    spec_obj = ctx.obj(res, "specimen", where)
    spec_hit, spec_ref = index.resolve(ctx, spec_obj, "Specimen", f"{where}.specimen")
    spec = index.specimens.get(spec_hit[1]) if spec_hit else None
    when = _collection_time(ctx, res, where, spec)
    if when is None:
        return None
    specimen = _specimen_id(ctx, res, where, pat, spec, spec_ref, spec_obj, when)
    qkind = _quality_kind(ctx, res, where)
    if qkind is not None:
        v = _quality_value(ctx, res, where, qkind)
        if v is not None:
            quality[(pat["id"], specimen, qkind)] = v
        return None
    name = _analyte_name(res, ctx, where)
    quantity = _quantity(ctx, res, where)
    if quantity is None or name is None:
        return None
    value, comparator, code, unit_field = quantity
    if not _unit_ok(ctx, name, code, unit_field, where):
        return None
    method = _method(ctx, res, where)
    replicate = _replicate(ctx, res, where)
    return {
        "patient": pat["id"], "species": pat["species"], "breed": pat["breed"],
        "sex": pat["sex"], "birth_date": pat["birth_date"], "specimen": specimen,
        "collected_at": when, "analyte": name,
        "value": (comparator or "") + _fmt(value), "unit": code, "method": method,
        "replicate": replicate,
        "fasted": spec["fasted"] if spec else None,
        "state": (spec["state"] if spec else None) or "",
    }


def _number_replicates(rows: list[dict], quality: dict) -> None:
    """Replicates without the extension numbered 1, 2, ... per (patient, specimen, analyte) in
    bundle order; the sample-quality indices given to every row of their specimen."""
    seen: dict[tuple, int] = {}
    for r in rows:
        key = (r["patient"], r["specimen"], units.resolve_analyte(r["analyte"]))
        if r["replicate"] is None:
            seen[key] = seen.get(key, 0) + 1
            r["replicate"] = seen[key]
        for kind in HIL_INDICES:
            r[kind] = quality.get((r["patient"], r["specimen"], kind))


def _parse(bundle, ctx: ReadContext):
    """Bundle dict -> (rows, paths) with problems collected in ctx."""
    entries = _entries(bundle, ctx)
    if entries is None:
        return [], []
    index = _index(entries, ctx)
    if not index.observations:
        ctx.add("Bundle.entry", "the Bundle holds no Observation resources",
                "each result must be an Observation")
        return [], []
    rows, paths, quality = [], [], {}
    for _, where, res in index.observations:
        row = _observation(ctx, index, where, res, quality)
        if row is not None:
            rows.append(row)
            paths.append(where)
    _number_replicates(rows, quality)
    return rows, paths


def read_bundle(path_or_obj, source=None):
    """Read a FHIR R4 Bundle into a raw tidy frame (see the module docstring).

    ``path_or_obj``: a path, JSON text or a parsed dict. ``source`` names the input in
    messages (default: the path). Raises :class:`~bayesbase.errors.ValidationError` listing
    every problem, each naming the resource path and field. The frame's ``attrs["fhir_paths"]``
    gives each row's resource path.
    """
    import pandas as pd

    bundle, src = load_json(path_or_obj, source)
    ctx = ReadContext(src)
    rows, paths = _parse(bundle, ctx)
    if ctx.problems:
        raise ValidationError(ctx.problems)
    frame = pd.DataFrame(rows, columns=list(RAW_COLUMNS))
    for col in RAW_COLUMNS:
        if col in HIL_INDICES:
            frame[col] = frame[col].astype("float64")
        elif col == "replicate":
            frame[col] = frame[col].astype("Int64")
        else:
            frame[col] = frame[col].astype("str")
    frame.attrs["fhir_paths"] = list(paths)
    frame.attrs["source"] = src
    return frame


def load_bundle(path_or_obj, source=None, now=None):
    """:func:`read_bundle` then :func:`bayesbase.validate.validate` (``now``: the reference
    time for "in the future"): the canonical frame. A validation problem on a row is re-pointed
    at its Observation's resource path."""
    raw = read_bundle(path_or_obj, source=source)
    src = raw.attrs.get("source", source or "<bundle>")
    paths = raw.attrs.get("fhir_paths", [])
    try:
        return validate(raw, source=src, now=now)
    except ValidationError as exc:
        out = []
        for p in exc.problems:
            if p.row is not None and 0 <= p.row - 2 < len(paths):
                column = f"{paths[p.row - 2]}" + (f" [{p.column}]" if p.column else "")
                out.append(Problem(p.file, None, column, p.message, p.hint))
            else:
                out.append(p)
        raise ValidationError(out) from None
