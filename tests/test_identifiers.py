"""Lot names and serials: allowed characters, quoting on the wire, one-to-one raw keys."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from test_instruments_drivers import RecordingSession
from test_runner_support import BENCH, write_sequence

from benchrun.config import load_sequence
from benchrun.errors import ConfigError
from benchrun.instruments import scpi
from benchrun.instruments.commands import load_table
from benchrun.instruments.roles import Handler
from benchrun.runner.execute import RunOptions, prepare
from benchrun.runner.shots import key_safe_serial, shot_key
from benchrun.store.raw_slots import KEY_RE


@pytest.mark.parametrize("lot", ["../escaped", "a/b", "/abs", "..", "LT 0117", "", "x" * 65,
                                 "LT-0117\n", "-LT"])
def test_unsafe_lot_names_refused_at_load(tmp_path, lot):
    seq = write_sequence(tmp_path)
    seq.write_text(seq.read_text().replace("lot: LT-0117", f"lot: {lot!r}"))
    with pytest.raises(ConfigError) as info:
        load_sequence(seq)
    assert "seq.yaml:2: lot:" in str(info.value)


def test_escaping_lot_never_reaches_the_file_system(tmp_path):
    seq = write_sequence(tmp_path)
    seq.write_text(seq.read_text().replace("lot: LT-0117", 'lot: "../escaped"'))
    out = tmp_path / "runs" / "out"
    with pytest.raises(ConfigError):
        prepare(seq, BENCH, RunOptions(out_dir=out))
    assert not (tmp_path / "runs").exists()  # neither the out folder nor ../escaped


@pytest.mark.parametrize("lot", ["LT-0117", "LT_0117.b", "0117"])
def test_plain_lot_names_load(tmp_path, lot):
    seq = write_sequence(tmp_path)
    seq.write_text(seq.read_text().replace("lot: LT-0117", f"lot: {lot!r}"))
    assert load_sequence(seq).lot == lot


@pytest.mark.parametrize("serial", ['"SN 1"', "'SN\"1'", "'SN,1'", "'SN;1'", "'../x'"])
def test_unsafe_serials_refused_at_load(tmp_path, serial):
    seq = write_sequence(tmp_path, devices=f"[SN0117-001, {serial}]")
    with pytest.raises(ConfigError, match=r"seq.yaml:3: devices: .*serial .* is not allowed"):
        load_sequence(seq)


def test_serial_sent_as_quoted_ieee4882_string():
    # IEEE 488.2-1992 §7.7.5: string program data in double quotes, embedded quotes doubled
    session = RecordingSession()
    handler = Handler(session, "handler-generic")
    handler.select('SN 7; "B"')
    assert session.sent[0] == 'HANDler:DUT:SELect "SN 7; ""B"""'


@given(st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=126), min_size=1,
               max_size=30))
def test_quoted_serial_round_trips_through_the_simulator_parser(serial):
    table = load_table("handler-generic")
    message = table.format("select", serial=scpi.string_body(serial))
    units = scpi.split_units(message + ";*OPC?")
    assert len(units) == 2
    spec, values = table.match(units[0])
    assert spec.name == "select" and values == {"serial": serial}


def test_control_characters_cannot_be_sent():
    with pytest.raises(ValueError, match="printable ASCII"):
        scpi.quote_string("SN\n*RST")


def test_keys_of_plain_serials_unchanged():
    # keys older records hold: p<point>-<serial>-r<repeat>-a<attempt>
    assert shot_key(3, "SN0117-001", 1, 0) == "p003-SN0117-001-r01-a0"
    assert key_safe_serial("A_b.c-9") == "A_b.c-9"


def test_serials_differing_in_unsafe_characters_get_distinct_keys():
    serials = ["SN.1", "SN_1", "SN/1", "SN 1", "SN:1", "SN%1", "SN%2F1", "SN_2F1"]
    keys = {shot_key(0, s, 0, 0) for s in serials}
    assert len(keys) == len(serials)
    assert all(KEY_RE.match(k) for k in keys)


@given(st.text(min_size=1, max_size=20), st.text(min_size=1, max_size=20))
def test_key_mapping_is_one_to_one(a, b):
    if a != b:
        assert key_safe_serial(a) != key_safe_serial(b)
    assert KEY_RE.match(shot_key(0, a, 0, 0))


def test_escaped_key_stores_and_reads_back(tmp_path):
    import numpy as np

    from benchrun.analysis.pipeline import ChannelData, ProbeCalibration
    from benchrun.store.raw import RawRecord

    channel = ChannelData(codes=np.arange(16, dtype=np.int16), gain=0.1, offset=0.0,
                          code_min=-128, code_max=127)
    keys = [shot_key(0, s, 0, 0) for s in ("SN/1", "SN_1", "SN 1")]
    with RawRecord(tmp_path / "raw.h5", "w", compression=None) as raw:
        for key in keys:
            raw.append_shot(key, 0.0, 1e-9, {"diode_voltage": channel},
                            {"diode_voltage": ProbeCalibration(1.0)}, {})
    with RawRecord(tmp_path / "raw.h5", "r") as raw:
        assert sorted(raw.keys()) == sorted(keys)
