"""Many recordings: plate layouts, the batch runner and well-level tables."""

from beatlab._lazy import lazy_names

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

# Imported when first used (PEP 562): a module that needs one piece of the batch (the well
# metrics of a report, say) must not import the runner, the pipeline and scipy.stats with it.
_LAZY = {
    "STANDARD_METRICS": "beatlab.batch._stats",
    "WELL_METRICS": "beatlab.batch._stats",
    "batch_statistics": "beatlab.batch._stats",
    "ResultCache": "beatlab.batch.cache",
    "recording_key": "beatlab.batch.cache",
    "FLAG_RULES": "beatlab.batch.flags",
    "quality_columns": "beatlab.batch.flags",
    "Layout": "beatlab.batch.layout",
    "read_layout": "beatlab.batch.layout",
    "validate_layout": "beatlab.batch.layout",
    "BatchResult": "beatlab.batch.runner",
    "analyze_batch": "beatlab.batch.runner",
    "available_cores": "beatlab.batch.runner",
    "compare_batch": "beatlab.batch.runner",
    "illustrate": "beatlab.batch.runner",
    "aggregate_wells": "beatlab.batch.wells",
    "normalize_wells": "beatlab.batch.wells",
}

__getattr__, __dir__ = lazy_names(__name__, _LAZY)
