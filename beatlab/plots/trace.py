"""The contraction trace with every beat's onset, peak and end marked."""

from __future__ import annotations

import numpy as np

from beatlab.plots.style import PALETTE

__all__ = ["plot_trace"]


def plot_trace(trace, beats, *, ax=None, column: str = "displacement_um"):
    """Plot the primary trace against time with onset, peak and end of each beat.

    Parameters
    ----------
    trace : pandas.DataFrame
        ``time_s`` and ``column`` (the trace.csv table).
    beats : pandas.DataFrame
        ``onset_s``, ``peak_s``, ``end_s`` (the beats.csv table); ``secondary_peak`` beats are
        marked.
    ax : matplotlib Axes, optional
        Where to draw; a new figure otherwise.
    column : str
        Which trace to plot.

    Returns
    -------
    matplotlib.axes.Axes
    """
    if ax is None:
        import matplotlib.pyplot as plt

        ax = plt.figure(figsize=(7, 3)).add_subplot()
    t = trace["time_s"].to_numpy()
    y = trace[column].to_numpy()
    ax.plot(t, y, color=PALETTE["blue"], lw=1.0, label=column.replace("_", " "))

    def at(times):
        times = np.asarray(times, dtype=float)
        return times[np.isfinite(times)], np.interp(times[np.isfinite(times)], t, y)

    if len(beats):
        for col, marker, color, name in (
            ("onset_s", "^", PALETTE["green"], "onset (10 %)"),
            ("peak_s", "o", PALETTE["vermillion"], "peak"),
            ("end_s", "v", PALETTE["purple"], "end (10 %)"),
        ):
            x, yy = at(beats[col])
            ax.plot(x, yy, marker, ms=4, color=color, ls="none", label=name)
        if "secondary_peak" in beats and beats["secondary_peak"].astype(bool).any():
            x, yy = at(beats.loc[beats["secondary_peak"].astype(bool), "peak_s"])
            ax.plot(
                x,
                yy * 1.08,
                "*",
                ms=7,
                color=PALETTE["orange"],
                ls="none",
                label="secondary peak (EAD-like)",
            )
    unit = {
        "displacement_um": "displacement (µm)",
        "velocity_um_s": "velocity (µm/s)",
        "opd_change_nm": "OPD change (nm)",
    }.get(column, column)
    ax.set_xlabel("time (s)")
    ax.set_ylabel(unit)
    ax.set_xlim(t[0], t[-1])
    ax.legend(loc="upper right", frameon=False, ncol=4)
    ax.set_title(f"{len(beats)} beats")
    return ax
