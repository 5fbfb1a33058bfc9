"""Simulation-based calibration of a reduced calibration model, and parameter recovery over
seeded replicates (issue 15, item 5; slow tier).

Outside references named beside each check:
* simulation-based calibration (SBC; Talts S, Betancourt M, Simpson D, Vehtari A, Gelman A,
  "Validating Bayesian inference algorithms with simulation-based calibration", arXiv:1804.06788,
  2018): when the data are simulated from parameters drawn from the prior, the rank of the prior
  draw among L (thinned) posterior draws is uniform on 0..L; uniformity checked with Pearson's
  chi-square test, ``scipy.stats.chisquare``;
* ``scipy.stats.binom``: the bands in which the number of credible intervals covering the truth
  over seeded replicates must fall;
* the data come from ``bayesbase.calibrate.simulate.simulate_store`` (written apart from the
  PyMC model), the prior draws from the PyMC model itself (``pm.sample_prior_predictive``).

The reduced model is built with the CVI layer integrated out by quadrature
(``cvi="quadrature"``), so its free parameters are exactly the four checked.

Affordable: one model is compiled per test and reused for every replicate. Each replicate's
layout is built into a fresh (uncompiled) model by ``model.build_model``, whose data containers
(``pm.Data``) are copied into the compiled one with ``pm.set_data``; one NUTS step object (its
compiled log density and gradient) serves every fit. This needs every data-dependent array of
the density to be a data container: the animals' sufficient statistics were numpy constants
before (the reason ``pm.set_data`` did not reach the compiled density), now ``stat_*``
containers. The transfer checks that the compiled density equals a fresh model's.
"""
from __future__ import annotations

import logging
import math
import warnings

import numpy as np
import pytest

SBC_REPLICATES = 40  # fits; 5 rank bins -> 8 expected per bin (chi-square rule of thumb >= 5)
SBC_BINS = 5
L_DRAWS = 99  # thinned posterior draws per fit: ranks 0..99, 20 rank values per bin
SBC_PARAMS = ("mu", "sigma_g", "ln_cvi_median", "cvi_log_sd")
SBC_ALPHA = 1e-3  # per parameter; 4 parameters: family-wise about 0.004 (Bonferroni)


@pytest.fixture(autouse=True)
def _quiet():
    lg = logging.getLogger("pymc")
    level = lg.level
    lg.setLevel(logging.ERROR)
    yield
    lg.setLevel(level)


def _layout(frame, pack, age=True):
    """The layout ``calibrate`` fits (age term for the pack's age-dependent analytes unless ``age``
    is False)."""
    from bayesbase.calibrate.core import age_analytes, prepare, reference_methods, select_specimens

    sel = select_specimens(frame, "dog", pack)
    return prepare(sel.usable, reference_methods(sel.usable), age_analytes(pack, sel.analytes) if age else ())


class Reused:
    """One compiled model and NUTS step, refilled with each replicate's data."""

    def __init__(self, data, pri):
        import pymc as pm

        import bayesbase.mcmc.engine  # noqa: F401  (reads PyTensor's BLAS flag once, its notice silenced)
        from bayesbase.calibrate import model as M

        self.pri, self.M, self.pm = pri, M, pm
        self.model = M.build_model(data, pri, cvi="quadrature")
        self.step = pm.NUTS(model=self.model, target_accept=0.9)
        self.logp = self.model.compile_logp()
        self.checked = False

    def set(self, data) -> None:
        fresh = self.M.build_model(data, self.pri, cvi="quadrature")  # graph only, not compiled
        assert {k: list(v) for k, v in fresh.coords.items()} == {k: list(v) for k, v in self.model.coords.items()}
        values = {v.name: v.get_value() for v in fresh.data_vars}
        assert set(values) == {v.name for v in self.model.data_vars}
        self.pm.set_data(values, model=self.model)
        if not self.checked:  # once (a compile): the new data reach the compiled density
            ip = fresh.initial_point()
            assert self.logp(ip) == pytest.approx(fresh.compile_logp()(ip), rel=1e-10)
            self.checked = True

    def sample(self, draws, tune, seed, var_names=None):
        return self.pm.sample(draws=draws, tune=tune, chains=2, cores=1, step=self.step, random_seed=seed,
                              progressbar=False, model=self.model, var_names=var_names,
                              compute_convergence_checks=False, return_inferencedata=True)


def _reduced_truth(draw: dict, cva: float):
    from bayesbase.calibrate.simulate import Truth

    return Truth("creatinine", "umol/L", math.exp(draw["mu"]), math.sqrt(math.expm1(draw["sigma_g"] ** 2)),
                 math.exp(draw["ln_cvi_median"]), draw["cvi_log_sd"], cva, 0.0, {"beagle": 0.0})


def _reduced_store(truth, seed: int):
    """8 dogs x 3 specimens, one breed, one method, no replicates."""
    from bayesbase.calibrate.simulate import simulate_store

    return simulate_store(seed=seed, n_animals=8, n_specimens=3, truths={"creatinine": truth}, p_method_b=0.0)[0]


def _uniform(ranks) -> tuple[list[int], float]:
    from scipy import stats

    counts = np.bincount(np.asarray(ranks) * SBC_BINS // (L_DRAWS + 1), minlength=SBC_BINS)
    return counts.tolist(), float(stats.chisquare(counts).pvalue)


@pytest.mark.slow
def test_sbc_ranks_of_a_reduced_model_are_uniform():
    """SBC (Talts et al. 2018) of the reduced model (creatinine, dog pack priors; one breed, one
    method, CVA fixed at the pack's; free: mu, sigma_g, ln_cvi_median, cvi_log_sd; the animals'
    CVIs and set points integrated out): 40 prior draws, 8 dogs x 3 specimens each, 2 chains x
    100 draws thinned to 99. Per parameter the 40 ranks in 5 bins pass Pearson's chi-square test
    (scipy.stats.chisquare, 4 df) at p > 0.001; the central 50 % intervals cover the truth a
    number of times inside the 99 % band of Binomial(40, 0.5) (scipy.stats.binom: 12-28), a
    two-sided check of the interval width. Control (the checks can fail): the ranks of mu + one
    posterior SD, i.e. a posterior shifted by one SD, fail the chi-square test."""
    import pymc as pm
    from scipy import stats

    from bayesbase.calibrate import model as M
    from bayesbase.priors import load_pack

    pack = load_pack("dog")
    cva = pack.analytes["creatinine"].cva
    start = _layout(_reduced_store(_reduced_truth({"mu": 4.5, "sigma_g": 0.2, "ln_cvi_median": -2.5,
                                                   "cvi_log_sd": 0.2}, cva), seed=0), pack, age=False)
    assert start.age_analytes == [] and not start.bias_pairs and len(start.breed_pairs) == 1
    run = Reused(start, M.prior_values(pack, start.analytes))
    assert {v.name for v in run.model.free_RVs} == set(SBC_PARAMS)  # the reduced model
    with run.model, warnings.catch_warnings():
        # the model's Potentials are its likelihood terms: leaving them out is what a prior draw is
        warnings.filterwarnings("ignore", message="The effect of Potentials")
        prior = pm.sample_prior_predictive(draws=SBC_REPLICATES, random_seed=2026, var_names=list(SBC_PARAMS))
    draws = {k: np.ravel(prior.prior[k].values) for k in SBC_PARAMS}
    ranks = {k: [] for k in SBC_PARAMS}
    covered = {k: 0 for k in SBC_PARAMS}
    shifted, divergences = [], 0
    for i in range(SBC_REPLICATES):
        one = {k: float(v[i]) for k, v in draws.items()}
        run.set(_layout(_reduced_store(_reduced_truth(one, cva), seed=100 + i), pack, age=False))
        idata = run.sample(draws=100, tune=200, seed=i, var_names=list(SBC_PARAMS))
        divergences += int(idata.sample_stats["diverging"].values.sum())
        for k in SBC_PARAMS:
            x = np.ravel(idata.posterior[k].values)[::2][:L_DRAWS]
            ranks[k].append(int(np.sum(x < one[k])))
            lo, hi = np.quantile(x, [0.25, 0.75])
            covered[k] += bool(lo <= one[k] <= hi)
            if k == "mu":
                shifted.append(int(np.sum(x < one[k] + np.std(x))))
    lo50, hi50 = stats.binom.interval(0.99, SBC_REPLICATES, 0.5)
    report = {k: (_uniform(r), covered[k]) for k, r in ranks.items()}
    print(f"SBC: {SBC_REPLICATES} fits, {divergences} divergences; per parameter (rank counts in {SBC_BINS} bins, "
          f"chi-square p), 50 % intervals covering: {report}")
    for k in SBC_PARAMS:
        (counts, p), cov = report[k]
        assert p > SBC_ALPHA, (k, counts, p)
        assert lo50 <= cov <= hi50, (k, cov, (lo50, hi50))
    counts, p = _uniform(shifted)
    assert p < SBC_ALPHA, ("a shifted posterior passed the rank test", counts, p)


RECOVERY_REPLICATES = 6  # each fit ~20 CPU-s here (PyMC NUTS, 60 dogs): 6 keep the file near 4 CPU-minutes
#: what summary_table reads, and the free parameters (diagnostics)
_TRACED = ("center", "cvg", "cvi", "cvi_log_sd", "breed_center_all", "method_bias", "age_slope")


@pytest.mark.slow
def test_parameter_recovery_over_seeded_replicates():
    """6 invented stores (simulate_store's DEMO_TRUTH creatinine: breed offsets -15 %/0/+12 %,
    analyser B +8 % on 30 % of specimens, CVI median 9 %, ln-SD 0.35), 60 dogs x 4 specimens,
    2 chains x 150 draws after 150 tuning steps, the model and summaries of ``calibrate`` (age
    term on: the pack marks creatinine age-dependent). Each 95 % credible interval (3 breed
    centres, the method bias, the CVI median and its spread) covers the truth in at least the
    lower end of the 99 % band of Binomial(6, 0.95) (scipy.stats.binom), and the 36 intervals
    pooled at least the lower end of the 99 % band of Binomial(36, 0.95) (the intervals of one
    store are not independent: a loose check; both bands end at n, so only under-coverage can
    fail them; the SBC above checks the widths)."""
    from scipy import stats

    from bayesbase.calibrate import model as M
    from bayesbase.calibrate.job import summary_table
    from bayesbase.calibrate.simulate import simulate_store
    from bayesbase.priors import load_pack

    pack = load_pack("dog")
    run = None
    hits: dict = {}
    max_rhat = 0.0
    for i in range(RECOVERY_REPLICATES):
        frame, truth = simulate_store(seed=500 + i, n_animals=60, n_specimens=4)
        data = _layout(frame, pack)
        if run is None:
            run = Reused(data, M.prior_values(pack, data.analytes))
        run.set(data)
        idata = run.sample(draws=150, tune=150, seed=i,
                           var_names=list(dict.fromkeys([*_TRACED, *(v.name for v in run.model.free_RVs)])))
        max_rhat = max(max_rhat, M.diagnostics(idata, 1.01, 400)["max_r_hat"])
        t = summary_table(idata, data, pack).set_index(["parameter", "group"])
        tr = truth["creatinine"]
        want = {("cvi", ""): tr.cvi_median, ("cvi_log_sd", ""): tr.cvi_log_sd,
                ("method_bias", "demo analyser B"): tr.method_bias}
        want.update({("breed_center", b): tr.breed_center(b) for b in tr.breed_log_offsets})
        for key, value in want.items():
            r = t.loc[key]
            hits.setdefault(key, []).append(bool(r["lower"] <= value <= r["upper"]))
    print(f"recovery: {RECOVERY_REPLICATES} stores, max R-hat {max_rhat:.3f}; covered per parameter: "
          f"{ {k: sum(h) for k, h in hits.items()} }")
    assert max_rhat < 1.1  # a sanity gate on short chains, not the product's convergence rule
    lo_each = stats.binom.interval(0.99, RECOVERY_REPLICATES, 0.95)[0]
    for key, h in hits.items():
        assert sum(h) >= lo_each, (key, h)
    n_all = sum(len(h) for h in hits.values())
    lo, hi = stats.binom.interval(0.99, n_all, 0.95)
    assert lo <= sum(sum(h) for h in hits.values()) <= hi
