"""Self-contained HTML reports of a batch folder and of one recording's analysis folder.

A report is one file: inline stylesheet, figures embedded as base64 PNG, no scripts and no
external resources, so it opens from anywhere (a USB stick, an e-mail attachment). Every text
from a file name, a layout cell or metadata is HTML-escaped.
"""

from beatlab._lazy import lazy_names

__all__ = ["build_batch_report", "build_recording_report"]

# Imported when first used (PEP 562): a recording's report must not import the batch report's
# modules (the batch runner, scipy.stats).
_LAZY = {
    "build_batch_report": "beatlab.report.batch",
    "build_recording_report": "beatlab.report.recording",
}

__getattr__, __dir__ = lazy_names(__name__, _LAZY)
