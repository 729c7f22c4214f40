"""Forward model of an off-axis digital hologram recorded by a camera.

The simulator (:mod:`beatlab.synth`) and the tests use it to make holograms of a known optical
path delay (OPD).
"""

from __future__ import annotations

import numpy as np

from beatlab.errors import ConfigError, InputError

__all__ = ["render_hologram", "render_reference"]


def _check_map(name, value, shape):
    """Return ``value`` as a float64 (Y, X) map of ``shape``, or None."""
    if value is None:
        return None
    arr = np.asarray(value, dtype=np.float64)
    if arr.shape != tuple(shape):
        raise InputError(
            f"{name}: expected an array of shape {tuple(shape)} (the OPD grid), got {arr.shape}; "
            "pass a map on the same grid as opd_nm"
        )
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name}: contains NaN or inf; pass finite values")
    return arr


def _check_optics(
    wavelength_nm, carrier_cycles_per_px, mean_counts, modulation, bit_depth, read_noise_counts
):
    if not np.isfinite(wavelength_nm) or wavelength_nm <= 0:
        raise ConfigError(f"wavelength_nm: must be a positive number of nm, got {wavelength_nm!r}")
    carrier = np.asarray(carrier_cycles_per_px, dtype=np.float64)
    if carrier.shape != (2,) or not np.all(np.isfinite(carrier)):
        raise ConfigError(
            "carrier_cycles_per_px: expected two numbers (fy, fx) in cycles per pixel, "
            f"got {carrier_cycles_per_px!r}"
        )
    if np.any(np.abs(carrier) >= 0.5) or np.hypot(*carrier) == 0:
        raise ConfigError(
            f"carrier_cycles_per_px: each component must lie in (-0.5, 0.5) cycles/px and not "
            f"both be 0, got {tuple(carrier)}; the camera cannot sample finer fringes"
        )
    if not mean_counts > 0:
        raise ConfigError(f"mean_counts: must be > 0, got {mean_counts!r}")
    if not 0 < modulation <= 1:
        raise ConfigError(f"modulation: must lie in (0, 1], got {modulation!r}")
    if bit_depth is not None and (int(bit_depth) != bit_depth or not 1 <= bit_depth <= 32):
        raise ConfigError(f"bit_depth: must be an integer in 1..32 or None, got {bit_depth!r}")
    if not read_noise_counts >= 0:
        raise ConfigError(f"read_noise_counts: must be >= 0, got {read_noise_counts!r}")
    return carrier


def render_hologram(
    opd_nm,
    *,
    wavelength_nm,
    carrier_cycles_per_px=(0.23, 0.17),
    amplitude=None,
    aberration_rad=None,
    reference_tilt_rad=0.0,
    mean_counts=2000.0,
    modulation=0.6,
    shot_noise=True,
    read_noise_counts=0.0,
    bit_depth=12,
    rng=None,
):
    """Render the camera frame of an off-axis hologram of a sample with a known OPD.

    Parameters
    ----------
    opd_nm : array_like, shape (Y, X)
        Optical path delay of the sample in nm. The camera grid equals the OPD grid: pixel
        ``(j, i)`` samples the interference pattern at the centre of OPD pixel ``(j, i)``
        (no magnification change, no pixel integration).
    wavelength_nm : float
        Vacuum wavelength of the light in nm.
    carrier_cycles_per_px : tuple of float, optional
        Spatial frequency ``(fy, fx)`` of the fringes in cycles per pixel (array axis order).
        The side-band holding ``exp(+i phase)`` sits at ``+(fy, fx)`` in the spectrum.
    amplitude : array_like, shape (Y, X), optional
        Transmitted amplitude of the object arm (1 = clear). Default: 1 everywhere.
    aberration_rad : array_like, shape (Y, X), optional
        Phase in rad added to the object arm, e.g. a curvature of the optics present in both
        sample and reference frames.
    reference_tilt_rad : float, optional
        Constant phase (piston) in rad of the reference arm for this frame, e.g. vibration.
    mean_counts : float, optional
        Mean camera counts of a clear pixel.
    modulation : float, optional
        Fringe visibility in (0, 1].
    shot_noise : bool, optional
        Draw Poisson photon noise on the counts.
    read_noise_counts : float, optional
        Standard deviation of Gaussian read noise in counts.
    bit_depth : int or None, optional
        Round to integer counts and clip to ``[0, 2**bit_depth - 1]``; None keeps the exact
        (unclipped, unrounded) intensity.
    rng : numpy.random.Generator, optional
        Source of the noise. Pass one for reproducible frames; when None and noise is
        requested, a fresh ``numpy.random.default_rng()`` is used.

    Returns
    -------
    numpy.ndarray, shape (Y, X), float32
        Camera counts.

    Raises
    ------
    InputError
        ``opd_nm`` is not a finite 2-D array, or a map has the wrong shape.
    ConfigError
        An optical option is out of range.

    Notes
    -----
    Two-beam interference of an object wave ``A exp(i (phi + aberration))`` with a tilted plane
    reference wave (Cuche, Marquet & Depeursinge 2000, Appl Opt 39:4070):
    ``I = mean_counts ((A**2 + 1) / 2 + modulation A cos(phi + aberration
    + 2 pi (fy y + fx x) - reference_tilt_rad))`` with ``phi = 2 pi opd_nm / wavelength_nm``
    and ``(y, x)`` in pixels.

    Examples
    --------
    >>> import numpy as np
    >>> frame = render_hologram(np.zeros((64, 64)), wavelength_nm=632.8, shot_noise=False)
    >>> frame.shape, frame.dtype
    ((64, 64), dtype('float32'))
    """
    opd = np.asarray(opd_nm, dtype=np.float64)
    if opd.ndim != 2 or min(opd.shape) < 2:
        raise InputError(f"opd_nm: expected a 2-D (Y, X) map, got shape {opd.shape}")
    if not np.all(np.isfinite(opd)):
        raise InputError("opd_nm: contains NaN or inf; pass a finite OPD map")
    carrier = _check_optics(
        wavelength_nm, carrier_cycles_per_px, mean_counts, modulation, bit_depth, read_noise_counts
    )
    amp = _check_map("amplitude", amplitude, opd.shape)
    aberration = _check_map("aberration_rad", aberration_rad, opd.shape)

    yy = np.arange(opd.shape[0], dtype=np.float64)[:, None]
    xx = np.arange(opd.shape[1], dtype=np.float64)[None, :]
    phase = opd * (2.0 * np.pi / float(wavelength_nm))
    if aberration is not None:
        phase = phase + aberration
    phase = phase + 2.0 * np.pi * (carrier[0] * yy + carrier[1] * xx) - float(reference_tilt_rad)
    a = np.ones_like(opd) if amp is None else amp
    counts = mean_counts * (0.5 * (a * a + 1.0) + modulation * a * np.cos(phase))

    if shot_noise or read_noise_counts > 0:
        gen = np.random.default_rng() if rng is None else rng
        if shot_noise:
            counts = gen.poisson(np.clip(counts, 0.0, None)).astype(np.float64)
        if read_noise_counts > 0:
            counts = counts + gen.normal(0.0, float(read_noise_counts), counts.shape)
    if bit_depth is not None:
        counts = np.clip(np.rint(counts), 0.0, float(2 ** int(bit_depth) - 1))
    return counts.astype(np.float32)


def render_reference(
    shape,
    *,
    wavelength_nm,
    carrier_cycles_per_px=(0.23, 0.17),
    amplitude=None,
    aberration_rad=None,
    reference_tilt_rad=0.0,
    mean_counts=2000.0,
    modulation=0.6,
    shot_noise=True,
    read_noise_counts=0.0,
    bit_depth=12,
    rng=None,
):
    """Render a sample-free (reference) hologram with the same optics as :func:`render_hologram`.

    Parameters
    ----------
    shape : tuple of int
        Frame shape ``(Y, X)`` in pixels.
    wavelength_nm, carrier_cycles_per_px, amplitude, aberration_rad, reference_tilt_rad, \
mean_counts, modulation, shot_noise, read_noise_counts, bit_depth, rng
        As in :func:`render_hologram`; ``amplitude`` is then the illumination profile.

    Returns
    -------
    numpy.ndarray, shape (Y, X), float32
        Camera counts of a frame with zero sample OPD.

    Raises
    ------
    InputError
        ``shape`` is not two positive integers, or a map has the wrong shape.
    ConfigError
        An optical option is out of range.

    Notes
    -----
    Equal to ``render_hologram(np.zeros(shape), ...)``; the reference of the reference-division
    method of Cuche, Marquet & Depeursinge 2000 (Appl Opt 39:4070).
    """
    dims = tuple(int(n) for n in np.atleast_1d(shape))
    if len(dims) != 2 or min(dims) < 2:
        raise InputError(f"shape: expected two integers (Y, X) >= 2, got {shape!r}")
    return render_hologram(
        np.zeros(dims),
        wavelength_nm=wavelength_nm,
        carrier_cycles_per_px=carrier_cycles_per_px,
        amplitude=amplitude,
        aberration_rad=aberration_rad,
        reference_tilt_rad=reference_tilt_rad,
        mean_counts=mean_counts,
        modulation=modulation,
        shot_noise=shot_noise,
        read_noise_counts=read_noise_counts,
        bit_depth=bit_depth,
        rng=rng,
    )
