"""Pieces shared by the batch and the one-recording report: headline numbers, settings, footer."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from datetime import datetime, timezone
from pathlib import Path

from beatlab._version import __version__
from beatlab.errors import InputError
from beatlab.output import CAUTION
from beatlab.report._format import (
    as_float,
    column_header,
    format_number,
    is_missing,
    metric_label,
    metric_unit,
)
from beatlab.report._html import Html, cards, element, join, key_values, table

__all__ = [
    "HEADLINE",
    "check_folder",
    "created_text",
    "footer",
    "frame_table",
    "headline_cards",
    "metric_pairs",
    "report_target",
    "section",
    "settings_block",
]

HEADLINE = (
    "beat_count",
    "beat_rate_bpm",
    "rhythm",
    "duration_90_s",
    "time_to_peak_s",
    "displacement_um",
    "contraction_velocity_um_s",
    "relaxation_velocity_um_s",
    "quality_snr",
)
"""Recording-level keys shown as headline numbers, in this order (those present)."""


def created_text() -> str:
    """The current time for the report's provenance, in UTC to the minute."""
    return datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def report_target(folder: Path, out) -> Path:
    """Where the report goes: ``out`` (a file, or a folder for report.html), else in the folder."""
    if out is None:
        return folder / "report.html"
    target = Path(out)
    return target / "report.html" if target.is_dir() else target


def check_folder(path, *, needs: Iterable[str], what: str, command: str) -> Path:
    """The folder as a Path; :class:`InputError` when it is missing or holds none of `needs`."""
    folder = Path(path)
    if not folder.is_dir():
        raise InputError(f"{folder} is not a folder; pass the folder that {command} wrote")
    needs = tuple(needs)
    if not any((folder / name).is_file() for name in needs):
        raise InputError(
            f"{folder} is not {what} (no {' or '.join(needs)}); pass the folder that "
            f"{command} wrote"
        )
    return folder


def section(anchor: str, title: str, content) -> Html:
    """A ``<section>`` with its heading; the anchor is the target of the navigation link."""
    return element("section", element("h2", title) + content, id=anchor)


def headline_cards(values: Mapping, *, keys: Iterable[str] = HEADLINE) -> Html:
    """Headline numbers of one recording as cards, for the keys of `keys` present in `values`.

    Parameters
    ----------
    values : mapping
        A row of ``recordings.csv`` or a flattened ``summary.json``
        (:func:`beatlab.report._read.flatten_summary`).
    keys : iterable of str
        Keys to show, in order.

    Returns
    -------
    Html
    """
    items = [
        (metric_label(key), format_number(values[key]), metric_unit(key))
        for key in keys
        if key in values
    ]
    return cards(items) if items else Html("")


def _value_text(value) -> str:
    """A value for a (name, value) table: lists item by item, ``none`` when empty."""
    if isinstance(value, (list, tuple)):
        return ", ".join(format_number(v) for v in value) or "none"
    return format_number(value)


def metric_pairs(values: Mapping, keys: Iterable[str]) -> list[tuple]:
    """(header with unit, value) pairs for the keys present, for :func:`key_values`."""
    return [
        (element("span", column_header(key), title=key), _value_text(values[key]))
        for key in keys
        if key in values
    ]


def settings_block(config: Mapping, *, title: str) -> Html:
    """A configuration (section -> key -> value) as one collapsible table per section."""
    if not isinstance(config, Mapping) or not config:
        return element("p", "No configuration recorded.", cls="note")
    blocks = []
    for name, values in config.items():
        if isinstance(values, Mapping):
            pairs = [(element("code", f"{name}.{key}"), value) for key, value in values.items()]
        else:
            pairs = [(element("code", name), values)]
        blocks.append(
            element(
                "details",
                element("summary", element("code", f"[{name}]"))
                + element("div", key_values(pairs), cls="inner"),
                cls="block",
            )
        )
    return element("h3", title) + join(blocks)


def footer(*, wrote: str, created: str) -> Html:
    """The footer: the research-use caution and what made the report, when."""
    made = f"Made by beatlab {__version__} on {created} from {wrote}. "
    made += "One self-contained file: no scripts, no external resources."
    return element("p", CAUTION, cls="caution") + element("p", made)


def frame_table(frame, columns: Iterable[str], *, formatters: Mapping | None = None) -> Html:
    """Some columns of a text table, with unit headers; numbers formatted and right-aligned.

    Parameters
    ----------
    frame : pandas.DataFrame
        Cells as text (as :func:`beatlab.report._read.read_csv` gives them).
    columns : iterable of str
        Columns to show, in order; those missing from `frame` are skipped.
    formatters : mapping, optional
        Column -> function(cell) -> text or Html, instead of :func:`format_number`.

    Returns
    -------
    Html
    """
    formatters = dict(formatters or {})
    names = [c for c in columns if c in frame.columns]
    numeric = [
        i
        for i, name in enumerate(names)
        if all(is_missing(v) or as_float(v) == as_float(v) for v in frame[name])
        and not all(is_missing(v) for v in frame[name])
    ]
    rows = (
        [
            formatters.get(name, format_number)(value)
            for name, value in zip(names, values, strict=True)
        ]
        for values in frame[names].itertuples(index=False)
    )
    headers = [column_header(name) for name in names]
    return table(headers, rows, numeric=numeric, titles=names)
