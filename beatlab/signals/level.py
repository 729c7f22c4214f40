"""Levelling: remove a robust offset + tilt of one frame relative to a template."""

from __future__ import annotations

import numpy as np

__all__ = ["PlaneLeveller"]


def _weighted_solve(a: np.ndarray, d: np.ndarray, w: np.ndarray | None) -> np.ndarray:
    """Weighted least squares of ``a @ c = d`` through the (tiny) normal equations."""
    aw = a if w is None else a * w[:, None]
    normal = aw.T @ a
    try:
        return np.linalg.solve(normal, aw.T @ d)
    except np.linalg.LinAlgError:  # degenerate pixel set (e.g. one row): fall back to SVD
        sw = np.ones_like(d) if w is None else np.sqrt(w)
        return np.linalg.lstsq(a * sw[:, None], d * sw, rcond=None)[0]


class PlaneLeveller:
    """Fit and remove ``a + b x + c y`` from ``frame - template``, robustly.

    Laser phase noise shifts a whole frame (offset) and slow drifts tilt it; dry mass is
    conserved, so a contraction barely moves the mean of the difference, and the fit over all
    usable pixels works for confluent sheets as well as for sparse clusters.

    Parameters
    ----------
    template : ndarray (Y, X)
        The rest template (nm).
    usable : ndarray of bool (Y, X), optional
        Pixels that may be used for the fit (finite pixels by default).
    tilt : bool
        Fit the tilt too (otherwise the offset only).
    step : int
        Fit on every ``step``-th pixel in each direction (the fit needs few pixels).
    max_pixels : int
        Coarsen ``step`` until at most about this many pixels enter the fit (three
        parameters are pinned to well under 1 % of the noise by ten thousand pixels).

    Notes
    -----
    Iteratively reweighted least squares with Tukey biweights (tuning 4.685 robust SDs, the
    SD from the median absolute deviation of the ordinary least-squares residuals), three
    iterations from the ordinary least-squares start, so that moving cells and outliers do
    not pull the plane.
    """

    def __init__(
        self,
        template: np.ndarray,
        *,
        usable: np.ndarray | None = None,
        tilt: bool = True,
        step: int = 2,
        max_pixels: int = 8192,
    ):
        template = np.asarray(template, dtype=np.float32)
        ny, nx = template.shape
        ok = np.isfinite(template) if usable is None else (usable & np.isfinite(template))
        step = max(int(step), int(np.ceil(np.sqrt(ok.sum() / max(int(max_pixels), 16)))))
        sub = np.zeros_like(ok)
        sub[::step, ::step] = True
        self._idx = np.flatnonzero(ok & sub)
        yy, xx = np.mgrid[0:ny, 0:nx]
        self._y = (yy.astype(np.float32) - ny / 2) / max(ny, 1)
        self._x = (xx.astype(np.float32) - nx / 2) / max(nx, 1)
        cols = [np.ones(self._idx.size)]
        if tilt:
            cols += [self._x.ravel()[self._idx], self._y.ravel()[self._idx]]
        self._design = np.stack(cols, axis=1).astype(np.float64)
        self.tilt = bool(tilt)
        self.template = template

    def fit(self, frame: np.ndarray) -> np.ndarray:
        """Return the plane coefficients (offset nm, x-tilt, y-tilt per field) for ``frame``."""
        diff = (np.asarray(frame, dtype=np.float32) - self.template).ravel()[self._idx]
        good = np.isfinite(diff)
        a = self._design[good]
        d = diff[good].astype(np.float64)
        if d.size < a.shape[1]:
            return np.zeros(a.shape[1])
        coef = _weighted_solve(a, d, None)
        r = d - a @ coef
        # the scale from the start's residuals (the MAD ignores the moving cells already);
        # re-estimating it at every step changes little and costs two medians each time
        s = 1.4826 * np.median(np.abs(r - np.median(r)))
        for step in range(3):
            if not s > 0:
                break
            if step:
                r = d - a @ coef
            u = r / (4.685 * s)
            w = np.where(np.abs(u) < 1, (1 - u**2) ** 2, 0.0)
            coef = _weighted_solve(a, d, w)
        return coef

    def level(self, frame: np.ndarray) -> np.ndarray:
        """Return ``frame`` minus its fitted plane, as float32."""
        coef = self.fit(frame)
        plane = np.float32(coef[0])
        if self.tilt:
            plane = plane + np.float32(coef[1]) * self._x + np.float32(coef[2]) * self._y
        return np.asarray(frame, dtype=np.float32) - plane
