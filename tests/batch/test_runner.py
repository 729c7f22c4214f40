"""The batch runner on a small simulated plate: failures, exclusion, cache, pool and Dask."""

import json
import math
import os
import shutil
import sys

import numpy as np
import pandas as pd
import pytest

from beatlab.batch import _worker, analyze_batch, compare_batch, recording_key
from beatlab.batch._worker import THREAD_VARIABLES, thread_settings
from beatlab.batch.cache import ResultCache, decode_frame, encode_frame
from beatlab.batch.runner import _in_processes
from beatlab.errors import InputError
from beatlab.io.writers import write_ome_tiff
from beatlab.output import CAUTION
from beatlab.synth import simulate_recording, write_simulation

# (well, condition, rate_bpm): two vehicle and two drug wells; the drug speeds beating up.
WELLS = [("A1", "vehicle", 60.0), ("A2", "vehicle", 62.0), ("A3", "drug", 90.0),
         ("A4", "drug", 95.0)]  # fmt: skip
HEADER = "path,plate,well,condition,compound,concentration,unit,role,exclude,exclude_reason"
STATISTICS = ("wells", "groups", "incidence")  # what this layout supports
TABLES = ("recordings", "beats", *STATISTICS)


def _row(path, well, condition, *, exclude="", reason=""):
    compound, conc, role = ("DMSO", "", "vehicle") if condition == "vehicle" else (
        "E4031", "0.1", "sample")  # fmt: skip
    return f"{path},P1,{well},{condition},{compound},{conc},uM,{role},{exclude},{reason}"


def _write_layout(folder, rows, name="layout.csv"):
    path = folder / name
    path.write_text("\n".join([HEADER, *rows]) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def plate(tmp_path_factory):
    """Four simulated recordings, a zero-byte TIFF (B1) and an excluded missing file (B2)."""
    folder = tmp_path_factory.mktemp("plate")
    rows = []
    for seed, (well, condition, rate) in enumerate(WELLS):
        sim = simulate_recording(duration_s=3, fps=20, shape_px=(64, 64), rate_bpm=rate,
                                 noise_nm=1.0, rng=seed)  # fmt: skip
        write_simulation(sim, folder / f"{well}.ome.tif")
        rows.append(_row(f"{well}.ome.tif", well, condition))
    (folder / "B1.tif").write_bytes(b"")
    rows.append(_row("B1.tif", "B1", "drug"))
    rows.append(_row("gone.tif", "B2", "drug", exclude="yes", reason="out of focus"))
    return folder, rows


class _Counter:
    """Stands in for beatlab.analyze in the worker and records the paths it is given."""

    def __init__(self, real):
        self.real, self.paths = real, []

    def __call__(self, path, *args, **kwargs):
        self.paths.append(os.path.basename(path))
        return self.real(path, *args, **kwargs)


# Tables only: the figures, folders and report of a batch are tested in test_cli_batch.py
QUICK = {"details": False, "figures": False, "report": False}

# In this process, one thread per recording: the analysis's own parallel per-frame work would
# start processes from the test process, which other tests leave with library threads.
IN_PROCESS = {"workers": 1, "threads": 1, **QUICK}


def _counted_batch(layout, out_dir, **options):
    """analyze_batch in this process, returning the result and the files it analysed."""
    counter = _Counter(_worker.analyze)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(_worker, "analyze", counter)
        result = analyze_batch(layout, out_dir=out_dir, progress=False, **IN_PROCESS, **options)
    return result, sorted(counter.paths)


@pytest.fixture(scope="module")
def reference(plate, tmp_path_factory):
    """The whole layout analysed in this process, one recording after the other."""
    folder, rows = plate
    out = tmp_path_factory.mktemp("reference")
    result, analysed = _counted_batch(_write_layout(folder, rows), out)
    return result, out, analysed


def _copy(out, tmp_path):
    return shutil.copytree(out, tmp_path / "copy")


def _same_files(left, right, names=TABLES):
    for name in names:
        assert (left / f"{name}.csv").read_bytes() == (right / f"{name}.csv").read_bytes(), name


# --- one run ------------------------------------------------------------------------------


def test_failed_file_is_one_error_row_and_the_others_are_ok(reference):
    result, out, _ = reference
    table = result.recordings.set_index("recording_id")
    assert table["status"].to_dict() == {
        "P1_A1": "ok", "P1_A2": "ok", "P1_A3": "ok", "P1_A4": "ok", "P1_B1": "error",
        "P1_B2": "excluded",
    }  # fmt: skip
    error = table.loc["P1_B1", "error"]
    assert error.startswith("InputError: ") and "B1.tif" in error and "\n" not in error
    assert (table.loc[table["status"] != "error", "error"] == "").all()
    assert math.isnan(table.loc["P1_B1", "beat_rate_bpm"])
    assert result.counts == {"ok": 4, "error": 1, "excluded": 1, "analysed": 5, "cached": 0}
    for name in TABLES:
        assert (out / f"{name}.csv").is_file(), name
    info = json.loads((out / "batch.json").read_text())
    assert info["counts"] == {"ok": 4, "error": 1, "excluded": 1}
    assert info["caution"] == CAUTION and info["state"] == "finished"
    assert set(info["skipped"]) == {"dose_response", "z_prime"}
    assert not (out / "dose_response.csv").exists() and result.dose_response.empty


def test_excluded_row_keeps_its_reason_and_is_not_analysed(reference):
    result, _, analysed = reference
    assert analysed == ["A1.ome.tif", "A2.ome.tif", "A3.ome.tif", "A4.ome.tif", "B1.tif"]
    row = result.recordings.set_index("recording_id").loc["P1_B2"]
    assert (row["status"], row["exclude_reason"], row["error"]) == ("excluded", "out of focus", "")
    assert pd.isna(row["beat_count"])
    well = result.wells.set_index("well").loc["B2"]
    assert (well["status"], well["n_fov_excluded"]) == ("excluded", 1)


def test_tables_carry_the_layout_and_recover_the_simulated_rates(reference):
    result, _, _ = reference
    recordings = result.recordings.set_index("recording_id")
    for well, _, rate in WELLS:
        assert recordings.loc[f"P1_{well}", "beat_rate_bpm"] == pytest.approx(rate, rel=0.03)
    beats = result.beats
    assert {"recording_id", "plate", "well", "compound", "concentration", "onset_s"} <= set(
        beats.columns
    )
    per_recording = beats.groupby("recording_id").size()
    ok = recordings[recordings["status"] == "ok"]
    assert per_recording.to_dict() == ok["beat_count"].astype(int).to_dict()
    assert set(beats.loc[beats["well"] == "A3", "compound"]) == {"E4031"}
    # vehicle-normalised rate of the drug wells: 100 (92.5 / 61 - 1) = +51.6 % simulated
    rate = result.groups.set_index("metric").loc["beat_rate_bpm_norm"]
    assert rate["group"] == "drug E4031 0.1 uM" and rate["control"] == "vehicle DMSO 0 uM"
    assert rate["mean"] == pytest.approx(100 * (92.5 / 61 - 1), abs=3.0)
    assert rate["n_wells"] == 2 and rate["control_n_wells"] == 2
    assert sorted(result.groups["metric"].str.removesuffix("_norm")) == sorted(
        json.loads((result.out_dir / "batch.json").read_text())["metrics"]
    )


# --- cache --------------------------------------------------------------------------------


def test_rerun_takes_every_result_from_the_cache(reference, tmp_path, capsys):
    _, out, _ = reference
    out = _copy(out, tmp_path)
    entries = sorted((out / "cache" / "results").glob("*.json"))
    assert len(entries) == 4  # the failed recording is not cached
    stamps = [p.stat().st_mtime_ns for p in entries]
    counter = _Counter(_worker.analyze)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(_worker, "analyze", counter)
        again = analyze_batch(_layout_of(out), out_dir=out, progress=True, **IN_PROCESS)
    assert counter.paths == ["B1.tif"]  # only the failure is retried
    assert again.counts["analysed"] == 1 and again.counts["cached"] == 4
    assert [p.stat().st_mtime_ns for p in entries] == stamps
    _same_files(reference[1], out)
    assert "recordings" in capsys.readouterr().err  # the progress bar


def _layout_of(out):
    return json.loads((out / "batch.json").read_text())["layout"]


def test_interrupted_batch_analyses_only_what_is_missing(plate, reference, tmp_path):
    folder, rows = plate
    out = tmp_path / "resumed"
    subset = _write_layout(folder, [rows[0], rows[2]], name="first_two.csv")
    _, first = _counted_batch(subset, out)
    assert first == ["A1.ome.tif", "A3.ome.tif"]
    result, second = _counted_batch(_write_layout(folder, rows), out)
    assert second == ["A2.ome.tif", "A4.ome.tif", "B1.tif"]
    assert result.counts["cached"] == 2
    _same_files(reference[1], out)


def test_cache_key_follows_file_options_config_and_version(plate):
    folder, _ = plate
    path = folder / "A1.ome.tif"
    base = dict(options={"fps": 20.0}, config={"beats": {"min_snr": 8.0}})
    key = recording_key(path, **base)
    assert key == recording_key(str(path), **base)  # the same file, however named
    assert key != recording_key(path, options={"fps": 25.0}, config=base["config"])
    assert key != recording_key(path, options=base["options"], config={"beats": {}})
    assert key != recording_key(path, **base, version="0.0.0")
    stat = path.stat()
    os.utime(path, ns=(stat.st_atime_ns, stat.st_mtime_ns + 1_000_000))
    try:
        assert key != recording_key(path, **base)
    finally:
        os.utime(path, ns=(stat.st_atime_ns, stat.st_mtime_ns))
    assert key == recording_key(path, **base)


def test_cache_round_trip_keeps_every_bit_and_dtype(tmp_path):
    rng = np.random.default_rng(3)
    beats = pd.DataFrame(
        {
            "x_s": rng.normal(size=50) * 10.0 ** rng.integers(-9, 9, 50),
            "n": np.arange(50),
            "flag": rng.random(50) > 0.5,
            "maybe": pd.array([True, None] * 25, dtype="boolean"),
        }
    )
    beats.loc[3, "x_s"] = np.nan
    row = {"beat_rate_bpm": 1 / 3, "rhythm": "regular", "ibi_cv": None, "status": "ok"}
    cache = ResultCache(tmp_path)
    stored = cache.store("k", row, beats)
    loaded = cache.load("k")
    pd.testing.assert_frame_equal(loaded[1], beats)
    pd.testing.assert_frame_equal(stored[1], beats)
    assert loaded[0] == stored[0] == row
    pd.testing.assert_frame_equal(decode_frame(encode_frame(beats.iloc[:0])), beats.iloc[:0])
    assert cache.load("absent") is None
    cache.path_for("broken").write_text("{not json")
    assert cache.load("broken") is None


def test_worker_keeps_warnings_in_the_row_and_turns_failures_into_one_line(tmp_path):
    sim = simulate_recording(duration_s=3, fps=20, shape_px=(64, 64), rate_bpm=80.0, rng=5)
    times_s = sim.times_s + np.where(np.arange(sim.times_s.size) % 2, 0.01, 0.0)  # uneven
    path = write_ome_tiff(tmp_path / "uneven.ome.tif", sim.frames, fps=sim.fps,
                          pixel_size_um=sim.pixel_size_um, times_s=times_s)  # fmt: skip
    row, beats = _worker.analyze_task(_worker.AnalysisTask(0, "uneven", str(path), threads=1))
    assert row["status"] == "ok" and row["n_warnings"] == 1
    assert "frame times are uneven" in row["warnings"] and len(beats) == row["beat_count"]
    task = _worker.AnalysisTask(1, "slow", str(path), options={"fps": -1.0}, threads=1)
    row, beats = _worker.analyze_task(task)
    assert row["status"] == "error" and beats.empty
    assert row["error"].startswith("MetadataError: ") and "\n" not in row["error"]


# --- compare ------------------------------------------------------------------------------


#: Tables only, as QUICK: the figures and report that compare redraws by default are drawn in
#: test_cli_batch.py (``beatlab compare``) and below for a batch without an ok recording.
TABLES_ONLY = {"figures": False, "report": False}


def _forbid_analysis(monkeypatch):
    def fail(*args, **kwargs):
        raise AssertionError("compare must not analyse")

    monkeypatch.setattr(_worker, "analyze", fail)


def test_compare_rewrites_the_statistics_without_analysing(reference, tmp_path, monkeypatch):
    _forbid_analysis(monkeypatch)
    out = _copy(reference[1], tmp_path)
    for name in STATISTICS:
        (out / f"{name}.csv").unlink()
    result = compare_batch(out, **TABLES_ONLY)
    _same_files(reference[1], out)
    pd.testing.assert_frame_equal(result.groups, reference[0].groups)
    assert result.counts["analysed"] == 0
    # an edit of recordings.csv counts: exclude well A4 after quality control
    table = pd.read_csv(out / "recordings.csv", dtype=object, keep_default_na=False)
    table.loc[table["well"] == "A4", "exclude"] = "True"
    table.to_csv(out / "recordings.csv", index=False)
    edited = compare_batch(out, **TABLES_ONLY)
    assert edited.wells.set_index("well").loc["A4", "status"] == "excluded"
    assert edited.groups.set_index("metric").loc["beat_rate_bpm_norm", "n_wells"] == 1


def test_compare_rebuilds_an_interrupted_batch_from_its_cache(reference, tmp_path, monkeypatch):
    _forbid_analysis(monkeypatch)
    out = _copy(reference[1], tmp_path)
    for name in TABLES:
        (out / f"{name}.csv").unlink()
    result = compare_batch(out, **TABLES_ONLY)
    assert result.counts["cached"] == 4
    _same_files(reference[1], out, names=("beats", "groups", "incidence"))  # wells: error text
    ok = result.recordings["status"] != "error"
    expected = reference[0].recordings
    pd.testing.assert_frame_equal(result.recordings[ok], expected[ok])
    assert result.recordings.loc[~ok, "error"].str.startswith("not analysed").all()
    # another configuration has no cached results: nothing is analysed, nothing is ok (and
    # the figures and report of a batch without one ok recording are still drawn)
    other = compare_batch(out, config={"beats": {"min_snr": 9.0}})
    assert other.counts == {"ok": 0, "error": 5, "excluded": 1, "analysed": 0, "cached": 0}
    assert json.loads((out / "batch.json").read_text())["config"]["beats"]["min_snr"] == 9.0


def test_compare_of_a_folder_that_is_no_batch_says_so(tmp_path):
    with pytest.raises(InputError, match="not a batch folder"):
        compare_batch(tmp_path)


# --- executors ----------------------------------------------------------------------------


def test_pool_processes_start_with_pinned_threads():
    before = {name: os.environ.get(name) for name in THREAD_VARIABLES}
    found = [r for _, r in _in_processes(
        thread_settings, [THREAD_VARIABLES] * 2, processes=2, threads=1)]  # fmt: skip
    assert found == [{**dict.fromkeys(THREAD_VARIABLES, "1"), "opencv": 1}] * 2
    assert {name: os.environ.get(name) for name in THREAD_VARIABLES} == before


def _numeric(table):
    return table.select_dtypes(include="number")


def test_process_pool_gives_the_same_tables(plate, reference, tmp_path):
    folder, rows = plate
    result = analyze_batch(_write_layout(folder, rows), out_dir=tmp_path, workers=2,
                           threads=1, progress=False, **QUICK)  # fmt: skip
    info = json.loads((tmp_path / "batch.json").read_text())
    assert info["run"]["executor"] == "process-pool"
    assert (info["run"]["processes"], info["run"]["threads"]) == (2, 1)
    pd.testing.assert_frame_equal(result.recordings, reference[0].recordings)
    _same_files(reference[1], tmp_path)


def test_dask_cluster_gives_the_same_tables(plate, reference, tmp_path):
    distributed = pytest.importorskip("distributed")
    folder, rows = plate
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
        dashboard_address=None,
    ) as cluster:  # fmt: skip
        result = analyze_batch(_write_layout(folder, rows), out_dir=tmp_path,
                               scheduler=cluster.scheduler_address, progress=False,
                               **{**QUICK, "details": True})  # fmt: skip
    info = json.loads((tmp_path / "batch.json").read_text())
    assert info["run"]["executor"] == "dask"
    # the cluster's workers write each ok recording's own folder, whole
    ok = result.recordings.loc[result.recordings["status"] == "ok", "recording_id"]
    for rid in ok:
        assert (tmp_path / "recordings" / rid / "summary.json").is_file(), rid
    expected = reference[0].recordings
    pd.testing.assert_frame_equal(_numeric(result.recordings), _numeric(expected),
                                  check_exact=True)  # fmt: skip
    pd.testing.assert_frame_equal(result.recordings, expected)
    _same_files(reference[1], tmp_path)


# --- arguments ----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("options", "match"),
    [
        ({"workers": 0}, "workers must be a positive whole number"),
        ({"threads": 1.5}, "threads must be a positive whole number"),
        ({"metrics": ["beat_rate"]}, "unknown or non-numeric metric"),
        ({"metrics": ["rhythm"]}, "unknown or non-numeric metric"),
        ({"scheduler": 8786}, "must be an address"),
    ],
)
def test_bad_options_are_input_errors(plate, tmp_path, options, match):
    folder, rows = plate
    with pytest.raises(InputError, match=match):
        analyze_batch(_write_layout(folder, rows[:1]), out_dir=tmp_path, progress=False,
                      **options)  # fmt: skip


def test_scheduler_without_dask_says_how_to_install(plate, tmp_path, monkeypatch):
    folder, rows = plate
    monkeypatch.setitem(sys.modules, "distributed", None)  # import now fails
    with pytest.raises(InputError, match=r"pip install beatlab\[dask\]"):
        analyze_batch(_write_layout(folder, rows[4:5]), out_dir=tmp_path,
                      scheduler="tcp://127.0.0.1:1", progress=False)  # fmt: skip


def test_a_worker_process_that_dies_fails_only_its_own_item():
    # the process analysing item 3 dies abruptly (os._exit, as when the kernel kills it for
    # memory); the pool is replaced and every other item still gets its result
    from tests.batch.crashers import square_or_die

    found = dict(
        _in_processes(square_or_die, [1, 2, 3, 4, 5, 6], processes=2, threads=1,
                      on_death=lambda exc: "died")
    )  # fmt: skip
    assert found == {1: 1, 2: 4, 3: "died", 4: 16, 5: 25, 6: 36}


def test_an_interrupted_batch_keeps_its_finished_recordings_and_resumes_identically(
    plate, reference, tmp_path
):
    # Ctrl-C (or SIGTERM, which the command line turns into it) after two recordings: they
    # stay cached, batch.json says so, and the re-run analyses only the others and ends with
    # the tables of an uninterrupted run, byte for byte
    folder, rows = plate
    layout, out = _write_layout(folder, rows), tmp_path / "stopped"
    real, calls = _worker.analyze, []

    def stop_at_third(path, *args, **kwargs):
        calls.append(os.path.basename(path))
        if len(calls) == 3:
            raise KeyboardInterrupt
        return real(path, *args, **kwargs)

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(_worker, "analyze", stop_at_third)
        with pytest.raises(KeyboardInterrupt):
            analyze_batch(layout, out_dir=out, progress=False, **IN_PROCESS)
    info = json.loads((out / "batch.json").read_text())
    assert info["state"] == "interrupted" and info["finished"] == 3  # 2 analysed + excluded
    result, again = _counted_batch(layout, out)
    assert result.counts["cached"] == 2 and len(again) == 3
    _same_files(reference[1], out)


def test_a_pool_that_breaks_while_an_item_is_submitted_loses_no_item(monkeypatch):
    # a worker can die between two results: the next submit then raises BrokenProcessPool
    # itself (seen under load); the item not yet started stays pending, the one in flight
    # is rerun alone, and every item gets its result once
    from concurrent.futures import Future
    from concurrent.futures.process import BrokenProcessPool

    from beatlab.batch import runner

    submits = []

    class BreaksOnThirdSubmit:
        def submit(self, function, item):
            submits.append(item)
            if len(submits) == 3:
                raise BrokenProcessPool("a child process terminated abruptly")
            future = Future()
            future.set_result(function(item))
            return future

        def shutdown(self, wait, cancel_futures):
            pass

    monkeypatch.setattr(runner, "_new_pool", lambda processes, threads: BreaksOnThirdSubmit())
    found = list(
        runner._in_processes(lambda x: x * x, [1, 2, 3, 4], processes=2, threads=1,
                             on_death=lambda exc: "died")
    )  # fmt: skip
    assert sorted(found) == [(1, 1), (2, 4), (3, 9), (4, 16)]
