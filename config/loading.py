"""Read a YAML config into :class:`Settings`, rejecting anything doubtful.

The user's file is laid over the shipped ``default.yaml``; every key is then
checked against the dataclass that holds it. A problem raises
:class:`ConfigError` whose message names the key, what was expected and what
was found, e.g. ``watch.settle_seconds: expected a number >= 0, found 'soon'``.
"""
from __future__ import annotations

import collections.abc
import dataclasses
import difflib
import os
import re
import reprlib
import stat
import types
import typing
import urllib.parse
from importlib import resources
from pathlib import Path
from typing import Any, Mapping

import yaml

from shoal.config.settings import SegmentCount, Settings
from shoal.core.errors import ShoalError

__all__ = [
    "ConfigError",
    "load_config",
    "read_secret_file",
    "shown",
    "parse_config",
    "default_config_text",
    "settings_to_dict",
    "dump_settings",
]

_COLUMN_NAME = re.compile(r"^[^\x00-\x1f]{1,256}$")
# A config file is a few KiB; these bounds keep a hostile or mistaken one (a YAML alias
# bomb: a few lines that expand to billions of values) from hanging or filling memory.
MAX_CONFIG_BYTES = 1 << 20
MAX_CONFIG_VALUES = 100_000      # scalars, lists and mappings, counted through aliases
MAX_SECRET_BYTES = 64 << 10


class ConfigError(ShoalError, ValueError):
    """The configuration cannot be used. The message names the problem (a ``ValueError``
    too, for callers that check values)."""

    exit_code = 2


def default_config_text() -> str:
    """The shipped default configuration, as YAML text with comments."""
    return resources.files("shoal.config").joinpath("default.yaml").read_text("utf-8")


def _expanded_size(node: yaml.Node, limit: int) -> int:
    """How many values ``node`` stands for once its aliases are expanded (counted on the
    node graph, each distinct node once, so a bomb is measured without being built);
    stops counting past ``limit``."""
    sizes: dict[int, int] = {}
    stack = [(node, False)]
    while stack:
        current, children_done = stack.pop()
        if id(current) in sizes:
            continue
        if isinstance(current, yaml.SequenceNode):
            children = current.value
        elif isinstance(current, yaml.MappingNode):
            children = [n for pair in current.value for n in pair]
        else:
            sizes[id(current)] = 1
            continue
        if children_done:
            sizes[id(current)] = min(limit + 1, 1 + sum(sizes[id(c)] for c in children))
        else:
            stack.append((current, True))
            stack.extend((c, False) for c in children if id(c) not in sizes)
    return sizes[id(node)]


def _safe_load(text: str, source: str) -> Any:
    """``yaml.safe_load``, refusing a document that expands past MAX_CONFIG_VALUES."""
    loader = yaml.SafeLoader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        size = _expanded_size(node, MAX_CONFIG_VALUES)
        if size > MAX_CONFIG_VALUES:
            raise ConfigError(f"{source}: expected at most {MAX_CONFIG_VALUES} values, found "
                              "more once its YAML aliases (*name) are expanded: refused "
                              "unread (an alias bomb?)")
        return loader.construct_document(node)
    finally:
        loader.dispose()


def _read_yaml(text: str, source: str) -> dict:
    try:
        data = _safe_load(text, source)
    except yaml.YAMLError as exc:
        raise ConfigError(f"{source}: not valid YAML: {exc}") from exc
    except RecursionError as exc:
        raise ConfigError(f"{source}: not valid YAML: nested too deeply") from exc
    if data is None:
        return {}
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: expected a mapping of settings at the top level, "
                          f"found {_describe(data)}")
    return data


def load_config(path: str | Path) -> Settings:
    """Load ``path`` over the defaults. Relative folders are taken from the file's folder."""
    path = Path(path)
    try:
        raw = _read_regular_file(path, MAX_CONFIG_BYTES, "config file")
        text = raw.decode("utf-8")
    except FileNotFoundError as exc:
        raise ConfigError(f"config file {str(path)!r} does not exist") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"config file {str(path)!r} cannot be read: {exc}") from exc
    return parse_config(_read_yaml(text, str(path)), base_dir=path.resolve().parent)


def _read_regular_file(path: Path, max_bytes: int, what: str) -> bytes:
    """The bytes of ``path``, a regular file of at most ``max_bytes`` (opened without
    blocking, so a FIFO cannot hang the caller; a device such as /dev/zero is refused)."""
    fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            raise ConfigError(f"{what} {str(path)!r}: expected a regular file, found "
                              f"{_file_kind(st.st_mode)}")
        if st.st_size > max_bytes:
            raise ConfigError(f"{what} {str(path)!r}: expected at most {max_bytes} bytes, "
                              f"found {st.st_size}")
        os.set_blocking(fd, True)
        with os.fdopen(fd, "rb", closefd=False) as f:
            data = f.read(max_bytes + 1)
    finally:
        os.close(fd)
    if len(data) > max_bytes:    # it grew while read
        raise ConfigError(f"{what} {str(path)!r}: expected at most {max_bytes} bytes, found "
                          "more")
    return data


def _file_kind(mode: int) -> str:
    for test, name in ((stat.S_ISFIFO, "a FIFO"), (stat.S_ISCHR, "a character device"),
                       (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"),
                       (stat.S_ISDIR, "a folder")):
        if test(mode):
            return name
    return "not a regular file"


def read_secret_file(path: str | Path) -> bytes:
    """A webhook's signing secret: a regular file of at most 64 KiB, stripped.
    ConfigError when it is anything else; OSError when it cannot be read."""
    return _read_regular_file(Path(path), MAX_SECRET_BYTES, "secret_file").strip()


def parse_config(data: Mapping[str, Any], base_dir: str | Path = ".") -> Settings:
    """Build settings from a mapping (as YAML gives it), laid over the defaults."""
    if not isinstance(data, Mapping):
        raise ConfigError(f"expected a mapping of settings, found {_describe(data)}")
    defaults = _read_yaml(default_config_text(), "default.yaml")
    merged = _merge(defaults, dict(data))
    settings = _build(Settings, merged, "")
    base = Path(base_dir).resolve()
    folders = {name: (base / getattr(settings, name)).resolve()
               for name in ("inbox", "outbox", "state")}
    settings = dataclasses.replace(settings, **folders)
    settings = _resolve_alert_paths(settings, base)
    _check_whole(settings)
    _check_drift_and_alerts(settings)
    return settings


def _resolve_alert_paths(s: Settings, base: Path) -> Settings:
    """Alert file and webhook secret files, absolute (relative ones from the config's folder)."""
    a = s.alerts
    hooks = tuple(dataclasses.replace(h, secret_file=(base / h.secret_file).resolve())
                  if h.secret_file is not None else h for h in a.webhooks)
    file = (base / a.file).resolve() if a.file is not None else s.state / "alerts.jsonl"
    return dataclasses.replace(s, alerts=dataclasses.replace(a, file=file, webhooks=hooks))


def _check_drift_and_alerts(s: Settings) -> None:
    d = s.drift
    if d.time_column is not None and d.time_column not in s.passthrough:
        raise ConfigError(f"drift.time_column: expected one of the passthrough columns "
                          f"{shown(list(s.passthrough))}, found {shown(d.time_column)}")
    for i, o in enumerate(d.overrides):
        key = f"drift.overrides[{i}]"
        if o.feature is not None and o.feature not in s.features:
            raise ConfigError(f"{key}.feature: expected one of the features "
                              f"{shown(list(s.features))}, found {shown(o.feature)}")
        others = [n for n in ("mean_shift", "spread_ratio", "weight_change")
                  if getattr(o, n) is not None]
        if o.feature is not None and (others or o.feature_shift is None):
            raise ConfigError(f"{key}: expected only feature_shift beside feature, found "
                              f"{others or 'no feature_shift'}")
        if o.segment is None and o.feature is None:
            raise ConfigError(f"{key}: expected a segment or a feature to apply to, found "
                              "neither (set defaults in drift.bounds)")
    for i, h in enumerate(s.alerts.webhooks):
        key = f"alerts.webhooks[{i}]"
        url = urllib.parse.urlsplit(h.url)
        if url.scheme not in ("http", "https") or not url.hostname:
            raise ConfigError(f"{key}.url: expected an http:// or https:// URL with a host, "
                              f"found {shown(h.url)}")
        if url.username is not None or url.password is not None:
            # credentials in a URL are not sent (and would be logged with it): refused
            hidden = url._replace(netloc=f"***@{url.netloc.rsplit('@', 1)[-1]}").geturl()
            raise ConfigError(f"{key}.url: expected a URL without user:password@ (shoal "
                              f"signs each alert with the HMAC secret instead; put a token the "
                              f"receiver needs in its path or query), found {hidden!r}")
        if h.secret_file is None and h.secret_env is None:
            raise ConfigError(f"{key}: expected secret_file or secret_env (the HMAC signing "
                              "secret), found neither")
        if h.secret_file is not None and os.path.lexists(h.secret_file):
            try:   # checked now, not when the first alert is sent
                read_secret_file(h.secret_file)
            except ConfigError as exc:
                raise ConfigError(f"{key}.{exc}") from None
            except OSError:
                pass   # unreadable for now: logged when alerts are sent
    # The host allow-list is enforced, with a log line, when alerts are sent.


def _merge(base: dict, over: dict) -> dict:
    out = dict(base)
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict) and key != "segments":
            out[key] = _merge(out[key], value)
        else:
            out[key] = value
    return out


def _describe(value: Any) -> str:
    if value is None:
        return "nothing (null)"
    if isinstance(value, bool):
        return f"the boolean {value}"
    if isinstance(value, (dict, list)):
        return f"a {type(value).__name__} {shown(value)}"
    return f"{shown(value)} ({type(value).__name__})"


_SHOWN = reprlib.Repr()
_SHOWN.maxlevel, _SHOWN.maxstring, _SHOWN.maxother = 3, 60, 60
_SHOWN.maxlist = _SHOWN.maxtuple = _SHOWN.maxdict = _SHOWN.maxset = 8
_SHOWN_CHARS = 120


def shown(value: Any) -> str:
    """``repr(value)`` for a message, never whole when large (reprlib elides without
    building the whole text): cut to ~120 characters, with an ellipsis and the length."""
    text = _SHOWN.repr(value)
    if len(text) > _SHOWN_CHARS:
        text = text[:_SHOWN_CHARS - 3] + "..."
    if isinstance(value, str) and len(value) > _SHOWN.maxstring:
        text += f" ({len(value)} characters)"
    elif isinstance(value, (list, tuple, dict)) and \
            (len(value) > _SHOWN.maxlist or text.endswith("...")):
        text += f" ({len(value)} items)"
    return text


def _build(cls: type, data: Any, prefix: str):
    """Check ``data`` against dataclass ``cls`` field by field."""
    where = prefix.rstrip(".") or "the config"
    if not isinstance(data, dict):
        raise ConfigError(f"{where}: expected a mapping, found {_describe(data)}")
    fields = {f.name: f for f in dataclasses.fields(cls)}
    for key in data:
        if key not in fields:
            near = difflib.get_close_matches(str(key), list(fields), n=1, cutoff=0.75)
            hint = f"did you mean {prefix}{near[0]}? " if near else ""
            raise ConfigError(
                f"{prefix}{shown(key) if not isinstance(key, str) or len(key) > 60 else key}"
                f": unknown setting; {hint}expected one of "
                f"{', '.join(sorted(fields))}")
    hints = typing.get_type_hints(cls)
    values = {}
    for name, fld in fields.items():
        key = prefix + name
        if name not in data:
            if fld.metadata.get("required"):
                raise ConfigError(f"{key}: required; expected {_expected(hints[name], fld)}, "
                                  "found no such key")
            continue
        values[name] = _convert(data[name], hints[name], fld, key)
    return cls(**values)


def _expected(hint: Any, fld: dataclasses.Field) -> str:
    meta = fld.metadata
    if typing.get_origin(hint) is collections.abc.Mapping:
        keys = "feature" if fld.name == "transforms" else "column"
        return "a mapping {" + keys + ": " + " | ".join(meta.get("choices", ())) + "}"
    if "choices" in meta:
        return "one of " + ", ".join(repr(c) for c in meta["choices"])
    base = {int: "an integer", float: "a number", bool: "true or false", str: "a string",
            Path: "a folder path"}.get(hint)
    if hint is SegmentCount:
        return "an integer or a mapping {min: , max: }"
    if typing.get_origin(hint) is tuple and dataclasses.is_dataclass(typing.get_args(hint)[0]):
        return "a list of mappings"
    if typing.get_origin(hint) is tuple:
        return "a list of column names" + (" (at least one)" if meta.get("required") else "")
    if typing.get_origin(hint) is types.UnionType:
        inner = [a for a in typing.get_args(hint) if a is not type(None)][0]
        return _expected(inner, fld) + " or null"
    if base is None:
        return "a mapping"
    bounds = []
    if "min" in meta:
        bounds.append((">" if meta.get("min_open") else ">=") + f" {meta['min']}")
    if "max" in meta:
        bounds.append(f"<= {meta['max']}")
    return base + (" " + " and ".join(bounds) if bounds else "")


def _convert(value: Any, hint: Any, fld: dataclasses.Field, key: str):
    meta = fld.metadata

    def bad(what: str | None = None):
        return ConfigError(f"{key}: expected {what or _expected(hint, fld)}, "
                           f"found {_describe(value)}")

    if value is None and meta.get("required"):
        raise ConfigError(f"{key}: required; expected {_expected(hint, fld)}, found nothing")
    if typing.get_origin(hint) is types.UnionType:
        if value is None:
            return None
        inner = [a for a in typing.get_args(hint) if a is not type(None)][0]
        try:
            return _convert(value, inner, fld, key)
        except ConfigError:
            raise bad() from None
    if dataclasses.is_dataclass(hint):
        if hint is SegmentCount and isinstance(value, int) and not isinstance(value, bool):
            value = {"min": value, "max": value}
        if not isinstance(value, dict):
            raise bad()
        built = _build(hint, value, key + ".")
        if hint is SegmentCount and built.min > built.max:
            raise ConfigError(f"{key}: expected min <= max, found min={built.min}, "
                              f"max={built.max}")
        return built
    if typing.get_origin(hint) is collections.abc.Mapping:
        return _convert_mapping(value, fld, key, bad)
    if typing.get_origin(hint) is tuple and dataclasses.is_dataclass(typing.get_args(hint)[0]):
        if not isinstance(value, list):
            raise bad()
        inner = typing.get_args(hint)[0]
        return tuple(_build(inner, item, f"{key}[{i}].") for i, item in enumerate(value))
    if typing.get_origin(hint) is tuple:
        if not isinstance(value, list):
            raise bad()
        for item in value:
            if not isinstance(item, str) or not _COLUMN_NAME.match(item):
                raise bad(f"{_expected(hint, fld)}; each a non-empty string, found "
                          f"{_describe(item)} in the list")
        if len(set(value)) != len(value):
            dup = sorted({v for v in value if value.count(v) > 1})
            raise bad(f"names without repeats; {dup[0]!r} appears twice in the list")
        if meta.get("required") and not value:
            raise bad()
        return tuple(value)
    if hint is bool:
        if not isinstance(value, bool):
            raise bad()
        return value
    if hint is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise bad()
    elif hint is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or value != value:
            raise bad()
        value = float(value)
    elif hint is str:
        if not isinstance(value, str):
            raise bad()
        if "choices" in meta and value not in meta["choices"]:
            raise bad()
        return value
    elif hint is Path:
        if not isinstance(value, str) or not value or "\x00" in value:
            raise bad()
        return Path(value).expanduser()
    if "min" in meta and (value < meta["min"] or (meta.get("min_open") and value == meta["min"])):
        raise bad()
    if "max" in meta and value > meta["max"]:
        raise bad()
    return value


def _convert_mapping(value: Any, fld: dataclasses.Field, key: str, bad):
    """A mapping of column names to one of ``fld``'s choices (``transforms``)."""
    if value is None:
        value = {}
    if not isinstance(value, dict):
        raise bad()
    choices = fld.metadata.get("choices", ())
    for name, item in value.items():
        if not isinstance(name, str) or not _COLUMN_NAME.match(name):
            raise ConfigError(f"{key}: expected column names as keys, found {_describe(name)}")
        if item not in choices:
            raise ConfigError(f"{key}.{name}: expected one of "
                              f"{', '.join(repr(c) for c in choices)}, found {_describe(item)}")
    return types.MappingProxyType(dict(value))


def _check_whole(s: Settings) -> None:
    """Rules that involve more than one key."""
    unknown = [name for name in s.transforms if name not in s.features]
    if unknown:
        raise ConfigError(f"transforms.{unknown[0]}: expected one of the features "
                          f"{list(s.features)}, found {unknown[0]!r}")
    unknown = [name for name in s.passthrough_types if name not in s.passthrough]
    if unknown:
        raise ConfigError(f"passthrough_types.{unknown[0]}: expected one of the passthrough "
                          f"columns {list(s.passthrough)}, found {unknown[0]!r}")
    both = sorted(set(s.features) & set(s.passthrough))
    if both:
        raise ConfigError(f"passthrough: expected columns other than the features, found "
                          f"{both[0]!r} in both features and passthrough")
    reserved = {"segment", "confidence", "log_density", "unusual", "observed", "model_version"}
    clash = sorted(reserved & set(s.passthrough))
    if clash:
        raise ConfigError(f"passthrough: expected names other than the labels' own columns "
                          f"{sorted(reserved)}, found {clash[0]!r}")
    folders = {"inbox": s.inbox, "outbox": s.outbox, "state": s.state}
    names = list(folders)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            pa, pb = folders[a], folders[b]
            if pa == pb or pa in pb.parents or pb in pa.parents:
                raise ConfigError(f"{b}: expected a folder apart from {a} ({pa}), "
                                  f"found {pb}")
    if s.lifecycle.birth_rows > s.lifecycle.pool_rows:
        raise ConfigError(f"lifecycle.birth_rows: expected at most lifecycle.pool_rows "
                          f"({s.lifecycle.pool_rows}), found {s.lifecycle.birth_rows}")
    if s.learning.min_observed is not None and s.learning.min_observed > len(s.features):
        raise ConfigError(f"learning.min_observed: expected at most the number of features "
                          f"({len(s.features)}), found {s.learning.min_observed}")
    if s.segments.max * 2 > s.warmup_rows:
        raise ConfigError(f"warmup_rows: expected at least twice segments.max "
                          f"({2 * s.segments.max}), found {s.warmup_rows}")


def settings_to_dict(s: Any) -> Any:
    """Plain data (YAML-able) for ``s``: the effective configuration."""
    if isinstance(s, SegmentCount):
        return s.min if s.fixed else {"min": s.min, "max": s.max}
    if dataclasses.is_dataclass(s):
        return {f.name: settings_to_dict(getattr(s, f.name)) for f in dataclasses.fields(s)}
    if isinstance(s, collections.abc.Mapping):
        return {k: settings_to_dict(v) for k, v in s.items()}
    if isinstance(s, tuple):
        return [settings_to_dict(v) for v in s]
    if isinstance(s, Path):
        return str(s)
    return s


def dump_settings(s: Settings) -> str:
    return yaml.safe_dump(settings_to_dict(s), sort_keys=False, allow_unicode=True)
