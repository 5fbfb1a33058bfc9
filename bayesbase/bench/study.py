"""Benchmark of the study estimator for ``bayesbase bench`` (measures, never asserts a time)."""
from __future__ import annotations

import os
import time

import numpy as np
import pandas as pd

from ..priors import load_pack


def synthetic_study(n_animals: int = 20, n_specimens: int = 10, n_replicates: int = 2, n_analytes: int = 25,
                    seed: int = 0) -> pd.DataFrame:
    """Raw results table (tidy contract, strings as a file would hold them) of an invented study:
    weekly specimens, CVs and centres from the dog pack (invented data for benchmarks only)."""
    pack = load_pack("dog")
    rng = np.random.default_rng(seed)
    ids = list(pack.analytes)[:n_analytes]
    rows = []
    dates = pd.date_range("2025-01-06 08:30", periods=n_specimens, freq="7D")
    for aid in ids:
        p = pack.analytes[aid]
        set_pts = np.log(p.center) + rng.normal(0, p.sg, n_animals)
        for i in range(n_animals):
            for j in range(n_specimens):
                theta = set_pts[i] + rng.normal(0, p.si)
                for r in range(n_replicates):
                    v = float(np.exp(theta + rng.normal(0, p.sa)))
                    rows.append((f"BENCH-{i + 1:02d}", "dog", f"B{i + 1:02d}-S{j + 1}", dates[j].strftime("%Y-%m-%d %H:%M"),
                                 aid, f"{v:.6g}", p.unit, str(r + 1), "healthy"))
    return pd.DataFrame(rows, columns=["patient", "species", "specimen", "collected_at", "analyte", "value", "unit",
                                       "replicate", "state"])


#: issue 13's targets for the 20 x 10 x 2 study of 25 analytes (seconds of estimate())
TARGETS_S = {"anova": 1.0, "bayes": 60.0}


def _cpu_seconds() -> float:
    """CPU seconds of this process and its finished children (sampler worker processes)."""
    import resource

    me, ch = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + ch.ru_utime + ch.ru_stime


def _load() -> float | None:
    return round(os.getloadavg()[0], 2) if hasattr(os, "getloadavg") else None


def bench_study(n_animals: int = 20, n_specimens: int = 10, n_replicates: int = 2, n_analytes: int = 25,
                method: str = "anova", seed: int = 0, draws: int = 1000, tune: int = 1000,
                chains: int = 4, sampler: str = "auto") -> dict:
    """Wall and CPU time of :func:`bayesbase.study.estimate` on an invented 20 x 10 x 2 study of 25
    analytes (validation timed separately), per method (``"both"``: the classical and the Bayesian
    estimate, each timed on its own), with the ratio of each time to issue 13's target
    (:data:`TARGETS_S`; below 1 meets it) and the machine's 1-minute load average before and after
    (the wall time on a shared machine depends on it; the CPU time much less). The Bayesian estimate
    fits all analytes in one compiled model sampled once; fits that did not converge are counted,
    never hidden."""
    from ..validate import validate
    from ..study.core import estimate

    raw = synthetic_study(n_animals, n_specimens, n_replicates, n_analytes, seed)
    t = time.perf_counter()
    frame = validate(raw, source="bench_study.csv")
    out = {"analytes": n_analytes, "results": int(len(frame)), "design": f"{n_animals}x{n_specimens}x{n_replicates}",
           "validate_s": round(time.perf_counter() - t, 3)}
    for m in (("anova", "bayes") if method == "both" else (method,)):
        load0, cpu0, t = _load(), _cpu_seconds(), time.perf_counter()
        res = estimate(frame, method=m, seed=seed, draws=draws, tune=tune, chains=chains, sampler=sampler)
        wall, cpu = time.perf_counter() - t, _cpu_seconds() - cpu0
        out.update({f"estimate_{m}_s": round(wall, 3), f"estimate_{m}_cpu_s": round(cpu, 3),
                    f"{m}_ratio_to_target_{TARGETS_S[m]:g}s": round(wall / TARGETS_S[m], 3),
                    f"{m}_load_before_after": (load0, _load())})
        if m == "anova":
            out["removed"] = int(len(res.removed))
            continue
        fits = [f for f in res.bayes.values() if f is not None]
        s0 = fits[0].settings if fits else {}
        out.update(sampler=s0.get("sampler"), chains=chains, draws=draws, tune=tune,
                   compile_s=round(float(s0.get("compile_seconds", float("nan"))), 2),
                   compile_cpu_s=round(float(s0.get("compile_cpu_seconds", float("nan"))), 2),
                   bayes_fits=len(fits), bayes_converged=int(sum(f.converged for f in fits)),
                   max_r_hat=round(max(f.diagnostics["max_r_hat"] for f in fits), 4) if fits else None,
                   min_ess_bulk=round(min(f.diagnostics["min_ess_bulk"] for f in fits)) if fits else None,
                   min_ess_tail=round(min(f.diagnostics["min_ess_tail"] for f in fits)) if fits else None,
                   divergences=int(fits[0].diagnostics["divergences"]) if fits else None)
    return out


def bench_study_both(n_animals: int = 20, n_specimens: int = 10, n_replicates: int = 2,
                     n_analytes: int = 25, seed: int = 0, draws: int = 1000, tune: int = 1000,
                     chains: int = 4, sampler: str = "auto") -> dict:
    """:func:`bench_study` of both methods (the benchmark of issue 13 in ``bayesbase bench``)."""
    return bench_study(n_animals=n_animals, n_specimens=n_specimens, n_replicates=n_replicates,
                       n_analytes=n_analytes, method="both", seed=seed, draws=draws, tune=tune,
                       chains=chains, sampler=sampler)


def bench_study_coverage(n_studies: int = 500, n_animals: int = 12, n_specimens: int = 6, n_replicates: int = 2,
                         draws: int = 1000, tune: int = 1000, chains: int = 4, seed: int = 20261201,
                         batch_size: int = 50) -> dict:
    """The full seeded coverage study of the Bayesian model (:func:`bayesbase.study.bayes.coverage_study`;
    invented truth CVA 3 %, median CVI 10 %, spread 0.3, CVG 25 %): coverage of each 95 % interval,
    the binomial band for n_studies at 0.95 (scipy.stats.binom), converged fits and the time."""
    from ..study.bayes import coverage_study

    t = time.perf_counter()
    r = coverage_study(n_studies, seed, n_animals=n_animals, n_specimens=n_specimens,
                       n_replicates=n_replicates, draws=draws, tune=tune, chains=chains, batch_size=batch_size)
    est = r["estimates"]
    cvi = est[est["component"] == "cvi"]
    return {"studies": n_studies, "design": f"{n_animals}x{n_specimens}x{n_replicates}", "chains": chains,
            "draws": draws, "seed": seed, "coverage": {k: round(v, 3) for k, v in r["coverage"].items()},
            "band": tuple(round(b, 3) for b in r["band"]), "converged": r["n_converged"],
            "mean_log_ratio_to_truth": {k: round(v, 4) for k, v in r["log_bias"].items()},
            "mean_log_ratio_bayes_to_anova_cvi": round(float(np.mean(np.log(cvi["estimate"] / cvi["anova"]))), 4),
            "wall_s": round(time.perf_counter() - t, 1), "per_study_s": round(r["seconds_per_study"], 2)}
