"""Every output of ``beatlab analyze``, declared once: file, column or key, unit, exact meaning.

Writers, the loader, the simulator's truth tables and tests are to take their column and key
names from here; ``docs/outputs.md`` is generated from it by :func:`outputs_markdown` (a test
keeps the two identical), with the prose sections kept in :mod:`beatlab._schema_text`. Where
the current code and the design contract differ, the schema states what the code writes.

Regenerate the document after a change::

    python -c "from beatlab.schema import outputs_markdown; print(outputs_markdown(), end='')" \\
        > docs/outputs.md
"""

from __future__ import annotations

from dataclasses import dataclass

from beatlab._schema_text import (
    INDICES,
    INTRO,
    LANDMARKS,
    MAPS,
    QUALITY,
    RHYTHM,
    ROW_TEXT,
    SECTIONS,
    TRACES,
)

__all__ = [
    "AVERAGE_BEAT_FIELDS",
    "BEAT_FIELDS",
    "FILES",
    "INDICES",
    "INTRO",
    "LANDMARKS",
    "MAPS",
    "MAP_FIELDS",
    "METADATA_FIELDS",
    "PROPAGATION_FIELDS",
    "QUALITY",
    "QUALITY_FIELDS",
    "REGION_BEAT_FIELDS",
    "REGION_FIELDS",
    "REGION_TRACE_FIELDS",
    "RHYTHM",
    "ROW_FIELDS",
    "ROW_TEXT",
    "SECTIONS",
    "SUMMARY_FIELDS",
    "TABLES",
    "TRACES",
    "TRACE_FIELDS",
    "TRACE_SUMMARY_FIELDS",
    "UNITS",
    "Field",
    "Table",
    "heading_anchor",
    "outputs_markdown",
]


@dataclass(frozen=True)
class Field:
    """One column of a table or one key of a JSON object or NPZ archive.

    Attributes
    ----------
    name : str
        Column or key name, e.g. ``"duration_90_s"``.
    unit : str
        One of :data:`UNITS`: ``"1"`` is a dimensionless ratio, fraction or index.
    dtype : str
        ``"float"``, ``"int"``, ``"bool"``, ``"boolean"`` (true, false or empty),
        ``"str"``, ``"list"`` or ``"dict"``.
    meaning : str
        One line: the exact definition.
    """

    name: str
    unit: str
    dtype: str
    meaning: str


@dataclass(frozen=True)
class Table:
    """A CSV file written by ``analyze``.

    Attributes
    ----------
    file : str
        File name, e.g. ``"beats.csv"``.
    meaning : str
        What one row is.
    columns : tuple of Field
        The columns, in file order.
    """

    file: str
    meaning: str
    columns: tuple[Field, ...]

    def names(self) -> tuple[str, ...]:
        """Column names in file order.

        Returns
        -------
        tuple of str
        """
        return tuple(c.name for c in self.columns)


UNITS = {
    "s": "seconds",
    "um": "micrometres (sample plane)",
    "nm": "nanometres of optical path delay",
    "um/s": "micrometres per second",
    "cm/s": "centimetres per second",
    "bpm": "beats per minute",
    "um^2": "square micrometres (sample plane)",
    "Hz": "frames per second",
    "deg": "degrees",
    "px": "pixels",
    "1": "dimensionless: a ratio, fraction, index or identifier",
    "count": "a number of things",
    "bool": "true / false",
    "text": "free text or one of the listed words",
    "list": "a list (its elements described in the definition)",
    "dict": "an object (its keys listed in their own table)",
}
"""Unit symbol -> what it means; every :class:`Field` uses one of these."""

"""A reference from a definition to a section of docs/outputs.md: ``(see Title)``."""


def _f(name, unit, dtype, meaning):
    return Field(name, unit, dtype, meaning)


BEAT_FIELDS = (
    _f("beat", "1", "int", "1-based index of the beat, in time order."),
    _f("onset_s", "s", "float",
       "Upstroke crossing of the 10 % level: last upward crossing of baseline + 0.1 x "
       "amplitude between the previous beat's peak (or the first frame) and this peak."),
    _f("peak_s", "s", "float",
       "Time of the peak: vertex of the parabola through the three samples around the maximum "
       "of the smoothed trace, or, where the frames show an abrupt turn at the top beyond "
       "their noise, the maximum of a local cubic-with-kink fit of the frames (see Peak)."),
    _f("end_s", "s", "float",
       "Downstroke crossing of the 10 % level: last downward crossing between the peak and the "
       "downstroke bound (see Levels and crossings): for the last beat, its lowest point after "
       "the peak once the trace is back at or below the 10 % level, else the last frame; empty "
       "when the trace never falls to that level."),
    _f("ibi_s", "s", "float",
       "Inter-beat interval: peak_s minus the previous beat's peak_s; empty for the first beat."),
    _f("time_to_peak_s", "s", "float", "peak_s - onset_s."),
    _f("relax_50_s", "s", "float",
       "downstroke_50_s - peak_s: from the peak to the downstroke crossing of the 50 % level."),
    _f("relax_90_s", "s", "float",
       "end_s - peak_s: from the peak to the downstroke crossing of the 10 % level."),
    _f("duration_50_s", "s", "float",
       "downstroke_50_s - upstroke_50_s: from the upstroke to the downstroke crossing of 50 %."),
    _f("duration_90_s", "s", "float",
       "end_s - onset_s: from the upstroke to the downstroke crossing of the 10 % level."),
    _f("displacement_um", "um", "float",
       "Amplitude of the beat on the displacement trace: peak_um - baseline_um."),
    _f("opd_change_nm", "nm", "float",
       "Maximum of the smoothed opd_change_nm trace within the beat window minus that trace's "
       "own baseline (see OPD change of a beat)."),
    _f("contraction_velocity_um_s", "um/s", "float",
       "Largest positive velocity_um_s within the beat window; empty if none is positive, or "
       "when the upstroke from onset_s to its 90 % crossing lasts less than 2.5 frame "
       "intervals (not resolved: velocity_resolved False)."),
    _f("relaxation_velocity_um_s", "um/s", "float",
       "Largest negative velocity_um_s within the beat window, reported as a positive number; "
       "empty if none is negative, or when the downstroke from its 90 % crossing to end_s "
       "lasts less than 2.5 frame intervals (not resolved: velocity_resolved False)."),
    _f("secondary_peak", "bool", "bool",
       "True when the beat has an EAD-like secondary peak (see Secondary peak)."),
    _f("irregular", "bool", "boolean",
       "True when ibi_s differs from the median ibi_s of the trace's beats by more than "
       "beats.irregular_tolerance [0.25] x that median; empty for the first beat."),
    _f("baseline_um", "um", "float", "Baseline of the beat on the displacement trace (see "
       "Baseline)."),
    _f("peak_um", "um", "float", "Value of the displacement trace at the peak: the parabola's "
       "vertex value, or the maximum of the kink fit (see Peak); it lies on the interpolated "
       "curve, above straight lines drawn between frames at low frame rates."),
    _f("upstroke_50_s", "s", "float",
       "Upstroke crossing of the 50 % level (last upward crossing before the peak)."),
    _f("downstroke_50_s", "s", "float",
       "Downstroke crossing of the 50 % level (last downward crossing before the bound)."),
    _f("secondary_peak_s", "s", "float",
       "Time of the most prominent secondary peak; empty when secondary_peak is False."),
    _f("peak_index", "1", "int",
       "0-based frame index (row of trace.csv) of the maximum of the smoothed trace within "
       "50 ms of the detected peak."),
    _f("velocity_resolved", "bool", "bool",
       "False when the frame rate does not resolve the beat's upstroke (10 % to 90 %) or "
       "downstroke (90 % to 10 %): shorter than 2.5 frame intervals (or than the velocity "
       "filter's span when the analysis passes it); the unresolved velocity is then empty. A "
       "stroke with an undefined crossing is not judged."),
)  # fmt: skip
"""beats.csv: the 16 contract columns, then the extra ones."""

TRACE_FIELDS = (
    _f("time_s", "s", "float",
       "Time of the frame from the first frame (file timestamps where given, else index / fps)."),
    _f("displacement_um", "um", "float",
       "Contraction coordinate: the flow displacement field from the rest template (rigid shift "
       "removed) projected onto the mask's contraction pattern, scaled to the pattern's mean "
       "magnitude; signed, 0 at rest within its noise (see Traces)."),
    _f("velocity_um_s", "um/s", "float",
       "Signed time derivative of displacement_um (Savitzky-Golay): positive while it grows, "
       "negative while it falls."),
    _f("opd_change_nm", "nm", "float",
       "(levelled, drift-aligned frame - rest template) projected onto the mask's OPD-change "
       "pattern, scaled to the pattern's RMS; signed, 0 at rest within its noise (see Traces)."),
    _f("drift_x_um", "um", "float",
       "Rigid whole-field shift of the frame along x (columns, to the right) relative to the "
       "first frame."),
    _f("drift_y_um", "um", "float",
       "Rigid whole-field shift of the frame along y (rows, downwards) relative to the first "
       "frame."),
)  # fmt: skip
"""trace.csv: one row per frame."""


def _averaged(name, unit, what):
    return (
        _f(f"{name}_mean", unit, "float",
           f"Mean over beats of {what} at this time, each beat linearly interpolated onto the "
           "grid."),
        _f(f"{name}_sd", unit, "float",
           f"Standard deviation (ddof 1) over beats of {what} at this time; empty with fewer "
           "than two beats."),
    )  # fmt: skip


AVERAGE_BEAT_FIELDS = (
    _f("time_s", "s", "float",
       "Time from the beat onset (onset_s): from -0.1 s to the median interval between onsets "
       "(with one onset: to the recording end), in steps of the median frame interval."),
    _f("n_beats", "count", "int",
       "Beats with data at this time (times outside the recording are missing)."),
    *_averaged("displacement_um", "um", "displacement_um"),
    *_averaged("velocity_um_s", "um/s", "velocity_um_s"),
    *_averaged("opd_change_nm", "nm", "opd_change_nm"),
)  # fmt: skip
"""average_beat.csv: the ensemble-average beat, aligned at each beat's onset."""


def _median_of(name, unit):
    return _f(name, unit, "float",
              f"Median over beats of the beats.csv column {name} (empty values skipped); null "
              "when none is defined.")  # fmt: skip


TRACE_SUMMARY_FIELDS = (
    _f("beat_count", "count", "int", "Number of beats (rows of the beats table)."),
    _f("beat_rate_bpm", "bpm", "float",
       "60 / mean of ibi_s with 2 beats or more; 0 with no beats; null with one beat."),
    _f("longest_pause_s", "s", "float",
       "Longest of: the gaps between successive peak_s, first frame to the first onset_s, last "
       "end_s to the recording end (see Recording end); the whole duration without beats."),
    _f("ibi_count", "count", "int", "Number of defined ibi_s values."),
    _f("ibi_mean_s", "s", "float", "Mean of the IBIs; null below 3 IBIs."),
    _f("ibi_cv", "1", "float", "sdnn_s / ibi_mean_s; null below 3 IBIs."),
    _f("sdnn_s", "s", "float", "Standard deviation of the IBIs (ddof 1); null below 3 IBIs."),
    _f("rmssd_s", "s", "float",
       "Root mean square of successive IBI differences x_n+1 - x_n; null below 3 IBIs."),
    _f("sd1_s", "s", "float",
       "Poincare SD1 = SDSD / sqrt 2, SDSD the SD (ddof 1) of successive differences; null "
       "below 3 IBIs."),
    _f("sd2_s", "s", "float",
       "Poincare SD2 = SD (ddof 1) of (x_n + x_n+1) / sqrt 2, so SD1^2 + SD2^2 = var(x_n) + "
       "var(x_n+1); null below 3 IBIs."),
    _median_of("ibi_s", "s"),
    _median_of("time_to_peak_s", "s"),
    _median_of("relax_50_s", "s"),
    _median_of("relax_90_s", "s"),
    _median_of("duration_50_s", "s"),
    _median_of("duration_90_s", "s"),
    _median_of("displacement_um", "um"),
    _median_of("opd_change_nm", "nm"),
    _median_of("contraction_velocity_um_s", "um/s"),
    _median_of("relaxation_velocity_um_s", "um/s"),
    _f("duration_90_bazett_s", "s", "float",
       "Median over beats of duration_90_s / ibi_s^(1/2), each beat with its own preceding "
       "ibi_s in s (Bazett)."),
    _f("duration_90_fridericia_s", "s", "float",
       "Median over beats of duration_90_s / ibi_s^(1/3), each beat with its own preceding "
       "ibi_s in s (Fridericia)."),
    _f("duration_90_stv_s", "s", "float",
       "Short-term variability of duration_90_s: sum |D_n+1 - D_n| / ((n - 1) sqrt 2) over the "
       "n - 1 successive pairs with both defined; null without a pair."),
    _f("irregular_fraction", "1", "float",
       "Irregular IBIs / IBIs (beats with irregular True among those with ibi_s); null without "
       "IBIs."),
    _f("secondary_peak_beats", "count", "int", "Number of beats with secondary_peak True."),
    _f("alternans_index", "1", "float",
       "2 |mean_k (-1)^k (A_k - mean A)| / mean A over the beats' displacement_um A_k; null "
       "below 8 beats or when mean A <= 0."),
    _f("rhythm", "text", "str",
       "Rhythm class: quiescent, undetermined, irregular or regular (see Rhythm classes)."),
    _f("snr", "1", "float",
       "Signal-to-noise ratio of the trace: median displacement_um of the beats / "
       "trace_noise_um; null without beats or with zero noise."),
    _f("trace_noise_um", "um", "float",
       "Robust white-noise SD of the displacement trace: the smaller of 1.4826 x the median "
       "absolute deviation of its frame-to-frame differences / sqrt 2 and the spread of its "
       "lowest fifth, (q20 - q02) / (z(0.20) - z(0.02)) (the resting floor); each can only be "
       "inflated by the beats (the first when fast beats fill most frame-to-frame changes)."),
    _f("pattern_snr", "1", "float",
       "Mean of the displacement trace over the frames that built the contraction pattern / "
       "trace_noise_um; beats are looked for only when it is at least 3 (below, the pattern is "
       "noise: no contraction found)."),
)  # fmt: skip
"""Keys produced by analysing one trace: beatlab.rhythm.summarize_rhythm, then snr, noise."""

_QUALITY_MOVED = ("snr", "trace_noise_um", "pattern_snr")

REGION_FIELDS = (
    _f("region", "1", "int", "Region id (1-based), as in region_labels of maps.npz."),
    _f("area_um2", "um^2", "float", "Area of the region."),
    _f("centroid_x_um", "um", "float",
       "x of the region's centroid from the left edge of the field (pixel centres)."),
    _f("centroid_y_um", "um", "float",
       "y of the region's centroid from the top edge of the field (pixel centres)."),
    *TRACE_SUMMARY_FIELDS,
)  # fmt: skip
"""regions.csv: one row per independently beating region."""

REGION_BEAT_FIELDS = (
    _f("region", "1", "int", "Region id, as in regions.csv."),
    *BEAT_FIELDS,
)
"""region_beats.csv: the beats of every region."""

REGION_TRACE_FIELDS = (
    _f("time_s", "s", "float", "Time of the frame from the first frame."),
    _f("region", "1", "int", "Region id, as in regions.csv."),
    _f("displacement_um", "um", "float",
       "Contraction coordinate of the region (projection onto the region's own pattern), as "
       "in trace.csv."),
    _f("velocity_um_s", "um/s", "float",
       "Signed time derivative of the region's displacement_um (Savitzky-Golay)."),
    _f("opd_change_nm", "nm", "float",
       "OPD change of the region (projection onto the region's own OPD-change pattern), as in "
       "trace.csv."),
)  # fmt: skip
"""region_traces.csv (long format): one row per frame and region."""

QUALITY_FIELDS = (
    _f("snr", "1", "float", "snr of the whole-mask displacement trace (as in regions.csv)."),
    _f("trace_noise_um", "um", "float",
       "trace_noise_um of the whole-mask displacement trace (as in regions.csv)."),
    _f("pattern_snr", "1", "float",
       "pattern_snr of the whole-mask displacement trace (as in regions.csv)."),
    _f("velocity_unresolved_beats", "count", "int",
       "Beats whose contraction and relaxation velocities are null because the frame rate "
       "does not resolve their strokes (velocity_resolved false in beats.csv)."),
    _f("drift_max_um", "um", "float",
       "Largest length of the drift vector (drift_x_um, drift_y_um) over the frames."),
    _f("drift_net_um", "um", "list",
       "[drift_x_um, drift_y_um] of the last frame: the net drift over the recording."),
    _f("masked_fraction", "1", "float",
       "Share of the field's pixels inside the analysis mask (not the share masked out)."),
    _f("mask_method", "text", "str",
       "How the mask was found: threshold (cells on background), confluent (textured field) "
       "or all."),
    _f("drift_reference", "text", "str",
       "Pixels whose median flow gave the rigid shift (see Quality), or none when "
       "flow.rigid = none."),
    _f("clipped_fraction", "1", "float",
       "Mean over frames of the share of finite pixels saturated by the fixed 8-bit mapping "
       "that feeds the optical flow."),
    _f("template_clipped_fraction", "1", "float",
       "Share of rest-template pixels saturated by that 8-bit mapping."),
    _f("rest_template_method", "text", "str",
       "rest-frames (the culture returns to rest) or least-deviating-frames (no true rest)."),
    _f("rest_frames", "count", "int",
       "Frames classed as resting by the first pass (the template.rest_quantile share of "
       "frames closest to the relaxed state)."),
    _f("template_frames", "count", "int",
       "Resting frames averaged into the rest template (at most template.max_rest_frames)."),
    _f("template_segments", "list", "list",
       "One {start_s, stop_s, frames} per refreshed template (template.refresh_s > 0; s from "
       "the first frame, last stop_s null); empty with one template."),
    _f("frame_noise_nm", "nm", "float",
       "Noise SD of one resting frame about the rest state, RMS over the mask; null when the "
       "template is a single frame."),
    _f("uneven_timing", "bool", "bool",
       "True when the frame timestamps are uneven (they are then used as they are)."),
    _f("checks", "text", "str",
       "What to check before trusting the numbers, joined with '; ' (empty when nothing): "
       "'low snr' when beats were found at an snr below 6 (some may be missed or invented); "
       "'coarse grid' when the short side of the analysis grid is below 32 px (optical flow "
       "sees too few pixels per cell: motion is smoothed and may be missed); 'possible missed "
       "beats' when no beat was found although pattern_snr is at least 3 (frames of noise "
       "alone give about 0) and the pattern's frames fall in 3 or more separate episodes (a "
       "drift gives one): a faint culture may beat below the detection threshold. Each also "
       "raises a warning."),
)  # fmt: skip
"""Keys of summary.json["quality"]."""

PROPAGATION_FIELDS = (
    _f("resolved", "bool", "bool",
       "True when a plane fitted to the onset-delay map resolves a travelling wave (see Maps "
       "and propagation); False when two or more regions beat on their own, whose onset "
       "delays are no wave."),
    _f("speed_cm_s", "cm/s", "float",
       "Wave speed, 1 / |gradient of the fitted plane|; null unless resolved."),
    _f("direction_deg", "deg", "float",
       "Direction of travel in [0, 360): 0 = +x (right), 90 = +y (down the rows); null unless "
       "resolved."),
    _f("r2", "1", "float",
       "Share of the onset-delay variance explained by the plane; null when not fitted."),
    _f("delay_span_s", "s", "float",
       "Maximum - minimum of the fitted plane over the fitted tiles; null when not fitted."),
    _f("n_tiles", "count", "int", "Beating tiles with an onset delay."),
    _f("reason", "text", "str", "resolved, or why the propagation is not resolved."),
)  # fmt: skip
"""Keys of summary.json["propagation"]."""

METADATA_FIELDS = (
    _f("source", "text", "str", "Path (or name) of the recording."),
    _f("kind", "text", "str", "Input kind: opd, phase or hologram."),
    _f("fps", "Hz", "float",
       "Frame rate (file metadata or --fps); with uneven timestamps 1 / median interval."),
    _f("frames", "count", "int", "Number of frames analysed."),
    _f("duration_s", "s", "float",
       "Last frame time - first frame time + 1 / fps (see Recording end)."),
    _f("frame_shape_px", "px", "list", "[Y, X] size of the recorded frames."),
    _f("pixel_size_um", "um", "float", "Sample-plane pixel size of the recording."),
    _f("analysis_pixel_size_um", "um", "float",
       "Pixel size of the analysed OPD frames (differs after hologram reconstruction and "
       "binning)."),
    _f("analysis_shape_px", "px", "list",
       "[Y, X] size of the analysed frames (of mask and template_nm in maps.npz)."),
    _f("analysis_bin", "1", "int",
       "Pixel blocks (bin x bin) averaged into one analysed pixel ([input] bin; 1: none)."),
    _f("wavelength_nm", "nm", "float", "Wavelength; null when not known."),
    _f("sources", "dict", "dict",
       "Where each value came from: format, fps_source, pixel_size_source, wavelength_source, "
       "kind_source (text, null where not applicable)."),
    _f("holography", "dict", "dict",
       "Hologram input only: carrier ([fy, fx] of the side-band used, cycles/px) and sign "
       "(+1 or -1)."),
)  # fmt: skip
"""Keys of summary.json["metadata"] (holography only for hologram input)."""

SUMMARY_FIELDS = (
    *(f for f in TRACE_SUMMARY_FIELDS if f.name not in _QUALITY_MOVED),
    _f("beating_area_fraction", "1", "float",
       "Coverage-weighted share of the assessed mask area whose tiles beat (see Maps and "
       "propagation); 0 without beats; null when no tile is assessed."),
    _f("n_regions", "count", "int", "Number of rows of regions.csv."),
    _f("quality", "dict", "dict", "Quality of the analysis (keys below)."),
    _f("propagation", "dict", "dict", "Propagation of the beat onset (keys below)."),
    _f("metadata", "dict", "dict", "The recording's metadata as used (keys below)."),
    _f("parameters", "dict", "dict",
       "The full parameter set used: section -> key -> value, as in configs/default.toml."),
    _f("warnings", "list", "list",
       "Every warning the analysis raised, one string each, in order; empty when none."),
    _f("beatlab_version", "text", "str", "Version of beatlab that wrote the files."),
    _f("caution", "text", "str", "The research-use caution (see Research use)."),
)  # fmt: skip
"""Top-level keys of summary.json, in order (the trace keys are of the whole-mask trace)."""

_TILE = "(ny, nx) tile grid"
_FIELD = "(Y, X) analysed frame"
MAP_FIELDS = (
    _f("peak_displacement_um", "um", "float",
       f"{_TILE}: median over beats of the tile's smoothed peak minus its rest level; NaN where "
       "not assessed."),
    _f("noise_um", "um", "float",
       f"{_TILE}: robust SD (1.4826 x MAD) of the tile's trace over the resting frames."),
    _f("beating", "bool", "bool",
       f"{_TILE}: assessed and peak_displacement_um > 0 and >= maps.min_snr x noise_um."),
    _f("onset_delay_s", "s", "float",
       f"{_TILE}: median over beats of the tile's own 10 % upstroke crossing minus onset_s; "
       "NaN where not beating."),
    _f("assessed", "bool", "bool",
       f"{_TILE}: tiles at least 25 % inside the mask with at least 3 resting frames of data."),
    _f("mask", "bool", "bool", f"{_FIELD}: the analysis mask."),
    _f("template_nm", "nm", "float",
       f"{_FIELD}: the rest template (levelled OPD); NaN where undefined."),
    _f("region_labels", "1", "int",
       f"{_FIELD}: region id of each pixel, 0 outside every region (as in regions.csv)."),
)  # fmt: skip
"""Arrays in maps.npz (shape in the meaning)."""

TABLES = {
    "beats": Table("beats.csv", "One row per beat of the whole-mask trace.", BEAT_FIELDS),
    "trace": Table("trace.csv", "One row per frame: the whole-mask traces.", TRACE_FIELDS),
    "average_beat": Table(
        "average_beat.csv",
        "The ensemble-average beat aligned at each beat's onset: one row per time step.",
        AVERAGE_BEAT_FIELDS,
    ),
    "regions": Table(
        "regions.csv",
        "One row per independently beating region; after the position columns, the keys of "
        "one trace's summary computed on the region's own trace.",
        REGION_FIELDS,
    ),
    "region_beats": Table(
        "region_beats.csv", "One row per beat of each region's trace.", REGION_BEAT_FIELDS
    ),
    "region_traces": Table(
        "region_traces.csv", "One row per frame and region (long format).", REGION_TRACE_FIELDS
    ),
}
"""The CSV files of ``analyze`` by role."""

FILES = (
    ("summary.json", "Recording-level results, quality, propagation, metadata, parameters."),
    ("beats.csv", "One row per beat: landmarks, durations, amplitudes, velocities, flags."),
    ("trace.csv", "One row per frame: displacement, velocity, OPD change and drift."),
    ("average_beat.csv", "The ensemble-average beat aligned at onset: mean and SD per trace."),
    ("regions.csv", "One row per independently beating region: area, centroid, summary."),
    ("region_beats.csv", "One row per beat of each region."),
    ("region_traces.csv", "One row per frame and region: the region's traces."),
    ("maps.npz", "Tile maps, the analysis mask, the rest template and the region labels."),
    ("trace.png", "Figure: the displacement trace with onset, peak and end of every beat, "
                  "above the OPD-change and velocity traces; irregular and EAD-like beats "
                  "shaded."),
    ("trace.svg", "The same figure as vector graphics."),
    ("trace_plotted.csv", "Every point drawn in trace.png, one row each: panel, series, item, "
                          "x, y, value and their units (x_unit, y_unit, value_unit)."),
    ("average_beat.png", "Figure: the average beat (mean +- SD, aligned at onset) with the "
                         "median time to peak, RT50 and RT90."),
    ("average_beat.svg", "The same figure as vector graphics."),
    ("average_beat_plotted.csv", "Every point drawn in average_beat.png (columns as "
                                 "trace_plotted.csv)."),
    ("poincare.png", "Figure: Poincare plot of successive inter-beat intervals with SD1 and "
                     "SD2."),
    ("poincare.svg", "The same figure as vector graphics."),
    ("poincare_plotted.csv", "Every point drawn in poincare.png (columns as trace_plotted.csv)."),
    ("maps.png", "Figure: rest template, peak-displacement map and onset-delay map (drawn "
                 "only where propagation is resolved)."),
    ("maps.svg", "The same figure as vector graphics."),
    ("maps_plotted.csv", "The tile values drawn in maps.png (columns as trace_plotted.csv); the "
                         "template and mask are those of maps.npz."),
    ("regions.png", "Figure: the numbered region map and each region's displacement trace."),
    ("regions.svg", "The same figure as vector graphics."),
    ("regions_plotted.csv", "Every point drawn in regions.png (columns as trace_plotted.csv); "
                            "the label map is region_labels of maps.npz."),
    ("report.html", "One self-contained page (figures embedded, no network access needed): "
                    "the headline numbers, every figure, the beats table, quality, warnings, "
                    "parameters and the research-use caution."),
)  # fmt: skip
"""(file name, content) for every file ``analyze`` writes; figures and report not with
--no-figures."""

_ROW_METADATA = ("source", "kind", "fps", "frames", "duration_s", "pixel_size_um")
_by_name = {f.name: f for f in (*METADATA_FIELDS, *SUMMARY_FIELDS)}
ROW_FIELDS = (
    *(_by_name[name] for name in _ROW_METADATA),
    *(f for f in TRACE_SUMMARY_FIELDS if f.name not in _QUALITY_MOVED),
    _by_name["beating_area_fraction"],
    _by_name["n_regions"],
    *(
        Field(f"quality_{f.name}", f.unit, f.dtype, f.meaning)
        for f in QUALITY_FIELDS
        if f.dtype not in ("list", "dict")
    ),
    Field("n_warnings", "count", "int", "Number of entries of summary.json warnings."),
)
"""Columns of ``Analysis.to_row()``: one flat row per recording for batch tables."""
del _by_name


def heading_anchor(title: str) -> str:
    """The anchor a Markdown renderer gives a heading: lower case, punctuation dropped.

    Parameters
    ----------
    title : str
        Heading text, e.g. ``"Levels and crossings"``.

    Returns
    -------
    str
        E.g. ``"levels-and-crossings"``.
    """
    kept = "".join(c for c in title.lower() if c.isalnum() or c in " -_")
    return kept.replace(" ", "-")


def outputs_markdown() -> str:
    """The full text of ``docs/outputs.md``, generated from the declarations above.

    Returns
    -------
    str
        Markdown, ending with a newline (:func:`beatlab._schema_doc.render`).

    Examples
    --------
    >>> outputs_markdown().startswith("# Outputs of `beatlab analyze`")
    True
    """
    from beatlab._schema_doc import render

    return render()
