"""Mapping per-frame work over a recording: in this process, in threads, or in forked processes.

Much of the per-frame pass is Python and numpy glue between library calls, which holds the
GIL: threads overlap poorly (measured before the warp was compiled: one thread 6.0 s, two
5.4 s for the same 409 frames). Forked processes do: each inherits the work object
(templates, trackers, patterns) at the fork, receives frame indices (and reads those frames
itself where the source allows it) or frames, and returns a few numbers per frame. A new pool
is forked for every round, so each round's workers see the state the previous rounds left
(the drift, the patterns).
"""

from __future__ import annotations

import multiprocessing as mp
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor

import numpy as np

from beatlab._fork import can_fork, fork_imap, fork_map, single_threaded_libraries

__all__ = ["PARALLEL_MODES", "FrameMapper", "can_fork", "fork_imap", "fork_map"]

#: How frames are spread over workers.
PARALLEL_MODES = ("auto", "processes", "threads")

# The work object a forked worker inherits (set just before a pool forks, cleared after),
# and the reader of frames by index when the workers read their own frames.
_ACTIVE = None
_READER = None


def _call(method: str, indices: np.ndarray, frames: np.ndarray | None) -> list:
    if frames is None:  # the worker reads its frames itself
        frames = _READER(indices)
    fn = getattr(_ACTIVE, method)
    return [fn(int(i), f) for i, f in zip(indices, frames, strict=True)]


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
                single_threaded_libraries(),
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
