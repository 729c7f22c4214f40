"""Analysis parameters: defaults, TOML loading and validation.

Every parameter lives in :data:`PARAMETERS`, a table of sections; each entry has its default,
unit, allowed range or choices and a one-line meaning. ``configs/default.toml`` is generated from
it (:func:`default_toml`) and a test keeps the two identical.
"""

from __future__ import annotations

import copy
import difflib
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from beatlab.errors import ConfigError

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

__all__ = ["PARAMETERS", "Param", "default_config", "default_toml", "load_config", "merge_config"]


@dataclass(frozen=True)
class Param:
    """One configuration parameter."""

    default: Any
    help: str
    unit: str = ""
    lo: float | None = None
    hi: float | None = None
    choices: tuple | None = None
    nullable: bool = False


P = Param
PARAMETERS: dict[str, dict[str, Param]] = {
    "input": {
        "opd_scale": P(
            1.0,
            "multiply stored OPD values by this to get nm (1000 for files in um)",
            "nm per stored unit",
            lo=0.0,
        ),
        "phase_scale": P(
            1.0, "multiply stored phase values by this to get radians", "rad per unit", lo=0.0
        ),
        "chunk_frames": P(
            64, "frames read and processed at a time (bounds memory)", "frames", lo=1
        ),
        "min_frames": P(8, "recordings shorter than this are rejected", "frames", lo=2),
        "bin": P(
            0,
            "average bin x bin pixel blocks before the analysis (1: none; 0: automatic, the "
            "largest factor that keeps the short side at 256 px or more and the pixel at "
            "1 um or less)",
            "px",
            lo=0,
            hi=16,
        ),
    },
    "template": {
        "rest_quantile": P(
            0.25,
            "share of frames, closest to the relaxed state, averaged into the rest template",
            "fraction",
            lo=0.01,
            hi=1.0,
        ),
        "max_rest_frames": P(64, "at most this many resting frames are averaged", "frames", lo=1),
        "refresh_s": P(
            0.0,
            "refresh the template from resting frames within this window "
            "(0: one template for the whole recording)",
            "s",
            lo=0.0,
        ),
        "level_tilt": P(True, "remove a robust offset + tilt fit of (frame - template) per frame"),
    },
    "mask": {
        "method": P(
            "auto",
            "cells vs background by threshold, the whole textured field for "
            "confluent sheets, or every finite pixel",
            choices=("auto", "threshold", "confluent", "all"),
        ),
        "threshold_sigma": P(
            5.0, "cell threshold above the background level, in background noise SDs", "SD", lo=0.0
        ),
        "min_area_um2": P(25.0, "smaller connected cell objects are dropped", "um^2", lo=0.0),
        "confluent_fraction": P(
            0.7,
            "above this cell-covered share the field is treated as confluent",
            "fraction",
            lo=0.0,
            hi=1.0,
        ),
    },
    "flow": {
        "method": P("dis", "coarse dense optical-flow method", choices=("dis", "farneback")),
        "preset": P(
            "fast", "preset of the coarse method", choices=("ultrafast", "fast", "medium")
        ),
        "refine_iterations": P(
            2,
            "float Gauss-Newton refinement steps after the coarse flow "
            "(0: raw OpenCV flow, whose gain is off by up to 30 %)",
            "steps",
            lo=0,
            hi=10,
        ),
        "window_px": P(
            4.0,
            "Gaussian window (SD) of the refinement; larger lowers the noise "
            "floor and smooths the field",
            "px",
            lo=0.5,
        ),
        "coarse_grid_px": P(
            8,
            "DIS estimates the coarse flow on a grid this many px apart, which the refinement "
            "then corrects at every pixel (0: the preset's own, 4 px for fast; smaller frames "
            "cap it; Farneback does not use it)",
            "px",
            choices=(0, 1, 2, 4, 8, 16, 32, 64),
        ),
        "rigid": P(
            "auto",
            "rigid whole-field shift removal: from background pixels (auto uses "
            "them where there are any, else the field median)",
            choices=("auto", "background", "median", "none"),
        ),
        "percentile_low": P(
            0.5, "lower percentile of the template mapped to 8-bit 0", "%", lo=0.0, hi=50.0
        ),
        "percentile_high": P(
            99.5, "upper percentile of the template mapped to 8-bit 255", "%", lo=50.0, hi=100.0
        ),
    },
    "velocity": {
        "window_ms": P(60.0, "Savitzky-Golay window for the velocity trace", "ms", lo=0.0),
        "polyorder": P(2, "Savitzky-Golay polynomial order", lo=1, hi=5),
    },
    "beats": {
        "max_rate_bpm": P(
            240.0, "fastest plausible beating; sets the minimum peak interval", "bpm", lo=1.0
        ),
        "min_snr": P(
            8.0, "minimum typical beat strength in units of the trace noise SD", "SD", lo=0.0
        ),
        "min_relative_prominence": P(
            0.2,
            "minimum peak prominence relative to the typical beat amplitude",
            "fraction",
            lo=0.0,
            hi=1.0,
        ),
        "interpolation": P(
            "cubic",
            "sub-frame landmarks: on the trace upsampled by a cubic spline through every frame, "
            "or literally linear crossings and a 3-sample parabola (biased at low frame rates)",
            choices=("cubic", "linear"),
        ),
        "secondary_prominence": P(
            0.1,
            "EAD-like secondary peak: minimum prominence",
            "fraction of amplitude",
            lo=0.0,
            hi=1.0,
        ),
        "secondary_min_level": P(
            0.2,
            "EAD-like secondary peak: only while the trace is above this level",
            "fraction of amplitude",
            lo=0.0,
            hi=1.0,
        ),
        "irregular_tolerance": P(
            0.25,
            "a beat is irregular when its IBI differs from the median IBI by more than this",
            "fraction",
            lo=0.0,
        ),
    },
    "rhythm": {
        "irregular_cv": P(0.15, "rhythm is irregular above this IBI CV", "fraction", lo=0.0),
        "irregular_fraction_max": P(
            0.1,
            "rhythm is irregular above this share of irregular IBIs",
            "fraction",
            lo=0.0,
            hi=1.0,
        ),
        "pause_factor": P(
            2.5,
            "rhythm is irregular when the longest pause exceeds this many median IBIs",
            "x IBI",
            lo=1.0,
        ),
    },
    "maps": {
        "tile_um": P(8.0, "side of the square tiles of the spatial maps", "um", lo=0.0),
        "min_snr": P(
            4.0,
            "a tile beats when its peak displacement stands this many noise SDs "
            "above its rest level",
            "SD",
            lo=0.0,
        ),
    },
    "regions": {
        "detect": P(True, "find independently beating regions automatically"),
        "min_area_um2": P(100.0, "smallest region analysed on its own", "um^2", lo=0.0),
        "merge_correlation": P(
            0.8,
            "clusters whose displacement traces correlate above this beat together and are merged",
            lo=-1.0,
            hi=1.0,
        ),
    },
    "holography": {
        "sideband": P(
            "auto",
            "which first order to demodulate (sets the phase sign)",
            choices=("auto", "+1", "-1"),
        ),
        "radius": P(
            0.0,
            "side-band window radius (0: automatic, a third of the carrier distance at most)",
            "cycles/px",
            lo=0.0,
            hi=0.5,
        ),
        "na": P(0.0, "objective NA for the window radius NA/lambda (0: not used)", lo=0.0, hi=1.6),
        "n_medium": P(1.333, "refractive index of the medium (for refocusing)", lo=1.0, hi=2.0),
        "refocus_um": P(0.0, "refocus distance (0: none)", "um"),
        "autofocus": P(False, "search the refocus distance for the sharpest phase image"),
    },
}


def default_config() -> dict[str, dict[str, Any]]:
    """Return a fresh nested dict of every parameter at its default."""
    return {
        sec: {k: copy.deepcopy(p.default) for k, p in keys.items()}
        for sec, keys in PARAMETERS.items()
    }


def _check_value(section: str, key: str, value: Any, param: Param) -> Any:
    name = f"{section}.{key}"
    default = param.default
    if value is None and param.nullable:
        return None
    if isinstance(default, bool):
        if not isinstance(value, bool):
            raise ConfigError(f"config key {name} must be true or false, got {value!r}")
        return value
    if isinstance(default, int) and not isinstance(default, bool):
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"config key {name} must be a whole number, got {value!r}")
    elif isinstance(default, float):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"config key {name} must be a number, got {value!r}")
        value = float(value)
        if not math.isfinite(value):
            raise ConfigError(f"config key {name} must be a finite number, got {value!r}")
    elif isinstance(default, str):
        if not isinstance(value, str):
            raise ConfigError(f"config key {name} must be a string, got {value!r}")
    if param.choices is not None and value not in param.choices:
        raise ConfigError(
            f"config key {name} must be one of {', '.join(map(str, param.choices))}; got {value!r}"
        )
    if param.lo is not None and value < param.lo:
        raise ConfigError(f"config key {name} must be >= {param.lo}, got {value!r}")
    if param.hi is not None and value > param.hi:
        raise ConfigError(f"config key {name} must be <= {param.hi}, got {value!r}")
    return value


def _did_you_mean(name: str, known, *, section: bool = False) -> str:
    close = difflib.get_close_matches(str(name), list(known), n=1)
    if not close:
        return ""
    return f" (did you mean [{close[0]}]?)" if section else f" (did you mean {close[0]}?)"


def merge_config(base: dict, overrides: dict) -> dict:
    """Validate ``overrides`` (nested sections) and merge them over ``base`` into a new dict.

    Raises
    ------
    ConfigError
        For an unknown section or key, or a value of the wrong type or range; the message
        names the key.
    """
    merged = copy.deepcopy(base)
    for section, values in overrides.items():
        if not isinstance(values, dict):
            homes = [sec for sec, keys in PARAMETERS.items() if section in keys]
            where = f"under [{homes[0]}]" if homes else "under its [section]"
            raise ConfigError(f"config key {section} is outside any [section]; put it {where}")
        if section not in PARAMETERS:
            hint = _did_you_mean(section, PARAMETERS, section=True)
            raise ConfigError(
                f"unknown config section [{section}]{hint}; known: {', '.join(PARAMETERS)}"
            )
        for key, value in values.items():
            if key not in PARAMETERS[section]:
                raise ConfigError(
                    f"unknown config key {section}.{key}"
                    f"{_did_you_mean(key, PARAMETERS[section])}; known in [{section}]: "
                    f"{', '.join(PARAMETERS[section])}"
                )
            merged[section][key] = _check_value(section, key, value, PARAMETERS[section][key])
    return merged


def load_config(source: str | os.PathLike | dict | None = None) -> dict:
    """Load a configuration: defaults, with a TOML file or a nested dict merged over them.

    Parameters
    ----------
    source : path-like, dict or None
        A TOML file, a nested dict of overrides, or None for the defaults.

    Returns
    -------
    dict
        The full nested parameter set.

    Raises
    ------
    ConfigError
        If the file is missing or not valid TOML, or a key is unknown or invalid.
    """
    if source is None:
        return default_config()
    if isinstance(source, dict):
        return merge_config(default_config(), source)
    path = Path(source)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(
            f"cannot read config file {path}: {exc.strerror}; check config=FILE"
        ) from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(
            f"config file {path} is not UTF-8 text; pass config=FILE naming a TOML file"
        ) from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(
            f"config file {path} is not valid TOML: {exc}; fix that line (see "
            "configs/default.toml)"
        ) from exc
    try:
        return merge_config(default_config(), data)
    except ConfigError as exc:
        raise ConfigError(f"{path}: {exc}") from None


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    return repr(value)


def default_toml() -> str:
    """Return the text of ``configs/default.toml``: every parameter with a comment."""
    lines = [
        "# beatlab analysis parameters: every key with its default.",
        "# Copy this file, keep only the keys you change, and pass it with --config FILE.",
        "# Generated from beatlab.config.PARAMETERS; a test keeps the two identical.",
    ]
    for section, params in PARAMETERS.items():
        lines += ["", f"[{section}]"]
        for key, p in params.items():
            note = p.help
            if p.unit:
                note += f" [{p.unit}]"
            if p.choices:
                note += f" (one of: {', '.join(map(str, p.choices))})"
            lines.append(f"# {note}")
            lines.append(f"{key} = {_toml_value(p.default)}")
    return "\n".join(lines) + "\n"
