"""Typed, validated reading of TOML tables into frozen dataclasses.

A dataclass is the schema: its fields are the keys, their annotations the types, their defaults
make a key optional, and ``field(metadata={"check": ...})`` adds a value check. Reading refuses
unknown keys (with a suggestion for typos), missing keys, wrong types and impossible values, and
every message names the file and the dotted key. Cross-field rules live in the dataclass's
``__post_init__`` and raise :class:`Invalid` naming the key at fault.

Supported annotations: ``str``, ``int``, ``float`` (an integer is accepted; NaN and infinities
are refused), ``bool``, ``Path`` (resolved against the file's folder), ``Literal[...]``,
``X | None`` (optional: absent means ``None``), ``X | Y`` (the first that fits),
``tuple[X, ...]``, ``tuple[X, Y]``, ``dict[str, X]``, ``Any`` (kept raw), nested dataclasses,
and classes with a
``from_toml(value, key, file)`` classmethod for values that take more than one form.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import types
import typing
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any, Literal, TypeVar

from sensor.errors import SiteConfigError

T = TypeVar("T")

Check = Callable[[Any], str | None]
"""A value check: returns what is wrong, or None."""


class Invalid(ValueError):
    """Raised by a schema dataclass's ``__post_init__``: ``key`` is relative to the table."""

    def __init__(self, key: str, problem: str) -> None:
        self.key = key
        self.problem = problem
        super().__init__(f"{key}: {problem}")


def positive(value: float) -> str | None:
    return None if value > 0 else f"must be positive; got {value}"


def non_negative(value: float) -> str | None:
    return None if value >= 0 else f"cannot be negative; got {value}"


def open_fraction(value: float) -> str | None:
    return None if 0 < value < 1 else f"must be between 0 and 1 (exclusive); got {value}"


def at_least(minimum: float) -> Check:
    def check(value: float) -> str | None:
        return None if value >= minimum else f"must be at least {minimum}; got {value}"

    return check


def ascending_pair(value: tuple[float, float]) -> str | None:
    return (
        None if value[0] < value[1] else f"must be [low, high] with low < high; got {list(value)}"
    )


def check(*checks: Check) -> dict[str, Any]:
    """Field metadata attaching value checks: ``field(metadata=check(positive))``."""
    return {"checks": checks}


def _join(prefix: str, key: str) -> str:
    if not prefix:
        return key
    return f"{prefix}{key}" if key.startswith("[") else f"{prefix}.{key}"


def _type_name(value: Any) -> str:
    names = {
        bool: "true/false",
        int: "an integer",
        float: "a number",
        str: "a string",
        list: "a list",
        dict: "a table",
    }
    return names.get(type(value), type(value).__name__)


def read_table(cls: type[T], table: Any, file: Path, prefix: str = "") -> T:
    """Build dataclass ``cls`` from TOML ``table``; ``prefix`` is the table's dotted key."""
    if not isinstance(table, Mapping):
        raise SiteConfigError(file, prefix, f"must be a table; got {_type_name(table)}")
    hints = typing.get_type_hints(cls)
    init_fields = [f for f in dataclasses.fields(cls) if f.init]
    names = [f.name for f in init_fields]
    for key in table:
        if key not in names:
            close = difflib.get_close_matches(key, names, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise SiteConfigError(file, _join(prefix, key), f"unknown key{hint}")
    values: dict[str, Any] = {}
    for f in init_fields:
        key = _join(prefix, f.name)
        if f.name not in table:
            required = f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
            if required:
                raise SiteConfigError(file, key, "missing (this key is required)")
            continue
        value = read_value(hints[f.name], table[f.name], file, key)
        for value_check in f.metadata.get("checks", ()):
            problem = value_check(value)
            if problem:
                raise SiteConfigError(file, key, problem)
        values[f.name] = value
    try:
        return cls(**values)
    except Invalid as error:
        raise SiteConfigError(file, _join(prefix, error.key), error.problem) from None


def read_value(annotation: Any, value: Any, file: Path, key: str) -> Any:
    """Convert one TOML value to ``annotation``, or raise naming ``key``."""
    if annotation is Any:
        return value  # kept raw: validated by whoever owns it (the [simulator] table)
    origin = typing.get_origin(annotation)
    args = typing.get_args(annotation)
    if origin in (typing.Union, types.UnionType):
        options = [a for a in args if a is not type(None)]
        if len(options) == 1:
            return read_value(options[0], value, file, key)
        problems = []
        for option in options:
            try:
                return read_value(option, value, file, key)
            except SiteConfigError as error:
                problems.append(error.problem)
        raise SiteConfigError(file, key, " or ".join(problems))
    if origin is Literal:
        if value not in args:
            choices = ", ".join(repr(a) for a in args)
            raise SiteConfigError(file, key, f"must be one of {choices}; got {value!r}")
        return value
    if origin is tuple:
        if not isinstance(value, list):
            raise SiteConfigError(file, key, f"must be a list; got {_type_name(value)}")
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(
                read_value(args[0], item, file, f"{key}[{i}]") for i, item in enumerate(value)
            )
        if len(value) != len(args):
            raise SiteConfigError(file, key, f"must be a list of {len(args)}; got {len(value)}")
        return tuple(
            read_value(a, item, file, f"{key}[{i}]")
            for i, (a, item) in enumerate(zip(args, value, strict=True))
        )
    if origin is dict:
        if not isinstance(value, Mapping):
            raise SiteConfigError(file, key, f"must be a table; got {_type_name(value)}")
        return {k: read_value(args[1], v, file, f"{key}.{k}") for k, v in value.items()}
    if hasattr(annotation, "from_toml"):
        return annotation.from_toml(value, key, file)
    if dataclasses.is_dataclass(annotation):
        return read_table(annotation, value, file, key)
    return _read_scalar(annotation, value, file, key)


def _read_scalar(annotation: Any, value: Any, file: Path, key: str) -> Any:
    if annotation is bool:
        if isinstance(value, bool):
            return value
        raise SiteConfigError(file, key, f"must be true or false; got {_type_name(value)}")
    if annotation is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
        raise SiteConfigError(file, key, f"must be an integer; got {_type_name(value)}")
    if annotation is float:
        if isinstance(value, int | float) and not isinstance(value, bool):
            if not math.isfinite(value):
                raise SiteConfigError(file, key, f"must be a finite number; got {value}")
            return float(value)
        raise SiteConfigError(file, key, f"must be a number; got {_type_name(value)}")
    if annotation is str:
        if isinstance(value, str):
            return value
        raise SiteConfigError(file, key, f"must be a string; got {_type_name(value)}")
    if annotation is Path:
        if isinstance(value, str) and value:
            path = Path(value).expanduser()
            return path if path.is_absolute() else (file.parent / path).resolve()
        raise SiteConfigError(file, key, f"must be a file path (a string); got {value!r}")
    raise TypeError(f"unsupported annotation {annotation!r} at {key}")
