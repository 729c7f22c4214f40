"""Plate quality readouts: Z'-factor, binomial confidence intervals, incidence of rhythm events."""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import stats

from beatlab.errors import InputError

__all__ = [
    "BINOMIAL_CI_METHODS",
    "INCIDENCE_FLAGS",
    "binomial_ci",
    "incidence_table",
    "plate_z_prime",
    "z_prime",
]


def _finite(values: npt.ArrayLike, name: str) -> np.ndarray:
    """The finite values of a 1-D numeric input; InputError when fewer than two remain."""
    array = np.asarray(values, dtype=float).ravel()
    array = array[np.isfinite(array)]
    if array.size < 2:
        raise InputError(
            f"{name} has {array.size} finite value(s); Z' needs at least 2 control wells each"
        )
    return array


def z_prime(positive: npt.ArrayLike, negative: npt.ArrayLike) -> float:
    """Z'-factor: how well positive and negative control wells separate on one metric.

    Parameters
    ----------
    positive, negative : array_like of float, shape (n,)
        Metric values of the positive and of the negative control wells, in the metric's
        unit (the unit cancels). NaN and infinite values are ignored.

    Returns
    -------
    float
        Z' = 1 - 3 (sd_p + sd_n) / abs(mean_p - mean_n); at most 1. ``-inf`` when the means
        are equal and the spread is not zero, NaN when both are equal and the spread is zero.

    Raises
    ------
    InputError
        If either control has fewer than two finite values.

    Notes
    -----
    Zhang, Chung & Oldenburg (1999), J Biomol Screen 4:67. The standard deviations are sample
    standard deviations (``ddof=1``). Z' >= 0.5 is usually read as an excellent separation,
    0 < Z' < 0.5 as usable, Z' <= 0 as overlapping controls.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> round(z_prime(rng.normal(100, 5, 48), rng.normal(10, 5, 48)), 1)
    0.7
    """
    pos = _finite(positive, "positive")
    neg = _finite(negative, "negative")
    spread = 3.0 * (pos.std(ddof=1) + neg.std(ddof=1))
    window = abs(pos.mean() - neg.mean())
    if window == 0:
        return float("nan") if spread == 0 else float("-inf")
    return float(1.0 - spread / window)


def plate_z_prime(
    wells: pd.DataFrame,
    *,
    metrics: Sequence[str],
    plate: str = "plate",
    role: str = "role",
) -> pd.DataFrame:
    """Z'-factor of each plate and metric from the plate's control wells.

    Parameters
    ----------
    wells : pandas.DataFrame
        One row per well (plate x well x timepoint), with the `plate` and `role` columns and
        the metric columns.
    metrics : sequence of str
        Metric columns to assess, e.g. ``["beat_rate_bpm", "displacement_um"]``.
    plate, role : str
        Names of the plate column and of the role column (values ``"positive"``,
        ``"negative"``, ``"vehicle"``, ``"sample"``).

    Returns
    -------
    pandas.DataFrame
        One row per plate and metric with columns `plate` (named as the `plate` argument),
        ``metric``, ``z_prime`` (null when either control has fewer than two finite values),
        ``n_positive``, ``n_negative`` (finite values used) and ``negative_role`` (the role
        used as negative control on that plate).

    Raises
    ------
    InputError
        If a named column is missing.

    Notes
    -----
    Positive controls are rows with role ``"positive"``. The negative controls of a plate are
    its rows with role ``"negative"``; a plate without any uses its ``"vehicle"`` rows. See
    :func:`z_prime` for the formula (Zhang, Chung & Oldenburg 1999).
    """
    metrics = _check_columns(wells, metrics, extra=(plate, role))
    rows = []
    for plate_id, frame in wells.groupby(plate, sort=True, dropna=False, observed=True):
        roles = frame[role].astype("string").str.lower()
        negative_role = "negative" if (roles == "negative").any() else "vehicle"
        for metric in metrics:
            values = pd.to_numeric(frame[metric], errors="coerce").to_numpy(dtype=float)
            pos = values[(roles == "positive").to_numpy(dtype=bool, na_value=False)]
            neg = values[(roles == negative_role).to_numpy(dtype=bool, na_value=False)]
            n_pos, n_neg = int(np.isfinite(pos).sum()), int(np.isfinite(neg).sum())
            value = z_prime(pos, neg) if min(n_pos, n_neg) >= 2 else float("nan")
            rows.append((plate_id, metric, value, n_pos, n_neg, negative_role))
    columns = [plate, "metric", "z_prime", "n_positive", "n_negative", "negative_role"]
    return pd.DataFrame(rows, columns=columns)


def _check_columns(wells: pd.DataFrame, metrics: Sequence[str], *, extra: Sequence[str]) -> list:
    """The metric names as a list, after checking that every named column exists."""
    if not isinstance(wells, pd.DataFrame):
        raise InputError(f"wells must be a pandas DataFrame, got {type(wells).__name__}")
    if isinstance(metrics, str):
        raise InputError(f"metrics must be a list of column names; pass [{metrics!r}]")
    metrics = list(metrics)
    missing = [c for c in [*extra, *metrics] if c not in wells.columns]
    if missing:
        raise InputError(
            f"column(s) {missing} missing from the wells table; add them or name existing "
            f"columns (available: {list(wells.columns)})"
        )
    return metrics


def _wilson(k: int, n: int, z: float) -> tuple[float, float]:
    """Wilson (1927) score interval."""
    phat = k / n
    denom = 1.0 + z * z / n
    centre = (phat + z * z / (2 * n)) / denom
    half = z / denom * np.sqrt(phat * (1 - phat) / n + z * z / (4 * n * n))
    # at k = 0 (k = n) the lower (upper) bound is exactly 0 (1); rounding would blur it
    low = 0.0 if k == 0 else max(0.0, centre - half)
    high = 1.0 if k == n else min(1.0, centre + half)
    return low, high


def _clopper_pearson(k: int, n: int, z: float) -> tuple[float, float]:
    """Clopper & Pearson (1934) exact interval from beta quantiles."""
    alpha = 2.0 * stats.norm.sf(z)
    low = 0.0 if k == 0 else float(stats.beta.ppf(alpha / 2, k, n - k + 1))
    high = 1.0 if k == n else float(stats.beta.ppf(1 - alpha / 2, k + 1, n - k))
    return low, high


_CI_METHODS: dict[str, Callable[[int, int, float], tuple[float, float]]] = {
    "wilson": _wilson,
    "clopper-pearson": _clopper_pearson,
}
BINOMIAL_CI_METHODS = tuple(_CI_METHODS)


def binomial_ci(
    k: int, n: int, *, confidence: float = 0.95, method: str = "wilson"
) -> tuple[float, float]:
    """Confidence interval of a proportion k / n (e.g. the share of wells with an event).

    Parameters
    ----------
    k : int
        Number of successes (wells with the event), 0 <= k <= n.
    n : int
        Number of trials (wells assessed), n >= 0.
    confidence : float
        Two-sided confidence level in (0, 1).
    method : {"wilson", "clopper-pearson"}
        Wilson score interval (default) or the exact Clopper-Pearson interval.

    Returns
    -------
    tuple of float
        (low, high) in [0, 1]; (NaN, NaN) when n == 0.

    Raises
    ------
    InputError
        If k or n is not a whole number, k is outside [0, n], the confidence is outside
        (0, 1), or the method is unknown.

    Notes
    -----
    Wilson (1927), J Am Stat Assoc 22:209: with z the standard-normal quantile and
    p = k / n, the interval is (p + z^2/(2n) +- z sqrt(p(1-p)/n + z^2/(4n^2))) / (1 + z^2/n).
    Clopper & Pearson (1934), Biometrika 26:404: the alpha/2 quantile of Beta(k, n-k+1) and
    the 1-alpha/2 quantile of Beta(k+1, n-k) (0 when k = 0, 1 when k = n). Both agree with
    ``statsmodels.stats.proportion.proportion_confint`` (``"wilson"``, ``"beta"``).

    Examples
    --------
    >>> [round(v, 4) for v in binomial_ci(3, 10)]
    [0.1078, 0.6032]
    """
    if method not in _CI_METHODS:
        raise InputError(f"unknown interval method={method!r}; use one of {sorted(_CI_METHODS)}")
    if not 0.0 < confidence < 1.0:
        raise InputError(f"confidence must lie in (0, 1), got {confidence!r}; e.g. pass 0.95")
    if float(k) != int(k) or float(n) != int(n) or not 0 <= int(k) <= int(n):
        raise InputError(f"need whole numbers 0 <= k <= n, got k={k!r}, n={n!r}")
    k, n = int(k), int(n)
    if n == 0:
        return float("nan"), float("nan")
    z = float(stats.norm.isf((1.0 - confidence) / 2.0))
    low, high = _CI_METHODS[method](k, n, z)
    return float(low), float(high)


def _ead_flag(wells: pd.DataFrame) -> pd.Series:
    """EAD-like beats: at least one beat with a secondary peak (null when unknown)."""
    count = pd.to_numeric(wells["secondary_peak_beats"], errors="coerce")
    return (count > 0).astype("boolean").mask(count.isna())


def _irregular_flag(wells: pd.DataFrame) -> pd.Series:
    """Irregular rhythm class (null when the rhythm is unknown)."""
    rhythm = wells["rhythm"].astype("string")
    return (rhythm == "irregular").astype("boolean")


def _arrest_flag(wells: pd.DataFrame) -> pd.Series:
    """Arrest: no beats counted, or a quiescent rhythm (null when neither is known)."""
    known = pd.Series(False, index=wells.index)
    arrested = pd.Series(False, index=wells.index)
    if "beat_count" in wells.columns:
        count = pd.to_numeric(wells["beat_count"], errors="coerce")
        known |= count.notna()
        arrested |= (count == 0).fillna(False)
    if "rhythm" in wells.columns:
        rhythm = wells["rhythm"].astype("string")
        known |= rhythm.notna()
        arrested |= (rhythm == "quiescent").fillna(False).astype(bool)
    return arrested.astype("boolean").mask(~known)


# name -> (flag function, columns of which at least one is needed)
_FLAGS: dict[str, tuple[Callable[[pd.DataFrame], pd.Series], tuple[str, ...]]] = {
    "ead": (_ead_flag, ("secondary_peak_beats",)),
    "irregular": (_irregular_flag, ("rhythm",)),
    "arrest": (_arrest_flag, ("beat_count", "rhythm")),
}
INCIDENCE_FLAGS = tuple(_FLAGS)


def incidence_table(
    wells: pd.DataFrame,
    *,
    by: Sequence[str] = ("compound", "concentration"),
    flags: Sequence[str] = INCIDENCE_FLAGS,
    confidence: float = 0.95,
) -> pd.DataFrame:
    """Share of wells per group with EAD-like beats, irregular rhythm or arrest.

    Parameters
    ----------
    wells : pandas.DataFrame
        One row per well (plate x well x timepoint) with the `by` columns and the columns
        the flags need: ``secondary_peak_beats`` (count per well), ``rhythm`` (class) and
        ``beat_count``.
    by : sequence of str
        Columns that define a group.
    flags : sequence of {"ead", "irregular", "arrest"}
        Events to count. ``"ead"``: ``secondary_peak_beats > 0``; ``"irregular"``:
        ``rhythm == "irregular"``; ``"arrest"``: ``beat_count == 0`` or
        ``rhythm == "quiescent"``.
    confidence : float
        Level of the Wilson score intervals.

    Returns
    -------
    pandas.DataFrame
        One row per group: the `by` columns, ``n_wells`` (rows in the group), then for each
        flag F: ``F_wells`` (k, wells with the event), ``F_n`` (wells where the event could be
        assessed), ``F_fraction`` (k / n, null when n = 0), ``F_low``, ``F_high`` (Wilson
        interval); and ``duration_90_stv_s_median`` (median over wells of the short-term
        variability of the 90 % duration in s; null when the column is absent or all null).

    Raises
    ------
    InputError
        If a flag is unknown, or the columns a flag or grouping needs are missing.

    Notes
    -----
    A well with a null input for a flag (e.g. no rhythm class) is left out of that flag's n.
    Arrested wells stay in the denominator of the ``"irregular"`` share, so a compound that
    stops beating does not look more regular. Intervals: Wilson (1927), see
    :func:`binomial_ci`. Wells are the unit: fields of view were aggregated upstream.
    """
    unknown = [f for f in flags if f not in _FLAGS]
    if isinstance(flags, str) or unknown:
        raise InputError(f"unknown flag(s) {flags!r}; use a list from {sorted(_FLAGS)}")
    _check_columns(wells, [], extra=list(by))
    for name in flags:
        if not any(c in wells.columns for c in _FLAGS[name][1]):
            raise InputError(
                f"flag {name!r} needs column(s) {list(_FLAGS[name][1])}; add them or drop it"
            )
    wells = wells.reset_index(drop=True)  # rows are looked up by label below; make them unique
    flagged = {name: _FLAGS[name][0](wells) for name in flags}
    stv = (
        pd.to_numeric(wells["duration_90_stv_s"], errors="coerce")
        if "duration_90_stv_s" in wells.columns
        else pd.Series(np.nan, index=wells.index)
    )
    rows = []
    for key, frame in wells.groupby(list(by), sort=True, dropna=False, observed=True):
        row = dict(zip(by, key, strict=True))
        row["n_wells"] = len(frame)
        for name, flag in flagged.items():
            values = flag.loc[frame.index].dropna()
            k, n = int(values.sum()), int(values.size)
            low, high = binomial_ci(k, n, confidence=confidence)
            row |= {f"{name}_wells": k, f"{name}_n": n, f"{name}_low": low, f"{name}_high": high}
            row[f"{name}_fraction"] = k / n if n else np.nan
        group_stv = stv.loc[frame.index].dropna()
        row["duration_90_stv_s_median"] = group_stv.median() if group_stv.size else np.nan
        rows.append(row)
    columns = [*by, "n_wells"]
    for name in flags:
        columns += [f"{name}_{s}" for s in ("wells", "n", "fraction", "low", "high")]
    return pd.DataFrame(rows, columns=[*columns, "duration_90_stv_s_median"])
