"""Writers: OME-TIFF time-lapses and small files, always written atomically."""

from __future__ import annotations

import contextlib
import json
import math
import os
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np
import tifffile

__all__ = ["atomic_path", "json_ready", "write_json", "write_ome_tiff"]

#: Namespace of the OME MapAnnotation that carries beatlab's own metadata.
OME_NAMESPACE = "beatlab/recording"


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success.

    A crash or an exception leaves any existing file at ``path`` untouched and removes the
    partial temporary file.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def json_ready(value):
    """Make ``value`` JSON-ready: numpy scalars to Python, NaN/inf to None."""
    if isinstance(value, dict):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if isinstance(value, np.ndarray):
        return [json_ready(v) for v in value.tolist()]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, Path):
        return str(value)
    return value


def write_json(path: str | os.PathLike, data: dict) -> Path:
    """Write ``data`` as indented JSON atomically; NaN and inf become ``null``."""
    path = Path(path)
    with atomic_path(path) as tmp:
        tmp.write_text(json.dumps(json_ready(data), indent=2, allow_nan=False) + "\n")
    return path


def write_ome_tiff(
    path: str | os.PathLike,
    frames: np.ndarray | Iterable[np.ndarray],
    *,
    fps: float,
    pixel_size_um: float,
    kind: str = "opd",
    wavelength_nm: float | None = None,
    shape: tuple[int, int, int] | None = None,
    dtype=None,
    times_s: np.ndarray | None = None,
    extra: dict | None = None,
) -> Path:
    """Write a time-lapse ``(T, Y, X)`` as OME-TIFF with its physical metadata.

    Parameters
    ----------
    path : path-like
        Output file (``.ome.tif``). Written atomically.
    frames : ndarray (T, Y, X) or iterable of ndarray (Y, X)
        The frames. An iterable is streamed frame by frame; then ``shape`` and ``dtype``
        are required.
    fps : float
        Frame rate in Hz; written as ``TimeIncrement`` in seconds.
    pixel_size_um : float
        Sample-plane pixel size in micrometres (``PhysicalSizeX/Y``).
    kind : {'opd', 'phase', 'hologram'}
        What the values are; stored in an OME MapAnnotation with ``wavelength_nm``.
    wavelength_nm : float, optional
        Illumination wavelength in nm.
    shape, dtype : optional
        Shape ``(T, Y, X)`` and dtype of streamed frames.
    times_s : ndarray (T,), optional
        Per-plane timestamps in seconds (``Plane DeltaT``), for uneven sampling.
    extra : dict, optional
        More key/value pairs for the MapAnnotation (stringified).

    Returns
    -------
    Path
        ``path``.
    """
    if not (fps > 0 and math.isfinite(fps)):
        raise ValueError(f"fps must be a positive number of Hz, got {fps!r}")
    if not (pixel_size_um > 0 and math.isfinite(pixel_size_um)):
        raise ValueError(f"pixel_size_um must be positive, got {pixel_size_um!r}")
    if isinstance(frames, np.ndarray):
        if frames.ndim != 3:
            raise ValueError(f"frames must have shape (T, Y, X), got {frames.shape}")
        shape, dtype = frames.shape, frames.dtype
        data = frames
    else:
        if shape is None or dtype is None:
            raise ValueError("streamed frames need shape= and dtype=")
        data = iter(frames)
    annotation = {"Namespace": OME_NAMESPACE, "kind": str(kind)}
    if wavelength_nm is not None:
        annotation["wavelength_nm"] = repr(float(wavelength_nm))
    for key, value in (extra or {}).items():
        annotation[str(key)] = str(value)
    metadata = {
        "axes": "TYX",
        "TimeIncrement": 1.0 / float(fps),
        "TimeIncrementUnit": "s",
        "PhysicalSizeX": float(pixel_size_um),
        "PhysicalSizeXUnit": "µm",
        "PhysicalSizeY": float(pixel_size_um),
        "PhysicalSizeYUnit": "µm",
        "MapAnnotation": annotation,
    }
    if times_s is not None:
        times_s = np.asarray(times_s, dtype=float)
        if times_s.shape != (shape[0],):
            raise ValueError(f"times_s must have {shape[0]} values, got {times_s.shape}")
        metadata["Plane"] = {
            "DeltaT": [float(t) for t in times_s],
            "DeltaTUnit": ["s"] * shape[0],
        }
    path = Path(path)
    nbytes = int(np.prod(shape)) * np.dtype(dtype).itemsize
    with atomic_path(path) as tmp:
        with tifffile.TiffWriter(tmp, bigtiff=nbytes > 2**31, ome=True) as tif:
            tif.write(data, shape=shape, dtype=dtype, metadata=metadata)
    return path
