"""From raw off-axis holograms to beats: the same beats as the OPD twin (issue 4)."""

import json

import numpy as np
import pytest
import tifffile

from beatlab.cli import main
from beatlab.errors import BeatlabWarning
from beatlab.io import open_recording
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import analyze_here, as_recording, match_beats, run

COMMON = dict(
    duration_s=5, fps=30, shape_px=(256, 256), pixel_size_um=0.2, rate_bpm=60, noise_nm=0.5, rng=21
)


def test_hologram_analysis_matches_opd_twin():
    holo = simulate_recording(kind="hologram", **COMMON)
    twin = simulate_recording(kind="opd", **COMMON)
    a = analyze_here(as_recording(holo), reference=holo.reference_frames)
    b = run(twin)
    truth = twin.truth["summary"]
    assert a.summary["beat_count"] == b.summary["beat_count"] == truth["beat_count"]
    assert a.summary["beat_rate_bpm"] == pytest.approx(truth["beat_rate_bpm"], rel=0.01)
    err = match_beats(a.beats, twin.truth["beats"])
    for col in ("onset_s", "peak_s", "end_s"):
        assert np.nanmax(np.abs(err[f"{col}_err"])) <= 0.5 / 30, col
    # the band-limited output grid is coarser than the camera's
    assert a.summary["metadata"]["analysis_pixel_size_um"] > 0.5


def test_cli_simulate_reconstruct_analyze(tmp_path):
    movie = tmp_path / "h.ome.tif"
    assert (
        main(
            [
                "simulate",
                "--kind",
                "hologram",
                "--out",
                str(movie),
                "--duration-s",
                "4",
                "--size-px",
                "192",
                "--pixel-size-um",
                "0.2",
                "--seed",
                "4",
            ]
        )
        == 0
    )
    reference = tmp_path / "h.reference.ome.tif"
    assert reference.exists()
    opd = tmp_path / "opd.ome.tif"
    assert (
        main(
            [
                "reconstruct",
                str(movie),
                "--reference",
                str(reference),
                "--wavelength-nm",
                "632.8",
                "--out",
                str(opd),
            ]
        )
        == 0
    )
    rec = open_recording(opd)
    assert rec.kind == "opd" and rec.fps == pytest.approx(30.0)
    assert rec.pixel_size_um > 0.2 and rec.n_frames == 120
    with tifffile.TiffFile(opd) as tif:
        assert tif.series[0].dtype == np.float32
    frame = rec.frame(0)
    assert np.percentile(frame, 99) > 100  # cells come out positive, in nm
    assert main(["analyze", str(opd), "--out", str(tmp_path / "a"), "--no-figures"]) == 0
    assert (
        main(
            [
                "analyze",
                str(movie),
                "--kind",
                "hologram",
                "--reference",
                str(reference),
                "--out",
                str(tmp_path / "b"),
                "--no-figures",
            ]
        )
        == 0
    )
    truth = json.loads((tmp_path / "h.truth.json").read_text())["summary"]
    for name in ("a", "b"):
        summary = json.loads((tmp_path / name / "summary.json").read_text())
        assert summary["beat_count"] == truth["beat_count"], name


def test_reconstruct_needs_wavelength_and_pixel_size(tmp_path, capsys):
    path = tmp_path / "raw.npy"
    np.save(path, np.zeros((10, 64, 64), np.float32))
    assert main(["reconstruct", str(path), "--out", str(tmp_path / "o.ome.tif")]) == 2
    assert "--wavelength-nm" in capsys.readouterr().err
    code = main(
        [
            "reconstruct",
            str(path),
            "--wavelength-nm",
            "632.8",
            "--fps",
            "30",
            "--out",
            str(tmp_path / "o.ome.tif"),
        ]
    )
    assert code == 2
    assert "--pixel-size-um" in capsys.readouterr().err


def test_a_grid_too_coarse_for_flow_is_flagged_not_passed_off():
    # 128 px holograms at 0.5 um reconstruct onto about 25 x 25 px (the off-axis sideband
    # keeps about a fifth of the camera's pixels a side): optical flow sees too few pixels
    # per cell, which the summary, the headline and a warning must say
    holo = simulate_recording(
        kind="hologram", duration_s=4, fps=30, shape_px=(128, 128), pixel_size_um=0.5,
        rate_bpm=60, noise_nm=0.5, rng=5,
    )  # fmt: skip
    with pytest.warns(BeatlabWarning, match="analysis grid is only"):
        a = analyze_here(as_recording(holo), reference=holo.reference_frames)
    assert min(a.summary["metadata"]["analysis_shape_px"]) < 32
    assert "coarse grid" in a.summary["quality"]["checks"]
    assert "(check: " in a.headline() and "coarse grid" in a.headline()
    assert a.to_row()["quality_checks"] == a.summary["quality"]["checks"]


def test_simulated_holograms_at_the_defaults_analyse_correctly():
    # the simulator's defaults for holograms (256 px at 0.25 um) reconstruct onto a grid
    # fine enough for flow: the beats of the truth, nothing flagged
    holo = simulate_recording(kind="hologram", duration_s=5, fps=30, rate_bpm=60, rng=6)
    a = analyze_here(as_recording(holo), reference=holo.reference_frames)
    assert a.summary["beat_count"] == holo.truth["summary"]["beat_count"]
    assert a.summary["quality"]["checks"] == ""
