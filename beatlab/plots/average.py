"""The ensemble-average beat (mean ± SD, aligned at onset) with its time course marked.

:func:`tabulate_average_beat` lists every plotted point (``average_beat_plotted.csv``);
:func:`plot_average_beat` draws from it.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from beatlab.plots.style import (
    GREY,
    PALETTE,
    axis_label,
    concat_rows,
    message_panel,
    plotted_rows,
)

__all__ = ["plot_average_beat", "tabulate_average_beat"]

#: Mean curves sampled more coarsely than this (ms) also show their samples as dots.
_DOTS_ABOVE_STEP_MS = 20.0

#: Marker series -> (beats.csv column added to time_to_peak_s, level as a fraction of the
#: amplitude, label).
_INTERVALS = {
    "time_to_peak": (None, 1.0, "TTP"),
    "relax_50": ("relax_50_s", 0.5, "RT50"),
    "relax_90": ("relax_90_s", 0.1, "RT90"),
}


def _median(beats: pd.DataFrame, column: str) -> float:
    if column not in beats:
        return float("nan")
    values = pd.to_numeric(beats[column], errors="coerce").to_numpy(dtype=float)
    values = values[np.isfinite(values)]
    return float(np.median(values)) if values.size else float("nan")


def tabulate_average_beat(average_beat: pd.DataFrame, beats: pd.DataFrame) -> pd.DataFrame:
    """Every point of the average-beat figure, as drawn (``average_beat_plotted.csv``).

    Parameters
    ----------
    average_beat : pandas.DataFrame
        The average_beat.csv table (``time_s``, ``displacement_um_mean``,
        ``displacement_um_sd``).
    beats : pandas.DataFrame
        The beats.csv table: the medians of ``time_to_peak_s``, ``relax_50_s``,
        ``relax_90_s``, ``baseline_um`` and ``displacement_um`` place the markers.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`beatlab.plots.style.PLOTTED_COLUMNS`, panel ``average``: series
        ``mean`` (x = time_s in ms from onset, y = displacement_um_mean), ``sd_lower`` and
        ``sd_upper`` (mean -/+ SD, where the SD is defined), and three markers of two rows
        each, x from the peak to the end of the interval in ms from onset and y at the level
        it reaches: ``time_to_peak`` (0 to median time_to_peak_s, at 100 %), ``relax_50``
        (time to peak to time to peak + median relax_50_s, at 50 %), ``relax_90`` (to
        time to peak + median relax_90_s, at 10 %); levels are median baseline_um +
        fraction x median displacement_um. A marker whose median is undefined is left out.
    """
    if not len(average_beat):
        return concat_rows([])
    t_ms = average_beat["time_s"].to_numpy(dtype=float) * 1e3
    mean = average_beat["displacement_um_mean"].to_numpy(dtype=float)
    sd = average_beat["displacement_um_sd"].to_numpy(dtype=float)
    rows = [plotted_rows("average", "mean", x=t_ms, y=mean, x_unit="ms", y_unit="um")]
    band = np.isfinite(sd) & np.isfinite(mean)
    rows.append(
        plotted_rows(
            "average", "sd_lower", x=t_ms[band], y=mean[band] - sd[band], x_unit="ms", y_unit="um"
        )
    )
    rows.append(
        plotted_rows(
            "average", "sd_upper", x=t_ms[band], y=mean[band] + sd[band], x_unit="ms", y_unit="um"
        )
    )
    ttp = _median(beats, "time_to_peak_s")
    base, amp = _median(beats, "baseline_um"), _median(beats, "displacement_um")
    for series, (column, fraction, _) in _INTERVALS.items():
        start = 0.0 if column is None else ttp
        stop = ttp if column is None else ttp + _median(beats, column)
        level = base + fraction * amp
        if np.isfinite(start) and np.isfinite(stop) and np.isfinite(level):
            rows.append(
                plotted_rows(
                    "average",
                    series,
                    x=np.array([start, stop]) * 1e3,
                    y=[level, level],
                    x_unit="ms",
                    y_unit="um",
                )
            )
    return concat_rows(rows)


def _annotate(ax, x, y, series, label):
    """A double arrow over the interval, a dotted drop line at its end and its label."""
    start, stop = x
    colour = PALETTE["black"]
    ax.annotate(
        "",
        xy=(stop, y[1]),
        xytext=(start, y[0]),
        arrowprops={"arrowstyle": "<->", "color": colour, "lw": 0.8, "shrinkA": 0, "shrinkB": 0},
        gid=series,
    )
    ax.axvline(stop, color=GREY, lw=0.6, ls=":", zorder=1, gid=f"{series}_line")
    ax.annotate(
        f"{label} {stop - start:.0f} ms",
        xy=(0.5 * (start + stop), y[0]),
        xytext=(0, 3),
        textcoords="offset points",
        ha="center",
        va="bottom",
        fontsize=8,
        gid=f"{series}_label",
    )


def plot_average_beat(average_beat: pd.DataFrame, beats: pd.DataFrame, *, ax=None):
    """Plot the average beat (mean ± SD) against time from onset, with TTP, RT50 and RT90.

    Parameters
    ----------
    average_beat : pandas.DataFrame
        The average_beat.csv table.
    beats : pandas.DataFrame
        The beats.csv table (see :func:`tabulate_average_beat`).
    ax : matplotlib Axes, optional
        Where to draw; a new figure otherwise.

    Returns
    -------
    matplotlib.axes.Axes
        The mean displacement (line), the ± 1 SD band, and double arrows over time to peak
        (onset to peak, at the peak level), RT50 and RT90 (peak to the 50 % and 10 % levels)
        labelled with the beat medians in ms. With no beats, a text panel.
    """
    if ax is None:
        import matplotlib.pyplot as plt

        ax = plt.figure(figsize=(4.6, 3.4), layout="constrained").add_subplot()
    table = tabulate_average_beat(average_beat, beats)
    if not len(table):
        message_panel(ax, "no beats detected:\nno average beat")
        ax.set_title("average beat")
        return ax

    def series(name):
        part = table[table["series"] == name]
        return part["x"].to_numpy(), part["y"].to_numpy()

    x, mean = series("mean")
    step = np.median(np.diff(x)) if x.size > 1 else 0.0
    lower_x, lower = series("sd_lower")
    _, upper = series("sd_upper")
    if lower_x.size:
        ax.fill_between(
            lower_x,
            lower,
            upper,
            color=PALETTE["sky"],
            alpha=0.35,
            lw=0,
            label="± 1 SD",
            gid="sd_band",
        )
    ax.plot(
        x,
        mean,
        color=PALETTE["blue"],
        lw=1.4,
        label="mean",
        marker="o" if step > _DOTS_ABOVE_STEP_MS else None,
        ms=2.5,
        gid="mean",
    )
    ax.axvline(0.0, color=GREY, lw=0.6, zorder=1, gid="onset_line")
    for name, (_, _, label) in _INTERVALS.items():
        mx, my = series(name)
        if mx.size == 2:
            _annotate(ax, mx, my, name, label)
    ax.set_xlabel(axis_label("time from onset", "ms"))
    ax.set_ylabel(axis_label("displacement", "um"))
    ax.set_xlim(x[0], x[-1])
    lo, hi = ax.get_ylim()
    ax.set_ylim(lo, hi + 0.08 * (hi - lo))  # room for the top label
    n = int(np.nanmax(average_beat["n_beats"])) if "n_beats" in average_beat else len(beats)
    ax.set_title(f"average beat: mean of {n} beat{'s' if n != 1 else ''}, aligned at onset")
    ax.legend(loc="upper right")
    return ax
