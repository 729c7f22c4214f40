"""beatlab: contraction and rhythm analysis of beating cardiomyocytes from phase time-lapses."""

from beatlab._version import __version__
from beatlab.errors import (
    AnalysisError,
    BeatlabError,
    BeatlabWarning,
    ConfigError,
    InputError,
    MetadataError,
)

__all__ = [
    "AnalysisError",
    "BeatlabError",
    "BeatlabWarning",
    "ConfigError",
    "InputError",
    "MetadataError",
    "__version__",
]
