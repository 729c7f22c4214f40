"""Stage: open a recording as a stream of OPD frames (nm), with its metadata checked."""

from __future__ import annotations

import os

import numpy as np

from beatlab.errors import InputError
from beatlab.frames import OPDSource
from beatlab.io import open_recording
from beatlab.io.recording import Recording
from beatlab.settings import Settings

__all__ = ["open_source"]


def open_source(
    recording: Recording | str | os.PathLike,
    settings: Settings,
    *,
    kind: str | None = None,
    fps: float | None = None,
    pixel_size_um: float | None = None,
    wavelength_nm: float | None = None,
    reference: str | os.PathLike | np.ndarray | None = None,
) -> tuple[Recording, OPDSource]:
    """The recording and its OPD frames, ready for the analysis passes.

    Parameters
    ----------
    recording : Recording or path-like
        An opened recording, or a path for :func:`beatlab.open_recording`.
    settings : Settings
        Uses ``[input]`` (scales, chunk size, fewest frames) and ``[holography]``.
    kind, fps, pixel_size_um, wavelength_nm : optional
        Override the file's metadata (when ``recording`` is a path).
    reference : path-like or ndarray (R, Y, X), optional
        Sample-free hologram frame(s) for ``kind='hologram'``.

    Returns
    -------
    (Recording, OPDSource)

    Raises
    ------
    InputError
        Unreadable input, fewer frames than ``[input] min_frames``.
    MetadataError
        The frame rate or pixel size (or, for phase and holograms, the wavelength) is
        unknown.
    """
    rec = (
        recording
        if isinstance(recording, Recording)
        else open_recording(
            recording, kind=kind, fps=fps, pixel_size_um=pixel_size_um, wavelength_nm=wavelength_nm
        )
    )
    inp = settings.input
    if rec.n_frames < inp.min_frames:
        what = (
            f"a single {rec.shape[0]} x {rec.shape[1]} px image, not a time-lapse"
            if rec.n_frames == 1
            else f"only {rec.n_frames} frames"
        )
        raise InputError(
            f"{rec.source}: {what}; analysing beats needs at least {inp.min_frames} frames "
            "(a few beats' worth)"
        )
    rec.require("fps", "pixel_size_um")
    if rec.kind == "hologram" and isinstance(reference, (str, os.PathLike)):
        from beatlab.holography import load_reference

        reference = load_reference(reference)
    source = OPDSource(
        rec,
        opd_scale=inp.opd_scale,
        phase_scale=inp.phase_scale,
        reference=reference if rec.kind == "hologram" else None,
        holography=settings.holography,
        chunk_frames=inp.chunk_frames,
        bin=inp.bin,
    )
    return rec, source
