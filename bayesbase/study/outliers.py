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
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy import special, stats

from .common import DEFAULT_ALPHA

__all__ = ["cochran_critical", "cochran_c", "reed_criterion", "reed_false_alarm", "animal_slopes", "bartlett_test",
           "levene_median_test", "Screening", "screen"]


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


def screen(animal, specimen, y, t_days=None, *, alpha: float = DEFAULT_ALPHA, remove: bool = True,
           min_animals_reed: int = 5) -> Screening:
    """Run the steps of the module docstring on one analyte.

    ``animal`` and ``specimen`` are integer codes (0..), ``specimen`` nested in ``animal``;
    ``y`` log values; ``t_days`` the collection time of each result in days (for the
    steady-state check; None skips it). With ``remove=False`` every step still runs as if the
    outliers had been set aside (so the list shows what would have been removed), but ``keep``
    stays all True and the records say "kept".
    """
    animal = np.asarray(animal, np.int64)
    spec = np.asarray(specimen, np.int64)
    y = np.asarray(y, float)
    n_spec = int(spec.max()) + 1
    spec_animal = np.full(n_spec, -1, np.int64)
    spec_animal[spec] = animal
    active = np.ones(y.size, bool)
    out = Screening(keep=np.ones(y.size, bool))
    action = "removed" if remove else "kept (outlier removal off)"

    # ---- step 1: Cochran's C on replicate variances
    n, _, var = _spec_stats(spec, y, active)
    rep_groups = n >= 2
    if not rep_groups.any():
        out.notes.append("Step 1 (Cochran, replicates): no specimen has replicates; analytical "
                         "outliers cannot be tested.")
    else:
        n_mode = _mode(n[rep_groups])
        if np.any(rep_groups & (n != n_mode)):
            out.notes.append(f"Step 1 (Cochran, replicates): {int(np.sum(rep_groups & (n != n_mode)))} "
                             f"specimen(s) with a replicate count other than {n_mode} are not tested.")
        while True:
            n, _, var = _spec_stats(spec, y, active)
            grp = np.flatnonzero(n == n_mode)
            if grp.size < 3:
                break
            c, j = cochran_c(var[grp])
            if j < 0:
                break
            crit = float(cochran_critical(grp.size, n_mode, alpha))
            if not c > crit:
                out.tests.append(dict(step=1, test="Cochran's C, replicate variances", statistic=c,
                                      p_value=np.nan, df=f"k={grp.size}, n={n_mode}", flagged=False,
                                      detail=f"largest C {c:.3f} <= critical {crit:.3f}"))
                break
            sj = int(grp[j])
            rows = active & (spec == sj)
            out.records.append(dict(step=1, test="Cochran's C on replicate variances", level="specimen",
                                    animal=int(spec_animal[sj]), specimen=sj, n_results=int(rows.sum()),
                                    statistic=c, critical_value=crit, alpha=alpha, action=action,
                                    reason=f"replicate variance {var[sj]:.3g} (ln scale) is {c:.1%} of the "
                                           f"sum over {grp.size} specimens of {n_mode} replicates"))
            active &= ~rows

    # ---- step 2: Cochran's C on within-animal variances (of specimen means)
    def animal_stats():
        n, mean, _ = _spec_stats(spec, y, active)
        has = n > 0
        n_anim = int(animal.max()) + 1
        m_cnt = np.bincount(spec_animal[has], minlength=n_anim).astype(float)
        m_sum = np.bincount(spec_animal[has], mean[has], minlength=n_anim)
        with np.errstate(invalid="ignore", divide="ignore"):
            a_mean = m_sum / m_cnt
            dev2 = np.bincount(spec_animal[has], (mean[has] - a_mean[spec_animal[has]]) ** 2, minlength=n_anim)
            a_var = dev2 / (m_cnt - 1.0)
        return m_cnt, a_mean, a_var, mean, has

    m_cnt, _, _, _, _ = animal_stats()
    eligible = m_cnt >= 2
    if eligible.sum() >= 3:
        s_mode = _mode(m_cnt[eligible])
        if np.any(eligible & (m_cnt != s_mode)):
            out.notes.append(f"Step 2 (Cochran, within-animal): animals have unequal numbers of specimens; "
                             f"the critical value uses the most common number ({s_mode}), so the test is approximate.")
        while True:
            m_cnt, _, a_var, _, _ = animal_stats()
            grp = np.flatnonzero(m_cnt >= 2)
            if grp.size < 3:
                break
            c, j = cochran_c(a_var[grp])
            if j < 0:
                break
            crit = float(cochran_critical(grp.size, s_mode, alpha))
            if not c > crit:
                out.tests.append(dict(step=2, test="Cochran's C, within-animal variances", statistic=c,
                                      p_value=np.nan, df=f"k={grp.size}, n={s_mode}", flagged=False,
                                      detail=f"largest C {c:.3f} <= critical {crit:.3f}"))
                break
            ai = int(grp[j])
            rows = active & (animal == ai)
            out.records.append(dict(step=2, test="Cochran's C on within-animal variances", level="animal",
                                    animal=ai, specimen=-1, n_results=int(rows.sum()), statistic=c,
                                    critical_value=crit, alpha=alpha, action=action,
                                    reason=f"within-animal variance {a_var[ai]:.3g} (ln scale) is {c:.1%} of the "
                                           f"sum over {grp.size} animals"))
            active &= ~rows
    else:
        out.notes.append("Step 2 (Cochran, within-animal): fewer than 3 animals with 2 or more specimens; not tested.")

    # ---- step 3: Reed's criterion on animal means
    while True:
        m_cnt, a_mean, _, _, _ = animal_stats()
        grp = np.flatnonzero(m_cnt >= 1)
        if grp.size < min_animals_reed:
            out.notes.append(f"Step 3 (Reed): fewer than {min_animals_reed} animals; not tested "
                             "(with very few means one end gap always exceeds a third of the range).")
            break
        j, gap, rng = reed_criterion(a_mean[grp])
        if j < 0:
            out.tests.append(dict(step=3, test="Reed's criterion, animal means", statistic=gap / rng if rng > 0 else 0.0,
                                  p_value=np.nan, df=f"animals={grp.size}", flagged=False,
                                  detail=f"largest end gap {gap:.3g} <= range/3 {rng / 3:.3g} (ln scale)"))
            break
        ai = int(grp[j])
        rows = active & (animal == ai)
        out.records.append(dict(step=3, test="Reed's criterion on animal means", level="animal", animal=ai,
                                specimen=-1, n_results=int(rows.sum()), statistic=gap / rng,
                                critical_value=1.0 / 3.0, alpha=np.nan, action=action,
                                reason=f"gap {gap:.3g} to the next animal mean exceeds a third of the range "
                                       f"{rng:.3g} (ln scale); with {grp.size} animals the criterion flags a "
                                       f"normally distributed extreme mean in {reed_false_alarm(int(grp.size)):.0%} "
                                       "of studies (simulated): check that the animal is truly aberrant"))
        active &= ~rows

    # ---- step 4: homogeneity of within-animal variances (no removal)
    n, mean, _ = _spec_stats(spec, y, active)
    has = n > 0
    groups = [mean[has & (spec_animal == ai)] for ai in np.unique(spec_animal[has])]
    groups = [g for g in groups if g.size >= 2]
    if len(groups) >= 2 and all(np.ptp(g) > 0 for g in groups):
        bt, bp = bartlett_test(groups)
        out.tests.append(dict(step=4, test="Bartlett's test, within-animal variances", statistic=bt,
                              p_value=bp, df=f"{len(groups) - 1}", flagged=bool(bp < alpha),
                              detail="heterogeneous" if bp < alpha else "no evidence of heterogeneity"))
        lw, lp = levene_median_test(groups)
        out.tests.append(dict(step=4, test="Levene's test (median), within-animal variances",
                              statistic=lw, p_value=lp,
                              df=f"{len(groups) - 1}, {sum(g.size for g in groups) - len(groups)}",
                              flagged=bool(lp < alpha),
                              detail="heterogeneous" if lp < alpha else "no evidence of heterogeneity"))
    else:
        out.notes.append("Step 4 (homogeneity): not tested (needs 2 or more animals with 2 or more "
                         "specimens that differ).")

    # ---- step 5: normality (no removal)
    a_means = np.array([g.mean() for g in groups]) if groups else np.array([])
    if a_means.size >= 3 and np.ptp(a_means) > 0:
        sw = stats.shapiro(a_means)
        out.tests.append(dict(step=5, test="Shapiro-Wilk, animal means", statistic=float(sw.statistic),
                              p_value=float(sw.pvalue), df=f"n={a_means.size}", flagged=bool(sw.pvalue < alpha),
                              detail="not normal on the ln scale" if sw.pvalue < alpha else "compatible with normal"))
    dev = np.concatenate([g - g.mean() for g in groups]) if groups else np.array([])
    if dev.size >= 3 and np.ptp(dev) > 0:
        sw = stats.shapiro(dev)
        out.tests.append(dict(step=5, test="Shapiro-Wilk, within-animal deviations", statistic=float(sw.statistic),
                              p_value=float(sw.pvalue), df=f"n={dev.size}", flagged=bool(sw.pvalue < alpha),
                              detail="not normal on the ln scale" if sw.pvalue < alpha else "compatible with normal"))

    # ---- step 6: steady state (no removal)
    if t_days is not None:
        t = np.asarray(t_days, float)
        w = active.astype(float)
        with np.errstate(invalid="ignore", divide="ignore"):
            st = np.bincount(spec, w * t, minlength=n_spec) / n
        slopes = animal_slopes(spec_animal[has], st[has], mean[has], alpha)
        out.slopes = slopes
        if slopes:
            n_flag = sum(r["flagged"] for r in slopes)
            out.tests.append(dict(step=6, test="Steady state, per-animal slope of ln value on time",
                                  statistic=float(n_flag), p_value=np.nan, df=f"animals={len(slopes)}",
                                  flagged=n_flag > 0,
                                  detail=f"{n_flag} of {len(slopes)} animal(s) with a slope different from 0 "
                                         f"(p < {alpha:g}); about {alpha * len(slopes):.1f} expected by chance"))
            if len(slopes) >= 3:
                sl = np.array([r["slope_per_day"] for r in slopes])
                if np.ptp(sl) > 0:
                    # one-sample t test of the slopes (the statistic of scipy.stats.ttest_1samp)
                    tstat = float(sl.mean() / (sl.std(ddof=1) / math.sqrt(sl.size)))
                    tp = float(2.0 * stats.t.sf(abs(tstat), sl.size - 1))
                    out.tests.append(dict(step=6, test="Steady state, mean slope across animals (t test)",
                                          statistic=tstat, p_value=tp,
                                          df=f"{sl.size - 1}", flagged=bool(tp < alpha),
                                          detail=f"mean {100 * np.expm1(7 * sl.mean()):+.2f} % per week"))
        else:
            out.notes.append("Step 6 (steady state): no animal has 3 or more specimens at different times.")

    if remove:
        out.keep = active.copy()
    return out
