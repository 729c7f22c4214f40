"""The figures of one recording: each draws its data, where it was measured, and says so."""

import dataclasses
import warnings

import matplotlib
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import pytest
from matplotlib.image import AxesImage

from beatlab.errors import BeatlabWarning, ConfigError, InputError
from beatlab.plots import (
    FIGURES,
    PLOTTED_SUFFIX,
    plot_average_beat,
    plot_maps,
    plot_poincare,
    plot_regions,
    plot_trace_panels,
    poincare_sd,
    save_recording_figures,
    tabulate_average_beat,
    tabulate_maps,
    tabulate_poincare,
    tabulate_regions,
    tabulate_trace,
)
from beatlab.plots.maps import delay_region, map_geometry
from beatlab.plots.regions import region_colour
from beatlab.plots.style import (
    PLOTTED_COLUMNS,
    RC,
    REGION_COLOURS,
    apply_style,
    axis_label,
    concat_rows,
    message_panel,
    plotted_rows,
)
from beatlab.plots.trace import LANDMARK_LEVEL
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import analyze_here, as_recording


def _analyze(**kwargs):
    with warnings.catch_warnings():
        # e.g. "2 regions beat on their own": kept in summary["warnings"], not tested here
        warnings.simplefilter("ignore", BeatlabWarning)
        return analyze_here(as_recording(simulate_recording(**kwargs)))


@pytest.fixture(scope="module")
def ead():
    # 4 beats at 50 bpm, beats 2 and 4 with an after-contraction bump (secondary peaks)
    return _analyze(
        duration_s=5, fps=25, shape_px=(96, 96), rate_bpm=50, ead_beats=[1, 3],
        ead_shape="bump", rng=3,
    )  # fmt: skip


@pytest.fixture(scope="module")
def two():
    # two clusters at their own rates: 2 regions, an irregular whole-field rhythm
    return _analyze(
        duration_s=6, fps=20, shape_px=(112, 112), n_clusters=2, cluster_rates_bpm=[50, 80],
        rng=4,
    )  # fmt: skip


@pytest.fixture(scope="module")
def quiet():
    return _analyze(duration_s=3, fps=20, shape_px=(64, 64), beat_times_s=[], rng=5)


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def _by_gid(ax, gid):
    return [a for a in ax.get_children() if a.get_gid() == gid]


def _line(ax, gid):
    (line,) = [ln for ln in ax.get_lines() if ln.get_gid() == gid]
    return np.asarray(line.get_xdata(), float), np.asarray(line.get_ydata(), float)


def _title(ax):
    """The title wherever the rc parameters put it (the house style puts it on the left)."""
    return "".join(ax.get_title(loc) for loc in ("left", "center", "right"))


def _texts(fig):
    return [t.get_text() for ax in fig.axes for t in ax.texts]


def _data_axes(fig):
    return [ax for ax in fig.axes if ax.get_label() != "<colorbar>"]


# ---------------------------------------------------------------- trace


def test_trace_panels_draw_the_traces_and_the_measured_landmarks(ead):
    assert ead.beats["secondary_peak"].sum() == 2  # the scenario holds what is tested
    fig = plot_trace_panels(ead)
    top, middle, bottom = _data_axes(fig)
    for ax, column in ((top, "displacement_um"), (middle, "opd_change_nm"),
                       (bottom, "velocity_um_s")):  # fmt: skip
        x, y = _line(ax, "trace")
        np.testing.assert_array_equal(x, ead.trace["time_s"])
        np.testing.assert_array_equal(y, ead.trace[column])
    beats = ead.beats
    # peaks at the measured peak time and value, which lie above the straight lines between
    # frames at 25 fps: the check can tell the two apart
    px, py = _line(top, "peak")
    np.testing.assert_array_equal(px, beats["peak_s"])
    np.testing.assert_array_equal(py, beats["peak_um"])
    on_lines = np.interp(beats["peak_s"], ead.trace["time_s"], ead.trace["displacement_um"])
    assert np.max(np.abs(py - on_lines)) > 1e-4
    level = beats["baseline_um"] + LANDMARK_LEVEL * beats["displacement_um"]
    ox, oy = _line(top, "onset")
    np.testing.assert_array_equal(ox, beats["onset_s"])
    np.testing.assert_allclose(oy, level)
    ex, ey = _line(top, "end")
    ok = beats["end_s"].notna().to_numpy()
    np.testing.assert_array_equal(ex, beats["end_s"][ok])
    np.testing.assert_allclose(ey, level[ok])
    flagged = beats[beats["secondary_peak"]]
    sx, _ = _line(top, "secondary_peak")
    np.testing.assert_array_equal(sx, flagged["secondary_peak_s"])
    spans = _by_gid(top, "secondary_peak_beat")
    assert len(spans) == 2
    starts = sorted(s.get_x() for s in spans)
    np.testing.assert_allclose(starts, flagged["onset_s"])
    # velocity panel smaller than the others; legend names the flagged beats
    heights = [ax.get_position().height for ax in (top, middle, bottom)]
    assert heights[2] < heights[1] < heights[0]
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "secondary peak (EAD-like)" in legend and "beat with secondary peak" in legend
    title = fig.get_suptitle()
    assert "simulated" in title and "4 beats" in title
    assert f"{ead.summary['beat_rate_bpm']:.1f} bpm" in title
    assert f"rhythm {ead.summary['rhythm']}" in title


def test_trace_shades_irregular_intervals_from_peak_to_peak(two):
    beats = two.beats
    irregular = beats["irregular"].fillna(False).to_numpy(bool)
    assert irregular.sum() >= 1
    fig = plot_trace_panels(two)
    top = _data_axes(fig)[0]
    spans = sorted(_by_gid(top, "irregular_interval"), key=lambda s: s.get_x())
    k = np.flatnonzero(irregular)
    assert len(spans) == k.size
    peak = beats["peak_s"].to_numpy()
    np.testing.assert_allclose([s.get_x() for s in spans], peak[k - 1])
    np.testing.assert_allclose([s.get_x() + s.get_width() for s in spans], peak[k])
    assert "irregular interval" in [t.get_text() for t in fig.legends[0].get_texts()]
    assert "mixes 2 regions that beat on their own" in fig.get_suptitle()


def test_trace_without_beats_says_so_once_with_a_sane_scale(quiet):
    fig = plot_trace_panels(quiet)
    assert _texts(fig).count("no beats detected") == 1
    assert "no beats detected" in fig.get_suptitle()
    top = _data_axes(fig)[0]
    low, high = top.get_ylim()
    assert high - low >= 0.1 - 1e-12  # noise is not blown up to look like beats
    assert not fig.legends


def test_tabulate_trace_lists_what_is_drawn(ead):
    table = tabulate_trace(ead.trace, ead.beats)
    assert tuple(table.columns) == PLOTTED_COLUMNS
    peaks = table[(table["panel"] == "displacement") & (table["series"] == "peak")]
    np.testing.assert_array_equal(peaks["y"], ead.beats["peak_um"])
    np.testing.assert_array_equal(peaks["item"], ead.beats["beat"])
    velocity = table[(table["panel"] == "velocity") & (table["series"] == "trace")]
    np.testing.assert_array_equal(velocity["y"], ead.trace["velocity_um_s"])
    assert set(velocity["y_unit"]) == {"um/s"}


# ---------------------------------------------------------------- average beat


def test_average_beat_draws_mean_and_sd_band_with_the_median_intervals(ead):
    avg, beats = ead.average_beat, ead.beats
    ax = plot_average_beat(avg, beats)
    x, y = _line(ax, "mean")
    np.testing.assert_allclose(x, avg["time_s"] * 1e3)
    np.testing.assert_array_equal(y, avg["displacement_um_mean"])
    (band,) = _by_gid(ax, "sd_band")
    vertices = band.get_paths()[0].vertices
    mean, sd = avg["displacement_um_mean"].to_numpy(), avg["displacement_um_sd"].to_numpy()
    for t_ms, m, s in zip(avg["time_s"] * 1e3, mean, sd, strict=True):
        at = vertices[np.isclose(vertices[:, 0], t_ms), 1]
        np.testing.assert_allclose([at.min(), at.max()], [m - s, m + s])
    ttp = beats["time_to_peak_s"].median()
    for gid, column in (("time_to_peak", None), ("relax_50", "relax_50_s"),
                        ("relax_90", "relax_90_s")):  # fmt: skip
        (arrow,) = _by_gid(ax, gid)
        stop = ttp if column is None else ttp + beats[column].median()
        assert arrow.xy[0] == pytest.approx(stop * 1e3)
        length = ttp if column is None else beats[column].median()
        (label,) = _by_gid(ax, f"{gid}_label")
        assert f"{length * 1e3:.0f} ms" in label.get_text()
    assert f"mean of {len(beats)} beats" in _title(ax)
    assert ax.get_xlabel() == "time from onset (ms)"


def test_average_beat_without_beats_is_a_text_panel(quiet):
    ax = plot_average_beat(quiet.average_beat, quiet.beats)
    assert any("no beats detected" in t.get_text() for t in ax.texts)
    assert not ax.get_lines() and not ax.get_xticks().size
    assert tabulate_average_beat(quiet.average_beat, quiet.beats).empty


# ---------------------------------------------------------------- Poincaré


def test_poincare_sd_follows_the_published_definitions():
    rng = np.random.default_rng(0)
    ibi = 0.8 + 0.05 * rng.standard_normal(400)
    sd1, sd2 = poincare_sd(ibi)
    x, y = ibi[:-1], ibi[1:]
    # Brennan, Palaniswami & Kamen 2001, IEEE TBME 48:1342: SD1 = SDSD / sqrt 2 and
    # SD1^2 + SD2^2 = var(x_n) + var(x_n+1) (ddof 1 throughout)
    assert sd1 == pytest.approx(np.std(np.diff(ibi), ddof=1) / np.sqrt(2), rel=1e-12)
    assert sd1**2 + sd2**2 == pytest.approx(np.var(x, ddof=1) + np.var(y, ddof=1), rel=1e-12)
    # the same paper's shortcut SD2^2 = 2 SDNN^2 - SD1^2 agrees on a long series
    shortcut = np.sqrt(2 * np.var(ibi, ddof=1) - np.var(np.diff(ibi), ddof=1) / 2)
    assert sd2 == pytest.approx(shortcut, rel=0.02)
    assert np.isnan(poincare_sd([0.8, 0.9])).all()


def test_poincare_plot_draws_successive_pairs_with_sd_in_the_legend(two):
    ibi = two.beats["ibi_s"].to_numpy(float)
    ax = plot_poincare(two.beats["ibi_s"])
    x, y = _line(ax, "pairs")
    np.testing.assert_allclose(x, ibi[1:-1] * 1e3)
    np.testing.assert_allclose(y, ibi[2:] * 1e3)
    # the same SD1/SD2 as summary.json (whole-field trace)
    sd1_ms, sd2_ms = two.summary["sd1_s"] * 1e3, two.summary["sd2_s"] * 1e3
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert f"SD1 {sd1_ms:.1f} ms" in legend and f"SD2 {sd2_ms:.1f} ms" in legend
    sx, sy = _line(ax, "sd1_axis")
    assert np.hypot(np.diff(sx), np.diff(sy))[0] == pytest.approx(sd1_ms)
    ix, iy = _line(ax, "identity")
    np.testing.assert_array_equal(ix, iy)
    assert ax.get_xlim() == ax.get_ylim() and ax.get_aspect() == 1.0
    assert ax.get_xlabel().endswith("(ms)") and ax.get_ylabel().endswith("(ms)")


def test_poincare_scale_does_not_magnify_a_regular_rhythm():
    table = tabulate_poincare([1.0, 1.001, 0.999, 1.0005, 1.0])
    ident = table[table["series"] == "identity"]
    assert np.ptp(ident["x"]) >= 0.2 * 1000  # at least 20 % of the mean interval


def test_poincare_with_fewer_than_3_intervals_is_a_text_panel():
    ax = plot_poincare([np.nan, 0.8, 0.82])
    assert any("needs at least 3" in t.get_text() for t in ax.texts)
    assert not ax.get_lines()


# ---------------------------------------------------------------- maps


def test_map_geometry_matches_the_pipeline_tiles(ead):
    from beatlab.signals.maps import tile_labels

    geometry = map_geometry(ead)
    assert geometry.tile_px == 16 and geometry.grid == (6, 6)  # 8 um tiles at 0.5 um/px
    np.testing.assert_array_equal(
        geometry.tile_index(), tile_labels(ead.mask.shape, tile_px=geometry.tile_px)
    )
    assert geometry.field_extent_um == (0.0, 48.0, 48.0, 0.0)
    wrong = dataclasses.replace(ead, mask=np.ones((200, 7), bool))
    with pytest.raises(InputError, match="does not tile"):
        map_geometry(wrong)


def test_unresolved_propagation_draws_no_delay_colours(ead):
    assert not ead.summary["propagation"]["resolved"]
    fig = plot_maps(ead)
    template, amplitude, delay = _data_axes(fig)
    assert not [a for a in delay.get_children() if isinstance(a, AxesImage)]
    assert any("propagation not resolved" in " ".join(t.get_text().split()) for t in delay.texts)
    colorbars = [ax for ax in fig.axes if ax.get_label() == "<colorbar>"]
    assert len(colorbars) == 2  # template and displacement only
    # the text panel has the frame's shape: its title lines up with the map panels' titles
    fig.canvas.draw()
    tops = [ax.title.get_window_extent().y0 for ax in (template, amplitude, delay)]
    assert max(tops) - min(tops) < 2.0  # display px
    (image,) = _by_gid(amplitude, "amplitude")
    beating = ead.maps["beating"]
    expected = np.where(beating, ead.maps["peak_displacement_um"], np.nan)
    np.testing.assert_array_equal(image.get_array().filled(np.nan), expected)
    assert image.get_clim()[0] == 0.0
    assert image.get_extent() == list(map_geometry(ead).grid_extent_um)
    assert template.get_xlabel() == "x (µm)" and template.get_ylabel() == "y (µm)"
    assert tabulate_maps(ead)["panel"].eq("onset_delay").sum() == 0


def _with_delays(analysis, delay_s, *, direction_deg=90.0, speed_cm_s=5.0):
    propagation = {**analysis.maps["propagation"], "resolved": True, "reason": "resolved",
                   "direction_deg": direction_deg, "speed_cm_s": speed_cm_s}  # fmt: skip
    maps = {**analysis.maps, "onset_delay_s": delay_s, "propagation": propagation}
    return dataclasses.replace(analysis, maps=maps)


def test_resolved_propagation_draws_the_delays_and_the_arrow(ead):
    grid = ead.maps["onset_delay_s"].shape
    rows = np.arange(grid[0], dtype=float)[:, None] * np.ones(grid)
    delay = np.where(ead.maps["beating"], 0.02 * rows, np.nan)  # later down the rows
    analysis = _with_delays(ead, delay, direction_deg=90.0)
    fig = plot_maps(analysis)
    panel = _data_axes(fig)[2]
    (image,) = _by_gid(panel, "delay")
    np.testing.assert_allclose(image.get_array().filled(np.nan), delay * 1e3)
    (arrow,) = _by_gid(panel, "arrow")
    (x1, y1), (x0, y0) = arrow.xy, arrow.xyann
    assert x1 == pytest.approx(x0) and y1 > y0  # 90 deg: down the rows, as drawn
    assert "5 cm/s" in _title(panel) and "90°" in _title(panel)


def test_two_regions_show_delays_only_within_the_largest_beating_region(two):
    grid = two.maps["onset_delay_s"].shape
    cols = np.ones(grid) * np.arange(grid[1], dtype=float)[None, :]
    delay = np.where(two.maps["beating"], 0.1 * cols, np.nan)  # spans many frame intervals
    analysis = _with_delays(two, delay)
    region, tiles = delay_region(analysis)
    regions = two.regions[two.regions["beat_count"] >= 2]
    assert region == int(regions.sort_values("area_um2", ascending=False)["region"].iloc[0])
    # every drawn tile's labelled pixels are mostly that region's
    geometry = map_geometry(two)
    index = geometry.tile_index()
    for t in np.flatnonzero(tiles.ravel()):
        labels = two.region_labels[(index == t) & (two.region_labels > 0)]
        assert np.mean(labels == region) >= 0.5
    fig = plot_maps(analysis)
    panel = _data_axes(fig)[2]
    (image,) = _by_gid(panel, "delay")
    drawn = np.isfinite(image.get_array().filled(np.nan))
    assert drawn.any() and not (drawn & ~tiles).any()
    assert (np.isfinite(delay) & ~tiles).any()  # the other region had delays to hide
    assert not _by_gid(panel, "arrow")
    assert f"region {region} only" in _title(panel)


def test_delays_within_a_region_below_two_frames_are_not_drawn(two):
    grid = two.maps["onset_delay_s"].shape
    cols = np.ones(grid) * np.arange(grid[1], dtype=float)[None, :]
    # a 1 ms step per tile: far less than 2 frame intervals (100 ms at 20 fps) in a region
    analysis = _with_delays(two, np.where(two.maps["beating"], 0.001 * cols, np.nan))
    fig = plot_maps(analysis)
    panel = _data_axes(fig)[2]
    assert not _by_gid(panel, "delay")
    assert any("not resolved" in " ".join(t.get_text().split()) for t in panel.texts)
    assert tabulate_maps(analysis)["panel"].eq("onset_delay").sum() == 0


def test_maps_without_beats_have_no_empty_colour_bars(quiet):
    fig = plot_maps(quiet)
    assert len([ax for ax in fig.axes if ax.get_label() == "<colorbar>"]) == 1  # template
    assert sum("no beats detected" in t for t in _texts(fig)) == 2
    assert tabulate_maps(quiet).empty


# ---------------------------------------------------------------- regions


def test_regions_figure_numbers_each_region_and_draws_its_own_trace(two):
    fig = plot_regions(two)
    label_ax, *trace_axes = fig.axes
    (labels,) = _by_gid(label_ax, "region_labels")
    np.testing.assert_array_equal(labels.get_array().filled(0), two.region_labels)
    numbers = sorted(_by_gid(label_ax, "region_number"), key=lambda t: t.get_text())
    for text, row in zip(numbers, two.regions.sort_values("region").itertuples(), strict=True):
        assert text.get_text() == str(row.region)
        assert text.get_position() == pytest.approx((row.centroid_x_um, row.centroid_y_um))
    assert len(trace_axes) == len(two.regions) == 2
    for ax, row in zip(trace_axes, two.regions.itertuples(), strict=True):
        own = two.region_traces[two.region_traces["region"] == row.region]
        x, y = _line(ax, "trace")
        np.testing.assert_array_equal(x, own["time_s"])
        np.testing.assert_array_equal(y, own["displacement_um"])
        beats = two.region_beats[two.region_beats["region"] == row.region]
        px, py = _line(ax, "peak")
        np.testing.assert_array_equal(px, beats["peak_s"])
        np.testing.assert_array_equal(py, beats["peak_um"])
        assert f"region {row.region}: {row.beat_rate_bpm:.1f} bpm" in _title(ax)
    assert trace_axes[0].get_ylim() == trace_axes[1].get_ylim()  # amplitudes compare


def test_one_region_is_a_single_panel(ead):
    fig = plot_regions(ead)
    assert len(fig.axes) == 1
    assert _title(fig.axes[0]).startswith("region 1: ")
    assert set(tabulate_regions(ead)["panel"]) == {"labels"}


def test_region_colours_differ_and_cycle():
    assert region_colour(1) != region_colour(2)
    assert region_colour(1 + len(REGION_COLOURS)) == region_colour(1)


# ---------------------------------------------------------------- writer and style


def test_save_recording_figures_writes_each_figure_and_what_it_plots(ead, tmp_path):
    paths = save_recording_figures(ead, tmp_path, formats=("png",))
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        [f"{n}.png" for n in FIGURES] + [f"{n}{PLOTTED_SUFFIX}" for n in FIGURES]
    )
    from PIL import Image

    for name, figure in FIGURES.items():
        png = paths[f"{name}_png"]
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        with Image.open(png) as image:
            assert image.info["dpi"] == pytest.approx((300, 300), abs=0.1)
            # saved at the designed size in inches (not trimmed), the layout kept inside it
            width_in, height_in = figure.size(ead)
            assert image.size == (round(300 * width_in), round(300 * height_in))
        back = pd.read_csv(paths[f"{name}_plotted"], keep_default_na=False, na_values=[""])
        expected = figure.tabulate(ead)
        assert tuple(back.columns) == PLOTTED_COLUMNS
        for column in ("x", "y", "value"):
            np.testing.assert_array_equal(back[column].to_numpy(float), expected[column])
        for column in ("panel", "series", "x_unit"):
            assert back[column].astype(str).tolist() == expected[column].tolist()
    with pytest.raises(ConfigError, match="not supported"):
        save_recording_figures(ead, tmp_path, formats=("gif",))


def test_figures_drawn_in_forked_workers_are_the_same_files(ead, tmp_path):
    one, two = tmp_path / "one", tmp_path / "two"
    paths = save_recording_figures(ead, one, formats=("png",), workers=1)
    assert save_recording_figures(ead, two, formats=("png",), workers=2).keys() == paths.keys()
    names = sorted(p.name for p in one.iterdir())
    assert names == sorted(p.name for p in two.iterdir())
    for name in names:  # byte-identical: same drawing code, same data, only another process
        assert (one / name).read_bytes() == (two / name).read_bytes(), name


def test_style_helpers():
    assert axis_label("time", "s") == "time (s)"
    assert axis_label("displacement", "um") == "displacement (µm)"
    assert axis_label("ratio", "1") == "ratio"
    rows = plotted_rows("p", "s", x=[1, 2], y=[3, 4], x_unit="s", y_unit="um")
    assert tuple(rows.columns) == PLOTTED_COLUMNS
    assert rows["y"].tolist() == [3.0, 4.0] and rows["value"].isna().all()
    assert len(concat_rows([rows, rows])) == 4
    assert concat_rows([]).empty and tuple(concat_rows([]).columns) == PLOTTED_COLUMNS
    ax = plt.figure().add_subplot()
    text = message_panel(ax, "nothing here")
    assert text.get_text() == "nothing here" and not ax.get_xticks().size
    assert RC["savefig.dpi"] == 300
    apply_style(matplotlib)
    assert matplotlib.rcParams["savefig.dpi"] == 300


def test_image_panels_keep_their_data_pixels_in_vector_output(ead, tmp_path):
    """Maps and region images are drawn without interpolation ('none'): the PNG shows each
    data pixel as a block (as 'nearest' does), and the SVG embeds the data at its own size
    with pixelated rendering instead of a copy resampled to 300 dpi."""
    import re

    for name in ("maps", "regions"):
        fig = plt.figure(figsize=FIGURES[name].size(ead))
        FIGURES[name].draw(ead, fig)
        images = [a for ax in fig.axes for a in ax.get_children() if isinstance(a, AxesImage)]
        assert images and {im.get_interpolation() for im in images} == {"none"}, name
        plt.close(fig)
    paths = save_recording_figures(ead, tmp_path, formats=("svg",), workers=1)
    svg = paths["maps_svg"].read_text()
    assert "image-rendering:pixelated" in svg
    from base64 import b64decode
    from io import BytesIO

    from PIL import Image

    embedded = [
        Image.open(BytesIO(b64decode("".join(data.split())))).size
        for data in re.findall(r"data:image/png;base64,\s*([A-Za-z0-9+/=\s]+)", svg)
    ]
    ny, nx = ead.template.shape
    assert (nx, ny) in embedded  # the rest template at its own pixels, not at 300 dpi
