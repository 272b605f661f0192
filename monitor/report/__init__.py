"""Reading the history: terminal views, figures and the self-contained HTML report.

This is a face of regwarden: it reads the history store through
:class:`storage.history.HistoryStore`'s queries and presents what the nightly
runs stored.  It computes no statistics and runs no SQL of its own.

- :mod:`monitor.report._views`: terminal views (:class:`View`) and their CSV/JSON forms;
- :mod:`monitor.report._plots`: Matplotlib figures of trends and of one night's errors;
- :mod:`monitor.report._evidence`: the arrays a night's checks stored in their ``detail``;
- :mod:`monitor.report._changes`: "what changed, and since when";
- :mod:`monitor.report._html`: the one-file HTML report.
"""

from ._changes import Changes, what_changed
from ._evidence import NightEvidence, night_evidence
from ._html import CAUTIONS, render_report, write_report
from ._views import (
    View,
    alerts_view,
    check_outcomes,
    coefficient_paths,
    metric_trend,
    nights,
    notes,
    verdict_timeline,
    view_to_csv,
    view_to_json,
)

__all__ = [
    "CAUTIONS",
    "Changes",
    "NightEvidence",
    "View",
    "alerts_view",
    "check_outcomes",
    "coefficient_paths",
    "metric_trend",
    "night_evidence",
    "nights",
    "notes",
    "render_report",
    "verdict_timeline",
    "view_to_csv",
    "view_to_json",
    "what_changed",
    "write_report",
]
