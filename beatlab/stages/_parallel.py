"""Mapping per-frame work over a recording: in this process, in threads, or in forked processes.

The per-frame pass spends most of its time in scipy.ndimage (the flow refinement's cubic-spline
warp), which holds the GIL: threads barely overlap there (measured: one thread 6.0 s, two
5.4 s for the same 409 frames). Forked processes do: each inherits the work object (templates,
trackers, patterns) at the fork, receives frames and returns a few numbers per frame. A new
pool is forked for every round, so each round's workers see the state the previous rounds
left (the drift, the patterns).
"""

from __future__ import annotations

import multiprocessing as mp
import sys
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from contextlib import contextmanager

import numpy as np

__all__ = ["PARALLEL_MODES", "FrameMapper", "can_fork", "fork_map"]

#: How frames are spread over workers.
PARALLEL_MODES = ("auto", "processes", "threads")

# The work object a forked worker inherits (set just before a pool forks, cleared after),
# and the reader of frames by index when the workers read their own frames.
_ACTIVE = None
_READER = None


def can_fork() -> bool:
    """Whether worker processes may be forked here: Linux only (on macOS, forking a process
    that has used system frameworks is unsafe; elsewhere there is no fork)."""
    return sys.platform.startswith("linux") and "fork" in mp.get_all_start_methods()


def _call(method: str, indices: np.ndarray, frames: np.ndarray | None) -> list:
    if frames is None:  # the worker reads its frames itself
        frames = _READER(indices)
    fn = getattr(_ACTIVE, method)
    return [fn(int(i), f) for i, f in zip(indices, frames, strict=True)]


@contextmanager
def _opencv_single_threaded():
    """OpenCV and BLAS run inline (no thread pools) here and in processes forked meanwhile.

    A forked child has none of the parent's OpenCV pool threads; any call that reconfigures
    or wakes that pool would wait for them forever (seen: ``cv2.setNumThreads`` in a child
    hung). With one thread set *before* the fork, children never touch the pool, and the
    workers fill the cores anyway.
    """
    import cv2
    from threadpoolctl import threadpool_limits

    before = cv2.getNumThreads()
    cv2.setNumThreads(1)
    try:
        # BLAS too: the workers fill the cores, and a BLAS pool in each would oversubscribe
        with threadpool_limits(limits=1):
            yield
    finally:
        cv2.setNumThreads(before)


def fork_map(function: Callable, items: Sequence, *, workers: int) -> list:
    """``[function(item) for item in items]``, in up to `workers` forked processes on Linux.

    `function` must be a module-level function (children find it by name) and its results
    picklable; children inherit everything else, so `function` may read state the parent set
    before calling. One process, or no fork: in this process.
    """
    processes = min(int(workers), len(items))
    if processes <= 1 or not can_fork():
        return [function(item) for item in items]
    with _opencv_single_threaded(), mp.get_context("fork").Pool(processes) as pool:
        return pool.map(function, items, chunksize=1)


class FrameMapper:
    """Run ``work.<method>(index, frame)`` over chunks of frames, results in frame order.

    Parameters
    ----------
    workers : int
        Parallel workers; 1 runs everything in this process.
    mode : str
        One of :data:`PARALLEL_MODES`: ``"processes"`` (forked; where the platform cannot
        fork, threads), ``"threads"``, or ``"auto"`` (processes where possible).
    """

    def __init__(self, workers: int, *, mode: str = "auto"):
        if mode not in PARALLEL_MODES:
            raise ValueError(f"mode must be one of {', '.join(PARALLEL_MODES)}, got {mode!r}")
        self.workers = max(1, int(workers))
        self.processes = mode in ("auto", "processes") and can_fork() and self.workers > 1

    def run(
        self,
        work,
        method: str,
        chunks: Iterable[tuple[np.ndarray, np.ndarray | None]],
        *,
        reader: Callable[[np.ndarray], np.ndarray] | None = None,
    ) -> Iterator[tuple[np.ndarray, list]]:
        """Yield ``(indices, results)`` per chunk of ``(indices, frames)``.

        With a ``reader`` (frame indices -> frames), chunks may carry ``None`` for their
        frames: forked workers then read their own share of the chunk (the parent only hands
        out indices, and no frame travels through a pipe); elsewhere the frames are read here.
        The reader must be safe to call in a forked child (a memory map, separate files).
        """
        if reader is not None and not self.processes:
            chunks = ((idx, reader(idx) if frames is None else frames) for idx, frames in chunks)
        if self.workers == 1:
            fn = getattr(work, method)
            for idx, frames in chunks:
                yield idx, [fn(int(i), f) for i, f in zip(idx, frames, strict=True)]
        elif not self.processes:
            fn = getattr(work, method)
            with ThreadPoolExecutor(max_workers=self.workers) as pool:
                for idx, frames in chunks:
                    yield idx, list(pool.map(fn, (int(i) for i in idx), frames))
        else:
            yield from self._forked(work, method, chunks, reader)

    def _forked(self, work, method, chunks, reader):
        global _ACTIVE, _READER
        _ACTIVE, _READER = work, reader
        try:
            context = mp.get_context("fork")
            with (
                _opencv_single_threaded(),
                ProcessPoolExecutor(max_workers=self.workers, mp_context=context) as pool,
            ):
                pending: deque = deque()
                for idx, frames in chunks:
                    parts = [
                        p for p in np.array_split(np.arange(len(idx)), self.workers) if p.size
                    ]
                    futures = [
                        pool.submit(_call, method, idx[p], None if frames is None else frames[p])
                        for p in parts
                    ]
                    pending.append((idx, futures))
                    # one chunk in flight while the next is read: reading overlaps the work
                    if len(pending) > 1:
                        yield self._collect(pending.popleft())
                while pending:
                    yield self._collect(pending.popleft())
        finally:
            _ACTIVE = _READER = None

    @staticmethod
    def _collect(item):
        idx, futures = item
        return idx, [r for fut in futures for r in fut.result()]
