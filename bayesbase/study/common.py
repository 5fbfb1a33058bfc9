"""Shared names of the biological-variation study package (standard library only).

References used across the package (cited again beside the code that uses them)
---------------------------------------------------------------------------------
.. [FraserHarris1989] Fraser CG, Harris EK. Generation and application of data on biological
   variation in clinical chemistry. Crit Rev Clin Lab Sci 1989;27:409-437 (order of the outlier
   steps; number of results for a set point).
.. [Roraas2012] Roraas T, Petersen PH, Sandberg S. Confidence intervals and power calculations
   for within-person biological variation: effect of analytical imprecision, number of
   replicates, number of samples, and number of individuals. Clin Chem 2012;58:1306-1313.
.. [Roraas2016] Roraas T, Stove B, Petersen PH, Sandberg S. Biological variation: the effect of
   different distributions on estimated within-person variation in a healthy population. Clin
   Chem 2016;62:725-736 (CV-ANOVA).
.. [Roraas2019] Roraas T, Sandberg S, Aarsand AK, Stove B. A Bayesian approach to biological
   variation analysis. Clin Chem 2019 (doi 10.1373/clinchem.2018.300145).
.. [BurdickGraybill1992] Burdick RK, Graybill FA. Confidence Intervals on Variance Components.
   New York: Marcel Dekker; 1992 (modified large-sample intervals, chapter 3).
"""
from __future__ import annotations

from ..errors import BayesbaseError

#: Significance level of the outlier and homogeneity tests (common practice in BV studies).
DEFAULT_ALPHA = 0.05
#: Half-width of the set-point target for ``n_for_setpoint`` (+/- 10 %, common practice).
SETPOINT_TOLERANCE = 0.10
#: Desirable analytical imprecision: CVA <= 0.5 CVI (common practice in the BV literature;
#: Fraser & Petersen hierarchy, from memory for the citation).
DESIRABLE_CVA_FRACTION = 0.5
#: Methods a study can be estimated with.
METHODS = ("anova", "bayes", "both")
#: Components of the tidy output, in display order.
COMPONENTS = ("cva", "cvi", "cvi_spread_log_sd", "cvi_new_animal", "cvg")
#: Exact columns of estimates.csv (issue 13).
ESTIMATE_COLUMNS = (
    "analyte", "unit", "method", "n_animals", "n_specimens", "n_results", "n_removed",
    "cva_pct", "cva_lower", "cva_upper", "cvi_pct", "cvi_lower", "cvi_upper", "cvi_spread_log_sd",
    "cvg_pct", "cvg_lower", "cvg_upper", "ii", "rcv_pct", "n_for_setpoint",
)
#: Columns of removed.csv: one row per removal (or per outlier kept with --no-outlier-removal).
REMOVED_COLUMNS = (
    "analyte", "step", "test", "level", "animal", "specimen", "n_results", "statistic",
    "critical_value", "alpha", "action", "reason",
)


class StudyError(BayesbaseError):
    """A study file or design that cannot be analysed (the message names the file/analyte)."""
