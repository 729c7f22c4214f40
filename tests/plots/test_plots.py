import numpy as np
import pandas as pd

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
    lines = {line.get_label(): line for line in ax.get_lines()}
    assert len(lines["peak"].get_xdata()) == 4
    assert list(lines["secondary peak (EAD-like)"].get_xdata()) == [1.6]
    assert ax.get_xlabel() == "time (s)" and "µm" in ax.get_ylabel()
    assert "60.0 bpm" in ax.get_title()


def test_save_figure_writes_png_and_svg(tmp_path):
    trace, beats = _data()
    path = save_figure(lambda ax: plot_trace(trace, beats, ax=ax), tmp_path / "t.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (tmp_path / "t.svg").read_text().lstrip().startswith("<?xml")


def test_plot_maps_three_panels():
    maps = {
        "peak_displacement_um": np.ones((4, 4)),
        "onset_delay_s": np.zeros((4, 4)),
        "beating_area_fraction": 0.5,
        "propagation": {"resolved": True, "speed_cm_s": 12.0, "direction_deg": 30.0},
    }
    template = np.zeros((32, 32))
    template[8:24, 8:24] = 100
    fig = plot_maps(maps, template, template > 0, pixel_size_um=0.5)
    titles = [ax.get_title() for ax in fig.axes if ax.get_title()]
    assert "12.0 cm/s at 30°" in titles and "beating area 50 %" in titles
