"""Checks across files: limits against the sequence, and orderings inside one limits file.

Each file can be valid on its own and the combination still be useless: a limits condition
that no test point of the sequence reaches makes every device "invalid" *after* every shot has
fired; a limit on a metric the sequence does not capture (Eon needs the switch voltage) does
the same. :func:`check_run_files` runs before anything is energised (the runner's
``prepare``); :func:`check_bin_order` whenever a limits file is loaded. Every problem is a
:class:`~benchrun.errors.ConfigError` at ``file:line: field: message``.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from benchrun.config.loader import read_yaml
from benchrun.errors import ConfigError
from benchrun.units import format_si

if TYPE_CHECKING:
    from benchrun.config.limits import LimitsSpec
    from benchrun.config.sequence import SequenceConfig

#: Metrics measured only with a switch-voltage channel (``switch_voltage: true`` in the
#: sequence); without it the analysis gives no value and every device would grade invalid.
NEEDS_SWITCH_VOLTAGE = frozenset({"eon_J", "eon_recovery_J", "eon_ideal_J"})


def _line(lines: dict[tuple[Any, ...], int], path: tuple[Any, ...]) -> int | None:
    probe = path
    while probe:
        if probe in lines:
            return lines[probe]
        probe = probe[:-1]
    return lines.get(())


def _fail(message: str, filename: str, lines: dict[tuple[Any, ...], int],
          path: tuple[Any, ...]) -> None:
    raise ConfigError(message, file=filename, line=_line(lines, path),
                      field=".".join(str(part) for part in path) or None)


def check_bin_order(spec: LimitsSpec, filename: str,
                    lines: dict[tuple[Any, ...], int]) -> None:
    """Bin classes must be in ascending order, each one reachable.

    A device falls in the *first* class whose bounds hold its value, so a class whose upper
    bound is not above the previous one's can never be chosen (or takes devices meant for a
    later one), and a class open above (no ``max``) must come last.
    """
    if spec.bins is None:
        return
    previous_max: float | None = None
    previous_name = ""
    classes = spec.bins.classes
    for index, item in enumerate(classes):
        where = ("bins", "classes", index)
        if index > 0 and previous_max is None:
            _fail(f"class {item.name!r} follows {previous_name!r}, which has no 'max' (open "
                  "above), so it can never be chosen; list classes in ascending order",
                  filename, lines, where)
        if item.max is not None and previous_max is not None and item.max <= previous_max:
            _fail(f"class {item.name!r} (max {item.max:g}) is not above the previous class "
                  f"{previous_name!r} (max {previous_max:g}): bins are chosen in file order, "
                  "list them in ascending order", filename, lines, where)
        if item.min is not None and previous_max is not None and item.min < previous_max:
            _fail(f"class {item.name!r} (min {item.min:g}) overlaps the previous class "
                  f"{previous_name!r} (max {previous_max:g})", filename, lines, where)
        names = [c.name for c in classes[:index]]
        if item.name in names:
            _fail(f"class name {item.name!r} is used twice", filename, lines, (*where, "name"))
        previous_max, previous_name = item.max, item.name


def _point_text(point: Any) -> str:
    return (f"{point.temperature_K - 273.15:g} degC, "
            f"{format_si(point.bus_voltage_V, 'V')}, {format_si(point.forward_current_A, 'A')}")


def check_run_files(sequence: SequenceConfig, sequence_path: str | Path, limits: LimitsSpec,
                    limits_path: str | Path) -> None:
    """Check that the sequence can produce what the limits grade, before anything fires.

    Raises
    ------
    ConfigError
        A limits condition no test point of the sequence matches (by the same rule the
        grading uses, :func:`benchrun.grading.grade.point_matches`, with the limits file's
        tolerances), or a limit on a metric that needs ``switch_voltage: true``.
    """
    from benchrun.grading.grade import point_matches
    from benchrun.runner.plan import expand_points

    limits_file = str(limits_path)
    _, lines = read_yaml(limits_path)
    points = expand_points(sequence)
    for index, condition in enumerate(limits.conditions):
        if not any(point_matches(p, condition, limits.tolerances) for p in points):
            tested = "; ".join(dict.fromkeys(_point_text(p) for p in points))
            _fail(f"condition {condition.name!r} is never tested by the sequence "
                  f"{sequence_path} (it tests {tested}); every device would grade 'invalid' "
                  "after all shots had fired. Add a matching test point or remove the "
                  "condition", limits_file, lines, ("conditions", index))
    if not sequence.switch_voltage:
        for index, item in enumerate(limits.limits):
            if item.metric in NEEDS_SWITCH_VOLTAGE:
                _fail(f"{item.metric} is measured only with 'switch_voltage: true' in the "
                      f"sequence {sequence_path}, which does not capture the switch voltage",
                      limits_file, lines, ("limits", index, "metric"))
    if limits.bins is not None and not sequence.switch_voltage \
            and limits.bins.metric in NEEDS_SWITCH_VOLTAGE:
        _fail(f"{limits.bins.metric} is measured only with 'switch_voltage: true' in the "
              f"sequence {sequence_path}", limits_file, lines, ("bins", "metric"))
