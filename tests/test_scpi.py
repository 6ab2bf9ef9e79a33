"""IEEE 488.2 / SCPI helpers: block parser, *IDN? and SYSTem:ERRor? parsing.

Reference for the wire formats: IEEE 488.2-1992 §7.7.6 (definite-length arbitrary block
response data ``#<n><len><data>``, n a non-zero digit) and §10.14 (*IDN? fields); SCPI-1999
Vol. 2 §21.8 (error queue, ``0,"No error"``, standard codes -113, -222, -224) — section numbers
from memory.
"""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from benchrun.errors import ProtocolError
from benchrun.instruments import scpi


def test_block_worked_example_from_the_standard_form():
    # "#15HELLO": one length digit, length 5 (IEEE 488.2 §7.7.6 layout)
    assert bytes(scpi.parse_block(b"#15HELLO", terminator=False)) == b"HELLO"
    assert bytes(scpi.parse_block(b"#15HELLO\n", terminator=True)) == b"HELLO"


def test_block_with_newline_bytes_in_payload_is_not_cut():
    payload = b"\n" * 1000  # a flat trace at code 10
    data = b"#41000" + payload + b"\n"
    assert bytes(scpi.parse_block(data, terminator=True)) == payload


@given(st.binary(max_size=3000), st.booleans())
def test_block_round_trip(payload, terminator):
    data = scpi.encode_block(payload, terminator=terminator)
    assert bytes(scpi.parse_block(data, terminator=terminator)) == payload


@pytest.mark.parametrize(
    ("data", "terminator", "message"),
    [
        (b"X15HELLO", False, "does not start with '#'"),
        (b"#A5HELLO", False, "not a digit"),
        (b"#05HELLO", False, "indefinite-length"),
        (b"#", False, "truncated"),
        (b"#3", False, "truncated"),
        (b"#2x5HELLO", False, "not decimal digits"),
        (b"#210HELLO", False, "block truncated"),
        (b"#15HELLO", True, "terminator missing"),
        (b"#15HELLOX", True, "expected '\\\\n'"),
        (b"#15HELLO\n", False, "unexpected bytes"),
    ],
)
def test_malformed_blocks_raise_protocol_error(data, terminator, message):
    with pytest.raises(ProtocolError, match=message):
        scpi.parse_block(data, terminator=terminator)


def test_block_header_helpers():
    assert scpi.block_header(0) == b"#10"
    assert scpi.block_header(10_000_000) == b"#810000000"
    assert scpi.block_digit_count(b"#8") == 8
    assert scpi.block_data_length(b"00001000") == 1000
    with pytest.raises(ValueError):
        scpi.block_header(10**9)


def test_idn_fields_in_standard_order():
    f = scpi.parse_idn("BENCHRUN-SIM,SCOPE-G4,SIM000001,1.4.2\n")
    assert (f.manufacturer, f.model, f.serial, f.firmware) == (
        "BENCHRUN-SIM", "SCOPE-G4", "SIM000001", "1.4.2")
    assert scpi.format_idn(f) == "BENCHRUN-SIM,SCOPE-G4,SIM000001,1.4.2"


def test_idn_with_wrong_field_count_is_a_protocol_error():
    with pytest.raises(ProtocolError):
        scpi.parse_idn("only,three,fields")


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ('0,"No error"', (0, "No error")),
        ('-113,"Undefined header"', (-113, "Undefined header")),
        ('-222,"Data out of range;volts 2000 outside [0, 1500]"',
         (-222, "Data out of range;volts 2000 outside [0, 1500]")),
        ("+0,\"No error\"", (0, "No error")),
    ],
)
def test_error_entries(text, expected):
    assert scpi.parse_error_entry(text) == expected


def test_error_entry_round_trip_and_garbage():
    assert scpi.parse_error_entry(scpi.format_error_entry(-224, "x")) == (
        -224, "Illegal parameter value;x")
    with pytest.raises(ProtocolError):
        scpi.parse_error_entry("garbage")


def test_numbers_and_booleans():
    assert scpi.parse_float(" +1.5E-3 ") == pytest.approx(1.5e-3)
    assert scpi.parse_int("1.0E+1") == 10
    assert scpi.parse_bool("ON") and not scpi.parse_bool("0")
    with pytest.raises(ProtocolError):
        scpi.parse_float("abc")
    with pytest.raises(ProtocolError):
        scpi.parse_int("1.5")
    assert scpi.format_value(True) == "1"
    assert scpi.format_value(1e-9) == "1e-09"
