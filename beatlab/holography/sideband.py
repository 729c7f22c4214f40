"""Locate the +1 interference order (side-band) of an off-axis hologram in its spectrum."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft

from beatlab.errors import ConfigError, InputError

__all__ = ["Sideband", "locate_sideband"]

#: Peak-to-median ratio of the spectrum magnitude below which no side-band is accepted.
_MIN_PEAK_RATIO = 20.0


@dataclass(frozen=True)
class Sideband:
    """A side-band found in a hologram spectrum.

    Attributes
    ----------
    carrier_cycles_per_px : tuple of float
        Sub-pixel centre ``(fy, fx)`` of the side-band in cycles per pixel, always in the
        half-plane ``fx > 0``, or ``fy > 0`` when the carrier lies within half a frequency bin
        of the y axis; its twin is at minus this.
    peak_ratio : float
        Spectrum magnitude at the peak over the median magnitude of the searched region.
    """

    carrier_cycles_per_px: tuple[float, float]
    peak_ratio: float

    @property
    def distance_cycles_per_px(self) -> float:
        """Distance of the side-band from the zero order in cycles per pixel."""
        return float(np.hypot(*self.carrier_cycles_per_px))


def _parabolic_offset(lo, mid, hi):
    """Sub-sample offset of the vertex of a parabola through three samples, in [-0.5, 0.5]."""
    denom = lo - 2.0 * mid + hi
    if denom >= 0:
        return 0.0
    return float(np.clip(0.5 * (lo - hi) / denom, -0.5, 0.5))


def locate_sideband(hologram, *, exclusion_cycles_per_px=0.04, workers=None):
    """Find the side-band of an off-axis hologram to sub-pixel precision.

    Parameters
    ----------
    hologram : array_like, shape (Y, X)
        One raw hologram frame (camera counts).
    exclusion_cycles_per_px : float, optional
        Radius of the zero-order exclusion zone around the origin of the spectrum in cycles
        per pixel; the side-band is the strongest peak outside it.
    workers : int, optional
        Threads for ``scipy.fft``.

    Returns
    -------
    Sideband
        The side-band in the half-plane of positive x frequency; the carrier may point in any
        direction, its twin order is at the opposite frequency.

    Raises
    ------
    InputError
        The frame is not 2-D, not finite, or its spectrum has no distinct peak outside the
        zero order (the file does not hold raw off-axis holograms).
    ConfigError
        ``exclusion_cycles_per_px`` is out of range.

    Notes
    -----
    The frame minus its mean is apodised with a separable Hann window to keep the leakage of
    the zero order and of the frame edges away from the side-band; the peak of the magnitude
    of its real FFT outside the exclusion zone is refined by a parabola through the
    logarithm of the three samples around it along each axis (Gaussian peak interpolation).
    The side-band is the image of the carrier frequency of the fringes (Cuche, Marquet &
    Depeursinge 2000, Appl Opt 39:4070).
    """
    frame = np.asarray(hologram)
    if frame.ndim != 2 or min(frame.shape) < 8:
        raise InputError(
            f"hologram: expected one 2-D (Y, X) frame of at least 8x8 pixels, got shape "
            f"{frame.shape}"
        )
    if not 0 < exclusion_cycles_per_px < 0.45:
        raise ConfigError(
            f"exclusion_cycles_per_px: must lie in (0, 0.45) cycles/px, got "
            f"{exclusion_cycles_per_px!r}"
        )
    frame = frame.astype(np.float64)
    if not np.all(np.isfinite(frame)):
        raise InputError("hologram: contains NaN or inf; pass raw camera frames")
    ny, nx = frame.shape
    apod = np.hanning(ny)[:, None] * np.hanning(nx)[None, :]
    mag = np.abs(scipy.fft.rfft2((frame - frame.mean()) * apod, workers=workers))
    fy = scipy.fft.fftfreq(ny)[:, None]
    fx = scipy.fft.rfftfreq(nx)[None, :]
    radius = np.hypot(fy, fx)
    # two bins more than asked, so the tail of the zero order never wins at the rim
    rim = exclusion_cycles_per_px + 2.0 / min(ny, nx)
    search = (radius > exclusion_cycles_per_px) & (np.abs(fy) < 0.5) & (fx < 0.5)
    searched = np.where(search, mag, 0.0)
    iy, ix = np.unravel_index(int(np.argmax(searched)), mag.shape)
    median = float(np.median(mag[search]))
    peak = float(mag[iy, ix])
    ratio = peak / median if median > 0 else (np.inf if peak > 0 else 0.0)
    if ratio < _MIN_PEAK_RATIO or radius[iy, ix] <= rim:
        raise InputError(
            "hologram: no side-band found (searched spatial frequencies "
            f"{exclusion_cycles_per_px:g} to 0.5 cycles/px of a {ny}x{nx} frame; strongest "
            f"peak {ratio:.1f}x the median at {radius[iy, ix]:.3f} cycles/px, need "
            f"{_MIN_PEAK_RATIO:g}x away from the zero "
            "order); check that the file holds raw off-axis holograms, or pass kind=phase or "
            "kind=opd"
        )
    logmag = np.log(np.maximum(mag, np.finfo(np.float64).tiny))
    dy = _parabolic_offset(logmag[(iy - 1) % ny, ix], logmag[iy, ix], logmag[(iy + 1) % ny, ix])
    if 0 < ix < mag.shape[1] - 1:
        dx = _parabolic_offset(logmag[iy, ix - 1], logmag[iy, ix], logmag[iy, ix + 1])
    elif ix == 0:
        # column fx = 0: its left neighbour is the conjugate mirror of row -iy, column 1
        dx = _parabolic_offset(logmag[(-iy) % ny, 1], logmag[iy, 0], logmag[iy, 1])
    else:
        dx = 0.0
    carrier_y = (fy[iy, 0] * ny + dy) / ny
    carrier_x = (fx[0, ix] * nx + dx) / nx
    near_y_axis = abs(carrier_x) < 0.5 / nx
    if (near_y_axis and carrier_y < 0) or (not near_y_axis and carrier_x < 0):
        carrier_y, carrier_x = -carrier_y, -carrier_x
    return Sideband(
        carrier_cycles_per_px=(float(carrier_y), float(carrier_x)), peak_ratio=float(ratio)
    )
