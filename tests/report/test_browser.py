"""The reports in a real browser: headless Chromium draws them, without any console message.

Chromium writes every console message of the page to stderr with ``--enable-logging=stderr``
as a line holding ``CONSOLE`` and the source line (``INFO:CONSOLE:12]`` in recent versions,
``INFO:CONSOLE(12)]`` in older ones), whatever its level. The reports hold no script, so any
such line is a problem; the detector is first shown to catch a page with a deliberate error.
"""

import json
import os
import re
import shutil
import signal
import subprocess

import numpy as np
import pytest
from PIL import Image

from beatlab.report import build_batch_report, build_recording_report
from tests.report.helpers import save_png

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(
    CHROMIUM is None,
    reason="headless Chromium is not installed (apt-get install chromium): browser check skipped",
)

CONSOLE = re.compile(r"\bCONSOLE[:(]\d+")
TIMEOUT_S = 120
MARK_RGB = (230, 0, 200)  # a colour nothing else in a report uses


def _render(page, tmp_path, name):
    """Screenshot of `page` (1280 x 2000) and the page's console lines from Chromium's log."""
    shot = tmp_path / f"{name}.png"
    command = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={tmp_path / f'profile-{name}'}",
        f"--screenshot={shot}", "--window-size=1280,2000", "--enable-logging=stderr", "--v=0",
        page.resolve().as_uri(),
    ]  # fmt: skip
    # its own process group, so a hung browser is ended with all its helper processes
    process = subprocess.Popen(
        command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, errors="replace",
        start_new_session=True,
    )  # fmt: skip
    try:
        _, stderr = process.communicate(timeout=TIMEOUT_S)
    except subprocess.TimeoutExpired:
        os.killpg(process.pid, signal.SIGKILL)
        process.communicate()
        pytest.fail(f"Chromium did not finish {page.name} within {TIMEOUT_S} s")
    assert shot.is_file(), f"no screenshot of {page.name}; Chromium said:\n{stderr[-2000:]}"
    return shot, [line for line in stderr.splitlines() if CONSOLE.search(line)]


def _ink(shot):
    """(share of pixels that are not near-white, grey-level SD) of a screenshot."""
    grey = np.asarray(Image.open(shot).convert("L"), dtype=float)
    return float((grey < 235).mean()), float(grey.std())


def _has_colour(shot, rgb, *, tolerance=12, min_pixels=200):
    pixels = np.asarray(Image.open(shot).convert("RGB"), dtype=int)
    close = (np.abs(pixels - np.array(rgb)) <= tolerance).all(axis=-1)
    return int(close.sum()) >= min_pixels


def test_detector_catches_a_script_error_and_a_blank_page(tmp_path):
    bad = tmp_path / "bad.html"
    bad.write_text(
        "<!DOCTYPE html><html><head><meta charset='utf-8'><title>t</title></head><body>"
        "<p>text</p><script>notDefinedAnywhere();</script></body></html>",
        encoding="utf-8",
    )
    shot, console = _render(bad, tmp_path, "bad")
    assert any("notDefinedAnywhere" in line for line in console), console
    share, _ = _ink(shot)
    assert 0 < share < 0.01  # one short line of text on a white page
    blank = tmp_path / "blank.png"
    Image.new("RGB", (1280, 2000), "white").save(blank)
    assert _ink(blank) == (0.0, 0.0)  # what a blank screenshot gives


def test_batch_report_renders_without_console_messages(plate, tmp_path):
    batch_dir, _ = plate
    report = build_batch_report(batch_dir, out=tmp_path / "batch.html")
    shot, console = _render(report, tmp_path, "batch")
    assert console == []
    share, sd = _ink(shot)
    assert 0.02 < share < 0.6 and sd > 15, (share, sd)  # text, tables, cards: not blank


def test_recording_report_draws_its_embedded_figure(tmp_path):
    folder = tmp_path / "analysis"
    folder.mkdir()
    summary = {"beat_count": 5, "beat_rate_bpm": 71.2, "rhythm": "regular",
               "metadata": {"source": "demo.ome.tif"}}  # fmt: skip
    (folder / "summary.json").write_text(json.dumps(summary), encoding="utf-8")
    save_png(folder / "trace.png", color=tuple(c / 255 for c in MARK_RGB), size=(6.0, 3.0))
    report = build_recording_report(folder)
    shot, console = _render(report, tmp_path, "recording")
    assert console == []
    # the figure is a data: URI; its colour on screen shows the browser decoded and drew it
    assert _has_colour(shot, MARK_RGB)
    assert 0.01 < _ink(shot)[0] < 0.6
