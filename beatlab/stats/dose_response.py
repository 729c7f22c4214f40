"""Concentration-response fits: the four-parameter logistic per compound and metric.

``logistic4`` is the model, ``fit_dose_response`` fits one curve (EC50 with a confidence
interval, Hill slope, asymptotes, a reason when no curve is fitted) and
``dose_response_table`` fits every compound x metric of a well table, with the vehicle wells
of the same plates at concentration 0.
"""

import dataclasses
import warnings
from collections import Counter

import numpy as np
import pandas as pd
from scipy import stats

from beatlab.errors import BeatlabWarning, InputError
from beatlab.stats import _fit4pl

__all__ = [
    "CI_METHODS",
    "CMAX_MULTIPLES",
    "FIT_STATUSES",
    "MOLAR_UNITS",
    "TABLE_COLUMNS",
    "DoseResponseFit",
    "dose_response_table",
    "fit_dose_response",
    "logistic4",
]

FIT_STATUSES = (
    "ok",
    "extrapolated",
    "flat response",
    "too few concentrations",
    "too few points",
    "no convergence",
)
"""Values of ``DoseResponseFit.fit``: a curve was fitted (first two) or why not."""

FLAT_ALPHA = 0.05
"""Significance level of the extra-sum-of-squares F-test against a constant response."""

REACH_DECADES = 1.0
"""The EC50 search and its CI extend this many decades beyond the tested concentrations."""

MOLAR_UNITS = {"pM": -12, "nM": -9, "uM": -6, "µM": -6, "μM": -6, "mM": -3, "M": 0}
"""Convertible concentration units: name -> power of ten of their value in mol/L."""

CMAX_MULTIPLES = (1, 10, 30)
"""Multiples of Cmax at which ``dose_response_table`` reports the predicted effect."""

_FIT_FIELDS = ("ec50", "ec50_low", "ec50_high", "hill", "bottom", "top", "r2", "n")
TABLE_COLUMNS = (
    "compound",
    "metric",
    "unit",
    *_FIT_FIELDS,
    "n_concentrations",
    "fit",
    "direction",
    *(f"effect_at_{k}x_cmax" for k in CMAX_MULTIPLES),
)
"""Columns of ``dose_response_table`` (after any ``by`` columns)."""


def logistic4(x, *, bottom, top, ec50, hill):
    """Four-parameter logistic concentration-response curve.

    Parameters
    ----------
    x : array_like
        Concentrations, >= 0, in the unit of ``ec50``; 0 is the vehicle.
    bottom : float
        Response at concentration 0 (metric units). Above ``top`` for a decreasing curve.
    top : float
        Response approached at high concentration (metric units).
    ec50 : float
        Concentration of the half-way response, > 0.
    hill : float
        Hill slope, > 0 (dimensionless); the sign of the effect is in ``top - bottom``.

    Returns
    -------
    ndarray or numpy scalar
        ``bottom + (top - bottom) / (1 + (ec50 / x)^hill)``, shaped like ``x``; exactly
        ``bottom`` at x = 0.

    Raises
    ------
    InputError
        If a concentration is negative or NaN, or ``ec50`` or ``hill`` is not positive.

    Notes
    -----
    The Hill (1910) equation with asymptotes, the four-parameter logistic of DeLean, Munson
    & Rodbard (1978), Am J Physiol 235:E97. It is evaluated as
    ``expit(hill ln10 (log10 x - log10 ec50))``, which is exact at x = 0 and cannot overflow.
    Identities: y(ec50) = (bottom + top) / 2; EC90 / EC10 = 81^(1 / hill).

    Examples
    --------
    >>> float(logistic4(30.0, bottom=60.0, top=90.0, ec50=30.0, hill=1.3))
    75.0
    """
    x = np.asarray(x, dtype=float)
    if np.any(np.isnan(x)) or np.any(x < 0):
        raise InputError("logistic4: concentrations must be >= 0 and not NaN; fix or drop them")
    for name, value in (("ec50", ec50), ("hill", hill)):
        if not (np.isfinite(value) and value > 0):
            raise InputError(f"logistic4: {name} must be positive and finite, got {value}")
    f = _fit4pl.fraction(_fit4pl.log_concentration(x), np.log10(ec50), hill)
    return (bottom + (top - bottom) * f)[()]


@dataclasses.dataclass(frozen=True)
class DoseResponseFit:
    """Result of one four-parameter logistic fit; None marks an undefined value.

    Attributes
    ----------
    ec50, ec50_low, ec50_high : float or None
        EC50 (IC50 for a decreasing curve) and its confidence bounds, in the concentration
        unit. The bounds are None when the EC50 lies outside the tested non-zero
        concentrations, or when the interval does not close within ``REACH_DECADES`` of them.
        An extrapolated EC50 is searched no further than ``REACH_DECADES`` beyond the tested
        range; one on that limit only says "at least this far out".
    hill : float or None
        Hill slope (> 0).
    bottom, top : float or None
        Response at concentration 0 and at high concentration (metric units). For a flat
        response both are the mean response.
    r2 : float or None
        1 - RSS / total sum of squares of the fitted curve.
    n : int
        Points used (finite responses, vehicle included).
    n_concentrations : int
        Distinct non-zero concentrations among them.
    fit : str
        One of ``FIT_STATUSES``.
    direction : str or None
        ``"increase"`` or ``"decrease"`` (sign of ``top - bottom``) when a curve was fitted.
    """

    ec50: float | None
    ec50_low: float | None
    ec50_high: float | None
    hill: float | None
    bottom: float | None
    top: float | None
    r2: float | None
    n: int
    n_concentrations: int
    fit: str
    direction: str | None

    @property
    def fitted(self):
        """True when a curve was fitted (``fit`` is ``"ok"`` or ``"extrapolated"``)."""
        return self.fit in ("ok", "extrapolated")

    def predict(self, concentration):
        """Fitted response at ``concentration`` (the mean if flat, NaN if not fitted)."""
        if self.fitted:
            return logistic4(
                concentration, bottom=self.bottom, top=self.top, ec50=self.ec50, hill=self.hill
            )
        level = self.bottom if self.fit == "flat response" else np.nan
        return np.full(np.shape(concentration), level, dtype=float)[()]


def _ci_profile(logx, y, params, rss, *, grid, profile_grid, confidence, n_boot, seed):
    dof = y.size - 4
    threshold = rss * (1.0 + stats.f.ppf(confidence, 1, dof) / dof)
    return _fit4pl.profile_bounds(logx, y, params[2], threshold, grid, profile_grid)


def _ci_bootstrap(logx, y, params, rss, *, grid, profile_grid, confidence, n_boot, seed):
    rng = np.random.default_rng(seed)
    fitted_y = params[0] + (params[1] - params[0]) * _fit4pl.fraction(logx, *params[2:])
    # Centred residuals inflated by sqrt(n / (n - p)) so their spread matches the error's.
    resid = y - fitted_y
    resid = (resid - resid.mean()) * np.sqrt(y.size / (y.size - 4))
    draws = np.full(n_boot, np.nan)
    for b in range(n_boot):
        refit = _fit4pl.polish(logx, fitted_y + rng.choice(resid, y.size), params, grid[[0, -1]])
        if refit is not None:
            draws[b] = refit[0][2]
    draws = draws[np.isfinite(draws)]
    if draws.size < 2:
        return [None, None]
    ends = np.quantile(draws, [(1.0 - confidence) / 2.0, (1.0 + confidence) / 2.0])
    # A percentile on the search limit means the interval is open on that side.
    return [
        None if np.isclose(e, edge) else float(e)
        for e, edge in zip(ends, grid[[0, -1]], strict=True)
    ]


CI_METHODS = {"profile": _ci_profile, "bootstrap": _ci_bootstrap}
"""EC50 confidence-interval methods: name -> private function."""


def _check_options(ci, confidence, n_boot, min_concentrations):
    if ci not in CI_METHODS:
        raise InputError(f"ci={ci!r} is not a CI method; use one of {sorted(CI_METHODS)}")
    if not (isinstance(confidence, (int, float)) and 0.0 < confidence < 1.0):
        raise InputError(f"confidence must lie between 0 and 1, got {confidence!r}; e.g. 0.95")
    if not (isinstance(n_boot, (int, np.integer)) and n_boot >= 1):
        raise InputError(f"n_boot must be a positive integer, got {n_boot!r}; e.g. 1000")
    if not (isinstance(min_concentrations, (int, np.integer)) and min_concentrations >= 3):
        raise InputError(
            f"min_concentrations must be an integer >= 3, got {min_concentrations!r}; e.g. 4"
        )


def _validate_pairs(concentration, response):
    x = np.asarray(concentration, dtype=float)
    y = np.asarray(response, dtype=float)
    if x.ndim != 1 or x.shape != y.shape:
        raise InputError(
            f"concentration and response must be 1-D of equal length, got shapes {x.shape} "
            f"and {y.shape}; pass one value per well"
        )
    if np.any(~np.isfinite(x)) or np.any(x < 0):
        raise InputError("concentrations must be finite and >= 0; fix or drop the others")
    if np.any(np.isinf(y)):
        raise InputError("response has infinite values; replace them with NaN to drop them")
    keep = ~np.isnan(y)
    return x[keep], y[keep]


def _not_fitted(reason, n, n_concentrations, level=None):
    return DoseResponseFit(
        None, None, None, None, level, level, None, n, n_concentrations, reason, None
    )


def _is_flat(rss, tss, n):
    """Extra-sum-of-squares F-test of the 4PL (4 parameters) against the mean (1)."""
    if rss <= 0.0:
        return False
    f_value = ((tss - rss) / 3.0) / (rss / (n - 4))
    return bool(stats.f.sf(f_value, 3, n - 4) > FLAT_ALPHA)


def fit_dose_response(
    concentration,
    response,
    *,
    ci="profile",
    confidence=0.95,
    n_boot=1000,
    seed=None,
    min_concentrations=4,
):
    """Fit a four-parameter logistic curve to replicate responses at several concentrations.

    Parameters
    ----------
    concentration : array_like, shape (N,)
        Concentration of each well (any one unit), >= 0; 0 is the vehicle and enters the
        fit. Replicates (several wells per concentration) are expected.
    response : array_like, shape (N,)
        The metric in each well (its own units); NaN wells are dropped.
    ci : {"profile", "bootstrap"}
        EC50 confidence-interval method (keys of ``CI_METHODS``).
    confidence : float
        Confidence level of the interval, e.g. 0.95.
    n_boot : int
        Bootstrap resamples (``ci="bootstrap"`` only).
    seed : int or None
        Seed of the bootstrap's random generator.
    min_concentrations : int
        Fewest distinct non-zero concentrations to attempt a fit (>= 3).

    Returns
    -------
    DoseResponseFit
        ``fit`` is ``"ok"``; ``"extrapolated"`` when the EC50 lies outside the tested
        non-zero concentrations (its bounds then None); or the reason no curve was fitted:
        ``"too few concentrations"``, ``"too few points"`` (fewer than 5 wells: no degree
        of freedom left for the error), ``"flat response"``, ``"no convergence"``.

    Raises
    ------
    InputError
        On mismatched shapes, negative or non-finite concentrations, infinite responses, or
        an unknown option value.

    Notes
    -----
    Model: ``logistic4`` (DeLean, Munson & Rodbard 1978, Am J Physiol 235:E97), fitted by
    least squares in (bottom, top, log10 EC50, Hill) with Hill in [0.1, 10] and log10 EC50
    within the tested non-zero range widened by ``REACH_DECADES`` each side. Starting values
    come from a grid over log10 EC50 (20 per decade) x Hill (41 log-spaced), where bottom and
    top are solved exactly by linear least squares, then ``scipy.optimize.least_squares``
    (trust region reflective, analytic Jacobian) polishes all four.

    Flat response: the extra-sum-of-squares F-test of the curve against a constant mean,
    F = ((RSS_0 - RSS) / 3) / (RSS / (n - 4)) on (3, n - 4) degrees of freedom; the response
    is called flat when p > 0.05 (``FLAT_ALPHA``). The test is approximate, as EC50 and Hill
    are not identified under the constant model (Bates & Watts 1988, Nonlinear Regression
    Analysis and Its Applications, Wiley; from memory).

    Profile CI (default): the residual sum of squares is profiled over log10 EC50 with Hill,
    bottom and top re-optimised at each value; the bounds are where it crosses the F-based
    threshold RSS_min (1 + F(1, n - 4; confidence) / (n - 4)) (Bates & Watts 1988, ch. 6;
    Venzon & Moolgavkar 1988, Appl Stat 37:87; from memory). A side that does not cross
    within the tested range x 10 is None. Bootstrap CI: residual bootstrap (centred residuals
    scaled by sqrt(n / (n - 4)) added to the fitted curve, each resample refitted from the
    estimate), percentile interval of log10 EC50 (Efron & Tibshirani 1993, An Introduction to
    the Bootstrap, ch. 9 and 13; from memory). Both intervals are conditional on the Hill
    bound: for an all-or-none response (Hill on its limit of 10) the EC50 could lie anywhere
    between the two concentrations around the step, and the interval understates that.

    Examples
    --------
    >>> conc = np.repeat([0, 1, 3, 10, 30, 100, 300, 1000], 4)
    >>> rate = logistic4(conc, bottom=60, top=90, ec50=30, hill=1.3)
    >>> rng = np.random.default_rng(0)
    >>> fit = fit_dose_response(conc, rate + rng.normal(0, 1.5, conc.size))
    >>> fit.fit, fit.direction
    ('ok', 'increase')
    """
    _check_options(ci, confidence, n_boot, min_concentrations)
    x, y = _validate_pairs(concentration, response)
    n, tested = y.size, np.unique(x[x > 0])
    if tested.size < min_concentrations or np.unique(x).size < 4:
        return _not_fitted("too few concentrations", n, tested.size)
    if n < 5:
        return _not_fitted("too few points", n, tested.size)
    tss = float(np.sum((y - y.mean()) ** 2))
    if tss == 0.0:
        return _not_fitted("flat response", n, tested.size, level=float(y.mean()))
    logx, span = _fit4pl.log_concentration(x), np.log10(tested[[0, -1]])
    grid_lo, grid_hi = span[0] - REACH_DECADES, span[1] + REACH_DECADES
    n_grid = int(np.ceil((grid_hi - grid_lo) * _fit4pl.GRID_PER_DECADE)) + 1
    grid = np.linspace(grid_lo, grid_hi, n_grid)
    fitted = _fit4pl.fit_4pl(logx, y, grid)
    if fitted is None:
        return _not_fitted("no convergence", n, tested.size)
    params, rss, profile_grid = fitted
    if _is_flat(rss, tss, n):
        return _not_fitted("flat response", n, tested.size, level=float(y.mean()))
    inside = bool(span[0] <= params[2] <= span[1])
    bounds = [None, None]
    if inside:
        bounds = CI_METHODS[ci](
            logx, y, params, rss, grid=grid, profile_grid=profile_grid,
            confidence=confidence, n_boot=n_boot, seed=seed,
        )  # fmt: skip
    low, high = (None if b is None else float(10.0**b) for b in bounds)
    bottom, top = float(params[0]), float(params[1])
    return DoseResponseFit(
        ec50=float(10.0 ** params[2]),
        ec50_low=low,
        ec50_high=high,
        hill=float(params[3]),
        bottom=bottom,
        top=top,
        r2=float(1.0 - rss / tss),
        n=n,
        n_concentrations=int(tested.size),
        fit="ok" if inside else "extrapolated",
        direction="increase" if top > bottom else "decrease",
    )


def _check_table(wells, metrics, columns, by):
    if not isinstance(wells, pd.DataFrame):
        raise InputError(f"wells must be a pandas DataFrame, got {type(wells).__name__}")
    if isinstance(metrics, str):
        raise InputError(f"metrics must be a list of column names, e.g. [{metrics!r}]")
    metrics, by = list(metrics), list(by)
    missing = [c for c in (*columns, *metrics, *by) if c not in wells.columns]
    if missing:
        raise InputError(f"wells has no column {missing[0]!r}; add it or pass its name")
    for metric in metrics:
        if not pd.api.types.is_numeric_dtype(wells[metric]):
            raise InputError(f"metric column {metric!r} is not numeric; convert it or drop it")
    return metrics, by


def _is_vehicle(wells, concentration, role, control_role):
    vehicle = pd.to_numeric(wells[concentration], errors="coerce").eq(0)
    if role is not None and role in wells.columns:
        vehicle |= wells[role].eq(control_role)
    return vehicle.to_numpy()


def _to_common_unit(rows, name, concentration, unit):
    """Concentrations of one compound in its most common unit: (values, unit, factors).

    Converted values are rounded to 12 significant digits.
    """
    conc = pd.to_numeric(rows[concentration], errors="coerce").to_numpy(dtype=float)
    if unit is None or unit not in rows.columns:
        return conc, None, np.ones(conc.size)
    labels = [None if pd.isna(u) else str(u).strip() for u in rows[unit]]
    target = Counter(labels).most_common(1)[0][0]  # ties: the first seen
    if len(set(labels)) == 1:
        return conc, target, np.ones(conc.size)
    if any(u not in MOLAR_UNITS for u in labels):
        found = sorted({str(u) for u in labels})
        raise InputError(
            f"compound {name!r} mixes concentration units {found} that cannot be converted; "
            f"give it one unit, or use only {sorted(MOLAR_UNITS)}"
        )
    factors = np.array([10.0 ** (MOLAR_UNITS[u] - MOLAR_UNITS[target]) for u in labels])
    # 12 significant digits, so one concentration written in two units is one value again.
    converted = np.array([float(f"{v:.12g}") for v in conc * factors])
    return converted, target, factors


def _compound_cmax(rows, name, cmax, factors):
    if cmax is None or cmax not in rows.columns:
        return None
    values = pd.to_numeric(rows[cmax], errors="coerce").to_numpy(dtype=float) * factors
    values = values[np.isfinite(values)]
    if values.size == 0:
        return None
    if not np.allclose(values, values[0], rtol=1e-9, atol=0.0) or values[0] <= 0:
        raise InputError(
            f"compound {name!r} has cmax values {sorted(set(values.tolist()))}; give it one "
            "positive cmax, in the unit of its concentrations"
        )
    return float(values[0])


def _table_row(fit, cmax_value):
    row = {field: getattr(fit, field) for field in (*_FIT_FIELDS, "n_concentrations")}
    row.update(fit=fit.fit, direction=fit.direction)
    for k in CMAX_MULTIPLES:
        effect = None
        if fit.fitted and cmax_value is not None:
            effect = float(fit.predict(k * cmax_value)) - fit.bottom
        row[f"effect_at_{k}x_cmax"] = effect
    return row


def dose_response_table(
    wells,
    *,
    metrics,
    compound="compound",
    concentration="concentration",
    unit="unit",
    role="role",
    control_role="vehicle",
    plate="plate",
    cmax="cmax",
    by=(),
    ci="profile",
    confidence=0.95,
    n_boot=1000,
    seed=None,
    min_concentrations=4,
):
    """Fit a concentration-response curve per compound and metric of a well table.

    Parameters
    ----------
    wells : pandas.DataFrame
        One row per well (the unit of replication), with the columns named below and the
        metric columns.
    metrics : sequence of str
        Metric columns to fit (numeric; NaN wells are dropped per metric).
    compound, concentration : str
        Columns of the compound name and its concentration (>= 0).
    unit : str or None
        Column of the concentration unit; each compound's concentrations are converted to its
        most common unit when they mix ``MOLAR_UNITS`` (pM, nM, uM, mM, M), rounded to 12
        significant digits. Missing column or None: no unit.
    role, control_role : str or None
        Vehicle wells are those with ``role == control_role`` or concentration 0.
    plate : str or None
        Column of the plate; a compound gets the vehicle wells of the plates it is on (all
        vehicle wells when the column is absent or None).
    cmax : str or None
        Column of the free Cmax of the compound, in the unit of its concentration column.
    by : sequence of str
        Further columns to fit separately (e.g. ``["timepoint"]``); vehicle wells are matched
        within the same group. They lead the output columns.
    ci, confidence, n_boot, seed, min_concentrations
        Passed to ``fit_dose_response`` (the same seed for every fit).

    Returns
    -------
    pandas.DataFrame
        One row per (by..., compound, metric), in order of first appearance, with the
        ``by`` columns then ``TABLE_COLUMNS``: ``compound``, ``metric``, ``unit`` (of the
        concentrations and EC50), the ``DoseResponseFit`` fields ``ec50``, ``ec50_low``,
        ``ec50_high``, ``hill``, ``bottom``, ``top``, ``r2``, ``n``, ``n_concentrations``,
        ``fit``, ``direction``, and ``effect_at_1x_cmax``, ``effect_at_10x_cmax``,
        ``effect_at_30x_cmax``: the fitted response at that multiple of Cmax minus
        ``bottom`` (metric units), null without a Cmax or without a fitted curve.

    Raises
    ------
    InputError
        On a missing or non-numeric column, a compound whose units cannot be converted to
        one, several Cmax values for one compound, or invalid fit options.

    Warns
    -----
    BeatlabWarning
        When non-vehicle wells of a compound have no concentration (they are skipped).

    Notes
    -----
    Each fit is ``fit_dose_response`` (four-parameter logistic, DeLean, Munson & Rodbard
    1978, Am J Physiol 235:E97) with the vehicle wells at concentration 0. Wells with a
    compound but no concentration, or neither a compound nor the vehicle role, are ignored.
    """
    _check_options(ci, confidence, n_boot, min_concentrations)
    metrics, by = _check_table(wells, metrics, (compound, concentration), by)
    names = dict(compound=compound, concentration=concentration, unit=unit, plate=plate)
    names.update(cmax=cmax, role=role, control_role=control_role)
    options = dict(ci=ci, confidence=confidence, n_boot=n_boot, seed=seed)
    options["min_concentrations"] = min_concentrations
    groups = wells.groupby(by, sort=False, dropna=False) if by else [((), wells)]
    rows = []
    for key, part in groups:
        lead = dict(zip(by, key, strict=True))
        rows += [lead | row for row in _fit_group(part, metrics, names, options)]
    return pd.DataFrame(rows, columns=[*by, *TABLE_COLUMNS])


def _fit_group(part, metrics, names, options):
    """Table rows of every compound x metric in one group of wells."""
    vehicle = _is_vehicle(part, names["concentration"], names["role"], names["control_role"])
    treated = part[~vehicle & part[names["compound"]].notna()]
    no_conc = pd.to_numeric(treated[names["concentration"]], errors="coerce").isna()
    if no_conc.any():
        warnings.warn(
            f"{int(no_conc.sum())} wells with a compound have no concentration; they are "
            "skipped (fill the concentration column to use them)",
            BeatlabWarning,
            stacklevel=3,
        )
    plate = names["plate"]
    for name, rows_c in treated[~no_conc].groupby(names["compound"], sort=False):
        conc, unit_name, factors = _to_common_unit(
            rows_c, name, names["concentration"], names["unit"]
        )
        cmax_value = _compound_cmax(rows_c, name, names["cmax"], factors)
        controls = part[vehicle]
        if plate is not None and plate in part.columns:
            controls = controls[controls[plate].isin(rows_c[plate].unique())]
        x = np.concatenate([conc, np.zeros(len(controls))])
        for metric in metrics:
            y = np.concatenate([rows_c[metric], controls[metric]]).astype(float)
            fit = fit_dose_response(x, y, **options)
            head = {"compound": name, "metric": metric, "unit": unit_name}
            yield head | _table_row(fit, cmax_value)
