"""Unit parsing at the edges: SI prefixes per the SI Brochure (BIPM, 9th ed., 2019, Table 7)."""

import math

import pytest

from benchrun.errors import UnitError
from benchrun.units import format_si, parse_quantity


@pytest.mark.parametrize(
    ("text", "dimension", "expected"),
    [
        ("600 V", "voltage", 600.0),
        ("2.5 us", "time", 2.5e-6),
        ("2.5 µs", "time", 2.5e-6),
        ("100 nH", "inductance", 100e-9),
        ("3.2 uC", "charge", 3.2e-6),
        ("30 A", "current", 30.0),
        ("200 A/us", "current_slope", 200e6),
        ("20 kHz", "frequency", 20e3),
        ("10 mohm", "resistance", 10e-3),
        # ITS-90 / SI: T[K] = t[°C] + 273.15 (SI Brochure 9th ed., 2.3.1)
        ("25 degC", "temperature", 298.15),
        ("125 °C", "temperature", 398.15),
        ("1.5 mJ", "energy", 1.5e-3),
    ],
)
def test_parse_quantity(text, dimension, expected):
    assert math.isclose(parse_quantity(text, dimension), expected, rel_tol=1e-12)


@pytest.mark.parametrize(
    ("text", "dimension"),
    [("30 V", "charge"), ("5 A", "voltage"), ("12 parsecs", "time"), ("abc", "current"),
     ("12", "voltage")],
)
def test_parse_quantity_rejects(text, dimension):
    with pytest.raises(UnitError):
        parse_quantity(text, dimension, field="x")


def test_wrong_dimension_message_names_field():
    with pytest.raises(UnitError, match="qrr_max"):
        parse_quantity("30 V", "charge", field="qrr_max")


def test_format_si():
    assert format_si(1.23e-7, "s") == "123 ns"
    assert format_si(3.2e-6, "C") == "3.2 µC"
    assert format_si(None, "A") == "—"


def test_temperature_difference_reads_degc_as_a_difference():
    # a 3 °C band is a 3 K difference (SI Brochure 9th ed., 2.3.1: an interval of 1 °C = 1 K)
    assert parse_quantity("3 degC", "temperature_difference") == 3.0
    assert parse_quantity("3 K", "temperature_difference") == 3.0
    # ... while a temperature itself is offset
    assert parse_quantity("3 degC", "temperature") == 276.15
