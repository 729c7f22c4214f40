"""Forked worker processes on Linux: map a function over items, warnings passed back.

Low-level (no beatlab imports), so that any stage or signal module may spread work over the
cores: children inherit the parent's state at the fork, receive small items and return
picklable results.
"""

from __future__ import annotations

import mmap
import multiprocessing as mp
import sys
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager

import numpy as np

__all__ = [
    "ForkPool",
    "can_fork",
    "fork_imap",
    "fork_map",
    "shared_array",
    "single_threaded_libraries",
]


def can_fork() -> bool:
    """Whether worker processes may be forked here: Linux only (on macOS, forking a process
    that has used system frameworks is unsafe; elsewhere there is no fork)."""
    return sys.platform.startswith("linux") and "fork" in mp.get_all_start_methods()


@contextmanager
def single_threaded_libraries():
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


def _keeping_warnings(job: tuple) -> tuple:
    """Run ``function(item)`` in a forked child; return its result and its warnings."""
    function, item = job
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = function(item)
    return result, [(w.category, str(w.message)) for w in caught]


def _warned_again(results: Iterator[tuple]) -> Iterator:
    """The results of :func:`_keeping_warnings` jobs, each child's warnings raised again here
    as its result arrives."""
    for result, raised in results:
        for category, message in raised:
            warnings.warn(message, category, stacklevel=3)
        yield result


def fork_imap(
    function: Callable, items: Sequence, *, workers: int, meanwhile: Callable | None = None
) -> Iterator:
    """``function(item)`` for each item, in order, from up to `workers` forked processes.

    `function` must be a module-level function (children find it by name) and its results
    picklable; children inherit everything else, so `function` may read state the parent set
    before calling. Warnings a child raises are raised again here (once the item is done),
    so that callers recording warnings see them. One process, or no fork: in this process.
    `meanwhile()`, if given, runs here once the children have their work (before the first
    result; in one process, before the first item): work this process would otherwise idle
    through, which the children must not inherit.
    """
    processes = min(int(workers), len(items))
    if processes <= 1 or not can_fork():
        if meanwhile is not None:
            meanwhile()
        for item in items:
            yield function(item)
        return
    jobs = [(function, item) for item in items]
    with single_threaded_libraries(), mp.get_context("fork").Pool(processes) as pool:
        results = pool.imap(_keeping_warnings, jobs, chunksize=1)
        if meanwhile is not None:
            meanwhile()
        yield from _warned_again(results)


def fork_map(function: Callable, items: Sequence, *, workers: int) -> list:
    """``[function(item) for item in items]``, in up to `workers` forked processes on Linux
    (:func:`fork_imap`)."""
    return list(fork_imap(function, items, workers=workers))


def shared_array(shape: tuple[int, ...], dtype) -> np.ndarray:
    """A zeroed array in anonymous shared memory: what processes forked after it write into
    it, this process reads (instead of results pickled back through pipes).

    The array keeps its memory map alive; it lives as long as the array (and any view).
    """
    dtype = np.dtype(dtype)
    count = int(np.prod(shape, dtype=np.int64))
    buffer = mmap.mmap(-1, max(count * dtype.itemsize, 1))  # MAP_SHARED | MAP_ANONYMOUS
    return np.frombuffer(buffer, dtype=dtype, count=count).reshape(shape)


class ForkPool:
    """Forked worker processes kept for several maps (Linux), or none: this process.

    The children are forked when the pool is entered and inherit the parent's state *then*;
    every later map sends them only its items, so a loop of maps over the same large data
    (an iterative estimate) forks once instead of once per map. Use with ``with``.

    Parameters
    ----------
    workers : int
        Processes; 1 (or a platform that cannot fork) maps in this process.
    """

    def __init__(self, workers: int):
        self.workers = max(1, int(workers)) if can_fork() else 1
        self._pool = None
        self._limits = None

    def __enter__(self) -> ForkPool:
        if self.workers > 1:
            self._limits = single_threaded_libraries()
            self._limits.__enter__()
            try:
                self._pool = mp.get_context("fork").Pool(self.workers)
            except BaseException:
                self._limits.__exit__(None, None, None)
                raise
        return self

    def __exit__(self, *exc) -> None:
        if self._pool is not None:
            self._pool.terminate()
            self._pool.join()
            self._pool = None
        if self._limits is not None:
            self._limits.__exit__(*exc)
            self._limits = None

    def map(self, function: Callable, items: Sequence) -> list:
        """``[function(item) for item in items]``: `function` module-level, its items and
        results picklable; warnings raised in a child are raised again here."""
        if self._pool is None:
            return [function(item) for item in items]
        jobs = [(function, item) for item in items]
        return list(_warned_again(self._pool.imap(_keeping_warnings, jobs, chunksize=1)))
