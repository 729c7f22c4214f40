"""Batch figures: each draws the right data, and the CSV beside it is what is drawn.

Tables are built by hand (the columns of wells.csv, dose_response.csv and recordings.csv of
docs/batch.md); the gallery reads trace.csv files written here into recordings/<id>/.
External check: the four-parameter logistic and its midpoint identity y(ec50) = (bottom +
top) / 2 (CHECKS.md: Hill 1910; DeLean, Munson & Rodbard 1978, Am J Physiol 235:E97).
"""

import json

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import pytest
from matplotlib.patches import Rectangle

from beatlab.errors import InputError
from beatlab.plots.batch import read_batch_table, save_batch_figures
from beatlab.plots.dose import FIT_NOTES, plot_dose_response, tabulate_dose_response
from beatlab.plots.gallery import (
    choose_representatives,
    plot_gallery,
    tabulate_gallery,
)
from beatlab.plots.groups import (
    MIN_BOX_WELLS,
    concentration_unit,
    group_colours,
    label_groups,
    metric_label,
    metric_unit,
    plot_metric_by_group,
    tabulate_metric_by_group,
)
from beatlab.plots.plate import (
    plate_geometry,
    plot_plate,
    tabulate_plate,
)
from beatlab.plots.style import GREY

FIT = {"compound": "cmpdX", "metric": "beat_rate_bpm_norm", "unit": "nM", "ec50": 3.0,
       "ec50_low": 1.5, "ec50_high": 6.0, "hill": 1.2, "bottom": 0.0, "top": 50.0, "r2": 0.9,
       "n": 13, "n_concentrations": 4, "fit": "ok", "direction": "increase"}  # fmt: skip


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def _wells() -> pd.DataFrame:
    """Plate P1: 4 vehicle wells, cmpdX at 4 concentrations x 2, one failed, one excluded;
    plate P2: one vehicle well (not on cmpdX's plate). Rows deliberately out of order."""
    rows = [
        # plate, well, role, compound, conc, status, rate, norm
        ("P1", "D4", "sample", "cmpdX", 100.0, "ok", 88.0, 46.0),
        ("P1", "A1", "vehicle", "DMSO", 0.0, "ok", 60.0, 0.0),
        ("P1", "B1", "vehicle", "DMSO", 0.0, "ok", 62.0, 3.3),
        ("P1", "C1", "vehicle", "DMSO", 0.0, "ok", 58.0, -3.3),
        ("P1", "D1", "vehicle", "DMSO", 0.0, "ok", 61.0, 1.7),
        ("P1", "A2", "sample", "cmpdX", 0.1, "ok", 61.0, 1.0),
        ("P1", "B2", "sample", "cmpdX", 0.1, "ok", 60.5, 0.8),
        ("P1", "A3", "sample", "cmpdX", 1.0, "ok", 66.0, 10.0),
        ("P1", "B3", "sample", "cmpdX", 1.0, "ok", 68.0, 13.3),
        ("P1", "C3", "sample", "cmpdX", 10.0, "ok", 80.0, 33.0),
        ("P1", "D3", "sample", "cmpdX", 10.0, "ok", 82.0, 36.0),
        ("P1", "C4", "sample", "cmpdX", 100.0, "ok", 90.0, 50.0),
        ("P1", "E5", "sample", "cmpdX", 10.0, "error", np.nan, np.nan),
        ("P1", "F6", "sample", "cmpdX", 1.0, "excluded", np.nan, np.nan),
        ("P2", "A1", "vehicle", "DMSO", 0.0, "ok", 59.0, -1.0),
    ]
    columns = ["plate", "well", "role", "compound", "concentration", "status",
               "beat_rate_bpm", "beat_rate_bpm_norm"]  # fmt: skip
    table = pd.DataFrame(rows, columns=columns)
    table["well_id"] = table["plate"] + "_" + table["well"]
    table["unit"] = "nM"
    table["timepoint"] = np.nan
    table["n_fov"] = (table["status"] == "ok").astype(int)
    table["n_fov_failed"] = (table["status"] == "error").astype(int)
    table["n_fov_excluded"] = (table["status"] == "excluded").astype(int)
    table["normalization"] = np.where(table["status"] == "ok", "vehicle", "none")
    table["baseline_timepoint"] = np.nan
    return table


def _fits(**changes) -> pd.DataFrame:
    return pd.DataFrame([FIT | changes])


def _hill_form(x, *, bottom, top, ec50, hill):
    """The 4PL as written in CHECKS.md (DeLean, Munson & Rodbard 1978), x > 0."""
    return bottom + (top - bottom) / (1.0 + (ec50 / np.asarray(x, dtype=float)) ** hill)


# --- labels and groups ---------------------------------------------------------------------


def test_metric_labels_carry_the_unit_of_each_kind_of_column():
    # docs/batch.md, Normalisation: _norm is percent except for the difference metrics
    assert metric_label("beat_rate_bpm") == "beat rate (bpm)"
    assert metric_unit("beat_rate_bpm_norm") == "%"
    assert metric_label("beat_rate_bpm_norm", normalization="vehicle").endswith("(%)")
    assert "vehicle-corrected" in metric_label("duration_90_s_norm",
                                               normalization="baseline-vehicle")  # fmt: skip
    assert metric_unit("irregular_fraction_norm") == "1"
    assert "%" not in metric_label("irregular_fraction_norm")
    assert metric_label("displacement_um_change") == (
        "displacement amplitude, change from baseline (%)"
    )
    assert metric_label("contraction_velocity_um_s") == "contraction velocity (µm/s)"
    assert concentration_unit("uM") == "µM" and concentration_unit("nM") == "nM"


def test_groups_put_the_vehicle_first_then_rising_concentration():
    groups = label_groups(_wells()).drop_duplicates("order").sort_values("order")
    assert groups["group"].tolist() == [
        "vehicle (DMSO)", "cmpdX 0.1 nM", "cmpdX 1 nM", "cmpdX 10 nM", "cmpdX 100 nM"
    ]  # fmt: skip
    assert groups["tick"].tolist() == ["vehicle", "0.1", "1", "10", "100"]
    assert groups["block"].tolist()[1:] == ["cmpdX (nM)"] * 4


def test_groups_of_a_layout_with_conditions_only():
    wells = pd.DataFrame({"condition": ["paced", "control", "paced"],
                          "role": ["sample", "vehicle", "sample"]})  # fmt: skip
    groups = label_groups(wells)
    assert groups["group"].tolist() == ["paced", "vehicle", "paced"]
    assert groups["order"].tolist() == [1, 0, 1]


def test_groups_split_by_timepoint_when_there_are_several():
    wells = _wells().iloc[[1, 5]].copy()
    wells = pd.concat([wells.assign(timepoint="pre"), wells.assign(timepoint="post")])
    labels = label_groups(wells).sort_values("order")["group"].tolist()
    assert labels == ["vehicle (DMSO) · pre", "vehicle (DMSO) · post", "cmpdX 0.1 nM · pre",
                      "cmpdX 0.1 nM · post"]  # fmt: skip


def test_group_colours_are_grey_for_the_vehicle_and_one_per_compound():
    wells = _wells().iloc[[1, 5, 7]].copy()
    wells = pd.concat([wells.assign(timepoint="pre"), wells.assign(timepoint="post"),
                       wells.iloc[[2]].assign(compound="cmpdY", timepoint="post")])  # fmt: skip
    colours = group_colours(label_groups(wells))
    assert colours["vehicle (DMSO) · pre"] == colours["vehicle (DMSO) · post"] == GREY
    assert len({colours[g] for g in colours if g.startswith("cmpdX")}) == 1
    assert colours["cmpdY 1 nM · post"] not in (GREY, colours["cmpdX 1 nM · pre"])


# --- groups figure -------------------------------------------------------------------------


def test_group_points_are_the_ok_well_values_and_the_csv_is_what_is_drawn():
    wells = _wells()
    ax = plot_metric_by_group(wells, metric="beat_rate_bpm_norm")
    table = tabulate_metric_by_group(wells, metric="beat_rate_bpm_norm")
    points = table[table["series"] == "well"]
    ok = wells[wells["status"] == "ok"]
    assert sorted(points["y"]) == sorted(ok["beat_rate_bpm_norm"])
    assert sorted(points["well_id"]) == sorted(ok["well_id"])
    drawn = np.vstack([c.get_offsets() for c in ax.collections if c.get_gid() or ""])
    expected = points[["x", "y"]].to_numpy()
    order = np.lexsort(drawn.T[::-1])
    np.testing.assert_allclose(drawn[order], expected[np.lexsort(expected.T[::-1])])
    # each point sits within its group's slot, the vehicle (order 0) first
    assert (np.abs(points["x"] - points["order"]) <= 0.18 + 1e-12).all()
    vehicle = points[points["order"] == 0]
    assert set(vehicle["well_id"]) == {"P1_A1", "P1_B1", "P1_C1", "P1_D1", "P2_A1"}
    # the same table gives the same jitter
    again = tabulate_metric_by_group(wells.sample(frac=1.0, random_state=3),
                                     metric="beat_rate_bpm_norm")  # fmt: skip
    key = ["well_id", "x", "y"]
    pd.testing.assert_frame_equal(
        again.loc[again["series"] == "well", key].sort_values("well_id").reset_index(drop=True),
        points[key].sort_values("well_id").reset_index(drop=True),
    )


def test_group_summary_is_mean_and_sd_for_few_wells_and_boxes_for_many():
    wells = _wells()
    table = tabulate_metric_by_group(wells, metric="beat_rate_bpm")
    at_10 = table[table["group"] == "cmpdX 10 nM"].set_index("series")["y"]
    assert at_10["mean"] == pytest.approx(81.0)
    assert at_10["mean_plus_sd"] - at_10["mean"] == pytest.approx(np.std([80, 82], ddof=1))
    assert "q1" not in set(table["series"])
    many = pd.concat([wells.assign(well_id=wells["well_id"] + f"_{k}") for k in range(3)])
    boxed = tabulate_metric_by_group(many, metric="beat_rate_bpm")
    assert boxed.groupby("order")["series"].apply(lambda s: (s == "well").sum()).min() >= (
        MIN_BOX_WELLS
    )
    vehicle = boxed[boxed["order"] == 0]
    values = vehicle.loc[vehicle["series"] == "well", "y"].to_numpy()
    stats = vehicle.set_index("series")["y"].drop("well")
    # numpy's linear-interpolation percentiles (reference library)
    np.testing.assert_allclose(
        [stats["q1"], stats["median"], stats["q3"]], np.percentile(values, [25, 50, 75])
    )


def test_group_figure_marks_zero_for_normalised_columns_only():
    def dashed_zero(ax):
        return any(
            line.get_linestyle() == "--" and np.allclose(line.get_ydata(), 0.0)
            for line in ax.get_lines()
        )

    wells = _wells()
    assert dashed_zero(plot_metric_by_group(wells, metric="beat_rate_bpm_norm"))
    raw = plot_metric_by_group(wells, metric="beat_rate_bpm")
    assert not dashed_zero(raw) and raw.get_ylabel() == "beat rate (bpm)"
    ticks = [t.get_text() for t in raw.get_xticklabels()]
    assert ticks[0] == "vehicle\nn=5" and ticks[1] == "0.1\nn=2"
    with pytest.raises(InputError, match="no column 'rate'"):
        plot_metric_by_group(wells, metric="rate")


# --- dose-response -------------------------------------------------------------------------


def test_dose_curve_is_the_fitted_logistic_and_ec50_sits_at_its_midpoint():
    wells, fits = _wells(), _fits()
    fig = plot_dose_response(wells, fits, metric="beat_rate_bpm_norm")
    table = tabulate_dose_response(wells, fits, metric="beat_rate_bpm_norm")
    curve = table[table["series"] == "curve"]
    params = {k: FIT[k] for k in ("bottom", "top", "ec50", "hill")}
    # DeLean, Munson & Rodbard 1978: y = bottom + (top - bottom) / (1 + (ec50 / x)^hill)
    np.testing.assert_allclose(curve["y"], _hill_form(curve["x"], **params), rtol=1e-12)
    ec50 = table[table["series"] == "ec50"].iloc[0]
    # Hill 1910 / DeLean et al. 1978 identity: y(ec50) = (bottom + top) / 2 (CHECKS.md, P)
    assert (ec50["x"], ec50["y"]) == (pytest.approx(3.0), pytest.approx(25.0))
    ci = table[table["series"] == "ec50_ci"]
    assert ci["x"].tolist() == [1.5, 6.0] and np.allclose(ci["y"], 25.0)
    right = fig.axes[1]
    assert right.get_xscale() == "log" and "nM" in right.get_xlabel()
    lines = {line.get_gid(): line for line in right.get_lines()}
    np.testing.assert_allclose(lines["curve"].get_ydata(), curve["y"])
    np.testing.assert_allclose(lines["ec50"].get_xdata(), [3.0])
    np.testing.assert_allclose(lines["ec50_ci"].get_xdata(), [1.5, 6.0])
    assert "EC50 3 nM (95 % CI 1.5–6)" in fig.subfigs[0].get_suptitle()


def test_dose_points_are_the_wells_and_the_vehicle_of_the_same_plate():
    wells = _wells()
    table = tabulate_dose_response(wells, _fits(), metric="beat_rate_bpm_norm")
    treated = table[table["series"] == "well"]
    ok = wells[(wells["status"] == "ok") & (wells["role"] == "sample")]
    assert sorted(zip(treated["x"], treated["y"], strict=True)) == sorted(
        zip(ok["concentration"], ok["beat_rate_bpm_norm"], strict=True)
    )
    vehicle = table[table["series"] == "vehicle"]
    # as dose_response_table: the vehicle wells of the plates the compound is on (not P2)
    assert sorted(vehicle["well_id"]) == ["P1_A1", "P1_B1", "P1_C1", "P1_D1"]
    assert (vehicle["x"] == 0).all()
    fig = plot_dose_response(wells, _fits(), metric="beat_rate_bpm_norm")
    left, right = fig.axes[:2]
    drawn = {c.get_gid(): c.get_offsets() for ax in (left, right) for c in ax.collections}
    np.testing.assert_allclose(np.sort(drawn["wells"][:, 1]), np.sort(treated["y"]))
    np.testing.assert_allclose(np.sort(drawn["vehicle"][:, 1]), np.sort(vehicle["y"]))


@pytest.mark.parametrize("status", ["flat response", "extrapolated", "no convergence"])
def test_a_fit_that_is_not_ok_draws_no_curve_and_says_why(status):
    fits = _fits(fit=status, ec50=np.nan, ec50_low=np.nan, ec50_high=np.nan)
    if status == "extrapolated":
        fits = _fits(fit=status, ec50=500.0, ec50_low=np.nan, ec50_high=np.nan)
    fig = plot_dose_response(_wells(), fits, metric="beat_rate_bpm_norm")
    table = tabulate_dose_response(_wells(), fits, metric="beat_rate_bpm_norm")
    assert set(table["series"]) == {"well", "vehicle"}
    gids = {line.get_gid() for ax in fig.axes for line in ax.get_lines()}
    assert not gids & {"curve", "ec50", "ec50_ci"}
    title = fig.subfigs[0].get_suptitle().replace("\n", " ")
    assert FIT_NOTES[status].split(":")[0] in title


def test_dose_figure_has_one_panel_per_compound_and_refuses_an_unknown_metric():
    fits = pd.concat([_fits(), _fits(compound="cmpdY", fit="flat response")])
    fig = plot_dose_response(_wells(), fits, metric="beat_rate_bpm_norm")
    titles = [sub.get_suptitle().split("\n")[0] for sub in fig.subfigs if sub.get_visible()]
    assert titles == ["cmpdX", "cmpdY"]
    with pytest.raises(InputError, match="no fit of 'duration_90_s_norm'"):
        plot_dose_response(_wells(), fits, metric="duration_90_s_norm")


def test_a_compound_with_too_few_concentrations_gets_no_panel_but_a_note():
    fits = pd.concat([_fits(), _fits(compound="cmpdY", fit="too few concentrations")])
    fig = plot_dose_response(_wells(), fits, metric="beat_rate_bpm_norm")
    assert [sub.get_suptitle().split("\n")[0] for sub in fig.subfigs] == ["cmpdX"]
    assert "not shown (fewer than 4 concentrations): cmpdY" in fig.texts[0].get_text()
    table = tabulate_dose_response(_wells(), fits, metric="beat_rate_bpm_norm")
    assert set(table["compound"]) == {"cmpdX"}
    only = _fits(fit="too few concentrations")
    assert tabulate_dose_response(_wells(), only, metric="beat_rate_bpm_norm").empty


# --- plate ---------------------------------------------------------------------------------


def test_plate_geometry_is_the_smallest_standard_plate():
    assert plate_geometry(["A1", "D6"]) == (4, 6)
    assert plate_geometry(["A1", "H12", "a07"]) == (8, 12)
    assert plate_geometry(["B13"]) == (16, 24)
    assert plate_geometry(["A1"], plate_format=384) == (16, 24)
    with pytest.raises(InputError, match="not a plate position"):
        plate_geometry(["well 3"])
    with pytest.raises(InputError, match="beyond a 96-well"):
        plate_geometry(["I1"], plate_format=96)


def test_plate_cells_sit_at_their_row_and_column_and_failed_wells_are_crossed():
    wells = _wells()
    ax = plot_plate(wells, metric="beat_rate_bpm", plate="P1")
    cells = tabulate_plate(wells, metric="beat_rate_bpm", plate="P1").set_index("well")
    assert len(cells) == 96  # F6 lies beyond a 24-well plate's rows A-D
    assert (cells.loc["D3", ["x", "y"]] == [3, 4]).all()  # column 3, row D = 4
    assert cells.loc["D3", "value"] == 82.0 and cells.loc["D3", "series"] == "ok"
    assert cells.loc["E5", "series"] == "failed" and np.isnan(cells.loc["E5", "value"])
    assert cells.loc["F6", "series"] == "excluded"
    assert (cells["series"] == "empty").sum() == 96 - 14
    mesh = next(c for c in ax.collections if c.get_gid() == "values")
    drawn = np.ma.filled(mesh.get_array().reshape(8, 12), np.nan)
    assert drawn[3, 2] == 82.0 and drawn[0, 0] == 60.0  # D3 and A1: row-major from A1
    assert np.isnan(drawn[4, 4])  # the failed E5 has no colour
    crosses = next(line for line in ax.get_lines() if line.get_gid() == "failed")
    assert (list(crosses.get_xdata()), list(crosses.get_ydata())) == ([5], [5])
    hatched = [p for p in ax.patches if isinstance(p, Rectangle) and p.get_gid() == "excluded"]
    assert [(p.get_x(), p.get_y()) for p in hatched] == [(5.5, 5.5)]
    assert ax.get_ylim()[0] > ax.get_ylim()[1]  # row A at the top


def test_plate_from_recordings_averages_fields_of_view_and_needs_a_plate():
    recordings = pd.DataFrame({
        "plate": "P1", "well": ["A1", "A1", "A1", "B2", "C3"], "fov": ["1", "2", "3", "1", "1"],
        "status": ["ok", "ok", "error", "error", "excluded"],
        "beat_rate_bpm": [60.0, 70.0, np.nan, np.nan, np.nan],
    })  # fmt: skip
    cells = tabulate_plate(recordings, metric="beat_rate_bpm").set_index("well")
    assert cells.loc["A1", "value"] == 65.0 and cells.loc["A1", "n_fov_failed"] == 1
    assert cells.loc["B2", "series"] == "failed" and cells.loc["C3", "series"] == "excluded"
    assert len(cells) == 24
    ax = plot_plate(recordings, metric="beat_rate_bpm")
    partly = next(line for line in ax.get_lines() if line.get_gid() == "partly failed")
    assert partly.get_xdata()[0] == pytest.approx(1.32) and partly.get_ydata()[0] < 1
    with pytest.raises(InputError, match="pass plate="):
        tabulate_plate(_wells(), metric="beat_rate_bpm")


# --- gallery -------------------------------------------------------------------------------


def _recordings() -> pd.DataFrame:
    rows = [
        ("P1_A1", "vehicle", "DMSO", 0.0, "ok", 60.0, ""),
        ("P1_A2", "vehicle", "DMSO", 0.0, "ok", 64.0, ""),
        ("P1_A3", "vehicle", "DMSO", 0.0, "ok", 70.0, ""),
        ("P1_B1", "sample", "cmpdX", 10.0, "ok", 100.0, ""),
        ("P1_B2", "sample", "cmpdX", 10.0, "ok", 90.0, "low snr"),
        ("P1_B3", "sample", "cmpdX", 10.0, "ok", 70.0, "velocity unresolved"),
        ("P1_C1", "sample", "cmpdX", 30.0, "error", np.nan, ""),
        ("P1_D1", "sample", "cmpdY", 1.0, "ok", 50.0, ""),
    ]
    table = pd.DataFrame(rows, columns=["recording_id", "role", "compound", "concentration",
                                        "status", "beat_rate_bpm", "quality_flags"])  # fmt: skip
    table["unit"] = "nM"
    return table


def test_representative_is_closest_to_the_median_rate_among_unflagged_ok_recordings():
    chosen = choose_representatives(_recordings()).set_index("group")
    # vehicle rates 60, 64, 70: median 64, itself
    assert chosen.loc["vehicle (DMSO)", "recording_id"] == "P1_A2"
    assert chosen.loc["vehicle (DMSO)", "median_rate_bpm"] == 64.0
    # cmpdX 10 nM: rates 100, 90 (low snr), 70; median 90 is flagged; of the others, 100
    # (10 away) beats 70 (20 away); velocity unresolved does not count as a flaw
    assert chosen.loc["cmpdX 10 nM", "recording_id"] == "P1_B1"
    assert chosen.loc["cmpdX 10 nM", "median_rate_bpm"] == 90.0
    assert chosen.loc["cmpdX 30 nM", "recording_id"] == ""
    assert chosen.loc["cmpdX 30 nM", "note"] == "no recording with status ok"
    assert list(chosen["order"]) == [0, 1, 2, 3]


def test_representative_ties_go_to_the_higher_snr_then_the_first_and_flags_are_noted():
    recordings = _recordings().iloc[:2].copy()  # 60 and 64: median 62, both 2 away
    assert choose_representatives(recordings)["recording_id"].tolist() == ["P1_A1"]
    recordings["quality_snr"] = [np.nan, 12.0]  # no snr (no beats found) counts lowest
    assert choose_representatives(recordings)["recording_id"].tolist() == ["P1_A2"]
    recordings = recordings.drop(columns="quality_snr")
    recordings["quality_flags"] = ["drift", "few beats; low snr"]
    chosen = choose_representatives(recordings).iloc[0]
    assert chosen["recording_id"] == "P1_A1" and chosen["note"].endswith("drift")


def _batch_folder(tmp_path, recordings=None):
    """recordings.csv and a trace.csv for each chosen recording except P1_D1 (cmpdY)."""
    recordings = _recordings() if recordings is None else recordings
    recordings.to_csv(tmp_path / "recordings.csv", index=False)
    t = np.arange(0, 8.0, 0.05)
    traces = {}
    for k, rid in enumerate(["P1_A2", "P1_B1"]):
        trace = pd.DataFrame({"time_s": t + 0.5, "displacement_um": (k + 1) * np.sin(t) ** 2,
                              "velocity_um_s": 0.0, "opd_change_nm": 0.0})  # fmt: skip
        folder = tmp_path / "recordings" / rid
        folder.mkdir(parents=True)
        trace.to_csv(folder / "trace.csv", index=False)
        traces[rid] = trace
    return traces


def test_gallery_draws_each_representative_trace_over_the_same_window(tmp_path):
    traces = _batch_folder(tmp_path)
    table = tabulate_gallery(tmp_path, seconds=3.0)
    assert list(dict.fromkeys(table["panel"])) == ["vehicle (DMSO)", "cmpdX 10 nM"]
    vehicle = table[table["recording_id"] == "P1_A2"]
    source = traces["P1_A2"]
    keep = source["time_s"] - 0.5 <= 3.0
    np.testing.assert_allclose(vehicle["x"], source.loc[keep, "time_s"] - 0.5)
    np.testing.assert_allclose(vehicle["y"], source.loc[keep, "displacement_um"])
    fig = plot_gallery(tmp_path, seconds=3.0)
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title(loc="left") for ax in visible] == ["vehicle (DMSO)", "cmpdX 10 nM"]
    assert all(ax.get_xlim() == (0.0, 3.0) for ax in visible)
    assert visible[0].get_ylim() == visible[1].get_ylim()  # one displacement scale
    drawn = next(line for line in visible[1].get_lines() if line.get_gid() == "trace")
    np.testing.assert_allclose(drawn.get_ydata(), table.loc[table["panel"] == "cmpdX 10 nM", "y"])
    notes = " ".join(text.get_text() for text in fig.texts)
    assert "cmpdX 30 nM (no recording with status ok)" in notes
    assert "cmpdY 1 nM (no readable recordings/P1_D1/trace.csv)" in notes
    with pytest.raises(InputError, match="seconds must be a positive number"):
        plot_gallery(tmp_path, seconds=0)


# --- the batch folder ----------------------------------------------------------------------


def test_read_batch_table_keeps_names_as_text(tmp_path):
    path = tmp_path / "wells.csv"
    path.write_text("plate,well,compound,beat_rate_bpm,note\n1,A1,NA,60.5,\n1,A2,,,x\n")
    table = read_batch_table(path)
    assert table["plate"].tolist() == ["1", "1"] and table["compound"].iloc[0] == "NA"
    assert table["beat_rate_bpm"].dtype == float and np.isnan(table["beat_rate_bpm"].iloc[1])


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    """save_batch_figures on a hand-built batch folder, one metric, PNG only."""
    folder = tmp_path_factory.mktemp("batch")
    _wells().to_csv(folder / "wells.csv", index=False)
    _fits().to_csv(folder / "dose_response.csv", index=False)
    _batch_folder(folder)
    (folder / "batch.json").write_text(json.dumps({"metrics": ["beat_rate_bpm"]}))
    return folder, save_batch_figures(folder, formats=("png",))


def test_every_figure_is_written_with_its_csv(saved):
    folder, paths = saved
    names = ["groups_beat_rate_bpm", "dose_response_beat_rate_bpm", "plate_P1_beat_rate_bpm",
             "plate_P2_beat_rate_bpm", "gallery"]  # fmt: skip
    for name in names:
        assert paths[f"{name}_png"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", name
        assert paths[f"{name}_csv"] == folder / "figures" / f"{name}.csv"
    assert set(paths) == {f"{n}_{kind}" for n in names for kind in ("png", "csv")} | {"index"}
    index = json.loads(paths["index"].read_text())
    assert sorted(index["figures"]) == sorted(names)


def test_the_csv_beside_each_figure_is_what_it_plots(saved):
    folder, paths = saved
    wells = read_batch_table(folder / "wells.csv")
    fits = read_batch_table(folder / "dose_response.csv")
    expected = {
        "groups_beat_rate_bpm": tabulate_metric_by_group(wells, metric="beat_rate_bpm_norm"),
        "dose_response_beat_rate_bpm": tabulate_dose_response(wells, fits,
                                                              metric="beat_rate_bpm_norm"),
        "plate_P1_beat_rate_bpm": tabulate_plate(wells, metric="beat_rate_bpm", plate="P1"),
        "gallery": tabulate_gallery(folder),
    }  # fmt: skip
    for name, table in expected.items():
        written = pd.read_csv(paths[f"{name}_csv"])
        assert list(written.columns) == list(table.columns), name
        for column in ("x", "y", "value"):
            np.testing.assert_allclose(written[column], table[column], err_msg=name)
        assert written["series"].tolist() == table["series"].tolist(), name


def test_figures_of_empty_or_missing_tables_are_skipped_with_a_reason(tmp_path):
    pd.DataFrame(columns=_wells().columns).to_csv(tmp_path / "wells.csv", index=False)
    reason = "no compound has 4 or more concentrations above 0"
    (tmp_path / "batch.json").write_text(json.dumps({"skipped": {"dose_response": reason}}))
    stale = tmp_path / "figures" / "dose_response_beat_rate_bpm.png"
    stale.parent.mkdir()
    stale.write_bytes(b"old")
    (stale.parent / "index.json").write_text(
        json.dumps({"figures": {"dose_response_beat_rate_bpm": [stale.name]}})
    )
    paths = save_batch_figures(tmp_path, metrics=["beat_rate_bpm"], formats=("png",))
    assert list(paths) == ["index"]
    skipped = json.loads(paths["index"].read_text())["skipped"]
    assert skipped["groups"] == "no wells.csv, or it has no rows"
    assert "recordings/" in skipped["gallery"]
    assert not stale.exists()  # an earlier run's figure would mislead
    (tmp_path / "wells.csv").unlink()
    _wells().to_csv(tmp_path / "wells.csv", index=False)
    paths = save_batch_figures(tmp_path, metrics=["opd_change_nm"], formats=("png",))
    skipped = json.loads(paths["index"].read_text())["skipped"]
    assert (
        skipped["groups_opd_change_nm"] == "no ok well of wells.csv has a value of opd_change_nm"
    )
    assert skipped["dose_response"] == reason


def test_save_batch_figures_checks_its_arguments(tmp_path):
    with pytest.raises(InputError, match="is not a folder"):
        save_batch_figures(tmp_path / "missing")
    with pytest.raises(InputError, match="figure formats"):
        save_batch_figures(tmp_path, formats=("gif",))
    with pytest.raises(InputError, match="list of names"):
        save_batch_figures(tmp_path, metrics="beat_rate_bpm")


def test_gallery_shows_each_vehicle_condition_on_its_own():
    # two protocols' vehicle wells are two conditions a reader wants side by side
    from beatlab.plots.gallery import choose_representatives

    recordings = pd.DataFrame(
        {"recording_id": ["a", "b", "c", "d"], "status": ["ok"] * 4,
         "beat_rate_bpm": [60.0, 46.0, 61.0, 90.0], "role": ["vehicle"] * 3 + ["sample"],
         "condition": ["P-mono vehicle", "P-aggr vehicle", "P-mono vehicle", "drug"],
         "compound": ["DMSO", "DMSO", "DMSO", "X"], "concentration": ["", "", "", "1"],
         "unit": ["", "", "", "uM"]}
    )  # fmt: skip
    chosen = choose_representatives(recordings)
    assert list(chosen["group"][:2]) == ["P-mono vehicle", "P-aggr vehicle"]
    assert list(chosen["recording_id"]) == ["a", "b", "d"]  # a tie at the median: the first
    assert list(chosen["order"]) == sorted(chosen["order"])


def test_dose_response_of_identical_values_has_a_readable_scale(tmp_path):
    # every well at 0 (no irregular beats anywhere): the axis spans a readable range, not
    # one of 1e-11 with an offset label
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from beatlab.plots.dose import plot_dose_response

    conc = [0, 0, 0.1, 0.1, 0.3, 0.3, 1, 1, 3, 3]
    wells = pd.DataFrame(
        {"plate": "P1", "well": [f"A{i + 1}" for i in range(10)], "status": "ok",
         "role": ["vehicle"] * 2 + ["sample"] * 8, "compound": ["DMSO"] * 2 + ["X"] * 8,
         "concentration": conc, "unit": "uM", "irregular_fraction": 0.0,
         "irregular_fraction_norm": 0.0}
    )  # fmt: skip
    fits = pd.DataFrame(
        {"compound": ["X"], "metric": ["irregular_fraction_norm"], "fit": ["flat response"],
         "n_concentrations": [4], "n": [10], "unit": ["uM"]}
    )  # fmt: skip
    fig = plot_dose_response(wells, fits, metric="irregular_fraction_norm")
    low, high = fig.axes[0].get_ylim()
    assert high - low > 0.1
    plt.close(fig)
