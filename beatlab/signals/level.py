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

    def fit_stack(self, frames: np.ndarray) -> np.ndarray:
        """:meth:`fit` of every frame of a stack (T, Y, X) at once, coefficients (T, k).

        The same estimator, vectorised over frames (many small fits cost mostly Python
        overhead); a stack with non-finite values at the fitted pixels is fitted frame by frame.
        """
        stack = np.asarray(frames, dtype=np.float32)
        n = stack.shape[0]
        diff = (stack.reshape(n, -1)[:, self._idx] - self.template.ravel()[self._idx]).astype(
            np.float64
        )
        a = self._design
        if not np.isfinite(diff).all() or diff.shape[1] < a.shape[1]:
            return np.stack([self.fit(frame) for frame in stack]) if n else np.zeros((0, 0))
        coef = np.linalg.lstsq(a, diff.T, rcond=None)[0].T
        r = diff - coef @ a.T
        scale = 1.4826 * np.median(np.abs(r - np.median(r, axis=1, keepdims=True)), axis=1)
        robust = scale > 0
        for step in range(3):
            if not robust.any():
                break
            if step:
                r = diff - coef @ a.T
            u = r[robust] / (4.685 * scale[robust, None])
            w = np.where(np.abs(u) < 1, (1 - u**2) ** 2, 0.0)
            normal = np.einsum("tp,pi,pj->tij", w, a, a)
            rhs = np.einsum("tp,pi->ti", w * diff[robust], a)
            try:
                coef[robust] = np.linalg.solve(normal, rhs[..., None])[..., 0]
            except np.linalg.LinAlgError:  # a degenerate weighting: frame by frame
                return np.stack([self.fit(frame) for frame in stack])
        return coef

    def _plane(self, coef: np.ndarray) -> np.ndarray | np.float32:
        plane = np.float32(coef[0])
        if self.tilt:
            plane = plane + np.float32(coef[1]) * self._x + np.float32(coef[2]) * self._y
        return plane

    def level(self, frame: np.ndarray) -> np.ndarray:
        """Return ``frame`` minus its fitted plane, as float32."""
        return np.asarray(frame, dtype=np.float32) - self._plane(self.fit(frame))

    def level_stack(self, frames: np.ndarray) -> np.ndarray:
        """:meth:`level` of every frame of a stack (T, Y, X), float32."""
        stack = np.asarray(frames, dtype=np.float32)
        out = np.empty_like(stack)
        for t, coef in enumerate(self.fit_stack(stack)):
            out[t] = stack[t] - self._plane(coef)
        return out
