"""The demo: an invented plate experiment simulated, analysed and reported from nothing.

``beatlab demo --out DIR`` copies the scenario files (``layout.csv``, ``scenario.toml``,
``config.toml``, ``README.md``; the project's ``demo/`` folder, shipped inside the package)
into ``DIR``, simulates every recording the layout lists into ``DIR/recordings/`` with
:func:`beatlab.synth.simulate_recording`, then runs :func:`beatlab.analyze_batch` on the
layout into ``DIR/results/`` (tables, figures, ``report.html``).

The scenario is invented: the compounds, protocols and numbers describe no real data.
"""

from __future__ import annotations

import os
import shutil
import sys
import time
from collections.abc import Mapping
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd

from beatlab.errors import InputError
from beatlab.io.folders import holds_other_files

__all__ = ["DEMO_FILES", "DemoRun", "demo_parameters", "hill_fraction", "run_demo"]

#: The scenario's files, shipped in ``beatlab/data/demo`` (a copy of the project's ``demo/``).
DEMO_FILES = ("README.md", "layout.csv", "scenario.toml", "config.toml")


@dataclass(frozen=True)
class DemoRun:
    """Where the demo put things and how long it took.

    Attributes
    ----------
    folder : pathlib.Path
        The demo folder (scenario files and ``recordings/``).
    results : pathlib.Path
        The batch folder (tables, ``figures/``, ``recordings/``, ``report.html``).
    report : pathlib.Path
        ``results/report.html``.
    batch : BatchResult
        The batch's tables.
    seconds : dict
        Wall time of ``simulate`` and ``analyze`` (s).
    """

    folder: Path
    results: Path
    report: Path
    batch: object
    seconds: dict


def hill_fraction(concentration_uM: float, *, ec50_uM: float, hill: float) -> float:
    """Fraction of the maximal effect at a concentration: c^h / (c^h + EC50^h).

    Parameters
    ----------
    concentration_uM : float
        Concentration (uM); 0 or NaN (no compound) gives 0.
    ec50_uM : float
        Half-maximal concentration (uM).
    hill : float
        Hill coefficient.

    Returns
    -------
    float
        In [0, 1).
    """
    c = float(concentration_uM)
    if not np.isfinite(c) or c <= 0:
        return 0.0
    return c**hill / (c**hill + ec50_uM**hill)


def _read_scenario_file(name: str) -> str:
    return resources.files("beatlab").joinpath("data", "demo", name).read_text(encoding="utf-8")


def _scenario() -> dict:
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    return tomllib.loads(_read_scenario_file("scenario.toml"))


def demo_parameters(row: Mapping, scenario: Mapping, *, seed: int) -> dict:
    """The keyword arguments of :func:`beatlab.synth.simulate_recording` for one layout row.

    Parameters
    ----------
    row : mapping
        A row of the demo layout (``protocol``, ``compound``, ``concentration`` in uM).
    scenario : mapping
        The parsed ``scenario.toml``.
    seed : int
        Seeds the well's own variation and the simulation's noise.

    Returns
    -------
    dict
    """
    rec = scenario["recording"]
    base = scenario["protocol"][row["protocol"]]
    rng = np.random.default_rng(seed)
    cv = float(rec["well_to_well_cv"])
    rate = float(base["rate_bpm"]) * (1 + cv * rng.standard_normal())
    strain = float(base["strain"]) * (1 + cv * rng.standard_normal())
    rise, relax = float(base["rise_s"]), float(base["relax_s"])
    ead_beats = None
    effect = scenario.get("compound", {}).get(str(row.get("compound", "")))
    if effect is not None:
        try:
            conc = float(row["concentration"])
        except (TypeError, ValueError):
            conc = 0.0
        f = hill_fraction(conc, ec50_uM=effect["ec50_uM"], hill=effect["hill"])
        rate *= 1 + effect.get("rate_change", 0.0) * f
        stretch = 1 + effect.get("duration_change", 0.0) * f
        rise, relax = rise * stretch, relax * stretch
        if conc >= effect.get("ead_from_uM", np.inf):
            n_beats = int(rec["duration_s"] * rate / 60.0) + 2
            ead_beats = list(range(1, n_beats, 2))
    return {
        "shape_px": (int(rec["shape_px"]), int(rec["shape_px"])),
        "pixel_size_um": float(rec["pixel_size_um"]),
        "duration_s": float(rec["duration_s"]),
        "fps": float(rec["fps"]),
        "noise_nm": float(rec["noise_nm"]),
        "ibi_cv": float(rec["ibi_cv"]),
        "rate_bpm": rate,
        "strain": strain,
        "rise_s": rise,
        "relax_s": relax,
        "ead_beats": ead_beats,
        "ead_shape": "bump",
        "first_beat_s": 0.4 + 0.4 * rng.random(),
        "rng": seed,
    }


def _simulate_one(job: tuple[dict, str]) -> None:
    """Simulate one recording and write it with its truth (seeded: the same every run)."""
    from beatlab.synth import simulate_recording, write_simulation

    parameters, path = job
    write_simulation(simulate_recording(**parameters), path)


def _simulate_all(jobs: list, *, workers: int | None) -> None:
    """Simulate every recording, in forked processes on Linux (one per core)."""
    from beatlab.batch import available_cores
    from beatlab.stages._parallel import fork_map

    fork_map(_simulate_one, jobs, workers=workers or available_cores())


def _check_folder(folder: Path) -> None:
    if folder.exists() and not folder.is_dir():
        raise InputError(f"--out {folder} is a file; pass a folder for the demo")
    if holds_other_files(folder, marker="scenario.toml"):
        raise InputError(
            f"--out {folder} is a folder with other files in it; pass a new or empty folder "
            "(or an earlier demo folder, which is rebuilt)"
        )


def _say(message: str, *, quiet: bool) -> None:
    if not quiet:
        print(f"beatlab demo: {message}", file=sys.stderr, flush=True)


def run_demo(
    out_dir: str | os.PathLike = "beatlab-demo",
    *,
    workers: int | None = None,
    quiet: bool = False,
    recording: Mapping | None = None,
    figures: bool = True,
) -> DemoRun:
    """Simulate the demo experiment, analyse it as a batch and write its report.

    Parameters
    ----------
    out_dir : path-like
        New (or empty, or an earlier demo's) folder for the scenario, the simulated
        recordings and ``results/``.
    workers : int, optional
        Recordings analysed at once (default: every core).
    quiet : bool
        No progress lines on stderr.
    recording : mapping, optional
        Overrides of the scenario's ``[recording]`` section (``shape_px``, ``duration_s``,
        ``fps``, ...), e.g. smaller recordings for a quick check.
    figures : bool
        Draw the figures (the report is written either way).

    Returns
    -------
    DemoRun

    Raises
    ------
    InputError
        `out_dir` is a file or a folder holding other files.
    """
    from beatlab.batch import analyze_batch

    folder = Path(out_dir)
    _check_folder(folder)
    scenario = _scenario()
    unknown = set(recording or {}) - set(scenario["recording"])
    if unknown:  # before anything is written
        raise InputError(
            f"unknown recording setting(s) {sorted(unknown)}; use keys of "
            f"{sorted(scenario['recording'])}"
        )
    scenario["recording"].update(recording or {})
    folder.mkdir(parents=True, exist_ok=True)
    for name in DEMO_FILES:
        (folder / name).write_text(_read_scenario_file(name), encoding="utf-8")
    layout = pd.read_csv(folder / "layout.csv", dtype=str, keep_default_na=False)
    todo = layout[~layout["exclude"].str.lower().isin(("yes", "true", "1"))]
    started = time.perf_counter()
    _say(f"simulating {len(todo)} recordings into {folder / 'recordings'}", quiet=quiet)
    jobs = [
        (demo_parameters(row, scenario, seed=seed), str(folder / row["path"]))
        for seed, row in enumerate(todo.to_dict("records"))
    ]
    _simulate_all(jobs, workers=workers)
    simulated = time.perf_counter()
    _say("analysing the plate (tables, statistics, figures, report)", quiet=quiet)
    results = folder / "results"
    if results.exists():
        shutil.rmtree(results)  # a rebuilt demo starts clean, with no cache
    batch = analyze_batch(
        folder / "layout.csv",
        out_dir=results,
        config=folder / "config.toml",
        workers=workers,
        progress=not quiet,
        figures=figures,
    )
    seconds = {
        "simulate": round(simulated - started, 1),
        "analyze": round(time.perf_counter() - simulated, 1),
    }
    return DemoRun(
        folder=folder,
        results=results,
        report=results / "report.html",
        batch=batch,
        seconds=seconds,
    )
