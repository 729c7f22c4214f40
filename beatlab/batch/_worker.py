"""The batch worker: one recording in, one row and its beats out, in any process.

:func:`analyze_task` is module level so that both a local process pool and a Dask cluster can
pickle it by name. It never raises for a bad recording: the exception becomes the row's
``status="error"`` and one-line ``error``.
"""

from __future__ import annotations

import contextlib
import os
import threading
import warnings
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field

import pandas as pd

from beatlab.batch.flags import dominant_region, quality_columns
from beatlab.io.folders import atomic_folder
from beatlab.pipeline import analyze

__all__ = [
    "THREAD_VARIABLES",
    "AnalysisTask",
    "analyze_task",
    "describe_error",
    "error_row",
    "init_worker",
    "pinned_environment",
    "save_details",
    "thread_settings",
]

THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
"""Environment variables that numerical libraries read once, when they load."""

_ENVIRONMENT_LOCK = threading.Lock()


@dataclass(frozen=True)
class AnalysisTask:
    """One recording to analyse.

    Attributes
    ----------
    index : int
        Position of the recording's row in the layout table.
    recording_id : str
        The layout's recording id (for messages).
    path : str
        The recording (absolute).
    options : Mapping
        Keyword overrides for :func:`beatlab.analyze` from the layout row.
    config : Mapping
        The full nested configuration.
    measure : str
        ``"whole"`` (the whole analysed field) or ``"dominant"`` (its dominant region only:
        :func:`beatlab.batch.flags.dominant_region`), from the layout's ``measure`` column.
    save_dir : str or None
        Write the recording's full analysis (the files of ``beatlab analyze --out``) into this
        folder, replaced whole or not at all; None: only the row and beats are returned.
    figures : bool
        Draw the recording's figures into `save_dir`.
    threads : int or None
        Threads for the recording's frame-level work. None: the worker's own
        ``OMP_NUM_THREADS`` (1 when unset), and OpenCV is pinned to it (Dask workers).
    """

    index: int
    recording_id: str
    path: str
    options: Mapping = field(default_factory=dict)
    config: Mapping = field(default_factory=dict)
    threads: int | None = None
    measure: str = "whole"
    save_dir: str | None = None
    figures: bool = True


def describe_error(exc: BaseException) -> str:
    """One line: the exception's class and its message, whitespace collapsed."""
    message = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {message}" if message else type(exc).__name__


def error_row(exc: BaseException) -> dict:
    """The batch columns of a recording whose analysis raised ``exc``."""
    return {"status": "error", "error": describe_error(exc), "warnings": ""}


def _environment_threads() -> int:
    try:
        return max(1, int(os.environ.get("OMP_NUM_THREADS", "1")))
    except ValueError:
        return 1


def _pin_opencv(threads: int) -> None:
    import cv2

    cv2.setNumThreads(int(threads))


def analyze_task(task: AnalysisTask) -> tuple[dict, pd.DataFrame]:
    """Analyse one recording; never raise for a bad one.

    Parameters
    ----------
    task : AnalysisTask

    Returns
    -------
    row : dict
        ``Analysis.to_row()`` plus ``status`` (``ok`` or ``error``), ``error`` (one line,
        empty when ok) and ``warnings`` (the analysis's warnings joined with ``"; "``; they
        are not raised in the worker).
    beats : pandas.DataFrame
        The recording's beats table (empty on error).
    """
    threads = task.threads
    if threads is None:
        threads = _environment_threads()
        _pin_opencv(threads)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # kept in the row: one line per recording
            analysis = analyze(
                task.path, dict(task.config), workers=threads, progress=False, **task.options
            )
    except Exception as exc:  # any failure of one recording must not stop the batch
        return error_row(exc), pd.DataFrame()
    base = analysis.to_row()
    row = {**base, **quality_columns(base, analysis.regions)}
    beats = analysis.beats
    if task.measure == "dominant":
        row, beats = dominant_region(row, analysis.regions, analysis.region_beats)
    notes = list(analysis.warnings)
    if task.save_dir is not None:
        try:
            save_details(analysis, task.save_dir, figures=task.figures)
        except Exception as exc:  # the numbers stand; the folder goes without figures
            notes.append(f"recording figures not drawn: {describe_error(exc)}")
            try:
                save_details(analysis, task.save_dir, figures=False)
            except Exception as again:
                notes.append(f"recording folder not written: {describe_error(again)}")
    row = {
        **row,
        "status": "ok",
        "error": "",
        "warnings": "; ".join(notes),
    }
    return row, beats


def save_details(analysis, folder: str | os.PathLike, *, figures: bool = True) -> None:
    """Write one recording's analysis folder (tables, maps, figures, report) atomically.

    Parameters
    ----------
    analysis : Analysis
        The recording's result.
    folder : path-like
        Its folder; an earlier one is replaced only once the new one is complete.
    figures : bool
        Draw the figures (PNG only, to keep a plate's folders small) and the one-recording
        report.
    """
    with atomic_folder(folder) as tmp:
        analysis.save(tmp, figures=figures, figure_formats=("png",), shown_as=folder)


def init_worker(threads: int) -> None:
    """Initialiser of a local pool process: pin OpenCV's thread pool to ``threads``.

    The numerical libraries' variables (:data:`THREAD_VARIABLES`) are already in the
    process's environment from its start (:func:`pinned_environment`), before numpy loaded.
    """
    _pin_opencv(threads)


@contextlib.contextmanager
def pinned_environment(threads: int) -> Iterator[None]:
    """Set :data:`THREAD_VARIABLES` to ``threads`` in this process while inside.

    Processes started inside inherit them from their first instruction, so the libraries
    read them when they load; the variables are restored on the way out.
    """
    with _ENVIRONMENT_LOCK:
        saved = {name: os.environ.get(name) for name in THREAD_VARIABLES}
        os.environ.update(dict.fromkeys(THREAD_VARIABLES, str(int(threads))))
        try:
            yield
        finally:
            for name, value in saved.items():
                if value is None:
                    os.environ.pop(name, None)
                else:
                    os.environ[name] = value


def thread_settings(names: Sequence[str] = THREAD_VARIABLES) -> dict:
    """The thread settings of the calling process: environment variables and OpenCV's.

    Parameters
    ----------
    names : sequence of str
        Environment variables to report.

    Returns
    -------
    dict
        Each name -> its value (None when unset), and ``opencv`` -> OpenCV's thread count.
    """
    import cv2

    return {**{name: os.environ.get(name) for name in names}, "opencv": cv2.getNumThreads()}
