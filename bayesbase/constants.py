"""Documented defaults, declared once (standard library only).

Every default that is a modelling choice says so; none is a literature value.
"""
from __future__ import annotations

#: Central coverage of the personal interval (0.99 for a specificity-first screen).
DEFAULT_COVERAGE = 0.95
#: Credible-interval probability for the set point and other posterior summaries.
DEFAULT_CI_PROB = 0.95
#: Prior probability that an assessed result reflects a true change (modelling choice of this
#: project: one in ten assessed results of a patient brought for a check comes with a real change;
#: configurable with --prior-change).
DEFAULT_PRIOR_CHANGE = 0.10
#: Number of Gauss-Hermite nodes over ln(CVI) in the exact engine (error vs a dense grid is tested).
DEFAULT_QUAD_NODES = 24
#: Posterior probability above which a change is called "probable" before panel FDR control.
PROBABLE_CHANGE = 0.5
#: Target expected share of false alarms among analytes listed in a panel summary.
PANEL_FDR = 0.10
#: Band of P(change) in which the answer is called uncertain and a retest is suggested.
UNCERTAIN_BAND = (0.2, 0.8)
#: Trend model is computed with at least this many usable specimens spanning this many years.
TREND_MIN_SPECIMENS = 3
TREND_MIN_SPAN_YEARS = 0.5
#: Horizon for time-to-limit projections, in years.
TREND_HORIZON_YEARS = 10.0
#: Prior probability of drift in the trend model (modelling choice; configurable).
DEFAULT_PRIOR_DRIFT = 0.10

#: Dimension names used in every labelled output.
DIM_PATIENT = "patient"
DIM_ANALYTE = "analyte"
DIM_OBS = "obs"
DIM_CI = "ci_bound"
CI_BOUNDS = ("lower", "upper")

CAUTIONS = (
    "Decision support, not a diagnosis.",
    "Interpret with the animal's history and clinical examination.",
    "Defer to the attending veterinarian, a clinical pathologist and local regulation.",
)
