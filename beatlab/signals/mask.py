"""Cell mask: cells against background where there is background, else the textured field."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

__all__ = ["MASK_METHODS", "CellMask", "make_cell_mask"]

MASK_METHODS = ("auto", "threshold", "confluent", "all")


@dataclass(frozen=True)
class CellMask:
    """The analysis mask and how it was found.

    Attributes
    ----------
    mask : ndarray of bool (Y, X)
        Pixels analysed.
    background : ndarray of bool (Y, X)
        Cell-free pixels (empty for confluent sheets).
    labels : ndarray of int (Y, X)
        Connected cell clusters (0 outside the mask).
    method : str
        ``'threshold'`` (cells on background), ``'confluent'`` (whole textured field) or
        ``'all'``.
    background_level_nm, background_noise_nm : float
        Robust level and SD of the background in the template (NaN when confluent).
    masked_fraction : float
        Share of the field inside the mask.
    """

    mask: np.ndarray
    background: np.ndarray
    labels: np.ndarray
    method: str
    background_level_nm: float
    background_noise_nm: float
    masked_fraction: float


def _robust_background(values: np.ndarray) -> tuple[float, float]:
    """Level and SD of the background mode, by iterated 3-SD clipping from the low tail."""
    v = values[np.isfinite(values)]
    level = float(np.percentile(v, 10))
    spread = float(1.4826 * np.median(np.abs(v - np.median(v)))) or 1.0
    lower = v[v <= np.percentile(v, 50)]
    spread = max(float(1.4826 * np.median(np.abs(lower - np.median(lower)))), 1e-6)
    for _ in range(20):
        sel = v[np.abs(v - level) < 3 * spread]
        if sel.size < 10:
            break
        new_level = float(np.median(sel))
        new_spread = max(float(1.4826 * np.median(np.abs(sel - new_level))), 1e-6)
        if abs(new_level - level) < 1e-3 * new_spread and abs(new_spread - spread) < 1e-3 * spread:
            level, spread = new_level, new_spread
            break
        level, spread = new_level, new_spread
    return level, spread


def make_cell_mask(
    template: np.ndarray,
    *,
    pixel_size_um: float,
    method: str = "auto",
    threshold_sigma: float = 5.0,
    min_area_um2: float = 25.0,
    confluent_fraction: float = 0.7,
    border_px: int = 4,
    noise_nm: float | None = None,
) -> CellMask:
    """Segment cells in the rest template.

    Parameters
    ----------
    template : ndarray (Y, X)
        Rest template, OPD in nm.
    pixel_size_um : float
        Sample-plane pixel size in um.
    method : {'auto', 'threshold', 'confluent', 'all'}
        ``'threshold'`` separates cells from a cell-free background; ``'confluent'`` takes
        the whole field; ``'auto'`` thresholds and switches to confluent when cells cover more
        than ``confluent_fraction`` of the field or no background mode stands out; ``'all'``
        takes every finite pixel, border included.
    threshold_sigma : float
        Cells stand this many background SDs above the background level.
    min_area_um2 : float
        Smaller connected objects are dropped.
    confluent_fraction : float
        Cell-covered share above which the field counts as confluent.
    noise_nm : float, optional
        Noise SD of the template pixels (nm); a would-be background with far more texture
        than this is taken as cells (confluent sheet).
    border_px : int
        Pixels at the field border are excluded (optical flow is unreliable there), except
        with ``'all'``.

    Returns
    -------
    CellMask

    Notes
    -----
    A field counts as confluent when no cells stand out, or the would-be background is as
    textured as the cells (median high-pass magnitude above half that of the cells, or above
    5 noise SDs). The background is the low mode of the lightly smoothed template (sigma
    1 px), found by iterated 3-SD clipping; cells exceed it by ``threshold_sigma`` SDs;
    the result is closed, hole-filled and opened (3 x 3), and small objects are removed. NaN
    pixels are never in the mask.
    """
    if method not in MASK_METHODS:
        raise ValueError(f"mask method must be one of {', '.join(MASK_METHODS)}, got {method!r}")
    template = np.asarray(template, dtype=np.float32)
    finite = np.isfinite(template)
    inner = np.zeros_like(finite)
    b = int(border_px)
    inner[b : template.shape[0] - b or None, b : template.shape[1] - b or None] = True
    empty = np.zeros_like(finite)
    if method == "all":
        labels = finite.astype(int)
        return CellMask(finite, empty, labels, "all", np.nan, np.nan, float(finite.mean()))
    smooth = ndimage.gaussian_filter(np.where(finite, template, np.nanmedian(template)), 1.0)
    level, spread = _robust_background(smooth[finite])
    cells = finite & (smooth > level + threshold_sigma * spread)
    cells = ndimage.binary_closing(cells, np.ones((3, 3)), iterations=2)
    cells = ndimage.binary_fill_holes(cells)
    cells = ndimage.binary_opening(cells, np.ones((3, 3)))
    labels, n = ndimage.label(cells)
    min_px = min_area_um2 / pixel_size_um**2
    if n:
        sizes = np.bincount(labels.ravel())
        keep = sizes >= min_px
        keep[0] = False
        cells = keep[labels]
    background = finite & ~ndimage.binary_dilation(cells, np.ones((3, 3)), iterations=2)
    cell_share = cells[finite].mean() if finite.any() else 0.0
    # a real background is flat; "background" with the texture of cells is a confluent sheet
    texture = np.abs(template - ndimage.gaussian_filter(np.where(finite, template, level), 2.0))
    textured = not cells.any()
    if background.any() and cells.any():
        textured = np.median(texture[background]) > 0.5 * np.median(texture[cells])
    if noise_nm is not None and background.any():
        # high-pass of white noise has a median magnitude of about 0.6 SD
        textured = textured or np.median(texture[background]) > 5.0 * noise_nm
    confluent = method == "confluent" or (
        method == "auto"
        and (cell_share > confluent_fraction or textured or background.sum() < 0.05 * finite.sum())
    )
    if confluent:
        mask = finite & inner
        labels = mask.astype(int)
        return CellMask(mask, empty, labels, "confluent", np.nan, np.nan, float(mask.mean()))
    mask = cells & inner
    labels, _ = ndimage.label(mask)
    return CellMask(
        mask, background & inner, labels, "threshold", level, spread, float(mask.mean())
    )
