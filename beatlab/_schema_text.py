"""Prose definitions of docs/outputs.md, re-exported by :mod:`beatlab.schema`.

Kept apart from the field declarations only to keep each module short; edit them here and
regenerate the document (see :mod:`beatlab.schema`).
"""

__all__ = [
    "INDICES",
    "INTRO",
    "LANDMARKS",
    "MAPS",
    "QUALITY",
    "RHYTHM",
    "ROW_TEXT",
    "SECTIONS",
    "TRACES",
]

INTRO = """\
Every file that `beatlab analyze` writes into its output folder, every column and key in it,
with its unit and its exact definition. This page is generated from `beatlab/schema.py`; a
test keeps the two identical.

Conventions:

- Names carry their unit: `_s` seconds, `_um` micrometres in the sample plane, `_nm`
  nanometres of optical path delay (OPD), `_um_s` um/s, `_bpm` beats per minute, `_um2`
  um^2, `_px` pixels. Unit `1` is a dimensionless ratio, fraction, index or id; `count` a
  number of things.
- Times are in seconds from the first frame (except `time_s` of `average_beat.csv`, which
  counts from the beat onset); durations and intervals are in seconds.
- An undefined value is an empty cell in CSV files, `null` in JSON and NaN in `maps.npz`:
  for example `end_s` of a beat whose trace never falls back to its 10 % level, or
  interval indices with fewer than 3 intervals. Booleans are `True`/`False` in CSV.
- Parameters are named `section.key` as in `configs/default.toml` (default in brackets);
  settings without such a name are fixed in the code today.
- The whole-mask files (`summary.json`, `beats.csv`, `trace.csv`, `average_beat.csv`) describe
  all cells of the analysis mask together; the region files describe each independently
  beating region on its own, with the same definitions.
- Figures are saved at their designed size in inches, not trimmed to what is drawn: PNG at
  300 dpi (a 7 in wide figure is 2,100 px wide), SVG with its text as text."""

TRACES = """\
Each frame is converted to OPD (nm), levelled against the rest template (offset, and tilt with
`template.level_tilt` [true]), and compared with the rest template, an average of the frames
closest to the relaxed state.

- `displacement_um`: the dense optical flow from the rest template to the frame (`flow.method`
  [dis] on a fixed 8-bit mapping of the OPD, on a grid `flow.coarse_grid_px` [8] px apart
  where the frame is large enough, refined at every pixel by `flow.refine_iterations` [2]
  Gauss-Newton steps on the unrounded values), minus the rigid whole-field shift (the drift),
  gives a displacement field F_t(x) in px. The contraction pattern A(x) is the weighted mean
  of the fields of the most contracted frames (up to 48, the 15 % whose OPD deviates most
  from the relaxed state in the first pass, weighted by that deviation above its rest
  level). Each frame's coordinate is c_t = sum F_t . A / sum |A|^2 over the mask, and
  `displacement_um` = c_t x mean |A| over the mask x pixel size. For a field that is a
  multiple of the pattern this is exactly its mean displacement magnitude; being linear in
  the field, its noise is zero-mean: 0 at rest within its noise, signed (slightly negative
  values at rest are noise), no floor, so durations do not change with amplitude or noise. A
  frame that helped build A is projected onto A without itself (leave-one-out), so its own
  noise does not bias it. Motion orthogonal to the pattern (migration, a second independent
  region) does not count in full.
- `velocity_um_s`: Savitzky-Golay derivative of `displacement_um`, window `velocity.window_ms`
  [60 ms] rounded to an odd number of frames, polynomial order `velocity.polyorder` [2]
  (uneven frame times: computed on an even grid and sampled back). Per beat, the velocity
  extremes are null where the frame rate does not resolve the stroke (`velocity_resolved`
  in beats.csv, see Beat window).
- `opd_change_nm`: D_t = the frame, shifted back by the drift, minus the rest template,
  projected the same way onto the OPD-change pattern B (the weighted mean of D over the same
  most contracted frames): c_t = sum D_t B / sum B^2 over the mask, times the RMS of B over
  the mask. Signed, 0 at rest within its noise and proportional to the contraction; it
  depends on the cells' texture (a within-well measure).
- `drift_x_um`, `drift_y_um`: the rigid shift of the frame relative to the first frame. It is
  measured as the median flow over the pixels named in `quality.drift_reference` and removed
  from the flow before `displacement_um` (with `flow.rigid` = none it is reported, not
  removed).
- Region traces use the same definitions over the region's pixels, with the region's part
  of the patterns."""

LANDMARKS = """\
Beats are measured on `displacement_um` (the primary trace), in this order.

### Detection

Candidate maxima of the trace smoothed by a Gaussian of SD 50 ms are kept when the recording's
typical beat prominence reaches `beats.min_snr` [8] noise SDs of that smoothed trace, and each
beat's prominence reaches both `beats.min_relative_prominence` [0.2] of the typical one and 5
noise SDs; two peaks closer than 60 / `beats.max_rate_bpm` [240] seconds keep the more
prominent. A hump on the relaxation that rises less than half its height above the resting
floor stays part of the previous beat.

### Smoothing and interpolation

The trace is smoothed by a local quadratic fit with Gaussian weights of SD 20 ms (it reproduces
any cubic exactly, so clean beats keep their landmarks). With `beats.interpolation` = cubic
[default], this smoothed trace and `velocity_um_s` are then upsampled by a not-a-knot cubic
spline through every frame onto a grid of ceil(frame interval / 4 ms) points per frame (at most
16), and every rule below is applied on that grid; with `beats.interpolation` = linear the
rules are applied on the frames themselves. At 15 fps the literal rules are biased on the
curved foot and on asymmetric peaks (by 12 ms and 18 ms for a 150 ms half-cosine rise, against
3 ms and 11 ms for the spline, noise-free, over all sampling phases); from 50 fps the two
agree within 1 ms.

### Peak

The highest sample of the smoothed trace within 50 ms of the detected peak (then within one
frame on the fine grid); `peak_s` and `peak_um` are the vertex of the parabola through that
sample and its two neighbours (on the grid with cubic, on the frames with linear), at their
actual times. Where the trace turns abruptly at the top (a rise into an exponential
relaxation: the slope jumps), any smoother rounds the top and moves its maximum towards the
flatter side (measured: about -8.7 ms for a 150 ms rise into a 120 ms decay). There, the frames
within 90 ms of the peak and above baseline + 30 % of the amplitude (at least 9 frames, so in
practice from about 50 fps) are also fitted by a cubic that may bend sharply at one free point
(two-phase regression, Hudson 1966, J Am Stat Assoc 61:1097); when that fit lowers the residual
sum of squares by more than 16 noise variances, its top gives `peak_s` and `peak_um` (measured:
median peak error from -8.4 to -1.1 ms at 100 fps, peak-to-noise 100). At a peak-to-noise of
about 30 a kinked top cannot be told from a rounded one and still reads up to about one frame
early. `peak_um` is the top of the interpolated curve: figures draw the peak marker at
(`peak_s`, `peak_um`). Amplitude = `peak_um` - `baseline_um` = `displacement_um`.

### Baseline

The lowest point of the beat is the minimum, between the previous beat's peak (or the first
frame) and this peak, of a copy of the trace smoothed more (local quadratic, 50 ms).
`baseline_um` is the median of the smoothed trace over the 100 ms centred on that point (at
least 3 frames' worth of samples). On a noisy trace the window is widened to the whole resting
stretch around the lowest point over which the 50 ms copy stays within 4 of its noise SDs of
its lowest value, so the baseline is the resting level, not the deepest noise dip; on a
noise-free trace the plain 100 ms window stands. When the lowest point is the first frame (the
first beat's upstroke began before the recording), the first beat takes the second beat's
baseline.

### Levels and crossings

A level f is `baseline_um` + f x amplitude: f = 0.1 for `onset_s` and `end_s`, 0.5 for
`upstroke_50_s` and `downstroke_50_s`. The upstroke crossing is the last upward crossing of the
level between the previous beat's peak (or the first frame) and this peak. The downstroke
crossing is the last downward crossing between this peak and the downstroke bound: the next
beat's onset (or, without one, the next beat's lowest point), the last frame for the last beat
(but the last beat's lowest point after its peak when the trace is back below the 10 % level
there, so a next beat cut by the recording end is not searched); so a second relaxation step
belongs to the beat. It is empty when the trace does not cross the
level in that stretch. A crossing between two samples is located by linear interpolation
between them: between frames with linear, between points of the spline grid (that is, on the
spline) with cubic. On a trace with noise (every measured trace) a noise band of half-width h =
2.5 noise SDs of the smoothed trace surrounds the level: a crossing counts only once the trace
has left the band on the far side; the time is the midpoint of the first and last crossing of
the level inside that final passage through the band, then refined by a least-squares
polynomial (quadratic with 5 samples or more, else a straight line) fitted to the samples of
the passage, taking its root nearest to that midpoint. After the trace has come down, rebounds
that rise less than 7.5 % of the amplitude above a downstroke level are ignored (rest-period
noise spikes). On a noise-free trace the noise SD, and so h, is 0: the plain rule applies,
without refinement. In short: `onset_s`, `end_s`, `upstroke_50_s` and `downstroke_50_s` are
interpolated (linear or spline) and, on noisy traces, refined by the local polynomial fit;
`peak_s` is a parabola vertex; `baseline_um` a median; `secondary_peak_s` and the velocity
extremes are sample values of the grid.

### Beat window

From the beat's start (`onset_s`, or its lowest point when the onset is undefined) to its stop
(`end_s`, or the downstroke bound when the end is undefined). `contraction_velocity_um_s` and
`relaxation_velocity_um_s` are the extremes of `velocity_um_s` (upsampled like the trace with
cubic) over this window. A velocity is reported only when the frames resolve its stroke: the
upstroke from 10 % to 90 % of the amplitude (contraction) or the downstroke from 90 % to 10 %
(relaxation) lasts at least 2.5 frame intervals and at least the span of the velocity filter
((window frames - 1) x frame interval); otherwise it is empty and `velocity_resolved` is false
(measured: at 10 fps the contraction velocity of a 150 ms rise read 0.50 of the truth before
this rule; 30 fps read 0.92, 100 fps 0.95). A stroke with an undefined crossing is not judged.
Where relaxation starts abruptly at the peak any derivative filter reads its velocity low
(0.77 of the truth at 100 fps); this is not flagged.

### OPD change of a beat

`opd_change_nm` of a beat: the `opd_change_nm` trace is smoothed like the displacement (local
quadratic, 20 ms, at frame resolution); its maximum within the beat window minus its own
baseline (median over the 100 ms, at least 3 frames, centred on its lowest point between the
previous beat's peak frame and this peak frame).

### Secondary peak

A local maximum, between the peak and the beat's stop, of a copy of the trace smoothed a
little more (local quadratic, 30 ms; the search starts at that copy's own maximum within 50 ms
of the peak), whose topographic prominence within that stretch
(`scipy.signal.peak_prominences`) is at least `beats.secondary_prominence` [0.1] of the
amplitude and at least 2 noise SDs of that copy, and whose dip before it (the prominence's
left base) stays at or above `baseline_um` + `beats.secondary_min_level` [0.2] x amplitude: an
EAD-like second rise while the cell is still contracted. `secondary_peak_s` is the most
prominent one.

### Irregular beat

A beat whose `ibi_s` differs from the median `ibi_s` of all beats of its trace (the whole
mask, or its region) by more than
`beats.irregular_tolerance` [0.25] x that median. The first beat has no IBI (empty).

### Recording end

Recording time runs from the first frame to the last frame's time plus one frame interval (1 /
fps); `longest_pause_s` measures the last gap to that end, and a missing onset or end of the
first or last beat is replaced by its peak there."""

INDICES = """\
For the n defined inter-beat intervals x_1 .. x_n (`ibi_s`, seconds); every index is null
when n < 3:

- `ibi_mean_s` = mean(x); `sdnn_s` = SD(x) with ddof 1; `ibi_cv` = `sdnn_s` / `ibi_mean_s`.
- `rmssd_s` = sqrt(mean((x_k+1 - x_k)^2)) over the n - 1 successive differences.
- `sd1_s` = SDSD / sqrt 2, SDSD the SD (ddof 1) of the successive differences.
- `sd2_s` = SD (ddof 1) of (x_k + x_k+1) / sqrt 2, computed directly, so that
  SD1^2 + SD2^2 = var(x_k) + var(x_k+1) (it cannot go negative on short series).
- Rate correction, each beat with its own preceding IBI in seconds, then the median over
  beats: Bazett `duration_90_bazett_s` = D / IBI^(1/2); Fridericia `duration_90_fridericia_s`
  = D / IBI^(1/3), D = `duration_90_s`. A beat at 60 bpm is unchanged.
- Short-term variability `duration_90_stv_s` = sum |D_k+1 - D_k| / (m sqrt 2) over the m
  successive pairs of beats with both durations defined (m = beats - 1 when all are defined);
  null without a pair.
- `alternans_index` = 2 |mean_k (-1)^k (A_k - mean A)| / mean A, A_k = `displacement_um` of
  beat k (k from 0, undefined amplitudes skipped); 0 for equal beats, |a - b| / mean A for an
  even number of beats alternating between amplitudes a and b; null below 8 beats or when
  mean A <= 0.

Sources: Task Force of the ESC and NASPE (1996), Circulation 93:1043 (SDNN, RMSSD); Brennan,
Palaniswami & Kamen (2001), IEEE Trans Biomed Eng 48:1342 (SD1, SD2); Bazett (1920), Heart
7:353; Fridericia (1920), Acta Med Scand 53:469; Thomsen et al. (2004), Circulation 110:2453
(short-term variability)."""

RHYTHM = """\
`rhythm` is the first that applies, with the thresholds in `[rhythm]` of the configuration:

1. `quiescent`: no beats (`beat_count` = 0). A readable recording without beats is a result,
   not an error.
2. `undetermined`: fewer than 4 IBIs (`beat_count` - 1 < 4); the 4 is fixed today.
3. `irregular`: `ibi_cv` > `rhythm.irregular_cv` [0.15], or `irregular_fraction` >
   `rhythm.irregular_fraction_max` [0.1], or `longest_pause_s` > `rhythm.pause_factor` [2.5]
   x the median IBI (`ibi_s`). A null value skips its test.
4. `regular`: otherwise."""

QUALITY = """\
Read these before trusting a recording's numbers:

- `snr` and `trace_noise_um` say how far the beats stand above the frame-to-frame noise of
  the displacement trace; the 10 % landmarks of beats with a low `snr` are the least precise.
- `drift_reference` says which pixels measured the rigid shift: `textured background`
  (cell-free pixels with structure to track), `cell median` (median flow over the cells:
  contraction pulls about a centre, drift moves every cell alike), `cell median at rest
  frames, interpolated` (measured at the resting frames only and interpolated in time
  between them, used when there is no textured background and the culture has a true rest),
  `field median`, or `none`.
- `clipped_fraction` and `template_clipped_fraction`: the share of pixels saturated in the
  fixed 8-bit image fed to the optical flow (template percentiles `flow.percentile_low` [0.5]
  and `flow.percentile_high` [99.5] mapped to 0 and 255, widened by 4 frame-noise SDs). Motion
  inside saturated pixels is not seen, so a large share means the mapping needs widening.
- `rest_template_method` = `least-deviating-frames` means no frames came back to the noise
  floor of the relaxed state (fast or overlapping beats): displacement is then measured from
  the least contracted state seen, and amplitudes can read low.
- `masked_fraction` is the share of the field analysed; `mask_method` how it was found."""

MAPS = """\
The field is cut into square tiles of `maps.tile_um` [8 um] (rounded to whole pixels, at least
4 px); tile (iy, ix) covers rows iy x tile_px to (iy + 1) x tile_px - 1 and likewise columns,
with partial tiles at the bottom and right edges. Each tile's trace is the contraction
coordinate of its mask pixels (the projection above, onto the tile's part of the pattern). A
tile is assessed when at least 25 % of it is inside the mask and it has at least 3 resting
frames with data; its rest level is the median and its noise the robust SD of its trace over
the resting frames. Per beat, the tile's trace is smoothed by a moving average over 10 % of the
median rise time; its peak is the maximum from one rise time before the beat's onset to one
rise time after its peak (not crossing neighbouring beats); its onset is the last upward
crossing, before that maximum, of rest level + 10 % of its amplitude, linearly interpolated
between frames. `beating_area_fraction` = sum of the mask coverage of the beating tiles / the
same sum over the assessed tiles.

Propagation: a least-squares plane t = a + b x + c y through the onset delays at the tile
centres (x, y in um from the top-left corner), refitted once without residuals beyond 3 robust
SDs; speed = 1 / |(b, c)|, direction that of (b, c). It is resolved only with at least 6 tiles,
a fitted delay span above 2 frame intervals and r2 >= 0.5. Mechanical onset crosses a field of
view within a few milliseconds, so at 100 fps or less it is usually not resolved."""

ROW_TEXT = """\
`Analysis.to_row()` flattens one recording into one row for tables over many recordings:
these metadata keys, the whole-mask summary keys, `beating_area_fraction`, `n_regions`, every
scalar key of `quality` prefixed `quality_`, and `n_warnings`. Every column keeps the unit
and meaning it has in `summary.json`."""

SECTIONS = (
    ("Traces", TRACES),
    ("Beats: detection and landmarks", LANDMARKS),
    ("Interval indices, rate correction, variability, alternans", INDICES),
    ("Rhythm classes", RHYTHM),
    ("Quality", QUALITY),
    ("Maps and propagation", MAPS),
)
"""(title, Markdown text) of the definition sections of docs/outputs.md, in order."""
