"""Shared helpers (imported, not a conftest) for end-to-end tests on simulator truth."""

import numpy as np
import pandas as pd

from beatlab.io import Recording
from beatlab.io.readers import _ArraySource

TIMING = [
    "onset_s",
    "peak_s",
    "end_s",
    "time_to_peak_s",
    "relax_50_s",
    "relax_90_s",
    "duration_50_s",
    "duration_90_s",
]


def as_recording(sim, frames=None, kind=None):
    """The simulated recording in memory (the file round trip is tested elsewhere)."""
    frames = sim.frames if frames is None else frames
    return Recording(
        source="simulated",
        kind=kind or sim.kind,
        frames=_ArraySource(frames),
        fps=sim.fps,
        times_s=np.asarray(sim.times_s),
        pixel_size_um=sim.pixel_size_um,
        wavelength_nm=sim.wavelength_nm,
        metadata={},
    )


def analyze_here(recording, config=None, **kwargs):
    """`beatlab.analyze` as a batch worker run with ``threads=1`` does it: the per-frame pass
    in this process (``workers=1``), OpenCV and BLAS on one thread each.

    For the tests of what an analysis finds. Forked workers and library threads give the same
    bytes (tests/test_determinism.py) and, on frames this small, only cost CPU time, while
    under pytest-xdist every core runs a test already (tests/pipeline/test_bias.py: 27 s of
    CPU time with the library threads, 22 s without, and no faster with a core to spare).
    """
    from beatlab._fork import single_threaded_libraries
    from beatlab.pipeline import analyze

    with single_threaded_libraries():
        return analyze(recording, config, **{"workers": 1, **kwargs})


def run(sim, config=None, **kwargs):
    """:func:`analyze_here` on the simulation in memory."""
    return analyze_here(as_recording(sim), config, **kwargs)


def match_beats(found: pd.DataFrame, truth: list[dict]) -> pd.DataFrame:
    """Pair each true beat with the found beat whose peak is nearest (within 40 % of an IBI)."""
    t_peaks = np.array([b["peak_s"] for b in truth])
    rows = []
    if len(t_peaks) == 0 or len(found) == 0:
        return pd.DataFrame()
    gap = np.median(np.diff(t_peaks)) if len(t_peaks) > 1 else 1.0
    f_peaks = found["peak_s"].to_numpy()
    for b in truth:
        k = int(np.argmin(np.abs(f_peaks - b["peak_s"])))
        if abs(f_peaks[k] - b["peak_s"]) < 0.4 * gap:
            row = {"beat": b["beat"]}
            for col in [*TIMING, "displacement_um", "ibi_s"]:
                tv = b.get(col)
                fv = found.iloc[k][col]
                row[f"{col}_err"] = (fv - tv) if (tv is not None and np.isfinite(fv)) else np.nan
            rows.append(row)
    return pd.DataFrame(rows)
