"""TEMPORARY minimal schema for the refactor worktree (replaced by the full schema)."""

from __future__ import annotations

from dataclasses import dataclass

from beatlab.beats import BEAT_COLUMNS, EXTRA_BEAT_COLUMNS


@dataclass(frozen=True)
class Field:
    name: str
    unit: str
    dtype: str
    meaning: str


@dataclass(frozen=True)
class Table:
    file: str
    meaning: str
    columns: tuple

    def names(self):
        return tuple(c.name for c in self.columns)


def _f(name):
    dtype = "float"
    if name in ("secondary_peak", "irregular"):
        dtype = "bool"
    if name in ("beat", "peak_index", "region", "n_beats", "beat_count", "ibi_count"):
        dtype = "int"
    if name == "rhythm":
        dtype = "str"
    return Field(name, "", dtype, "x")


BEAT_FIELDS = tuple(_f(n) for n in BEAT_COLUMNS + EXTRA_BEAT_COLUMNS)
TRACE_FIELDS = tuple(_f(n) for n in ("time_s", "displacement_um", "velocity_um_s", "opd_change_nm", "drift_x_um", "drift_y_um"))
AVERAGE_BEAT_FIELDS = tuple(_f(n) for n in ("time_s", "n_beats", "displacement_um_mean", "displacement_um_sd", "velocity_um_s_mean", "velocity_um_s_sd", "opd_change_nm_mean", "opd_change_nm_sd"))
_RH = ("beat_count", "beat_rate_bpm", "longest_pause_s", "ibi_count", "ibi_mean_s", "ibi_cv", "sdnn_s", "rmssd_s", "sd1_s", "sd2_s")
TRACE_SUMMARY_FIELDS = ()
REGION_FIELDS = tuple(_f(n) for n in ("region", "area_um2", "centroid_x_um", "centroid_y_um"))
REGION_BEAT_FIELDS = (_f("region"), *BEAT_FIELDS)
REGION_TRACE_FIELDS = tuple(_f(n) for n in ("time_s", "region", "displacement_um", "velocity_um_s", "opd_change_nm"))
TABLES = {
    "beats": Table("beats.csv", "", BEAT_FIELDS),
    "trace": Table("trace.csv", "", TRACE_FIELDS),
    "average_beat": Table("average_beat.csv", "", AVERAGE_BEAT_FIELDS),
    "regions": Table("regions.csv", "", REGION_FIELDS),
    "region_beats": Table("region_beats.csv", "", REGION_BEAT_FIELDS),
    "region_traces": Table("region_traces.csv", "", REGION_TRACE_FIELDS),
}
ROW_FIELDS = tuple(_f(n) for n in ("source", "kind", "fps", "frames", "beat_count", "beat_rate_bpm", "quality_snr", "n_warnings"))
