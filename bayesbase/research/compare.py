"""Method comparison by simulation: how well does each rule detect a true change in one animal?

Healthy animals are simulated from the project's model (natural-log scale)::

    theta_i            ~ Normal(ln center, sG^2)                 set point of animal i
    y_ij               = theta_i + sI e_ij + sA a_ij             baseline j = 1..n
    y_i,new            = theta_i + ln(1 + s/100) + sI e_i0 + sA a_i0

with e, a standard normal, sG, sI, sA = sqrt(ln(1 + CV^2)) of CVG, CVI, CVA. A shift of
s = 0 gives the false-alarm rate. Every method is scored on the same draws (common random
numbers: the same animals for every method, design and shift), so differences between methods
are much less noisy than each rate.

Methods (two-sided, nominal level ``coverage``, 95 % by default):

``population``
    outside the central interval exp(ln center +/- z sqrt(sG^2 + sI^2 + sA^2)). This is the
    *model-implied* population interval, not the pack's published reference interval, so its
    nominal rate holds exactly under the model.
``rcv_last``
    classical symmetric RCV [Fraser2012] against the last baseline: |x_new / x_last - 1| > RCV.
``rcv_mean``
    the same classical RCV against the arithmetic mean of the baselines, applied unchanged
    (sqrt(2) z CVT) as laboratories do; it ignores that a mean of n results is less noisy, so it
    is conservative for n > 1 (the corrected form is the model-2 interval).
``rcv_lognormal``
    log-normal asymmetric RCV [Fokkema2006] against the last baseline (exact under the model).
``model2``
    model-2 personal interval [Coskun2021]: exp(mean ln x +/- z sigma_T sqrt(1 + 1/n)).
``peb``
    parametric empirical Bayes with known parameters [McIntosh2003], implemented here from its
    closed form (normal-normal: B = sigma^2 / (sigma^2 + n tau^2), tau = sG, sigma^2 = sI^2 + sA^2).
``bayes_pi``
    outside the Bayesian personal interval of the exact engine (read from the predictive
    percentile), with the pack's CVI uncertainty.
``bayes_pchange``
    posterior probability of a true change above ``threshold``.

With n = 0 the RCV family and model 2 are not defined (NaN rows); PEB and the Bayesian rules
reduce to the population rule.

Statistics for ROC curves and matched specificity (larger = more abnormal; each nominal
cut is given in the ``threshold`` column): population |y - ln center| / s_pop; rcv_last and
rcv_lognormal |log ratio| to the last baseline; rcv_mean |log ratio| to the arithmetic mean of the
baselines; model2 |log ratio| to the mean of the ln baselines; peb |z|; bayes_pi
2 |percentile - 0.5|; bayes_pchange P(change). The classical RCV's nominal decision is taken on
the result scale (|x_new / x_ref - 1| > RCV, so its ``threshold`` is a fraction of the reference
value); ranking it by |x_new / x_ref - 1| instead of |log ratio| would favour rises over falls of
the same log size and flatter it for positive shifts only. Sensitivity at matched specificity thresholds each
statistic at its own (1 - alpha) quantile on the healthy (shift 0) draws. AUC is the
Mann-Whitney U statistic divided by n1 n2 (rank-based, ties counted one half; equal to
``scipy.stats.mannwhitneyu(shifted, healthy).statistic / (n1 n2)``). Positive rates carry a
Wilson score 95 % interval (``scipy.stats.binomtest(...).proportion_ci(method="wilson")``).

References
----------
.. [Fraser2012] Fraser CG. Reference change values. Clin Chem Lab Med 2012;50:807-812.
.. [Fokkema2006] Fokkema MR et al. Clin Chem 2006;52:1602-1603.
.. [Coskun2021] Coskun A et al. Personalized reference intervals. Clin Chem 2021;67:374-384.
.. [McIntosh2003] McIntosh MW, Urban N. A parametric empirical Bayes method for cancer
   screening using longitudinal observations of a biomarker. Biostatistics 2003;4:27-40.
.. [Harris1974] Harris EK. Clin Chem 1974;20:1535-1542 (index of individuality CVI/CVG).
"""
from __future__ import annotations

import base64
import html
import io
import json
import math
import time
import zlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr
from scipy import stats

from .. import __version__
from ..classical import (
    index_of_individuality,
    ii_category,
    model2_interval_log,
    rcv_classical,
    rcv_lognormal,
    z_two_sided,
)
from ..constants import (
    CAUTIONS,
    CI_BOUNDS,
    DEFAULT_COVERAGE,
    DEFAULT_PRIOR_CHANGE,
    DIM_ANALYTE,
    DIM_CI,
)
from ..model.engine import CaseArrays, cv_to_sigma, exact_assess

__all__ = [
    "METHODS",
    "SCENARIOS",
    "AnalyteSpec",
    "Comparison",
    "compare",
    "write_outputs",
    "spec_from_pack",
    "peb_score",
    "mann_whitney_auc",
]

METHODS = (
    "population", "rcv_last", "rcv_mean", "rcv_lognormal", "model2", "peb", "bayes_pi",
    "bayes_pchange",
)
#: Methods that need at least one baseline.
NEEDS_BASELINE = ("rcv_last", "rcv_mean", "rcv_lognormal", "model2")

METHOD_LABELS = {
    "population": "population interval (model-implied)",
    "rcv_last": "classical RCV vs last",
    "rcv_mean": "classical RCV vs mean",
    "rcv_lognormal": "log-normal RCV vs last",
    "model2": "model-2 personal interval",
    "peb": "PEB (closed form)",
    "bayes_pi": "Bayesian personal interval",
    "bayes_pchange": "Bayesian P(change)",
}

SCENARIOS = {
    "model": "model true: the pack's CVs generate the data",
    "cvi_half": "true CVI half the prior",
    "cvi_double": "true CVI twice the prior",
    "heterogeneous": "CVI varies between animals (ln CVI sd 0.3 around the prior)",
    "heavy_tails": "within-animal variation Student-t, 4 df, scaled to the same SD",
    "cva_high": "true analytical CV twice the assumed",
}
#: log-SD of the between-animal spread of CVI in the ``heterogeneous`` scenario (brief of this
#: study; modelling choice, not a literature value).
HETEROGENEITY_LOG_SD = 0.3
#: degrees of freedom of the Student-t within-animal variation in ``heavy_tails`` (modelling choice).
HEAVY_TAIL_DF = 4.0
#: animals per simulation chunk (memory bound). Each chunk draws from its own stream seeded by
#: (seed, analyte, chunk index), so results depend only on the seed, the analyte and ``animals``.
CHUNK = 100_000
#: Gauss-Hermite nodes over ln CVI used by the simulator (the engine default is
#: DEFAULT_QUAD_NODES = 24). Measured on 5,000 simulated cases per analyte (n = 3, dog pack,
#: against 64 nodes): creatinine (SD of ln CVI 0.22) within 1e-9 with 16 nodes, but ALT (0.45,
#: a species-transfer CVI) needs 20: percentile error 5.3e-6 and P(change) 3.1e-5 (16 nodes:
#: 3.2e-5 and 1.3e-4). tests/test_research.py re-checks the bound against 64 nodes.
SIM_QUAD_NODES = 20
#: cases per exact-engine call (smaller blocks stay in cache and prune more quadrature nodes:
#: about 20 % faster than the engine's 50,000 in a measurement on 100,000 creatinine cases).
ENGINE_CHUNK = 10_000
#: simulated log results kept in memory between designs and shifts up to this many values
#: (about 200 MB); larger studies regenerate them from the seed.
_CACHE_VALUES = 25_000_000
#: false-positive rates at which ROC curves are tabulated.
ROC_FPR = np.unique(np.concatenate([[0.0], np.geomspace(1e-3, 1.0, 31), np.linspace(0, 1, 21)]))

# Okabe-Ito colour-blind-safe palette (Okabe M & Ito K, Color Universal Design, 2008; common
# practice), one colour per method.
_COLOURS = dict(zip(METHODS, (
    "#000000", "#E69F00", "#F0E442", "#56B4E9", "#009E73", "#CC79A7", "#0072B2", "#D55E00",
)))


@dataclass(frozen=True)
class AnalyteSpec:
    """Plain CVs of one analyte (fractions), for studies without a prior pack.

    ``shift_sd`` None means tau^2 = sG^2 + sI^2 for the change model (as in the packs).
    """

    name: str
    cvi: float
    cvg: float
    cva: float
    cvi_log_sd: float
    center: float
    shift_sd: float | None = None
    prior_change: float = DEFAULT_PRIOR_CHANGE
    unit: str = ""
    source: str = ""

    def __post_init__(self):
        for k in ("cvi", "cvg", "center"):
            v = getattr(self, k)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ValueError(f"analyte '{self.name}': {k} must be a positive number, got {v!r}")
        for k in ("cva", "cvi_log_sd"):
            v = getattr(self, k)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v >= 0):
                raise ValueError(f"analyte '{self.name}': {k} must be >= 0, got {v!r}")
        if not 0 < self.prior_change < 1:
            raise ValueError(f"analyte '{self.name}': prior_change must lie in (0, 1)")

    @property
    def sg(self) -> float:
        return float(cv_to_sigma(self.cvg))

    @property
    def si(self) -> float:
        return float(cv_to_sigma(self.cvi))

    @property
    def sa(self) -> float:
        return float(cv_to_sigma(self.cva))

    @property
    def tau(self) -> float:
        if self.shift_sd is not None:
            return float(self.shift_sd)
        return math.sqrt(self.sg**2 + self.si**2)

    @property
    def ii(self) -> float:
        """Harris's index of individuality, CVI/CVG."""
        return float(index_of_individuality(self.cvi, self.cvg))


@dataclass
class Comparison:
    """Result of :func:`compare`. ``table``: one row per scenario, analyte, method, n_baseline
    and shift_pct; ``roc``: tidy ROC points; ``dataset``: the table as xarray; ``attrs``:
    provenance and settings; ``summary_text``: main findings in words."""

    table: pd.DataFrame
    roc: pd.DataFrame
    dataset: xr.Dataset
    attrs: dict[str, Any]
    summary_text: str
    specs: dict[str, AnalyteSpec] = field(default_factory=dict, repr=False)


# --------------------------------------------------------------------------- inputs

def spec_from_pack(pack, name: str) -> AnalyteSpec:
    """The CVs of one pack analyte as an :class:`AnalyteSpec` (prior_change from the pack's
    defaults)."""
    a = pack.get(name)
    pc = float(pack.defaults.get("prior_change", DEFAULT_PRIOR_CHANGE)) if pack.defaults else DEFAULT_PRIOR_CHANGE
    return AnalyteSpec(
        name=a.analyte, cvi=a.cvi, cvg=a.cvg, cva=a.cva, cvi_log_sd=a.cvi_log_sd, center=a.center,
        shift_sd=a.shift_sd, prior_change=pc, unit=a.unit,
        source=f"prior pack {pack.id} (sha256 {pack.sha256[:12]})",
    )


def _resolve(species, analytes, priors):
    if isinstance(analytes, (str, AnalyteSpec)):
        analytes = (analytes,)
    pack = None
    if any(not isinstance(a, AnalyteSpec) for a in analytes):
        from ..priors import Pack, load_pack

        if isinstance(priors, Pack):
            pack = priors
        elif priors is None:
            pack = load_pack(species)
        else:
            pack = load_pack(species, overrides=priors)
    specs = {}
    for a in analytes:
        s = a if isinstance(a, AnalyteSpec) else spec_from_pack(pack, a)
        if s.name in specs:
            raise ValueError(f"analyte '{s.name}' listed twice")
        specs[s.name] = s
    if not specs:
        raise ValueError("no analytes to compare")
    return specs, pack


# --------------------------------------------------------------------------- simulation

def _draws(seed: int, analyte: str, chunk: int, m: int, j: int, heavy: bool = False
           ) -> dict[str, np.ndarray]:
    """Standard draws of one chunk; the same for every scenario, design and shift.

    Drawn column by column (new result first, then baseline 1, 2, ...), so the new result and
    the first n baselines do not depend on the largest n of the study. The Student-t draws of
    ``heavy_tails`` come from a second stream of the same seed, drawn only when needed."""
    key = [int(seed), zlib.crc32(analyte.encode()), int(chunk)]
    rng = np.random.default_rng(key)
    theta = rng.standard_normal(m)
    cvi = rng.standard_normal(m)
    within = np.empty((m, j + 1))
    anal = np.empty((m, j + 1))
    for col in [j, *range(j)]:
        within[:, col] = rng.standard_normal(m)
        anal[:, col] = rng.standard_normal(m)
    out = {"theta": theta, "within": within, "anal": anal, "cvi": cvi}
    if heavy:
        rt = np.random.default_rng([*key, 1])
        t = np.empty((m, j + 1))
        for col in [j, *range(j)]:
            t[:, col] = rt.standard_t(HEAVY_TAIL_DF, m)
        out["t"] = t
    return out


def _simulate(spec: AnalyteSpec, scenario: str, d: dict[str, np.ndarray]) -> np.ndarray:
    """Log results (m, J+1): columns 0..J-1 baselines (time order), column J the healthy new
    result. The methods always use the prior's CVs; the scenario sets the truth."""
    cvi, cva = spec.cvi, spec.cva
    within = d["within"]
    if scenario == "model":
        si = cv_to_sigma(cvi)
    elif scenario == "cvi_half":
        si = cv_to_sigma(0.5 * cvi)
    elif scenario == "cvi_double":
        si = cv_to_sigma(2.0 * cvi)
    elif scenario == "heterogeneous":
        si = cv_to_sigma(cvi * np.exp(HETEROGENEITY_LOG_SD * d["cvi"]))[:, None]
    elif scenario == "heavy_tails":
        si = cv_to_sigma(cvi)
        within = d["t"] / math.sqrt(HEAVY_TAIL_DF / (HEAVY_TAIL_DF - 2.0))  # unit variance
    elif scenario == "cva_high":
        si = cv_to_sigma(cvi)
        cva = 2.0 * cva
    else:
        raise ValueError(f"unknown scenario {scenario!r}; choose from {', '.join(SCENARIOS)}")
    sa = cv_to_sigma(cva)
    theta = math.log(spec.center) + spec.sg * d["theta"]
    return theta[:, None] + si * within + sa * d["anal"]


# --------------------------------------------------------------------------- methods

def peb_score(base: np.ndarray, new: np.ndarray, mu: float, tau: float, sigma: float,
              coverage: float = DEFAULT_COVERAGE) -> tuple[np.ndarray, np.ndarray]:
    """Parametric empirical Bayes rule with known parameters [McIntosh2003], closed form.

    theta ~ N(mu, tau^2), y_j ~ N(theta, sigma^2). With n baselines of mean ybar:
    B = sigma^2 / (sigma^2 + n tau^2); the next value ~ N(B mu + (1 - B) ybar, sigma^2 + B tau^2).
    ``base`` (m, n) log values (n may be 0), ``new`` (m,). Returns (|z|, outside) with outside =
    |z| > z_two_sided(coverage).
    """
    base = np.asarray(base, float)
    n = base.shape[1]
    b = sigma**2 / (sigma**2 + n * tau**2)
    ybar = base.mean(axis=1) if n else np.zeros(base.shape[0])
    m = b * mu + (1.0 - b) * ybar
    z = np.abs(np.asarray(new, float) - m) / math.sqrt(sigma**2 + b * tau**2)
    return z, z > z_two_sided(coverage)


def _cuts(spec: AnalyteSpec, n: int, coverage: float, threshold: float) -> dict[str, float]:
    """Nominal decision threshold of each method on its own statistic."""
    z = z_two_sided(coverage)
    cuts = {"population": z, "peb": z, "bayes_pi": coverage, "bayes_pchange": threshold}
    if n >= 1:
        rcv = float(rcv_classical(spec.cva, spec.cvi, level=coverage))
        up, _down = rcv_lognormal(spec.cva, spec.cvi, level=coverage)
        # model-2 half-width on the log scale; it does not depend on the baseline values, so it
        # is read off the published kernel applied to n unit baselines
        h = math.log(model2_interval_log(np.ones(n), spec.cva, spec.cvi, coverage)[1])
        cuts.update(rcv_last=rcv, rcv_mean=rcv, rcv_lognormal=float(np.log1p(up)), model2=h)
    else:
        cuts.update({k: np.nan for k in NEEDS_BASELINE})
    return cuts


def _case_arrays(spec: AnalyteSpec, base: np.ndarray, new: np.ndarray) -> CaseArrays:
    m, n = base.shape
    if n == 0:
        base_y = np.full((m, 1), np.nan)
        base_r = np.zeros((m, 1))
    else:
        base_y = base
        base_r = np.ones((m, n))
    return CaseArrays(
        prior_mean=math.log(spec.center), sg=spec.sg, cvi=spec.cvi, cvi_log_sd=spec.cvi_log_sd,
        sa=spec.sa, base_y=base_y, base_r=base_r, base_extra_var=np.zeros_like(base_r),
        base_censor=np.zeros_like(base_r), new_y=new, new_r=1.0, new_extra_var=0.0,
        new_censor=0.0, tau=spec.tau, delta=np.nan, prior_change=spec.prior_change,
    )


def _score(spec: AnalyteSpec, base: np.ndarray, new: np.ndarray, cuts: dict, coverage: float,
           threshold: float, nodes: int) -> tuple[dict, dict]:
    """Statistics (larger = more abnormal) and nominal decisions of every method."""
    n = base.shape[1]
    lnc = math.log(spec.center)
    stat: dict[str, np.ndarray] = {}
    dec: dict[str, np.ndarray] = {}
    s_pop = math.sqrt(spec.sg**2 + spec.si**2 + spec.sa**2)
    stat["population"] = np.abs(new - lnc) / s_pop
    dec["population"] = stat["population"] > cuts["population"]
    if n >= 1:
        last = base[:, -1]
        # the classical rule on the result scale: |x_new / x_ref - 1| > RCV; its ranking
        # statistic is the symmetric |log ratio| (the ratio scale would favour rises)
        stat["rcv_last"] = np.abs(new - last)
        dec["rcv_last"] = np.abs(np.expm1(new - last)) > cuts["rcv_last"]
        ref = np.log(np.mean(np.exp(base), axis=1))  # arithmetic mean on the result scale
        stat["rcv_mean"] = np.abs(new - ref)
        dec["rcv_mean"] = np.abs(np.expm1(new - ref)) > cuts["rcv_mean"]
        up, down = rcv_lognormal(spec.cva, spec.cvi, level=coverage)
        dlog = new - last
        stat["rcv_lognormal"] = np.abs(dlog)
        dec["rcv_lognormal"] = (dlog > np.log1p(up)) | (dlog < np.log1p(down))
        mlog = base.mean(axis=1)
        h = cuts["model2"]
        stat["model2"] = np.abs(new - mlog)
        dec["model2"] = (new > mlog + h) | (new < mlog - h)
    stat["peb"], dec["peb"] = peb_score(base, new, lnc, spec.sg, math.hypot(spec.si, spec.sa), coverage)
    out = exact_assess(_case_arrays(spec, base, new), coverage=coverage, nodes=nodes,
                       intervals=False, chunk=ENGINE_CHUNK)
    pct = out["percentile"]
    stat["bayes_pi"] = 2.0 * np.abs(pct - 0.5)
    b = 0.5 * (1.0 - coverage)
    dec["bayes_pi"] = (pct < b) | (pct > 1.0 - b)
    stat["bayes_pchange"] = out["p_change"]
    dec["bayes_pchange"] = out["p_change"] > threshold
    return stat, dec


def mann_whitney_auc(sorted_healthy: np.ndarray, shifted: np.ndarray) -> float:
    """AUC = U / (n1 n2): the Mann-Whitney U statistic of ``shifted`` against the healthy
    statistics (ties count one half), from ranks via binary search in the sorted healthy
    array. Equals ``scipy.stats.mannwhitneyu(shifted, healthy).statistic / (n1 n2)``."""
    return _u_sum(sorted_healthy, shifted) / (sorted_healthy.size * np.asarray(shifted).size)


def _u_sum(sorted_healthy: np.ndarray, x: np.ndarray) -> float:
    lo = np.searchsorted(sorted_healthy, x, side="left")
    hi = np.searchsorted(sorted_healthy, x, side="right")
    return float(np.sum(lo, dtype=np.float64) + 0.5 * np.sum(hi - lo, dtype=np.float64))


def _wilson(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    ci = stats.binomtest(int(k), int(n)).proportion_ci(confidence_level=level, method="wilson")
    return float(ci.low), float(ci.high)


# --------------------------------------------------------------------------- compare

def _check_options(scenarios, baselines, shifts, animals, alpha, threshold, coverage):
    """Normalised (scenarios, baselines, shifts, animals); ValueError on a bad option."""
    if isinstance(scenarios, str):
        scenarios = (scenarios,)
    for s in scenarios:
        if s not in SCENARIOS:
            raise ValueError(f"unknown scenario {s!r}; choose from {', '.join(SCENARIOS)}")
    if len(set(scenarios)) != len(scenarios):
        raise ValueError("a scenario is listed twice")
    baselines = tuple(sorted({int(n) for n in baselines}))
    if not baselines or baselines[0] < 0:
        raise ValueError("baselines must be non-negative integers")
    shifts = tuple(sorted({0.0, *(float(s) for s in shifts)}))
    if shifts[0] <= -100:
        raise ValueError("shifts are percentages above -100")
    animals = int(animals)
    if animals < 100:
        raise ValueError("animals must be at least 100")
    if not 0 < alpha < 1 or not 0 < threshold < 1 or not 0 < coverage < 1:
        raise ValueError("alpha, threshold and coverage must lie in (0, 1)")
    return tuple(scenarios), baselines, shifts, animals


@dataclass
class _Run:
    """What one comparison run shares across its loops: settings, chunks and progress."""

    seed: int
    animals: int
    jmax: int
    chunks: list
    total: int
    coverage: float
    threshold: float
    alpha: float
    progress: Callable[[int, int], None] | None
    done: int = 0

    def tick(self) -> None:
        self.done += 1
        if self.progress is not None:
            self.progress(self.done, self.total)


def _simulator(run: _Run, spec, name: str, scen: str):
    """sim(ci, m) -> simulated log results of chunk ci, cached when they fit in memory."""
    cache: dict[int, np.ndarray] = {}
    cache_ok = run.animals * (run.jmax + 1) <= _CACHE_VALUES

    def sim(ci: int, m_: int) -> np.ndarray:
        if ci in cache:
            return cache[ci]
        y_ = _simulate(spec, scen, _draws(run.seed, name, ci, m_, run.jmax, scen == "heavy_tails"))
        if cache_ok:
            cache[ci] = y_
        return y_

    return sim


def _healthy_pass(run: _Run, spec, sim, n, methods, cuts, nodes_a):
    """Pass 1: the healthy new result (shift 0), kept in full for quantiles and ranks."""
    healthy = {m: [] for m in methods}
    pos0 = {m: 0 for m in methods}
    for ci, m_ in run.chunks:
        y = sim(ci, m_)
        st, de = _score(spec, y[:, :n], y[:, run.jmax], cuts, run.coverage, run.threshold, nodes_a)
        for m in methods:
            healthy[m].append(st[m])
            pos0[m] += int(de[m].sum())
        run.tick()
    h_sorted = {m: np.sort(np.concatenate(healthy[m])) for m in methods}
    return h_sorted, pos0


def _shift_pass(run: _Run, spec, sim, n, s, methods, cuts, nodes_a, h_sorted, mcut, roc_cuts):
    """Scores of a shifted new result: positives, matched sensitivity, AUC and ROC points."""
    pos = {m: 0 for m in methods}
    above = {m: 0 for m in methods}
    u = {m: 0.0 for m in methods}
    cnt = {m: np.zeros(ROC_FPR.size) for m in methods}
    for ci, m_ in run.chunks:
        y = sim(ci, m_)
        new = y[:, run.jmax] + math.log1p(s / 100.0)
        st, de = _score(spec, y[:, :n], new, cuts, run.coverage, run.threshold, nodes_a)
        for m in methods:
            xs = np.sort(st[m])  # sorted queries: faster binary search
            pos[m] += int(de[m].sum())
            above[m] += int(xs.size - np.searchsorted(xs, mcut[m], side="right"))
            u[m] += _u_sum(h_sorted[m], xs)
            cnt[m] += xs.size - np.searchsorted(xs, roc_cuts[m], side="right")
        run.tick()
    animals = run.animals
    sens = {m: above[m] / animals for m in methods}
    auc = {m: u[m] / (float(animals) * animals) for m in methods}
    tpr = {m: cnt[m] / animals for m in methods}
    return pos, sens, auc, tpr


def _method_rows(key: dict, methods, cuts, animals, pos, mcut, mfpr, sens, auc, roc_fpr, tpr,
                 rows: list, roc_rows: list) -> None:
    """One table row per method (undefined methods get NaN) and the ROC points of each."""
    for m in METHODS:
        row = dict(key, method=m, n_animals=animals, threshold=cuts[m])
        if m in methods:
            lo, hi = _wilson(pos[m], animals)
            row.update(positives=pos[m], positive_rate=pos[m] / animals, lower=lo,
                       upper=hi, matched_threshold=mcut[m], matched_fpr=mfpr[m],
                       sensitivity_matched=sens[m], auc=auc[m], defined=True)
            for f_, t_ in zip(roc_fpr[m], tpr[m]):
                roc_rows.append(dict(scenario=key["scenario"], analyte=key["analyte"], method=m,
                                     n_baseline=key["n_baseline"], shift_pct=key["shift_pct"],
                                     fpr=float(f_), tpr=float(t_)))
        else:
            row.update(positives=np.nan, positive_rate=np.nan, lower=np.nan,
                       upper=np.nan, matched_threshold=np.nan, matched_fpr=np.nan,
                       sensitivity_matched=np.nan, auc=np.nan, defined=False)
        rows.append(row)


def _score_baselines(run: _Run, spec, sim, name, scen, n, shifts, nodes_a, rows, roc_rows) -> None:
    """Every method and shift for one analyte, scenario and number of baselines."""
    cuts = _cuts(spec, n, run.coverage, run.threshold)
    methods = [m for m in METHODS if n >= 1 or m not in NEEDS_BASELINE]
    h_sorted, pos0 = _healthy_pass(run, spec, sim, n, methods, cuts, nodes_a)
    alpha, animals = run.alpha, run.animals
    mcut = {m: float(np.quantile(h_sorted[m], 1.0 - alpha, method="higher")) for m in methods}
    mfpr = {m: float(np.mean(h_sorted[m] > mcut[m])) for m in methods}
    roc_cuts = {m: np.quantile(h_sorted[m], 1.0 - ROC_FPR, method="higher") for m in methods}
    roc_fpr = {m: 1.0 - np.searchsorted(h_sorted[m], roc_cuts[m], side="right") / animals
               for m in methods}
    for s in shifts:
        if s == 0:
            pos, sens, tpr = dict(pos0), dict(mfpr), dict(roc_fpr)
            auc = {m: 0.5 for m in methods}  # healthy against itself
        else:
            pos, sens, auc, tpr = _shift_pass(run, spec, sim, n, s, methods, cuts, nodes_a,
                                              h_sorted, mcut, roc_cuts)
        key = dict(scenario=scen, analyte=name, n_baseline=n, shift_pct=s)
        _method_rows(key, methods, cuts, animals, pos, mcut, mfpr, sens, auc, roc_fpr, tpr,
                     rows, roc_rows)


def _compare_attrs(species, pack, run: _Run, baselines, shifts, scenarios, nodes, specs, t0) -> dict:
    return {
        "species": species,
        "pack_id": pack.id if pack is not None else None,
        "pack_sha256": pack.sha256 if pack is not None else None,
        "seed": int(run.seed),
        "animals": run.animals,
        "chunk": CHUNK,
        "baselines": list(baselines),
        "shifts_pct": list(shifts),
        "scenarios": list(scenarios),
        "threshold": run.threshold,
        "alpha": run.alpha,
        "coverage": run.coverage,
        "quadrature_nodes": nodes,
        "engine": "exact (bayesbase.engine.exact_assess, intervals=False)",
        "ci_method": "Wilson score interval, 95 % (scipy.stats.binomtest.proportion_ci)",
        "auc_method": "Mann-Whitney U / (n1 n2), rank-based, ties one half",
        "population_interval": "model-implied: exp(ln center +/- z sqrt(sG^2 + sI^2 + sA^2))",
        "rcv_mean_rule": "classical RCV sqrt(2) z CVT applied unchanged against the arithmetic "
                         "mean of the baselines (laboratory practice; conservative for n > 1)",
        "analytes": {k: dict(cvi=v.cvi, cvg=v.cvg, cva=v.cva, cvi_log_sd=v.cvi_log_sd,
                             center=v.center, unit=v.unit, ii=v.ii, tau=v.tau,
                             prior_change=v.prior_change, source=v.source)
                     for k, v in specs.items()},
        "version": __version__,
        "elapsed_s": round(time.perf_counter() - t0, 3),
    }


def compare(
    species: str = "dog",
    analytes: Sequence[str | AnalyteSpec] = ("creatinine", "alt"),
    priors=None,
    baselines: Sequence[int] = (0, 1, 2, 3, 5),
    shifts: Sequence[float] = (0, 10, 20, 30, 50),
    animals: int = 100_000,
    seed: int = 1,
    scenarios: Sequence[str] = ("model",),
    threshold: float = 0.5,
    alpha: float = 0.05,
    progress: Callable[[int, int], None] | None = None,
    coverage: float = DEFAULT_COVERAGE,
    nodes: int = SIM_QUAD_NODES,
) -> Comparison:
    """Simulate healthy animals and score every method on the same draws.

    ``analytes``: pack analyte ids (looked up in ``load_pack(species)``, with ``priors`` a lab
    override CSV or a loaded Pack) or :class:`AnalyteSpec` objects with plain CVs.
    ``baselines``: numbers of baseline results n (0 allowed); ``shifts``: true multiplicative
    shifts of the new result in percent (0 is always added: it gives the false-alarm rate and
    the healthy draws for matched specificity); ``scenarios``: keys of :data:`SCENARIOS`.
    ``threshold``: P(change) cut of ``bayes_pchange``; ``alpha``: matched false-alarm rate.
    ``progress(done, total)`` is called after every chunk of engine work. ``nodes``:
    quadrature nodes of the exact engine (see :data:`SIM_QUAD_NODES`).
    """
    scenarios, baselines, shifts, animals = _check_options(
        scenarios, baselines, shifts, animals, alpha, threshold, coverage)
    specs, pack = _resolve(species, analytes, priors)
    jmax = max(baselines)
    chunks = [(i, min(CHUNK, animals - i * CHUNK)) for i in range(math.ceil(animals / CHUNK))]
    total = len(scenarios) * len(specs) * len(baselines) * len(shifts) * len(chunks)
    run = _Run(seed=seed, animals=animals, jmax=jmax, chunks=chunks, total=total,
               coverage=coverage, threshold=threshold, alpha=alpha, progress=progress)
    rows: list[dict] = []
    roc_rows: list[dict] = []
    t0 = time.perf_counter()
    for scen in scenarios:
        for name, spec in specs.items():
            nodes_a = 1 if spec.cvi_log_sd == 0 else nodes  # all nodes coincide then
            sim = _simulator(run, spec, name, scen)  # one cache per analyte and scenario
            for n in baselines:
                _score_baselines(run, spec, sim, name, scen, n, shifts, nodes_a, rows, roc_rows)

    table = pd.DataFrame(rows)
    table["ii"] = table["analyte"].map({k: v.ii for k, v in specs.items()})
    table["ci_method"] = "wilson"
    cols = ["scenario", "analyte", "method", "n_baseline", "shift_pct", "n_animals", "positives",
            "positive_rate", "lower", "upper", "ci_method", "threshold", "matched_threshold",
            "matched_fpr", "sensitivity_matched", "auc", "ii", "defined"]
    table = table[cols]
    roc = pd.DataFrame(roc_rows, columns=["scenario", "analyte", "method", "n_baseline",
                                          "shift_pct", "fpr", "tpr"])
    attrs = _compare_attrs(species, pack, run, baselines, shifts, scenarios, nodes, specs, t0)
    ds = _to_dataset(table, attrs)
    comp = Comparison(table=table, roc=roc, dataset=ds, attrs=attrs, summary_text="", specs=specs)
    comp.summary_text = _summary(comp)
    return comp


def _to_dataset(table: pd.DataFrame, attrs: dict) -> xr.Dataset:
    keys = ["scenario", "analyte", "method", "n_baseline", "shift_pct"]
    num = ["positives", "positive_rate", "threshold", "matched_threshold", "matched_fpr",
           "sensitivity_matched", "auc"]
    t = table.set_index(keys)
    ds = xr.Dataset.from_dataframe(t[num].astype(float))
    ci = xr.concat([xr.Dataset.from_dataframe(t[["lower"]].astype(float))["lower"],
                    xr.Dataset.from_dataframe(t[["upper"]].astype(float))["upper"]],
                   dim=pd.Index(list(CI_BOUNDS), name=DIM_CI))
    ds["positive_rate_ci"] = ci.transpose(*keys, DIM_CI)
    ds["ii"] = xr.DataArray(table.groupby("analyte")["ii"].first().reindex(ds[DIM_ANALYTE].values).values,
                            dims=(DIM_ANALYTE,))
    ds.attrs = {k: (json.dumps(v) if isinstance(v, (dict, list)) else ("" if v is None else v))
                for k, v in attrs.items()}
    ds.attrs["positive_rate_ci_prob"] = 0.95
    return ds


# --------------------------------------------------------------------------- words

def _pct(x: float, d: int = 1) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{100 * x:.{d}f} %"


def _focus_shift(shifts) -> float | None:
    nz = [s for s in shifts if s != 0]
    if not nz:
        return None
    return min(nz, key=lambda s: (abs(s - 30.0), -s))


def _cell(t: pd.DataFrame, **kw) -> pd.Series | None:
    q = t
    for k, v in kw.items():
        q = q[q[k] == v]
    return None if q.empty else q.iloc[0]


def _summary(comp: Comparison) -> str:
    t = comp.table
    a = comp.attrs
    out = [
        f"{a['animals']:,} simulated healthy animals per analyte and scenario (seed {a['seed']}); "
        f"every method scored on the same draws; matched false-alarm rate {_pct(a['alpha'], 0)}."
    ]
    s_focus = _focus_shift(a["shifts_pct"])
    ns = [n for n in a["baselines"] if n >= 1]
    for scen in a["scenarios"]:
        ts = t[t["scenario"] == scen]
        for name in comp.specs:
            ta = ts[(ts["analyte"] == name) & ts["defined"]]
            h = ta[ta["shift_pct"] == 0]
            if h.empty:
                continue
            spec = comp.specs[name]
            fa = []
            for m in ("population", "rcv_last", "rcv_mean", "rcv_lognormal", "model2", "peb",
                      "bayes_pi", "bayes_pchange"):
                r = h[h["method"] == m]["positive_rate"]
                if r.empty:
                    continue
                lo, hi = r.min(), r.max()
                fa.append(f"{METHOD_LABELS[m]} {_pct(lo)}" + ("" if _pct(lo) == _pct(hi) else f"-{_pct(hi)}"))
            out.append(f"[{scen}] {name}: false-alarm rate of the nominal {100 * a['coverage']:g} % "
                       f"rules over n = {', '.join(str(n) for n in a['baselines'])}: "
                       + "; ".join(fa) + ".")
            bp = h[(h["method"] == "bayes_pi") & (h["n_baseline"] >= 1)]
            nominal = 1.0 - a["coverage"]
            if scen == "model" and spec.cvi_log_sd > 0 and not bp.empty and (bp["upper"] < nominal).any():
                k = bp.loc[bp["positive_rate"].idxmin()]
                out.append(
                    f"[{scen}] {name}: the Bayesian personal interval is conservative here "
                    f"({_pct(k.positive_rate)} at n = {int(k.n_baseline)}) because it carries the "
                    f"pack's CVI uncertainty (ln-SD {spec.cvi_log_sd:g}) while the simulated CVI "
                    f"is fixed at the pack value"
                    + ("; the 'heterogeneous' scenario draws CVI from exactly that prior."
                       if math.isclose(spec.cvi_log_sd, HETEROGENEITY_LOG_SD) else "."))
            if s_focus is not None:
                parts = []
                for n in sorted({ns[0], *(k for k in ns if k == 3)}):
                    c = {m: _cell(ta, method=m, n_baseline=n, shift_pct=s_focus) for m in
                         ("bayes_pi", "peb", "rcv_last", "model2", "population")}
                    if any(v is None for v in c.values()):
                        continue
                    parts.append(f"n = {n}: Bayesian interval {_pct(c['bayes_pi'].sensitivity_matched)}, "
                                 f"PEB {_pct(c['peb'].sensitivity_matched)}, classical RCV vs last "
                                 f"{_pct(c['rcv_last'].sensitivity_matched)}, model 2 "
                                 f"{_pct(c['model2'].sensitivity_matched)}, population interval "
                                 f"{_pct(c['population'].sensitivity_matched)}")
                if parts:
                    out.append(f"[{scen}] {name}: sensitivity to a {s_focus:g} % shift at matched "
                               f"specificity: " + "; ".join(parts) + ".")
                if scen == a["scenarios"][0] and ns:
                    n = ns[-1]
                    pop = _cell(ta, method="population", n_baseline=n, shift_pct=s_focus)
                    bay = _cell(ta, method="bayes_pi", n_baseline=n, shift_pct=s_focus)
                    if pop is not None and bay is not None:
                        out.append(
                            f"{name}: index of individuality (CVI/CVG, Harris) {spec.ii:.2f} "
                            f"({ii_category(spec.ii)}): the population interval detects the "
                            f"{s_focus:g} % shift in {_pct(pop.sensitivity_matched)} against "
                            f"{_pct(bay.sensitivity_matched)} for the Bayesian personal interval "
                            f"with n = {n}.")
    if len(a["scenarios"]) > 1:
        ref = t[(t["scenario"] == a["scenarios"][0]) & (t["shift_pct"] == 0) & t["defined"]]
        for scen in a["scenarios"][1:]:
            cur = t[(t["scenario"] == scen) & (t["shift_pct"] == 0) & t["defined"]]
            j = cur.merge(ref, on=["analyte", "method", "n_baseline"], suffixes=("", "_ref"))
            if j.empty:
                continue
            k = (j["positive_rate"] - j["positive_rate_ref"]).abs().idxmax()
            r = j.loc[k]
            out.append(
                f"[{scen}] ({SCENARIOS[scen]}): the largest change in a false-alarm rate from "
                f"'{a['scenarios'][0]}' is {METHOD_LABELS[r['method']]} for {r['analyte']} at "
                f"n = {int(r['n_baseline'])}: {_pct(r['positive_rate_ref'])} -> {_pct(r['positive_rate'])}.")
    out.append("Methods use the prior's CVs in every scenario; RCV and model-2 rows are not "
               "defined without a baseline (n = 0).")
    return "\n".join(out)


# --------------------------------------------------------------------------- outputs

def _fig_positive_rate(t: pd.DataFrame, col: str, ylabel: str, title: str):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(12, 6), layout="constrained")
    axes = fig.subplots(2, 4, sharex=True, sharey=True).ravel()
    ns = sorted(t["n_baseline"].unique())
    styles = ["-", "--", "-.", ":", (0, (5, 1)), (0, (1, 1))]
    for ax, m in zip(axes, METHODS):
        tm = t[(t["method"] == m) & t["defined"]]
        for i, n in enumerate(ns):
            d = tm[tm["n_baseline"] == n].sort_values("shift_pct")
            if d.empty:
                continue
            ax.plot(d["shift_pct"], d[col], linestyle=styles[i % len(styles)], marker="o",
                    markersize=3, color=_COLOURS[m], alpha=0.35 + 0.65 * (i + 1) / len(ns),
                    label=f"n = {n}")
            if col == "positive_rate":
                ax.fill_between(d["shift_pct"], d["lower"], d["upper"], color=_COLOURS[m], alpha=0.15)
        ax.set_title(METHOD_LABELS[m], fontsize=9)
        ax.set_ylim(0, 1)
        ax.grid(alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=7, loc="upper left")
    for ax in axes[4:]:
        ax.set_xlabel("true shift (%)")
    for ax in axes[::4]:
        ax.set_ylabel(ylabel)
    fig.suptitle(title, fontsize=11)
    return fig


def _fig_roc(roc: pd.DataFrame, shift: float, title: str):
    from matplotlib.figure import Figure

    r = roc[roc["shift_pct"] == shift]
    ns = sorted(r["n_baseline"].unique())
    fig = Figure(figsize=(3.2 * len(ns) + 1, 3.6), layout="constrained")
    axes = np.atleast_1d(fig.subplots(1, len(ns), sharey=True))
    for ax, n in zip(axes, ns):
        for m in METHODS:
            d = r[(r["n_baseline"] == n) & (r["method"] == m)].sort_values("fpr")
            if not d.empty:
                ax.plot(d["fpr"], d["tpr"], color=_COLOURS[m], label=METHOD_LABELS[m], lw=1.3)
        ax.plot([0, 1], [0, 1], color="#999999", lw=0.8, linestyle=":")
        ax.set_title(f"n = {n}", fontsize=9)
        ax.set_xlabel("false-alarm rate")
        ax.grid(alpha=0.3)
    axes[0].set_ylabel(f"sensitivity to a {shift:g} % shift")
    axes[-1].legend(fontsize=6, loc="lower right")
    fig.suptitle(title, fontsize=11)
    return fig


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    return buf.getvalue()


def write_outputs(comparison: Comparison, out_dir) -> list[Path]:
    """Write ``comparison.csv``, ``roc.csv``, PNG plots and ``summary.html`` into ``out_dir``
    (created if needed); returns the paths written."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    t, roc, a = comparison.table, comparison.roc, comparison.attrs
    paths: list[Path] = []
    p = out / "comparison.csv"
    t.to_csv(p, index=False)
    paths.append(p)
    p = out / "roc.csv"
    roc.to_csv(p, index=False)
    paths.append(p)
    s_roc = _focus_shift(a["shifts_pct"])
    figs: list[tuple[str, str, bytes]] = []
    for scen in a["scenarios"]:
        for name in comparison.specs:
            ts = t[(t["scenario"] == scen) & (t["analyte"] == name)]
            items = [
                (f"positive_rate_{scen}_{name}.png",
                 f"{name}, scenario {scen}: nominal positive rate against the true shift",
                 _fig_positive_rate(ts, "positive_rate", "positive rate",
                                    f"{name} ({scen}): positive rate of the nominal rules (95 % Wilson band)")),
                (f"sensitivity_matched_{scen}_{name}.png",
                 f"{name}, scenario {scen}: sensitivity at matched false-alarm rate {a['alpha']:g}",
                 _fig_positive_rate(ts, "sensitivity_matched", "sensitivity (matched)",
                                    f"{name} ({scen}): sensitivity at a matched false-alarm rate of {a['alpha']:g}")),
            ]
            if s_roc is not None:
                rs = roc[(roc["scenario"] == scen) & (roc["analyte"] == name)]
                items.append((f"roc_{scen}_{name}.png",
                              f"{name}, scenario {scen}: ROC curves for a {s_roc:g} % shift",
                              _fig_roc(rs, s_roc, f"{name} ({scen}): ROC, {s_roc:g} % shift")))
            for fname, caption, fig in items:
                data = _png(fig)
                p = out / fname
                p.write_bytes(data)
                paths.append(p)
                figs.append((fname, caption, data))
    p = out / "summary.html"
    p.write_text(_html(comparison, figs, s_roc), encoding="utf-8")
    paths.append(p)
    return paths


def _html(comp: Comparison, figs, s_focus) -> str:
    e = html.escape
    a = comp.attrs
    t = comp.table
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             "<title>bayesbase method comparison</title>",
             "<style>body{font-family:sans-serif;max-width:1100px;margin:2em auto;line-height:1.4}"
             "table{border-collapse:collapse;font-size:0.85em}td,th{border:1px solid #ccc;"
             "padding:2px 6px;text-align:right}th{background:#eee}img{max-width:100%}"
             ".caution{border-left:4px solid #555;padding-left:0.8em}</style></head><body>",
             "<h1>Method comparison by simulation</h1>"]
    parts.append('<div class="caution"><p><strong>Cautions.</strong></p><ul>'
                 + "".join(f"<li>{e(c)}</li>" for c in CAUTIONS) + "</ul></div>")
    parts.append("<h2>Setup</h2><ul>")
    setup = [
        f"Species: {a['species']}; prior pack: {a['pack_id'] or 'none (plain CVs)'}"
        + (f" (sha256 {a['pack_sha256']})" if a["pack_sha256"] else ""),
        f"Animals per analyte and scenario: {a['animals']:,}; seed {a['seed']}; bayesbase {a['version']}",
        f"Baseline results n: {', '.join(str(n) for n in a['baselines'])}; true shifts (%): "
        f"{', '.join(f'{s:g}' for s in a['shifts_pct'])}",
        f"Scenarios: " + "; ".join(f"{s} ({SCENARIOS[s]})" for s in a["scenarios"]),
        f"Nominal rules at {100 * a['coverage']:g} % two-sided; P(change) threshold {a['threshold']:g}; "
        f"matched false-alarm rate {a['alpha']:g}",
        f"Population interval: {a['population_interval']}",
        f"Classical RCV vs mean: {a['rcv_mean_rule']}",
        f"Positive-rate interval: {a['ci_method']}; AUC: {a['auc_method']}",
        f"Engine: {a['engine']}",
    ]
    parts += [f"<li>{e(s)}</li>" for s in setup]
    parts.append("</ul><h3>Analytes (the methods always use these CVs)</h3><table><tr>"
                 + "".join(f"<th>{e(h)}</th>" for h in
                           ("analyte", "CVI %", "CVG %", "CVA %", "CVI log-SD", "centre", "unit",
                            "II (CVI/CVG)", "source")) + "</tr>")
    for name, s in comp.specs.items():
        cells = [name, f"{100 * s.cvi:.1f}", f"{100 * s.cvg:.1f}", f"{100 * s.cva:.1f}",
                 f"{s.cvi_log_sd:.2f}", f"{s.center:g}", s.unit, f"{s.ii:.2f}", s.source]
        parts.append("<tr>" + "".join(f"<td>{e(str(c))}</td>" for c in cells) + "</tr>")
    parts.append("</table>")
    parts.append("<h2>Main findings</h2>")
    parts += [f"<p>{e(line)}</p>" for line in comp.summary_text.splitlines()]
    if s_focus is not None:
        alpha_txt = f"{a['alpha']:g}"
        parts.append(f"<h2>Sensitivity to a {e(f'{s_focus:g}')} % shift at matched "
                     f"false-alarm rate {e(alpha_txt)}</h2>")
        sub = t[(t["shift_pct"] == s_focus)]
        for scen in a["scenarios"]:
            for name in comp.specs:
                d = sub[(sub["scenario"] == scen) & (sub["analyte"] == name)]
                piv = d.pivot(index="method", columns="n_baseline", values="sensitivity_matched")
                piv = piv.reindex(list(METHODS))
                parts.append(f"<h3>{e(name)}, {e(scen)}</h3><table><tr><th>method</th>"
                             + "".join(f"<th>n = {e(str(c))}</th>" for c in piv.columns) + "</tr>")
                for m, r in piv.iterrows():
                    parts.append(f"<tr><td>{e(METHOD_LABELS[m])}</td>"
                                 + "".join(f"<td>{e(_pct(v))}</td>" for v in r.values) + "</tr>")
                parts.append("</table>")
    parts.append("<h2>Plots</h2>")
    for fname, caption, data in figs:
        b64 = base64.b64encode(data).decode("ascii")
        parts.append(f'<figure><img alt="{e(caption)}" src="data:image/png;base64,{b64}">'
                     f"<figcaption>{e(caption)} ({e(fname)})</figcaption></figure>")
    parts.append("<h2>Cautions</h2><ul>" + "".join(f"<li>{e(c)}</li>" for c in CAUTIONS) + "</ul>")
    parts.append("<p>Simulated animals only: no real patients. Sensitivities depend on the "
                 "assumed CVs; a misspecification scenario shows how far they move.</p>")
    parts.append("</body></html>")
    return "\n".join(parts)
