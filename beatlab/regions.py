"""Independently beating regions: cell clusters (or user ROIs) grouped by a shared rhythm.

Each connected cell cluster of the mask (or each region of interest drawn by the user) has a
mean displacement trace. Clusters that are too small are dropped; clusters whose traces
correlate strongly beat together (they are coupled, or one syncytium split by a gap in the
mask) and are merged into one region, so every remaining region beats on its own rhythm.

Positions are in um from the top-left corner of the field: pixel ``(row, col)`` has its centre
at ``((col + 0.5) * pixel_size_um, (row + 0.5) * pixel_size_um)`` as ``(x, y)``.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import ndimage

from beatlab.errors import ConfigError, InputError

__all__ = ["RegionSet", "find_regions", "region_table", "split_regions"]

_FIXED_COLUMNS = ("region", "area_um2", "centroid_x_um", "centroid_y_um")


@dataclass(frozen=True)
class RegionSet:
    """Regions found by :func:`find_regions`; the arrays are read-only.

    Attributes
    ----------
    labels : ndarray of int32, shape (Y, X)
        Region of each pixel: 0 = none (background, dropped clusters), 1..n the regions.
    traces : ndarray of float64, shape (n, T)
        Area-weighted mean of the members' traces, i.e. the mean over the region's pixels, in
        the unit of the input traces (um).
    areas_um2 : ndarray of float64, shape (n,)
        Area of each region in um^2.
    centroids_um : ndarray of float64, shape (n, 2)
        Centroid of each region as ``(x, y)`` in um.
    members : list of tuple of int
        The input labels merged into each region, ascending; regions are ordered by their
        smallest member, so with ``merge=False`` region k is the k-th kept input label.
    dropped : tuple of int
        Input labels present in the image but smaller than ``min_area_um2``.
    """

    labels: np.ndarray
    traces: np.ndarray
    areas_um2: np.ndarray
    centroids_um: np.ndarray
    members: list[tuple[int, ...]]
    dropped: tuple[int, ...]

    @property
    def n_regions(self) -> int:
        """Number of regions."""
        return len(self.members)


class _UnionFind:
    """Disjoint sets over ``0..n-1`` with path halving and union by size (Tarjan 1975)."""

    def __init__(self, n):
        self.parent = list(range(n))
        self.size = [1] * n

    def find(self, i):
        parent = self.parent
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    def union(self, i, j):
        ri, rj = self.find(i), self.find(j)
        if ri == rj:
            return
        if self.size[ri] < self.size[rj]:
            ri, rj = rj, ri
        self.parent[rj] = ri
        self.size[ri] += self.size[rj]


def _correlation_matrix(traces):
    """Pearson correlation between rows; NaN frames count as the row's median (0 after removal).

    A constant row correlates with nothing (its entries are 0).
    """
    if np.isnan(traces).any():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows: correlate with none
            centred = traces - np.nanmedian(traces, axis=1, keepdims=True)
    else:  # the same medians; numpy's nanmedian goes row by row (0.03 s for 481 x 1,000)
        centred = traces - np.median(traces, axis=1, keepdims=True)
    centred = np.where(np.isfinite(centred), centred, 0.0)
    centred = centred - centred.mean(axis=1, keepdims=True)
    norms = np.sqrt(np.sum(centred**2, axis=1))
    unit = np.zeros_like(centred)
    np.divide(centred, norms[:, None], out=unit, where=norms[:, None] > 0)
    return unit @ unit.T


def _check_labels(labels):
    lab = np.asarray(labels)
    if lab.ndim != 2 or not np.issubdtype(lab.dtype, np.integer):
        raise InputError(
            f"labels must be a 2-D integer label image, got dtype {lab.dtype} shape "
            f"{lab.shape}; pass scipy.ndimage.label(mask)[0] or an ROI label image"
        )
    if lab.size and lab.min() < 0:
        raise InputError(f"labels must be >= 0 (0 = background), got minimum {lab.min()}")
    return lab


def find_regions(
    labels,
    label_traces,
    *,
    pixel_size_um,
    min_area_um2=100.0,
    merge_correlation=0.8,
    merge=True,
):
    """Group labelled cell clusters into independently beating regions.

    Parameters
    ----------
    labels : array_like of int, shape (Y, X)
        Connected cell clusters or user ROIs: 0 = background, 1..L the labels (gaps allowed).
    label_traces : array_like, shape (L, T)
        Mean displacement of each label per frame (um); row ``k`` belongs to label ``k + 1``
        and ``L = labels.max()``. Rows of labels absent from the image are ignored. Per frame,
        ``tile_means(magnitude, labels, L + 1)[1:]`` from :mod:`beatlab.signals.maps` gives
        one column. NaN frames are allowed.
    pixel_size_um : float
        Sample-plane pixel size in um.
    min_area_um2 : float, optional
        Labels smaller than this area (um^2) are dropped; pass 0 to keep every user ROI.
    merge_correlation : float, optional
        Labels whose traces correlate above this (Pearson) are merged; the relation is made
        transitive, so A~B and B~C merge all three.
    merge : bool, optional
        False keeps every kept label as its own region (user ROIs).

    Returns
    -------
    RegionSet
        The regions, ordered by their smallest member label.

    Raises
    ------
    InputError
        ``labels`` is not a non-negative 2-D integer image, ``label_traces`` does not have
        one row per label, or ``pixel_size_um`` is not positive.
    ConfigError
        ``min_area_um2`` or ``merge_correlation`` is out of range.

    Notes
    -----
    Pearson correlation over frames of each pair of traces, each with its median removed and
    NaN frames set to that median (so they add nothing); pairs above ``merge_correlation``
    are joined with a disjoint-set forest (Tarjan 1975, J ACM 22:215). Two clusters that
    beat on independent rhythms have traces that are nearly uncorrelated, while coupled
    pieces of one syncytium correlate close to 1. The merged trace is the area-weighted mean
    of the members' traces, NaN-aware per frame. Whether a region beats at all is left to the
    beat detection run on its trace.

    Examples
    --------
    >>> lab = np.zeros((20, 20), int); lab[:10, :10] = 1; lab[12:, 12:] = 2
    >>> rng = np.random.default_rng(0)
    >>> rs = find_regions(lab, rng.standard_normal((2, 50)), pixel_size_um=2.0)
    >>> rs.n_regions, rs.areas_um2.tolist()
    (2, [400.0, 256.0])
    """
    lab = _check_labels(labels)
    pixel_size_um = float(pixel_size_um)
    if not (math.isfinite(pixel_size_um) and pixel_size_um > 0):
        raise InputError(
            f"pixel_size_um must be a positive number of um, got {pixel_size_um!r}; "
            "pass pixel_size_um=UM"
        )
    min_area_um2 = float(min_area_um2)
    if not (math.isfinite(min_area_um2) and min_area_um2 >= 0):
        raise ConfigError(f"min_area_um2 must be >= 0 um^2, got {min_area_um2!r}")
    merge_correlation = float(merge_correlation)
    if not (math.isfinite(merge_correlation) and -1.0 <= merge_correlation <= 1.0):
        raise ConfigError(
            f"merge_correlation must be a correlation in [-1, 1], got {merge_correlation!r}"
        )
    n_labels = int(lab.max()) if lab.size else 0
    traces_in = np.asarray(label_traces, dtype=np.float64)
    if traces_in.ndim != 2 or traces_in.shape[0] != n_labels:
        raise InputError(
            f"label_traces must be (L, T) with one row per label 1..L (L = labels.max() = "
            f"{n_labels}), got shape {traces_in.shape}"
        )
    n_frames = traces_in.shape[1]

    flat = lab.ravel()
    pix = np.bincount(flat, minlength=n_labels + 1)[1:].astype(np.float64)
    rows, cols = np.indices(lab.shape)
    sum_y = np.bincount(flat, weights=rows.ravel() + 0.5, minlength=n_labels + 1)[1:]
    sum_x = np.bincount(flat, weights=cols.ravel() + 0.5, minlength=n_labels + 1)[1:]
    area = pix * pixel_size_um**2
    present = pix > 0
    kept = np.flatnonzero(present & (area >= min_area_um2))
    dropped = tuple(int(i) + 1 for i in np.flatnonzero(present & (area < min_area_um2)))

    uf = _UnionFind(kept.size)
    if merge and kept.size > 1:
        corr = _correlation_matrix(traces_in[kept])
        for i, j in zip(*np.nonzero(np.triu(corr > merge_correlation, k=1)), strict=True):
            uf.union(int(i), int(j))
    groups = {}
    for pos in range(kept.size):
        groups.setdefault(uf.find(pos), []).append(int(kept[pos]))
    members = sorted(tuple(sorted(g)) for g in groups.values())

    n = len(members)
    lut = np.zeros(n_labels + 1, dtype=np.int32)
    traces = np.full((n, n_frames), np.nan)
    areas = np.zeros(n)
    centroids = np.zeros((n, 2))
    for r, group in enumerate(members):
        idx = np.asarray(group)
        lut[idx + 1] = r + 1
        w = area[idx]
        block = traces_in[idx]
        finite = np.isfinite(block)
        wsum = np.sum(np.where(finite, w[:, None], 0.0), axis=0)
        vsum = np.sum(np.where(finite, block * w[:, None], 0.0), axis=0)
        np.divide(vsum, wsum, out=traces[r], where=wsum > 0)
        areas[r] = w.sum()
        npix = pix[idx].sum()
        centroids[r] = (
            sum_x[idx].sum() * pixel_size_um / npix,
            sum_y[idx].sum() * pixel_size_um / npix,
        )
    new_labels = lut[lab]
    for arr in (new_labels, traces, areas, centroids):
        arr.setflags(write=False)
    return RegionSet(
        labels=new_labels,
        traces=traces,
        areas_um2=areas,
        centroids_um=centroids,
        members=[tuple(int(m) + 1 for m in g) for g in members],
        dropped=dropped,
    )


def split_regions(
    labels,
    activity,
    *,
    block_px,
    min_area_px,
    split_correlation=0.5,
    merge_correlation=0.8,
    min_blocks=4,
    active=None,
):
    """Split connected clusters whose parts beat independently.

    Parameters
    ----------
    labels : ndarray of int (Y, X)
        Connected clusters (0 = none), e.g. a cell mask's components or the whole
        confluent field.
    activity : ndarray (T, by, bx)
        An activity trace per block of ``block_px`` x ``block_px`` pixels (for example the
        absolute OPD deviation from the rest state of block-averaged frames).
    block_px : int
        Block size in pixels.
    min_area_px : float
        A part must cover at least this many pixels (and ``min_blocks`` blocks) to stand on
        its own.
    split_correlation : float
        Neighbouring blocks whose traces correlate at least this much grow one part.
    merge_correlation : float
        Parts whose mean traces correlate at least this much beat together and stay one.
    min_blocks : int
        Fewest blocks of a part.
    active : callable, optional
        ``active(trace) -> bool`` on a part's mean activity trace (T,); parts that are not
        active (e.g. patches of correlated noise) do not stand on their own.

    Returns
    -------
    ndarray of int (Y, X)
        New labels 1..n (0 outside); a cluster that does not split keeps one label.

    Notes
    -----
    Blocks are grown into parts by union-find over 4-neighbours that correlate (noise makes
    single blocks unreliable, so the decision is taken on the parts' mean traces: parts are
    joined back whenever those correlate above ``merge_correlation``). Pixels take the part
    of the nearest block that belongs to one.
    """
    lab = _check_labels(labels)
    act = np.asarray(activity)  # float64 only for the blocks that are compared (memory)
    if act.ndim != 3:
        raise InputError(f"activity must be (T, by, bx), got shape {act.shape}")
    _, by, bx = act.shape
    b = int(block_px)
    ny, nx = lab.shape
    out = np.zeros_like(lab)
    next_label = 1
    crop = lab[: by * b, : bx * b].reshape(by, b, bx, b)
    for value in np.unique(lab[lab > 0]):
        pixels = lab == value
        share = (crop == value).mean(axis=(1, 3))
        blocks = np.argwhere(share >= 0.5)
        groups = []
        if len(blocks) >= 2 * min_blocks and pixels.sum() >= 2 * min_area_px:
            groups = _independent_parts(
                act,
                blocks,
                b,
                min_area_px,
                split_correlation,
                merge_correlation,
                min_blocks,
                active,
            )
        if len(groups) < 2:
            out[pixels] = next_label
            next_label += 1
            continue
        seed = np.full((by, bx), -1)
        for g, members in enumerate(groups):
            seed[blocks[members, 0], blocks[members, 1]] = g
        _, (iy, ix) = ndimage.distance_transform_edt(seed < 0, return_indices=True)
        nearest = seed[iy, ix]
        rows = np.minimum(np.arange(ny) // b, by - 1)
        cols = np.minimum(np.arange(nx) // b, bx - 1)
        part = nearest[rows[:, None], cols[None, :]]
        for g in range(len(groups)):
            out[pixels & (part == g)] = next_label
            next_label += 1
    return out


def _independent_parts(act, blocks, b, min_area_px, split_r, merge_r, min_blocks, active):
    """Groups (lists of indices into ``blocks``) that beat independently, or []."""
    traces = act[:, blocks[:, 0], blocks[:, 1]].T.astype(np.float64)
    r = _correlation_matrix(traces)
    index = {tuple(p): i for i, p in enumerate(blocks)}
    uf = _UnionFind(len(blocks))
    for i, (y, x) in enumerate(blocks):
        for dy, dx in ((0, 1), (1, 0)):
            j = index.get((y + dy, x + dx))
            if j is not None and r[i, j] >= split_r:
                uf.union(i, j)
    roots = {}
    for i in range(len(blocks)):
        roots.setdefault(uf.find(i), []).append(i)
    big = [m for m in roots.values() if len(m) >= min_blocks and len(m) * b * b >= min_area_px]
    if active is not None:
        big = [m for m in big if active(traces[m].mean(axis=0))]
    if len(big) < 2:
        return []
    means = np.stack([traces[m].mean(axis=0) for m in big])
    rr = _correlation_matrix(means)
    uf2 = _UnionFind(len(big))
    for i in range(len(big)):
        for j in range(i + 1, len(big)):
            if rr[i, j] >= merge_r:
                uf2.union(i, j)
    merged = {}
    for i, m in enumerate(big):
        merged.setdefault(uf2.find(i), []).extend(m)
    return list(merged.values()) if len(merged) >= 2 else []


def region_table(regionset, summaries):
    """One row per region: id, area, centroid and the region's summary metrics.

    Parameters
    ----------
    regionset : RegionSet
        From :func:`find_regions`.
    summaries : list of dict
        One dict of summary metrics per region, in region order (e.g. the recording-level
        summary computed on each region's trace). Keys become columns in order of first
        appearance; a key missing from a region gives NaN there.

    Returns
    -------
    pandas.DataFrame
        Columns ``region`` (1-based id, as in ``regionset.labels``), ``area_um2``,
        ``centroid_x_um``, ``centroid_y_um``, then the summary keys.

    Raises
    ------
    InputError
        The number of summaries differs from the number of regions, or a summary key
        clashes with one of the fixed columns.
    """
    n = regionset.n_regions
    summaries = list(summaries)
    if len(summaries) != n:
        raise InputError(
            f"summaries must hold one dict per region ({n}), got {len(summaries)}; pass the "
            "summaries in region order"
        )
    keys = []
    for summary in summaries:
        for key in summary:
            if key in _FIXED_COLUMNS:
                raise InputError(
                    f"summary key {key!r} clashes with a fixed region column; rename it"
                )
            if key not in keys:
                keys.append(key)
    table = pd.DataFrame(
        {
            "region": np.arange(1, n + 1, dtype=np.int64),
            "area_um2": np.asarray(regionset.areas_um2, dtype=np.float64),
            "centroid_x_um": np.asarray(regionset.centroids_um, dtype=np.float64)[:, 0],
            "centroid_y_um": np.asarray(regionset.centroids_um, dtype=np.float64)[:, 1],
        }
    )
    for key in keys:
        table[key] = [s.get(key, np.nan) for s in summaries]
    return table
