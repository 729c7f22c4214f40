"""Background and aberration correction of demodulated holographic fields."""

from __future__ import annotations

import numpy as np

from beatlab.errors import ConfigError, InputError

__all__ = [
    "average_reference_field",
    "estimate_background_mask",
    "estimate_phase_sign",
    "fit_phase_polynomial",
    "phase_offset",
]


def phase_offset(field, *, mask=None):
    """Common phase of a complex field: the angle of the mean of ``exp(i phase)``.

    Parameters
    ----------
    field : array_like, complex, shape (Y, X)
        Complex field (its amplitude is ignored).
    mask : array_like of bool, shape (Y, X), optional
        Pixels to average (e.g. background); default all.

    Returns
    -------
    float
        Phase offset in rad, in (-pi, pi].

    Notes
    -----
    The circular mean is insensitive to wrapping, unlike a median or mean of wrapped phase.
    """
    z = np.asarray(field)
    mag = np.abs(z)
    unit = np.divide(z, mag, out=np.zeros_like(z), where=mag > 0)
    total = unit[mask].sum() if mask is not None else unit.sum()
    return float(np.angle(total))


def average_reference_field(fields):
    """Average sample-free fields after removing the phase offset of each.

    Parameters
    ----------
    fields : iterable of array_like, complex, shape (Y, X)
        Demodulated fields of one or several sample-free (reference) holograms, demodulated
        with the sample's carrier and window.

    Returns
    -------
    numpy.ndarray, complex128, shape (Y, X)
        The mean field, its phase offset set to 0.

    Raises
    ------
    InputError
        No field is given, or the shapes differ.

    Notes
    -----
    Vibration shifts the phase of each reference frame by a constant; removing each offset
    (circular mean) before averaging keeps frames from cancelling. The sample field is then
    divided by this mean (reference-hologram method of Cuche, Marquet & Depeursinge 2000,
    Appl Opt 39:4070).
    """
    total = None
    count = 0
    for field in fields:
        z = np.asarray(field, dtype=np.complex128)
        z = z * np.exp(-1j * phase_offset(z))
        if total is None:
            total = z
        elif z.shape != total.shape:
            raise InputError(
                f"reference: frames of shape {total.shape} and {z.shape}; all reference "
                "frames must have the hologram's shape"
            )
        else:
            total = total + z
        count += 1
    if total is None:
        raise InputError("reference: no frames given; pass one or several sample-free frames")
    mean = total / count
    return mean * np.exp(-1j * phase_offset(mean))


def _design_matrix(shape, order):
    ny, nx = shape
    y = np.linspace(-1.0, 1.0, ny)[:, None] * np.ones((1, nx))
    x = np.ones((ny, 1)) * np.linspace(-1.0, 1.0, nx)[None, :]
    terms = [y**p * x ** (d - p) for d in range(order + 1) for p in range(d + 1)]
    return np.stack([t.ravel() for t in terms], axis=1)


def fit_phase_polynomial(phase_rad, *, order=2, mask=None, clip_sigma=2.5, iterations=8):
    """Fit a low-order 2-D polynomial to the background of an unwrapped phase map, robustly.

    Parameters
    ----------
    phase_rad : array_like, shape (Y, X)
        Unwrapped phase in rad (e.g. of a demodulated field without a reference).
    order : int, optional
        Total degree: 1 fits a plane (piston and tilt), 2 adds curvature and astigmatism.
    mask : array_like of bool, shape (Y, X), optional
        Pixels allowed in the fit; default all finite pixels.
    clip_sigma : float, optional
        Pixels whose residual exceeds this many robust standard deviations (1.4826 MAD) are
        left out at the next iteration (cells, debris).
    iterations : int, optional
        Maximum number of fit-and-reject rounds.

    Returns
    -------
    surface : numpy.ndarray, float64, shape (Y, X)
        The fitted polynomial phase in rad.
    inliers : numpy.ndarray of bool, shape (Y, X)
        Pixels used in the last fit (the background).

    Raises
    ------
    ConfigError
        ``order`` is not 0 to 4, or ``clip_sigma`` is not positive.
    InputError
        Too few usable pixels for the fit.

    Notes
    -----
    Iteratively clipped least squares on coordinates scaled to [-1, 1], the numerical
    levelling of holographic phase aberrations (Colomb et al. 2006, J Opt Soc Am A 23:3177,
    fit standard polynomials on background pixels).
    """
    phase = np.asarray(phase_rad, dtype=np.float64)
    if phase.ndim != 2:
        raise InputError(f"phase_rad: expected a 2-D map, got shape {phase.shape}")
    if int(order) != order or not 0 <= order <= 4:
        raise ConfigError(f"order: must be an integer 0 to 4, got {order!r}")
    if not clip_sigma > 0:
        raise ConfigError(f"clip_sigma: must be > 0, got {clip_sigma!r}")
    design = _design_matrix(phase.shape, int(order))
    values = phase.ravel()
    usable = np.isfinite(values)
    if mask is not None:
        usable &= np.asarray(mask, dtype=bool).ravel()
    if usable.sum() < 3 * design.shape[1]:
        raise InputError(
            f"phase_rad: only {int(usable.sum())} usable background pixels for an order-"
            f"{order} fit; pass a larger field or a reference frame"
        )
    keep = usable.copy()
    coef = np.zeros(design.shape[1])
    for _ in range(int(iterations)):
        coef, *_ = np.linalg.lstsq(design[keep], values[keep], rcond=None)
        resid = values - design @ coef
        sigma = 1.4826 * np.median(np.abs(resid[keep] - np.median(resid[keep])))
        if sigma == 0:
            break
        new_keep = usable & (np.abs(resid) <= clip_sigma * sigma)
        if new_keep.sum() < 3 * design.shape[1] or np.array_equal(new_keep, keep):
            break
        keep = new_keep
    surface = (design @ coef).reshape(phase.shape)
    return surface, keep.reshape(phase.shape)


def estimate_background_mask(phase_rad, *, clip_sigma=3.0, iterations=10, min_fraction=0.05):
    """Pixels of an unwrapped, levelled phase map that belong to the cell-free background.

    Parameters
    ----------
    phase_rad : array_like, shape (Y, X)
        Unwrapped phase in rad with aberrations removed.
    clip_sigma : float, optional
        Background pixels lie within this many robust standard deviations of the background
        level.
    iterations : int, optional
        Rounds of re-estimating the level and spread on the kept pixels.
    min_fraction : float, optional
        When fewer pixels than this fraction qualify (a confluent layer), all pixels are
        returned.

    Returns
    -------
    mask : numpy.ndarray of bool, shape (Y, X)
        Background pixels.
    level_rad : float
        Background level (median of the background pixels) in rad.

    Notes
    -----
    Iterative sigma clipping about the median with the scaled median absolute deviation.
    """
    phase = np.asarray(phase_rad, dtype=np.float64)
    finite = np.isfinite(phase)
    keep = finite.copy()
    level = float(np.median(phase[finite]))
    for _ in range(int(iterations)):
        level = float(np.median(phase[keep]))
        sigma = 1.4826 * float(np.median(np.abs(phase[keep] - level)))
        if sigma == 0:
            break
        new_keep = finite & (np.abs(phase - level) <= clip_sigma * sigma)
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    if keep.sum() < min_fraction * phase.size:
        keep = finite
        level = float(np.median(phase[finite]))
    return keep, level


def estimate_phase_sign(phase_rad, *, level_rad, tail_fraction=0.005, min_ratio=1.25):
    """Sign that makes the objects of a levelled phase map stand above the background.

    Parameters
    ----------
    phase_rad : array_like, shape (Y, X)
        Unwrapped phase in rad, aberrations removed.
    level_rad : float
        Background level in rad (see :func:`estimate_background_mask`).
    tail_fraction : float, optional
        Fraction of pixels in each tail that is compared.
    min_ratio : float, optional
        The longer tail must exceed the shorter by this factor for the sign to be decided.

    Returns
    -------
    sign : int
        +1 when the upper tail is the longer (objects positive), else -1.
    decided : bool
        False when the tails are too alike (no object in the field) and +1 was kept.

    Notes
    -----
    Cells are denser than the medium (positive OPD) and cover a minority of pixels or stand out
    as thicker nuclei, so the distribution of phase about the background is skewed to the
    side of the cells.
    """
    phase = np.asarray(phase_rad, dtype=np.float64)
    phase = phase[np.isfinite(phase)]
    upper = float(np.quantile(phase, 1.0 - tail_fraction)) - level_rad
    lower = level_rad - float(np.quantile(phase, tail_fraction))
    upper, lower = max(upper, 0.0), max(lower, 0.0)
    if max(upper, lower) <= min_ratio * min(upper, lower) or max(upper, lower) == 0:
        return 1, False
    return (1 if upper > lower else -1), True
