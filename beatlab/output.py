"""Write an :class:`~beatlab.results.Analysis` as the files of the output contract."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from beatlab.errors import AnalysisError
from beatlab.io.writers import atomic_path, write_json
from beatlab.schema import TABLES

__all__ = ["CAUTION", "save_analysis"]

#: Shown in reports and written into every summary.
CAUTION = (
    "Research use only: not a diagnostic or medical device and not for clinical decisions. "
    "In vitro cardiac-safety conclusions need validated assays under ICH S7B and the ICH "
    "E14/S7B Q&A (2022) and local regulation; contraction metrics are not a qualified "
    "regulatory endpoint on their own."
)


def _write_table(df, out: Path, name: str) -> Path:
    """Write one table of the schema; its columns must be the schema's, in order."""
    table = TABLES[name]
    if tuple(df.columns) != table.names():
        raise AnalysisError(
            f"{table.file}: columns {list(df.columns)} differ from the schema "
            f"{list(table.names())}; this is a bug in beatlab, please report it"
        )
    path = out / table.file
    with atomic_path(path) as tmp:
        df.to_csv(tmp, index=False)  # full precision: read_analysis gives the same numbers
    return path


def save_analysis(
    analysis,
    out_dir: str | os.PathLike,
    *,
    figures: bool = True,
    figure_formats: tuple[str, ...] = ("png", "svg"),
    workers: int = 1,
    figure_process=None,
    shown_as: str | os.PathLike | None = None,
) -> dict[str, Path]:
    """Write summary.json, beats.csv, trace.csv, average_beat.csv, region files, maps, figures.

    Parameters
    ----------
    analysis : Analysis
        The result of :func:`beatlab.analyze`.
    out_dir : path-like
        Output folder, created if needed. Every file is written atomically.
    figures : bool
        Also draw the figures of :func:`beatlab.plots.save_recording_figures` (trace,
        average_beat, poincare, maps, regions), each with ``<name>_plotted.csv`` beside it,
        and ``report.html`` (:func:`beatlab.report.build_recording_report`).
    figure_formats : tuple of str
        Image formats of the figures (``png``, ``svg``, ``pdf``).
    workers : int
        Figures drawn at once (forked processes on Linux; 1: in this process).
    figure_process : beatlab._figure_process.FigureProcess, optional
        A figure process started earlier: it draws the figures and writes the report (the
        same files, with the figure libraries loaded ahead of time); it is closed after.
    shown_as : path-like, optional
        The folder as ``report.html`` names it (default: ``out_dir``): the final folder when
        ``out_dir`` is a temporary one renamed once complete.

    Returns
    -------
    dict
        File role -> path.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {}
    paths["summary"] = write_json(out / "summary.json", {**analysis.summary, "caution": CAUTION})
    for name in TABLES:
        paths[name] = _write_table(getattr(analysis, name), out, name)
    arrays = {k: np.asarray(v) for k, v in analysis.maps.items() if isinstance(v, np.ndarray)}
    arrays["mask"] = analysis.mask
    arrays["template_nm"] = analysis.template
    if analysis.region_labels is not None:
        arrays["region_labels"] = analysis.region_labels
    with atomic_path(out / "maps.npz") as tmp:
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **arrays)
    paths["maps"] = out / "maps.npz"
    if figures:
        from beatlab._figure_process import FigureProcess

        drawer = figure_process or FigureProcess(start=False)  # no process: drawn here
        paths.update(
            drawer.draw(analysis, out, formats=figure_formats, workers=workers, shown_as=shown_as)
        )
    return paths
