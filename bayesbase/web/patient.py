"""One patient: the settings the report takes (from the page's query string), the assessment
(cached per patient, settings and stored data), and the pieces the page and its downloads need.
"""
from __future__ import annotations

import math
import threading
from collections import OrderedDict
from dataclasses import dataclass, field

from ..constants import DEFAULT_COVERAGE
from .config import DeskError
from . import reportparts

__all__ = ["Settings", "parse_settings", "PatientState", "StateCache", "load_state", "ENGINES",
           "species_pack"]

ENGINES = ("exact", "mcmc")
#: one MCMC fit at a time (each uses every core for minutes)
_MCMC = threading.Lock()


@dataclass(frozen=True)
class Settings:
    """The report's settings, with the report's defaults (``prior_change`` None: the pack's)."""

    at: str | None = None
    coverage: float = DEFAULT_COVERAGE
    prior_change: float | None = None
    keep_compromised: bool = False
    engine: str = "exact"

    def params(self) -> dict:
        """Query parameters that give these settings back (defaults left out)."""
        return {"at": self.at,
                "coverage": None if self.coverage == DEFAULT_COVERAGE else f"{self.coverage:g}",
                "prior_change": None if self.prior_change is None else f"{self.prior_change:g}",
                "keep_compromised": "1" if self.keep_compromised else None,
                "engine": None if self.engine == "exact" else self.engine}

    def assess_kw(self) -> dict:
        return dict(at=self.at, coverage=self.coverage, prior_change=self.prior_change,
                    keep_compromised=self.keep_compromised, engine=self.engine, seed=0)


def _fraction(value, name: str) -> float | None:
    if value is None or str(value).strip() == "":
        return None
    try:
        x = float(str(value).strip())
    except ValueError:
        raise DeskError(400, "Bad setting", f"{name} must be a number between 0 and 1, "
                        f"not {value!r}")
    if not (math.isfinite(x) and 0 < x < 1):
        raise DeskError(400, "Bad setting", f"{name} must lie between 0 and 1 (exclusive); "
                        f"got {x:g}")
    return x


def parse_settings(params) -> Settings:
    """Settings from a query string (a mapping); a bad value is refused with 400 naming it."""
    coverage = _fraction(params.get("coverage"), "coverage")
    engine = str(params.get("engine") or "exact")
    if engine not in ENGINES:
        raise DeskError(400, "Bad setting", f"engine must be one of {', '.join(ENGINES)}")
    at = str(params.get("at") or "").strip() or None
    return Settings(at=at, coverage=DEFAULT_COVERAGE if coverage is None else coverage,
                    prior_change=_fraction(params.get("prior_change"), "prior probability "
                                           "of a change"),
                    keep_compromised=str(params.get("keep_compromised") or "") in ("1", "on",
                                                                                   "true"),
                    engine=engine)


@dataclass
class PatientState:
    """One patient's assessment under one set of settings, and what is derived from it."""

    patient: str
    settings: Settings
    frame: object  # the patient's canonical results
    specimens: tuple[tuple[str, object], ...]  # (specimen id, collected_at), in time order
    assessment: object
    pack: object
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)
    _path: object = field(default=None, repr=False)
    _sections: object = field(default=None, repr=False)
    _content: object = field(default=None, repr=False)

    @property
    def assessed_specimen(self) -> str:
        return reportparts.assessed_specimen(self.assessment, self.patient)

    def sections(self):
        with self._lock:
            if self._sections is None:
                self._sections = reportparts.sections(self.assessment, self.pack, self.patient)
            return self._sections

    def interval_path(self):
        """The personal interval at each specimen (computed once, for the figures)."""
        with self._lock:
            if self._path is None:
                self._path = reportparts.interval_path(self.frame, self.pack, self.patient,
                                                       **self.settings.assess_kw())
            return self._path

    def figure(self, analyte: str) -> bytes | None:
        return reportparts.figure_png(self.assessment, self.patient, analyte,
                                      self.interval_path())

    def content(self):
        """The report's whole content model (for the HTML and PDF downloads)."""
        path = self.interval_path()
        with self._lock:
            if self._content is None:
                self._content = reportparts.full_content(self.assessment, self.pack,
                                                         self.patient, path)
            return self._content


class StateCache:
    """(patient, fingerprint, settings) -> PatientState, the ``size`` most recent. Thread-safe;
    two requests for the same key while it is computed wait for one computation."""

    def __init__(self, size: int):
        self.size = max(0, int(size))
        self._data: OrderedDict = OrderedDict()
        self._lock = threading.Lock()
        self._pending: dict = {}

    def get_or_make(self, key, make):
        if self.size == 0:
            return make()
        with self._lock:
            if key in self._data:
                self._data.move_to_end(key)
                return self._data[key]
            gate = self._pending.setdefault(key, threading.Lock())
        with gate:
            with self._lock:
                if key in self._data:
                    return self._data[key]
            try:
                value = make()
                with self._lock:
                    self._data[key] = value
                    while len(self._data) > self.size:
                        self._data.popitem(last=False)
            finally:
                with self._lock:
                    self._pending.pop(key, None)
            return value


def _builtin_pack(species: str):
    from ..priors import cached_pack

    return cached_pack(species)


def species_pack(frame):
    """The built-in pack of the frame's one species, loaded once per process while its file is
    unchanged (:func:`bayesbase.priors.cached_pack`; a pack file is read and checked in about
    0.3 s), or None
    (several species, or none built in: ``assess`` then chooses and explains)."""
    from ..errors import BayesbaseError

    species = set(frame["species"].astype(str))
    if len(species) != 1:
        return None
    try:
        return _builtin_pack(species.pop())
    except BayesbaseError:
        return None


def _specimens(frame) -> tuple[tuple[str, object], ...]:
    spec = (frame[["specimen", "collected_at"]].drop_duplicates("specimen")
            .sort_values(["collected_at", "specimen"], kind="stable"))
    return tuple((str(s), t) for s, t in spec.itertuples(index=False, name=None))


def _make_state(store, patient: str, settings: Settings) -> PatientState:
    from ..assessment import assess

    frame = store.results(patient)
    specimens = _specimens(frame)
    if settings.at is not None and settings.at not in {s for s, _ in specimens}:
        raise DeskError(400, "Bad setting", f"patient {patient} has no specimen "
                        f"{settings.at!r}; choose one from the list")
    pack = species_pack(frame)
    if settings.engine == "mcmc":
        with _MCMC:
            a = assess(frame, pack=pack, patient=patient, **settings.assess_kw())
    else:
        a = assess(frame, pack=pack, patient=patient, **settings.assess_kw())
    return PatientState(patient, settings, frame, specimens, a, reportparts.pack_for(a, patient))


def load_state(store, cache: StateCache, patient: str, settings: Settings) -> PatientState:
    """The patient's state under ``settings`` (from the cache while its stored data are
    unchanged). Raises DeskError 404 for a patient the store does not hold."""
    from .summaries import fingerprints

    prints = fingerprints(store.connection, [patient])
    if patient not in prints:
        raise DeskError(404, "No such patient", f"the store holds no patient {patient!r}")
    key = (patient, prints[patient], settings)
    return cache.get_or_make(key, lambda: _make_state(store, patient, settings))
