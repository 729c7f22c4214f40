"""Levelling: remove a robust offset + tilt of one frame relative to a template."""

from __future__ import annotations

import numpy as np

from beatlab.signals._level_kernel import prepare_level, subtract_plane, tukey_rows

__all__ = ["PlaneLeveller"]


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
        self._gram = self._design.T @ self._design
        prepare_level()  # compiled here, before any worker forks: they inherit it
        self.tilt = bool(tilt)
        self.template = template
        self._template_at_idx = template.ravel()[self._idx]

    def fit(self, frame: np.ndarray) -> np.ndarray:
        """Return the plane coefficients (offset nm, x-tilt, y-tilt per field) for ``frame``."""
        frame = np.asarray(frame, dtype=np.float32).ravel()[self._idx]
        diff = frame - self._template_at_idx
        # the usual case (a finite sum: every value finite): the design as prepared
        if np.isfinite(diff.sum()) or (good := np.isfinite(diff)).all():
            return tukey_rows(self._design, diff[None], self._gram)[0]
        a = self._design[good]
        if good.sum() < a.shape[1]:
            return np.zeros(a.shape[1])
        return tukey_rows(a, diff[good][None])[0]

    def fit_stack(self, frames: np.ndarray) -> np.ndarray:
        """:meth:`fit` of every frame of a stack (T, Y, X) at once, coefficients (T, k).

        The same estimator, vectorised over frames (many small fits cost mostly Python
        overhead); a stack with non-finite values at the fitted pixels is fitted frame by frame.
        """
        stack = np.asarray(frames, dtype=np.float32)
        n = stack.shape[0]
        # np.take: the same values as indexing [:, idx], ~6x faster along the second axis
        diff = np.take(stack.reshape(n, -1), self._idx, axis=1) - self._template_at_idx
        if not np.isfinite(diff).all() or diff.shape[1] < self._design.shape[1]:
            return np.stack([self.fit(frame) for frame in stack]) if n else np.zeros((0, 0))
        return tukey_rows(self._design, diff, self._gram)

    def _plane(self, coef: np.ndarray) -> np.ndarray | np.float32:
        plane = np.float32(coef[0])
        if self.tilt:
            plane = plane + np.float32(coef[1]) * self._x + np.float32(coef[2]) * self._y
        return plane

    def level(self, frame: np.ndarray) -> np.ndarray:
        """Return ``frame`` minus its fitted plane, as float32."""
        coef = self.fit(frame)
        if self.tilt and np.ndim(frame) == 2:  # one compiled pass, the numbers of _plane
            return subtract_plane(frame, coef, self._x, self._y)
        return np.asarray(frame, dtype=np.float32) - self._plane(coef)

    def level_stack(self, frames: np.ndarray) -> np.ndarray:
        """:meth:`level` of every frame of a stack (T, Y, X), float32."""
        stack = np.asarray(frames, dtype=np.float32)
        if stack.shape[0] == 0:
            return stack.copy()
        # every frame's plane at once, with the float32 operations of _plane in its order
        c = self.fit_stack(stack).astype(np.float32)[:, :, None, None]
        plane = c[:, 0] + c[:, 1] * self._x + c[:, 2] * self._y if self.tilt else c[:, 0]
        return stack - plane
