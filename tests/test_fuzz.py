"""Property-based fuzzing of the beat stages, the frame readers and the layout parser.

Every input here is generated (hypothesis, derandomized so that CI sees the same examples on
every run). The contract checked is the one each public function documents: either a result
whose invariants hold, or a :class:`beatlab.errors.BeatlabError` with a one-line message;
never another exception type, never a hang.
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
import struct
import threading
import tokenize
import warnings

import numpy as np
import pandas as pd
import pytest
import tifffile
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from beatlab.batch import read_layout, validate_layout
from beatlab.beats import detect_beats, measure_beats
from beatlab.beats._validate import MAX_MAGNITUDE
from beatlab.errors import BeatlabError, BeatlabWarning, InputError
from beatlab.io import open_recording
from beatlab.rhythm import summarize_rhythm
from beatlab.settings import load_settings
from beatlab.signals.traces import velocity_trace
from beatlab.stages import analyze_trace
from beatlab.synth import simulate_recording, write_simulation

#: One fixed, derandomized profile: the same examples on every run and every machine.
FUZZ = settings(
    derandomize=True,
    database=None,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)


def fuzz(max_examples: int) -> settings:
    """The fixed profile with `max_examples` examples (sized to keep this file under 20 s)."""
    return settings(FUZZ, max_examples=max_examples)


SETTINGS = load_settings()

# --------------------------------------------------------------------------------------------
# traces


@st.composite
def time_axes(draw, n: int) -> np.ndarray:
    """Strictly increasing frame times: even, jittered, with dropped frames, or erratic."""
    if n == 0:
        return np.zeros(0)
    start = draw(st.sampled_from([0.0, 0.0, 12.5, -3.0, 1e4]))
    style = draw(st.sampled_from(["even", "jitter", "gaps", "erratic"]))
    fps = draw(  # mostly camera rates; now and then anything from 0.01 to 1e5 Hz
        st.one_of(
            st.sampled_from([5.0, 10.0, 20.0, 30.0, 50.0, 100.0, 400.0]), st.floats(0.01, 1e5)
        )
    )
    steps = np.full(n - 1, 1.0 / fps)
    if style == "jitter":
        rng = np.random.default_rng(draw(st.integers(0, 2**16)))
        steps *= 1.0 + draw(st.floats(0.0, 0.9)) * rng.uniform(-1, 1, n - 1)
    elif style == "gaps" and n > 1:
        for where, factor in draw(
            st.lists(st.tuples(st.integers(0, n - 2), st.floats(1.5, 100.0)), max_size=4)
        ):
            steps[where] *= factor
    elif style == "erratic":  # log-normal intervals spanning orders of magnitude
        rng = np.random.default_rng(draw(st.integers(0, 2**16)))
        steps *= np.exp(draw(st.sampled_from([0.5, 1.0, 2.0, 4.0])) * rng.normal(size=n - 1))
    times = start + np.concatenate([[0.0], np.cumsum(steps)])
    return _strict(times)


def _strict(times: np.ndarray) -> np.ndarray:
    """Nudge any rounding tie so the times increase strictly (as the functions require)."""
    times = times.copy()
    for i in range(1, times.size):
        if times[i] <= times[i - 1]:
            times[i] = np.nextafter(times[i - 1], np.inf)
    return times


@st.composite
def signals(draw, times: np.ndarray) -> np.ndarray:
    """A finite trace on `times`: sums of pulses, steps, spikes, drift and noise, or raw."""
    n = times.size
    if n == 0:
        return np.zeros(0)
    if draw(st.integers(0, 5)) == 0:  # raw finite floats, any magnitude
        return draw(arrays(float, n, elements=st.floats(allow_nan=False, allow_infinity=False)))
    span = max(float(times[-1] - times[0]), 1e-9)
    t = times - times[0]
    y = np.full(n, draw(st.floats(-10.0, 10.0)))
    pulses = draw(
        st.lists(
            st.tuples(
                st.floats(-0.1, 1.1),  # centre, fraction of the recording
                st.floats(1e-3, 2.0),  # rise, s
                st.floats(1e-3, 2.0),  # relaxation, s
                st.floats(-3.0, 10.0),  # amplitude
            ),
            max_size=25,
        )
    )
    train = draw(
        st.one_of(
            st.none(),
            st.tuples(
                st.integers(2, 24),  # beats in the recording
                st.floats(0.05, 0.6),  # width, fraction of the interval
                st.floats(0.0, 0.45),  # timing jitter, fraction of the interval
                st.floats(-0.6, 0.6),  # alternans: relative change of every other amplitude
                st.integers(0, 2**16),
            ),
        )
    )
    if train is not None:  # a beat train scaled to the recording, so beats are found
        count, width, jitter, alternans, seed = train
        interval = span / count
        rng = np.random.default_rng(seed)
        for k in range(count):
            centre = (k + 0.5 + jitter * rng.uniform(-1, 1)) / count
            scale = 1.0 + alternans * (-1) ** k
            pulses.append((centre, 0.4 * width * interval, width * interval, 3.0 * scale))
    for centre, rise, relax, amplitude in pulses:
        x = t - centre * span
        shape = np.where(x < 0, np.exp(-0.5 * (x / rise) ** 2), np.exp(-np.abs(x) / relax))
        y += amplitude * shape
    for where, height in draw(st.lists(st.tuples(st.floats(0, 1), st.floats(-5, 5)), max_size=3)):
        y += height * (t >= where * span)
    for where, height in draw(
        st.lists(st.tuples(st.integers(0, n - 1), st.floats(-50, 50)), max_size=4)
    ):
        y[where] += height
    y += draw(st.floats(-1.0, 1.0)) * t / span
    noise = draw(st.sampled_from([0.0, 0.0, 1e-6, 0.01, 0.1, 1.0]))
    if noise:
        y += np.random.default_rng(draw(st.integers(0, 2**16))).normal(0.0, noise, n)
    return y * 10.0 ** draw(st.sampled_from([0, 0, 0, -300, -30, -6, 6, 30, 300]))


@st.composite
def recordings(draw, *, max_frames: int = 300):
    n = draw(st.integers(0, max_frames))
    times = draw(time_axes(n))
    return times, draw(signals(times))


# --------------------------------------------------------------------------------------------
# beat invariants


def _ordered(first: np.ndarray, second: np.ndarray) -> bool:
    both = np.isfinite(first) & np.isfinite(second)
    return bool(np.all(first[both] <= second[both]))


def check_peaks(peaks: np.ndarray, n: int) -> None:
    assert peaks.ndim == 1 and np.issubdtype(peaks.dtype, np.integer)
    assert np.all(np.diff(peaks) > 0)
    # a peak on the first or last frame is unobserved, never returned
    assert peaks.size == 0 or (peaks[0] > 0 and peaks[-1] < n - 1)


def check_table(table: pd.DataFrame, times: np.ndarray, peaks: np.ndarray) -> None:
    """The documented invariants of a measure_beats table."""
    assert len(table) == peaks.size
    assert table["beat"].tolist() == list(range(1, peaks.size + 1))
    if peaks.size == 0:
        return
    start, end = float(times[0]), float(times[-1])
    for column in ("onset_s", "peak_s", "end_s", "upstroke_50_s", "downstroke_50_s"):
        values = table[column].to_numpy(float)
        defined = values[np.isfinite(values)]
        assert np.all((defined >= start) & (defined <= end)), (column, defined, start, end)
    peak = table["peak_s"].to_numpy(float)
    assert np.all(np.isfinite(peak))
    assert np.all(np.diff(peak) > 0)
    onset, stop = table["onset_s"].to_numpy(float), table["end_s"].to_numpy(float)
    up50 = table["upstroke_50_s"].to_numpy(float)
    down50 = table["downstroke_50_s"].to_numpy(float)
    assert _ordered(onset, peak) and _ordered(peak, stop), table[["onset_s", "peak_s", "end_s"]]
    assert _ordered(up50, peak) and _ordered(peak, down50), table[["upstroke_50_s", "peak_s"]]
    for column in ("time_to_peak_s", "relax_50_s", "relax_90_s", "duration_50_s", "duration_90_s"):
        values = table[column].to_numpy(float)
        assert np.all(values[np.isfinite(values)] >= 0), (column, values)
    ibi = table["ibi_s"].to_numpy(float)
    assert math.isnan(ibi[0]) and np.allclose(ibi[1:], np.diff(peak), rtol=1e-12, atol=0)
    secondary = table["secondary_peak_s"].to_numpy(float)
    flagged = table["secondary_peak"].to_numpy(bool)
    assert np.array_equal(flagged, np.isfinite(secondary))
    assert np.all(secondary[flagged] > peak[flagged]) and np.all(secondary[flagged] <= end)
    for column in ("contraction_velocity_um_s", "relaxation_velocity_um_s"):
        values = table[column].to_numpy(float)
        assert np.all(values[np.isfinite(values)] > 0), column
    assert table["peak_index"].tolist() == sorted(set(table["peak_index"].tolist()))


def check_summary(summary: dict, table: pd.DataFrame, start: float, end: float) -> None:
    """Counts, rate and fractions of summarize_rhythm agree with the beats table."""
    count = len(table)
    assert summary["beat_count"] == count
    ibi = table["ibi_s"].to_numpy(float)
    finite = ibi[np.isfinite(ibi)]
    assert summary["ibi_count"] == finite.size == max(count - 1, 0)
    if count == 0:
        assert summary["beat_rate_bpm"] == 0.0 and summary["rhythm"] == "quiescent"
        assert summary["longest_pause_s"] == pytest.approx(end - start)
    elif count == 1:
        assert summary["beat_rate_bpm"] is None
    else:
        assert summary["beat_rate_bpm"] == pytest.approx(60.0 / finite.mean(), rel=1e-9)
        assert summary["beat_rate_bpm"] > 0
    assert 0.0 <= summary["longest_pause_s"] <= end - start + 1e-9 * max(1.0, abs(end))
    fraction = summary["irregular_fraction"]
    assert fraction is None or 0.0 <= fraction <= 1.0
    assert 0 <= summary["secondary_peak_beats"] <= count
    for key in ("ibi_cv", "sdnn_s", "rmssd_s", "sd1_s", "sd2_s", "alternans_index"):
        assert summary[key] is None or summary[key] >= 0, key
    assert summary["rhythm"] in ("quiescent", "undetermined", "irregular", "regular")


def run_beats(times: np.ndarray, trace: np.ndarray):
    """detect -> measure -> summarize, the way analyze_trace chains them."""
    peaks = detect_beats(trace, times)
    check_peaks(peaks, trace.size)
    table = measure_beats(trace, times, peaks, interpolation="cubic")
    check_table(table, times, peaks)
    if times.size >= 2:
        summary = summarize_rhythm(table, start_s=times[0], end_s=times[-1])
        check_summary(summary, table, float(times[0]), float(times[-1]))
    return peaks, table


def _beatlab_error_only(call):
    """Run `call`; a BeatlabError with a one-line message is an acceptable outcome."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            warnings.simplefilter("ignore", BeatlabWarning)
            return call()
    except BeatlabError as exc:
        message = str(exc)
        assert message and "\n" not in message, message
        return None


# --------------------------------------------------------------------------------------------
# beat detection, measurement and rhythm


@fuzz(100)  # hypothesis's default (was 200; cut for the suite's 5-minute budget)
@given(recordings())
# regressions found by this test, each failed before its fix:
# a flat trace: its smoothed plateau made scipy warn of a zero prominence
@example(recording=(np.arange(4.0), np.full(4, 3.0)))
# values near the float maximum overflowed inside the smoothers (now an InputError)
@example(recording=(np.arange(3.0), np.full(3, 1.79768954e308)))
# a parabola vertex through unevenly spaced samples fell before the 50 % upstroke ...
@example(recording=(np.array([0.0, 4.0, 5.0]), np.array([0.0, 1.0, 0.0])))
# ... or before the onset (its value nearly twice the highest sample)
@example(
    recording=(
        np.array([0.0, 0.0505, 0.0519, 0.0533, 0.0547, 0.0561, 0.0575, 0.0589, 0.0603, 0.0617]),
        np.array([48.0, 53.0, 48.0, 48.0, 48.0, 48.0, 48.0, 48.0, 48.0, 48.0]),
    )
)
# a two-sample step: the bounded vertex still passed the onset by a fraction of a frame
@example(
    recording=(
        0.0021 + np.array([-0.0021, 0.0, 0.00002, 0.00004, 0.00006, 0.00008, 0.0001, 0.00012]),
        np.array([0.98924, 0.99953, 0.99952, 0.99951, 0.9995, 0.99949, 0.99948, 0.99947]),
    )
)
def test_beats_on_any_finite_trace(recording):
    times, trace = recording
    if trace.size and np.max(np.abs(trace)) > MAX_MAGNITUDE:
        with pytest.raises(InputError, match="beyond 1e\\+100"):
            detect_beats(trace, times)
        with pytest.raises(InputError, match="beyond 1e\\+100"):
            measure_beats(trace, times, [])
        return
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a stray numpy or scipy warning is a failure too
        run_beats(times, trace)


@fuzz(40)
@given(
    n=st.integers(0, 12),
    value=st.floats(-MAX_MAGNITUDE, MAX_MAGNITUDE),
    fps=st.floats(0.01, 1e4),
)
def test_beats_on_constant_and_very_short_traces(n, value, fps):
    times = np.arange(n) / fps
    trace = np.full(n, value)
    peaks, table = run_beats(times, trace)
    assert peaks.size == 0 and table.empty  # nothing beats in a flat trace


@fuzz(40)
@given(recordings(max_frames=60), st.data())
def test_beats_refuse_non_finite_input_cleanly(recording, data):
    times, trace = recording
    if trace.size == 0:
        return
    spoiled = trace.copy()
    spoiled[data.draw(st.integers(0, trace.size - 1))] = data.draw(
        st.sampled_from([np.nan, np.inf, -np.inf])
    )
    with pytest.raises(InputError, match="NaN or infinite"):
        detect_beats(spoiled, times)
    with pytest.raises(InputError, match="NaN or infinite"):
        measure_beats(spoiled, times, [])


def test_velocity_on_short_uneven_recording():
    # found by fuzzing: the even grid of clustered times holds fewer points than the frames,
    # and the Savitzky-Golay window sized from the frames did not fit it
    times = np.array([0.0, 0.008, 0.016, 0.024, 0.032, 0.040, 0.048, 0.050, 0.052])
    trace = np.array([0.0, 0.1, 0.5, 1.0, 0.6, 0.3, 0.1, 0.05, 0.0])
    velocity = velocity_trace(trace, times, window_ms=60.0, polyorder=2)
    assert velocity.shape == times.shape and np.all(np.isfinite(velocity))
    assert velocity[2] > 0 and velocity[5] < 0  # rising, then falling


#: Traces within this magnitude must be analysed without any error (velocities and bridged
#: gaps stay far below MAX_MAGNITUDE); beyond MAX_MAGNITUDE an InputError is due; in
#: between either outcome is fine (a velocity may pass the bound).
SAFE_MAGNITUDE = 1e60


@fuzz(80)  # was 120; cut for the suite's 5-minute budget
@given(recordings(max_frames=300), st.data())
def test_analyze_trace_end_to_end(recording, data):
    times, trace = recording
    trace = trace.copy()
    if times.size:  # dropped frames: NaN in both traces, bridged by analyze_trace
        trace[data.draw(st.lists(st.integers(0, times.size - 1), max_size=3))] = np.nan
    scaled = data.draw(st.booleans())
    opd_nm = 0.5 * trace if scaled else np.zeros(times.size)  # never beyond the trace
    pattern = None  # the frames that built the contraction pattern, if any
    choice = data.draw(st.sampled_from(["none", "most contracted", "any"])) if times.size else ""
    if choice == "most contracted":  # as the frame pass picks them
        pattern = np.argsort(np.nan_to_num(trace, nan=-np.inf))[-5:]
    elif choice == "any":
        pattern = np.asarray(
            data.draw(st.lists(st.integers(0, times.size - 1), min_size=1, max_size=5))
        )
    finite = trace[np.isfinite(trace)]
    largest = float(np.max(np.abs(finite))) if finite.size else 0.0
    start = float(times[0]) if times.size else 0.0
    end = float(times[-1]) + 0.01 if times.size else 0.01  # the end of the last frame

    def run():
        return analyze_trace(
            trace, opd_nm, times, velocity=SETTINGS.velocity, beats=SETTINGS.beats,
            rhythm=SETTINGS.rhythm, start_s=start, end_s=end, pattern_frames=pattern,
        )  # fmt: skip

    if finite.size < 3 or largest > MAX_MAGNITUDE:
        with pytest.raises(InputError):
            run()
        return
    result = run() if largest <= SAFE_MAGNITUDE else _beatlab_error_only(run)
    if result is None:
        return
    assert result.velocity_um_s.shape == times.shape
    assert np.all(np.isfinite(result.velocity_um_s))
    table = result.beats
    check_table(table, times, table["peak_index"].to_numpy(int))
    check_summary(result.summary, table, start, end)
    assert result.summary["trace_noise_um"] >= 0
    average = result.average_beat
    assert np.all(average["n_beats"].to_numpy() <= table["onset_s"].notna().sum())


def test_analyze_trace_bridges_a_dropped_frame_in_both_traces():
    # found by the fuzzing above: the frame pass writes NaN into the displacement and the OPD
    # trace of a frame without a finite pixel; only the displacement was bridged, so one such
    # frame made measure_beats refuse the whole recording
    times = np.arange(0.0, 8.0, 0.02)
    trace = 0.2 + np.exp(-0.5 * ((times % 1.0 - 0.5) / 0.08) ** 2)
    trace[[100, 101, 260]] = np.nan
    result = analyze_trace(
        trace, 40.0 * trace, times, velocity=SETTINGS.velocity, beats=SETTINGS.beats,
        rhythm=SETTINGS.rhythm, start_s=0.0, end_s=8.0,
    )  # fmt: skip
    assert len(result.beats) == 8  # peaks at 0.5, 1.5, ..., 7.5 s (the trace's construction)
    assert result.beats["opd_change_nm"].notna().all()
    assert result.beats["opd_change_nm"].to_numpy() == pytest.approx(40.0, rel=0.02)


# --------------------------------------------------------------------------------------------
# frame readers on damaged files

#: A read that takes longer than this counts as a hang (a valid file reads in milliseconds).
READ_TIMEOUT_S = 20.0


@pytest.fixture(scope="module")
def valid_files(tmp_path_factory):
    """A small valid OME-TIFF and .npy of the same simulated frames, as bytes."""
    folder = tmp_path_factory.mktemp("valid")
    sim = simulate_recording(shape_px=(32, 32), duration_s=1, fps=20, rng=0)
    tif = write_simulation(sim, folder / "rec.ome.tif")["recording"]
    npy = folder / "rec.npy"
    np.save(npy, np.asarray(sim.frames, dtype=np.float32))
    with tifffile.TiffFile(tif) as opened:  # where the file's structure lies
        structure = [(p.offset, p.offset + 400) for p in opened.pages]
    expected = np.asarray(sim.frames, dtype=np.float32)
    return {
        "folder": tmp_path_factory.mktemp("damaged"),
        ".ome.tif": (tif.read_bytes(), [(0, 1400), *structure]),
        ".npy": (npy.read_bytes(), [(0, 128)]),
        "frames": expected,
    }


@st.composite
def damages(draw, size: int, structure: list):
    """A truncation point (or None) and byte flips, aimed mostly at the file's structure."""

    def position():
        if draw(st.booleans()):
            lo, hi = draw(st.sampled_from(structure))
            return draw(st.integers(lo, min(hi, size) - 1))
        return draw(st.integers(0, size - 1))

    cut = position() if draw(st.booleans()) else None
    flips = [(position(), draw(st.integers(1, 255))) for _ in range(draw(st.integers(0, 6)))]
    return cut, flips


def _damaged(data: bytes, cut, flips) -> bytes:
    buffer = bytearray(data)
    for where, mask in flips:
        buffer[where] ^= mask
    return bytes(buffer[:cut] if cut is not None else buffer)


def _read_everything(path):
    """Open `path`; read every frame as the pipeline does (chunks), and the last one alone."""
    with open_recording(path) as recording:
        blocks = [block for _, block in recording.chunks(7)]
        last = recording.frame(-1) if recording.n_frames else None
        return blocks, last, recording.n_frames, recording.shape


def _within(seconds: float, call):
    """Run `call` in a thread; return ('ok', value) or ('error', exception); fail on a hang."""
    outcome = {}

    def target():
        try:
            outcome["ok"] = call()
        except BaseException as exc:  # handed to the test thread as it is
            outcome["error"] = exc

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a stray library warning is unexpected too
        warnings.simplefilter("ignore", BeatlabWarning)
        thread = threading.Thread(target=target, daemon=True)
        thread.start()
        thread.join(seconds)
    assert not thread.is_alive(), f"reading took more than {seconds} s (a hang)"
    return ("ok", outcome["ok"]) if "ok" in outcome else ("error", outcome["error"])


#: Exceptions that may escape the readers: none (each kind the fuzzing found is pinned by a
#: reproducer in test_damaged_file_gives_a_beatlab_error below and now gives an InputError).
ESCAPING_TODAY = ()


def check_damaged_read(valid_files, suffix, cut, flips):
    """A damaged copy reads, within the timeout, consistent frames or a one-line beatlab error."""
    data, _ = valid_files[suffix]
    path = valid_files["folder"] / f"damaged{suffix}"
    damaged = _damaged(data, cut, flips)
    path.write_bytes(damaged)
    kind, value = _within(READ_TIMEOUT_S, lambda: _read_everything(path))
    if kind == "error":
        if isinstance(value, BeatlabError):
            message = str(value)
            assert message and "\n" not in message, message
        elif not isinstance(value, ESCAPING_TODAY):
            raise AssertionError(
                f"{type(value).__name__} instead of a beatlab error: cut={cut}, flips={flips}"
            ) from value
        return
    blocks, last, n_frames, shape = value
    frames = np.concatenate(blocks) if blocks else np.zeros((0, *shape), dtype=np.float32)
    assert frames.shape == (n_frames, *shape) and frames.dtype == np.float32
    if n_frames:
        assert np.array_equal(last, frames[-1], equal_nan=True), "frame() and chunks() differ"
    expected = valid_files["frames"]
    if damaged == data:
        assert np.array_equal(frames, expected)
    elif not flips:  # a cut file that still reads must give the frames it holds, unchanged
        assert frames.shape[1:] == expected.shape[1:]
        assert np.array_equal(frames, expected[: frames.shape[0]])


@fuzz(200)
@given(suffix=st.sampled_from([".ome.tif", ".npy"]), data=st.data())
def test_damaged_files_read_cleanly_or_fail_cleanly(valid_files, suffix, data):
    size = len(valid_files[suffix][0])
    cut, flips = data.draw(damages(size, valid_files[suffix][1]))
    check_damaged_read(valid_files, suffix, cut, flips)


# Exact reproducers: (truncation, byte flips as (offset, xor mask)) of the files valid_files
# writes, one per kind of exception that escaped. Each is a defect of beatlab/io, reported.


def _defect(suffix, cut, flips, raises, when):
    """A damage that once let `raises` escape the readers `when`: now an InputError."""
    return pytest.param(suffix, cut, flips, id=f"{raises.__name__}-{when}")


@pytest.mark.parametrize(
    "suffix, cut, flips",
    [
        _defect(".npy", None, [(8, 8)], tokenize.TokenError, "of np.load"),
        _defect(".ome.tif", None, [(88, 234)], RuntimeError, "on open"),
        _defect(".ome.tif", None, [(22, 124)], ZeroDivisionError, "on open"),
        _defect(".ome.tif", None, [(26, 88), (741, 243)], TypeError, "on open"),
        _defect(".ome.tif", None, [(84458, 218)], struct.error, "on open"),
        _defect(".ome.tif", None, [(84353, 46)], ValueError, "on read"),
        _defect(".ome.tif", None, [(21, 122)], MemoryError, "on read"),
    ],
)
def test_damaged_file_gives_a_beatlab_error(valid_files, suffix, cut, flips):
    path = valid_files["folder"] / f"pinned{suffix}"
    path.write_bytes(_damaged(valid_files[suffix][0], cut, flips))
    with pytest.raises(InputError):
        _read_everything(path)


def test_npy_huge_header_error_is_one_line(valid_files):
    path = valid_files["folder"] / "length.npy"
    path.write_bytes(_damaged(valid_files[".npy"][0], None, [(9, 78)]))
    with pytest.raises(InputError) as info:
        _read_everything(path)
    assert "\n" not in str(info.value)


# --------------------------------------------------------------------------------------------
# plate layouts

_LAYOUT_FILES = ("a.tif", "b.tif", "sub/c.tif", "sub/d.ome.tif", "[x]/e.npy")
_WELL_ID = re.compile(r"^[A-Za-z0-9.\-]+(_[A-Za-z0-9.\-]+)*$")
_PROBLEM_LINE = re.compile(r"^  row \d+, column .+: .+$")

cells = st.one_of(
    st.sampled_from(["", " ", "NaN", "nan", "inf", "-inf", "1e400", "-0", "1e-320", "n/a"]),
    st.sampled_from(["a1", "A01", "p24", "Q1", "A25", "A0", "a001", "B 3", "1A", "Ａ1"]),
    st.sampled_from(["uM", "µM", "μM", "nM", "M", "mg/ml", "%", "vehicle", "positive"]),
    st.sampled_from(["true", "YES", "0", "maybe", "opd", "hologram", "whole", "dominant"]),
    st.sampled_from(["../../x", "/etc", "..", ".", "a/b", "~", "~nobody9/x", "*.tif", "**/*"]),
    st.sampled_from(_LAYOUT_FILES),
    st.integers(-(10**30), 10**30).map(str),
    st.floats().map(repr),
    st.text(max_size=12),
    st.text(alphabet=',;\t"\r\n\x00 \u00a0\u200b', max_size=6),
)
column_names = st.one_of(
    st.sampled_from(
        ["path", "well", "plate", "fov", "timepoint", "role", "exclude", "compound",
         "concentration", "unit", "fps", "pixel_size_um", "kind", "measure", "reference",
         "Path", "WELL", "temperature c", "recording_id", "cmax", "minutes_after_dose"]
    ),
    st.text(max_size=8),
)  # fmt: skip


#: Per column, cells that a real layout might hold (mostly valid, with path-like plate,
#: fov and timepoint names that must not leak into the recording ids).
_PLAUSIBLE = {
    "path": st.sampled_from([*_LAYOUT_FILES, "*.tif", "sub/*.tif", "missing.tif"]),
    "plate": st.sampled_from(["", "P1", "plate 2", "../../x", "/etc", "..", ".", "a/b", "~"]),
    "fov": st.sampled_from(["", "1", "f2", "..", "/", "a/b", "../../etc/passwd", "\\x"]),
    "timepoint": st.sampled_from(["", "pre", "post", "..", "a/b", " / "]),
    "role": st.sampled_from(["", "vehicle", "positive", "negative", "sample", "Vehicle"]),
    "exclude": st.sampled_from(["", "no", "yes", "TRUE", "0"]),
    "compound": st.sampled_from(["", "cA", "cB", "c/A"]),
    "concentration": st.sampled_from(["", "0", "1", "10", "0.3", "1e-3"]),
    "unit": st.sampled_from(["", "uM", "nM", "µM", "M"]),
    "fps": st.sampled_from(["", "50", "20.5"]),
    "pixel_size_um": st.sampled_from(["", "0.5"]),
    "cmax": st.sampled_from(["", "2.5"]),
    "kind": st.sampled_from(["", "opd", "phase", "hologram"]),
    "measure": st.sampled_from(["", "whole", "dominant"]),
    "reference": st.sampled_from(["", "a.tif"]),
}


@st.composite
def layout_tables(draw):
    """Column names and rows of cells: wild ones, or plausible ones that often validate."""
    if draw(st.booleans()):  # wild: any names, any cells
        names = draw(st.lists(column_names, min_size=1, max_size=7))
        if draw(st.integers(0, 4)):  # mostly with a path column, so the checks go deep
            names = ["path", *names]
        body = [[draw(cells) for _ in names] for _ in range(draw(st.integers(0, 5)))]
        return names, body
    extra = st.sampled_from(sorted(set(_PLAUSIBLE) - {"path", "well"}))
    names = ["path", "well", *draw(st.lists(extra, unique=True, max_size=5))]
    body = []
    for row in range(draw(st.integers(1, 6))):
        well = f"{'ABCDEFGHIJKLMNOP'[row]}{draw(st.integers(1, 24)):02d}"
        cells_ = [draw(_PLAUSIBLE[n]) if n != "well" else well for n in names]
        if draw(st.integers(0, 9)) == 0:  # now and then a wild cell
            cells_[draw(st.integers(0, len(names) - 1))] = draw(cells)
        body.append(cells_)
    return names, body


def _layout_folder(base):
    for name in _LAYOUT_FILES:
        (base / name).parent.mkdir(parents=True, exist_ok=True)
        (base / name).touch()
    return base


def check_layout_outcome(call):
    """A validated table with sound ids, or an InputError that lists problems."""
    try:
        table = call()
    except InputError as exc:
        message = str(exc)
        head, *lines = message.split("\n")
        assert head.strip(), message
        assert all(_PROBLEM_LINE.match(line) for line in lines), message
        return None
    table = table.table if hasattr(table, "table") else table
    ids = table["recording_id"].tolist()
    assert len(set(ids)) == len(ids)
    for rid in ids:
        assert rid not in ("", ".", "..") and "/" not in rid and "\\" not in rid, rid
        assert rid.startswith("rec-") or _WELL_ID.match(rid), rid
    assert all(isinstance(r, int | np.integer) and r >= 2 for r in table["layout_row"])
    assert table["well"].map(lambda w: w == "" or re.fullmatch(r"[A-P]\d{1,2}", w)).all()
    assert table["role"].isin(["vehicle", "positive", "negative", "sample"]).all()
    assert table["exclude"].dtype == bool
    for path in table["path"]:
        assert os.path.isabs(path), path
    for column in ("concentration", "fps", "pixel_size_um", "cmax"):
        if column in table.columns:
            values = table[column].to_numpy(float)
            assert np.all(np.isnan(values) | (np.isfinite(values) & (values >= 0))), column
    return table


@fuzz(120)
@given(layout_tables())
# regressions found by the fuzzing, each failed before its fix: "~user" of no known user
# (RuntimeError from pathlib), a NUL after "~" (ValueError), and a line break inside a path
# cell, which split its problem over two lines of the message
@example(layout=(["path"], [["~nobody9/x"]]))
@example(layout=(["path", "reference"], [["a.tif", "~\x00"]]))
@example(layout=(["path", "reference"], [["a.tif", "0\r0"]]))
def test_layout_tables_validate_or_list_problems(tmp_path_factory, layout):
    names, body = layout
    base = _layout_folder(tmp_path_factory.getbasetemp() / "layout-files")
    table = (
        pd.DataFrame(body, columns=names, dtype=object)
        if body
        else pd.DataFrame(columns=names, dtype=object)
    )
    check_layout_outcome(lambda: validate_layout(table, base_dir=base))


@fuzz(100)
@given(layout_tables(), st.sampled_from([",", ";", "\t"]), st.booleans(), st.data())
def test_layout_files_read_or_list_problems(tmp_path_factory, layout, sep, bom, data):
    names, body = layout
    base = _layout_folder(tmp_path_factory.getbasetemp() / "layout-files")
    buffer = io.StringIO()
    csv.writer(buffer, delimiter=sep).writerows([names, *body])
    text = buffer.getvalue()
    if data.draw(st.booleans()):  # raw damage: cut anywhere, stray quotes and separators
        cut = data.draw(st.integers(0, len(text)))
        text = text[:cut] + data.draw(st.text(alphabet=',;"\n\r\t\x00x', max_size=4))
    path = base / "layout.csv"
    path.write_bytes(text.encode("utf-8-sig" if bom else "utf-8", errors="surrogatepass"))
    check_layout_outcome(lambda: read_layout(path))
