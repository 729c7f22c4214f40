"""The layout's measure column: the whole field (default) or its dominant region."""

import numpy as np
import pytest

from beatlab.batch import analyze_batch
from beatlab.errors import InputError
from beatlab.synth import simulate_recording, write_simulation


@pytest.fixture(scope="module")
def two_clusters(tmp_path_factory):
    folder = tmp_path_factory.mktemp("measure")
    sim = simulate_recording(
        duration_s=8, fps=30, shape_px=(128, 128), n_clusters=2,
        cluster_rates_bpm=(40.0, 70.0), rng=4,
    )  # fmt: skip
    write_simulation(sim, folder / "two.ome.tif")
    return folder, sim


def test_dominant_region_is_measured_on_its_own(two_clusters):
    folder, _ = two_clusters
    (folder / "layout.csv").write_text(
        "path,well,measure\ntwo.ome.tif,A1,\ntwo.ome.tif,A2,dominant\n"
    )
    res = analyze_batch(
        folder / "layout.csv", out_dir=folder / "out", workers=1, threads=1, progress=False,
        details=False, figures=False, report=False,
    )  # fmt: skip
    rec = res.recordings.set_index("well")
    assert rec.loc["A1", "measured_region"] == 0 and rec.loc["A2", "measured_region"] >= 1
    assert bool(rec.loc["A1", "mixed"]) and rec.loc["A1", "n_beating_regions"] == 2
    # the dominant region beats at one of the two simulated rates, the whole field at neither
    dominant = rec.loc["A2", "beat_rate_bpm"]
    assert min(abs(dominant - 40.0), abs(dominant - 70.0)) < 0.05 * dominant
    beats = res.beats[res.beats["well"] == "A2"]
    assert len(beats) == rec.loc["A2", "beat_count"]
    assert np.all(np.diff(beats["peak_s"]) > 0)


def test_an_unknown_measure_is_refused_before_any_work(two_clusters):
    folder, _ = two_clusters
    (folder / "bad.csv").write_text("path,well,measure\ntwo.ome.tif,A1,largest\n")
    with pytest.raises(InputError, match="row 2, column measure: 'largest'"):
        analyze_batch(folder / "bad.csv", out_dir=folder / "bad", workers=1, progress=False)
