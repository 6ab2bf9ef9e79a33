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
    from benchrun.config.bench import BenchConfig
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


def _tolerance_text(name: str, value: float) -> str:
    return f"{value:g} K" if name == "temperature" else f"{100 * value:g} %"


def check_run_files(sequence: SequenceConfig, sequence_path: str | Path, limits: LimitsSpec,
                    limits_path: str | Path) -> None:
    """Check that the sequence can produce what the limits grade, before anything fires.

    Raises
    ------
    ConfigError
        A limits condition no test point of the sequence matches (by the same rule the
        grading uses, :func:`benchrun.grading.grade.point_matches`, with the limits file's
        tolerances); a limit on a metric that needs ``switch_voltage: true``; a sequence
        tolerance wider than the limits' (the run would accept shots grading rejects); an
        analysis low-pass corner at or above the Nyquist frequency of the sample interval
        (Nyquist–Shannon: content above fs/2 is not represented).
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
    _, sequence_lines = read_yaml(sequence_path)
    for name in ("forward_current", "didt", "reverse_voltage", "temperature"):
        ours, theirs = getattr(sequence.tolerances, name), getattr(limits.tolerances, name)
        if theirs is not None and ours > theirs * (1 + 1e-9):
            _fail(f"{_tolerance_text(name, ours)} is wider than the "
                  f"{_tolerance_text(name, theirs)} of the limits file "
                  f"{limits_path}: shots the run accepts (and does not repeat) would be "
                  "graded invalid; use the limits' tolerance or a tighter one",
                  str(sequence_path), sequence_lines, ("tolerances", name))
    analysis, timing = sequence.analysis, sequence.timing
    if analysis.lowpass is not None and analysis.lowpass >= 0.5 / timing.sample_interval:
        _fail(f"the low-pass corner {analysis.lowpass:g} Hz is at or above the Nyquist "
              f"frequency {0.5 / timing.sample_interval:g} Hz of the {timing.sample_interval:g}"
              " s sample interval (timing.sample_interval); it would filter nothing",
              str(sequence_path), sequence_lines, ("analysis", "lowpass"))
    if limits.bins is not None and not sequence.switch_voltage \
            and limits.bins.metric in NEEDS_SWITCH_VOLTAGE:
        _fail(f"{limits.bins.metric} is measured only with 'switch_voltage: true' in the "
              f"sequence {sequence_path}", limits_file, lines, ("bins", "metric"))


def check_didt_means(sequence: SequenceConfig, sequence_path: str | Path, bench: BenchConfig,
                     bench_path: str | Path) -> None:
    """A test point (or sweep) asking for a di/dt needs a fixture that declares how di/dt is
    set (``fixture.gate_drive`` in the bench file, :mod:`benchrun.config.gate_drive`).

    Raises
    ------
    ConfigError
        At the sequence's ``didt`` field of the first such entry, before anything fires.
    """
    if bench.fixture.gate_drive is not None:
        return
    entries = [(("test_points", i), spec.didt) for i, spec in enumerate(sequence.test_points)]
    entries += [(("sweeps", j), sweep.didt) for j, sweep in enumerate(sequence.sweeps)]
    for where, didt in entries:
        if didt:
            _, lines = read_yaml(sequence_path)
            _fail(f"a di/dt target needs a fixture that can set di/dt, and the bench file "
                  f"{bench_path} declares none: add 'fixture.gate_drive' (switchable gate "
                  "resistors or a drive-voltage range with the switch's nominal values) or "
                  "give 'gate_resistance' instead", str(sequence_path), lines, (*where, "didt"))
