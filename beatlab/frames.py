"""OPD frames from any recording kind: OPD as stored, phase, or raw holograms.

The analysis stages see only float32 OPD frames in nm, streamed in chunks; this module turns
each kind of recording into that stream.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator

import cv2
import numpy as np

from beatlab.errors import InputError
from beatlab.io.recording import Recording
from beatlab.opd import phase_to_opd, unwrap_in_time, unwrap_phase_ls
from beatlab.settings import HolographySettings, load_settings

__all__ = ["AUTO_BIN_MAX_UM", "AUTO_BIN_MIN_PX", "OPDSource", "block_mean", "choose_bin"]

#: Automatic binning keeps at least this many pixels along the short side ...
AUTO_BIN_MIN_PX = 256
#: ... and binned pixels no larger than this (um).
AUTO_BIN_MAX_UM = 1.0


def choose_bin(shape: tuple[int, int], pixel_size_um: float | None) -> int:
    """The largest binning factor that keeps the short side at :data:`AUTO_BIN_MIN_PX` px or
    more and the binned pixel at :data:`AUTO_BIN_MAX_UM` or less (1 without a pixel size).

    The contraction field of a cell sheet is smooth over several micrometres, and the optical
    flow and the projections cost in proportion to the pixels: a 512 x 512 camera frame at
    0.5 um analysed as 256 x 256 at 1 um costs a quarter. Noise per pixel drops by the factor.
    """
    if pixel_size_um is None or not np.isfinite(pixel_size_um) or pixel_size_um <= 0:
        return 1
    by_size = min(shape) // AUTO_BIN_MIN_PX
    by_pixel = int(np.floor(AUTO_BIN_MAX_UM / float(pixel_size_um) + 1e-9))
    return max(1, min(by_size, by_pixel))


def block_mean(frame: np.ndarray, factor: int) -> np.ndarray:
    """Average non-overlapping ``factor x factor`` blocks (NaN-aware); edges are cropped."""
    if factor <= 1:
        return np.asarray(frame, dtype=np.float32)
    ny, nx = (s // factor for s in frame.shape)
    f = np.asarray(frame[: ny * factor, : nx * factor], dtype=np.float32)
    # area resampling by an integer factor is the exact block mean (and several times faster
    # than a reshape-mean); a NaN pixel makes its block NaN, so the small result tells whether
    # the NaN-aware mean is needed (infinities stay infinite, as in the mean)
    out = cv2.resize(f, (nx, ny), interpolation=cv2.INTER_AREA)
    if not np.isnan(out.sum()):
        return out
    blocks = f.reshape(ny, factor, nx, factor)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN blocks stay NaN
        out = np.nanmean(blocks, axis=(1, 3))
    return out.astype(np.float32)


class OPDSource:
    """Stream a recording's frames as OPD (nm), whatever its kind.

    Parameters
    ----------
    recording : Recording
        An opened recording. Phase and hologram kinds need ``wavelength_nm``.
    opd_scale : float
        Stored OPD values are multiplied by this to give nm (kind ``opd``).
    phase_scale : float
        Stored phase values are multiplied by this to give radians (kind ``phase``).
    reference : ndarray, optional
        Sample-free hologram frame(s) (R, Y, X) for kind ``hologram``.
    holography : HolographySettings, optional
        The ``[holography]`` settings for :meth:`OffAxisReconstructor.fit` (default: the
        defaults).
    chunk_frames : int
        Frames per chunk.
    bin : int
        Average ``bin x bin`` pixel blocks of every OPD frame (1: none; 0: automatic,
        :func:`choose_bin`). The attributes ``shape`` and ``pixel_size_um`` describe the
        binned frames.

    Notes
    -----
    Phase is unwrapped consistently in time: the first frame is unwrapped in space once
    (least squares, congruent), every other frame is that plus its wrapped difference to the
    first frame, so wrapped and unwrapped phase inputs give the same OPD and no pixel can jump
    by a wavelength between frames.
    """

    def __init__(
        self,
        recording: Recording,
        *,
        opd_scale: float = 1.0,
        phase_scale: float = 1.0,
        reference: np.ndarray | None = None,
        holography: HolographySettings | None = None,
        chunk_frames: int = 64,
        bin: int = 1,
    ):
        self.recording = recording
        self.opd_scale = float(opd_scale)
        self.phase_scale = float(phase_scale)
        self.chunk_frames = int(chunk_frames)
        self.pixel_size_um = recording.pixel_size_um
        self.shape = recording.shape
        self._reconstructor = None
        if recording.kind in ("phase", "hologram"):
            recording.require("wavelength_nm")
        if recording.kind == "phase":
            first = recording.frame(0).astype(np.float64) * self.phase_scale
            self._phase_ref = first
            self._phase_ref_unwrapped = unwrap_phase_ls(first)
        elif recording.kind == "hologram":
            from beatlab.holography import OffAxisReconstructor

            recording.require("pixel_size_um")
            self._reconstructor = OffAxisReconstructor.fit(
                recording.frame(0),
                wavelength_nm=recording.wavelength_nm,
                pixel_size_um=recording.pixel_size_um,
                reference=reference,
                **(holography or load_settings().holography).fit_options(),
            )
            self.pixel_size_um = float(self._reconstructor.output_pixel_size_um)
            self.shape = tuple(self._reconstructor.output_shape)
        elif recording.kind != "opd":
            raise InputError(f"unknown recording kind {recording.kind!r}")
        if int(bin) < 0:
            raise InputError(f"bin must be 0 (automatic) or a positive factor, got {bin!r}")
        self.bin = int(bin) or choose_bin(self.shape, self.pixel_size_um)
        self.unbinned_shape = tuple(self.shape)
        if self.bin > 1:
            self.shape = tuple(n // self.bin for n in self.shape)
            if min(self.shape) < 8:
                raise InputError(
                    f"bin {self.bin} leaves only {self.shape} px per frame; use a smaller "
                    "[input] bin"
                )
            if self.pixel_size_um is not None:
                self.pixel_size_um = float(self.pixel_size_um) * self.bin

    @property
    def n_frames(self) -> int:
        return self.recording.n_frames

    @property
    def reconstructor(self):
        """The hologram reconstructor (None for OPD and phase recordings)."""
        return self._reconstructor

    def _convert(self, block: np.ndarray) -> np.ndarray:
        opd = self._to_opd(block)
        if self.bin <= 1:
            return opd
        return np.stack([block_mean(frame, self.bin) for frame in opd])

    @property
    def _checks_binned(self) -> bool:
        """Whether chunks are read with their infinities and checked after binning: for
        binned OPD frames, a sum over the binned frames tells whether any pixel was not
        finite, at a quarter (or less) of the cost of the same check on the camera frames."""
        return self.recording.kind == "opd" and self.bin > 1

    def _read(self, size: int, *, start: int = 0, stop: int | None = None):
        """``recording.chunks`` for :meth:`_convert_read` (infinities left to it)."""
        return self.recording.chunks(
            size, start=start, stop=stop, replace_infinite=not self._checks_binned
        )

    def _convert_read(self, block: np.ndarray) -> np.ndarray:
        """:meth:`_convert` of frames from :meth:`_read`: the same numbers as converting the
        frames with their infinities replaced by NaN (:meth:`Recording.replace_infinite`),
        which is done only where the binned frames are not finite and the block holds an
        infinity (NaN pixels alone are binned the same either way)."""
        out = self._convert(block)
        if not self._checks_binned or np.isfinite(out.sum()) or not np.isinf(block).any():
            return out
        return self._convert(self.recording.replace_infinite(block))

    def _convert_runs(self, block: np.ndarray, idx: np.ndarray) -> np.ndarray:
        """:meth:`_convert_read` of ``block[idx]`` (sorted indices), run by run of consecutive
        frames: each run is a view of the block, so the raw frames are never copied (~4 ms
        per 64 frames of 512 px), only the converted (binned) ones. Every frame converts on
        its own, so the frames are those of converting ``block[idx]`` at once."""
        if idx.size == 0:
            return self._convert_read(block[idx])
        breaks = np.flatnonzero(np.diff(idx) != 1) + 1
        runs = [(int(r[0]), int(r[-1]) + 1) for r in np.split(idx, breaks)]
        if len(runs) == 1:
            return self._convert_read(block[runs[0][0] : runs[0][1]])
        return np.concatenate([self._convert_read(block[a:b]) for a, b in runs])

    def bin_labels(self, labels: np.ndarray) -> np.ndarray:
        """A label image (0 outside, 1..n inside) of the unbinned frames on the binned grid.

        Each binned pixel takes the label of the pixel at its block's centre; a label image
        already of the binned shape is returned as it is.

        Raises
        ------
        InputError
            The image has neither shape.
        """
        labels = np.asarray(labels)
        if labels.shape == tuple(self.shape):
            return labels
        if labels.shape != tuple(self.unbinned_shape):
            raise InputError(
                f"regions: label image shape {labels.shape} differs from the analysed frames "
                f"{tuple(self.unbinned_shape)}; give a label image of the same size"
            )
        c = self.bin // 2
        ny, nx = self.shape
        return labels[c :: self.bin, c :: self.bin][:ny, :nx]

    def _to_opd(self, block: np.ndarray) -> np.ndarray:
        kind = self.recording.kind
        if kind == "opd":
            out = block if self.opd_scale == 1.0 else block * np.float32(self.opd_scale)
            return np.asarray(out, dtype=np.float32)
        if kind == "phase":
            phases = unwrap_in_time(
                (frame.astype(np.float64) * self.phase_scale for frame in block),
                reference_wrapped=self._phase_ref,
                reference_unwrapped=self._phase_ref_unwrapped,
            )
            return np.stack([phase_to_opd(p, self.recording.wavelength_nm) for p in phases])
        return np.stack(list(self._reconstructor.opd_frames(block)))

    def chunks(
        self, *, start: int = 0, stop: int | None = None
    ) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first_index, opd_frames)`` float32 (n, Y, X) nm."""
        for i0, block in self._read(self.chunk_frames, start=start, stop=stop):
            yield i0, self._convert_read(block)

    def select_chunks(self, keep: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Yield ``(frame_indices, opd_frames)`` for the frames where ``keep`` (T,) is true.

        Frames are read chunk by chunk and only the kept ones are converted (for holograms,
        reconstructed), so a second pass over part of a recording costs only that part.
        """
        keep = np.asarray(keep, dtype=bool)
        for i0, block in self._read(self.chunk_frames):
            idx = np.flatnonzero(keep[i0 : i0 + len(block)])
            if idx.size:
                yield i0 + idx, self._convert_runs(block, idx)

    def select_indices(self, keep: np.ndarray) -> Iterator[tuple[np.ndarray, None]]:
        """:meth:`select_chunks` without reading: ``(frame_indices, None)`` per chunk, for
        workers that read their frames themselves (:meth:`frames_at`)."""
        keep = np.asarray(keep, dtype=bool)
        for i0 in range(0, self.n_frames, self.chunk_frames):
            idx = np.flatnonzero(keep[i0 : i0 + self.chunk_frames])
            if idx.size:
                yield i0 + idx, None

    def frames_at(self, indices: np.ndarray) -> np.ndarray:
        """OPD frames (n, Y, X) nm at sorted ``indices``, read as one stretch of the file."""
        indices = np.asarray(indices, dtype=int)
        lo, hi = int(indices[0]), int(indices[-1]) + 1
        ((_, block),) = self._read(hi - lo, start=lo, stop=hi)
        return self._convert_runs(block, indices - lo)

    @property
    def readable_in_forks(self) -> bool:
        """Whether forked workers may read frames themselves (:meth:`frames_at`): the frames
        come from a memory map or an array, or from separate files, never through a file
        handle the processes would share."""
        return bool(getattr(self.recording.frames, "readable_in_forks", False))

    def frame(self, index: int) -> np.ndarray:
        """One OPD frame (Y, X) in nm."""
        return self._convert(self.recording.frame(index)[None])[0]
