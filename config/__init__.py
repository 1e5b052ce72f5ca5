"""Settings: typed configuration, YAML loading and validation, the default config."""
from shoal.config.loading import (
    ConfigError,
    default_config_text,
    dump_settings,
    load_config,
    parse_config,
    settings_to_dict,
)
from shoal.config.settings import (
    COVARIANCE_TYPES,
    HttpSettings,
    LearningSettings,
    LimitSettings,
    OutputSettings,
    SegmentCount,
    Settings,
    WatchSettings,
)

__all__ = [
    "ConfigError",
    "default_config_text",
    "dump_settings",
    "load_config",
    "parse_config",
    "settings_to_dict",
    "COVARIANCE_TYPES",
    "HttpSettings",
    "LearningSettings",
    "LimitSettings",
    "OutputSettings",
    "SegmentCount",
    "Settings",
    "WatchSettings",
]
