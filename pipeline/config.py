# SPDX-License-Identifier: BSD-3-Clause
"""Reduction parameters: dataclass defaults, overridden by TOML files, checked first.

Each file has one table per stage, ``[stage] key = value``. Every key must be a
field of that stage's params dataclass and every value of the field's type
(an integer is accepted for a float field); the dataclass's own range checks
run when the params are built. Any violation is a :class:`ConfigError` naming
the file and the key, raised before any work starts.
"""

from __future__ import annotations

import dataclasses
import tomllib
import types
import typing
from pathlib import Path

from .errors import ConfigError

__all__ = ["DEFAULT_CONFIG", "load_params", "read_overrides", "read_toml", "require_field"]

DEFAULT_CONFIG = Path(__file__).resolve().parent.parent / "calib" / "reduction.toml"


def read_toml(path, what: str = "configuration file") -> dict:
    """Parse a TOML file; ``ConfigError`` naming the file if it is missing or not TOML."""
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(path, f"{what} not found") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, f"not valid TOML: {exc}") from None


def require_field(d: dict, key: str, typ, source, where: str = ""):
    """``d[key]`` checked to be of type ``typ`` (an int is accepted as a float);
    ``ConfigError`` naming the file and the dotted field otherwise."""
    if key not in d:
        raise ConfigError(source, f"missing field '{where}{key}'")
    value = d[key]
    if typ is float and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)
    if not isinstance(value, typ) or isinstance(value, bool) and typ is not bool:
        raise ConfigError(source, f"field '{where}{key}' should be {typ.__name__}, "
                                  f"found {type(value).__name__} {value!r}")
    return value


def read_overrides(path) -> dict:
    """The raw ``{stage: {key: value}}`` tables of one TOML file."""
    data = read_toml(path)
    for name, table in data.items():
        if not isinstance(table, dict):
            raise ConfigError(path, f"top-level key {name!r} should be a table [{name}] of "
                                    "stage parameters")
    return data


def _check_type(value, hint, source, where):
    origin = typing.get_origin(hint)
    if origin is typing.Literal:
        if value not in typing.get_args(hint):
            raise ConfigError(source, f"{where} must be one of {typing.get_args(hint)}, "
                                      f"found {value!r}")
        return value
    if origin in (typing.Union, types.UnionType):
        for arg in typing.get_args(hint):
            try:
                return _check_type(value, arg, source, where)
            except ConfigError:
                continue
        raise ConfigError(source, f"{where} should be {hint}, found {type(value).__name__} "
                                  f"{value!r}")
    if hint is type(None):
        if value is not None:
            raise ConfigError(source, f"{where} should be None")
        return value
    if origin in (tuple, list):
        if not isinstance(value, list):
            raise ConfigError(source, f"{where} should be an array, found {value!r}")
        args = [a for a in typing.get_args(hint) if a is not Ellipsis]
        if args:
            value = [_check_type(v, args[0] if len(args) == 1 or ... in typing.get_args(hint)
                                 else args[i], source, f"{where}[{i}]")
                     for i, v in enumerate(value)]
        return tuple(value) if origin is tuple else value
    if hint is float and isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    if hint in (int, float) and isinstance(value, bool) or not isinstance(value, hint):
        raise ConfigError(source, f"{where} should be {getattr(hint, '__name__', hint)}, "
                                  f"found {type(value).__name__} {value!r}")
    return value


def load_params(stages, files=(), *, also_known=()) -> dict:
    """Params instance per stage name: defaults, then each file's overrides in order.

    Parameters
    ----------
    stages : list of pipeline.stage.Stage
    files : paths of TOML files (later ones win)
    also_known : names of other stages whose tables are accepted and ignored (a
        reduction run with a subset of the stages)

    Raises
    ------
    ConfigError
        Unknown stage or key, wrong type, or a value the dataclass rejects.
    """
    by_name = {s.name: s for s in stages}
    values = {name: {} for name in by_name}
    origin = {name: {} for name in by_name}
    for path in files:
        for name, table in read_overrides(path).items():
            if name not in by_name and name in also_known:
                continue
            if name not in by_name:
                raise ConfigError(path, f"[{name}] is not a stage; stages are {list(by_name)}")
            cls = by_name[name].params
            hints = typing.get_type_hints(cls)
            field_names = {f.name for f in dataclasses.fields(cls)}
            for key, value in table.items():
                if key not in field_names:
                    raise ConfigError(path, f"[{name}] has no parameter {key!r}; known: "
                                            f"{sorted(field_names)}")
                values[name][key] = _check_type(value, hints[key], path, f"[{name}] {key}")
                origin[name][key] = str(path)
    params = {}
    for name, stage in by_name.items():
        try:
            params[name] = stage.params(**values[name])
        except (ValueError, TypeError) as exc:
            sources = sorted(set(origin[name].values())) or ["defaults of " + name]
            raise ConfigError(", ".join(sources), f"[{name}] {exc}") from None
    return params
