"""Rest scenes of the simulator: clusters of elongated cells, or a confluent sheet.

Values are optical path delays in nm. Cells are flat-topped ellipses of 150-260 nm with a nucleus
of +80-150 nm, fine smooth texture and granules (the features optical flow tracks), blurred by a
small optical point-spread function so the scene is band-limited and warps cleanly.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from beatlab.errors import ConfigError

__all__ = ["LAYOUTS", "ClusterGeometry", "place_clusters", "render_scene"]

LAYOUTS = ("clusters", "confluent")

#: Base OPD of the cell sheet under and between the cells of a confluent layout (nm).
_SHEET_NM = 90.0
#: Granules per square micrometre of cell footprint.
_GRANULE_DENSITY_UM2 = 0.6


@dataclass(frozen=True)
class ClusterGeometry:
    """Where a cluster sits and how far its contraction field reaches (frame um)."""

    centre_um: tuple
    radius_um: float
    core_um: float
    outer_um: float
    angle_rad: float


def _separated(points, candidate, min_dist):
    return all(np.hypot(candidate[0] - p[0], candidate[1] - p[1]) >= min_dist for p in points)


def _sample_centres(n, lo, hi, min_dist, rng, what):
    for _ in range(50):
        points = []
        for _ in range(200):
            cand = (rng.uniform(lo[0], hi[0]), rng.uniform(lo[1], hi[1]))
            if _separated(points, cand, min_dist):
                points.append(cand)
                if len(points) == n:
                    return points
    raise ConfigError(
        f"n_clusters: {n} {what} do not fit in the field of view; "
        "use fewer clusters, a larger shape_px or a smaller cluster_radius_um"
    )


def place_clusters(layout, n_clusters, size_um, *, cluster_radius_um, rng):
    """Place the clusters (or contraction centres of a confluent sheet).

    Parameters
    ----------
    layout : {'clusters', 'confluent'}
    n_clusters : int
    size_um : tuple of float
        Frame extent ``(height, width)`` in um.
    cluster_radius_um : float or None
        Radius of a cell cluster (layout 'clusters'); default ``0.22 L / sqrt(n)`` with ``L``
        the shorter frame side.
    rng : numpy.random.Generator

    Returns
    -------
    list of ClusterGeometry
        Field supports (``outer_um``) never overlap, so clusters are mechanically independent.
    """
    h, w = size_um
    short = min(h, w)
    if layout == "clusters":
        radius = cluster_radius_um if cluster_radius_um else 0.22 * short / np.sqrt(n_clusters)
        if 2 * radius + 2.0 > short:
            raise ConfigError(
                f"cluster_radius_um: {radius:.3g} um does not fit a {h:.3g} x {w:.3g} um field; "
                "pass a smaller radius or a larger shape_px"
            )
        core, outer = radius, 2.0 * radius
        margin = radius + 1.0
        if n_clusters == 1:
            jitter = 0.05 * short
            centres = [
                (
                    float(np.clip(h / 2 + rng.uniform(-jitter, jitter), margin, h - margin)),
                    float(np.clip(w / 2 + rng.uniform(-jitter, jitter), margin, w - margin)),
                )
            ]
        else:
            centres = _sample_centres(
                n_clusters, (margin, margin), (h - margin, w - margin), 2 * outer, rng, "clusters"
            )
    else:
        if n_clusters == 1:
            jitter = 0.05 * short
            centres = [
                (h / 2 + rng.uniform(-jitter, jitter), w / 2 + rng.uniform(-jitter, jitter))
            ]
            outer = 0.45 * short
        else:
            dmin = 0.8 * short / np.sqrt(n_clusters)
            centres = _sample_centres(
                n_clusters,
                (0.1 * h, 0.1 * w),
                (0.9 * h, 0.9 * w),
                dmin,
                rng,
                "contraction centres",
            )
            outer = 0.5 * dmin
        radius, core = outer, 0.5 * outer
    return [
        ClusterGeometry(
            (float(cy), float(cx)), float(radius), float(core), float(outer), rng.uniform(0, np.pi)
        )
        for cy, cx in centres
    ]


def _draw_cell(scene, footprint, centre_px, length_px, width_px, angle, rng):
    """Draw one flat-topped elliptical cell with a nucleus onto ``scene`` (max-combined)."""
    half = 0.5 * length_px + 3.0
    cy, cx = centre_px
    i0, i1 = int(np.floor(cy - half)), int(np.ceil(cy + half)) + 1
    j0, j1 = int(np.floor(cx - half)), int(np.ceil(cx + half)) + 1
    i0, j0 = max(i0, 0), max(j0, 0)
    i1, j1 = min(i1, scene.shape[0]), min(j1, scene.shape[1])
    if i1 <= i0 or j1 <= j0:
        return
    yy, xx = np.mgrid[i0:i1, j0:j1].astype(np.float64)
    dy, dx = yy - cy, xx - cx
    c, s = np.cos(angle), np.sin(angle)
    along = c * dx + s * dy
    across = -s * dx + c * dy
    rho2 = (2 * along / length_px) ** 2 + (2 * across / width_px) ** 2
    body = rng.uniform(150.0, 260.0) * np.sqrt(np.clip(1.0 - rho2**2, 0.0, None))
    off = rng.uniform(-0.1, 0.1) * length_px
    nrho2 = (2 * (along - off) / (0.42 * length_px)) ** 2 + (2 * across / (0.6 * width_px)) ** 2
    nucleus = rng.uniform(80.0, 150.0) * np.sqrt(np.clip(1.0 - nrho2, 0.0, None))
    cell = body + nucleus
    np.maximum(scene[i0:i1, j0:j1], cell, out=scene[i0:i1, j0:j1])
    footprint[i0:i1, j0:j1] |= rho2 < 1.0


def render_scene(layout, clusters, canvas_shape, *, pad_px, pixel_size_um, rng):
    """Render the rest OPD scene on the padded canvas.

    Parameters
    ----------
    layout : {'clusters', 'confluent'}
    clusters : list of ClusterGeometry
    canvas_shape : tuple of int
        ``(Y + 2 pad, X + 2 pad)``.
    pad_px : int
        Padding on each side; canvas pixel ``(i, j)`` is frame pixel ``(i - pad, j - pad)``.
    pixel_size_um : float
    rng : numpy.random.Generator

    Returns
    -------
    scene_nm : ndarray (Yc, Xc) float64
        Rest OPD in nm; exactly 0 far from cells in layout 'clusters'.
    footprint : ndarray (Yc, Xc) bool
        Union of the cell ellipses (for 'confluent': everywhere).
    """
    scene = np.zeros(canvas_shape, dtype=np.float64)
    footprint = np.zeros(canvas_shape, dtype=bool)
    px = pixel_size_um
    if layout == "clusters":
        for cl in clusters:
            length_um = float(np.clip(0.9 * cl.radius_um, 8.0, 22.0))
            reach = max(cl.radius_um - 0.5 * length_um, 0.0)
            width_mean = 0.33 * length_um
            n_cells = int(
                min(60, np.ceil(2.5 * cl.radius_um**2 / (0.25 * length_um * width_mean)))
            )
            for _ in range(n_cells):
                r = reach * np.sqrt(rng.uniform())
                phi = rng.uniform(0, 2 * np.pi)
                cy = cl.centre_um[0] + r * np.sin(phi)
                cx = cl.centre_um[1] + r * np.cos(phi)
                _draw_cell(
                    scene,
                    footprint,
                    (cy / px + pad_px, cx / px + pad_px),
                    length_um / px,
                    length_um * rng.uniform(0.28, 0.38) / px,
                    cl.angle_rad + rng.normal(0.0, 0.3),
                    rng,
                )
    else:
        short_um = min(canvas_shape) * px
        length_um = float(np.clip(0.3 * short_um, 8.0, 20.0))
        area_um2 = canvas_shape[0] * canvas_shape[1] * px * px
        n_cells = int(np.ceil(2.2 * area_um2 / (np.pi * 0.25 * length_um * 0.33 * length_um)))
        angle0 = clusters[0].angle_rad
        for _ in range(n_cells):
            _draw_cell(
                scene,
                footprint,
                (rng.uniform(0, canvas_shape[0]), rng.uniform(0, canvas_shape[1])),
                length_um / px * rng.uniform(0.8, 1.2),
                length_um * rng.uniform(0.28, 0.38) / px,
                angle0 + rng.normal(0.0, 0.35),
                rng,
            )
        np.maximum(scene, _SHEET_NM, out=scene)
        footprint[:] = True

    cellness = np.clip(scene / 40.0, 0.0, 1.0)
    texture = ndimage.gaussian_filter(rng.standard_normal(canvas_shape), 1.2, mode="wrap")
    texture *= 12.0 / texture.std()
    granules = np.zeros(canvas_shape)
    idx = np.flatnonzero(footprint)
    n_gran = int(_GRANULE_DENSITY_UM2 * idx.size * px * px)
    if n_gran:
        picks = rng.choice(idx, size=n_gran)
        np.add.at(granules.ravel(), picks, rng.uniform(15.0, 45.0, n_gran))
        sigma = max(0.35 / px, 0.8)
        granules = ndimage.gaussian_filter(granules, sigma, mode="constant") * (
            2 * np.pi * sigma**2
        )
    scene = scene + cellness * (texture + granules)
    # optical point-spread function: keeps the scene band-limited for exact spline warping
    scene = ndimage.gaussian_filter(scene, 0.7, mode="nearest")
    return scene, footprint
