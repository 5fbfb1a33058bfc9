"""The clinician's report of one patient (layer 5).

- :mod:`.content`: the frozen content model built from an Assessment and its prior pack;
- :mod:`.wording`: every sentence and number format, written once;
- :mod:`.panel`: the panel rules (false-discovery selection, many-results chance, P(change) band);
- :mod:`.html` (jinja2 template, autoescape on) and :mod:`.pdf` (fpdf2): layout only;
- :mod:`.templating`: the one jinja2 set-up (the report's and the web desk's templates);
- :mod:`.figures`: the small-multiple figures (matplotlib, no pyplot): every panel of a report
  drawn once in one shared figure, cut out per analyte for the HTML and the PDF;
- :mod:`.build`: writes the files (HTML, PDF, PNG/SVG) and assesses a results file for a report.

References
----------
.. [1] Fraser CG, Harris EK. Generation and application of data on biological variation in
   clinical chemistry. Crit Rev Clin Lab Sci 1989;27:409-437 (index of individuality cut-offs
   0.6 and 1.4).
.. [2] Harris EK. Effects of intra- and interindividual variation on the appropriate use of
   normal ranges. Clin Chem 1974 (II = CVI/CVG).
.. [3] Fraser CG. Reference change values. Clin Chem Lab Med 2012;50:807-812 (classical RCV).
.. [4] Fokkema MR et al. Clin Chem 2006;52:1602 (log-normal, asymmetric RCV).
.. [5] Many results at once: P(at least one of n outside a central 95 % interval) = 1 - 0.95^n;
   n = 10 gives P(none outside) 60 % (Clin Chem Lab Med 2004;42:747).
.. [6] Bayesian false-discovery control by the posterior expected share of false alarms in the
   listed set (Newton MA et al., Biostatistics 2004;5:155-176 [from memory]).
"""
from .build import ReportFiles, build_report, personal_interval_path, report_for_file
from .content import ReportContent, build_content, panel_summary, report_rows, retest_advice
from .panel import chance_any_outside, change_band, select_changes
from .wording import fmt_value, individuality_short, individuality_words

__all__ = [
    "ReportFiles", "ReportContent", "build_content", "build_report", "chance_any_outside",
    "change_band", "fmt_value", "individuality_short", "individuality_words", "panel_summary",
    "personal_interval_path", "report_for_file", "report_rows", "retest_advice",
    "select_changes",
]
