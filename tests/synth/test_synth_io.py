"""Writing simulations to disk, and the hologram kind."""

import json

import numpy as np
import pytest
import tifffile

from beatlab.errors import InputError
from beatlab.synth import simulate_recording, write_simulation

SMALL = {"duration_s": 1.0, "fps": 25.0, "shape_px": (48, 64), "pixel_size_um": 0.4}


def _pixels(path):
    with tifffile.TiffFile(path) as tif:
        meta = tifffile.xml2dict(tif.ome_metadata)
        data = tif.asarray()
    image = meta["OME"]["Image"]
    image = image[0] if isinstance(image, list) else image
    return data, image["Pixels"], meta


def test_write_simulation_round_trips_through_tifffile(tmp_path):
    sim = simulate_recording(**SMALL, rate_bpm=90, rng=1)
    files = write_simulation(sim, tmp_path / "rec.ome.tif")
    assert set(files) == {"recording", "truth", "truth_arrays"}
    assert files["truth"].name == "rec.truth.json"
    data, pixels, _ = _pixels(files["recording"])
    # reference library tifffile (L): OME-XML carries the physical metadata
    assert float(pixels["TimeIncrement"]) == pytest.approx(1 / 25.0)
    assert float(pixels["PhysicalSizeX"]) == pytest.approx(0.4)
    assert float(pixels["PhysicalSizeY"]) == pytest.approx(0.4)
    np.testing.assert_array_equal(data, sim.frames)

    truth = json.loads(files["truth"].read_text())
    assert truth["kind"] == "opd" and truth["fps"] == 25.0
    assert truth["summary"]["beat_count"] == sim.truth["summary"]["beat_count"]
    assert truth["beats"][0]["ibi_s"] is None  # None survives as null
    assert truth["files"]["truth_arrays"] == "rec.truth.npz"

    with np.load(files["truth_arrays"]) as arrays:
        np.testing.assert_array_equal(arrays["displacement_um"], sim.displacement_um)
        np.testing.assert_array_equal(arrays["mask"], sim.mask)
        np.testing.assert_array_equal(arrays["cluster_labels"], sim.cluster_labels)
        np.testing.assert_array_equal(arrays["activation"], sim.activation[None, :])
        np.testing.assert_array_equal(arrays["displacement_field_um"], sim.displacement_field_um)
        assert arrays["stage_shift_um"].shape == (25, 2)


def test_write_simulation_rejects_a_non_tiff_name(tmp_path):
    sim = simulate_recording(**SMALL, rng=1)
    with pytest.raises(InputError, match="path"):
        write_simulation(sim, tmp_path / "rec.npy")


def test_wrapped_phase_is_stored_as_phase(tmp_path):
    sim = simulate_recording(**SMALL, kind="wrapped_phase", rng=2)
    files = write_simulation(sim, tmp_path / "wrapped.ome.tif")
    _, _, meta = _pixels(files["recording"])
    text = json.dumps(meta)
    assert '"phase"' in text and "phase_wrapped" in text
    assert json.loads(files["truth"].read_text())["phase_wrapped"] is True


def test_hologram_kind_renders_camera_frames_and_references(tmp_path):
    sim = simulate_recording(**SMALL, kind="hologram", reference_count=3, rng=3)
    assert sim.kind == "hologram" and sim.frames.dtype == np.float32
    assert sim.frames.shape == (25, 48, 64)
    assert sim.reference_frames.shape == (3, 48, 64)
    assert sim.opd_nm.shape == sim.frames.shape
    # off-axis fringes: sample-free and sample frames agree where the OPD is ~0 and differ on
    # the cells (Cuche, Marquet & Depeursinge 2000 interference model, P)
    background = np.abs(sim.opd_nm[0]) < 5
    cells = sim.opd_nm[0] > 150
    ref, frame = sim.reference_frames[0], sim.frames[0]
    assert np.corrcoef(ref[background], frame[background])[0, 1] > 0.9
    assert np.corrcoef(ref[cells], frame[cells])[0, 1] < 0.5
    files = write_simulation(sim, tmp_path / "holo.ome.tif")
    assert files["reference"].name == "holo.reference.ome.tif"
    data, pixels, _ = _pixels(files["reference"])
    np.testing.assert_array_equal(data, sim.reference_frames)
    assert float(pixels["PhysicalSizeX"]) == pytest.approx(0.4)
