"""Outlier, homogeneity and steady-state steps of a study (bayesbase.study.outliers) against
published critical-value tables and scipy."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from bayesbase.study.outliers import (
    ScreenState,
    animal_groups,
    animal_slopes,
    bartlett_test,
    cochran_c,
    cochran_critical,
    cochran_replicates_step,
    cochran_within_animal_step,
    homogeneity_step,
    levene_median_test,
    normality_step,
    reed_criterion,
    reed_false_alarm,
    reed_step,
    screen,
    steady_state_step,
)
from bayesbase.study.plan import simulate_balanced

# Critical values of Cochran's C at the 95 % level, l data sets of n values each: table "Critical
# values for the Cochran test (95% confidence level)" of the UK National Measurement System
# chemical and biological metrology website (LGC), page "Cochran test",
# http://www.nmschembio.org.uk/GenericArticle.aspx?m=395&amid=5622 (read). Three decimals.
NMS_TABLE_95 = {
    # l: (n=2, n=3, n=4, n=5)
    2: (0.998, 0.975, 0.939, 0.906),
    3: (0.967, 0.871, 0.798, 0.746),
    4: (0.906, 0.768, 0.684, 0.629),
    5: (0.841, 0.684, 0.598, 0.544),
    6: (0.781, 0.616, 0.532, 0.480),
    7: (0.727, 0.561, 0.480, 0.431),
    8: (0.680, 0.516, 0.438, 0.391),
    9: (0.638, 0.477, 0.403, 0.358),
    10: (0.602, 0.445, 0.373, 0.331),
    15: (0.471, 0.335, 0.276, 0.242),
    20: (0.389, 0.270, 0.221, 0.192),
}

# Upper 0.01 critical values, k variances each on df degrees of freedom (n = df + 1): table
# "Cochran" of the tables of Heagerty's biostatistics course pages,
# http://faculty.washington.edu/heagerty/Books/Biostatistics/TABLES/Cochran/ (read); four decimals.
HEAGERTY_TABLE_99 = [  # (k, df, value)
    (5, 1, 0.9279), (10, 1, 0.7175), (20, 1, 0.4799), (10, 2, 0.5358), (20, 2, 0.3297), (10, 4, 0.3934),
    (6, 3, 0.6258), (6, 4, 0.5635),
]


@pytest.mark.parametrize("k", sorted(NMS_TABLE_95))
def test_cochran_critical_values_match_the_published_95_table(k):
    for n, value in zip((2, 3, 4, 5), NMS_TABLE_95[k]):
        assert float(cochran_critical(k, n, 0.05)) == pytest.approx(value, abs=6e-4), (k, n)


@pytest.mark.parametrize("k,df,value", HEAGERTY_TABLE_99)
def test_cochran_critical_values_match_the_published_99_table(k, df, value):
    assert float(cochran_critical(k, df + 1, 0.01)) == pytest.approx(value, abs=6e-5)


def test_methods_reference_check_values():
    """Check values of the project's methods reference (alpha 0.05, published table):
    k 10, n 2 -> 0.602; k 10, n 3 -> 0.445; k 20, n 5 -> 0.192."""
    assert float(cochran_critical(10, 2)) == pytest.approx(0.602, abs=6e-4)
    assert float(cochran_critical(10, 3)) == pytest.approx(0.445, abs=6e-4)
    assert float(cochran_critical(20, 5)) == pytest.approx(0.192, abs=6e-4)


def test_cochran_critical_value_has_its_nominal_size_by_simulation():
    """The largest of k chi-square variances exceeds the critical value with probability close
    to (at most) alpha under equal variances: 10 groups of duplicates, 100,000 seeded draws."""
    rng = np.random.default_rng(1)
    v = rng.chisquare(1, (100_000, 10))
    c = v.max(axis=1) / v.sum(axis=1)
    rate = np.mean(c > cochran_critical(10, 2, 0.05))
    assert 0.045 <= rate <= 0.052


def test_cochran_statistic():
    c, j = cochran_c([1.0, 2.0, 7.0])
    assert c == pytest.approx(0.7) and j == 2
    c, j = cochran_c([0.0, 0.0])
    assert np.isnan(c) and j == -1


def test_reed_criterion():
    """Reed AH et al. Clin Chem 1971;17:275: an extreme value is an outlier when its gap to the
    next value exceeds a third of the range."""
    j, gap, rng = reed_criterion([1.0, 1.1, 1.2, 1.3, 2.0])
    assert j == 4 and gap == pytest.approx(0.7) and rng == pytest.approx(1.0)
    j, *_ = reed_criterion([0.0, 1.0, 1.1, 1.2, 1.3])
    assert j == 0
    j, *_ = reed_criterion([1.0, 1.2, 1.4, 1.6, 1.8])
    assert j == -1


def test_reed_false_alarm_rate_of_small_studies():
    """Order statistics of normal samples: with 3 means the larger end gap always exceeds a third
    of the range (the two gaps sum to the range), so the false-alarm rate is 1; it falls with
    the number of animals."""
    assert reed_false_alarm(3) == 1.0
    r = [reed_false_alarm(n) for n in (5, 12, 20, 60)]
    assert r == sorted(r, reverse=True)
    assert 0.1 < r[1] < 0.25 and r[3] < 0.01


def test_bartlett_and_levene_match_scipy():
    rng = np.random.default_rng(3)
    groups = [rng.normal(0, s, 6) for s in (1, 1.5, 0.7, 2.0, 1.1)]
    t, p = bartlett_test(groups)
    ref = stats.bartlett(*groups)
    assert t == pytest.approx(ref.statistic, rel=1e-10) and p == pytest.approx(ref.pvalue, rel=1e-8)
    w, p = levene_median_test(groups)
    ref = stats.levene(*groups, center="median")
    assert w == pytest.approx(ref.statistic, rel=1e-10) and p == pytest.approx(ref.pvalue, rel=1e-8)


def test_vectorised_slopes_match_scipy_linregress():
    rng = np.random.default_rng(4)
    group = np.repeat(np.arange(5), 6)
    t = np.tile(np.arange(6) * 7.0, 5) + rng.uniform(0, 1, 30)
    y = rng.normal(0, 0.05, 30) + 0.004 * t * (group == 2)
    rows = animal_slopes(group, t, y)
    assert len(rows) == 5
    for r in rows:
        m = group == r["animal"]
        ref = stats.linregress(t[m], y[m])
        assert r["slope_per_day"] == pytest.approx(ref.slope, rel=1e-9)
        assert r["p_value"] == pytest.approx(ref.pvalue, rel=1e-7)
    assert rows[2]["flagged"]


def _study(seed, n_animals=12, n_spec=6, n_rep=2):
    rng = np.random.default_rng(seed)
    y, _ = simulate_balanced(1, n_animals, n_spec, n_rep, 0.03, 0.08, 0.2, rng, mu=4.5)
    y = y[0].copy()
    a, s, _ = np.meshgrid(np.arange(n_animals), np.arange(n_spec), np.arange(n_rep), indexing="ij")
    t = np.broadcast_to((np.arange(n_spec) * 7.0)[None, :, None], y.shape)
    return a, a * n_spec + s, y, t


def test_screen_finds_planted_outliers_in_the_published_order():
    a, s, y, t = _study(5)
    y[3, 2, 1] += 0.25  # an analytical outlier: one replicate 28 % high
    y[7] += np.array([0.3, -0.3, 0.3, -0.3, 0.3, -0.3])[:, None]  # animal 7: large within variance
    sc = screen(a.ravel(), s.ravel(), y.ravel(), t.ravel())
    steps = [(r["step"], r["level"], r["animal"], r["specimen"]) for r in sc.records]
    assert steps[0] == (1, "specimen", 3, 3 * 6 + 2)
    assert (2, "animal", 7, -1) in steps
    assert [r["step"] for r in sc.records] == sorted(r["step"] for r in sc.records)
    for r in sc.records:
        assert r["statistic"] > r["critical_value"] and r["action"] == "removed"
    removed = ~sc.keep
    assert removed.sum() == sum(r["n_results"] for r in sc.records)
    assert removed.reshape(y.shape)[3, 2].all() and removed.reshape(y.shape)[7].all()
    tested = {t_["step"] for t_ in sc.tests}
    assert {1, 2, 4, 5, 6} <= tested


def test_no_outlier_removal_lists_but_keeps():
    a, s, y, t = _study(5)
    y[3, 2, 1] += 0.25
    sc = screen(a.ravel(), s.ravel(), y.ravel(), t.ravel(), remove=False)
    assert sc.keep.all()
    assert sc.records and all(r["action"].startswith("kept") for r in sc.records)


def test_clean_study_removes_nothing_and_steady_state_flags_a_drifting_animal():
    a, s, y, t = _study(8)
    y[2] += (0.01 * np.arange(6))[:, None]  # animal 2 drifts 1 % per week
    sc = screen(a.ravel(), s.ravel(), y.ravel(), t.ravel())
    assert sc.keep.all() and not sc.records
    slope2 = next(r for r in sc.slopes if r["animal"] == 2)
    assert slope2["pct_per_week"] > 0.5


def test_replicate_step_is_skipped_without_replicates_and_said_so():
    a, s, y, t = _study(1, n_rep=1)
    sc = screen(a.ravel(), s.ravel(), y.ravel(), t.ravel())
    assert any("no specimen has replicates" in n for n in sc.notes)


# ---------------------------------------------------------------- each step of screen() alone

def _duplicates_design():
    """5 animals x 2 specimens x duplicates (10 specimens): fixed replicate differences, one of
    them 0.20 (specimen 7); animal and specimen levels far apart so only step 1 can fire."""
    d = np.array([0.010, 0.012, 0.009, 0.011, 0.013, 0.008, 0.010, 0.200, 0.012, 0.011])
    spec = np.repeat(np.arange(10), 2)
    animal = spec // 2
    base = np.array([4.0, 4.05, 4.2, 4.22, 4.4, 4.43, 4.6, 4.61, 4.8, 4.84])
    y = base[spec] + np.tile([0.5, -0.5], 10) * d[spec]
    return animal, spec, y, d


def test_replicate_step_alone_against_the_published_table():
    """Step 1: C = largest duplicate variance / sum (duplicate variance d^2/2 from np.var); the
    critical value for 10 groups of duplicates is 0.602 and, once specimen 7 is set aside, 0.638
    for 9 groups (published 95 % table, NMS_TABLE_95 above)."""
    animal, spec, y, d = _duplicates_design()
    st = ScreenState.start(animal, spec, y)
    cochran_replicates_step(st)
    var = np.array([np.var(y[spec == j], ddof=1) for j in range(10)])
    assert var == pytest.approx(d**2 / 2, rel=1e-9)
    (rec,) = st.out.records
    assert (rec["step"], rec["level"], rec["animal"], rec["specimen"], rec["n_results"]) == (1, "specimen", 3, 7, 2)
    assert rec["statistic"] == pytest.approx(var.max() / var.sum(), rel=1e-9)
    assert rec["critical_value"] == pytest.approx(NMS_TABLE_95[10][0], abs=6e-4)
    assert not st.active[spec == 7].any() and st.active[spec != 7].all()
    (row,) = st.out.tests  # the repeat that found nothing more
    rest = np.delete(var, 7)
    assert row["statistic"] == pytest.approx(rest.max() / rest.sum(), rel=1e-9)
    assert row["statistic"] <= NMS_TABLE_95[9][0] and row["df"] == "k=9, n=2"


def _specimens_design():
    """6 animals x 3 specimens, one result each; animal 4 spreads widely."""
    dev = np.array([[0.02, -0.01, -0.01], [0.015, -0.02, 0.005], [-0.01, 0.02, -0.01],
                    [0.01, 0.01, -0.02], [0.30, -0.25, -0.05], [-0.015, 0.01, 0.005]])
    animal = np.repeat(np.arange(6), 3)
    spec = np.arange(18)
    y = (4.0 + 0.2 * np.arange(6))[animal] + dev.ravel()
    return animal, spec, y, dev


def test_within_animal_step_alone_against_the_published_table():
    """Step 2: C = largest within-animal variance / sum (np.var of each animal's specimen values);
    critical value 0.616 for 6 animals of 3 specimens, then 0.684 for 5 (published 95 % table)."""
    animal, spec, y, dev = _specimens_design()
    st = ScreenState.start(animal, spec, y)
    cochran_within_animal_step(st)
    var = np.var(dev, axis=1, ddof=1)
    (rec,) = st.out.records
    assert (rec["step"], rec["level"], rec["animal"], rec["specimen"], rec["n_results"]) == (2, "animal", 4, -1, 3)
    assert rec["statistic"] == pytest.approx(var.max() / var.sum(), rel=1e-9)
    assert rec["critical_value"] == pytest.approx(NMS_TABLE_95[6][1], abs=6e-4)
    assert not st.active[animal == 4].any()
    (row,) = st.out.tests
    rest = np.delete(var, 4)
    assert row["statistic"] == pytest.approx(rest.max() / rest.sum(), rel=1e-9)
    assert row["statistic"] <= NMS_TABLE_95[5][1]


def test_reed_step_alone():
    """Step 3 (Reed et al. 1971): animal means 1.0, 1.1, 1.2, 1.3, 2.0: gap 0.7 > range/3; the
    animal is set aside, and with 4 animals left the step stops and says why."""
    means = np.array([1.0, 1.1, 1.2, 1.3, 2.0])
    animal = np.repeat(np.arange(5), 2)
    spec = np.arange(10)
    y = means[animal] + np.tile([0.01, -0.01], 5)
    st = ScreenState.start(animal, spec, y)
    reed_step(st, min_animals=5)
    (rec,) = st.out.records
    assert (rec["animal"], rec["n_results"]) == (4, 2)
    assert rec["statistic"] == pytest.approx(0.7) and rec["critical_value"] == pytest.approx(1 / 3)
    assert f"{reed_false_alarm(5):.0%}" in rec["reason"]
    assert any("fewer than 5 animals" in n for n in st.out.notes) and not st.out.tests


def test_homogeneity_and_normality_steps_alone_match_scipy():
    """Steps 4 and 5 on the specimen means of each animal: scipy.stats.bartlett, scipy.stats.levene
    (center="median") and scipy.stats.shapiro are the references."""
    a, s, y, _ = _study(5)
    st = ScreenState.start(a.ravel(), s.ravel(), y.ravel())
    groups = animal_groups(st)
    spec_means = y.mean(axis=2)  # (animal, specimen)
    assert len(groups) == 12 and all(np.allclose(g, m) for g, m in zip(groups, spec_means))
    homogeneity_step(st, groups)
    normality_step(st, groups)
    t = {r["test"]: r for r in st.out.tests}
    ref = stats.bartlett(*spec_means)
    assert t["Bartlett's test, within-animal variances"]["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
    assert t["Bartlett's test, within-animal variances"]["p_value"] == pytest.approx(ref.pvalue, rel=1e-8)
    ref = stats.levene(*spec_means, center="median")
    assert t["Levene's test (median), within-animal variances"]["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
    ref = stats.shapiro(spec_means.mean(axis=1))
    assert t["Shapiro-Wilk, animal means"]["p_value"] == pytest.approx(ref.pvalue, rel=1e-9)
    ref = stats.shapiro((spec_means - spec_means.mean(axis=1, keepdims=True)).ravel())
    assert t["Shapiro-Wilk, within-animal deviations"]["statistic"] == pytest.approx(ref.statistic, rel=1e-9)


def test_homogeneity_step_says_why_it_did_not_run():
    st = ScreenState.start([0, 0, 1], [0, 1, 2], [1.0, 1.1, 2.0])
    homogeneity_step(st, animal_groups(st))
    assert not st.out.tests and "Step 4" in st.out.notes[0]


def test_steady_state_step_alone_matches_linregress_and_ttest():
    """Step 6: per-animal slope of the specimen means on time (scipy.stats.linregress) and the
    one-sample t test of the slopes (scipy.stats.ttest_1samp)."""
    a, s, y, t = _study(8)
    y[2] += (0.01 * np.arange(6))[:, None]
    st = ScreenState.start(a.ravel(), s.ravel(), y.ravel())
    steady_state_step(st, t.ravel())
    spec_means, days = y.mean(axis=2), t.mean(axis=2)
    slopes = [stats.linregress(days[i], spec_means[i]) for i in range(12)]
    assert [r["slope_per_day"] for r in st.out.slopes] == pytest.approx([x.slope for x in slopes], rel=1e-9)
    assert [r["p_value"] for r in st.out.slopes] == pytest.approx([x.pvalue for x in slopes], rel=1e-7)
    ref = stats.ttest_1samp([x.slope for x in slopes], 0.0)
    row = st.out.tests[-1]
    assert row["statistic"] == pytest.approx(ref.statistic, rel=1e-9)
    assert row["p_value"] == pytest.approx(ref.pvalue, rel=1e-9)


def test_screen_is_the_steps_in_the_published_order():
    """The whole function against its steps run one after the other on the same input."""
    a, s, y, t = _study(5)
    y[3, 2, 1] += 0.25
    y[7] += np.array([0.3, -0.3, 0.3, -0.3, 0.3, -0.3])[:, None]
    y[10] += 1.2
    whole = screen(a.ravel(), s.ravel(), y.ravel(), t.ravel())
    st = ScreenState.start(a.ravel(), s.ravel(), y.ravel())
    for step in (cochran_replicates_step, cochran_within_animal_step, reed_step):
        step(st)
    groups = animal_groups(st)
    homogeneity_step(st, groups)
    normality_step(st, groups)
    steady_state_step(st, t.ravel())
    assert [r["step"] for r in whole.records] == [1, 2, 3]
    assert whole.records == st.out.records and whole.notes == st.out.notes
    assert [r["test"] for r in whole.tests] == [r["test"] for r in st.out.tests]
    assert np.array_equal(whole.keep, st.active)
