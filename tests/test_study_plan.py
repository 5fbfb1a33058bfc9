"""Design planning (bayesbase.study.plan): the chi-square shortcut against whole simulated data
sets, monotonicity of the expected width, the CLI --plan mode and its input errors."""
from __future__ import annotations

import argparse

import numpy as np
import pytest
from scipy import stats

from bayesbase.study.anova import masked_anova
from bayesbase.study.cli import add_parser, run
from bayesbase.study.common import StudyError
from bayesbase.study.plan import plan_design, simulate_balanced, simulate_cvi_interval


def test_chisquare_shortcut_agrees_with_whole_data_sets():
    """Drawing MS_A and MS_I from their chi-square laws (normal theory) gives the same
    distribution of CVI limits as simulating every result: two-sample Kolmogorov-Smirnov test
    (scipy.stats.ks_2samp) of the upper limits, 3000 seeded studies each."""
    rng = np.random.default_rng(12)
    _, lo1, up1 = simulate_cvi_interval(10, 6, 2, 0.03, 0.10, 3000, rng)
    y, _ = simulate_balanced(3000, 10, 6, 2, 0.03, 0.10, 0.25, np.random.default_rng(13))
    _, lower, upper = masked_anova(y, np.ones(y.shape, bool))
    up2 = np.sqrt(np.expm1(upper["cvi"]))
    assert stats.ks_2samp(up1, up2).pvalue > 0.01
    assert np.mean(up1 - lo1) == pytest.approx(np.mean(up2 - np.sqrt(np.expm1(lower["cvi"]))), rel=0.03)


def test_plan_table_and_summary():
    plan = plan_design(10, 6, 2, 0.03, 0.10, 0.25, n_sim=2000, seed=1)
    s = plan.summary
    assert (s["animals"], s["specimens"], s["replicates"]) == (10, 6, 2)
    assert s["cvi_lower_pct"] < 10 < s["cvi_upper_pct"]
    assert s["width_pct"] == pytest.approx(s["cvi_upper_pct"] - s["cvi_lower_pct"], rel=1e-9)
    # coverage of the simulated intervals: 99 % binomial band around 0.95 (scipy.stats.binom)
    lo, hi = stats.binom.ppf([0.005, 0.995], 2000, 0.95) / 2000
    assert lo <= s["coverage"] <= hi
    grid = plan.width_grid()
    # more animals or more specimens never widen the expected interval
    assert np.all(np.diff(grid.to_numpy(), axis=0) < 0)
    assert np.all(np.diff(grid.to_numpy(), axis=1) < 0)
    again = plan_design(10, 6, 2, 0.03, 0.10, 0.25, n_sim=2000, seed=1)
    assert again.summary == s  # seeded


def test_plan_with_dropout_is_wider():
    full = plan_design(8, 5, 2, 0.03, 0.10, 0.25, n_sim=600, seed=2, animals_grid=[8], specimens_grid=[5])
    drop = plan_design(8, 5, 2, 0.03, 0.10, 0.25, n_sim=600, seed=2, animals_grid=[8], specimens_grid=[5],
                       dropout=0.2)
    assert drop.summary["width_pct"] > full.summary["width_pct"]


@pytest.mark.parametrize("kw,msg", [({"replicates": 1}, "replicates"), ({"cvi": 0.0}, "cvi"),
                                    ({"animals": 1}, "animals"), ({"dropout": 0.7}, "dropout")])
def test_plan_rejects_bad_designs(kw, msg):
    with pytest.raises(StudyError, match=msg):
        plan_design(**kw)


def _args(argv):
    ap = argparse.ArgumentParser()
    sub = ap.add_subparsers(dest="command")
    add_parser(sub)
    return ap.parse_args(argv)


def test_cli_plan_prints_the_expected_width_and_grid(capsys):
    args = _args(["study", "--plan", "--animals", "10", "--specimens", "6", "--replicates", "2", "--cva", "3",
                  "--cvi", "10", "--cvg", "25", "--simulations", "500"])
    assert run(args) == 0
    out = capsys.readouterr().out
    assert "Expected 95 % confidence interval of CVI" in out
    assert "10*" in out and "Decision support" in out


def test_cli_plan_user_error(capsys):
    args = _args(["study", "--plan", "--replicates", "1"])
    assert run(args) == 2
    assert "bayesbase: error:" in capsys.readouterr().err
