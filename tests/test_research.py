"""Tests of bayesbase.research (method comparison by simulation).

External references used below:
- binomial sampling bands: scipy.stats.binom (general-purpose reference library);
- the exact false-alarm rate of each rule under the log-normal model is derived from the normal
  distribution (scipy.stats.norm): with known CVs, y_new - y_last ~ N(0, 2 sT^2) for the RCV vs
  the last baseline (Fraser CG, Clin Chem Lab Med 2012;50:807; Fokkema MR et al., Clin Chem
  2006;52:1602), y_new - mean ~ N(0, sT^2 (1 + 1/n)) for model 2 (Coskun A et al., Clin Chem
  2021;67:374), and the PEB predictive is exact at every n (McIntosh MW & Urban N,
  Biostatistics 2003;4:27-40);
- Mann-Whitney U: scipy.stats.mannwhitneyu; Wilson interval: statsmodels proportion_confint;
- index of individuality rule of thumb (II = CVI/CVG < 0.6: population limits of little use
  for one individual; > 1.4: useful): Fraser CG & Harris EK, Crit Rev Clin Lab Sci
  1989;27:409-437.

All simulations are seeded (numpy default_rng); sizes are small (<= 40,000 animals).
"""
from __future__ import annotations

import dataclasses
import math
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from bayesbase.research import compare as research
from bayesbase.classical import model2_interval_log, rcv_classical
from bayesbase.constants import CAUTIONS
from bayesbase.model.engine import exact_assess
from bayesbase.priors import load_pack

N_ANIMALS = 40_000
SEED = 20261  # constant seed for this test module


@pytest.fixture(scope="module")
def pack():
    return load_pack("dog")


@pytest.fixture(scope="module")
def model_run():
    """Model true, the dog pack's creatinine and ALT, n = 0, 1, 3, shifts 0, 10, 30 %."""
    return research.compare(
        species="dog", analytes=("creatinine", "alt"), baselines=(0, 1, 3), shifts=(0, 10, 30),
        animals=N_ANIMALS, seed=SEED, scenarios=("model",),
    )


def _rows(comp, **kw) -> pd.DataFrame:
    t = comp.table
    for k, v in kw.items():
        t = t[t[k] == v]
    return t


def _band(p0: float, n: int, level: float = 0.99) -> tuple[float, float]:
    """Central binomial band of the observed rate when the true rate is p0 (scipy.stats.binom)."""
    lo, hi = stats.binom.interval(level, n, p0)
    return lo / n, hi / n


def _rate(comp, analyte, method, n, shift=0.0, scenario="model") -> float:
    r = _rows(comp, scenario=scenario, analyte=analyte, method=method, n_baseline=n, shift_pct=shift)
    assert len(r) == 1
    return float(r["positive_rate"].iloc[0])


# --------------------------------------------------------------------------- false alarms

@pytest.mark.parametrize("analyte", ["creatinine", "alt"])
def test_false_alarm_rates_at_nominal_level_under_model(model_run, analyte):
    """Exact nominal 5 % rules under the model: population (model-implied interval), log-normal
    RCV vs last, model 2 and PEB, each inside its binomial 99 % band."""
    lo, hi = _band(0.05, N_ANIMALS)
    checks = [("population", n) for n in (0, 1, 3)] + [("peb", n) for n in (0, 1, 3)]
    checks += [(m, n) for m in ("rcv_lognormal", "model2") for n in (1, 3)]
    for m, n in checks:
        r = _rate(model_run, analyte, m, n)
        assert lo <= r <= hi, f"{analyte} {m} n={n}: false-alarm rate {r:.4f} outside [{lo:.4f}, {hi:.4f}]"


@pytest.mark.parametrize("analyte", ["creatinine", "alt"])
def test_classical_rcv_false_alarm_matches_its_exact_rate(model_run, pack, analyte):
    """The symmetric classical RCV on the result scale is not exactly 5 % under a log-normal
    model: P(|exp(d) - 1| > RCV) with d ~ N(0, 2 sT^2) (scipy.stats.norm); the simulated rate
    sits in the binomial 99 % band of that exact value."""
    a = pack.analytes[analyte]
    rcv = float(rcv_classical(a.cva, a.cvi))
    sd = math.sqrt(2.0 * (a.si**2 + a.sa**2))
    p_exact = stats.norm.sf(math.log1p(rcv) / sd) + stats.norm.cdf(math.log1p(-rcv) / sd)
    lo, hi = _band(p_exact, N_ANIMALS)
    r = _rate(model_run, analyte, "rcv_last", 1)
    assert lo <= r <= hi, (analyte, r, p_exact)
    # classical RCV vs the mean, applied unchanged, is conservative for n > 1: exact rate with
    # the mean's own variance, d ~ N(0, sT^2 (1 + 1/n)) to first order (geometric ~ arithmetic)
    sd3 = math.sqrt((a.si**2 + a.sa**2) * (1 + 1 / 3))
    p3 = stats.norm.sf(math.log1p(rcv) / sd3) + stats.norm.cdf(math.log1p(-rcv) / sd3)
    r3 = _rate(model_run, analyte, "rcv_mean", 3)
    assert r3 < 0.05 and abs(r3 - p3) < 0.01, (analyte, r3, p3)


def test_bayes_interval_false_alarm_when_its_model_holds(pack):
    """Bayesian personal interval at 5 %: (a) scenario 'heterogeneous' draws each animal's CVI
    with ln-SD 0.3 around the pack value, which is exactly the engine's prior when cvi_log_sd is
    set to 0.3; (b) with cvi_log_sd = 0 and the model true. Both inside the
    binomial 99 % band."""
    # the engine's CVI uncertainty set to the simulated spread (the pack's own value now comes
    # from the study evidence and differs)
    spec_h = dataclasses.replace(research.spec_from_pack(pack, "creatinine"), name="creatinine",
                                 cvi_log_sd=research.HETEROGENEITY_LOG_SD)
    n_an = 30_000
    lo, hi = _band(0.05, n_an)
    het = research.compare(analytes=(spec_h,), baselines=(1, 3), shifts=(0,), animals=n_an,
                           seed=SEED + 1, scenarios=("heterogeneous",))
    spec0 = dataclasses.replace(research.spec_from_pack(pack, "creatinine"), name="crea_known_cvi",
                                cvi_log_sd=0.0)
    known = research.compare(analytes=(spec0,), baselines=(1, 3), shifts=(0,), animals=n_an,
                             seed=SEED + 2, scenarios=("model",))
    for comp, scen, name in ((het, "heterogeneous", "creatinine"), (known, "model", "crea_known_cvi")):
        for n in (1, 3):
            r = _rate(comp, name, "bayes_pi", n, scenario=scen)
            assert lo <= r <= hi, f"{scen} n={n}: {r:.4f} outside [{lo:.4f}, {hi:.4f}]"
    # and misspecification shows: the classical RCV is anti-conservative when CVI varies
    assert _rate(het, "creatinine", "rcv_lognormal", 1, scenario="heterogeneous") > hi


# --------------------------------------------------------------------------- power

def test_bayes_sensitivity_at_matched_specificity_not_below_rcv(model_run):
    """Under the model, the Bayesian rules detect at least as many shifts as the classical RCV
    (vs last and vs mean) at the same false-alarm rate, for n >= 1 and every non-zero shift.
    Monte Carlo slack: 3 standard errors of an unpaired difference of two proportions,
    3 sqrt(2 * 0.25 / N) = 0.011 at N = 40,000 (draws are shared, so the paired error is smaller)."""
    slack = 3.0 * math.sqrt(2 * 0.25 / N_ANIMALS)
    t = model_run.table
    for analyte in ("creatinine", "alt"):
        for n in (1, 3):
            for s in (10.0, 30.0):
                sub = t[(t.analyte == analyte) & (t.n_baseline == n) & (t.shift_pct == s)]
                sens = sub.set_index("method")["sensitivity_matched"]
                for bayes in ("bayes_pi", "bayes_pchange"):
                    for rcv in ("rcv_last", "rcv_mean", "rcv_lognormal"):
                        assert sens[bayes] >= sens[rcv] - slack, (analyte, n, s, bayes, rcv, sens.to_dict())
    # matched false-alarm rate is alpha for every defined method
    d = t[t.defined & (t.shift_pct == 0)]
    assert np.allclose(d["matched_fpr"], 0.05, atol=2.0 / N_ANIMALS)
    assert np.allclose(d["sensitivity_matched"], d["matched_fpr"])


def test_sensitivity_grows_with_shift_and_baselines(model_run):
    """Sanity of the design, not a number: for the personal methods sensitivity rises with the
    shift, and the Bayesian interval gains from n = 1 to n = 3 (creatinine, CVI << CVG)."""
    t = model_run.table
    for m in ("bayes_pi", "peb", "model2"):
        s = t[(t.analyte == "creatinine") & (t.method == m) & (t.n_baseline == 3)].sort_values("shift_pct")
        assert np.all(np.diff(s["sensitivity_matched"].to_numpy()) > 0)
    s1 = _rows(model_run, analyte="creatinine", method="bayes_pi", n_baseline=1, shift_pct=30.0)
    s3 = _rows(model_run, analyte="creatinine", method="bayes_pi", n_baseline=3, shift_pct=30.0)
    assert float(s3.sensitivity_matched.iloc[0]) > float(s1.sensitivity_matched.iloc[0]) + 0.05


# --------------------------------------------------------------------------- PEB = Bayes at s = 0

def test_peb_and_bayesian_interval_coincide_without_cvi_uncertainty(pack):
    """With cvi_log_sd = 0 the engine's personal interval is the PEB rule (McIntosh & Urban
    2003): the same draws give the same decisions (>= 99.9 % agreement), the engine percentile
    equals the PEB predictive CDF from its closed form, and the rates agree within MC error."""
    spec = dataclasses.replace(research.spec_from_pack(pack, "alt"), name="alt0", cvi_log_sd=0.0)
    m = 20_000
    y = research._simulate(spec, "model", research._draws(SEED, "alt0", 0, m, 3))
    for n in (0, 1, 3):
        for s in (0.0, 30.0):
            base, new = y[:, :n], y[:, 3] + math.log1p(s / 100)
            z, peb_out = research.peb_score(base, new, math.log(spec.center), spec.sg,
                                            math.hypot(spec.si, spec.sa))
            out = exact_assess(research._case_arrays(spec, base, new), nodes=1, intervals=False)
            pct = out["percentile"]
            bayes_out = (pct < 0.025) | (pct > 0.975)
            assert np.mean(bayes_out == peb_out) >= 0.999, (n, s)
            # closed-form PEB predictive CDF, signed: Phi((y - m) / sd); the engine's percentile
            b = spec.si**2 + spec.sa**2
            bb = b / (b + n * spec.sg**2)
            mean = bb * math.log(spec.center) + (1 - bb) * (base.mean(1) if n else 0.0)
            cdf = stats.norm.cdf((new - mean) / math.sqrt(b + bb * spec.sg**2))
            assert np.max(np.abs(cdf - pct)) < 1e-9
            assert np.allclose(np.abs(stats.norm.ppf(cdf)), z, atol=1e-6)
    comp = research.compare(analytes=(spec,), baselines=(0, 2), shifts=(0, 20), animals=m,
                            seed=SEED + 3)
    t = comp.table.set_index(["method", "n_baseline", "shift_pct"])
    se = math.sqrt(0.25 / m)
    for n in (0, 2):
        for s in (0.0, 20.0):
            assert abs(t.loc[("peb", n, s), "positive_rate"] - t.loc[("bayes_pi", n, s), "positive_rate"]) <= 3 * se
    # n = 0: PEB is the population rule exactly (same draws, same decisions)
    for s in (0.0, 20.0):
        assert t.loc[("peb", 0, s), "positives"] == t.loc[("population", 0, s), "positives"]


# --------------------------------------------------------------------------- II rule of thumb

def test_index_of_individuality_rule_of_thumb(pack):
    """Low II (dog creatinine CVI/CVG = 0.28 from the pack): the population interval's
    sensitivity to a 30 % shift is far below the personal methods'. High II (dog glucose,
    0.095 / 0.038 = 2.5 from the pack): the population interval is close to the best
    personal method (here: within 0.05; it even beats the RCV)."""
    assert pack.ii("creatinine") < 0.6 < 1.4 < pack.ii("glucose")
    comp = research.compare(analytes=("creatinine", "glucose"), baselines=(3,), shifts=(0, 30),
                            animals=30_000, seed=SEED + 4)
    t = comp.table[comp.table.shift_pct == 30].set_index(["analyte", "method"])["sensitivity_matched"]
    low_pop, low_bayes = t[("creatinine", "population")], t[("creatinine", "bayes_pi")]
    high_pop, high_bayes = t[("glucose", "population")], t[("glucose", "bayes_pi")]
    msg = (f"creatinine pop {low_pop:.3f} vs bayes {low_bayes:.3f}; "
           f"glucose pop {high_pop:.3f} vs bayes {high_bayes:.3f}")
    assert low_pop < 0.3 * low_bayes, msg
    for m in ("peb", "model2", "rcv_mean"):
        assert low_pop < 0.3 * t[("creatinine", m)], msg
    assert high_bayes - high_pop < 0.05, msg
    assert (high_bayes - high_pop) < 0.2 * (low_bayes - low_pop), msg
    assert high_pop > t[("glucose", "rcv_last")], msg
    assert "index of individuality" in comp.summary_text


# --------------------------------------------------------------------------- kernels

def test_auc_equals_scipy_mann_whitney():
    rng = np.random.default_rng(5)
    h = np.round(rng.normal(size=700), 1)  # rounding makes ties
    x = np.round(rng.normal(0.4, 1.0, size=500), 1)
    ref = stats.mannwhitneyu(x, h).statistic / (x.size * h.size)
    assert research.mann_whitney_auc(np.sort(h), x) == pytest.approx(ref, abs=1e-12)


def test_wilson_interval_matches_statsmodels():
    from statsmodels.stats.proportion import proportion_confint

    lo, hi = research._wilson(37, 1000)
    ref = proportion_confint(37, 1000, alpha=0.05, method="wilson")
    assert (lo, hi) == pytest.approx(ref, abs=1e-10)


def test_vectorised_model2_decisions_match_the_kernel(pack):
    """The simulator's model-2 decisions equal classical.model2_interval called per animal."""
    spec = research.spec_from_pack(pack, "alt")
    y = research._simulate(spec, "model", research._draws(SEED, "alt", 0, 300, 3))
    for n in (1, 3):
        cuts = research._cuts(spec, n, 0.95, 0.5)
        stat, dec = research._score(spec, y[:, :n], y[:, 3] + 0.3, cuts, 0.95, 0.5, 1)
        ref = []
        for i in range(y.shape[0]):
            lo, hi = model2_interval_log(np.exp(y[i, :n]), spec.cva, spec.cvi)
            x = math.exp(y[i, 3] + 0.3)
            ref.append(x < lo or x > hi)
        assert np.array_equal(dec["model2"], np.array(ref))
        # each nominal decision is its statistic above the threshold column
        for m in ("population", "rcv_lognormal", "model2", "peb", "bayes_pi", "bayes_pchange"):
            assert np.array_equal(dec[m], stat[m] > cuts[m]), m


def test_simulator_quadrature_nodes_are_accurate(pack):
    """SIM_QUAD_NODES against 64 nodes (Gauss-Hermite converges fast in the node count; 64
    agrees with 32 to ~1e-7 here): percentile within 1e-5 and P(change) within 1e-4 on simulated
    creatinine and ALT cases (ALT has the widest CVI uncertainty of the dog pack) with and
    without a shift."""
    for a in ("creatinine", "alt"):
        spec = research.spec_from_pack(pack, a)
        y = research._simulate(spec, "model", research._draws(SEED, a, 0, 5000, 3))
        for s in (0.0, 0.3):
            ca = research._case_arrays(spec, y[:, :3], y[:, 3] + s)
            o1 = exact_assess(ca, nodes=research.SIM_QUAD_NODES, intervals=False)
            o2 = exact_assess(ca, nodes=64, intervals=False)
            assert np.max(np.abs(o1["percentile"] - o2["percentile"])) < 1e-5
            assert np.max(np.abs(o1["p_change"] - o2["p_change"])) < 1e-4


def test_scenarios_change_the_truth_only(pack):
    """Within-animal SD of the simulated results per scenario (log scale), against the CV it
    should have: sigma = sqrt(ln(1 + CV^2)); heavy tails keep the SD (t with 4 df scaled by
    sqrt(2)), within a loose tolerance because its fourth moment is infinite."""
    spec = research.spec_from_pack(pack, "alt")
    d = research._draws(SEED, "alt", 0, 40_000, 3, heavy=True)

    def within_sd(scen):
        y = research._simulate(spec, scen, d)
        return float(np.sqrt(np.mean(np.var(y[:, :3], axis=1, ddof=1))))

    sa = spec.sa
    want = {"model": math.hypot(spec.si, sa),
            "cvi_half": math.hypot(math.sqrt(math.log1p((spec.cvi / 2) ** 2)), sa),
            "cvi_double": math.hypot(math.sqrt(math.log1p((2 * spec.cvi) ** 2)), sa),
            "cva_high": math.hypot(spec.si, math.sqrt(math.log1p((2 * spec.cva) ** 2)))}
    for scen, w in want.items():
        assert within_sd(scen) == pytest.approx(w, rel=0.01), scen
    assert within_sd("heavy_tails") == pytest.approx(want["model"], rel=0.05)
    with pytest.raises(ValueError, match="unknown scenario 'nope'"):
        research.compare(analytes=(spec,), scenarios=("nope",), animals=200)


# --------------------------------------------------------------------------- outputs

class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[str] = []
        self.urls: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            if k in ("src", "href", "action") and v is not None:
                self.urls.append(v)

    def handle_data(self, data):
        self.text.append(data)


def test_outputs_table_dataset_and_files(tmp_path, pack):
    spec = dataclasses.replace(research.spec_from_pack(pack, "creatinine"), name="crea_demo",
                               source="invented demo <script>alert(1)</script>")
    calls = []
    comp = research.compare(analytes=(spec, "alt"), baselines=(0, 1, 2), shifts=(0, 20),
                            animals=3000, seed=SEED + 5, scenarios=("model", "cvi_double"),
                            progress=lambda d, t: calls.append((d, t)))
    assert calls and calls[-1][0] == calls[-1][1]
    assert [c[0] for c in calls] == list(range(1, len(calls) + 1))
    required = {"scenario", "analyte", "method", "n_baseline", "shift_pct", "positive_rate", "lower",
                "upper", "threshold", "matched_fpr", "sensitivity_matched", "auc"}
    assert required <= set(comp.table.columns)
    assert len(comp.table) == 2 * 2 * len(research.METHODS) * 3 * 2
    n0 = comp.table[(comp.table.n_baseline == 0) & comp.table.method.isin(research.NEEDS_BASELINE)]
    assert n0["positive_rate"].isna().all() and (~n0["defined"]).all()
    assert {"scenario", "analyte", "method", "n_baseline", "shift_pct", "fpr", "tpr"} <= set(comp.roc.columns)
    ds = comp.dataset
    assert set(ds["positive_rate"].dims) == {"scenario", "analyte", "method", "n_baseline", "shift_pct"}
    assert "sample" not in ds.dims and "ci_bound" in ds["positive_rate_ci"].dims
    assert comp.attrs["pack_sha256"] == pack.sha256 and comp.attrs["seed"] == SEED + 5
    assert comp.summary_text and "cvi_double" in comp.summary_text

    paths = research.write_outputs(comp, tmp_path / "out")
    names = {p.name for p in paths}
    assert {"comparison.csv", "roc.csv", "summary.html"} <= names
    csv = pd.read_csv(tmp_path / "out" / "comparison.csv")
    assert required <= set(csv.columns) and len(csv) == len(comp.table)
    pngs = [p for p in paths if p.suffix == ".png"]
    assert len(pngs) == 2 * 2 * 3
    for p in pngs:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    raw = (tmp_path / "out" / "summary.html").read_text(encoding="utf-8")
    parser = _Collect()
    parser.feed(raw)
    assert "script" not in parser.tags
    assert parser.urls and all(u.startswith("data:image/png;base64,") for u in parser.urls)
    assert "http://" not in raw and "https://" not in raw and "src=\"//" not in raw
    text = " ".join(parser.text)
    for c in CAUTIONS:
        assert c in text
    assert "<script>alert(1)</script>" in text  # shown escaped, as text
