"""The plain approach a lab member writes by hand, for benchmarks/bench_analyze.py.

Optical flow of every frame against the first (OpenCV Farneback, full resolution), the mean
flow magnitude over the frame as the contraction trace, ``scipy.signal.find_peaks`` for the
beats and ``scipy.signal.peak_widths`` for their timing (onset at 10 % of the rise, duration
at 90 % relaxation). Frames are read one at a time (tifffile memory map), as such a script
would. Run as ``python plain_approach.py RECORDING.ome.tif FPS PIXEL_UM``; prints one JSON line.
"""

from __future__ import annotations

import json
import sys
import time

import cv2
import numpy as np
import tifffile
from scipy import signal


def to_u8(frame: np.ndarray, lo: float, hi: float) -> np.ndarray:
    return np.clip((frame - lo) / (hi - lo) * 255.0, 0, 255).astype(np.uint8)


def trace_of(path: str) -> np.ndarray:
    stack = tifffile.memmap(path) if path.endswith((".tif", ".tiff")) else np.load(path)
    stack = stack.reshape(-1, *stack.shape[-2:])
    first = np.asarray(stack[0], dtype=np.float32)
    lo, hi = np.percentile(first, [0.5, 99.5])
    ref = to_u8(first, lo, hi)
    out = np.empty(stack.shape[0])
    for i in range(stack.shape[0]):
        flow = cv2.calcOpticalFlowFarneback(
            ref, to_u8(np.asarray(stack[i], dtype=np.float32), lo, hi), None,
            0.5, 3, 15, 3, 5, 1.2, 0,
        )  # fmt: skip
        out[i] = np.hypot(flow[..., 0], flow[..., 1]).mean()
    return out


def beats_of(trace: np.ndarray, fps: float, pixel_um: float) -> list[dict]:
    span = float(trace.max() - np.median(trace))
    peaks, _ = signal.find_peaks(trace, prominence=0.3 * span, distance=max(1, int(0.25 * fps)))
    if peaks.size == 0:
        return []
    rise = signal.peak_widths(trace, peaks, rel_height=0.9)
    rows = []
    for k, p in enumerate(peaks):
        onset = rise[2][k] / fps
        end = rise[3][k] / fps
        rows.append(
            {
                "onset_s": onset,
                "peak_s": p / fps,
                "time_to_peak_s": p / fps - onset,
                "duration_90_s": end - onset,
                "displacement_um": float(trace[p] - np.min(trace)) * pixel_um,
            }
        )
    return rows


def main() -> None:
    path, fps, pixel_um = sys.argv[1], float(sys.argv[2]), float(sys.argv[3])
    start = time.perf_counter()
    trace = trace_of(path)
    beats = beats_of(trace, fps, pixel_um)
    print(json.dumps({"seconds": time.perf_counter() - start, "beats": beats}))


if __name__ == "__main__":
    main()
