"""Which results a calibration rests on, and their log-scale layout for the model.

Input: a results store (a :class:`bayesbase.store.Store`, or the path of its SQLite file), a
results file (CSV/TSV/XLSX/FHIR JSON, read by :func:`bayesbase.io.read_results`) or a canonical
frame. Its content hash is the SHA-256 stamped on every calibrated number:

* a results file: the SHA-256 of the file's bytes;
* a store or a frame: the SHA-256 of the canonical frame's CSV text (every canonical column but
  ``source_file``/``source_row``, rows in the canonical order), so the same results give the
  same hash whichever files they were imported from.

Usable results follow the baseline rules of ``bayesbase assess``: every result of the species
is taken as a would-be baseline and :data:`bayesbase.assessment.roles.BASELINE_RULES` decide
(state unwell: left out; an H/L/I index above the pack's threshold: left out; a non-fasted
result of a feeding-sensitive analyte when fasted ones exist for that animal: left out). On top
of those, a censored result (``<x``/``>x``) is left out (the model reads exact values only) and
an analyte the pack does not carry is left out (no prior to calibrate).

The layout (:class:`CalibrationData`) has one entry per specimen and analyte (the mean of the ln
replicate values, the number of replicates and their within-specimen sum of squares), one cell
per (analyte, animal), one breed level per (analyte, breed) and one bias per (analyte,
non-reference method). The reference method of an analyte is its most frequent method among the
usable specimens (ties: the first in alphabetical order), or the one the caller names.

Age (the optional age term of :mod:`bayesbase.calibrate.model`, for the analytes the caller
names, by default those the pack marks ``age_dependent``): each specimen's age in years at its
collection, (collected_at - birth_date) in whole days / 365.25 (as ``bayesbase assess`` computes it),
centred on the analyte's reference age, the median age of its specimens with a birth date. A
specimen without a birth date gets x = 0 (it is read at the reference age: the animal keeps its
weight for every other parameter and tells nothing about the slope; the output counts such
animals). An analyte whose specimens carry no birth date, or all the same age, gets no age term
(:attr:`CalibrationData.age_notes` says why).
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..contract import CANONICAL_COLUMNS, ROLE_BASELINE
from ..errors import BayesbaseError

__all__ = ["UNKNOWN_BREED", "UNSTATED_METHOD", "YEAR_DAYS", "Source", "Selection", "CalibrationData",
           "load_input", "content_sha256", "select_specimens", "reference_methods", "age_analytes", "prepare"]

#: Breed level of animals whose breed is not recorded (never written into a pack).
UNKNOWN_BREED = "(unknown)"
#: Method level of results whose method is not recorded.
UNSTATED_METHOD = "(not stated)"
_SQLITE_MAGIC = b"SQLite format 3\x00"
_HASH_COLUMNS = [c for c in CANONICAL_COLUMNS if c not in ("source_file", "source_row")]
_SORT = ["patient", "collected_at", "specimen", "analyte", "replicate"]
#: days in a year for ages (Julian year, as ``bayesbase.assessment.frame.YEAR_DAYS``)
YEAR_DAYS = 365.25


@dataclass(frozen=True)
class Source:
    """Where the results came from: kind (``store``, ``file`` or ``frame``), a label and the
    content hash (SHA-256, 64 hex digits)."""

    kind: str
    label: str
    sha256: str


def content_sha256(frame: pd.DataFrame) -> str:
    """SHA-256 of a canonical frame's CSV text (module docstring)."""
    cols = [c for c in _HASH_COLUMNS if c in frame]
    text = frame[cols].sort_values(_SORT, kind="mergesort").to_csv(index=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _is_sqlite(path: Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(16) == _SQLITE_MAGIC


def load_input(results_or_store, now=None) -> tuple[pd.DataFrame, Source]:
    """The canonical frame of a store, a store file, a results file or a frame, and its source."""
    from ..assessment.frame import canonical_frame
    from ..store import Store

    if isinstance(results_or_store, Store):
        frame = results_or_store.results()
        return frame, Source("store", str(results_or_store.path), content_sha256(frame))
    if isinstance(results_or_store, (str, Path)):
        path = Path(results_or_store)
        if not path.is_file():
            raise BayesbaseError(f"{path}: file not found")
        if _is_sqlite(path):
            with Store(path) as st:
                frame = st.results()
            return frame, Source("store", str(path), content_sha256(frame))
        from ..io.results import read_results_hashed

        frame, sha = read_results_hashed(path, now=now)
        return frame, Source("file", str(path), sha)
    if isinstance(results_or_store, pd.DataFrame):
        frame = canonical_frame(results_or_store, now=now)
        return frame, Source("frame", "results frame", content_sha256(frame))
    raise BayesbaseError("results must be a Store, a store or results file path, or a pandas DataFrame")


# ----------------------------------------------------------------------------- selection
@dataclass(frozen=True)
class Selection:
    """Every result of the species with ``role`` (``baseline`` = usable, ``unwell``,
    ``excluded``) and ``reason``; ``usable`` holds the usable rows only."""

    history: pd.DataFrame
    usable: pd.DataFrame
    analytes: tuple[str, ...]


def _check_species(frame: pd.DataFrame, species: str) -> pd.DataFrame:
    rows = frame[frame["species"].astype(str) == species]
    if rows.empty:
        found = ", ".join(sorted(frame["species"].dropna().astype(str).unique())) or "none"
        raise BayesbaseError(f"no results of species '{species}' (species found: {found})")
    return rows


def _analytes_wanted(rows: pd.DataFrame, pack, analytes) -> list[str]:
    present = sorted(rows["analyte"].astype(str).unique())
    if analytes is None:
        return [a for a in present if a in pack.analytes]
    wanted = [str(a).strip() for a in analytes if str(a).strip()]
    for a in wanted:
        if a not in pack.analytes:
            raise BayesbaseError(f"analyte '{a}' is not in pack '{pack.id}' (nothing to calibrate against)")
        if a not in present:
            raise BayesbaseError(f"analyte '{a}' has no result of this species in the input")
    return wanted


def select_specimens(frame: pd.DataFrame, species: str, pack, analytes=None,
                     keep_compromised: bool = False) -> Selection:
    """The usable results (module docstring) of ``species`` for ``analytes`` (default: every
    analyte of the input that the pack carries), by the assessment's own baseline rules."""
    from ..assessment.frame import SORT_COLUMNS
    from ..assessment.packs import row_priors
    from ..assessment.roles import CaseRows, assign_roles, rule_context

    rows = _check_species(frame, species)
    wanted = _analytes_wanted(rows, pack, analytes)
    if not wanted:
        raise BayesbaseError(f"no analyte of the input is in pack '{pack.id}'")
    hist = rows[rows["analyte"].astype(str).isin(wanted)].sort_values(SORT_COLUMNS, kind="mergesort")
    hist = hist.reset_index(drop=True)
    n = len(hist)
    key = hist["patient"].astype(str) + "\x1f" + hist["analyte"].astype(str)
    everything = np.ones(n, dtype=bool)
    nothing = np.zeros(n, dtype=bool)
    # every row is a would-be baseline: in a case, earlier than an (absent) assessed specimen
    case = CaseRows(key=key, is_assessed=nothing, in_case=everything, earlier=everything, later=nothing,
                    assessed_keys=pd.unique(key))
    priors = row_priors(hist, everything, {species: pack})
    roles = assign_roles(case, rule_context(hist, case, priors, keep_compromised))
    hist["role"], hist["reason"] = roles.role, roles.reason
    censored = hist["censor"].fillna("").astype(str).ne("").to_numpy() & (hist["role"] == ROLE_BASELINE)
    hist.loc[censored, "role"] = "excluded"
    hist.loc[censored, "reason"] = "censored value (the calibration reads exact values only)"
    usable = hist[hist["role"] == ROLE_BASELINE].copy()
    if usable.empty:
        raise BayesbaseError("no usable result: every result is unwell, compromised or censored")
    return Selection(history=hist, usable=usable, analytes=tuple(wanted))


def reference_methods(usable: pd.DataFrame, reference_method: str | None = None) -> dict[str, str]:
    """analyte -> reference method: ``reference_method`` when given (it must be used for every
    analyte), else the analyte's most frequent method among usable specimens (ties: first name)."""
    spec = usable.drop_duplicates(["patient", "specimen", "analyte"])
    meth = spec["method"].fillna(UNSTATED_METHOD).astype(str).replace("", UNSTATED_METHOD)
    out = {}
    for a, m in meth.groupby(spec["analyte"].astype(str), sort=True):
        counts = m.value_counts()
        if reference_method is not None:
            if reference_method not in counts.index:
                raise BayesbaseError(f"reference method '{reference_method}' has no usable result of {a} "
                                     f"(methods: {', '.join(sorted(counts.index))})")
            out[a] = reference_method
        else:
            top = counts.max()
            out[a] = sorted(counts.index[counts == top])[0]
    return out


# ----------------------------------------------------------------------------- layout
@dataclass
class CalibrationData:
    """Flat arrays for the model (module docstring); labels beside every index."""

    analytes: list[str]
    y: np.ndarray  # (N,) mean ln value of a specimen's replicates
    n_rep: np.ndarray  # (N,) replicates
    obs_cell: np.ndarray  # (N,) -> cell
    obs_bias: np.ndarray  # (N,) -> non-reference (analyte, method) pair; K = reference (0)
    cell_analyte: np.ndarray  # (C,)
    cell_breed: np.ndarray  # (C,) -> (analyte, breed) pair
    cell_animal: list[str]
    breed_pairs: list[tuple[str, str]]  # (analyte, breed)
    bias_pairs: list[tuple[str, str]]  # (analyte, method), non-reference
    reference: dict[str, str]
    ss_within: np.ndarray  # (A,) within-specimen sum of squares of ln replicates
    df_within: np.ndarray  # (A,) its degrees of freedom
    log_n_rep: np.ndarray  # (A,) sum over specimens of ln(n replicates)
    counts: dict = field(default_factory=dict)  # (analyte, parameter, group) -> (animals, specimens)
    # optional age term (module docstring): analytes that have it, per-specimen centred age x (N,)
    # (0 for other analytes and for specimens without a birth date), reference age per analyte
    age_analytes: list = field(default_factory=list)
    age_x: np.ndarray | None = None
    age_ref: dict = field(default_factory=dict)  # analyte -> reference (median) age, years
    age_counts: dict = field(default_factory=dict)  # analyte -> (animals with, without a birth date, specimens with)
    age_notes: dict = field(default_factory=dict)  # analyte -> why it has no age term
    # the breed levels of the model's breed grid when not those of ``breed_pairs`` (a one-analyte
    # part of a store keeps every breed level of the whole store: :mod:`bayesbase.calibrate.split`)
    breed_levels: list | None = None

    @property
    def n_obs(self) -> int:
        return len(self.y)


def _specimen_table(usable: pd.DataFrame) -> pd.DataFrame:
    """One row per (animal, specimen, analyte): mean and SS of ln values, replicates, breed, method."""
    d = usable.assign(
        ly=np.log(usable["value"].to_numpy(dtype=float)),
        breed_l=usable["breed"].fillna(UNKNOWN_BREED).astype(str).replace("", UNKNOWN_BREED),
        method_l=usable["method"].fillna(UNSTATED_METHOD).astype(str).replace("", UNSTATED_METHOD),
        patient_s=usable["patient"].astype(str), analyte_s=usable["analyte"].astype(str),
        specimen_s=usable["specimen"].astype(str), age=_ages(usable))
    g = d.groupby(["analyte_s", "patient_s", "specimen_s"], sort=True)
    spec = g.agg(y=("ly", "mean"), n=("ly", "size"), breed=("breed_l", "first"), method=("method_l", "first"),
                 age=("age", "first"))
    spec["ss"] = g["ly"].agg(lambda x: float(((x - x.mean()) ** 2).sum())).to_numpy()
    return spec.reset_index().rename(columns={"analyte_s": "analyte", "patient_s": "patient",
                                              "specimen_s": "specimen"})


def _ages(rows: pd.DataFrame) -> np.ndarray:
    """Age in years at collection (NaN without a birth date, or with one after the collection)."""
    if "birth_date" not in rows:
        return np.full(len(rows), np.nan)
    born = pd.to_datetime(rows["birth_date"]).to_numpy(dtype="datetime64[ns]")
    at = pd.to_datetime(rows["collected_at"]).to_numpy(dtype="datetime64[ns]")
    gap = at - born
    # whole days, as bayesbase assess (pandas .dt.days); NaT -> NaN
    days = np.where(np.isnat(gap), np.nan, np.floor(gap.astype("int64") / 86_400e9))
    age = days / YEAR_DAYS
    return np.where(np.isfinite(age) & (age >= 0), age, np.nan)


def age_analytes(pack, analytes) -> list[str]:
    """The analytes of ``analytes`` that ``pack`` marks age-dependent (``age_dependent`` set)."""
    return [a for a in analytes if a in pack.analytes and pack.analytes[a].age_dependent]


def _age_layout(spec: pd.DataFrame, wanted) -> dict:
    """Centred ages x per specimen for the ``wanted`` analytes (module docstring)."""
    x = np.zeros(len(spec))
    out = dict(age_analytes=[], age_ref={}, age_counts={}, age_notes={})
    for a in sorted(set(wanted)):
        k = (spec["analyte"] == a).to_numpy()
        if not k.any():
            continue
        age = spec["age"].to_numpy(float)[k]
        known = np.isfinite(age)
        pats = spec["patient"].to_numpy()[k]
        with_bd = len(set(pats[known]))
        out["age_counts"][a] = (with_bd, len(set(pats)) - with_bd, int(known.sum()))
        if not known.any() or np.ptp(age[known]) == 0:
            out["age_notes"][a] = ("no specimen has a birth date" if not known.any()
                                   else "every specimen with a birth date has the same age")
            continue
        ref = float(np.median(age[known]))
        x[k] = np.where(known, age - ref, 0.0)
        out["age_analytes"].append(a)
        out["age_ref"][a] = ref
    out["age_x"] = x
    return out


def _counts(spec: pd.DataFrame) -> dict:
    out = {}
    for a, s in spec.groupby("analyte"):
        out[(a, "analyte", "")] = (s["patient"].nunique(), len(s))
        for b, sb in s.groupby("breed"):
            out[(a, "breed", b)] = (sb["patient"].nunique(), len(sb))
        for m, sm in s.groupby("method"):
            out[(a, "method", m)] = (sm["patient"].nunique(), len(sm))
    return out


def prepare(usable: pd.DataFrame, reference: dict[str, str], age_analytes=()) -> CalibrationData:
    """The model's layout of the usable results (module docstring); ``age_analytes``: analytes
    that get the age term when their specimens carry ages (module docstring)."""
    spec = _specimen_table(usable)
    analytes = sorted(spec["analyte"].unique())
    a_idx = {a: i for i, a in enumerate(analytes)}
    cells = spec.drop_duplicates(["analyte", "patient"])[["analyte", "patient", "breed"]].reset_index(drop=True)
    cell_of = {(a, p): i for i, (a, p) in enumerate(zip(cells["analyte"], cells["patient"]))}
    breed_pairs = sorted(set(zip(cells["analyte"], cells["breed"])))
    b_of = {bp: i for i, bp in enumerate(breed_pairs)}
    bias_pairs = sorted({(a, m) for a, m in zip(spec["analyte"], spec["method"]) if m != reference[a]})
    k_of = {bp: i for i, bp in enumerate(bias_pairs)}
    K = len(bias_pairs)
    ss = np.zeros(len(analytes))
    dfw = np.zeros(len(analytes))
    lnn = np.zeros(len(analytes))
    for a, s in spec.groupby("analyte"):
        i = a_idx[a]
        ss[i], dfw[i], lnn[i] = s["ss"].sum(), (s["n"] - 1).sum(), np.log(s["n"]).sum()
    return CalibrationData(
        analytes=analytes, y=spec["y"].to_numpy(float), n_rep=spec["n"].to_numpy(float),
        obs_cell=np.array([cell_of[(a, p)] for a, p in zip(spec["analyte"], spec["patient"])], dtype=int),
        obs_bias=np.array([k_of.get((a, m), K) for a, m in zip(spec["analyte"], spec["method"])], dtype=int),
        cell_analyte=np.array([a_idx[a] for a in cells["analyte"]], dtype=int),
        cell_breed=np.array([b_of[(a, b)] for a, b in zip(cells["analyte"], cells["breed"])], dtype=int),
        cell_animal=list(cells["patient"]), breed_pairs=breed_pairs, bias_pairs=bias_pairs,
        reference=dict(reference), ss_within=ss, df_within=dfw, log_n_rep=lnn, counts=_counts(spec),
        **_age_layout(spec, age_analytes))
