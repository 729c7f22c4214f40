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

Pattern frames and their weights may differ between the groups of one family (each region's
pattern from its own most contracted frames, ``weight_family``): the pattern at a pixel is the
weighted mean over the frames of its group, and the leave-one-out correction is made per cell
before the cells are summed into groups, so any union of groups stays a projection onto the
union of their patterns.
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
    "weight_groups_of_cells",
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
    weight_family : str, optional
        A family of ``index`` whose groups each weight the frames on their own: ``add``
        then takes one weight per group of that family plus one last weight for the cells
        in none of its groups (:attr:`n_weight_groups` in all). None: one weight per frame.
    """

    def __init__(
        self,
        index: CellIndex,
        groups: np.ndarray | None = None,
        *,
        weight_family: str | None = None,
    ):
        m = index.pixels.size
        self.index = index
        self.groups = None if groups is None else np.asarray(groups, dtype=np.intp)
        if self.groups is not None and self.groups.shape != (m,):
            raise InputError(f"groups must have one value per used pixel ({m},)")
        self.cell_group = weight_groups_of_cells(index, weight_family)
        self.n_weight_groups = (
            1 if weight_family is None else index.families[weight_family].shape[1] + 1
        )
        self._pixel_group = self.cell_group[index.cell]
        self._field = np.zeros((m, 2))
        self._opd = np.zeros(m)
        self.weights: dict[int, np.ndarray] = {}
        self._lock = threading.Lock()

    def add(self, frame: int, field_px: np.ndarray, opd_diff_nm: np.ndarray, weight):
        """Add one frame's field (Y, X, 2) and OPD difference (Y, X).

        ``weight``: a float >= 0, or one per weight group (:attr:`n_weight_groups`).
        """
        self.add_gathered(
            frame, self.index.gather(field_px), self.index.gather(opd_diff_nm), weight
        )

    def add_gathered(self, frame: int, field_px: np.ndarray, opd_diff_nm: np.ndarray, weight):
        """:meth:`add` for values already at the used pixels ((M, 2) and (M,), NaN as 0)."""
        w = np.broadcast_to(np.asarray(weight, dtype=np.float64), (self.n_weight_groups,))
        per_pixel = w[self._pixel_group]
        f = np.asarray(field_px, dtype=np.float64)
        d = np.asarray(opd_diff_nm, dtype=np.float64)
        with self._lock:
            self._field += per_pixel[:, None] * f
            self._opd += per_pixel * d
            self.weights[int(frame)] = w.copy()

    def patterns(self) -> Patterns:
        """The weighted means ``A`` and ``B`` and their group-mean-free versions."""
        total = np.zeros(self.n_weight_groups)
        for w in self.weights.values():
            total += w
        per_pixel = total[self._pixel_group]
        with np.errstate(invalid="ignore", divide="ignore"):
            scale = np.where(per_pixel > 0, 1.0 / per_pixel, 0.0)
        a = self._field * scale[:, None]
        b = self._opd * scale
        return Patterns(
            field=a,
            opd=b,
            field_perp=remove_group_means(a, self.groups),
            opd_perp=remove_group_means(b, self.groups),
            total=total,
            groups=self.groups,
            cell_group=self.cell_group,
        )


def weight_groups_of_cells(index: CellIndex, family: str | None) -> np.ndarray:
    """Weight group of each cell: its group in ``family`` (the last group: in none of them).

    Raises
    ------
    InputError
        ``family`` is not a family of ``index``, or a cell lies in two of its groups.
    """
    if family is None:
        return np.zeros(index.n_cells, dtype=np.intp)
    if family not in index.families:
        raise InputError(
            f"weight_family {family!r} is not a family of the cell index; use one of "
            f"{sorted(index.families)}"
        )
    member = sparse.csr_matrix(index.families[family])
    if np.any(np.diff(member.indptr) > 1):
        raise InputError(
            f"family {family!r} puts a cell in two groups; its groups must not overlap"
        )
    group = np.full(index.n_cells, member.shape[1], dtype=np.intp)
    rows = np.repeat(np.arange(index.n_cells), np.diff(member.indptr))
    group[rows] = member.indices
    return group


@dataclass(frozen=True)
class Patterns:
    """The contraction patterns on the used pixels.

    ``field`` (M, 2) px and ``opd`` (M,) nm are the weighted means (they set the scale);
    ``field_perp`` and ``opd_perp`` the same minus their mean over each group (frames are
    projected onto these); ``total`` the sum of the weights of each weight group;
    ``cell_group`` the weight group of each cell.
    """

    field: np.ndarray
    opd: np.ndarray
    field_perp: np.ndarray
    opd_perp: np.ndarray
    total: np.ndarray
    groups: np.ndarray | None
    cell_group: np.ndarray

    def own_terms(self, field: np.ndarray, opd: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Per pixel ``F . F_perp`` and ``D D_perp`` of one frame (for leave-one-out)."""
        f_perp = remove_group_means(field, self.groups)
        d_perp = remove_group_means(opd, self.groups)
        return (field * f_perp).sum(axis=1), opd * d_perp

    def sums(self, index: CellIndex, field_dot, opd_dot, field_sq, opd_sq, weights):
        """The :class:`ProjectionSums` of a pass (per-frame cell sums given).

        ``weights``: the pattern frames' weights, each a float or one per weight group.
        """
        a, b = self.field, self.opd
        n_groups = self.total.size
        per_cell = {
            int(k): np.broadcast_to(np.asarray(w, dtype=np.float64), (n_groups,))[self.cell_group]
            for k, w in weights.items()
        }
        return ProjectionSums(
            field_dot=field_dot,
            opd_dot=opd_dot,
            field_sq=field_sq,
            opd_sq=opd_sq,
            weights=per_cell,
            total=self.total[self.cell_group],
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
    weights : dict of int to ndarray (n_cells,)
        Weight of each pattern frame in each cell; ``total`` their sum per cell.
    total : ndarray (n_cells,)
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
    total: np.ndarray
    norm_a: np.ndarray
    norm_b: np.ndarray
    cross_a: np.ndarray
    cross_b: np.ndarray
    abs_a: np.ndarray
    sq_b: np.ndarray
    count: np.ndarray


def _coordinate(dot, norm, own_sq, weights, total, group):
    """Group sums of dot / group sums of norm per frame, leave-one-out for the pattern frames.

    ``dot`` (T, n_cells), ``norm`` (n_cells,), per-cell ``own_sq``, ``weights`` and ``total``;
    ``group`` sums cells into groups. Leave-one-out is per cell, with the cell's own weights
    (``A' = (total A - w F) / (total - w)``, nothing where no weight is left), then summed.
    The leave-one-out coordinate is in units of the pattern without the frame, ``A'``; it is
    returned in units of ``A`` (times ``|A'| / |A|``, the RMS ratio over the group), so that
    one scale, the mean ``|A|``, serves every frame: exact when ``A'`` is a multiple of ``A``.
    """
    g_norm = group(norm)
    with np.errstate(invalid="ignore", divide="ignore"):
        coord = np.where(g_norm > 0, group(dot) / g_norm, np.nan)
        if not weights:
            return coord
        # every pattern frame at once, one row each: the numbers of one frame at a time
        frames = list(weights)
        w = np.stack([weights[f] for f in frames])
        d, sq = dot[frames], np.stack([own_sq[f] for f in frames])
        rest = total - w
        left = rest > 0
        safe = np.where(left, rest, 1.0)
        loo_dot = np.where(left, (total * d - w * sq) / safe, 0.0)
        loo_norm = np.where(left, (total**2 * norm - 2 * total * w * d + w**2 * sq) / safe**2, 0.0)
        g_dot, g_loo = group(loo_dot), group(loo_norm)
        ratio = np.sqrt(np.where(g_norm > 0, g_loo / g_norm, np.nan))
        coord[frames] = np.where(g_loo > 0, g_dot / g_loo * ratio, np.nan)
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
    s_t = sparse.csr_matrix(groups, dtype=np.float64).T  # transposed once, not per call

    def group(cells):
        return np.asarray(s_t @ np.asarray(cells, dtype=np.float64).T).T

    n = group(sums.count)
    norm_a, norm_b = group(sums.norm_a), group(sums.norm_b)
    coord_f = _coordinate(
        sums.field_dot, sums.norm_a, sums.field_sq, sums.weights, sums.total, group
    )
    coord_d = _coordinate(sums.opd_dot, sums.norm_b, sums.opd_sq, sums.weights, sums.total, group)
    with np.errstate(invalid="ignore", divide="ignore"):
        coord_f = coord_f * np.where(group(sums.cross_a) > 0, norm_a / group(sums.cross_a), np.nan)
        coord_d = coord_d * np.where(group(sums.cross_b) > 0, norm_b / group(sums.cross_b), np.nan)
        mean_abs = np.where(n > 0, group(sums.abs_a) / n, np.nan)
        rms_b = np.where(n > 0, np.sqrt(group(sums.sq_b) / n), np.nan)
    return coord_f * mean_abs, coord_d * rms_b
