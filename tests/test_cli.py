"""The command line as a user runs it: exit codes, one-line errors, output files."""

import json
import re
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import tifffile

from beatlab.cli import main


def _run(*args):
    return subprocess.run(
        [sys.executable, "-m", "beatlab", *args], capture_output=True, text=True, timeout=600
    )


def _main(capsys, *args):
    """``beatlab ARGS`` in this process: (exit code, stderr).

    The refusals below need no process of their own (each would spend about 3 s importing);
    a real process's exit code and stderr are checked in tests/test_bad_inputs.py
    (test_real_process_exit_2_one_line, test_real_process_exit_1_without_traceback).
    """
    try:
        code = main(list(args))
    except SystemExit as exc:  # argparse usage errors
        code = exc.code
    return code, capsys.readouterr().err


def test_help_lists_subcommands():
    out = _run("--help")
    assert out.returncode == 0
    for cmd in ("analyze", "reconstruct", "simulate"):
        assert cmd in out.stdout


def test_simulate_then_analyze(tmp_path):
    movie = tmp_path / "x.ome.tif"
    out = _run(
        "simulate",
        "--out",
        str(movie),
        "--duration-s",
        "6",
        "--size-px",
        "80",
        "--rate-bpm",
        "70",
        "--seed",
        "3",
    )
    assert out.returncode == 0, out.stderr
    truth = json.loads((tmp_path / "x.truth.json").read_text())
    with tifffile.TiffFile(movie) as tif:
        assert "TimeIncrement" in tif.ome_metadata and "PhysicalSizeX" in tif.ome_metadata
    res = _run("analyze", str(movie), "--out", str(tmp_path / "res"))
    assert res.returncode == 0, res.stderr
    summary = json.loads((tmp_path / "res" / "summary.json").read_text())
    assert summary["beat_count"] == truth["summary"]["beat_count"]
    assert summary["metadata"]["fps"] == pytest.approx(30.0)
    assert "Research use only" in summary["caution"]
    beats = pd.read_csv(tmp_path / "res" / "beats.csv")
    for col in (
        "beat",
        "onset_s",
        "peak_s",
        "end_s",
        "ibi_s",
        "time_to_peak_s",
        "relax_50_s",
        "relax_90_s",
        "duration_50_s",
        "duration_90_s",
        "displacement_um",
        "opd_change_nm",
        "contraction_velocity_um_s",
        "relaxation_velocity_um_s",
        "secondary_peak",
        "irregular",
    ):
        assert col in beats.columns
    trace = pd.read_csv(tmp_path / "res" / "trace.csv")
    assert list(trace.columns[:4]) == [
        "time_s",
        "displacement_um",
        "velocity_um_s",
        "opd_change_nm",
    ]
    assert len(trace) == 180
    for name in (
        "average_beat.csv",
        "regions.csv",
        "region_beats.csv",
        "region_traces.csv",
        "maps.npz",
        "trace.png",
        "trace.svg",
        "maps.png",
    ):
        assert (tmp_path / "res" / name).exists(), name


def test_quiescent_exits_zero(tmp_path, capsys):
    movie = tmp_path / "still.ome.tif"
    assert (
        main(
            [
                "simulate",
                "--out",
                str(movie),
                "--duration-s",
                "4",
                "--size-px",
                "64",
                "--rate-bpm",
                "0",
            ]
        )
        == 0
    )
    assert main(["analyze", str(movie), "--out", str(tmp_path / "r"), "--no-figures"]) == 0
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert summary["rhythm"] == "quiescent" and summary["beat_rate_bpm"] == 0


def test_missing_metadata_names_the_flag(tmp_path, capsys):
    path = tmp_path / "plain.npy"
    np.save(path, np.zeros((20, 32, 32), np.float32))
    code, err = _main(capsys, "analyze", str(path))
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("beatlab: error:")
    assert "--fps" in lines[0]
    assert "Traceback" not in err


def test_unreadable_and_bad_usage(tmp_path, capsys):
    bad = tmp_path / "bad.tif"
    bad.write_bytes(b"nonsense")
    code, err = _main(capsys, "analyze", str(bad))
    assert code == 2 and "cannot be read" in err
    code, err = _main(capsys, "analyze", str(tmp_path / "nope.tif"))
    assert code == 2 and "no such file" in err
    code, _ = _main(capsys, "analyze")
    assert code == 2
    code, err = _main(capsys, "analyze", str(bad), "--fps", "-1")
    assert code == 2 and "must be positive" in err


def test_too_short_and_all_nan(tmp_path, capsys):
    short = tmp_path / "short.npy"
    np.save(short, np.zeros((3, 32, 32), np.float32))
    code, err = _main(capsys, "analyze", str(short), "--fps", "30", "--pixel-size-um", "0.5")
    assert code == 2 and "frames" in err
    nan = tmp_path / "nan.npy"
    np.save(nan, np.full((20, 32, 32), np.nan, np.float32))
    code, err = _main(capsys, "analyze", str(nan), "--fps", "30", "--pixel-size-um", "0.5")
    assert code == 2 and "NaN" in err


def test_bad_config_key(tmp_path, capsys):
    cfg = tmp_path / "c.toml"
    cfg.write_text("[beats]\nmin_snr_typo = 3\n")
    path = tmp_path / "z.npy"
    np.save(path, np.zeros((20, 32, 32), np.float32))
    argv = ["analyze", str(path), "--fps", "30", "--pixel-size-um", "0.5", "--config", str(cfg)]
    code, err = _main(capsys, *argv)
    assert code == 2 and "beats.min_snr_typo" in err


def test_help_shows_defaults_and_explains_reconstruct(capsys):
    assert main(["simulate", "--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    for option, default in (("--duration-s", "10.0"), ("--fps", "30.0")):
        assert option in text and f"(default: {default})" in text
    assert "(default: 128; 256 for holograms)" in text  # --size-px
    assert "(default: None)" not in text
    assert main(["reconstruct", "--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    for option in ("--reference", "--wavelength-nm", "--pixel-size-um", "--fps", "--config"):
        # every option is explained: its help text follows its name in the option list
        after = text.split(f"{option} ", 2)[-1]
        assert len(after.split(" --")[0].split()) >= 3, option
    assert "not needed" in text  # the frame rate


def test_progress_lines_in_a_log():
    import io

    from beatlab._progress import LineProgress, progress_bar

    now = [0.0]
    log = io.StringIO()
    with LineProgress(200, "measuring frames", stream=log, clock=lambda: now[0]) as bar:
        for _ in range(200):
            now[0] += 0.0625  # 12.5 s in all (exact in binary)
            bar.update(1)
    lines = log.getvalue().splitlines()
    assert "\r" not in log.getvalue()
    # silent for the first 2 s (32 frames), then one line per 10 % step, the last at 100 %
    assert lines[0] == "beatlab: measuring frames 16 % (32 of 200 frames)"
    assert lines[1] == "beatlab: measuring frames 20 % (40 of 200 frames)"
    assert lines[-1] == "beatlab: measuring frames 100 % (200 of 200 frames)"
    assert len(lines) == 10
    # a slow stage still shows a line every 30 s between the 10 % steps
    log = io.StringIO()
    bar = LineProgress(1000, "finding rest frames", stream=log, clock=lambda: now[0])
    for _ in range(50):
        now[0] += 40.0
        bar.update(1)
    lines = log.getvalue().splitlines()
    assert len(lines) == 50 and lines[-1] == "beatlab: finding rest frames 5 % (50 of 1000 frames)"
    # quick work prints nothing; no stream: nothing at all
    log = io.StringIO()
    with progress_bar(total=5, desc="x", stream=log) as bar:
        bar.update(5)
    assert log.getvalue() == ""
    with progress_bar(total=5, desc="x", enabled=False, stream=log) as bar:
        bar.update(5)
    assert log.getvalue() == ""


@pytest.fixture(scope="module")
def still_movie(tmp_path_factory):
    movie = tmp_path_factory.mktemp("still") / "still.ome.tif"
    args = ["simulate", "--out", str(movie), "--duration-s", "3", "--size-px", "48"]
    assert main(args) == 0
    return movie


def test_debug_log_times_each_stage(still_movie, caplog):
    import logging

    from beatlab.pipeline import analyze

    with caplog.at_level(logging.DEBUG, logger="beatlab"):
        analyze(still_movie, workers=1)
    timed = [r.getMessage() for r in caplog.records if r.getMessage().startswith("stage ")]
    stages = [m.split(":")[0] for m in timed]
    assert stages == [
        "stage open", "stage reference", "stage frames", "stage beats, maps, regions"
    ]  # fmt: skip
    for message in timed:  # "stage frames: 3.00 s (CPU 5.83 s)": wall and CPU time
        wall, cpu = re.fullmatch(r"stage [a-z, ]+: (\S+) s \(CPU (\S+) s\)", message).groups()
        assert float(wall) >= 0 and float(cpu) >= 0


def test_console_command_exits_with_its_code_after_exit_handlers_and_flushing(tmp_path):
    """``beatlab`` (cli.run) skips the interpreter's teardown, not the exit handlers, not
    the output still buffered in a pipe, not the exit code."""
    code = (
        "import atexit, sys; from beatlab.cli import run; "
        "atexit.register(print, 'exit handlers ran'); sys.argv = ['beatlab', *sys.argv[1:]]; "
        "run()"
    )

    def console(*args):
        return subprocess.run(
            [sys.executable, "-c", code, *args], capture_output=True, text=True, timeout=300
        )

    ok = console("--help")
    assert ok.returncode == 0
    assert "analyze" in ok.stdout and ok.stdout.endswith("exit handlers ran\n")
    bad = console("analyze", str(tmp_path / "nowhere.tif"))
    assert bad.returncode == 2
    assert bad.stderr.startswith("beatlab: error: ") and len(bad.stderr.splitlines()) == 1


def test_debug_shows_stage_times_but_not_library_debug_chatter(still_movie, tmp_path):
    out = _run("analyze", str(still_movie), "--out", str(tmp_path / "res"), "--debug")
    assert out.returncode == 0, out.stderr
    for stage in ("reference", "frames", "save"):
        assert f"beatlab: DEBUG: stage {stage}: " in out.stderr
    assert "beatlab: DEBUG: figures: " in out.stderr
    assert "findfont" not in out.stderr  # matplotlib's font scoring, at debug level
    # the report names the folder it ends up in, not the temporary one it was written in
    report = (tmp_path / "res" / "report.html").read_text(encoding="utf-8")
    assert f"<td>{tmp_path / 'res'}</td>" in report
    assert "the analysis folder res." in report and ".part" not in report


def test_analysis_folder_is_written_whole_and_replaced_cleanly(still_movie, tmp_path, capsys):
    out = tmp_path / "res"
    assert main(["analyze", str(still_movie), "--out", str(out), "--no-figures"]) == 0
    (out / "stale.txt").write_text("from an earlier version")
    assert main(["analyze", str(still_movie), "--out", str(out), "--no-figures"]) == 0
    assert not (out / "stale.txt").exists()  # replaced, not merged
    assert [p.name for p in tmp_path.iterdir()] == ["res"]  # no temporary folder left


def test_interrupt_while_writing_leaves_no_half_folder(still_movie, tmp_path, monkeypatch):
    from beatlab.results import Analysis

    def half_then_interrupt(self, out_dir, **kwargs):
        (out_dir / "summary.json").write_text("{}")
        raise KeyboardInterrupt

    monkeypatch.setattr(Analysis, "save", half_then_interrupt)
    out = tmp_path / "res"
    assert main(["analyze", str(still_movie), "--out", str(out)]) == 130
    assert list(tmp_path.iterdir()) == []  # nothing, rather than a folder that looks complete


def test_out_folder_of_other_files_is_refused_before_any_work(still_movie, tmp_path, capsys):
    out = tmp_path / "thesis"
    out.mkdir()
    (out / "chapter1.docx").write_text("x")
    assert main(["analyze", str(still_movie), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("beatlab: error: --out") and "other files" in err
    assert [p.name for p in out.iterdir()] == ["chapter1.docx"]


def test_notebook_check_without_a_kernel_skips_tqdm_auto():
    """Outside Jupyter the progress reporter is chosen without importing ``tqdm.auto``
    (asyncio with it); with a kernel loaded tqdm decides."""
    code = (
        "import sys; from beatlab._progress import _in_notebook; "
        "print(_in_notebook(), 'tqdm.auto' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.stdout.split() == ["False", "False"]
    kernel = (
        "import sys, types; sys.modules['ipykernel'] = types.ModuleType('ipykernel'); "
        "from beatlab._progress import _in_notebook; "
        "print(_in_notebook(), 'tqdm.auto' in sys.modules)"
    )
    out = subprocess.run(
        [sys.executable, "-c", kernel], capture_output=True, text=True, timeout=120
    )
    assert out.stdout.split() == ["False", "True"]  # asked tqdm: no IPython shell running


def test_analyze_imports_numpy_and_pandas_before_forking_the_figure_process(tmp_path):
    """What both processes need is imported once, before the figure process is forked (it
    then imports only the plotting side); the analysis itself is imported after."""
    code = (
        "import sys, beatlab._figure_process as f\n"
        "class Recorder:\n"
        "    def __init__(self, **kw):\n"
        "        print(*(m in sys.modules for m in ('numpy', 'pandas', 'tifffile',\n"
        "                                           'beatlab.pipeline')))\n"
        "        raise SystemExit(0)\n"
        "f.FigureProcess = Recorder\n"
        "from beatlab.cli import main\n"
        f"main(['analyze', 'x.tif', '--out', {str(tmp_path / 'out')!r}])\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.stdout.split() == ["True", "True", "True", "False"], out.stderr
