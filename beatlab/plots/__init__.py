"""Figures: one function per figure, ``plot_x(data, *, ax=None) -> Axes`` (or ``fig=None``).

Each figure has a ``tabulate_x`` twin that lists what it plots; :func:`save_recording_figures`
(one recording) and :func:`save_batch_figures` (a batch folder) write them all with those
tables beside them. matplotlib is
imported only when a figure is drawn.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

from beatlab._lazy import lazy_names
from beatlab.io.writers import atomic_path

# Each figure's module is imported when one of its names is first used (PEP 562): drawing a
# recording's figures must not import the batch figures, which pull in the batch runner and
# scipy.stats (measured: 1.5 s of one core for ``import beatlab.plots.recording`` before,
# in the process that draws the figures, while the analysis runs on the other core).
_LAZY = {
    "plot_average_beat": "beatlab.plots.average",
    "tabulate_average_beat": "beatlab.plots.average",
    "save_batch_figures": "beatlab.plots.batch",
    "plot_dose_response": "beatlab.plots.dose",
    "plot_gallery": "beatlab.plots.gallery",
    "plot_metric_by_group": "beatlab.plots.groups",
    "plot_maps": "beatlab.plots.maps",
    "tabulate_maps": "beatlab.plots.maps",
    "plot_plate": "beatlab.plots.plate",
    "plot_poincare": "beatlab.plots.poincare",
    "poincare_sd": "beatlab.plots.poincare",
    "tabulate_poincare": "beatlab.plots.poincare",
    "FIGURES": "beatlab.plots.recording",
    "PLOTTED_SUFFIX": "beatlab.plots.recording",
    "save_recording_figures": "beatlab.plots.recording",
    "plot_regions": "beatlab.plots.regions",
    "tabulate_regions": "beatlab.plots.regions",
    "plot_trace": "beatlab.plots.trace",
    "plot_trace_panels": "beatlab.plots.trace",
    "tabulate_trace": "beatlab.plots.trace",
}

__getattr__, __dir__ = lazy_names(__name__, _LAZY)


__all__ = [
    "FIGURES",
    "PLOTTED_SUFFIX",
    "plot_average_beat",
    "plot_dose_response",
    "plot_gallery",
    "plot_maps",
    "plot_metric_by_group",
    "plot_plate",
    "plot_poincare",
    "plot_regions",
    "plot_trace",
    "plot_trace_panels",
    "poincare_sd",
    "save_batch_figures",
    "save_figure",
    "save_recording_figures",
    "tabulate_average_beat",
    "tabulate_maps",
    "tabulate_poincare",
    "tabulate_regions",
    "tabulate_trace",
]


#: PNG deflate level 3 rather than 6: half the encoding time for files ~25 % larger.
_SAVE_OPTIONS = {"png": {"pil_kwargs": {"compress_level": 3}}}


def save_figure(
    draw: Callable,
    path: str | os.PathLike,
    *,
    size=(7.0, 3.0),
    whole_figure: bool = False,
    formats: tuple[str, ...] = ("png", "svg"),
    on_png: Callable | None = None,
) -> Path:
    """Draw into a new figure and save it atomically as PNG (and SVG beside it).

    Parameters
    ----------
    draw : callable
        Called with a new Axes (or the Figure when ``whole_figure``).
    path : path-like
        The PNG path; other formats are written with the same stem.
    size : (float, float)
        Figure size in inches.
    formats : tuple of str
        File formats to write.
    on_png : callable, optional
        Called, once the PNG is written, with its pixels as drawn: a (height, width, 4)
        uint8 RGBA view of the canvas (valid during the call only).

    Returns
    -------
    Path
        The PNG path.
    """
    import matplotlib
    import numpy as np

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    from beatlab.plots.style import apply_style

    apply_style(matplotlib)
    path = Path(path)
    fig = plt.figure(figsize=size, layout="constrained")
    try:
        draw(fig if whole_figure else fig.add_subplot())
        for k, fmt in enumerate(formats):
            target = path.with_suffix(f".{fmt}")
            with atomic_path(target) as tmp:
                fig.savefig(tmp, format=fmt, **_SAVE_OPTIONS.get(fmt, {}))
            if fmt == "png" and on_png is not None:
                on_png(np.asarray(fig.canvas.buffer_rgba()))
            if k == 0:
                # the layout is in inches: the next formats keep the positions the first
                # one found instead of solving the constrained layout again
                fig.set_layout_engine("none")
    finally:
        plt.close(fig)
    return path
