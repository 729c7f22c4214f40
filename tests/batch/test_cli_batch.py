"""``beatlab batch`` and ``beatlab compare``: exit codes, messages, files, no re-analysis."""

import contextlib
import io
import json
import os
import shutil
import sys

import pytest

from beatlab.batch import _worker
from beatlab.cli import main
from beatlab.synth import simulate_recording, write_simulation

LAYOUT = """path,plate,well,compound,concentration,unit,role
A1.ome.tif,P1,A1,DMSO,,uM,vehicle
A2.ome.tif,P1,A2,DMSO,,uM,vehicle
A3.ome.tif,P1,A3,CPD-7,0.1,uM,sample
B1.tif,P1,B1,CPD-7,0.1,uM,sample
"""
RATES_BPM = {"A1": 60.0, "A2": 64.0, "A3": 90.0}
FILES = ("recordings", "beats", "wells", "groups", "incidence")


def _run(argv):
    """Exit code, stdout and stderr of ``beatlab ARGV`` run in this process."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main([str(a) for a in argv])
        except SystemExit as exc:  # argparse usage errors
            code = exc.code
    return code, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def batch(tmp_path_factory):
    """Three simulated recordings and a zero-byte TIFF, run once with the default --out."""
    folder = tmp_path_factory.mktemp("cli")
    for seed, (well, rate) in enumerate(RATES_BPM.items()):
        sim = simulate_recording(duration_s=3, fps=20, shape_px=(64, 64), rate_bpm=rate,
                                 noise_nm=1.0, rng=seed)  # fmt: skip
        write_simulation(sim, folder / f"{well}.ome.tif")
    (folder / "B1.tif").write_bytes(b"")
    layout = folder / "plate.csv"
    layout.write_text(LAYOUT, encoding="utf-8")
    return layout, _run(["batch", layout, "--workers", 1, "--threads", 1, "--no-progress"])


def test_batch_with_a_failed_recording_exits_1_and_writes_every_table(batch):
    layout, (code, out, err) = batch
    folder = layout.with_name("plate_batch")
    assert code == 1
    assert out.strip() == f"4 recordings analysed: 3 ok, 1 failed, 0 excluded -> {folder}"
    failed = [line for line in err.splitlines() if "P1_B1" in line]
    assert len(failed) == 1 and failed[0].startswith("beatlab: error: P1_B1: InputError: ")
    assert "Traceback" not in err
    for name in FILES:
        assert (folder / f"{name}.csv").is_file(), name
    info = json.loads((folder / "batch.json").read_text())
    assert info["counts"] == {"ok": 3, "error": 1, "excluded": 0}
    # each ok recording's own folder with its figures, the batch figures, one report
    for rid in ("P1_A1", "P1_A2", "P1_A3"):
        assert (folder / "recordings" / rid / "trace.png").is_file(), rid
        assert not (folder / "recordings" / rid / "trace.svg").exists()  # PNG only in a batch
    assert not (folder / "recordings" / "P1_B1").exists()
    assert (folder / "figures" / "gallery.png").is_file()
    assert (folder / "figures" / "groups_beat_rate_bpm.png").is_file()
    report = (folder / "report.html").read_text(encoding="utf-8")
    assert "P1_B1" in report and "Research use only" in report
    # each recording's report names its folder, not the temporary one it was written in
    own = (folder / "recordings" / "P1_A1" / "report.html").read_text(encoding="utf-8")
    assert f"<td>{folder / 'recordings' / 'P1_A1'}</td>" in own
    assert "the analysis folder P1_A1." in own and ".part" not in own


def test_second_run_takes_the_finished_recordings_from_the_cache(batch, tmp_path):
    layout, _ = batch
    out = shutil.copytree(layout.with_name("plate_batch"), tmp_path / "again")
    analysed, real = [], _worker.analyze

    def counted(path, *args, **kwargs):
        analysed.append(os.path.basename(path))
        return real(path, *args, **kwargs)

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(_worker, "analyze", counted)
        code, out_text, _ = _run(["batch", layout, "--out", out, "--threads", 1, "--no-progress",
                                  "--no-figures", "--no-report"])  # fmt: skip
    assert code == 1
    assert analysed == ["B1.tif"]  # failures are not cached: retried
    assert "3 ok (3 from cache), 1 failed" in out_text
    run = json.loads((out / "batch.json").read_text())["run"]
    assert (run["analysed"], run["cached"]) == (1, 3)


def test_compare_rewrites_groups_without_analysing(batch, monkeypatch):
    layout, _ = batch
    folder = layout.with_name("plate_batch")
    before = {name: (folder / f"{name}.csv").read_bytes() for name in FILES}
    (folder / "groups.csv").unlink()
    monkeypatch.setattr(_worker, "analyze", lambda *a, **k: pytest.fail("analysed"))
    code, out, err = _run(["compare", folder])
    assert (code, err) == (0, "")
    assert out.startswith("4 recordings compared: 3 ok, 1 failed")
    assert {name: (folder / f"{name}.csv").read_bytes() for name in FILES} == before


def test_bad_layout_exits_2_with_the_layout_message(tmp_path):
    layout = tmp_path / "plate.csv"
    layout.write_text("path,well\nnowhere.tif,A1\n", encoding="utf-8")
    code, out, err = _run(["batch", layout, "--out", tmp_path / "out"])
    assert code == 2 and out == ""
    assert err.startswith(f"beatlab: error: layout {layout}: ")
    assert "row 2, column path:" in err and "nowhere.tif does not exist" in err
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--workers", 0], "--workers: must be 1 or more"),
        (["--metrics", "beats"], "unknown or non-numeric metric(s) ['beats']"),
    ],
)
def test_bad_options_exit_2(batch, tmp_path, argv, message):
    layout, _ = batch
    code, _, err = _run(["batch", layout, "--out", tmp_path, *argv])
    last = err.strip().splitlines()[-1]  # argparse prints the usage first
    assert code == 2 and last.startswith("beatlab: error: ") and message in last


def test_compare_of_a_folder_that_is_no_batch_exits_2(tmp_path):
    code, _, err = _run(["compare", tmp_path])
    assert code == 2 and err.startswith("beatlab: error: ") and "beatlab batch" in err


def test_scheduler_without_dask_exits_2_saying_how_to_install(batch, tmp_path, monkeypatch):
    layout, _ = batch
    monkeypatch.setitem(sys.modules, "distributed", None)  # import now fails
    code, _, err = _run(["batch", layout, "--out", tmp_path, "--scheduler", "tcp://h:8786"])
    assert code == 2
    assert err.strip() == (
        "beatlab: error: --scheduler ADDRESS needs dask.distributed, which is not installed; "
        "pip install beatlab[dask]"
    )


def test_sigterm_stops_a_batch_like_ctrl_c(tmp_path, monkeypatch, capsys):
    # a scheduler or a closing laptop sends SIGTERM: the batch stops as on Ctrl-C (exit 130)
    # and says where the finished recordings are and how to go on
    import signal
    import time

    from beatlab import batch as batch_package
    from beatlab.cli import main

    def terminated(*args, **kwargs):
        os.kill(os.getpid(), signal.SIGTERM)
        time.sleep(5)
        pytest.fail("SIGTERM did not stop the batch")

    monkeypatch.setattr(batch_package, "analyze_batch", terminated)
    before = signal.getsignal(signal.SIGTERM)
    code = main(["batch", str(tmp_path / "plate.csv"), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 130
    assert "interrupted" in err and "run the same command again" in err
    assert signal.getsignal(signal.SIGTERM) == before  # the handler is put back
