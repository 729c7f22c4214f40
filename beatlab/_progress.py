"""Progress of long loops: a tqdm bar on a terminal, plain lines in a log.

A tqdm bar redraws itself with carriage returns, which a log file keeps as one endless line,
so when the stream is not a terminal (a batch job, ``2> run.log``) the progress is written as
plain lines instead, ``beatlab: measuring frames 40 % (160 of 400 frames)``: none during the
first seconds (quick work stays silent), then one per 10 % and, on slow work, one at least
every ``every_s`` seconds.
"""

from __future__ import annotations

import contextlib
import logging
import math
import sys
import time
from collections.abc import Iterator

__all__ = ["LineProgress", "progress_bar", "timed"]


@contextlib.contextmanager
def timed(what: str, *, logger: str = "beatlab") -> Iterator[None]:
    """Log the wall time of a step at debug level (``beatlab ... --debug`` shows it).

    ``with timed("stage frames"): ...`` logs ``stage frames: 12.31 s`` when the block ends,
    also when it raises.
    """
    start, cpu = time.perf_counter(), _cpu_s()
    try:
        yield
    finally:
        logging.getLogger(logger).debug(
            "%s: %.2f s (CPU %.2f s)", what, time.perf_counter() - start, _cpu_s() - cpu
        )


def _cpu_s() -> float:
    """CPU seconds of this process and of its children that have ended (0 where unknown)."""
    try:
        import resource
    except ImportError:  # not on Windows
        return time.process_time()
    own = resource.getrusage(resource.RUSAGE_SELF)
    ended = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + ended.ru_utime + ended.ru_stime


class LineProgress:
    """Progress written as plain lines, for a stream that is not a terminal.

    Parameters
    ----------
    total : int
        Units of work (frames).
    desc : str
        What is being done, in words (``measuring frames``).
    unit : str
        Name of one unit of work.
    stream : file-like
        Where the lines go.
    delay_s : float
        No line before this much time has passed (short work prints nothing).
    every_s : float
        A line at least this often while the work advances, even between 10 % steps.
    step_percent : int
        A line each time the work advances by this many percent.
    clock : callable
        Returns seconds (monotonic); replaceable in tests.
    """

    def __init__(
        self,
        total: int,
        desc: str,
        *,
        unit: str = "frame",
        stream,
        delay_s: float = 2.0,
        every_s: float = 30.0,
        step_percent: int = 10,
        clock=time.monotonic,
    ):
        self.total, self.desc, self.unit, self.stream = max(int(total), 0), desc, unit, stream
        self.delay_s, self.every_s, self.step_percent = delay_s, every_s, step_percent
        self.clock = clock
        self.n = 0
        self._start = self._last = clock()
        self._shown, self._n_shown = -1, 0  # percent and count of the last line; -1: none

    def update(self, n: int = 1) -> None:
        """Advance by ``n`` units; write a line when one is due."""
        self.n += int(n)
        now = self.clock()
        if now - self._start < self.delay_s:
            return
        percent = self._percent()
        next_step = (self._shown // self.step_percent + 1) * self.step_percent
        if percent >= next_step or (now - self._last >= self.every_s and self.n > self._n_shown):
            self._write(percent, now)

    def close(self) -> None:
        """Write the final line, if any line was written and the work is done."""
        if self._shown >= 0 and self._shown < 100 and self.n >= self.total:
            self._write(100, self.clock())

    def _percent(self) -> int:
        return 100 if self.total == 0 else min(100, math.floor(100 * self.n / self.total))

    def _write(self, percent: int, now: float) -> None:
        done = f"{min(self.n, self.total)} of {self.total} {self.unit}s"
        print(f"beatlab: {self.desc} {percent} % ({done})", file=self.stream, flush=True)
        self._shown, self._n_shown, self._last = percent, self.n, now

    def __enter__(self) -> LineProgress:
        return self

    def __exit__(self, *exc) -> None:
        if exc[0] is None:
            self.close()


class _Silent:
    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass

    def __enter__(self) -> _Silent:
        return self

    def __exit__(self, *exc) -> None:
        pass


def _in_notebook() -> bool:
    """Whether tqdm would draw a notebook widget here; without a Jupyter kernel loaded it
    cannot, and ``tqdm.auto`` (which imports asyncio, ~20 ms) is not imported to find out."""
    if "ipykernel" not in sys.modules:
        return False
    from tqdm.auto import tqdm

    return any("notebook" in cls.__module__ for cls in tqdm.__mro__)


def progress_bar(*, total: int, desc: str, unit: str = "frame", enabled: bool = True, stream=None):
    """A progress reporter for ``total`` units of work: use as a context, call ``update(n)``.

    Parameters
    ----------
    total : int
        Units of work.
    desc : str
        What is being done (``measuring frames``).
    unit : str
        Name of one unit, for the bar.
    enabled : bool
        False: report nothing.
    stream : file-like, optional
        Where to report (default: ``sys.stderr`` at the time of the call).

    Returns
    -------
    tqdm or LineProgress or a silent reporter
        A tqdm bar on a terminal or in a notebook; :class:`LineProgress` otherwise.
    """
    if not enabled:
        return _Silent()
    stream = sys.stderr if stream is None else stream
    is_terminal = getattr(stream, "isatty", lambda: False)()
    if is_terminal or _in_notebook():
        from tqdm.auto import tqdm

        return tqdm(total=total, desc=desc, unit=unit, leave=False, file=stream)
    return LineProgress(total, desc, unit=unit, stream=stream)
