"""The stages of one recording's analysis, in the order :func:`beatlab.analyze` calls them.

Each stage takes arrays or the previous stage's frozen result and returns a frozen result,
so it can be run and tested on its own; a batch worker calls the same functions.
"""

from beatlab.stages.frame_pass import FrameSignals, measure_frames
from beatlab.stages.reference import Reference, prepare_reference
from beatlab.stages.regions import RegionResult, analyze_regions
from beatlab.stages.source import open_source
from beatlab.stages.summary import summarize
from beatlab.stages.trace import TraceResult, analyze_trace

__all__ = [
    "FrameSignals",
    "Reference",
    "RegionResult",
    "TraceResult",
    "analyze_regions",
    "analyze_trace",
    "measure_frames",
    "open_source",
    "prepare_reference",
    "summarize",
]
