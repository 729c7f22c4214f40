"""One error hierarchy and one warning class for the whole package."""

__all__ = [
    "AnalysisError",
    "BeatlabError",
    "BeatlabWarning",
    "ConfigError",
    "InputError",
    "MetadataError",
    "OutputError",
]


class BeatlabError(Exception):
    """Base class of every error beatlab raises on purpose.

    The message is one line that names the problem and how to fix it.
    """


class InputError(BeatlabError, ValueError):
    """The input cannot be read or analysed (unreadable file, too short, all NaN)."""


class MetadataError(InputError):
    """A physical value (frame rate, pixel size, wavelength) is needed and missing or invalid."""


class ConfigError(BeatlabError, ValueError):
    """A configuration key is unknown, or its value has the wrong type or range."""


class OutputError(BeatlabError, OSError):
    """An output path cannot be written (an existing file where a folder goes, no permission)."""


class AnalysisError(BeatlabError, RuntimeError):
    """The analysis failed on a readable recording."""


class BeatlabWarning(UserWarning):
    """Something in the input or the result deserves the user's attention."""
