"""Contraction fields and exact sub-pixel warping of the rest scene.

A cluster's unit field ``u(x0)`` (um) is a contraction toward its centre, uniform strain inside
the core radius and tapered smoothly to zero at the outer radius, so the sum over clusters is
continuous and clusters with disjoint supports do not interact. A material point at rest position
``x0`` is seen at ``x = x0 + sum_c a_c(t) u_c(x0) + s(t)`` with ``s`` the rigid stage shift.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

__all__ = [
    "ContractionField",
    "field_displacement",
    "field_gradient",
    "invert_map",
    "warp_scene",
]


@dataclass(frozen=True)
class ContractionField:
    """Unit contraction field of one cluster (activation 1).

    Attributes
    ----------
    centre_um : tuple of float
        Centre ``(y, x)`` in um, frame coordinates (pixel ``(i, j)`` centre at
        ``(i, j) * pixel_size_um``).
    core_um : float
        Radius inside which the strain is uniform.
    outer_um : float
        Radius at which the field has tapered to zero (raised-cosine taper).
    strain : float
        Fractional shortening at activation 1 inside the core.
    axis : tuple of float or None
        Unit vector ``(y, x)`` of a uniaxial contraction; None for isotropic.
    """

    centre_um: tuple
    core_um: float
    outer_um: float
    strain: float
    axis: tuple | None = None


def _taper(r, core, outer):
    """Raised-cosine taper f(r) and its derivative f'(r).

    1 inside the core, 0 from the outer radius on; the cosines are evaluated only in the band
    between (the same values as clipping ``z`` to [0, 1] everywhere, at a fraction of the cost).
    """
    width = outer - core
    band = (r > core) & (r < outer)
    f = (r <= core).astype(np.float64)
    df = np.zeros(np.shape(r), dtype=np.float64)
    z = (r[band] - core) / width
    f[band] = 0.5 * (1.0 + np.cos(np.pi * z))
    df[band] = -0.5 * np.pi / width * np.sin(np.pi * z)
    return f, df


def field_displacement(fields, activations, y_um, x_um):
    """Total displacement ``sum_c a_c u_c`` at rest positions ``(y_um, x_um)``.

    Parameters
    ----------
    fields : sequence of ContractionField
    activations : sequence of float
        One activation per field.
    y_um, x_um : ndarray
        Rest positions in um (any equal shapes).

    Returns
    -------
    uy, ux : ndarray
        Displacement components in um.
    """
    uy = np.zeros_like(y_um, dtype=np.float64)
    ux = np.zeros_like(x_um, dtype=np.float64)
    for fld, act in zip(fields, activations, strict=True):
        if act == 0 or fld.strain == 0:
            continue
        dy = y_um - fld.centre_um[0]
        dx = x_um - fld.centre_um[1]
        f, _ = _taper(np.hypot(dy, dx), fld.core_um, fld.outer_um)
        k = -act * fld.strain * f
        if fld.axis is None:
            uy += k * dy
            ux += k * dx
        else:
            ey, ex = fld.axis
            along = ey * dy + ex * dx
            uy += k * along * ey
            ux += k * along * ex
    return uy, ux


def field_gradient(fields, activations, y_um, x_um):
    """Gradient ``d(sum_c a_c u_c)_i / dx_j`` at rest positions.

    Returns
    -------
    gyy, gyx, gxy, gxx : ndarray
        ``gyx`` is ``d u_y / d x`` and so on (dimensionless).
    """
    g = [np.zeros_like(y_um, dtype=np.float64) for _ in range(4)]
    for fld, act in zip(fields, activations, strict=True):
        if act == 0 or fld.strain == 0:
            continue
        dy = y_um - fld.centre_um[0]
        dx = x_um - fld.centre_um[1]
        r = np.hypot(dy, dx)
        f, df = _taper(r, fld.core_um, fld.outer_um)
        dfr = np.divide(df, r, out=np.zeros_like(r), where=r > 0)
        s = -act * fld.strain
        if fld.axis is None:
            # u = s f(r) d  ->  du_i/dx_j = s (f delta_ij + f'(r) d_i d_j / r)
            g[0] += s * (f + dfr * dy * dy)
            g[1] += s * dfr * dy * dx
            g[2] += s * dfr * dx * dy
            g[3] += s * (f + dfr * dx * dx)
        else:
            # u = s f(r) (e.d) e  ->  du_i/dx_j = s e_i (f e_j + (e.d) f'(r) d_j / r)
            ey, ex = fld.axis
            along = ey * dy + ex * dx
            wy = f * ey + along * dfr * dy
            wx = f * ex + along * dfr * dx
            g[0] += s * ey * wy
            g[1] += s * ey * wx
            g[2] += s * ex * wy
            g[3] += s * ex * wx
    return tuple(g)


def invert_map(fields, activations, y_um, x_um, *, tol_um=1e-9, max_iter=60):
    """Rest positions ``x0`` whose image ``x0 + U(x0)`` is ``(y_um, x_um)``.

    Fixed-point iteration ``x0 <- x - U(x0)``; it converges because the field gradient is
    kept well below 1 (checked by the caller).

    Returns
    -------
    y0, x0 : ndarray
        Rest positions in um; ``max |x0 + U(x0) - x| < tol_um``.
    """
    y0 = np.array(y_um, dtype=np.float64)
    x0 = np.array(x_um, dtype=np.float64)
    for _ in range(max_iter):
        uy, ux = field_displacement(fields, activations, y0, x0)
        ny, nx = y_um - uy, x_um - ux
        step = max(float(np.max(np.abs(ny - y0), initial=0)), float(np.max(np.abs(nx - x0))))
        y0, x0 = ny, nx
        if step < tol_um:
            break
    return y0, x0


def warp_scene(coeffs, fields, activations, shift_um, *, grid_um, pad_px, pixel_size_um):
    """Render one frame of the warped, mass-conserving scene.

    Parameters
    ----------
    coeffs : ndarray (Yc, Xc)
        Cubic B-spline coefficients of the rest scene on the padded canvas
        (``scipy.ndimage.spline_filter(scene, order=3)``).
    fields : sequence of ContractionField
    activations : sequence of float
    shift_um : tuple of float
        Rigid stage shift ``(y, x)`` in um of the whole field at this frame.
    grid_um : tuple of ndarray (Y, X)
        Frame pixel centres ``(y, x)`` in um.
    pad_px : int
        Canvas padding in pixels on each side.
    pixel_size_um : float

    Returns
    -------
    ndarray (Y, X) float64
        ``S(x0) / det(I + grad U(x0))`` at each frame pixel, with ``x0`` the rest position seen
        there: the OPD of material is carried along and thickened by the local area change, so
        the integral of OPD (dry mass) is conserved.

    Notes
    -----
    Cubic B-spline interpolation (Unser 1999, IEEE Signal Process Mag 16(6):22) at exact
    sub-pixel positions; no positional quantisation.
    """
    gy, gx = grid_um
    y0, x0 = invert_map(fields, activations, gy - shift_um[0], gx - shift_um[1])
    coords = np.stack([y0 / pixel_size_um + pad_px, x0 / pixel_size_um + pad_px])
    values = ndimage.map_coordinates(coeffs, coords, order=3, prefilter=False, mode="nearest")
    gyy, gyx, gxy, gxx = field_gradient(fields, activations, y0, x0)
    det = (1.0 + gyy) * (1.0 + gxx) - gyx * gxy
    return values / det
