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


class StrictModel(BaseModel):
    """Base for configuration models: unknown keys are errors, models are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def _quantity_parser(dimension: str):
    def parse(value: Any) -> float:
        try:
            return parse_quantity(value, dimension)
        except UnitError as exc:
            # pydantic turns ValueError into a validation error that keeps the location
            raise ValueError(exc.message) from None

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


class _LineLoader(yaml.SafeLoader):
    """Safe loader that records the line of every mapping key and sequence item."""


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

    def walk(node: yaml.Node, path: tuple[Any, ...]) -> None:
        lines.setdefault(path, node.start_mark.line + 1)
        if isinstance(node, yaml.MappingNode):
            for key_node, value_node in node.value:
                key = key_node.value
                lines[(*path, key)] = key_node.start_mark.line + 1
                walk(value_node, (*path, key))
                lines[(*path, key)] = key_node.start_mark.line + 1
        elif isinstance(node, yaml.SequenceNode):
            for index, item in enumerate(node.value):
                walk(item, (*path, index))

    walk(root, ())
    loader = _LineLoader(text)
    try:
        data = loader.get_single_data()
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
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read file: {exc.strerror}", file=str(path)) from exc
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
