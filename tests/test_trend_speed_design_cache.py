"""The compiled drift pass reuses the per-node quantities that depend on the design only
(specimen times, variances, priors) while consecutive series share them, and reads one shared
row when the times are broadcast from one row and ``r`` / ``extra_var`` are not given. These
paths are checked against the plain per-series computation of ``test_trend`` (scipy's
multivariate normal, numpy.linalg, scipy.optimize.brentq), with the design changing between,
and back to, shared designs."""
from __future__ import annotations

import numpy as np
import pytest

from bayesbase.model.trend import trend_exact
from test_trend import _reference_series


@pytest.fixture
def compiled(monkeypatch):
    """Force the numba loops (a declared dependency) for this small job."""
    from bayesbase.model import trend

    assert trend._kernels(10**9)
    monkeypatch.setattr(trend, "_kernels", lambda size=None: trend._K)


def _invented(rng, n):
    """Invented annual series on one shared schedule (broadcast times): flat, rising, falling
    and steep ones, with creatinine-like demo values and both population limits."""
    times = np.broadcast_to(np.arange(6.0), (n, 6))
    slope = rng.choice([0.0, 0.05, -0.08, 0.35, -0.5], n)
    y = np.log(90.0) + rng.normal(0, 0.2, (n, 1)) + slope[:, None] * (times - 2.5) + rng.normal(0, 0.08, (n, 6))
    return times, y


def _check(out, times, y, mu, sg, cvi, s, sa, sb, pi, lu, ll):
    checked, finite_years = 0, 0
    for i in np.nonzero(out["eligible"])[0]:
        ones, zeros = np.ones(times.shape[1]), np.zeros(times.shape[1])
        ref = _reference_series(times[i], y[i], ones, zeros, mu, sg[i], cvi[i], s[i], sa, sb[i], pi, lu, ll)
        for key, val in ref.items():
            tol = {"log_bf10": 1e-9 * max(1, abs(val)), "slope_lower": 1e-8, "slope_upper": 1e-8}.get(key, 1e-9)
            if key.startswith("years"):
                tol = 1e-6  # the solver's tolerance is 1e-7 years
                finite_years += bool(np.isfinite(val))
            got = out[key][i]
            assert (np.isinf(got) and np.isinf(val)) or abs(got - val) <= tol, (key, i, got, val)
        checked += 1
    return checked, finite_years


def test_shared_design_rows_match_plain_reference(compiled):
    """Runs of series sharing a design, broken by changes of the priors (sG, sB, CVI and its
    uncertainty) and by missing specimens (a new design), then back: every output equals the
    plain per-series computation (tolerances as in test_trend: 1e-9 probabilities, 1e-8 slope
    limits, 1e-6 years)."""
    rng = np.random.default_rng(20263)
    n = 36
    times, y = _invented(rng, n)
    y = y.copy()
    y[[9, 10, 22], [1, 4, 0]] = np.nan  # missing specimens: these series have their own design
    sg = np.where(np.arange(n) // 6 % 2 == 0, 0.2, 0.3)  # the prior changes every 6 series
    sb = np.where(np.arange(n) // 12 == 1, 0.05, 0.1)
    cvi = np.where(np.arange(n) >= 30, 0.15, 0.1)
    s = np.where(np.arange(n) >= 33, 0.0, 0.2)
    mu, sa, pi, lu, ll = np.log(90.0), 0.03, 0.2, np.log(159.0), np.log(44.0)
    out = trend_exact(times, y, None, None, mu, sg, cvi, s, sa, sb, prior_drift=pi, limit_upper=lu,
                      limit_lower=ll, nodes=16)
    checked, finite_years = _check(out, times, y, mu, sg, cvi, s, sa, sb, pi, lu, ll)
    assert checked == n
    assert finite_years >= 10  # the time-to-limit solver is exercised, not only its +inf answer
    assert set(out["limit_side"]) == {"upper", "lower"}


def test_bulk_scoring_on_shared_rows_keeps_scores_and_leaves_limits_nan(compiled):
    """intervals=False on the shared-row path: the scores equal the full run's bit for bit (the
    same compiled pass) and every quantile output is NaN with no limit side, as trend_exact
    documents."""
    rng = np.random.default_rng(20264)
    times, y = _invented(rng, 12)
    args = (times, y, None, None, np.log(90.0), 0.2, 0.1, 0.2, 0.03, 0.1)
    kw = dict(limit_upper=np.log(159.0), limit_lower=np.log(44.0), nodes=16)
    full = trend_exact(*args, **kw)
    bulk = trend_exact(*args, intervals=False, **kw)
    for key in ("log_bf10", "p_drift", "bf10", "p_increase", "slope_mean", "slope_sd", "pct_per_year_mean",
                "pct_per_year_avg_mean"):
        assert np.array_equal(full[key], bulk[key]), key
    for key in ("slope_lower", "slope_upper", "pct_per_year_lower", "pct_per_year_avg_upper", "years_to_limit",
                "years_to_limit_lower", "p_beyond_limit", "theta_last_mean"):
        assert np.all(np.isnan(bulk[key])), key
    assert np.all(bulk["limit_side"] == "")
