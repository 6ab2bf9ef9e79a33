"""Command tables: every shipped family validates, both ends agree on every string.

SCPI short/long mnemonic forms follow SCPI-1999 Vol. 1 §6.2.1 (upper-case part = short form;
from memory). The scaling checks are algebraic identities: the simulator's reported scaling
values, put through the driver's recipe, must give back the gain and offset it started from.
"""

from __future__ import annotations

import itertools

import pytest

from benchrun.errors import ConfigError, ProtocolError
from benchrun.instruments.commands import (
    COMMON_COMMANDS,
    ROLE_COMMANDS,
    families,
    load_table,
    table_from_dict,
)
from benchrun.instruments.expressions import evaluate

SHIPPED = families()


def test_shipped_families():
    assert {"scope-generic", "scope-alt", "pulse-generic", "supply-generic",
            "thermal-generic", "handler-generic"} <= set(SHIPPED)


@pytest.mark.parametrize("family", SHIPPED)
def test_every_table_has_its_role_commands(family):
    table = load_table(family)
    for name in (*COMMON_COMMANDS, *ROLE_COMMANDS[table.role]):
        assert table.has(name), name


@pytest.mark.parametrize("family", [f for f in SHIPPED
                                    if f.startswith("scope") and load_table(f).waveform.simulated])
@pytest.mark.parametrize(("gain", "offset", "dt", "t_start"),
                         [(0.0123, -1.5, 1e-9, -2e-6), (3.2e-4, 0.0, 2.5e-10, 1.45e-5)])
def test_scaling_recipe_inverts_the_simulated_values(family, gain, offset, dt, t_start):
    table = load_table(family)
    wf = table.waveform
    sim = {"gain": gain, "offset": offset, "dt": dt, "t_start": t_start, **table.constants}
    reported = {key: evaluate(expr, sim) for key, expr in wf.simulated.items()}
    names = {**table.constants, **reported}
    assert evaluate(wf.gain, names) == pytest.approx(gain, rel=1e-12)
    assert evaluate(wf.offset, names) == pytest.approx(offset, rel=1e-12, abs=1e-15)
    assert evaluate(wf.dt, names) == pytest.approx(dt, rel=1e-12)
    assert evaluate(wf.t_start, names) == pytest.approx(t_start, rel=1e-12)


def test_settings_derived_scaling_matches_the_simulated_adc():
    # scope-generic has no per-trace scaling query: volts = code * PTPeak / 255 + OFFSet.
    # The simulator's 8-bit ADC (acquisition.digitize, capture.quantize) spreads codes
    # -128..127 over the set span: gain = span / (code_max - code_min).
    from benchrun.simulator import capture

    table = load_table("scope-generic")
    wf = table.waveform
    span, centre = 1600.0, -200.0
    gain = evaluate(wf.gain, {**table.constants, "range": span, "center": centre})
    assert gain == pytest.approx(span / (capture.ADC_CODE_MAX - capture.ADC_CODE_MIN))
    assert evaluate(wf.offset, {**table.constants, "range": span, "center": centre}) == centre


SAMPLES = {"channel": 3, "range": 800.0, "offset": -200.0, "factor": 100.0, "state": True,
           "interval": 5e-10, "points": 20000, "t_start": -1e-6, "level": 7.5,
           "slope": "falling", "count": 2, "width": 1e-5, "gap": 5e-6, "ohm": 10.0,
           "volts": 600.0, "amps": 1.0, "kelvin": 398.15, "serial": "SN0117-001",
           "coupling": "dc", "seconds": 2.0}


@pytest.mark.parametrize("family", SHIPPED)
def test_every_formatted_command_is_matched_back_with_the_same_values(family):
    table = load_table(family)
    samples = SAMPLES
    for name, spec in table.commands.items():
        inputs = {k: v for k, v in samples.items()}
        text = table.format(name, **inputs)
        found = table.match(text)
        assert found is not None, text
        assert found[0].name == name
        if spec.setting is not None:
            assert set(found[1]) == set(table.index_args(spec.setting))
            continue
        for arg in spec.args:
            if arg.name in samples:
                assert found[1][arg.name] == pytest.approx(samples[arg.name]) \
                    if isinstance(samples[arg.name], float) else samples[arg.name]
        for target in spec.inverse:  # driver-level values recovered from computed wire values
            assert found[1][target] == pytest.approx(samples[target], rel=1e-9)


@pytest.mark.parametrize("family", SHIPPED)
def test_every_setting_read_back_round_trips(family):
    # what the simulator answers to <name>? (short form) reads back as the value set
    table = load_table(family)
    for name, spec in table.commands.items():
        if not table.can_read_back(name):
            continue
        index = {k: SAMPLES[k] for k in table.index_args(name)}
        query = table.format(f"{name}?", **index)
        found = table.match(query)
        assert found is not None and found[0].name == f"{name}?", query
        reply = table.format_readback(name, SAMPLES)
        got = table.parse_readback(name, reply)
        want = table.wire_values(name, **SAMPLES)
        for key, value in want.items():
            assert got[key] == (pytest.approx(value) if isinstance(value, float) else value)
        for target in spec.inverse:
            assert got[target] == pytest.approx(SAMPLES[target], rel=1e-9)


def test_read_back_accepts_long_and_short_forms():
    table = load_table("scope-generic")
    # SCPI-1999 Vol. 1 §6.2.1: a reply may use either form (from memory)
    assert table.parse_readback("trigger_source", "INT2") == {"channel": 2}
    assert table.parse_readback("trigger_source", "INTERNAL2") == {"channel": 2}
    assert table.parse_readback("trigger_slope", "NEGATIVE") == {"slope": "falling"}
    assert table.format_readback("trigger_source", {"channel": 4}) == "INT4"
    with pytest.raises(ProtocolError):
        table.parse_readback("trigger_source", "EXT")


def test_short_and_long_forms_and_case_are_accepted():
    table = load_table("scope-generic")
    for text in ("SENS2:VOLT:RANG:PTP 8", "SENSE2:VOLTAGE:RANGE:PTPEAK 8",
                 "sens2:volt:rang:ptp 8", ":SENSe2:VOLTage:RANGe:PTPeak 8"):
        spec, values = table.match(text)
        assert spec.name == "channel_range" and values == {"channel": 2, "range": 8.0}
    assert table.match("SENSE2:VOLT:RANG:PTPE 8") is None  # neither short nor long form
    assert table.match("TRIG:SEQ:SLOP POS")[1] == {"slope": "rising"}


def test_wrong_parameter_type_is_a_value_error():
    table = load_table("supply-generic")
    with pytest.raises(ValueError):
        table.match("SOUR:VOLT:LEV abc")


def test_unit_conversions_on_the_wire():
    thermal = load_table("thermal-generic")
    assert thermal.format("setpoint", kelvin=398.15) == "SOURce:TEMPerature:LEVel 125"
    assert thermal.parse_reply("measure_temperature", "25") == pytest.approx(298.15)
    assert thermal.format_reply("measure_temperature", 298.15) == "25"
    assert thermal.parse_readback("setpoint", "125")["kelvin"] == pytest.approx(398.15)
    alt = load_table("scope-alt")
    assert alt.format("channel_range", channel=1, range=1600.0) == \
        "SENSe1:VOLTage:RANGe:UPPer 800"
    assert alt.format("channel_probe", channel=1, factor=100.0) == "INPut1:PGAin 0.01"
    # STATus:OPERation:CONDition?: bit 4 measuring, bit 5 waiting for trigger (SCPI-1999
    # Vol. 2 §20.1.2, from memory); done when both are clear
    assert alt.parse_reply("acquisition_done", "0") is True
    assert alt.parse_reply("acquisition_done", "256") is True
    assert alt.parse_reply("acquisition_done", "32") is False
    assert alt.parse_reply("acquisition_done", "16") is False


def _minimal(**overrides):
    role = "handler"
    commands = {name: {"send": f"X{i}{'?' if name in ('identify',) else ''}"}
                for i, name in enumerate(itertools.chain(COMMON_COMMANDS, ROLE_COMMANDS[role]))}
    data = {"family": "t", "role": role, "commands": commands}
    data.update(overrides)
    return data


def test_minimal_table_validates():
    assert table_from_dict(_minimal()).role == "handler"


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"role": "toaster"}, "role"),
        ({"surprise": 1}, None),
        ({"commands": {"identify": "*IDN?"}}, "commands"),
    ],
)
def test_bad_tables_are_config_errors(change, field):
    with pytest.raises(ConfigError) as info:
        table_from_dict(_minimal(**change))
    if field:
        assert info.value.field == field


def test_placeholder_must_match_args():
    data = _minimal()
    data["commands"]["select"] = {"send": "HAND:SEL {serial}", "args": {"other": "str"}}
    with pytest.raises(ConfigError, match="placeholders"):
        table_from_dict(data)


def test_unknown_family_and_missing_file():
    with pytest.raises(ConfigError, match="unknown instrument family"):
        load_table("scope-nonexistent")
    with pytest.raises(ConfigError, match="not found"):
        load_table("/nonexistent/scope.yaml")


def test_expressions_are_arithmetic_only():
    assert evaluate("-(a + 2) * b / 4", {"a": 1, "b": 2}) == pytest.approx(-1.5)
    with pytest.raises(ValueError):
        evaluate("__import__('os')", {})
