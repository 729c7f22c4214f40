from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from beatlab.plots import save_figure
from beatlab.plots.maps import plot_maps
from beatlab.plots.trace import plot_trace


def _data():
    t = np.arange(0, 4, 0.02)
    y = np.exp(-((((t % 1) - 0.5) / 0.08) ** 2))
    trace = pd.DataFrame({"time_s": t, "displacement_um": y})
    beats = pd.DataFrame(
        {
            "onset_s": [0.35, 1.35, 2.35, 3.35],
            "peak_s": [0.5, 1.5, 2.5, 3.5],
            "end_s": [0.65, 1.65, 2.65, 3.65],
            "secondary_peak": [False, True, False, False],
            "secondary_peak_s": [np.nan, 1.6, np.nan, np.nan],
        }
    )
    return trace, beats


def test_plot_trace_marks_every_beat():
    trace, beats = _data()
    ax = plot_trace(trace, beats)
    lines = {line.get_gid(): line for line in ax.get_lines()}
    assert list(lines["peak"].get_xdata()) == [0.5, 1.5, 2.5, 3.5]
    # without peak_um in the table the peaks are marked on the drawn curve
    np.testing.assert_allclose(lines["peak"].get_ydata(), 1.0)
    assert list(lines["secondary_peak"].get_xdata()) == [1.6]
    assert lines["secondary_peak"].get_label() == "secondary peak (EAD-like)"
    assert ax.get_xlabel() == "time (s)" and "µm" in ax.get_ylabel()
    assert "60.0 bpm" in ax.get_title("left") + ax.get_title("center")


def test_save_figure_writes_png_and_svg(tmp_path):
    trace, beats = _data()
    path = save_figure(lambda ax: plot_trace(trace, beats, ax=ax), tmp_path / "t.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (tmp_path / "t.svg").read_text().lstrip().startswith("<?xml")


def test_plot_maps_three_panels():
    # one region, a resolved wave: the delay map is drawn with its speed and direction
    maps = {
        "peak_displacement_um": np.ones((4, 4)),
        "onset_delay_s": np.tile(np.arange(4) * 0.05, (4, 1)),
        "beating": np.ones((4, 4), bool),
        "assessed": np.ones((4, 4), bool),
        "beating_area_fraction": 0.5,
        "propagation": {"resolved": True, "speed_cm_s": 12.0, "direction_deg": 30.0},
    }
    template = np.zeros((32, 32))
    template[8:24, 8:24] = 100
    analysis = SimpleNamespace(
        maps=maps,
        template=template,
        mask=template > 0,
        beats=pd.DataFrame({"peak_s": [1.0]}),
        regions=pd.DataFrame({"region": [1], "area_um2": [64.0], "beat_count": [1]}),
        region_labels=(template > 0).astype(int),
        summary={
            "metadata": {"analysis_pixel_size_um": 0.5, "fps": 100.0},
            "parameters": {"maps": {"tile_um": 4.0}},
        },
    )
    fig = plot_maps(analysis)
    titles = " | ".join(ax.get_title(loc) for ax in fig.axes for loc in ("left", "center"))
    assert "12 cm/s towards 30°" in titles and "beating area 50 %" in titles
    assert all(ax.get_xlabel() == "x (µm)" for ax in fig.axes[::2][:3] if ax.get_xlabel())


def test_drawing_a_recording_does_not_import_the_batch_or_the_analysis():
    # The figure process of ``beatlab analyze`` imports these while the analysis runs on the
    # other core: pulling in the batch runner, scipy.stats or the analysis stages there cost
    # 1.4 s of CPU (measured), so the package namespaces load their modules when first used.
    import subprocess
    import sys

    code = (
        "import sys; import beatlab.plots.recording, beatlab.report.recording, "
        "beatlab._figure_process as f; f._load(); "
        "heavy = ['beatlab.batch.runner', 'scipy.stats', 'beatlab.stages', 'numba', "
        "'beatlab.pipeline']; print([m for m in heavy if m in sys.modules])"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout
    assert out.strip() == "[]"
    import beatlab.batch
    import beatlab.plots
    import beatlab.report

    # the lazy names resolve, are listed, and an unknown one is an AttributeError
    assert callable(beatlab.plots.save_batch_figures) and "plot_plate" in dir(beatlab.plots)
    assert callable(beatlab.report.build_batch_report)
    assert callable(beatlab.batch.analyze_batch) and "Layout" in dir(beatlab.batch)
    with pytest.raises(AttributeError, match="no attribute 'nope'"):
        _ = beatlab.plots.nope
