"""shoal.config: the service's configuration, typed, loaded and checked.

:mod:`shoal.config.settings` holds one frozen dataclass per section of the YAML file,
each field with its default, bounds and one line of help; :mod:`shoal.config.loading`
lays the user's file over the shipped ``default.yaml`` and checks every key, raising
:class:`ConfigError` with a message that names the key, what was expected and what was
found. The package imports only the core's names of covariance types and transforms,
never the daemon.
"""
from shoal.config.loading import (
    ConfigError,
    default_config_text,
    dump_settings,
    load_config,
    parse_config,
    read_secret_file,
    settings_to_dict,
    shown,
)
from shoal.config.settings import (
    COVARIANCE_TYPES,
    AlertSettings,
    BoundOverride,
    DriftBounds,
    DriftSettings,
    WebhookSettings,
    HttpSettings,
    LearningSettings,
    LifecycleSettings,
    LimitSettings,
    OutputSettings,
    RetentionSettings,
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
    "read_secret_file",
    "settings_to_dict",
    "shown",
    "COVARIANCE_TYPES",
    "AlertSettings",
    "BoundOverride",
    "DriftBounds",
    "DriftSettings",
    "WebhookSettings",
    "HttpSettings",
    "LearningSettings",
    "LifecycleSettings",
    "LimitSettings",
    "OutputSettings",
    "RetentionSettings",
    "SegmentCount",
    "Settings",
    "WatchSettings",
]
