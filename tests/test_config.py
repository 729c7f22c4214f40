from pathlib import Path

import pytest

from beatlab.config import PARAMETERS, default_config, default_toml, load_config, merge_config
from beatlab.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


def test_default_toml_file_matches_parameters():
    assert (ROOT / "configs" / "default.toml").read_text() == default_toml()


def test_default_toml_loads_to_defaults():
    assert load_config(ROOT / "configs" / "default.toml") == default_config()


def test_every_parameter_documented():
    for section, params in PARAMETERS.items():
        for key, p in params.items():
            assert p.help, f"{section}.{key} has no help"


def test_merge_overrides_without_mutating():
    base = default_config()
    merged = merge_config(base, {"beats": {"min_snr": 9}})
    assert merged["beats"]["min_snr"] == 9.0
    assert base["beats"]["min_snr"] == 8.0


@pytest.mark.parametrize(
    ("override", "message"),
    [
        ({"beats": {"nope": 1}}, "unknown config key beats.nope"),
        ({"nosection": {}}, r"unknown config section \[nosection\]"),
        ({"beats": {"min_snr": "high"}}, "beats.min_snr must be a number"),
        ({"beats": {"min_snr": -1}}, "beats.min_snr must be >= 0"),
        ({"flow": {"method": "magic"}}, "flow.method must be one of dis, farneback"),
        ({"template": {"level_tilt": 1}}, "template.level_tilt must be true or false"),
        ({"input": {"chunk_frames": 2.5}}, "input.chunk_frames must be a whole number"),
    ],
)
def test_bad_values_name_the_key(override, message):
    with pytest.raises(ConfigError, match=message):
        load_config(override)


def test_toml_errors(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[beats\nmin_snr = 3")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(bad)
    with pytest.raises(ConfigError, match="cannot read config file"):
        load_config(tmp_path / "missing.toml")
    good = tmp_path / "good.toml"
    good.write_text("[velocity]\nwindow_ms = 40\n")
    assert load_config(good)["velocity"]["window_ms"] == 40.0
