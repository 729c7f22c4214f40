"""Benchmark: `beatlab analyze` against the plain approach, speed, accuracy and memory.

Run by hand, never as a timed test. Simulates recordings (512 x 512 px by default, 1,000 and
4,000 frames at 50 fps), writes them as OME-TIFF and runs, alternating in the same run, each
as a whole process:

- ``beatlab analyze PATH --out DIR`` (the command a user runs, figures included);
- the plain approach of ``benchmarks/plain_approach.py`` (Farneback flow of every frame
  against the first at full resolution, mean magnitude, ``scipy.signal.find_peaks``).

Prints frames/s of each, their ratio, peak anonymous resident memory (RssAnon, sampled by
the parent every 20 ms: the process's own allocations; pages of the memory-mapped input are
left out, the system can drop them at any time), and the accuracy of each against the
simulator's truth: beat count, rate, median |error| of onset, time to peak and duration_90
(ms) and of displacement (% of the truth).

    python benchmarks/bench_analyze.py                     # 512 px, 1000 and 4000 frames
    python benchmarks/bench_analyze.py --frames 1000 --runs 2
    python benchmarks/bench_analyze.py --quick             # 256 px, 300 frames, one run
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
METRICS = ("onset_s", "time_to_peak_s", "duration_90_s")


def run_measured(cmd: list[str]) -> tuple[float, float, str]:
    """Wall time (s), peak RssAnon (MB) and stdout of a whole process."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = 0.0
    status = Path(f"/proc/{proc.pid}/status")
    while proc.poll() is None:
        try:
            for line in status.read_text().splitlines():
                if line.startswith("RssAnon:"):
                    peak = max(peak, int(line.split()[1]) / 1024)
        except (FileNotFoundError, ProcessLookupError):
            pass
        time.sleep(0.02)
    out, err = proc.communicate()
    seconds = time.perf_counter() - start
    if proc.returncode != 0:
        raise RuntimeError(f"{cmd[:3]} failed: {err.strip().splitlines()[-1:]}")
    return seconds, peak, out


def accuracy(found: pd.DataFrame, truth: pd.DataFrame) -> dict:
    """Beat count, rate and median |errors| of the found beats matched to the true ones."""
    out = {"beats": len(found), "true_beats": len(truth)}
    peaks = np.sort(found["peak_s"].to_numpy()) if len(found) else np.zeros(0)
    out["rate_bpm"] = 60.0 / float(np.mean(np.diff(peaks))) if peaks.size > 1 else np.nan
    if not len(found):
        return out | {m: np.nan for m in (*METRICS, "displacement_pct")}
    errors: dict[str, list[float]] = {m: [] for m in (*METRICS, "displacement_pct")}
    for _, beat in truth.iterrows():
        k = int(np.argmin(np.abs(found["peak_s"].to_numpy() - beat["peak_s"])))
        if abs(found["peak_s"].iloc[k] - beat["peak_s"]) > 0.25:
            continue
        for m in METRICS:
            errors[m].append(abs(float(found[m].iloc[k]) - float(beat[m])) * 1e3)
        errors["displacement_pct"].append(
            abs(float(found["displacement_um"].iloc[k]) / beat["displacement_um"] - 1) * 100
        )
    return out | {m: float(np.nanmedian(v)) if v else np.nan for m, v in errors.items()}


def simulate(tmp: Path, *, size: int, frames: int, fps: float, seed: int) -> Path:
    from beatlab.synth import simulate_recording, write_simulation

    path = tmp / f"bench_{size}_{frames}_{fps:g}_{seed}.ome.tif"
    if path.exists() and path.with_name(path.name[:-8] + ".truth.json").exists():
        return path  # simulated by an earlier run into --data
    sim = simulate_recording(
        duration_s=frames / fps, fps=fps, shape_px=(size, size), rate_bpm=72, rng=seed
    )
    write_simulation(sim, path)
    return path


def one_length(tmp: Path, path: Path, *, fps: float, pixel_um: float, runs: int) -> dict:
    record = json.loads(path.with_name(path.name[:-8] + ".truth.json").read_text())
    truth, n_frames = pd.DataFrame(record["beats"]), round(record["n_frames"])
    results: dict[str, list] = {"beatlab": [], "plain": []}
    for run in range(runs):
        order = ("beatlab", "plain") if run % 2 == 0 else ("plain", "beatlab")
        for name in order:
            if name == "beatlab":
                out_dir = tmp / f"out_{run}"
                cmd = [
                    sys.executable,
                    "-m",
                    "beatlab",
                    "analyze",
                    str(path),
                    "--out",
                    str(out_dir),
                ]
                seconds, peak, _ = run_measured(cmd)
                found = pd.read_csv(out_dir / "beats.csv")
            else:
                cmd = [sys.executable, str(HERE / "plain_approach.py"), str(path), str(fps),
                       str(pixel_um)]  # fmt: skip
                seconds, peak, stdout = run_measured(cmd)
                found = pd.DataFrame(json.loads(stdout.strip().splitlines()[-1])["beats"])
            results[name].append((seconds, peak, accuracy(found, truth)))
    summary = {"frames": n_frames}
    for name, rows in results.items():
        summary[name] = {
            "frames_s": n_frames / float(np.median([r[0] for r in rows])),
            "runs_s": [r[0] for r in rows],
            "peak_anon_mb": float(max(r[1] for r in rows)),
            "accuracy": rows[-1][2],
        }
    return summary


def compile_bytecode() -> None:
    """Write beatlab's bytecode caches before timing, as an installed package has them.

    An editable install writes them on first import, unless the environment forbids it
    (``PYTHONDONTWRITEBYTECODE``, set on some machines): then every run of ``beatlab`` would
    compile each module it imports from source (~0.1 s of the main process on this
    benchmark), which the plain approach's libraries, installed with their caches, never do.
    """
    import compileall

    import beatlab

    compileall.compile_dir(Path(beatlab.__file__).parent, quiet=1)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=512, help="frame side, px")
    parser.add_argument("--frames", type=int, nargs="+", default=[1000, 4000])
    parser.add_argument("--fps", type=float, default=50.0)
    parser.add_argument("--runs", type=int, default=2, help="alternating runs of each")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--quick", action="store_true", help="256 px, 300 frames, one run")
    parser.add_argument(
        "--data",
        type=Path,
        help="keep the simulated recordings in this folder and reuse them in later runs",
    )
    args = parser.parse_args()
    if args.quick:
        args.size, args.frames, args.runs = 256, [300], 1
    compile_bytecode()
    pixel_um = 0.5  # the simulator's default sample-plane pixel
    rows = []
    with tempfile.TemporaryDirectory() as tmp_name:
        tmp = Path(tmp_name)
        data = args.data or tmp
        data.mkdir(parents=True, exist_ok=True)
        for frames in args.frames:
            path = simulate(data, size=args.size, frames=frames, fps=args.fps, seed=args.seed)
            rows.append(one_length(tmp, path, fps=args.fps, pixel_um=pixel_um, runs=args.runs))
            if args.data is None:
                path.unlink()
    print(f"\n{args.size} x {args.size} px, {args.fps:g} fps, median of {args.runs} run(s)")
    print(
        f"{'frames':>6} {'method':>8} {'frames/s':>9} {'ratio':>6} {'anon MB':>8} {'beats':>7} "
        f"{'bpm':>6} {'onset ms':>9} {'ttp ms':>7} {'d90 ms':>7} {'disp %':>7}"
    )
    for row in rows:
        base = row["plain"]["frames_s"]
        for name in ("beatlab", "plain"):
            r, a = row[name], row[name]["accuracy"]
            print(
                f"{row['frames']:>6} {name:>8} {r['frames_s']:>9.1f} "
                f"{r['frames_s'] / base:>6.2f} {r['peak_anon_mb']:>8.0f} "
                f"{a['beats']:>3}/{a['true_beats']:<3} {a['rate_bpm']:>6.1f} "
                f"{a['onset_s']:>9.1f} {a['time_to_peak_s']:>7.1f} {a['duration_90_s']:>7.1f} "
                f"{a['displacement_pct']:>7.1f}"
            )
    for row in rows:  # the spread behind each median: run k of one against run k of the other
        pairs = zip(row["beatlab"]["runs_s"], row["plain"]["runs_s"], strict=True)
        ratios = ", ".join(f"{plain / ours:.2f}x" for ours, plain in pairs)
        print(f"{row['frames']:>6} frames, ratio of each run: {ratios}")
    if len(rows) > 1:
        mem = [row["beatlab"]["peak_anon_mb"] for row in rows]
        print(f"beatlab peak memory, longest / shortest: {max(mem) / min(mem):.3f}")


if __name__ == "__main__":
    main()
