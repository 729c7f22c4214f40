"""The batch runner: every recording of a plate layout, then the tables that compare them.

:func:`analyze_batch` is a thin map of :func:`beatlab.analyze` over the rows of a layout, on a
local process pool or a Dask cluster, with a per-recording cache; :func:`compare_batch`
recomputes the statistics tables of a finished (or interrupted) batch without analysing
anything.
"""

from __future__ import annotations

import json
import logging
import multiprocessing
import os
import sys
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, replace
from pathlib import Path

import pandas as pd

from beatlab._progress import progress_bar
from beatlab._version import __version__
from beatlab.batch._stats import STANDARD_METRICS, STATISTICS_TABLES, batch_statistics
from beatlab.batch._tables import (
    BEAT_DTYPES,
    ROW_DTYPES,
    beats_table,
    read_table,
    recordings_table,
    remove_table,
    write_table,
)
from beatlab.batch._worker import (
    AnalysisTask,
    analyze_task,
    describe_error,
    error_row,
    init_worker,
    pinned_environment,
)
from beatlab.batch.cache import ResultCache, decode_frame, encode_frame, recording_key
from beatlab.batch.layout import Layout, read_layout
from beatlab.errors import BeatlabWarning, InputError
from beatlab.io.folders import child_folder
from beatlab.io.writers import write_json
from beatlab.output import CAUTION
from beatlab.settings import load_settings

__all__ = ["BatchResult", "analyze_batch", "available_cores", "compare_batch", "illustrate"]

logger = logging.getLogger(__name__)

_NUMERIC_METRICS = tuple(name for name, kind in ROW_DTYPES.items() if kind in ("float", "int"))
_NOT_ANALYSED_ROW = {
    "status": "error",
    "error": "not analysed: no cached result for this file and configuration; run beatlab "
    "batch to analyse it",
    "warnings": "",
}
_BROKEN_POOL_HINT = (
    "out of memory, a crash in a library, or, when analyze_batch is called from a script, "
    "the call is not under if __name__ == '__main__':; the other recordings went on"
)
_EXCLUDED_ROW = {"status": "excluded", "error": "", "warnings": ""}


@dataclass(frozen=True, eq=False)
class BatchResult:
    """The tables of a batch, as written into its folder.

    Attributes
    ----------
    recordings : pandas.DataFrame
        ``recordings.csv``: one row per layout row: the layout's columns, every key of
        ``Analysis.to_row()``, ``status`` (``ok``, ``error`` or ``excluded``), ``error`` (one
        line) and ``warnings`` (the analysis's warnings, joined with ``"; "``).
    wells : pandas.DataFrame
        ``wells.csv``: fields of view aggregated per plate x well x timepoint, normalised.
    beats : pandas.DataFrame
        ``beats.csv``: every beat, led by its recording's layout columns.
    groups, dose_response, incidence, z_prime : pandas.DataFrame
        The statistics tables; empty when the layout does not support them (the reason is in
        ``batch.json`` under ``skipped``).
    counts : dict
        ``ok``, ``error``, ``excluded`` (recordings by status), ``analysed`` (this run) and
        ``cached`` (taken from the cache).
    out_dir : pathlib.Path
        The folder of the tables.
    """

    recordings: pd.DataFrame
    wells: pd.DataFrame
    beats: pd.DataFrame
    groups: pd.DataFrame
    dose_response: pd.DataFrame
    incidence: pd.DataFrame
    z_prime: pd.DataFrame
    counts: dict
    out_dir: Path


@dataclass
class _Plan:
    """Per layout row its (row, beats) when known, and the tasks that are still to run."""

    outcomes: list
    tasks: list[AnalysisTask]
    keys: dict[int, str]
    cached: int


def available_cores() -> int:
    """CPU cores this process may run on (its affinity where the system reports it)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def _check_metrics(metrics) -> list[str]:
    if metrics is None:
        return list(STANDARD_METRICS)
    if isinstance(metrics, str) or not all(isinstance(m, str) for m in metrics):
        raise InputError(f"metrics must be a list of column names, e.g. ['{metrics}']")
    unknown = [m for m in metrics if m not in _NUMERIC_METRICS]
    if unknown or not metrics:
        raise InputError(
            f"unknown or non-numeric metric(s) {unknown}; use names from "
            f"{', '.join(_NUMERIC_METRICS)}"
        )
    return list(dict.fromkeys(metrics))


def _check_count(value, name: str) -> int | None:
    if value is not None and (isinstance(value, bool) or not isinstance(value, int) or value < 1):
        raise InputError(f"{name} must be a positive whole number, got {value!r}")
    return value


def _as_layout(layout) -> Layout:
    if not isinstance(layout, Layout | str | os.PathLike):
        raise InputError(
            f"layout must be a Layout or the path of a layout CSV, got {type(layout).__name__}"
        )
    return layout if isinstance(layout, Layout) else read_layout(layout)


def _plan(
    layout: Layout, cache: ResultCache, config: dict, *, details: Path | None, figures: bool
) -> _Plan:
    """Excluded rows, rows found in the cache, and a task for each of the others.

    With `details` (the folder of the per-recording folders), a cached row whose folder is
    missing is analysed again, so that every ok recording has its folder.
    """
    plan = _Plan(outcomes=[None] * len(layout.table), tasks=[], keys={}, cached=0)
    for index, row in enumerate(layout.table.to_dict("records")):
        if bool(row["exclude"]):
            plan.outcomes[index] = (dict(_EXCLUDED_ROW), pd.DataFrame())
            continue
        options = layout.options_for(row)
        measure = _measure(row)
        key_options = options if measure == "whole" else {**options, "measure": measure}
        key = recording_key(row["path"], options=key_options, config=config)
        save_dir = None if details is None else child_folder(details, str(row["recording_id"]))
        found = cache.load(key)
        if found is not None and (save_dir is None or save_dir.is_dir()):
            plan.outcomes[index] = found
            plan.cached += 1
            continue
        plan.keys[index] = key
        plan.tasks.append(
            AnalysisTask(
                index=index,
                recording_id=str(row["recording_id"]),
                path=str(row["path"]),
                options=options,
                config=config,
                measure=measure,
                save_dir=None if save_dir is None else str(save_dir),
                figures=figures,
            )
        )
    return plan


def _measure(row) -> str:
    """The layout row's ``measure`` (validated by the layout; absent: ``whole``)."""
    return row.get("measure") or "whole"


def _outcome(future) -> tuple[dict, pd.DataFrame]:
    """A finished Dask future's (row, beats); a failure outside the analysis: an error row."""
    try:
        return future.result()
    except Exception as exc:  # a task the cluster could not run
        return error_row(exc), pd.DataFrame()


def _died(exc: BaseException) -> tuple[dict, pd.DataFrame]:
    """The outcome of a recording whose worker process died while analysing it."""
    row = error_row(exc)
    row["error"] = f"the worker process died while analysing this recording ({_BROKEN_POOL_HINT})"
    return row, pd.DataFrame()


def _new_pool(processes: int, threads: int) -> ProcessPoolExecutor:
    return ProcessPoolExecutor(
        processes,
        mp_context=multiprocessing.get_context("spawn"),
        initializer=init_worker,
        initargs=(threads,),
    )


def _in_processes(
    function: Callable,
    items: Sequence,
    *,
    processes: int,
    threads: int,
    on_death: Callable[[BaseException], object] = _died,
) -> Iterator[tuple[object, object]]:
    """``(item, function(item))`` for each item, from a pool of spawned processes.

    At most `processes` items are in flight at a time, so when a worker process dies (out
    of memory, a crash in a library) the suspects are known: the pool is replaced, each
    suspect is run again alone in a one-process pool, and only the item that kills its
    process gets ``on_death(exc)``; every other item still gets its result.

    The pool's processes start during the submissions, inside :func:`pinned_environment`,
    so numpy's and OpenMP's thread pools are sized ``threads`` when they load; the
    initialiser pins OpenCV's. Leaving early (an error or an interrupt in the caller)
    cancels what has not started.
    """
    pending = list(reversed(items))  # pop() takes them in order
    while pending:
        suspects = yield from _run_pool(function, pending, processes=processes, threads=threads)
        for item in suspects:  # each alone: a second death is its own
            alone = yield from _run_pool(function, [item], processes=1, threads=threads)
            if alone:
                yield item, on_death(BrokenProcessPool("worker process died"))


def _run_pool(function, pending: list, *, processes: int, threads: int):
    """Run items from `pending` (popped) until it is empty or the pool breaks.

    Yields ``(item, result)``; returns the items in flight when the pool broke.
    """
    pool, finished = _new_pool(processes, threads), False
    running: dict[Future, object] = {}
    try:
        with pinned_environment(threads):  # a spawn pool starts its processes on submit
            while pending and len(running) < processes:
                item = pending.pop()
                running[pool.submit(function, item)] = item
        while running:
            done = next(as_completed(running))
            item = running.pop(done)
            try:
                result = done.result()
            except BrokenProcessPool:
                lost = [item, *running.values()]
                running.clear()
                finished = True
                return lost
            yield item, result
            if pending:
                with pinned_environment(threads):
                    next_item = pending.pop()
                    try:
                        running[pool.submit(function, next_item)] = next_item
                    except BrokenProcessPool:  # a worker died before its future said so
                        pending.append(next_item)  # never ran: next in line again
                        lost = list(running.values())
                        running.clear()
                        finished = True
                        return lost
        finished = True
        return []
    finally:
        pool.shutdown(wait=finished, cancel_futures=not finished)


def _run_local(tasks: list[AnalysisTask], *, processes: int, threads: int) -> Iterator:
    """(task, (row, beats)) of each task: in this process for one process, else in a pool."""
    tasks = [replace(task, threads=threads) for task in tasks]
    if processes <= 1:
        for task in tasks:
            yield task, analyze_task(task)
        return
    yield from _in_processes(analyze_task, tasks, processes=processes, threads=threads)


def _import_distributed():
    """The dask.distributed module, or an InputError saying how to install it."""
    try:
        import distributed
    except ImportError:
        raise InputError(
            "scheduler=ADDRESS needs dask.distributed, which is not installed; "
            "pip install beatlab[dask]"
        ) from None
    return distributed


def _dask_client(scheduler):
    """(client, whether we opened it) for a scheduler address or an existing client."""
    distributed = _import_distributed()
    if isinstance(scheduler, distributed.Client):
        return scheduler, False
    if not isinstance(scheduler, str):
        raise InputError(
            "the Dask scheduler must be an address such as tcp://host:8786 or a "
            f"distributed.Client, got {type(scheduler).__name__}"
        )
    try:
        return distributed.Client(scheduler), True
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(
            f"cannot connect to the Dask scheduler at {scheduler} ({exc}); check the "
            "address (e.g. tcp://host:8786) and that the scheduler is running"
        ) from None


def _run_dask(tasks: list[AnalysisTask], *, scheduler) -> Iterator:
    """(task, (row, beats)) of each task, run by the workers of a Dask cluster.

    Workers size their threads by their own ``OMP_NUM_THREADS`` (Dask's nannies set it to 1
    by default) and must see the recordings at the same paths.
    """
    distributed = _import_distributed()
    client, opened = _dask_client(scheduler)
    futures, finished = [], False
    try:
        futures = client.map(analyze_task, tasks, pure=False)
        owner = {future.key: task for future, task in zip(futures, tasks, strict=True)}
        for future in distributed.as_completed(futures):
            yield owner[future.key], _outcome(future)
        finished = True
    finally:
        if futures and not finished:
            client.cancel(futures)
        if opened:
            client.close()


def _execute(tasks, *, workers: int, threads: int | None, scheduler) -> tuple[Iterator, dict]:
    """The results iterator of the chosen executor and a description of it for batch.json."""
    if not tasks:
        return iter(()), {"executor": "none"}
    if scheduler is not None:
        _import_distributed()  # fail before any work when it is missing
        run = _run_dask(tasks, scheduler=scheduler)
        return run, {"executor": "dask", "scheduler": str(scheduler)}
    processes = min(workers, len(tasks))
    threads = threads or max(1, available_cores() // processes)
    run = _run_local(tasks, processes=processes, threads=threads)
    executor = "in-process" if processes == 1 else "process-pool"
    return run, {"executor": executor, "processes": processes, "threads": threads}


def analyze_batch(
    layout: Layout | str | os.PathLike,
    *,
    out_dir: str | os.PathLike,
    config=None,
    workers: int | None = None,
    threads: int | None = None,
    scheduler=None,
    progress: bool = True,
    metrics: Sequence[str] | None = None,
    details: bool = True,
    figures: bool = True,
    report: bool = True,
) -> BatchResult:
    """Analyse every recording of a plate layout and compare the conditions.

    Parameters
    ----------
    layout : Layout or path-like
        A layout (:func:`beatlab.batch.read_layout`) or the path of its CSV.
    out_dir : path-like
        Folder of the tables (created if needed); the cache lives in ``out_dir/cache``.
    config : Settings, dict, path-like or None
        Analysis settings for every recording, as for :func:`beatlab.analyze`.
    workers : int, optional
        Recordings analysed at once on this machine (default: every core). With 1, they are
        analysed one after the other in this process. Ignored with `scheduler`.
    threads : int, optional
        Threads of each recording's frame-level work (the ``workers`` of
        :func:`beatlab.analyze`; default: ``cores // workers``, at least 1). Ignored with
        `scheduler`: there each Dask worker uses its own ``OMP_NUM_THREADS`` (1 by default).
    scheduler : str or distributed.Client, optional
        A Dask scheduler address (``tcp://host:8786``) or client: the recordings are
        analysed by its workers, which must see the files at the same paths.
    progress : bool
        Show a progress bar over recordings on stderr.
    metrics : sequence of str, optional
        Numeric columns of ``Analysis.to_row()`` to normalise and compare (default:
        :data:`beatlab.batch.STANDARD_METRICS`).
    details : bool
        Write each ok recording's analysis folder (the files of ``beatlab analyze --out``)
        into ``out_dir/recordings/<recording_id>``.
    figures : bool
        Draw the batch figures into ``out_dir/figures`` (each with the CSV of what it plots)
        and each recording's figures into its folder.
    report : bool
        Write ``out_dir/report.html``, one self-contained file.

    Returns
    -------
    BatchResult
        The tables, also written into `out_dir` (see Notes).

    Raises
    ------
    InputError
        An invalid layout (every problem listed), option or scheduler.
    ConfigError
        An invalid configuration.

    Notes
    -----
    A failed recording does not stop the batch: its row gets ``status="error"`` and a
    one-line ``error``. Excluded rows are not analysed (``status="excluded"``). The local
    pool starts fresh processes (``spawn``): a script that calls this function with
    ``workers > 1`` must do so under ``if __name__ == "__main__":``.

    Each finished recording is cached at once in ``out_dir/cache`` under the SHA-256 of its
    file (resolved path, size, modification time), its layout overrides, the full
    configuration and the beatlab version, so a re-run, or the run after an interrupted
    one, analyses only what is missing or changed; failures are not cached.

    Files (each written atomically; Parquet beside each CSV when pyarrow is installed):
    ``recordings.csv``, ``beats.csv``, ``wells.csv``, ``groups.csv``, ``dose_response.csv``,
    ``incidence.csv`` and ``z_prime.csv`` when the layout supports them (see
    :func:`beatlab.batch.batch_statistics`), and ``batch.json`` (version, configuration,
    metrics, counts, how the work ran, tables written and skipped with the reason, and the
    research-use caution).

    Examples
    --------
    >>> result = analyze_batch("plate1.csv", out_dir="plate1_out")  # doctest: +SKIP
    >>> result.groups[["metric", "group", "percent_change", "p_adj"]]  # doctest: +SKIP
    """
    layout = _as_layout(layout)
    settings = load_settings(config).to_dict()
    metrics, threads = _check_metrics(metrics), _check_count(threads, "threads")
    workers = _check_count(workers, "workers") or available_cores()
    out = Path(out_dir)
    cache = ResultCache(out / "cache")
    _save_layout(cache, layout)
    details_dir = out / "recordings" if details else None
    plan = _plan(layout, cache, settings, details=details_dir, figures=figures)
    results, run = _execute(plan.tasks, workers=workers, threads=threads, scheduler=scheduler)
    run.update(recordings=len(layout.table), analysed=len(plan.tasks), cached=plan.cached)
    info = {
        "beatlab_version": __version__,
        "state": "running",
        "layout": None if layout.path is None else os.path.abspath(layout.path),
        "metrics": metrics,
        "config": settings,
        "run": run,
        "caution": CAUTION,
    }
    write_json(out / "batch.json", info)
    started = time.perf_counter()
    try:
        _collect(plan, results, cache, progress=progress)
    except KeyboardInterrupt:  # Ctrl-C, or SIGTERM turned into it by the command line
        info.update(state="interrupted", finished=sum(o is not None for o in plan.outcomes))
        write_json(out / "batch.json", info)  # the finished recordings are in the cache
        raise
    run["seconds"] = round(time.perf_counter() - started, 3)
    recordings = recordings_table(layout.table, [row for row, _ in plan.outcomes])
    beats = beats_table(layout.table, plan.outcomes)
    counts = {"analysed": len(plan.tasks), "cached": plan.cached}
    result = _finish(out, recordings, beats, metrics=metrics, info=info, counts=counts)
    illustrate(out, metrics=metrics, figures=figures, report=report)
    return result


def illustrate(
    out_dir: str | os.PathLike,
    *,
    metrics: Sequence[str] | None = None,
    figures: bool = True,
    report: bool = True,
) -> dict[str, Path]:
    """Draw the batch figures and write the report of a batch folder from its tables.

    A figure or report that cannot be made is reported as a warning: the tables, already
    written, stand.

    Parameters
    ----------
    out_dir : path-like
        A batch folder (``beatlab batch --out``).
    metrics : sequence of str, optional
        The metrics to draw (default: those the batch compared).
    figures, report : bool
        What to make.

    Returns
    -------
    dict
        Name -> path of each file made.
    """
    import warnings

    out = Path(out_dir)
    made: dict[str, Path] = {}
    if figures:
        try:
            from beatlab.plots.batch import save_batch_figures

            made.update(save_batch_figures(out, metrics=metrics))
        except Exception as exc:  # the tables stand without their figures
            warnings.warn(
                BeatlabWarning(f"batch figures not drawn: {describe_error(exc)}"), stacklevel=2
            )
    if report:
        try:
            from beatlab.report import build_batch_report

            made["report"] = build_batch_report(out)
        except Exception as exc:  # the tables stand without their report
            warnings.warn(
                BeatlabWarning(f"report.html not written: {describe_error(exc)}"), stacklevel=2
            )
    return made


def _collect(plan: _Plan, results: Iterable, cache: ResultCache, *, progress: bool) -> None:
    """Store each result as it arrives (ok ones in the cache) and advance the progress bar."""
    total = sum(o is None for o in plan.outcomes)
    if progress:
        print(
            f"beatlab: {total} recordings to analyse, {plan.cached} from the cache",
            file=sys.stderr,
            flush=True,
        )
    with progress_bar(
        total=total, desc="analysing recordings", unit="recording", enabled=progress
    ) as bar:
        for task, (row, beats) in results:
            if row["status"] == "ok":
                inputs = {"recording_id": task.recording_id, "path": task.path}
                row, beats = cache.store(
                    plan.keys[task.index], row, beats, inputs={**inputs, **task.options}
                )
            else:
                logger.info("%s failed: %s", task.recording_id, row["error"])
            plan.outcomes[task.index] = (row, beats)
            bar.update(1)


def _save_layout(cache: ResultCache, layout: Layout) -> None:
    """The validated layout, kept so that compare can rebuild the tables from the cache."""
    write_json(
        cache.folder / "layout.json",
        {
            "path": None if layout.path is None else os.path.abspath(layout.path),
            "base_dir": str(layout.base_dir),
            "table": encode_frame(layout.table),
        },
    )


def _load_layout(cache: ResultCache) -> Layout:
    path = cache.folder / "layout.json"
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        table = decode_frame(data["table"])
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise InputError(
            f"cannot rebuild the batch from its cache: {path} is missing or unreadable "
            f"({exc}); run beatlab batch again"
        ) from None
    layout_path = None if data["path"] is None else Path(data["path"])
    return Layout(table=table, base_dir=Path(data["base_dir"]), path=layout_path)


def _finish(out: Path, recordings, beats, *, metrics, info, counts, write_rows=True):
    """Write the tables and batch.json; return the :class:`BatchResult`."""
    if write_rows:
        write_table(recordings, out, "recordings")
        write_table(beats, out, "beats")
    tables, skipped = batch_statistics(recordings, metrics=metrics)
    for name in STATISTICS_TABLES:
        if name in tables:
            write_table(tables[name], out, name)
        else:
            remove_table(out, name)  # a stale table of an earlier run would mislead
    status = recordings["status"].value_counts()
    counts = {k: int(status.get(k, 0)) for k in ("ok", "error", "excluded")} | counts
    written = ["recordings", "beats", *tables]
    info.update(
        state="finished",
        metrics=list(metrics),
        counts={k: counts[k] for k in ("ok", "error", "excluded")},
        tables=[f"{name}.csv" for name in written],
        skipped=skipped,
    )
    info.pop("caution", None)
    info["caution"] = CAUTION  # last, where a reader of the file ends
    write_json(out / "batch.json", info)
    empty = pd.DataFrame()
    return BatchResult(
        recordings=recordings,
        beats=beats,
        **{name: tables.get(name, empty) for name in STATISTICS_TABLES},
        counts=counts,
        out_dir=out,
    )


def _read_info(out: Path) -> dict:
    path = out / "batch.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(
            f"{out} is not a batch folder ({path.name}: {exc}); pass the --out folder of "
            "beatlab batch"
        ) from None


def compare_batch(
    out_dir: str | os.PathLike,
    *,
    config=None,
    metrics: Sequence[str] | None = None,
    figures: bool = True,
    report: bool = True,
) -> BatchResult:
    """Recompute the statistics tables of a batch folder without analysing anything.

    Parameters
    ----------
    out_dir : path-like
        The folder of :func:`analyze_batch`.
    config : Settings, dict, path-like or None
        None: use ``recordings.csv`` as it is (edits such as a newly excluded row count),
        or, when it is missing (an interrupted batch), rebuild it from the cache with the
        batch's configuration. Given: rebuild ``recordings.csv`` and ``beats.csv`` from the
        cached results of this configuration (the layout of the last batch run).
    metrics : sequence of str, optional
        Metrics to normalise and compare (default: those of the batch).
    figures, report : bool
        Redraw the batch figures and rewrite ``report.html`` from the new tables.

    Returns
    -------
    BatchResult
        ``counts["analysed"]`` is 0; ``counts["cached"]`` the recordings taken from the
        cache. Recordings without a cached result get ``status="error"``.

    Raises
    ------
    InputError
        `out_dir` is not a batch folder, or a table in it cannot be read.
    """
    out = Path(out_dir)
    info = _read_info(out)
    metrics = _check_metrics(metrics if metrics is not None else info.get("metrics"))
    if config is None and (out / "recordings.csv").exists():
        recordings = read_table(out / "recordings.csv", ROW_DTYPES)
        beats = read_table(out / "beats.csv", BEAT_DTYPES)
        counts = {"analysed": 0, "cached": 0}
        result = _finish(
            out, recordings, beats, metrics=metrics, info=info, counts=counts, write_rows=False
        )
        illustrate(out, metrics=metrics, figures=figures, report=report)
        return result
    settings = info["config"] if config is None else load_settings(config).to_dict()
    cache = ResultCache(out / "cache")
    layout = _load_layout(cache)
    plan = _plan(layout, cache, settings, details=None, figures=False)
    for task in plan.tasks:
        plan.outcomes[task.index] = (dict(_NOT_ANALYSED_ROW), pd.DataFrame())
    recordings = recordings_table(layout.table, [row for row, _ in plan.outcomes])
    beats = beats_table(layout.table, plan.outcomes)
    info["config"] = settings
    counts = {"analysed": 0, "cached": plan.cached}
    result = _finish(out, recordings, beats, metrics=metrics, info=info, counts=counts)
    illustrate(out, metrics=metrics, figures=figures, report=report)
    return result
