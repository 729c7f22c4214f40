"""Spatial maps of contraction over a grid of square tiles, and propagation of the beat onset.

The per-frame pass reduces each frame's displacement-magnitude map to one mean per tile
(:func:`beatlab.signals.maps.tile_labels` + :func:`~beatlab.signals.maps.tile_means`);
:func:`build_maps` turns those tile traces and the beats of the whole mask into maps of peak
displacement, noise, beating and onset delay, and :func:`estimate_propagation` fits a plane to
the onset delays to tell whether a travelling contraction wave is resolved.

Positions are in um from the top-left corner of the field: pixel ``(row, col)`` covers
``[col, col + 1) x [row, row + 1)`` pixel pitches, so tile ``(iy, ix)`` has its centre at
``((ix + 0.5) * tile_um, (iy + 0.5) * tile_um)`` as ``(x, y)``, with y pointing down the rows.
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from beatlab.beats.crossings import level_crossing
from beatlab.errors import BeatlabWarning, ConfigError, InputError

__all__ = ["build_maps", "estimate_propagation"]

#: Scale factor that turns a median absolute deviation into a Gaussian standard deviation.
_MAD_TO_SD = 1.4826
#: Level of the upstroke crossing that times a tile's onset, as a fraction of its amplitude.
_ONSET_FRACTION = 0.1
#: Default smoothing width of the tile traces, as a fraction of the median global rise time.
_SMOOTH_FRACTION_OF_RISE = 0.1
#: Residuals beyond this many robust SDs are rejected before the plane is refitted.
_OUTLIER_SDS = 3.0
#: Fewest resting frames needed to estimate a tile's rest level and noise.
_MIN_REST_FRAMES = 3


def _check_positive(name, value, error=ConfigError):
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise error(f"{name} must be a positive finite number, got {value!r}; pass a value > 0")
    return value


def _quiet_nanmedian(a, axis):
    """``np.nanmedian`` without the warning for all-NaN slices (they give NaN, as intended)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(a, axis=axis)


def _moving_average(a, width):
    """Centred NaN-aware moving average along axis 0 over ``width`` (odd) samples."""
    if width <= 1:
        return a.copy()
    finite = np.isfinite(a)
    vals = np.where(finite, a, 0.0)
    half = width // 2
    pad = ((half + 1, half), (0, 0))
    csum = np.cumsum(np.pad(vals, pad), axis=0)
    ccount = np.cumsum(np.pad(finite.astype(np.float64), pad), axis=0)
    sums = csum[width:] - csum[:-width]
    counts = ccount[width:] - ccount[:-width]
    out = np.full(a.shape, np.nan)
    np.divide(sums, counts, out=out, where=counts > 0)
    return out


def _check_inputs(tile_traces, times_s, grid_shape, onsets_s, peaks_s, rest_frames, coverage):
    traces = np.asarray(tile_traces, dtype=np.float64)
    if traces.ndim != 2:
        raise InputError(
            f"tile_traces must be 2-D (T, n_tiles), got shape {traces.shape}; stack the "
            "per-frame tile_means() results"
        )
    n_frames, n_tiles = traces.shape
    times = np.asarray(times_s, dtype=np.float64)
    if times.shape != (n_frames,) or n_frames < 3:
        raise InputError(
            f"times_s must have one time per frame ({n_frames} frames, at least 3), got "
            f"shape {times.shape}"
        )
    if not (np.all(np.isfinite(times)) and np.all(np.diff(times) > 0)):
        raise InputError("times_s must be finite and strictly increasing seconds")
    try:
        ny, nx = (int(g) for g in grid_shape)
    except (TypeError, ValueError):
        raise InputError(f"grid_shape must be (ny, nx), got {grid_shape!r}") from None
    if ny * nx != n_tiles or ny < 1 or nx < 1:
        raise InputError(
            f"grid_shape {grid_shape!r} holds {ny * nx} tiles but tile_traces has {n_tiles} "
            "columns; pass tile_grid_shape(frame_shape, tile_px=...)"
        )
    onsets = np.asarray(onsets_s, dtype=np.float64).ravel()
    peaks = np.asarray(peaks_s, dtype=np.float64).ravel()
    if onsets.shape != peaks.shape:
        raise InputError(
            f"onsets_s and peaks_s must have one entry per beat, got {onsets.size} onsets "
            f"and {peaks.size} peaks"
        )
    if not (np.all(np.isfinite(onsets)) and np.all(np.isfinite(peaks))):
        raise InputError("onsets_s and peaks_s must be finite; drop beats without an onset")
    if np.any(peaks <= onsets):
        raise InputError("every peaks_s must come after its onsets_s; pass beats in pairs")
    if onsets.size > 1 and np.any(np.diff(onsets) <= 0):
        raise InputError("onsets_s must be strictly increasing; pass beats in time order")
    rest = np.asarray(rest_frames)
    if rest.shape != (n_frames,) or rest.dtype != bool:
        raise InputError(
            f"rest_frames must be a boolean array of {n_frames} frames, got dtype {rest.dtype} "
            f"shape {rest.shape}"
        )
    cov = np.asarray(coverage, dtype=np.float64)
    if cov.shape != (n_tiles,) or not np.all(np.isfinite(cov)) or np.any(cov < 0):
        raise InputError(
            f"tile_coverage must be {n_tiles} finite shares >= 0 (mask pixels / tile pixels), "
            f"got shape {cov.shape}"
        )
    return traces, times, (ny, nx), onsets, peaks, rest, cov


def build_maps(
    tile_traces,
    times_s,
    *,
    grid_shape,
    tile_um,
    onsets_s,
    peaks_s,
    rest_frames,
    tile_coverage,
    min_snr=4.0,
    min_coverage=0.25,
    smooth_s=None,
    min_span_frames=2.0,
    min_r2=0.5,
    min_tiles=6,
):
    """Maps of peak displacement, noise, beating and onset delay over a tile grid.

    Parameters
    ----------
    tile_traces : array_like, shape (T, n_tiles)
        Mean displacement magnitude of each tile in each frame, in um (NaN allowed).
    times_s : array_like, shape (T,)
        Frame times in seconds, strictly increasing.
    grid_shape : tuple of int
        ``(ny, nx)`` with ``ny * nx == n_tiles``; tiles are row-major.
    tile_um : float
        Side of a tile in um (``tile_px * pixel_size_um``).
    onsets_s, peaks_s : array_like, shape (n_beats,)
        Onset (10 % upstroke crossing) and peak times of the global beats in seconds; may be
        empty.
    rest_frames : array_like of bool, shape (T,)
        Frames known to be at rest (relaxed); they give each tile's rest level and noise.
    tile_coverage : array_like, shape (n_tiles,)
        Share of each tile's pixels inside the cell mask, in [0, 1].
    min_snr : float, optional
        A tile beats when its peak stands at least this many noise SDs above its rest level.
    min_coverage : float, optional
        Tiles with a smaller coverage are not assessed (NaN in every map).
    smooth_s : float, optional
        Width in seconds of the centred moving average applied to the tile traces before the
        peak and the onset crossing are read; None takes 10 % of the median global rise time
        (``peaks_s - onsets_s``), which leaves the shape of the upstroke intact while averaging
        down frame noise at high frame rates.
    min_span_frames, min_r2, min_tiles : optional
        Passed to :func:`estimate_propagation`.

    Returns
    -------
    dict
        ``peak_displacement_um`` (ny, nx): median over beats of the tile's peak minus its rest
        level; ``noise_um`` (ny, nx): robust SD (1.4826 x MAD) of the tile at rest;
        ``beating`` (ny, nx) bool: peak displacement >= ``min_snr`` x noise (and > 0);
        ``onset_delay_s`` (ny, nx): median over beats of the tile's own 10 % upstroke
        crossing minus the global onset, NaN where not beating; ``assessed`` (ny, nx) bool:
        the tiles with enough coverage and rest frames; ``beating_area_fraction`` (float):
        coverage-weighted share of the assessed mask area that beats, 0 with no beats, NaN
        when no tile is assessed; ``propagation`` (dict): see :func:`estimate_propagation`.
        Maps are float64 with NaN where a value is undefined.

    Raises
    ------
    InputError
        Shapes or times are inconsistent.
    ConfigError
        An option is out of range.

    Warns
    -----
    BeatlabWarning
        Fewer than 3 resting frames: nothing can be assessed.

    Notes
    -----
    For beat k with rise ``r = peak - onset``, the tile's peak is the maximum of its smoothed
    trace between ``onset - r`` (not before the previous peak) and ``peak + r`` (not after the
    next onset); its onset is the last upward crossing, before that maximum, of the rest level
    plus 10 % of that beat's amplitude, interpolated linearly between frames (the landmark
    rule of the whole-mask beats, applied per tile). The rest level is the median and the
    noise the scaled median absolute deviation of the raw trace over the resting frames
    (Hampel 1974, J Am Stat Assoc 69:383; Rousseeuw & Croux 1993, J Am Stat Assoc 88:1273).
    The coverage weighting treats partial edge tiles as full tiles.
    """
    traces, times, (ny, nx), onsets, peaks, rest, cov = _check_inputs(
        tile_traces, times_s, grid_shape, onsets_s, peaks_s, rest_frames, tile_coverage
    )
    tile_um = _check_positive("tile_um", tile_um, InputError)
    min_snr = _check_positive("min_snr", min_snr)
    min_coverage = float(min_coverage)
    if not (math.isfinite(min_coverage) and 0.0 <= min_coverage <= 1.0):
        raise ConfigError(f"min_coverage must be a share in [0, 1], got {min_coverage!r}")
    if smooth_s is not None:
        smooth_s = float(smooth_s)
        if not (math.isfinite(smooth_s) and smooth_s >= 0):
            raise ConfigError(f"smooth_s must be >= 0 seconds or None, got {smooth_s!r}")
    _check_fit_options(min_span_frames, min_r2, min_tiles)
    n_tiles = traces.shape[1]
    dt = float(np.median(np.diff(times)))

    rest_idx = np.flatnonzero(rest)
    if rest_idx.size < _MIN_REST_FRAMES:
        warnings.warn(
            f"rest_frames marks {rest_idx.size} frames, fewer than {_MIN_REST_FRAMES}: "
            "no tile can be assessed; record longer pauses between beats",
            BeatlabWarning,
            stacklevel=2,
        )
    candidates = np.flatnonzero(cov >= min_coverage)
    rest_vals = traces[np.ix_(rest_idx, candidates)]
    enough_rest = np.isfinite(rest_vals).sum(axis=0) >= _MIN_REST_FRAMES
    cols = candidates[enough_rest]
    assessed = np.zeros(n_tiles, dtype=bool)
    assessed[cols] = True

    rest_level = np.full(n_tiles, np.nan)
    noise = np.full(n_tiles, np.nan)
    if cols.size:
        sub = rest_vals[:, enough_rest]
        level = np.nanmedian(sub, axis=0)
        rest_level[cols] = level
        noise[cols] = _MAD_TO_SD * np.nanmedian(np.abs(sub - level), axis=0)

    n_beats = onsets.size
    amps = np.full((n_beats, n_tiles), np.nan)
    delays = np.full((n_beats, n_tiles), np.nan)
    if n_beats and cols.size:
        rises = peaks - onsets
        width_s = (
            _SMOOTH_FRACTION_OF_RISE * float(np.median(rises)) if smooth_s is None else smooth_s
        )
        width = max(1, round(width_s / dt))
        width += 1 - width % 2
        half = width // 2
        base = rest_level[cols]
        for k in range(n_beats):
            lo_t = onsets[k] - rises[k]
            if k > 0:
                lo_t = max(lo_t, peaks[k - 1])
            hi_t = peaks[k] + rises[k]
            if k + 1 < n_beats:
                hi_t = min(hi_t, onsets[k + 1])
            i0 = int(np.searchsorted(times, lo_t, side="left"))
            i1 = int(np.searchsorted(times, hi_t, side="right"))
            if i1 - i0 < 2:
                continue
            # smoothing only the beat window (plus a margin) keeps memory per beat, not per
            # recording, and gives the same values as smoothing the whole trace
            a0, a1 = max(0, i0 - half), min(times.size, i1 + half)
            win = _moving_average(traces[a0:a1, cols], width)[i0 - a0 : i1 - a0]
            finite = np.isfinite(win)
            ipk = np.argmax(np.where(finite, win, -np.inf), axis=0)
            has_peak = finite.any(axis=0)
            pk = np.where(has_peak, win[ipk, np.arange(win.shape[1])], np.nan)
            amp = pk - base
            level = base + _ONSET_FRACTION * amp
            seg_times = times[i0:i1]
            amps[k, cols] = amp
            for c in np.flatnonzero(has_peak & (amp > 0)):
                # the whole-mask landmark rule, on the tile's own trace
                t_cross = level_crossing(
                    win[:, c], seg_times, level[c], start=0, stop=ipk[c], direction="up"
                )
                delays[k, cols[c]] = t_cross - onsets[k]

    peak_disp = _quiet_nanmedian(amps, axis=0) if n_beats else np.full(n_tiles, np.nan)
    with np.errstate(invalid="ignore"):
        beating = assessed & (peak_disp > 0) & (peak_disp >= min_snr * noise)
    onset_delay = np.full(n_tiles, np.nan)
    if n_beats and beating.any():
        onset_delay[beating] = _quiet_nanmedian(delays[:, beating], axis=0)

    if n_beats == 0:
        fraction = 0.0
    elif not assessed.any() or cov[assessed].sum() == 0:
        fraction = float("nan")
    else:
        fraction = float(cov[beating].sum() / cov[assessed].sum())

    delay_map = onset_delay.reshape(ny, nx)
    if n_beats == 0:
        propagation = _unresolved(0, "no beats")
    else:
        propagation = estimate_propagation(
            delay_map,
            tile_um=tile_um,
            frame_interval_s=dt,
            min_span_frames=min_span_frames,
            min_r2=min_r2,
            min_tiles=min_tiles,
        )
    return {
        "peak_displacement_um": peak_disp.reshape(ny, nx),
        "noise_um": noise.reshape(ny, nx),
        "beating": beating.reshape(ny, nx),
        "onset_delay_s": delay_map,
        "assessed": assessed.reshape(ny, nx),
        "beating_area_fraction": fraction,
        "propagation": propagation,
    }


def _unresolved(n_tiles, reason, *, r2=None, span_s=None):
    return {
        "resolved": False,
        "speed_cm_s": None,
        "direction_deg": None,
        "r2": r2,
        "delay_span_s": span_s,
        "n_tiles": int(n_tiles),
        "reason": reason,
    }


def _check_fit_options(min_span_frames, min_r2, min_tiles):
    min_span_frames = float(min_span_frames)
    if not (math.isfinite(min_span_frames) and min_span_frames >= 0):
        raise ConfigError(f"min_span_frames must be >= 0, got {min_span_frames!r}")
    min_r2 = float(min_r2)
    if not (math.isfinite(min_r2) and min_r2 <= 1.0):
        raise ConfigError(f"min_r2 must be a number <= 1, got {min_r2!r}")
    if isinstance(min_tiles, bool) or int(min_tiles) != min_tiles or min_tiles < 3:
        raise ConfigError(
            f"min_tiles must be an integer >= 3 (a plane has 3 terms), got {min_tiles!r}"
        )
    min_tiles = int(min_tiles)
    return min_span_frames, min_r2, min_tiles


def _fit_plane(design, t):
    coef, *_ = np.linalg.lstsq(design, t, rcond=None)
    return coef, t - design @ coef


def estimate_propagation(
    onset_delay_s, *, tile_um, frame_interval_s, min_span_frames=2.0, min_r2=0.5, min_tiles=6
):
    """Fit a plane to onset delays and report the wave speed and direction when resolved.

    Parameters
    ----------
    onset_delay_s : array_like, shape (ny, nx)
        Onset delay of each tile in seconds, NaN where the tile does not beat.
    tile_um : float
        Side of a tile in um; tile ``(iy, ix)`` has its centre at
        ``((ix + 0.5) * tile_um, (iy + 0.5) * tile_um)``.
    frame_interval_s : float
        Time between frames in seconds.
    min_span_frames : float, optional
        The delay span predicted by the plane across the fitted tiles must exceed this many
        frame intervals.
    min_r2 : float, optional
        The plane must explain at least this share of the delay variance.
    min_tiles : int, optional
        Fewest tiles with a delay (after outlier rejection) for a fit.

    Returns
    -------
    dict
        ``resolved`` (bool); ``speed_cm_s`` (float or None); ``direction_deg`` (float or None,
        direction of travel in [0, 360): 0 = +x, 90 = +y, i.e. down the image rows); ``r2``
        (float or None); ``delay_span_s`` (float or None: max minus min of the fitted plane
        over the fitted tiles); ``n_tiles`` (int, tiles with a delay); ``reason`` (str, why it
        is not resolved, or ``"resolved"``). Every value is a plain Python scalar, ready for
        JSON.

    Raises
    ------
    InputError
        ``onset_delay_s`` is not 2-D or ``tile_um`` / ``frame_interval_s`` are not positive.
    ConfigError
        An option is out of range.

    Notes
    -----
    Least-squares plane ``t = a + b x + c y`` through the delays of the tile centres, one pass
    of rejecting residuals beyond 3 robust SDs (1.4826 x MAD) and refitting; speed is
    ``1 / |(b, c)|`` and the direction that of ``(b, c)`` (Bayly et al. 1998, IEEE Trans Biomed
    Eng 45:563, local plane fits of activation times). Mechanical onset follows electrical
    activation with a cell-dependent lag and conduction at tens of cm/s crosses a field of
    view in a few milliseconds, so at frame rates of 100 fps or less the delays are usually
    below the frame interval and the result is ``resolved=False``.
    """
    d = np.asarray(onset_delay_s, dtype=np.float64)
    if d.ndim != 2:
        raise InputError(f"onset_delay_s must be a 2-D (ny, nx) map, got shape {d.shape}")
    tile_um = _check_positive("tile_um", tile_um, InputError)
    dt = _check_positive("frame_interval_s", frame_interval_s, InputError)
    min_span_frames, min_r2, min_tiles = _check_fit_options(min_span_frames, min_r2, min_tiles)

    iy, ix = np.nonzero(np.isfinite(d))
    n = int(iy.size)
    if n < min_tiles:
        return _unresolved(n, f"only {n} beating tiles with an onset delay (need {min_tiles})")
    t = d[iy, ix]
    design = np.column_stack([np.ones(n), (ix + 0.5) * tile_um, (iy + 0.5) * tile_um])
    if np.linalg.matrix_rank(design) < 3:
        return _unresolved(n, "beating tiles lie on one line, so a plane is undetermined")
    coef, resid = _fit_plane(design, t)
    scale = _MAD_TO_SD * float(np.median(np.abs(resid - np.median(resid))))
    if scale > 0:
        keep = np.abs(resid - np.median(resid)) <= _OUTLIER_SDS * scale
        if min_tiles <= keep.sum() < n and np.linalg.matrix_rank(design[keep]) == 3:
            design, t = design[keep], t[keep]
            coef, resid = _fit_plane(design, t)
    pred = design @ coef
    span = float(pred.max() - pred.min())
    ss_tot = float(np.sum((t - t.mean()) ** 2))
    r2 = 1.0 - float(np.sum(resid**2)) / ss_tot if ss_tot > 0 else None
    fps = 1.0 / dt
    if span <= min_span_frames * dt:
        return _unresolved(
            n,
            f"delays below the frame interval (not resolved at {fps:.0f} fps): the fitted "
            f"onset-delay span {span * 1e3:.2f} ms is under {min_span_frames:g} frame "
            f"intervals ({min_span_frames * dt * 1e3:.2f} ms)",
            r2=r2,
            span_s=span,
        )
    if r2 is None or r2 < min_r2:
        shown = "undefined" if r2 is None else f"{r2:.2f}"
        return _unresolved(
            n,
            f"a plane does not explain the onset delays (r2 = {shown} < {min_r2:g})",
            r2=r2,
            span_s=span,
        )
    b, c = float(coef[1]), float(coef[2])
    return {
        "resolved": True,
        "speed_cm_s": 1e-4 / math.hypot(b, c),
        "direction_deg": math.degrees(math.atan2(c, b)) % 360.0,
        "r2": r2,
        "delay_span_s": span,
        "n_tiles": n,
        "reason": "resolved",
    }
