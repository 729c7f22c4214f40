"""The output schema: it matches the code that computes the outputs, and the docs match it."""

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from beatlab import schema
from beatlab.beats import BEAT_COLUMNS, EXTRA_BEAT_COLUMNS, average_beat
from beatlab.rhythm import summarize_rhythm

ROOT = Path(__file__).resolve().parents[1]

FIELD_TUPLES = {
    name: value
    for name, value in vars(schema).items()
    if name.endswith("_FIELDS") and isinstance(value, tuple)
}

# longest first, so "_um_s" is matched before "_s"
SUFFIX_UNITS = (
    ("_um_s", "um/s"),
    ("_cm_s", "cm/s"),
    ("_um2", "um^2"),
    ("_bpm", "bpm"),
    ("_deg", "deg"),
    ("_um", "um"),
    ("_nm", "nm"),
    ("_px", "px"),
    ("_s", "s"),
)
STATISTICS = ("_mean", "_sd")


def _all_fields():
    return [(group, f) for group, fields in FIELD_TUPLES.items() for f in fields]


def _beats_table(n):
    """A beats table as measure_beats shapes it, n beats about 1 s apart, by hand."""
    peaks = 0.5 + np.arange(n) * 1.0 + 0.03 * np.sin(np.arange(n))
    onset = peaks - 0.12
    end = peaks + 0.25
    ibi = np.concatenate([[np.nan], np.diff(peaks)])[:n]
    irregular = pd.array([pd.NA] + [False] * (n - 1), dtype="boolean")[:n]
    return pd.DataFrame(
        {
            "beat": np.arange(1, n + 1),
            "onset_s": onset,
            "peak_s": peaks,
            "end_s": end,
            "ibi_s": ibi,
            "time_to_peak_s": peaks - onset,
            "relax_50_s": np.full(n, 0.15),
            "relax_90_s": end - peaks,
            "duration_50_s": np.full(n, 0.22),
            "duration_90_s": end - onset,
            "displacement_um": 0.2 + 0.01 * np.arange(n),
            "opd_change_nm": np.full(n, 15.0),
            "contraction_velocity_um_s": np.full(n, 1.8),
            "relaxation_velocity_um_s": np.full(n, 1.0),
            "secondary_peak": np.zeros(n, dtype=bool),
            "irregular": irregular,
        }
    )


def test_docs_outputs_md_is_the_generated_text():
    generated = schema.outputs_markdown()
    written = (ROOT / "docs" / "outputs.md").read_text()
    assert written == generated, (
        'docs/outputs.md is stale; regenerate it with: python -c "from beatlab.schema import '
        "outputs_markdown; print(outputs_markdown(), end='')\" > docs/outputs.md"
    )


def test_beat_fields_start_with_the_measured_columns_in_order():
    names = schema.TABLES["beats"].names()
    expected = BEAT_COLUMNS + EXTRA_BEAT_COLUMNS
    assert names[: len(expected)] == expected


@pytest.mark.parametrize("n_beats", [0, 1, 3, 9])
def test_trace_summary_fields_are_the_keys_of_summarize_rhythm(n_beats):
    summary = summarize_rhythm(_beats_table(n_beats), start_s=0.0, end_s=10.0)
    expected = (*summary, "snr", "trace_noise_um", "pattern_snr")
    assert tuple(f.name for f in schema.TRACE_SUMMARY_FIELDS) == expected


def test_average_beat_fields_are_the_columns_of_average_beat():
    times = np.arange(90) / 30.0
    wave = np.maximum(0.0, np.sin(2 * np.pi * times)) ** 2
    # the three traces that average_beat.csv averages, as trace.csv names them
    traces = {f.name: wave * k for k, f in enumerate(schema.TRACE_FIELDS[1:4], start=1)}
    result = average_beat(times, traces, [0.1, 1.1, 2.1])
    assert tuple(result.columns) == tuple(f.name for f in schema.AVERAGE_BEAT_FIELDS)


def test_unit_suffix_of_every_name_matches_its_unit():
    for group, f in _all_fields():
        name = f.name
        for stat in STATISTICS:
            name = name.removesuffix(stat)
        suffix_unit = next((u for sfx, u in SUFFIX_UNITS if name.endswith(sfx)), None)
        if suffix_unit is not None:
            assert f.unit == suffix_unit, f"{group}: {f.name} has unit {f.unit!r}"
        if f.unit in {u for _, u in SUFFIX_UNITS}:
            # a physical unit is always spelled in the name
            assert suffix_unit == f.unit, f"{group}: {f.name} ({f.unit}) lacks its unit suffix"


def test_every_field_is_declared_completely():
    # the checks below iterate over these groups: none may be missed
    assert set(FIELD_TUPLES) == {
        f"{g}_FIELDS"
        for g in (
            "BEAT",
            "TRACE",
            "AVERAGE_BEAT",
            "TRACE_SUMMARY",
            "REGION",
            "REGION_BEAT",
            "REGION_TRACE",
            "SUMMARY",
            "QUALITY",
            "PROPAGATION",
            "METADATA",
            "MAP",
            "ROW",
        )
    }
    dtypes = {"float", "int", "bool", "boolean", "str", "list", "dict"}
    for group, f in _all_fields():
        assert f.unit in schema.UNITS, f"{group}: {f.name} has unknown unit {f.unit!r}"
        assert f.dtype in dtypes, f"{group}: {f.name} has unknown dtype {f.dtype!r}"
        assert f.meaning.strip() and "\n" not in f.meaning, f"{group}: {f.name} meaning"
        assert re.fullmatch(r"[a-z][a-z0-9_]*", f.name), f"{group}: {f.name!r}"


@pytest.mark.parametrize("group", sorted(FIELD_TUPLES))
def test_no_duplicate_names_within_a_table(group):
    names = [f.name for f in FIELD_TUPLES[group]]
    assert len(names) == len(set(names)), sorted(n for n in names if names.count(n) > 1)


def test_tables_and_files_agree():
    files = [name for name, _ in schema.FILES]
    assert len(files) == len(set(files))
    assert all(content.strip() for _, content in schema.FILES)
    assert set(schema.TABLES) == {
        "beats",
        "trace",
        "average_beat",
        "regions",
        "region_beats",
        "region_traces",
    }
    for key, table in schema.TABLES.items():
        assert table.file == f"{key}.csv" and table.file in files
        assert table.meaning.strip()


def test_region_tables_are_built_from_the_whole_mask_ones():
    assert schema.TABLES["regions"].names() == (
        "region",
        "area_um2",
        "centroid_x_um",
        "centroid_y_um",
        *(f.name for f in schema.TRACE_SUMMARY_FIELDS),
    )
    assert schema.TABLES["region_beats"].names() == ("region", *schema.TABLES["beats"].names())
    assert schema.TABLES["region_traces"].names() == (
        "time_s",
        "region",
        "displacement_um",
        "velocity_um_s",
        "opd_change_nm",
    )


def test_summary_keys_and_flat_row():
    names = [f.name for f in schema.SUMMARY_FIELDS]
    trace_keys = [f.name for f in schema.TRACE_SUMMARY_FIELDS]
    # snr, trace_noise_um and pattern_snr live in summary["quality"], not at the top level
    moved = ("snr", "trace_noise_um", "pattern_snr")
    assert tuple(trace_keys[-3:]) == moved
    assert names[: len(trace_keys) - 3] == trace_keys[:-3]
    assert set(moved) <= {f.name for f in schema.QUALITY_FIELDS}
    assert names[len(trace_keys) - 3 :] == [
        "beating_area_fraction",
        "n_regions",
        "quality",
        "propagation",
        "metadata",
        "parameters",
        "warnings",
        "beatlab_version",
        "caution",
    ]
    quality_scalars = [
        f"quality_{f.name}" for f in schema.QUALITY_FIELDS if f.dtype not in ("list", "dict")
    ]
    assert "quality_drift_net_um" not in quality_scalars
    assert [f.name for f in schema.ROW_FIELDS] == [
        "source",
        "kind",
        "fps",
        "frames",
        "duration_s",
        "pixel_size_um",
        *trace_keys[:-3],
        "beating_area_fraction",
        "n_regions",
        *quality_scalars,
        "n_warnings",
    ]


def test_every_see_reference_names_a_heading_of_the_doc():
    doc = schema.outputs_markdown()
    headings = set(re.findall(r"^#+ (.+)$", doc, flags=re.M))
    for group, f in _all_fields():
        for title in re.findall(r"\(see ([^)]+)\)", f.meaning):
            assert title in headings, f"{group}: {f.name} refers to a missing section {title!r}"
            assert f"(#{schema.heading_anchor(title)})" in doc


def test_doc_carries_the_caution_and_every_name():
    from beatlab.output import CAUTION

    doc = schema.outputs_markdown()
    assert CAUTION in doc
    for group, f in _all_fields():
        assert f"| `{f.name}` |" in doc, f"{group}: {f.name} missing from the doc"
    for name, _ in schema.FILES:
        assert f"`{name}`" in doc


def test_readme_outputs_section_links_the_doc_and_lists_every_beat_column():
    readme = (ROOT / "README.md").read_text()
    section = readme.split("## Outputs of `analyze`", 1)[1].split("\n## ", 1)[0]
    assert "](docs/outputs.md)" in section
    assert "design notes" not in section
    for name, _ in schema.FILES:
        assert f"`{name}`" in section, name
    for name in schema.TABLES["beats"].names():
        assert f"`{name}`" in section, name


# End-to-end: the files the current pipeline already writes in their final format (beats,
# trace, average_beat, maps, summary's nested dicts). The region files and the summary's
# `warnings` key change in the pipeline refactor, whose own end-to-end test covers them.
def test_analyze_writes_the_declared_columns_and_keys(tmp_path):
    from beatlab.pipeline import analyze
    from beatlab.synth import simulate_recording, write_simulation

    sim = simulate_recording(duration_s=4, fps=30, shape_px=(64, 64), rate_bpm=90, rng=3)
    write_simulation(sim, tmp_path / "c.ome.tif")
    result = analyze(tmp_path / "c.ome.tif")
    assert len(result.beats) >= 4
    out = tmp_path / "out"
    result.save(out)

    assert sorted(p.name for p in out.iterdir()) == sorted(name for name, _ in schema.FILES)
    for key in ("beats", "trace", "average_beat"):
        table = schema.TABLES[key]
        header = tuple(pd.read_csv(out / table.file, nrows=0).columns)
        assert header == table.names(), key
    with np.load(out / "maps.npz") as maps:
        assert tuple(maps.files) == tuple(f.name for f in schema.MAP_FIELDS)
    summary = json.loads((out / "summary.json").read_text())
    expected = [f.name for f in schema.SUMMARY_FIELDS]
    if "warnings" not in summary:  # until the refactor stores the warnings
        expected.remove("warnings")
    assert list(summary) == expected
    for key, fields in (
        ("quality", schema.QUALITY_FIELDS),
        ("propagation", schema.PROPAGATION_FIELDS),
        ("metadata", schema.METADATA_FIELDS),
    ):
        names = [f.name for f in fields if not (key == "metadata" and f.name == "holography")]
        assert list(summary[key]) == names, key
