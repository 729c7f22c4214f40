"""beatlab: contraction and rhythm analysis of beating cardiomyocytes from phase time-lapses.

Research use only: not a diagnostic or medical device.
"""

from beatlab._version import __version__
from beatlab.config import default_config, load_config
from beatlab.errors import (
    AnalysisError,
    BeatlabError,
    BeatlabWarning,
    ConfigError,
    InputError,
    MetadataError,
)
from beatlab.io import Recording, open_recording
from beatlab.pipeline import Analysis, analyze

__all__ = [
    "Analysis",
    "AnalysisError",
    "BeatlabError",
    "BeatlabWarning",
    "ConfigError",
    "InputError",
    "MetadataError",
    "Recording",
    "__version__",
    "analyze",
    "default_config",
    "load_config",
    "open_recording",
]
