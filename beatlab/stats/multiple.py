"""Multiple-testing adjustment of p-values (Holm step-down, Benjamini-Hochberg step-up)."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from beatlab.errors import InputError

__all__ = ["ADJUST_METHODS", "adjust_pvalues"]


def _holm(p: np.ndarray) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values of a NaN-free 1-D array."""
    m = p.size
    order = np.argsort(p, kind="stable")
    scaled = (m - np.arange(m)) * p[order]
    adjusted = np.minimum(np.maximum.accumulate(scaled), 1.0)
    out = np.empty(m)
    out[order] = adjusted
    return out


def _bh(p: np.ndarray) -> np.ndarray:
    """Benjamini-Hochberg (1995) step-up adjusted p-values of a NaN-free 1-D array."""
    m = p.size
    order = np.argsort(p, kind="stable")
    scaled = p[order] * m / np.arange(1, m + 1)
    adjusted = np.minimum(np.minimum.accumulate(scaled[::-1])[::-1], 1.0)
    out = np.empty(m)
    out[order] = adjusted
    return out


def _none(p: np.ndarray) -> np.ndarray:
    """No adjustment: a copy of the p-values."""
    return p.copy()


_METHODS = {"holm": _holm, "bh": _bh, "none": _none}
ADJUST_METHODS = tuple(_METHODS)


def adjust_pvalues(p: npt.ArrayLike, *, method: str) -> np.ndarray:
    """Adjust a family of p-values for multiple testing.

    Parameters
    ----------
    p : array_like of float, shape (m,)
        Unadjusted p-values in [0, 1]. NaN marks a test that was not run; it stays NaN and
        does not count towards the family size.
    method : {"holm", "bh", "none"}
        ``"holm"``: Holm's step-down adjustment, controls the family-wise error rate.
        ``"bh"``: Benjamini-Hochberg step-up adjustment, controls the false discovery rate
        (independent or positively dependent tests). ``"none"``: returned unchanged.

    Returns
    -------
    numpy.ndarray of float, shape (m,)
        Adjusted p-values in the input order, capped at 1; NaN where the input was NaN.
        Reject at level alpha where the adjusted value is <= alpha.

    Raises
    ------
    InputError
        If `method` is unknown, `p` is not one-dimensional, or a value lies outside [0, 1].

    Notes
    -----
    With the finite p-values sorted, p_(1) <= ... <= p_(m):

    - Holm (1979), Scand J Statist 6:65: adjusted p_(i) = max over j <= i of
      min(1, (m - j + 1) p_(j)).
    - Benjamini & Hochberg (1995), J R Stat Soc B 57:289: adjusted p_(i) = min over j >= i of
      min(1, m p_(j) / j).

    Both match ``statsmodels.stats.multitest.multipletests`` (``"holm"``, ``"fdr_bh"``), and
    the BH values match ``scipy.stats.false_discovery_control``.

    Examples
    --------
    >>> adjust_pvalues([0.01, 0.04, 0.03], method="holm")
    array([0.03, 0.06, 0.06])
    """
    if method not in _METHODS:
        raise InputError(
            f"unknown p-value adjustment method={method!r}; use one of {sorted(_METHODS)}"
        )
    values = np.asarray(p, dtype=float)
    if values.ndim != 1:
        raise InputError(
            f"p must be one-dimensional, got shape {values.shape}; pass one family at a time"
        )
    finite = ~np.isnan(values)
    if np.any((values[finite] < 0) | (values[finite] > 1)):
        raise InputError("p-values must lie in [0, 1] (or be NaN); check the input p-values")
    out = np.full(values.shape, np.nan)
    if finite.any():
        out[finite] = _METHODS[method](values[finite])
    return out
