"""Dropped frames: uneven timestamps are used as they are, not assumed regular."""

import numpy as np
import pytest

from beatlab import BeatlabWarning, open_recording
from beatlab.io import write_ome_tiff
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import analyze_here, match_beats


def test_dropped_frames_keep_beat_timing(tmp_path):
    sim = simulate_recording(
        duration_s=6, fps=30, shape_px=(80, 80), rate_bpm=60, noise_nm=1.0, rng=7
    )
    keep = np.ones(sim.frames.shape[0], dtype=bool)
    keep[5::7] = False  # the camera dropped every 7th frame
    path = write_ome_tiff(
        tmp_path / "dropped.ome.tif",
        sim.frames[keep],
        fps=30.0,
        pixel_size_um=sim.pixel_size_um,
        times_s=sim.times_s[keep],
    )
    with pytest.warns(BeatlabWarning, match="uneven"):
        rec = open_recording(path)
    res = analyze_here(rec)
    assert res.summary["quality"]["uneven_timing"]
    assert res.summary["beat_count"] == sim.truth["summary"]["beat_count"]
    np.testing.assert_allclose(res.trace["time_s"], sim.times_s[keep])
    err = match_beats(res.beats, sim.truth["beats"])
    for col in ("onset_s", "peak_s", "end_s"):
        assert np.nanmax(np.abs(err[f"{col}_err"])) < 1.0 / 30, col
