"""The ``transforms`` setting: per-feature names, validated with clear messages."""
import pytest

from shoal.config import ConfigError, parse_config
from shoal.config.loading import dump_settings
from shoal.config.settings import TRANSFORM_NAMES
from shoal.core import TRANSFORMS


def test_transforms_default_to_none_and_follow_the_features():
    s = parse_config({"features": ["a", "b", "c"], "transforms": {"b": "log1p"}})
    assert s.transform_kinds == ("none", "log1p", "none")
    assert parse_config({"features": ["a"]}).transform_kinds == ("none",)
    assert "b: log1p" in dump_settings(s)


def test_config_names_are_the_core_names():
    assert TRANSFORM_NAMES == TRANSFORMS


@pytest.mark.parametrize("transforms, message", [
    ({"z": "log"}, r"transforms\.z: expected one of the features \['a', 'b'\], found 'z'"),
    ({"a": "sqrt"}, r"transforms\.a: expected one of 'none', 'log', 'log1p', 'logit', "
                    r"'yeo-johnson', found 'sqrt' \(str\)"),
    ({"a": 3}, r"transforms\.a: expected one of .* found 3 \(int\)"),
    (["a"], r"transforms: expected a mapping \{feature: none \| log"),
])
def test_bad_transforms_are_refused_by_name(transforms, message):
    with pytest.raises(ConfigError, match=message):
        parse_config({"features": ["a", "b"], "transforms": transforms})
