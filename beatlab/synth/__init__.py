"""Simulator of beating-culture recordings (OPD, phase or holograms) with exact ground truth.

Every accuracy test of beatlab rests on it: cells warp by a known smooth contraction field at
exact sub-pixel positions, and the truth is computed from the noise-free field by the published
landmark definitions.
"""

from beatlab.synth._checks import CONTRACTIONS, KINDS
from beatlab.synth._schedule import (
    EAD_PROMINENCE,
    EAD_SHAPES,
    RELAXATIONS,
    beat_segments,
    evaluate_activation,
)
from beatlab.synth._simulate import SyntheticRecording, simulate_recording
from beatlab.synth._truth import BEAT_COLUMNS, TRUTH_DT_S
from beatlab.synth._write import write_simulation

__all__ = [
    "BEAT_COLUMNS",
    "CONTRACTIONS",
    "EAD_PROMINENCE",
    "EAD_SHAPES",
    "KINDS",
    "RELAXATIONS",
    "TRUTH_DT_S",
    "SyntheticRecording",
    "beat_segments",
    "evaluate_activation",
    "simulate_recording",
    "write_simulation",
]
