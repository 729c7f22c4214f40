"""Which figures a report embeds, in which order, with which caption.

Figures are whatever PNG files exist: a missing one is skipped, an unreadable one noted. Each
caption names the file holding the plotted data, so every picture can be traced to numbers.
"""

from __future__ import annotations

import os
from pathlib import Path

from beatlab.report._format import column_header, known_metric
from beatlab.report._html import Html, element, figure, join

__all__ = [
    "BATCH_FIGURE_ORDER",
    "RECORDING_FIGURES",
    "batch_figure_title",
    "batch_figures",
    "recording_figures",
]

RECORDING_FIGURES = {
    "trace": ("Displacement trace with the onset, peak and end of every beat", ("trace.csv",)),
    "average_beat": ("Average beat aligned at onset, mean ± SD", ("average_beat.csv",)),
    "poincare": ("Poincaré plot of successive inter-beat intervals", ("beats.csv",)),
    "maps": ("Rest template, peak-displacement map and onset-delay map", ("maps.npz",)),
    "regions": ("Independently beating regions and their traces",
                ("regions.csv", "region_traces.csv")),
}  # fmt: skip
"""Figures of one recording, in report order: stem -> (description, files of plotted data)."""

BATCH_FIGURE_ORDER = ("groups_", "dose_response_", "plate_", "gallery")
"""Batch figures are shown by these name prefixes in turn, then any others, each by name."""

_KINDS = {"groups_": "Groups", "dose_response_": "Dose-response", "plate_": "Plate"}


def _pngs(folder: Path) -> list[Path]:
    try:
        return sorted(p for p in folder.iterdir() if p.suffix.lower() == ".png" and p.is_file())
    except OSError:
        return []


def _data_files(png: Path, defaults: tuple[str, ...]) -> list[str]:
    """The CSV with the figure's stem if it exists, else the existing default data files."""
    from beatlab.plots import PLOTTED_SUFFIX

    for own in (png.with_name(png.stem + PLOTTED_SUFFIX), png.with_suffix(".csv")):
        if own.is_file():
            return [own.name]
    return [name for name in defaults if (png.parent / name).is_file()]


def _caption(title: str, files: list[str], prefix: str) -> Html:
    text = element("span", f"{title}. ")
    if files:
        names = join((element("code", f"{prefix}{name}") for name in files), ", ")
        return text + Html("Plotted data: ") + names
    return text + Html("Plotted data: no data file beside the figure.")


def recording_figures(
    folder: str | os.PathLike,
    *,
    prefix: str = "",
    subject: str = "",
    stems: tuple[str, ...] | None = None,
    density: int = 2,
) -> Html:
    """The figures of one ``analyze`` output folder, in :data:`RECORDING_FIGURES` order.

    Parameters
    ----------
    folder : path-like
        The folder (``beatlab analyze --out``).
    prefix : str
        Written before file names in captions (e.g. ``recordings/P1_A1/``).
    subject : str
        Added to each image's alternative text (the recording's id).
    stems : tuple of str, optional
        Only these figures (default: every PNG in the folder).
    density : int
        Embedded pixels per shown pixel (1 keeps a plate's report small).

    Returns
    -------
    Html
        A grid of figures; empty when the folder holds none.
    """
    folder = Path(folder)
    pngs = {p.stem: p for p in _pngs(folder) if stems is None or p.stem in stems}
    order = [s for s in RECORDING_FIGURES if s in pngs] + [
        s for s in pngs if s not in RECORDING_FIGURES
    ]
    items = []
    for stem in order:
        description, defaults = RECORDING_FIGURES.get(
            stem, (stem.replace("_", " ").capitalize(), ())
        )
        alt = f"{description} ({subject})" if subject else description
        caption = _caption(description, _data_files(pngs[stem], defaults), prefix)
        items.append(figure(pngs[stem], alt=alt, caption=caption, density=density))
    return element("div", join(items), cls="figures") if items else Html("")


def batch_figure_title(stem: str) -> str:
    """A readable title from a figure's file stem (``groups_beat_rate_bpm`` -> ``Groups: ...``).

    Parameters
    ----------
    stem : str
        File name without ``.png``.

    Returns
    -------
    str
    """
    if stem == "gallery":
        return "Gallery of recordings"
    for prefix, kind in _KINDS.items():
        if not stem.startswith(prefix):
            continue
        rest = stem[len(prefix) :]
        if prefix == "plate_":
            # plate names may hold underscores: the metric is the longest known suffix
            for i, char in enumerate(rest):
                if char == "_" and known_metric(rest[i + 1 :]):
                    return f"Plate {rest[:i]}: {column_header(rest[i + 1 :])}"
            return f"Plate {rest}"
        return f"{kind}: {column_header(rest) if known_metric(rest) else rest.replace('_', ' ')}"
    return stem.replace("_", " ").capitalize()


def _batch_rank(stem: str) -> int:
    for rank, prefix in enumerate(BATCH_FIGURE_ORDER):
        if stem.startswith(prefix):
            return rank
    return len(BATCH_FIGURE_ORDER)


def batch_figures(folder: str | os.PathLike) -> Html:
    """Every PNG in a batch's ``figures/`` folder, by :data:`BATCH_FIGURE_ORDER` then name.

    Parameters
    ----------
    folder : path-like
        The ``figures`` folder of a batch.

    Returns
    -------
    Html
        A grid of figures; empty when there are none.
    """
    pngs = sorted(_pngs(Path(folder)), key=lambda p: (_batch_rank(p.stem), p.name))
    items = []
    for png in pngs:
        title = batch_figure_title(png.stem)
        caption = _caption(title, _data_files(png, ()), "figures/")
        items.append(figure(png, alt=title, caption=caption))
    return element("div", join(items), cls="figures") if items else Html("")
