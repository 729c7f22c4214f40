"""Per-frame work mapped in this process, in threads and in forked processes: same results."""

import numpy as np
import pytest

from beatlab.stages._parallel import FrameMapper, can_fork


class _Work:
    """Inherits its state at the fork: the offset is set before the round runs."""

    def __init__(self):
        self.offset = 0.0

    def total(self, i, frame):
        return i, float(frame.sum()) + self.offset


def _chunks(frames, size):
    for start in range(0, len(frames), size):
        idx = np.arange(start, min(start + size, len(frames)))
        yield idx, frames[idx]


@pytest.mark.parametrize("mode", ["auto", "processes", "threads"])
@pytest.mark.parametrize("workers", [1, 2, 3])
def test_every_mode_returns_every_frame_in_order(mode, workers):
    frames = np.random.default_rng(0).normal(size=(23, 4, 5))
    work = _Work()
    work.offset = 7.0
    mapper = FrameMapper(workers, mode=mode)
    assert mapper.processes == (mode != "threads" and workers > 1 and can_fork())
    seen = []
    for idx, results in mapper.run(work, "total", _chunks(frames, 5)):
        assert [r[0] for r in results] == idx.tolist()
        seen.extend(results)
    assert [i for i, _ in seen] == list(range(23))
    np.testing.assert_allclose([v for _, v in seen], frames.sum(axis=(1, 2)) + 7.0)


def test_unknown_mode_is_refused():
    with pytest.raises(ValueError, match="processes, threads"):
        FrameMapper(2, mode="gpu")


def test_forked_workers_do_not_hang_on_opencv():
    # OpenCV's thread pool is used here first; forked workers then run OpenCV inline
    import cv2

    image = np.random.default_rng(1).normal(size=(64, 64)).astype(np.float32)
    cv2.GaussianBlur(image, (9, 9), 2.0)

    class Blur:
        def blur(self, i, frame):
            return float(cv2.GaussianBlur(frame, (9, 9), 2.0).sum())

    frames = np.stack([image * k for k in range(6)])
    got = [v for _, r in FrameMapper(2, mode="processes").run(Blur(), "blur", _chunks(frames, 3))
           for v in r]  # fmt: skip
    expected = [float(cv2.GaussianBlur(f, (9, 9), 2.0).sum()) for f in frames]
    np.testing.assert_allclose(got, expected, rtol=1e-6)
    assert cv2.getNumThreads() >= 1


@pytest.mark.parametrize("mode", ["auto", "threads"])
@pytest.mark.parametrize("workers", [1, 2])
def test_workers_can_read_their_own_frames(mode, workers):
    """With a reader the chunks carry indices only; forked workers read their share."""
    frames = np.random.default_rng(2).normal(size=(17, 3, 4))
    reads = []

    def reader(idx):
        reads.append(idx.tolist())  # seen here only when this process reads
        return frames[idx]

    work = _Work()
    chunks = ((idx, None) for idx, _ in _chunks(frames, 5))
    mapper = FrameMapper(workers, mode=mode)
    got = [r for _, rs in mapper.run(work, "total", chunks, reader=reader) for r in rs]
    assert [i for i, _ in got] == list(range(17))
    np.testing.assert_allclose([v for _, v in got], frames.sum(axis=(1, 2)))
    forked = mode == "auto" and workers > 1 and can_fork()
    assert (reads == []) == forked  # forked workers read in their own processes


def _warn_and_square(x):
    if x == 2:
        import warnings

        from beatlab.errors import BeatlabWarning

        warnings.warn(f"item {x} is odd", BeatlabWarning, stacklevel=1)
    return x * x


@pytest.mark.parametrize("workers", [1, 2])
def test_fork_map_keeps_order_and_passes_warnings_back(workers):
    from beatlab._fork import fork_imap, fork_map
    from beatlab.errors import BeatlabWarning

    with pytest.warns(BeatlabWarning, match="item 2 is odd"):
        assert fork_map(_warn_and_square, [1, 2, 3, 4], workers=workers) == [1, 4, 9, 16]
    assert list(fork_imap(_warn_and_square, [3, 1], workers=workers)) == [9, 1]


_CALLS: list = []


def _note_pid(x):
    import os

    return os.getpid()


@pytest.mark.parametrize("workers", [1, 2])
def test_fork_imap_runs_meanwhile_once_here_before_the_first_result(workers):
    import os

    from beatlab._fork import fork_imap

    _CALLS.clear()
    results = fork_imap(_note_pid, [1, 2, 3], workers=workers, meanwhile=lambda: _CALLS.append(1))
    assert _CALLS == []  # lazy: nothing runs before the first result is asked for
    pids = list(results)
    assert _CALLS == [1]  # once, in this process (a child's list would not be this one)
    assert (set(pids) == {os.getpid()}) == (workers == 1)


_SHARED = {}


def _fill_row(item):
    import os

    row, value = item
    _SHARED["array"][row, 0] = value  # written in the child, read by the parent
    return os.getpid()


@pytest.mark.parametrize("workers", [1, 2])
def test_fork_pool_maps_several_times_with_the_same_children_and_shared_memory(workers):
    import os

    from beatlab._fork import ForkPool, shared_array
    from beatlab.errors import BeatlabWarning

    array = shared_array((4, 3), np.float32)
    assert array.shape == (4, 3) and array.dtype == np.float32 and not array.any()
    _SHARED["array"] = array
    try:
        with ForkPool(workers) as pool:
            first = pool.map(_fill_row, [(0, 1.0), (1, 2.0), (2, 3.0), (3, 4.0)])
            with pytest.warns(BeatlabWarning, match="item 2 is odd"):
                assert pool.map(_warn_and_square, [1, 2, 3]) == [1, 4, 9]
            second = pool.map(_fill_row, [(0, 5.0), (3, 6.0)])
    finally:
        _SHARED.clear()
    np.testing.assert_array_equal(array[:, 0], [5.0, 2.0, 3.0, 6.0])
    np.testing.assert_array_equal(array[:, 1:], 0.0)
    if workers == 1:
        assert set(first) == set(second) == {os.getpid()}
    else:  # forked once, on entering: every map runs in those children, no new ones
        assert os.getpid() not in set(first) | set(second)
        assert len(set(first) | set(second)) <= workers
