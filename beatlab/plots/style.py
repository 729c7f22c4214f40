"""One house style for every figure: fonts, sizes, a colour-blind-safe palette, units.

Also the one table format of the data behind a figure (:data:`PLOTTED_COLUMNS`), so every
``<figure>_plotted.csv`` reads the same way.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = [
    "GREY",
    "PALETTE",
    "PLOTTED_COLUMNS",
    "RC",
    "REGION_COLOURS",
    "UNIT_LABELS",
    "apply_style",
    "axis_label",
    "concat_rows",
    "message_panel",
    "plotted_rows",
]

#: Okabe & Ito (2008) colour-blind-safe palette.
PALETTE = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}

#: Colours given to regions 1, 2, ... in turn (yellow last: weak on white).
REGION_COLOURS = tuple(
    PALETTE[k] for k in ("blue", "vermillion", "green", "purple", "orange", "sky", "yellow")
)

#: Grey for text panels and reference lines (not part of the data colours).
GREY = "#6E6E6E"

RC = {
    "font.size": 9,
    "axes.titlesize": 9,
    "axes.labelsize": 9,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 8,
    "figure.titlesize": 10,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.linewidth": 0.8,
    "axes.titlelocation": "left",
    "lines.linewidth": 1.2,
    "legend.frameon": False,
    "savefig.dpi": 300,
    "figure.dpi": 100,
    # the figure at its designed size (constrained layout keeps everything inside): no
    # trimming to the drawn extent, which cost a layout pass per file (~14 % of drawing)
    "savefig.bbox": None,
    "svg.fonttype": "none",
    "axes.prop_cycle": None,
}
"""matplotlib rc parameters of the house style (``axes.prop_cycle`` is set from PALETTE)."""

#: Unit symbol of a column or plotted-table unit -> how axis labels write it.
UNIT_LABELS = {
    "s": "s",
    "ms": "ms",
    "um": "µm",
    "nm": "nm",
    "um/s": "µm/s",
    "cm/s": "cm/s",
    "bpm": "bpm",
    "1": "",
}

#: Columns of every ``<figure>_plotted.csv``: one row per plotted point.
PLOTTED_COLUMNS = (
    "panel",
    "series",
    "item",
    "x",
    "y",
    "value",
    "x_unit",
    "y_unit",
    "value_unit",
)


def apply_style(mpl) -> None:
    """Set the house rc parameters on the given matplotlib module.

    Parameters
    ----------
    mpl : module
        ``matplotlib`` (passed in so that this module never imports it).
    """
    from cycler import cycler

    rc = dict(RC)
    rc["axes.prop_cycle"] = cycler(
        color=[
            PALETTE[k]
            for k in ("blue", "vermillion", "green", "orange", "purple", "sky", "yellow", "black")
        ]
    )
    mpl.rcParams.update(rc)


def axis_label(quantity: str, unit: str) -> str:
    """An axis label with its unit in brackets: ``axis_label("time", "s") == "time (s)"``.

    Parameters
    ----------
    quantity : str
        What is on the axis.
    unit : str
        A key of :data:`UNIT_LABELS` (``"um"`` is written µm) or the unit as it is to be shown.

    Returns
    -------
    str
    """
    shown = UNIT_LABELS.get(unit, unit)
    return f"{quantity} ({shown})" if shown else quantity


def message_panel(ax, text: str):
    """Turn ``ax`` into a panel that only says ``text`` (no ticks, no spines, no colour bar).

    Parameters
    ----------
    ax : matplotlib Axes
    text : str
        The message, e.g. ``"no beats detected"``.

    Returns
    -------
    matplotlib.text.Text
        The message artist (its ``gid`` is ``"message"``).
    """
    ax.set_xticks([])
    ax.set_yticks([])
    for spine in ax.spines.values():
        spine.set_visible(False)
    return ax.text(
        0.5,
        0.5,
        text,
        transform=ax.transAxes,
        ha="center",
        va="center",
        color=GREY,
        fontsize=10,
        wrap=True,
        gid="message",
    )


def plotted_rows(
    panel: str,
    series: str,
    *,
    x,
    y=None,
    value=None,
    item=None,
    x_unit: str,
    y_unit: str = "",
    value_unit: str = "",
) -> pd.DataFrame:
    """Rows of a plotted-data table (columns :data:`PLOTTED_COLUMNS`) for one drawn series.

    Parameters
    ----------
    panel, series : str
        Which panel of the figure and which drawn element (line, markers, span, image).
    x : array_like, shape (N,)
        x of each point (for an image: the centre of each cell).
    y, value : array_like, shape (N,), optional
        y of each point, and the colour-coded value of an image cell; NaN where absent.
    item : array_like of int, shape (N,), optional
        Which element of the series the row belongs to (beat number, span, tile); 0 for all
        rows of a single line.
    x_unit, y_unit, value_unit : str
        Units of the three coordinates (``"s"``, ``"ms"``, ``"um"``, ``"nm"``, ...).

    Returns
    -------
    pandas.DataFrame
        One row per point, columns :data:`PLOTTED_COLUMNS`.
    """
    xs = np.asarray(x, dtype=float).ravel()
    n = xs.size

    def column(values):
        if values is None:
            return np.full(n, np.nan)
        return np.broadcast_to(np.asarray(values, dtype=float).ravel(), (n,)).copy()

    items = np.zeros(n, dtype=np.int64) if item is None else np.asarray(item).ravel()
    return pd.DataFrame(
        {
            "panel": [panel] * n,
            "series": [series] * n,
            "item": np.broadcast_to(items.astype(np.int64), (n,)).copy(),
            "x": xs,
            "y": column(y),
            "value": column(value),
            "x_unit": [x_unit] * n,
            "y_unit": [y_unit] * n,
            "value_unit": [value_unit] * n,
        },
        columns=list(PLOTTED_COLUMNS),
    )


def concat_rows(parts) -> pd.DataFrame:
    """Stack plotted-data tables; an empty list gives an empty table with the columns."""
    parts = [p for p in parts if len(p)]
    if not parts:
        return plotted_rows("", "", x=[], x_unit="")
    return pd.concat(parts, ignore_index=True)
