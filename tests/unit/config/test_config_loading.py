"""Config loading: defaults, typed values, and one clear error per kind of mistake."""
import dataclasses
from pathlib import Path

import pytest
import yaml

from shoal.config import (
    ConfigError,
    SegmentCount,
    Settings,
    default_config_text,
    dump_settings,
    load_config,
    parse_config,
)


def test_shipped_default_matches_the_dataclass_defaults():
    data = yaml.safe_load(default_config_text())
    data["features"] = ["a"]
    from_yaml = parse_config(data, "/base")
    from_classes = parse_config({"features": ["a"]}, "/base")
    assert from_yaml == from_classes
    # every key of the dataclasses appears in default.yaml (so it is documented there)
    for f in dataclasses.fields(Settings):
        assert f.name in data, f.name
        value = getattr(Settings(), f.name)
        if dataclasses.is_dataclass(value) and not isinstance(value, SegmentCount):
            assert set(data[f.name]) == {g.name for g in dataclasses.fields(value)}


def test_minimal_config_gets_defaults_and_absolute_folders(tmp_path):
    cfg = tmp_path / "c.yaml"
    cfg.write_text("features: [temp_c, power_kw]\nsegments: {min: 2, max: 6}\n")
    s = load_config(cfg)
    assert s.features == ("temp_c", "power_kw")
    assert s.segments == SegmentCount(2, 6) and not s.segments.fixed
    assert s.inbox == tmp_path / "inbox" and s.state == tmp_path / "state"
    assert s.half_life_rows == 50000 and s.covariance == "full"
    assert s.watch.settle_seconds == 1.0 and s.output.format == "parquet"
    # the effective config printed by `shoal config` reads back to the same settings
    assert parse_config(yaml.safe_load(dump_settings(s)), "/elsewhere") == s


def test_integer_segments_means_fixed():
    s = parse_config({"features": ["a"], "segments": 5})
    assert s.segments == SegmentCount(5, 5) and s.segments.fixed


@pytest.mark.parametrize("data, key, expected, found", [
    ({"features": ["a"], "colour": "blue"}, "colour", "unknown setting", "colour"),
    ({"features": ["a"], "watch": {"settle": 1}}, "watch.settle", "unknown setting", "settle"),
    ({"features": "a"}, "features", "a list of column names", "'a' (str)"),
    ({}, "features", "required", "found nothing"),
    ({"features": []}, "features", "at least one", "[]"),
    ({"features": ["a", "a"]}, "features", "without repeats", "'a'"),
    ({"features": ["a"], "warmup_rows": "many"}, "warmup_rows", "an integer >= 10", "'many'"),
    ({"features": ["a"], "warmup_rows": True}, "warmup_rows", "an integer", "boolean True"),
    ({"features": ["a"], "warmup_rows": 5}, "warmup_rows", ">= 10", "5 (int)"),
    ({"features": ["a"], "covariance": "tied"}, "covariance", "'full', 'diag', 'spherical'",
     "'tied'"),
    ({"features": ["a"], "half_life_rows": 0}, "half_life_rows", ">= 1 or null", "0 (int)"),
    ({"features": ["a"], "segments": {"min": 6, "max": 3}}, "segments", "min <= max", "min=6"),
    ({"features": ["a"], "segments": "four"}, "segments", "an integer or a mapping", "'four'"),
    ({"features": ["a"], "learning": {"step_exponent": 0.5}}, "learning.step_exponent",
     "> 0.5", "0.5"),
    ({"features": ["a"], "watch": {"ignore": "*.tmp"}}, "watch.ignore", "a list", "'*.tmp'"),
    ({"features": ["a"], "output": {"format": "xlsx"}}, "output.format", "'parquet', 'csv'",
     "'xlsx'"),
    ({"features": ["a"], "limits": {"max_rows": -1}}, "limits.max_rows", ">= 1", "-1"),
    ({"features": ["a"], "inbox": 7}, "inbox", "a folder path", "7 (int)"),
    ({"features": ["a"], "inbox": "x", "outbox": "x/out"}, "outbox", "apart from inbox", "x/out"),
    ({"features": ["a"], "passthrough": ["a"]}, "passthrough", "other than the features", "'a'"),
    ({"features": ["a"], "segments": 8, "warmup_rows": 12}, "warmup_rows", "at least twice",
     "12"),
])
def test_each_mistake_names_key_expected_and_found(data, key, expected, found):
    with pytest.raises(ConfigError) as info:
        parse_config(data, "/base")
    msg = str(info.value)
    assert msg.startswith(key + ":"), msg
    assert expected in msg and found in msg, msg


def test_yaml_that_is_not_a_mapping_or_not_yaml(tmp_path):
    bad = tmp_path / "list.yaml"
    bad.write_text("- a\n- b\n")
    with pytest.raises(ConfigError, match="expected a mapping of settings"):
        load_config(bad)
    broken = tmp_path / "broken.yaml"
    broken.write_text("features: [a\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(broken)
    with pytest.raises(ConfigError, match="does not exist"):
        load_config(tmp_path / "missing.yaml")


def test_yaml_is_loaded_safely(tmp_path):
    cfg = tmp_path / "evil.yaml"
    cfg.write_text("features: !!python/object/apply:os.system ['true']\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(cfg)
