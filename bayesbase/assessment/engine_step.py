"""Stage 7: the model's answer for every case, from the exact engine or (lazily imported) PyMC."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..model.engine import CaseArrays, exact_assess
from .options import Options

__all__ = ["EngineResult", "run_engine"]


@dataclass(frozen=True)
class EngineResult:
    """Summaries per case (keys of ``exact_assess``), convergence, settings to stamp."""

    summary: dict
    converged: np.ndarray
    settings: dict[str, Any]
    mcmc: Any = None  # the McmcResult (PyMC engine only)


def _settings(opts: Options) -> dict[str, Any]:
    return {"coverage": opts.coverage, "ci_prob": opts.ci_prob, "shift_scale": opts.shift_scale or 1.0,
            "keep_compromised": opts.keep_compromised}


def _exact(cases: CaseArrays, opts: Options) -> EngineResult:
    res = exact_assess(cases, coverage=opts.coverage, ci_prob=opts.ci_prob, nodes=opts.nodes)
    settings = _settings(opts)
    settings["nodes"] = opts.nodes
    settings["quadrature"] = "Gauss-Hermite over ln(CVI)"
    return EngineResult(summary=res, converged=np.ones(cases.n_cases, dtype=bool), settings=settings)


def _mcmc(cases: CaseArrays, opts: Options, patient: list, analyte: list) -> EngineResult:
    from ..mcmc.engine import mcmc_assess  # PyMC is imported only here

    mres = mcmc_assess(cases, coverage=opts.coverage, ci_prob=opts.ci_prob, seed=opts.seed,
                       patient=patient, analyte=analyte, **dict(opts.mcmc_options))
    conv = bool(mres.diagnostics.get("converged", False))
    settings = _settings(opts)
    settings.update({k: v for k, v in mres.settings.items() if k != "seed"})
    return EngineResult(summary=mres.summary, converged=np.full(cases.n_cases, conv), settings=settings,
                        mcmc=mres)


def run_engine(cases: CaseArrays, opts: Options, patient: list, analyte: list) -> EngineResult:
    """``opts.engine`` on ``cases``; ``patient`` and ``analyte`` label the cases for PyMC."""
    if opts.engine == "exact":
        return _exact(cases, opts)
    return _mcmc(cases, opts, patient, analyte)
