"""YAML loading with line numbers, and pydantic validation that names file, line and field.

Every configuration file (sequence, bench, limits) goes through :func:`load_model`: unknown
keys are errors (models use ``extra="forbid"``), quantities are written as engineers write
them (``"600 V"``) and parsed by :func:`benchrun.units.parse_quantity` through the
:func:`quantity` annotated types, and the first problem is reported as a
:class:`~benchrun.errors.ConfigError` carrying ``file:line: field: message``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, TypeVar

import yaml
from pydantic import BaseModel, BeforeValidator, ConfigDict, ValidationError

from benchrun.errors import ConfigError, UnitError
from benchrun.units import parse_quantity

ModelT = TypeVar("ModelT", bound=BaseModel)

#: Largest configuration file read (bytes). Sequence, bench and limits files are a few kB.
MAX_DOCUMENT_BYTES = 1_000_000
#: Most values a document may hold once every alias is expanded (defeats "billion laughs").
MAX_EXPANDED_NODES = 100_000
#: Deepest nesting of mappings and lists.
MAX_DEPTH = 64
#: Largest magnitude (SI) a configuration quantity may have: above any bench quantity
#: (1e15 V, A, A/s, Hz ...), far below where squaring it overflows a float.
MAX_MAGNITUDE = 1e15


class StrictModel(BaseModel):
    """Base for configuration models: unknown keys are errors, models are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def _quantity_parser(dimension: str):
    def parse(value: Any) -> float:
        try:
            result = parse_quantity(value, dimension)
        except UnitError as exc:
            # pydantic turns ValueError into a validation error that keeps the location
            raise ValueError(exc.message) from None
        if abs(result) > MAX_MAGNITUDE:
            raise ValueError(f"{value!r} is beyond any bench quantity (more than "
                             f"{MAX_MAGNITUDE:g} in SI units); check the value and its prefix")
        return result

    return parse


def quantity(dimension: str) -> Any:
    """Annotated float type that accepts ``"600 V"``-style text of the given dimension."""
    return Annotated[float, BeforeValidator(_quantity_parser(dimension))]


def _bounded(dimension: str, *, low: float, high: float | None, low_inclusive: bool, what: str):
    parse = _quantity_parser(dimension)

    def check(value: Any) -> float:
        result = parse(value)
        above_low = result >= low if low_inclusive else result > low
        if not above_low or (high is not None and result >= high):
            raise ValueError(what.format(value=value))
        return result

    return check


Voltage = quantity("voltage")
Current = quantity("current")
Time = quantity("time")
Frequency = quantity("frequency")
Inductance = quantity("inductance")
Capacitance = quantity("capacitance")
Charge = quantity("charge")
Energy = quantity("energy")
Power = quantity("power")
Resistance = quantity("resistance")
CurrentSlope = quantity("current_slope")
Temperature = quantity("temperature")
TemperatureDifference = quantity("temperature_difference")

#: A relative value in [0, 1): ``"5 %"`` or ``0.05``.
Fraction = Annotated[float, BeforeValidator(_bounded(
    "dimensionless", low=0.0, high=1.0, low_inclusive=True,
    what="a relative value must lie between 0 and 100 %, got {value!r}"))]
#: A relative tolerance in (0, 1): ``"5 %"`` or ``0.05``.
Tolerance = Annotated[float, BeforeValidator(_bounded(
    "dimensionless", low=0.0, high=1.0, low_inclusive=False,
    what="a relative tolerance must lie between 0 and 100 %, got {value!r}"))]
#: A positive temperature difference: ``"3 K"`` (``"3 degC"`` is read as a difference).
TemperatureBand = Annotated[float, BeforeValidator(_bounded(
    "temperature_difference", low=0.0, high=None, low_inclusive=False,
    what="a temperature tolerance must be positive, got {value!r}"))]


#: YAML tags of plain data; anything else (``!!python/object``, ``!!binary``, ``!!set``,
#: merge keys ``<<``, local tags) is refused.
_PLAIN_TAGS = frozenset(
    f"tag:yaml.org,2002:{name}"
    for name in ("null", "bool", "int", "float", "str", "seq", "map", "timestamp")
)


_TIMESTAMP_TAG = "tag:yaml.org,2002:timestamp"


class _LineLoader(yaml.SafeLoader):
    """Safe loader that records the line of every mapping key and sequence item."""


def _short_tag(tag: str) -> str:
    return "!!" + tag.removeprefix("tag:yaml.org,2002:") if tag.startswith("tag:yaml.org") else tag


def _field(path: tuple[Any, ...]) -> str | None:
    return ".".join(str(part) for part in path) or None


def _load_with_lines(text: str, filename: str) -> tuple[Any, dict[tuple[Any, ...], int]]:
    lines: dict[tuple[Any, ...], int] = {}
    try:
        root = yaml.compose(text, Loader=_LineLoader)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = mark.line + 1 if mark is not None else None
        problem = getattr(exc, "problem", None) or str(exc)
        raise ConfigError(f"not valid YAML: {problem}", file=filename, line=line) from exc
    if root is None:
        return {}, lines
    visited = 0

    dates = _LineLoader("")

    def fail(message: str, node: yaml.Node, path: tuple[Any, ...]) -> None:
        shown = path if len(path) <= 8 else (*path[:8], "...")
        raise ConfigError(message, file=filename, line=node.start_mark.line + 1,
                          field=_field(shown))

    def walk(node: yaml.Node, path: tuple[Any, ...]) -> None:
        nonlocal visited
        visited += 1  # a node reached through several aliases counts every time
        if visited > MAX_EXPANDED_NODES:
            fail(f"the document expands to more than {MAX_EXPANDED_NODES} values "
                 "(aliases nested too deeply?); configuration files are small", node, path)
        if len(path) > MAX_DEPTH:
            fail(f"nested deeper than {MAX_DEPTH} levels (a recursive alias?)", node, path)
        if node.tag not in _PLAIN_TAGS:
            fail(f"YAML tag {_short_tag(node.tag)} is not allowed: configuration files hold "
                 "plain values only (text, numbers, true/false, dates, lists, mappings)",
                 node, path)
        if node.tag == _TIMESTAMP_TAG:
            try:
                dates.construct_yaml_timestamp(node)
            except (ValueError, OverflowError) as exc:
                fail(f"{node.value!r} is not a valid date ({exc})", node, path)
        lines.setdefault(path, node.start_mark.line + 1)
        if isinstance(node, yaml.MappingNode):
            first_line: dict[Any, int] = {}
            for key_node, value_node in node.value:
                if key_node.tag not in _PLAIN_TAGS:
                    fail(f"YAML key {_short_tag(key_node.tag)} is not allowed here (merge "
                         "keys and tagged keys hide which value wins; write keys out)",
                         key_node, path)
                if not isinstance(key_node, yaml.ScalarNode):
                    fail("a key must be plain text, not a list or mapping", key_node, path)
                key = key_node.value
                line = key_node.start_mark.line + 1
                if key in first_line:
                    fail(f"duplicate key {key!r} at lines {first_line[key]} and {line} (YAML "
                         "would silently keep only the last one); remove one",
                         key_node, (*path, key))
                first_line[key] = line
                lines[(*path, key)] = line
                walk(value_node, (*path, key))
                lines[(*path, key)] = line
        elif isinstance(node, yaml.SequenceNode):
            for index, item in enumerate(node.value):
                walk(item, (*path, index))

    try:
        walk(root, ())
    finally:
        dates.dispose()
    loader = _LineLoader(text)
    try:
        data = loader.get_single_data()
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = mark.line + 1 if mark is not None else None
        problem = getattr(exc, "problem", None) or str(exc)
        raise ConfigError(f"not valid YAML: {problem}", file=filename, line=line) from exc
    finally:
        loader.dispose()
    return data, lines


def _line_for(lines: dict[tuple[Any, ...], int], loc: tuple[Any, ...]) -> int | None:
    path = tuple(loc)
    while path:
        if path in lines:
            return lines[path]
        path = path[:-1]
    return lines.get(())


def read_yaml(path: str | Path) -> tuple[Any, dict[tuple[Any, ...], int]]:
    """Read a YAML file; returns the data and a map from key paths to line numbers."""
    path = Path(path)
    try:
        with path.open("rb") as fh:
            raw = fh.read(MAX_DOCUMENT_BYTES + 1)
    except OSError as exc:
        raise ConfigError(f"cannot read file: {exc.strerror}", file=str(path)) from exc
    if len(raw) > MAX_DOCUMENT_BYTES:
        raise ConfigError(f"larger than {MAX_DOCUMENT_BYTES // 1000} kB; a configuration file "
                          "is a few kB (is this the right file?)", file=str(path))
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise ConfigError("not UTF-8 text", file=str(path), line=line) from exc
    return _load_with_lines(text, str(path))


def validate(
    model: type[ModelT],
    data: Any,
    *,
    filename: str,
    lines: dict[tuple[Any, ...], int] | None = None,
    context: dict[str, Any] | None = None,
) -> ModelT:
    """Validate ``data`` against ``model``; the first error becomes a :class:`ConfigError`."""
    lines = lines or {}
    try:
        return model.model_validate(data, context=context)
    except ValidationError as exc:
        first = exc.errors()[0]
        loc = tuple(first.get("loc", ()))
        field = ".".join(str(part) for part in loc) or None
        message = first.get("msg", "invalid value")
        if first.get("type") == "extra_forbidden":
            message = "unknown key (check the spelling; unknown keys are not allowed)"
        elif first.get("type") == "missing":
            message = "required key is missing"
        message = message.removeprefix("Value error, ")
        line = _line_for(lines, loc)
        raise ConfigError(message, file=filename, line=line, field=field) from exc


def load_model(
    model: type[ModelT], path: str | Path, *, context: dict[str, Any] | None = None
) -> ModelT:
    """Load a YAML file and validate it against a pydantic model, errors at file:line."""
    data, lines = read_yaml(path)
    if data is None:
        data = {}
    return validate(model, data, filename=str(path), lines=lines, context=context)
