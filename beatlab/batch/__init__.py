"""Many recordings: plate layouts, the batch runner and well-level tables."""

from beatlab.batch._stats import STANDARD_METRICS, WELL_METRICS, batch_statistics
from beatlab.batch.cache import ResultCache, recording_key
from beatlab.batch.flags import FLAG_RULES, quality_columns
from beatlab.batch.layout import Layout, read_layout, validate_layout
from beatlab.batch.runner import (
    BatchResult,
    analyze_batch,
    available_cores,
    compare_batch,
    illustrate,
)
from beatlab.batch.wells import aggregate_wells, normalize_wells

__all__ = [
    "FLAG_RULES",
    "STANDARD_METRICS",
    "WELL_METRICS",
    "BatchResult",
    "Layout",
    "ResultCache",
    "aggregate_wells",
    "analyze_batch",
    "available_cores",
    "batch_statistics",
    "compare_batch",
    "illustrate",
    "normalize_wells",
    "quality_columns",
    "read_layout",
    "recording_key",
    "validate_layout",
]
