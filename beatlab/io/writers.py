"""Writers: OME-TIFF time-lapses and small files, always written atomically."""

from __future__ import annotations

import contextlib
import json
import math
import os
import secrets
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np
import tifffile

from beatlab.errors import OutputError

__all__ = [
    "atomic_path",
    "check_output_dir",
    "check_output_file",
    "json_ready",
    "write_json",
    "write_ome_tiff",
]

#: Namespace of the OME MapAnnotation that carries beatlab's own metadata.
OME_NAMESPACE = "beatlab/recording"


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success.

    A crash or an exception leaves any existing file at ``path`` untouched and removes the
    partial temporary file. The file gets the permissions a plain ``open`` would give it
    (0666 less the umask), not the private 0600 of :func:`tempfile.mkstemp`.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _create_beside(path)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def _create_beside(path: Path) -> Path:
    """Create a new empty file with an unused name beside ``path``; the umask applies."""
    for _ in range(100):
        tmp = path.with_name(f".{path.name}.{secrets.token_hex(4)}.part")
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        os.close(fd)
        return tmp
    raise FileExistsError(f"no free temporary name beside {path}")


def _nearest_existing(path: Path) -> Path:
    while not path.exists() and path != path.parent:
        path = path.parent
    return path


def check_output_dir(path: str | os.PathLike, *, option: str = "out") -> Path:
    """Check, before any work, that ``path`` is or can become a writable folder.

    Parameters
    ----------
    path : path-like
        The output folder; it need not exist yet.
    option : str
        The parameter that named it, for the message (``out=DIR``).

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    OutputError
        ``path`` (or a parent of it) is an existing file, or the folder cannot be written.
    """
    path = Path(path)
    existing = _nearest_existing(path.absolute())
    if not existing.is_dir():
        where = (
            "is an existing file" if existing == path.absolute() else f"is inside file {existing}"
        )
        raise OutputError(f"{path} {where}, not a folder; pass {option}=DIR naming a folder")
    if not os.access(existing, os.W_OK | os.X_OK):
        raise OutputError(
            f"{path}: no permission to write in {existing}; pass {option}=DIR naming a folder "
            "you can write to"
        )
    return path


def check_output_file(path: str | os.PathLike, *, option: str = "out") -> Path:
    """Check, before any work, that the file ``path`` can be written.

    Raises
    ------
    OutputError
        ``path`` is an existing folder, its folder is a file, or the folder is not writable.
    """
    path = Path(path)
    if path.is_dir():
        raise OutputError(f"{path} is a folder; pass {option}=FILE naming a file")
    check_output_dir(path.absolute().parent, option=option)
    return path


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
    fps: float | None,
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
    fps : float or None
        Frame rate in Hz; written as ``TimeIncrement`` in seconds. None when unknown (a
        reconstruction of holograms whose frame rate nobody recorded): no ``TimeIncrement``.
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
    if fps is not None and not (fps > 0 and math.isfinite(fps)):
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
        "PhysicalSizeX": float(pixel_size_um),
        "PhysicalSizeXUnit": "µm",
        "PhysicalSizeY": float(pixel_size_um),
        "PhysicalSizeYUnit": "µm",
        "MapAnnotation": annotation,
    }
    if fps is not None:
        metadata.update(TimeIncrement=1.0 / float(fps), TimeIncrementUnit="s")
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
