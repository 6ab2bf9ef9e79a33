"""Records of a command table: a command's parameters, a command, a scope's waveform recipe.

Built by :func:`benchrun.instruments.commands.table_from_dict` from a family's YAML table and
used by drivers and the simulated instruments alike (see :mod:`benchrun.instruments.commands`
for the table layout).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from benchrun.instruments import scpi
from benchrun.instruments.mnemonics import mnemonic_regex as _mnemonic_regex

__all__ = ["ArgSpec", "CommandSpec", "WaveformSpec"]

@dataclass(frozen=True)
class ArgSpec:
    """One parameter of a command: its type, and for enums the driver value → wire token map."""

    name: str
    kind: str
    enum: Mapping[str, str] = field(default_factory=dict)

    def to_wire(self, value: Any) -> str:
        if self.kind == "enum":
            try:
                return self.enum[str(value)]
            except KeyError as exc:
                raise ValueError(f"{self.name}: {value!r} not one of {sorted(self.enum)}") from exc
        if self.kind == "int":
            return str(int(value))
        if self.kind == "float":
            return scpi.format_value(float(value))
        if self.kind == "bool":
            return "1" if value else "0"
        return str(value)

    def from_wire(self, token: str) -> Any:
        """Wire token → value; ValueError when it does not fit the type (simulator: -224)."""
        if self.kind == "enum":
            for key, wire in self.enum.items():
                if _mnemonic_regex(wire).fullmatch(token):
                    return key
            raise ValueError(f"{token!r} not one of {list(self.enum.values())}")
        if self.kind == "int":
            value = float(token)
            if value != int(value):
                raise ValueError(f"{token!r} is not an integer")
            return int(value)
        if self.kind == "float":
            return float(token)
        if self.kind == "bool":
            upper = token.upper()
            if upper in ("1", "ON"):
                return True
            if upper in ("0", "OFF"):
                return False
            raise ValueError(f"{token!r} is not a boolean")
        return scpi.unquote_string(token)


@dataclass(frozen=True)
class CommandSpec:
    """One named operation of a command table."""

    name: str
    send: str
    args: tuple[ArgSpec, ...] = ()
    compute: Mapping[str, str] = field(default_factory=dict)
    inverse: Mapping[str, str] = field(default_factory=dict)
    limits: Mapping[str, tuple[float, float]] = field(default_factory=dict)
    returns: str | None = None
    true_values: tuple[str, ...] = ("1", "ON")
    false_value: str = "0"
    from_wire: str | None = None
    to_wire: str | None = None
    query: str | None = None
    true_when_clear: int | None = None
    #: for a ``<name>?`` read-back query: the setting it reads back
    setting: str | None = None

    @property
    def is_query(self) -> bool:
        return self.returns is not None

    def arg(self, name: str) -> ArgSpec:
        for a in self.args:
            if a.name == name:
                return a
        raise KeyError(name)


@dataclass(frozen=True)
class WaveformSpec:
    """How a scope family delivers a trace and how codes become volts.

    ``gain``/``offset``/``dt``/``t_start`` are expressions over the values read by
    ``scaling_queries`` (and the table constants): channel volts = codes × gain + offset.
    ``simulated`` gives, for the simulator, each scaling value as an expression over
    ``gain, offset, dt, t_start`` so both ends agree by construction (checked by tests); a
    scaling query that reads a setting back (``<name>?``) is answered from the setting
    instead. ``setup`` names argument-less commands sent with every capture set-up (data
    format, byte order); ``scaling_fields`` names the fields of a scaling query answering CSV.
    """

    sample_format: str  # "int8" | "int16"
    byte_order: str  # "little" | "big"
    terminator_after_block: bool
    code_min: int
    code_max: int
    select_source: str | None
    scaling_queries: Mapping[str, str]
    gain: str
    offset: str
    dt: str
    t_start: str
    simulated: Mapping[str, str]
    setup: tuple[str, ...] = ()
    scaling_fields: Mapping[str, tuple[str, ...]] = field(default_factory=dict)

    def scaling_names(self, key: str) -> tuple[str, ...]:
        """Names a scaling query provides: its ``fields`` (a CSV reply) or its own key."""
        return self.scaling_fields.get(key, (key,))

    @property
    def numpy_dtype(self) -> str:
        endian = "<" if self.byte_order == "little" else ">"
        return "i1" if self.sample_format == "int8" else f"{endian}i2"
