"""Self-contained HTML reports of a batch folder and of one recording's analysis folder.

A report is one file: inline stylesheet, figures embedded as base64 PNG, no scripts and no
external resources, so it opens from anywhere (a USB stick, an e-mail attachment). Every text
from a file name, a layout cell or metadata is HTML-escaped.
"""

__all__ = ["build_batch_report", "build_recording_report"]

# Imported when first used (PEP 562): a recording's report must not import the batch report's
# modules (the batch runner, scipy.stats).
_LAZY = {
    "build_batch_report": "beatlab.report.batch",
    "build_recording_report": "beatlab.report.recording",
}


def __getattr__(name: str):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
