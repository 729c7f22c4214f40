"""The analysis streams a recording in chunks: it never asks the reader for the whole file."""

import numpy as np

from beatlab.io import Recording
from beatlab.io.readers import _ArraySource
from beatlab.pipeline import analyze
from beatlab.synth import simulate_recording


class _CountingSource(_ArraySource):
    """An in-memory reader that records the size of every read."""

    def __init__(self, array):
        super().__init__(array)
        self.reads: list[int] = []

    def read(self, start, stop):
        self.reads.append(stop - start)
        return super().read(start, stop)


def test_frames_are_read_in_chunks_never_the_whole_recording():
    sim = simulate_recording(duration_s=6, fps=20, shape_px=(64, 64), rate_bpm=70, rng=3)
    source = _CountingSource(sim.frames)
    rec = Recording(
        source="counted",
        kind="opd",
        frames=source,
        fps=sim.fps,
        times_s=np.asarray(sim.times_s),
        pixel_size_um=sim.pixel_size_um,
        wavelength_nm=None,
        metadata={},
    )
    chunk = 16
    res = analyze(rec, {"input": {"chunk_frames": chunk}}, workers=1)
    assert res.summary["beat_count"] >= 5
    n = sim.frames.shape[0]
    assert n == 120 and source.reads
    # every read is one chunk or less, so memory holds a chunk of frames, not the recording
    assert max(source.reads) <= chunk
    # and the passes together read each frame a small number of times (rest pass, template,
    # drift, pattern and projection rounds)
    assert sum(source.reads) < 5 * n


def test_the_rest_pass_stack_does_not_grow_with_the_length():
    # the per-frame memory the analysis keeps (block activity) is capped, so that a recording
    # 4x as long needs no more: its frames are block-averaged more coarsely instead
    from beatlab.frames import OPDSource
    from beatlab.signals.rest import estimate_rest_template
    from tests.pipeline.helpers import as_recording

    cap_mb = 1.0
    kept = {}
    for seconds in (4, 16):
        sim = simulate_recording(duration_s=seconds, fps=20, shape_px=(96, 96), rng=4)
        rest = estimate_rest_template(
            OPDSource(as_recording(sim)), lowres_px=48, max_lowres_mb=cap_mb
        )
        assert rest.activity.shape[0] == sim.frames.shape[0]
        kept[seconds] = (rest.activity.nbytes, rest.info["block_factor"])
    assert all(nbytes <= cap_mb * 2**20 for nbytes, _ in kept.values())
    assert kept[4][1] == 2 and kept[16][1] > 2  # 80 frames at 48 px fit, 320 do not
