"""A process that loads the figure libraries while an analysis runs, then draws its figures.

Drawing the five figures of a recording starts with importing matplotlib, pandas and the
figure modules in every process that draws (~0.6 s each on the benchmark machine). The
``beatlab analyze`` command forks a :class:`FigureProcess` before it imports the analysis:
the imports then run on the core that is idle while the main process imports its own, and
the figure workers forked from it later start with everything loaded. The files are the same
as those of :func:`beatlab.plots.save_recording_figures` and
:func:`beatlab.report.build_recording_report` called directly: the process calls exactly
those.
"""

from __future__ import annotations

import os
import signal
import sys
import traceback
import warnings
from multiprocessing.connection import Connection, Pipe
from pathlib import Path

__all__ = ["FigureProcess"]

#: Nice value added to the figure process (and so to its drawing workers). Its imports run
#: while the analysis imports, reads and measures on both cores; at this priority they take
#: only cycles the analysis leaves idle (the serial steps between its parallel ones), and
#: the drawing at the end, when the analysis only waits for it, runs at full speed anyway.
#: Measured on the 1,000-frame benchmark recording (2 cores, alternating runs, medians of
#: six): 6.16 s at normal priority, 5.97 s niced (on a tree that also imported the analysis
#: lazily, a change since dropped: it alone made no difference, 5.93 against 5.92 s).
FIGURE_NICE = 19


def _load() -> None:
    """Import what drawing and the report need (the work done ahead of time)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.backends.backend_agg
    import matplotlib.backends.backend_svg
    import matplotlib.pyplot
    import pandas.io.formats.csvs  # noqa: F401  (the plotted tables' writer)
    from PIL import PngImagePlugin  # noqa: F401

    import beatlab.plots.recording
    import beatlab.report.recording  # noqa: F401
    from beatlab.plots.style import apply_style

    try:  # what contour lines are drawn with (the maps' mask outline), when installed
        import contourpy  # noqa: F401
    except ImportError:
        pass
    apply_style(matplotlib)
    # matplotlib builds its mathtext grammar on the first parse in a process (~0.06 s): once
    # here, not in every drawing worker (the Poincare plot's IBI_n labels; measured in
    # forked workers: 0.47 s for that figure without, 0.40 s with)
    from matplotlib.mathtext import MathTextParser

    MathTextParser("agg").parse("$x_n$")


def _draw(
    analysis, out: Path, formats: tuple[str, ...], workers: int, report: bool, shown_as=None
) -> dict:
    from beatlab._progress import timed
    from beatlab.plots.recording import save_recording_figures
    from beatlab.report.recording import build_recording_report

    with timed("figures"):
        paths = save_recording_figures(
            analysis, out, formats=formats, workers=workers, for_report=report
        )
    if report:
        with timed("report"):
            paths["report"] = build_recording_report(out, shown_as=shown_as)
    return paths


def _yield_the_cores() -> None:
    """Lower this process's priority by :data:`FIGURE_NICE` (where the platform allows)."""
    try:
        os.nice(FIGURE_NICE)
    except (AttributeError, OSError):  # no nice here: the figures are drawn all the same
        pass


def _serve(jobs: Connection, results: Connection) -> None:
    """The forked process: load, then draw the one job it is sent (EOF: nothing to do)."""
    # Ctrl-C reaches the whole process group: the main process handles it and closes the
    # pipe, which ends this one; a second traceback from here would only confuse
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _yield_the_cores()
    try:
        _load()
    except Exception:  # reported with the job instead (drawing will fail too)
        pass
    try:
        job = jobs.recv()
    except (EOFError, OSError):
        return
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            reply = ("ok", _draw(*job))
        except BaseException as exc:  # every failure goes back to the caller
            reply = ("error", exc, traceback.format_exc())
    raised = [(w.category, str(w.message)) for w in caught]
    try:
        results.send((*reply, raised))
    except (BrokenPipeError, OSError):  # the caller is gone
        pass
    except Exception:  # a result or an error that cannot be sent: its text instead
        results.send(("error", RuntimeError(reply[-1] if reply[0] == "error" else ""), "", raised))


class FigureProcess:
    """A forked process, started early, that draws one analysis's figures and its report.

    Parameters
    ----------
    start : bool
        Fork now (Linux only); otherwise, or where the platform cannot fork, :meth:`draw`
        draws in this process.

    Notes
    -----
    Start it while the calling process is small and has no threads of its own (before the
    analysis imports and forks its own workers; numpy and pandas may be imported, which saves
    the process importing them again), use it once, and :meth:`close` it (or use it as a
    context manager): an unused process waits for its job until closed.
    """

    def __init__(self, *, start: bool = True):
        from beatlab._fork import can_fork

        self._pid: int | None = None
        self._jobs: Connection | None = None
        self._results: Connection | None = None
        self._replied = False
        #: How the process ended, once closed: its exit code, or minus the signal that
        #: stopped it (as :attr:`subprocess.Popen.returncode`); None before.
        self.returncode: int | None = None
        if not (start and can_fork()):
            return
        job_read, job_write = Pipe(duplex=False)
        result_read, result_write = Pipe(duplex=False)
        sys.stdout.flush()
        sys.stderr.flush()
        pid = os.fork()
        if pid == 0:  # the child: serve, then leave without the parent's exit handlers
            code = 0
            try:
                job_write.close()
                result_read.close()
                _serve(job_read, result_write)
            except BaseException:
                code = 1
            finally:
                os._exit(code)
        job_read.close()
        result_write.close()
        self._pid, self._jobs, self._results = pid, job_write, result_read

    @property
    def running(self) -> bool:
        """Whether a forked process is waiting for its job."""
        return self._pid is not None

    def draw(
        self,
        analysis,
        out_dir: str | os.PathLike,
        *,
        formats: tuple[str, ...] = ("png", "svg"),
        workers: int = 1,
        report: bool = True,
        shown_as: str | os.PathLike | None = None,
    ) -> dict[str, Path]:
        """Write the figures of ``analysis`` (and ``report.html``) into ``out_dir``.

        Parameters
        ----------
        analysis : beatlab.results.Analysis
            The analysis; every other file of the folder must be written already (the
            report reads them).
        out_dir : path-like
            The folder.
        formats : tuple of str
            Image formats (:func:`beatlab.plots.save_recording_figures`).
        workers : int
            Figures drawn at once, in processes forked from the figure process.
        report : bool
            Also write ``report.html`` (:func:`beatlab.report.build_recording_report`).
        shown_as : path-like, optional
            The folder as the report names it (default: ``out_dir``).

        Returns
        -------
        dict
            File role -> path, as :func:`beatlab.plots.save_recording_figures` gives, plus
            ``"report"``.

        Raises
        ------
        Exception
            Whatever drawing raised, raised again here.
        """
        shown = None if shown_as is None else Path(shown_as)
        job = (analysis, Path(out_dir), tuple(formats), int(workers), bool(report), shown)
        if not self.running:
            return _draw(*job)
        try:
            self._jobs.send(job)
            reply = self._results.recv()
            self._replied = True  # the process is leaving by itself
        except (EOFError, OSError) as exc:
            raise RuntimeError(
                "the figure process ended before it finished; rerun, or pass --no-figures"
            ) from exc
        finally:
            self.close()
        for category, message in reply[-1]:
            warnings.warn(message, category, stacklevel=2)
        if reply[0] == "error":
            error, where = reply[1], reply[2]
            if where:
                error.add_note(f"raised in the figure process:\n{where}")
            raise error
        return reply[1]

    def close(self) -> None:
        """End the process and reap it; one that has not replied (still loading, waiting for
        its job, or drawing when the caller was interrupted) is stopped with SIGTERM."""
        if self._pid is None:
            return
        for end in (self._jobs, self._results):
            end.close()
        pid, self._pid = self._pid, None
        if not self._replied:  # still loading, waiting or drawing: nothing left to wait for
            try:
                os.kill(pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
        _, status = os.waitpid(pid, 0)
        self.returncode = os.waitstatus_to_exitcode(status)

    def __enter__(self) -> FigureProcess:
        return self

    def __exit__(self, *exc) -> None:
        self.close()
