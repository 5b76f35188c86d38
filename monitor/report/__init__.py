"""The replay report: one HTML page and PNG plots beside it, readable from disk.

Per patient: the P/F ratio (measured and altitude-adjusted), the A–a gradient (with the
age-expected value) and the FiO2 over time, with each flag event marked where it
happened in simulated time. For the whole feed: flags per patient-day by rule and
priority, the time from the first worsening gas to the flag, and the share of flags
later retracted. With a second rule set (``compare``): both side by side, the
difference and how much earlier or later the flags both raised came.

One idea a module: ``compare`` (two rule sets), ``timing`` (time to flag, asked of the
rules), ``data`` (read back from the replay database), ``plots`` (matplotlib) and
``page`` (the autoescaped Jinja2 template). Every number is read back from the replay
database at the end; the values plotted are the stored derivations. The page names the
advisory sentence.
"""

from monitor.report.compare import (
    Comparison,
    TimingDifference,
    compare,
    comparison_table,
    flags_per_patient_day,
)
from monitor.report.data import PatientSeries, ReportData, collect
from monitor.report.page import write_report
from monitor.report.timing import FIRST_WORSENING_DEFINITION, TimeToFlag, first_worsening

__all__ = [
    "FIRST_WORSENING_DEFINITION",
    "Comparison",
    "PatientSeries",
    "ReportData",
    "TimeToFlag",
    "TimingDifference",
    "collect",
    "compare",
    "comparison_table",
    "first_worsening",
    "flags_per_patient_day",
    "write_report",
]
