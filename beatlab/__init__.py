"""beatlab: contraction and rhythm analysis of beating cardiomyocytes from phase time-lapses.

Research use only: not a diagnostic or medical device.
"""

from beatlab._lazy import lazy_names
from beatlab._version import __version__
from beatlab.errors import (
    AnalysisError,
    BeatlabError,
    BeatlabWarning,
    ConfigError,
    InputError,
    MetadataError,
    OutputError,
)

# The rest is imported on first use (PEP 562): ``beatlab analyze`` then never pays for the
# statistics of a batch (scipy.stats, about a second), and ``import beatlab`` stays quick.
_LAZY = {
    "Analysis": "beatlab.results",
    "Recording": "beatlab.io",
    "Settings": "beatlab.settings",
    "analyze": "beatlab.pipeline",
    "analyze_batch": "beatlab.batch",
    "default_config": "beatlab.config",
    "load_config": "beatlab.config",
    "load_settings": "beatlab.settings",
    "open_recording": "beatlab.io",
    "read_analysis": "beatlab.results",
}

__getattr__, __dir__ = lazy_names(__name__, _LAZY)


__all__ = [
    "Analysis",
    "AnalysisError",
    "BeatlabError",
    "BeatlabWarning",
    "ConfigError",
    "InputError",
    "MetadataError",
    "OutputError",
    "Recording",
    "Settings",
    "__version__",
    "analyze",
    "analyze_batch",
    "default_config",
    "load_config",
    "load_settings",
    "open_recording",
    "read_analysis",
]
