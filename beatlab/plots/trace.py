"""The traces of a recording with every beat's onset, peak and end marked where measured.

:func:`tabulate_trace` lists every plotted point (the ``trace_plotted.csv`` beside the
figure); :func:`plot_trace` draws one trace on one Axes from it and :func:`plot_trace_panels`
draws displacement, OPD change and velocity on panels sharing the time axis.
"""

from __future__ import annotations

from pathlib import PurePath

import numpy as np
import pandas as pd

from beatlab.plots.style import (
    GREY,
    PALETTE,
    axis_label,
    concat_rows,
    plotted_rows,
)
from beatlab.results import beating_regions

__all__ = ["LANDMARK_LEVEL", "plot_trace", "plot_trace_panels", "tabulate_trace"]

#: Level of the onset_s and end_s crossings, as a fraction of the beat's amplitude above its
#: baseline (the 10 % level of the beats.csv definitions, docs/outputs.md).
LANDMARK_LEVEL = 0.1

#: Trace column -> (panel name, quantity, unit).
_PANELS = {
    "displacement_um": ("displacement", "displacement", "um"),
    "opd_change_nm": ("opd_change", "OPD change", "nm"),
    "velocity_um_s": ("velocity", "velocity", "um/s"),
}

#: Without beats the y axes span at least this much, so that noise is not blown up to look
#: like beats.
_QUIET_SPAN = {"displacement_um": 0.1, "opd_change_nm": 2.0, "velocity_um_s": 1.0}

#: Below this frame rate (frame interval above 1 / 25 s) the frames of the displacement trace
#: are drawn as dots too, so that a measured peak between two frames reads as such.
_DOTS_ABOVE_INTERVAL_S = 0.04

#: Series -> (marker, colour, size, legend label) of the beat landmarks.
_MARKS = {
    "onset": ("^", PALETTE["green"], 4.5, "onset (10 % level)"),
    "peak": ("o", PALETTE["vermillion"], 4.5, "peak (measured)"),
    "end": ("v", PALETTE["purple"], 4.5, "end (10 % level)"),
    "secondary_peak": ("*", PALETTE["orange"], 9.0, "secondary peak (EAD-like)"),
}

#: Span series -> (colour, alpha, legend label).
_SPANS = {
    "irregular_interval": (PALETTE["sky"], 0.25, "irregular interval"),
    "secondary_peak_beat": (PALETTE["orange"], 0.2, "beat with secondary peak"),
}


def _flags(beats: pd.DataFrame, column: str) -> np.ndarray:
    """A boolean flag column with missing values read as False (``irregular`` of beat 1)."""
    if column not in beats:
        return np.zeros(len(beats), dtype=bool)
    return beats[column].astype("boolean").fillna(False).to_numpy(dtype=bool)


def _floats(beats: pd.DataFrame, column: str) -> np.ndarray:
    if column not in beats:
        return np.full(len(beats), np.nan)
    return pd.to_numeric(beats[column], errors="coerce").to_numpy(dtype=float)


def _landmark_rows(trace: pd.DataFrame, beats: pd.DataFrame) -> list[pd.DataFrame]:
    """Onset, peak and end of every beat on the displacement panel, at their measured values."""
    t = trace["time_s"].to_numpy(dtype=float)
    y = trace["displacement_um"].to_numpy(dtype=float)
    number = _floats(beats, "beat") if "beat" in beats else np.arange(1.0, len(beats) + 1)
    peak_s, peak_um = _floats(beats, "peak_s"), _floats(beats, "peak_um")
    if not np.isfinite(peak_um).any() and len(beats):
        peak_um = np.interp(peak_s, t, y)  # tables without peak_um: on the drawn curve
    baseline = _floats(beats, "baseline_um")
    amplitude = _floats(beats, "displacement_um")
    level = baseline + LANDMARK_LEVEL * amplitude
    if not np.isfinite(level).any() and len(beats):
        level = None
    rows = []
    for series, times, values in (
        ("onset", _floats(beats, "onset_s"), level),
        ("peak", peak_s, peak_um),
        ("end", _floats(beats, "end_s"), level),
    ):
        if values is None:
            values = np.interp(times, t, y, left=np.nan, right=np.nan)
        ok = np.isfinite(times) & np.isfinite(values)
        rows.append(
            plotted_rows(
                "displacement",
                series,
                x=times[ok],
                y=values[ok],
                item=number[ok].astype(int),
                x_unit="s",
                y_unit="um",
            )
        )
    flagged = _flags(beats, "secondary_peak")
    second = _floats(beats, "secondary_peak_s")
    ok = flagged & np.isfinite(second)
    # no measured value is stored for the secondary peak: it is marked on the drawn curve
    rows.append(
        plotted_rows(
            "displacement",
            "secondary_peak",
            x=second[ok],
            y=np.interp(second[ok], t, y),
            item=number[ok].astype(int),
            x_unit="s",
            y_unit="um",
        )
    )
    return rows


def _span_rows(trace: pd.DataFrame, beats: pd.DataFrame) -> list[pd.DataFrame]:
    """Shaded spans over all panels: irregular intervals and beats with a secondary peak."""
    t = trace["time_s"].to_numpy(dtype=float)
    number = _floats(beats, "beat") if "beat" in beats else np.arange(1.0, len(beats) + 1)
    peak = _floats(beats, "peak_s")
    onset, end = _floats(beats, "onset_s"), _floats(beats, "end_s")
    spans = {"irregular_interval": [], "secondary_peak_beat": []}
    irregular = _flags(beats, "irregular")
    for k in np.flatnonzero(irregular):
        if k > 0 and np.isfinite(peak[k - 1]) and np.isfinite(peak[k]):
            # the interval that is irregular: from the previous peak to this one (ibi_s)
            spans["irregular_interval"].append((number[k], peak[k - 1], peak[k]))
    for k in np.flatnonzero(_flags(beats, "secondary_peak")):
        start = onset[k] if np.isfinite(onset[k]) else peak[k]
        stop = end[k] if np.isfinite(end[k]) else t[-1]
        spans["secondary_peak_beat"].append((number[k], start, stop))
    rows = []
    for series, items in spans.items():
        items = np.asarray(items, dtype=float).reshape(-1, 3)
        rows.append(
            plotted_rows(
                "all",
                series,
                x=items[:, 1:].ravel(),
                item=np.repeat(items[:, 0], 2).astype(int),
                x_unit="s",
            )
        )
    return rows


def tabulate_trace(trace: pd.DataFrame, beats: pd.DataFrame) -> pd.DataFrame:
    """Every point of the trace figure, as drawn (the ``trace_plotted.csv`` table).

    Parameters
    ----------
    trace : pandas.DataFrame
        The trace.csv table: ``time_s`` and any of ``displacement_um``, ``opd_change_nm``,
        ``velocity_um_s``.
    beats : pandas.DataFrame
        The beats.csv table (``onset_s``, ``peak_s``, ``end_s``, ``peak_um``, ``baseline_um``,
        ``displacement_um``, ``secondary_peak``, ``secondary_peak_s``, ``irregular``).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`beatlab.plots.style.PLOTTED_COLUMNS`. Panels ``displacement``,
        ``opd_change``, ``velocity`` hold series ``trace`` (one row per frame); the
        displacement panel also ``onset`` and ``end`` (x = onset_s, end_s; y = the 10 % level
        baseline_um + 0.1 x displacement_um that they cross), ``peak`` (x = peak_s,
        y = peak_um: the measured top, not a straight line between frames) and
        ``secondary_peak`` (x = secondary_peak_s, y on the trace). Panel ``all`` holds the
        shaded spans, two rows (start, stop) per span: ``irregular_interval`` (previous
        peak_s to peak_s of an irregular beat) and ``secondary_peak_beat`` (onset_s to end_s
        of a beat with a secondary peak). ``item`` is the beat number (0 for traces).
    """
    t = trace["time_s"].to_numpy(dtype=float)
    rows = []
    for column, (panel, _, unit) in _PANELS.items():
        if column in trace:
            rows.append(
                plotted_rows(
                    panel,
                    "trace",
                    x=t,
                    y=trace[column].to_numpy(dtype=float),
                    x_unit="s",
                    y_unit=unit,
                )
            )
    if len(beats) and "displacement_um" in trace:
        rows += _landmark_rows(trace, beats)
    if len(beats):
        rows += _span_rows(trace, beats)
    return concat_rows(rows)


def _series(table, panel, series):
    part = table[(table["panel"] == panel) & (table["series"] == series)]
    return part["x"].to_numpy(), part["y"].to_numpy()


def _draw_spans(ax, table, *, label: bool):
    for series, (colour, alpha, name) in _SPANS.items():
        x, _ = _series(table, "all", series)
        for k, (start, stop) in enumerate(x.reshape(-1, 2)):
            ax.axvspan(
                start,
                stop,
                color=colour,
                alpha=alpha,
                lw=0,
                zorder=0,
                label=name if label and k == 0 else "_nolegend_",
                gid=series,
            )


def _keep_span(ax, min_span):
    """Widen the y limits to at least ``min_span`` around their centre."""
    lo, hi = ax.get_ylim()
    if hi - lo < min_span:
        mid = 0.5 * (lo + hi)
        ax.set_ylim(mid - min_span / 2, mid + min_span / 2)


def plot_trace(
    trace: pd.DataFrame,
    beats: pd.DataFrame,
    *,
    ax=None,
    column: str = "displacement_um",
    legend: bool = True,
):
    """Plot one trace against time, with each beat's landmarks and the flagged beats shaded.

    Parameters
    ----------
    trace : pandas.DataFrame
        ``time_s`` and ``column`` (the trace.csv table).
    beats : pandas.DataFrame
        The beats.csv table (see :func:`tabulate_trace`); may be empty.
    ax : matplotlib Axes, optional
        Where to draw; a new figure otherwise.
    column : {'displacement_um', 'opd_change_nm', 'velocity_um_s'}
        Which trace to plot. Onset, peak, end and secondary peaks are marked on the
        displacement trace, where they are measured; spans are shaded on every trace.
    legend : bool
        Draw a legend below the Axes.

    Returns
    -------
    matplotlib.axes.Axes
        Titled with the number of beats and the rate (60 / mean ibi_s); with no beats it
        says "no beats detected" and its y axis spans at least a fixed minimum
        (0.1 µm, 2 nm, 1 µm/s) so that noise does not look like beats.
    """
    if ax is None:
        import matplotlib.pyplot as plt

        ax = plt.figure(figsize=(7.2, 2.6), layout="constrained").add_subplot()
    panel, quantity, unit = _PANELS.get(column, (column, column, ""))
    table = tabulate_trace(trace[["time_s", column]], beats)
    x, y = _series(table, panel, "trace")
    ax.plot(x, y, color=PALETTE["blue"], lw=1.0, label=quantity, gid="trace")
    coarse = x.size > 1 and np.median(np.diff(x)) > _DOTS_ABOVE_INTERVAL_S
    if column == "displacement_um" and coarse:
        ax.plot(x, y, ".", ms=3, color=PALETTE["blue"], ls="none", label="frames", gid="frames")
    if column == "velocity_um_s":
        ax.axhline(0.0, color=GREY, lw=0.6, zorder=0)
        unresolved = int(len(beats) - _flags(beats, "velocity_resolved").sum())
        if "velocity_resolved" in beats and unresolved:
            # above the panel, not over the trace: at low frame rates the peaks are everywhere
            ax.set_title(
                f"velocity not resolved in {unresolved} of {len(beats)} beats "
                "(strokes < 2.5 frames): its peaks read low",
                loc="right",
                fontsize=7.5,
                color=GREY,
            )
    for series, (marker, colour, size, name) in _MARKS.items():
        mx, my = _series(table, panel, series)
        if mx.size:
            ax.plot(mx, my, marker, ms=size, color=colour, ls="none", label=name, gid=series)
    _draw_spans(ax, table, label=True)
    ax.set_xlabel(axis_label("time", "s"))
    ax.set_ylabel(axis_label(quantity, unit))
    if x.size:
        ax.set_xlim(x[0], x[-1])
    title = f"{len(beats)} beat{'s' if len(beats) != 1 else ''}"
    if len(beats) > 1:
        rate = 60.0 / np.nanmean(np.diff(_floats(beats, "peak_s")))
        title += f", {rate:.1f} bpm"
    ax.set_title(title)
    if not len(beats):
        _keep_span(ax, _QUIET_SPAN.get(column, 0.0))
        ax.text(
            0.5,
            0.95,
            "no beats detected",
            transform=ax.transAxes,
            ha="center",
            va="top",
            color=GREY,
            fontsize=10,
            gid="message",
            bbox={"fc": "white", "ec": "none", "alpha": 0.8},
        )
    if legend and len(beats):
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.22), ncol=3)
    return ax


def _title(summary: dict, n_beats: int, n_regions: int) -> str:
    meta = summary.get("metadata", {}) or {}
    source = meta.get("source")
    name = PurePath(str(source)).name if source else "recording"
    if n_beats == 0:
        return f"{name}\nno beats detected ({summary.get('rhythm') or 'quiescent'})"
    rate = summary.get("beat_rate_bpm")
    parts = [f"{n_beats} beat{'s' if n_beats != 1 else ''}"]
    parts.append(f"{rate:.1f} bpm" if rate else "rate not defined (1 beat)")
    if summary.get("rhythm"):
        parts.append(f"rhythm {summary['rhythm']}")
    line = ", ".join(parts)
    if n_regions > 1:
        line += f"\nwhole field: mixes {n_regions} regions that beat on their own (see regions)"
    return f"{name}\n{line}"


def plot_trace_panels(analysis, *, fig=None):
    """Displacement, OPD change and velocity on panels sharing the time axis.

    Parameters
    ----------
    analysis : beatlab.results.Analysis
        Uses ``trace``, ``beats``, ``summary`` (metadata ``source``, ``beat_rate_bpm``,
        ``rhythm``) and ``regions`` (how many beat on their own,
        :func:`beatlab.results.beating_regions`).
    fig : matplotlib Figure, optional
        Where to draw; a new figure otherwise.

    Returns
    -------
    matplotlib.figure.Figure
        Three Axes, top to bottom displacement (µm), OPD change (nm), velocity (µm/s; the
        smallest panel). The displacement panel carries the beat landmarks (see
        :func:`tabulate_trace`); irregular intervals and beats with a secondary peak are
        shaded on all three. The title gives the file name, beat count, rate and rhythm.

    Examples
    --------
    >>> import beatlab
    >>> fig = plot_trace_panels(beatlab.read_analysis("out/A1"))  # doctest: +SKIP
    >>> fig.savefig("A1_trace.png")  # doctest: +SKIP
    """
    if fig is None:
        import matplotlib.pyplot as plt

        fig = plt.figure(figsize=(7.2, 5.4), layout="constrained")
    trace, beats = analysis.trace, analysis.beats
    columns = [c for c in _PANELS if c in trace]
    ratios = {"displacement_um": 3.0, "opd_change_nm": 2.0, "velocity_um_s": 1.4}
    axes = fig.subplots(
        len(columns), 1, sharex=True, height_ratios=[ratios[c] for c in columns], squeeze=False
    )[:, 0]
    for k, (ax, column) in enumerate(zip(axes, columns, strict=True)):
        plot_trace(trace, beats, ax=ax, column=column, legend=False)
        ax.set_title("")
        ax.label_outer()
        for text in ax.texts:
            if k > 0 and text.get_gid() == "message":
                text.remove()  # said once, on the top panel
    if len(beats):
        handles, labels = axes[0].get_legend_handles_labels()
        keep = [(h, lab) for h, lab in zip(handles, labels, strict=True) if lab != "displacement"]
        if keep:
            ncol = len(keep) if len(keep) <= 4 else (len(keep) + 1) // 2
            fig.legend(*zip(*keep, strict=True), loc="outside lower center", ncol=ncol)
    n_beating = len(beating_regions(analysis.regions))
    fig.suptitle(_title(analysis.summary, len(beats), n_beating))
    return fig
