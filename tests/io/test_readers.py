import warnings

import cv2
import numpy as np
import pytest
import tifffile

from beatlab.errors import BeatlabWarning, InputError, MetadataError
from beatlab.io import open_recording, write_ome_tiff


@pytest.fixture
def stack():
    rng = np.random.default_rng(3)
    return rng.normal(100, 10, (12, 20, 24)).astype(np.float32)


def test_ome_tiff_written_by_tifffile(tmp_path, stack):
    # Done-when check: TimeIncrement 0.02 s and PhysicalSizeX 0.5 um -> fps 50 and 0.5 um
    path = tmp_path / "a.ome.tif"
    tifffile.imwrite(
        path,
        stack,
        ome=True,
        metadata={
            "axes": "TYX",
            "TimeIncrement": 0.02,
            "TimeIncrementUnit": "s",
            "PhysicalSizeX": 0.5,
            "PhysicalSizeXUnit": "µm",
            "PhysicalSizeY": 0.5,
            "PhysicalSizeYUnit": "µm",
        },
    )
    rec = open_recording(path)
    assert rec.fps == pytest.approx(50.0)
    assert rec.pixel_size_um == pytest.approx(0.5)
    assert rec.n_frames == 12 and rec.shape == (20, 24)
    assert rec.metadata["memory_mapped"]
    np.testing.assert_array_equal(rec.frame(5), stack[5])
    np.testing.assert_allclose(rec.times_s, np.arange(12) * 0.02)


def test_ome_units_are_converted(tmp_path, stack):
    path = tmp_path / "b.ome.tif"
    tifffile.imwrite(
        path,
        stack,
        ome=True,
        metadata={
            "axes": "TYX",
            "TimeIncrement": 20.0,
            "TimeIncrementUnit": "ms",
            "PhysicalSizeX": 500.0,
            "PhysicalSizeXUnit": "nm",
            "PhysicalSizeY": 500.0,
            "PhysicalSizeYUnit": "nm",
        },
    )
    rec = open_recording(path)
    assert rec.fps == pytest.approx(50.0)
    assert rec.pixel_size_um == pytest.approx(0.5)


def test_ome_round_trip_with_beatlab_annotations(tmp_path, stack):
    path = write_ome_tiff(
        tmp_path / "c.ome.tif",
        stack,
        fps=30.0,
        pixel_size_um=0.25,
        kind="phase",
        wavelength_nm=632.8,
    )
    rec = open_recording(path)
    assert (rec.kind, rec.fps, rec.pixel_size_um, rec.wavelength_nm) == (
        "phase",
        pytest.approx(30.0),
        pytest.approx(0.25),
        pytest.approx(632.8),
    )
    blocks = list(rec.chunks(5))
    assert [i for i, _ in blocks] == [0, 5, 10]
    np.testing.assert_array_equal(np.concatenate([b for _, b in blocks]), stack)


def test_uneven_plane_times_are_kept_and_reported(tmp_path, stack):
    times = np.cumsum(np.r_[0, np.full(11, 0.02)])
    times[6:] += 0.015  # one dropped-ish frame
    path = write_ome_tiff(
        tmp_path / "d.ome.tif", stack, fps=50.0, pixel_size_um=0.5, times_s=times
    )
    with pytest.warns(BeatlabWarning, match="uneven"):
        rec = open_recording(path)
    np.testing.assert_allclose(rec.times_s, times)
    assert rec.uneven_timing
    assert rec.fps == pytest.approx(50.0)


def test_imagej_metadata(tmp_path, stack):
    # ImageJ: finterval and resolution tags with unit; `spacing` is the z-step, not the pixel
    path = tmp_path / "ij.tif"
    tifffile.imwrite(
        path,
        stack,
        imagej=True,
        resolution=(2.0, 2.0),
        metadata={"unit": "um", "finterval": 0.02, "axes": "TYX", "spacing": 3.0},
    )
    rec = open_recording(path)
    assert rec.fps == pytest.approx(50.0)
    assert rec.pixel_size_um == pytest.approx(0.5)
    np.testing.assert_array_equal(rec.frame(-1), stack[-1])


def test_plain_tiff_needs_flags(tmp_path, stack):
    path = tmp_path / "plain.tif"
    tifffile.imwrite(path, stack, compression="zlib")  # compressed: read page by page
    rec = open_recording(path)
    assert rec.fps is None and rec.pixel_size_um is None
    assert not rec.metadata["memory_mapped"]
    with pytest.raises(MetadataError, match="fps=HZ"):
        rec.require("fps")
    rec = open_recording(path, fps=15, pixel_size_um=0.4)
    rec.require("fps", "pixel_size_um")
    np.testing.assert_array_equal(rec.frame(3), stack[3])


def test_flags_override_file(tmp_path, stack):
    path = write_ome_tiff(tmp_path / "e.ome.tif", stack, fps=30.0, pixel_size_um=0.25)
    rec = open_recording(path, fps=100.0, pixel_size_um=1.0, wavelength_nm=532.0)
    assert (rec.fps, rec.pixel_size_um, rec.wavelength_nm) == (100.0, 1.0, 532.0)
    assert rec.metadata["fps_source"] == "given (fps)"


def test_npy_memory_mapped(tmp_path, stack):
    path = tmp_path / "f.npy"
    np.save(path, stack)
    rec = open_recording(path, fps=10.0, pixel_size_um=0.5)
    assert isinstance(rec.frames.array, np.memmap)
    np.testing.assert_array_equal(rec.frame(2), stack[2])


def test_npy_refuses_pickles(tmp_path):
    path = tmp_path / "obj.npy"
    np.save(path, np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(InputError, match="npy"):
        open_recording(path)


def test_folder_in_natural_order(tmp_path, stack):
    folder = tmp_path / "frames"
    folder.mkdir()
    u16 = (stack * 10).astype(np.uint16)
    for i, f in enumerate(u16):
        if i % 2:
            cv2.imwrite(str(folder / f"frame{i}.png"), f)
        else:
            tifffile.imwrite(folder / f"frame{i}.tif", f)
    rec = open_recording(folder, fps=20.0)
    assert rec.n_frames == 12
    for i in (0, 1, 10, 11):  # frame10 comes after frame9, not after frame1
        np.testing.assert_array_equal(rec.frame(i), u16[i])


def test_hdf5_dataset_with_attributes(tmp_path, stack):
    h5py = pytest.importorskip("h5py")
    path = tmp_path / "g.h5"
    with h5py.File(path, "w") as f:
        ds = f.create_dataset("/movies/opd", data=stack)
        ds.attrs["fps"] = 25.0
        ds.attrs["pixel_size_um"] = 0.3
        f.create_dataset("/other", data=np.zeros((3, 4, 5)))
    rec = open_recording(f"{path}:/movies/opd")
    assert rec.fps == pytest.approx(25.0) and rec.pixel_size_um == pytest.approx(0.3)
    np.testing.assert_array_equal(rec.frame(4), stack[4])
    with pytest.raises(InputError, match="name the dataset"):
        open_recording(path)


@pytest.mark.parametrize("name", ["missing.tif", "missing_folder"])
def test_missing_path(tmp_path, name):
    with pytest.raises(InputError, match="no such file"):
        open_recording(tmp_path / name)


def test_unreadable_and_unsupported(tmp_path):
    bad = tmp_path / "bad.tif"
    bad.write_bytes(b"not a tiff at all")
    with pytest.raises(InputError, match="cannot be read"):
        open_recording(bad)
    other = tmp_path / "x.avi"
    other.write_bytes(b"0")
    with pytest.raises(InputError, match="unsupported file type"):
        open_recording(other)


def test_invalid_flag_values(tmp_path, stack):
    path = write_ome_tiff(tmp_path / "h.ome.tif", stack, fps=30.0, pixel_size_um=0.25)
    with pytest.raises(MetadataError, match="fps=HZ"):
        open_recording(path, fps=-3)
    with pytest.raises(InputError, match="unknown kind"):
        open_recording(path, kind="fluorescence")


def test_streamed_write_and_atomicity(tmp_path, stack):
    path = tmp_path / "s.ome.tif"
    write_ome_tiff(path, iter(stack), shape=stack.shape, dtype=np.float32, fps=10, pixel_size_um=1)
    np.testing.assert_array_equal(tifffile.imread(path), stack)

    def broken():
        yield stack[0]
        raise RuntimeError("disk gone")

    with pytest.raises(RuntimeError):
        write_ome_tiff(
            path, broken(), shape=stack.shape, dtype=np.float32, fps=10, pixel_size_um=1
        )
    # the earlier file is intact and no partial file is left behind
    np.testing.assert_array_equal(tifffile.imread(path), stack)
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".part")]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        open_recording(path)
