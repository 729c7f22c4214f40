"""Square tiles of the field and per-tile (or per-label) means of an image.

The per-frame pass reduces each frame's displacement-magnitude map to one mean per tile
(:func:`tile_labels` + :func:`tile_means`); :mod:`beatlab.maps` turns those tile traces into
maps of peak displacement, noise, beating and onset delay.

Positions are in um from the top-left corner of the field: pixel ``(row, col)`` covers
``[col, col + 1) x [row, row + 1)`` pixel pitches, so tile ``(iy, ix)`` has its centre at
``((ix + 0.5) * tile_um, (iy + 0.5) * tile_um)`` as ``(x, y)``, with y pointing down the rows.
"""

from __future__ import annotations

import numpy as np

from beatlab.errors import ConfigError, InputError

__all__ = ["tile_grid_shape", "tile_labels", "tile_means"]


def tile_grid_shape(shape_px, *, tile_px):
    """Number of tile rows and columns that cover a frame.

    Parameters
    ----------
    shape_px : tuple of int
        Frame shape ``(Y, X)`` in pixels.
    tile_px : int
        Side of a square tile in pixels.

    Returns
    -------
    tuple of int
        ``(ny, nx) = (ceil(Y / tile_px), ceil(X / tile_px))``; partial tiles at the bottom and
        right edges count as tiles.

    Raises
    ------
    InputError
        ``shape_px`` is not two positive integers.
    ConfigError
        ``tile_px`` is not a positive integer.
    """
    try:
        ny_px, nx_px = (int(s) for s in shape_px)
    except (TypeError, ValueError):
        raise InputError(
            f"shape_px must be a frame shape (Y, X), got {shape_px!r}; pass image.shape[-2:]"
        ) from None
    if ny_px < 1 or nx_px < 1:
        raise InputError(f"shape_px must be two positive sizes, got {shape_px!r}")
    if isinstance(tile_px, bool) or int(tile_px) != tile_px or tile_px < 1:
        raise ConfigError(f"tile_px must be a positive integer of pixels, got {tile_px!r}")
    tile_px = int(tile_px)
    return (-(-ny_px // tile_px), -(-nx_px // tile_px))


def tile_labels(shape_px, *, tile_px):
    """Index map that assigns every pixel to its square tile.

    Parameters
    ----------
    shape_px : tuple of int
        Frame shape ``(Y, X)`` in pixels.
    tile_px : int
        Side of a square tile in pixels.

    Returns
    -------
    ndarray of intp, shape (Y, X)
        Tile index of each pixel, row-major over the grid of :func:`tile_grid_shape`:
        ``(row // tile_px) * nx + col // tile_px``. Edge tiles may be partial.

    Raises
    ------
    InputError, ConfigError
        As :func:`tile_grid_shape`.

    Examples
    --------
    >>> tile_labels((3, 5), tile_px=2)
    array([[0, 0, 1, 1, 2],
           [0, 0, 1, 1, 2],
           [3, 3, 4, 4, 5]])
    """
    _, nx = tile_grid_shape(shape_px, tile_px=tile_px)
    ny_px, nx_px = (int(s) for s in shape_px)
    rows = np.arange(ny_px, dtype=np.intp) // int(tile_px)
    cols = np.arange(nx_px, dtype=np.intp) // int(tile_px)
    return rows[:, None] * nx + cols[None, :]


def tile_means(image, tile_index, n_tiles, *, weights=None):
    """NaN-aware (weighted) mean of an image over each tile or label.

    Parameters
    ----------
    image : array_like, shape (Y, X)
        One frame, e.g. a displacement magnitude in um. NaN and inf pixels are ignored.
    tile_index : array_like of int, shape (Y, X)
        Tile (or label) of each pixel in ``[0, n_tiles)``, e.g. from :func:`tile_labels` or a
        label image (then entry 0 is the background and entry k label k).
    n_tiles : int
        Number of tiles; the length of the result.
    weights : array_like, shape (Y, X), optional
        Non-negative pixel weights, e.g. a cell mask as 0/1; None weighs every pixel as 1.

    Returns
    -------
    ndarray of float64, shape (n_tiles,)
        Weighted mean of the finite pixels of each tile; NaN where a tile has no finite pixel
        of positive weight.

    Raises
    ------
    InputError
        Shapes differ, ``weights`` is negative or not finite, or ``tile_index`` has values
        outside ``[0, n_tiles)``.

    Notes
    -----
    Two ``np.bincount`` passes (weighted sums and weights), so the cost is linear in the
    number of pixels and independent of the number of tiles; pass an ``intp`` index (as
    :func:`tile_labels` returns) to avoid a conversion per call.
    """
    img = np.asarray(image)
    idx = np.asarray(tile_index)
    if img.shape != idx.shape or img.ndim != 2:
        raise InputError(
            f"image and tile_index must be 2-D arrays of one shape, got {img.shape} and "
            f"{idx.shape}; build tile_index with tile_labels(image.shape, tile_px=...)"
        )
    n_tiles = int(n_tiles)
    flat_idx = idx.ravel()
    vals = img.ravel()
    finite = np.isfinite(vals)
    all_finite = bool(finite.all())
    try:
        if weights is None:
            if all_finite:
                sums = np.bincount(flat_idx, weights=vals, minlength=n_tiles)
                counts = np.bincount(flat_idx, minlength=n_tiles).astype(np.float64)
            else:
                sums = np.bincount(
                    flat_idx, weights=np.where(finite, vals, 0.0), minlength=n_tiles
                )
                counts = np.bincount(
                    flat_idx, weights=finite.astype(np.float64), minlength=n_tiles
                )
        else:
            w = np.asarray(weights, dtype=np.float64)
            if w.shape != img.shape:
                raise InputError(
                    f"weights must have the image shape {img.shape}, got {w.shape}; "
                    "pass a per-pixel weight such as the cell mask"
                )
            w = w.ravel()
            if not np.all(w >= 0):
                raise InputError("weights must be finite and >= 0; pass e.g. mask.astype(float)")
            if not all_finite:
                w = np.where(finite, w, 0.0)
                vals = np.where(finite, vals, 0.0)
            sums = np.bincount(flat_idx, weights=vals * w, minlength=n_tiles)
            counts = np.bincount(flat_idx, weights=w, minlength=n_tiles)
    except (ValueError, TypeError):
        raise InputError(
            "tile_index must hold non-negative integers; build it with tile_labels() or pass "
            "a label image"
        ) from None
    if sums.shape[0] != n_tiles:
        raise InputError(
            f"tile_index has values up to {sums.shape[0] - 1}, beyond n_tiles={n_tiles}; "
            "pass n_tiles = tile_index.max() + 1"
        )
    out = np.full(n_tiles, np.nan)
    np.divide(sums, counts, out=out, where=counts > 0)
    return out
