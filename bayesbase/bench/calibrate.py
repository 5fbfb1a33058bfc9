"""Benchmarks of ``bayesbase calibrate`` for ``bayesbase bench`` (measure, never assert a time).

* :func:`bench_calibrate`: an invented store of 500 animals x 20 analytes x 4 specimens (the dog
  pack's first 20 analytes, :func:`bayesbase.calibrate.simulate.demo_truths`; breeds of unequal
  sizes, :data:`~bayesbase.calibrate.simulate.BENCH_BREEDS`; two methods) through
  :func:`bayesbase.calibrate.calibrate`.
* :func:`bench_calibrate_large`: 10,000 animals of one analyte, the likelihood taken per animal
  through its sufficient statistics (``likelihood="animal_stats"``, exact; ``auto`` takes it
  when every specimen has one replicate, as here; the figure says which was used).

Sampler ``auto`` (the default here): nutpie (numba backend) when it is installed, which the
targets need (PyMC's NUTS costs a Python step per leapfrog), else PyMC; the figure names the
sampler used. The fit is the default per-analyte fit (:mod:`bayesbase.calibrate.split`: the
same posterior, one graph compiled per structure and reused for every analyte; ``fit_form``).

Measured 2026-12-03 (shared 2-core machine, load 4-16; nutpie 0.16.8, per-analyte fit, latent
CVI, 4 x 1000 draws after 1000 tuning): the 500 x 20 x 4 store took 588 CPU seconds in all
(about 145 building, simulating and compiling; about 22 per analyte sampling), max R-hat 1.014
(cvi_log_sd), min bulk / tail ESS 271 / 142, 10 divergences: short of the targets. One analyte
alone: 15 CPU s sampling, 15 leapfrog steps per draw (depth 4); the quadrature form (12 nodes)
needs 7 steps per draw but 69 CPU s, with 6 divergences on the second analyte. Again after the
graph's parameter checks were dropped and a part's parameters broadcast (same density;
:mod:`bayesbase.calibrate.model`, cost per gradient; 123 -> 96 microseconds per numba
logp+gradient), load 7-14: 418 CPU seconds in all (nutpie's one compile 318 s wall under that
load), max R-hat 1.011 (cvi_log_sd), min bulk / tail ESS 292 / 142, 17 divergences: still short.
At about 15 leapfrog steps per draw and 96 microseconds per gradient, 20 analytes x 4 chains x
2000 iterations need at least 20 x 8000 x 15 x 96e-6 = 230 CPU seconds, about 115 s on 2 idle
cores: the per-call node overhead of the compiled graph and the steps per draw dominate. The
10,000-animal creatinine store (same code, load 4-11): 515 CPU seconds in all (nutpie compile
433 s wall under that load), max R-hat 1.008 (cvi_z), min bulk / tail ESS 1251 / 1647, 0
divergences: converged.

Since 2026-12-04 the fit integrates the location parameters out by default (``locations``
auto; :mod:`bayesbase.calibrate.model` has the before/after measurements: no divergences on the
stores that had them, about twice the CPU per draw, the CVI spread's ESS still short on some
analytes); the figure says which form was used (``locations``) and the leapfrog steps per draw.

Measured 2026-12-04 (idle 2-core machine, load 0.4-1.4; nutpie 0.16.8, the default form: per
analyte, locations integrated out, latent CVI with the compiled operation of
:mod:`bayesbase.calibrate._locop`): the 500 x 20 x 4 store with :data:`BENCH_DRAWS` after
:data:`BENCH_TUNE`, target acceptance 0.9, seed 0: sampling 54.3 s, nutpie compile 29.8 s, max
R-hat 1.0054, min bulk / tail ESS 800 / 671, 0 divergences, 15.1 leapfrog steps per draw; seed 1:
56.3 s, 1.0052, 802 / 713, 0; seed 2: 48.1 s, 1.0112 (cvi_log_sd of albumin, ESS 551): not
converged. With :data:`BENCH_TARGET_ACCEPT` (0.85), ``bayesbase bench --only calibrate``, seed 0:
sampling 43.5 s, compile 22.1 s, max R-hat 1.0077, min bulk / tail ESS 1207 / 1313, 0 divergences,
15.0 steps per draw; seeds 1, 2 and 3 (same settings, load 1.1-2.1): 49.9, 41.7 and 47.0 s,
max R-hat 1.0068, 1.0066 and 1.008, min bulk ESS 1370, 1251 and 1184, 0 divergences. The 10,000-animal creatinine store (4 x 1000 after 1000, sufficient statistics per
animal): sampling 84.2 s, compile 26.6 s, 210 CPU s in all, max R-hat 1.009 (cvi_z), min bulk /
tail ESS 1365 / 1863, 0 divergences, 31 leapfrog steps per draw (10,005 dimensions).

Each reports wall seconds, the sampling seconds alone, the seconds of building and compiling the
model (nutpie's compile measured alone beside it), the CPU seconds of the process and its children
(the sampler's chain processes), the load average before and after (the machine may be shared),
the convergence figures the gate uses (max R-hat, min bulk and tail ESS, divergences) and, beside
them, the issue's targets (:data:`TARGETS`). ``cvi_form`` says how the animals' CVIs entered
(the model's default, latent, or quadrature with its node count).
"""
from __future__ import annotations

import os
import resource
import time

#: Tuning steps and draws per chain of the 500 x 20 x 4 benchmark (``bayesbase calibrate --tune 500
#: --draws 1500``; the command's defaults stay 1000 and 1000 for stores unlike this one): the same
#: 2000 iterations per chain as the defaults, spent on draws where 500 tuning steps were measured
#: to be enough. Measured 2026-12-04, nutpie, the bench store's first 4 analytes, 4 x 1000 draws,
#: seeds 0 / 1: tune 1000 -> 500 sampling 17.2 -> 12.8 s (seed 0), min bulk / tail ESS 548 / 623 ->
#: 704 / 765 and 1033 / 1631 (seed 1), max R-hat 1.0090 -> 1.0082 and 1.0059, 0 divergences, 15
#: leapfrog steps per draw either way. The whole store with 4 x 1000 after 500: max R-hat 1.0105
#: (cvi_log_sd, min bulk ESS 544); at that ESS the CVI spread's split R-hat passes 1.01 only by
#: chance, so the draws went to 1500 (min bulk ESS 800, max R-hat 1.0054, seed 0).
BENCH_TUNE = 500
BENCH_DRAWS = 1500
#: NUTS target acceptance rate of the 500 x 20 x 4 benchmark (``bayesbase calibrate --target-accept
#: 0.85``; the command's default stays 0.9, measured on more kinds of store). Measured 2026-12-04,
#: nutpie, 4 x 1500 after 500, the whole store, 0.9 -> 0.85: seed 0 min bulk / tail ESS 800 / 671
#: -> 1207 / 1313, seed 2 551 / 579 (max R-hat 1.0112, cvi_log_sd of albumin: not converged) ->
#: 1251 / 1234 (1.0066), 0 divergences throughout, 15 leapfrog steps per draw either way (longer
#: steps, same count). At 0.8 seed 0 fell to a min tail ESS of 252.
BENCH_TARGET_ACCEPT = 0.85
#: The targets of issue 15 for the 500 x 20 x 4 store (printed beside the measured figures).
TARGETS = "sampling < 60 s, max r_hat < 1.01, 0 divergences"


def _cpu_seconds() -> float:
    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def _sampling_seconds(cal) -> float:
    """Seconds of sampling alone: PyMC stamps ``sampling_time`` on the posterior; otherwise the
    fit's seconds less the compile time that the fit recorded."""
    post = cal.idata.posterior.attrs
    return float(post.get("sampling_time", post.get("sample_seconds", cal.attrs["seconds"])))


def resolve_sampler(sampler: str) -> str:
    """``auto``: nutpie when installed, else PyMC (module docstring)."""
    if sampler != "auto":
        return sampler
    import importlib.util

    return "nutpie" if importlib.util.find_spec("nutpie") is not None else "pymc"


def _measure(frame, analytes, *, draws, tune, chains, sampler, seed, **fit_kw) -> dict:
    from ..calibrate.job import calibrate

    asked, sampler = sampler, resolve_sampler(sampler)
    load0, cpu0, t = os.getloadavg()[0], _cpu_seconds(), time.perf_counter()
    cal = calibrate(frame, species="dog", analytes=list(analytes), draws=draws, tune=tune, chains=chains,
                    seed=seed, sampler=sampler, **fit_kw)
    wall, cpu = time.perf_counter() - t, _cpu_seconds() - cpu0
    d = cal.diagnostics
    post = cal.idata.posterior.attrs
    return {"results": len(frame), "sampler": f"{sampler} (asked: {asked})", "fit_form": cal.attrs.get("fit_form"),
            "chains x draws (tune)": f"{chains} x {draws} ({tune})",
            "target_accept": cal.attrs.get("target_accept"),
            "calibrate_wall_s": round(wall, 1), "fit_s (build, compile, sample)": round(cal.attrs["seconds"], 1),
            "sampling_s": round(_sampling_seconds(cal), 1),
            "build_compile_s (fit_s - sampling_s)": round(cal.attrs["seconds"] - _sampling_seconds(cal), 1),
            "nutpie_compile_s": round(float(post.get("compile_seconds", float("nan"))), 1),
            "cpu_s (process + chain processes)": round(cpu, 1),
            "load_avg_1min (before, after)": f"{load0:.1f}, {os.getloadavg()[0]:.1f}", "cpus": os.cpu_count(),
            "max_r_hat": round(d["max_r_hat"], 4), "min_ess_bulk": round(d["min_ess_bulk"]),
            "min_ess_tail": round(d["min_ess_tail"]), "divergences": d["divergences"], "converged": d["converged"],
            "worst_r_hat_variable": max(d["r_hat_by_variable"], key=d["r_hat_by_variable"].get),
            "likelihood": cal.idata.posterior.attrs.get("likelihood", "?"),
            "locations": cal.idata.posterior.attrs.get("locations", "?"),
            "leapfrog_steps_per_draw": round(float(cal.idata.sample_stats["n_steps"].mean()), 2)
            if "n_steps" in cal.idata.sample_stats else float("nan"),
            "cvi_form": f"{cal.idata.posterior.attrs.get('cvi', '?')} ({cal.idata.posterior.attrs.get('cvi_nodes', '?')} nodes)",
            "centred_breed_levels": cal.idata.posterior.attrs.get("centred_breed_levels", "?")}


def bench_calibrate(n_animals: int = 500, n_specimens: int = 4, n_analytes: int = 20, analytes=None,
                    draws: int = BENCH_DRAWS, tune: int = BENCH_TUNE, chains: int = 4, sampler: str = "auto",
                    seed: int = 0, target_accept: float = BENCH_TARGET_ACCEPT) -> dict:
    """Calibration of an invented store (module docstring): ``analytes`` default the dog pack's
    first ``n_analytes``."""
    from ..calibrate.simulate import BENCH_BREEDS, demo_truths, simulate_store
    from ..priors import load_pack

    pack = load_pack("dog")
    analytes = tuple(analytes or list(pack.analytes)[:n_analytes])
    frame, _ = simulate_store(seed=seed, n_animals=n_animals, n_specimens=n_specimens, analytes=analytes,
                              truths=demo_truths(analytes, pack, seed=seed), breed_counts=BENCH_BREEDS)
    out = {"animals": n_animals, "specimens_per_animal": n_specimens, "analytes": len(analytes)}
    out.update(_measure(frame, analytes, draws=draws, tune=tune, chains=chains, sampler=sampler, seed=seed,
                        target_accept=target_accept))
    out["targets (issue 15, 500 x 20 x 4)"] = TARGETS
    return out


def bench_calibrate_large(n_animals: int = 10_000, n_specimens: int = 4, analyte: str = "creatinine",
                          draws: int = 1000, tune: int = 1000, chains: int = 4, sampler: str = "auto",
                          seed: int = 0) -> dict:
    """One analyte over many animals, the likelihood per animal by sufficient statistics
    (module docstring)."""
    from ..calibrate.simulate import BENCH_BREEDS, demo_truths, simulate_store

    frame, _ = simulate_store(seed=seed, n_animals=n_animals, n_specimens=n_specimens, analytes=(analyte,),
                              truths=demo_truths((analyte,), seed=seed), breed_counts=BENCH_BREEDS)
    out = {"animals": n_animals, "specimens_per_animal": n_specimens, "analyte": analyte}
    out.update(_measure(frame, (analyte,), draws=draws, tune=tune, chains=chains, sampler=sampler, seed=seed))
    out["target (issue 15)"] = "a stated figure; convergence as above (max r_hat < 1.01, 0 divergences)"
    return out
