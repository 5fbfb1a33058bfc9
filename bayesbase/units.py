"""Analyte registry and unit conversion (layer 1: standard library only).

The registry lives in ``models/analytes.toml``: canonical analyte ids, display labels, aliases,
the canonical SI unit of each analyte (a UCUM code), a display spelling of that unit, LOINC codes
where known, and the accepted reported units with their factor to the canonical unit
(``canonical value = reported value x factor``), each with its source.

Names and units are matched leniently:

* analyte names are case-insensitive; ``_``, ``-`` and runs of spaces count as one space, so
  ``"Total Protein"``, ``"total_protein"`` and ``"TP"`` all resolve to ``total_protein``;
* unit spellings are case-insensitive; ``µ``/``μ``/``mc`` mean micro (``u``); spaces are ignored;
  ``mEq/L`` is ``meq/L``; ``x10^9/L``, ``10^9/L``, ``10E9/L`` and ``10*9/L`` are the same; ``K/uL``
  is ``10*3/uL``; ``M/uL`` is ``10*6/uL``; ``IU/L`` is ``[IU]/L``; ``/mm3``, ``cells/uL`` and
  ``cells/mm3`` are ``/uL`` (1 mm3 = 1 uL); ``giga/L`` and ``Gpt/L`` are ``10*9/L``, ``tera/L`` and
  ``Tpt/L`` are ``10*12/L``.

Cell counts in giga or tera per litre: ``G/L`` (capital G, the giga-per-litre convention of many
European laboratories, "1 G/L = 1 x 10^9/L", labtests.co.in WBC unit converter) and ``T/L`` (SI
prefix tera = 10^12, common practice). Because unit spellings are otherwise case-insensitive and
an all-capitals export writes grams per litre as ``G/L``, :func:`normalise_unit` alone reads
``G/L`` as ``g/L``; :func:`conversion_factor` reads ``G/L``/``T/L`` as a count wherever the analyte
is a cell count (its accepted units are counts), and as grams per litre elsewhere. A count
reported in lower-case ``g/L`` is refused with a hint to write ``G/L``.

The reported *name* can matter for the factor: urea reported as urea nitrogen (``BUN``) in mg/dL
converts with 0.357, urea reported as urea in mg/dL with 0.1665. Pass ``reported_name`` to
:func:`conversion_factor` (or pass the reported name itself as the analyte)::

    conversion_factor("urea", "mg/dL", reported_name="BUN")   # 0.357
    conversion_factor("urea", "mg/dL", reported_name="urea")  # 0.1665
    conversion_factor("BUN", "mg/dL")                         # 0.357
"""
from __future__ import annotations

import difflib
import re
import tomllib
from functools import lru_cache
from importlib import resources

from .errors import BayesbaseError

__all__ = [
    "UnknownAnalyteError",
    "UnitError",
    "RegistryError",
    "analyte_ids",
    "resolve_analyte",
    "suggest_analyte",
    "normalise_unit",
    "conversion_factor",
    "conversion_source",
    "accepted_units",
    "canonical_unit",
    "display_unit",
    "label",
    "loinc",
    "analyte_info",
    "plausible_range",
]


class RegistryError(BayesbaseError):
    """The analyte registry file itself is malformed."""


class UnknownAnalyteError(BayesbaseError, KeyError):
    """An analyte name matches no id, label or alias. ``message`` and ``hint`` are separate."""

    def __init__(self, name: str, message: str, hint: str | None = None):
        self.name = name
        self.message = message
        self.hint = hint
        super().__init__(message)

    def __str__(self) -> str:  # KeyError would quote the message
        return self.message + (f" ({self.hint})" if self.hint else "")


class UnitError(BayesbaseError, ValueError):
    """A unit is unknown, or not accepted for the analyte. ``message`` and ``hint`` are separate."""

    def __init__(self, unit: str, message: str, hint: str | None = None):
        self.unit = unit
        self.message = message
        self.hint = hint
        super().__init__(message)

    def __str__(self) -> str:
        return self.message + (f" ({self.hint})" if self.hint else "")


# --------------------------------------------------------------------------- unit spelling

#: Canonical UCUM spellings this module knows. A conversion table may use only these.
KNOWN_UNITS = (
    "umol/L", "mmol/L", "nmol/L", "pmol/L",
    "mg/dL", "mg/L", "g/dL", "g/L", "ug/dL", "ug/L", "ng/dL", "ng/mL",
    "U/L", "[IU]/L", "ukat/L", "nkat/L", "meq/L",
    "10*9/L", "10*3/uL", "/nL", "10*12/L", "10*6/uL", "/pL", "/uL",
    "L/L", "%",
)

#: Units of a number of cells per volume (an analyte accepting one of them is a cell count).
COUNT_UNITS = frozenset({"10*9/L", "10*3/uL", "/nL", "10*12/L", "10*6/uL", "/pL", "/uL"})

# "G/L", "G/l", "Gpt/L" (giga) and "T/L", "Tpt/L" (tera): case-sensitive, capital prefix letter.
_COUNT_PREFIX = re.compile(r"^(?:(?P<g>G)|(?P<t>T))(?:pt)?/[lL]$")

_SUPERSCRIPTS = str.maketrans("⁰¹²³⁴⁵⁶⁷⁸⁹", "0123456789")
_POWER = re.compile(r"^[x×*]?10(?:\^|\*|\*\*|e)?(\d+)/")


def _squash(text: str) -> str:
    """Lower-case key of a unit spelling (see module docstring for what counts as the same)."""
    s = str(text).strip().translate(_SUPERSCRIPTS)
    s = s.replace("µ", "u").replace("μ", "u")  # micro sign U+00B5 and Greek mu U+03BC
    s = re.sub(r"\s+", "", s).lower()
    s = re.sub(r"(?<![a-z])mc(?=[a-z])", "u", s)  # mcg, mcmol -> ug, umol
    s = s.replace("mm3", "ul")  # 1 mm3 = 1 uL exactly
    s = _POWER.sub(lambda m: f"10*{m.group(1)}/", s)
    return s


_UNIT_SYNONYMS = {
    "iu/l": "[IU]/L",
    "units/l": "U/L",
    "k/ul": "10*3/uL",
    "thou/ul": "10*3/uL",
    "x10*3/ul": "10*3/uL",
    "m/ul": "10*6/uL",
    "mill/ul": "10*6/uL",
    "1/nl": "/nL",
    "1/pl": "/pL",
    "1/ul": "/uL",
    "cells/ul": "/uL",
    "cell/ul": "/uL",
    "giga/l": "10*9/L",
    "gpt/l": "10*9/L",
    "tera/l": "10*12/L",
    "tpt/l": "10*12/L",
    "g/100ml": "g/dL",
    "mg/100ml": "mg/dL",
    "ug/100ml": "ug/dL",
    "percent": "%",
    "fraction": "L/L",
}


@lru_cache(maxsize=1)
def _unit_index() -> dict[str, str]:
    index = {_squash(u): u for u in KNOWN_UNITS}
    index.update(_UNIT_SYNONYMS)
    return index


@lru_cache(maxsize=4096)
def normalise_unit(text: str) -> str:
    """Canonical UCUM spelling of a unit (``"µmol/l"`` -> ``"umol/L"``, ``"mEq/L"`` -> ``"meq/L"``).

    Raises :class:`UnitError` (with a did-you-mean hint) for a spelling it does not know.
    """
    key = _squash(text)
    index = _unit_index()
    if key in index:
        return index[key]
    close = difflib.get_close_matches(key, list(index), n=3, cutoff=0.6)
    hint = None
    if close:
        hint = "did you mean " + " or ".join(f"'{index[c]}'" for c in dict.fromkeys(close)) + "?"
    raise UnitError(str(text), f"unknown unit '{text}'", hint)


# --------------------------------------------------------------------------- registry


def _name_key(name: str) -> str:
    return re.sub(r"[\s_\-]+", " ", str(name).strip().lower()).strip()


def _registry_path():
    """The registry file, read as package data of ``bayesbase.models`` (``models/analytes.toml``)."""
    return resources.files("bayesbase.models").joinpath("analytes.toml")


def _check_conversions(where: str, table: object, problems: list[str]) -> dict[str, dict]:
    out: dict[str, dict] = {}
    if not isinstance(table, dict) or not table:
        problems.append(f"{where}: 'conversions' must be a non-empty table")
        return out
    for unit, entry in table.items():
        try:
            canon = normalise_unit(unit)
        except UnitError:
            problems.append(f"{where}: unit '{unit}' is not a known UCUM spelling")
            continue
        if canon != unit:
            problems.append(f"{where}: write unit '{unit}' as '{canon}'")
        if not isinstance(entry, dict):
            problems.append(f"{where}.{unit}: expected a table with factor, source, provenance")
            continue
        extra = set(entry) - {"factor", "source", "provenance"}
        missing = {"factor", "source", "provenance"} - set(entry)
        if extra or missing:
            problems.append(f"{where}.{unit}: keys must be factor, source, provenance "
                            f"(missing {sorted(missing)}, unexpected {sorted(extra)})")
            continue
        factor = entry["factor"]
        if isinstance(factor, bool) or not isinstance(factor, (int, float)) or not factor > 0:
            problems.append(f"{where}.{unit}: factor must be a positive number")
            continue
        if not str(entry["source"]).strip() or not str(entry["provenance"]).strip():
            problems.append(f"{where}.{unit}: source and provenance must not be empty")
            continue
        out[canon] = {"factor": float(factor), "source": str(entry["source"]),
                      "provenance": str(entry["provenance"])}
    return out


_ANALYTE_KEYS = {"label", "unit", "display_unit", "aliases", "loinc", "loinc_source", "loinc_note",
                 "molar_mass", "molar_mass_source", "valence", "conversions", "reported_as",
                 "plausible"}
_RANGE_KEYS = {"min", "max", "source", "provenance", "note"}


def _check_range(where: str, entry: object, problems: list[str]) -> dict | None:
    """``plausible = { min, max, source, provenance, note? }`` in the canonical unit."""
    if not isinstance(entry, dict):
        problems.append(f"{where}: expected a table with min, max, source, provenance")
        return None
    extra = set(entry) - _RANGE_KEYS
    missing = {"min", "max", "source", "provenance"} - set(entry)
    if extra or missing:
        problems.append(f"{where}: keys must be min, max, source, provenance and optional note "
                        f"(missing {sorted(missing)}, unexpected {sorted(extra)})")
        return None
    lo, hi = entry["min"], entry["max"]
    if any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in (lo, hi)) \
            or not (0 < lo < hi < float("inf")):
        problems.append(f"{where}: need finite numbers with 0 < min < max")
        return None
    if not str(entry["source"]).strip() or not str(entry["provenance"]).strip():
        problems.append(f"{where}: source and provenance must not be empty")
        return None
    return {"min": float(lo), "max": float(hi), "source": str(entry["source"]),
            "provenance": str(entry["provenance"]), "note": str(entry.get("note", ""))}


@lru_cache(maxsize=1)
def _registry() -> dict:
    path = _registry_path()
    raw = tomllib.loads(path.read_bytes().decode("utf-8"))
    problems: list[str] = []
    analytes: dict[str, dict] = {}
    names: dict[str, str] = {}  # name key -> analyte id
    groups: dict[str, tuple[str, str]] = {}  # name key -> (analyte id, group id)

    def claim(key: str, aid: str, what: str) -> None:
        if names.get(key, aid) != aid:
            problems.append(f"{what} '{key}' of '{aid}' is already a name of '{names[key]}'")
        names[key] = aid

    for aid, spec in (raw.get("analytes") or {}).items():
        where = f"analytes.{aid}"
        if not re.fullmatch(r"[a-z][a-z0-9_]*", aid):
            problems.append(f"{where}: ids are lower case letters, digits and '_'")
        extra = set(spec) - _ANALYTE_KEYS
        if extra:
            problems.append(f"{where}: unknown keys {sorted(extra)}")
        required = ("label", "unit", "display_unit", "aliases", "conversions", "plausible")
        for key in required:
            if key not in spec:
                problems.append(f"{where}: missing '{key}'")
        if any(k not in spec for k in required):
            continue
        plausible = _check_range(where + ".plausible", spec["plausible"], problems)
        conv = _check_conversions(where + ".conversions", spec["conversions"], problems)
        unit = spec["unit"]
        if conv.get(unit, {}).get("factor") != 1.0:
            problems.append(f"{where}: the canonical unit '{unit}' needs the identity factor 1")
        reported_as: dict[str, dict] = {}
        for gid, group in (spec.get("reported_as") or {}).items():
            gwhere = f"{where}.reported_as.{gid}"
            gconv = _check_conversions(gwhere + ".conversions", group.get("conversions"), problems)
            gnames = [str(n) for n in group.get("names", [])]
            if not gnames:
                problems.append(f"{gwhere}: 'names' must list the reported names")
            reported_as[gid] = {"names": gnames, "note": str(group.get("note", "")),
                                "loinc": group.get("loinc"), "conversions": gconv}
            for n in gnames:
                claim(_name_key(n), aid, "reported name")
                groups[_name_key(n)] = (aid, gid)
        aliases = [str(a) for a in spec["aliases"]]
        for n in [aid, spec["label"], *aliases]:
            claim(_name_key(n), aid, "name")
        analytes[aid] = {
            "id": aid,
            "label": str(spec["label"]),
            "unit": unit,
            "display_unit": str(spec["display_unit"]),
            "aliases": aliases,
            "loinc": spec.get("loinc"),
            "loinc_source": spec.get("loinc_source"),
            "loinc_note": spec.get("loinc_note"),
            "molar_mass": spec.get("molar_mass"),
            "molar_mass_source": spec.get("molar_mass_source"),
            "valence": spec.get("valence"),
            "conversions": conv,
            "reported_as": reported_as,
            "plausible": plausible,
        }
    if not analytes:
        problems.append("no [analytes.*] tables")
    if problems:
        raise RegistryError(f"{path}: " + "; ".join(problems))
    return {"analytes": analytes, "names": names, "groups": groups}


def analyte_ids() -> list[str]:
    """Canonical analyte ids, in registry order."""
    return list(_registry()["analytes"])


def _display_names() -> dict[str, str]:
    """Name key -> how to show that name in a hint."""
    reg = _registry()
    out: dict[str, str] = {}
    for aid, spec in reg["analytes"].items():
        for n in [aid, spec["label"], *spec["aliases"]]:
            out.setdefault(_name_key(n), n)
        for group in spec["reported_as"].values():
            for n in group["names"]:
                out.setdefault(_name_key(n), n)
    return out


@lru_cache(maxsize=4096)
def suggest_analyte(name: str) -> str | None:
    """Closest analyte id to a name that did not resolve (difflib over ids, labels, aliases)."""
    names = _registry()["names"]
    key = _name_key(name)
    if key in names:
        return names[key]
    close = difflib.get_close_matches(key, list(names), n=1, cutoff=0.6)
    return names[close[0]] if close else None


@lru_cache(maxsize=4096)
def resolve_analyte(name: str) -> str:
    """Canonical id for an analyte id, label or alias (case-insensitive).

    Raises :class:`UnknownAnalyteError` (a ``KeyError``) with a did-you-mean hint.
    """
    reg = _registry()
    key = _name_key(name)
    if key in reg["names"]:
        return reg["names"][key]
    shown = _display_names()
    close = difflib.get_close_matches(key, list(reg["names"]), n=3, cutoff=0.6)
    if close:
        options: dict[str, str] = {}  # one suggestion per analyte id, best match first
        for c in close:
            aid = reg["names"][c]
            options.setdefault(aid, f"'{aid}'" if _name_key(aid) == c else f"'{aid}' ({shown[c]})")
        hint = "did you mean " + " or ".join(options.values()) + "?"
    else:
        hint = "known analytes: " + ", ".join(reg["analytes"])
    raise UnknownAnalyteError(str(name), f"unknown analyte '{name}'", hint)


def _spec(analyte: str) -> dict:
    return _registry()["analytes"][resolve_analyte(analyte)]


def _table(analyte: str, reported_name: str | None) -> tuple[dict, dict[str, dict], str | None]:
    """(analyte spec, conversion table, reported-as group id) for a name as reported."""
    spec = _spec(analyte)
    reg = _registry()
    # The name as reported decides; without one, the name passed as `analyte` does.
    candidate = analyte if reported_name is None else reported_name
    hit = reg["groups"].get(_name_key(candidate))
    if hit and hit[0] == spec["id"]:
        return spec, spec["reported_as"][hit[1]]["conversions"], hit[1]
    return spec, spec["conversions"], None


def accepted_units(analyte: str, reported_name: str | None = None) -> list[str]:
    """Units accepted for an analyte (as reported under ``reported_name``), canonical spelling."""
    return list(_table(analyte, reported_name)[1])


def _count_prefix_unit(text: str) -> str | None:
    """``10*9/L`` for ``G/L``/``Gpt/L``, ``10*12/L`` for ``T/L``/``Tpt/L`` (capital letter), else None."""
    m = _COUNT_PREFIX.match(re.sub(r"\s+", "", str(text)))
    if m is None:
        return None
    return "10*9/L" if m.group("g") else "10*12/L"


def _entry(analyte: str, unit: str, reported_name: str | None) -> dict:
    spec, table, group = _table(analyte, reported_name)
    accepted = ", ".join(table)
    shown = spec["label"] if group is None else f"{spec['label']} reported as {reported_name or analyte}"
    is_count = bool(COUNT_UNITS.intersection(table))
    canon = _count_prefix_unit(unit) if is_count else None
    if canon is None:
        try:
            canon = normalise_unit(unit)
        except UnitError as exc:
            close = difflib.get_close_matches(_squash(unit), [_squash(u) for u in table], n=1, cutoff=0.5)
            hint = f"did you mean '{normalise_unit(close[0])}'? " if close else ""
            raise UnitError(str(unit), f"unknown unit '{unit}' for {shown}",
                            f"{hint}accepted units: {accepted}".strip()) from exc
    if canon not in table:
        hint = f"accepted units: {accepted}"
        if is_count and canon == "g/L":
            # grams per litre cannot be a count; the writer most likely meant giga per litre
            hint += ("; 'g/L' is grams per litre: a count in giga per litre is written 'G/L' "
                     "(capital G) or '10^9/L'")
            raise UnitError(str(unit), f"unit '{unit}' is not accepted for {shown}", hint)
        # A real unit, impossible for this analyte: perhaps the analyte name is the mistake.
        others = [aid for aid, a in _registry()["analytes"].items()
                  if canon in a["conversions"] and aid != spec["id"]]
        if others:
            more = ", ..." if len(others) > 5 else ""
            hint += (f"; did you mean another analyte? '{canon}' is a unit of "
                     + ", ".join(others[:5]) + more)
        raise UnitError(str(unit), f"unit '{unit}' is not accepted for {shown}", hint)
    return table[canon]


@lru_cache(maxsize=8192)
def conversion_factor(analyte: str, unit: str, reported_name: str | None = None) -> float:
    """Factor from ``unit`` to the analyte's canonical unit (canonical = reported x factor).

    ``analyte`` may be an id, label or alias; ``reported_name`` is the analyte name as the
    laboratory reported it, which selects the factor where the name says what was measured
    (BUN / urea nitrogen vs urea). Raises :class:`UnknownAnalyteError` or :class:`UnitError`
    (listing the accepted units, with a did-you-mean hint) for an impossible pair such as ALT in
    mg/dL.
    """
    return _entry(analyte, unit, reported_name)["factor"]


def conversion_source(analyte: str, unit: str, reported_name: str | None = None) -> str:
    """Source and provenance of a conversion factor, as one line of text."""
    entry = _entry(analyte, unit, reported_name)
    return f"{entry['source']} [{entry['provenance']}]"


def canonical_unit(analyte: str) -> str:
    """Canonical UCUM unit of an analyte (e.g. ``"umol/L"``)."""
    return _spec(analyte)["unit"]


def display_unit(analyte: str) -> str:
    """Display spelling of the canonical unit (e.g. ``"µmol/L"``)."""
    return _spec(analyte)["display_unit"]


def label(analyte: str) -> str:
    """Display name of an analyte (e.g. ``"ALT"``, ``"Creatinine"``)."""
    return _spec(analyte)["label"]


def loinc(analyte: str) -> str | None:
    """LOINC code recorded for an analyte, or None (see ``analyte_info`` for its source)."""
    return _spec(analyte)["loinc"]


def analyte_info(analyte: str) -> dict:
    """A copy of everything the registry holds about one analyte."""
    import copy

    return copy.deepcopy(_spec(analyte))


def plausible_range(analyte: str) -> dict:
    """The analyte's plausibility envelope in its canonical unit: ``{"min", "max", "source",
    "provenance", "note"}`` (values outside it cannot come from a living animal; see the header
    of ``models/analytes.toml``)."""
    return dict(_spec(analyte)["plausible"])
