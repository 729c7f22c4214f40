"""Analysis results: schema of every output, read_analysis round trip, to_row, warnings."""

import numpy as np
import pandas as pd
import pytest

import beatlab
from beatlab import schema
from beatlab.errors import BeatlabWarning, InputError
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import analyze_here, as_recording


@pytest.fixture(scope="module")
def result():
    # two clusters at their own rates: every table, regions included, has rows
    sim = simulate_recording(
        duration_s=6, fps=20, shape_px=(112, 112), n_clusters=2,
        cluster_rates_bpm=[50, 80], rng=4,
    )  # fmt: skip
    with pytest.warns(BeatlabWarning, match="2 regions beat on their own"):
        return analyze_here(as_recording(sim))


def test_outputs_follow_the_schema(result):
    for name, table in schema.TABLES.items():
        assert tuple(getattr(result, name).columns) == table.names(), name
    summary = result.summary
    assert list(summary) == [f.name for f in schema.SUMMARY_FIELDS]
    assert list(summary["quality"]) == [f.name for f in schema.QUALITY_FIELDS]
    # holography: only for hologram recordings
    assert list(summary["metadata"]) == [
        f.name for f in schema.METADATA_FIELDS if f.name != "holography"
    ]
    assert list(summary["propagation"]) == [f.name for f in schema.PROPAGATION_FIELDS]
    assert len(result.regions) == 2 and set(result.region_beats["region"]) == {1, 2}


def test_read_analysis_gives_back_what_analyze_returned(result, tmp_path):
    result.save(tmp_path / "out", figures=False)
    back = beatlab.read_analysis(tmp_path / "out")
    assert back.summary == result.summary
    for name in schema.TABLES:
        pd.testing.assert_frame_equal(getattr(back, name), getattr(result, name), obj=name)
    for key, value in result.maps.items():
        if isinstance(value, np.ndarray):
            np.testing.assert_array_equal(back.maps[key], value)
        else:
            assert back.maps[key] == value
    np.testing.assert_array_equal(back.mask, result.mask)
    np.testing.assert_array_equal(back.template, result.template)
    np.testing.assert_array_equal(back.region_labels, result.region_labels)
    assert back.to_row() == result.to_row()


def test_read_analysis_of_a_folder_that_is_not_one(tmp_path):
    with pytest.raises(InputError, match="not a folder"):
        beatlab.read_analysis(tmp_path / "missing")
    (tmp_path / "half").mkdir()
    (tmp_path / "half" / "summary.json").write_text("{}")
    with pytest.raises(InputError, match="not a complete beatlab analysis"):
        beatlab.read_analysis(tmp_path / "half")


def test_to_row_is_one_flat_row_of_schema_columns(result):
    row = result.to_row()
    assert list(row) == [f.name for f in schema.ROW_FIELDS]
    assert row["beat_count"] == result.summary["beat_count"]
    assert row["quality_snr"] == result.summary["quality"]["snr"]
    assert row["fps"] == 20 and row["frames"] == 120
    assert all(not isinstance(v, (dict, list)) for v in row.values())


def test_warnings_are_results_and_still_raised():
    sim = simulate_recording(duration_s=3, fps=15, shape_px=(64, 64), rate_bpm=0, rng=1)
    with pytest.warns(BeatlabWarning, match="negative OPD") as record:
        res = analyze_here(as_recording(sim, frames=-sim.frames))
    assert any("negative OPD" in w for w in res.summary["warnings"])
    assert res.warnings == res.summary["warnings"]
    assert res.to_row()["n_warnings"] == len(res.warnings) >= 1
    # each distinct warning is raised once, however often it occurred
    messages = [str(w.message) for w in record]
    assert len(messages) == len(set(messages))


def test_independent_regions_are_named_in_the_headline_and_a_warning(result):
    # the fixture's two clusters beat at 50 and 80 bpm on their own: one whole-field rhythm
    # would mix them, so the headline gives each region's rate and the analysis warns
    line = result.headline()
    assert line.startswith("2 regions beat on their own (region 1: ")
    rates = sorted(float(x.split(" bpm")[0]) for x in line.split("beats, ")[1:])
    assert rates == pytest.approx([50, 80], abs=2)
    assert any("2 regions beat on their own" in w for w in result.warnings)
    beating = beatlab.results.beating_regions(result.regions)
    assert list(beating["area_um2"]) == sorted(result.regions["area_um2"], reverse=True)


def test_headline_of_one_rhythm_and_of_regions_that_do_not_beat():
    regions = pd.DataFrame(
        {"region": [1, 2], "area_um2": [50.0, 400.0], "beat_count": [1, 0],
         "beat_rate_bpm": [np.nan, np.nan], "rhythm": ["undetermined", "quiescent"]}
    )  # fmt: skip
    assert beatlab.results.beating_regions(regions).empty
    summary = {"beat_count": 0, "beat_rate_bpm": None, "rhythm": "quiescent"}
    analysis = beatlab.Analysis(
        trace=pd.DataFrame(), beats=pd.DataFrame(), summary=summary,
        average_beat=pd.DataFrame(), maps={}, regions=regions, region_beats=pd.DataFrame(),
        region_traces=pd.DataFrame(), mask=np.zeros((2, 2), bool), template=np.zeros((2, 2)),
        region_labels=np.zeros((2, 2), int),
    )  # fmt: skip
    assert analysis.headline() == "0 beats, n/a, rhythm quiescent"
