"""Projection onto the contraction pattern: exact on a pattern, zero-mean on noise."""

import numpy as np
import pytest
from scipy import ndimage

from beatlab.errors import InputError
from beatlab.signals.projection import (
    CellIndex,
    PatternAccumulator,
    project_groups,
)

SHAPE = (40, 48)


def _pattern(rng):
    """A smooth random vector field (px) that the code under test knows nothing about."""
    field = np.stack([ndimage.gaussian_filter(rng.normal(size=SHAPE), 5) for _ in range(2)], -1)
    return field / np.abs(field).max()


def _index():
    halves = np.where(np.arange(SHAPE[1])[None, :] < SHAPE[1] // 2, 0, 1) * np.ones(SHAPE, int)
    return CellIndex.from_maps({"mask": (np.zeros(SHAPE, int), 1), "halves": (halves, 2)})


def _run(index, fields, diffs, pattern_frames, weights, groups=None):
    acc = PatternAccumulator(index, groups=groups)
    for k, w in zip(pattern_frames, weights, strict=True):
        acc.add(k, fields[k], diffs[k], w)
    pat = acc.patterns()
    gather = [(index.gather(f), index.gather(d)) for f, d in zip(fields, diffs, strict=True)]
    own = {k: pat.own_terms(*gather[k]) for k in pattern_frames}
    sums = pat.sums(
        index,
        np.array([index.cell_sums((f * pat.field_perp).sum(1)) for f, _ in gather]),
        np.array([index.cell_sums(d * pat.opd_perp) for _, d in gather]),
        {k: index.cell_sums(v[0]) for k, v in own.items()},
        {k: index.cell_sums(v[1]) for k, v in own.items()},
        dict(zip(pattern_frames, weights, strict=True)),
    )
    return sums


def test_a_field_that_is_a_multiple_of_the_pattern_reads_its_mean_magnitude():
    rng = np.random.default_rng(0)
    p = _pattern(rng)
    opd_p = ndimage.gaussian_filter(rng.normal(size=SHAPE), 1.5) * 20
    k = np.concatenate([np.zeros(10), np.linspace(0, 1, 10), np.linspace(1, 0, 10)])
    fields = [kk * p for kk in k]
    diffs = [kk * opd_p for kk in k]
    top = [18, 19, 20, 21]
    sums = _run(_index(), fields, diffs, top, [1.0, 2.0, 2.0, 1.0])
    disp, opd = project_groups(sums, _index().families["mask"])
    # closed form: k_t times the mean magnitude of the pattern / the RMS of the OPD pattern
    expected = k * np.hypot(p[..., 0], p[..., 1]).mean()
    np.testing.assert_allclose(disp[:, 0], expected, atol=1e-9)
    np.testing.assert_allclose(opd[:, 0], k * np.sqrt((opd_p**2).mean()), atol=1e-6)


def test_noise_projects_to_zero_mean_where_the_magnitude_has_a_floor():
    rng = np.random.default_rng(1)
    p = _pattern(rng)
    n, sigma = 400, 0.05
    k = np.where(np.arange(n) % 40 < 8, 1.0, 0.0)
    fields = [kk * p + rng.normal(0, sigma, (*SHAPE, 2)) for kk in k]
    diffs = [np.zeros(SHAPE) + rng.normal(0, 1, SHAPE) for _ in k]
    top = list(np.flatnonzero(k))
    sums = _run(_index(), fields, diffs, top, [1.0] * len(top))
    disp, _ = project_groups(sums, _index().families["mask"])
    rest = disp[k == 0, 0]
    at_rest = [f for f, kk in zip(fields, k, strict=True) if kk == 0]
    floor = np.mean([np.hypot(f[..., 0], f[..., 1]).mean() for f in at_rest])
    # zero-mean at rest (within 4 standard errors), while the magnitude sits at its Rayleigh
    # floor sigma sqrt(pi/2) (a fact of the Rayleigh distribution)
    assert abs(rest.mean()) < 4 * rest.std() / np.sqrt(rest.size)
    assert floor == pytest.approx(sigma * np.sqrt(np.pi / 2), rel=0.02)
    assert abs(rest.mean()) < 0.05 * floor
    # the pattern frames read their own amplitude without their own noise's bias
    contracted = disp[k == 1, 0]
    truth = np.hypot(p[..., 0], p[..., 1]).mean()
    assert contracted.mean() == pytest.approx(truth, rel=0.02)


def test_leave_one_out_removes_the_self_projection_bias():
    rng = np.random.default_rng(2)
    n = 60
    fields = [rng.normal(0, 1, (*SHAPE, 2)) for _ in range(n)]
    diffs = [rng.normal(0, 1, SHAPE) for _ in range(n)]
    top = list(range(0, n, 3))
    sums = _run(_index(), fields, diffs, top, [1.0] * len(top))
    disp, opd = project_groups(sums, _index().families["mask"])
    own = disp[top, 0]
    # pure noise: frames that built the pattern read as much as the others, i.e. zero-mean
    assert abs(own.mean()) < 4 * own.std() / np.sqrt(own.size)
    assert abs(opd[top, 0].mean()) < 4 * opd[top, 0].std() / np.sqrt(len(top))


def test_groups_add_up_and_unions_are_projections_of_the_union():
    # (also with patterns made translation-blind over the whole mask, not per half: the
    # halves are read exactly all the same)
    rng = np.random.default_rng(3)
    p = _pattern(rng)
    fields = [kk * p for kk in (0.0, 0.5, 1.0)]
    diffs = [np.zeros(SHAPE)] * 3
    index = _index()
    sums = _run(index, fields, diffs, [2], [1.0], groups=np.zeros(index.pixels.size, int))
    halves, _ = project_groups(sums, index.families["halves"])
    union, _ = project_groups(sums, np.asarray(index.families["halves"].sum(axis=1)) > 0)
    whole, _ = project_groups(sums, index.families["mask"])
    np.testing.assert_allclose(union, whole)
    left = np.hypot(p[:, : SHAPE[1] // 2, 0], p[:, : SHAPE[1] // 2, 1]).mean()
    assert halves[1, 0] == pytest.approx(0.5 * left)
    # a single pattern frame has no pattern without itself: undefined, not a number
    assert np.isnan(halves[2]).all()


def test_cell_index_checks_its_maps():
    with pytest.raises(InputError, match="share one shape"):
        CellIndex.from_maps({"a": (np.zeros((4, 4), int), 1), "b": (np.zeros((5, 4), int), 1)})
    with pytest.raises(InputError, match="at least one family"):
        CellIndex.from_maps({})
    index = CellIndex.from_maps({"a": (np.array([[0, -1], [1, 1]]), 2)})
    assert index.pixels.tolist() == [0, 2, 3]
    np.testing.assert_array_equal(index.gather(np.array([[1.0, 9.0], [np.nan, 3.0]])), [1, 0, 3])


def test_a_uniform_translation_left_over_adds_nothing():
    rng = np.random.default_rng(4)
    p = _pattern(rng)
    k = np.array([0.0, 0.3, 1.0, 0.6, 0.0])
    shift = np.array([0.4, -0.25])  # left-over drift in some frames, px
    fields = [kk * p + (shift if i in (1, 4) else 0) for i, kk in enumerate(k)]
    index = _index()
    one_group = np.zeros(index.pixels.size, dtype=int)
    sums = _run(index, fields, [np.zeros(SHAPE)] * 5, [2, 3], [1.0, 1.0], groups=one_group)
    disp, _ = project_groups(sums, index.families["mask"])
    plain, _ = project_groups(
        _run(index, fields, [np.zeros(SHAPE)] * 5, [2, 3], [1.0, 1.0]), index.families["mask"]
    )
    # blind to the shift where the patterns were made translation-blind (their mean removed),
    # not without (the shift projects onto the pattern's own mean vector)
    assert not np.allclose(plain[[1, 4], 0], [0.3 * np.hypot(p[..., 0], p[..., 1]).mean(), 0])
    expected = k * np.hypot(p[..., 0], p[..., 1]).mean()
    np.testing.assert_allclose(disp[[0, 1, 4], 0], expected[[0, 1, 4]], atol=1e-9)


def test_each_group_builds_its_pattern_from_its_own_frames():
    # two halves beating on their own: the left contracts in frames 2-4, the right in 6-8;
    # with one weight per half and frame, each half reads its own k_t exactly, including its
    # pattern frames (leave-one-out per cell), while a shared set of frames leaves the right
    # half without a pattern built from its contraction
    rng = np.random.default_rng(5)
    p = _pattern(rng)
    left_of = np.broadcast_to(np.arange(SHAPE[1])[None, :] < SHAPE[1] // 2, SHAPE)
    k_left = np.array([0, 0, 0.6, 1.0, 0.7, 0, 0, 0, 0, 0])
    k_right = np.array([0, 0, 0, 0, 0, 0, 0.5, 1.0, 0.8, 0])
    fields = [
        np.where(left_of[..., None], kl * p, kr * p)
        for kl, kr in zip(k_left, k_right, strict=True)
    ]
    index = _index()
    acc = PatternAccumulator(index, weight_family="halves")
    assert acc.n_weight_groups == 3  # two halves and "in neither"
    frames = [2, 3, 4, 6, 7, 8]
    weights = {f: np.array([k_left[f], k_right[f], 0.0]) for f in frames}
    for f in frames:
        acc.add(f, fields[f], np.zeros(SHAPE), weights[f])
    pat = acc.patterns()
    gather = [index.gather(f) for f in fields]
    own = {
        f: index.cell_sums(pat.own_terms(gather[f], np.zeros(index.pixels.size))[0])
        for f in frames
    }
    zeros = np.zeros((len(fields), index.n_cells))
    sums = pat.sums(
        index,
        np.array([index.cell_sums((g * pat.field_perp).sum(1)) for g in gather]),
        zeros,
        own,
        {f: np.zeros(index.n_cells) for f in frames},
        weights,
    )
    halves, _ = project_groups(sums, index.families["halves"])
    mag = np.hypot(p[..., 0], p[..., 1])
    np.testing.assert_allclose(halves[:, 0], k_left * mag[left_of].mean(), atol=1e-9)
    np.testing.assert_allclose(halves[:, 1], k_right * mag[~left_of].mean(), atol=1e-9)
    # the union is the projection onto both patterns: a weighted mix of the two halves
    whole, _ = project_groups(sums, index.families["mask"])
    assert np.all(whole[[3, 7], 0] > 0) and np.allclose(whole[[0, 1, 5, 9], 0], 0)


def test_weight_family_must_exist_and_not_overlap():
    index = _index()
    with pytest.raises(InputError, match="weight_family 'rows'"):
        PatternAccumulator(index, weight_family="rows")
    both = CellIndex.from_maps({"a": (np.array([[0, 1], [1, 1]]), 2)})
    assert both.n_cells == 2
    np.testing.assert_array_equal(PatternAccumulator(both, weight_family="a").cell_group, [0, 1])


def test_leave_one_out_of_all_pattern_frames_at_once_is_that_of_one_frame_at_a_time():
    # The reference: the leave-one-out coordinate computed frame by frame (the formulation
    # before it was vectorised over the pattern frames); the numbers must be the same.
    from beatlab.signals.projection import _coordinate

    rng = np.random.default_rng(7)
    n = 30
    fields = [rng.normal(0, 1, (*SHAPE, 2)) for _ in range(n)]
    diffs = [rng.normal(0, 1, SHAPE) for _ in range(n)]
    top = [2, 5, 11, 17, 23]
    weights = [1.0, 0.5, 2.0, 1.5, 1.0]
    index = _index()
    sums = _run(index, fields, diffs, top, weights)
    import scipy.sparse as sp

    s_t = sp.csr_matrix(index.families["halves"], dtype=np.float64).T

    def group(cells):
        return np.asarray(s_t @ np.asarray(cells, dtype=np.float64).T).T

    def one_at_a_time(dot, norm, own_sq):
        g_norm = group(norm)
        with np.errstate(invalid="ignore", divide="ignore"):
            coord = np.where(g_norm > 0, group(dot) / g_norm, np.nan)
            for frame, w in sums.weights.items():
                rest = sums.total - w
                left = rest > 0
                safe = np.where(left, rest, 1.0)
                d, sq = dot[frame], own_sq[frame]
                loo_dot = np.where(left, (sums.total * d - w * sq) / safe, 0.0)
                loo_norm = np.where(
                    left,
                    (sums.total**2 * norm - 2 * sums.total * w * d + w**2 * sq) / safe**2,
                    0.0,
                )
                g_dot, g_loo = group(loo_dot), group(loo_norm)
                ratio = np.sqrt(np.where(g_norm > 0, g_loo / g_norm, np.nan))
                coord[frame] = np.where(g_loo > 0, g_dot / g_loo * ratio, np.nan)
        return coord

    for dot, norm, own in (
        (sums.field_dot, sums.norm_a, sums.field_sq),
        (sums.opd_dot, sums.norm_b, sums.opd_sq),
    ):
        want = one_at_a_time(dot, norm, own)
        got = _coordinate(dot, norm, own, sums.weights, sums.total, group)
        np.testing.assert_array_equal(got, want)
        assert not np.array_equal(got[top], group(dot)[top] / group(norm))  # left one out
