"""Independently beating regions: where they are and how each one beats.

:func:`tabulate_regions` lists every plotted point (``regions_plotted.csv``);
:func:`plot_regions` draws the numbered label map and, with two regions or more, each
region's displacement trace on its own Axes (one shared y scale, so amplitudes compare).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from beatlab.plots.maps import map_geometry
from beatlab.plots.style import (
    REGION_COLOURS,
    axis_label,
    concat_rows,
    message_panel,
    plotted_rows,
)

__all__ = ["plot_regions", "region_colour", "tabulate_regions"]


def region_colour(region: int) -> str:
    """The colour of region ``region`` (1-based) in every figure: REGION_COLOURS in turn.

    Parameters
    ----------
    region : int
        Region id as in regions.csv.

    Returns
    -------
    str
        A hex colour of the Okabe-Ito palette.
    """
    return REGION_COLOURS[(int(region) - 1) % len(REGION_COLOURS)]


def _describe(row) -> str:
    count = int(row["beat_count"])
    if count == 0:
        return "no beats"
    rate = row["beat_rate_bpm"]
    shown = f"{float(rate):.1f} bpm" if pd.notna(rate) and rate else "rate n/a"
    return f"{shown}, {count} beat{'s' if count != 1 else ''}"


def tabulate_regions(analysis) -> pd.DataFrame:
    """Every point of the regions figure, as drawn (``regions_plotted.csv``).

    Parameters
    ----------
    analysis : beatlab.results.Analysis
        Uses ``regions``, ``region_traces``, ``region_beats``.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`beatlab.plots.style.PLOTTED_COLUMNS`. Panel ``labels``: series
        ``number`` (x, y = centroid_x_um, centroid_y_um; value and item = region id), drawn on
        the ``region_labels`` array of maps.npz. With two regions or more, panel ``region N``
        per region: series ``trace`` (x = time_s, y = displacement_um of region_traces.csv)
        and ``peak`` (x = peak_s, y = peak_um of region_beats.csv, item = beat).
    """
    regions = analysis.regions
    if not len(regions):
        return concat_rows([])
    ids = regions["region"].to_numpy(dtype=int)
    rows = [
        plotted_rows(
            "labels",
            "number",
            x=regions["centroid_x_um"],
            y=regions["centroid_y_um"],
            value=ids,
            item=ids,
            x_unit="um",
            y_unit="um",
            value_unit="1",
        )
    ]
    if len(regions) < 2:
        return concat_rows(rows)
    traces, beats = analysis.region_traces, analysis.region_beats
    for region in ids:
        trace = traces[traces["region"] == region]
        rows.append(
            plotted_rows(
                f"region {region}",
                "trace",
                x=trace["time_s"],
                y=trace["displacement_um"],
                x_unit="s",
                y_unit="um",
            )
        )
        own = beats[beats["region"] == region]
        rows.append(
            plotted_rows(
                f"region {region}",
                "peak",
                x=own["peak_s"],
                y=own["peak_um"],
                item=own["beat"].to_numpy(dtype=int),
                x_unit="s",
                y_unit="um",
            )
        )
    return concat_rows(rows)


def _label_panel(ax, analysis, table):
    from matplotlib.colors import ListedColormap

    geometry = map_geometry(analysis)
    extent = geometry.field_extent_um
    template = np.asarray(analysis.template, dtype=float)
    finite = template[np.isfinite(template)]
    lo, hi = np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0)
    ax.imshow(template, cmap="gray", vmin=lo, vmax=hi, extent=extent, interpolation="none")
    labels = np.asarray(analysis.region_labels)
    ids = analysis.regions["region"].to_numpy(dtype=int)
    top = int(max(labels.max(initial=0), ids.max(initial=0)))
    colours = ListedColormap([region_colour(k) for k in range(1, top + 1)])
    shown = np.ma.masked_less_equal(labels, 0)
    ax.imshow(
        shown,
        cmap=colours,
        vmin=0.5,
        vmax=top + 0.5,
        alpha=0.6,
        extent=extent,
        interpolation="none",
        gid="region_labels",
    )
    numbers = table[(table["panel"] == "labels") & (table["series"] == "number")]
    for x, y, k in numbers[["x", "y", "item"]].itertuples(index=False):
        ax.text(
            x,
            y,
            str(int(k)),
            ha="center",
            va="center",
            fontsize=10,
            fontweight="bold",
            color="white",
            gid="region_number",
            bbox={"boxstyle": "circle,pad=0.2", "fc": region_colour(k), "ec": "none"},
        )
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_aspect("equal")
    ax.set_xlabel(axis_label("x", "um"))
    ax.set_ylabel(axis_label("y", "um"))


def plot_regions(analysis, *, fig=None):
    """The numbered region map and, with two regions or more, each region's trace.

    Parameters
    ----------
    analysis : beatlab.results.Analysis
        Uses ``regions``, ``region_traces``, ``region_beats``, ``region_labels``,
        ``template`` and the map geometry (``summary`` metadata and parameters).
    fig : matplotlib Figure, optional
        Where to draw; a new figure otherwise.

    Returns
    -------
    matplotlib.figure.Figure
        One region: the map alone, its rate in the title. Two or more: the map on the left
        and one Axes per region on the right (shared time and displacement axes), its trace
        and measured peaks in the region's colour, its rate and beat count in its title.
        Without regions, a text panel.
    """
    if fig is None:
        import matplotlib.pyplot as plt

        n = max(len(analysis.regions), 1)
        size = (3.8, 3.6) if n < 2 else (9.0, max(3.6, 1.3 * n + 0.8))
        fig = plt.figure(figsize=size, layout="constrained")
    regions = analysis.regions
    table = tabulate_regions(analysis)
    if not len(regions) or analysis.region_labels is None:
        message_panel(fig.add_subplot(), "no regions analysed")
        return fig
    if len(regions) == 1:
        ax = fig.add_subplot()
        _label_panel(ax, analysis, table)
        row = regions.iloc[0]
        ax.set_title(f"region {int(row['region'])}: {_describe(row)}")
        return fig
    grid = fig.add_gridspec(len(regions), 2, width_ratios=(1.0, 1.9))
    _label_panel(fig.add_subplot(grid[:, 0]), analysis, table)
    fig.axes[0].set_title(f"{len(regions)} independently beating regions")
    first = None
    for k, row in enumerate(regions.itertuples(index=False)):
        ax = fig.add_subplot(grid[k, 1], sharex=first, sharey=first)
        first = first or ax
        region = int(row.region)
        part = table[table["panel"] == f"region {region}"]
        trace, peaks = part[part["series"] == "trace"], part[part["series"] == "peak"]
        colour = region_colour(region)
        ax.plot(trace["x"], trace["y"], color=colour, lw=1.0, gid="trace")
        ax.plot(
            peaks["x"],
            peaks["y"],
            "o",
            ms=3.5,
            color=colour,
            mec="black",
            mew=0.4,
            ls="none",
            gid="peak",
        )
        ax.set_title(f"region {region}: {_describe(row._asdict())}", color=colour)
        ax.set_ylabel(axis_label("displacement", "um"))
        if k < len(regions) - 1:
            ax.tick_params(labelbottom=False)
        else:
            ax.set_xlabel(axis_label("time", "s"))
        if len(trace):
            ax.set_xlim(trace["x"].iloc[0], trace["x"].iloc[-1])
    return fig
