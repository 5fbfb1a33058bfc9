"""Population reference interval from a healthy reference sample: :func:`estimate`.

Pipeline (one analyte at a time, the steps recorded in each row's ``reason``):

1. **Input** - the tidy results contract (:func:`bayesbase.io.read_results`); rows of one
   species; ``unwell`` specimens and censored results (``<x``/``>x``) are left out; analytical
   replicates of a specimen are combined by their geometric mean; one specimen per animal: when
   an animal has several, the first (earliest) is kept. Every such step is stated in ``notes``.
2. **Outliers** - on the Box-Cox transformed values: Tukey's fences at 1.5 IQR (Horn et al., Clin
   Chem 2001;47:2137) and Dixon's gap/range ratio of the extremes with Reed's one-third rule
   (Reed et al., Clin Chem 1971;17:275; CLSI EP28-A3c). Every flagged value is listed in
   ``outliers`` with its action: Dixon/Reed outliers and values beyond Tukey's outer fences
   (3 IQR) are excluded, values beyond the inner fences only are kept as suspect, and with
   ``keep_outliers=True`` everything is kept; nothing is removed silently (see :func:`_screen`).
3. **Method by sample size** (ASVCP, Friedrichs et al., Vet Clin Pathol 2012;41:441; CLSI
   EP28-A3c): n >= 120 nonparametric with 90 % CIs of the limits from order statistics;
   40-119 parametric after Box-Cox when the transformed data pass Anderson-Darling at 5 %, else
   the Horn-Pesce robust method on the transformed data, 90 % CIs by a seeded bootstrap;
   20-39 the same with a warning; < 20 no interval.
4. **Partitions** (``partition="breed"|"sex"|"age_group"``) - each group screened for outliers on
   its own, then Harris & Boyd's test on a common Box-Cox scale for every pair of groups with at
   least 20 values (Clin Chem 1990;36:265; z* held at >= 3 for small groups, see
   :data:`bayesbase.interval.stats.HB_Z_FLOOR`), with Lahti's percentages outside the combined
   limits beside it (Clin Chem 2002;48:338). When any pair needs separate intervals, every group gets
   its own row; the combined row stays (it is the pack's population interval).
5. **Summaries** - ratio of each limit's CI width to the interval width (flag > 0.2, ASVCP);
   CVG from the interval minus within-animal and analytical variation of the species' pack.

Decision support, not a diagnosis: a reference interval describes healthy animals like the ones
sampled, on the analyser that measured them.
"""
from __future__ import annotations

import hashlib
import io
import math
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..constants import CAUTIONS
from ..contract import CANONICAL_COLUMNS
from ..io import read_results_hashed
from ..validate import SPECIES_ALIASES, validate
from ..errors import AnalyteNotInPack, BayesbaseError, PackError
from ..priors import load_pack
from ..units import resolve_analyte
from . import stats as S

__all__ = [
    "COLUMNS",
    "OUTLIER_COLUMNS",
    "METHODS",
    "PARTITIONS",
    "AGE_BANDS",
    "N_BOOT",
    "IntervalError",
    "IntervalResult",
    "estimate",
]

#: Columns of ``intervals.csv`` / ``IntervalResult.table``, in order.
COLUMNS = ("analyte", "unit", "group", "n", "n_outliers", "method", "lower", "upper",
           "lower_ci_low", "lower_ci_high", "upper_ci_low", "upper_ci_high", "ci_ratio",
           "center", "cvg_pct")
#: Columns of ``outliers.csv`` / ``IntervalResult.outliers``.
OUTLIER_COLUMNS = ("analyte", "group", "patient", "specimen", "value", "unit", "transformed",
                   "side", "flagged_by", "tukey_low", "tukey_high", "dixon_q", "action")
PARTITION_COLUMNS = ("analyte", "partition", "group_a", "group_b", "n_a", "n_b", "z", "z_crit",
                     "sd_ratio", "pct_outside_a", "pct_outside_b", "separate", "reason")
DETAIL_COLUMNS = ("analyte", "group", "method", "reason", "warnings", "n_input", "n", "n_outliers",
                  "n_flagged", "lambda", "normality", "ci_method", "cvg_note")
METHODS = ("auto", "nonparametric", "robust", "parametric")
PARTITIONS = ("breed", "sex", "age_group")
#: Age bands for ``partition="age_group"`` in years at collection: [lo, hi) (modelling choice,
#: common practice in canine/feline life-stage grouping; not a published cut-off).
AGE_BANDS = ((0.0, 1.0, "under_1y"), (1.0, 8.0, "1_to_7y"), (8.0, math.inf, "8y_and_over"))
#: Bootstrap resamples for the 90 % CIs of parametric/robust limits (common practice: >= 1,000).
N_BOOT = 1000
#: Sample-size thresholds of the ASVCP guideline (Friedrichs et al. 2012) and CLSI EP28-A3c, as the
#: project's issue states them (the guideline's abstract was read, the bands recalled: from memory).
N_NONPARAMETRIC, N_ROBUST, N_MIN = 120, 40, 20
ALL = "all"


class IntervalError(BayesbaseError):
    """A reference-interval request that cannot be met (bad option, nothing left to estimate)."""


# =========================================================================== result

@dataclass
class Fit:
    """One analyte and group: the numbers behind a row and what the report draws."""

    analyte: str
    group: str
    unit: str
    n_input: int
    values: np.ndarray  # every value of the group (after the input steps)
    patients: np.ndarray
    specimens: np.ndarray
    excluded: np.ndarray  # bool, excluded as outliers
    flags: list[dict]
    screen_lambda: float
    method: str = "none"
    reason: str = ""
    warnings: list[str] = field(default_factory=list)
    lower: float = math.nan
    upper: float = math.nan
    lower_ci: tuple[float, float] = (math.nan, math.nan)
    upper_ci: tuple[float, float] = (math.nan, math.nan)
    center: float = math.nan
    lam: float = math.nan
    normality: str = ""
    ci_method: str = ""
    cvg_pct: float = math.nan
    cvg_note: str = ""

    @property
    def used(self) -> np.ndarray:
        return self.values[~self.excluded]

    @property
    def n(self) -> int:
        return int((~self.excluded).sum())

    @property
    def n_outliers(self) -> int:
        return int(self.excluded.sum())

    @property
    def ci_ratios(self) -> tuple[float, float]:
        return (S.ci_ratio(*self.lower_ci, self.lower, self.upper),
                S.ci_ratio(*self.upper_ci, self.lower, self.upper))

    @property
    def ci_ratio(self) -> float:
        r = [x for x in self.ci_ratios if np.isfinite(x)]
        return max(r) if r else math.nan


@dataclass
class IntervalResult:
    """What :func:`estimate` returns. ``table`` has exactly the ``intervals.csv`` columns
    (:data:`COLUMNS`); ``details`` the method, reason and warnings of each row; ``outliers`` every
    flagged value with its action; ``partitions`` the partition tests; ``dataset`` an xarray
    Dataset (dims ``analyte``, ``group``, ``limit``, ``ci_bound``); ``attrs`` the provenance;
    ``notes`` the input steps in words."""

    table: pd.DataFrame
    details: pd.DataFrame
    outliers: pd.DataFrame
    partitions: pd.DataFrame
    attrs: dict
    notes: list[str]
    fits: dict = field(repr=False)
    pack_info: dict = field(repr=False, default_factory=dict)

    @property
    def dataset(self):
        return _to_dataset(self)

    def pack_fragment(self) -> str:
        """The pack fragment (TOML text) of this result; see :mod:`bayesbase.interval.pack`."""
        from .pack import fragment_toml

        return fragment_toml(self)

    def write(self, out_dir: str | Path) -> dict[str, Path]:
        """Write intervals.csv, outliers.csv, interval.html and pack.toml (plus partitions.csv
        with a partition) into ``out_dir``; see :func:`bayesbase.interval.outputs.write_outputs`."""
        from .outputs import write_outputs

        return write_outputs(self, out_dir)


# =========================================================================== input

def _sha256_frame(frame: pd.DataFrame) -> str:
    buf = io.StringIO()
    frame.to_csv(buf, index=False, lineterminator="\n")
    return hashlib.sha256(buf.getvalue().encode("utf-8")).hexdigest()


def _load(frame_or_path) -> tuple[pd.DataFrame, str, str]:
    if isinstance(frame_or_path, pd.DataFrame):
        frame = frame_or_path
        if not all(c in frame.columns for c in CANONICAL_COLUMNS):
            frame = validate(frame, source=str(frame.attrs.get("source") or "<frame>"))
        name = str(frame.attrs.get("source") or "<frame>")
        return frame, name, _sha256_frame(frame)
    path = Path(frame_or_path)
    if not path.is_file():
        raise IntervalError(f"{path}: file not found")
    frame, sha = read_results_hashed(path)
    return frame, path.name, sha


def _age_group(birth, collected) -> np.ndarray:
    years = (pd.to_datetime(collected) - pd.to_datetime(birth)).dt.days.to_numpy(dtype=float) / 365.25
    out = np.full(years.shape, None, dtype=object)
    for lo, hi, name in AGE_BANDS:
        out[(years >= lo) & (years < hi)] = name
    return out


def _prepare(frame: pd.DataFrame, source: str, species, analytes, partition):
    notes: list[str] = []
    sp = frame["species"].astype("string").fillna("")
    present = sorted(set(sp) - {""})
    if species is None:
        if len(present) != 1:
            raise IntervalError(f"{source}: the file holds several species ({', '.join(present)}); "
                                "choose one with --species")
        species = present[0]
    else:
        species = SPECIES_ALIASES.get(str(species).strip().lower(), str(species).strip().lower())
        if species not in present:
            raise IntervalError(f"{source}: no results for species '{species}' (found: {', '.join(present)})")
        if len(present) > 1:
            notes.append(f"rows of other species left out ({', '.join(p for p in present if p != species)})")
    df = frame.loc[sp == species].copy()

    have = list(dict.fromkeys(df["analyte"].astype(str)))
    if analytes:
        wanted = []
        for a in analytes:
            try:
                aid = resolve_analyte(str(a).strip())
            except BayesbaseError as exc:
                raise IntervalError(f"--analytes: {exc}") from None
            if aid not in have:
                raise IntervalError(f"{source}: analyte '{a}' has no results for species '{species}' "
                                    f"(found: {', '.join(have)})")
            wanted.append(aid)
        df = df[df["analyte"].isin(wanted)]
        have = wanted

    state = df["state"].astype("string").fillna("")
    unwell = state == "unwell"
    if unwell.any():
        pats = sorted(set(df.loc[unwell, "patient"].astype(str)))
        notes.append(f"{int(unwell.sum())} result(s) of specimens recorded as unwell left out "
                     f"(animals: {', '.join(pats[:8])}{' ...' if len(pats) > 8 else ''})")
    blank = (state == "") & ~unwell
    if blank.any():
        notes.append(f"{int(blank.sum())} result(s) with a blank health state read as healthy (assumed)")
    df = df[~unwell]
    cens = df["censor"].astype("string").fillna("") != ""
    if cens.any():
        by = df.loc[cens, "analyte"].value_counts()
        notes.append("censored results (<x or >x) left out: "
                     + ", ".join(f"{a} {int(k)}" for a, k in by.items())
                     + " (limits on that side may be biased)")
    df = df[~cens]
    # replicates of one specimen: geometric mean
    df = df.assign(_logv=np.log(df["value"].astype(float)))
    keys = ["patient", "specimen", "analyte"]
    nrep = df.groupby(keys, sort=False)["_logv"].transform("size")
    if (nrep > 1).any():
        notes.append(f"{int((nrep > 1).sum())} replicate result(s) combined by their geometric mean per specimen")
    first = df.drop_duplicates(keys).copy()
    if (nrep > 1).any():
        gmean = np.exp(df.groupby(keys, sort=False)["_logv"].transform("mean").loc[first.index])
        first["value"] = np.where(nrep.loc[first.index] > 1, gmean, first["value"].astype(float))
    # one specimen per animal and analyte: the first collected
    first = first.sort_values(["patient", "analyte", "collected_at", "specimen"], kind="mergesort")
    dup = first.duplicated(["patient", "analyte"], keep="first")
    if dup.any():
        pats = sorted(set(first.loc[dup, "patient"].astype(str)))
        notes.append(f"{int(dup.sum())} later specimen result(s) of animals already sampled left out: "
                     f"the first specimen of each animal is kept (animals: {', '.join(pats[:8])}"
                     f"{' ...' if len(pats) > 8 else ''})")
    first = first[~dup]
    if partition == "age_group":
        first["age_group"] = _age_group(first["birth_date"], first["collected_at"])
    if partition is not None:
        g = first[partition].astype("string")
        missing = g.isna() | (g.str.strip() == "")
        if missing.any():
            notes.append(f"{int(missing.sum())} result(s) without a {partition} are in the combined "
                         "interval but in no group")
        first["_group"] = np.where(missing, None, f"{partition}=" + g.fillna(""))
    else:
        first["_group"] = None
    per = {a: first[first["analyte"] == a] for a in have}
    per = {a: d for a, d in per.items() if len(d)}
    if not per:
        raise IntervalError(f"{source}: no healthy, uncensored results left to estimate an interval")
    return species, per, notes


# =========================================================================== one group

def _rng(seed: int, analyte: str, group: str) -> np.random.Generator:
    """Seeded per analyte and group, so a row does not depend on which others were asked for."""
    return np.random.default_rng([int(seed), zlib.crc32(analyte.encode()), zlib.crc32(group.encode())])


def _screen(fit: Fit, keep_outliers: bool) -> None:
    """Flag outliers on Box-Cox transformed values and decide what is excluded.

    Box-Cox lambda is fitted on the values left after a first pass on the log scale (outer fences
    and Dixon/Reed). Listed: values beyond Tukey's inner fences (1.5 IQR; Tukey 1977, on Box-Cox values as Horn et al. 2001) and extremes failing Dixon's ratio with Reed's one-third rule (Reed et al. 1971;
    CLSI EP28-A3c). Excluded (unless ``keep_outliers``): the Dixon/Reed outliers and values beyond
    Tukey's outer fences (3 IQR, "far out"). Values between the inner and outer fences only are
    kept and listed as suspect - a modelling choice of this project: at 1.5 IQR about 1 value in
    140 of a healthy Gaussian sample is flagged (more in small samples, where the IQR is noisy),
    and dropping them all would pull nonparametric limits inwards.
    """
    v = fit.values
    if v.size < 3 or np.ptp(v) <= 0:
        fit.screen_lambda = 1.0
        return
    # lambda fitted without the gross outliers of a first pass on the log scale (Tukey's outer
    # fences and Dixon/Reed), so that an extreme value cannot set the transformation meant to
    # expose it (fitted into lambda it hides itself; modelling choice of this project)
    lv = np.log(v)
    f_lo, f_hi = S.tukey_fences(lv, S.TUKEY_FAR)
    gross = (lv < f_lo) | (lv > f_hi)
    for f in S.dixon_reed(lv):
        gross[f.index] = True
    rest = v[~gross]
    lam = float(S.boxcox_lambda(rest if rest.size >= 3 and np.ptp(rest) > 0 else v))
    gm = math.exp(lv.mean())
    y = S.boxcox(v / gm, lam)
    lo, hi = S.tukey_fences(y)
    flo, fhi = S.tukey_fences(y, S.TUKEY_FAR)
    # fences reported in the analyte's unit (NaN when a fence falls at or below zero)
    lo_v, hi_v = (float(gm * S.inv_boxcox(lo, lam)), float(gm * S.inv_boxcox(hi, lam)))
    by: dict[int, list[str]] = {}
    for i in np.flatnonzero((y < lo) | (y > hi)):
        far = y[i] < flo or y[i] > fhi
        by.setdefault(int(i), []).append("tukey_far" if far else "tukey")
    qs = {}
    for f in S.dixon_reed(y):
        by.setdefault(f.index, []).append("dixon")
        qs[f.index] = f.q
    fit.screen_lambda = lam
    for i in sorted(by):
        tests = by[i]
        strong = "dixon" in tests or "tukey_far" in tests
        if keep_outliers:
            action = "kept (keep_outliers)"
        elif strong:
            action = "excluded"
        else:
            action = "kept (suspect: beyond 1.5 IQR only)"
        side = "low" if y[i] < np.median(y) else "high"
        fit.flags.append(dict(
            analyte=fit.analyte, group=fit.group, patient=str(fit.patients[i]), specimen=str(fit.specimens[i]),
            value=float(v[i]), unit=fit.unit, transformed=float(y[i]), side=side,
            flagged_by="+".join(tests), tukey_low=lo_v, tukey_high=hi_v, dixon_q=qs.get(i, math.nan),
            action=action))
        if action == "excluded":
            fit.excluded[i] = True


def _bootstrap(v: np.ndarray, kind: str, rng: np.random.Generator, n_boot: int):
    """Percentile bootstrap of the limits: (B, 2) limits, with lambda re-estimated per resample
    for the parametric and robust methods (Efron's percentile method, common practice)."""
    n = v.size
    vb = v[rng.integers(0, n, size=(n_boot, n))]
    if kind == "nonparametric":
        return S.nonparametric_limits(vb)
    lam = S.boxcox_lambda(vb)
    lgm = np.log(vb).mean(axis=-1)
    y = S.boxcox(vb / np.exp(lgm)[:, None], lam)
    lim = S.parametric_limits(y) if kind == "parametric" else S.robust_limits(y)
    gm = np.exp(lgm)
    return np.stack([gm * S.inv_boxcox(lim[:, 0], lam), gm * S.inv_boxcox(lim[:, 1], lam)], axis=-1)


def _estimate(fit: Fit, method: str, seed: int, n_boot: int) -> None:
    v = np.sort(fit.used)
    n = v.size
    head = f"n = {n}"
    if fit.n_outliers:
        head += f" after {fit.n_outliers} outlier(s) excluded"
    if n < N_MIN:
        fit.method = "none"
        fit.reason = (f"{head} < {N_MIN}: no interval (ASVCP: fewer than 20 reference values do not "
                      "support reference limits; the values are shown as a histogram)")
        return
    if np.ptp(v) <= 0:
        fit.method = "none"
        fit.reason = f"{head}: every value is {v[0]:g} {fit.unit}; no spread, no interval"
        return
    choice = method
    why = ""
    if method == "auto":
        choice = "nonparametric" if n >= N_NONPARAMETRIC else "transformed"
    if choice == "nonparametric" and n < 39:
        fit.method = "none"
        fit.reason = f"{head}: the nonparametric method needs n >= 39 (rank 0.025 (n + 1) >= 1); no interval"
        return
    if n < N_ROBUST:
        fit.warnings.append(f"n = {n} (< {N_ROBUST}): ASVCP allows only a parametric or robust interval here "
                            "and advises reporting it with caution; its confidence limits are wide")
    rng = _rng(seed, fit.analyte, fit.group)
    if choice == "nonparametric":
        lim = S.nonparametric_limits(v)
        fit.lower, fit.upper = float(lim[0]), float(lim[1])
        fit.center = float(np.median(v))
        fit.method = "nonparametric"
        r_lo, r_up = 0.025 * (n + 1), 0.975 * (n + 1)
        why = (f"{head}{' >= 120' if n >= N_NONPARAMETRIC else ''}: nonparametric (CLSI EP28-A3c; ASVCP): "
               f"2.5th and 97.5th percentiles at ranks {r_lo:.2f} and {r_up:.2f} of the sorted values")
        cis = S.nonparametric_limit_cis(v)
        if cis is not None:
            lo_ci, up_ci, ((a, b), (c, d)) = cis
            cov = S.rank_ci_coverage(n, S.P_LOWER, a, b)
            fit.lower_ci = (float(lo_ci[0]), float(lo_ci[1]))
            fit.upper_ci = (float(up_ci[0]), float(up_ci[1]))
            fit.ci_method = f"order statistics, ranks {a}-{b} and {c}-{d} (binomial coverage {100 * cov:.1f} %)"
        else:
            boot = _bootstrap(v, "nonparametric", rng, n_boot)
            _boot_ci(fit, boot, n_boot)
            fit.warnings.append(f"n = {n} < 119: rank-based 90 % CIs need n >= 119; bootstrap CIs instead")
        fit.reason = f"{why}; 90 % CIs from {fit.ci_method}"
        return
    # transformed-scale methods
    gm = math.exp(np.log(v).mean())
    lam = float(S.boxcox_lambda(v))
    y = S.boxcox(v / gm, lam)
    stat, normal, ad_text = S.anderson_normal(y)
    fit.lam = lam
    fit.normality = ad_text
    if choice == "transformed":
        choice = "parametric" if normal else "robust"
        why = (f"{head} ({'40-119' if n >= N_ROBUST else '20-39'}): Box-Cox lambda = {lam:.3g}; "
               f"{ad_text} on the transformed values: "
               + ("normal at 5 %, so parametric" if normal else "not normal at 5 %, so the Horn-Pesce robust method"))
    else:
        why = f"{head}: {choice} as requested; Box-Cox lambda = {lam:.3g}; {ad_text}"
        if choice == "parametric" and not normal:
            fit.warnings.append("the transformed values fail the Anderson-Darling normality test at 5 %: "
                                "a parametric interval may misplace the limits")
        if n >= N_NONPARAMETRIC:
            fit.warnings.append(f"n = {n} >= 120: the guideline's method is nonparametric")
    if choice == "parametric":
        lim = S.parametric_limits(y)
        what = "mean -/+ 1.96 SD of the transformed values, back-transformed"
    else:
        lim = S.robust_limits(y)
        what = ("biweight location -/+ t(0.975, n - 1) x robust spread (Horn, Pesce & Copeland 1998) on "
                "the transformed values, back-transformed")
    if not np.all(np.isfinite(lim)):
        fit.method = "none"
        fit.reason = f"{why}; the {choice} method failed on these values (e.g. more than half identical); no interval"
        return
    fit.method = choice
    back = gm * S.inv_boxcox(lim, lam)
    fit.lower, fit.upper, fit.center = float(back[0]), float(back[1]), float(back[2])
    if not np.isfinite(fit.lower):
        fit.warnings.append("the lower limit falls at or below zero on the original scale; left empty")
    boot = _bootstrap(v, choice, rng, n_boot)
    _boot_ci(fit, boot, n_boot)
    fit.reason = f"{why}: {what}; 90 % CIs from {fit.ci_method}"


def _boot_ci(fit: Fit, boot: np.ndarray, n_boot: int) -> None:
    ok = np.isfinite(boot)
    bad = int((~ok.all(axis=1)).sum())
    lo = np.nanpercentile(boot[:, 0], [5.0, 95.0]) if ok[:, 0].any() else [math.nan, math.nan]
    up = np.nanpercentile(boot[:, 1], [5.0, 95.0]) if ok[:, 1].any() else [math.nan, math.nan]
    fit.lower_ci = (float(lo[0]), float(lo[1]))
    fit.upper_ci = (float(up[0]), float(up[1]))
    fit.ci_method = (f"a percentile bootstrap ({n_boot:,} resamples, seeded"
                     + (", Box-Cox lambda re-estimated in each" if fit.method in ("parametric", "robust") else "")
                     + ")")
    if bad:
        fit.warnings.append(f"{bad} of {n_boot} bootstrap resamples gave no limit (left out of the CI)")


def _new_fit(analyte: str, group: str, d: pd.DataFrame) -> Fit:
    return Fit(analyte=analyte, group=group, unit=str(d["unit"].iloc[0]), n_input=len(d),
               values=d["value"].to_numpy(dtype=float), patients=d["patient"].astype(str).to_numpy(),
               specimens=d["specimen"].astype(str).to_numpy(), excluded=np.zeros(len(d), dtype=bool),
               flags=[], screen_lambda=math.nan)


def _finish(fit: Fit) -> None:
    for side, r in zip(("lower", "upper"), fit.ci_ratios):
        if np.isfinite(r) and r > S.CI_RATIO_FLAG:
            fit.warnings.append(f"the 90 % CI of the {side} limit is {r:.2f} of the interval width "
                                f"(> {S.CI_RATIO_FLAG}, ASVCP): a larger reference sample would be needed")
    kept = [f for f in fit.flags if f["action"] == "kept (keep_outliers)"]
    if kept:
        fit.warnings.append(f"{len(kept)} flagged outlier(s) kept in the estimate (keep_outliers)")
    suspect = [f for f in fit.flags if f["action"].startswith("kept (suspect")]
    if suspect:
        fit.warnings.append(f"{len(suspect)} value(s) beyond Tukey's inner fences kept as suspect (see outliers)")


# =========================================================================== partitions

def _partition_test(analyte: str, partition: str, groups: dict[str, Fit], combined: Fit):
    rows = []
    eligible = {g: f for g, f in groups.items() if f.n >= N_MIN}
    if len(eligible) < 2:
        return rows, False
    pooled = np.concatenate([f.used for f in eligible.values()])
    lam = float(S.boxcox_lambda(pooled))
    gm = math.exp(np.log(pooled).mean())
    ys = {g: S.boxcox(f.used / gm, lam) for g, f in eligible.items()}
    comb_y = (None, None)
    if np.isfinite(combined.lower) and np.isfinite(combined.upper):
        comb_y = (float(S.boxcox(combined.lower / gm, lam)), float(S.boxcox(combined.upper / gm, lam)))
    names = sorted(eligible)
    separate = False
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            hb = S.harris_boyd(ys[a], ys[b])
            pa = pb = math.nan
            if comb_y[0] is not None:
                pa = max(S.lahti_outside(ys[a], *comb_y))
                pb = max(S.lahti_outside(ys[b], *comb_y))
            separate |= hb.partition
            rows.append(dict(analyte=analyte, partition=partition, group_a=a, group_b=b, n_a=ys[a].size,
                             n_b=ys[b].size, z=hb.z, z_crit=hb.z_crit, sd_ratio=hb.sd_ratio,
                             pct_outside_a=pa, pct_outside_b=pb, separate=hb.partition,
                             reason=f"Harris & Boyd on Box-Cox lambda {lam:.3g}: {hb.reason}"))
    return rows, separate


# =========================================================================== estimate

def _cvg(fit: Fit, pack, pack_problem: str | None) -> None:
    if not (np.isfinite(fit.lower) and np.isfinite(fit.upper)):
        return
    if pack is None:
        fit.cvg_note = f"CVG not derived: {pack_problem}"
        return
    try:
        prior = pack.get(fit.analyte)
    except AnalyteNotInPack:
        fit.cvg_note = f"CVG not derived: analyte not in pack '{pack.id}' (no CVI/CVA to subtract)"
        return
    cvg, sg2 = S.cvg_from_interval(fit.lower, fit.upper, prior.si, prior.sa)
    base = (f"sG^2 = (ln(upper/lower)/3.92)^2 - sI^2 - sA^2 with CVI {100 * prior.cvi:.3g} % and CVA "
            f"{100 * prior.cva:.3g} % from pack '{pack.id}' (sha256 {pack.sha256[:12]})")
    if np.isfinite(cvg):
        fit.cvg_pct = 100.0 * cvg
        fit.cvg_note = base
    else:
        fit.cvg_note = (f"CVG left empty: {base} gives sG^2 = {sg2:.3g} <= 0 (the interval is narrower than "
                        "within-animal plus analytical variation)")


def estimate(frame_or_path, *, analytes=None, species=None, partition=None, method="auto",
             keep_outliers=False, seed=0, n_boot: int = N_BOOT, pack=None) -> IntervalResult:
    """Population reference intervals from a healthy reference sample (one specimen per animal).

    Parameters
    ----------
    frame_or_path : a results file (CSV/TSV/XLSX, read with :func:`bayesbase.io.read_results`)
        or a canonical results frame.
    analytes : iterable of analyte names (aliases accepted); default every analyte in the input.
    species : species to use (required when the input holds several).
    partition : ``"breed"``, ``"sex"`` or ``"age_group"`` (bands :data:`AGE_BANDS` from
        ``birth_date``), or None.
    method : ``"auto"`` (by sample size, see module docstring), ``"nonparametric"``,
        ``"robust"`` or ``"parametric"``.
    keep_outliers : keep flagged outliers in the estimate (they are listed either way).
    seed : seed of the bootstrap (``numpy.random.default_rng``, per analyte and group).
    n_boot : bootstrap resamples; pack : pack name or path for the CVI/CVA subtracted to derive
        CVG (default: the species' built-in pack).

    Returns an :class:`IntervalResult`; prints nothing.
    """
    if method not in METHODS:
        raise IntervalError(f"method '{method}' is not one of {', '.join(METHODS)}")
    if partition is not None and partition not in PARTITIONS:
        raise IntervalError(f"partition '{partition}' is not one of {', '.join(PARTITIONS)}")
    if int(n_boot) < 200:
        raise IntervalError("n_boot must be at least 200 for 5th/95th bootstrap percentiles")
    if isinstance(analytes, str):
        analytes = [a for a in analytes.split(",") if a.strip()]
    frame, source, sha = _load(frame_or_path)
    species, per, notes = _prepare(frame, source, species, analytes, partition)
    pack_obj, pack_problem = None, None
    try:
        pack_obj = load_pack(pack if pack is not None else species)
    except PackError as exc:
        pack_problem = f"no pack for '{pack or species}' ({str(exc).splitlines()[0]})"
        notes.append(f"CVG not derived: {pack_problem}")

    fits: dict[tuple[str, str], Fit] = {}
    part_rows: list[dict] = []
    for analyte, d in per.items():
        comb = _new_fit(analyte, ALL, d)
        _screen(comb, keep_outliers)
        _estimate(comb, method, seed, n_boot)
        row_fits = [comb]
        if partition is not None:
            groups = {}
            dg = d[d["_group"].notna()]
            for g, sub in dg.groupby("_group", sort=True):
                f = _new_fit(analyte, str(g), sub)
                _screen(f, keep_outliers)
                groups[str(g)] = f
            rows, separate = _partition_test(analyte, partition, groups, comb)
            part_rows.extend(rows)
            if separate:
                comb.warnings.append(f"groups by {partition} differ (Harris & Boyd): use the group intervals; "
                                     "the combined interval is kept as the population interval of the pack")
                if min(min(r["n_a"], r["n_b"]) for r in rows) < N_NONPARAMETRIC:
                    comb.warnings.append("groups smaller than 120: weigh a physiological reason for the "
                                         "groups before using separate intervals")
                for f in groups.values():
                    _estimate(f, method, seed, n_boot)
                    row_fits.append(f)
            elif rows:
                comb.warnings.append(f"no {partition} group needs a separate interval (Harris & Boyd)")
            else:
                comb.warnings.append(f"partition by {partition} not tested: fewer than two groups with >= {N_MIN} values")
        for f in row_fits:
            _cvg(f, pack_obj, pack_problem)
            _finish(f)
            fits[(analyte, f.group)] = f

    attrs = {
        "software": "bayesbase", "version": __version__, "source_file": source, "source_sha256": sha,
        "species": species, "analytes": list(per), "partition": partition or "", "method": method,
        "keep_outliers": bool(keep_outliers), "seed": int(seed), "n_boot": int(n_boot),
        "ci_level": S.CI_LEVEL, "reference_coverage": S.REF_COVERAGE,
        "pack_id": pack_obj.id if pack_obj else "", "pack_sha256": pack_obj.sha256 if pack_obj else "",
        "guideline": "ASVCP (Friedrichs et al., Vet Clin Pathol 2012;41:441) and CLSI EP28-A3c",
        "cautions": " ".join(CAUTIONS),
    }
    pack_info = {}
    if pack_obj is not None:
        for a in per:
            if a in pack_obj.analytes:
                p = pack_obj.analytes[a]
                pack_info[a] = dict(cvi=p.cvi, cva=p.cva, cvi_source=p.sources.get("cvi", ""),
                                    cva_source=p.sources.get("cva", ""), unit=p.unit, group=p.group)
    return _assemble(fits, part_rows, attrs, notes, pack_info)


def _assemble(fits, part_rows, attrs, notes, pack_info) -> IntervalResult:
    rows, det, out = [], [], []
    for (analyte, group), f in fits.items():
        rows.append(dict(analyte=analyte, unit=f.unit, group=group, n=f.n, n_outliers=f.n_outliers,
                         method=f.method, lower=f.lower, upper=f.upper, lower_ci_low=f.lower_ci[0],
                         lower_ci_high=f.lower_ci[1], upper_ci_low=f.upper_ci[0], upper_ci_high=f.upper_ci[1],
                         ci_ratio=f.ci_ratio, center=f.center, cvg_pct=f.cvg_pct))
        det.append(dict(analyte=analyte, group=group, method=f.method, reason=f.reason,
                        warnings=" | ".join(f.warnings), n_input=f.n_input, n=f.n, n_outliers=f.n_outliers,
                        n_flagged=len(f.flags), **{"lambda": f.lam}, normality=f.normality, ci_method=f.ci_method,
                        cvg_note=f.cvg_note))
        out.extend(f.flags)
    table = pd.DataFrame(rows, columns=list(COLUMNS))
    for c in ("n", "n_outliers"):
        table[c] = table[c].astype("int64")
    return IntervalResult(
        table=table,
        details=pd.DataFrame(det, columns=list(DETAIL_COLUMNS)),
        outliers=pd.DataFrame(out, columns=list(OUTLIER_COLUMNS)),
        partitions=pd.DataFrame(part_rows, columns=list(PARTITION_COLUMNS)),
        attrs=attrs, notes=notes, fits=fits, pack_info=pack_info)


def _to_dataset(res: IntervalResult):
    import xarray as xr

    t = res.table
    analytes = list(dict.fromkeys(t["analyte"]))
    groups = list(dict.fromkeys(t["group"]))
    A, G = len(analytes), len(groups)
    ai = {a: i for i, a in enumerate(analytes)}
    gi = {g: i for i, g in enumerate(groups)}
    lim = np.full((A, G, 2), np.nan)
    ci = np.full((A, G, 2, 2), np.nan)
    ratio = np.full((A, G, 2), np.nan)
    center = np.full((A, G), np.nan)
    cvg = np.full((A, G), np.nan)
    n = np.zeros((A, G), dtype=np.int64)
    n_out = np.zeros((A, G), dtype=np.int64)
    meth = np.full((A, G), "", dtype=object)
    reason = np.full((A, G), "", dtype=object)
    for (a, g), f in res.fits.items():
        i, j = ai[a], gi[g]
        lim[i, j] = (f.lower, f.upper)
        ci[i, j, 0] = f.lower_ci
        ci[i, j, 1] = f.upper_ci
        ratio[i, j] = f.ci_ratios
        center[i, j], cvg[i, j], n[i, j], n_out[i, j] = f.center, f.cvg_pct, f.n, f.n_outliers
        meth[i, j], reason[i, j] = f.method, f.reason
    dims2 = ("analyte", "group")
    units = {a: res.fits[(a, ALL)].unit for a in analytes}
    ds = xr.Dataset(
        {
            "limit_value": (("analyte", "group", "limit"), lim),
            "limit_ci": (("analyte", "group", "limit", "ci_bound"), ci),
            "ci_ratio": (("analyte", "group", "limit"), ratio),
            "center": (dims2, center),
            "cvg_pct": (dims2, cvg),
            "n": (dims2, n),
            "n_outliers": (dims2, n_out),
            "method": (dims2, meth.astype(str)),
            "reason": (dims2, reason.astype(str)),
            "unit": (("analyte",), np.array([units[a] for a in analytes], dtype=str)),
        },
        coords={"analyte": analytes, "group": groups, "limit": ["lower", "upper"],
                "ci_bound": ["lower", "upper"]},
        attrs={k: (", ".join(v) if isinstance(v, list) else (int(v) if isinstance(v, bool) else v))
               for k, v in res.attrs.items()},
    )
    ds.attrs["ci_prob"] = S.CI_LEVEL
    return ds
