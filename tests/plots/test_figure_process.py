"""The figure process of ``beatlab analyze``: the same files as drawing here, its failures
and warnings raised here, and no process left behind."""

import re
import warnings

import pytest

import beatlab._figure_process as fp_module
from beatlab._figure_process import FigureProcess
from beatlab._fork import can_fork
from beatlab.errors import BeatlabWarning, ConfigError
from beatlab.plots import save_recording_figures
from beatlab.report import build_recording_report
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import analyze_here, as_recording

forks = pytest.mark.skipif(not can_fork(), reason="the figure process is forked (Linux)")


@pytest.fixture(scope="module")
def analysis():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", BeatlabWarning)
        sim = simulate_recording(duration_s=4, fps=25, shape_px=(80, 80), rate_bpm=60, rng=5)
        return analyze_here(as_recording(sim))


def _folder(analysis, path):
    analysis.save(path, figures=False)  # the tables the report reads
    return path


def _files(folder):
    return {p.name: p.read_bytes() for p in folder.iterdir() if p.name != "report.html"}


@forks
def test_draws_the_same_files_as_drawing_here(analysis, tmp_path):
    here = _folder(analysis, tmp_path / "here")
    expected = save_recording_figures(analysis, here, formats=("png",), workers=1)
    build_recording_report(here)
    there = _folder(analysis, tmp_path / "there")
    with FigureProcess() as process:
        assert process.running
        paths = process.draw(analysis, there, formats=("png",), workers=2)
    assert not process.running and process.returncode == 0
    assert {k for k in paths if k != "report"} == set(expected)
    assert paths["report"] == there / "report.html" and paths["report"].is_file()
    assert _files(there) == _files(here)  # byte for byte: the same code, another process
    # the report embeds the same images (its text differs only in the creation time)
    images = [
        re.findall(r'data:image/png;base64,[^"]+', (folder / "report.html").read_text())
        for folder in (here, there)
    ]
    assert len(images[0]) == 5 and images[0] == images[1]


def test_without_a_fork_it_draws_here(analysis, tmp_path):
    folder = _folder(analysis, tmp_path)
    process = FigureProcess(start=False)
    assert not process.running
    paths = process.draw(analysis, folder, formats=("png",), report=False)
    assert "report" not in paths and paths["trace_png"].is_file()


@forks
def test_a_failure_in_the_process_is_raised_here_with_its_traceback(analysis, tmp_path):
    with FigureProcess() as process:
        with pytest.raises(ConfigError, match="not supported") as info:
            process.draw(analysis, _folder(analysis, tmp_path), formats=("gif",))
    assert any("raised in the figure process" in note for note in info.value.__notes__)
    assert process.returncode == 0


@forks
def test_warnings_of_the_process_are_raised_here(analysis, tmp_path, monkeypatch):
    def draw(*job):
        warnings.warn("a figure had nothing to show", BeatlabWarning, stacklevel=1)
        return {}

    monkeypatch.setattr(fp_module, "_draw", draw)  # before the fork: the process has it
    with FigureProcess() as process:
        with pytest.warns(BeatlabWarning, match="nothing to show"):
            assert process.draw(analysis, tmp_path) == {}


@forks
def test_closed_unused_or_while_drawing_the_process_is_stopped_and_reaped(
    analysis, tmp_path, monkeypatch
):
    unused = FigureProcess()
    unused.close()
    unused.close()  # twice is fine
    assert not unused.running and unused.returncode is not None

    def endless(*job):
        import time

        time.sleep(600)

    monkeypatch.setattr(fp_module, "_draw", endless)
    drawing = FigureProcess()
    drawing._jobs.send((analysis, tmp_path, ("png",), 1, True))  # the caller then fails
    drawing.close()
    assert drawing.returncode == -15  # SIGTERM: not left drawing into a removed folder


@forks
def test_the_process_runs_at_a_lower_priority_than_the_analysis(analysis, tmp_path, monkeypatch):
    """Its imports take only the cycles the analysis leaves idle: it is niced (and its
    drawing workers, forked from it, with it); this process keeps its own priority."""
    import os

    def report_nice(*job):
        return {"nice": os.nice(0)}

    monkeypatch.setattr(fp_module, "_draw", report_nice)
    before = os.nice(0)
    with FigureProcess() as process:
        niced = process.draw(analysis, tmp_path)["nice"]
    assert os.nice(0) == before
    assert niced == min(before + fp_module.FIGURE_NICE, 19)


def test_loading_builds_the_mathtext_grammar_for_the_drawing_workers():
    """What the figure process loads ahead includes matplotlib's mathtext grammar (built on a
    process's first parse, ~0.06 s), so that the workers it forks do not each build it."""
    import subprocess
    import sys

    code = (
        "from matplotlib.mathtext import MathTextParser as P; import beatlab._figure_process "
        "as f; before = P._parser; f._load(); print(before is None, P._parser is not None)"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120)  # fmt: skip
    if "AttributeError" in done.stderr:  # a matplotlib that keeps its parser elsewhere
        pytest.skip("matplotlib's mathtext parser is not MathTextParser._parser here")
    assert done.stdout.split() == ["True", "True"], done.stderr
