"""Off-axis digital holography: forward model, demodulation, background, refocusing."""

from beatlab.holography.background import (
    average_reference_field,
    estimate_background_mask,
    estimate_phase_sign,
    fit_phase_polynomial,
    phase_offset,
)
from beatlab.holography.demodulate import SidebandFilter, auto_radius, radius_from_na
from beatlab.holography.files import load_reference, reconstruct_file
from beatlab.holography.forward import render_hologram, render_reference
from beatlab.holography.reconstruct import OffAxisReconstructor
from beatlab.holography.refocus import (
    FOCUS_METRICS,
    AngularSpectrumPropagator,
    autofocus,
    propagate_angular_spectrum,
)
from beatlab.holography.sideband import Sideband, locate_sideband

__all__ = [
    "FOCUS_METRICS",
    "AngularSpectrumPropagator",
    "OffAxisReconstructor",
    "Sideband",
    "SidebandFilter",
    "auto_radius",
    "autofocus",
    "average_reference_field",
    "estimate_background_mask",
    "estimate_phase_sign",
    "fit_phase_polynomial",
    "load_reference",
    "locate_sideband",
    "phase_offset",
    "propagate_angular_spectrum",
    "radius_from_na",
    "reconstruct_file",
    "render_hologram",
    "render_reference",
]
