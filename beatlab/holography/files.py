"""Reconstruct a hologram file into an OPD OME-TIFF, streaming frame by frame."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from beatlab._progress import progress_bar
from beatlab.errors import InputError
from beatlab.settings import HolographySettings, load_settings

__all__ = ["load_reference", "reconstruct_file"]


def load_reference(path: str | os.PathLike) -> np.ndarray:
    """Read sample-free hologram frame(s) as an array (R, Y, X) float32."""
    from beatlab.io import open_recording

    ref = open_recording(path, fps=1.0, kind="hologram")
    with ref:
        return np.concatenate([block for _, block in ref.chunks(64)], axis=0)


def reconstruct_file(
    path: str | os.PathLike,
    out: str | os.PathLike,
    *,
    wavelength_nm: float | None = None,
    pixel_size_um: float | None = None,
    fps: float | None = None,
    reference: str | os.PathLike | np.ndarray | None = None,
    holography: HolographySettings | None = None,
    progress: bool = False,
) -> Path:
    """Reconstruct raw off-axis holograms into float32 OPD (nm) frames in an OME-TIFF.

    Parameters
    ----------
    path : path-like
        The hologram recording (any format :func:`beatlab.open_recording` reads).
    out : path-like
        Output ``.ome.tif``, written atomically with the output pixel size and time increment.
    wavelength_nm : float, optional
        Illumination wavelength in nm (overrides the file; needed when the file has none).
    pixel_size_um : float, optional
        Sample-plane camera pixel size (overrides the file; needed when the file has none).
    fps : float, optional
        Frame rate in Hz (overrides the file). Reconstruction does not need it: when neither
        the file nor this gives it, the output records no frame rate.
    reference : path-like or ndarray (R, Y, X), optional
        Sample-free hologram frame(s).
    holography : HolographySettings, optional
        The ``[holography]`` settings (default: the defaults of ``configs/default.toml``).
    progress : bool
        Show a progress bar.

    Returns
    -------
    Path
        ``out``.

    Raises
    ------
    MetadataError
        When the pixel size or the wavelength is unknown (naming the flag).
    InputError
        When the reference frames do not have the holograms' shape.
    """
    from beatlab.holography.reconstruct import OffAxisReconstructor
    from beatlab.io import open_recording, write_ome_tiff

    rec = open_recording(
        path, kind="hologram", fps=fps, pixel_size_um=pixel_size_um, wavelength_nm=wavelength_nm
    )
    rec.require("pixel_size_um", "wavelength_nm")
    where = f"{reference}: " if isinstance(reference, (str, os.PathLike)) else ""
    if isinstance(reference, (str, os.PathLike)):
        reference = load_reference(reference)
    if reference is not None and reference.shape[-2:] != rec.shape:
        (ry, rx), (hy, hx) = reference.shape[-2:], rec.shape
        raise InputError(
            f"{where}the reference frames are {ry} x {rx} px, the holograms {hy} x {hx} px; "
            "pass reference=PATH with sample-free frames from the same camera set-up"
        )
    opts = (holography or load_settings().holography).fit_options()
    recon = OffAxisReconstructor.fit(
        rec.frame(0),
        wavelength_nm=rec.wavelength_nm,
        pixel_size_um=rec.pixel_size_um,
        reference=reference,
        **opts,
    )
    ny, nx = recon.output_shape
    frames = (f for _, block in rec.chunks(16) for f in block)
    with progress_bar(
        total=rec.n_frames, desc="reconstructing holograms", enabled=progress
    ) as bar:
        return write_ome_tiff(
            out,
            _counted(recon.opd_frames(frames), bar),
            shape=(rec.n_frames, ny, nx),
            dtype=np.float32,
            fps=rec.fps,
            pixel_size_um=recon.output_pixel_size_um,
            kind="opd",
            wavelength_nm=rec.wavelength_nm,
            times_s=rec.times_s if rec.uneven_timing else None,
            extra={"reconstructed_from": Path(rec.source).name, "phase_sign": int(recon.sign)},
        )


def _counted(frames: Iterator[np.ndarray], bar) -> Iterator[np.ndarray]:
    for frame in frames:
        yield frame
        bar.update(1)
