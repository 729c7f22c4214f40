"""The :class:`Recording`: a time-lapse with its physical metadata and lazy frame access."""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from beatlab.errors import BeatlabWarning, InputError, MetadataError

__all__ = ["KINDS", "FrameSource", "Recording"]

#: What the pixel values are: OPD in nm, phase in radians, raw camera counts.
KINDS = ("opd", "phase", "hologram")

_FLAGS = {
    "fps": ("fps=HZ", "frame rate"),
    "pixel_size_um": ("pixel_size_um=UM", "sample-plane pixel size"),
    "wavelength_nm": ("wavelength_nm=NM", "wavelength"),
}


def _and(words: list[str]) -> str:
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


class FrameSource(Protocol):
    """What a reader gives a :class:`Recording`: a frame count, a frame shape, and slices."""

    n_frames: int
    frame_shape: tuple[int, int]
    dtype: np.dtype

    def read(self, start: int, stop: int) -> np.ndarray:
        """Frames ``start:stop`` as an array (n, Y, X), a memory-map view where possible."""
        ...


@dataclass
class Recording:
    """A phase, OPD or hologram time-lapse with physical metadata and lazy frame access.

    Frames are read on demand (memory-mapped where the file allows it), so a recording of any
    length costs little memory until frames are used. Obtain one with
    :func:`beatlab.open_recording`.

    Attributes
    ----------
    source : str
        Where the frames come from.
    kind : {'opd', 'phase', 'hologram'}
        What the pixel values are.
    n_frames : int
        Number of frames.
    shape : tuple of int
        Frame shape (Y, X) in pixels.
    fps : float or None
        Frame rate in Hz (1 / median frame interval when timestamps are uneven).
    times_s : ndarray (T,) or None
        Frame times in seconds from the first frame.
    pixel_size_um : float or None
        Sample-plane pixel size in micrometres.
    wavelength_nm : float or None
        Illumination wavelength in nm.
    metadata : dict
        What was found in the file and where each value came from.
    """

    source: str
    kind: str
    frames: FrameSource = field(repr=False)
    fps: float | None
    times_s: np.ndarray | None = field(repr=False)
    pixel_size_um: float | None
    wavelength_nm: float | None
    metadata: dict = field(default_factory=dict, repr=False)
    _warned_infinite: bool = field(default=False, init=False, repr=False, compare=False)

    @property
    def n_frames(self) -> int:
        return int(self.frames.n_frames)

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(int(s) for s in self.frames.frame_shape)

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(self.frames.dtype)

    @property
    def duration_s(self) -> float | None:
        """Time from the first frame to one interval after the last, in seconds."""
        if self.times_s is None or self.fps is None:
            return None
        return float(self.times_s[-1] - self.times_s[0] + 1.0 / self.fps)

    @property
    def uneven_timing(self) -> bool:
        return bool(self.metadata.get("uneven_timing", False))

    def require(self, *names: str) -> None:
        """Raise :class:`MetadataError` naming every missing value and the parameter to pass.

        All the missing values are named in one message, so one run tells everything to add.
        """
        missing = [name for name in names if getattr(self, name) is None]
        if not missing:
            return
        whats = _and([_FLAGS[name][1] for name in missing])
        flags = _and([_FLAGS[name][0] for name in missing])
        verb = "is" if len(missing) == 1 else "are"
        looked = self.metadata.get("looked_for", {})
        notes = [looked[name] for name in missing if name in looked]
        where = "; ".join(notes) or self.metadata.get("metadata_note", "no metadata was given")
        raise MetadataError(f"{self.source}: the {whats} {verb} unknown ({where}); pass {flags}")

    def frame(self, index: int) -> np.ndarray:
        """Return frame ``index`` (negative counts from the end) as float32 (Y, X).

        Infinite values are returned as NaN (missing pixels), like every other reader.
        """
        n = self.n_frames
        i = int(index)
        if i < 0:
            i += n
        if not 0 <= i < n:
            raise IndexError(f"frame {index} out of range for {n} frames")
        return self.replace_infinite(np.asarray(self.frames.read(i, i + 1)[0], dtype=np.float32))

    def chunks(
        self,
        size: int = 64,
        *,
        start: int = 0,
        stop: int | None = None,
        replace_infinite: bool = True,
    ) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first_index, frames)`` with float32 arrays of at most ``size`` frames.

        Infinite values come as NaN (missing pixels); ``replace_infinite=False`` leaves them
        for a caller that checks a smaller result first (:meth:`replace_infinite` then).
        """
        if size < 1:
            raise ValueError(f"chunk size must be >= 1, got {size}")
        stop = self.n_frames if stop is None else min(int(stop), self.n_frames)
        for i in range(int(start), stop, size):
            j = min(i + size, stop)
            block = self._read(i, j)
            if block.shape[0] != j - i:
                raise InputError(
                    f"{self.source}: could read only {block.shape[0]} of frames "
                    f"{i}-{j - 1}; the file may be truncated"
                )
            yield i, self.replace_infinite(block) if replace_infinite else block

    def _read(self, i: int, j: int) -> np.ndarray:
        """Frames ``i:j`` as float32; a damaged file gives an InputError, not a library's."""
        from beatlab.io.readers import DAMAGED_FILE_ERRORS

        try:
            return np.asarray(self.frames.read(i, j), dtype=np.float32)
        except DAMAGED_FILE_ERRORS as exc:
            detail = " ".join(str(exc).split()) or type(exc).__name__
            raise InputError(
                f"{self.source}: frames {i}-{j - 1} cannot be read ({detail[:200]}); the file "
                "is damaged or truncated: export it again"
            ) from None

    def replace_infinite(self, frames: np.ndarray) -> np.ndarray:
        """``frames`` with +-inf set to NaN (a copy if any); warns once per recording."""
        if self.dtype.kind != "f" or np.isfinite(frames.sum()):  # a finite sum: no inf, no NaN
            return frames
        infinite = np.isinf(frames)
        if not infinite.any():
            return frames
        if not self._warned_infinite:
            self._warned_infinite = True
            warnings.warn(
                f"{self.source}: holds infinite values; they are treated as missing (NaN) pixels",
                BeatlabWarning,
                stacklevel=3,
            )
        frames = np.array(frames, dtype=np.float32)  # never write into a memory map
        frames[infinite] = np.nan
        return frames

    def close(self) -> None:
        """Release the file behind the frames (also done when the recording is collected)."""
        close = getattr(self.frames, "close", None)
        if close is not None:
            close()

    def __enter__(self) -> Recording:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __iter__(self) -> Iterator[np.ndarray]:
        for _, block in self.chunks():
            yield from block

    def __len__(self) -> int:
        return self.n_frames
