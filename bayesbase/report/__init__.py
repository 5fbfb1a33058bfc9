"""The clinician's report: content built from an Assessment, rendered as HTML and PDF, with the
small-multiple figures of :mod:`.figures`."""
from .core import (
    ReportFiles,
    build_report,
    chance_any_outside,
    fmt_value,
    individuality_words,
    panel_summary,
    personal_interval_path,
    report_for_file,
    retest_advice,
    select_changes,
)

__all__ = [
    "ReportFiles", "build_report", "chance_any_outside", "fmt_value", "individuality_words",
    "panel_summary", "personal_interval_path", "report_for_file", "retest_advice", "select_changes",
]
