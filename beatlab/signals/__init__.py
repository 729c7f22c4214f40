"""Contraction signals: rest template, levelling, mask, optical flow, traces and maps."""

from beatlab.signals.flow import FLOW_METHODS, compute_flow
from beatlab.signals.level import PlaneLeveller
from beatlab.signals.maps import tile_labels, tile_means
from beatlab.signals.mask import CellMask, make_cell_mask
from beatlab.signals.rest import RestTemplate, estimate_rest_template
from beatlab.signals.traces import velocity_trace
from beatlab.signals.tracker import FlowTracker

__all__ = [
    "FLOW_METHODS",
    "CellMask",
    "FlowTracker",
    "PlaneLeveller",
    "RestTemplate",
    "compute_flow",
    "estimate_rest_template",
    "make_cell_mask",
    "tile_labels",
    "tile_means",
    "velocity_trace",
]
