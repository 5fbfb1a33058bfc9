"""Prior packs (layer 2): strict schema, loading, hashing and lab override CSVs.

A pack (``models/<name>.toml``) holds, per analyte, the population centre and interval, the
between-animal CV (CVG), the within-animal CV (CVI) with the SD of ln(CVI), a default analytical
CV (CVA), sample-quality directions and thresholds, and its retest group. Every number is a
*cited number*: an inline table ``{ value, source, provenance[, note] }`` with provenance one of
``read``, ``derived``, ``common practice`` or ``from memory`` (the latter with a rationale in
``note``). The schema is strict: unknown keys (with a did-you-mean hint), missing keys, wrong
types and out-of-range values are all collected and raised together in a :class:`PackError`,
each naming the file and the key path.

Lab override CSV (``load_pack(..., overrides="my_lab.csv")``)
-------------------------------------------------------------
Columns ``analyte`` (required), ``unit``, ``population_center``, ``cvg_pct``, ``cvi_pct``,
``cvi_log_sd``, ``cva_pct``; any subset of columns and of rows. A blank cell keeps the pack's
value. Percentages are converted to fractions. Analyte names may be aliases (resolved by the
analyte registry). ``unit``, if given, applies to ``population_center`` and must be the pack's
canonical unit or convertible to it by the registry. An overridden number gets provenance
``lab`` and source ``lab override: <file> row N`` (rows counted as a spreadsheet shows them,
header = row 1). When the centre is overridden, the pack's interval limits and breed centres are
scaled by the ratio new/old centre (provenance ``derived``), so that the interval keeps its
log-width around the lab's centre. An analyte that is not in the pack is **rejected**: a lab that
needs a new analyte copies the pack, adds the analyte with its sources and checks the file with
``bayesbase priors check``.

``pack.sha256`` is the SHA-256 of the pack file bytes, or of pack bytes + override bytes when an
override is given; ``pack.id`` then becomes ``<pack>+<override file stem>``.
"""
from __future__ import annotations

import csv
import difflib
import hashlib
import io
import math
import tomllib
from dataclasses import dataclass, field, replace
from importlib import resources
from pathlib import Path
from typing import Any

from . import evidence as _evidence
from .errors import AnalyteNotInPack, PackError

try:  # layer 1; guarded so that the pack schema works without the registry
    from . import units as _units
except ImportError:  # pragma: no cover - only before bayesbase.units exists
    _units = None

__all__ = [
    "PROVENANCES",
    "CitedNumber",
    "RetestGroup",
    "AnalytePrior",
    "Pack",
    "available_packs",
    "load_pack",
    "check_file",
    "describe",
    "describe_text",
    "CviStudy",
    "DESIGNS",
    "OVERRIDE_COLUMNS",
]

#: Provenance values a pack file may use.
PROVENANCES = ("read", "derived", "common practice", "from memory")
#: Provenance given to a number taken from a lab override CSV.
LAB_PROVENANCE = "lab"
DIRECTIONS = ("up", "down", "variable", "none")
HIL = ("haemolysis", "lipaemia", "icterus")
#: Columns of a lab override CSV.
OVERRIDE_COLUMNS = ("analyte", "unit", "population_center", "cvg_pct", "cvi_pct", "cvi_log_sd", "cva_pct")
#: A from-memory CVI must carry at least this SD on ln(CVI) (schema rule of this project).
MIN_LOG_SD_FROM_MEMORY = 0.35


# --------------------------------------------------------------------------- data classes

@dataclass(frozen=True)
class CitedNumber:
    """A number with its source: citation text, provenance and an optional note."""

    value: float
    source: str
    provenance: str
    note: str | None = None
    locator: str | None = None


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
class RetestGroup:
    """Retest interval (hours) and drift-slope prior SD (log units per year) of a group."""

    id: str
    label: str
    hours_min: float
    hours_max: float
    slope_sd: float


def _sigma(cv: float) -> float:
    return math.sqrt(math.log1p(cv * cv))


@dataclass(frozen=True)
class AnalytePrior:
    """Priors of one analyte, fractions (not percent), values in the canonical unit."""

    analyte: str
    unit: str
    center: float
    ri_lower: float
    ri_upper: float
    cvg: float
    cvi: float
    cvi_log_sd: float
    cva: float
    mcrc: float | None
    breed_centers: dict[str, float]
    interference: dict[str, str]
    hil_thresholds: dict[str, float]
    feeding_sensitive: bool
    age_dependent: str | None
    group: str
    slope_sd: float
    shift_sd: float | None
    sources: dict[str, str] = field(repr=False)
    cvi_studies: tuple[CviStudy, ...] = field(default=(), repr=False)

    # log-scale SDs: sigma = sqrt(ln(1 + CV^2))
    @property
    def sg(self) -> float:
        return _sigma(self.cvg)

    @property
    def si(self) -> float:
        return _sigma(self.cvi)

    @property
    def sa(self) -> float:
        return _sigma(self.cva)

    @property
    def ii(self) -> float:
        """Index of individuality, Harris orientation: CVI / CVG (< 0.6: subject-based limits)."""
        return self.cvi / self.cvg

    @property
    def cva_high(self) -> bool:
        """CVA above half the CVI (analytical imprecision beyond the desirable limit)."""
        return self.cva > 0.5 * self.cvi

    def center_for(self, breed: str | None = None) -> float:
        """Population centre, or the breed centre when the pack has one for ``breed``."""
        if breed:
            key = _breed_key(breed)
            if key in self.breed_centers:
                return self.breed_centers[key]
        return self.center


@dataclass(frozen=True)
class Pack:
    """A loaded prior pack. ``cited[analyte][field]`` keeps every cited number of an analyte;
    ``sources`` maps every key path (e.g. ``analytes.creatinine.cvi``) to its citation text."""

    id: str
    species: str
    title: str
    version: str
    sha256: str
    analytes: dict[str, AnalytePrior] = field(repr=False)
    retest_groups: dict[str, RetestGroup] = field(repr=False)
    defaults: dict[str, float] = field(repr=False)
    sources: dict[str, str] = field(repr=False)
    cited: dict[str, dict[str, CitedNumber]] = field(repr=False)
    description: str = field(default="", repr=False)

    def __contains__(self, analyte: object) -> bool:
        return analyte in self.analytes

    def get(self, analyte: str) -> AnalytePrior:
        """Prior of an analyte; raises :class:`AnalyteNotInPack` with a did-you-mean hint."""
        if analyte in self.analytes:
            return self.analytes[analyte]
        if _units is not None:
            try:
                aid = _units.resolve_analyte(analyte)
            except Exception:
                aid = None
            if aid in self.analytes:
                return self.analytes[aid]
        close = difflib.get_close_matches(str(analyte), list(self.analytes), n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise AnalyteNotInPack(f"analyte '{analyte}' is not in pack '{self.id}'{hint}")

    def ii(self, analyte: str) -> float:
        """Index of individuality CVI/CVG (Harris orientation) of an analyte."""
        return self.get(analyte).ii


def _breed_key(breed: str) -> str:
    return "_".join(str(breed).strip().lower().replace("-", " ").split())


# --------------------------------------------------------------------------- schema

_T_STR, _T_BOOL, _T_CITED, _T_TABLE, _T_LIST = "string", "boolean", "cited number", "table", "list of tables"

# key -> (kind, required, range) ; range = (lo, hi, lo_inclusive, hi_inclusive) or None
_POS = (0.0, math.inf, False, False)
_CV = (0.0, 2.0, False, False)
_PACK_KEYS = {"id": (_T_STR, True, None), "species": (_T_STR, True, None), "title": (_T_STR, True, None),
              "version": (_T_STR, True, None), "description": (_T_STR, False, None)}
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
    "note": (_T_STR, False, None),
    "cvi_studies": (_T_LIST, False, None),
}
_TOP_KEYS = ("pack", "defaults", "retest_groups", "analytes")
_CITED_KEYS = ("value", "source", "provenance", "locator", "note")
#: Keys of one entry of an analyte's ``cvi_studies`` list (the evidence behind its CVI).
_STUDY_KEYS = ("value", "source", "provenance", "locator", "note", "design", "n_animals", "n_specimens",
               "n_replicates", "cva", "ci_lower", "ci_upper", "pooled")
#: Designs of a biological-variation study: short-term (days to weeks apart, e.g. weekly x 6)
#: or long-term (months apart, e.g. monthly for a year or annual visits).
DESIGNS = ("short-term", "long-term")
#: Relative tolerance between a pack's combined cvi / cvi_log_sd and their recomputation.
COMBINE_RTOL = 0.02
_INTERFERENCE_KEYS = (*HIL, "source", "provenance", "note")


class _Collector:
    def __init__(self, file: str):
        self.file = file
        self.problems: list[str] = []

    def add(self, path: str, message: str) -> None:
        self.problems.append(f"{self.file}: {path}: {message}" if path else f"{self.file}: {message}")


def _hint(key: str, allowed) -> str:
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else f" (allowed: {', '.join(allowed)})"


def _unknown_keys(c: _Collector, path: str, table: dict, allowed) -> None:
    for key in table:
        if key not in allowed:
            c.add(f"{path}.{key}" if path else key, "unknown key" + _hint(key, allowed))


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _in_range(v: float, rng) -> bool:
    lo, hi, lo_inc, hi_inc = rng
    return (v >= lo if lo_inc else v > lo) and (v <= hi if hi_inc else v < hi)


def _range_text(rng) -> str:
    lo, hi, lo_inc, hi_inc = rng
    left = "[" if lo_inc else "("
    right = "]" if hi_inc else ")"
    return f"{left}{lo:g}, {'inf' if math.isinf(hi) else f'{hi:g}'}{right}"


def _check_cited(c: _Collector, path: str, v: Any, rng=None) -> CitedNumber | None:
    if not isinstance(v, dict):
        c.add(path, f"expected a cited number {{ value = ..., source = \"...\", provenance = \"...\" }}, "
                    f"got {type(v).__name__} {v!r}")
        return None
    _unknown_keys(c, path, v, _CITED_KEYS)
    ok = True
    value = v.get("value")
    if "value" not in v:
        c.add(f"{path}.value", "missing required key")
        ok = False
    elif not _is_number(value):
        c.add(f"{path}.value", f"expected a number, got {type(value).__name__} {value!r}")
        ok = False
    elif not math.isfinite(value):
        c.add(f"{path}.value", f"must be finite, got {value!r}")
        ok = False
    elif rng is not None and not _in_range(float(value), rng):
        c.add(f"{path}.value", f"{value!r} out of range {_range_text(rng)}")
        ok = False
    source = v.get("source")
    if "source" not in v:
        c.add(f"{path}.source", "missing required key")
        ok = False
    elif not isinstance(source, str) or not source.strip():
        c.add(f"{path}.source", "must be a non-empty string (citation with a locator or URL)")
        ok = False
    prov = v.get("provenance")
    if "provenance" not in v:
        c.add(f"{path}.provenance", "missing required key")
        ok = False
    elif prov not in PROVENANCES:
        c.add(f"{path}.provenance", f"{prov!r} is not an allowed provenance" + _hint(str(prov), PROVENANCES))
        ok = False
    note = v.get("note")
    if note is not None and not isinstance(note, str):
        c.add(f"{path}.note", "must be a string")
        ok = False
    if prov == "from memory" and not (isinstance(note, str) and note.strip()):
        c.add(f"{path}.note", "a 'from memory' number needs a rationale in note")
        ok = False
    locator = v.get("locator")
    if locator is not None and not (isinstance(locator, str) and locator.strip()):
        c.add(f"{path}.locator", "must be a non-empty string (table and page, or 'abstract')")
        ok = False
    elif prov == "read" and locator is None:
        c.add(f"{path}.locator", "a 'read' number needs a locator: where in the source it was seen "
                                 "(table and page, or 'abstract')")
        ok = False
    if not ok:
        return None
    return CitedNumber(float(value), source.strip(), prov, note, locator.strip() if locator else None)


def _check_keys(c: _Collector, path: str, table: dict, spec: dict) -> dict[str, Any]:
    """Check a table against a key spec; returns {key: parsed value} for keys that passed."""
    _unknown_keys(c, path, table, spec)
    out: dict[str, Any] = {}
    for key, (kind, required, rng) in spec.items():
        p = f"{path}.{key}" if path else key
        if key not in table:
            if required:
                c.add(p, f"missing required key ({kind})")
            continue
        v = table[key]
        if kind == _T_STR:
            if not isinstance(v, str) or not v.strip():
                c.add(p, f"expected a non-empty string, got {type(v).__name__} {v!r}")
            else:
                out[key] = v.strip()
        elif kind == _T_BOOL:
            if not isinstance(v, bool):
                c.add(p, f"expected true or false, got {type(v).__name__} {v!r}")
            else:
                out[key] = v
        elif kind == _T_CITED:
            cn = _check_cited(c, p, v, rng)
            if cn is not None:
                out[key] = cn
        elif kind == _T_TABLE:
            if not isinstance(v, dict):
                c.add(p, f"expected a table, got {type(v).__name__} {v!r}")
            else:
                out[key] = v
        elif kind == _T_LIST:
            if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
                c.add(p, f"expected a list of tables, got {type(v).__name__}")
            else:
                out[key] = v
    return out


def _parse_pack(data: dict, file: str) -> tuple[dict, list[str]]:
    """Validate a parsed pack TOML; returns (parsed parts, problems)."""
    c = _Collector(file)
    _unknown_keys(c, "", data, _TOP_KEYS)
    for key in _TOP_KEYS:
        if key not in data:
            c.add(key, "missing required table")
        elif not isinstance(data[key], dict):
            c.add(key, f"expected a table, got {type(data[key]).__name__}")
    parts: dict[str, Any] = {"pack": {}, "defaults": {}, "groups": {}, "analytes": {}}
    if isinstance(data.get("pack"), dict):
        parts["pack"] = _check_keys(c, "pack", data["pack"], _PACK_KEYS)
    if isinstance(data.get("defaults"), dict):
        parts["defaults"] = _check_keys(c, "defaults", data["defaults"], _DEFAULT_KEYS)
    groups = data.get("retest_groups")
    if isinstance(groups, dict):
        if not groups:
            c.add("retest_groups", "needs at least one group")
        for gid, g in groups.items():
            p = f"retest_groups.{gid}"
            if not isinstance(g, dict):
                c.add(p, "expected a table")
                continue
            got = _check_keys(c, p, g, _GROUP_KEYS)
            if "hours_min" in got and "hours_max" in got and got["hours_min"].value > got["hours_max"].value:
                c.add(p, f"hours_min {got['hours_min'].value:g} > hours_max {got['hours_max'].value:g}")
            parts["groups"][gid] = got
    analytes = data.get("analytes")
    if isinstance(analytes, dict):
        if not analytes:
            c.add("analytes", "needs at least one analyte")
        known_ids = _units.analyte_ids() if _units is not None else None
        for aid, a in analytes.items():
            p = f"analytes.{aid}"
            if not isinstance(a, dict):
                c.add(p, "expected a table")
                continue
            if known_ids is not None and aid not in known_ids:
                c.add(p, "not a canonical analyte id of models/analytes.toml" + _hint(aid, known_ids))
            got = _check_keys(c, p, a, _ANALYTE_KEYS)
            _check_analyte(c, p, aid, got, groups if isinstance(groups, dict) else {}, known_ids)
            parts["analytes"][aid] = got
    return parts, c.problems


def _check_analyte(c: _Collector, p: str, aid: str, got: dict, groups: dict, known_ids) -> None:
    unit = got.get("unit")
    if unit is not None and known_ids is not None and aid in known_ids:
        canon = _units.canonical_unit(aid)
        if unit != canon:
            c.add(f"{p}.unit", f"'{unit}' is not the canonical unit of {aid} (expected '{canon}')")
    group = got.get("group")
    if group is not None and group not in groups:
        c.add(f"{p}.group", f"'{group}' is not a retest group" + _hint(group, list(groups)))
    lo, ce, hi = (got.get(k) for k in ("ri_lower", "center", "ri_upper"))
    if lo and ce and hi and not (lo.value < ce.value < hi.value):
        c.add(p, f"need ri_lower < center < ri_upper, got {lo.value:g}, {ce.value:g}, {hi.value:g}")
    cvi, lsd = got.get("cvi"), got.get("cvi_log_sd")
    if cvi and lsd and cvi.provenance == "from memory" and lsd.value < MIN_LOG_SD_FROM_MEMORY:
        c.add(f"{p}.cvi_log_sd", f"a from-memory CVI needs cvi_log_sd >= {MIN_LOG_SD_FROM_MEMORY}, "
                                 f"got {lsd.value:g}")
    studies = got.get("cvi_studies")
    if studies is not None:
        got["_studies"] = _check_studies(c, f"{p}.cvi_studies", studies, cvi, lsd)
    intf = got.get("interference")
    if intf is not None:
        q = f"{p}.interference"
        _unknown_keys(c, q, intf, _INTERFERENCE_KEYS)
        dirs = {k: intf[k] for k in HIL if k in intf}
        if not dirs:
            c.add(q, "give at least one of " + ", ".join(HIL))
        for k, v in dirs.items():
            if v not in DIRECTIONS:
                c.add(f"{q}.{k}", f"{v!r} is not a direction" + _hint(str(v), DIRECTIONS))
        if not isinstance(intf.get("source"), str) or not intf.get("source", "").strip():
            c.add(f"{q}.source", "missing required key (non-empty string)")
        if intf.get("provenance") not in PROVENANCES:
            c.add(f"{q}.provenance", f"{intf.get('provenance')!r} is not an allowed provenance"
                  + _hint(str(intf.get("provenance")), PROVENANCES))
        if intf.get("provenance") == "from memory" and not str(intf.get("note", "")).strip():
            c.add(f"{q}.note", "a 'from memory' entry needs a rationale in note")
    hil = got.get("hil_thresholds")
    if hil is not None:
        q = f"{p}.hil_thresholds"
        _unknown_keys(c, q, hil, HIL)
        got["_hil"] = {}
        for k in HIL:
            if k in hil:
                cn = _check_cited(c, f"{q}.{k}", hil[k], _POS)
                if cn is not None:
                    got["_hil"][k] = cn
    breeds = got.get("breed_centers")
    if breeds is not None:
        got["_breeds"] = {}
        for b, v in breeds.items():
            if b != _breed_key(b):
                c.add(f"{p}.breed_centers.{b}", f"breed keys are lower case with underscores (use '{_breed_key(b)}')")
                continue
            cn = _check_cited(c, f"{p}.breed_centers.{b}", v, _POS)
            if cn is not None:
                got["_breeds"][b] = cn


def _int_key(c: _Collector, path: str, v: Any, lo: int) -> int | None:
    if not isinstance(v, int) or isinstance(v, bool) or v < lo:
        c.add(path, f"expected an integer >= {lo}, got {v!r}")
        return None
    return v


def _check_studies(c: _Collector, path: str, studies: list, cvi: CitedNumber | None,
                   lsd: CitedNumber | None) -> tuple[CviStudy, ...]:
    """Check the ``cvi_studies`` list; when studies are pooled, the analyte's ``cvi`` and
    ``cvi_log_sd`` must equal their DerSimonian-Laird combination (bayesbase.evidence)."""
    out: list[CviStudy] = []
    for i, st in enumerate(studies):
        q = f"{path}[{i}]"
        _unknown_keys(c, q, st, _STUDY_KEYS)
        cn = _check_cited(c, q, {k: st[k] for k in _CITED_KEYS if k in st}, _CV)
        design = st.get("design")
        if design not in DESIGNS:
            c.add(f"{q}.design", f"{design!r} is not a design" + _hint(str(design), DESIGNS))
        n_a = _int_key(c, f"{q}.n_animals", st.get("n_animals"), 1)
        n_s = st.get("n_specimens")
        if n_s is not None:
            n_s = _int_key(c, f"{q}.n_specimens", n_s, 2)
        n_r = st.get("n_replicates", 1)
        n_r = _int_key(c, f"{q}.n_replicates", n_r, 1)
        cva = st.get("cva")
        if cva is not None and not (_is_number(cva) and 0 < cva < 2):
            c.add(f"{q}.cva", f"expected a fraction in (0, 2), got {cva!r}")
            cva = None
        lo, hi = st.get("ci_lower"), st.get("ci_upper")
        if (lo is None) != (hi is None):
            c.add(q, "give both ci_lower and ci_upper (95 % CI of CVI) or neither")
        pooled = st.get("pooled", True)
        if not isinstance(pooled, bool):
            c.add(f"{q}.pooled", f"expected true or false, got {pooled!r}")
            pooled = False
        if cn is None or design not in DESIGNS or n_a is None or n_r is None:
            continue
        if lo is not None and hi is not None:
            if not (_is_number(lo) and _is_number(hi) and 0 < lo <= cn.value <= hi):
                c.add(q, f"need 0 < ci_lower <= value <= ci_upper, got {lo!r}, {cn.value:g}, {hi!r}")
                continue
            se = _evidence.log_sd_from_ci(float(lo), float(hi))
            basis = f"95 % CI {lo:g}-{hi:g}: ln(upper/lower)/3.92"
        elif n_s is not None:
            se = _evidence.se_log_cv_from_design(cn.value, n_a, n_s, cva, n_r)
            basis = (f"design approximation, df = {n_a} x ({n_s} - 1) = {n_a * (n_s - 1)}"
                     + (f", CVA {cva:g} with {n_r} replicates" if cva is not None and n_r >= 2 else ""))
        else:
            c.add(q, "give ci_lower/ci_upper or n_specimens (needed for the SE of ln CVI)")
            continue
        out.append(CviStudy(cn.value, cn.source, cn.provenance, design, n_a, n_s, se, basis, pooled,
                            cn.locator, cn.note))
    pooled_studies = [s for s in out if s.pooled]
    if len(out) == len(studies) and pooled_studies:
        designs = {s.design for s in pooled_studies}
        if len(designs) > 1:
            c.add(path, "pooled studies mix short-term and long-term designs; pool one design and "
                        "list the other with pooled = false")
        elif cvi is not None and lsd is not None:
            comb = _evidence.combine_log_cvi([math.log(s.value) for s in pooled_studies],
                                             [s.se_log for s in pooled_studies])
            for name, cited, want in (("cvi", cvi, comb["cvi"]), ("cvi_log_sd", lsd, comb["cvi_log_sd"])):
                if not math.isclose(cited.value, want, rel_tol=COMBINE_RTOL):
                    c.add(f"{path.rsplit('.', 1)[0]}.{name}",
                          f"{cited.value:g} does not match the combination of the pooled studies "
                          f"({want:.4g}; DerSimonian-Laird, bayesbase.evidence.combine_log_cvi)")
    return tuple(out)


def _build(parts: dict, sha: str) -> Pack:
    meta = parts["pack"]
    sources: dict[str, str] = {}
    groups: dict[str, RetestGroup] = {}
    group_cited: dict[str, CitedNumber] = {}
    for gid, g in parts["groups"].items():
        groups[gid] = RetestGroup(gid, g["label"], g["hours_min"].value, g["hours_max"].value, g["slope_sd"].value)
        group_cited[gid] = g["slope_sd"]
        for k in ("hours_min", "hours_max", "slope_sd"):
            sources[f"retest_groups.{gid}.{k}"] = g[k].source
    defaults = {k: v.value for k, v in parts["defaults"].items()}
    for k, v in parts["defaults"].items():
        sources[f"defaults.{k}"] = v.source
    analytes: dict[str, AnalytePrior] = {}
    cited: dict[str, dict[str, CitedNumber]] = {}
    for aid, a in parts["analytes"].items():
        cn: dict[str, CitedNumber] = {k: a[k] for k in
                                      ("center", "ri_lower", "ri_upper", "cvg", "cvi", "cvi_log_sd", "cva",
                                       "mcrc", "shift_sd", "slope_sd") if k in a}
        if "slope_sd" not in cn:
            cn["slope_sd"] = group_cited[a["group"]]
        for b, v in a.get("_breeds", {}).items():
            cn[f"breed_centers.{b}"] = v
        for k, v in a.get("_hil", {}).items():
            cn[f"hil_thresholds.{k}"] = v
        intf = a.get("interference", {})
        asrc = {k: v.source for k, v in cn.items()}
        if intf:
            asrc["interference"] = intf["source"]
            asrc["interference.provenance"] = intf["provenance"]
        cited[aid] = cn
        for k, v in asrc.items():
            sources[f"analytes.{aid}.{k}"] = v
        analytes[aid] = AnalytePrior(
            analyte=aid, unit=a["unit"], center=cn["center"].value, ri_lower=cn["ri_lower"].value,
            ri_upper=cn["ri_upper"].value, cvg=cn["cvg"].value, cvi=cn["cvi"].value,
            cvi_log_sd=cn["cvi_log_sd"].value, cva=cn["cva"].value,
            mcrc=cn["mcrc"].value if "mcrc" in cn else None,
            breed_centers={b: v.value for b, v in a.get("_breeds", {}).items()},
            interference={k: intf[k] for k in HIL if k in intf},
            hil_thresholds={k: v.value for k, v in a.get("_hil", {}).items()},
            feeding_sensitive=bool(a.get("feeding_sensitive", False)),
            age_dependent=a.get("age_dependent"), group=a["group"], slope_sd=cn["slope_sd"].value,
            shift_sd=cn["shift_sd"].value if "shift_sd" in cn else None, sources=asrc,
            cvi_studies=a.get("_studies", ()))
    return Pack(id=meta["id"], species=meta["species"], title=meta["title"], version=meta["version"],
                sha256=sha, analytes=analytes, retest_groups=groups, defaults=defaults, sources=sources,
                cited=cited, description=meta.get("description", ""))


# --------------------------------------------------------------------------- loading

def available_packs() -> list[str]:
    """Names of the packs shipped in ``bayesbase.models`` (``models/*.toml`` except the registry)."""
    root = resources.files("bayesbase.models")
    return sorted(p.name[:-5] for p in root.iterdir()
                  if p.name.endswith(".toml") and p.name != "analytes.toml")


def _locate(name_or_path: str | Path) -> tuple[bytes, str]:
    """(bytes, display name) of a pack given by name or path."""
    text = str(name_or_path)
    path = Path(text)
    if isinstance(name_or_path, Path) or text.endswith(".toml") or "/" in text or "\\" in text:
        if not path.is_file():
            raise PackError(f"{text}: pack file not found")
        return path.read_bytes(), text
    names = available_packs()
    if text not in names:
        close = difflib.get_close_matches(text, names, n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise PackError(f"unknown pack '{text}'{hint}; available packs: {', '.join(names)}")
    return resources.files("bayesbase.models").joinpath(f"{text}.toml").read_bytes(), f"models/{text}.toml"


def _parse_bytes(raw: bytes, display: str) -> tuple[dict, list[str]]:
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        return {}, [f"{display}: not UTF-8 text ({exc})"]
    except tomllib.TOMLDecodeError as exc:
        return {}, [f"{display}: TOML syntax error: {exc}"]
    return _parse_pack(data, display)


def load_pack(name_or_path: str | Path, overrides: str | Path | None = None) -> Pack:
    """Load a pack by name (``"dog"``) or path, optionally merged with a lab override CSV.

    Raises :class:`PackError` listing every problem found (file, key path or row and column).
    """
    raw, display = _locate(name_or_path)
    parts, problems = _parse_bytes(raw, display)
    if problems:
        raise PackError(problems)
    pack = _build(parts, hashlib.sha256(raw).hexdigest())
    if overrides is None:
        return pack
    opath = Path(overrides)
    if not opath.is_file():
        raise PackError(f"{overrides}: override file not found")
    obytes = opath.read_bytes()
    merged, oproblems = _apply_overrides(pack, obytes, str(overrides))
    if oproblems:
        raise PackError(oproblems)
    return replace(merged, id=f"{pack.id}+{opath.stem}", sha256=hashlib.sha256(raw + obytes).hexdigest())


# --------------------------------------------------------------------------- overrides

def _read_override_rows(raw: bytes, display: str) -> tuple[list[tuple[int, dict[str, str]]], list[str]]:
    problems: list[str] = []
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        return [], [f"{display}: not UTF-8 text ({exc})"]
    reader = csv.reader(io.StringIO(text))
    rows = list(reader)
    if not rows or not any(cell.strip() for cell in rows[0]):
        return [], [f"{display}: empty file (expected a header with at least the column 'analyte')"]
    header = [h.strip() for h in rows[0]]
    for h in header:
        if h not in OVERRIDE_COLUMNS:
            problems.append(f"{display}, column '{h}': unknown column" + _hint(h, OVERRIDE_COLUMNS))
    dup = {h for h in header if header.count(h) > 1}
    for h in sorted(dup):
        problems.append(f"{display}, column '{h}': appears more than once")
    if "analyte" not in header:
        problems.append(f"{display}: missing required column 'analyte'")
    if problems:
        return [], problems
    out = []
    for i, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue
        if len(row) > len(header):
            problems.append(f"{display}, row {i}: {len(row)} cells but {len(header)} columns in the header")
            continue
        out.append((i, {h: (row[j].strip() if j < len(row) else "") for j, h in enumerate(header)}))
    return out, problems


_PCT = {"cvg_pct": "cvg", "cvi_pct": "cvi", "cva_pct": "cva"}


def _parse_override(rows, display: str, pack: Pack | None) -> tuple[dict[str, dict], list[str]]:
    """Check override rows; returns {analyte: {field: (value, row)}} and problems."""
    problems: list[str] = []
    parsed: dict[str, dict] = {}
    seen: dict[str, int] = {}
    for row_no, row in rows:
        where = f"{display}, row {row_no}"
        name = row.get("analyte", "")
        if not name:
            problems.append(f"{where}, column 'analyte': empty")
            continue
        aid = name
        if _units is not None:
            try:
                aid = _units.resolve_analyte(name)
            except Exception as exc:  # UnknownAnalyteError carries its own hint
                problems.append(f"{where}, column 'analyte': {exc}")
                continue
        if pack is not None and aid not in pack.analytes:
            problems.append(f"{where}, column 'analyte': '{name}' is not in pack '{pack.id}'; a lab override "
                            "cannot add analytes (copy the pack, add the analyte with its sources and "
                            "check it with 'bayesbase priors check')")
            continue
        if aid in seen:
            problems.append(f"{where}, column 'analyte': '{aid}' already given in row {seen[aid]}")
            continue
        seen[aid] = row_no
        entry: dict[str, tuple[float, int]] = {}
        bad = False
        for col in ("population_center", "cvg_pct", "cvi_pct", "cvi_log_sd", "cva_pct"):
            cell = row.get(col, "")
            if cell == "":
                continue
            try:
                v = float(cell)
            except ValueError:
                problems.append(f"{where}, column '{col}': expected a number, got '{cell}'")
                bad = True
                continue
            if not math.isfinite(v):
                problems.append(f"{where}, column '{col}': must be finite, got '{cell}'")
                bad = True
                continue
            if col in _PCT:
                if not 0 < v < 200:
                    problems.append(f"{where}, column '{col}': {cell} out of range (0, 200) percent")
                    bad = True
                    continue
                entry[_PCT[col]] = (v / 100.0, row_no)
            elif col == "cvi_log_sd":
                if not 0 <= v <= 3:
                    problems.append(f"{where}, column '{col}': {cell} out of range [0, 3]")
                    bad = True
                    continue
                entry["cvi_log_sd"] = (v, row_no)
            else:
                if v <= 0:
                    problems.append(f"{where}, column '{col}': must be > 0, got '{cell}'")
                    bad = True
                    continue
                entry["center"] = (v, row_no)
        unit = row.get("unit", "")
        if unit:
            factor = None
            canon = pack.analytes[aid].unit if pack is not None else None
            if _units is not None:
                try:
                    factor = _units.conversion_factor(aid, unit)
                    canon = canon or _units.canonical_unit(aid)
                except Exception as exc:
                    problems.append(f"{where}, column 'unit': {exc}")
                    bad = True
            elif canon is not None:
                if unit != canon:
                    problems.append(f"{where}, column 'unit': '{unit}' is not the pack's unit '{canon}'")
                    bad = True
                else:
                    factor = 1.0
            if factor is not None and "center" in entry:
                v, r = entry["center"]
                entry["center"] = (v * factor, r)
                if factor != 1.0:
                    entry["_unit_note"] = (f"converted from {unit} x {factor:g}", r)
        if not bad:
            parsed[aid] = entry
    return parsed, problems


def _apply_overrides(pack: Pack, raw: bytes, display: str) -> tuple[Pack, list[str]]:
    rows, problems = _read_override_rows(raw, display)
    if problems:
        return pack, problems
    parsed, problems = _parse_override(rows, display, pack)
    if problems:
        return pack, problems
    analytes = dict(pack.analytes)
    cited = {a: dict(v) for a, v in pack.cited.items()}
    sources = dict(pack.sources)
    for aid, entry in parsed.items():
        prior = analytes[aid]
        changes: dict[str, Any] = {}
        asrc = dict(prior.sources)
        unit_note = entry.pop("_unit_note", None)
        for fld, (v, row_no) in entry.items():
            src = f"lab override: {display} row {row_no}"
            note = unit_note[0] if (fld == "center" and unit_note) else None
            cited[aid][fld] = CitedNumber(v, src, LAB_PROVENANCE, note)
            changes[fld] = v
            asrc[fld] = src
        if "center" in changes:
            ratio = changes["center"] / prior.center
            row_no = entry["center"][1]
            src = (f"derived here: pack value x {ratio:.4g} (lab centre / pack centre), "
                   f"lab override: {display} row {row_no}")
            for fld in ("ri_lower", "ri_upper"):
                v = getattr(prior, fld) * ratio
                changes[fld] = v
                cited[aid][fld] = CitedNumber(v, src, "derived", None)
                asrc[fld] = src
            breeds = {}
            for b, bv in prior.breed_centers.items():
                breeds[b] = bv * ratio
                cited[aid][f"breed_centers.{b}"] = CitedNumber(bv * ratio, src, "derived", None)
                asrc[f"breed_centers.{b}"] = src
            changes["breed_centers"] = breeds
        for k, v in asrc.items():
            sources[f"analytes.{aid}.{k}"] = v
        changes["sources"] = asrc
        analytes[aid] = replace(prior, **changes)
    return replace(pack, analytes=analytes, cited=cited, sources=sources), []


# --------------------------------------------------------------------------- check / describe

def check_file(path: str | Path, pack: str | Path | Pack | None = None) -> list[str]:
    """Problems found in a pack TOML or a lab override CSV (empty list: the file is valid).

    A CSV is checked on its own (columns, numbers, analyte names and units known to the analyte
    registry); with ``pack`` (a name, path or loaded :class:`Pack`) it is also merged into it.
    """
    p = Path(path)
    if not p.is_file():
        return [f"{path}: file not found"]
    raw = p.read_bytes()
    if p.suffix.lower() == ".toml":
        return _parse_bytes(raw, str(path))[1]
    if p.suffix.lower() == ".csv":
        if pack is not None:
            base = pack if isinstance(pack, Pack) else load_pack(pack)
            return _apply_overrides(base, raw, str(path))[1]
        rows, problems = _read_override_rows(raw, str(path))
        if problems:
            return problems
        return _parse_override(rows, str(path), None)[1]
    return [f"{path}: expected a pack (.toml) or a lab override (.csv)"]


_FIELD_UNITS = {"cvg": "fraction", "cvi": "fraction", "cva": "fraction", "mcrc": "fraction",
                "cvi_log_sd": "SD of ln(CVI)", "shift_sd": "log SD", "slope_sd": "log units per year"}


def describe(pack: Pack, analyte: str | None = None):
    """Tidy table of a pack's cited numbers: analyte, field, value, unit, source, provenance.

    Includes the index of individuality (``ii``, Harris orientation CVI/CVG, derived).
    """
    import pandas as pd  # lazy: keeps `bayesbase --help` free of pandas

    ids = [pack.get(analyte).analyte] if analyte is not None else list(pack.analytes)
    rows = []
    for aid in ids:
        prior = pack.analytes[aid]
        for fld, cn in pack.cited[aid].items():
            if fld.startswith("hil_thresholds."):
                unit = "serum index (mg/dL)"
            else:
                unit = _FIELD_UNITS.get(fld, prior.unit)
            rows.append(dict(analyte=aid, field=fld, value=cn.value, unit=unit, source=cn.source,
                             provenance=cn.provenance))
        for i, st in enumerate(prior.cvi_studies, start=1):
            src = (f"{st.source}" + (f" [{st.locator}]" if st.locator else "")
                   + f" ({st.design}, {st.n_animals} animals"
                   + (f" x {st.n_specimens} specimens" if st.n_specimens else "")
                   + f"; SE ln CVI {st.se_log:.3f} from {st.se_basis}; {'pooled' if st.pooled else 'listed, not pooled'})")
            rows.append(dict(analyte=aid, field=f"cvi_study.{i}", value=st.value, unit="fraction", source=src,
                             provenance=st.provenance))
        rows.append(dict(analyte=aid, field="ii", value=prior.ii, unit="ratio",
                         source="derived here: CVI / CVG (Harris orientation)", provenance="derived"))
        if prior.interference:
            rows.append(dict(analyte=aid, field="interference", value=math.nan, unit="",
                             source=f"{', '.join(f'{k} {v}' for k, v in prior.interference.items())}; "
                                    f"{prior.sources.get('interference', '')}",
                             provenance=prior.sources.get("interference.provenance", "")))
    return pd.DataFrame(rows, columns=["analyte", "field", "value", "unit", "source", "provenance"])


def _short(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[: max(limit - 3, 1)].rstrip() + "..."


def describe_text(pack: Pack, analyte: str | None = None, full: bool = False, width: int = 100) -> str:
    """Readable text of a pack for a terminal of ``width`` columns (what ``bayesbase priors show``
    prints): per analyte the cited numbers, then the studies behind CVI and their combination.

    Sources are cut to one line unless ``full`` is true, in which case they are wrapped whole.
    """
    import textwrap

    ids = [pack.get(analyte).analyte] if analyte is not None else list(pack.analytes)
    out: list[str] = [f"pack {pack.id}  version {pack.version}  sha256 {pack.sha256[:16]}...",
                      "CVs are fractions; II = CVI/CVG (Harris; < 0.6: subject-based limits preferable)."]
    indent = " " * 6

    def src_lines(label: str, text: str) -> list[str]:
        first = f"    {label}"
        if not full:
            return [_short(f"{first} {text}", width)]
        return textwrap.wrap(text, width=width, initial_indent=first + " ", subsequent_indent=indent)

    for aid in ids:
        prior = pack.analytes[aid]
        out.append("")
        out.extend(textwrap.wrap(
            f"{aid} [{prior.unit}]  CVI {prior.cvi:.4g} (SD ln {prior.cvi_log_sd:.3g})  CVG {prior.cvg:.4g}"
            f"  CVA {prior.cva:.4g}  II {prior.ii:.2f}  centre {prior.center:.4g}"
            f" ({prior.ri_lower:.4g}-{prior.ri_upper:.4g})", width=width, subsequent_indent="    "))
        for fld, cn in pack.cited[aid].items():
            loc = f" [{cn.locator}]" if cn.locator else ""
            out.extend(src_lines(f"{fld} = {cn.value:.4g} ({cn.provenance}):", cn.source + loc))
        if prior.cvi_studies:
            pooled = [st for st in prior.cvi_studies if st.pooled]
            out.append(f"  studies behind CVI ({len(pooled)} pooled of {len(prior.cvi_studies)}):")
            for i, st in enumerate(prior.cvi_studies, start=1):
                head = (f"  {i}. CVI {st.value:.4g} {st.design}, n={st.n_animals}"
                        + (f"x{st.n_specimens}" if st.n_specimens else "")
                        + f", SE ln {st.se_log:.3f}, {st.provenance}"
                        + ("" if st.pooled else ", not pooled") + ":")
                text = st.source + (f" [{st.locator}]" if st.locator else "")
                if full and st.note:
                    text += f". Note: {st.note}"
                out.extend(src_lines(head.strip(), text))
            out.append(f"    combination: CVI {prior.cvi:.4g}, SD of ln CVI {prior.cvi_log_sd:.3g} "
                       "(DerSimonian-Laird; bayesbase.evidence)")
    return "\n".join(out)
