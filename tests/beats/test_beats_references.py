"""Beat landmarks against a reference library (CHECKS.md "More reference checks").

``scipy.signal.peak_widths`` (L: reference library) measures the width of a peak at
``peak - rel_height x prominence``, linearly interpolating the two crossings between samples and
searching outwards from the peak. On one clean beat on a flat baseline (0 here, so the
prominence is the peak height) that is DESIGN.md's ``duration_50_s`` (rel_height 0.5: the
crossings of 50 % of the amplitude above the baseline) and ``duration_90_s`` (rel_height 0.9:
the crossings of 10 %), when beatlab applies its definitions literally: linear crossings
(``interpolation="linear"``) on the raw samples (``smooth_s=0``), with the plain
last-crossing rule (``hysteresis_sd=0``) and the baseline window on the lowest raw sample
(``baseline_smooth_s=0``, ``baseline_rest_sd=0``).

One difference of definition remains and is bridged here, not hidden: DESIGN.md's amplitude is
the vertex of the parabola through the three samples around the maximum, peak_widths' is the
maximum sample. The test computes that vertex itself (``numpy.polyfit``, L) and hands
peak_widths the samples with the maximum replaced by it; the crossings at 50 % and 10 % lie
well below the top three samples, so the replacement only sets the level. On a beat whose top
is sampled symmetrically the vertex is the sample itself and nothing is replaced (asserted).
"""

import numpy as np
import pytest
from scipy.signal import peak_widths

from beatlab.beats import measure_beats

#: Both sides interpolate the same two samples linearly at the same level, so they differ by
#: floating-point rounding only (measured <= 1e-15 s); 1e-9 s is a millionth of a 1 ms sample
#: spacing and far below any definitional difference (an error of one sample in the level
#: search moves a crossing by a whole frame, 5-67 ms here).
ATOL_S = 1e-9

LITERAL = dict(
    interpolation="linear",
    smooth_s=0,
    hysteresis_sd=0,
    baseline_smooth_s=0,
    baseline_rest_sd=0,
)


def _cosine_rise_exponential_decay(t, *, start_s=0.4, rise_s=0.15, tau_s=0.12, stop_s=1.6):
    """Half-cosine rise to 1, then an exponential decay shifted to reach exactly 0 at stop_s."""
    rise = 0.5 * (1 - np.cos(np.pi * np.clip((t - start_s) / rise_s, 0, 1)))
    peak = start_s + rise_s
    tail_end = np.exp(-(stop_s - peak) / tau_s)
    decay = (np.exp(-(t - peak) / tau_s) - tail_end) / (1 - tail_end)
    return np.where(t <= peak, rise, np.clip(decay, 0.0, None))


def _gaussian(t, *, centre_s, sigma_s=0.07):
    """A Gaussian beat, set to exactly 0 beyond 6 sigma (a flat baseline, not a tail)."""
    g = np.exp(-0.5 * ((t - centre_s) / sigma_s) ** 2)
    return np.where(np.abs(t - centre_s) < 6 * sigma_s, g, 0.0)


def _gamma_variate(t, *, start_s=0.3, peak_after_s=0.09, k=2.5, stop_s=1.5):
    """Skewed gamma-variate pulse (fast rise, long convex tail), shifted to 0 at stop_s."""
    u = np.clip(t - start_s, 0.0, None) / peak_after_s
    g = u**k * np.exp(k * (1 - u))
    u_end = (stop_s - start_s) / peak_after_s
    end = u_end**k * np.exp(k * (1 - u_end))
    return np.where(t < stop_s, np.clip((g - end) / (1 - end), 0.0, None), 0.0)


def _skewed_triangle(t, *, start_s=0.35, rise_s=0.11, fall_s=0.43):
    """Straight rise and a straight, four times slower fall: kinks at onset, peak and end."""
    up = (t - start_s) / rise_s
    down = 1 - (t - start_s - rise_s) / fall_s
    return np.clip(np.minimum(up, down), 0.0, None)


SHAPES = {
    "cosine_rise_exp_decay": _cosine_rise_exponential_decay,
    "gaussian_off_sample": lambda t: _gaussian(t, centre_s=0.8137),
    "gamma_variate": _gamma_variate,
    "skewed_triangle": _skewed_triangle,
}


def _vertex_value(times, values, peak):
    """Top of the parabola through the samples peak - 1, peak, peak + 1 (numpy.polyfit)."""
    a, b, c = np.polyfit(times[peak - 1 : peak + 2] - times[peak], values[peak - 1 : peak + 2], 2)
    return c - b * b / (4 * a)


def _reference_durations(times, values, fps):
    """duration at 50 % and 10 % of the amplitude by scipy.signal.peak_widths, in s."""
    peak = int(np.argmax(values))
    bridged = values.copy()
    bridged[peak] = _vertex_value(times, values, peak)
    out = {}
    for rel_height, column in ((0.5, "duration_50_s"), (0.9, "duration_90_s")):
        widths, heights, _, _ = peak_widths(bridged, [peak], rel_height=rel_height)
        # CHECKS.md: scipy.signal.peak_widths (L): level = peak - rel_height x prominence
        assert heights[0] == pytest.approx((1 - rel_height) * bridged[peak], rel=1e-12)
        out[column] = widths[0] / fps
    return peak, bridged[peak], out


@pytest.mark.parametrize("fps", [30.0, 50.0, 100.0])
@pytest.mark.parametrize("shape", sorted(SHAPES))
def test_durations_equal_scipy_peak_widths(shape, fps):
    times = np.arange(round(2.0 * fps)) / fps
    # amplitude 0.6 um on a flat baseline of 0 um
    values = 0.6 * SHAPES[shape](times)
    peak, top, expected = _reference_durations(times, values, fps)
    beats = measure_beats(values, times, [peak], **LITERAL)
    assert len(beats) == 1
    row = beats.iloc[0]
    assert row["baseline_um"] == 0.0  # the flat baseline, so prominence = amplitude
    # DESIGN.md peak: vertex of the parabola through three samples, here by numpy.polyfit (L)
    assert row["peak_um"] == pytest.approx(top, rel=1e-9)
    for column, want in expected.items():
        # CHECKS.md: scipy.signal.peak_widths at rel_height 0.5 / 0.9 (L), linear crossings
        assert row[column] == pytest.approx(want, abs=ATOL_S), (column, row[column] - want)


@pytest.mark.parametrize("fps", [25.0, 60.0])
def test_durations_equal_scipy_peak_widths_on_a_symmetric_sampled_top(fps):
    # a Gaussian centred on a sample: the parabola vertex is the top sample, so peak_widths
    # runs on the samples exactly as they are
    times = np.arange(round(2.0 * fps)) / fps
    values = 0.45 * _gaussian(times, centre_s=times[round(0.9 * fps)])
    peak = int(np.argmax(values))
    assert _vertex_value(times, values, peak) == pytest.approx(values[peak], rel=1e-12)
    beats = measure_beats(values, times, [peak], **LITERAL)
    for rel_height, column in ((0.5, "duration_50_s"), (0.9, "duration_90_s")):
        widths = peak_widths(values, [peak], rel_height=rel_height)[0]
        # CHECKS.md: scipy.signal.peak_widths at rel_height 0.5 / 0.9 (L)
        assert beats[column].iloc[0] == pytest.approx(widths[0] / fps, abs=ATOL_S)
