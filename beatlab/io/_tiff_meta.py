"""TIFF metadata (OME-XML, ImageJ tags, their units) and the check for damaged files."""

from __future__ import annotations

import contextlib
import logging
import math
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import tifffile

from beatlab.errors import InputError, MetadataError
from beatlab.io.writers import OME_NAMESPACE

__all__ = [
    "check_intact",
    "interval_s",
    "length_um",
    "parse_imagej",
    "parse_ome",
    "tifffile_complaints",
    "time_s",
]

logger = logging.getLogger(__name__)

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


def length_um(value, unit) -> float | None:
    """A length from the file in micrometres (``unit`` None: already um)."""
    if value is None:
        return None
    unit = "um" if unit is None else str(unit).strip()
    factor = _LENGTH_TO_UM.get(unit, _LENGTH_TO_UM.get(unit.lower()))
    if factor is None:
        raise MetadataError(f"unknown length unit {unit!r} in the file; pass pixel_size_um=UM")
    return float(value) * factor


def time_s(value, unit) -> float:
    """A time from the file in seconds (``unit`` None: already s)."""
    unit = "s" if unit is None else str(unit).strip()
    factor = _TIME_TO_S.get(unit)
    if factor is None:
        raise MetadataError(f"unknown time unit {unit!r} in the file; pass fps=HZ")
    return float(value) * factor


def interval_s(fps) -> float:
    """1 / fps, NaN for a rate that is not positive (refused later, naming the flag)."""
    fps = float(fps)
    return 1.0 / fps if fps > 0 else math.nan


def parse_ome(xml: str) -> dict:
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
            found["pixel_size_um"] = length_um(a["PhysicalSizeX"], a.get("PhysicalSizeXUnit"))
            found["pixel_size_source"] = "OME PhysicalSizeX"
            if "PhysicalSizeY" in a:
                py = length_um(a["PhysicalSizeY"], a.get("PhysicalSizeYUnit"))
                if not math.isclose(py, found["pixel_size_um"], rel_tol=1e-3):
                    found["pixel_size_y_um"] = py
        if "TimeIncrement" in a:
            found["frame_interval_s"] = time_s(a["TimeIncrement"], a.get("TimeIncrementUnit"))
            found["fps_source"] = "OME TimeIncrement"
        planes = pixels.findall(q("Plane"), ns)
        deltas = {}
        for plane in planes:
            pa = plane.attrib
            if "DeltaT" in pa:
                t = int(pa.get("TheT", len(deltas)))
                deltas.setdefault(t, time_s(pa["DeltaT"], pa.get("DeltaTUnit")))
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


def parse_imagej(tif: tifffile.TiffFile) -> dict:
    """Frame interval and pixel size from ImageJ metadata and resolution tags."""
    found: dict = {}
    ij = tif.imagej_metadata or {}
    if ij.get("finterval"):
        found["frame_interval_s"] = time_s(
            ij["finterval"], ij.get("tunit", "s").replace("sec", "s")
        )
        found["fps_source"] = "ImageJ finterval"
    elif ij.get("fps"):
        found["frame_interval_s"] = interval_s(ij["fps"])
        found["fps_source"] = "ImageJ fps"
    # ImageJ's `spacing` is the z-step; the pixel size is in the resolution tags with `unit`.
    page = tif.pages[0]
    xres = page.tags.get("XResolution")
    unit = ij.get("unit")
    if xres is not None and unit and unit.lower() not in ("pixel", "pixels", ""):
        num, den = xres.value
        if num > 0:
            found["pixel_size_um"] = length_um(den / num, unit)
            found["pixel_size_source"] = "ImageJ resolution tags with unit"
    return found


#: Words of tifffile's error messages about a broken file structure (not odd metadata).
_STRUCTURAL = ("offset", "bytecounts", "next page", "corrupt", "truncat")


@contextlib.contextmanager
def tifffile_complaints() -> Iterator[list[str]]:
    """Collect tifffile's errors about the file structure while parsing.

    tifffile logs, rather than raises, when a page or tag points past the end of a damaged
    or truncated file, and reads on with what it found. Its other messages (odd metadata,
    a fallback from a malformed OME header) are kept out of the user's way: our debug log.
    """
    tiff_log = logging.getLogger("tifffile")
    complaints: list[str] = []

    class _Collect(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            message = record.getMessage()
            logger.debug("tifffile: %s", message)
            structural = any(word in message.lower() for word in _STRUCTURAL)
            if record.levelno >= logging.ERROR and structural:
                complaints.append(message)

    handler = _Collect(level=logging.WARNING)
    propagate = tiff_log.propagate
    tiff_log.addHandler(handler)
    tiff_log.propagate = False  # the user sees our one-line error, not tifffile's log
    try:
        yield complaints
    finally:
        tiff_log.removeHandler(handler)
        tiff_log.propagate = propagate


def check_intact(tif: tifffile.TiffFile, series, path: Path, complaints: list[str]) -> None:
    """Raise when the pages or the pixel data of ``series`` run past the end of the file.

    ``complaints`` are tifffile's structural errors (:func:`tifffile_complaints`).
    """
    n_pages = len(tif.pages)  # walks the whole page chain: a broken link is logged
    size = tif.filehandle.size
    ends = [
        offset + count
        for page in (series.pages[0], series.pages[-1])
        if page is not None
        for offset, count in zip(page.dataoffsets, page.databytecounts, strict=False)
    ]
    if complaints or not n_pages or (ends and max(ends) > size):
        raise InputError(
            f"{path}: the TIFF is damaged or truncated (its pages or pixel data run past the "
            f"end of the file, {size} bytes); copy the file again from where it was recorded"
        )
