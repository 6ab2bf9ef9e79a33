"""SCPI mnemonics and program-message templates of the command tables, as regular expressions.

SCPI-1999 Vol. 1 §6.2.1 (from memory): a mnemonic's upper-case part is its short form and the
whole word its long form; either is accepted, in any case. A ``{placeholder}`` in a header or
glued to a mnemonic is a numeric suffix (``SENSe{channel}``); elsewhere it is a parameter.
"""

from __future__ import annotations

import re
from functools import lru_cache
from typing import Any

PLACEHOLDER = re.compile(r"\{([A-Za-z_][A-Za-z0-9_]*)\}")
_MNEMONIC = re.compile(r"[A-Za-z]+")
_VALUE_PATTERN = r"[^,;\s]+"
#: The body of a quoted string parameter: anything, a double quote only doubled.
_STRING_BODY_PATTERN = r'(?:[^"]|"")*'
_SUFFIX_PATTERN = r"\d+"
_PLACEHOLDER = PLACEHOLDER


def mnemonic_regex(word: str) -> re.Pattern[str]:
    return re.compile(_mnemonic_pattern(word), re.IGNORECASE)


def _mnemonic_pattern(word: str) -> str:
    """``SWEep`` → accepts ``SWE`` or ``SWEEP`` (SCPI-1999 Vol. 1 §6.2.1 short/long form)."""
    short = len(word) - len(word.lstrip("ABCDEFGHIJKLMNOPQRSTUVWXYZ"))
    if 0 < short < len(word) and word[short:].islower():
        return f"{re.escape(word[:short])}(?:{re.escape(word[short:])})?"
    return re.escape(word)


def short_form(text: str) -> str:
    """``INTernal`` → ``INT`` for every mixed-case mnemonic of ``text`` (SCPI-1999 Vol. 1
    §6.2.1: the upper-case part is the short form; instruments answer in short form)."""

    def short(m: re.Match[str]) -> str:
        word = m.group(0)
        n = len(word) - len(word.lstrip("ABCDEFGHIJKLMNOPQRSTUVWXYZ"))
        return word[:n] if 0 < n < len(word) and word[n:].islower() else word

    return _MNEMONIC.sub(short, text)


def data_part(send: str) -> str:
    """What follows the header of a program message unit (its data, maybe empty)."""
    return send.split(None, 1)[1] if len(send.split(None, 1)) > 1 else ""


@lru_cache(maxsize=256)
def data_template(send: str) -> tuple[re.Pattern[str], str]:
    data = data_part(send)
    pattern: list[str] = []
    template: list[str] = []
    pos = 0
    for m in _PLACEHOLDER.finditer(data):
        literal = data[pos : m.start()]
        pattern.append(_literal_pattern(literal))
        template.append(short_form(literal))
        glued = literal[-1:].isalpha()
        value = _SUFFIX_PATTERN if glued else r"[^,;]+?"
        pattern.append(f"(?P<{m.group(1)}>{value})")
        template.append(m.group(0))
        pos = m.end()
    pattern.append(_literal_pattern(data[pos:]))
    template.append(short_form(data[pos:]))
    return re.compile(r"\s*" + "".join(pattern) + r"\s*", re.IGNORECASE), "".join(template)




def _literal_pattern(text: str) -> str:
    out: list[str] = []
    pos = 0
    for m in _MNEMONIC.finditer(text):
        out.append(_escape_literal(text[pos : m.start()]))
        out.append(_mnemonic_pattern(m.group(0)))
        pos = m.end()
    out.append(_escape_literal(text[pos:]))
    return "".join(out)


def _escape_literal(text: str) -> str:
    return "".join(r"\s+" if ch == " " else re.escape(ch) for ch in text)


def build_matchers(specs: Any) -> tuple[tuple[re.Pattern[str], Any], ...]:
    result = []
    for spec in specs:
        pattern = []
        pos = 0
        for m in _PLACEHOLDER.finditer(spec.send):
            pattern.append(_literal_pattern(spec.send[pos : m.start()]))
            before = spec.send[: m.start()]
            # a placeholder in the header or glued to a mnemonic is a numeric suffix (SENSe{n})
            suffix = " " not in before or (before[-1:].isalpha())
            value = _SUFFIX_PATTERN if suffix else _VALUE_PATTERN
            if before.endswith('"') and spec.send[m.end():].startswith('"'):
                value = _STRING_BODY_PATTERN  # IEEE 488.2 §7.7.5: "" stands for one quote
            pattern.append(f"(?P<{m.group(1)}>{value})")
            pos = m.end()
        pattern.append(_literal_pattern(spec.send[pos:]))
        body = "".join(pattern)
        if not spec.send.startswith("*"):
            body = ":?" + body  # a leading colon is allowed on SCPI headers
        result.append((re.compile(body, re.IGNORECASE), spec))
    return tuple(result)
