"""Speed and accuracy of the optical-flow displacement signal (beatlab.signals.flow).

Usage::

    python benchmarks/bench_flow.py                 # ms/frame at 256 and 512 px
    python benchmarks/bench_flow.py --sizes 256 512 1024 --frames 20
    python benchmarks/bench_flow.py --study         # gain and noise-floor tables
    python benchmarks/bench_flow.py --workers 1     # skip the threaded-frames row

The speed table times ``FlowTracker.displacement`` (8-bit mapping, coarse flow, float
refinement, rigid shift, mean magnitude) per frame, single thread, for each method/preset and
number of refinement steps. The study warps a textured OPD image by a known radial
contraction with an exact cubic-spline warp and prints gain = mean measured / mean true
magnitude over the mask, and the noise floor at rest (mean magnitude, px).
"""

from __future__ import annotations

import argparse
import time
from concurrent.futures import ThreadPoolExecutor

import cv2
import numpy as np
from scipy import ndimage as ndi

from beatlab.signals.tracker import FlowTracker

__all__ = ["main"]


def make_opd(rng: np.random.Generator, n: int, contrast: float) -> tuple[np.ndarray, np.ndarray]:
    """Cell blobs 40-220 nm with a 25 nm (times contrast) smooth texture, and a cell mask."""
    field = ndi.gaussian_filter(rng.standard_normal((n, n)), n / 16, mode="wrap")
    cells = 1.0 / (1.0 + np.exp(-3.0 * (field / field.std() + 0.3)))
    texture = ndi.gaussian_filter(rng.standard_normal((n, n)), 1.5, mode="wrap")
    opd = 40.0 + 180.0 * cells + contrast * cells * 25.0 * texture / texture.std()
    border = max(8, n // 10)
    mask = cells > 0.5
    mask[:border] = mask[-border:] = False
    mask[:, :border] = mask[:, -border:] = False
    return opd, mask


def contraction_field(n: int, amplitude_px: float) -> np.ndarray:
    """Radial contraction towards the centre (radius n/5), peak magnitude amplitude_px."""
    rows, cols = np.mgrid[0:n, 0:n].astype(float)
    dy, dx = rows - n / 2, cols - n / 2
    g = np.exp(-0.5 * (dx**2 + dy**2) / (n / 5) ** 2)
    field = np.stack([-dx * g, -dy * g], axis=-1)
    return field * (amplitude_px / np.hypot(field[..., 0], field[..., 1]).max())


def warp_exact(image: np.ndarray, displacement: np.ndarray) -> np.ndarray:
    """Move template point p0 to p0 + d(p0): fixed-point inverse, cubic-spline sampling."""
    n_y, n_x = image.shape
    rows, cols = np.mgrid[0:n_y, 0:n_x].astype(float)
    x0, y0 = cols.copy(), rows.copy()
    for _ in range(30):
        dx = ndi.map_coordinates(displacement[..., 0], [y0, x0], order=3, mode="nearest")
        dy = ndi.map_coordinates(displacement[..., 1], [y0, x0], order=3, mode="nearest")
        x0, y0 = cols - dx, rows - dy
    return ndi.map_coordinates(image, [y0, x0], order=3, mode="nearest")


CONFIGS = [
    ("dis", "ultrafast", 0),
    ("dis", "medium", 0),
    ("farneback", "fast", 0),
    ("dis", "ultrafast", 2),
    ("dis", "fast", 0),
    ("dis", "fast", 1),
    ("dis", "fast", 2),
    ("dis", "medium", 2),
    ("farneback", "fast", 2),
]


def speed_table(sizes: list[int], frames: int, workers: int, rng: np.random.Generator) -> None:
    print(f"{'size':>6} {'method':>10} {'preset':>10} {'refine':>6} {'ms/frame':>9}")
    for n in sizes:
        opd, mask = make_opd(rng, n, 1.0)
        stack = [
            warp_exact(opd, contraction_field(n, a)) + rng.normal(0, 1.0, opd.shape)
            for a in np.linspace(0.2, 2.0, 3)
        ]
        for method, preset, refine in CONFIGS:
            tracker = FlowTracker(
                opd, mask, pixel_size_um=0.5, method=method, preset=preset,
                refine_iterations=refine,
            )  # fmt: skip
            tracker.displacement(stack[0])
            start = time.perf_counter()
            for i in range(frames):
                tracker.displacement(stack[i % len(stack)])
            ms = (time.perf_counter() - start) / frames * 1e3
            print(f"{n:>6} {method:>10} {preset:>10} {refine:>6} {ms:>9.1f}")
        if workers > 1:
            # default configuration, frames spread over threads (measure is thread-safe)
            tracker = FlowTracker(opd, mask, pixel_size_um=0.5)
            with ThreadPoolExecutor(workers) as pool:
                start = time.perf_counter()
                list(pool.map(tracker.displacement, [stack[i % 3] for i in range(frames)]))
                ms = (time.perf_counter() - start) / frames * 1e3
            label = f"dis x{workers}thr"
            print(f"{n:>6} {label:>10} {'fast':>10} {2:>6} {ms:>9.1f}")


def study(rng_seed: int) -> None:
    n = 128
    amplitudes = [0.1, 0.3, 1.0, 3.0, 6.0]
    print("gain (noise-free), rows: contrast, method/preset/refine; columns: amplitude px")
    print(f"{'contrast':>8} {'config':>22} " + " ".join(f"{a:>6}" for a in amplitudes))
    for contrast in [0.25, 1.0, 2.0]:
        opd, mask = make_opd(np.random.default_rng(rng_seed), n, contrast)
        frames = [warp_exact(opd, contraction_field(n, a)) for a in amplitudes]
        truths = [
            np.hypot(*contraction_field(n, a).transpose(2, 0, 1))[mask].mean() for a in amplitudes
        ]
        for method, preset, refine in CONFIGS:
            tracker = FlowTracker(
                opd, mask, pixel_size_um=1.0, method=method, preset=preset,
                refine_iterations=refine,
            )  # fmt: skip
            gains = [tracker.displacement(f)[0] / t for f, t in zip(frames, truths, strict=True)]
            label = f"{method}/{preset}/{refine}"
            print(f"{contrast:>8} {label:>22} " + " ".join(f"{g:6.3f}" for g in gains))
    print()
    print("low-contrast 8-bit copy (grey = 96 + grey/4), raw OpenCV gain at 1 px")
    opd, mask = make_opd(np.random.default_rng(rng_seed), n, 1.0)
    field = contraction_field(n, 1.0)
    truth = np.hypot(*field.transpose(2, 0, 1))[mask].mean()
    lo, hi = np.percentile(opd, [0.5, 99.5])
    for factor in [1.0, 0.25]:
        a, b = ((np.clip((img - lo) / (hi - lo), 0, 1) * 255 * factor + 128 * (1 - factor))
                for img in (opd, warp_exact(opd, field)))  # fmt: skip
        a, b = np.rint(a).astype(np.uint8), np.rint(b).astype(np.uint8)
        fb = cv2.calcOpticalFlowFarneback(a, b, None, 0.5, 3, 15, 3, 5, 1.2, 0)
        dis = cv2.DISOpticalFlow_create(cv2.DISOPTICAL_FLOW_PRESET_FAST).calc(a, b, None)
        g_fb = np.hypot(*fb.transpose(2, 0, 1))[mask].mean() / truth
        g_dis = np.hypot(*dis.transpose(2, 0, 1))[mask].mean() / truth
        print(f"  contrast factor {factor}: farneback {g_fb:.3f}  dis/fast {g_dis:.3f}")
    print()
    print("noise floor at rest (mean magnitude px over the mask; template = mean of 20 frames)")
    print(f"{'contrast':>8} {'noise_nm':>8} {'window_px':>9} {'floor_px':>9} {'gain@0.1px':>10}")
    for contrast in [0.25, 1.0, 2.0]:
        rng = np.random.default_rng(rng_seed + 1)
        opd, mask = make_opd(rng, n, contrast)
        field = contraction_field(n, 0.1)
        moved = warp_exact(opd, field)
        truth = np.hypot(*field.transpose(2, 0, 1))[mask].mean()
        for noise in [1.0, 2.0]:
            template = opd + rng.normal(0, noise / np.sqrt(20), opd.shape)
            for window in [2.0, 4.0, 6.0]:
                tracker = FlowTracker(template, mask, pixel_size_um=1.0, window_px=window)
                floor = np.mean(
                    [tracker.displacement(opd + rng.normal(0, noise, opd.shape))[0]
                     for _ in range(4)]
                )  # fmt: skip
                gain = np.mean(
                    [tracker.displacement(moved + rng.normal(0, noise, opd.shape))[0] / truth
                     for _ in range(4)]
                )  # fmt: skip
                print(f"{contrast:>8} {noise:>8} {window:>9} {floor:>9.4f} {gain:>10.3f}")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[256, 512])
    parser.add_argument("--frames", type=int, default=10, help="timed frames per row")
    parser.add_argument("--threads", type=int, default=1, help="OpenCV threads")
    parser.add_argument("--workers", type=int, default=2, help="frame threads (extra row)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--study", action="store_true", help="print gain/floor tables")
    args = parser.parse_args(argv)
    cv2.setNumThreads(args.threads)
    if args.study:
        study(args.seed)
    else:
        speed_table(args.sizes, args.frames, args.workers, np.random.default_rng(args.seed))


if __name__ == "__main__":
    main()
