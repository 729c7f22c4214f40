"""Typed settings: one default per parameter, and the settings reach the stage functions."""

import dataclasses
import inspect
import typing

import pytest

from beatlab.beats import detect_beats, measure_beats
from beatlab.config import PARAMETERS, default_config, load_config
from beatlab.errors import ConfigError
from beatlab.frames import OPDSource
from beatlab.holography import OffAxisReconstructor
from beatlab.maps import build_maps
from beatlab.regions import find_regions, split_regions
from beatlab.rhythm import classify_rhythm, summarize_rhythm
from beatlab.settings import Settings, load_settings
from beatlab.signals.flow import compute_flow, refine_flow
from beatlab.signals.level import PlaneLeveller
from beatlab.signals.mask import make_cell_mask
from beatlab.signals.rest import estimate_rest_template
from beatlab.signals.traces import velocity_trace
from beatlab.signals.tracker import FlowTracker

_TYPES = {bool: "bool", int: "int", float: "float", str: "str"}


def test_every_section_and_key_has_a_typed_field():
    hints = typing.get_type_hints(Settings)
    assert list(hints) == list(PARAMETERS)
    for section, params in PARAMETERS.items():
        cls = hints[section]
        fields = {f.name: f for f in dataclasses.fields(cls)}
        assert list(fields) == list(params), section
        types = typing.get_type_hints(cls)
        for key, param in params.items():
            assert types[key] is type(param.default), f"{section}.{key}"
            assert fields[key].default is dataclasses.MISSING, "defaults live in PARAMETERS"


def test_settings_round_trip_the_nested_config():
    assert load_settings().to_dict() == default_config()
    overrides = {"beats": {"min_snr": 9.0}, "flow": {"preset": "medium"}}
    settings = load_settings(overrides)
    assert settings.beats.min_snr == 9.0 and settings.flow.preset == "medium"
    assert settings.to_dict() == load_config(overrides)
    assert load_settings(settings) is settings
    with pytest.raises(ConfigError, match=r"beats\.min_snr"):
        load_settings({"beats": {"min_snr": "high"}})


# (callable, {its parameter: (section, key)}): every signature default of a stage function
# that a configuration key sets must equal the parameter table's default.
def _keys(section, *names):
    """{parameter: (section, key)} for parameters named like their key."""
    return {name: (section, name) for name in (names or PARAMETERS[section])}


_FLOW = ("method", "preset", "refine_iterations", "window_px")
_SIGNATURES = [
    (detect_beats, _keys("beats", "max_rate_bpm", "min_snr", "min_relative_prominence")),
    (
        measure_beats,
        _keys(
            "beats", "secondary_prominence", "secondary_min_level", "irregular_tolerance",
            "interpolation",
        ),
    ),
    (summarize_rhythm, _keys("rhythm")),
    (classify_rhythm, _keys("rhythm")),
    (velocity_trace, _keys("velocity")),
    (
        estimate_rest_template,
        _keys("template", "rest_quantile", "max_rest_frames", "level_tilt", "refresh_s"),
    ),
    (make_cell_mask, _keys("mask")),
    (FlowTracker, _keys("flow", *_FLOW)),
    (compute_flow, _keys("flow", *_FLOW)),
    (refine_flow, {"iterations": ("flow", "refine_iterations"), **_keys("flow", "window_px")}),
    (build_maps, _keys("maps", "min_snr")),
    (find_regions, _keys("regions", "min_area_um2", "merge_correlation")),
    (split_regions, _keys("regions", "merge_correlation")),
    (OPDSource, _keys("input", "opd_scale", "phase_scale", "chunk_frames")),
    (PlaneLeveller, {"tilt": ("template", "level_tilt")}),
]  # fmt: skip


@pytest.mark.parametrize("func, keys", _SIGNATURES, ids=lambda v: getattr(v, "__name__", ""))
def test_signature_defaults_equal_the_parameter_table(func, keys):
    params = inspect.signature(func).parameters
    for name, (section, key) in keys.items():
        assert params[name].default == PARAMETERS[section][key].default, (
            f"{func.__name__}({name}=...) disagrees with [{section}] {key}"
        )


def test_flow_scale_percentiles_equal_the_parameter_table():
    from beatlab.signals.flow import flow_scale

    default = inspect.signature(flow_scale).parameters["percentiles"].default
    flow = PARAMETERS["flow"]
    assert default == (flow["percentile_low"].default, flow["percentile_high"].default)


def test_holography_defaults_equal_the_reconstructor_defaults():
    params = inspect.signature(OffAxisReconstructor.fit).parameters
    for key, value in load_settings().holography.fit_options().items():
        assert params[key].default == value, key
