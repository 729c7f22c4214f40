import numpy as np
import pytest

from beatlab.errors import InputError, MetadataError
from beatlab.frames import OPDSource
from beatlab.io import Recording
from beatlab.io.readers import _ArraySource
from beatlab.opd import opd_to_phase, wrap_phase


def _rec(frames, kind, wavelength_nm=632.8):
    return Recording(
        source="t",
        kind=kind,
        frames=_ArraySource(frames),
        fps=10.0,
        times_s=np.arange(len(frames)) / 10.0,
        pixel_size_um=0.5,
        wavelength_nm=wavelength_nm,
    )


def _opd_stack():
    y, x = np.mgrid[:32, :32]
    base = 900.0 * np.exp(-((x - 16) ** 2 + (y - 16) ** 2) / 60.0)  # 1.4 wavelengths
    return np.stack([base * (1 + 0.02 * k) for k in range(6)]).astype(np.float32)


def test_opd_scale_converts_micrometres():
    opd = _opd_stack()
    src = OPDSource(_rec(opd / 1000.0, "opd"), opd_scale=1000.0, chunk_frames=4)
    out = np.concatenate([block for _, block in src.chunks()])
    np.testing.assert_allclose(out, opd, rtol=1e-5)


def test_wrapped_and_unwrapped_phase_give_the_same_opd():
    opd = _opd_stack()
    phase = opd_to_phase(opd, 632.8).astype(np.float32)
    a = np.concatenate([b for _, b in OPDSource(_rec(phase, "phase")).chunks()])
    b = np.concatenate(
        [b for _, b in OPDSource(_rec(wrap_phase(phase).astype(np.float32), "phase")).chunks()]
    )
    np.testing.assert_allclose(a, b, atol=1e-2)
    # OPD up to a constant (the unwrapping's), frame to frame changes exact
    np.testing.assert_allclose(np.diff(a, axis=0), np.diff(opd, axis=0), atol=1e-2)
    assert np.ptp(a[0] - opd[0]) < 1e-2


def test_phase_needs_a_wavelength():
    with pytest.raises(MetadataError, match="wavelength_nm=NM"):
        OPDSource(_rec(np.zeros((4, 8, 8), np.float32), "phase", wavelength_nm=None))


def test_select_chunks_converts_only_the_kept_frames():
    opd = _opd_stack()
    src = OPDSource(_rec(opd / 1000.0, "opd"), opd_scale=1000.0, chunk_frames=4)
    keep = np.array([True, False, False, True, True, False])
    got = list(src.select_chunks(keep))
    assert [list(idx) for idx, _ in got] == [[0, 3], [4]]
    np.testing.assert_allclose(np.concatenate([f for _, f in got]), opd[keep], rtol=1e-5)


@pytest.mark.parametrize(
    ("shape", "pixel_um", "expected"),
    [
        ((512, 512), 0.5, 2),  # 256 px at 1.0 um
        ((1024, 1280), 0.25, 4),  # 256 x 320 px at 1.0 um
        ((2048, 2048), 0.1, 8),  # 256 px at 0.8 um (the size bound)
        ((512, 512), 1.0, 1),  # already 1 um
        ((256, 256), 0.2, 1),  # already at 256 px
        ((512, 512), None, 1),  # no pixel size: no binning
    ],
)
def test_automatic_bin_keeps_256_px_and_1_um(shape, pixel_um, expected):
    from beatlab.frames import choose_bin

    assert choose_bin(shape, pixel_um) == expected


def test_binned_frames_are_block_means_on_a_coarser_grid():
    rng = np.random.default_rng(0)
    opd = rng.normal(100, 10, (3, 33, 34)).astype(np.float32)
    opd[1, 0, 0] = np.nan  # a NaN pixel: the NaN-aware mean of its block's other pixels
    src = OPDSource(_rec(opd, "opd"), bin=2)
    assert src.shape == (16, 17) and src.unbinned_shape == (33, 34)
    assert src.pixel_size_um == pytest.approx(1.0)
    out = np.concatenate([block for _, block in src.chunks()])
    expected = opd[:, :32, :34].reshape(3, 16, 2, 17, 2).mean(axis=(2, 4))
    expected[1, 0, 0] = np.mean([opd[1, 0, 1], opd[1, 1, 0], opd[1, 1, 1]])
    np.testing.assert_allclose(out, expected, rtol=1e-6)
    labels = np.zeros((33, 34), int)
    labels[10:20, 4:12] = 3
    binned = src.bin_labels(labels)
    assert binned.shape == (16, 17)
    assert set(np.unique(binned)) == {0, 3} and (binned == 3).sum() == 5 * 4
    assert src.bin_labels(binned).shape == (16, 17)  # already binned: as it is
    with pytest.raises(InputError, match="label image shape"):
        src.bin_labels(np.zeros((40, 40), int))  # neither shape: refused, not sliced
    assert OPDSource(_rec(opd, "opd"), bin=1).shape == (33, 34)
    with pytest.raises(InputError, match="bin 8 leaves only"):
        OPDSource(_rec(opd, "opd"), bin=8)


def test_select_indices_and_frames_at_read_what_select_chunks_reads():
    frames = np.random.default_rng(4).normal(size=(20, 24, 20)).astype(np.float32)
    src = OPDSource(_rec(frames, "opd"), chunk_frames=7, bin=2)
    keep = np.zeros(20, dtype=bool)
    keep[[1, 2, 5, 9, 13, 14, 19]] = True
    chunks = list(src.select_chunks(keep))
    lazy = list(src.select_indices(keep))
    assert [i.tolist() for i, _ in lazy] == [i.tolist() for i, _ in chunks]
    assert all(f is None for _, f in lazy)
    for (_, expected), (same, _) in zip(chunks, lazy, strict=True):
        np.testing.assert_array_equal(src.frames_at(same), expected)
    assert src.readable_in_forks  # an array in memory


def test_binned_frames_with_infinities_are_those_of_the_frames_with_nan_there():
    # The binned read checks for infinities after binning (cheaper); the result must be that
    # of replacing them by NaN first (a block mean then skips them), with one warning.
    from beatlab.errors import BeatlabWarning
    from beatlab.frames import block_mean

    rng = np.random.default_rng(4)
    frames = rng.normal(300, 20, (10, 32, 32)).astype(np.float32)
    frames[1, 3, 3] = np.inf  # one infinity in a block
    frames[2, 4:6, 4:6] = [[np.inf, -np.inf], [np.nan, 1.0]]  # +inf and -inf in one block
    frames[3, 0:2, 0:2] = np.nan  # a whole NaN block, no infinity
    frames[4, 9, 9] = np.nan
    want = np.where(np.isinf(frames), np.nan, frames)
    want = np.stack([block_mean(f, 2) for f in want])
    src = OPDSource(_rec(frames, "opd"), chunk_frames=4, bin=2)
    with pytest.warns(BeatlabWarning, match="infinite values"):
        got = np.concatenate([b for _, b in src.chunks()])
    np.testing.assert_array_equal(got, want)
    assert np.isfinite(got[1]).all() and np.isfinite(got[2, 2, 2])
    keep = np.zeros(10, dtype=bool)
    keep[[2, 3, 7]] = True
    picked = list(src.select_chunks(keep))
    np.testing.assert_array_equal(np.concatenate([i for i, _ in picked]), [2, 3, 7])
    np.testing.assert_array_equal(np.concatenate([p for _, p in picked]), want[keep])
    np.testing.assert_array_equal(src.frames_at(np.array([1, 2, 4])), want[[1, 2, 4]])


def test_runs_of_kept_frames_read_the_same_frames_as_scattered_ones():
    # Runs of consecutive frames are converted as slices of the chunk (no copy of the raw
    # frames); the frames must be those of reading each frame alone.
    frames = np.random.default_rng(5).normal(300, 20, (12, 16, 16)).astype(np.float32)
    original = frames.copy()
    for binning in (1, 2):
        src = OPDSource(_rec(frames, "opd"), chunk_frames=5, bin=binning)
        every = np.concatenate([f for _, f in src.select_chunks(np.ones(12, dtype=bool))])
        one_by_one = np.stack([src.frames_at(np.array([i]))[0] for i in range(12)])
        np.testing.assert_array_equal(every, one_by_one)
        np.testing.assert_array_equal(src.frames_at(np.arange(3, 9)), every[3:9])
        scattered = src.frames_at(np.array([3, 5, 8]))
        np.testing.assert_array_equal(scattered, every[[3, 5, 8]])
        runs = np.array([0, 1, 2, 5, 7, 8, 11])  # runs of several frames and single ones
        np.testing.assert_array_equal(src.frames_at(runs), every[runs])
        keep = np.isin(np.arange(12), runs)
        picked = list(src.select_chunks(keep))
        np.testing.assert_array_equal(np.concatenate([i for i, _ in picked]), runs)
        np.testing.assert_array_equal(np.concatenate([f for _, f in picked]), every[runs])
    np.testing.assert_array_equal(frames, original)  # the recording is read, never written
