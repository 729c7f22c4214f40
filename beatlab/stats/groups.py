"""Compare groups of wells (e.g. compound x concentration) with their control wells."""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Hashable, Sequence
from typing import NamedTuple

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import stats

from beatlab.errors import InputError
from beatlab.stats.multiple import ADJUST_METHODS, adjust_pvalues

__all__ = [
    "ALTERNATIVES",
    "PRIMARY_TESTS",
    "AnovaResult",
    "compare_groups",
    "hedges_g",
    "mannwhitney_min_p",
    "one_way_anova",
]

ALTERNATIVES = ("two-sided", "less", "greater")
# Dunnett's p-values come from a randomised quasi-Monte-Carlo integral of the multivariate t;
# a fixed seed makes a re-run give the same table (the spread between seeds is ~1e-4).
_DUNNETT_SEED = 20_240_917
_MIN_N = 2
_ZERO_RELATIVE = 1e-9
_ALPHA_NOTE = 0.05


class AnovaResult(NamedTuple):
    """One-way ANOVA: F statistic, its degrees of freedom and the p-value."""

    f: float
    df_between: int
    df_within: int
    p: float


def one_way_anova(samples: Sequence[npt.ArrayLike]) -> AnovaResult:
    """Classical one-way analysis of variance (equal variances assumed).

    Parameters
    ----------
    samples : sequence of array_like of float
        One 1-D sample per group (at least two groups, at least one more value than groups).

    Returns
    -------
    AnovaResult
        ``f`` = (SS_between / (k - 1)) / (SS_within / (N - k)), ``df_between`` = k - 1,
        ``df_within`` = N - k and ``p`` = the upper tail of F(k - 1, N - k). F and p are NaN
        when there is no variance within the groups.

    Raises
    ------
    InputError
        If fewer than two groups are given or N - k < 1.

    Notes
    -----
    Sums of squares are computed in two passes about the grand mean and the group means, which
    keeps full precision on data with a large common offset (NIST StRD "SiRstv", certified
    F = 1.18046237440255, is reproduced to about 1e-12 relative).
    """
    groups = [np.asarray(s, dtype=float).ravel() for s in samples]
    k, n = len(groups), sum(g.size for g in groups)
    if k < 2 or n - k < 1 or any(g.size == 0 for g in groups):
        raise InputError(
            f"one-way ANOVA needs >= 2 non-empty groups and more values than groups, "
            f"got {k} group(s) with {n} value(s)"
        )
    grand = np.concatenate(groups).mean()
    ss_between = sum(g.size * (g.mean() - grand) ** 2 for g in groups)
    ss_within = sum(((g - g.mean()) ** 2).sum() for g in groups)
    df_between, df_within = k - 1, n - k
    if ss_within == 0:
        return AnovaResult(float("nan"), df_between, df_within, float("nan"))
    f = (ss_between / df_between) / (ss_within / df_within)
    return AnovaResult(
        float(f), df_between, df_within, float(stats.f.sf(f, df_between, df_within))
    )


def hedges_g(sample: npt.ArrayLike, control: npt.ArrayLike) -> float:
    """Bias-corrected standardised mean difference of a sample against a control.

    Parameters
    ----------
    sample, control : array_like of float, shape (n,)
        Values of the treated and of the control wells (at least three values together).

    Returns
    -------
    float
        g = J (mean_sample - mean_control) / s_pooled, with s_pooled the pooled sample SD
        (ddof 1 in each group) and J = 1 - 3 / (4 (n1 + n2) - 9). NaN when n1 + n2 < 3 or
        s_pooled is 0.

    Notes
    -----
    Hedges (1981), J Educ Stat 6:107; the correction J is the usual approximation of the exact
    gamma-function factor (Hedges & Olkin 1985).
    """
    x = np.asarray(sample, dtype=float).ravel()
    y = np.asarray(control, dtype=float).ravel()
    df = x.size + y.size - 2
    if df < 1:
        return float("nan")
    ss = ((x - x.mean()) ** 2).sum() + ((y - y.mean()) ** 2).sum()
    if ss == 0:
        return float("nan")
    d = (x.mean() - y.mean()) / math.sqrt(ss / df)
    return float((1.0 - 3.0 / (4.0 * (x.size + y.size) - 9.0)) * d)


def mannwhitney_min_p(n1: int, n2: int, *, alternative: str = "two-sided") -> float:
    """Smallest p-value the exact Mann-Whitney U test can give with samples of n1 and n2.

    Parameters
    ----------
    n1, n2 : int
        Sample sizes (>= 1).
    alternative : {"two-sided", "less", "greater"}
        Sidedness of the test.

    Returns
    -------
    float
        1 / C(n1 + n2, n1) for a one-sided test, twice that (capped at 1) for a two-sided test:
        the probability of the most extreme rank arrangement under the null hypothesis.
    """
    if alternative not in ALTERNATIVES:
        raise InputError(f"unknown alternative={alternative!r}; use one of {list(ALTERNATIVES)}")
    one_sided = 1.0 / math.comb(int(n1) + int(n2), int(n1))
    return min(1.0, 2.0 * one_sided) if alternative == "two-sided" else one_sided


def _quiet(function: Callable[[], float | np.ndarray]) -> float | np.ndarray:
    """Run a scipy test with its warnings (degenerate data) silenced; the caller notes NaNs."""
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        return function()


def _dunnett(samples: list[np.ndarray], control: np.ndarray, alternative: str) -> np.ndarray:
    """Dunnett's many-to-one p-values (already adjusted within the family)."""
    if all(np.ptp(s) == 0 for s in [control, *samples]):
        # no pooled variance: the statistic is undefined (scipy would report p = 1)
        return np.full(len(samples), np.nan)
    rng = np.random.default_rng(_DUNNETT_SEED)
    result = _quiet(
        lambda: stats.dunnett(*samples, control=control, alternative=alternative, rng=rng).pvalue
    )
    return np.asarray(result, dtype=float)


def _welch(samples: list[np.ndarray], control: np.ndarray, alternative: str) -> np.ndarray:
    """Welch's unequal-variance t-test of each sample against the control."""
    return np.array(
        [
            _quiet(
                lambda s=s: stats.ttest_ind(s, control, equal_var=False, alternative=alternative)
            ).pvalue
            for s in samples
        ],
        dtype=float,
    )


def _mannwhitney(samples: list[np.ndarray], control: np.ndarray, alternative: str) -> np.ndarray:
    """Mann-Whitney U test of each sample against the control (scipy's default method)."""
    return np.array(
        [
            _quiet(lambda s=s: stats.mannwhitneyu(s, control, alternative=alternative)).pvalue
            for s in samples
        ],
        dtype=float,
    )


_TESTS: dict[str, Callable[[list[np.ndarray], np.ndarray, str], np.ndarray]] = {
    "dunnett": _dunnett,
    "welch": _welch,
    "mannwhitney": _mannwhitney,
}
PRIMARY_TESTS = tuple(_TESTS)


def _format_value(value: object) -> str:
    """A layout value as a short label part ('' for null)."""
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return ""
    if isinstance(value, float | np.floating):
        return f"{float(value):g}"
    return str(value)


def _group_labels(wells: pd.DataFrame, by: Sequence[str]) -> pd.Series:
    """Readable group label of every row, e.g. 'E-4031 0.1 uM' (unit added after concentration)."""
    add_unit = "concentration" in by and "unit" in wells.columns and "unit" not in by
    units = wells["unit"] if add_unit else pd.Series("", index=wells.index)
    labels = []
    for values, unit in zip(wells[list(by)].itertuples(index=False), units, strict=True):
        parts = []
        for column, value in zip(by, values, strict=True):
            text = _format_value(value)
            if text and column == "concentration" and _format_value(unit):
                text = f"{text} {_format_value(unit)}"
            parts.append(text)
        labels.append(" ".join(p for p in parts if p) or "(unlabelled)")
    return pd.Series(labels, index=wells.index, dtype=object)


def _find_control(
    wells: pd.DataFrame, labels: pd.Series, control: str | None
) -> tuple[pd.Series, str]:
    """Boolean mask of the control wells and the control's label."""
    choices = sorted(set(labels))
    if control is None:
        if "role" not in wells.columns:
            raise InputError(
                "no 'role' column to find the vehicle wells; add role = 'vehicle' to the "
                f"control rows or pass control= one of {choices}"
            )
        roles = wells["role"].astype("string").str.strip().str.lower()
        mask = (roles == "vehicle").fillna(False).astype(bool)
        if not mask.any():
            raise InputError(
                "no control wells: no row has role 'vehicle'; mark the vehicle wells in the "
                f"role column or pass control= one of {choices}"
            )
    else:
        mask = labels == str(control)
        if "condition" in wells.columns:
            mask |= (wells["condition"].astype("string") == str(control)).fillna(False)
        mask = mask.astype(bool)
        if not mask.any():
            raise InputError(
                f"control={control!r} matches no group label or condition; use one of {choices}"
            )
    return mask, " + ".join(sorted(set(labels[mask])))


def _check_inputs(wells, metrics, by, primary_test, alternative, block, adjust) -> list[str]:
    """Validate the arguments of compare_groups; return the metric names as a list."""
    if not isinstance(wells, pd.DataFrame):
        raise InputError(f"wells must be a pandas DataFrame, got {type(wells).__name__}")
    if isinstance(metrics, str) or isinstance(by, str):
        raise InputError("metrics and by must be lists of column names, e.g. metrics=['x']")
    metrics = list(metrics)
    if not metrics:
        raise InputError("metrics is empty; name at least one metric column")
    if primary_test not in _TESTS:
        raise InputError(f"unknown primary_test={primary_test!r}; use one of {sorted(_TESTS)}")
    if alternative not in ALTERNATIVES:
        raise InputError(f"unknown alternative={alternative!r}; use one of {list(ALTERNATIVES)}")
    if adjust not in ADJUST_METHODS:
        raise InputError(f"unknown adjust={adjust!r}; use one of {sorted(ADJUST_METHODS)}")
    reserved = {"metric", "group", "control", "note"} & set(by)
    if reserved:
        raise InputError(f"by uses reserved output name(s) {sorted(reserved)}; rename them")
    named = [*by, *metrics, *([block] if block is not None else [])]
    missing = [c for c in named if c not in wells.columns]
    if missing:
        raise InputError(
            f"column(s) {missing} missing from the wells table; add them or name existing "
            f"columns (available: {list(wells.columns)})"
        )
    for metric in metrics:
        if not pd.api.types.is_numeric_dtype(wells[metric]):
            raise InputError(f"metric column {metric!r} is not numeric; convert it or drop it")
    return metrics


_COLUMNS = [
    "metric", "group", "control", "n_wells", "n_plates", "n_batches", "n_fov",
    "control_n_wells", "mean", "sd", "median", "control_mean", "difference", "percent_change",
    "hedges_g", "test", "p", "p_adj", "p_dunnett", "p_welch", "p_mannwhitney",
    "mannwhitney_min_p", "p_anova", "p_kruskal", "note",
]  # fmt: skip
_COUNTS = ["n_wells", "n_plates", "n_batches", "n_fov", "control_n_wells"]


def compare_groups(
    wells: pd.DataFrame,
    *,
    metrics: Sequence[str],
    by: Sequence[str] = ("compound", "concentration"),
    control: str | None = None,
    primary_test: str = "dunnett",
    alternative: str = "two-sided",
    block: str | None = None,
    adjust: str = "holm",
) -> pd.DataFrame:
    """Compare each group of wells with the control wells, metric by metric.

    Parameters
    ----------
    wells : pandas.DataFrame
        One row per plate x well x timepoint (the unit of replication) with the `by` columns,
        the metric columns and optionally ``plate``, ``batch``, ``n_fov``, ``role``,
        ``condition`` and ``unit``. Not modified.
    metrics : sequence of str
        Numeric columns to compare, each in its own unit (e.g. ``"beat_rate_bpm"``).
    by : sequence of str
        Columns whose combination defines a group.
    control : str, optional
        Group label (as in the ``group`` column) or ``condition`` value of the control wells.
        By default the control wells are the rows with ``role == "vehicle"``.
    primary_test : {"dunnett", "welch", "mannwhitney"}
        Test reported in ``p`` and adjusted into ``p_adj``. All three are always computed.
    alternative : {"two-sided", "less", "greater"}
        ``"greater"`` tests whether the group lies above the control.
    block : str, optional
        Column (``"plate"`` or ``"batch"``) whose levels each carry their own control wells;
        groups are then compared with the control of the same block (see Notes).
    adjust : {"holm", "bh", "none"}
        Adjustment of the primary p-values across the groups of one metric.

    Returns
    -------
    pandas.DataFrame
        One row per metric and non-control group: ``metric``, the `by` columns, ``group`` and
        ``control`` (labels), ``n_wells`` (finite values used), ``n_plates``, ``n_batches``,
        ``n_fov`` (sum; each null without its column), ``control_n_wells``, ``mean``, ``sd``
        (ddof 1), ``median`` (metric units, raw values), ``control_mean``, ``difference``
        (group minus control mean), ``percent_change`` (100 x difference / control_mean, null
        when that is 0), ``hedges_g``, ``test``, ``p``, ``p_adj``, ``p_dunnett``, ``p_welch``,
        ``p_mannwhitney``, ``mannwhitney_min_p`` (smallest p the exact U test can reach at these
        n, for the chosen alternative), ``p_anova``, ``p_kruskal`` (across the control and all
        tested groups of the metric, repeated on each of its rows) and ``note``.

    Raises
    ------
    InputError
        If a named column is missing or not numeric, no control wells are found, or an option
        is unknown.

    Notes
    -----
    Non-finite metric values (e.g. the null amplitude of an arrested well) are dropped per
    metric. A group (or a control) with fewer than 2 values gets null p-values and a note.

    Tests: Dunnett (1955), J Am Stat Assoc 50:1096, via ``scipy.stats.dunnett`` (seeded); Welch
    (1947) t-test; Mann & Whitney (1947) U test (scipy's default exact/asymptotic choice);
    one-way ANOVA (:func:`one_way_anova`) and Kruskal & Wallis (1952). Effect size: Hedges' g
    (:func:`hedges_g`). ``p_adj`` uses :func:`beatlab.stats.multiple.adjust_pvalues` within
    each metric; Dunnett's p-values already control the family-wise error of the comparisons
    with the control, so with ``primary_test="dunnett"`` ``p_adj`` equals ``p`` whatever
    `adjust` is.

    Blocking: for each block, the mean of its control wells is subtracted from every well of
    that block (control wells included); wells in blocks without a control value are left
    out (noted). All tests, ``difference`` and ``hedges_g`` then use these within-block
    differences, while ``mean``, ``sd``, ``median`` and ``control_mean`` describe the raw
    values. This is a simple paired-by-block approach: it ignores that the subtracted block
    means are themselves estimates (the wells of a block share them), and shrinks the control
    spread by a factor (n_b - 1) / n_b, so p-values are somewhat optimistic with few control
    wells per block. Include ``timepoint`` in `by` when the table holds several timepoints.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> wells = pd.DataFrame({
    ...     "compound": ["DMSO"] * 6 + ["drug"] * 6,
    ...     "concentration": [0.0] * 6 + [0.1] * 6,
    ...     "role": ["vehicle"] * 6 + ["sample"] * 6,
    ...     "beat_rate_bpm": np.r_[rng.normal(60, 3, 6), rng.normal(45, 3, 6)],
    ... })
    >>> table = compare_groups(wells, metrics=["beat_rate_bpm"])
    >>> table["group"].tolist(), bool(table["p_adj"].iloc[0] < 0.01)
    (['drug 0.1'], True)
    """
    metrics = _check_inputs(wells, metrics, by, primary_test, alternative, block, adjust)
    wells = wells.reset_index(drop=True)  # rows are looked up by label below; make them unique
    by = list(by)
    labels = _group_labels(wells, by)
    is_control, control_label = _find_control(wells, labels, control)
    options = {"primary_test": primary_test, "alternative": alternative, "adjust": adjust}
    rows = [
        row
        for metric in metrics
        for row in _compare_metric(
            wells, metric, by, labels, is_control, control_label, block, options
        )
    ]
    table = pd.DataFrame(rows, columns=[_COLUMNS[0], *by, *_COLUMNS[1:]])
    return table.astype(dict.fromkeys(_COUNTS, "Int64"))


def _prepare_values(
    wells: pd.DataFrame, metric: str, is_control: pd.Series, block: str | None
) -> tuple[pd.Series, pd.Series, pd.Series]:
    """Raw values, values to test (within-block differences when blocked) and the used mask."""
    raw = wells[metric].astype(float)
    used = pd.Series(np.isfinite(raw.to_numpy()), index=wells.index)
    if block is None:
        return raw, raw, used
    blocks = wells[block]
    control_means = raw[is_control & used].groupby(blocks[is_control & used], observed=True).mean()
    offset = blocks.map(control_means).astype(float)
    return raw, raw - offset, used & offset.notna()


def _describe(frame: pd.DataFrame, raw: pd.Series) -> dict[str, object]:
    """Counts and raw descriptive statistics of the used wells of one group."""
    values = raw[frame.index].to_numpy()
    n = values.size
    return {
        "n_wells": n,
        "n_plates": frame["plate"].nunique() if "plate" in frame else pd.NA,
        "n_batches": frame["batch"].nunique() if "batch" in frame else pd.NA,
        "n_fov": frame["n_fov"].sum() if "n_fov" in frame else pd.NA,
        "mean": values.mean() if n else np.nan,
        "sd": values.std(ddof=1) if n >= 2 else np.nan,
        "median": float(np.median(values)) if n else np.nan,
    }


def _compare_metric(wells, metric, by, labels, is_control, control_label, block, options):
    """The rows of one metric: descriptive statistics, tests and notes per group."""
    raw, tested, used = _prepare_values(wells, metric, is_control, block)
    control_values = tested[is_control & used].to_numpy()
    control_mean = float(raw[is_control & used].mean()) if control_values.size else np.nan
    rows: list[dict[str, object]] = []
    samples: dict[int, np.ndarray] = {}
    for key, frame in wells[~is_control].groupby(by, sort=True, dropna=False, observed=True):
        kept = frame[used[frame.index]]
        row = {"metric": metric, **_key_dict(by, key), "group": labels[frame.index[0]]}
        row |= {"control": control_label, "control_n_wells": control_values.size}
        row |= _describe(kept, raw) | {"control_mean": control_mean, "note": []}
        row["test"] = options["primary_test"]
        if block is not None and len(kept) < len(frame[np.isfinite(raw[frame.index])]):
            dropped = len(frame[np.isfinite(raw[frame.index])]) - len(kept)
            row["note"].append(
                f"{dropped} well(s) without control wells in their {block} left out"
            )
        values = tested[kept.index].to_numpy()
        if control_values.size and values.size:
            row["difference"] = values.mean() - control_values.mean()
            scale = float(max(np.abs(values).max(), np.abs(control_values).max()))
            row["percent_change"] = _percent(
                row["difference"], control_mean, row["note"], scale=scale
            )
        if len(kept) < _MIN_N or control_values.size < _MIN_N:
            row["note"].append(
                f"too few values to test (n = {len(kept)} vs control n = {control_values.size})"
            )
        else:
            samples[len(rows)] = values
        rows.append(row)
    _add_tests(rows, samples, control_values, options)
    for row in rows:
        row["note"] = "; ".join(row["note"])
    return rows


def _key_dict(by: Sequence[str], key: Hashable) -> dict[str, object]:
    """The by-column values of one group as a dict."""
    key = key if isinstance(key, tuple) else (key,)
    return dict(zip(by, key, strict=True))


def _percent(difference: float, control_mean: float, note: list[str], *, scale: float) -> float:
    """100 x difference / control mean, or NaN with a note when the control mean is 0.

    "0" within rounding of the values' own ``scale``: a column already normalised to its
    control (mean 0 up to 1e-15) has no meaningful percent change.
    """
    if abs(control_mean) <= _ZERO_RELATIVE * scale:
        note.append("control mean is 0: no percent change")
        return np.nan
    return 100.0 * difference / control_mean


def _add_tests(rows, samples: dict[int, np.ndarray], control: np.ndarray, options) -> None:
    """Fill the p-value, effect-size and family columns of the rows of one metric in place."""
    alternative = options["alternative"]
    order = sorted(samples)
    arrays = [samples[i] for i in order]
    p_values = {name: np.full(len(rows), np.nan) for name in _TESTS}
    if arrays:
        for name, test in _TESTS.items():
            p_values[name][order] = test(arrays, control, alternative)
        anova = one_way_anova([control, *arrays]).p
        kruskal = _kruskal([control, *arrays])
    else:
        anova = kruskal = np.nan
    primary = p_values[options["primary_test"]]
    method = "none" if options["primary_test"] == "dunnett" else options["adjust"]
    p_adj = adjust_pvalues(primary, method=method)
    for i, row in enumerate(rows):
        row |= {f"p_{name}": float(p_values[name][i]) for name in _TESTS}
        row |= {"p": float(primary[i]), "p_adj": float(p_adj[i])}
        row |= {"p_anova": anova, "p_kruskal": kruskal, "hedges_g": np.nan}
        row["mannwhitney_min_p"] = (
            mannwhitney_min_p(row["n_wells"], control.size, alternative=alternative)
            if row["n_wells"] and control.size
            else np.nan
        )
        if i in samples:
            row["hedges_g"] = hedges_g(samples[i], control)
            if np.isnan(primary[i]):
                row["note"].append("no variance within the groups: p undefined")
        if row["mannwhitney_min_p"] > _ALPHA_NOTE:
            row["note"].append(
                f"Mann-Whitney cannot reach p < {_ALPHA_NOTE} at n = {row['n_wells']} vs "
                f"{control.size} (smallest p {row['mannwhitney_min_p']:.3g})"
            )


def _kruskal(samples: list[np.ndarray]) -> float:
    """Kruskal-Wallis p-value, NaN when all values are tied."""
    if np.ptp(np.concatenate(samples)) == 0:
        return np.nan
    return float(_quiet(lambda: stats.kruskal(*samples)).pvalue)
