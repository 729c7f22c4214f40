"""The contraction trace with every beat's onset, peak and end marked."""

from __future__ import annotations

import numpy as np

from beatlab.plots.style import PALETTE

__all__ = ["plot_trace"]

_LABELS = {
    "displacement_um": "displacement (µm)",
    "velocity_um_s": "velocity (µm/s)",
    "opd_change_nm": "OPD change (nm)",
}


def plot_trace(trace, beats, *, ax=None, column: str = "displacement_um"):
    """Plot a trace against time with onset, peak and end of each beat.

    Parameters
    ----------
    trace : pandas.DataFrame
        ``time_s`` and ``column`` (the trace.csv table).
    beats : pandas.DataFrame
        ``onset_s``, ``peak_s``, ``end_s`` (the beats.csv table); beats with
        ``secondary_peak`` get a star at ``secondary_peak_s``.
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
    label = _LABELS.get(column, column)
    ax.plot(t, y, color=PALETTE["blue"], lw=1.0, label=label.split(" (")[0])

    def at(times):
        times = np.asarray(times, dtype=float)
        times = times[np.isfinite(times)]
        return times, np.interp(times, t, y)

    if len(beats):
        marks = (
            ("onset_s", "^", PALETTE["green"], "onset (10 %)"),
            ("peak_s", "o", PALETTE["vermillion"], "peak"),
            ("end_s", "v", PALETTE["purple"], "end (10 %)"),
        )
        for col, marker, color, name in marks:
            if col == "peak_s" and "peak_um" in beats and column == "displacement_um":
                # at the measured peak (the top of the interpolated curve), not on the
                # straight line between frames, which passes below it at low frame rates
                ok = np.isfinite(beats["peak_s"].to_numpy(float))
                x, yy = beats["peak_s"].to_numpy(float)[ok], beats["peak_um"].to_numpy(float)[ok]
            else:
                x, yy = at(beats[col])
            ax.plot(x, yy, marker, ms=4, color=color, ls="none", label=name)
        if "secondary_peak" in beats and beats["secondary_peak"].astype(bool).any():
            flagged = beats["secondary_peak"].astype(bool)
            where = "secondary_peak_s" if "secondary_peak_s" in beats else "peak_s"
            x, yy = at(beats.loc[flagged, where])
            ax.plot(
                x,
                yy,
                "*",
                ms=8,
                color=PALETTE["orange"],
                ls="none",
                label="secondary peak (EAD-like)",
            )
    ax.set_xlabel("time (s)")
    ax.set_ylabel(label)
    ax.set_xlim(t[0], t[-1])
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.18), frameon=False, ncol=5)
    title = f"{len(beats)} beats"
    if len(beats) > 1:
        title += f", {60.0 / np.nanmean(np.diff(beats['peak_s'].to_numpy(float))):.1f} bpm"
    ax.set_title(title)
    return ax
