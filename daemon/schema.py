"""Declarative validation of nested YAML mappings, with key paths and line numbers in every error.

The service core, every driver and every sink describe their options with `Field` and `Section`;
one validator walks the loaded YAML, fills defaults, rejects unknown keys and reports the first
problem as `ConfigError("devices[0].channels[2].gauge_factor (line 31): ...")`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import yaml

__all__ = [
    "ConfigError",
    "Field",
    "Section",
    "ListOf",
    "MappingOf",
    "load_yaml_text",
    "validate",
    "line_of",
]

_MISSING = object()


class ConfigError(ValueError):
    """A configuration problem; the message names the key path and, where known, the line."""

    def __init__(self, path: str, message: str, line: int | None = None):
        self.path = path
        self.line = line
        self.reason = message
        where = path or "(top level)"
        if line is not None:
            where += f" (line {line})"
        super().__init__(f"{where}: {message}")


class LineDict(dict):
    """A dict that remembers the YAML line (1-based) of itself and of each of its keys."""

    line: int | None = None

    def __init__(self, *args: Any, **kwargs: Any):
        super().__init__(*args, **kwargs)
        self.key_lines: dict[Any, int] = {}


class LineList(list):
    """A list that remembers the YAML line of itself and of each item."""

    line: int | None = None

    def __init__(self, *args: Any):
        super().__init__(*args)
        self.item_lines: list[int] = []


class _LineLoader(yaml.SafeLoader):
    """SafeLoader whose mappings and sequences carry line numbers; duplicate keys are errors."""


def _construct_mapping(loader: _LineLoader, node: yaml.MappingNode) -> LineDict:
    loader.flatten_mapping(node)
    out = LineDict()
    out.line = node.start_mark.line + 1
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        if key in out:
            raise ConfigError(str(key), "duplicate key", key_node.start_mark.line + 1)
        out[key] = loader.construct_object(value_node, deep=True)
        out.key_lines[key] = key_node.start_mark.line + 1
    return out


def _construct_sequence(loader: _LineLoader, node: yaml.SequenceNode) -> LineList:
    out = LineList(loader.construct_object(child, deep=True) for child in node.value)
    out.line = node.start_mark.line + 1
    out.item_lines = [child.start_mark.line + 1 for child in node.value]
    return out


_LineLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)
_LineLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_SEQUENCE_TAG, _construct_sequence)


def load_yaml_text(text: str, source: str = "<config>") -> Any:
    """Parse YAML keeping line numbers; syntax errors become ConfigError with the line."""
    try:
        return yaml.load(text, Loader=_LineLoader)  # noqa: S506 - SafeLoader subclass
    except ConfigError:
        raise
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        raise ConfigError(source, f"YAML syntax error: {exc.problem or exc}", line) from None
    except yaml.YAMLError as exc:
        raise ConfigError(source, f"YAML error: {exc}") from None


def line_of(container: Any, key: Any = None) -> int | None:
    """Line of `key` inside `container` (or of the container itself when key is None)."""
    if key is None:
        return getattr(container, "line", None)
    if isinstance(container, LineDict):
        return container.key_lines.get(key, container.line)
    if isinstance(container, LineList) and isinstance(key, int) and key < len(container.item_lines):
        return container.item_lines[key]
    return getattr(container, "line", None)


def _join(path: str, key: Any) -> str:
    if isinstance(key, int):
        return f"{path}[{key}]"
    return f"{path}.{key}" if path else str(key)


@dataclass
class Field:
    """One scalar option: its type, default (absent means required), range, choices and unit.

    `kind` is one of float, int, str, bool, list, dict or a callable(value, path, line) -> value.
    Integers are accepted where a float is wanted; bools are never accepted as numbers.
    """

    kind: Any
    default: Any = _MISSING
    doc: str = ""
    unit: str = ""
    min: float | None = None
    max: float | None = None
    min_exclusive: bool = False
    choices: Sequence[Any] | None = None
    nullable: bool = False

    @property
    def required(self) -> bool:
        return self.default is _MISSING

    def check(self, value: Any, path: str, line: int | None) -> Any:
        if value is None:
            if self.nullable:
                return None
            raise ConfigError(path, f"must not be empty (expected {self._kind_name()})", line)
        kind = self.kind
        if kind is float:
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise ConfigError(path, f"expected a number, got {value!r}", line)
            value = float(value)
            if not math.isfinite(value):
                raise ConfigError(path, f"must be finite, got {value!r}", line)
        elif kind is int:
            if isinstance(value, bool) or not isinstance(value, int):
                raise ConfigError(path, f"expected an integer, got {value!r}", line)
        elif kind is bool:
            if not isinstance(value, bool):
                raise ConfigError(path, f"expected true or false, got {value!r}", line)
        elif kind is str:
            if not isinstance(value, str):
                raise ConfigError(path, f"expected text, got {value!r}", line)
        elif kind is list:
            if not isinstance(value, list):
                raise ConfigError(path, f"expected a list, got {value!r}", line)
        elif kind is dict:
            if not isinstance(value, dict):
                raise ConfigError(path, f"expected a mapping, got {value!r}", line)
        elif callable(kind):
            return kind(value, path, line)
        if self.choices is not None and value not in self.choices:
            options = ", ".join(repr(c) for c in self.choices)
            raise ConfigError(path, f"must be one of {options}, got {value!r}", line)
        if self.min is not None:
            if value < self.min or (self.min_exclusive and value == self.min):
                op = ">" if self.min_exclusive else ">="
                raise ConfigError(path, f"must be {op} {self.min:g}{self._unit()}, got {value!r}", line)
        if self.max is not None and value > self.max:
            raise ConfigError(path, f"must be <= {self.max:g}{self._unit()}, got {value!r}", line)
        return value

    def _unit(self) -> str:
        return f" {self.unit}" if self.unit else ""

    def _kind_name(self) -> str:
        return {float: "a number", int: "an integer", str: "text", bool: "true or false",
                list: "a list", dict: "a mapping"}.get(self.kind, "a value")


@dataclass
class Section:
    """A mapping with known keys: each key is a Field, Section, ListOf or MappingOf.

    `open_keys=True` accepts keys not declared (for option blocks validated later by a plugin).
    `check` runs after the keys are validated, for rules that tie several keys together; it gets
    the validated dict, the path and the source mapping (for line numbers) and may raise.
    """

    fields: Mapping[str, Any]
    doc: str = ""
    open_keys: bool = False
    check: Callable[[dict, str, Any], None] | None = None
    default: Any = field(default=_MISSING)

    @property
    def required(self) -> bool:
        return self.default is _MISSING and any(
            getattr(f, "required", False) for f in self.fields.values()
        )


@dataclass
class ListOf:
    """A list whose items all follow one spec."""

    item: Any
    min_items: int = 0
    max_items: int | None = None
    default: Any = _MISSING
    doc: str = ""
    unique_key: str | None = None

    @property
    def required(self) -> bool:
        return self.default is _MISSING


@dataclass
class MappingOf:
    """A mapping from free-form names to values that all follow one spec."""

    value: Any
    default: Any = field(default_factory=dict)
    doc: str = ""

    @property
    def required(self) -> bool:
        return self.default is _MISSING


def validate(spec: Any, value: Any, path: str = "", line: int | None = None) -> Any:
    """Validate `value` against `spec`, returning plain Python data with defaults filled in."""
    if isinstance(spec, Field):
        return spec.check(value, path, line)
    if isinstance(spec, Section):
        if value is None:
            if spec.default is None:  # an optional section written as `key:` or `key: null`
                return None
            value = {}
        if not isinstance(value, dict):
            raise ConfigError(path, f"expected a mapping, got {value!r}", line)
        out: dict[str, Any] = {}
        for key in value:
            if key not in spec.fields and not spec.open_keys:
                known = ", ".join(sorted(spec.fields)) or "(none)"
                raise ConfigError(_join(path, key), f"unknown key (known keys here: {known})",
                                  line_of(value, key))
        for key, sub in spec.fields.items():
            sub_path = _join(path, key)
            if key in value:
                out[key] = validate(sub, value[key], sub_path, line_of(value, key))
            elif isinstance(sub, Section) and sub.default is _MISSING:
                out[key] = validate(sub, {}, sub_path, line_of(value))
            elif getattr(sub, "default", _MISSING) is _MISSING:
                raise ConfigError(sub_path, "required key is missing", line_of(value))
            else:
                default = sub.default
                out[key] = default() if callable(default) and not isinstance(default, type) \
                    else _copy(default)
        if spec.open_keys:
            for key in value:
                if key not in spec.fields:
                    out[key] = value[key]
        if spec.check is not None:
            spec.check(out, path, value)
        return out
    if isinstance(spec, ListOf):
        if not isinstance(value, list):
            raise ConfigError(path, f"expected a list, got {value!r}", line)
        if len(value) < spec.min_items:
            raise ConfigError(path, f"needs at least {spec.min_items} item(s)", line)
        if spec.max_items is not None and len(value) > spec.max_items:
            raise ConfigError(path, f"takes at most {spec.max_items} item(s), got {len(value)}", line)
        items = [validate(spec.item, v, _join(path, i), line_of(value, i)) for i, v in enumerate(value)]
        if spec.unique_key:
            seen: dict[Any, int] = {}
            for i, item in enumerate(items):
                k = item.get(spec.unique_key)
                if k in seen:
                    raise ConfigError(_join(_join(path, i), spec.unique_key),
                                      f"duplicate {spec.unique_key} {k!r} (also at index {seen[k]})",
                                      line_of(value, i))
                seen[k] = i
        return items
    if isinstance(spec, MappingOf):
        if not isinstance(value, dict):
            raise ConfigError(path, f"expected a mapping, got {value!r}", line)
        return {k: validate(spec.value, v, _join(path, k), line_of(value, k)) for k, v in value.items()}
    raise TypeError(f"not a schema spec: {spec!r}")


def _copy(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _copy(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_copy(v) for v in value]
    return value
