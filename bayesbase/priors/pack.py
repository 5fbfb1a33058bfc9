"""Loaded prior packs: :class:`Pack`, :class:`AnalytePrior`, :class:`RetestGroup`, loading,
hashing and checking files.

``pack.sha256`` is the SHA-256 of the pack file's bytes; for a fragment layered over a base
(:mod:`.layers`), of the bytes of every file, base first; with a lab override CSV
(:mod:`.overrides`), of those bytes followed by the CSV's, and ``pack.id`` then becomes
``<pack>+<override file stem>``. ``pack.warnings`` lists the consistency warnings of
:func:`.schema.consistency_warnings` (the pack still loads); ``pack.acknowledged`` the
disagreements an analyte's ``interval_gap`` acknowledges (:func:`.schema.consistency_acknowledged`).
"""
from __future__ import annotations

import difflib
import hashlib
import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import NamedTuple

from .. import units as _units
from ..errors import AnalyteNotInPack, PackError
from . import layers, overrides
from .schema import (HIL, CitedNumber, Collector, CviStudy, IntervalGap, MethodBias, breed_key,
                     consistency_acknowledged, consistency_warnings, parse_pack)

__all__ = ["AnalytePrior", "RetestGroup", "Pack", "Check", "load_pack", "check", "check_file", "merge"]

#: cited numbers of an analyte that its AnalytePrior carries as plain values
_NUMBER_FIELDS = ("center", "ri_lower", "ri_upper", "cvg", "cvi", "cvi_log_sd", "cva", "mcrc", "shift_sd",
                  "slope_sd")


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
    #: breed key (:func:`.schema.breed_key`) -> note shown for animals of that breed, whatever
    #: their age (its source is in ``sources["breed_notes.<breed>"]``)
    breed_notes: dict[str, str] = field(default_factory=dict, repr=False)
    #: an acknowledged disagreement between the CVs and the population interval, or None
    interval_gap: IntervalGap | None = field(default=None, repr=False)
    #: method name -> :class:`.schema.MethodBias` (natural-log bias against one reference method
    #: and its SD); empty when the pack carries none (source in ``sources["method_biases.<method>"]``)
    method_biases: dict[str, MethodBias] = field(default_factory=dict, repr=False)

    @property
    def method_reference(self) -> str | None:
        """The reference method of the analyte's method biases (None when it has none)."""
        return next(iter(self.method_biases.values())).reference if self.method_biases else None

    def method_log_bias(self, method: str | None) -> tuple[float, float] | None:
        """(log bias, its SD) of ``method`` against the reference method: (0, 0) for the reference
        itself, None for a method the pack does not carry (or when it carries no biases)."""
        if not self.method_biases or not isinstance(method, str):
            return None
        if method == self.method_reference:
            return 0.0, 0.0
        mb = self.method_biases.get(method)
        return None if mb is None else (mb.log_bias, mb.log_sd)

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
            key = breed_key(breed)
            if key in self.breed_centers:
                return self.breed_centers[key]
        return self.center


@dataclass(frozen=True)
class Pack:
    """A loaded prior pack. ``cited[analyte][field]`` keeps every cited number of an analyte;
    ``sources`` maps every key path (e.g. ``analytes.creatinine.cvi``) to its citation text;
    ``warnings`` holds the consistency warnings (``"analytes.<id>: ..."``)."""

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
    warnings: tuple[str, ...] = field(default=(), repr=False)
    acknowledged: tuple[str, ...] = field(default=(), repr=False)

    def __contains__(self, analyte: object) -> bool:
        return analyte in self.analytes

    def get(self, analyte: str) -> AnalytePrior:
        """Prior of an analyte; raises :class:`AnalyteNotInPack` with a did-you-mean hint."""
        if analyte in self.analytes:
            return self.analytes[analyte]
        try:
            aid = _units.resolve_analyte(analyte)
        except Exception:  # an unknown name gets the pack's own hint below
            aid = None
        if aid in self.analytes:
            return self.analytes[aid]
        close = difflib.get_close_matches(str(analyte), list(self.analytes), n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise AnalyteNotInPack(f"analyte '{analyte}' is not in pack '{self.id}'{hint}")

    def ii(self, analyte: str) -> float:
        """Index of individuality CVI/CVG (Harris orientation) of an analyte."""
        return self.get(analyte).ii


# --------------------------------------------------------------------------- building

def _build_groups(parts: dict, sources: dict) -> tuple[dict[str, RetestGroup], dict[str, CitedNumber]]:
    groups, slope_cited = {}, {}
    for gid, g in parts["groups"].items():
        groups[gid] = RetestGroup(gid, g["label"], g["hours_min"].value, g["hours_max"].value, g["slope_sd"].value)
        slope_cited[gid] = g["slope_sd"]
        for k in ("hours_min", "hours_max", "slope_sd"):
            sources[f"retest_groups.{gid}.{k}"] = g[k].source
    return groups, slope_cited


def _analyte_cited(a: dict, group_slope: CitedNumber) -> dict[str, CitedNumber]:
    cn = {k: a[k] for k in _NUMBER_FIELDS if k in a}
    cn.setdefault("slope_sd", group_slope)
    for b, v in a.get("_breeds", {}).items():
        cn[f"breed_centers.{b}"] = v
    for k, v in a.get("_hil", {}).items():
        cn[f"hil_thresholds.{k}"] = v
    return cn


def _build_analyte(aid: str, a: dict, cn: dict[str, CitedNumber], asrc: dict[str, str]) -> AnalytePrior:
    intf = a.get("interference", {})
    opt = {k: (cn[k].value if k in cn else None) for k in ("mcrc", "shift_sd")}
    return AnalytePrior(
        analyte=aid, unit=a["unit"], center=cn["center"].value, ri_lower=cn["ri_lower"].value,
        ri_upper=cn["ri_upper"].value, cvg=cn["cvg"].value, cvi=cn["cvi"].value,
        cvi_log_sd=cn["cvi_log_sd"].value, cva=cn["cva"].value, mcrc=opt["mcrc"],
        breed_centers={b: v.value for b, v in a.get("_breeds", {}).items()},
        interference={k: intf[k] for k in HIL if k in intf},
        hil_thresholds={k: v.value for k, v in a.get("_hil", {}).items()},
        feeding_sensitive=bool(a.get("feeding_sensitive", False)), age_dependent=a.get("age_dependent"),
        group=a["group"], slope_sd=cn["slope_sd"].value, shift_sd=opt["shift_sd"], sources=asrc,
        cvi_studies=a.get("_studies", ()), breed_notes={b: v.text for b, v in a.get("_breed_notes", {}).items()},
        interval_gap=a.get("_gap"), method_biases=dict(a.get("_method_biases", {})))


def build(parts: dict, sha: str) -> Pack:
    """The :class:`Pack` of checked schema parts (:func:`.schema.parse_pack` found no problem)."""
    meta, sources = parts["pack"], {}
    groups, slope_cited = _build_groups(parts, sources)
    defaults = {k: v.value for k, v in parts["defaults"].items()}
    sources.update({f"defaults.{k}": v.source for k, v in parts["defaults"].items()})
    analytes: dict[str, AnalytePrior] = {}
    cited: dict[str, dict[str, CitedNumber]] = {}
    for aid, a in parts["analytes"].items():
        cn = _analyte_cited(a, slope_cited[a["group"]])
        asrc = {k: v.source for k, v in cn.items()}
        if a.get("interference"):
            asrc["interference"] = a["interference"]["source"]
            asrc["interference.provenance"] = a["interference"]["provenance"]
        for b, v in a.get("_breed_notes", {}).items():
            asrc[f"breed_notes.{b}"] = v.source + (f" [{v.locator}]" if v.locator else "")
            asrc[f"breed_notes.{b}.provenance"] = v.provenance
        for m, v in a.get("_method_biases", {}).items():
            asrc[f"method_biases.{m}"] = v.source + (f" [{v.locator}]" if v.locator else "")
            asrc[f"method_biases.{m}.provenance"] = v.provenance
        cited[aid] = cn
        sources.update({f"analytes.{aid}.{k}": v for k, v in asrc.items()})
        analytes[aid] = _build_analyte(aid, a, cn, asrc)
    return Pack(id=meta["id"], species=meta["species"], title=meta["title"], version=meta["version"],
                sha256=sha, analytes=analytes, retest_groups=groups, defaults=defaults, sources=sources,
                cited=cited, description=meta.get("description", ""),
                warnings=consistency_warnings(analytes), acknowledged=consistency_acknowledged(analytes))


# --------------------------------------------------------------------------- loading

def _parse(src: layers.Source) -> tuple[dict, layers.Layered | None, list[str]]:
    """Checked parts of the pack a file stands for (layered over its base when it extends one)."""
    layered, problems = layers.resolve(src)
    if layered is None:
        return {}, None, problems
    c = Collector(layered.display, layered.origins)
    parts = parse_pack(layered.data, c)
    return parts, layered, problems + c.problems


def _sha(layered: layers.Layered) -> str:
    return hashlib.sha256(b"".join(s.raw for s in layered.sources)).hexdigest()


def load_pack(name_or_path: str | Path, overrides: str | Path | None = None) -> Pack:
    """Load a pack by name (``"dog"``) or path (a full pack, or a fragment with ``[pack] extends``),
    optionally with a lab override CSV layered over it.

    Raises :class:`PackError` listing every problem found (file, key path or row and column).
    """
    parts, layered, problems = _parse(layers.locate(name_or_path))
    if problems:
        raise PackError(problems)
    pack = build(parts, _sha(layered))
    if overrides is None:
        return pack
    return _with_overrides(pack, b"".join(s.raw for s in layered.sources), overrides)


def _with_overrides(pack: Pack, raw: bytes, path: str | Path) -> Pack:
    opath = Path(path)
    if not opath.is_file():
        raise PackError(f"{path}: override file not found")
    obytes = opath.read_bytes()
    merged, problems = overrides.apply(pack, obytes, str(path))
    if problems:
        raise PackError(problems)
    return replace(merged, id=f"{pack.id}+{opath.stem}", sha256=hashlib.sha256(raw + obytes).hexdigest(),
                   warnings=consistency_warnings(merged.analytes),
                   acknowledged=consistency_acknowledged(merged.analytes))


class Check(NamedTuple):
    """What :func:`check` found in a file: problems (invalid) and warnings (valid, but look)."""

    problems: list[str]
    warnings: list[str]


def check(path: str | Path, pack: str | Path | Pack | None = None) -> Check:
    """Problems and warnings of a pack TOML (full or fragment) or a lab override CSV.

    A CSV is checked on its own (columns, numbers, analyte names and units known to the analyte
    registry); with ``pack`` (a name, path or loaded :class:`Pack`) it is also merged into it.
    Warnings (each prefixed by the file) are the consistency warnings of the pack a valid file
    gives.
    """
    p = Path(path)
    if not p.is_file():
        return Check([f"{path}: file not found"], [])
    suffix = p.suffix.lower()
    if suffix == ".toml":
        parts, layered, problems = _parse(layers.Source(p.read_bytes(), str(path), p))
        if problems:
            return Check(problems, [])
        return Check([], [f"{path}: {w}" for w in build(parts, _sha(layered)).warnings])
    if suffix != ".csv":
        return Check([f"{path}: expected a pack (.toml) or a lab override (.csv)"], [])
    if pack is None:
        return Check(overrides.check_alone(p.read_bytes(), str(path)), [])
    base = pack if isinstance(pack, Pack) else load_pack(pack)
    merged, problems = overrides.apply(base, p.read_bytes(), str(path))
    return Check(problems, [] if problems else [f"{path}: {w}" for w in consistency_warnings(merged.analytes)])


def check_file(path: str | Path, pack: str | Path | Pack | None = None) -> list[str]:
    """Problems found in a pack TOML or a lab override CSV (empty list: the file is valid)."""
    return check(path, pack).problems


def merge(base: str | Path, *fragments: str | Path) -> str:
    """TOML text of one full pack: ``fragments`` (paths) layered in order over ``base`` (a pack
    name or path). Valid under the schema (raises :class:`PackError` otherwise); where two
    fragments set the same number the later wins and its note says so."""
    import tomllib

    from .toml_out import dumps

    layered, problems = layers.merged_data(base, fragments)
    if layered is not None:
        c = Collector(layered.display, layered.origins)
        parse_pack(layered.data, c)
        problems += c.problems
    if problems:
        raise PackError(problems)
    text = dumps(layered.data, layers.header(layered))
    if tomllib.loads(text) != layered.data:  # the writer must round-trip every pack table
        raise PackError(f"{layered.display}: internal error: merged TOML does not read back the same")
    return text
