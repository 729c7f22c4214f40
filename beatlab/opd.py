"""Phase and optical path delay: conversion, wrapped differences, spatial and temporal unwrapping.

OPD (nm) = phase (rad) x wavelength (nm) / (2 pi). Phase maps from off-axis holography are
wrapped into (-pi, pi]; small changes between frames are taken as wrapped differences so that
they never suffer 2 pi jumps, and one frame is unwrapped spatially by least squares.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterable, Iterator

import numpy as np
from scipy import fft

from beatlab.errors import BeatlabWarning, InputError

__all__ = [
    "check_cell_sign",
    "opd_to_phase",
    "phase_to_opd",
    "unwrap_in_time",
    "unwrap_phase_ls",
    "wrap_phase",
    "wrapped_difference",
]

TWO_PI = 2.0 * np.pi


def _check_wavelength(wavelength_nm: float) -> float:
    wavelength_nm = float(wavelength_nm)
    if not (np.isfinite(wavelength_nm) and wavelength_nm > 0):
        raise InputError(
            f"wavelength_nm must be a positive number of nanometres, got {wavelength_nm!r}; "
            "pass wavelength_nm=NM"
        )
    return wavelength_nm


def phase_to_opd(phase_rad: np.ndarray, wavelength_nm: float) -> np.ndarray:
    """Convert phase (radians) to optical path delay (nm).

    Parameters
    ----------
    phase_rad : ndarray
        Phase in radians, any shape.
    wavelength_nm : float
        Vacuum wavelength of the illumination in nm.

    Returns
    -------
    ndarray of float32
        OPD in nm, ``phase_rad * wavelength_nm / (2 pi)``.

    Examples
    --------
    >>> float(phase_to_opd(np.array(2 * np.pi), 632.8))
    632.8
    """
    wavelength_nm = _check_wavelength(wavelength_nm)
    return (np.asarray(phase_rad, dtype=np.float64) * (wavelength_nm / TWO_PI)).astype(np.float32)


def opd_to_phase(opd_nm: np.ndarray, wavelength_nm: float) -> np.ndarray:
    """Convert optical path delay (nm) to phase (radians, unwrapped), float64."""
    wavelength_nm = _check_wavelength(wavelength_nm)
    return np.asarray(opd_nm, dtype=np.float64) * (TWO_PI / wavelength_nm)


def wrap_phase(phase_rad: np.ndarray) -> np.ndarray:
    """Wrap phase into [-pi, pi) (the angle of exp(i phase))."""
    phase_rad = np.asarray(phase_rad, dtype=np.float64)
    return (phase_rad + np.pi) % TWO_PI - np.pi


def wrapped_difference(phase_rad: np.ndarray, reference_rad: np.ndarray) -> np.ndarray:
    """Difference of two phase maps as the angle of exp(i (phase - reference)).

    Small changes never suffer 2 pi jumps, whether the inputs are wrapped or not.

    Parameters
    ----------
    phase_rad, reference_rad : ndarray
        Phase maps in radians, broadcastable.

    Returns
    -------
    ndarray of float64
        Difference in [-pi, pi).
    """
    return wrap_phase(np.asarray(phase_rad, dtype=np.float64) - np.asarray(reference_rad))


def _dct_poisson(rho: np.ndarray) -> np.ndarray:
    """Solve the Neumann Poisson equation lap(phi) = rho with the DCT (Ghiglia & Romero 1994)."""
    ny, nx = rho.shape
    d = fft.dctn(rho, type=2, norm="ortho")
    ky = np.cos(np.pi * np.arange(ny) / ny)[:, None]
    kx = np.cos(np.pi * np.arange(nx) / nx)[None, :]
    denom = 2.0 * (ky + kx - 2.0)
    denom[0, 0] = 1.0
    d = d / denom
    d[0, 0] = 0.0
    return fft.idctn(d, type=2, norm="ortho")


def unwrap_phase_ls(
    wrapped_rad: np.ndarray,
    *,
    weights: np.ndarray | None = None,
    iterations: int = 20,
    congruent: bool = True,
) -> np.ndarray:
    """Unwrap a 2-D phase map by least squares (DCT solution of the Poisson equation).

    Parameters
    ----------
    wrapped_rad : ndarray (Y, X)
        Wrapped (or partly unwrapped) phase in radians. NaN pixels are allowed: they get zero
        weight and stay NaN in the output.
    weights : ndarray (Y, X), optional
        Non-negative reliability weights (e.g. fringe modulation); weighted least squares by
        preconditioned conjugate gradients with the unweighted DCT solver as preconditioner.
    iterations : int
        Maximum conjugate-gradient iterations for the weighted problem.
    congruent : bool
        If true (default), the result is made congruent with the input,
        ``phi_w + 2 pi round((phi_ls - phi_w) / 2 pi)``, so no pixel changes by anything but
        whole turns.

    Returns
    -------
    ndarray of float64 (Y, X)
        Unwrapped phase in radians, up to a constant.

    Raises
    ------
    InputError
        If the input is not 2-D.

    Notes
    -----
    Unweighted and weighted least-squares unwrapping after Ghiglia & Romero (1994), J Opt Soc
    Am A 11:107: the wrapped gradients define a Poisson equation with Neumann boundaries,
    solved exactly by the discrete cosine transform.
    """
    phi = np.asarray(wrapped_rad, dtype=np.float64)
    if phi.ndim != 2:
        raise InputError(f"unwrap_phase_ls needs a 2-D phase map, got shape {phi.shape}")
    bad = ~np.isfinite(phi)
    w = np.ones_like(phi) if weights is None else np.asarray(weights, dtype=np.float64).copy()
    if w.shape != phi.shape:
        raise InputError(f"weights shape {w.shape} does not match the phase map {phi.shape}")
    w[bad] = 0.0
    phi0 = np.where(bad, 0.0, phi)
    # wrapped forward differences, zero across the boundary (Neumann)
    dx = np.zeros_like(phi0)
    dy = np.zeros_like(phi0)
    dx[:, :-1] = wrap_phase(np.diff(phi0, axis=1))
    dy[:-1, :] = wrap_phase(np.diff(phi0, axis=0))
    wx = np.zeros_like(w)
    wy = np.zeros_like(w)
    wx[:, :-1] = np.minimum(w[:, :-1], w[:, 1:]) ** 2
    wy[:-1, :] = np.minimum(w[:-1, :], w[1:, :]) ** 2

    def divergence(gx: np.ndarray, gy: np.ndarray) -> np.ndarray:
        out = gx.copy()
        out[:, 1:] -= gx[:, :-1]
        out += gy
        out[1:, :] -= gy[:-1, :]
        return out

    if weights is None and not bad.any():
        result = _dct_poisson(divergence(dx, dy))
    else:
        # weighted normal equations  A phi = b  with A phi = div(W grad phi)
        def apply(p: np.ndarray) -> np.ndarray:
            gx = np.zeros_like(p)
            gy = np.zeros_like(p)
            gx[:, :-1] = np.diff(p, axis=1)
            gy[:-1, :] = np.diff(p, axis=0)
            return divergence(wx * gx, wy * gy)

        b = divergence(wx * dx, wy * dy)
        result = _dct_poisson(b)
        r = b - apply(result)
        z = _dct_poisson(r)
        p = z.copy()
        rz = np.vdot(r, z)
        norm_b = np.linalg.norm(b) or 1.0
        for _ in range(int(iterations)):
            if np.linalg.norm(r) < 1e-9 * norm_b:
                break
            ap = apply(p)
            denom = np.vdot(p, ap)
            if denom == 0:
                break
            alpha = rz / denom
            result = result + alpha * p
            r = r - alpha * ap
            z = _dct_poisson(r)
            rz_new = np.vdot(r, z)
            p = z + (rz_new / rz) * p
            rz = rz_new
    if congruent:
        result = phi0 + TWO_PI * np.round((result - phi0) / TWO_PI)
    result[bad] = np.nan
    return result


def unwrap_in_time(
    wrapped_frames: Iterable[np.ndarray],
    *,
    reference_wrapped: np.ndarray,
    reference_unwrapped: np.ndarray | None = None,
) -> Iterator[np.ndarray]:
    """Unwrap a phase time series consistently in time.

    The reference frame is unwrapped once in space; every frame is then the unwrapped reference
    plus its wrapped difference to the reference, so no region ever jumps by 2 pi between
    frames (a jump of a wavelength of OPD would read as a giant fake beat).

    Parameters
    ----------
    wrapped_frames : iterable of ndarray (Y, X)
        Phase frames in radians, wrapped or not.
    reference_wrapped : ndarray (Y, X)
        The reference frame (e.g. the first or a rest frame) as given.
    reference_unwrapped : ndarray (Y, X), optional
        Its spatially unwrapped version; computed with :func:`unwrap_phase_ls` when omitted.

    Yields
    ------
    ndarray of float64 (Y, X)
        Unwrapped phase in radians.
    """
    reference_wrapped = np.asarray(reference_wrapped, dtype=np.float64)
    if reference_unwrapped is None:
        reference_unwrapped = unwrap_phase_ls(reference_wrapped)
    for frame in wrapped_frames:
        yield reference_unwrapped + wrapped_difference(frame, reference_wrapped)


def check_cell_sign(opd_nm: np.ndarray, *, source: str = "recording") -> bool:
    """Warn when cells read as negative OPD (a flipped phase sign); return True if positive.

    Cells are denser than the medium, so their OPD must exceed the background. The frame is
    compared against its background level (the median of the lowest-OPD half); the sign is
    judged from the skew of the distribution about that level.

    Parameters
    ----------
    opd_nm : ndarray (Y, X)
        One OPD frame in nm.
    source : str
        Name used in the warning.

    Returns
    -------
    bool
        True when the cells read positive (or the field is featureless).
    """
    values = np.asarray(opd_nm, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size < 16:
        return True
    median = np.median(values)
    high = np.percentile(values, 99) - median
    low = median - np.percentile(values, 1)
    if low > 1.5 * high and low > 0:
        warnings.warn(
            f"cells in {source} read as negative OPD (the phase sign looks flipped); "
            "check the side-band choice or pass the phase with the opposite sign",
            BeatlabWarning,
            stacklevel=2,
        )
        return False
    return True
