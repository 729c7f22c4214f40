"""Linear contraction coordinates: each frame's field projected onto the contraction pattern.

The mean over a mask of the *magnitude* of a noisy displacement field is biased upwards (a true
displacement ``s`` with noise ``sigma`` reads about ``sqrt(s^2 + sigma^2)``): at rest it reads
the noise floor, and near the baseline it squashes the relaxation tail into that floor. A
projection is linear in the field, so its noise is zero-mean: 0 at rest within its noise.

For a group of pixels ``g`` (the mask, a region, a tile) and a pattern ``A(x)`` (the
weighted mean of the fields of the most contracted frames), the coordinate of frame ``t`` is

    c_t = sum_{x in g} F_t(x) . A_perp(x) / sum_{x in g} |A_perp(x)|^2

and the trace is ``c_t`` times the mean of ``|A|`` over ``g``: for a field that is a multiple
of the pattern, ``F_t = k_t A``, it equals the mean displacement magnitude ``k_t mean|A|``
exactly, with no noise floor. The OPD change uses the same projection of (frame - template)
onto its own pattern ``B``, scaled by the RMS of ``B`` over the group.

A frame that helped build the pattern would be projected onto its own noise (a positive
bias); it is projected onto the pattern without itself (leave-one-out), which needs only the
group sums of ``|F_t|^2`` besides ``F_t . A``.

Optionally, within groups of pixels the patterns are made blind to a uniform translation and
a uniform OPD offset (their mean over the group removed, ``A_perp``, ``B_perp``): drift or
vibration left over after the rigid-shift removal then adds nothing. For a field ``k_t A``
the coordinate is still exactly ``k_t``, since ``sum A . A_perp = sum |A_perp|^2`` over the
group. (Not used by the pipeline: a contraction centred outside the field looks, from one
side, largely like a translation.) Without groups, ``A_perp = A``.

Groups are reduced through *cells*, the pixels sharing one group in every family (tile x
label x mask), so a frame costs one pass over the used pixels whatever the number of groups.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from beatlab.errors import InputError

__all__ = [
    "CellIndex",
    "PatternAccumulator",
    "Patterns",
    "ProjectionSums",
    "project_groups",
    "remove_group_means",
]


@dataclass(frozen=True)
class CellIndex:
    """Used pixels, their cells, and which group of each family every cell belongs to.

    Attributes
    ----------
    pixels : ndarray of int (M,)
        Flat indices of the used pixels (in any family).
    cell : ndarray of int (M,)
        Cell of each used pixel.
    n_cells : int
    families : dict of str to scipy.sparse.csr_matrix (n_cells, n_groups)
        Indicator of the group of each cell, per family (a row of zeros: in no group).
    """

    pixels: np.ndarray
    cell: np.ndarray
    n_cells: int
    families: dict

    @classmethod
    def from_maps(cls, maps: dict[str, tuple[np.ndarray, int]]) -> CellIndex:
        """Build from ``{family: (group index map (Y, X) with -1 outside, n_groups)}``."""
        if not maps:
            raise InputError("maps must name at least one family of pixel groups")
        flat = {name: np.asarray(m).ravel() for name, (m, _) in maps.items()}
        shapes = {np.asarray(m).shape for m, _ in maps.values()}
        if len(shapes) != 1:
            raise InputError(f"group maps must share one shape, got {sorted(shapes)}")
        used = np.zeros(next(iter(flat.values())).size, dtype=bool)
        for values in flat.values():
            used |= values >= 0
        pixels = np.flatnonzero(used)
        keys = np.stack([flat[name][pixels] for name in maps], axis=1)
        unique, cell = np.unique(keys, axis=0, return_inverse=True)
        n_cells = unique.shape[0]
        families = {}
        for j, (name, (_, n_groups)) in enumerate(maps.items()):
            group = unique[:, j]
            inside = group >= 0
            families[name] = sparse.csr_matrix(
                (np.ones(inside.sum()), (np.flatnonzero(inside), group[inside])),
                shape=(n_cells, int(n_groups)),
            )
        return cls(pixels=pixels, cell=cell.ravel(), n_cells=n_cells, families=families)

    def gather(self, image: np.ndarray) -> np.ndarray:
        """Values of an image (Y, X) or field (Y, X, k) at the used pixels, NaN as 0."""
        values = np.asarray(image)
        values = values.reshape(-1, *values.shape[2:])[self.pixels]
        return np.nan_to_num(values, nan=0.0, posinf=0.0, neginf=0.0)

    def cell_sums(self, values: np.ndarray) -> np.ndarray:
        """Sum of per-pixel ``values`` (M,) in each cell."""
        return np.bincount(self.cell, weights=values, minlength=self.n_cells)


def remove_group_means(values: np.ndarray, groups: np.ndarray | None) -> np.ndarray:
    """``values`` (M,) or (M, k) minus their mean over each group of pixels (``groups`` (M,)).

    ``groups=None`` returns the values unchanged.
    """
    values = np.asarray(values, dtype=np.float64)
    if groups is None:
        return values
    count = np.bincount(groups)
    count = np.maximum(count, 1)
    if values.ndim == 1:
        return values - (np.bincount(groups, weights=values) / count)[groups]
    means = np.stack(
        [np.bincount(groups, weights=values[:, j]) / count for j in range(values.shape[1])], 1
    )
    return values - means[groups]


class PatternAccumulator:
    """Weighted running mean of the fields (``A``) and OPD differences (``B``) of some frames.

    Thread-safe: frames may be added from several threads.

    Parameters
    ----------
    index : CellIndex
        The used pixels.
    groups : ndarray of int (M,), optional
        Groups of used pixels (e.g. the regions) within which the projection patterns are
        made blind to a uniform translation of the field and a uniform OPD offset (their mean
        over the group removed): left-over drift or vibration then does not count as
        contraction, and unions of these groups keep that property. None (default): the
        patterns are used as they are. Not for contractions whose centre lies outside the
        field: seen from one side, much of their pattern *is* a translation.
    """

    def __init__(self, index: CellIndex, groups: np.ndarray | None = None):
        m = index.pixels.size
        self.index = index
        self.groups = None if groups is None else np.asarray(groups, dtype=np.intp)
        if self.groups is not None and self.groups.shape != (m,):
            raise InputError(f"groups must have one value per used pixel ({m},)")
        self._field = np.zeros((m, 2))
        self._opd = np.zeros(m)
        self.weights: dict[int, float] = {}
        self._lock = threading.Lock()

    def add(self, frame: int, field_px: np.ndarray, opd_diff_nm: np.ndarray, weight: float):
        """Add one frame's field (Y, X, 2) and OPD difference (Y, X) with a weight > 0."""
        f = self.index.gather(field_px).astype(np.float64)
        d = self.index.gather(opd_diff_nm).astype(np.float64)
        with self._lock:
            self._field += weight * f
            self._opd += weight * d
            self.weights[int(frame)] = float(weight)

    def patterns(self) -> Patterns:
        """The weighted means ``A`` and ``B`` and their group-mean-free versions."""
        total = float(sum(self.weights.values()))
        a = self._field / total if total > 0 else np.zeros_like(self._field)
        b = self._opd / total if total > 0 else np.zeros_like(self._opd)
        return Patterns(
            field=a,
            opd=b,
            field_perp=remove_group_means(a, self.groups),
            opd_perp=remove_group_means(b, self.groups),
            total=total,
            groups=self.groups,
        )


@dataclass(frozen=True)
class Patterns:
    """The contraction patterns on the used pixels.

    ``field`` (M, 2) px and ``opd`` (M,) nm are the weighted means (they set the scale);
    ``field_perp`` and ``opd_perp`` the same minus their mean over each group (frames are
    projected onto these); ``total`` the sum of the weights.
    """

    field: np.ndarray
    opd: np.ndarray
    field_perp: np.ndarray
    opd_perp: np.ndarray
    total: float
    groups: np.ndarray | None

    def own_terms(self, field: np.ndarray, opd: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Per pixel ``F . F_perp`` and ``D D_perp`` of one frame (for leave-one-out)."""
        f_perp = remove_group_means(field, self.groups)
        d_perp = remove_group_means(opd, self.groups)
        return (field * f_perp).sum(axis=1), opd * d_perp

    def sums(self, index: CellIndex, field_dot, opd_dot, field_sq, opd_sq, weights):
        """The :class:`ProjectionSums` of a pass (per-frame cell sums given)."""
        a, b = self.field, self.opd
        return ProjectionSums(
            field_dot=field_dot,
            opd_dot=opd_dot,
            field_sq=field_sq,
            opd_sq=opd_sq,
            weights=weights,
            total=self.total,
            norm_a=index.cell_sums((self.field_perp**2).sum(axis=1)),
            norm_b=index.cell_sums(self.opd_perp**2),
            cross_a=index.cell_sums((a * self.field_perp).sum(axis=1)),
            cross_b=index.cell_sums(b * self.opd_perp),
            abs_a=index.cell_sums(np.hypot(a[:, 0], a[:, 1])),
            sq_b=index.cell_sums(b * b),
            count=index.cell_sums(np.ones(index.pixels.size)),
        )


@dataclass(frozen=True)
class ProjectionSums:
    """Per-frame cell sums of the projections, and the per-cell constants of the patterns.

    Attributes
    ----------
    field_dot, opd_dot : ndarray (T, n_cells) float32
        Cell sums of ``F_t . A_perp`` (px^2) and ``D_t B_perp`` (nm^2).
    field_sq, opd_sq : dict of int to ndarray (n_cells,)
        For the frames that built the patterns: cell sums of ``F_t . F_t,perp`` and
        ``D_t D_t,perp`` (:meth:`Patterns.own_terms`).
    weights : dict of int to float
        Weight of each pattern frame; ``total`` their sum.
    total : float
    norm_a, norm_b : ndarray (n_cells,)
        Cell sums of ``|A_perp|^2`` and ``B_perp^2``.
    cross_a, cross_b : ndarray (n_cells,)
        Cell sums of ``A . A_perp`` and ``B B_perp``: for a group that is not a union of the
        groups the patterns were made translation-blind in (a map tile), ``F = k A`` projects
        to ``k cross / norm``, so the coordinate is rescaled by ``norm / cross`` (1 for a
        union of those groups).
    abs_a : ndarray (n_cells,)
        Cell sums of ``|A|`` (px): the displacement scale.
    sq_b : ndarray (n_cells,)
        Cell sums of ``B^2`` (nm^2): the OPD-change scale.
    count : ndarray (n_cells,)
        Pixels per cell.
    """

    field_dot: np.ndarray
    opd_dot: np.ndarray
    field_sq: dict
    opd_sq: dict
    weights: dict
    total: float
    norm_a: np.ndarray
    norm_b: np.ndarray
    cross_a: np.ndarray
    cross_b: np.ndarray
    abs_a: np.ndarray
    sq_b: np.ndarray
    count: np.ndarray


def _coordinate(dot, norm, own_sq, weights, total):
    """dot / norm per frame and group, leave-one-out for the frames in ``weights``.

    The leave-one-out coordinate is in units of the pattern without the frame, ``A'``; it is
    returned in units of ``A`` (times ``|A'| / |A|``, the RMS ratio over the group), so that
    one scale, the mean ``|A|``, serves every frame: exact when ``A'`` is a multiple of ``A``.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        coord = np.where(norm > 0, dot / norm, np.nan)
        for frame, w in weights.items():
            rest = total - w
            if rest <= 0:
                coord[frame] = np.nan
                continue
            d, sq = dot[frame], own_sq[frame]
            loo_dot = (total * d - w * sq) / rest
            loo_norm = (total**2 * norm - 2 * total * w * d + w**2 * sq) / rest**2
            ratio = np.sqrt(np.where(norm > 0, loo_norm / norm, np.nan))
            coord[frame] = np.where(loo_norm > 0, loo_dot / loo_norm * ratio, np.nan)
    return coord


def project_groups(
    sums: ProjectionSums, groups: sparse.spmatrix | np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Displacement (px) and OPD change (nm) traces of groups of cells.

    Parameters
    ----------
    sums : ProjectionSums
        From the per-frame pass.
    groups : sparse matrix or ndarray (n_cells, G)
        Which cells make each group (0/1; several cells per group: their union).

    Returns
    -------
    displacement_px, opd_change_nm : ndarray (T, G)
        ``c_t`` times the mean ``|A|`` over the group (px), and the OPD coordinate times the
        RMS of ``B`` over the group (nm). NaN for groups without pattern (no pixels, no
        signal in the pattern frames).
    """
    s = sparse.csr_matrix(groups, dtype=np.float64)

    def group(cells):
        return np.asarray(s.T @ np.asarray(cells, dtype=np.float64).T).T

    n = group(sums.count)
    own_f = {k: group(v) for k, v in sums.field_sq.items()}
    own_d = {k: group(v) for k, v in sums.opd_sq.items()}
    norm_a, norm_b = group(sums.norm_a), group(sums.norm_b)
    coord_f = _coordinate(group(sums.field_dot), norm_a, own_f, sums.weights, sums.total)
    coord_d = _coordinate(group(sums.opd_dot), norm_b, own_d, sums.weights, sums.total)
    with np.errstate(invalid="ignore", divide="ignore"):
        coord_f = coord_f * np.where(group(sums.cross_a) > 0, norm_a / group(sums.cross_a), np.nan)
        coord_d = coord_d * np.where(group(sums.cross_b) > 0, norm_b / group(sums.cross_b), np.nan)
        mean_abs = np.where(n > 0, group(sums.abs_a) / n, np.nan)
        rms_b = np.where(n > 0, np.sqrt(group(sums.sq_b) / n), np.nan)
    return coord_f * mean_abs, coord_d * rms_b
