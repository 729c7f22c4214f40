"""Every figure of a batch folder, each beside the table of what it plots.

:func:`save_batch_figures` reads the tables of ``beatlab batch --out DIR`` and writes into
``DIR/figures/``: ``groups_<metric>`` (:func:`~beatlab.plots.groups.plot_metric_by_group`),
``dose_response_<metric>`` (:func:`~beatlab.plots.dose.plot_dose_response`),
``plate_<plate>[_<timepoint>]_<metric>`` (:func:`~beatlab.plots.plate.plot_plate`) and
``gallery`` (:func:`~beatlab.plots.gallery.plot_gallery`), each as PNG (and SVG...) with a CSV
of the same stem listing every plotted point, and ``index.json``: the figures written and
those skipped, with the reason.
"""

from __future__ import annotations

import json
import logging
import math
import os
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from beatlab.errors import InputError
from beatlab.io.writers import atomic_path, write_json
from beatlab.plots.dose import plot_dose_response, tabulate_dose_response
from beatlab.plots.gallery import GALLERY_SECONDS, plot_gallery, tabulate_gallery
from beatlab.plots.groups import _column, plot_metric_by_group, tabulate_metric_by_group
from beatlab.plots.plate import plot_plate, tabulate_plate

__all__ = ["FIGURE_FORMATS", "read_batch_table", "save_batch_figures"]

logger = logging.getLogger(__name__)

FIGURE_FORMATS = ("png", "svg", "pdf")
"""Image formats :func:`save_batch_figures` can write."""

# Columns read as text whatever they hold (names, keys, words).
_TEXT = frozenset(
    ("plate", "well", "timepoint", "fov", "well_id", "recording_id", "path", "condition",
     "protocol", "compound", "unit", "role", "status", "error", "warnings", "exclude_reason",
     "normalization", "baseline_timepoint", "rhythm", "rhythm_fov_counts", "quality_flags",
     "metric", "group", "control", "fit", "direction", "note", "test", "batch")
)  # fmt: skip
_UNSAFE = re.compile(r"[^A-Za-z0-9.\-]+")


@dataclass(frozen=True)
class _Figure:
    """One figure to write: what it plots, how to draw it, and its size in inches."""

    name: str
    tabulate: Callable[[], pd.DataFrame]
    draw: Callable
    size: Callable[[pd.DataFrame], tuple[float, float]]
    whole_figure: bool
    empty: str = "nothing to plot: its table has no rows"


def read_batch_table(path: str | os.PathLike) -> pd.DataFrame:
    """Read a CSV table of a batch folder with names as text and numbers as numbers.

    Parameters
    ----------
    path : path-like
        ``wells.csv``, ``recordings.csv``, ``dose_response.csv``, ... of ``beatlab batch``.

    Returns
    -------
    pandas.DataFrame
        Blank cells are null; the key and word columns (plate, well, timepoint, compound,
        unit, role, status, metric, fit, ...) are text even when they look like numbers
        (plate ``1``); every other column whose cells are all numbers is numeric (float).

    Raises
    ------
    InputError
        If the file cannot be read as CSV.
    """
    try:
        raw = pd.read_csv(path, dtype=object, keep_default_na=False, na_values=[""])
    except (OSError, ValueError) as exc:
        raise InputError(
            f"cannot read {path}: {exc}; run beatlab batch (or beatlab compare) again"
        ) from None
    out = raw.copy()
    for name in raw.columns:
        if name in _TEXT:
            out[name] = raw[name].astype(object)
            continue
        numbers = pd.to_numeric(raw[name], errors="coerce")
        if numbers.notna().sum() == raw[name].notna().sum():
            out[name] = numbers.astype(float)
    return out


def _read_optional(path: Path) -> pd.DataFrame | None:
    return read_batch_table(path) if path.is_file() else None


def _check_formats(formats) -> tuple[str, ...]:
    formats = (formats,) if isinstance(formats, str) else tuple(formats)
    unknown = sorted(set(formats) - set(FIGURE_FORMATS))
    if unknown or not formats:
        raise InputError(
            f"figure formats {list(formats)} are not supported; pass one or more of "
            f"{list(FIGURE_FORMATS)}"
        )
    return formats


def _batch_info(batch_dir: Path) -> dict:
    path = batch_dir / "batch.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


def _default_metrics(info: dict) -> list[str]:
    from beatlab.batch import STANDARD_METRICS

    found = info.get("metrics")
    if isinstance(found, list) and all(isinstance(m, str) for m in found) and found:
        return list(found)
    return list(STANDARD_METRICS)


def _safe(name: str) -> str:
    return _UNSAFE.sub("-", name).strip("-") or "unnamed"


def _has_values(wells: pd.DataFrame, column: str) -> bool:
    if column not in wells.columns:
        return False
    ok = _column(wells, "status") == "ok"
    values = pd.to_numeric(wells.loc[ok, column], errors="coerce")
    return bool(np.isfinite(values.astype(float)).any())


def _group_figure(wells, metric, skipped) -> _Figure | None:
    name = f"groups_{metric}"
    column = next((c for c in (f"{metric}_norm", metric) if _has_values(wells, c)), None)
    if column is None:
        skipped[name] = f"no ok well of wells.csv has a value of {metric}"
        return None

    def size(table):
        n = int(table["order"].nunique()) if len(table) else 1
        return (min(max(3.6, 0.62 * n + 1.6), 14.0), 3.4)

    return _Figure(
        name,
        lambda: tabulate_metric_by_group(wells, metric=column),
        lambda ax: plot_metric_by_group(wells, metric=column, ax=ax),
        size,
        whole_figure=False,
    )


def _dose_figure(wells, fits, metric, skipped) -> _Figure | None:
    name = f"dose_response_{metric}"
    names = set(fits["metric"].astype(str)) if "metric" in fits.columns else set()
    column = next((c for c in (f"{metric}_norm", metric) if c in names), None)
    if column is None:
        skipped[name] = f"dose_response.csv has no fit of {metric}"
        return None

    def size(table):
        n = max(int(table["panel"].nunique()), 1)
        return (3.5 * min(n, 3), 3.2 * math.ceil(n / 3))

    return _Figure(
        name,
        lambda: tabulate_dose_response(wells, fits, metric=column),
        lambda fig: plot_dose_response(wells, fits, metric=column, fig=fig),
        size,
        whole_figure=True,
        empty=f"no compound has a fit of {column} over 4 concentrations or more",
    )


def _plate_figure(wells, metric: str, plate: str, timepoint: str) -> _Figure:
    stem = "_".join(_safe(p) for p in (plate, timepoint) if p)
    where = {"plate": plate or None, "timepoint": timepoint or None}

    def size(table):
        return (7.2, 4.4) if table["x"].max() <= 12 else (9.8, 6.2)

    return _Figure(
        f"plate_{stem}_{metric}" if stem else f"plate_{metric}",
        lambda: tabulate_plate(wells, metric=metric, **where),
        lambda ax: plot_plate(wells, metric=metric, ax=ax, **where),
        size,
        whole_figure=False,
    )


def _plate_figures(wells, metric, skipped) -> list[_Figure]:
    if metric not in wells.columns or "well" not in wells.columns:
        skipped[f"plate_{metric}"] = f"wells.csv has no column well or {metric}"
        return []
    figures = []
    for plate in dict.fromkeys(_column(wells, "plate")):
        on_plate = wells[_column(wells, "plate") == plate]
        for timepoint in dict.fromkeys(_column(on_plate, "timepoint")):
            figures.append(_plate_figure(wells, metric, plate, timepoint))
    return figures


def _gallery_figure(batch_dir: Path, seconds: float) -> _Figure:
    def size(table):
        n = max(int(table["panel"].nunique()), 1)
        nrows = math.ceil(n / 4)
        ncols = math.ceil(n / nrows)
        return (2.3 * ncols + 0.6, 1.8 * nrows + 0.6)

    return _Figure(
        "gallery",
        lambda: tabulate_gallery(batch_dir, seconds=seconds),
        lambda fig: plot_gallery(batch_dir, fig=fig, seconds=seconds),
        size,
        whole_figure=True,
        empty="no ok recording has a readable recordings/<recording_id>/trace.csv",
    )


def _plan(batch_dir: Path, metrics: list[str], info: dict, skipped: dict) -> list[_Figure]:
    """The figures the tables of the folder support; the others, with why, in `skipped`."""
    told = info.get("skipped") if isinstance(info.get("skipped"), dict) else {}
    wells = _read_optional(batch_dir / "wells.csv")
    fits = _read_optional(batch_dir / "dose_response.csv")
    figures: list[_Figure] = []
    if wells is None or wells.empty:
        skipped["groups"] = skipped["plate"] = "no wells.csv, or it has no rows"
    else:
        figures += [f for m in metrics if (f := _group_figure(wells, m, skipped))]
        if fits is None or fits.empty:
            reason = told.get("dose_response", "no dose_response.csv, or it has no rows")
            skipped["dose_response"] = str(reason)
        else:
            figures += [f for m in metrics if (f := _dose_figure(wells, fits, m, skipped))]
        figures += [f for m in metrics for f in _plate_figures(wells, m, skipped)]
    if (batch_dir / "recordings.csv").is_file() and (batch_dir / "recordings").is_dir():
        figures.append(_gallery_figure(batch_dir, GALLERY_SECONDS))
    else:
        skipped["gallery"] = "no recordings.csv or no recordings/ folder of per-recording output"
    return figures


def _remove_stale(out: Path, index: dict, written: dict[str, Path]) -> None:
    """Remove files an earlier run listed in index.json and this run did not write."""
    keep = {p.name for p in written.values()}
    for files in (index.get("figures") or {}).values():
        for name in files if isinstance(files, list) else []:
            if isinstance(name, str) and name not in keep and Path(name).name == name:
                (out / name).unlink(missing_ok=True)


def save_batch_figures(
    batch_dir: str | os.PathLike,
    *,
    metrics: Sequence[str] | None = None,
    formats: Sequence[str] = ("png", "svg"),
    workers: int | None = None,
) -> dict[str, Path]:
    """Draw every figure of a batch folder into ``batch_dir/figures``.

    Parameters
    ----------
    batch_dir : path-like
        The ``--out`` folder of ``beatlab batch`` (``wells.csv``, ``dose_response.csv``,
        ``recordings.csv``, ``recordings/<recording_id>/trace.csv``, ``batch.json``).
    metrics : sequence of str, optional
        Metrics to draw (columns of ``recordings.csv``, e.g. ``"beat_rate_bpm"``); default:
        the metrics the batch compared (``batch.json``), else
        :data:`beatlab.batch.STANDARD_METRICS`.
    formats : sequence of str
        Image formats, from :data:`FIGURE_FORMATS`; the first is the one returned.
    workers : int, optional
        Figures drawn at once, in forked processes on Linux (default: every core; 1: one
        after the other in this process). The files are the same either way.

    Returns
    -------
    dict of str to Path
        ``"<name>_<format>"`` -> each image, ``"<name>_csv"`` -> the table of what it plots
        (same stem, ``.csv``, columns of :data:`beatlab.plots.style.PLOTTED_COLUMNS` and a
        few identifying ones), and ``"index"`` -> ``figures/index.json``. Names:
        ``groups_<metric>`` (the metric's ``_norm`` column when it has values, else the
        metric), ``dose_response_<metric>``, ``plate_<plate>[_<timepoint>]_<metric>`` (the
        metric itself, not normalised: a plate map is for spotting position effects) and
        ``gallery``.

    Raises
    ------
    InputError
        If `batch_dir` is not a folder, or `metrics` or `formats` is invalid.

    Notes
    -----
    A figure whose table is missing or empty is skipped: ``index.json`` lists it under
    ``skipped`` with the reason (that of ``batch.json`` where it gives one), and the reason
    is logged at INFO level. A figure that cannot be drawn from its table (an
    :class:`~beatlab.errors.InputError`, e.g. a well name that is no plate position) is
    skipped the same way. Figures an earlier run listed in ``index.json`` and this run did
    not draw are removed: a stale figure would mislead. Files are written atomically.
    """
    batch_dir = Path(batch_dir)
    if not batch_dir.is_dir():
        raise InputError(f"{batch_dir} is not a folder; pass the --out folder of beatlab batch")
    formats = _check_formats(formats)
    if isinstance(metrics, str):
        raise InputError(f"metrics must be a list of names, e.g. [{metrics!r}]")
    info = _batch_info(batch_dir)
    metrics = _default_metrics(info) if metrics is None else list(metrics)
    out = batch_dir / "figures"
    old_index = _read_index(out)
    skipped: dict[str, str] = {}
    written: dict[str, Path] = {}
    listing: dict[str, list[str]] = {}
    plan = _plan(batch_dir, metrics, info, skipped)
    for name, outcome in _render_all(plan, out, formats, workers=workers):
        if isinstance(outcome, str):
            skipped[name] = outcome
            continue
        written.update(outcome)
        listing[name] = [f"{name}.{fmt}" for fmt in formats] + [f"{name}.csv"]
    for name, reason in skipped.items():
        logger.info("batch figure %s skipped: %s", name, reason)
    _remove_stale(out, old_index, written)
    written["index"] = write_json(out / "index.json", {"figures": listing, "skipped": skipped})
    return written


#: The figures being drawn, for forked workers (they inherit it; closures do not pickle).
_PLANNED: list[_Figure] = []


def _render(job: tuple[int, Path, tuple[str, ...]]) -> tuple[str, dict[str, Path] | str]:
    """Draw one planned figure and its table: (name, paths) or (name, reason it is skipped)."""
    from beatlab.plots import save_figure

    index, out, formats = job
    figure = _PLANNED[index]
    try:
        table = figure.tabulate()
    except InputError as exc:
        return figure.name, str(exc)
    if table.empty:
        return figure.name, figure.empty
    csv = out / f"{figure.name}.csv"
    with atomic_path(csv) as tmp:
        table.to_csv(tmp, index=False)
    save_figure(figure.draw, out / f"{figure.name}.{formats[0]}", size=figure.size(table),
                whole_figure=figure.whole_figure, formats=formats)  # fmt: skip
    paths = {f"{figure.name}_csv": csv}
    paths.update({f"{figure.name}_{fmt}": out / f"{figure.name}.{fmt}" for fmt in formats})
    return figure.name, paths


def _render_all(plan: list[_Figure], out: Path, formats, *, workers: int | None):
    """(name, outcome) of every planned figure, in plan order, drawn by forked workers."""
    from beatlab.batch import available_cores
    from beatlab.stages._parallel import fork_map

    jobs = [(i, out, tuple(formats)) for i in range(len(plan))]
    _PLANNED[:] = plan
    try:
        if len(plan) > 1:
            import matplotlib

            matplotlib.use("Agg", force=False)  # imported once, before any fork
            import matplotlib.pyplot
        return fork_map(_render, jobs, workers=workers or available_cores())
    finally:
        _PLANNED.clear()


def _read_index(folder: Path) -> dict:
    try:
        data = json.loads((folder / "index.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}
