"""Beat detection, per-beat landmarks and features, and the ensemble-average beat."""

from beatlab.beats.average import average_beat
from beatlab.beats.baseline import NOISE_METHODS, estimate_beat_baselines, estimate_noise
from beatlab.beats.crossings import level_crossing
from beatlab.beats.detect import detect_beats
from beatlab.beats.features import BEAT_COLUMNS, EXTRA_BEAT_COLUMNS, measure_beats
from beatlab.beats.smoothing import noise_gain, smooth_gaussian, smooth_local_quadratic

__all__ = [
    "BEAT_COLUMNS",
    "EXTRA_BEAT_COLUMNS",
    "NOISE_METHODS",
    "average_beat",
    "detect_beats",
    "estimate_beat_baselines",
    "estimate_noise",
    "level_crossing",
    "measure_beats",
    "noise_gain",
    "smooth_gaussian",
    "smooth_local_quadratic",
]
