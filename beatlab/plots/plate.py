"""A metric as a heat map in the plate's own geometry, with failed and excluded wells marked.

:func:`plate_geometry` finds the plate format from the wells present, :func:`tabulate_plate`
lists every position as drawn and :func:`plot_plate` draws it: rows A.. from top to bottom,
columns 1.. from left to right.
"""

from __future__ import annotations

import re
import textwrap

import numpy as np
import pandas as pd

from beatlab.errors import InputError
from beatlab.plots.groups import _base, _column, _normalization, metric_label, metric_unit
from beatlab.plots.style import GREY, plotted_rows

__all__ = ["CELL_STATES", "PLATE_FORMATS", "plate_geometry", "plot_plate", "tabulate_plate"]

PLATE_FORMATS = {24: (4, 6), 96: (8, 12), 384: (16, 24)}
"""Wells per plate -> (rows, columns)."""

CELL_STATES = ("ok", "no value", "failed", "excluded", "empty")
"""What a plate position shows: a value; an ok well without one (e.g. an amplitude of an
arrested well); a well whose every field of view failed; a well whose every field of view was
excluded; a position with no well in the table."""

_WELL = re.compile(r"^\s*([A-Za-z])0*([0-9]{1,2})\s*$")
_EMPTY_COLOUR = "#E6E6E6"
_MAX_TEXT_WELLS = 96  # values are written into the cells of plates up to this size
# The colour scale of a metric spans at least 20 % of its median, and that of a change at
# least +-10 % (+-0.1 for a fraction, +-1 otherwise), so that noise alone fills no scale.
_MIN_RELATIVE_SPAN = 0.2
_MIN_SIGNED_REACH = {"%": 10.0, "1": 0.1}


def _parse_well(name: str) -> tuple[int, int]:
    """``"B3"`` -> (2, 3): 1-based row and column."""
    match = _WELL.match(name)
    if match is None:
        raise InputError(f"well {name!r} is not a plate position like A1 or P24; fix the layout")
    return ord(match.group(1).upper()) - ord("A") + 1, int(match.group(2))


def plate_geometry(wells, *, plate_format: int | None = None) -> tuple[int, int]:
    """The rows and columns of the smallest standard plate that holds every well.

    Parameters
    ----------
    wells : iterable of str
        Well names, ``"A1"`` .. ``"P24"`` (``"a01"`` reads as A1).
    plate_format : {24, 96, 384}, optional
        Use this format instead (when the wells in use would fit a smaller plate).

    Returns
    -------
    (int, int)
        Rows and columns: (4, 6), (8, 12) or (16, 24).

    Raises
    ------
    InputError
        A well name that is not a position, a well beyond P24, or a `plate_format` that
        does not hold the wells.
    """
    positions = [_parse_well(str(w)) for w in wells]
    need_rows = max((r for r, _ in positions), default=1)
    need_cols = max((c for _, c in positions), default=1)
    if plate_format is not None:
        if plate_format not in PLATE_FORMATS:
            raise InputError(
                f"plate_format={plate_format!r} is not a plate size; use one of "
                f"{sorted(PLATE_FORMATS)}"
            )
        rows, cols = PLATE_FORMATS[plate_format]
        if need_rows > rows or need_cols > cols:
            raise InputError(
                f"the wells reach row {chr(64 + need_rows)} and column {need_cols}, beyond a "
                f"{plate_format}-well plate; pass a larger plate_format"
            )
        return rows, cols
    for rows, cols in PLATE_FORMATS.values():
        if need_rows <= rows and need_cols <= cols:
            return rows, cols
    raise InputError(
        f"a well reaches row {chr(64 + need_rows)}, column {need_cols}: beyond a 384-well "
        "plate (P24); fix the well names"
    )


def _one(table: pd.DataFrame, column: str, given, what: str) -> pd.DataFrame:
    """Rows of one plate (or timepoint): the given one, or the only one there is."""
    values = _column(table, column)
    found = list(dict.fromkeys(values))
    if given is None:
        if len(found) > 1:
            raise InputError(f"the table holds {len(found)} {what}s {found}; pass {column}=")
        return table
    if str(given) not in found:
        raise InputError(f"{column}={given!r} is not in the table; pass one of {found}")
    return table[values == str(given)]


def _cells(table: pd.DataFrame, metric: str) -> pd.DataFrame:
    """Per well: state, value and failed fields of view (wells.csv or recordings.csv)."""
    status = _column(table, "status")
    value = pd.to_numeric(table[metric], errors="coerce").astype(float)
    if "n_fov" in table.columns:  # wells.csv: one row per well already
        failed = pd.to_numeric(table.get("n_fov_failed", 0), errors="coerce")
        frame = pd.DataFrame({"well": _column(table, "well"), "status": status, "value": value,
                              "n_fov_failed": failed})  # fmt: skip
    else:  # recordings.csv: fields of view of a well together, as aggregate_wells does
        frame = pd.DataFrame({"well": _column(table, "well"), "status": status,
                              "value": value.where(status == "ok")})  # fmt: skip
        frame = frame.groupby("well", sort=False).agg(
            value=("value", "mean"),
            n_ok=("status", lambda s: int((s == "ok").sum())),
            n_fov_failed=("status", lambda s: int((s == "error").sum())),
        )
        frame["status"] = np.where(
            frame["n_ok"] > 0, "ok", np.where(frame["n_fov_failed"] > 0, "error", "excluded")
        )
        frame = frame.reset_index()
    state = np.select(
        [
            frame["status"] == "error",
            frame["status"] == "excluded",
            frame["status"] != "ok",
            ~np.isfinite(frame["value"]),
        ],
        ["failed", "excluded", "failed", "no value"],
        "ok",
    )
    frame["state"] = state
    frame["n_fov_failed"] = pd.to_numeric(frame["n_fov_failed"], errors="coerce").fillna(0)
    return frame


def tabulate_plate(
    table: pd.DataFrame,
    *,
    metric: str,
    plate=None,
    timepoint=None,
    plate_format: int | None = None,
) -> pd.DataFrame:
    """Every position of the plate as :func:`plot_plate` draws it (the plotted-data table).

    Parameters
    ----------
    table : pandas.DataFrame
        ``wells.csv`` (recognised by its ``n_fov`` column) or ``recordings.csv`` (fields of
        view of a well are averaged over those with status ok, as in ``wells.csv``); needs
        ``well``, ``status`` and `metric`.
    metric : str
        The column to show, e.g. ``"beat_rate_bpm"``.
    plate, timepoint : optional
        Which plate and timepoint; needed when the table holds several.
    plate_format : {24, 96, 384}, optional
        The plate size; default: the smallest that holds the wells (:func:`plate_geometry`).

    Returns
    -------
    pandas.DataFrame
        One row per position, row by row: the columns of
        :data:`beatlab.plots.style.PLOTTED_COLUMNS` with ``series`` the state
        (:data:`CELL_STATES`), ``x`` the column number (1..), ``y`` the row number (1 = A),
        ``value`` the metric (null unless ``ok``); then ``well`` and ``n_fov_failed``.

    Raises
    ------
    InputError
        A missing column, several plates or timepoints without `plate` / `timepoint`, or a
        well that is not a plate position.
    """
    missing = [c for c in ("well", "status", metric) if c not in table.columns]
    if missing:
        raise InputError(f"the table has no column {missing[0]!r}; pass wells.csv or "
                         "recordings.csv and one of its metric columns")  # fmt: skip
    part = _one(table, "plate", plate, "plate") if "plate" in table.columns else table
    if "timepoint" in part.columns:
        part = _one(part, "timepoint", timepoint, "timepoint")
    cells = _cells(part[_column(part, "well") != ""], metric).set_index("well")
    if cells.index.has_duplicates:
        raise InputError(
            f"well {cells.index[cells.index.duplicated()][0]!r} appears twice; pass one "
            "timepoint of a wells table, or recordings.csv"
        )
    cells.index = [f"{chr(64 + r)}{c}" for r, c in map(_parse_well, cells.index)]
    n_rows, n_cols = plate_geometry(cells.index, plate_format=plate_format)
    names = [f"{chr(64 + r)}{c}" for r in range(1, n_rows + 1) for c in range(1, n_cols + 1)]
    full = cells.reindex(names)
    state = full["state"].fillna("empty").to_numpy()
    value = np.where(state == "ok", full["value"].to_numpy(dtype=float), np.nan)
    names_found = [_column(part, c).iloc[0] if len(part) else "" for c in ("plate", "timepoint")]
    panel = " · ".join(t for t in names_found if t)
    rows = np.repeat(np.arange(1, n_rows + 1), n_cols)
    cols = np.tile(np.arange(1, n_cols + 1), n_rows)
    out = plotted_rows(panel, "", x=cols, y=rows, value=value, item=np.arange(rows.size),
                       x_unit="column", y_unit="row", value_unit=metric_unit(metric))  # fmt: skip
    out["series"] = state
    out["well"] = names
    out["n_fov_failed"] = full["n_fov_failed"].fillna(0).to_numpy(dtype=int)
    return out


def _colour_scale(values: np.ndarray, *, signed: bool, unit: str):
    """Colour map and limits; a minimum width keeps noise from looking like a pattern."""
    from matplotlib.colors import Normalize

    finite = values[np.isfinite(values)]
    if signed:
        # a change: centred on 0, so colour says up (red) or down (blue) at a glance
        floor = _MIN_SIGNED_REACH.get(unit, 1.0)
        reach = max(float(np.abs(finite).max()) if finite.size else 0.0, floor)
        return "RdBu_r", Normalize(-reach, reach)
    if finite.size == 0:
        return "viridis", Normalize(0.0, 1.0)
    lo, hi = float(finite.min()), float(finite.max())
    middle = (lo + hi) / 2.0
    half = max((hi - lo) / 2.0, _MIN_RELATIVE_SPAN / 2.0 * abs(float(np.median(finite))), 0.5
               if middle == 0 else 0.0)  # fmt: skip
    lo, hi = middle - half, middle + half
    if finite.min() >= 0 and lo < 0:  # a quantity that cannot be negative: no scale below 0
        lo, hi = 0.0, hi - lo
    return "viridis", Normalize(lo, hi)


def _marks(ax, cells: pd.DataFrame) -> list:
    """Hatched empty and excluded positions, crosses on failed wells; legend handles."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch, Rectangle

    handles = []
    styles = {
        "empty": ({"facecolor": _EMPTY_COLOUR, "edgecolor": "white"}, "no well"),
        "excluded": ({"facecolor": "white", "hatch": "////", "edgecolor": GREY}, "excluded"),
    }
    for state, (style, name) in styles.items():
        part = cells[cells["series"] == state]
        for x, y in zip(part["x"], part["y"], strict=True):
            ax.add_patch(Rectangle((x - 0.5, y - 0.5), 1, 1, lw=0.6, gid=state, **style))
        if len(part):
            handles.append(Patch(label=name, **style))
    marks = {
        "failed": ("x", 7, 1.6, "black", "failed (every field of view)"),
        "no value": ("_", 7, 1.2, GREY, "ok, no value (e.g. arrested)"),
    }
    for state, (marker, size, width, colour, name) in marks.items():
        part = cells[cells["series"] == state]
        if len(part):
            ax.plot(part["x"], part["y"], marker, ms=size, mew=width, color=colour, ls="none",
                    gid=state)  # fmt: skip
            handles.append(Line2D([], [], marker=marker, ms=size, mew=width, color=colour,
                                  ls="none", label=name))  # fmt: skip
    partly = cells[(cells["n_fov_failed"] > 0) & cells["series"].isin(["ok", "no value"])]
    if len(partly):
        ax.plot(partly["x"] + 0.32, partly["y"] - 0.32, "v", ms=3.5, color="black", ls="none",
                gid="partly failed")  # fmt: skip
        handles.append(Line2D([], [], marker="v", ms=4, color="black", ls="none",
                              label="some fields of view failed"))  # fmt: skip
    return handles


def plot_plate(
    wells_or_recordings: pd.DataFrame,
    *,
    metric: str,
    plate=None,
    timepoint=None,
    plate_format: int | None = None,
    ax=None,
):
    """Heat map of a metric over the plate, in its real well geometry.

    Parameters
    ----------
    wells_or_recordings : pandas.DataFrame
        ``wells.csv`` or ``recordings.csv`` of a batch (see :func:`tabulate_plate`).
    metric : str
        The column to show, e.g. ``"beat_rate_bpm"``.
    plate, timepoint : optional
        Which plate and timepoint; needed when the table holds several.
    plate_format : {24, 96, 384}, optional
        The plate size; default: the smallest that holds the wells present.
    ax : matplotlib Axes, optional
        Where to draw; a new figure otherwise.

    Returns
    -------
    matplotlib.axes.Axes

    Raises
    ------
    InputError
        As :func:`tabulate_plate`.

    Notes
    -----
    Rows A.. run from top to bottom and columns 1.. from left to right, as the plate is
    seen from above. The colour scale is viridis between the smallest and largest value,
    or, for ``_norm`` and ``_change`` columns, blue-white-red centred on 0 and symmetric; it
    spans at least 20 % of the median value (a change: at least +-10 %, +-0.1 for a
    fraction), so that wells differing by noise alone do not look like a pattern.
    Positions with no well are grey, excluded wells hatched, wells whose every field of view
    failed crossed, ok wells without a value (an amplitude of an arrested well) get a dash,
    and ok wells where some fields of view failed a small triangle. On plates up to 96 wells
    each value is written in its cell (3 significant digits).
    """
    import matplotlib.pyplot as plt

    cells = tabulate_plate(wells_or_recordings, metric=metric, plate=plate,
                           timepoint=timepoint, plate_format=plate_format)  # fmt: skip
    n_rows, n_cols = int(cells["y"].max()), int(cells["x"].max())
    if ax is None:
        size = (7.0, 4.2) if n_cols <= 12 else (9.5, 6.0)
        ax = plt.figure(figsize=size, layout="constrained").add_subplot()
    values = cells["value"].to_numpy(dtype=float).reshape(n_rows, n_cols)
    cmap, norm = _colour_scale(values, signed=bool(_base(metric)[1]), unit=metric_unit(metric))
    image = ax.pcolormesh(
        np.arange(0.5, n_cols + 1),
        np.arange(0.5, n_rows + 1),
        np.ma.masked_invalid(values),
        cmap=cmap,
        norm=norm,
        edgecolors="white",
        linewidth=0.6,
        gid="values",
    )
    handles = _marks(ax, cells)
    if n_rows * n_cols <= _MAX_TEXT_WELLS:
        mapper = image.cmap
        for x, y, v in cells.loc[cells["series"] == "ok", ["x", "y", "value"]].itertuples(
            index=False
        ):
            r, g, b, _ = mapper(norm(v))
            dark = 0.299 * r + 0.587 * g + 0.114 * b < 0.5
            ax.text(x, y, f"{v:.3g}", ha="center", va="center", fontsize=6,
                    color="white" if dark else "black")  # fmt: skip
    ax.set_xlim(0.5, n_cols + 0.5)
    ax.set_ylim(n_rows + 0.5, 0.5)  # row A at the top
    ax.set_aspect("equal")
    ax.xaxis.tick_top()
    small = 6 if n_cols > 12 else 8
    ax.set_xticks(np.arange(1, n_cols + 1), [str(c) for c in range(1, n_cols + 1)],
                  fontsize=small)  # fmt: skip
    ax.set_yticks(np.arange(1, n_rows + 1), [chr(64 + r) for r in range(1, n_rows + 1)],
                  fontsize=small)  # fmt: skip
    ax.tick_params(length=0)
    for spine in ax.spines.values():
        spine.set_visible(False)
    bar = ax.figure.colorbar(image, ax=ax, shrink=0.8, pad=0.02)
    label = metric_label(metric, normalization=_normalization(wells_or_recordings, metric))
    bar.set_label(textwrap.fill(label, 34))
    title = cells["panel"].iloc[0]
    ax.set_title(f"plate {title}" if title else "plate", loc="left", pad=20)
    if handles:
        ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.01),
                  ncol=len(handles), fontsize=7, handlelength=1.2)  # fmt: skip
    return ax
