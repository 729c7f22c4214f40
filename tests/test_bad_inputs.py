"""Bad inputs to ``beatlab analyze`` and ``beatlab reconstruct``, run as a user runs them.

Every case of the catalogue ends in one of two ways: exit 2 with exactly one line
``beatlab: error: ...`` on stderr (what, where, how to fix), no traceback and nothing written to
``--out``; or, for the recoverable ones, exit 0 with our own warning and never a library's.
"""

import json
import os
import stat
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import tifffile

from beatlab.cli import main
from beatlab.errors import InputError
from beatlab.io import write_json, write_ome_tiff
from beatlab.synth import simulate_recording, write_simulation

FPS, PX_UM, WAVELENGTH_NM = 20.0, 0.5, 632.8
META = ["--fps", "20", "--pixel-size-um", "0.5"]
HOLO_META = ["--pixel-size-um", "0.5", "--wavelength-nm", "632.8"]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """Every input of the catalogue, made once from a small simulated recording."""
    d = tmp_path_factory.mktemp("inputs")
    sim = simulate_recording(shape_px=(48, 48), duration_s=2, fps=FPS, rng=0)
    holo = simulate_recording(shape_px=(48, 48), duration_s=1, fps=FPS, rng=0, kind="hologram")
    f = {"opd": write_simulation(sim, d / "cells.ome.tif")["recording"]}
    written = write_simulation(holo, d / "holo.ome.tif")
    f["holo"], f["holo_ref"] = written["recording"], written["reference"]
    frames, holograms = sim.frames.astype(np.float32), holo.frames.astype(np.float32)

    def npy(name, array):
        np.save(d / name, array)
        return d / name

    (d / "empty").mkdir()
    f["empty"] = d / "empty"
    f["avi"] = d / "movie.avi"
    f["avi"].write_bytes(b"RIFF0000AVI ")
    f["zero_tif"] = d / "zero.tif"
    f["zero_tif"].write_bytes(b"")
    f["zero_npy"] = d / "zero.npy"
    f["zero_npy"].write_bytes(b"")
    for key, source in (("trunc", f["opd"]), ("holo_trunc", f["holo"])):
        data = source.read_bytes()
        f[key] = d / f"{key}.ome.tif"
        f[key].write_bytes(data[: len(data) // 2])
    f["random_tif"] = d / "random.tif"
    f["random_tif"].write_bytes(np.random.default_rng(1).bytes(4096))
    f["text_tif"] = d / "notes.tif"
    f["text_tif"].write_text("frame rate 20 Hz\npixel 0.5 um\n")
    f["single_tif"] = d / "single.tif"
    tifffile.imwrite(f["single_tif"], frames[0])
    f["single_npy"] = npy("single.npy", frames[0])
    f["few"] = npy("few.npy", frames[:3])
    f["plain"] = npy("plain.npy", frames)
    f["all_nan"] = npy("all_nan.npy", np.full_like(frames, np.nan))
    f["all_inf"] = npy("all_inf.npy", np.full_like(frames, np.inf))
    corner = np.zeros(frames.shape[1:], dtype=bool)
    corner[:2, :3] = True  # outside the camera's valid area: NaN in every frame
    f["few_nan"] = npy("few_nan.npy", np.where(corner, np.nan, frames).astype(np.float32))
    f["few_inf"] = npy("few_inf.npy", np.where(corner, np.inf, frames).astype(np.float32))
    f["constant"] = npy("constant.npy", np.full_like(frames, 7.0))
    f["complex"] = npy("complex.npy", frames.astype(np.complex64))
    f["rgb_npy"] = npy("rgb.npy", np.stack([frames] * 3, axis=-1))
    f["rgb_tif"] = d / "rgb.tif"
    rgb = np.stack([np.clip(frames, 0, 255).astype(np.uint8)] * 3, axis=-1)
    tifffile.imwrite(f["rgb_tif"], rgb, photometric="rgb")
    # frame times going backwards, and no even interval to fall back on
    backwards = np.arange(len(frames)) / FPS
    backwards[10] = backwards[8]
    f["backwards"] = write_ome_tiff(
        d / "backwards.ome.tif", frames, fps=None, pixel_size_um=PX_UM, times_s=backwards
    )
    f["backwards_even"] = write_ome_tiff(
        d / "backwards_even.ome.tif", frames, fps=FPS, pixel_size_um=PX_UM, times_s=backwards
    )
    bad_metadata = {"axes": "TYX", "PhysicalSizeX": -0.5, "PhysicalSizeY": -0.5}
    f["file_px_negative"] = d / "file_px_negative.ome.tif"
    tifffile.imwrite(f["file_px_negative"], frames, ome=True, metadata=bad_metadata)
    f["file_interval_zero"] = d / "file_interval_zero.ome.tif"
    zero_interval = {"axes": "TYX", "PhysicalSizeX": 0.5, "TimeIncrement": 0.0}
    tifffile.imwrite(f["file_interval_zero"], frames, ome=True, metadata=zero_interval)
    f["holo_npy"] = npy("holo.npy", holograms)
    f["holo_single"] = npy("holo_single.npy", holograms[0])
    f["holo_nan"] = npy("holo_nan.npy", np.full_like(holograms, np.nan))
    f["ref_other_shape"] = npy("ref_other.npy", np.ones((2, 40, 40), np.float32))
    f["ref_bad"] = npy("ref_bad.npy", np.ones((2, 40, 40), np.complex64))
    configs = {
        "cfg_unknown_key": "[beats]\nmin_snr_typo = 3\n",
        "cfg_unknown_section": "[beat]\nmin_snr = 3\n",
        "cfg_outside_section": "min_snr = 3\n",
        "cfg_wrong_type": '[beats]\nmin_snr = "high"\n',
        "cfg_bool_type": "[template]\nlevel_tilt = 1\n",
        "cfg_below_range": "[beats]\nmin_snr = -1\n",
        "cfg_above_range": "[holography]\nradius = 0.9\n",
        "cfg_not_finite": "[velocity]\nwindow_ms = nan\n",
        "cfg_not_toml": "[beats\nmin_snr = 3\n",
    }
    for name, text in configs.items():
        f[name] = d / f"{name}.toml"
        f[name].write_text(text)
    f["cfg_binary"] = d / "binary.toml"
    f["cfg_binary"].write_bytes(b"\xff\xfe\x00\x81 binary")
    f["missing"] = d / "no_such_recording.ome.tif"
    f["cfg_missing"] = d / "no_such_config.toml"
    return f


def _run(capsys, argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _assert_one_error_line(code, err, pattern, *, warned=False):
    assert code == 2, err
    lines = err.strip().splitlines()
    if warned:  # our own warnings may come first, never a library's
        assert all(line.startswith("beatlab: warning: ") for line in lines[:-1]), err
        lines = lines[-1:]
    assert len(lines) == 1, err
    assert lines[0].startswith("beatlab: error: "), err
    assert "Traceback" not in err
    assert pattern.lower() in lines[0].lower(), lines[0]


# (case id, argv after the command with {name} placeholders, text the error line holds)
ANALYZE_ERRORS = [
    ("missing file", ["{missing}", *META], "no such file or folder; check the path"),
    ("empty folder", ["{empty}", *META], "holds no .tif/.tiff/.png frames"),
    ("unsupported extension", ["{avi}", *META], "unsupported file type '.avi'"),
    ("zero-byte tif", ["{zero_tif}", *META], "the file is empty"),
    ("zero-byte npy", ["{zero_npy}", *META], "an empty file"),
    ("truncated OME-TIFF", ["{trunc}"], "damaged or truncated"),
    ("random bytes .tif", ["{random_tif}", *META], "cannot be read as a frame stack"),
    ("text file .tif", ["{text_tif}", *META], "cannot be read as a frame stack"),
    ("single image tif", ["{single_tif}", *META], "a single 48 x 48 px image, not a time-lapse"),
    ("single image npy", ["{single_npy}", *META], "a single 48 x 48 px image, not a time-lapse"),
    ("too few frames", ["{few}", *META], "only 3 frames; analysing beats needs at least 8"),
    ("all-NaN frames", ["{all_nan}", *META], "every pixel of every frame is NaN or infinite"),
    ("all-inf frames", ["{all_inf}", *META], "every pixel of every frame is NaN or infinite"),
    ("complex data", ["{complex}", *META], "holds complex values"),
    ("RGB npy", ["{rgb_npy}", *META], "expected frames (T, Y, X), got shape (40, 48, 48, 3)"),
    ("RGB tif", ["{rgb_tif}", *META], "has several channels"),
    ("wrong --kind", ["{opd}", "--kind", "fluorescence"], "argument --kind: invalid choice"),
    ("fps and pixel size missing", ["{plain}"], "pass --fps HZ and --pixel-size-um UM"),
    ("fps missing", ["{plain}", "--pixel-size-um", "0.5"], "frame rate is unknown"),
    ("pixel size missing", ["{plain}", "--fps", "20"], "pass --pixel-size-um UM"),
    ("wavelength missing", ["{plain}", *META, "--kind", "phase"], "pass --wavelength-nm NM"),
    ("zero fps", ["{plain}", "--fps", "0"], "argument --fps: must be positive and finite"),
    ("negative fps", ["{plain}", "--fps=-5"], "argument --fps: must be positive and finite"),
    ("nan fps", ["{plain}", "--fps", "nan"], "argument --fps: must be positive and finite"),
    ("zero pixel size", ["{plain}", "--pixel-size-um", "0"], "--pixel-size-um: must be positive"),
    (
        "negative pixel size",
        ["{plain}", "--pixel-size-um=-1"],
        "--pixel-size-um: must be positive",
    ),
    ("zero wavelength", ["{plain}", "--wavelength-nm", "0"], "--wavelength-nm: must be positive"),
    (
        "negative wavelength",
        ["{plain}", "--wavelength-nm=-633"],
        "--wavelength-nm: must be positive",
    ),
    ("non-monotonic times", ["{backwards}"], "frame times in the file do not increase"),
    ("file pixel size negative", ["{file_px_negative}", "--fps", "20"], "the file's pixel size"),
    ("file frame interval zero", ["{file_interval_zero}"], "the file's frame rate"),
    (
        "reference of another shape",
        ["{holo}", "--kind", "hologram", "--reference", "{ref_other_shape}"],
        "pass --reference PATH",
    ),
    ("config unknown key", ["{opd}", "--config", "{cfg_unknown_key}"], "did you mean min_snr"),
    ("config unknown section", ["{opd}", "--config", "{cfg_unknown_section}"], "[beats]?"),
    ("config key outside", ["{opd}", "--config", "{cfg_outside_section}"], "under [beats]"),
    ("config wrong type", ["{opd}", "--config", "{cfg_wrong_type}"], "must be a number"),
    ("config bool type", ["{opd}", "--config", "{cfg_bool_type}"], "must be true or false"),
    ("config below range", ["{opd}", "--config", "{cfg_below_range}"], "must be >= 0"),
    ("config above range", ["{opd}", "--config", "{cfg_above_range}"], "must be <= 0.5"),
    ("config not finite", ["{opd}", "--config", "{cfg_not_finite}"], "must be a finite number"),
    ("config not TOML", ["{opd}", "--config", "{cfg_not_toml}"], "is not valid TOML"),
    ("config binary", ["{opd}", "--config", "{cfg_binary}"], "is not UTF-8 text"),
    ("config missing", ["{opd}", "--config", "{cfg_missing}"], "cannot read config file"),
]

RECONSTRUCT_ERRORS = [
    ("missing file", ["{missing}", *HOLO_META], "no such file or folder"),
    ("empty folder", ["{empty}", *HOLO_META], "holds no .tif/.tiff/.png frames"),
    ("unsupported extension", ["{avi}", *HOLO_META], "unsupported file type '.avi'"),
    ("zero-byte tif", ["{zero_tif}", *HOLO_META], "the file is empty"),
    ("zero-byte npy", ["{zero_npy}", *HOLO_META], "an empty file"),
    ("truncated OME-TIFF", ["{holo_trunc}"], "damaged or truncated"),
    ("random bytes .tif", ["{random_tif}", *HOLO_META], "cannot be read as a frame stack"),
    ("text file .tif", ["{text_tif}", *HOLO_META], "cannot be read as a frame stack"),
    ("all-NaN frames", ["{holo_nan}", *HOLO_META], "contains NaN or inf"),
    ("complex data", ["{complex}", *HOLO_META], "holds complex values"),
    ("RGB npy", ["{rgb_npy}", *HOLO_META], "expected frames (T, Y, X)"),
    ("RGB tif", ["{rgb_tif}", *HOLO_META], "has several channels"),
    (
        "pixel size and wavelength missing",
        ["{holo_npy}"],
        "pass --pixel-size-um UM and --wavelength-nm NM",
    ),
    ("wavelength missing", ["{holo_npy}", "--pixel-size-um", "0.5"], "pass --wavelength-nm NM"),
    ("zero fps", ["{holo}", "--fps", "0"], "argument --fps: must be positive and finite"),
    ("negative fps", ["{holo}", "--fps=-1"], "argument --fps: must be positive and finite"),
    ("zero pixel size", ["{holo}", "--pixel-size-um", "0"], "--pixel-size-um: must be positive"),
    ("zero wavelength", ["{holo}", "--wavelength-nm", "0"], "--wavelength-nm: must be positive"),
    ("negative wavelength", ["{holo}", "--wavelength-nm=-1"], "--wavelength-nm: must be positive"),
    (
        "reference of another shape",
        ["{holo}", "--reference", "{ref_other_shape}"],
        "the reference frames are 40 x 40 px, the holograms 48 x 48 px",
    ),
    ("complex reference", ["{holo}", "--reference", "{ref_bad}"], "holds complex values"),
    ("config above range", ["{holo}", "--config", "{cfg_above_range}"], "must be <= 0.5"),
    ("config unknown key", ["{holo}", "--config", "{cfg_unknown_key}"], "beats.min_snr_typo"),
    ("config not TOML", ["{holo}", "--config", "{cfg_not_toml}"], "is not valid TOML"),
]


def _argv(template, files):
    return [str(a).format(**files) for a in template]


#: Cases that warn before they fail: the warning explains the error after it.
WARN_FIRST = {"all-inf frames"}


@pytest.mark.parametrize(
    ("name", "args", "pattern"),
    [pytest.param(*case, id=case[0]) for case in ANALYZE_ERRORS],
)
def test_analyze_refuses_in_one_line(files, tmp_path, capsys, name, args, pattern):
    out = tmp_path / "out"
    code, stdout, err = _run(capsys, ["analyze", *_argv(args, files), "--out", out])
    _assert_one_error_line(code, err, pattern, warned=name in WARN_FIRST)
    assert stdout == ""
    assert not out.exists()


@pytest.mark.parametrize(
    ("args", "pattern"),
    [pytest.param(args, pattern, id=name) for name, args, pattern in RECONSTRUCT_ERRORS],
)
def test_reconstruct_refuses_in_one_line(files, tmp_path, capsys, args, pattern):
    out = tmp_path / "out" / "opd.ome.tif"
    code, stdout, err = _run(capsys, ["reconstruct", *_argv(args, files), "--out", out])
    _assert_one_error_line(code, err, pattern)
    assert stdout == ""
    assert not out.exists() and not [p for p in tmp_path.rglob("*.part")]


RECOVERABLE = [
    ("a few NaN pixels", "few_nan", []),
    ("a few inf pixels", "few_inf", ["treated as missing (NaN) pixels"]),
    ("constant frames", "constant", ["no frame differs from the rest template"]),
    ("times backwards, even interval", "backwards_even", ["the even interval"]),
]


@pytest.mark.parametrize(("name", "warned"), [pytest.param(n, w, id=i) for i, n, w in RECOVERABLE])
def test_recoverable_inputs_warn_in_our_words(files, tmp_path, capsys, name, warned):
    out = tmp_path / "out"
    argv = ["analyze", files[name], "--out", out, "--no-figures"]
    meta = [] if name.startswith("backwards") else META
    code, _, err = _run(capsys, [*argv, *meta])
    assert code == 0, err
    lines = err.strip().splitlines()
    assert all(line.startswith("beatlab: warning: ") for line in lines), err
    for text in warned:
        assert any(text in line for line in lines), err
    # never a library's own words (numpy's "Mean of empty slice", "All-NaN slice", ...)
    for library in ("slice", "RuntimeWarning", "invalid value", "encountered"):
        assert library not in err
    summary = json.loads((out / "summary.json").read_text())
    assert not [w for w in summary["warnings"] if "RuntimeWarning" in w]
    if name == "constant":
        assert summary["beat_count"] == 0 and summary["rhythm"] == "quiescent"
    if name == "few_nan":
        assert summary["beat_count"] >= 1


def test_reconstruct_needs_no_frame_rate_and_takes_the_file_wavelength(files, tmp_path, capsys):
    # a plain array of holograms: no frame rate anywhere, and none is invented
    out = tmp_path / "opd.ome.tif"
    code, _, err = _run(capsys, ["reconstruct", files["holo_npy"], *HOLO_META, "--out", out])
    assert code == 0, err
    with tifffile.TiffFile(out) as tif:
        assert "TimeIncrement" not in tif.ome_metadata
        assert tif.series[0].shape[0] == 20
        opd_shape = tif.series[0].shape[1:]
    # the OME-TIFF records its wavelength and pixel size: no flag needed
    out2 = tmp_path / "opd2.ome.tif"
    code, _, err = _run(capsys, ["reconstruct", files["holo"], "--out", out2])
    assert code == 0, err
    with tifffile.TiffFile(out2) as tif:
        assert 'TimeIncrement="0.05"' in tif.ome_metadata
        assert "632.8" in tif.ome_metadata
    # one hologram reconstructs into one OPD frame
    out3 = tmp_path / "one.ome.tif"
    code, _, err = _run(capsys, ["reconstruct", files["holo_single"], *HOLO_META, "--out", out3])
    assert code == 0, err
    assert tifffile.imread(out3).shape == opd_shape


def test_out_naming_an_existing_file_is_refused_before_any_work(
    files, tmp_path, capsys, monkeypatch
):
    import beatlab.pipeline

    def never(*args, **kwargs):
        raise AssertionError("the analysis started")

    monkeypatch.setattr(beatlab.pipeline, "open_source", never)
    existing = tmp_path / "results.txt"
    existing.write_text("keep me")
    code, _, err = _run(capsys, ["analyze", files["opd"], "--out", existing])
    _assert_one_error_line(code, err, "is an existing file, not a folder; pass --out DIR")
    code, _, err = _run(capsys, ["analyze", files["opd"], "--out", existing / "sub"])
    _assert_one_error_line(code, err, "is inside file")
    assert existing.read_text() == "keep me"
    code, _, err = _run(capsys, ["reconstruct", files["holo"], "--out", tmp_path])
    _assert_one_error_line(code, err, "is a folder; pass --out FILE")


def test_unwritable_out_is_refused_before_any_work(files, tmp_path, capsys):
    parent = tmp_path / "read_only"
    parent.mkdir()
    parent.chmod(stat.S_IRUSR | stat.S_IXUSR)
    try:
        if os.access(parent, os.W_OK):
            pytest.skip("this user (root) can write into a read-only folder")
        code, _, err = _run(capsys, ["analyze", files["opd"], "--out", parent / "res"])
        _assert_one_error_line(code, err, "no permission to write")
        code, _, err = _run(
            capsys, ["reconstruct", files["holo"], "--out", parent / "opd.ome.tif"]
        )
        _assert_one_error_line(code, err, "no permission to write")
        assert list(parent.iterdir()) == []
    finally:
        parent.chmod(stat.S_IRWXU)


def test_unexpected_failure_exits_1_in_one_line(files, tmp_path, capsys, monkeypatch):
    import beatlab.pipeline

    def broken(*args, **kwargs):
        raise RuntimeError("simulated fault in the per-frame pass")

    monkeypatch.setattr(beatlab.pipeline, "measure_frames", broken)
    out = tmp_path / "out"
    code, _, err = _run(capsys, ["analyze", files["opd"], "--out", out])
    assert code == 1
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err
    assert lines[0].startswith("beatlab: error: unexpected RuntimeError: simulated fault")
    assert "--debug" in lines[0]
    assert not out.exists()


@pytest.mark.parametrize("where", ["before", "after"])
def test_debug_is_accepted_before_and_after_the_command(files, tmp_path, capsys, where):
    argv = ["analyze", files["missing"], "--out", tmp_path / "out"]
    argv = ["--debug", *argv] if where == "before" else [*argv, "--debug"]
    with pytest.raises(InputError, match="no such file"):  # --debug: the traceback
        main([str(a) for a in argv])


@pytest.mark.parametrize("umask", [0o022, 0o077])
def test_outputs_keep_the_umask_permissions(tmp_path, umask):
    old = os.umask(umask)
    try:
        json_path = write_json(tmp_path / "a" / "x.json", {"a": 1})
        tif_path = write_ome_tiff(
            tmp_path / "a" / "x.ome.tif", np.zeros((2, 8, 8), np.float32), fps=1, pixel_size_um=1
        )
    finally:
        os.umask(old)
    for path in (json_path, tif_path):
        assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~umask


def _subprocess(code_or_args, *, cwd):
    argv = code_or_args if isinstance(code_or_args, list) else ["-c", code_or_args]
    return subprocess.run(
        [sys.executable, *argv], capture_output=True, text=True, timeout=300, cwd=cwd
    )


def test_real_process_exit_2_one_line(files, tmp_path):
    res = _subprocess(
        ["-m", "beatlab", "analyze", str(files["plain"]), "--out", str(tmp_path / "o")],
        cwd=os.getcwd(),
    )
    assert res.returncode == 2
    assert res.stderr.splitlines() == [
        f"beatlab: error: {files['plain']}: the frame rate and sample-plane pixel size are "
        "unknown (.npy files hold no metadata); pass --fps HZ and --pixel-size-um UM"
    ]


def test_real_process_exit_1_without_traceback(files, tmp_path):
    script = textwrap.dedent(
        f"""
        import sys
        import beatlab.pipeline
        def broken(*args, **kwargs):
            raise RuntimeError("simulated fault")
        beatlab.pipeline.prepare_reference = broken
        from beatlab.cli import main
        sys.exit(main(["analyze", {str(files["opd"])!r}, "--out", {str(tmp_path / "o")!r}]))
        """
    )
    res = _subprocess(script, cwd=os.getcwd())
    assert res.returncode == 1
    assert "Traceback" not in res.stderr
    assert res.stderr.splitlines() == [
        "beatlab: error: unexpected RuntimeError: simulated fault (rerun with --debug for the "
        "traceback and report it)"
    ]
    assert not (tmp_path / "o").exists()


# --- batch layouts -----------------------------------------------------------------------

_LAYOUTS = {
    "no path column": ("well,role\nA1,vehicle\n", "path"),
    "missing file": ("path,well\nnowhere.tif,A1\n", "nowhere.tif"),
    "duplicate rows": ("path,well\nrec.npy,A1\nrec.npy,A1\n", "row 3"),
    "bad concentration": ("path,well,compound,concentration,unit\nrec.npy,A1,X,lots,uM\n",
                          "concentration"),
    "unknown role": ("path,well,role\nrec.npy,A1,spectator\n", "role"),
}  # fmt: skip


@pytest.mark.parametrize("case", sorted(_LAYOUTS))
def test_bad_layout(tmp_path, capsys, case):
    # every problem of a layout is reported before any work: exit 2, the error names the
    # spreadsheet row and column of each problem, no traceback, no output folder
    text, needle = _LAYOUTS[case]
    np.save(tmp_path / "rec.npy", np.zeros((20, 16, 16), np.float32))
    layout = tmp_path / "plate.csv"
    layout.write_text(text, encoding="utf-8")
    code, out, err = _run(capsys, ["batch", layout, "--out", tmp_path / "out"])
    assert code == 2 and out == "", err
    assert err.startswith("beatlab: error: ") and needle in err, err
    assert "Traceback" not in err
    assert not (tmp_path / "out").exists()
