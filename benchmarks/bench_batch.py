"""Benchmark: the batch runner on a local process pool against a local Dask cluster.

Run by hand, never as a timed test. Simulates a small plate (24 wells x 1 field of view,
128 x 128 px, 10 s at 30 fps by default; half vehicle, half a faster-beating "drug"), writes
the recordings as OME-TIFF with a layout, and runs :func:`beatlab.analyze_batch` on it, each
into a fresh folder (nothing cached):

- ``pool``: the local process pool (``workers`` = every core, 1 thread each);
- ``dask``: a ``distributed.LocalCluster`` on loopback (``n_workers`` = every core, one
  thread each) through its scheduler address, as ``beatlab batch --scheduler`` would;
- ``serial`` (optional): one recording after the other in this process.

Prints, per mode, wall time, recordings per minute, CPU seconds of this process and every
process it started (``os.times``: the pool's and the cluster's processes are waited for
before the clock stops), CPU utilisation = CPU seconds / (wall x cores), and the largest
difference of the numeric columns of ``recordings.csv`` from the first mode (0 expected).
On a machine shared with others the wall times vary; compare modes within one run.

    python benchmarks/bench_batch.py                       # 24 wells, pool and dask
    python benchmarks/bench_batch.py --wells 8 --duration-s 5 --modes serial pool dask
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from beatlab.batch import analyze_batch, available_cores
from beatlab.synth import simulate_recording, write_simulation

ROW = "{name},P1,{well},{compound},{concentration},uM,{role}"


def make_plate(folder: Path, *, wells: int, size_px: int, duration_s: float, fps: float) -> Path:
    """Simulated recordings and their layout; returns the layout's path."""
    rows = ["path,plate,well,compound,concentration,unit,role"]
    for i in range(wells):
        well = f"{'ABCDEFGH'[i // 12]}{i % 12 + 1}"
        vehicle = i % 2 == 0
        sim = simulate_recording(
            duration_s=duration_s,
            fps=fps,
            shape_px=(size_px, size_px),
            rate_bpm=60.0 if vehicle else 80.0,
            noise_nm=1.0,
            rng=i,
        )
        write_simulation(sim, folder / f"{well}.ome.tif")
        rows.append(
            ROW.format(
                name=f"{well}.ome.tif",
                well=well,
                compound="DMSO" if vehicle else "drug",
                concentration="" if vehicle else "0.1",
                role="vehicle" if vehicle else "sample",
            )
        )
    layout = folder / "layout.csv"
    layout.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return layout


def cpu_seconds() -> float:
    """CPU seconds of this process and of its waited-for descendants so far."""
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def run_mode(mode: str, layout: Path, out: Path, cores: int):
    """(wall s, CPU s, recordings table) of one mode, from start-up to shutdown."""
    cpu0, wall0 = cpu_seconds(), time.perf_counter()
    if mode == "dask":
        from distributed import LocalCluster

        with LocalCluster(
            n_workers=cores,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            dashboard_address=None,
        ) as cluster:
            result = analyze_batch(
                layout, out_dir=out, scheduler=cluster.scheduler_address, progress=False
            )
    else:
        workers = 1 if mode == "serial" else cores
        result = analyze_batch(layout, out_dir=out, workers=workers, progress=False)
    return time.perf_counter() - wall0, cpu_seconds() - cpu0, result.recordings


def largest_difference(table: pd.DataFrame, first: pd.DataFrame) -> float:
    a = table.select_dtypes(include="number").astype(float).to_numpy()
    b = first.select_dtypes(include="number").astype(float).to_numpy()
    both = np.isfinite(a) & np.isfinite(b)
    if not np.array_equal(np.isfinite(a), np.isfinite(b)):
        return float("inf")
    return float(np.abs(a[both] - b[both]).max()) if both.any() else 0.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--wells", type=int, default=24)
    parser.add_argument("--size-px", type=int, default=128)
    parser.add_argument("--duration-s", type=float, default=10.0)
    parser.add_argument("--fps", type=float, default=30.0)
    parser.add_argument(
        "--modes", nargs="+", default=["pool", "dask"], choices=["serial", "pool", "dask"]
    )
    args = parser.parse_args()
    cores = available_cores()
    with tempfile.TemporaryDirectory(prefix="bench_batch_") as tmp:
        folder = Path(tmp)
        layout = make_plate(
            folder, wells=args.wells, size_px=args.size_px, duration_s=args.duration_s,
            fps=args.fps,
        )  # fmt: skip
        print(
            f"{args.wells} recordings of {args.size_px} px, {args.duration_s:g} s at "
            f"{args.fps:g} fps; {cores} cores"
        )
        heads = ("wall s", "rec/min", "CPU s", "CPU use", "diff")
        print(f"{'mode':8s} " + " ".join(f"{h:>8s}" for h in heads))
        first = None
        for mode in args.modes:
            wall, cpu, table = run_mode(mode, layout, folder / f"out_{mode}", cores)
            first = table if first is None else first
            diff = largest_difference(table, first)
            print(
                f"{mode:8s} {wall:8.1f} {60 * len(table) / wall:8.1f} {cpu:8.1f} "
                f"{100 * cpu / (wall * cores):7.0f}% {diff:8.1g}"
            )


if __name__ == "__main__":
    main()
