"""Reconstruct OPD time-lapses from off-axis holograms, streaming frame by frame."""

from __future__ import annotations

import copy
import logging
import warnings
from collections import deque
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from beatlab.errors import BeatlabWarning, ConfigError, InputError, MetadataError
from beatlab.holography.background import (
    average_reference_field,
    estimate_background_mask,
    estimate_phase_sign,
    fit_phase_polynomial,
    phase_offset,
)
from beatlab.holography.demodulate import SidebandFilter, auto_radius, radius_from_na
from beatlab.holography.refocus import FOCUS_METRICS, AngularSpectrumPropagator
from beatlab.holography.refocus import autofocus as _search_focus
from beatlab.holography.sideband import locate_sideband
from beatlab.opd import phase_to_opd, unwrap_in_time, unwrap_phase_ls

__all__ = ["OffAxisReconstructor"]

logger = logging.getLogger(__name__)

_SIDEBANDS = {"auto": None, "+1": 1, "-1": -1}
_TWO_PI = 2.0 * np.pi
#: Output pixels at each edge left out of the background fits when there is no reference.
_EDGE_PX = 2


def _positive(name, value, flag):
    if value is None:
        raise MetadataError(f"{name}: needed for holograms, got None; pass {flag}")
    value = float(value)
    if not (np.isfinite(value) and value > 0):
        raise MetadataError(f"{name}: must be a positive number, got {value!r}; pass {flag}")
    return value


class OffAxisReconstructor:
    """Demodulation, background correction, refocusing and unwrapping fitted on one frame.

    Build it with :meth:`fit` on the first hologram of a recording; the carrier, window,
    reference (or aberration fit), phase sign, focus and the temporal unwrapping reference are
    then reused for every frame of :meth:`opd_frames`.

    Attributes
    ----------
    output_shape : tuple of int
        Shape ``(Y', X')`` of the OPD frames.
    output_pixel_size_um : float
        Sample-plane pixel size of the OPD frames: input pixel size times the frame size over
        the size of the band's inverse transform (before the edge trim).
    output_origin_px : float
        Input-pixel coordinate (both axes) of OPD pixel ``(0, 0)``.
    carrier : tuple of float
        Centre ``(fy, fx)`` in cycles per input pixel of the side-band used.
    sign : int
        +1 when the side-band of positive x frequency is used as is, -1 when its twin is used
        (the field is conjugated).
    radius_cycles_per_px : float
        Radius of the spatial filter in cycles per input pixel.
    refocus_um : float
        Propagation distance applied (0 when refocusing is off).
    background_mask : numpy.ndarray of bool, shape (Y', X')
        Pixels whose mean phase sets the per-frame offset (cell-free background of the first
        frame, or all pixels in a confluent field).
    uses_reference : bool
        True when sample-free frames were divided out, False when a polynomial was levelled.
    """

    def __init__(
        self,
        *,
        sideband_filter,
        wavelength_nm,
        pixel_size_um,
        sign,
        pre_correction,
        propagator,
        refocus_um,
        post_correction,
        background_mask,
        reference_wrapped,
        reference_unwrapped,
        uses_reference,
    ):
        self._filter = sideband_filter
        self.wavelength_nm = float(wavelength_nm)
        self.input_pixel_size_um = float(pixel_size_um)
        self.sign = int(sign)
        self._pre = pre_correction
        self._propagator = propagator
        self.refocus_um = float(refocus_um)
        self._post = post_correction
        self.background_mask = background_mask
        self._reference_wrapped = reference_wrapped
        self._reference_unwrapped = reference_unwrapped
        self.uses_reference = bool(uses_reference)

    @property
    def output_shape(self):
        return self._filter.output_shape

    @property
    def output_pixel_size_um(self):
        return self.input_pixel_size_um * self._filter.scale

    @property
    def output_origin_px(self):
        return self._filter.origin_px

    @property
    def carrier(self):
        fy, fx = self._filter.carrier_cycles_per_px
        return (self.sign * fy, self.sign * fx)

    @property
    def radius_cycles_per_px(self):
        return self._filter.radius_cycles_per_px

    @property
    def input_shape(self):
        return self._filter.shape

    @classmethod
    def fit(
        cls,
        hologram0,
        *,
        wavelength_nm,
        pixel_size_um,
        reference=None,
        sideband="auto",
        radius="auto",
        na=None,
        n_medium=1.333,
        refocus_um=None,
        autofocus=False,
        polynomial_order=2,
        focus_range_um=(-20.0, 20.0),
        focus_metric="amplitude_std",
        exclusion_cycles_per_px=0.04,
        taper=0.25,
        workers=None,
    ):
        """Fit the reconstruction on the first hologram of a recording.

        Parameters
        ----------
        hologram0 : array_like, shape (Y, X)
            First raw hologram (camera counts); it is also the reference of the temporal
            unwrapping.
        wavelength_nm : float
            Vacuum wavelength in nm.
        pixel_size_um : float
            Sample-plane pixel size of the camera in um (pitch / magnification).
        reference : array_like, shape (Y, X) or (R, Y, X), optional
            One or several sample-free holograms recorded with the same optics. Without one,
            a polynomial phase is fitted to the background of the first frame and removed.
        sideband : {"auto", "+1", "-1"}, optional
            ``"+1"``: the side-band at positive x frequency (positive y for a vertical
            carrier); ``"-1"``: its twin (the phase changes sign); ``"auto"``: the one that
            makes the cells of the first frame positive.
        radius : "auto" or float, optional
            Window radius in cycles per input pixel; ``"auto"`` (or 0) takes a third of the
            carrier distance (or half the distance to the twin, if smaller), unless ``na`` is
            given.
        na : float, optional
            Numerical aperture of the objective; sets the radius to ``na / wavelength`` in
            spatial frequency. Exclusive with a numeric ``radius``; None or 0: not used.
        n_medium : float, optional
            Refractive index of the medium for refocusing.
        refocus_um : None, float or "auto", optional
            Propagation distance in um applied to every frame; ``"auto"`` searches
            ``focus_range_um`` on the first frame; None or 0 (default) does not refocus.
        autofocus : bool, optional
            Same as ``refocus_um="auto"`` (the configuration's switch); exclusive with a
            non-zero ``refocus_um``.
        polynomial_order : int, optional
            Total degree of the background polynomial when no reference is given.
        focus_range_um : tuple of float, optional
            Distances searched by the autofocus, in um.
        focus_metric : str, optional
            Focus metric of :func:`beatlab.holography.autofocus`.
        exclusion_cycles_per_px : float, optional
            Radius of the zero-order zone skipped when looking for the side-band.
        taper : float, optional
            Fraction of the window radius over which its raised-cosine edge falls to 0.
        workers : int, optional
            Threads for ``scipy.fft`` (None: scipy's default of one).

        Returns
        -------
        OffAxisReconstructor

        Raises
        ------
        MetadataError
            ``wavelength_nm`` or ``pixel_size_um`` is missing or not positive.
        ConfigError
            An option is invalid.
        InputError
            The frame is not a hologram (no side-band) or shapes disagree.

        Notes
        -----
        Steps: side-band location, spatial filtering and demodulation (Cuche, Marquet &
        Depeursinge 2000, Appl Opt 39:4070); division by the offset-corrected mean of the
        reference fields, or removal of a robust polynomial fit of the background phase
        (Colomb et al. 2006, J Opt Soc Am A 23:3177); angular-spectrum refocusing (Goodman,
        Introduction to Fourier Optics); least-squares unwrapping of the first frame
        (Ghiglia & Romero 1994, J Opt Soc Am A 11:107).
        """
        wavelength_nm = _positive("wavelength_nm", wavelength_nm, "wavelength_nm=NM")
        pixel_size_um = _positive("pixel_size_um", pixel_size_um, "pixel_size_um=UM")
        if sideband not in _SIDEBANDS:
            raise ConfigError(f"sideband: got {sideband!r}; choose one of {sorted(_SIDEBANDS)}")
        if focus_metric not in FOCUS_METRICS:
            raise ConfigError(
                f"focus_metric: got {focus_metric!r}; choose one of {sorted(FOCUS_METRICS)}"
            )
        if not (isinstance(refocus_um, (int, float)) or refocus_um in (None, "auto")):
            raise ConfigError(
                f"refocus_um: got {refocus_um!r}; pass None, a distance in um or 'auto'"
            )
        if radius in (0, None):
            radius = "auto"
        if na == 0:
            na = None
        if autofocus:
            if refocus_um not in (None, 0, "auto"):
                raise ConfigError(
                    f"autofocus: true together with refocus_um={refocus_um!r}; pass one of them"
                )
            refocus_um = "auto"
        if refocus_um == 0:
            refocus_um = None
        frame0 = np.asarray(hologram0)
        refs = None
        if reference is not None:
            refs = np.asarray(reference)
            if refs.ndim == 2:
                refs = refs[None]
            if refs.ndim != 3 or refs.shape[1:] != frame0.shape:
                raise InputError(
                    f"the reference frames have shape {refs.shape}, the holograms "
                    f"{frame0.shape}; pass reference=PATH with sample-free frames (Y, X) or "
                    "(R, Y, X) from the same camera set-up"
                )
        # a sample-free frame shows the carrier of the optics, unbiased by the cells
        sb = locate_sideband(
            frame0 if refs is None else refs[0],
            exclusion_cycles_per_px=exclusion_cycles_per_px,
            workers=workers,
        )
        k = sb.carrier_cycles_per_px
        if na is not None:
            if radius != "auto":
                raise ConfigError(
                    f"radius: got {radius!r} together with na={na!r}; pass one of them"
                )
            r = radius_from_na(na, wavelength_nm=wavelength_nm, pixel_size_um=pixel_size_um)
        elif radius == "auto":
            r = auto_radius(k)
        elif isinstance(radius, (int, float)) and not isinstance(radius, bool):
            r = float(radius)
        else:
            raise ConfigError(f"radius: got {radius!r}; pass 'auto' or cycles per pixel")
        filt = SidebandFilter(frame0.shape, k, r, taper=taper, workers=workers)
        field0 = filt.demodulate(frame0).astype(np.complex128)
        # without a reference, the frame edges (where a non-integer carrier wraps round) ring
        interior = _interior(filt.output_shape, 0 if refs is not None else _EDGE_PX)

        if refs is not None:
            ref_field = average_reference_field(filt.demodulate(r_) for r_ in refs)
            power = np.abs(ref_field) ** 2
            pre = np.conj(ref_field) / (power + 1e-12 * power.mean())
        else:
            surface = _level_surface(field0, polynomial_order, interior)
            pre = np.exp(-1j * surface) / np.median(np.abs(field0))
        corrected = field0 * pre

        if sideband == "auto":
            phase = _unwrapped(corrected)
            mask, level = estimate_background_mask(np.where(interior, phase, np.nan))
            sign, decided = estimate_phase_sign(phase[interior], level_rad=level)
            if not decided:
                warnings.warn(
                    "sideband: could not tell the phase sign from the first frame (no object "
                    "stands out of the background); kept '+1', pass sideband='+1' or '-1'",
                    BeatlabWarning,
                    stacklevel=2,
                )
        else:
            sign = _SIDEBANDS[sideband]
        if sign < 0:
            corrected = np.conj(corrected)

        propagator = None
        z_um = 0.0
        post = None
        if refocus_um is not None:
            if refocus_um == "auto":
                z_um = _search_focus(
                    corrected,
                    wavelength_nm=wavelength_nm,
                    pixel_size_um=pixel_size_um * filt.scale,
                    n_medium=n_medium,
                    range_um=focus_range_um,
                    metric=focus_metric,
                    workers=workers,
                )
                logger.info("autofocus: %.3f um", z_um)
            else:
                z_um = float(refocus_um)
            if z_um != 0:
                propagator = AngularSpectrumPropagator(
                    filt.output_shape,
                    wavelength_nm=wavelength_nm,
                    pixel_size_um=pixel_size_um * filt.scale,
                    n_medium=n_medium,
                    workers=workers,
                )
                corrected = propagator.propagate(corrected, z_um)
                if reference is None:
                    post = np.exp(-1j * _level_surface(corrected, polynomial_order, interior))
                    corrected = corrected * post

        phase = _unwrapped(corrected * np.exp(-1j * phase_offset(corrected)))
        mask, _ = estimate_background_mask(np.where(interior, phase, np.nan))
        wrapped0 = np.angle(corrected * np.exp(-1j * phase_offset(corrected, mask=mask)))
        unwrapped0 = unwrap_phase_ls(wrapped0, weights=_weights(corrected))
        unwrapped0 = unwrapped0 - _TWO_PI * np.round(np.median(unwrapped0[mask]) / _TWO_PI)

        return cls(
            sideband_filter=filt,
            wavelength_nm=wavelength_nm,
            pixel_size_um=pixel_size_um,
            sign=sign,
            pre_correction=pre.astype(np.complex64),
            propagator=propagator,
            refocus_um=z_um,
            post_correction=None if post is None else post.astype(np.complex64),
            background_mask=mask,
            reference_wrapped=wrapped0,
            reference_unwrapped=unwrapped0,
            uses_reference=reference is not None,
        )

    def complex_field(self, hologram):
        """Corrected complex field of one hologram (before the per-frame offset).

        Parameters
        ----------
        hologram : array_like, shape (Y, X)
            Raw hologram of the recording.

        Returns
        -------
        numpy.ndarray, complex, shape (Y', X')
            Demodulated field divided by the reference (or levelled), with the fitted sign
            and refocusing applied.
        """
        field = self._filter.demodulate(hologram)
        field *= self._pre
        if self.sign < 0:
            np.conjugate(field, out=field)
        if self._propagator is not None:
            field = self._propagator.propagate(field, self.refocus_um)
        if self._post is not None:
            field *= self._post
        return field

    def wrapped_phase(self, hologram):
        """Wrapped phase of one hologram in rad, its background offset removed.

        Parameters
        ----------
        hologram : array_like, shape (Y, X)
            Raw hologram of the recording.

        Returns
        -------
        numpy.ndarray, float64, shape (Y', X')
            Phase in [-pi, pi]; the circular mean over :attr:`background_mask` is 0.
        """
        field = self.complex_field(hologram)
        offset = phase_offset(field, mask=self.background_mask)
        return np.angle(field * np.complex64(np.exp(-1j * offset))).astype(np.float64)

    def opd_frames(self, holograms, *, progress=False):
        """Stream OPD frames from holograms.

        Parameters
        ----------
        holograms : iterable of array_like, shape (Y, X)
            Raw holograms of the recording, in time order (any real dtype); read lazily.
        progress : bool, optional
            Show a tqdm progress bar.

        Yields
        ------
        numpy.ndarray, float32, shape (Y', X')
            OPD in nm, positive in cells (with the fitted sign), 0 on the background.

        Notes
        -----
        Every frame is unwrapped in time: its wrapped phase difference to the first frame is
        added to the spatially unwrapped first frame, so no pixel jumps by 2 pi between frames
        as long as its phase changes by less than pi from the first frame.

        With ``workers`` > 1 (see :meth:`fit`), that many frames are reconstructed at once in
        threads, each with single-threaded transforms (scipy.fft and numpy release the GIL):
        the elementwise work around the transforms then runs in parallel too, which threads
        inside one frame's transforms leave serial. The frames are the same either way.
        """
        frames = holograms
        if progress:
            from tqdm.auto import tqdm

            frames = tqdm(holograms, desc="holograms", unit="frame")
        threads = int(self._filter.workers or 1)
        if threads <= 1:
            wrapped = (self.wrapped_phase(h) for h in frames)
            for phase in unwrap_in_time(
                wrapped,
                reference_wrapped=self._reference_wrapped,
                reference_unwrapped=self._reference_unwrapped,
            ):
                yield phase_to_opd(phase, self.wavelength_nm)
            return
        single = self._single_threaded()
        yield from _ordered_in_threads(single._opd_frame, frames, threads)

    def _single_threaded(self) -> OffAxisReconstructor:
        """A copy whose transforms run on one thread (the arrays are shared, read only)."""
        single = copy.copy(self)
        single._filter = copy.copy(self._filter)
        single._filter.workers = 1
        if self._propagator is not None:
            single._propagator = copy.copy(self._propagator)
            single._propagator.workers = 1
        return single

    def _opd_frame(self, hologram) -> np.ndarray:
        """OPD (nm) of one hologram, as :meth:`opd_frames` yields it."""
        phase = next(
            unwrap_in_time(
                [self.wrapped_phase(hologram)],
                reference_wrapped=self._reference_wrapped,
                reference_unwrapped=self._reference_unwrapped,
            )
        )
        return phase_to_opd(phase, self.wavelength_nm)


def _ordered_in_threads(function, items, threads: int):
    """``function(item)`` for each item in order, ``threads`` at once, a few items ahead."""
    with ThreadPoolExecutor(max_workers=threads) as pool:
        pending: deque = deque()
        for item in items:
            pending.append(pool.submit(function, item))
            if len(pending) > 2 * threads:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def _unwrapped(field):
    return unwrap_phase_ls(np.angle(field))


def _level_surface(field, order, mask):
    """Polynomial phase of the background of a complex field, in rad."""
    phase = _unwrapped(field)
    surface, _ = fit_phase_polynomial(phase, order=order, mask=mask)
    return surface


def _interior(shape, edge_px):
    """Boolean map of the pixels at least ``edge_px`` from the frame edges."""
    inside = np.zeros(shape, dtype=bool)
    ny, nx = shape
    if min(ny, nx) <= 4 * edge_px:
        inside[:] = True
    else:
        inside[edge_px : ny - edge_px, edge_px : nx - edge_px] = True
    return inside


def _weights(field):
    """Unwrapping weights: amplitude over its median, capped at 1 (dark fringes count less)."""
    amp = np.abs(field)
    med = np.median(amp)
    return np.clip(amp / med, 0.0, 1.0) if med > 0 else np.ones_like(amp)
