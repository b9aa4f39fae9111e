"""Settings from a TOML file, environment variables and command-line flags (flags win).

Each daemon declares its settings as a frozen dataclass whose fields carry a help text in
their metadata; `load_settings` layers defaults < file < environment < flags and
validates types, so a bad value fails with the setting's name and where it came from.
"""

from __future__ import annotations

import dataclasses
import os
import tomllib
import types
import typing
from pathlib import Path
from typing import Any, Mapping, TypeVar

T = TypeVar("T")


class ConfigError(ValueError):
    """A setting could not be read or has an invalid value; the message names it and its source."""


def setting(default: Any, help: str, *, env: str | None = None) -> Any:  # noqa: A002 - mirrors click
    """Declare a dataclass field with a help text (shown by --help) and optional env name."""
    if isinstance(default, (list, dict, set)):
        factory = type(default)
        value = default
        return dataclasses.field(default_factory=lambda: factory(value), metadata={"help": help, "env": env})
    return dataclasses.field(default=default, metadata={"help": help, "env": env})


def check_address(name: str, value: str) -> None:
    """A HOST:PORT setting: ConfigError naming the setting unless the port is a number 0..65535."""
    host, sep, port = value.rpartition(":")
    if not sep or not host or not port.isdigit() or not 0 <= int(port) <= 65535:
        raise ConfigError(f"setting '{name}': {value!r} is not HOST:PORT with a port 0..65535")


def env_name(prefix: str, field_name: str, declared: str | None = None) -> str:
    return declared or f"{prefix}{field_name.upper()}"


def _base_type(tp: Any) -> tuple[Any, bool]:
    """Strip Optional[...] and return (type, optional)."""
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        args = [a for a in typing.get_args(tp) if a is not type(None)]
        if len(args) == 1:
            return args[0], True
    return tp, False


def _coerce(name: str, source: str, raw: Any, tp: Any) -> Any:
    base, optional = _base_type(tp)
    if raw is None:
        if optional:
            return None
        raise ConfigError(f"setting '{name}' from {source}: a value is required")
    origin = typing.get_origin(base)
    try:
        if origin in (list, tuple):
            (item_tp,) = typing.get_args(base)[:1] or (str,)
            if isinstance(raw, str):
                items = [part.strip() for part in raw.split(",") if part.strip()]
            elif isinstance(raw, (list, tuple)):
                items = list(raw)
            else:
                raise TypeError
            return (tuple if origin is tuple else list)(_coerce(name, source, i, item_tp) for i in items)
        if base is bool:
            if isinstance(raw, bool):
                return raw
            text = str(raw).strip().lower()
            if text in ("1", "true", "yes", "on"):
                return True
            if text in ("0", "false", "no", "off"):
                return False
            raise ValueError
        if base is int:
            if isinstance(raw, bool):
                raise TypeError
            if isinstance(raw, float) and not raw.is_integer():
                raise ValueError
            return int(raw)
        if base is float:
            if isinstance(raw, bool):
                raise TypeError
            return float(raw)
        if base is str:
            if not isinstance(raw, (str, int, float)):
                raise TypeError
            return str(raw)
        if base is Path:
            return Path(str(raw))
    except (TypeError, ValueError):
        pass
    else:
        raise ConfigError(f"setting '{name}' has an unsupported type {base!r}")
    type_name = getattr(base, "__name__", str(base))
    raise ConfigError(f"setting '{name}' from {source}: {raw!r} is not a valid {type_name}")


def read_toml(path: Path, section: str | None) -> dict[str, Any]:
    """Read a TOML config file; `section` selects a table ([node], [coordinator], ...)."""
    try:
        with path.open("rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"config file {path} does not exist") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config file {path} is not valid TOML: {exc}") from None
    except UnicodeDecodeError as exc:   # found by fuzzing (tests/fuzz/fuzz_decoders.py config)
        raise ConfigError(f"config file {path} is not UTF-8 text (TOML files are UTF-8): {exc}") from None
    except (IsADirectoryError, PermissionError) as exc:
        raise ConfigError(f"config file {path} cannot be read: {exc.strerror}") from None
    if section is not None:
        table = data.get(section, {})
        if not isinstance(table, dict):
            raise ConfigError(f"config file {path}: [{section}] must be a table")
        return dict(table)
    return data


def load_settings(
    cls: type[T],
    *,
    config_file: Path | None = None,
    section: str | None = None,
    env_prefix: str = "SHARDSIEVE_",
    environ: Mapping[str, str] | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> T:
    """Layer defaults < config file < environment < overrides (non-None flag values).

    Unknown keys in the file are an error (a typo must not silently fall back to a default).
    """
    environ = os.environ if environ is None else environ
    fields = {f.name: f for f in dataclasses.fields(cls)}  # type: ignore[arg-type]
    hints = typing.get_type_hints(cls)
    values: dict[str, Any] = {}
    if config_file is not None:
        file_values = read_toml(config_file, section)
        for key, raw in file_values.items():
            name = key.replace("-", "_")
            if name not in fields:
                known = ", ".join(sorted(f.replace("_", "-") for f in fields))
                raise ConfigError(f"config file {config_file}: unknown setting '{key}' (known: {known})")
            values[name] = _coerce(key, f"config file {config_file}", raw, hints[name])
    for name, f in fields.items():
        var = env_name(env_prefix, name, f.metadata.get("env"))
        if var in environ:
            values[name] = _coerce(name, f"environment variable {var}", environ[var], hints[name])
    for name, raw in (overrides or {}).items():
        if raw is None or (isinstance(raw, (tuple, list)) and len(raw) == 0):
            continue
        if name not in fields:
            raise ConfigError(f"unknown setting '{name}'")
        values[name] = _coerce(name, f"option --{name.replace('_', '-')}", raw, hints[name])
    instance = cls(**values)
    validate = getattr(instance, "validate", None)
    if callable(validate):
        validate()
    return instance


def describe(cls: type, env_prefix: str = "SHARDSIEVE_") -> str:
    """A text table of every setting, its default and environment variable (for --help epilogs)."""
    lines = []
    for f in dataclasses.fields(cls):
        default = f.default if f.default is not dataclasses.MISSING else (
            f.default_factory() if f.default_factory is not dataclasses.MISSING else None)  # type: ignore[misc]
        lines.append(f"{f.name.replace('_', '-')} (env {env_name(env_prefix, f.name, f.metadata.get('env'))}, "
                     f"default {default!r}): {f.metadata.get('help', '')}")
    return "\n".join(lines)
