"""Stage 1: the options of one assessment, checked once (a frozen dataclass)."""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

from ..constants import DEFAULT_CI_PROB, DEFAULT_COVERAGE, DEFAULT_PRIOR_DRIFT, DEFAULT_QUAD_NODES
from ..errors import BayesbaseError

__all__ = ["Options", "ENGINES"]

#: engines an assessment can run: the conjugate update with quadrature, or PyMC (same model)
ENGINES = ("exact", "mcmc")


@dataclass(frozen=True)
class Options:
    """Everything :func:`bayesbase.assessment.assess` takes besides the results (see its
    docstring for the meaning of each field). Construction checks the values."""

    pack: Any = None
    priors: Any = None
    engine: str = "exact"
    coverage: float = DEFAULT_COVERAGE
    prior_change: float | None = None
    shift_scale: float | None = None
    at: Any = None
    patient: Any = None
    keep_compromised: bool = False
    #: stated biases {analyte: (bias fraction, SD fraction)}; an analyte given here wins over the
    #: pack's calibrated ``method_biases`` (:mod:`bayesbase.assessment.cases`)
    method_bias: Mapping[str, tuple[float, float]] = field(default_factory=dict)
    seed: int = 0
    ci_prob: float = DEFAULT_CI_PROB
    nodes: int = DEFAULT_QUAD_NODES
    trend: bool = True
    prior_drift: float | None = None
    mcmc_options: Mapping[str, Any] = field(default_factory=dict)
    now: Any = None
    #: worker processes for a large history (:mod:`bayesbase.assessment.pool`)
    jobs: int = 1

    def __post_init__(self):
        if self.engine not in ENGINES:
            raise BayesbaseError(f"unknown engine '{self.engine}' (choose exact or mcmc)")
        if not 0 < self.coverage < 1:
            raise BayesbaseError("coverage must lie between 0 and 1")
        if self.prior_change is not None and not 0 < self.prior_change < 1:
            raise BayesbaseError("prior probability of change must lie between 0 and 1")
        if isinstance(self.jobs, bool) or not isinstance(self.jobs, int) or self.jobs < 1:
            raise BayesbaseError(f"jobs must be a whole number of at least 1, got {self.jobs!r}")
        object.__setattr__(self, "method_bias", dict(self.method_bias or {}))
        for analyte, pair in self.method_bias.items():
            try:
                b, sd = (float(x) for x in pair)
            except (TypeError, ValueError):
                raise BayesbaseError(f"method_bias[{analyte!r}]: expected (bias fraction, SD fraction), "
                                     f"got {pair!r}") from None
            if not (math.isfinite(b) and math.isfinite(sd) and b > -1 and sd >= 0):
                raise BayesbaseError(f"method_bias[{analyte!r}]: need a bias > -1 and an SD >= 0 (fractions), "
                                     f"got {pair!r}")
        object.__setattr__(self, "mcmc_options", dict(self.mcmc_options or {}))

    @property
    def patients(self) -> set[str] | None:
        """The patient ids asked for (None: every patient)."""
        if self.patient is None:
            return None
        if isinstance(self.patient, (str, int)):
            return {str(self.patient)}
        return {str(p) for p in self.patient}

    @property
    def drift_prior(self) -> float:
        """Prior probability of drift of the trend model."""
        return self.prior_drift if self.prior_drift is not None else DEFAULT_PRIOR_DRIFT
