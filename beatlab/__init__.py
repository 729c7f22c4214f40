"""beatlab: contraction and rhythm analysis of beating cardiomyocytes from phase time-lapses.

Research use only: not a diagnostic or medical device.
"""

from beatlab._version import __version__
from beatlab.batch import analyze_batch
from beatlab.config import default_config, load_config
from beatlab.errors import (
    AnalysisError,
    BeatlabError,
    BeatlabWarning,
    ConfigError,
    InputError,
    MetadataError,
    OutputError,
)
from beatlab.io import Recording, open_recording
from beatlab.pipeline import analyze
from beatlab.results import Analysis, read_analysis
from beatlab.settings import Settings, load_settings

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
