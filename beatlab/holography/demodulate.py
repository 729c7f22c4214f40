"""Spatial filtering and demodulation of the side-band of an off-axis hologram."""

from __future__ import annotations

import math
import warnings

import numpy as np
import scipy.fft

from beatlab.errors import BeatlabWarning, ConfigError, InputError

__all__ = ["SidebandFilter", "auto_radius", "radius_from_na"]

#: Fraction of the window radius over which the raised-cosine edge falls from 1 to 0.
DEFAULT_TAPER = 0.25
#: Width, in output pixels, of the roll-off of the frame edges ("auto" edge_px).
_EDGE_OUTPUT_PX = 3.0


def auto_radius(carrier_cycles_per_px):
    """Largest window radius that keeps the side-band clear of the other orders.

    Parameters
    ----------
    carrier_cycles_per_px : tuple of float
        Side-band centre ``(fy, fx)`` in cycles per pixel.

    Returns
    -------
    float
        Radius in cycles per pixel: a third of the distance to the zero order, and at most half
        the distance to the nearest (aliased) twin order.

    Notes
    -----
    The zero order is the autocorrelation of the object band, twice as wide as the side-band:
    a radius of a third of the carrier distance keeps them apart (Cuche, Marquet & Depeursinge
    2000, Appl Opt 39:4070). The spectrum of a sampled frame is periodic, so the twin at
    ``-carrier`` repeats at every integer frequency vector.
    """
    k = np.asarray(carrier_cycles_per_px, dtype=np.float64)
    twin = min(
        float(np.hypot(*(2.0 * k - np.array([ny, nx])))) for ny in (-1, 0, 1) for nx in (-1, 0, 1)
    )
    return min(float(np.hypot(*k)) / 3.0, twin / 2.0)


def radius_from_na(na, *, wavelength_nm, pixel_size_um):
    """Window radius that passes the spatial frequencies a microscope objective transmits.

    Parameters
    ----------
    na : float
        Numerical aperture of the objective (including the immersion index).
    wavelength_nm : float
        Vacuum wavelength in nm.
    pixel_size_um : float
        Sample-plane pixel size in um (camera pitch / magnification).

    Returns
    -------
    float
        Radius in cycles per pixel, ``NA / wavelength * pixel_size``.

    Raises
    ------
    ConfigError
        A value is not positive.

    Notes
    -----
    The coherent transfer function of an objective is a disc of radius NA / wavelength in
    spatial frequency (Goodman, Introduction to Fourier Optics).
    """
    for name, value in (
        ("na", na),
        ("wavelength_nm", wavelength_nm),
        ("pixel_size_um", pixel_size_um),
    ):
        if not (np.isfinite(value) and value > 0):
            raise ConfigError(f"{name}: must be a positive number, got {value!r}")
    return float(na) / (float(wavelength_nm) * 1e-3) * float(pixel_size_um)


def _edge_ramp(n, width):
    """1-D raised-cosine ramp from 0 to 1 over ``width`` samples at both ends."""
    ramp = np.ones(n)
    t = (np.arange(width) + 0.5) / width
    ramp[:width] = 0.5 * (1.0 - np.cos(np.pi * t))
    ramp[n - width :] = ramp[:width][::-1]
    return ramp


def _crop_shape(shape, radius):
    """Crop ``(Yc, Xc)`` holding a disc of ``radius`` cycles/px, in proportion to ``shape``."""
    ny, nx = shape
    need_y = 2.0 * (radius * ny + 1.0)
    need_x = 2.0 * (radius * nx + 1.0)
    g = math.gcd(ny, nx)
    uy, ux = ny // g, nx // g
    k = max(math.ceil(need_y / uy), math.ceil(need_x / ux), 1)
    if k <= g:
        return k * uy, k * ux
    # no exact proportional crop smaller than the frame: round, pixels square to < 1 px
    cy = min(ny, math.ceil(need_y))
    cx = min(nx, max(math.ceil(need_x), round(cy * nx / ny)))
    cy = min(ny, max(cy, round(cx * ny / nx)))
    return cy, cx


class SidebandFilter:
    """Band-pass filter and demodulator for one side-band, planned once per recording.

    Parameters
    ----------
    shape : tuple of int
        Hologram shape ``(Y, X)`` in pixels.
    carrier_cycles_per_px : tuple of float
        Side-band centre ``(fy, fx)`` in cycles per pixel (sub-pixel), e.g. from
        :func:`beatlab.holography.locate_sideband`.
    radius_cycles_per_px : float
        Radius of the window in cycles per pixel.
    taper : float, optional
        Fraction of the radius over which the raised-cosine edge falls from 1 to 0
        (0 gives a hard disc).
    edge_px : "auto" or int, optional
        Width in input pixels of a raised-cosine roll-off applied to the frame edges before
        the FFT; ``"auto"`` takes three output pixels. 0 switches it off.
    trim_px : "auto" or int, optional
        Output pixels dropped at each edge, where the rolled-off frame wraps round;
        ``"auto"``: 1 with a roll-off, else 0.
    workers : int, optional
        Threads for ``scipy.fft``.

    Attributes
    ----------
    output_shape : tuple of int
        Shape ``(Y', X')`` of the demodulated field.
    scale : float
        Output pixel size over input pixel size (band rows over frame rows).
    origin_px : float
        Input-pixel coordinate (along both axes) of output pixel ``(0, 0)``.

    Raises
    ------
    ConfigError
        The window would reach the zero order or leave the spectrum.

    Notes
    -----
    Spatial filtering of the +1 order of an off-axis hologram (Cuche, Marquet & Depeursinge
    2000, Appl Opt 39:4070): the real FFT of the frame is sampled on a grid of ``(Y', X')``
    frequencies centred on the side-band, cropped in proportion to the frame so pixels stay
    square; the frame edges are first rolled off so that the fringes, which do not complete
    whole periods across a frame, do not leak broadband edge ringing of the zero and twin
    orders into the band (the outermost ``edge_px`` input pixels then carry little signal).
    Negative x frequencies come from the Hermitian symmetry of the real FFT. The band
    is weighted by a raised-cosine disc centred on the sub-pixel carrier, inverse transformed
    on the small grid, and the residual sub-pixel carrier is removed by a phase ramp. The
    output samples the field at input pixel ``origin_px + (j, i) * scale``.
    """

    def __init__(
        self,
        shape,
        carrier_cycles_per_px,
        radius_cycles_per_px,
        *,
        taper=DEFAULT_TAPER,
        edge_px="auto",
        trim_px="auto",
        workers=None,
    ):
        ny, nx = (int(n) for n in shape)
        k = np.asarray(carrier_cycles_per_px, dtype=np.float64)
        r = float(radius_cycles_per_px)
        if not (np.isfinite(r) and r > 0):
            raise ConfigError(f"radius: must be a positive number of cycles/px, got {r!r}")
        if r >= float(np.hypot(*k)):
            raise ConfigError(
                f"radius: {r:.4f} cycles/px reaches the zero order (the carrier is "
                f"{np.hypot(*k):.4f} cycles/px away); pass a smaller radius or NA"
            )
        if r > auto_radius(k) * 1.0001:
            warnings.warn(
                f"radius {r:.4f} cycles/px exceeds {auto_radius(k):.4f} (a third of the carrier "
                "distance): the side-band may overlap the zero or twin order",
                BeatlabWarning,
                stacklevel=2,
            )
        if not 0 <= taper <= 1:
            raise ConfigError(f"taper: must lie in [0, 1], got {taper!r}")
        self.shape = (ny, nx)
        self.carrier_cycles_per_px = (float(k[0]), float(k[1]))
        self.radius_cycles_per_px = r
        self.taper = float(taper)
        self.workers = workers
        cy, cx = _crop_shape((ny, nx), r)
        self.scale = ny / cy
        if edge_px == "auto":  # at most what the frame allows (small frames: a narrower edge)
            edge_px = min(math.ceil(_EDGE_OUTPUT_PX * self.scale), max(min(ny, nx) // 4 - 1, 0))
        if int(edge_px) != edge_px or not 0 <= edge_px < min(ny, nx) // 4:
            raise ConfigError(
                f"edge_px: must be 'auto' or an integer in 0..{min(ny, nx) // 4 - 1}, "
                f"got {edge_px!r}"
            )
        self.edge_px = int(edge_px)
        if trim_px == "auto":
            trim_px = 1 if self.edge_px > 0 else 0
        if int(trim_px) != trim_px or not 0 <= trim_px < min(cy, cx) // 4:
            raise ConfigError(
                f"trim_px: must be 'auto' or an integer in 0..{min(cy, cx) // 4 - 1}, "
                f"got {trim_px!r}"
            )
        b = self.trim_px = int(trim_px)
        self.output_shape = (cy - 2 * b, cx - 2 * b)
        self.origin_px = b * self.scale
        self._keep = (slice(b, cy - b), slice(b, cx - b))
        self._apod = None
        if self.edge_px > 0:
            self._apod = (
                _edge_ramp(ny, self.edge_px)[:, None] * _edge_ramp(nx, self.edge_px)[None, :]
            ).astype(np.float32)

        # integer bin of the carrier and its sub-bin residual
        by, bx = k[0] * ny, k[1] * nx
        iy, ix = round(by), round(bx)
        dy, dx = by - iy, bx - ix
        uy = np.rint(scipy.fft.fftfreq(cy) * cy).astype(np.int64)[:, None]
        ux = np.rint(scipy.fft.fftfreq(cx) * cx).astype(np.int64)[None, :]
        # distance from the sub-pixel carrier in cycles per (input) pixel
        rho = np.hypot((uy - dy) / ny, (ux - dx) / nx)
        edge = r * (1.0 - self.taper)
        window = np.ones_like(rho)
        if self.taper > 0:
            t = np.clip((rho - edge) / (r - edge), 0.0, 1.0)
            window = 0.5 * (1.0 + np.cos(np.pi * t))
        window[rho > r] = 0.0
        # amplitude in camera counts: undo the size change of the inverse transform
        self._window = (window * (cy * cx) / (ny * nx)).astype(np.float32)

        rows = (iy + uy) % ny
        cols = (ix + ux) % nx
        mirror = cols > nx // 2
        rows_h = np.where(mirror, (-rows) % ny, rows)
        cols_h = np.where(mirror, (nx - cols) % nx, cols)
        nxh = nx // 2 + 1
        self._flat = (rows_h * nxh + cols_h).astype(np.intp)
        self._mirror = mirror if mirror.any() else None
        # broadcast index grids of the (rows, cols) so the masks are (cy, cx)
        if self._mirror is not None:
            self._mirror = np.broadcast_to(self._mirror, (cy, cx)).copy()
        self._flat = np.broadcast_to(self._flat, (cy, cx)).copy()
        yo = np.arange(cy)[:, None] / cy
        xo = np.arange(cx)[None, :] / cx
        self._ramp = np.exp(-2j * np.pi * (dy * yo + dx * xo))[self._keep].astype(np.complex64)
        self._band_shape = (cy, cx)

    def _filter_spectrum(self, spectrum_half):
        band = np.take(spectrum_half.reshape(-1), self._flat)
        if self._mirror is not None:
            np.conjugate(band, out=band, where=self._mirror)
        band *= self._window
        field = scipy.fft.ifft2(band, workers=self.workers, overwrite_x=True)
        return field[self._keep] * self._ramp

    def demodulate(self, hologram):
        """Complex field of the side-band of one hologram frame.

        Parameters
        ----------
        hologram : array_like, shape (Y, X)
            Raw hologram (camera counts), any real dtype.

        Returns
        -------
        numpy.ndarray, shape (Y', X'), complex64
            Demodulated field; its amplitude is in camera counts (modulation x amplitude x
            mean counts / 2 for the forward model of :func:`render_hologram`).

        Raises
        ------
        InputError
            The frame shape differs from the planned one.
        """
        frame = np.asarray(hologram)
        if frame.shape != self.shape:
            raise InputError(
                f"hologram: expected a frame of shape {self.shape} like the first frame, got "
                f"{frame.shape}; all frames of a recording must have the same size"
            )
        if self._apod is not None:
            frame = np.multiply(frame, self._apod, dtype=np.float32)  # new array, input kept
        elif frame.dtype != np.float32:
            frame = frame.astype(np.float32)
        spectrum = scipy.fft.rfft2(frame, workers=self.workers)
        return self._filter_spectrum(spectrum)

    def band_limit(self, field, *, carrier_cycles_per_px=None):
        """Pass a complex field on the camera grid through the same window, onto the output grid.

        The field is treated as the object wave carried by a side-band: it is modulated by the
        carrier, filtered exactly as :meth:`demodulate` filters a hologram and returned on the
        output grid. Used to compare a reconstruction with a known truth.

        Parameters
        ----------
        field : array_like, shape (Y, X), complex
            Object field, e.g. ``exp(1j * phase_rad)``.
        carrier_cycles_per_px : tuple of float, optional
            Carrier ``(fy, fx)`` that carries the field (the true one of a simulated
            hologram); default the filter's own centre.

        Returns
        -------
        numpy.ndarray, shape (Y', X'), complex64
            The band-limited field, scaled like :meth:`demodulate` (times 1, not counts).

        Raises
        ------
        InputError
            The field shape differs from the planned one.
        """
        obj = np.asarray(field, dtype=np.complex128)
        if obj.shape != self.shape:
            raise InputError(f"field: expected shape {self.shape}, got {obj.shape}")
        ny, nx = self.shape
        yy = np.arange(ny)[:, None]
        xx = np.arange(nx)[None, :]
        k = self.carrier_cycles_per_px if carrier_cycles_per_px is None else carrier_cycles_per_px
        carried = obj * np.exp(2j * np.pi * (k[0] * yy + k[1] * xx))
        if self._apod is not None:
            carried = carried * self._apod
        full = scipy.fft.fft2(carried, workers=self.workers)
        band = np.take(full.reshape(-1), self._full_flat()) * self._window
        out = scipy.fft.ifft2(band, workers=self.workers)[self._keep] * self._ramp
        return out.astype(np.complex64)

    def _full_flat(self):
        ny, nx = self.shape
        cy, cx = self._band_shape
        k = self.carrier_cycles_per_px
        uy = np.rint(scipy.fft.fftfreq(cy) * cy).astype(np.int64)[:, None]
        ux = np.rint(scipy.fft.fftfreq(cx) * cx).astype(np.int64)[None, :]
        rows = (round(k[0] * ny) + uy) % ny
        cols = (round(k[1] * nx) + ux) % nx
        return np.broadcast_to(rows * nx + cols, (cy, cx))
