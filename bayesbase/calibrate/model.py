"""The hierarchical calibration model in PyMC (the one module of ``calibrate`` that imports
PyMC, PyTensor and ArviZ, each inside a function).

Model, natural-log scale, every analyte a in one graph (parameters carry an ``analyte`` dim)::

    y[j]          mean ln value of specimen j of animal i (cell c = (a, i)), n_j replicates
    y[j]          = theta[c] + bias[a, method_j] + s[j] + e[j]
    theta[c]      ~ Normal(mu[a] + breed_offset[a, breed_i], sigma_g[a])     set points (CVG)
    breed centre  c[a, b] = mu[a] + breed_offset[a, b] ~ Normal(mu[a], breed_sd[a])
                  (centred for a breed with >= CENTRED_MIN_ANIMALS animals, else non-centred)
    bias[a, m]    ~ Normal(0, method_sd[a]); the reference method's bias is 0 (centred: see below)
    ln CVI[c]     = ln_cvi_median[a] + cvi_log_sd[a] * eta[c],  eta ~ Normal(0, 1)  (integrated out)
    s[j]          ~ Normal(0, sigma_i[c]),  sigma_i = sqrt(ln(1 + CVI[c]^2))   (CVI)
    e[j, k]       ~ Normal(0, sigma_a[a])                                        (CVA)

Optional age term (analytes in ``data.age_analytes``: by default those the pack marks
``age_dependent``, when birth dates exist; :mod:`bayesbase.calibrate.core`): specimen j's ln
value is shifted by age_log_slope[a] * x[j], x = age at collection - the analyte's reference
(median) age, so theta is the set point at the reference age; age_log_slope ~ Normal(0, sigma_g
pack / :data:`AGE_SLOPE_YEARS`) per year. A specimen without a birth date has x = 0.

``cvi_log_sd`` is the SD of ln CVI across animals: the engine's CVI uncertainty. CVA is learned
from the within-specimen replicates of an analyte that has any, else fixed at the pack's value
(without replicates CVA and CVI are not told apart; only sigma_i^2 + sigma_a^2 is).

Exact marginalisations (no approximation): the replicates of a specimen enter through their mean
and within-specimen sum of squares (as in ``bayesbase.study.bayes``), and the set points theta are
integrated out: the specimen means of one cell are multivariate normal with mean
mu + breed_offset + bias and covariance diag(v) + sigma_g^2 J, v_j = sigma_i^2 + sigma_a^2 / n_j,
whose log density follows from the matrix determinant lemma and Sherman-Morrison with sums over
the cell's specimens. When the specimens of a cell have equal replicate counts (v constant in the
cell) those sums reduce to the animal's sufficient statistics: its number of specimens m, their
mean, their sum of squares about it and, per non-reference method, a count and a sum of
deviations (:func:`animal_stats`, ``likelihood="animal_stats"``; the default ``auto`` takes
them whenever they apply). ``tests/test_calibrate.py`` checks both forms against scipy's
multivariate normal, and the marginal against a numerical integral over the set point
(scipy.integrate.quad).

Location parameters integrated out (``locations="marginal"``, the default ``auto`` wherever it
is exact; :data:`LOCATIONS`). Given the scales (sigma_g, each cell's sigma_i^2 from its latent
CVI, sigma_a, breed_sd, method_sd), every location parameter of an analyte, beta = (mu, the
offset of every breed level, the log bias of every non-reference method, the age slope), enters
the specimen means linearly with a normal prior of diagonal precision P, so it integrates out in
closed form: with y_c ~ N(X_c beta, Sigma_c), Sigma_c^-1 = w I - h w^2 J (w = 1 / v, h = sg2 /
(1 + sg2 m w)), A = sum_c X_c' Sigma_c^-1 X_c, b = sum_c X_c' Sigma_c^-1 y_c and yy = sum_c y_c'
Sigma_c^-1 y_c (y centred on the prior mean), log p(y | scales) = sum_c -0.5 (m ln 2pi + m ln v
+ ln(1 + sg2 m w)) - 0.5 (yy - b'(A + P)^-1 b) - 0.5 ln det(A + P) + 0.5 ln det P. A cell's
X_c'X_c, X_c'1 and X_c'y_c are data built once (:func:`location_design`; over the coordinates
(mu, methods, age) only, the cell's breed row put back in the graph), so a gradient costs a
handful of (cell x 2-4) products and one solve and log determinant of D x D (D = 1 + breed levels
+ method slots (+ 1 with age), at most about 12). No breed offset is sampled, so the funnel
between breed_sd and the offsets is gone; after sampling, beta is drawn for every draw from its
exact conditional N((A + P)^-1 b, (A + P)^-1) (:func:`draw_locations`, numpy.random.default_rng
of the fit's seed) under the sampled form's names and dims, and the gate checks those draws too.
Not with ``cvi="quadrature"`` (a cell's density is then a mixture of normals: no closed form)
nor the per-specimen likelihood: ``auto`` keeps the locations sampled there and ``marginal``
refuses. ``tests/test_calibrate_marginal.py`` checks the density against scipy's multivariate
normal of all specimen means with covariance blockdiag(Sigma_c) + X P^-1 X' (rel 1e-10), the
conditional against numpy.linalg.solve, and the posterior against the sampled form. Measured
2026-12-04 (nutpie 0.16.8 numba and PyMC 5.28, 4 chains x 1000 draws after 1000 tuning, process
CPU seconds on the shared 2-core machine, load in brackets), sampled -> marginal:

* invented 120-dog store (simulate_store seed 11, creatinine + alt, 3 breeds x 40), nutpie:
  divergences 14 (all alt) -> 0, max R-hat 1.0073 -> 1.0077, min bulk / tail ESS 874 / 565 ->
  1337 / 918, 15.0 leapfrog steps per draw either way, sampling 13.3 -> 9.2 s wall (load 5-7);
  PyMC: divergences 91 (alt) -> 0, max R-hat 1.0075 -> 1.0068, min bulk / tail ESS 666 / 234 ->
  1215 / 1466, 15 steps per draw, 60 -> 94 CPU s in all (PyMC's C backend runs the solve and
  log determinant as Python ops; load 4);
* bench store (500 dogs x 4 specimens), creatinine alone, nutpie, seeds 1 and 2: divergences
  35 and 53 -> 0 and 0, max R-hat 1.0074 / 1.0076 -> 1.0095 / 1.0081, min tail ESS 1292 / 458 ->
  1854 / 1795: converged only marginal; sampling 7.4 / 6.9 -> 13.4 / 14.1 CPU s (load 1-2), 15
  steps per draw either way, numba logp+gradient 46 -> 92 us; the same with PyMC, seed 1:
  divergences 115 -> 0, max R-hat 1.0199 (breed_sd) -> 1.0078, min bulk / tail ESS 200 / 38 ->
  1595 / 1884, 43.8 -> 70.4 CPU s (load 2-3). Extrapolated (not run) to the bench's 20 analytes
  of this size: 20 x 13.4-14.1 = 270-280 CPU s of nutpie sampling, about 140 s on 2 idle cores,
  plus one compile per structure (35-100 s wall measured): over the 60 s target, now by cost
  per gradient rather than convergence. Its first 4 analytes (creatinine,
  sdma, glucose, urea; through calibrate): seed 0: divergences 6 -> 0, but max R-hat 1.0065 ->
  1.0099 and min bulk / tail ESS 516 / 537 -> 346 / 263 (worst cvi_log_sd), neither converged;
  seed 1: divergences 19 -> 0, max R-hat 1.0085 -> 1.0067, min bulk / tail ESS 368 / 237 -> 594 /
  703, converged only marginal (sampling 22.8 -> 46.1 s wall, load 1.4-2.9). The latent CVI
  layer (cvi_log_sd against the cvi_z) is what is left between this store and the gate.

The animals' CVIs can be integrated out too, numerically (``cvi="quadrature"``; not yet the
default: see the measurements at the end of this paragraph): no
closed form exists for a log-normal scale mixture, so each cell's density is a Gauss-Hermite
sum over its CVI, logsumexp_k(ln w_k + logp_cell(v_k)), v_k = ln(1 + CVI_k^2) + sA^2 / n, with
the residual terms of the cell (its residual sum and sum of squares, which do not depend on v)
computed once and broadcast over the node axis. The nodes are adaptive (as adaptive
Gauss-Hermite quadrature in mixed models): with u = ln CVI ~ Normal(lm, s), lm = ln_cvi_median,
s = cvi_log_sd, and a normal approximation N(u_hat, 1 / p_hat) of what the cell's own specimens
say about u (:func:`cvi_node_design`, fixed data), the nodes sit at u_k = c + tau x_k with
tau^-2 = s^-2 + p_hat, c = tau^2 (lm / s^2 + p_hat u_hat), and weigh w_k tau N(u_k; lm, s) /
phi(x_k). With p_hat = 0 this is the plain quadrature of the exact engine (ln CVI_k = lm + s x_k);
when the specimens say much about an animal's CVI (a spread of 0.5 on ln CVI, 4+ specimens) the
plain nodes straddle a narrow peak, and the adaptive placement is what keeps the error small.
Measured per cell against scipy.integrate.quad over z (2-10 specimens, spreads 0.2-0.5, CVA
1-6 %, evaluated at and off the simulated truth): plain 24 nodes err up to 7e-3 (m = 4, spread
0.5), adaptive 24 nodes up to 4e-5 (mean 1e-6). :data:`CVI_NODES` = 24: the test checks the
density against scipy.integrate.quad (1e-6 per cell) and against 64 nodes. What is left per
analyte is about ten parameters and no per-animal funnel. ``cvi="latent"`` (the default) keeps
one non-centred eta per cell (``cvi_z``). Measured (2026-12-03, shared 2-core machine under load
5-15): one logp+gradient of the 500 x 20 x 4 store costs 56 ms with 24 nodes, 20 ms with 8 and
3.8 ms latent (PyTensor C backend, process CPU); on an invented 80-dog creatinine store the
quadrature form converged with seed 1 (R-hat 1.002, 0 divergences in 4,000 draws) and had 1
divergence with seed 2; on 30 dogs (the agreement test) it had 42 divergences where the latent
form had none. Until that is understood the latent form stays the default. No per-animal CVI is
reported by either form.

Parameterisation (benchmarks: ``bayesbase bench`` entries ``calibrate`` and ``calibrate_large``).
In the latent form the CVI layer is non-centred: each animal's 3-4 specimens say little about
its own CVI, the regime in which a non-centred layer has no funnel (but the 10,000 latent z's of
500 animals x 20 analytes made the sampler slow: the benchmark did not finish in 50 min as one
graph; no parameter is shared by two analytes, so :mod:`bayesbase.calibrate.split` fits the same
posterior one analyte at a time, by default, with one compiled graph per structure). Every
value of the graph (data, prior constants, breed flags, method levels, sufficient statistics)
is a data container (:func:`model_values`), so one compiled graph serves every analyte. The
breed layer is chosen per (analyte,
breed) level: a level with at least CENTRED_MIN_ANIMALS animals is centred (its ln centre is the
free parameter; the data pin it down, and a non-centred z = offset / breed_sd would lie on a
curved ridge against breed_sd: the suspected cause of the 37 divergences measured earlier with a
non-centred zero-sum layer on three breeds of 167 dogs each), a smaller level non-centred (a
breed of three dogs is mostly prior, where the centred form makes the funnel). mu is the mean of the breed-centre
distribution (no zero-sum constraint: the large breeds' centres are free parameters, so mu is
not traded against them along a ridge). The SDs learned from few groups (breed_sd, method_sd)
have boundary-avoiding Gamma(2) priors (:data:`SD_GAMMA_SHAPE`), so the sampler is not drawn
into the neck of a funnel at SD -> 0 that a single method bias per analyte cannot rule out.
Breed levels are shared by all analytes (an analyte with no result of a breed carries that
breed's centre from the prior only). Animals without a recorded breed form the level
``(unknown)``, which is never written into a pack. The method biases are centred: each rests on
many specimens, so the data pin it down and a non-centred bias would tie it to its SD in a
narrow ridge.

Cost per gradient (measured 2026-12-03, one analyte of the 500 x 20 x 4 benchmark store, 516
free parameters, latent form, process CPU time on the shared 2-core machine at load 5-11, the old
and new graph in two runs minutes apart): PyMC's parameter checks are off (``check_bounds=False``: every SD in
the graph is a positive prior constant or a log-transformed parameter, so a check can never
fail) and a one-analyte graph (a part of :mod:`bayesbase.calibrate.split`) broadcasts the
analyte's parameters as scalars instead of indexing them per cell (no scatter-add in the
gradient). Same density bit for bit (old and new graphs at random points, latent and
quadrature, parts and joint). nutpie's compiled numba logp+gradient went from 123 to 96
microseconds per call, PyMC's C logp_dlogp from 369 to 196; the numba figure is node overhead
(about 110 nodes, nearly all on arrays of 1-9 entries; the 500-cell work is a handful of fused
loops), not arithmetic. NUTS needs 15.4 leapfrog steps per draw (tree depth 4, step size 0.23)
either way. A partly centred CVI layer (ln CVI = lm + s^(1 - lam) (raw - lam lm), raw ~
Normal(lam lm, s^lam), lam = 0.25 from the expected information of 4 specimens against the
pack's cvi_log_sd) kept 15.0 steps per draw (3 analytes, seed 1: max R-hat 1.006-1.0095, min
tail ESS 235, 1 divergence in 12,000 draws), so it was not kept.

Measured 2026-12-04 (idle 2-core machine, nutpie, bench analyte creatinine of 500 dogs): with
the compiled operation of :mod:`bayesbase.calibrate._locop` one logp + gradient as nutpie calls it
(its C callback, through ctypes) costs 28.4 us, of which the operation about 19-22 us in a numba
loop since its cell passes take v = 1 / w (23-28 us before); nutpie's own work per leapfrog step on 505
dimensions is about 3 us (a 505-dimensional normal: 2.96 us per step); one chain took 37-40 us
per step, 15 steps per draw. The CVI spread (cvi_log_sd) has the lowest ESS (about 550 per 4,000
draws): with a diagonal mass matrix its posterior lies along the cvi_z, the cost of the
non-centred layer when each animal's specimens say about as much about its CVI as the prior.

Priors, from the pack's values, widened (every value is written into the output):

* mu ~ Normal(ln center, WIDEN x s_pop), s_pop = ln(ri_upper / ri_lower) / 3.92 (the population
  interval as a central 95 % of a log-normal);
* sigma_g ~ LogNormal(ln sG_pack, SCALE_LOG_SD) and, with replicates, sigma_a ~
  LogNormal(ln sA_pack, SCALE_LOG_SD): the pack states no uncertainty for CVG or CVA, so a factor
  of e^0.7 = 2 at one SD is taken (bayesbase modelling choice);
* ln_cvi_median ~ Normal(ln CVI_pack, WIDEN x cvi_log_sd_pack); cvi_log_sd ~ Gamma(2, mean WIDEN x
  cvi_log_sd_pack), boundary-avoiding as breed_sd and method_sd (:data:`SD_GAMMA_SHAPE`): a spread
  of exactly 0 (every animal the same CVI) is not plausible, and a half-normal prior's mass at 0
  left a long tail towards 0 that NUTS crossed slowly (measured 2026-12-04, nutpie, bench store
  500 dogs x 4, urea, 4 x 1000 draws: half-normal min bulk / tail ESS 348 / 247 with 0.5 % of
  draws below 0.03; Gamma(2) 565 / 603; the first 4 bench analytes, seed 0: 346 / 263 ->
  548 / 623, max R-hat 1.0099 -> 1.0090);
* breed_sd ~ Gamma(2, mean sG_pack): breeds differing by up to about one between-animal SD
  (bayesbase modelling choice); method_sd ~ Gamma(2, mean METHOD_SD_SCALE) (a 10 % bias at one
  SD; bayesbase modelling choice).

Convergence uses the thresholds of :mod:`bayesbase.mcmc.engine` (R-hat, bulk and tail ESS, no
divergence) on every free parameter, and the never-silent rule: a fit that fails a check is
returned with ``diagnostics["converged"] = False``; the caller writes no pack from it.
"""
from __future__ import annotations

import contextlib
import logging
import math
import os
import time
import warnings

import numpy as np

from .core import CalibrationData

__all__ = ["WIDEN", "SCALE_LOG_SD", "METHOD_SD_SCALE", "SAMPLERS", "LIKELIHOODS", "CENTRED_MIN_ANIMALS",
           "SD_GAMMA_SHAPE", "METHOD_SD_PRIOR_TEXT", "AGE_SLOPE_YEARS", "prior_values", "prior_text", "centred_breeds",
           "animal_stats", "build_model", "fit", "diagnostics", "FREE_NAMES", "CVI_FORMS", "CVI_NODES",
           "cvi_nodes", "cvi_node_design", "model_values", "quiet", "fit_settings", "stamp", "LOCATIONS",
           "locations_used", "location_layout", "location_design", "draw_locations"]

#: Factor by which the pack's stated uncertainty is widened (bayesbase modelling choice).
WIDEN = 2.0
#: Log-SD of the priors on sigma_g and sigma_a around the pack's value (factor 2 at 1 SD).
SCALE_LOG_SD = 0.7
#: Mean of the Gamma prior on the SD of the method biases (log units).
METHOD_SD_SCALE = 0.1
SAMPLERS = ("pymc", "nutpie")
LIKELIHOODS = ("auto", "specimens", "animal_stats")
#: Location parameters (mu, breed offsets, method biases, age slope) sampled, or integrated out
#: exactly and drawn afterwards from their conditional (module docstring); ``auto``: marginal where it applies.
LOCATIONS = ("auto", "sampled", "marginal")
#: Shape of the boundary-avoiding Gamma priors on breed_sd, method_sd and cvi_log_sd (Chung Y, Rabe-Hesketh S,
#: Dorie V, Gelman A, Liu J. A nondegenerate penalized likelihood estimator for variance
#: parameters in multilevel models. Psychometrika 2013;78(4):685-709: Gamma(2, rate) for a
#: group-level SD estimated from few groups; from memory). Mean = the scale in ``prior_values``.
SD_GAMMA_SHAPE = 2.0
#: The method-SD prior in words (for notes written beside calibrated method biases).
METHOD_SD_PRIOR_TEXT = f"Gamma({SD_GAMMA_SHAPE:g}, mean {METHOD_SD_SCALE:g})"
#: A breed level with at least this many animals gets a centred parameterisation (module
#: docstring; bayesbase modelling choice: at 10 animals of 4 specimens the breed mean's SE is
#: about sigma_g / 3, below a typical breed SD, so the data dominate the level's prior).
CENTRED_MIN_ANIMALS = 10
#: Prior SD of the age slope (ln per year) = sigma_g of the pack / AGE_SLOPE_YEARS: at one prior SD,
#: this many years of age move the set point by one between-animal SD (bayesbase modelling choice,
#: weakly informative: the packs' age rules are free text about growing animals, with no adult slope).
AGE_SLOPE_YEARS = 5.0
_LOG_2PI = math.log(2.0 * math.pi)
#: How the animals' CVIs enter: integrated out per cell by quadrature, or one latent z each (default).
CVI_FORMS = ("quadrature", "latent")
#: Gauss-Hermite nodes per cell for the CVI integral (module docstring: the measured bound).
CVI_NODES = 24
#: A cell's own specimens place its nodes only when their variance exceeds the analytical one by
#: this fraction of it (below, the data barely bound the CVI from below; bayesbase choice).
_DESIGN_MIN_RATIO = 0.1
#: free parameters (each checked for convergence when present)
FREE_NAMES = ("mu", "sigma_g", "ln_cvi_median", "cvi_log_sd", "breed_sd", "breed_raw", "method_sd",
              "method_log_bias", "sigma_a", "cvi_z", "age_log_slope")


def _sigma(cv: float) -> float:
    return math.sqrt(math.log1p(cv * cv))


def prior_values(pack, analytes) -> dict[str, np.ndarray]:
    """Per-analyte prior constants from the pack (module docstring), arrays over ``analytes``."""
    ps = [pack.analytes[a] for a in analytes]
    s_pop = np.array([math.log(p.ri_upper / p.ri_lower) / 3.92 for p in ps])
    sg = np.array([_sigma(p.cvg) for p in ps])
    return dict(
        mu_loc=np.log([p.center for p in ps]), mu_sd=WIDEN * s_pop, sg=sg,
        sa=np.array([_sigma(p.cva) for p in ps]),
        ln_cvi=np.log([p.cvi for p in ps]), ln_cvi_sd=WIDEN * np.array([p.cvi_log_sd for p in ps]),
        spread_scale=WIDEN * np.array([p.cvi_log_sd for p in ps]), breed_sd_scale=sg,
        method_sd_scale=np.full(len(ps), METHOD_SD_SCALE))


def prior_text(pack, analytes) -> dict[str, str]:
    """analyte -> the priors in words, with the pack values they come from."""
    v = prior_values(pack, analytes)
    out = {}
    for i, a in enumerate(analytes):
        p = pack.analytes[a]
        out[a] = (f"ln center ~ Normal(ln {p.center:g}, {v['mu_sd'][i]:.3g}) (pack {pack.id}: center {p.center:g}, "
                  f"interval {p.ri_lower:g}-{p.ri_upper:g}, SD x {WIDEN:g}); sigma_g ~ LogNormal(ln {v['sg'][i]:.3g}, "
                  f"{SCALE_LOG_SD:g}) (CVG {p.cvg:g}); ln CVI median ~ Normal(ln {p.cvi:g}, {v['ln_cvi_sd'][i]:.3g}) "
                  f"(CVI {p.cvi:g}, cvi_log_sd {p.cvi_log_sd:g} x {WIDEN:g}); cvi_log_sd ~ Gamma({SD_GAMMA_SHAPE:g}, mean "
                  f"{v['spread_scale'][i]:.3g}); breed_sd ~ Gamma({SD_GAMMA_SHAPE:g}, mean {v['breed_sd_scale'][i]:.3g}); "
                  f"method_sd ~ Gamma({SD_GAMMA_SHAPE:g}, mean {METHOD_SD_SCALE:g}); sigma_a ~ LogNormal(ln {v['sa'][i]:.3g}, {SCALE_LOG_SD:g}) with "
                  f"replicates, else CVA fixed at {p.cva:g}"
                  + (f"; age_log_slope ~ Normal(0, {v['sg'][i] / AGE_SLOPE_YEARS:.3g}) per year (sigma_g / "
                     f"{AGE_SLOPE_YEARS:g}; age rule: {p.age_dependent})" if p.age_dependent else ""))
    return out


def _labels(pairs) -> list[str]:
    return [f"{a}|{g}" for a, g in pairs]


def _breed_grid(data: CalibrationData):
    """Breeds (every breed level of the data, or ``data.breed_levels`` when set) and the cell ->
    breed index."""
    breeds = list(data.breed_levels) if data.breed_levels is not None else sorted({b for _, b in data.breed_pairs})
    b_of = {b: i for i, b in enumerate(breeds)}
    return breeds, np.array([b_of[data.breed_pairs[j][1]] for j in data.cell_breed], dtype=int)


#: Data containers that :func:`model_values` pads (``pad``) along the named model dims, with
#: entries that add nothing to the density (:mod:`bayesbase.calibrate.split`): 0, but a
#: replicate count of 1.
_PAD_DIMS = {"cell_analyte": ("cell",), "cell_breed": ("cell",), "stat_m": ("cell",), "stat_ybar": ("cell",),
             "stat_ss": ("cell",), "stat_sx": ("cell",), "stat_sxx": ("cell",), "stat_sxd": ("cell",),
             "stat_n_rep": ("cell",), "stat_nk": ("cell", "method_level"), "stat_tk": ("cell", "method_level"),
             "stat_xk": ("cell", "method_level"), "cvi_u_hat": ("cell",), "cvi_prec_hat": ("cell",),
             "method_analyte": ("method_level",), "method_real": ("method_level",),
             "bc_analyte": ("breed_pair",), "bc_breed": ("breed_pair",)}


def _pad(name, v, pad):
    dims = _PAD_DIMS.get(name)
    if not pad or dims is None:
        return v
    v = np.asarray(v)
    widths = [(0, pad[d] - v.shape[k]) for k, d in enumerate(dims)]
    if any(w < 0 for _, w in widths):
        raise ValueError(f"{name}: cannot pad shape {v.shape} to {[pad[d] for d in dims]}")
    return np.pad(v, widths, constant_values=1 if name == "stat_n_rep" else 0)


def model_values(data: CalibrationData, pri: dict, breed_param: str = "auto", likelihood: str = "auto",
                 cvi: str = "latent", pad: dict | None = None, locations: str = "sampled") -> dict:
    """Every data container (``pm.Data``) of :func:`build_model`'s graph by name: the data, the
    prior constants (``prior_<key>``), the breed levels' parameterisation flags, the method
    levels and the sufficient statistics, so one compiled graph serves any data of the same
    structure. ``pad`` ({"cell": C, "method_level": K, "breed_pair": P}) pads the containers to
    those sizes with entries that add nothing to the density (:mod:`bayesbase.calibrate.split`).
    ``locations`` (the form used, :func:`locations_used`): ``marginal`` adds :func:`location_design`."""
    breeds, cell_breed = _breed_grid(data)
    a_of = {a: i for i, a in enumerate(data.analytes)}
    b_of = {b: i for i, b in enumerate(breeds)}
    ridx = np.flatnonzero(data.df_within > 0)
    age_x = getattr(data, "age_x", None)
    out = dict(y=data.y, n_rep=data.n_rep, obs_cell=data.obs_cell, obs_bias=data.obs_bias,
               age_x=np.zeros(len(data.y)) if age_x is None else age_x,
               cell_analyte=data.cell_analyte, cell_breed=cell_breed,
               ss_within=data.ss_within[ridx], df_within=data.df_within[ridx],
               within_const=-0.5 * data.log_n_rep[ridx] - 0.5 * data.df_within[ridx] * _LOG_2PI,
               bc_analyte=[a_of[a] for a, _ in data.breed_pairs], bc_breed=[b_of[b] for _, b in data.breed_pairs])
    out.update({f"prior_{k}": np.asarray(v, dtype=float) for k, v in pri.items()})
    if len(breeds) > 1 and locations != "marginal":
        out["breed_centred"] = centred_breeds(data, breeds, breed_param).astype(float)
    if data.bias_pairs or (pad or {}).get("method_level"):
        out["method_analyte"] = [a_of[a] for a, _ in data.bias_pairs]
        out["method_real"] = np.ones(len(data.bias_pairs))
    st = animal_stats(data) if likelihood != "specimens" else None
    if likelihood == "animal_stats" and st is None:
        raise ValueError("likelihood='animal_stats' needs equal replicate counts within each animal")
    if st is not None:
        out.update({f"stat_{k}": v for k, v in st.items()})
    if cvi == "quadrature":
        out["cvi_u_hat"], out["cvi_prec_hat"] = cvi_node_design(data, pri["sa"])
    for k in ("bc_analyte", "bc_breed", "method_analyte", "obs_cell", "obs_bias", "cell_analyte", "cell_breed"):
        if k in out:
            out[k] = np.asarray(out[k], dtype=int).reshape(-1)
    out = {k: _pad(k, v, pad) for k, v in out.items()}
    if locations == "marginal":  # padded there (cells and method slots)
        out.update(location_design(data, pri, pad))
    return out


def centred_breeds(data: CalibrationData, breeds, breed_param: str = "auto") -> np.ndarray:
    """(analyte, breed) flags: True where the breed layer is centred. ``auto``: a breed level with
    at least :data:`CENTRED_MIN_ANIMALS` animals of that analyte (module docstring)."""
    flags = np.zeros((len(data.analytes), len(breeds)), dtype=bool)
    if breed_param in ("centred", "noncentred"):
        flags[:] = breed_param == "centred"
        return flags
    if breed_param != "auto":
        raise ValueError(f"breed_param must be auto, centred or noncentred, got {breed_param!r}")
    for i, a in enumerate(data.analytes):
        for j, b in enumerate(breeds):
            flags[i, j] = data.counts.get((a, "breed", b), (0, 0))[0] >= CENTRED_MIN_ANIMALS
    return flags


def _breed_layer(pm, pt, d, mu, pri):
    """Breed offsets (analyte x breed) with a per-level choice of parameterisation (data
    ``breed_centred``, :func:`centred_breeds`): a centred level samples its ln centre c ~
    Normal(mu, breed_sd); a non-centred level samples z ~ Normal(0, 1) with c = mu + breed_sd z.
    ``breed_raw`` holds c or z accordingly."""
    flag = d["breed_centred"]
    breed_sd = pm.Gamma("breed_sd", alpha=SD_GAMMA_SHAPE, beta=SD_GAMMA_SHAPE / pri["breed_sd_scale"], dims="analyte")
    sd, m = breed_sd[:, None], mu[:, None]
    raw = pm.Normal("breed_raw", m * flag, flag * sd + (1.0 - flag), dims=("analyte", "breed"))
    centre = flag * raw + (1.0 - flag) * (m + sd * raw)
    return pm.Deterministic("breed_offset", centre - m, dims=("analyte", "breed"))


def _coords(data: CalibrationData, breeds, pad):
    """The model's coords; ``pad`` (:func:`model_values`) lengthens cell and method_level."""
    pad = pad or {}
    ridx = np.flatnonzero(data.df_within > 0)
    levels = _labels(data.bias_pairs)
    levels += [f"(padding {k})" for k in range(pad.get("method_level", len(levels)) - len(levels))]
    return {"analyte": data.analytes, "cell": np.arange(pad.get("cell", len(data.cell_analyte))), "breed": breeds,
            "method_level": levels, "rep_analyte": [data.analytes[i] for i in ridx],
            "age_analyte": list(getattr(data, "age_analytes", []))}


def _method_bias(pm, pt, d, pri, n_levels, n_analytes=2):
    """Method biases (centred), a padded level (``method_real`` 0) with a unit prior of its own."""
    if not n_levels:
        return pt.zeros(1)
    method_sd = pm.Gamma("method_sd", alpha=SD_GAMMA_SHAPE, beta=SD_GAMMA_SHAPE / pri["method_sd_scale"],
                         dims="analyte")
    real = d["method_real"]
    sd = method_sd[0] if n_analytes == 1 else method_sd[d["method_analyte"]]  # one analyte: broadcast
    b = pm.Normal("method_log_bias", 0.0, real * sd + (1.0 - real), dims="method_level")
    return pt.concatenate([b, pt.zeros(1)])


def build_model(data: CalibrationData, pri: dict, breed_param: str = "auto", likelihood: str = "auto",
                cvi: str = "latent", nodes: int | None = None, pad: dict | None = None, locations: str = "sampled"):
    """The PyMC model of the module docstring for ``data`` with prior constants ``pri``;
    ``breed_param`` (auto, centred, noncentred) chooses the breed layer's parameterisation;
    ``likelihood`` (auto, specimens, animal_stats) how the specimen means enter: one term per
    specimen, or per animal through its sufficient statistics (:func:`animal_stats`; ``auto``
    takes them when every animal's specimens have equal replicate counts). Same density. Every
    value is a data container (:func:`model_values`; ``pad`` pads them). ``locations``
    (:data:`LOCATIONS`, :func:`locations_used`): the location parameters sampled, or integrated
    out exactly (``marginal``: :func:`draw_locations` draws them after sampling)."""
    if likelihood not in LIKELIHOODS:
        raise ValueError(f"likelihood must be one of {LIKELIHOODS}, got {likelihood!r}")
    loc = locations_used(data, likelihood, cvi, locations)
    import pymc as pm
    import pytensor.tensor as pt

    A = len(data.analytes)
    breeds, _ = _breed_grid(data)
    coords = _coords(data, breeds, pad)
    # check_bounds=False: PyMC's parameter checks (an SD > 0 ...) hold by construction (every SD is
    # a positive prior constant or a log-transformed parameter), so they only cost graph nodes
    with pm.Model(coords=coords, check_bounds=False) as model:
        d = {k: pm.Data(k, v) if np.size(v) or not k.startswith("stat_") else v
             for k, v in model_values(data, pri, breed_param, likelihood, cvi, pad, loc).items()}
        p = {k[6:]: v for k, v in d.items() if k.startswith("prior_")}
        ca = d["cell_analyte"]
        oa = ca[d["obs_cell"]]

        def cell(t):  # an analyte's value per cell; one analyte (a per-analyte part): a broadcast scalar
            return t[0] if A == 1 else t[ca]

        if loc == "marginal":
            _marginal_graph(pm, pt, data, d, p, cell, location_layout(data, pad), nodes)
            return model
        mu = pm.Normal("mu", p["mu_loc"], p["mu_sd"], dims="analyte")
        sigma_g, ln_med, spread = _scale_priors(pm, pt, p)
        offset = _breed_layer(pm, pt, d, mu, p) if len(breeds) > 1 else pt.zeros((A, 1))
        bias = _method_bias(pm, pt, d, p, len(coords["method_level"]), A)
        age = None  # optional age term: ln slope per year of each analyte (0 without the term)
        if coords["age_analyte"]:
            ai = np.array([data.analytes.index(a) for a in coords["age_analyte"]])
            slope = pm.Normal("age_log_slope", 0.0, p["sg"][ai] / AGE_SLOPE_YEARS, dims="age_analyte")
            pm.Deterministic("age_slope", pt.expm1(slope), dims="age_analyte")
            age = pt.set_subtensor(pt.zeros(A)[ai], slope)
        sa = _cva_layer(pm, pt, data, d, p)
        # sigma_i^2 of each cell (latent) or of each (cell, node) with the nodes' log weights
        si2, log_w = _cvi_layer(pm, pt, d, cell(ln_med), cell(spread), cvi, nodes)
        cell_off = 0.0
        if len(breeds) > 1:
            cell_off = offset[0][d["cell_breed"]] if A == 1 else offset[ca, d["cell_breed"]]
        sg2 = cell(sigma_g**2)
        st = {k[5:]: v for k, v in d.items() if k.startswith("stat_")} or None
        if st is None:
            cell_mean = mu[ca] + cell_off
            v = si2[d["obs_cell"]] + _node_axis(sa[oa] ** 2 / d["n_rep"], log_w)
            r = d["y"] - cell_mean[d["obs_cell"]] - bias[d["obs_bias"]]
            r = r if age is None else r - age[oa] * d["age_x"]
            pm.Potential("specimen_means", _cell_logp(r, v, sg2, d["obs_cell"], len(coords["cell"]), log_w))
        else:
            v = si2 + _node_axis(cell(sa) ** 2 / st["n_rep"], log_w)
            pm.Potential("specimen_means", _stats_logp(st, cell(mu) + cell_off, bias[:-1], v, sg2,
                                                       None if age is None else cell(age), log_w))
        _deterministics(pm, pt, d, len(breeds), mu, sigma_g, ln_med, sa, offset, bias)
    return model


# ----------------------------------------------------------------------------- locations integrated out
def locations_used(data: CalibrationData, likelihood: str = "auto", cvi: str = "latent",
                   locations: str = "sampled") -> str:
    """The location form a fit takes: ``marginal`` (mu, breed offsets, method biases and the age
    slope integrated out exactly; module docstring) needs the animals' sufficient statistics and
    the latent CVI form; ``auto`` takes it whenever those apply, else ``sampled``."""
    if locations not in LOCATIONS:
        raise ValueError(f"locations must be one of {LOCATIONS}, got {locations!r}")
    ok = cvi == "latent" and likelihood != "specimens" and animal_stats(data) is not None
    if locations == "marginal" and not ok:
        raise ValueError("locations='marginal' needs cvi='latent' (with the CVI integrated out by quadrature a "
                         "cell's density is a mixture, not a normal) and the animals' sufficient statistics "
                         "(equal replicate counts within each animal, likelihood 'auto' or 'animal_stats')")
    return "marginal" if locations == "marginal" or (locations == "auto" and ok) else "sampled"


def location_layout(data: CalibrationData, pad: dict | None = None) -> dict:
    """Per analyte, the location vector beta = (mu - mu_loc, breed offset per breed level (none
    with one level), method log bias per method slot, age slope when any analyte has the term):
    its size D, the breed count B, the method slots K (``pad`` lengthens them), the slot of each
    method level (``data.bias_pairs``) and whether the age slot is used."""
    breeds, _ = _breed_grid(data)
    B = len(breeds) if len(breeds) > 1 else 0
    slot, seen = [], {}
    for a, _m in data.bias_pairs:
        slot.append(seen.get(a, 0))
        seen[a] = seen.get(a, 0) + 1
    K = max([len(data.bias_pairs) if len(data.analytes) == 1 else max(seen.values(), default=0)]
            + [(pad or {}).get("method_level", 0)])
    age = bool(getattr(data, "age_analytes", []))
    return dict(B=B, K=K, age=age, D=1 + B + K + int(age), slot=np.array(slot, dtype=int), breeds=breeds)


def location_design(data: CalibrationData, pri: dict, pad: dict | None = None) -> dict:
    """Data of the marginal location form (module docstring). A specimen's row of the design X is
    (1, breed one-hot, method-slot one-hot, age x), and the breed column of a cell repeats its
    first column, so each cell is held by its rows over q = (mu, method slots, age) alone (Dq
    entries): H = X_q'X_q, uq = X_q'1, gq = X_q'y~, s1 = 1'y~, s2 = y~'y~, with y~ = specimen
    mean - mu_loc (so beta's prior mean is 0); the compiled operation of :func:`_location_marginal`
    puts each cell's breed row back from ``cell_breed``. Per analyte, the
    method and age slots that carry a parameter (a slot without one has no data and a unit prior:
    it adds exactly nothing). Padded cells (``pad``) are zero throughout: they add nothing."""
    lay = location_layout(data, pad)
    B, K = lay["B"], lay["K"]
    dq = 1 + K + int(lay["age"])
    C = (pad or {}).get("cell", len(data.cell_analyte))
    A = len(data.analytes)
    oc = data.obs_cell
    x = np.zeros((len(oc), dq))
    x[:, 0] = 1.0
    real = data.obs_bias < len(data.bias_pairs)
    x[np.flatnonzero(real), 1 + lay["slot"][data.obs_bias[real]]] = 1.0
    if lay["age"]:
        x[:, -1] = 0.0 if getattr(data, "age_x", None) is None else data.age_x
    yt = data.y - np.asarray(pri["mu_loc"], dtype=float)[data.cell_analyte[oc]]
    H, uq, gq = np.zeros((C, dq, dq)), np.zeros((C, dq)), np.zeros((C, dq))
    np.add.at(H, oc, x[:, :, None] * x[:, None, :])
    np.add.at(uq, oc, x)
    np.add.at(gq, oc, x * yt[:, None])
    s1, s2 = np.zeros(C), np.zeros(C)
    np.add.at(s1, oc, yt)
    np.add.at(s2, oc, yt * yt)
    method_real = np.zeros((A, K))
    for k, (an, _m) in enumerate(data.bias_pairs):
        method_real[data.analytes.index(an), lay["slot"][k]] = 1.0
    age_real = np.array([float(an in getattr(data, "age_analytes", [])) for an in data.analytes])
    return dict(loc_H=H, loc_uq=uq, loc_gq=gq, loc_s1=s1, loc_s2=s2, loc_method_real=method_real,
                loc_age_real=age_real)


def _location_precision(pt, p, d, lay, breed_sd, method_sd):
    """(analyte, D) diagonal prior precision of beta: 1 / mu_sd^2, 1 / breed_sd^2 per breed level,
    1 / method_sd^2 per method slot carrying a method (1 elsewhere), (AGE_SLOPE_YEARS / sg)^2 for
    an analyte with the age term (1 elsewhere)."""
    parts = [(1.0 / p["mu_sd"] ** 2)[:, None]]
    if lay["B"]:
        parts.append(pt.repeat((1.0 / breed_sd**2)[:, None], lay["B"], axis=1))
    if lay["K"]:
        real = d["loc_method_real"]
        parts.append(real * (1.0 / method_sd**2)[:, None] + (1.0 - real))
    if lay["age"]:
        real = d["loc_age_real"]
        parts.append((real * (AGE_SLOPE_YEARS / p["sg"]) ** 2 + (1.0 - real))[:, None])
    return pt.concatenate(parts, axis=1)


def _location_marginal(pm, d, z, ln_med, spread, sa, sg2, prec):
    """Potential ``specimen_means``: the latent CVI layer (per cell ln CVI = ln_cvi_median +
    cvi_log_sd z, sigma_i^2 = ln(1 + CVI^2), as :func:`_cvi_layer`) and the density of the
    specimen means with every location parameter integrated out (module docstring), with its
    exact gradient, as one compiled operation (:mod:`bayesbase.calibrate._locop`; ``ln_med``,
    ``spread``, ``sa``, ``sg2`` = sigma_g^2 per analyte, ``prec`` (analyte, D)). Also the
    Deterministics ``loc_mean`` ((A + P)^-1 b, mu_loc not yet added back) and ``loc_chol`` (the
    Cholesky factor L of A + P), from which the locations are drawn after sampling
    (:func:`draw_locations`). Measured 2026-12-04 on the benchmark's analyte (500 cells, one
    numba logp + gradient of the whole model, load 3-5): 92 us with the earlier graph of PyTensor
    array operations (solve and slogdet differentiated automatically; kept in
    ``tests/test_calibrate_locop.py`` as the reference the operation is checked against)."""
    from ._locop import latent_marginal

    out = latent_marginal(z, ln_med, spread, sa, sg2, prec, d["stat_n_rep"], d["stat_m"], d["loc_H"], d["loc_uq"],
                          d["loc_gq"], d["loc_s1"], d["loc_s2"], d["cell_analyte"], d["cell_breed"])
    pm.Deterministic("loc_mean", out[1])
    pm.Deterministic("loc_chol", out[2])
    return out[0]


def draw_locations(idata, values: dict, data: CalibrationData, coords: dict, seed: int, pad: dict | None = None):
    """After a marginal fit: for every posterior draw, beta from its exact conditional
    N(loc_mean, (L L')^-1) (numpy.random.default_rng(seed)), put into the posterior under the
    sampled form's names and dims (mu, breed_offset, method_log_bias, age_log_slope, age_slope,
    center, breed_center_all, method_bias); ``loc_mean`` and ``loc_chol`` are dropped."""
    import xarray as xr

    post = idata.posterior
    lay = location_layout(data, pad)
    mean, chol = post["loc_mean"].values, post["loc_chol"].values
    z = np.random.default_rng(seed).standard_normal(mean.shape)
    beta = mean + np.linalg.solve(np.swapaxes(chol, -1, -2), z[..., None])[..., 0]  # + L'^-1 z
    cd = {"chain": post.chain.values, "draw": post.draw.values}
    mu = beta[..., 0] + np.asarray(values["prior_mu_loc"], dtype=float)
    new = {"mu": (("chain", "draw", "analyte"), mu), "center": (("chain", "draw", "analyte"), np.exp(mu))}
    ba, bi = np.asarray(values["bc_analyte"]), np.asarray(values["bc_breed"])
    off_bc = 0.0
    if lay["B"]:
        off = beta[..., 1:1 + lay["B"]]
        new["breed_offset"] = (("chain", "draw", "analyte", "breed"), off)
        off_bc = off[:, :, ba, bi]
    new["breed_center_all"] = (("chain", "draw", "breed_center_all_dim_0"), np.exp(mu[:, :, ba] + off_bc))
    n_levels = len(coords["method_level"])
    if n_levels:
        ma = np.asarray(values["method_analyte"]) if len(data.analytes) > 1 else np.zeros(n_levels, dtype=int)
        slot = np.concatenate([lay["slot"], np.arange(len(lay["slot"]), n_levels)]) if len(data.analytes) == 1 \
            else lay["slot"]
        mb = beta[:, :, ma, 1 + lay["B"] + slot]
        new["method_log_bias"] = (("chain", "draw", "method_level"), mb)
        new["method_bias"] = (("chain", "draw", "method_level"), np.expm1(mb))
    if coords["age_analyte"]:
        ai = [data.analytes.index(a) for a in coords["age_analyte"]]
        sl = beta[:, :, ai, -1]
        new["age_log_slope"] = (("chain", "draw", "age_analyte"), sl)
        new["age_slope"] = (("chain", "draw", "age_analyte"), np.expm1(sl))
    ds = xr.Dataset(new, coords={**cd, **{k: coords[k] for k in ("analyte", "breed", "method_level", "age_analyte")
                                          if any(k in v[0] for v in new.values())}})
    merged = post.drop_vars(["loc_mean", "loc_chol"] + [c for c in post.coords if str(c).startswith("loc_")],
                            errors="ignore").assign(ds.data_vars)
    merged.attrs.update(post.attrs)
    idata.posterior = merged
    return idata


def _scale_priors(pm, pt, p):
    """sigma_g, ln_cvi_median and cvi_log_sd (module docstring's priors)."""
    sigma_g = pm.LogNormal("sigma_g", pt.log(p["sg"]), SCALE_LOG_SD, dims="analyte")
    ln_med = pm.Normal("ln_cvi_median", p["ln_cvi"], p["ln_cvi_sd"], dims="analyte")
    spread = pm.Gamma("cvi_log_sd", alpha=SD_GAMMA_SHAPE, beta=SD_GAMMA_SHAPE / p["spread_scale"], dims="analyte")
    return sigma_g, ln_med, spread


def _cva_layer(pm, pt, data, d, p):
    """sigma_a per analyte: learned from the within-specimen replicates where any, else the pack's."""
    sa = p["sa"]
    ridx = np.flatnonzero(data.df_within > 0)
    if len(ridx):
        sa_free = pm.LogNormal("sigma_a", pt.log(p["sa"][ridx]), SCALE_LOG_SD, dims="rep_analyte")
        sa = pt.set_subtensor(sa[ridx], sa_free)
        pm.Potential("within_specimen", pt.sum(d["within_const"] - d["df_within"] * pt.log(sa_free)
                                               - d["ss_within"] / (2.0 * sa_free**2)))
    return sa


def _marginal_graph(pm, pt, data, d, p, cell, lay, nodes):
    """The model with every location parameter integrated out (module docstring): the scale
    parameters, the latent CVI layer and the potential of :func:`_location_marginal`."""
    A = len(data.analytes)
    sigma_g, ln_med, spread = _scale_priors(pm, pt, p)
    breed_sd = method_sd = None
    if lay["B"]:
        breed_sd = pm.Gamma("breed_sd", alpha=SD_GAMMA_SHAPE, beta=SD_GAMMA_SHAPE / p["breed_sd_scale"],
                            dims="analyte")
    if lay["K"]:
        method_sd = pm.Gamma("method_sd", alpha=SD_GAMMA_SHAPE, beta=SD_GAMMA_SHAPE / p["method_sd_scale"],
                             dims="analyte")
    sa = _cva_layer(pm, pt, data, d, p)
    z = pm.Normal("cvi_z", 0.0, 1.0, dims="cell")  # the latent CVI layer (_cvi_layer), inside the potential
    prec = _location_precision(pt, p, d, lay, breed_sd, method_sd)
    pm.Potential("specimen_means", _location_marginal(pm, d, z, ln_med, spread, sa, sigma_g**2, prec))
    pm.Deterministic("cvg", pt.sqrt(pt.expm1(sigma_g**2)), dims="analyte")
    pm.Deterministic("cvi", pt.exp(ln_med), dims="analyte")
    pm.Deterministic("cva", pt.sqrt(pt.expm1(sa**2)), dims="analyte")


def cvi_nodes(n: int = None):
    """Probabilists' Gauss-Hermite nodes x_k and log weights ln w_k (weights normalised to sum 1)
    for E[f(Z)], Z ~ N(0, 1) (numpy.polynomial.hermite_e.hermegauss, as the exact engine)."""
    n = CVI_NODES if n is None else int(n)
    if n < 1:
        raise ValueError("need at least one quadrature node")
    x, w = np.polynomial.hermite_e.hermegauss(n) if n > 1 else (np.zeros(1), np.ones(1))
    return x, np.log(w / w.sum())


def cvi_node_design(data: CalibrationData, sa) -> tuple[np.ndarray, np.ndarray]:
    """Per cell, a normal approximation N(u_hat, 1 / prec_hat) of what the cell's own specimens
    say about u = ln CVI (module docstring): the within-animal sum of squares ss of its specimen
    means on m - 1 degrees of freedom gives v_hat = ss / (m - 1), sigma_i^2 = v_hat - sA^2 / n
    (``sa``: the pack's sA per analyte), u_hat = ln sqrt(exp(sigma_i^2) - 1) and, from the
    chi-square likelihood's curvature in ln v, prec_hat = (m - 1) / 2 (d ln v / du)^2.
    prec_hat = 0 (no data term) for a single specimen or when sigma_i^2 is not clearly above
    the analytical variance. Only the nodes' placement depends on it, never the density."""
    oc, C = data.obs_cell, len(data.cell_analyte)
    m = np.bincount(oc, minlength=C).astype(float)
    ybar = np.bincount(oc, weights=data.y, minlength=C) / np.maximum(m, 1.0)
    ss = np.bincount(oc, weights=(data.y - ybar[oc]) ** 2, minlength=C)
    sa2n = np.bincount(oc, weights=np.asarray(sa)[data.cell_analyte[oc]] ** 2 / data.n_rep,
                       minlength=C) / np.maximum(m, 1.0)
    df = m - 1.0
    si2 = ss / np.maximum(df, 1.0) - sa2n
    ok = (df >= 1.0) & (si2 > _DESIGN_MIN_RATIO * sa2n) & (si2 > 0.0)
    si2 = np.clip(np.where(ok, si2, 1.0), 1e-300, 50.0)
    e = np.expm1(si2)
    g = 2.0 * e / ((1.0 + e) * (si2 + sa2n))  # d ln v / du at u_hat
    return np.where(ok, 0.5 * np.log(e), 0.0), np.where(ok, 0.5 * df * g * g, 0.0)


def _cvi_layer(pm, pt, d, lm, s, cvi, nodes):
    """sigma_i^2 = ln(1 + CVI^2) of each cell with ln CVI ~ Normal(lm, s) (``lm``, ``s`` per
    cell). ``latent``: one free cvi_z per cell, ln CVI = lm + s cvi_z; returns (sigma_i^2, None).
    ``quadrature``: CVI integrated out per cell by adaptive Gauss-Hermite quadrature (module
    docstring); returns sigma_i^2 at each (cell, node) and the nodes' log weights (cell, node),
    so that a cell's density is logsumexp_k(log_w[c, k] + logp_cell(v[c, k]))."""
    if cvi not in CVI_FORMS:
        raise ValueError(f"cvi must be one of {CVI_FORMS}, got {cvi!r}")
    if cvi == "latent":
        eta = pm.Normal("cvi_z", 0.0, 1.0, dims="cell")
        return pt.softplus(2.0 * (lm + s * eta)), None
    x, lw = cvi_nodes(nodes)
    u_hat, p_hat = d["cvi_u_hat"], d["cvi_prec_hat"]  # data (cvi_node_design)
    prec = 1.0 / s**2 + p_hat
    tau = 1.0 / pt.sqrt(prec)
    centre = (lm / s**2 + u_hat * p_hat) / prec
    u = centre[:, None] + tau[:, None] * x[None, :]  # ln CVI at each (cell, node)
    lm_c, s_c = (t[:, None] if t.ndim else t for t in (lm, s))  # per cell, or one analyte's scalar
    log_w = (lw + 0.5 * x * x)[None, :] + pt.log(tau / s)[:, None] - 0.5 * ((u - lm_c) / s_c) ** 2
    return pt.softplus(2.0 * u), log_w


def _node_axis(t, log_w):
    """``t`` per cell (or specimen) as a column when the CVI has a node axis."""
    return t if log_w is None else t[:, None]


def animal_stats(data: CalibrationData) -> dict | None:
    """Per cell (analyte, animal): number of specimens m, mean ybar of the specimen means, their
    sum of squares about ybar, and per non-reference method the count and the sum of deviations
    from ybar; None when a cell's specimens have unequal replicate counts (v not constant). Age
    moments of the centred age x (``data.age_x``): per cell sum x, sum x^2, sum x dev and per
    non-reference method sum x."""
    C, K = len(data.cell_analyte), len(data.bias_pairs)
    oc = data.obs_cell
    m = np.bincount(oc, minlength=C).astype(float)
    n_rep = np.bincount(oc, weights=data.n_rep, minlength=C) / m
    if not np.allclose(n_rep[oc], data.n_rep):
        return None
    ybar = np.bincount(oc, weights=data.y, minlength=C) / m
    dev = data.y - ybar[oc]
    nk, tk = np.zeros((C, K + 1)), np.zeros((C, K + 1))
    np.add.at(nk, (oc, data.obs_bias), 1.0)
    np.add.at(tk, (oc, data.obs_bias), dev)
    x = np.zeros(len(oc)) if getattr(data, "age_x", None) is None else data.age_x
    xk = np.zeros((C, K + 1))
    np.add.at(xk, (oc, data.obs_bias), x)
    return dict(m=m, n_rep=n_rep, ybar=ybar, ss=np.bincount(oc, weights=dev * dev, minlength=C),
                nk=nk[:, :K], tk=tk[:, :K], sx=np.bincount(oc, weights=x, minlength=C),
                sxx=np.bincount(oc, weights=x * x, minlength=C), sxd=np.bincount(oc, weights=x * dev, minlength=C),
                xk=xk[:, :K])


def _stats_logp(st, cell_mean, b, v, sg2, age=None, log_w=None):
    """The density of :func:`_cell_logp` from the animals' sufficient statistics (v constant
    within a cell): with delta = ybar - cell mean, the residual sum R = m delta - sum_j b_j and
    the residual sum of squares Q = ss + m delta^2 + sum_j b_j^2 - 2 sum_j dev_j b_j - 2 delta sum_j b_j.
    With an age term (``age``: ln slope beta per cell; x the centred age) the residual of specimen
    j loses beta x_j: R -= beta sum x, Q += beta (beta sum x^2 - 2 sum x dev - 2 delta sum x + 2 sum_j b_j x_j)."""
    import pytensor.tensor as pt

    m, delta = st["m"], st["ybar"] - cell_mean
    if not isinstance(st["nk"], np.ndarray) or st["nk"].shape[1]:  # a data container, or a method level
        nb, nb2, tb = pt.dot(st["nk"], b), pt.dot(st["nk"], b * b), pt.dot(st["tk"], b)
        xb = pt.dot(st["xk"], b) if "xk" in st else 0.0
    else:
        nb = nb2 = tb = xb = 0.0
    rsum = m * delta - nb
    q = st["ss"] + m * delta**2 + nb2 - 2.0 * tb - 2.0 * delta * nb
    if age is not None:
        rsum = rsum - age * st["sx"]
        q = q + age * (age * st["sxx"] - 2.0 * st["sxd"] - 2.0 * delta * st["sx"] + 2.0 * xb)
    return _cell_density(m, rsum, q, v, sg2, log_w)


def _cell_logp(r, v, sg2, obs_cell, n_cells, log_w=None):
    """Sum over cells of the multivariate-normal log density of the specimen means (residuals r,
    variances v) with the set point integrated out (module docstring). With ``log_w`` (cell,
    node) v carries a node axis, (specimen, node), and each cell's density is the quadrature
    over its CVI nodes (:func:`_cvi_layer`)."""
    import pytensor.tensor as pt

    if log_w is not None:
        r, sg2 = r[:, None], sg2[:, None]

    shape = (n_cells,) if log_w is None else (n_cells, log_w.shape[1])

    def per_cell(x):  # x has v's shape: (specimen,) or (specimen, node)
        return pt.inc_subtensor(pt.zeros(shape)[obs_cell], x)

    sw, sr = per_cell(1.0 / v), per_cell(r / v)
    m = per_cell(pt.ones_like(v))
    one_plus = 1.0 + sg2 * sw
    lp = -0.5 * (m * _LOG_2PI + per_cell(pt.log(v)) + pt.log(one_plus) + per_cell(r * r / v)
                 - sg2 * sr * sr / one_plus)
    return pt.sum(lp) if log_w is None else pt.sum(pt.logsumexp(lp + log_w, axis=-1))


def _cell_density(m, rsum, q, v, sg2, log_w=None):
    """Per cell, the log density of :func:`_cell_logp` from m, the residual sum and the residual
    sum of squares (v constant in the cell), summed over cells; with ``log_w`` (cell, node) v is
    (cell, node) and each cell's density is the quadrature over its CVI nodes."""
    import pytensor.tensor as pt

    if log_w is not None:  # the residual terms do not depend on v: one column, broadcast over nodes
        m, rsum, q, sg2 = (pt.shape_padright(pt.as_tensor_variable(t)) for t in (m, rsum, q, sg2))
    one_plus = 1.0 + sg2 * m / v
    lp = -0.5 * (m * _LOG_2PI + m * pt.log(v) + pt.log(one_plus) + q / v - sg2 * (rsum / v) ** 2 / one_plus)
    return pt.sum(lp) if log_w is None else pt.sum(pt.logsumexp(lp + log_w, axis=-1))


def _deterministics(pm, pt, d, n_breeds, mu, sigma_g, ln_med, sa, offset, bias):
    """The reported quantities on the natural scale."""
    pm.Deterministic("center", pt.exp(mu), dims="analyte")
    pm.Deterministic("cvg", pt.sqrt(pt.expm1(sigma_g**2)), dims="analyte")
    pm.Deterministic("cvi", pt.exp(ln_med), dims="analyte")
    pm.Deterministic("cva", pt.sqrt(pt.expm1(sa**2)), dims="analyte")
    ba, bi = d["bc_analyte"], d["bc_breed"]
    off = offset[ba, bi] if n_breeds > 1 else 0.0
    pm.Deterministic("breed_center_all", pt.exp(mu[ba] + off))
    if "method_real" in d:
        pm.Deterministic("method_bias", pt.expm1(bias[:-1]), dims="method_level")


# ----------------------------------------------------------------------------- fitting
@contextlib.contextmanager
def quiet():
    """PyMC's and PyTensor's chatter and ArviZ's small-sample warnings silenced while sampling."""
    loggers = [logging.getLogger(n) for n in ("pymc", "pymc.sampling.mcmc", "pytensor")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.ERROR)
    # a graph rewrite that fails is skipped and logged by PyTensor; the graph stays correct
    # (seen here once: a KeyError inside elementwise fusion while PyMC compiled the sampler)
    rewrite_log = logging.getLogger("pytensor.graph.rewriting.basic")
    loggers.append(rewrite_log)
    levels.append(rewrite_log.level)
    rewrite_log.setLevel(logging.CRITICAL)
    try:
        with warnings.catch_warnings():
            # short runs make PyMC/ArviZ warn about small samples; the diagnostics say the same
            warnings.filterwarnings("ignore", message=".*[Tt]he number of samples is too small.*")
            warnings.filterwarnings("ignore", category=RuntimeWarning, module="arviz")
            warnings.filterwarnings("ignore", category=FutureWarning, module="arviz")
            yield
    finally:
        for lg, lv in zip(loggers, levels):
            lg.setLevel(lv)


def fit_settings(data: CalibrationData, *, draws, tune, chains, seed, sampler, cores, target_accept, breed_param,
                 likelihood, cvi, nodes, locations="sampled") -> dict:
    """The settings of a fit (checked), stamped on its result."""
    if draws < 1 or tune < 0 or chains < 1:
        raise ValueError("draws >= 1, tune >= 0 and chains >= 1 are required")
    if sampler not in SAMPLERS:
        raise ValueError(f"sampler must be one of {SAMPLERS}, got {sampler!r}")
    cores = max(1, min(chains, os.cpu_count() or 1)) if cores is None else int(cores)
    breeds = _breed_grid(data)[0]
    n_centred = int(centred_breeds(data, breeds, breed_param).sum())
    return dict(sampler=sampler, draws=int(draws), tune=int(tune), chains=int(chains), cores=cores,
                seed=int(seed), target_accept=float(target_accept), breed_param=breed_param,
                likelihood=likelihood, cvi=cvi, cvi_nodes=0 if cvi == "latent" else int(nodes or CVI_NODES),
                likelihood_used="specimens" if likelihood == "specimens" or animal_stats(data) is None
                else "animal_stats", centred_breed_levels=n_centred if len(breeds) > 1 else 0,
                locations=locations, locations_used=locations_used(data, likelihood, cvi, locations))


def stamp(idata, settings: dict) -> None:
    """The fit's form and timings on the posterior's attrs."""
    idata.posterior.attrs.update(likelihood=settings["likelihood_used"], breed_param=settings["breed_param"],
                                 cvi=settings["cvi"], cvi_nodes=settings["cvi_nodes"],
                                 centred_breed_levels=settings["centred_breed_levels"],
                                 locations=settings.get("locations_used", "sampled"))
    for k in ("sample_seconds", "compile_seconds", "fit_form"):
        if k in settings:
            idata.posterior.attrs[k] = settings[k]


def fit(data: CalibrationData, pri: dict, *, draws: int = 1000, tune: int = 1000, chains: int = 4,
        seed: int = 0, sampler: str = "pymc", cores: int | None = None, target_accept: float = 0.9,
        breed_param: str = "auto", likelihood: str = "auto", cvi: str = "latent", nodes: int | None = None,
        locations: str = "auto"):
    """Sample the model (every analyte in one graph); returns (idata, diagnostics, settings).
    ``locations`` (:data:`LOCATIONS`; default ``auto``: marginal where it applies): sampled, or
    integrated out and drawn after sampling from their exact conditional (seeded from ``seed``;
    :func:`draw_locations`).
    ``cvi``: the animals' CVIs latent (default) or integrated out by quadrature over ``nodes``
    nodes (default :data:`CVI_NODES`; module docstring). Never raises on poor convergence:
    ``diagnostics["converged"]`` says so. :func:`bayesbase.calibrate.split.fit_split` fits the
    same posterior one analyte at a time."""
    settings = fit_settings(data, draws=draws, tune=tune, chains=chains, seed=seed, sampler=sampler, cores=cores,
                            target_accept=target_accept, breed_param=breed_param, likelihood=likelihood, cvi=cvi,
                            nodes=nodes, locations=locations)
    from ..mcmc.engine import ESS_MIN, RHAT_MAX  # also loads PyMC and ArviZ (notice handled there)

    with quiet():
        t0 = time.perf_counter()
        loc = settings["locations_used"]
        model = build_model(data, pri, breed_param, likelihood, cvi, nodes, locations=loc)
        idata = _sample(model, sampler, draws, tune, chains, settings["cores"], seed, target_accept, settings)
        if loc == "marginal":
            draw_locations(idata, model_values(data, pri, breed_param, likelihood, cvi, None, loc), data,
                           {k: list(v) for k, v in model.coords.items()}, seed)
        settings["fit_form"] = "joint"
        stamp(idata, settings)
        settings["seconds"] = time.perf_counter() - t0
        diag = diagnostics(idata, RHAT_MAX, ESS_MIN)
    return idata, diag, settings


def _sample(model, sampler, draws, tune, chains, cores, seed, target_accept, settings):
    import arviz as az
    import pymc as pm

    settings["pymc_version"] = pm.__version__
    if sampler == "pymc":
        return pm.sample(draws=draws, tune=tune, chains=chains, cores=cores, random_seed=seed,
                         target_accept=target_accept, progressbar=False, model=model,
                         compute_convergence_checks=False, return_inferencedata=True)
    try:
        import nutpie
    except ImportError as exc:  # optional extra
        raise ImportError("sampler='nutpie' needs the optional package nutpie "
                          "(pip install 'bayesbase[nutpie]')") from exc
    t0 = time.perf_counter()
    cm = nutpie.compile_pymc_model(model, backend="numba")
    settings["compile_seconds"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    idata = nutpie.sample(cm, draws=draws, tune=tune, chains=chains, cores=cores, seed=seed,
                          progress_bar=False, save_warmup=False, target_accept=target_accept)
    settings["sample_seconds"] = time.perf_counter() - t0
    return az.InferenceData(posterior=idata.posterior, sample_stats=idata.sample_stats)


def diagnostics(idata, rhat_max: float, ess_min: float) -> dict:
    """R-hat, bulk and tail ESS over every free parameter, and the divergences."""
    import arviz as az

    post = idata.posterior
    # marginal locations: the breed offsets are exact conditional draws (no breed_raw): checked too
    names = [n for n in FREE_NAMES + (() if "breed_raw" in post else ("breed_offset",)) if n in post]
    sel = post[names]
    rh, eb, et = az.rhat(sel), az.ess(sel, method="bulk"), az.ess(sel, method="tail")

    def flat(ds):
        return np.concatenate([np.ravel(ds[n].values) for n in names])

    r, b, t = flat(rh), flat(eb), flat(et)
    stats = idata.sample_stats
    div = int(stats["diverging"].values.sum()) if "diverging" in stats else 0
    worst = {n: float(np.nanmax(np.ravel(rh[n].values))) for n in names}
    max_r = float(np.nanmax(r)) if np.any(np.isfinite(r)) else float("nan")
    min_b = float(np.nanmin(b)) if np.any(np.isfinite(b)) else float("nan")
    min_t = float(np.nanmin(t)) if np.any(np.isfinite(t)) else float("nan")
    checks = {"r_hat_ok": bool(np.all(np.isfinite(r)) and max_r <= rhat_max),
              "ess_bulk_ok": bool(np.all(np.isfinite(b)) and min_b >= ess_min),
              "ess_tail_ok": bool(np.all(np.isfinite(t)) and min_t >= ess_min),
              "divergences_ok": div == 0}
    return dict(max_r_hat=max_r, min_ess_bulk=min_b, min_ess_tail=min_t, divergences=div,
                converged=all(checks.values()), checks=checks,
                thresholds=dict(r_hat_max=rhat_max, ess_min=ess_min, divergences_max=0),
                variables=names, r_hat_by_variable=worst)
