"""Every figure of one recording, written beside the data it shows.

Each figure ``<name>`` is written as ``<name>.png`` (300 dpi) and ``<name>.svg``, and beside it
``<name>_plotted.csv``: every plotted point in one long table (columns
:data:`beatlab.plots.style.PLOTTED_COLUMNS`: panel, series, item, x, y, value and their
units), so a number read off a figure can be checked and a figure redrawn elsewhere.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from beatlab.errors import ConfigError
from beatlab.io.writers import atomic_path
from beatlab.plots.average import plot_average_beat, tabulate_average_beat
from beatlab.plots.maps import plot_maps, tabulate_maps
from beatlab.plots.poincare import plot_poincare, tabulate_poincare
from beatlab.plots.regions import plot_regions, tabulate_regions
from beatlab.plots.trace import plot_trace_panels, tabulate_trace

__all__ = ["FIGURES", "PLOTTED_SUFFIX", "RecordingFigure", "save_recording_figures"]

#: ``<name><PLOTTED_SUFFIX>`` is the table of what figure ``<name>`` plots.
PLOTTED_SUFFIX = "_plotted.csv"

_FORMATS = ("png", "svg", "pdf")


@dataclass(frozen=True)
class RecordingFigure:
    """One figure of a recording.

    Attributes
    ----------
    draw : callable
        ``draw(analysis, fig)`` draws into an empty Figure.
    tabulate : callable
        ``tabulate(analysis)`` -> the plotted-data table.
    size : callable
        ``size(analysis)`` -> (width, height) in inches.
    """

    draw: Callable
    tabulate: Callable
    size: Callable


def _regions_size(analysis):
    n = len(analysis.regions)
    return (3.8, 3.6) if n < 2 else (9.0, max(3.6, 1.3 * n + 0.8))


FIGURES = {
    "trace": RecordingFigure(
        draw=lambda a, fig: plot_trace_panels(a, fig=fig),
        tabulate=lambda a: tabulate_trace(a.trace, a.beats),
        size=lambda a: (7.2, 5.6 if len(a.regions) > 1 else 5.4),
    ),
    "average_beat": RecordingFigure(
        draw=lambda a, fig: plot_average_beat(a.average_beat, a.beats, ax=fig.add_subplot()),
        tabulate=lambda a: tabulate_average_beat(a.average_beat, a.beats),
        size=lambda a: (4.6, 3.4),
    ),
    "poincare": RecordingFigure(
        draw=lambda a, fig: plot_poincare(a.beats["ibi_s"], ax=fig.add_subplot()),
        tabulate=lambda a: tabulate_poincare(a.beats["ibi_s"]),
        size=lambda a: (3.8, 4.0),
    ),
    "maps": RecordingFigure(
        draw=lambda a, fig: plot_maps(a, fig=fig),
        tabulate=tabulate_maps,
        size=lambda a: (10.0, 3.6),
    ),
    "regions": RecordingFigure(
        draw=lambda a, fig: plot_regions(a, fig=fig),
        tabulate=tabulate_regions,
        size=_regions_size,
    ),
}
"""The figures of one recording, by file stem, in the order they are written."""


#: The order the figures are handed to the workers: the costliest first.
_DRAW_FIRST = ("maps", "trace", "poincare", "regions", "average_beat")

# What the forked workers of save_recording_figures draw (set just before they fork).
_JOB: tuple | None = None


def _save_one(name: str):
    """Write figure ``name`` of the job (and its table): the work of one forked worker.

    Returns the PNG shrunk for the report (:func:`beatlab.report._html.shrink_ahead`) when
    the job asks for it, else None.
    """
    analysis, out, formats, for_report = _JOB
    figure = FIGURES[name]
    table: pd.DataFrame = figure.tabulate(analysis)
    with atomic_path(out / f"{name}{PLOTTED_SUFFIX}") as tmp:
        table.to_csv(tmp, index=False)
    shrunk = []
    if formats:
        from beatlab.plots import save_figure

        def shrink(pixels):  # from the pixels as drawn, not the file decoded again
            from beatlab.report._html import shrink_ahead

            shrunk.append(shrink_ahead(out / f"{name}.png", pixels=pixels))

        save_figure(
            lambda fig: figure.draw(analysis, fig),
            out / f"{name}.{formats[0]}",
            size=figure.size(analysis),
            whole_figure=True,
            formats=tuple(formats),
            on_png=shrink if for_report else None,
        )
    return shrunk[0] if shrunk else None


def save_recording_figures(
    analysis,
    out_dir: str | os.PathLike,
    *,
    formats: tuple[str, ...] = ("png", "svg"),
    workers: int = 1,
    for_report: bool = False,
) -> dict[str, Path]:
    """Write every figure of :data:`FIGURES` and the table of what it plots into ``out_dir``.

    Parameters
    ----------
    analysis : beatlab.results.Analysis
        The result of :func:`beatlab.analyze` (or :func:`beatlab.read_analysis`).
    out_dir : path-like
        Output folder, created if needed; every file is written atomically.
    formats : tuple of str
        Image formats, any of ``png`` (300 dpi), ``svg``, ``pdf``.
    workers : int
        Figures drawn at once, in forked processes on Linux (1: one after another, in this
        process; what a batch worker wants). Drawing is CPU-bound Python, so threads would
        not overlap; the files are the same either way.
    for_report : bool
        Also shrink each PNG as :func:`beatlab.report.build_recording_report` embeds it,
        where it was drawn, and keep it for the report this process writes next (the same
        report, with that work done in parallel).

    Returns
    -------
    dict
        ``"<name>_<format>"`` -> image path and ``"<name>_plotted"`` -> CSV path, for the
        names ``trace``, ``average_beat``, ``poincare``, ``maps``, ``regions``.

    Raises
    ------
    ConfigError
        An unknown format.
    """
    unknown = sorted(set(formats) - set(_FORMATS))
    if unknown:
        raise ConfigError(
            f"figure formats {unknown} are not supported; pass formats from {list(_FORMATS)}"
        )
    from beatlab._fork import fork_map

    global _JOB
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    _JOB = (analysis, out, tuple(formats), bool(for_report))
    try:
        # the costliest first (measured: maps ~2 s, trace ~1.2 s of one core), so that the
        # workers finish together
        shrunk = fork_map(_save_one, sorted(FIGURES, key=_DRAW_FIRST.index), workers=workers)
    finally:
        _JOB = None
    if for_report:
        from beatlab.report._html import keep_shrunk

        keep_shrunk(shrunk)
    paths: dict[str, Path] = {}
    for name in FIGURES:
        paths[f"{name}_plotted"] = out / f"{name}{PLOTTED_SUFFIX}"
        for fmt in formats:
            paths[f"{name}_{fmt}"] = out / f"{name}.{fmt}"
    return paths
