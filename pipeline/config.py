"""Settings: frozen dataclasses, one section per stage, loaded from TOML.

Each stage module owns the dataclass of its section (defaults and units beside each field);
this module only composes them and reads a TOML file over the defaults. ``configs/default.toml``
documents every key and a test keeps it identical to the dataclass defaults.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import tomllib
import typing
from pathlib import Path
from typing import Any

from pipeline.errors import ConfigError
from pipeline.settings import (EvaluateSettings, FitSettings, MatchSettings, PopulationSettings,
                               ReportSettings, ResponseSettings, VolumeSettings)


@dataclasses.dataclass(frozen=True)
class Config:
    """The whole configuration of one run."""

    volumes: VolumeSettings = VolumeSettings()
    matching: MatchSettings = MatchSettings()
    fitting: FitSettings = FitSettings()
    report: ReportSettings = ReportSettings()
    response: ResponseSettings = ResponseSettings()
    population: PopulationSettings = PopulationSettings()
    evaluate: EvaluateSettings = EvaluateSettings()

    def as_dict(self) -> dict[str, Any]:
        """Plain nested dict (tuples as lists), as written to ``provenance.json``."""
        return json.loads(json.dumps(dataclasses.asdict(self)))

    def digest(self, *sections: str) -> str:
        """SHA-256 of the named sections (all when none), for cache keys."""
        data = self.as_dict()
        chosen = {k: data[k] for k in (sections or data)}
        return hashlib.sha256(json.dumps(chosen, sort_keys=True).encode()).hexdigest()


def load_config(path: str | Path | None = None, **overrides: dict[str, Any]) -> Config:
    """Read ``path`` (TOML) over the defaults; unknown keys and wrong types are errors.

    Examples
    --------
    >>> load_config(None, volumes={"connectivity": 6}).volumes.connectivity
    6
    >>> load_config(None, volumes={"conectivity": 6})
    Traceback (most recent call last):
    ...
    pipeline.errors.ConfigError: unknown setting [volumes] conectivity; known: ...
    """
    data: dict[str, Any] = {}
    if path is not None:
        try:
            with open(path, "rb") as handle:
                data = tomllib.load(handle)
        except FileNotFoundError:
            raise ConfigError(f"{path}: configuration file not found") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    for section, values in overrides.items():
        data.setdefault(section, {}).update(values)
    return _build(Config, data, where=str(path) if path else "configuration")


def _build(cls: type, data: dict[str, Any], *, where: str, prefix: str = "") -> Any:
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls)}
    unknown = sorted(set(data) - set(fields))
    if unknown:
        label = f"[{prefix}] " if prefix else "section "
        raise ConfigError(f"unknown setting {label}{unknown[0]}; known: "
                          f"{', '.join(sorted(fields))} (in {where})")
    values = {}
    for name, value in data.items():
        kind = hints[name]
        if dataclasses.is_dataclass(kind):
            if not isinstance(value, dict):
                raise ConfigError(f"[{name}] must be a table of settings (in {where})")
            values[name] = _build(kind, value, where=where, prefix=name)
        else:
            values[name] = _coerce(value, kind, f"{prefix}.{name}" if prefix else name, where)
    try:
        return cls(**values) if not prefix else dataclasses.replace(cls(), **values)
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"[{prefix}] {exc} (in {where})") from None


def _coerce(value: Any, kind: Any, name: str, where: str) -> Any:
    origin = typing.get_origin(kind)
    args = typing.get_args(kind)
    if origin is typing.Union or str(origin) == "<class 'types.UnionType'>":
        if value is None or (isinstance(value, str) and value in ("", "n/a")):
            if type(None) in args:
                return None
        kinds = [a for a in args if a is not type(None)]
        return _coerce(value, kinds[0], name, where)
    if origin is tuple:
        if not isinstance(value, (list, tuple)):
            raise ConfigError(f"{name} must be a list, got {value!r} (in {where})")
        inner = args[0] if args else str
        return tuple(_coerce(v, inner, name, where) for v in value)
    if kind is float and isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    if kind is bool and isinstance(value, bool):
        return value
    if kind is int and isinstance(value, int) and not isinstance(value, bool):
        return value
    if kind is str and isinstance(value, str):
        return value
    raise ConfigError(f"{name} must be {getattr(kind, '__name__', kind)}, got {value!r} "
                      f"(in {where})")


def default_toml() -> str:
    """``configs/default.toml`` rendered from the settings dataclasses and their unit comments."""
    import inspect
    import re

    lines = ["# lesion-growth default configuration: every setting with its unit and default.",
             "# Copy what you want to change into your own file and pass it with --config;",
             "# keys you leave out keep these values. Research use only; not a medical device.", ""]
    for section in dataclasses.fields(Config):
        cls = section.type if isinstance(section.type, type) else typing.get_type_hints(Config)[
            section.name]
        source = inspect.getsource(cls)
        comments = dict(re.findall(r"^\s+(\w+):[^=\n]+=[^#\n]*#\s*(.*)$", source, flags=re.M))
        lines += [f"[{section.name}]  # {cls.__doc__.splitlines()[0]}"]
        for field in dataclasses.fields(cls):
            value = getattr(cls(), field.name)
            note = comments.get(field.name, "")
            lines.append(f"{field.name} = {_toml_value(value)}" + (f"  # {note}" if note else ""))
        lines.append("")
    return "\n".join(lines)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (tuple, list)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, str):
        return json.dumps(value)
    return repr(value)
