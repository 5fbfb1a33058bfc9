"""Outlier, homogeneity, normality and steady-state steps of a biological-variation study
(numpy/scipy only), in the published order (Fraser CG, Harris EK. Crit Rev Clin Lab Sci
1989;27:409-437; Roraas T et al. Clin Chem 2012;58:1306-1313; the order as recalled, from memory):

1. Cochran's C on the replicate variances of each specimen (analytical outliers): an outlying
   specimen's replicates are removed (with duplicates one cannot tell which replicate is wrong).
2. Cochran's C on the within-animal variances (variance of each animal's specimen means): an
   outlying animal is removed.
3. Reed's criterion on the animal means (Reed AH, Henry RJ, Mason WB. Clin Chem
   1971;17:275-284): the extreme mean is an outlier when its gap to the next mean exceeds one
   third of the range of the means; that animal is removed.
Each step is repeated until nothing more is found (ISO 5725 allows the C test to be iterated and
warns that repeated rejection can remove too much from non-normal data, as summarised in the
Wikipedia article "Cochran's C test"; so every removal is listed).

Then, without removal (flags and words only):
4. Homogeneity of the within-animal variances: Bartlett's test and the Brown-Forsythe/Levene
   test (median centre), computed directly and checked against scipy.stats.bartlett and
   scipy.stats.levene(center="median") in the tests.
5. Normality: Shapiro-Wilk (scipy.stats.shapiro) of the animal means and of the within-animal
   deviations of the specimen means.
6. Steady state: each animal's least-squares slope of its specimen means (ln) on time
   (vectorised; checked against scipy.stats.linregress), flagged when p < alpha; and a one-sample
   t test of the slopes for a drift shared by the group.

Cochran's C critical value (balanced groups): C_crit = 1 / (1 + (k - 1)/F), F the upper alpha/k
point of F(n - 1, (n - 1)(k - 1)), k groups of n values (Cochran WG, Ann Eugen 1941;11:47-52; the
F form as stated in the Wikipedia article "Cochran's C test"). It is checked against published
tables in tests/test_study_outliers.py. With unequal group sizes the modal n is
used and the test is approximate (said in the step text).

:func:`screen` runs the steps in that order on a :class:`ScreenState`; each step is its own
function (``cochran_replicates_step``, ``cochran_within_animal_step`` - both through
``cochran_iterate`` - ``reed_step``, ``homogeneity_step``, ``normality_step``,
``steady_state_step``).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy import special, stats

from .common import DEFAULT_ALPHA

__all__ = ["cochran_critical", "cochran_c", "reed_criterion", "reed_false_alarm", "animal_slopes", "bartlett_test",
           "levene_median_test", "Screening", "ScreenState", "cochran_iterate", "cochran_replicates_step",
           "cochran_within_animal_step", "reed_step", "animal_groups", "homogeneity_step", "normality_step",
           "steady_state_step", "screen"]


def cochran_critical(k, n, alpha: float = DEFAULT_ALPHA):
    """Upper critical value of Cochran's C for k variances each from n values (see module doc)."""
    k = np.asarray(k, float)
    n = np.asarray(n, float)
    # upper alpha/k point of F(n - 1, (n - 1)(k - 1)): scipy.special.fdtri(d1, d2, p) = f.ppf(p, d1, d2)
    f = special.fdtri(n - 1.0, (n - 1.0) * (k - 1.0), 1.0 - alpha / k)
    return 1.0 / (1.0 + (k - 1.0) / f)


def cochran_c(variances) -> tuple[float, int]:
    """Cochran's C = max s_j^2 / sum s_j^2 and the index of the largest variance (NaN, -1 when
    every variance is 0)."""
    v = np.asarray(variances, float)
    tot = v.sum()
    if v.size == 0 or not tot > 0:
        return float("nan"), -1
    j = int(np.argmax(v))
    return float(v[j] / tot), j


def reed_criterion(means) -> tuple[int, float, float]:
    """Reed's criterion on sorted means: returns (index of the outlier or -1, the larger of the
    two end gaps, the range). Outlier when gap > range / 3 (Reed et al. 1971)."""
    m = np.asarray(means, float)
    if m.size < 3:
        return -1, float("nan"), float("nan")
    order = np.argsort(m, kind="stable")
    srt = m[order]
    rng = srt[-1] - srt[0]
    lo_gap = srt[1] - srt[0]
    hi_gap = srt[-1] - srt[-2]
    if not rng > 0:
        return -1, 0.0, 0.0
    if hi_gap >= lo_gap:
        gap, idx = hi_gap, int(order[-1])
    else:
        gap, idx = lo_gap, int(order[0])
    return (idx if gap > rng / 3.0 else -1), float(gap), float(rng)


def animal_slopes(group, t, y, alpha: float = DEFAULT_ALPHA) -> list[dict]:
    """Least-squares slope of y on t within each group, vectorised (the same numbers as
    scipy.stats.linregress per group: slope, two-sided p of t = slope/se on n - 2 df). Groups with
    fewer than 3 points or no spread in t are left out."""
    group = np.asarray(group, np.int64)
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    if group.size == 0:
        return []
    g = int(group.max()) + 1
    n = np.bincount(group, minlength=g).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        tb = np.bincount(group, t, minlength=g) / n
        yb = np.bincount(group, y, minlength=g) / n
        dt, dy = t - tb[group], y - yb[group]
        sxx = np.bincount(group, dt * dt, minlength=g)
        sxy = np.bincount(group, dt * dy, minlength=g)
        syy = np.bincount(group, dy * dy, minlength=g)
        slope = sxy / sxx
        rss = np.clip(syy - slope * sxy, 0.0, None)
        se = np.sqrt(rss / (n - 2) / sxx)
        tstat = slope / se
        p = 2.0 * stats.t.sf(np.abs(tstat), n - 2)
    p = np.where(rss <= 0, 0.0, p)  # a perfect line: p = 0 as linregress gives
    rows = []
    span = np.bincount(group, minlength=g)
    for i in np.flatnonzero((span >= 3) & (sxx > 1e-12 * np.maximum(1.0, tb**2))):
        rows.append(dict(animal=int(i), n_specimens=int(n[i]), slope_per_day=float(slope[i]),
                         pct_per_week=float(100.0 * np.expm1(7.0 * slope[i])), p_value=float(p[i]),
                         flagged=bool(p[i] < alpha)))
    return rows


def bartlett_test(groups) -> tuple[float, float]:
    """Bartlett's statistic and p value (Bartlett MS 1937; the formula of scipy.stats.bartlett,
    computed directly because this runs once per analyte inside a tight loop)."""
    n = np.array([g.size for g in groups], float)
    v = np.array([np.var(g, ddof=1) for g in groups])
    k, big_n = n.size, n.sum()
    sp = np.sum((n - 1) * v) / (big_n - k)
    num = (big_n - k) * math.log(sp) - np.sum((n - 1) * np.log(v))
    den = 1.0 + (np.sum(1.0 / (n - 1)) - 1.0 / (big_n - k)) / (3.0 * (k - 1))
    t = float(num / den)
    return t, float(stats.chi2.sf(t, k - 1))


def levene_median_test(groups) -> tuple[float, float]:
    """Brown-Forsythe (Levene with the median) statistic and p value: one-way ANOVA F of
    |x - median of its group| (Brown MB, Forsythe AB, JASA 1974;69:364; scipy.stats.levene with
    center="median" is the reference in the tests)."""
    z = [np.abs(g - np.median(g)) for g in groups]
    n = np.array([x.size for x in z], float)
    k, big_n = n.size, n.sum()
    zbar_i = np.array([x.mean() for x in z])
    zbar = np.sum(n * zbar_i) / big_n
    within = sum(float(np.sum((x - m) ** 2)) for x, m in zip(z, zbar_i))
    between = float(np.sum(n * (zbar_i - zbar) ** 2))
    if within <= 0:
        return float("inf"), 0.0
    w = (big_n - k) / (k - 1) * between / within
    return float(w), float(stats.f.sf(w, k - 1, big_n - k))


@lru_cache(maxsize=256)
def reed_false_alarm(n_means: int, n_sim: int = 20_000, seed: int = 0) -> float:
    """Chance that Reed's criterion flags one of ``n_means`` means drawn from one normal
    distribution (no outlier), by seeded simulation. It is large in small studies (measured with
    this function: about 0.17 for 12 animals, 0.06 for 20), so every Reed removal carries it."""
    if n_means < 3:
        return float("nan")
    x = np.sort(np.random.default_rng(seed).normal(size=(n_sim, n_means)), axis=1)
    rng = x[:, -1] - x[:, 0]
    gap = np.maximum(x[:, -1] - x[:, -2], x[:, 1] - x[:, 0])
    return float(np.mean(gap > rng / 3.0))


@dataclass
class Screening:
    """Result of :func:`screen` for one analyte.

    ``keep`` is a boolean mask over the input results (all True when removal is off);
    ``records`` one dict per outlier found (step, test, level, animal, specimen, n_results,
    statistic, critical_value, alpha, action, reason), with animal/specimen as codes;
    ``tests`` one dict per homogeneity / normality / steady-state test (step, test, statistic,
    p_value, df, flagged, detail); ``slopes`` per-animal steady-state rows; ``notes`` words.
    """

    keep: np.ndarray
    records: list[dict] = field(default_factory=list)
    tests: list[dict] = field(default_factory=list)
    slopes: list[dict] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


def _mode(x: np.ndarray) -> int:
    vals, counts = np.unique(x, return_counts=True)
    return int(vals[np.argmax(counts)])


def _spec_stats(spec, y, active):
    n_spec = int(spec.max()) + 1
    w = active.astype(float)
    n = np.bincount(spec, w, minlength=n_spec)
    s1 = np.bincount(spec, w * y, minlength=n_spec)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = s1 / n
        dev2 = np.bincount(spec, w * (y - mean[spec]) ** 2, minlength=n_spec)
        var = dev2 / (n - 1.0)
    return n, mean, var


@dataclass
class ScreenState:
    """One analyte being screened: integer codes of animal and specimen per result, ln values,
    the mask of results still in (``active``) and the :class:`Screening` being filled. Build it
    with :meth:`start`; each step function reads and updates it."""

    animal: np.ndarray
    spec: np.ndarray
    y: np.ndarray
    spec_animal: np.ndarray
    active: np.ndarray
    out: Screening
    alpha: float
    action: str

    @classmethod
    def start(cls, animal, specimen, y, alpha: float = DEFAULT_ALPHA, remove: bool = True) -> "ScreenState":
        animal = np.asarray(animal, np.int64)
        spec = np.asarray(specimen, np.int64)
        y = np.asarray(y, float)
        spec_animal = np.full(int(spec.max()) + 1, -1, np.int64)
        spec_animal[spec] = animal
        return cls(animal, spec, y, spec_animal, np.ones(y.size, bool), Screening(keep=np.ones(y.size, bool)),
                   alpha, "removed" if remove else "kept (outlier removal off)")

    def spec_stats(self):
        """(count, mean, variance) of the active replicates of each specimen."""
        return _spec_stats(self.spec, self.y, self.active)

    def animal_stats(self):
        """(number of specimens, mean, variance) of each animal's active specimen means."""
        n, mean, _ = self.spec_stats()
        has = n > 0
        sa = self.spec_animal[has]
        n_anim = int(self.animal.max()) + 1
        m_cnt = np.bincount(sa, minlength=n_anim).astype(float)
        m_sum = np.bincount(sa, mean[has], minlength=n_anim)
        with np.errstate(invalid="ignore", divide="ignore"):
            a_mean = m_sum / m_cnt
            dev2 = np.bincount(sa, (mean[has] - a_mean[sa]) ** 2, minlength=n_anim)
            a_var = dev2 / (m_cnt - 1.0)
        return m_cnt, a_mean, a_var

    def set_aside(self, rows, *, step, test, level, animal, specimen, statistic, critical_value, alpha, reason):
        """List one outlier (its active results among ``rows``) and take those results out."""
        rows = self.active & rows
        self.out.records.append(dict(step=step, test=test, level=level, animal=animal, specimen=specimen,
                                     n_results=int(rows.sum()), statistic=statistic,
                                     critical_value=critical_value, alpha=alpha, action=self.action,
                                     reason=reason))
        self.active &= ~rows

    def add_test(self, step, test, statistic, p_value, df, flagged, detail) -> None:
        self.out.tests.append(dict(step=step, test=test, statistic=statistic, p_value=p_value, df=df,
                                   flagged=flagged, detail=detail))


def cochran_iterate(st: ScreenState, *, step: int, what: str, level: str, n_ref: int, over: str,
                    group_variances) -> None:
    """Cochran's C repeated until nothing more is found (steps 1 and 2).

    ``group_variances()`` returns (mask of the groups tested, variance of every group) of the
    active results; groups are specimens (``level="specimen"``) or animals; ``n_ref`` values per
    group enter the critical value; ``over`` words the groups in the reason ("animals")."""
    codes = st.spec if level == "specimen" else st.animal
    while True:
        tested, var = group_variances()
        grp = np.flatnonzero(tested)
        if grp.size < 3:
            return
        c, j = cochran_c(var[grp])
        if j < 0:
            return
        crit = float(cochran_critical(grp.size, n_ref, st.alpha))
        if not c > crit:
            st.add_test(step, f"Cochran's C, {what}", c, np.nan, f"k={grp.size}, n={n_ref}", False,
                        f"largest C {c:.3f} <= critical {crit:.3f}")
            return
        g = int(grp[j])
        noun = what.split()[0]
        st.set_aside(codes == g, step=step, test=f"Cochran's C on {what}", level=level,
                     animal=int(st.spec_animal[g]) if level == "specimen" else g,
                     specimen=g if level == "specimen" else -1, statistic=c, critical_value=crit, alpha=st.alpha,
                     reason=f"{noun} variance {var[g]:.3g} (ln scale) is {c:.1%} of the sum over {grp.size} {over}")


def cochran_replicates_step(st: ScreenState) -> None:
    """Step 1: Cochran's C on the replicate variances of the specimens with the modal number of
    replicates; an outlying specimen's replicates are set aside."""
    n, _, _ = st.spec_stats()
    rep_groups = n >= 2
    if not rep_groups.any():
        st.out.notes.append("Step 1 (Cochran, replicates): no specimen has replicates; analytical "
                            "outliers cannot be tested.")
        return
    n_mode = _mode(n[rep_groups])
    if np.any(rep_groups & (n != n_mode)):
        st.out.notes.append(f"Step 1 (Cochran, replicates): {int(np.sum(rep_groups & (n != n_mode)))} "
                            f"specimen(s) with a replicate count other than {n_mode} are not tested.")

    def replicate_variances():
        n, _, var = st.spec_stats()
        return n == n_mode, var

    cochran_iterate(st, step=1, what="replicate variances", level="specimen", n_ref=n_mode,
                    over=f"specimens of {n_mode} replicates", group_variances=replicate_variances)


def cochran_within_animal_step(st: ScreenState) -> None:
    """Step 2: Cochran's C on the within-animal variances (of the specimen means) of the animals
    with 2 or more specimens; the modal number of specimens enters the critical value."""
    m_cnt, _, _ = st.animal_stats()
    eligible = m_cnt >= 2
    if eligible.sum() < 3:
        st.out.notes.append("Step 2 (Cochran, within-animal): fewer than 3 animals with 2 or more specimens; "
                            "not tested.")
        return
    s_mode = _mode(m_cnt[eligible])
    if np.any(eligible & (m_cnt != s_mode)):
        st.out.notes.append(f"Step 2 (Cochran, within-animal): animals have unequal numbers of specimens; "
                            f"the critical value uses the most common number ({s_mode}), so the test is approximate.")

    def within_animal_variances():
        m_cnt, _, a_var = st.animal_stats()
        return m_cnt >= 2, a_var

    cochran_iterate(st, step=2, what="within-animal variances", level="animal", n_ref=s_mode, over="animals",
                    group_variances=within_animal_variances)


def reed_step(st: ScreenState, min_animals: int = 5) -> None:
    """Step 3: Reed's criterion on the animal means, repeated until nothing more is found."""
    while True:
        m_cnt, a_mean, _ = st.animal_stats()
        grp = np.flatnonzero(m_cnt >= 1)
        if grp.size < min_animals:
            st.out.notes.append(f"Step 3 (Reed): fewer than {min_animals} animals; not tested "
                                "(with very few means one end gap always exceeds a third of the range).")
            return
        j, gap, rng = reed_criterion(a_mean[grp])
        if j < 0:
            st.add_test(3, "Reed's criterion, animal means", gap / rng if rng > 0 else 0.0, np.nan,
                        f"animals={grp.size}", False,
                        f"largest end gap {gap:.3g} <= range/3 {rng / 3:.3g} (ln scale)")
            return
        ai = int(grp[j])
        st.set_aside(st.animal == ai, step=3, test="Reed's criterion on animal means", level="animal", animal=ai,
                     specimen=-1, statistic=gap / rng, critical_value=1.0 / 3.0, alpha=np.nan,
                     reason=f"gap {gap:.3g} to the next animal mean exceeds a third of the range "
                            f"{rng:.3g} (ln scale); with {grp.size} animals the criterion flags a "
                            f"normally distributed extreme mean in {reed_false_alarm(int(grp.size)):.0%} "
                            "of studies (simulated): check that the animal is truly aberrant")


def animal_groups(st: ScreenState) -> list[np.ndarray]:
    """The active specimen means of each animal with 2 or more specimens, in animal-code order."""
    n, mean, _ = st.spec_stats()
    has = n > 0
    groups = [mean[has & (st.spec_animal == ai)] for ai in np.unique(st.spec_animal[has])]
    return [g for g in groups if g.size >= 2]


def homogeneity_step(st: ScreenState, groups: list[np.ndarray]) -> None:
    """Step 4 (no removal): Bartlett's and Levene's (median) tests of the within-animal variances."""
    if not (len(groups) >= 2 and all(np.ptp(g) > 0 for g in groups)):
        st.out.notes.append("Step 4 (homogeneity): not tested (needs 2 or more animals with 2 or more "
                            "specimens that differ).")
        return
    alpha = st.alpha
    bt, bp = bartlett_test(groups)
    st.add_test(4, "Bartlett's test, within-animal variances", bt, bp, f"{len(groups) - 1}", bool(bp < alpha),
                "heterogeneous" if bp < alpha else "no evidence of heterogeneity")
    lw, lp = levene_median_test(groups)
    st.add_test(4, "Levene's test (median), within-animal variances", lw, lp,
                f"{len(groups) - 1}, {sum(g.size for g in groups) - len(groups)}", bool(lp < alpha),
                "heterogeneous" if lp < alpha else "no evidence of heterogeneity")


def normality_step(st: ScreenState, groups: list[np.ndarray]) -> None:
    """Step 5 (no removal): Shapiro-Wilk of the animal means and of the within-animal deviations."""
    a_means = np.array([g.mean() for g in groups]) if groups else np.array([])
    dev = np.concatenate([g - g.mean() for g in groups]) if groups else np.array([])
    for x, what in ((a_means, "animal means"), (dev, "within-animal deviations")):
        if x.size >= 3 and np.ptp(x) > 0:
            sw = stats.shapiro(x)
            st.add_test(5, f"Shapiro-Wilk, {what}", float(sw.statistic), float(sw.pvalue), f"n={x.size}",
                        bool(sw.pvalue < st.alpha),
                        "not normal on the ln scale" if sw.pvalue < st.alpha else "compatible with normal")


def steady_state_step(st: ScreenState, t_days) -> None:
    """Step 6 (no removal): each animal's slope of its specimen means (ln) on time, and a
    one-sample t test of the slopes (the statistic of scipy.stats.ttest_1samp)."""
    alpha = st.alpha
    n, mean, _ = st.spec_stats()
    has = n > 0
    w = st.active.astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        spec_t = np.bincount(st.spec, w * np.asarray(t_days, float), minlength=n.size) / n
    slopes = animal_slopes(st.spec_animal[has], spec_t[has], mean[has], alpha)
    st.out.slopes = slopes
    if not slopes:
        st.out.notes.append("Step 6 (steady state): no animal has 3 or more specimens at different times.")
        return
    n_flag = sum(r["flagged"] for r in slopes)
    st.add_test(6, "Steady state, per-animal slope of ln value on time", float(n_flag), np.nan,
                f"animals={len(slopes)}", n_flag > 0,
                f"{n_flag} of {len(slopes)} animal(s) with a slope different from 0 "
                f"(p < {alpha:g}); about {alpha * len(slopes):.1f} expected by chance")
    sl = np.array([r["slope_per_day"] for r in slopes])
    if len(slopes) >= 3 and np.ptp(sl) > 0:
        tstat = float(sl.mean() / (sl.std(ddof=1) / math.sqrt(sl.size)))
        tp = float(2.0 * stats.t.sf(abs(tstat), sl.size - 1))
        st.add_test(6, "Steady state, mean slope across animals (t test)", tstat, tp, f"{sl.size - 1}",
                    bool(tp < alpha), f"mean {100 * np.expm1(7 * sl.mean()):+.2f} % per week")


def screen(animal, specimen, y, t_days=None, *, alpha: float = DEFAULT_ALPHA, remove: bool = True,
           min_animals_reed: int = 5) -> Screening:
    """Run the steps of the module docstring on one analyte.

    ``animal`` and ``specimen`` are integer codes (0..), ``specimen`` nested in ``animal``;
    ``y`` log values; ``t_days`` the collection time of each result in days (for the
    steady-state check; None skips it). With ``remove=False`` every step still runs as if the
    outliers had been set aside (so the list shows what would have been removed), but ``keep``
    stays all True and the records say "kept".
    """
    st = ScreenState.start(animal, specimen, y, alpha, remove)
    cochran_replicates_step(st)
    cochran_within_animal_step(st)
    reed_step(st, min_animals_reed)
    groups = animal_groups(st)
    homogeneity_step(st, groups)
    normality_step(st, groups)
    if t_days is not None:
        steady_state_step(st, t_days)
    if remove:
        st.out.keep = st.active.copy()
    return st.out
