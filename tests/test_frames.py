import numpy as np
import pytest

from beatlab.errors import MetadataError
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
