"""Every header of every shipped (simulated) command table is a SCPI-1999 or IEEE 488.2 header,
or one of our own listed below: no maker's command set is borrowed.

Sources of the lists (named per entry group):
- IEEE 488.2-1992 §10 common commands (*IDN?, *RST, *CLS, *OPC?, *ESR?, ...), from memory.
- SCPI-1999 Vol. 2 "Command Reference": the subsystems INPut, SENSe (VOLTage:RANGe and
  SWEep nodes), TRIGger (SEQuence layer), INITiate, ABORt, STATus:OPERation, FORMat, TRACe,
  SOURce (VOLTage, CURRent, PULSe, TEMPerature), OUTPut, MEASure, SYSTem:ERRor, from memory
  (the standard's text was not at hand; each header is the full long form with its optional
  nodes as written in the tables).
- Character data used as parameters (INTernal, POSitive/NEGative, DC/AC, INTeger, NORMal)
  from the same chapters, from memory.
Our own headers (clearly named roots or nodes SCPI-1999 does not define) are listed in OURS
with the reason; a new header in a table must be added to one list or the other here.
"""

from __future__ import annotations

import re

import pytest

from benchrun.instruments.commands import families, load_table

IEEE_488_2 = {"*IDN?", "*RST", "*CLS", "*OPC?", "*OPC", "*ESR?", "*ESE", "*SRE", "*STB?",
              "*TRG", "*TST?", "*WAI"}

SCPI_1999 = {
    # INPut subsystem
    "INPut:STATe", "INPut:COUPling",
    # SENSe subsystem: voltage range of a digitiser channel, time-domain sweep
    "SENSe:VOLTage:RANGe:PTPeak", "SENSe:VOLTage:RANGe:UPPer", "SENSe:VOLTage:RANGe:OFFSet",
    "SENSe:SWEep:TINTerval", "SENSe:SWEep:POINts", "SENSe:SWEep:OFFSet:TIME",
    # TRIGger subsystem (SEQuence is the optional default node)
    "TRIGger:SEQuence:SOURce", "TRIGger:SEQuence:LEVel", "TRIGger:SEQuence:SLOPe",
    "TRIGger:SOURce", "TRIGger:LEVel", "TRIGger:SLOPe", "TRIGger:DELay",
    # INITiate / ABORt
    "INITiate", "INITiate:IMMediate", "ABORt",
    # STATus, SYSTem
    "STATus:OPERation:CONDition", "SYSTem:ERRor", "SYSTem:ERRor:NEXT",
    # FORMat, TRACe
    "FORMat:DATA", "FORMat:BORDer", "TRACe:DATA",
    # SOURce, OUTPut, MEASure
    "SOURce:PULSe:COUNt", "SOURce:PULSe:WIDTh", "SOURce:VOLTage:LEVel",
    "SOURce:CURRent:LEVel", "SOURce:TEMPerature:LEVel", "OUTPut:STATe",
    "MEASure:VOLTage:DC", "MEASure:CURRent:DC", "MEASure:TEMPerature",
}

OURS = {
    "INPut:PSCale": "probe scale (probe units per input volt); SCPI has no probe factor",
    "INPut:PGAin": "probe gain (input volts per probe unit); SCPI has no probe factor",
    "TRACe:SCALing": "per-trace scaling record (CSV); no per-trace scaling query in SCPI",
    "GDRive:GAP": "double-pulse off time (gate-drive specific)",
    "GDRive:SECond:WIDTh": "double-pulse second pulse width (gate-drive specific)",
    "GDRive:RESistance": "turn-on gate resistance (gate-drive specific)",
    "GDRive:VOLTage": "turn-on gate-drive voltage (gate-drive specific)",
    "WDOG:TIMeout": "output watchdog timeout",
    "WDOG:REFResh": "output watchdog refresh",
    "HANDler:DUT:CATalog": "device handler: serials held",
    "HANDler:DUT:SELect": "device handler: device in the fixture",
    "HANDler:DUT:IDENtity": "device handler: part and lot of a held device",
}

#: character-data parameters (SCPI-1999, from memory) and our own trace name TRACE<n>
PARAMETER_WORDS = {"INTernal", "POSitive", "NEGative", "DC", "AC", "INTeger", "NORMal", "TRACE"}

_PLACEHOLDER = re.compile(r"\{[A-Za-z_][A-Za-z0-9_]*\}")


def _header(send: str) -> str:
    head = send.split(None, 1)[0]
    return _PLACEHOLDER.sub("", head).rstrip("?").lstrip(":")


def _parameter_words(send: str) -> set[str]:
    parts = send.split(None, 1)
    if len(parts) < 2:
        return set()
    data = _PLACEHOLDER.sub(" ", parts[1].replace('"', " "))
    return {w for w in re.findall(r"[A-Za-z]+", data)}


TABLES = families()


def test_the_lists_do_not_overlap():
    assert not (set(OURS) & SCPI_1999)


@pytest.mark.parametrize("family", TABLES)
def test_every_header_is_standard_or_our_own(family):
    table = load_table(family)
    unknown = []
    for spec in table.commands.values():
        header = _header(spec.send)
        if spec.send.startswith("*"):
            if spec.send.split()[0] not in IEEE_488_2:
                unknown.append(spec.send)
        elif header not in SCPI_1999 and header not in OURS:
            unknown.append(header)
        for word in _parameter_words(spec.send):
            if word not in PARAMETER_WORDS:
                unknown.append(f"{header} ... {word}")
    assert not unknown, f"{family}: not SCPI-1999, IEEE 488.2 or listed as ours: {unknown}"


@pytest.mark.parametrize("family", TABLES)
def test_each_table_header_names_what_it_follows(family):
    # the comment at the top says which standard the dialect follows and lists our own headers
    from importlib import resources

    text = (resources.files("benchrun.instruments") / "commands" / f"{family}.yaml").read_text()
    comment = "\n".join(line for line in text.splitlines() if line.startswith("#"))
    assert "SCPI-1999" in comment
    table = load_table(family)
    for spec in table.commands.values():
        header = _header(spec.send)
        if header in OURS:
            assert "OUR OWN" in comment and header.split(":")[-1] in comment, header


def test_the_two_scope_families_differ_as_real_instruments_do():
    generic, alt = load_table("scope-generic").waveform, load_table("scope-alt").waveform
    assert (generic.sample_format, alt.sample_format) == ("int8", "int16")
    assert alt.byte_order == "big"
    assert generic.terminator_after_block and not alt.terminator_after_block
    # scaling: settings read back vs a per-trace scaling record
    generic_t, alt_t = load_table("scope-generic"), load_table("scope-alt")
    assert all(generic_t.spec(q).setting for q in generic.scaling_queries.values())
    assert all(alt_t.spec(q).returns == "csv" for q in alt.scaling_queries.values())
