"""The strict schema of a prior pack: key specs, cited numbers, the evidence behind CVI, the
rules between keys, and the consistency warning between the CVs and the population interval.

:func:`parse_pack` checks a parsed pack TOML and returns its checked parts and every problem
found, each naming the file and the key path (``analytes.creatinine.cvi.value``). Unknown keys
get a did-you-mean hint. An analyte's ``method_biases`` (:class:`MethodBias`: per method, the
natural-log bias against one reference method and its SD > 0) must all name the same reference.
A problem found in a key that a pack fragment set names the fragment's
file (see :class:`Collector`).
"""
from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass
from typing import Any

from .. import evidence as _evidence
from .. import units as _units

__all__ = [
    "PROVENANCES", "HASHED_PROVENANCES", "LAB_PROVENANCE", "DIRECTIONS", "HIL", "DESIGNS",
    "MIN_LOG_SD_FROM_MEMORY", "COMBINE_RTOL", "INTERVAL_CV_TOLERANCE", "GAP_RATIO_RTOL", "CitedNumber",
    "CitedNote", "CviStudy", "IntervalGap", "MethodBias", "MAX_ABS_LOG_BIAS", "Collector", "hint", "parse_pack",
    "check_pack_meta",
    "interval_consistency", "consistency_warnings", "consistency_acknowledged", "breed_key",
]

#: Provenance values a pack file may use. "estimated": from a study or reference sample run by
#: bayesbase; "calibrated": from ``bayesbase calibrate`` on a results store.
PROVENANCES = ("read", "derived", "common practice", "from memory", "estimated", "calibrated")
#: Provenances whose source must name the input's SHA-256 (the file, or the store's content hash).
HASHED_PROVENANCES = ("estimated", "calibrated")
#: Provenance given to a number taken from a lab override CSV (not allowed in a pack file).
LAB_PROVENANCE = "lab"
DIRECTIONS = ("up", "down", "variable", "none")
HIL = ("haemolysis", "lipaemia", "icterus")
#: Designs of a biological-variation study: short-term (days to weeks apart, e.g. weekly x 6)
#: or long-term (months apart, e.g. monthly for a year or annual visits).
DESIGNS = ("short-term", "long-term")
#: A from-memory CVI must carry at least this SD on ln(CVI) (schema rule of this project).
MIN_LOG_SD_FROM_MEMORY = 0.35
#: Relative tolerance between a pack's combined cvi / cvi_log_sd and their recomputation.
COMBINE_RTOL = 0.02
#: Relative gap between the total log-SD the CVs imply and the one the population interval
#: implies above which a pack gets a consistency warning.
INTERVAL_CV_TOLERANCE = 0.25
#: An analyte's ``interval_gap`` acknowledges the gap only while the ratio it states matches the
#: ratio the pack's numbers give within this relative tolerance (else the warning comes back).
GAP_RATIO_RTOL = 0.05

#: Bound on |log_bias| and on log_sd of a method bias (ln units): a factor of e^3 (about 20) between
#: two methods of one analyte is no bias a correction should carry (schema rule of this project).
MAX_ABS_LOG_BIAS = 3.0

_SHA256 = re.compile(r"(?<![0-9a-fA-F])[0-9a-fA-F]{64}(?![0-9a-fA-F])")


@dataclass(frozen=True)
class CitedNumber:
    """A number with its source: citation text, provenance and an optional note."""

    value: float
    source: str
    provenance: str
    note: str | None = None
    locator: str | None = None


@dataclass(frozen=True)
class CitedNote:
    """A text with its source (a breed note): text, citation, provenance, optional locator and note."""

    text: str
    source: str
    provenance: str
    note: str | None = None
    locator: str | None = None


@dataclass(frozen=True)
class IntervalGap:
    """An acknowledged disagreement between an analyte's CVs and its population interval:
    ``ratio`` is the CV-implied over the interval-implied total log-SD the pack's authors accept,
    ``reason`` why both numbers are kept."""

    ratio: float
    reason: str


@dataclass(frozen=True)
class CviStudy:
    """One published estimate of CVI (fraction) behind an analyte's prior, with its design.

    ``se_log`` is the standard error of ln(CVI): from the study's 95 % CI when given
    (ln(upper/lower)/3.92), else the design approximation of :mod:`bayesbase.evidence`.
    ``pooled`` studies enter the DerSimonian-Laird combination that gives the pack's CVI.
    """

    value: float
    source: str
    provenance: str
    design: str
    n_animals: int
    n_specimens: int | None
    se_log: float
    se_basis: str
    pooled: bool
    locator: str | None = None
    note: str | None = None


@dataclass(frozen=True)
class MethodBias:
    """The bias of one method (analyser) of an analyte against the analyte's reference method, on
    the natural-log scale: a result of ``method`` reads exp(``log_bias``) times what the reference
    method reads on the same specimen; ``log_sd`` is the SD of ``log_bias`` (its uncertainty).
    The reference method itself has bias 0 and SD 0 and is not listed."""

    method: str
    log_bias: float
    log_sd: float
    reference: str
    source: str
    provenance: str
    note: str | None = None
    locator: str | None = None


def breed_key(breed: str) -> str:
    """Key of a breed in a pack's breed table: lower case, words joined by underscores."""
    return "_".join(str(breed).strip().lower().replace("-", " ").split())


# --------------------------------------------------------------------------- key specs

_T_STR, _T_BOOL, _T_CITED, _T_TABLE, _T_LIST = "string", "boolean", "cited number", "table", "list of tables"

# key -> (kind, required, range) ; range = (lo, hi, lo_inclusive, hi_inclusive) or None
_POS = (0.0, math.inf, False, False)
_CV = (0.0, 2.0, False, False)
PACK_KEYS = {"id": (_T_STR, True, None), "species": (_T_STR, True, None), "title": (_T_STR, True, None),
             "version": (_T_STR, True, None), "description": (_T_STR, False, None),
             "extends": (_T_STR, False, None)}
_DEFAULT_KEYS = {"prior_change": (_T_CITED, True, (0.0, 1.0, False, False)),
                 "prior_drift": (_T_CITED, False, (0.0, 1.0, False, False))}
_GROUP_KEYS = {"label": (_T_STR, True, None), "hours_min": (_T_CITED, True, _POS),
               "hours_max": (_T_CITED, True, _POS), "slope_sd": (_T_CITED, True, _CV)}
_ANALYTE_KEYS = {
    "unit": (_T_STR, True, None),
    "group": (_T_STR, True, None),
    "center": (_T_CITED, True, _POS),
    "ri_lower": (_T_CITED, True, _POS),
    "ri_upper": (_T_CITED, True, _POS),
    "cvg": (_T_CITED, True, _CV),
    "cvi": (_T_CITED, True, _CV),
    "cvi_log_sd": (_T_CITED, True, (0.0, 3.0, True, True)),
    "cva": (_T_CITED, True, _CV),
    "mcrc": (_T_CITED, False, (0.0, 10.0, False, True)),
    "shift_sd": (_T_CITED, False, (0.0, 3.0, False, True)),
    "slope_sd": (_T_CITED, False, _CV),
    "interference": (_T_TABLE, False, None),
    "hil_thresholds": (_T_TABLE, False, None),
    "feeding_sensitive": (_T_BOOL, False, None),
    "age_dependent": (_T_STR, False, None),
    "breed_centers": (_T_TABLE, False, None),
    "breed_notes": (_T_TABLE, False, None),
    "interval_gap": (_T_TABLE, False, None),
    "note": (_T_STR, False, None),
    "cvi_studies": (_T_LIST, False, None),
    "method_biases": (_T_TABLE, False, None),
}
TOP_KEYS = ("pack", "defaults", "retest_groups", "analytes")
_CITED_KEYS = ("value", "source", "provenance", "locator", "note")
#: Keys of one entry of an analyte's ``cvi_studies`` list (the evidence behind its CVI).
_STUDY_KEYS = ("value", "source", "provenance", "locator", "note", "design", "n_animals", "n_specimens",
               "n_replicates", "cva", "ci_lower", "ci_upper", "pooled")
_INTERFERENCE_KEYS = (*HIL, "source", "provenance", "note")
#: Keys of one breed note (``breed_notes.<breed>``): the note's text and its source.
_BREED_NOTE_KEYS = ("text", "source", "provenance", "locator", "note")
#: Keys of an analyte's ``interval_gap`` (an acknowledged CV / interval disagreement).
_GAP_KEYS = ("ratio", "reason")
#: Keys of one method bias (``method_biases.<method>``): log-scale bias and its SD against the
#: named reference method, and the cited-number keys of its source.
_METHOD_BIAS_KEYS = ("log_bias", "log_sd", "reference", "source", "provenance", "locator", "note")


# --------------------------------------------------------------------------- problems

class Collector:
    """Collects problems as ``"<file>: <key path>: <message>"``.

    ``origins`` maps key paths to the file that set them (a pack fragment layered over a base):
    a problem is attributed to the file of the longest key-path prefix found there, else to
    ``file``.
    """

    def __init__(self, file: str, origins: dict[str, str] | None = None):
        self.file = file
        self.origins = origins or {}
        self.problems: list[str] = []

    def file_of(self, path: str) -> str:
        p = path
        while p:
            if p in self.origins:
                return self.origins[p]
            cut = max(p.rfind("."), p.rfind("["))
            p = p[:cut] if cut > 0 else ""
        return self.file

    def add(self, path: str, message: str) -> None:
        self.problems.append(f"{self.file_of(path)}: {path}: {message}" if path else f"{self.file}: {message}")


def hint(key: str, allowed) -> str:
    """A did-you-mean hint for ``key`` among ``allowed`` (or the list when nothing is close)."""
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else f" (allowed: {', '.join(allowed)})"


def _join(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


def _unknown_keys(c: Collector, path: str, table: dict, allowed) -> None:
    for key in table:
        if key not in allowed:
            c.add(_join(path, key), "unknown key" + hint(key, allowed))


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _in_range(v: float, rng) -> bool:
    lo, hi, lo_inc, hi_inc = rng
    return (v >= lo if lo_inc else v > lo) and (v <= hi if hi_inc else v < hi)


def _range_text(rng) -> str:
    lo, hi, lo_inc, hi_inc = rng
    return f"{'[' if lo_inc else '('}{lo:g}, {'inf' if math.isinf(hi) else f'{hi:g}'}{']' if hi_inc else ')'}"


# --------------------------------------------------------------------------- cited numbers

def _cited_value(c: Collector, path: str, v: dict, rng) -> bool:
    value = v.get("value")
    if "value" not in v:
        c.add(f"{path}.value", "missing required key")
    elif not _is_number(value):
        c.add(f"{path}.value", f"expected a number, got {type(value).__name__} {value!r}")
    elif not math.isfinite(value):
        c.add(f"{path}.value", f"must be finite, got {value!r}")
    elif rng is not None and not _in_range(float(value), rng):
        c.add(f"{path}.value", f"{value!r} out of range {_range_text(rng)}")
    else:
        return True
    return False


def _cited_source(c: Collector, path: str, v: dict) -> bool:
    source, prov = v.get("source"), v.get("provenance")
    ok = True
    if "source" not in v:
        c.add(f"{path}.source", "missing required key")
        ok = False
    elif not isinstance(source, str) or not source.strip():
        c.add(f"{path}.source", "must be a non-empty string (citation with a locator or URL)")
        ok = False
    elif prov in HASHED_PROVENANCES and not _SHA256.search(source):
        c.add(f"{path}.source", f"an '{prov}' number names the file (or store) it comes from and its "
                                "SHA-256 (64 hex digits)")
        ok = False
    if "provenance" not in v:
        c.add(f"{path}.provenance", "missing required key")
        ok = False
    elif prov not in PROVENANCES:
        c.add(f"{path}.provenance", f"{prov!r} is not an allowed provenance" + hint(str(prov), PROVENANCES))
        ok = False
    return ok


def _cited_text(c: Collector, path: str, v: dict) -> bool:
    prov, note, locator = v.get("provenance"), v.get("note"), v.get("locator")
    ok = True
    if note is not None and not isinstance(note, str):
        c.add(f"{path}.note", "must be a string")
        ok = False
    if prov == "from memory" and not (isinstance(note, str) and note.strip()):
        c.add(f"{path}.note", "a 'from memory' number needs a rationale in note")
        ok = False
    if locator is not None and not (isinstance(locator, str) and locator.strip()):
        c.add(f"{path}.locator", "must be a non-empty string (table and page, or 'abstract')")
        ok = False
    elif prov == "read" and locator is None:
        c.add(f"{path}.locator", "a 'read' number needs a locator: where in the source it was seen "
                                 "(table and page, or 'abstract')")
        ok = False
    return ok


def check_cited(c: Collector, path: str, v: Any, rng=None) -> CitedNumber | None:
    """A cited number ``{ value, source, provenance[, locator, note] }``, or None (problems added)."""
    if not isinstance(v, dict):
        c.add(path, f"expected a cited number {{ value = ..., source = \"...\", provenance = \"...\" }}, "
                    f"got {type(v).__name__} {v!r}")
        return None
    _unknown_keys(c, path, v, _CITED_KEYS)
    ok = [_cited_value(c, path, v, rng), _cited_source(c, path, v), _cited_text(c, path, v)]
    if not all(ok):
        return None
    locator = v.get("locator")
    return CitedNumber(float(v["value"]), v["source"].strip(), v["provenance"], v.get("note"),
                       locator.strip() if locator else None)


# --------------------------------------------------------------------------- tables

def _check_kind(c: Collector, p: str, kind: str, v: Any, rng) -> Any:
    """The checked value of one key, or None (problem added)."""
    if kind == _T_STR:
        if isinstance(v, str) and v.strip():
            return v.strip()
        c.add(p, f"expected a non-empty string, got {type(v).__name__} {v!r}")
    elif kind == _T_BOOL:
        if isinstance(v, bool):
            return v
        c.add(p, f"expected true or false, got {type(v).__name__} {v!r}")
    elif kind == _T_CITED:
        return check_cited(c, p, v, rng)
    elif kind == _T_TABLE:
        if isinstance(v, dict):
            return v
        c.add(p, f"expected a table, got {type(v).__name__} {v!r}")
    elif isinstance(v, list) and all(isinstance(x, dict) for x in v):
        return v
    else:
        c.add(p, f"expected a list of tables, got {type(v).__name__}")
    return None


def check_keys(c: Collector, path: str, table: dict, spec: dict) -> dict[str, Any]:
    """Check a table against a key spec; returns {key: parsed value} for keys that passed."""
    _unknown_keys(c, path, table, spec)
    out: dict[str, Any] = {}
    for key, (kind, required, rng) in spec.items():
        p = _join(path, key)
        if key not in table:
            if required:
                c.add(p, f"missing required key ({kind})")
            continue
        got = _check_kind(c, p, kind, table[key], rng)
        if got is not None:
            out[key] = got
    return out


def check_pack_meta(c: Collector, meta: Any) -> dict[str, Any]:
    """The checked ``[pack]`` table (id, species, title, version, description, extends)."""
    if not isinstance(meta, dict):
        return {}
    return check_keys(c, "pack", meta, PACK_KEYS)


def parse_pack(data: dict, c: Collector) -> dict:
    """Validate a parsed (full or layered) pack; returns its checked parts. Problems go to ``c``."""
    _unknown_keys(c, "", data, TOP_KEYS)
    for key in TOP_KEYS:
        if key not in data:
            c.add(key, "missing required table")
        elif not isinstance(data[key], dict):
            c.add(key, f"expected a table, got {type(data[key]).__name__}")
    parts: dict[str, Any] = {"pack": check_pack_meta(c, data.get("pack")), "defaults": {}, "groups": {},
                             "analytes": {}}
    if isinstance(data.get("defaults"), dict):
        parts["defaults"] = check_keys(c, "defaults", data["defaults"], _DEFAULT_KEYS)
    groups = data.get("retest_groups") if isinstance(data.get("retest_groups"), dict) else None
    if groups is not None:
        parts["groups"] = _check_groups(c, groups)
    if isinstance(data.get("analytes"), dict):
        parts["analytes"] = _check_analytes(c, data["analytes"], groups or {})
    return parts


def _check_groups(c: Collector, groups: dict) -> dict[str, dict]:
    if not groups:
        c.add("retest_groups", "needs at least one group")
    out = {}
    for gid, g in groups.items():
        p = f"retest_groups.{gid}"
        if not isinstance(g, dict):
            c.add(p, "expected a table")
            continue
        got = check_keys(c, p, g, _GROUP_KEYS)
        if "hours_min" in got and "hours_max" in got and got["hours_min"].value > got["hours_max"].value:
            c.add(p, f"hours_min {got['hours_min'].value:g} > hours_max {got['hours_max'].value:g}")
        out[gid] = got
    return out


def _check_analytes(c: Collector, analytes: dict, groups: dict) -> dict[str, dict]:
    if not analytes:
        c.add("analytes", "needs at least one analyte")
    known_ids = _units.analyte_ids()
    out = {}
    for aid, a in analytes.items():
        p = f"analytes.{aid}"
        if not isinstance(a, dict):
            c.add(p, "expected a table")
            continue
        if aid not in known_ids:
            c.add(p, "not a canonical analyte id of models/analytes.toml" + hint(aid, known_ids))
        got = check_keys(c, p, a, _ANALYTE_KEYS)
        _check_refs(c, p, aid, got, groups, aid in known_ids)
        if "cvi_studies" in got:
            got["_studies"] = check_studies(c, f"{p}.cvi_studies", got["cvi_studies"], got.get("cvi"),
                                            got.get("cvi_log_sd"))
        if "interference" in got:
            _check_interference(c, f"{p}.interference", got["interference"])
        if "hil_thresholds" in got:
            got["_hil"] = _check_hil(c, f"{p}.hil_thresholds", got["hil_thresholds"])
        if "breed_centers" in got:
            got["_breeds"] = _check_breeds(c, f"{p}.breed_centers", got["breed_centers"])
        if "breed_notes" in got:
            got["_breed_notes"] = _check_breed_notes(c, f"{p}.breed_notes", got["breed_notes"])
        if "interval_gap" in got:
            got["_gap"] = _check_gap(c, f"{p}.interval_gap", got["interval_gap"])
        if "method_biases" in got:
            got["_method_biases"] = check_method_biases(c, f"{p}.method_biases", got["method_biases"])
        out[aid] = got
    return out


def _check_refs(c: Collector, p: str, aid: str, got: dict, groups: dict, known: bool) -> None:
    """Unit against the registry, retest group, interval order, from-memory CVI uncertainty."""
    unit = got.get("unit")
    if unit is not None and known:
        canon = _units.canonical_unit(aid)
        if unit != canon:
            c.add(f"{p}.unit", f"'{unit}' is not the canonical unit of {aid} (expected '{canon}')")
    group = got.get("group")
    if group is not None and group not in groups:
        c.add(f"{p}.group", f"'{group}' is not a retest group" + hint(group, list(groups)))
    lo, ce, hi = (got.get(k) for k in ("ri_lower", "center", "ri_upper"))
    if lo and ce and hi and not (lo.value < ce.value < hi.value):
        c.add(p, f"need ri_lower < center < ri_upper, got {lo.value:g}, {ce.value:g}, {hi.value:g}")
    cvi, lsd = got.get("cvi"), got.get("cvi_log_sd")
    if cvi and lsd and cvi.provenance == "from memory" and lsd.value < MIN_LOG_SD_FROM_MEMORY:
        c.add(f"{p}.cvi_log_sd", f"a from-memory CVI needs cvi_log_sd >= {MIN_LOG_SD_FROM_MEMORY}, "
                                 f"got {lsd.value:g}")


def _check_interference(c: Collector, q: str, intf: dict) -> None:
    _unknown_keys(c, q, intf, _INTERFERENCE_KEYS)
    dirs = {k: intf[k] for k in HIL if k in intf}
    if not dirs:
        c.add(q, "give at least one of " + ", ".join(HIL))
    for k, v in dirs.items():
        if v not in DIRECTIONS:
            c.add(f"{q}.{k}", f"{v!r} is not a direction" + hint(str(v), DIRECTIONS))
    if not isinstance(intf.get("source"), str) or not intf.get("source", "").strip():
        c.add(f"{q}.source", "missing required key (non-empty string)")
    prov = intf.get("provenance")
    if prov not in PROVENANCES:
        c.add(f"{q}.provenance", f"{prov!r} is not an allowed provenance" + hint(str(prov), PROVENANCES))
    if prov == "from memory" and not str(intf.get("note", "")).strip():
        c.add(f"{q}.note", "a 'from memory' entry needs a rationale in note")


def _check_hil(c: Collector, q: str, hil: dict) -> dict[str, CitedNumber]:
    _unknown_keys(c, q, hil, HIL)
    out = {}
    for k in HIL:
        if k in hil:
            cn = check_cited(c, f"{q}.{k}", hil[k], _POS)
            if cn is not None:
                out[k] = cn
    return out


def _check_breeds(c: Collector, q: str, breeds: dict) -> dict[str, CitedNumber]:
    out = {}
    for b, v in breeds.items():
        if b != breed_key(b):
            c.add(f"{q}.{b}", f"breed keys are lower case with underscores (use '{breed_key(b)}')")
            continue
        cn = check_cited(c, f"{q}.{b}", v, _POS)
        if cn is not None:
            out[b] = cn
    return out


def _check_breed_note(c: Collector, q: str, v: Any) -> CitedNote | None:
    if not isinstance(v, dict):
        c.add(q, f"expected {{ text = \"...\", source = \"...\", provenance = \"...\" }}, got {type(v).__name__}")
        return None
    _unknown_keys(c, q, v, _BREED_NOTE_KEYS)
    text = v.get("text")
    ok = isinstance(text, str) and bool(text.strip())
    if not ok:
        c.add(f"{q}.text", "missing required key (non-empty string: the note shown for this breed)")
    ok = _cited_source(c, q, v) and ok
    ok = _cited_text(c, q, v) and ok
    if not ok:
        return None
    locator = v.get("locator")
    return CitedNote(text.strip(), v["source"].strip(), v["provenance"], v.get("note"),
                     locator.strip() if locator else None)


def _check_breed_notes(c: Collector, q: str, notes: dict) -> dict[str, CitedNote]:
    """``breed_notes``: breed key -> { text, source, provenance[, locator, note] }."""
    out = {}
    for b, v in notes.items():
        if b != breed_key(b):
            c.add(f"{q}.{b}", f"breed keys are lower case with underscores (use '{breed_key(b)}')")
            continue
        cn = _check_breed_note(c, f"{q}.{b}", v)
        if cn is not None:
            out[b] = cn
    return out


def _check_gap(c: Collector, q: str, gap: dict) -> IntervalGap | None:
    """``interval_gap = { ratio, reason }``: the CV / interval ratio the pack accepts, and why."""
    _unknown_keys(c, q, gap, _GAP_KEYS)
    ratio, reason = gap.get("ratio"), gap.get("reason")
    ok = True
    if not (_is_number(ratio) and math.isfinite(ratio) and ratio > 0):
        c.add(f"{q}.ratio", f"expected a positive number (the ratio sqrt(sG^2 + sI^2 + sA^2) / "
                            f"(ln(upper/lower)/3.92) being acknowledged), got {ratio!r}")
        ok = False
    if not (isinstance(reason, str) and reason.strip()):
        c.add(f"{q}.reason", "missing required key (non-empty string: why both numbers are kept)")
        ok = False
    return IntervalGap(float(ratio), reason.strip()) if ok else None


# --------------------------------------------------------------------------- method biases

def _log_number(c: Collector, path: str, v: Any, positive: bool) -> float | None:
    """A finite log-scale number within +/- MAX_ABS_LOG_BIAS (``positive``: in (0, MAX])."""
    if not _is_number(v) or not math.isfinite(v):
        c.add(path, f"expected a finite number (natural-log units), got {type(v).__name__} {v!r}")
        return None
    lo = 0.0 if positive else -MAX_ABS_LOG_BIAS
    if not ((v > lo) if positive else (v >= lo)) or v > MAX_ABS_LOG_BIAS:
        c.add(path, f"{v!r} out of range {'(0' if positive else f'[{lo:g}'}, {MAX_ABS_LOG_BIAS:g}]"
                    + (" (the SD of a bias must be > 0)" if positive else ""))
        return None
    return float(v)


def _check_method_bias(c: Collector, q: str, method: str, v: Any) -> MethodBias | None:
    if not isinstance(v, dict):
        c.add(q, f"expected {{ log_bias = ..., log_sd = ..., reference = \"...\", source = \"...\", "
                 f"provenance = \"...\" }}, got {type(v).__name__} {v!r}")
        return None
    _unknown_keys(c, q, v, _METHOD_BIAS_KEYS)
    ok = True
    for key in ("log_bias", "log_sd", "reference"):
        if key not in v:
            c.add(f"{q}.{key}", "missing required key")
            ok = False
    bias = _log_number(c, f"{q}.log_bias", v["log_bias"], False) if "log_bias" in v else None
    sd = _log_number(c, f"{q}.log_sd", v["log_sd"], True) if "log_sd" in v else None
    ref = v.get("reference")
    if "reference" in v and not (isinstance(ref, str) and ref.strip() and ref == ref.strip()):
        c.add(f"{q}.reference", f"expected the reference method's name (a non-empty string without surrounding "
                                f"spaces), got {ref!r}")
        ok = False
    ok = _cited_source(c, q, v) and ok
    ok = _cited_text(c, q, v) and ok
    if not ok or bias is None or sd is None:
        return None
    locator = v.get("locator")
    return MethodBias(method, bias, sd, ref, v["source"].strip(), v["provenance"], v.get("note"),
                      locator.strip() if locator else None)


def check_method_biases(c: Collector, q: str, table: dict) -> dict[str, MethodBias]:
    """``method_biases``: method name -> { log_bias, log_sd, reference, source, provenance[,
    locator, note] }; every entry of one analyte names the same reference method."""
    out: dict[str, MethodBias] = {}
    for m, v in table.items():
        if not m.strip() or m != m.strip():
            c.add(f"{q}.{m!r}", "method names are non-empty, without surrounding spaces (as in the results)")
            continue
        mb = _check_method_bias(c, f"{q}.{m}", m, v)
        if mb is not None:
            out[m] = mb
    refs: dict[str, list[str]] = {}
    for m, v in table.items():
        if isinstance(v, dict) and isinstance(v.get("reference"), str):
            refs.setdefault(v["reference"], []).append(m)
    if len(refs) > 1:
        found = "; ".join(f"'{r}' ({', '.join(ms)})" for r, ms in refs.items())
        c.add(q, f"mixed references: every bias of an analyte is relative to one reference method, found {found}")
        return {}
    ref = next(iter(refs), None)
    if ref is not None and ref in table:
        c.add(f"{q}.{ref}", f"'{ref}' is the reference method of the other biases (bias 0 by definition): leave it out")
        return {}
    return out


# --------------------------------------------------------------------------- evidence behind CVI

def _int_key(c: Collector, path: str, v: Any, lo: int) -> int | None:
    if not isinstance(v, int) or isinstance(v, bool) or v < lo:
        c.add(path, f"expected an integer >= {lo}, got {v!r}")
        return None
    return v


def _study_se(c: Collector, q: str, st: dict, value: float, n_a: int, n_s: int | None, n_r: int,
              cva: float | None) -> tuple[float, str] | None:
    """SE of ln CVI of one study (from its 95 % CI, else from its design) and how it was found."""
    lo, hi = st.get("ci_lower"), st.get("ci_upper")
    if lo is not None and hi is not None:
        if not (_is_number(lo) and _is_number(hi) and 0 < lo <= value <= hi):
            c.add(q, f"need 0 < ci_lower <= value <= ci_upper, got {lo!r}, {value:g}, {hi!r}")
            return None
        return _evidence.log_sd_from_ci(float(lo), float(hi)), f"95 % CI {lo:g}-{hi:g}: ln(upper/lower)/3.92"
    if n_s is not None:
        se = _evidence.se_log_cv_from_design(value, n_a, n_s, cva, n_r)
        return se, (f"design approximation, df = {n_a} x ({n_s} - 1) = {n_a * (n_s - 1)}"
                    + (f", CVA {cva:g} with {n_r} replicates" if cva is not None and n_r >= 2 else ""))
    c.add(q, "give ci_lower/ci_upper or n_specimens (needed for the SE of ln CVI)")
    return None


def _check_study(c: Collector, q: str, st: dict) -> CviStudy | None:
    _unknown_keys(c, q, st, _STUDY_KEYS)
    cn = check_cited(c, q, {k: st[k] for k in _CITED_KEYS if k in st}, _CV)
    design = st.get("design")
    if design not in DESIGNS:
        c.add(f"{q}.design", f"{design!r} is not a design" + hint(str(design), DESIGNS))
    n_a = _int_key(c, f"{q}.n_animals", st.get("n_animals"), 1)
    n_s = st.get("n_specimens")
    if n_s is not None:
        n_s = _int_key(c, f"{q}.n_specimens", n_s, 2)
    n_r = _int_key(c, f"{q}.n_replicates", st.get("n_replicates", 1), 1)
    cva = st.get("cva")
    if cva is not None and not (_is_number(cva) and 0 < cva < 2):
        c.add(f"{q}.cva", f"expected a fraction in (0, 2), got {cva!r}")
        cva = None
    if (st.get("ci_lower") is None) != (st.get("ci_upper") is None):
        c.add(q, "give both ci_lower and ci_upper (95 % CI of CVI) or neither")
    pooled = st.get("pooled", True)
    if not isinstance(pooled, bool):
        c.add(f"{q}.pooled", f"expected true or false, got {pooled!r}")
        pooled = False
    if cn is None or design not in DESIGNS or n_a is None or n_r is None:
        return None
    se = _study_se(c, q, st, cn.value, n_a, n_s, n_r, cva)
    if se is None:
        return None
    return CviStudy(cn.value, cn.source, cn.provenance, design, n_a, n_s, se[0], se[1], pooled,
                    cn.locator, cn.note)


def check_studies(c: Collector, path: str, studies: list, cvi: CitedNumber | None,
                  lsd: CitedNumber | None) -> tuple[CviStudy, ...]:
    """Check the ``cvi_studies`` list; when studies are pooled, the analyte's ``cvi`` and
    ``cvi_log_sd`` must equal their DerSimonian-Laird combination (bayesbase.evidence)."""
    out = [s for i, st in enumerate(studies) if (s := _check_study(c, f"{path}[{i}]", st)) is not None]
    pooled = [s for s in out if s.pooled]
    if len(out) != len(studies) or not pooled:
        return tuple(out)
    if len({s.design for s in pooled}) > 1:
        c.add(path, "pooled studies mix short-term and long-term designs; pool one design and "
                    "list the other with pooled = false")
    elif cvi is not None and lsd is not None:
        comb = _evidence.combine_log_cvi([math.log(s.value) for s in pooled], [s.se_log for s in pooled])
        for name, cited, want in (("cvi", cvi, comb["cvi"]), ("cvi_log_sd", lsd, comb["cvi_log_sd"])):
            if not math.isclose(cited.value, want, rel_tol=COMBINE_RTOL):
                c.add(f"{path.rsplit('.', 1)[0]}.{name}",
                      f"{cited.value:g} does not match the combination of the pooled studies "
                      f"({want:.4g}; DerSimonian-Laird, bayesbase.evidence.combine_log_cvi)")
    return tuple(out)


# --------------------------------------------------------------------------- consistency

def _log_sd(cv: float) -> float:
    return math.sqrt(math.log1p(cv * cv))


def interval_consistency(ri_lower: float, ri_upper: float, cvg: float, cvi: float, cva: float,
                         tolerance: float = INTERVAL_CV_TOLERANCE) -> tuple[float, float, bool]:
    """(log-SD the interval implies, log-SD the CVs imply, inconsistent?).

    The population interval read as the central 95 % of a log-normal has total log-SD
    ln(upper/lower)/3.92 (:func:`bayesbase.evidence.log_sd_from_ci`); the CVs give
    sqrt(sG^2 + sI^2 + sA^2) with s = sqrt(ln(1 + CV^2)). Inconsistent when the second differs
    from the first by more than ``tolerance`` of it.
    """
    s_interval = _evidence.log_sd_from_ci(ri_lower, ri_upper)
    s_cvs = math.sqrt(_log_sd(cvg) ** 2 + _log_sd(cvi) ** 2 + _log_sd(cva) ** 2)
    return s_interval, s_cvs, abs(s_cvs / s_interval - 1.0) > tolerance


def _gap_state(a, tolerance: float) -> tuple[float, float, bool, IntervalGap | None, bool]:
    """(s_interval, s_cvs, inconsistent, acknowledgement, acknowledgement still matches)."""
    s_int, s_cvs, bad = interval_consistency(a.ri_lower, a.ri_upper, a.cvg, a.cvi, a.cva, tolerance)
    gap = getattr(a, "interval_gap", None)
    fits = gap is not None and math.isclose(s_cvs / s_int, gap.ratio, rel_tol=GAP_RATIO_RTOL)
    return s_int, s_cvs, bad, gap, fits


def _gap_text(a, s_int: float, s_cvs: float, tolerance: float) -> str:
    return (f"the CVs give a total log-SD sqrt(sG^2 + sI^2 + sA^2) = {s_cvs:.3f}, "
            f"{s_cvs / s_int:.2f} times the {s_int:.3f} of the population interval "
            f"{a.ri_lower:.4g}-{a.ri_upper:.4g} {a.unit} as a central 95 % (ln(upper/lower)/3.92); "
            f"more than {100 * tolerance:g} % apart")


def consistency_warnings(analytes: dict, tolerance: float = INTERVAL_CV_TOLERANCE) -> tuple[str, ...]:
    """Warnings (``"analytes.<id>: ..."``) for analytes whose CVs and population interval disagree
    and whose ``interval_gap`` does not acknowledge that very disagreement (none, or a stated
    ratio more than :data:`GAP_RATIO_RTOL` away from the one the numbers give, e.g. after a lab
    override changed a CV).

    ``analytes`` maps ids to objects with ``ri_lower, ri_upper, cvg, cvi, cva, unit`` and
    optionally ``interval_gap`` (:class:`IntervalGap`).
    """
    out = []
    for aid, a in analytes.items():
        s_int, s_cvs, bad, gap, fits = _gap_state(a, tolerance)
        if bad and not fits:
            stale = (f"; its interval_gap acknowledges a ratio of {gap.ratio:g}, which no longer matches"
                     if gap is not None else "")
            out.append(f"analytes.{aid}: {_gap_text(a, s_int, s_cvs, tolerance)}{stale}")
    return tuple(out)


def consistency_acknowledged(analytes: dict, tolerance: float = INTERVAL_CV_TOLERANCE) -> tuple[str, ...]:
    """The disagreements a pack acknowledges (``"analytes.<id>: ... kept: <reason>"``): the CVs and
    the interval are more than ``tolerance`` apart and ``interval_gap`` states that ratio."""
    out = []
    for aid, a in analytes.items():
        s_int, s_cvs, bad, gap, fits = _gap_state(a, tolerance)
        if bad and fits:
            out.append(f"analytes.{aid}: {_gap_text(a, s_int, s_cvs, tolerance)}; acknowledged "
                       f"(interval_gap), both kept: {gap.reason}")
    return tuple(out)
