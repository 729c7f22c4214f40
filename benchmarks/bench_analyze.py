"""Benchmark: whole-recording analysis throughput and peak memory (run by hand).

Simulates recordings of growing length at a fixed frame size, writes them as OME-TIFF, and
analyses each in a fresh process, reporting frames/s and the peak anonymous resident memory
(RssAnon: the process's own allocations; pages of the memory-mapped input file are left out,
as the system can drop them at any time), so that one can check that memory does not grow with
recording length (frames are streamed).

    python benchmarks/bench_analyze.py --size 256 --durations 10 20 40
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CHILD = """
import json, sys, threading, time
import beatlab

def anon_mb():
    for line in open("/proc/self/status"):
        if line.startswith("RssAnon:"):
            return int(line.split()[1]) / 1024
    return float("nan")

peak = [anon_mb()]
done = threading.Event()

def sample():
    while not done.is_set():
        peak[0] = max(peak[0], anon_mb())
        time.sleep(0.05)

threading.Thread(target=sample, daemon=True).start()
t = time.perf_counter()
res = beatlab.analyze(sys.argv[1])
dt = time.perf_counter() - t
done.set()
peak[0] = max(peak[0], anon_mb())
print(json.dumps({"seconds": dt, "peak_anon_mb": peak[0], "beats": res.summary["beat_count"],
                  "frames": res.summary["metadata"]["frames"]}))
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=256, help="frame side in px")
    parser.add_argument("--fps", type=float, default=30.0)
    parser.add_argument("--durations", type=float, nargs="+", default=[10.0, 20.0, 40.0])
    args = parser.parse_args()
    from beatlab.synth import simulate_recording, write_simulation

    print(
        f"{'frames':>7} {'size':>5} {'file MB':>8} {'s':>7} {'frames/s':>9} "
        f"{'peak anon MB':>12} {'beats':>6}"
    )
    with tempfile.TemporaryDirectory() as tmp:
        for duration in args.durations:
            sim = simulate_recording(
                duration_s=duration,
                fps=args.fps,
                shape_px=(args.size, args.size),
                rate_bpm=60,
                rng=0,
            )
            path = Path(tmp) / f"bench_{duration:g}.ome.tif"
            write_simulation(sim, path)
            del sim
            t0 = time.perf_counter()
            out = subprocess.run(
                [sys.executable, "-c", CHILD, str(path)],
                check=True,
                capture_output=True,
                text=True,
            )
            _ = time.perf_counter() - t0
            r = json.loads(out.stdout.strip().splitlines()[-1])
            mb = path.stat().st_size / 2**20
            print(
                f"{r['frames']:>7} {args.size:>5} {mb:>8.1f} {r['seconds']:>7.2f} "
                f"{r['frames'] / r['seconds']:>9.1f} {r['peak_anon_mb']:>12.1f} "
                f"{r['beats']:>6}"
            )


if __name__ == "__main__":
    main()
