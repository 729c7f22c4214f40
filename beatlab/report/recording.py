"""The report of one recording: an ``analyze`` output folder as one self-contained HTML file."""

from __future__ import annotations

import os
from pathlib import Path

from beatlab.errors import InputError
from beatlab.report._figures import recording_figures
from beatlab.report._format import format_number
from beatlab.report._html import Html, element, join, key_values, page, write_document
from beatlab.report._parts import (
    check_folder,
    created_text,
    footer,
    frame_table,
    headline_cards,
    metric_pairs,
    report_target,
    section,
    settings_block,
)
from beatlab.report._read import flatten_summary, read_csv, read_json

__all__ = ["build_recording_report"]

RHYTHM_KEYS = (
    "ibi_mean_s", "ibi_cv", "sdnn_s", "rmssd_s", "sd1_s", "sd2_s", "longest_pause_s",
    "irregular_fraction", "secondary_peak_beats", "alternans_index",
)  # fmt: skip
"""Interval and rhythm keys of summary.json shown in their own table."""

TIMING_KEYS = (
    "duration_50_s", "relax_50_s", "relax_90_s", "duration_90_bazett_s",
    "duration_90_fridericia_s", "duration_90_stv_s", "opd_change_nm", "beating_area_fraction",
    "n_regions",
)  # fmt: skip
"""Further beat timing and amplitude keys of summary.json."""

BEAT_COLUMNS = (
    "beat", "onset_s", "peak_s", "end_s", "ibi_s", "time_to_peak_s", "duration_50_s",
    "duration_90_s", "displacement_um", "opd_change_nm", "contraction_velocity_um_s",
    "relaxation_velocity_um_s", "secondary_peak", "irregular",
)  # fmt: skip
"""Columns of beats.csv shown in the beat table."""

REGION_COLUMNS = (
    "region", "area_um2", "beat_count", "beat_rate_bpm", "rhythm", "time_to_peak_s",
    "duration_90_s", "displacement_um", "snr",
)  # fmt: skip
"""Columns of regions.csv shown in the region table."""


def _warnings(summary: dict) -> Html:
    items = summary.get("warnings")
    if not isinstance(items, list) or not items:
        return element("p", "No warnings were raised during the analysis.", cls="note")
    return element("h3", "Warnings") + element("ul", join(element("li", w) for w in items))


def _quality(summary: dict) -> Html:
    quality = summary.get("quality")
    if not isinstance(quality, dict):
        return element("p", "summary.json holds no quality block.", cls="note")
    values = {}
    for key, value in quality.items():
        if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            value = f"{len(value)} segments"  # refreshed templates: the count is what matters
        values[f"quality_{key}"] = value
    pairs = metric_pairs(values, values)
    return key_values(pairs) + _warnings(summary)


def _beats(folder: Path) -> Html:
    loaded = read_csv(folder / "beats.csv")
    if loaded.data is None:
        return element("p", f"No beat table: {loaded.note}.", cls="note")
    beats = loaded.data
    if beats.empty:
        return element("p", "No beats were detected (beats.csv is empty).", cls="note")
    summary = element("summary", f"All {len(beats)} beats (beats.csv)")
    body = element("div", frame_table(beats, BEAT_COLUMNS), cls="inner")
    return element("details", summary + body, cls="block")


def _regions(folder: Path, summary: dict) -> Html:
    parts = []
    loaded = read_csv(folder / "regions.csv")
    if loaded.data is not None and len(loaded.data) > 0:
        parts.append(element("h3", "Independently beating regions (regions.csv)"))
        parts.append(frame_table(loaded.data, REGION_COLUMNS))
    propagation = summary.get("propagation")
    if isinstance(propagation, dict):
        parts.append(element("h3", "Propagation of the beat onset"))
        values = _prefixed(propagation, "propagation_")
        parts.append(key_values(metric_pairs(values, values)))
    if not parts:
        return element(
            "p", "No region table and no propagation result in this folder.", cls="note"
        )
    return join(parts)


def _prefixed(values: dict, prefix: str) -> dict:
    return {f"{prefix}{k}": v for k, v in values.items()}


def _metadata(summary: dict) -> Html:
    metadata = summary.get("metadata")
    if not isinstance(metadata, dict):
        return element("p", "summary.json holds no metadata block.", cls="note")
    flat = {k: v for k, v in metadata.items() if not isinstance(v, dict)}
    for name, inner in metadata.items():
        if isinstance(inner, dict):
            flat.update({f"{name}: {k}": v for k, v in inner.items()})
    return key_values((element("code", k), v) for k, v in flat.items())


def recording_sections(
    folder: Path, summary: dict, *, created: str, shown_as: Path | None = None
) -> list[tuple[str, str, Html]]:
    """The sections of a one-recording report: (anchor, title, content) each.

    Parameters
    ----------
    folder : Path
        The ``analyze`` output folder (for beats.csv, regions.csv and the figures).
    summary : dict
        Its ``summary.json``.
    created : str
        When the report is made, for the provenance section.
    shown_as : Path, optional
        The folder as the report names it (default: ``folder``).

    Returns
    -------
    list of (str, str, Html)
    """
    shown = folder if shown_as is None else Path(shown_as)
    values = flatten_summary(summary)
    blocks = [
        element("div", element("h3", title) + key_values(pairs))
        for title, pairs in (
            ("Rhythm and intervals", metric_pairs(values, RHYTHM_KEYS)),
            ("Timing and amplitude", metric_pairs(values, TIMING_KEYS)),
        )
        if pairs
    ]
    overview = headline_cards(values) + element("div", join(blocks), cls="columns")
    figures = recording_figures(folder, subject=shown.name) or element(
        "p", "No figures in this folder (analyzed with --no-figures?).", cls="note"
    )
    version = summary.get("beatlab_version")
    provenance = key_values(
        [
            ("Analysed with beatlab", format_number(version)),
            ("Report created", created),
            ("Folder", str(shown)),
        ]
    )
    provenance += element("h3", "Recording metadata") + _metadata(summary)
    provenance += settings_block(summary.get("parameters") or {}, title="Parameters")
    return [
        ("overview", "Summary", overview),
        ("figures", "Figures", figures),
        ("beats", "Beats", _beats(folder)),
        ("regions", "Regions and propagation", _regions(folder, summary)),
        ("quality", "Quality", _quality(summary)),
        ("provenance", "Provenance", provenance),
    ]


def build_recording_report(
    analysis_dir: str | os.PathLike, *, out=None, shown_as: str | os.PathLike | None = None
) -> Path:
    """Write the HTML report of one recording from its ``beatlab analyze`` output folder.

    Parameters
    ----------
    analysis_dir : path-like
        The folder ``beatlab analyze --out`` wrote (``summary.json``; ``beats.csv``,
        ``regions.csv`` and the figures are shown when present).
    out : path-like, optional
        The report file, or a folder to hold ``report.html``; default
        ``analysis_dir/report.html``.
    shown_as : path-like, optional
        The folder as the report names it (default: ``analysis_dir``): the final folder
        when the report is written into a temporary one that is renamed once complete.

    Returns
    -------
    Path
        The report file: one self-contained HTML file (inline stylesheet, images as data
        URIs, no scripts, no external resources), written atomically.

    Raises
    ------
    InputError
        If the folder does not exist or holds no readable ``summary.json``.

    Examples
    --------
    >>> build_recording_report("results/A1")  # doctest: +SKIP
    PosixPath('results/A1/report.html')
    """
    folder = check_folder(
        analysis_dir, needs=("summary.json",), what="an analysis folder", command="beatlab analyze"
    )
    loaded = read_json(folder / "summary.json")
    if loaded.data is None:
        raise InputError(f"{loaded.note} in {folder}; run beatlab analyze again to rewrite it")
    summary = loaded.data
    created = created_text()
    shown = folder if shown_as is None else Path(shown_as)
    sections = recording_sections(folder, summary, created=created, shown_as=shown)
    metadata = summary.get("metadata") if isinstance(summary.get("metadata"), dict) else {}
    name = Path(str(metadata.get("source") or shown.name)).name
    subtitle = f"{name} · {format_number(summary.get('beat_count'))} beats · " + (
        f"rhythm {summary.get('rhythm') or '—'} · created {created}"
    )
    document = page(
        title=f"Recording report: {name}",
        subtitle=subtitle,
        nav=[(anchor, title) for anchor, title, _ in sections],
        body=join(section(anchor, title, content) for anchor, title, content in sections),
        footer=footer(wrote=f"the analysis folder {shown.name}", created=created),
    )
    return write_document(document, report_target(folder, out))
