"""Readers for OME-TIFF, ImageJ TIFF, plain TIFF, .npy, image folders and HDF5 datasets."""

from __future__ import annotations

import math
import os
import re
import warnings
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import tifffile

from beatlab.errors import BeatlabWarning, InputError, MetadataError
from beatlab.io.recording import KINDS, Recording
from beatlab.io.writers import OME_NAMESPACE

__all__ = ["open_recording"]

_LENGTH_TO_UM = {
    "m": 1e6,
    "mm": 1e3,
    "cm": 1e4,
    "um": 1.0,
    "µm": 1.0,
    "μm": 1.0,
    "micron": 1.0,
    "microns": 1.0,
    "micrometer": 1.0,
    "micrometre": 1.0,
    "nm": 1e-3,
    "\\u00B5m": 1.0,
}
_TIME_TO_S = {
    "s": 1.0,
    "sec": 1.0,
    "ms": 1e-3,
    "us": 1e-6,
    "µs": 1e-6,
    "μs": 1e-6,
    "min": 60.0,
    "h": 3600.0,
    "ns": 1e-9,
}
_IMAGE_SUFFIXES = (".tif", ".tiff", ".png")
#: Frame intervals that differ from the median by more than this fraction count as uneven.
_UNEVEN_TOLERANCE = 0.01


def _length_um(value, unit) -> float | None:
    if value is None:
        return None
    unit = "um" if unit is None else str(unit).strip()
    factor = _LENGTH_TO_UM.get(unit, _LENGTH_TO_UM.get(unit.lower()))
    if factor is None:
        raise MetadataError(f"unknown length unit {unit!r} in the file; pass pixel_size_um=UM")
    return float(value) * factor


def _time_s(value, unit) -> float:
    unit = "s" if unit is None else str(unit).strip()
    factor = _TIME_TO_S.get(unit)
    if factor is None:
        raise MetadataError(f"unknown time unit {unit!r} in the file; pass fps=HZ")
    return float(value) * factor


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


def _parse_ome(xml: str) -> dict:
    """Pixel size, time increment, plane times and beatlab annotations from OME-XML."""
    found: dict = {}
    try:
        root = ET.fromstring(xml)
    except ET.ParseError:
        return found
    ns = {"ome": root.tag.split("}")[0].strip("{")} if root.tag.startswith("{") else {}
    q = (lambda tag: f"ome:{tag}") if ns else (lambda tag: tag)
    pixels = root.find(f".//{q('Pixels')}", ns)
    if pixels is not None:
        a = pixels.attrib
        if "PhysicalSizeX" in a:
            found["pixel_size_um"] = _length_um(a["PhysicalSizeX"], a.get("PhysicalSizeXUnit"))
            found["pixel_size_source"] = "OME PhysicalSizeX"
            if "PhysicalSizeY" in a:
                py = _length_um(a["PhysicalSizeY"], a.get("PhysicalSizeYUnit"))
                if not math.isclose(py, found["pixel_size_um"], rel_tol=1e-3):
                    found["pixel_size_y_um"] = py
        if "TimeIncrement" in a:
            found["frame_interval_s"] = _time_s(a["TimeIncrement"], a.get("TimeIncrementUnit"))
            found["fps_source"] = "OME TimeIncrement"
        planes = pixels.findall(q("Plane"), ns)
        deltas = {}
        for plane in planes:
            pa = plane.attrib
            if "DeltaT" in pa:
                t = int(pa.get("TheT", len(deltas)))
                deltas.setdefault(t, _time_s(pa["DeltaT"], pa.get("DeltaTUnit")))
        if deltas:
            found["plane_times_s"] = np.array([deltas[k] for k in sorted(deltas)])
    for ann in root.iter():
        if ann.tag.endswith("MapAnnotation") and ann.attrib.get("Namespace") == OME_NAMESPACE:
            for m in ann.iter():
                if m.tag.endswith("}M") or m.tag == "M":
                    key, value = m.attrib.get("K"), (m.text or "").strip()
                    if key == "kind":
                        found["kind"] = value
                    elif key == "wavelength_nm":
                        found["wavelength_nm"] = float(value)
                        found["wavelength_source"] = "OME MapAnnotation wavelength_nm"
    return found


def _parse_imagej(tif: tifffile.TiffFile) -> dict:
    """Frame interval and pixel size from ImageJ metadata and resolution tags."""
    found: dict = {}
    ij = tif.imagej_metadata or {}
    if ij.get("finterval"):
        found["frame_interval_s"] = _time_s(
            ij["finterval"], ij.get("tunit", "s").replace("sec", "s")
        )
        found["fps_source"] = "ImageJ finterval"
    elif ij.get("fps"):
        found["frame_interval_s"] = 1.0 / float(ij["fps"])
        found["fps_source"] = "ImageJ fps"
    # ImageJ's `spacing` is the z-step; the pixel size is in the resolution tags with `unit`.
    page = tif.pages[0]
    xres = page.tags.get("XResolution")
    unit = ij.get("unit")
    if xres is not None and unit and unit.lower() not in ("pixel", "pixels", ""):
        num, den = xres.value
        if num > 0:
            found["pixel_size_um"] = _length_um(den / num, unit)
            found["pixel_size_source"] = "ImageJ resolution tags with unit"
    return found


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
    interval = found.get("frame_interval_s")
    if interval:
        return 1.0 / interval, np.arange(n_frames) * interval, False
    return None, None, False


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
    with tifffile.TiffFile(path) as tif:
        series = tif.series[0]
        shape3, _ = _squeeze_frames(series.shape, series.axes, path)
        found: dict = {}
        if tif.is_ome and tif.ome_metadata:
            found.update(_parse_ome(tif.ome_metadata))
            found["format"] = "OME-TIFF"
        elif tif.is_imagej:
            found.update(_parse_imagej(tif))
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
    except ValueError as exc:
        raise InputError(f"{path}: not a plain numeric .npy array ({exc})") from exc
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3:
        raise InputError(f"{path}: expected an array (T, Y, X), got shape {arr.shape}")
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
        found["frame_interval_s"] = 1.0 / float(attrs["fps"])
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


_LOOKED_FOR = {
    "OME-TIFF": {
        "fps": "OME TimeIncrement and Plane DeltaT",
        "pixel_size_um": "OME PhysicalSizeX",
        "wavelength_nm": "OME MapAnnotation wavelength_nm",
    },
    "ImageJ TIFF": {
        "fps": "ImageJ finterval",
        "pixel_size_um": "ImageJ resolution tags with unit",
        "wavelength_nm": "no wavelength key in ImageJ metadata",
    },
    "HDF5": {
        "fps": "dataset attribute fps",
        "pixel_size_um": "dataset attribute pixel_size_um",
        "wavelength_nm": "dataset attribute wavelength_nm",
    },
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
        If the path does not exist or cannot be read as a frame stack.
    MetadataError
        If a given value is invalid. Missing values stay ``None`` here;
        :meth:`Recording.require` raises naming the flag when a stage needs them.

    Examples
    --------
    >>> rec = open_recording("cells.ome.tif", fps=50)  # doctest: +SKIP
    >>> rec.n_frames, rec.fps, rec.pixel_size_um  # doctest: +SKIP
    """
    path_str, dataset = _split_hdf5(os.fspath(path))
    p = Path(path_str)
    if not p.exists():
        raise InputError(f"{p}: no such file or folder")
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
                raise InputError(f"{p}: folder holds no .tif/.tiff/.png frames")
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
    except (tifffile.TiffFileError, OSError, KeyError) as exc:
        raise InputError(f"{p}: cannot be read as a frame stack ({exc})") from exc
    name = str(path)
    if kind is None:
        kind = found.get("kind", "opd")
        found["kind_source"] = "file" if "kind" in found else "default (opd)"
    else:
        found["kind_source"] = "given (kind)"
    if kind == "wrapped_phase":
        kind = "phase"
    if kind not in KINDS:
        raise InputError(f"unknown kind {kind!r}; pass kind= one of {', '.join(KINDS)}")
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
    found["uneven_timing"] = uneven
    found["looked_for"] = _LOOKED_FOR.get(found.get("format"), {})
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
