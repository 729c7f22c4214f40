"""Numerics of the four-parameter logistic fit (private; the public face is ``dose_response``).

Concentrations enter as ``logx = log10(concentration)``, with ``-inf`` for vehicle (x = 0), so
the fraction of the span reached there is exactly 0 and no division by zero happens. For a
fixed (log10 EC50, Hill) the model ``bottom + (top - bottom) f`` is linear in (bottom, top),
so grids and profiles solve those two exactly by linear least squares and search only the two
nonlinear parameters.
"""

import warnings

import numpy as np
from scipy.optimize import OptimizeWarning, brentq, least_squares
from scipy.special import expit

LN10 = float(np.log(10.0))
HILL_BOUNDS = (0.1, 10.0)
"""Hill slope search range (dimensionless)."""

GRID_PER_DECADE = 20
"""log10 EC50 grid points per decade (starting values; brackets of the profile crossings)."""

HILL_GRID = np.geomspace(*HILL_BOUNDS, 41)
"""Hill grid: 41 log-spaced values from 0.1 to 10 (steps of 12 %), refined locally."""

_TINY_VAR = 1e-24  # below this the fraction is constant over the data: a constant model fits


def log_concentration(concentration):
    """log10 of concentrations >= 0, with -inf for 0 (vehicle) and no warning."""
    x = np.asarray(concentration, dtype=float)
    out = np.full(x.shape, -np.inf)
    np.log10(x, out=out, where=x > 0)
    return out


def fraction(logx, log_ec50, hill):
    """Fraction of the span reached, 1 / (1 + (ec50 / x)^hill); broadcasts; 0 at logx = -inf."""
    return expit(hill * LN10 * (logx - log_ec50))


def linear_fit(f, y):
    """Best (bottom, top) and residual sum of squares for fractions ``f`` (..., n) and ``y``.

    Where the fraction is constant over the data only the mean is identifiable: then
    top = bottom = mean(y) and the RSS is that of the constant model.
    """
    fbar = f.mean(axis=-1, keepdims=True)
    fc = f - fbar
    yc = y - y.mean()
    sff = np.einsum("...i,...i->...", fc, fc)
    sfy = fc @ yc
    ok = sff > _TINY_VAR
    span = np.where(ok, sfy / np.where(ok, sff, 1.0), 0.0)
    resid = yc - span[..., None] * fc
    rss = np.einsum("...i,...i->...", resid, resid)
    bottom = y.mean() - span * fbar[..., 0]
    return bottom, bottom + span, rss


def rss_grid(logx, y, log_ec50_grid):
    """Residual sum of squares over the (log10 EC50, Hill) grid, shape (L, H)."""
    f = fraction(logx, log_ec50_grid[:, None, None], HILL_GRID[None, :, None])
    return linear_fit(f, y)[2]


def profile_rss(logx, y, log_ec50):
    """RSS minimised over Hill (and bottom, top exactly) at one fixed log10 EC50.

    The Hill grid finds the basin; 41 points spanning the grid neighbours of the best value
    refine it (steps of 0.6 % in Hill, which changes the RSS by far less than 0.1 %).
    """
    rss_row = linear_fit(fraction(logx, log_ec50, HILL_GRID[:, None]), y)[2]
    j = int(np.argmin(rss_row))
    local = np.geomspace(HILL_GRID[max(j - 1, 0)], HILL_GRID[min(j + 1, HILL_GRID.size - 1)], 41)
    rss_local = linear_fit(fraction(logx, log_ec50, local[:, None]), y)[2]
    return float(min(rss_local.min(), rss_row[j]))


def _residuals_and_jacobian(logx, y):
    vehicle = ~np.isfinite(logx)
    lx = np.where(vehicle, 0.0, logx)  # the Jacobian terms there are multiplied by f (1-f) = 0

    def residuals(p):
        bottom, top, log_ec50, hill = p
        return bottom + (top - bottom) * fraction(logx, log_ec50, hill) - y

    def jacobian(p):
        bottom, top, log_ec50, hill = p
        f = fraction(logx, log_ec50, hill)
        g = f * (1.0 - f)
        span = top - bottom
        return np.column_stack(
            [1.0 - f, f, -span * hill * LN10 * g, span * LN10 * (lx - log_ec50) * g]
        )

    return residuals, jacobian


def polish(logx, y, start, log_ec50_bounds):
    """Least-squares fit of (bottom, top, log10 EC50, Hill) from ``start``; None if it fails.

    Returns
    -------
    tuple of (ndarray, float) or None
        Parameters and residual sum of squares.
    """
    residuals, jacobian = _residuals_and_jacobian(logx, y)
    lower = [-np.inf, -np.inf, log_ec50_bounds[0], HILL_BOUNDS[0]]
    upper = [np.inf, np.inf, log_ec50_bounds[1], HILL_BOUNDS[1]]
    x0 = np.clip(np.asarray(start, dtype=float), lower, upper)
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", OptimizeWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        try:
            res = least_squares(
                residuals,
                x0,
                jac=jacobian,
                bounds=(lower, upper),
                x_scale="jac",
                ftol=1e-12,
                xtol=1e-12,
                gtol=1e-12,
                max_nfev=2000,
            )
        except (ValueError, np.linalg.LinAlgError):
            return None
    if res.status <= 0 or not np.all(np.isfinite(res.x)):
        return None
    return res.x, float(np.sum(res.fun**2))


def fit_4pl(logx, y, log_ec50_grid):
    """Grid start plus least-squares polish; returns (params, rss, grid profile) or None."""
    grid = rss_grid(logx, y, log_ec50_grid)
    i, j = np.unravel_index(np.argmin(grid), grid.shape)
    f = fraction(logx, log_ec50_grid[i], HILL_GRID[j])
    bottom, top, _ = linear_fit(f, y)
    start = [float(bottom), float(top), log_ec50_grid[i], HILL_GRID[j]]
    fitted = polish(logx, y, start, (log_ec50_grid[0], log_ec50_grid[-1]))
    if fitted is None:
        return None
    return fitted[0], fitted[1], grid.min(axis=1)


def profile_bounds(logx, y, log_ec50_hat, threshold, log_ec50_grid, profile_grid):
    """Where the RSS profile over log10 EC50 first rises above ``threshold``, either side.

    Walks outwards from the estimate along the grid (the grid profile is an upper bound of
    the refined one, so grid points below the threshold are inside), then solves the crossing
    with Brent's method between the last point inside and the first outside.

    Returns
    -------
    list of 2 (float or None)
        Lower and upper log10 bound; None when the profile stays below the threshold up to
        the end of the grid.
    """

    def excess(log_ec50):
        return profile_rss(logx, y, log_ec50) - threshold

    bounds = []
    for side in (-1, 1):
        mask = log_ec50_grid < log_ec50_hat if side < 0 else log_ec50_grid > log_ec50_hat
        order = np.flatnonzero(mask)[::side]
        inner, bound = log_ec50_hat, None
        for k in order:
            if profile_grid[k] > threshold and excess(log_ec50_grid[k]) > 0:
                if excess(inner) >= 0:  # noiseless data: the interval is the point itself
                    bound = inner
                else:
                    ends = sorted((inner, log_ec50_grid[k]))
                    bound = brentq(excess, *ends, xtol=1e-5)
                break
            inner = log_ec50_grid[k]
        bounds.append(bound)
    return bounds
