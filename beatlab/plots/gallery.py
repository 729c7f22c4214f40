"""One representative displacement trace per condition, side by side on shared axes.

:func:`choose_representatives` picks, per condition, the recording with status ok (and no
quality flag that spoils its trace) whose beat rate is closest to the median rate of its
condition; :func:`tabulate_gallery` reads their
``trace.csv`` from the batch's ``recordings/<recording_id>/`` folders and :func:`plot_gallery`
draws one small panel per condition, the same time window and displacement scale in every one.
"""

from __future__ import annotations

import logging
import math
import os
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd

from beatlab.errors import InputError
from beatlab.plots.groups import _column, group_colours, label_groups
from beatlab.plots.style import GREY, axis_label, message_panel, plotted_rows

__all__ = [
    "GALLERY_SECONDS",
    "TRACE_FLAGS",
    "choose_representatives",
    "plot_gallery",
    "tabulate_gallery",
]

logger = logging.getLogger(__name__)

GALLERY_SECONDS = 5.0
"""Default time window of every panel: the first 5 s of each recording."""

TRACE_FLAGS = ("few beats", "low snr", "drift", "small mask", "mixed regions")
"""Quality flags (``recordings.csv``) that make a trace a poor example of its condition."""

_NCOLS = 4


def choose_representatives(recordings: pd.DataFrame) -> pd.DataFrame:
    """The representative recording of each condition.

    Parameters
    ----------
    recordings : pandas.DataFrame
        ``recordings.csv`` of a batch: ``recording_id``, ``status``, ``beat_rate_bpm`` and
        the layout columns that name the groups (see
        :func:`beatlab.plots.groups.label_groups`).

    Returns
    -------
    pandas.DataFrame
        One row per condition, vehicle first: ``group``, ``order``, ``recording_id`` (blank
        when the condition has no recording with status ok), ``beat_rate_bpm`` (of the chosen
        recording), ``median_rate_bpm`` (of the condition's ok recordings), ``n_ok``,
        ``note`` (blank, or why the choice is not by rate).

    Raises
    ------
    InputError
        If a needed column is missing.

    Notes
    -----
    The representative is the recording with status ok and none of the :data:`TRACE_FLAGS`
    whose ``beat_rate_bpm`` is closest to the median ``beat_rate_bpm`` of all the
    condition's recordings with status ok (an arrested recording counts at 0 bpm). The
    median of an even count lies between two rates, so ties are common: the one with the
    higher ``quality_snr`` wins (a missing value counts lowest), then the first in the
    table. When every ok recording is flagged, the closest of them (noted);
    without any rate, the first ok recording (noted). ``velocity unresolved`` does not count:
    the displacement trace is unaffected. A condition is a group of
    :func:`~beatlab.plots.groups.label_groups`: compound x concentration (x timepoint);
    vehicle recordings whose layout ``condition`` differs (two protocols, say) each show
    their own condition.
    """
    missing = [c for c in ("recording_id", "status", "beat_rate_bpm") if c not in recordings]
    if missing:
        raise InputError(f"recordings has no column {missing[0]!r}; pass recordings.csv")
    recordings = recordings.reset_index(drop=True)  # labels are positions from here on
    groups = _vehicle_by_condition(recordings, label_groups(recordings))
    status = _column(recordings, "status")
    rate = pd.to_numeric(recordings["beat_rate_bpm"], errors="coerce").astype(float)
    snr = np.full(len(recordings), -np.inf)
    if "quality_snr" in recordings.columns:
        given = pd.to_numeric(recordings["quality_snr"], errors="coerce").to_numpy(dtype=float)
        snr = np.where(np.isfinite(given), given, -np.inf)
    flags = _column(recordings, "quality_flags").map(lambda t: {f.strip() for f in t.split(";")})
    rows = []
    for order in sorted(groups["order"].unique()):
        members = groups.index[groups["order"] == order]
        ok = [i for i in members if status[i] == "ok"]
        rated = [i for i in ok if np.isfinite(rate[i])]
        clean = [i for i in rated if not (flags[i] & set(TRACE_FLAGS))]
        row = {"group": groups.loc[members[0], "group"], "order": int(order),
               "recording_id": "", "beat_rate_bpm": math.nan, "median_rate_bpm": math.nan,
               "n_ok": len(ok), "note": ""}  # fmt: skip
        if rated:
            median = float(np.median(rate[rated]))
            # the median of an even count lies between two rates: ties are common
            pick = min(clean or rated, key=lambda i: (round(abs(rate[i] - median), 9), -snr[i]))
            row.update(recording_id=_column(recordings, "recording_id")[pick],
                       beat_rate_bpm=float(rate[pick]), median_rate_bpm=median)  # fmt: skip
            if not clean:
                row["note"] = "every ok recording has a quality flag: " + "; ".join(
                    sorted(flags[pick] & set(TRACE_FLAGS))
                )
        elif ok:
            row.update(recording_id=_column(recordings, "recording_id")[ok[0]],
                       note="no beat rate: the first ok recording is shown")  # fmt: skip
        else:
            row["note"] = "no recording with status ok"
        rows.append(row)
    return pd.DataFrame(rows, columns=["group", "order", "recording_id", "beat_rate_bpm",
                                       "median_rate_bpm", "n_ok", "note"])  # fmt: skip


def _vehicle_by_condition(recordings: pd.DataFrame, groups: pd.DataFrame) -> pd.DataFrame:
    """Split the vehicle group by the layout's ``condition`` when it names several."""
    vehicle = groups["vehicle"].to_numpy(dtype=bool)
    condition = _column(recordings, "condition").to_numpy()
    named = list(dict.fromkeys(c for c in condition[vehicle] if c))
    if len(named) < 2 or groups.loc[vehicle, "order"].nunique() != 1:
        return groups
    out = groups.copy()
    first = int(out.loc[vehicle, "order"].iloc[0])
    later = out["order"] > first
    out.loc[later, "order"] += len(named) - 1
    for k, name in enumerate(named):
        rows = vehicle & (condition == name)
        out.loc[rows, "group"] = name
        out.loc[rows, "order"] = first + k
    return out


def _read_recordings(batch_dir: Path) -> pd.DataFrame:
    path = batch_dir / "recordings.csv"
    try:
        return pd.read_csv(path, dtype=object, keep_default_na=False, na_values=[""])
    except (OSError, ValueError) as exc:
        raise InputError(
            f"cannot read {path}: {exc}; pass the --out folder of beatlab batch"
        ) from None


def _traces(batch_dir: Path, chosen: pd.DataFrame, seconds: float):
    """The plotted rows of each chosen trace, and the notes of the conditions left out."""
    parts, notes = [], {}
    for row in chosen.itertuples(index=False):
        if not row.recording_id:
            notes[row.group] = row.note
            continue
        path = batch_dir / "recordings" / row.recording_id / "trace.csv"
        try:
            trace = pd.read_csv(path, usecols=["time_s", "displacement_um"])
        except (OSError, ValueError):
            notes[row.group] = f"no readable recordings/{row.recording_id}/trace.csv"
            continue
        t = trace["time_s"].to_numpy(dtype=float)
        keep = np.isfinite(t) & (t - t[0] <= seconds + 1e-9) if t.size else np.zeros(0, bool)
        part = plotted_rows(row.group, "displacement", x=t[keep] - t[0],
                            y=trace["displacement_um"].to_numpy(dtype=float)[keep],
                            item=np.full(int(keep.sum()), row.order), x_unit="s",
                            y_unit="um")  # fmt: skip
        part["recording_id"] = row.recording_id
        part["beat_rate_bpm"] = row.beat_rate_bpm
        parts.append(part)
    for group, note in notes.items():
        logger.info("gallery: %s not shown: %s", group, note)
    if not parts:
        empty = plotted_rows("", "displacement", x=[], x_unit="s", y_unit="um")
        return empty.assign(recording_id=[], beat_rate_bpm=[]), notes
    return pd.concat(parts, ignore_index=True), notes


def _check_seconds(seconds) -> float:
    if not (isinstance(seconds, int | float) and np.isfinite(seconds) and seconds > 0):
        raise InputError(f"seconds must be a positive number, got {seconds!r}; e.g. 5")
    return float(seconds)


def tabulate_gallery(batch_dir: str | os.PathLike, *, seconds: float = GALLERY_SECONDS):
    """The traces :func:`plot_gallery` draws (the plotted-data table).

    Parameters
    ----------
    batch_dir : path-like
        A batch folder: ``recordings.csv`` and ``recordings/<recording_id>/trace.csv``.
    seconds : float
        Time window from each recording's first frame, in s.

    Returns
    -------
    pandas.DataFrame
        The columns of :data:`beatlab.plots.style.PLOTTED_COLUMNS`: ``panel`` the condition,
        ``series`` ``"displacement"``, ``item`` the condition's order, ``x`` the time from the
        first frame (s), ``y`` ``displacement_um`` (um); then ``recording_id`` and
        ``beat_rate_bpm`` of the representative (:func:`choose_representatives`).
        Conditions without a recording with status ok or without a readable ``trace.csv``
        are left out (logged).

    Raises
    ------
    InputError
        If ``recordings.csv`` cannot be read or `seconds` is not positive.
    """
    seconds, batch_dir = _check_seconds(seconds), Path(batch_dir)
    chosen = choose_representatives(_read_recordings(batch_dir))
    return _traces(batch_dir, chosen, seconds)[0]


def plot_gallery(batch_dir: str | os.PathLike, *, fig=None, seconds: float = GALLERY_SECONDS):
    """One representative displacement trace per condition, in a grid of small panels.

    Parameters
    ----------
    batch_dir : path-like
        A batch folder with ``recordings.csv`` and the per-recording folders
        ``recordings/<recording_id>/`` (``trace.csv``).
    fig : matplotlib Figure, optional
        Where to draw (an empty figure); a new one otherwise.
    seconds : float
        Time window from each recording's first frame, in s (default 5).

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    InputError
        If ``recordings.csv`` cannot be read or `seconds` is not positive.

    Notes
    -----
    The representative of a condition is the ok recording whose beat rate is closest to the
    condition's median (:func:`choose_representatives`): a typical recording, not the best
    looking one. Every panel shows the same window (0 to `seconds`) on the same displacement
    scale, so amplitudes and rates compare at a glance; the title names the condition, the
    right-hand title the recording's rate and id. Conditions without a trace are listed
    under the grid.
    """
    import matplotlib.pyplot as plt

    seconds, batch_dir = _check_seconds(seconds), Path(batch_dir)
    recordings = _read_recordings(batch_dir)
    chosen = choose_representatives(recordings)
    table, notes = _traces(batch_dir, chosen, seconds)
    shown = chosen[chosen["group"].isin(set(table["panel"]))]
    n = max(len(shown), 1)
    nrows = math.ceil(n / _NCOLS)
    ncols = math.ceil(n / nrows)  # balanced rows: 6 panels as 3 + 3, not 4 + 2
    if fig is None:
        fig = plt.figure(figsize=(2.2 * ncols + 0.6, 1.7 * nrows + 0.6), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols, sharex=True, sharey=True, squeeze=False))
    axes = axes.ravel()
    colours = group_colours(label_groups(recordings))
    if shown.empty:
        message_panel(axes[0], "no recording folder with a trace.csv")
    for ax, row in zip(axes, shown.itertuples(index=False), strict=False):
        part = table[table["panel"] == row.group]
        ax.plot(part["x"], part["y"], color=colours.get(row.group, GREY), lw=0.9, gid="trace")
        ax.axhline(0.0, color=GREY, lw=0.5, ls=":", zorder=0)
        ax.set_title(textwrap.fill(row.group, 24), loc="left", fontsize=8)
        rate = f"{row.beat_rate_bpm:.0f} bpm" if np.isfinite(row.beat_rate_bpm) else "no rate"
        ax.set_title(f"{rate}\n{row.recording_id}", loc="right", fontsize=6.5, color=GREY)
    for ax in axes[max(len(shown), 1) :]:
        ax.set_visible(False)
    axes[0].set_xlim(0.0, seconds)
    for k, ax in enumerate(axes[: len(shown)]):
        if k % ncols == 0:
            ax.set_ylabel(axis_label("displacement", "um"))
        if k >= len(shown) - ncols:
            ax.set_xlabel(axis_label("time", "s"))
            ax.tick_params(labelbottom=True)
    if notes:
        lines = [f"not shown: {g} ({why})" for g, why in notes.items()]
        fig.text(0.0, 0.0, "\n".join(lines), ha="left", va="top", fontsize=7, color=GREY)
    return fig
