"""Accuracy study (run by hand): timing and amplitude errors against simulator ground truth.

For each frame rate and noise preset, simulates recordings with exact ground truth, analyses
them, and prints the median and 95th-percentile absolute error of each timing column in
frames, the beat-count error and the displacement gain.

    python benchmarks/accuracy_study.py --fps 15 30 50 100 --seeds 3
"""

from __future__ import annotations

import argparse

import numpy as np
import pandas as pd

from beatlab.io import Recording
from beatlab.io.readers import _ArraySource
from beatlab.pipeline import analyze
from beatlab.synth import simulate_recording

PRESETS = {
    "moderate": dict(noise_nm=1.0),
    "noisy": dict(noise_nm=2.0, correlated_noise_nm=1.0, jitter_nm=3.0, drift_nm=20.0),
}
TIMING = [
    "onset_s",
    "peak_s",
    "end_s",
    "time_to_peak_s",
    "relax_50_s",
    "relax_90_s",
    "duration_50_s",
    "duration_90_s",
]


def _errors(found: pd.DataFrame, truth: list[dict]) -> pd.DataFrame:
    peaks = found["peak_s"].to_numpy()
    rows = []
    for b in truth:
        k = int(np.argmin(np.abs(peaks - b["peak_s"]))) if peaks.size else -1
        if k < 0 or abs(peaks[k] - b["peak_s"]) > 0.2:
            continue
        rows.append({c: found.iloc[k][c] - b[c] for c in TIMING if b[c] is not None})
    return pd.DataFrame(rows)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--fps", type=float, nargs="+", default=[15, 30, 50, 100])
    parser.add_argument("--rate-bpm", type=float, default=60.0)
    parser.add_argument("--seeds", type=int, default=2)
    parser.add_argument("--presets", nargs="+", default=list(PRESETS), choices=list(PRESETS))
    args = parser.parse_args()
    print(f"{'preset':9} {'fps':>4} {'count':>6} " + " ".join(f"{c[:-2]:>14}" for c in TIMING))
    for preset in args.presets:
        for fps in args.fps:
            errs, count_err = [], 0
            for seed in range(args.seeds):
                sim = simulate_recording(
                    duration_s=8,
                    fps=fps,
                    shape_px=(96, 96),
                    rate_bpm=args.rate_bpm,
                    rng=seed,
                    **PRESETS[preset],
                )
                rec = Recording(
                    source="sim",
                    kind="opd",
                    frames=_ArraySource(sim.frames),
                    fps=sim.fps,
                    times_s=sim.times_s,
                    pixel_size_um=sim.pixel_size_um,
                    wavelength_nm=sim.wavelength_nm,
                )
                res = analyze(rec)
                count_err += abs(res.summary["beat_count"] - sim.truth["summary"]["beat_count"])
                errs.append(_errors(res.beats, sim.truth["beats"]))
            e = pd.concat(errs).abs() * fps
            cells = [f"{e[c].median():5.2f}/{e[c].quantile(0.95):5.2f}".rjust(14) for c in TIMING]
            print(f"{preset:9} {fps:4.0f} {count_err:6d} " + " ".join(cells))
    print("cells: median / 95th percentile absolute error in frames; count: summed |error|")


if __name__ == "__main__":
    main()
