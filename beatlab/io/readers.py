"""Readers for OME-TIFF, ImageJ TIFF, plain TIFF, .npy, image folders and HDF5 datasets."""

from __future__ import annotations

import math
import os
import re
import struct
import tokenize
import warnings
from pathlib import Path

import numpy as np
import tifffile

from beatlab.errors import BeatlabWarning, InputError, MetadataError
from beatlab.io._tiff_meta import (
    check_intact,
    interval_s,
    parse_imagej,
    parse_ome,
    tifffile_complaints,
)
from beatlab.io.recording import KINDS, Recording

__all__ = ["open_recording"]

#: What reading libraries raise on a damaged or truncated file (tifffile, numpy's header
#: parser, struct unpacking of garbage, sizes read from garbage): a clean InputError.
DAMAGED_FILE_ERRORS = (
    tifffile.TiffFileError,
    OSError,
    KeyError,
    ValueError,
    IndexError,
    EOFError,
    TypeError,
    RuntimeError,
    ZeroDivisionError,
    MemoryError,
    struct.error,
    tokenize.TokenError,
)

_IMAGE_SUFFIXES = (".tif", ".tiff", ".png")
#: Frame intervals that differ from the median by more than this fraction count as uneven.
_UNEVEN_TOLERANCE = 0.01


# --------------------------------------------------------------------------------------------
# frame sources


class _ArraySource:
    """Frames from an array-like (numpy memmap, h5py dataset) of shape (T, Y, X)."""

    def __init__(self, array, owner=None):
        self.array = array
        self.owner = owner  # keeps a file object alive
        self.n_frames = int(array.shape[0])
        self.frame_shape = tuple(int(s) for s in array.shape[1:])
        self.dtype = np.dtype(array.dtype)
        # a numpy array or memory map reads the same in a forked process; an HDF5 dataset's
        # file handle is not to be shared
        self.readable_in_forks = isinstance(array, np.ndarray)

    def close(self) -> None:
        if self.owner is not None:
            self.owner.close()

    def __del__(self):
        owner = getattr(self, "owner", None)
        if owner is not None:
            try:
                owner.close()
            except Exception:
                pass

    def read(self, start: int, stop: int) -> np.ndarray:
        return np.asarray(self.array[start:stop])


class _TiffPageSource:
    """Frames read page by page from a TIFF that cannot be memory-mapped (e.g. compressed)."""

    def __init__(self, path: Path, n_frames: int, frame_shape, dtype, page_axes_ok: bool):
        self.path = path
        self.n_frames = n_frames
        self.frame_shape = tuple(frame_shape)
        self.dtype = np.dtype(dtype)
        self._tif = tifffile.TiffFile(path)
        self._series = self._tif.series[0]

    def close(self) -> None:
        self._tif.close()

    def __del__(self):
        tif = getattr(self, "_tif", None)
        if tif is not None:
            tif.close()

    def read(self, start: int, stop: int) -> np.ndarray:
        pages = self._series.pages
        out = np.empty((stop - start, *self.frame_shape), dtype=self.dtype)
        for k, i in enumerate(range(start, stop)):
            out[k] = pages[i].asarray().reshape(self.frame_shape)
        return out


class _FolderSource:
    """Frames from a folder of single-image files in natural order."""

    def __init__(self, files: list[Path]):
        self.files = files
        first = self._load(files[0])
        self.n_frames = len(files)
        self.frame_shape = first.shape
        self.dtype = first.dtype
        self.readable_in_forks = True  # every read opens its own files

    @staticmethod
    def _load(path: Path) -> np.ndarray:
        if path.suffix.lower() == ".png":
            import cv2

            img = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
            if img is None:
                raise InputError(f"cannot read image {path}")
        else:
            img = tifffile.imread(path)
        img = np.squeeze(img)
        if img.ndim != 2:
            raise InputError(
                f"{path}: each image in a frame folder must be one grey-level frame, got shape "
                f"{img.shape}"
            )
        return img

    def read(self, start: int, stop: int) -> np.ndarray:
        frames = [self._load(p) for p in self.files[start:stop]]
        for p, f in zip(self.files[start:stop], frames, strict=True):
            if f.shape != self.frame_shape:
                raise InputError(
                    f"{p}: frame shape {f.shape} differs from the first frame "
                    f"{self.frame_shape}; all frames must match"
                )
        return np.stack(frames)


# --------------------------------------------------------------------------------------------
# metadata


def _timing(n_frames: int, fps_flag, found: dict, source: str):
    """Return (fps, times_s, uneven) from the flag or the file."""
    if fps_flag is not None:
        fps = float(fps_flag)
        if not (math.isfinite(fps) and fps > 0):
            raise MetadataError(
                f"fps must be a positive frame rate in Hz, got {fps_flag!r}; pass fps=HZ"
            )
        found["fps_source"] = "given (fps)"
        return fps, np.arange(n_frames) / fps, False
    times = found.get("plane_times_s")
    if times is not None and len(times) == n_frames and n_frames > 1:
        times = np.asarray(times, dtype=float) - float(times[0])
        dt = np.diff(times)
        if np.all(dt > 0):
            median = float(np.median(dt))
            uneven = bool(np.max(np.abs(dt - median)) > _UNEVEN_TOLERANCE * median)
            if uneven:
                warnings.warn(
                    f"{source}: frame times are uneven (intervals {dt.min() * 1e3:.2f}-"
                    f"{dt.max() * 1e3:.2f} ms); the per-frame timestamps are used",
                    BeatlabWarning,
                    stacklevel=3,
                )
            found["fps_source"] = "OME Plane DeltaT"
            return 1.0 / median, times, uneven
        if np.ptp(times) > 0 or not np.isfinite(times).all():  # all equal: placeholders
            _bad_plane_times(times, found, source)
    interval = found.get("frame_interval_s")
    if interval is not None:
        if not (math.isfinite(interval) and interval > 0):
            raise MetadataError(
                f"{source}: the file's frame rate ({found.get('fps_source')}) is not a positive "
                "number; pass fps=HZ"
            )
        return 1.0 / interval, np.arange(n_frames) * interval, False
    return None, None, False


def _bad_plane_times(times: np.ndarray, found: dict, source: str) -> None:
    """Frame times that repeat or go backwards: use the even interval, or ask for fps."""
    k = int(np.flatnonzero(~(np.diff(times) > 0))[0]) + 1
    what = (
        f"frame times in the file do not increase (OME Plane DeltaT: frame {k} at "
        f"{times[k - 1]:.4g} s, frame {k + 1} at {times[k]:.4g} s)"
    )
    if found.get("frame_interval_s") is None:
        raise MetadataError(f"{source}: {what}; pass fps=HZ to take the frames as evenly spaced")
    warnings.warn(
        f"{source}: {what}; the even interval ({found.get('fps_source')}) is used",
        BeatlabWarning,
        stacklevel=4,
    )


def _check_file_values(found: dict, source: str) -> None:
    """Refuse a pixel size or wavelength from the file that is not a positive number."""
    checks = (("pixel_size", "pixel size", "um", "UM"), ("wavelength", "wavelength", "nm", "NM"))
    for name, what, unit, flag in checks:
        value = found.get(f"{name}_{unit}")
        if value is not None and not (math.isfinite(value) and value > 0):
            raise MetadataError(
                f"{source}: the file's {what} ({found.get(f'{name}_source', 'file')}) is "
                f"{value!r} {unit}, not a positive number; pass {name}_{unit}={flag}"
            )


def _check_dtype(dtype: np.dtype, path) -> None:
    """Refuse values that are not real numbers (complex fields, booleans, text)."""
    dtype = np.dtype(dtype)
    if dtype.kind == "c":
        raise InputError(
            f"{path}: holds complex values ({dtype}); save the phase (numpy.angle) or the OPD "
            "as real numbers"
        )
    if dtype.kind not in "iuf":
        raise InputError(
            f"{path}: holds {dtype} values, not numbers; save OPD, phase or hologram frames as "
            "integers or floats"
        )


def _natural_key(path: Path):
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", path.name)]


def _squeeze_frames(shape, axes: str, path) -> tuple[tuple[int, ...], bool]:
    """Frame stack shape (T, Y, X) from a TIFF series shape and its axes."""
    dims = [(s, a) for s, a in zip(shape, axes, strict=True) if s != 1 or a in "YX"]
    kept = "".join(a for _, a in dims)
    if any(a in "CS" for a in kept):
        raise InputError(
            f"{path}: has several channels (axes {axes}, shape {shape}); export one "
            "grey-level channel of phase, OPD or hologram frames"
        )
    sizes = [s for s, _ in dims]
    if len(sizes) == 2:
        return (1, *sizes), True
    if len(sizes) == 3:
        return tuple(sizes), True
    raise InputError(f"{path}: expected a stack of 2-D frames, got axes {axes} with shape {shape}")


def _open_tiff(path: Path):
    with tifffile_complaints() as complaints, tifffile.TiffFile(path) as tif:
        series = tif.series[0]
        check_intact(tif, series, path, complaints)
        shape3, _ = _squeeze_frames(series.shape, series.axes, path)
        found: dict = {}
        if tif.is_ome and tif.ome_metadata:
            found.update(parse_ome(tif.ome_metadata))
            found["format"] = "OME-TIFF"
        elif tif.is_imagej:
            found.update(parse_imagej(tif))
            found["format"] = "ImageJ TIFF"
        else:
            found["format"] = "TIFF"
        dtype = series.dtype
    try:
        mm = tifffile.memmap(path, series=0, mode="r")
        source = _ArraySource(mm.reshape(shape3))
        found["memory_mapped"] = True
    except (ValueError, OSError):
        source = _TiffPageSource(path, shape3[0], shape3[1:], dtype, True)
        found["memory_mapped"] = False
    return source, found


def _open_npy(path: Path):
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, EOFError, OSError) as exc:
        size = path.stat().st_size
        detail = " ".join(str(exc).split())[:200]  # numpy's text spans several lines
        what = "an empty file" if size == 0 else f"not a complete numeric .npy array ({detail})"
        raise InputError(f"{path}: {what}; save the frames with numpy.save(path, frames)") from exc
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3:
        raise InputError(
            f"{path}: expected frames (T, Y, X), got shape {arr.shape}; save one grey-level "
            "stack of frames"
        )
    return _ArraySource(arr), {"format": "npy", "memory_mapped": True}


def _open_hdf5(path: Path, dataset: str | None):
    try:
        import h5py
    except ModuleNotFoundError as exc:
        raise InputError("reading HDF5 needs h5py: pip install 'beatlab[hdf5]'") from exc
    f = h5py.File(path, "r")
    if not dataset:
        names: list[str] = []
        f.visititems(
            lambda n, o: (
                names.append(n) if isinstance(o, h5py.Dataset) and o.ndim in (2, 3) else None
            )
        )
        if len(names) != 1:
            f.close()
            raise InputError(
                f"{path}: name the dataset as {path}:/group/dataset (found: "
                f"{', '.join(names) or 'no 2-D or 3-D dataset'})"
            )
        dataset = names[0]
    if dataset not in f:
        f.close()
        raise InputError(f"{path}: no dataset {dataset!r}; name it as {path}:/group/dataset")
    ds = f[dataset]
    if ds.ndim == 2:
        ds = ds[()][None]
    elif ds.ndim != 3:
        f.close()
        raise InputError(f"{path}:{dataset}: expected (T, Y, X), got shape {ds.shape}")
    found: dict = {"format": "HDF5", "dataset": dataset}
    attrs = f[dataset].attrs
    if "fps" in attrs:
        found["frame_interval_s"] = interval_s(attrs["fps"])
        found["fps_source"] = "HDF5 attribute fps"
    if "pixel_size_um" in attrs:
        found["pixel_size_um"] = float(attrs["pixel_size_um"])
        found["pixel_size_source"] = "HDF5 attribute pixel_size_um"
    if "wavelength_nm" in attrs:
        found["wavelength_nm"] = float(attrs["wavelength_nm"])
        found["wavelength_source"] = "HDF5 attribute wavelength_nm"
    if "kind" in attrs:
        found["kind"] = str(attrs["kind"])
    return _ArraySource(ds, owner=f), found


#: Where each value was looked for, by format (the note of a "missing value" message).
_LOOKED_FOR = {
    "OME-TIFF": {
        "fps": "looked for OME TimeIncrement and Plane DeltaT",
        "pixel_size_um": "looked for OME PhysicalSizeX",
        "wavelength_nm": "looked for the OME MapAnnotation wavelength_nm",
    },
    "ImageJ TIFF": {
        "fps": "looked for ImageJ finterval and fps",
        "pixel_size_um": "looked for ImageJ resolution tags with a unit",
        "wavelength_nm": "ImageJ metadata has no wavelength",
    },
    "HDF5": {
        "fps": "looked for the dataset attribute fps",
        "pixel_size_um": "looked for the dataset attribute pixel_size_um",
        "wavelength_nm": "looked for the dataset attribute wavelength_nm",
    },
}
#: Formats that carry no physical metadata at all.
_NO_METADATA = {
    "npy": ".npy files hold no metadata",
    "TIFF": "this TIFF has no OME or ImageJ metadata",
    "image folder": "a folder of images holds no metadata",
}


def _split_hdf5(path_str: str) -> tuple[str, str | None]:
    m = re.match(r"^(.*\.(?:h5|hdf5|he5|nxs))(?::(/.*))?$", path_str, flags=re.IGNORECASE)
    if m:
        return m.group(1), m.group(2)
    return path_str, None


def open_recording(
    path: str | os.PathLike,
    *,
    kind: str | None = None,
    fps: float | None = None,
    pixel_size_um: float | None = None,
    wavelength_nm: float | None = None,
) -> Recording:
    """Open a time-lapse without loading it: metadata now, frames on demand.

    Parameters
    ----------
    path : path-like
        An OME-TIFF, ImageJ or plain multi-page TIFF, a ``.npy`` array (T, Y, X), a folder of
        TIFF/PNG frames (natural order: ``f2`` before ``f10``), or an HDF5 dataset written
        ``file.h5:/group/dataset``.
    kind : {'opd', 'phase', 'hologram'}, optional
        What the values are: OPD in nm, phase in radians (wrapped or not), raw hologram
        counts. Default: as recorded by beatlab in the file, else ``'opd'``.
    fps : float, optional
        Frame rate in Hz; overrides the file (OME ``TimeIncrement``/``DeltaT``, ImageJ
        ``finterval``).
    pixel_size_um : float, optional
        Sample-plane pixel size (camera pitch / magnification) in um; overrides the file
        (OME ``PhysicalSizeX``, ImageJ resolution tags with ``unit``).
    wavelength_nm : float, optional
        Illumination wavelength in nm; overrides the file.

    Returns
    -------
    Recording

    Raises
    ------
    InputError
        If the path does not exist or cannot be read as a frame stack: an empty, damaged or
        truncated file, several channels, values that are not real numbers (complex, bool).
    MetadataError
        If a given value, or one the file records, is invalid, or the file's frame times do
        not increase (and it records no even interval). Missing values stay ``None`` here;
        :meth:`Recording.require` raises naming the flag when a stage needs them.

    Notes
    -----
    Infinite values are read as NaN (missing pixels), with a warning.

    Examples
    --------
    >>> rec = open_recording("cells.ome.tif", fps=50)  # doctest: +SKIP
    >>> rec.n_frames, rec.fps, rec.pixel_size_um  # doctest: +SKIP
    """
    path_str, dataset = _split_hdf5(os.fspath(path))
    p = Path(path_str)
    if not p.exists():
        raise InputError(f"{p}: no such file or folder; check the path")
    try:
        if p.is_dir():
            files = sorted(
                (
                    f
                    for f in p.iterdir()
                    if f.suffix.lower() in _IMAGE_SUFFIXES and not f.name.startswith(".")
                ),
                key=_natural_key,
            )
            if not files:
                raise InputError(
                    f"{p}: the folder holds no .tif/.tiff/.png frames; pass a folder of frame "
                    "images or a stack file"
                )
            source, found = _FolderSource(files), {"format": "image folder"}
        elif dataset is not None or p.suffix.lower() in (".h5", ".hdf5", ".he5", ".nxs"):
            source, found = _open_hdf5(p, dataset)
        elif p.suffix.lower() == ".npy":
            source, found = _open_npy(p)
        elif p.suffix.lower() in (".tif", ".tiff", ".btf", ".tf8"):
            source, found = _open_tiff(p)
        else:
            raise InputError(
                f"{p}: unsupported file type {p.suffix!r}; use OME-TIFF, TIFF, "
                ".npy, an HDF5 dataset or a folder of TIFF/PNG frames"
            )
    except InputError:
        raise
    except DAMAGED_FILE_ERRORS as exc:
        empty = p.is_file() and p.stat().st_size == 0
        text = " ".join(str(exc).split())[:200] or type(exc).__name__
        detail = "the file is empty" if empty else text  # one line, whatever the library says
        raise InputError(
            f"{p}: cannot be read as a frame stack ({detail}); pass an OME-TIFF, TIFF, .npy, "
            "HDF5 dataset or frame folder"
        ) from exc
    _check_dtype(source.dtype, p)
    name = str(path)
    if kind is None:
        kind = found.get("kind", "opd")
        found["kind_source"] = "file" if "kind" in found else "default (opd)"
    else:
        found["kind_source"] = "given (kind)"
    if kind == "wrapped_phase":
        kind = "phase"
    if kind not in KINDS:
        origin = "the file records" if found["kind_source"] == "file" else "given"
        raise InputError(
            f"{name}: unknown kind {kind!r} ({origin}); pass kind=KIND, one of {', '.join(KINDS)}"
        )
    n = source.n_frames
    rate, times, uneven = _timing(n, fps, found, name)
    if pixel_size_um is not None:
        if not (math.isfinite(float(pixel_size_um)) and float(pixel_size_um) > 0):
            raise MetadataError(
                f"pixel_size_um must be positive, got {pixel_size_um!r}; pass pixel_size_um=UM"
            )
        found["pixel_size_um"] = float(pixel_size_um)
        found["pixel_size_source"] = "given (pixel_size_um)"
    if wavelength_nm is not None:
        if not (math.isfinite(float(wavelength_nm)) and float(wavelength_nm) > 0):
            raise MetadataError(
                f"wavelength_nm must be positive, got {wavelength_nm!r}; pass wavelength_nm=NM"
            )
        found["wavelength_nm"] = float(wavelength_nm)
        found["wavelength_source"] = "given (wavelength_nm)"
    if found.get("pixel_size_y_um") is not None and pixel_size_um is None:
        warnings.warn(
            f"{name}: pixels are not square ({found['pixel_size_um']:.4g} x "
            f"{found['pixel_size_y_um']:.4g} um); the x size is used",
            BeatlabWarning,
            stacklevel=2,
        )
    _check_file_values(found, name)
    found["uneven_timing"] = uneven
    found["looked_for"] = _LOOKED_FOR.get(found.get("format"), {})
    if found.get("format") in _NO_METADATA:
        found["metadata_note"] = _NO_METADATA[found["format"]]
    found.pop("plane_times_s", None)
    return Recording(
        source=name,
        kind=kind,
        frames=source,
        fps=rate,
        times_s=times,
        pixel_size_um=found.get("pixel_size_um"),
        wavelength_nm=found.get("wavelength_nm"),
        metadata=found,
    )
