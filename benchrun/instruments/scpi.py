"""IEEE 488.2 / SCPI helpers: pure functions, no I/O.

Wire formats handled here
-------------------------
* ``*IDN?`` answer: four comma-separated fields, manufacturer, model, serial number, firmware
  level (IEEE 488.2-1992 §10.14).
* ``SYSTem:ERRor?`` answer: ``<code>,"<text>"``; ``0,"No error"`` when the queue is empty
  (SCPI-1999 Vol. 1 §21.8; the standard error codes are listed in :data:`SCPI_ERRORS`).
* Definite-length arbitrary block: ``#<n><len><data>`` where ``<n>`` is one non-zero ASCII
  digit giving the number of digits of ``<len>`` (IEEE 488.2-1992 §7.7.6.2). The indefinite
  form ``#0`` is refused: its end can only be found by scanning binary data for a terminator.

The block functions work on prefixes so a session can read a block in three exact-size reads
(header, length, payload) and never scan the payload for a terminator (DESIGN.md §7).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from benchrun.errors import ProtocolError

#: Standard SCPI error codes used by the simulated bench and recognised by the drivers
#: (SCPI-1999 Vol. 2 §21.8 "Error/event queue"; IEEE 488.2 -4xx query errors).
SCPI_ERRORS: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
}

_ERROR_ENTRY = re.compile(r'^\s*([-+]?\d+)\s*,\s*"?(.*?)"?\s*$', re.DOTALL)


@dataclass(frozen=True)
class IdnFields:
    """The four fields of an ``*IDN?`` answer (IEEE 488.2-1992 §10.14)."""

    manufacturer: str
    model: str
    serial: str
    firmware: str


def parse_idn(text: str, order: tuple[str, ...] = ("manufacturer", "model", "serial", "firmware")
              ) -> IdnFields:
    """Split an ``*IDN?`` answer into its fields.

    Parameters
    ----------
    text
        The answer, terminator removed.
    order
        Field order as the family sends it (IEEE 488.2 order by default).

    Raises
    ------
    ProtocolError
        When the answer does not have exactly ``len(order)`` comma-separated fields.
    """
    parts = [p.strip() for p in text.strip().split(",")]
    if len(parts) != len(order) or not parts[0]:
        raise ProtocolError(f"*IDN? answer {text!r} does not have {len(order)} fields")
    values = dict(zip(order, parts, strict=True))
    return IdnFields(
        manufacturer=values.get("manufacturer", ""),
        model=values.get("model", ""),
        serial=values.get("serial", ""),
        firmware=values.get("firmware", ""),
    )


def format_idn(fields: IdnFields) -> str:
    """The ``*IDN?`` answer for ``fields`` (IEEE 488.2 field order)."""
    return f"{fields.manufacturer},{fields.model},{fields.serial},{fields.firmware}"


def parse_error_entry(text: str) -> tuple[int, str]:
    """Parse one ``SYSTem:ERRor?`` answer into ``(code, message)``.

    Raises
    ------
    ProtocolError
        When the answer is not ``<integer>,"<text>"``.
    """
    m = _ERROR_ENTRY.match(text)
    if not m:
        raise ProtocolError(f"SYSTem:ERRor? answer {text!r} is not <code>,\"<text>\"")
    return int(m.group(1)), m.group(2)


def format_error_entry(code: int, detail: str = "") -> str:
    """The ``SYSTem:ERRor?`` answer for ``code`` with optional device-specific detail."""
    text = SCPI_ERRORS.get(code, "Device-specific error")
    if detail:
        text = f"{text};{detail}"
    return f'{code},"{text}"'


def parse_float(text: str) -> float:
    """A SCPI <NR1>/<NR2>/<NR3> number as float; ProtocolError when it is not a number."""
    try:
        return float(text.strip())
    except ValueError as exc:
        raise ProtocolError(f"expected a number, got {text!r}") from exc


def parse_int(text: str) -> int:
    """A SCPI <NR1> integer (``"+12"``, ``"1.0E+1"`` accepted when integral)."""
    value = parse_float(text)
    if value != int(value):
        raise ProtocolError(f"expected an integer, got {text!r}")
    return int(value)


def parse_bool(text: str, true_values: tuple[str, ...] = ("1", "ON")) -> bool:
    """A SCPI boolean answer; ``true_values`` compared case-insensitively."""
    return text.strip().upper() in {v.upper() for v in true_values}


def format_value(value: object) -> str:
    """Format a parameter for sending: bools as 1/0, floats with 10 significant digits."""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return f"{value:.10g}"
    return str(value)


def quote_string(text: str) -> str:
    """IEEE 488.2 §7.7.5 string program data: ``"..."`` with each ``"`` doubled.

    Raises
    ------
    ValueError
        For characters outside printable 7-bit ASCII (the standard's string data is 7-bit;
        a control character or line feed would end or corrupt the message).
    """
    if any(not (32 <= ord(c) < 127) for c in text):
        raise ValueError(f"{text!r} holds characters that cannot be sent as a SCPI string "
                         "(printable ASCII only)")
    return '"' + text.replace('"', '""') + '"'


def string_body(text: str) -> str:
    """:func:`quote_string` without the enclosing quotes, for a command table whose template
    already writes them (``SELect "{serial}"``)."""
    return quote_string(text)[1:-1]


def unquote_string(token: str) -> str:
    """Inverse of :func:`quote_string` for a token in double (or single) quotes; any other
    token (the body of a string whose quotes the template holds, or character data) has its
    doubled double quotes undone."""
    if len(token) >= 2 and token[0] == token[-1] and token[0] in "\"'":
        quote = token[0]
        return token[1:-1].replace(quote * 2, quote)
    return token.replace('""', '"')


def split_units(message: str) -> list[str]:
    """A program message split at the ``;`` between message units, not at one inside a
    quoted string (IEEE 488.2 §7.4.1)."""
    units, current, quote = [], [], ""
    for char in message:
        if quote:
            if char == quote:
                quote = ""  # a doubled quote closes and reopens: same result
        elif char in "\"'":
            quote = char
        elif char == ";":
            units.append("".join(current))
            current = []
            continue
        current.append(char)
    units.append("".join(current))
    return units


# --- definite-length arbitrary blocks -------------------------------------------------------


def block_digit_count(prefix: bytes) -> int:
    """Number of length digits from the first two bytes of a block (``b"#8"`` -> 8).

    Raises
    ------
    ProtocolError
        On anything but ``#`` followed by a digit 1-9 (``#0``, the indefinite form, is refused).
    """
    if len(prefix) < 2:
        raise ProtocolError(f"block header truncated: {bytes(prefix)!r}")
    if prefix[0:1] != b"#":
        raise ProtocolError(f"block header does not start with '#': {bytes(prefix[:16])!r}")
    digit = prefix[1:2]
    if not digit.isdigit():
        raise ProtocolError(f"block header digit count is not a digit: {bytes(prefix[:16])!r}")
    n = int(digit)
    if n == 0:
        raise ProtocolError("indefinite-length block (#0) is not supported; expected #<n><len>")
    return n


def block_data_length(digits: bytes) -> int:
    """Payload length from the length digits of a block header (``b"00001000"`` -> 1000)."""
    if not digits or not digits.isdigit():
        raise ProtocolError(f"block length field is not decimal digits: {bytes(digits)!r}")
    return int(digits)


def parse_block(data: bytes | bytearray | memoryview, *, terminator: bool) -> memoryview:
    """The payload of one complete definite-length block held in ``data``.

    Parameters
    ----------
    data
        The bytes as received, starting at ``#``.
    terminator
        True when the family sends ``"\\n"`` after the block; it must then be the one byte
        after the payload and nothing else may follow.

    Returns
    -------
    memoryview
        A zero-copy view of the payload.

    Raises
    ------
    ProtocolError
        Garbled header, truncated payload, or unexpected bytes after the block.
    """
    view = memoryview(data)
    n = block_digit_count(bytes(view[:2]))
    if len(view) < 2 + n:
        raise ProtocolError(f"block header truncated: {bytes(view[:16])!r}")
    length = block_data_length(bytes(view[2 : 2 + n]))
    start = 2 + n
    end = start + length
    expected_total = end + (1 if terminator else 0)
    if len(view) < end:
        raise ProtocolError(f"block truncated: {len(view) - start} of {length} bytes")
    if terminator:
        if len(view) < expected_total:
            raise ProtocolError("block terminator missing after the payload")
        if bytes(view[end:expected_total]) != b"\n":
            raise ProtocolError(f"expected '\\n' after the block, got {bytes(view[end:])!r}")
    if len(view) > expected_total:
        raise ProtocolError(f"{len(view) - expected_total} unexpected bytes after the block")
    return view[start:end]


def block_header(length: int) -> bytes:
    """The definite-length header ``#<n><len>`` for a payload of ``length`` bytes."""
    if length < 0:
        raise ValueError("block length must be >= 0")
    digits = str(length)
    if len(digits) > 9:
        raise ValueError("block too long for a definite-length header")
    return f"#{len(digits)}{digits}".encode("ascii")


def encode_block(payload: bytes, *, terminator: bool) -> bytes:
    """``payload`` as a definite-length block, with ``"\\n"`` after it when ``terminator``."""
    return block_header(len(payload)) + bytes(payload) + (b"\n" if terminator else b"")
