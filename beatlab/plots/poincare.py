"""Poincaré plot of successive inter-beat intervals, with SD1 and SD2.

:func:`tabulate_poincare` lists every plotted point (``poincare_plotted.csv``);
:func:`plot_poincare` draws from it.
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
from beatlab.rhythm import interval_indices

__all__ = ["plot_poincare", "poincare_sd", "tabulate_poincare"]

#: The axes span at least this share of the mean interval, so that a regular rhythm's
#: sub-millisecond scatter is not blown up to look irregular.
_MIN_SPAN_OF_MEAN = 0.2
#: Fewest intervals for SD1 and SD2 (as for sd1_s, sd2_s in summary.json).
_MIN_INTERVALS = 3


def _intervals(ibi_s) -> np.ndarray:
    ibi = pd.to_numeric(pd.Series(np.asarray(ibi_s, dtype=object).ravel()), errors="coerce")
    return ibi.to_numpy(dtype=float)


def poincare_sd(ibi_s) -> tuple[float, float]:
    """SD1 and SD2 of the Poincaré plot of an interval series, in the series' unit.

    Parameters
    ----------
    ibi_s : array_like, shape (N,)
        Successive inter-beat intervals; non-finite entries are dropped.

    Returns
    -------
    (float, float)
        ``SD1 = SD(x_n+1 - x_n) / sqrt 2`` and ``SD2 = SD((x_n + x_n+1) / sqrt 2)``, both
        with ddof 1, so ``SD1^2 + SD2^2 = var(x_n) + var(x_n+1)``; NaN with fewer than 3
        intervals. The same numbers as ``sd1_s``, ``sd2_s`` of summary.json.

    Notes
    -----
    Brennan, Palaniswami & Kamen (2001), IEEE Trans Biomed Eng 48:1342: SD1 is the spread
    perpendicular to the identity line (short-term variability), SD2 the spread along it.
    SD2 is computed directly from the sums rather than as sqrt(2 SDNN^2 - SD1^2), which can
    go negative on short series; on long series the two agree.

    Examples
    --------
    >>> [round(v * 1e3, 2) for v in poincare_sd([0.81, 0.83, 0.79, 0.85, 0.82])]
    [32.85, 14.58]
    """
    indices = interval_indices(_intervals(ibi_s))
    if indices["sd1_s"] is None:
        return float("nan"), float("nan")
    return float(indices["sd1_s"]), float(indices["sd2_s"])


def tabulate_poincare(ibi_s) -> pd.DataFrame:
    """Every point of the Poincaré plot, as drawn (``poincare_plotted.csv``).

    Parameters
    ----------
    ibi_s : array_like, shape (N,)
        Successive inter-beat intervals in s in beat order (the beats.csv ``ibi_s`` column;
        its empty first value is skipped).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`beatlab.plots.style.PLOTTED_COLUMNS`, panel ``poincare``, all in ms:
        ``pairs`` (x = IBI_n, y = IBI_n+1, item = n, 0-based, for successive defined
        intervals), ``identity`` (two rows: the ends of the drawn line y = x), and with 3
        intervals or more ``sd1_axis`` and ``sd2_axis`` (two rows each: from the centroid
        along the perpendicular and along the identity direction, as long as SD1 and SD2;
        ``value`` = SD1, SD2) and ``ellipse`` (the fitted ellipse with those semi-axes).
        Empty without a pair.
    """
    ibi = _intervals(ibi_s) * 1e3
    ok = np.isfinite(ibi[:-1]) & np.isfinite(ibi[1:])
    n = np.flatnonzero(ok)
    if not n.size:
        return concat_rows([])
    x, y = ibi[n], ibi[n + 1]
    rows = [plotted_rows("poincare", "pairs", x=x, y=y, item=n, x_unit="ms", y_unit="ms")]
    finite = ibi[np.isfinite(ibi)]
    mean = float(np.mean(finite))
    lo, hi = float(finite.min()), float(finite.max())
    span = max(hi - lo, _MIN_SPAN_OF_MEAN * mean)
    pad = 0.12 * span
    mid = 0.5 * (lo + hi)
    lo, hi = mid - span / 2 - pad, mid + span / 2 + pad
    rows.append(
        plotted_rows("poincare", "identity", x=[lo, hi], y=[lo, hi], x_unit="ms", y_unit="ms")
    )
    sd1, sd2 = poincare_sd(finite / 1e3)
    if np.isfinite(sd1):
        cx, cy = float(np.mean(x)), float(np.mean(y))
        along = np.array([1.0, 1.0]) / np.sqrt(2.0)
        across = np.array([-1.0, 1.0]) / np.sqrt(2.0)
        for series, sd, direction in (("sd1_axis", sd1, across), ("sd2_axis", sd2, along)):
            ends = np.array([[cx, cy], [cx, cy] + sd * 1e3 * direction])
            rows.append(
                plotted_rows(
                    "poincare",
                    series,
                    x=ends[:, 0],
                    y=ends[:, 1],
                    value=sd * 1e3,
                    x_unit="ms",
                    y_unit="ms",
                    value_unit="ms",
                )
            )
        phi = np.linspace(0.0, 2.0 * np.pi, 73)
        ex = cx + sd2 * 1e3 * np.cos(phi) * along[0] + sd1 * 1e3 * np.sin(phi) * across[0]
        ey = cy + sd2 * 1e3 * np.cos(phi) * along[1] + sd1 * 1e3 * np.sin(phi) * across[1]
        rows.append(plotted_rows("poincare", "ellipse", x=ex, y=ey, x_unit="ms", y_unit="ms"))
    return concat_rows(rows)


def plot_poincare(ibi_s, *, ax=None):
    """Plot IBI_n+1 against IBI_n (ms) with the identity line, SD1 and SD2.

    Parameters
    ----------
    ibi_s : array_like, shape (N,)
        Successive inter-beat intervals in s (the beats.csv ``ibi_s`` column).
    ax : matplotlib Axes, optional
        Where to draw; a new figure otherwise.

    Returns
    -------
    matplotlib.axes.Axes
        Equal aspect, the same limits on both axes (spanning at least 20 % of the mean
        interval), the SD1/SD2 ellipse and axes, with SD1 and SD2 (see :func:`poincare_sd`)
        in the legend. With fewer than 3 intervals, a text panel that says so.
    """
    if ax is None:
        import matplotlib.pyplot as plt

        ax = plt.figure(figsize=(3.6, 3.8), layout="constrained").add_subplot()
    ibi = _intervals(ibi_s)
    count = int(np.isfinite(ibi).sum())
    if count < _MIN_INTERVALS:
        plural = "s" if count != 1 else ""
        message_panel(ax, f"{count} beat interval{plural}:\nPoincaré plot needs at least 3")
        ax.set_title("Poincaré plot")
        return ax
    table = tabulate_poincare(ibi)

    def series(name):
        part = table[table["series"] == name]
        return part["x"].to_numpy(), part["y"].to_numpy(), part["value"].to_numpy()

    ix, iy, _ = series("identity")
    ax.plot(ix, iy, color=GREY, lw=0.7, ls="--", label="identity", gid="identity")
    ex, ey, _ = series("ellipse")
    ax.plot(ex, ey, color=PALETTE["sky"], lw=1.0, gid="ellipse")
    for name, colour, label in (
        ("sd1_axis", PALETTE["vermillion"], "SD1"),
        ("sd2_axis", PALETTE["green"], "SD2"),
    ):
        sx, sy, value = series(name)
        ax.plot(sx, sy, color=colour, lw=1.6, label=f"{label} {value[0]:.1f} ms", gid=name)
    px, py, _ = series("pairs")
    ax.plot(px, py, "o", ms=4, color=PALETTE["blue"], alpha=0.8, ls="none", gid="pairs")
    ax.set_xlim(ix[0], ix[1])
    ax.set_ylim(iy[0], iy[1])
    ax.set_aspect("equal")
    ax.set_xlabel(axis_label("IBI$_n$", "ms"))
    ax.set_ylabel(axis_label("IBI$_{n+1}$", "ms"))
    pairs = px.size
    ax.set_title(f"Poincaré plot: {count} intervals, {pairs} pair{'s' if pairs != 1 else ''}")
    ax.legend(loc="best", handlelength=1.2)
    return ax
