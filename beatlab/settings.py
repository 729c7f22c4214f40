"""Typed analysis settings: one frozen dataclass per configuration section.

The defaults, units, ranges and meanings live only in :data:`beatlab.config.PARAMETERS`; these
classes carry no defaults of their own. :func:`load_settings` validates a TOML file or a nested
dict through :func:`beatlab.config.load_config` and builds a :class:`Settings`, and each stage
receives the section it owns. A test checks that every class has exactly the keys of its
section, with types matching the defaults.
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass
from typing import Any

from beatlab.config import load_config

__all__ = [
    "BeatSettings",
    "FlowSettings",
    "HolographySettings",
    "InputSettings",
    "MapSettings",
    "MaskSettings",
    "RegionSettings",
    "RhythmSettings",
    "Settings",
    "TemplateSettings",
    "VelocitySettings",
    "load_settings",
]


@dataclass(frozen=True)
class InputSettings:
    """``[input]``: how stored values become nm and radians, and how frames are read."""

    opd_scale: float
    phase_scale: float
    chunk_frames: int
    min_frames: int
    bin: int


@dataclass(frozen=True)
class TemplateSettings:
    """``[template]``: the rest template (:func:`beatlab.signals.rest.estimate_rest_template`)."""

    rest_quantile: float
    max_rest_frames: int
    refresh_s: float
    level_tilt: bool


@dataclass(frozen=True)
class MaskSettings:
    """``[mask]``: cells vs background (:func:`beatlab.signals.mask.make_cell_mask`)."""

    method: str
    threshold_sigma: float
    min_area_um2: float
    confluent_fraction: float


@dataclass(frozen=True)
class FlowSettings:
    """``[flow]``: dense optical flow (:class:`beatlab.signals.tracker.FlowTracker`)."""

    method: str
    preset: str
    refine_iterations: int
    window_px: float
    coarse_grid_px: int
    rigid: str
    percentile_low: float
    percentile_high: float


@dataclass(frozen=True)
class VelocitySettings:
    """``[velocity]``: the velocity trace (:func:`beatlab.signals.traces.velocity_trace`)."""

    window_ms: float
    polyorder: int


@dataclass(frozen=True)
class BeatSettings:
    """``[beats]``: detection and per-beat features (:mod:`beatlab.beats`)."""

    max_rate_bpm: float
    min_snr: float
    min_relative_prominence: float
    interpolation: str
    secondary_prominence: float
    secondary_min_level: float
    irregular_tolerance: float

    def detect_options(self) -> dict[str, Any]:
        """Keyword arguments of :func:`beatlab.beats.detect_beats`."""
        return {
            "max_rate_bpm": self.max_rate_bpm,
            "min_snr": self.min_snr,
            "min_relative_prominence": self.min_relative_prominence,
        }

    def measure_options(self) -> dict[str, Any]:
        """Keyword arguments of :func:`beatlab.beats.measure_beats`."""
        return {
            "secondary_prominence": self.secondary_prominence,
            "secondary_min_level": self.secondary_min_level,
            "irregular_tolerance": self.irregular_tolerance,
            "interpolation": self.interpolation,
        }


@dataclass(frozen=True)
class RhythmSettings:
    """``[rhythm]``: rhythm classification (:func:`beatlab.rhythm.classify_rhythm`)."""

    irregular_cv: float
    irregular_fraction_max: float
    pause_factor: float

    def options(self) -> dict[str, Any]:
        """Keyword arguments of :func:`beatlab.rhythm.summarize_rhythm`."""
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class MapSettings:
    """``[maps]``: tile maps (:func:`beatlab.maps.build_maps`)."""

    tile_um: float
    min_snr: float


@dataclass(frozen=True)
class RegionSettings:
    """``[regions]``: independently beating regions (:mod:`beatlab.regions`)."""

    detect: bool
    min_area_um2: float
    merge_correlation: float


@dataclass(frozen=True)
class HolographySettings:
    """``[holography]``: off-axis reconstruction (:class:`OffAxisReconstructor`)."""

    sideband: str
    radius: float
    na: float
    n_medium: float
    refocus_um: float
    autofocus: bool

    def fit_options(self) -> dict[str, Any]:
        """Keyword arguments of :meth:`OffAxisReconstructor.fit` (0 means automatic/none)."""
        return {
            "sideband": self.sideband,
            "radius": self.radius if self.radius > 0 else "auto",
            "na": self.na if self.na > 0 else None,
            "n_medium": self.n_medium,
            "refocus_um": self.refocus_um or None,
            "autofocus": bool(self.autofocus),
        }


_SECTIONS: dict[str, type] = {
    "input": InputSettings,
    "template": TemplateSettings,
    "mask": MaskSettings,
    "flow": FlowSettings,
    "velocity": VelocitySettings,
    "beats": BeatSettings,
    "rhythm": RhythmSettings,
    "maps": MapSettings,
    "regions": RegionSettings,
    "holography": HolographySettings,
}


@dataclass(frozen=True)
class Settings:
    """Every analysis parameter, by section (see ``configs/default.toml``)."""

    input: InputSettings
    template: TemplateSettings
    mask: MaskSettings
    flow: FlowSettings
    velocity: VelocitySettings
    beats: BeatSettings
    rhythm: RhythmSettings
    maps: MapSettings
    regions: RegionSettings
    holography: HolographySettings

    @classmethod
    def from_config(cls, config: dict[str, dict[str, Any]]) -> Settings:
        """Build from a full, validated nested dict (:func:`beatlab.config.load_config`)."""
        return cls(**{name: kind(**config[name]) for name, kind in _SECTIONS.items()})

    def to_dict(self) -> dict[str, dict[str, Any]]:
        """The nested dict of every parameter (as written into ``summary.json``)."""
        return {name: dataclasses.asdict(getattr(self, name)) for name in _SECTIONS}


def load_settings(source: Settings | str | os.PathLike | dict | None = None) -> Settings:
    """Validated settings from a TOML file, a nested dict of overrides, or the defaults.

    Parameters
    ----------
    source : Settings, path-like, dict or None
        Settings (returned as they are), a TOML file, a nested dict of overrides merged over
        the defaults, or None for the defaults.

    Returns
    -------
    Settings

    Raises
    ------
    ConfigError
        An unknown section or key, or a value of the wrong type or range (the message names
        the key).
    """
    if isinstance(source, Settings):
        return source
    return Settings.from_config(load_config(source))
