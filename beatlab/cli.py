"""Command line: ``beatlab analyze | batch | compare | reconstruct | simulate``.

Thin: parses, calls the API, maps errors to exit codes (0 success, 1 analysis failure,
2 bad usage or unreadable input).
"""

from __future__ import annotations

import argparse
import atexit
import logging
import math
import os
import re
import signal
import sys
import warnings
from pathlib import Path

from beatlab._progress import timed
from beatlab._version import __version__
from beatlab.errors import (
    AnalysisError,
    BeatlabError,
    BeatlabWarning,
    ConfigError,
    InputError,
    OutputError,
)

__all__ = ["build_parser", "main", "run"]

EXIT_OK, EXIT_FAILURE, EXIT_USAGE = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line, exit 2, like every other error
        print(f"beatlab: error: {message} (see {self.prog} --help)", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


class _DefaultsFormatter(argparse.ArgumentDefaultsHelpFormatter):
    """Shows "(default: X)" after each option's help, except where there is no default."""

    def _get_help_string(self, action):
        if action.default in (None, False) or action.default is argparse.SUPPRESS:
            return action.help
        return super()._get_help_string(action)


def _positive(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"must be positive and finite, got {text!r}")
    return value


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be 1 or more, got {text!r}")
    return value


def _add_metadata(p, *, kind=True):
    if kind:
        p.add_argument(
            "--kind",
            choices=("opd", "phase", "hologram"),
            help="what the pixel values are (default: as recorded in the file, else opd)",
        )
    p.add_argument("--fps", type=_positive, metavar="HZ", help="frame rate; overrides the file")
    p.add_argument(
        "--pixel-size-um",
        type=_positive,
        metavar="UM",
        help="sample-plane pixel size (camera pitch / magnification)",
    )
    p.add_argument(
        "--wavelength-nm",
        type=_positive,
        metavar="NM",
        help="illumination wavelength (needed for phase and holograms)",
    )


def _add_batch(sub) -> None:
    """The ``batch`` and ``compare`` sub-commands."""
    b = sub.add_parser(
        "batch",
        help="analyse every recording of a plate layout and compare conditions",
        description="Analyse every recording listed in a layout CSV (one row per recording: "
        "path, plate, well, fov, compound, concentration, role, ...) and write "
        "recordings.csv, wells.csv, beats.csv, the statistics tables and batch.json. "
        "Finished recordings are cached, so a re-run analyses only what is missing. Exit "
        "code 1 when any recording failed (the others are still written).",
    )
    b.add_argument("layout", metavar="LAYOUT", help="layout CSV, one row per recording")
    b.add_argument("--out", metavar="DIR", help="output folder (default: LAYOUT stem + '_batch')")
    b.add_argument("--config", metavar="FILE", help="TOML file of parameter overrides")
    b.add_argument(
        "--workers",
        type=_positive_int,
        metavar="N",
        help="recordings analysed at once on this machine (default: every core)",
    )
    b.add_argument(
        "--threads",
        type=_positive_int,
        metavar="N",
        help="threads per recording (default: cores / workers)",
    )
    b.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="run on a Dask cluster, e.g. tcp://host:8786 (its workers must see the files)",
    )
    b.add_argument("--no-progress", action="store_true", help="no progress bar")
    b.add_argument(
        "--no-figures",
        action="store_true",
        help="no figures (batch figures/ and each recording's), no per-recording folders",
    )
    b.add_argument("--no-report", action="store_true", help="do not write report.html")
    _add_metrics(b)

    c = sub.add_parser(
        "compare",
        help="recompute the statistics tables of a batch folder without analysing",
        description="Rewrite wells.csv and the statistics tables of a batch folder from its "
        "recordings.csv (edits such as newly excluded rows count) or, when that is missing "
        "or --config is given, from its cache. Nothing is analysed.",
    )
    c.add_argument("dir", metavar="DIR", help="the --out folder of beatlab batch")
    c.add_argument(
        "--config",
        metavar="FILE",
        help="use the cached results of this configuration (default: the batch's own)",
    )
    _add_metrics(c)

    r = sub.add_parser(
        "report",
        help="rebuild report.html of a batch or analysis folder",
        description="Write DIR/report.html, one self-contained file (figures embedded, no "
        "network access needed), from the files of a beatlab batch folder (tables, "
        "figures/, recordings/) or of one beatlab analyze folder. Redraws the batch figures "
        "unless --no-figures.",
    )
    r.add_argument("dir", metavar="DIR", help="the --out folder of beatlab batch or analyze")
    r.add_argument("--no-figures", action="store_true", help="keep the existing figures")

    d = sub.add_parser(
        "demo",
        help="simulate an invented plate experiment, analyse it and write its report",
        description="The demo scenario end to end, from nothing: copies the scenario files "
        "(layout.csv, scenario.toml, config.toml, README.md) into DIR, simulates every "
        "recording of the layout into DIR/recordings, runs beatlab batch into DIR/results "
        "and prints where report.html is. About 2-3 minutes on 2 cores. The compounds and "
        "data are invented.",
    )
    d.add_argument(
        "--out", metavar="DIR", default="beatlab-demo", help="demo folder (default: %(default)s)"
    )
    d.add_argument(
        "--workers",
        type=_positive_int,
        metavar="N",
        help="recordings analysed at once (default: every core)",
    )


def _add_metrics(p) -> None:
    p.add_argument(
        "--metrics",
        nargs="+",
        metavar="NAME",
        help="recording metrics to normalise and compare (default: beat_rate_bpm "
        "duration_90_s duration_90_fridericia_s displacement_um contraction_velocity_um_s "
        "irregular_fraction)",
    )


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``beatlab`` command."""
    parser = _Parser(
        prog="beatlab",
        description="Contraction, rhythm and drug-response "
        "analysis of beating heart-muscle cells from phase time-lapses. Research "
        "use only.",
    )
    parser.add_argument("--version", action="version", version=f"beatlab {__version__}")
    debug_help = "show tracebacks, library warnings and debug logs (with the time of each stage)"
    parser.add_argument("--debug", action="store_true", help=debug_help)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    a = sub.add_parser(
        "analyze",
        help="find and measure every beat of one recording",
        description="Analyse one recording and write summary.json, beats.csv, "
        "trace.csv, average_beat.csv, region tables, maps and figures.",
    )
    a.add_argument(
        "path", metavar="PATH", help="OME-TIFF, TIFF, .npy, frame folder or file.h5:/dataset"
    )
    a.add_argument("--out", metavar="DIR", help="output folder (default: PATH stem + '_beatlab')")
    _add_metadata(a)
    a.add_argument(
        "--reference", metavar="PATH", help="sample-free hologram frame(s) for --kind hologram"
    )
    a.add_argument(
        "--regions",
        metavar="LABELS.tif",
        help="label image of regions to analyse separately (0 outside)",
    )
    a.add_argument("--config", metavar="FILE", help="TOML file of parameter overrides")
    a.add_argument("--no-figures", action="store_true", help="skip the PNG/SVG figures")

    _add_batch(sub)

    _add_reconstruct(sub)
    _add_simulate(sub)
    for command in sub.choices.values():  # `beatlab analyze X --debug` works too
        command.add_argument(
            "--debug", action="store_true", default=argparse.SUPPRESS, help=debug_help
        )
    return parser


def _add_reconstruct(sub) -> None:
    r = sub.add_parser(
        "reconstruct",
        help="off-axis holograms to an OPD OME-TIFF",
        description="Reconstruct OPD (optical path delay, nm) frames from raw off-axis "
        "holograms and write them as an OME-TIFF that beatlab analyze reads as it is. The "
        "wavelength and the pixel size come from the file where it records them; options "
        "override the file. The frame rate is not needed for the reconstruction: it is copied "
        "into the output when known (from the file or --fps).",
        formatter_class=_DefaultsFormatter,
    )
    r.add_argument(
        "path",
        metavar="HOLOGRAMS",
        help="raw hologram frames: OME-TIFF, TIFF, .npy, frame folder or file.h5:/dataset",
    )
    r.add_argument("--out", metavar="FILE", required=True, help="output OPD file (.ome.tif)")
    r.add_argument(
        "--reference",
        metavar="PATH",
        help="sample-free hologram frame(s) of the same set-up, divided out to remove the "
        "optics' own phase (default: a polynomial fit of the background phase is removed)",
    )
    r.add_argument(
        "--wavelength-nm",
        type=_positive,
        metavar="NM",
        help="illumination wavelength; needed when the file does not record it",
    )
    r.add_argument(
        "--pixel-size-um",
        type=_positive,
        metavar="UM",
        help="sample-plane camera pixel size (camera pitch / magnification); needed when the "
        "file does not record it",
    )
    r.add_argument(
        "--fps", type=_positive, metavar="HZ", help="frame rate written into the output"
    )
    r.add_argument(
        "--config",
        metavar="FILE",
        help="TOML file of parameter overrides (its [holography] section: side band, window "
        "radius, refocusing)",
    )


def _add_simulate(sub) -> None:
    s = sub.add_parser(
        "simulate",
        help="render a synthetic beating culture with its truth",
        description="Render a synthetic recording of a beating culture with "
        "exact ground truth (OME-TIFF + truth JSON).",
        formatter_class=_DefaultsFormatter,
    )
    s.add_argument("--out", metavar="FILE", required=True, help="output .ome.tif")
    s.add_argument(
        "--kind",
        choices=("opd", "phase", "wrapped_phase", "hologram"),
        default="opd",
        help="what the pixel values are",
    )
    s.add_argument(
        "--layout",
        choices=("clusters", "confluent"),
        default="clusters",
        help="separate cell clusters, or a confluent sheet",
    )
    s.add_argument(
        "--duration-s", type=_positive, default=10.0, metavar="S", help="recording length"
    )
    s.add_argument("--fps", type=_positive, default=30.0, metavar="HZ", help="frame rate")
    s.add_argument(
        "--size-px",
        type=_positive_int,
        metavar="N",
        help="frame side, pixels (default: 128; 256 for holograms)",
    )
    s.add_argument(
        "--pixel-size-um",
        type=_positive,
        metavar="UM",
        help="sample-plane pixel size (default: 0.5; 0.25 for holograms)",
    )
    s.add_argument(
        "--wavelength-nm",
        type=_positive,
        default=632.8,
        metavar="NM",
        help="illumination wavelength",
    )
    s.add_argument(
        "--rate-bpm",
        type=float,
        default=60.0,
        metavar="BPM",
        help="beating rate; 0 for a culture that does not beat",
    )
    s.add_argument(
        "--ibi-cv", type=float, default=0.0, metavar="CV", help="interval variability (0 regular)"
    )
    s.add_argument(
        "--strain", type=float, default=0.03, metavar="X", help="peak fractional shortening"
    )
    s.add_argument(
        "--noise-nm", type=float, default=1.0, metavar="NM", help="per-pixel white noise (RMS)"
    )
    s.add_argument(
        "--correlated-noise-nm",
        type=float,
        default=0.0,
        metavar="NM",
        help="spatially correlated (coherent) noise, RMS",
    )
    s.add_argument(
        "--jitter-nm",
        type=float,
        default=0.0,
        metavar="NM",
        help="per-frame global offset jitter, RMS",
    )
    s.add_argument(
        "--drift-nm",
        type=float,
        default=0.0,
        metavar="NM",
        help="slow background drift reached at the end",
    )
    s.add_argument(
        "--stage-drift-um",
        type=float,
        nargs=2,
        default=(0.0, 0.0),
        metavar=("DY", "DX"),
        help="rigid stage drift reached at the end",
    )
    s.add_argument(
        "--clusters",
        type=_positive_int,
        default=1,
        metavar="N",
        help="number of cell clusters (contraction centres)",
    )
    s.add_argument(
        "--cluster-rates-bpm",
        type=float,
        nargs="+",
        metavar="BPM",
        help="independent rate per cluster (default: all at --rate-bpm)",
    )
    s.add_argument("--rise-s", type=float, default=0.15, metavar="S", help="onset to peak")
    s.add_argument("--relax-s", type=float, default=0.30, metavar="S", help="relaxation time")
    s.add_argument(
        "--amplitude-pattern",
        type=float,
        nargs="+",
        metavar="X",
        help="per-beat amplitude multipliers, cycled (1 0.55 for alternans; default: all 1)",
    )
    s.add_argument(
        "--ead-beats",
        type=int,
        nargs="+",
        metavar="K",
        help="0-based beats with an EAD-like second relaxation step (default: none)",
    )
    s.add_argument("--seed", type=int, default=0, metavar="N", help="random seed")


def _analysis_folder(args) -> Path:
    if args.out:
        return Path(args.out)
    stem = str(Path(args.path.split(":/")[0])).removesuffix(".ome.tif").removesuffix(".tif")
    return Path(stem + "_beatlab")


def _check_replaceable(out: Path) -> None:
    """Refuse an --out folder that holds files other than an earlier analysis."""
    from beatlab.io.folders import holds_other_files

    if holds_other_files(out, marker="summary.json"):
        raise OutputError(
            f"--out {out} is a folder with other files in it; pass a new or empty folder, or "
            "an earlier analysis folder (which is replaced)"
        )


def _cmd_analyze(args) -> int:
    from beatlab.io.writers import check_output_dir

    out = check_output_dir(_analysis_folder(args))  # before any work, not after it
    _check_replaceable(out)
    if args.no_figures:
        return _analyze(args, out, figure_process=None)
    # numpy, pandas and beatlab.io (tifffile: beatlab.plots writes through beatlab.io), which
    # both processes need, are imported once, before the fork: the figure process then
    # imports only the plotting side (whole analyses of 1,000 frames, alternating, medians of
    # six, numpy and pandas: 6.22 -> 6.09 s, 11.40 -> 11.04 s of CPU; beatlab.io spares it
    # importing tifffile, 0.05 s in ``python -X importtime``). numpy's OpenBLAS thread is
    # stopped and restarted around a fork by OpenBLAS itself.
    import numpy  # noqa: F401
    import pandas  # noqa: F401

    import beatlab.io  # noqa: F401
    from beatlab._figure_process import FigureProcess

    # forked now, while this process is small: it loads matplotlib on the other core while
    # this one loads the analysis, and draws the figures at the end
    with FigureProcess() as figure_process:
        return _analyze(args, out, figure_process=figure_process)


def _analyze(args, out: Path, *, figure_process) -> int:
    from beatlab.io.folders import atomic_folder
    from beatlab.pipeline import analyze

    result = analyze(
        args.path,
        args.config,
        kind=args.kind,
        fps=args.fps,
        pixel_size_um=args.pixel_size_um,
        wavelength_nm=args.wavelength_nm,
        reference=args.reference,
        regions=args.regions,
        progress=True,  # a bar on a terminal, plain lines in a log
    )
    with timed("stage save"), atomic_folder(out) as tmp:  # all of its files or none of them
        result.save(
            tmp, figures=not args.no_figures, workers=min(4, os.cpu_count() or 1),
            figure_process=figure_process, shown_as=out,
        )  # fmt: skip
    print(f"{args.path}: {result.headline()} -> {out}")
    return EXIT_OK


_MAX_LISTED_FAILURES = 10


def _print_batch(result, *, verb: str, list_failures: bool) -> None:
    """One summary line on stdout; failed recordings and warnings on stderr."""
    counts, table = result.counts, result.recordings
    cached = f" ({counts['cached']} from cache)" if counts.get("cached") else ""
    print(
        f"{len(table)} recordings {verb}: {counts['ok']} ok{cached}, {counts['error']} "
        f"failed, {counts['excluded']} excluded -> {result.out_dir}"
    )
    failed = table.loc[table["status"] == "error", ["recording_id", "error"]]
    if list_failures:
        for rid, error in failed.head(_MAX_LISTED_FAILURES).itertuples(index=False):
            print(f"beatlab: error: {rid}: {error}", file=sys.stderr)
        if len(failed) > _MAX_LISTED_FAILURES:
            print(
                f"beatlab: error: ... and {len(failed) - _MAX_LISTED_FAILURES} more failed "
                "recordings (status and error columns of recordings.csv)",
                file=sys.stderr,
            )
    warned = int((table["warnings"] != "").sum()) if "warnings" in table.columns else 0
    if warned:
        print(
            f"beatlab: warning: {warned} recordings have warnings (warnings column of "
            "recordings.csv)",
            file=sys.stderr,
        )


def _interrupt_on_sigterm(signum, frame):
    raise KeyboardInterrupt  # a batch stops as on Ctrl-C: finished recordings stay cached


def _cmd_batch(args) -> int:
    layout = Path(args.layout)
    out = Path(args.out) if args.out else layout.with_name(layout.stem + "_batch")
    previous = signal.signal(signal.SIGTERM, _interrupt_on_sigterm)
    try:
        result = _run_batch(layout, out, args)
    except KeyboardInterrupt:
        print(
            f"beatlab: interrupted; the finished recordings are kept in {out / 'cache'}: run "
            "the same command again to go on from there",
            file=sys.stderr,
        )
        return 130
    finally:
        signal.signal(signal.SIGTERM, previous)
    _print_batch(result, verb="analysed", list_failures=True)
    return EXIT_FAILURE if result.counts["error"] else EXIT_OK


def _run_batch(layout: Path, out: Path, args):
    from beatlab.batch import analyze_batch

    return analyze_batch(
        layout,
        out_dir=out,
        config=args.config,
        workers=args.workers,
        threads=args.threads,
        scheduler=args.scheduler,
        progress=not args.no_progress,  # a bar on a terminal, plain lines in a log
        metrics=args.metrics,
        details=not args.no_figures,
        figures=not args.no_figures,
        report=not args.no_report,
    )


def _cmd_compare(args) -> int:
    from beatlab.batch import compare_batch

    result = compare_batch(args.dir, config=args.config, metrics=args.metrics)
    _print_batch(result, verb="compared", list_failures=False)
    return EXIT_OK


def _cmd_report(args) -> int:
    from beatlab.batch import illustrate
    from beatlab.report import build_recording_report

    folder = Path(args.dir)
    if (folder / "batch.json").is_file():
        made = illustrate(folder, figures=not args.no_figures, report=True)
        if "report" not in made:
            return EXIT_FAILURE  # the reason was shown as a warning
        path = made["report"]
    elif (folder / "summary.json").is_file():
        path = build_recording_report(folder)
    else:
        raise InputError(
            f"{folder} is neither a batch folder (batch.json) nor an analysis folder "
            "(summary.json); pass the --out folder of beatlab batch or beatlab analyze"
        )
    print(f"report -> {path}")
    return EXIT_OK


def _cmd_demo(args) -> int:
    from beatlab.demo import run_demo

    run = run_demo(args.out, workers=args.workers)
    counts = run.batch.counts
    print(
        f"demo: {counts['ok']} recordings analysed, {counts['error']} failed, "
        f"{counts['excluded']} excluded in {sum(run.seconds.values()):.0f} s "
        f"(simulated in {run.seconds['simulate']:.0f} s)"
    )
    print(f"report -> {run.report}")
    print(f"scenario -> {run.folder / 'README.md'}")
    return EXIT_FAILURE if counts["error"] else EXIT_OK


def _cmd_reconstruct(args) -> int:
    from beatlab.holography import reconstruct_file
    from beatlab.io.writers import check_output_file
    from beatlab.settings import load_settings

    check_output_file(args.out)
    settings = load_settings(args.config)
    out = reconstruct_file(
        args.path,
        args.out,
        wavelength_nm=args.wavelength_nm,
        pixel_size_um=args.pixel_size_um,
        fps=args.fps,
        reference=args.reference,
        holography=settings.holography,
        progress=True,
    )
    print(f"wrote {out}")
    return EXIT_OK


def _cmd_simulate(args) -> int:
    from beatlab.synth import simulate_recording, write_simulation

    sim = simulate_recording(
        duration_s=args.duration_s,
        fps=args.fps,
        shape_px=None if args.size_px is None else (args.size_px, args.size_px),
        pixel_size_um=args.pixel_size_um,
        wavelength_nm=args.wavelength_nm,
        layout=args.layout,
        n_clusters=args.clusters,
        rate_bpm=args.rate_bpm,
        ibi_cv=args.ibi_cv,
        cluster_rates_bpm=args.cluster_rates_bpm,
        rise_s=args.rise_s,
        relax_s=args.relax_s,
        strain=args.strain,
        amplitude_pattern=args.amplitude_pattern,
        ead_beats=args.ead_beats,
        noise_nm=args.noise_nm,
        correlated_noise_nm=args.correlated_noise_nm,
        jitter_nm=args.jitter_nm,
        drift_nm=args.drift_nm,
        stage_drift_um=tuple(args.stage_drift_um),
        kind=args.kind,
        rng=args.seed,
    )
    paths = write_simulation(sim, args.out)
    for role, path in paths.items():
        print(f"{role}: {path}")
    return EXIT_OK


_COMMANDS = {
    "analyze": _cmd_analyze,
    "batch": _cmd_batch,
    "compare": _cmd_compare,
    "demo": _cmd_demo,
    "reconstruct": _cmd_reconstruct,
    "report": _cmd_report,
    "simulate": _cmd_simulate,
}


#: Library messages name parameters (``pass fps=HZ``); on the command line they are flags.
_FLAGS = {
    "fps": "--fps",
    "pixel_size_um": "--pixel-size-um",
    "wavelength_nm": "--wavelength-nm",
    "kind": "--kind",
    "config": "--config",
    "regions": "--regions",
    "reference": "--reference",
    "scheduler": "--scheduler",
    "workers": "--workers",
    "threads": "--threads",
    "metrics": "--metrics",
    "out": "--out",
}
_PARAMETER = re.compile(r"\b(" + "|".join(_FLAGS) + r")=")


def as_flags(message: str) -> str:
    """Rewrite ``name=VALUE`` parameter hints of a library message as command-line flags."""
    return _PARAMETER.sub(lambda m: _FLAGS[m.group(1)] + " ", message)


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _setup_logging(*, debug: bool) -> None:
    """Our log lines on stderr; other libraries' only with --debug (tifffile logs, e.g.)."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("beatlab: %(levelname)s: %(message)s"))
    if not debug:
        handler.addFilter(lambda record: record.name.split(".")[0] == "beatlab")
    # with --debug: our debug lines (stage times, e.g.) and the other libraries' info and
    # above, not their debug chatter (matplotlib scores every font it knows at debug level)
    logging.basicConfig(level=logging.INFO if debug else logging.WARNING, handlers=[handler])
    logging.getLogger("beatlab").setLevel(logging.DEBUG if debug else logging.NOTSET)


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """Our warnings as one line; a library's (numpy's "Mean of empty slice") only in the log."""
    if issubclass(category, BeatlabWarning):
        print(f"beatlab: warning: {_one_line(as_flags(str(message)))}", file=sys.stderr)
    else:
        logging.getLogger("beatlab").debug("%s: %s", category.__name__, message)


def main(argv: list[str] | None = None) -> int:
    """Run the ``beatlab`` command; return the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, or a usage error already printed
        return exc.code if isinstance(exc.code, int) else EXIT_USAGE
    from tqdm import tqdm

    # no progress-monitor thread: the per-frame pass forks worker processes, and forking a
    # process with extra threads risks a lock held at the fork
    tqdm.monitor_interval = 0
    _setup_logging(debug=args.debug)
    with warnings.catch_warnings():  # restored on return (main may run inside a program)
        warnings.simplefilter("default")
        if not args.debug:
            warnings.showwarning = _show_warning
        return _run(args)


def run() -> None:
    """The ``beatlab`` console command: :func:`main`, then leave without the interpreter's
    teardown.

    Once the command is done every output file is written and closed; what is left is the
    interpreter freeing every module of scipy, pandas, numba and matplotlib one at a time,
    0.3-0.4 s of nothing on each run (measured on a 1,000-frame analysis). The exit handlers
    still run and the streams are flushed; then the process ends with the command's code.
    Freed memory is kept for reuse (:func:`beatlab._allocator.keep_freed_memory`): a command
    runs once and ends.
    """
    from beatlab._allocator import keep_freed_memory

    keep_freed_memory()
    code = main()
    atexit._run_exitfuncs()  # what a normal exit runs (logging's flush, temporary folders)
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe (``beatlab ... | head``), a closed file
            pass
    os._exit(code)


def _run(args) -> int:
    """The command, its errors mapped to one line and an exit code."""
    try:
        return _COMMANDS[args.command](args)
    except (InputError, ConfigError, OutputError) as exc:
        if args.debug:
            raise
        print(f"beatlab: error: {_one_line(as_flags(str(exc)))}", file=sys.stderr)
        return EXIT_USAGE
    except (AnalysisError, BeatlabError) as exc:
        if args.debug:
            raise
        print(f"beatlab: error: {_one_line(as_flags(str(exc)))}", file=sys.stderr)
        return EXIT_FAILURE
    except KeyboardInterrupt:
        print("beatlab: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an unexpected failure: one line, exit 1
        if args.debug:
            raise
        print(
            f"beatlab: error: unexpected {type(exc).__name__}: {_one_line(exc)} (rerun with "
            "--debug for the traceback and report it)",
            file=sys.stderr,
        )
        return EXIT_FAILURE
