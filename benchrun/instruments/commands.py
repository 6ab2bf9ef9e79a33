"""SCPI command tables: one YAML file per instrument family, read by drivers *and* the simulator.

A table names every operation of a role (``channel_range``, ``fire``, ...) and gives the exact
string sent for it, with ``{placeholders}`` for parameters. Drivers format the string
(:meth:`CommandTable.format`); the simulated instruments turn received strings back into the
operation name and parameter values (:meth:`CommandTable.match`). Adding an instrument family
is writing a table (DEVELOPERS.md "Adding an instrument family"); no code changes.

Table layout (see ``commands/scope-generic.yaml`` for a complete example)::

    family: scope-generic          # must match the file name
    role: scope                    # scope | pulse | supply | thermal | handler
    identity: {fields: [manufacturer, model, serial, firmware], simulated: {...}}
    constants: {code_span: 255}              # names usable in expressions
    commands:
      channel_range:
        send: "SENSe{channel}:VOLTage:RANGe:PTPeak {range}"  # upper case = short form
        args: {channel: int, range: float}       # int | float | bool | str | {enum: {...}}
        compute: {scale: "range / 10"}           # optional: wire value from driver inputs
        inverse: {range: "scale * 10"}           # optional: driver inputs from wire values
        limits: {range: [0.001, 10000]}          # simulator answers -222 outside
        returns: float                           # queries only: float|int|bool|str|csv|error|block
        from_wire: "value + 273.15"              # optional reply conversion (and to_wire)
        query: "SENSe{channel}:VOLTage:RANGe:PTPeak?"  # optional: how to read the setting back
    waveform: {...}                # scopes only: sample format, terminator, scaling recipe
    output_watchdog: {timeout: 2.0}  # optional: the instrument switches its output off when
                                   # not refreshed for this many seconds (see below)

A setting with a ``query`` can be read back: the table gets a query named ``<name>?`` whose
reply is the setting's data part (what follows the header in ``send``, e.g. ``INT2`` for
``TRIGger:SOURce INTernal{channel}``), in short or long form. ``query`` may use only the
placeholders of the setting's header (the channel), never its data.

A bool query with ``true_when_clear: <mask>`` answers an integer register: true when none of
the mask's bits are set (``STATus:OPERation:CONDition?``, SCPI-1999 Vol. 2 §20.1).

``identity.models`` lists the ``*IDN?`` model names (shell patterns) a table is written for;
``benchrun bench check`` reports an instrument whose model is not one of them.

Expressions are plain arithmetic (``+ - * /``, unary minus, parentheses, numbers, names) and
are evaluated without ``eval``.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

import yaml

from benchrun.errors import ConfigError, ProtocolError
from benchrun.instruments import scpi
from benchrun.instruments.command_specs import ArgSpec, CommandSpec, WaveformSpec
from benchrun.instruments.expressions import evaluate, expression_names
from benchrun.instruments.mnemonics import PLACEHOLDER as _PLACEHOLDER
from benchrun.instruments.mnemonics import build_matchers as _build_matchers
from benchrun.instruments.mnemonics import data_part as _data_part
from benchrun.instruments.mnemonics import data_template as _data_template_cached
from benchrun.instruments.mnemonics import short_form as _short_form

ROLES = ("scope", "pulse", "supply", "thermal", "handler")

#: Optional commands of a table with an ``output_watchdog`` section.
WATCHDOG_COMMANDS = ("watchdog_timeout", "watchdog_refresh")

#: IEEE 488.2 common commands and the SCPI error query every family must name.
COMMON_COMMANDS = (
    "identify",
    "reset",
    "clear_status",
    "operation_complete",
    "event_status",
    "next_error",
)

#: Operations each role's driver and simulator use; a table must define all of them.
ROLE_COMMANDS: dict[str, tuple[str, ...]] = {
    "scope": (
        "channel_display",
        "channel_range",
        "channel_offset",
        "channel_probe",
        "sample_interval",
        "record_length",
        "time_start",
        "trigger_source",
        "trigger_level",
        "trigger_slope",
        "arm_single",
        "acquisition_done",
        "waveform_data",
    ),
    "pulse": (
        "pulse_count",
        "first_width",
        "off_time",
        "second_width",
        "gate_resistance",
        "output",
        "output_state",
        "fire",
    ),
    "supply": (
        "voltage",
        "current_limit",
        "output",
        "output_state",
        "measure_voltage",
        "measure_current",
    ),
    "thermal": ("setpoint", "measure_temperature", "output"),
    "handler": ("list_devices", "select", "selected"),
}

ARG_TYPES = ("int", "float", "bool", "str")
RETURN_TYPES = ("float", "int", "bool", "str", "csv", "error", "block")
#: ``returns`` of the ``<name>?`` queries made from a setting's ``query``.
READBACK = "readback"



# --- table records -----------------------------------------------------------------------------


@dataclass(frozen=True)
class CommandTable:
    """A loaded, validated command table for one instrument family."""

    family: str
    role: str
    description: str
    idn_order: tuple[str, ...]
    simulated_identity: Mapping[str, str]
    constants: Mapping[str, float]
    commands: Mapping[str, CommandSpec]
    waveform: WaveformSpec | None
    source: str
    channels: int = 0
    extra: Mapping[str, Any] = field(default_factory=dict)
    models: tuple[str, ...] = ()
    watchdog_timeout_s: float | None = None

    def spec(self, name: str) -> CommandSpec:
        try:
            return self.commands[name]
        except KeyError as exc:
            raise ConfigError(f"command table {self.family} has no command {name!r}",
                              file=self.source, field=name) from exc

    def has(self, name: str) -> bool:
        return name in self.commands

    def format(self, name: str, **inputs: Any) -> str:
        """The exact string to send for ``name`` with driver-level ``inputs``."""
        spec = self.spec(name)
        values: dict[str, Any] = dict(inputs)
        for target, expr in spec.compute.items():
            values[target] = evaluate(expr, {**self.constants, **values})
        wire: dict[str, str] = {}
        for arg in spec.args:
            if arg.name not in values:
                raise TypeError(f"{self.family}.{name}: missing parameter {arg.name!r}")
            wire[arg.name] = arg.to_wire(values[arg.name])
        return _PLACEHOLDER.sub(lambda m: wire[m.group(1)], spec.send)

    def parse_reply(self, name: str, text: str) -> Any:
        """Convert a text reply of query ``name`` to its declared type."""
        spec = self.spec(name)
        kind = spec.returns
        if kind == "float":
            value = scpi.parse_float(text)
            if spec.from_wire:
                value = evaluate(spec.from_wire, {**self.constants, "value": value})
            return value
        if kind == "int":
            return scpi.parse_int(text)
        if kind == "bool":
            if spec.true_when_clear is not None:
                return not (scpi.parse_int(text) & spec.true_when_clear)
            return scpi.parse_bool(text, spec.true_values)
        if kind == READBACK:
            return self.parse_readback(spec.setting or "", text)
        if kind == "csv":
            stripped = text.strip()
            return [p.strip().strip('"') for p in stripped.split(",")] if stripped else []
        if kind == "error":
            return scpi.parse_error_entry(text)
        if kind == "str":
            return text.strip().strip('"')
        raise ProtocolError(f"{self.family}.{name} does not return text")

    def format_reply(self, name: str, value: Any) -> str:
        """Simulator side: the text answer of query ``name`` for ``value``."""
        spec = self.spec(name)
        kind = spec.returns
        if kind == "float":
            v = float(value)
            if spec.to_wire:
                v = evaluate(spec.to_wire, {**self.constants, "value": v})
            return scpi.format_value(v)
        if kind == "int":
            return str(int(value))
        if kind == "bool":
            if spec.true_when_clear is not None:
                return "0" if value else spec.false_value
            return spec.true_values[0] if value else spec.false_value
        if kind == READBACK:
            return self.format_readback(spec.setting or "", value)
        if kind == "csv":
            return ",".join(str(v) for v in value)
        return str(value)

    # --- read-back of settings -----------------------------------------------------------------

    def can_read_back(self, name: str) -> bool:
        """Whether setting ``name`` declares a ``query``."""
        return f"{name}?" in self.commands

    def index_args(self, name: str) -> tuple[str, ...]:
        """Arguments of setting ``name`` that select *what* is set (they appear in its query,
        e.g. the channel), as opposed to the value set."""
        return tuple(a.name for a in self.spec(f"{name}?").args)

    def wire_values(self, name: str, **inputs: Any) -> dict[str, Any]:
        """The typed value arguments of setting ``name`` as they go on the wire for ``inputs``
        (sent text parsed back: floats carry the 10 digits sent)."""
        spec = self.spec(name)
        values: dict[str, Any] = dict(inputs)
        for target, expr in spec.compute.items():
            values[target] = evaluate(expr, {**self.constants, **values})
        index = set(self.index_args(name)) if self.can_read_back(name) else set()
        return {a.name: a.from_wire(a.to_wire(values[a.name]))
                for a in spec.args if a.name not in index}

    def parse_readback(self, name: str, text: str) -> dict[str, Any]:
        """Reply to ``<name>?`` → the setting's typed value arguments plus their ``inverse``
        (driver-level) values. Raises ProtocolError when the reply does not fit."""
        spec = self.spec(name)
        pattern, _ = _data_template_cached(spec.send)
        m = pattern.fullmatch(text.strip())
        if not m:
            raise ProtocolError(f"{self.family}: reply {text.strip()[:40]!r} to {name}? does "
                                f"not read as {_data_part(spec.send)!r}")
        values: dict[str, Any] = {}
        try:
            for arg in spec.args:
                if arg.name in m.groupdict():
                    values[arg.name] = arg.from_wire(m.group(arg.name))
        except ValueError as exc:
            raise ProtocolError(f"{self.family}: reply to {name}?: {exc}") from exc
        for target, expr in spec.inverse.items():
            values[target] = evaluate(expr, {**self.constants, **values})
        return values

    def format_readback(self, name: str, values: Mapping[str, Any]) -> str:
        """Simulator side: the reply to ``<name>?`` for driver-level ``values`` (short form)."""
        spec = self.spec(name)
        wire_in: dict[str, Any] = dict(values)
        for target, expr in spec.compute.items():
            wire_in[target] = evaluate(expr, {**self.constants, **wire_in})
        _, template = _data_template_cached(spec.send)

        def token(m: re.Match[str]) -> str:
            arg = spec.arg(m.group(1))
            wire = arg.to_wire(wire_in[arg.name])
            return _short_form(wire) if arg.kind == "enum" else wire

        return _PLACEHOLDER.sub(token, template)

    _matchers: tuple[tuple[re.Pattern[str], CommandSpec], ...] = field(
        default=(), init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_matchers", _build_matchers(self.commands.values()))

    def match(self, message: str) -> tuple[CommandSpec, dict[str, Any]] | None:
        """Simulator side: (spec, driver-level values) for a received message, or None.

        Raises
        ------
        ValueError
            When the header matched but a parameter is of the wrong type (SCPI -224).
        """
        text = message.strip()
        for pattern, spec in self._matchers:
            m = pattern.fullmatch(text)
            if not m:
                continue
            values: dict[str, Any] = {}
            for arg in spec.args:
                values[arg.name] = arg.from_wire(m.group(arg.name))
            for target, expr in spec.inverse.items():
                values[target] = evaluate(expr, {**self.constants, **values})
            return spec, values
        return None


# --- loading and validation ----------------------------------------------------------------------


def families() -> list[str]:
    """Names of the command tables shipped with benchrun."""
    folder = resources.files("benchrun.instruments") / "commands"
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".yaml"))


def load_table(family_or_path: str | Path) -> CommandTable:
    """Load and validate a command table by family name (shipped tables) or file path.

    Raises
    ------
    ConfigError
        Unknown family, unreadable file, or a table that does not validate (names the field).
    """
    text_path = str(family_or_path)
    if text_path.endswith((".yaml", ".yml")) or "/" in text_path:
        path = Path(text_path)
        if not path.is_file():
            raise ConfigError("command table not found", file=text_path)
        return _load_cached(str(path.resolve()), path.stat().st_mtime_ns)
    shipped = resources.files("benchrun.instruments") / "commands" / f"{text_path}.yaml"
    if not shipped.is_file():
        raise ConfigError(f"unknown instrument family {text_path!r}; shipped: {families()}")
    return _load_cached(str(shipped), 0)


@lru_cache(maxsize=32)
def _load_cached(path: str, _mtime: int) -> CommandTable:
    try:
        data = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except (OSError, yaml.YAMLError) as exc:
        raise ConfigError(f"cannot read command table: {exc}", file=path) from exc
    return table_from_dict(data, source=path)


def table_from_dict(data: Any, *, source: str = "<table>") -> CommandTable:
    """Build and validate a :class:`CommandTable` from parsed YAML."""

    def fail(message: str, fld: str | None = None) -> ConfigError:
        return ConfigError(message, file=source, field=fld)

    if not isinstance(data, dict):
        raise fail("a command table is a mapping")
    known = {"family", "role", "description", "identity", "constants", "commands", "waveform",
             "channels", "simulator", "output_watchdog"}
    unknown = set(data) - known
    if unknown:
        raise fail(f"unknown keys {sorted(unknown)}")
    family = str(data.get("family", ""))
    role = data.get("role")
    if not family:
        raise fail("missing", "family")
    stem = Path(source).stem
    if source != "<table>" and stem != family:
        raise fail(f"family {family!r} must match the file name {stem!r}", "family")
    if role not in ROLES:
        raise fail(f"must be one of {ROLES}", "role")
    constants = {str(k): float(v) for k, v in (data.get("constants") or {}).items()}
    identity = data.get("identity") or {}
    idn_order = tuple(identity.get("fields", ("manufacturer", "model", "serial", "firmware")))
    if sorted(idn_order) != sorted(("manufacturer", "model", "serial", "firmware")):
        raise fail("must list manufacturer, model, serial, firmware once each", "identity.fields")

    raw_commands = data.get("commands")
    if not isinstance(raw_commands, dict):
        raise fail("missing or not a mapping", "commands")
    commands = {name: _command_from_dict(name, entry, constants, fail)
                for name, entry in raw_commands.items()}
    for name, spec in list(commands.items()):
        if spec.query is not None:
            commands[f"{name}?"] = _readback_spec(spec, fail)
    for needed in (*COMMON_COMMANDS, *ROLE_COMMANDS[role]):
        if needed not in commands:
            raise fail(f"role {role} needs command {needed!r}", "commands")

    watchdog = data.get("output_watchdog")
    watchdog_timeout = None
    if watchdog is not None:
        try:
            watchdog_timeout = float(watchdog["timeout"])
        except (TypeError, KeyError, ValueError) as exc:
            raise fail("needs a numeric 'timeout' in seconds", "output_watchdog") from exc
        if not watchdog_timeout > 0:
            raise fail("timeout must be positive", "output_watchdog.timeout")
        for needed in WATCHDOG_COMMANDS:
            if needed not in commands:
                raise fail(f"an output watchdog needs command {needed!r}", "commands")
    models = identity.get("models") or []
    if not isinstance(models, list) or not all(isinstance(m, str) for m in models):
        raise fail("must be a list of model names", "identity.models")

    waveform = None
    if role == "scope":
        waveform = _waveform_from_dict(data.get("waveform"), commands, constants, fail)
    elif "waveform" in data:
        raise fail("only scope tables have a waveform section", "waveform")
    return CommandTable(
        family=family,
        role=role,
        description=str(data.get("description", "")),
        idn_order=idn_order,
        simulated_identity=dict(identity.get("simulated", {})),
        constants=constants,
        commands=commands,
        waveform=waveform,
        source=source,
        channels=int(data.get("channels", 0)),
        extra=dict(data.get("simulator") or {}),
        models=tuple(models),
        watchdog_timeout_s=watchdog_timeout,
    )


def _readback_spec(spec: CommandSpec, fail: Any) -> CommandSpec:
    """The ``<name>?`` query reading setting ``spec`` back."""
    where = f"commands.{spec.name}.query"
    assert spec.query is not None
    header_names = set(_PLACEHOLDER.findall(spec.send.split(None, 1)[0]))
    data_names = set(_PLACEHOLDER.findall(_data_part(spec.send)))
    query_names = set(_PLACEHOLDER.findall(spec.query))
    if not query_names <= header_names:
        raise fail(f"may only use the header's placeholders {sorted(header_names)}", where)
    if query_names | data_names != {a.name for a in spec.args}:
        raise fail("every argument must be in the query or in the setting's data", where)
    return CommandSpec(name=f"{spec.name}?", send=spec.query,
                       args=tuple(a for a in spec.args if a.name in query_names),
                       returns=READBACK, setting=spec.name)


def _command_from_dict(name: str, entry: Any, constants: Mapping[str, float], fail: Any
                       ) -> CommandSpec:
    where = f"commands.{name}"
    if isinstance(entry, str):
        entry = {"send": entry}
    if not isinstance(entry, dict) or not isinstance(entry.get("send"), str):
        raise fail("needs a 'send' string", where)
    allowed = {"send", "args", "compute", "inverse", "limits", "returns", "true_values",
               "false_value", "from_wire", "to_wire", "query", "true_when_clear"}
    if set(entry) - allowed:
        raise fail(f"unknown keys {sorted(set(entry) - allowed)}", where)
    args = []
    for arg_name, kind in (entry.get("args") or {}).items():
        if isinstance(kind, dict) and "enum" in kind:
            enum = {str(k): str(v) for k, v in kind["enum"].items()}
            args.append(ArgSpec(arg_name, "enum", enum))
        elif kind in ARG_TYPES:
            args.append(ArgSpec(arg_name, kind))
        else:
            raise fail(f"argument type {kind!r} not one of {ARG_TYPES} or enum", f"{where}.args")
    placeholders = set(_PLACEHOLDER.findall(entry["send"]))
    arg_names = {a.name for a in args}
    if placeholders != arg_names:
        raise fail(f"placeholders {sorted(placeholders)} differ from args {sorted(arg_names)}",
                   f"{where}.send")
    returns = entry.get("returns")
    if returns is not None and returns not in RETURN_TYPES:
        raise fail(f"must be one of {RETURN_TYPES}", f"{where}.returns")
    compute = {str(k): str(v) for k, v in (entry.get("compute") or {}).items()}
    inverse = {str(k): str(v) for k, v in (entry.get("inverse") or {}).items()}
    for key, expr in (*compute.items(), *inverse.items()):
        try:
            expression_names(expr)
        except (SyntaxError, ValueError) as exc:
            raise fail(f"bad expression {expr!r}: {exc}", f"{where}.{key}") from exc
    limits = {}
    for key, pair in (entry.get("limits") or {}).items():
        if not (isinstance(pair, list) and len(pair) == 2):
            raise fail("limits are [low, high]", f"{where}.limits.{key}")
        limits[str(key)] = (float(pair[0]), float(pair[1]))
    return CommandSpec(
        name=name,
        send=entry["send"],
        args=tuple(args),
        compute=compute,
        inverse=inverse,
        limits=limits,
        returns=returns,
        true_values=tuple(str(v) for v in entry.get("true_values", ("1", "ON"))),
        false_value=str(entry.get("false_value", "0")),
        from_wire=entry.get("from_wire"),
        to_wire=entry.get("to_wire"),
        query=entry.get("query"),
        true_when_clear=(int(entry["true_when_clear"]) if "true_when_clear" in entry
                         else None),
    )


def _waveform_from_dict(raw: Any, commands: Mapping[str, CommandSpec],
                        constants: Mapping[str, float], fail: Any) -> WaveformSpec:
    if not isinstance(raw, dict):
        raise fail("a scope table needs a waveform section", "waveform")
    try:
        spec = WaveformSpec(
            sample_format=str(raw["sample_format"]),
            byte_order=str(raw.get("byte_order", "little")),
            terminator_after_block=bool(raw["terminator_after_block"]),
            code_min=int(raw["code_min"]),
            code_max=int(raw["code_max"]),
            select_source=raw.get("select_source"),
            scaling_queries=dict(raw["scaling_queries"]),
            gain=str(raw["gain"]),
            offset=str(raw["offset"]),
            dt=str(raw["dt"]),
            t_start=str(raw["t_start"]),
            simulated=dict(raw["simulated"]),
            setup=tuple(raw.get("setup") or ()),
            scaling_fields={str(k): tuple(v) for k, v in (raw.get("scaling_fields") or {}).items()},
        )
    except KeyError as exc:
        raise fail(f"missing {exc.args[0]!r}", "waveform") from exc
    if spec.sample_format not in ("int8", "int16"):
        raise fail("must be int8 or int16", "waveform.sample_format")
    if spec.byte_order not in ("little", "big"):
        raise fail("must be little or big", "waveform.byte_order")
    for value_name, command in spec.scaling_queries.items():
        if command not in commands or not commands[command].is_query:
            raise fail(f"{value_name}: {command!r} is not a query of this table",
                       "waveform.scaling_queries")
    for name in spec.setup:
        if name not in commands or commands[name].args or commands[name].is_query:
            raise fail(f"{name!r} is not an argument-less command of this table",
                       "waveform.setup")
    for key in spec.scaling_fields:
        if key not in spec.scaling_queries or commands[spec.scaling_queries[key]].returns != "csv":
            raise fail(f"{key!r}: fields need a scaling query answering csv",
                       "waveform.scaling_fields")
    if spec.select_source and spec.select_source not in commands:
        raise fail(f"{spec.select_source!r} is not a command", "waveform.select_source")
    if commands["waveform_data"].returns != "block":
        raise fail("must return block", "commands.waveform_data.returns")
    have = {n for key in spec.scaling_queries for n in spec.scaling_names(key)} | set(constants)
    for key in ("gain", "offset", "dt", "t_start"):
        missing = expression_names(getattr(spec, key)) - have
        if missing:
            raise fail(f"uses unknown names {sorted(missing)}", f"waveform.{key}")
    sim_have = {"gain", "offset", "dt", "t_start"} | set(constants)
    for key, command in spec.scaling_queries.items():
        if commands[command].returns == READBACK:
            continue  # answered from the setting it reads back
        for name in spec.scaling_names(key):
            if name not in spec.simulated:
                raise fail(f"no simulated expression for {name!r}", "waveform.simulated")
            missing = expression_names(spec.simulated[name]) - sim_have
            if missing:
                raise fail(f"uses unknown names {sorted(missing)}",
                           f"waveform.simulated.{name}")
    return spec
