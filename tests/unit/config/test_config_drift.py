"""The drift and alerts sections of the config: defaults, overrides, webhooks, mistakes."""
import pytest
import yaml

from shoal.config import ConfigError, dump_settings, parse_config


def test_defaults_and_a_full_round_trip(tmp_path):
    s = parse_config({"features": ["a", "b"], "passthrough": ["ts"],
                      "drift": {"time_column": "ts",
                                "overrides": [{"segment": 2, "mean_shift": 1.0},
                                              {"feature": "b", "feature_shift": 0.4}]},
                      "alerts": {"file": "out/alerts.jsonl", "allow_hosts": ["127.0.0.1"],
                                 "webhooks": [{"url": "http://127.0.0.1:9/x",
                                               "secret_file": "s.txt"}]}}, tmp_path)
    assert s.drift.bounds.mean_shift == 0.3 and s.drift.bounds.feature_shift is None
    assert s.drift.overrides[0].segment == 2 and s.drift.overrides[1].feature == "b"
    assert s.alerts.file == tmp_path / "out" / "alerts.jsonl"
    assert s.alerts.webhooks[0].secret_file == tmp_path / "s.txt"
    assert s.alerts.webhooks[0].retries == 8
    assert parse_config(yaml.safe_load(dump_settings(s)), "/elsewhere") == s
    plain = parse_config({"features": ["a"]}, tmp_path)
    assert plain.alerts.file == plain.state / "alerts.jsonl"


@pytest.mark.parametrize("data, needle", [
    ({"drift": {"time_column": "ts"}}, "drift.time_column: expected one of the passthrough"),
    ({"drift": {"overrides": [{"feature": "zz", "feature_shift": 1.0}]}},
     "drift.overrides[0].feature: expected one of the features"),
    ({"drift": {"overrides": [{"feature": "a", "mean_shift": 1.0}]}},
     "expected only feature_shift beside feature"),
    ({"drift": {"overrides": [{"mean_shift": 1.0}]}}, "expected a segment or a feature"),
    ({"drift": {"overrides": [{"segment": 1, "colour": 1}]}},
     "drift.overrides[0].colour: unknown setting"),
    ({"drift": {"overrides": {"segment": 1}}}, "drift.overrides: expected a list of mappings"),
    ({"drift": {"bounds": {"spread_ratio": 0.9}}}, "drift.bounds.spread_ratio: expected"),
    ({"alerts": {"webhooks": [{"url": "ftp://h/x", "secret_env": "S"}]}},
     "alerts.webhooks[0].url: expected an http:// or https:// URL"),
    ({"alerts": {"webhooks": [{"url": "https://h/x"}]}}, "expected secret_file or secret_env"),
    ({"alerts": {"webhooks": [{"secret_env": "S"}]}}, "alerts.webhooks[0].url: required"),
])
def test_mistakes_name_the_key(data, needle):
    with pytest.raises(ConfigError) as info:
        parse_config({"features": ["a"], **data}, "/base")
    assert needle in str(info.value)
