"""Throughput of hologram-to-OPD reconstruction against an FFT-bound limit (run by hand).

    python benchmarks/bench_holography.py --size 1024 --frames 40 --workers 2

The limit is measured in the same run: per frame, one forward real FFT of the full frame plus
one inverse complex FFT of the band, with the same scipy.fft settings.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import scipy.fft

from beatlab.holography import OffAxisReconstructor, render_hologram, render_reference

LAMBDA_NM = 632.8


def _frames(shape, count, rng):
    yy, xx = np.mgrid[: shape[0], : shape[1]].astype(float)
    cells = 300.0 * np.exp(
        -((yy - shape[0] / 2) ** 2 + (xx - shape[1] / 3) ** 2) / (2 * (shape[0] / 10) ** 2)
    )
    base = render_hologram(cells, wavelength_nm=LAMBDA_NM, rng=rng).astype(np.uint16)
    ref = render_reference(shape, wavelength_nm=LAMBDA_NM, rng=rng)
    # a few distinct frames, cycled, so generation does not dominate the timing
    distinct = [base] + [
        render_hologram(cells * (1 + 0.05 * i), wavelength_nm=LAMBDA_NM, rng=rng).astype(np.uint16)
        for i in range(1, 4)
    ]
    return ref, [distinct[i % len(distinct)] for i in range(count)]


def _fft_limit(frames, band_shape, workers):
    band = np.zeros(band_shape, dtype=np.complex64)
    start = time.perf_counter()
    for frame in frames:
        spectrum = scipy.fft.rfft2(frame.astype(np.float32), workers=workers)
        band[0, 0] = spectrum[0, 1]
        scipy.fft.ifft2(band, workers=workers)
    return len(frames) / (time.perf_counter() - start)


def _pipeline(rec, frames):
    start = time.perf_counter()
    for _ in rec.opd_frames(frames):
        pass
    return len(frames) / (time.perf_counter() - start)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--size", type=int, nargs="+", default=[512, 1024], help="square frame sizes in pixels"
    )
    parser.add_argument("--frames", type=int, default=40, help="frames per measurement")
    parser.add_argument("--workers", type=int, default=1, help="scipy.fft threads")
    parser.add_argument("--repeats", type=int, default=3, help="best of this many runs")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(0)
    print(
        f"{'size':>6} {'output':>9} {'ref':>4} {'fft-bound fr/s':>15} {'beatlab fr/s':>13} "
        f"{'ratio':>6}"
    )
    for size in args.size:
        ref, frames = _frames((size, size), args.frames, rng)
        for use_ref in (True, False):
            rec = OffAxisReconstructor.fit(
                frames[0],
                wavelength_nm=LAMBDA_NM,
                pixel_size_um=0.2,
                reference=ref if use_ref else None,
                workers=args.workers,
            )
            band_shape = rec._filter._band_shape
            limit = max(_fft_limit(frames, band_shape, args.workers) for _ in range(args.repeats))
            speed = max(_pipeline(rec, frames) for _ in range(args.repeats))
            out = f"{rec.output_shape[0]}x{rec.output_shape[1]}"
            print(
                f"{size:>6} {out:>9} {'yes' if use_ref else 'no':>4} {limit:>15.1f} "
                f"{speed:>13.1f} {speed / limit:>6.2f}"
            )


if __name__ == "__main__":
    main()
