"""Self-contained HTML reports of a batch folder and of one recording's analysis folder.

A report is one file: inline stylesheet, figures embedded as base64 PNG, no scripts and no
external resources, so it opens from anywhere (a USB stick, an e-mail attachment). Every text
from a file name, a layout cell or metadata is HTML-escaped.
"""

from beatlab.report.batch import build_batch_report
from beatlab.report.recording import build_recording_report

__all__ = ["build_batch_report", "build_recording_report"]
