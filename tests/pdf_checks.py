"""Checks of a rendered report with tools outside the project (poppler's ``pdftotext`` and
``pdffonts``): is every piece of content that was meant to be printed there, word for word; does
any word overlap another or leave the page; is every font embedded."""

from __future__ import annotations

import collections
import re
import subprocess
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any


def _run(*cmd: str) -> str:
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120,
                          check=False).stdout


Word = tuple[str, float, float, float, float]


def page_words(pdf: Path) -> list[tuple[float, float, list[Word]]]:
    """Per page: width, height and every word with its box (``pdftotext -bbox``)."""
    xhtml = _run("pdftotext", "-bbox", str(pdf), "-")
    root = ET.fromstring(re.sub(r"<!DOCTYPE[^>]*>", "", xhtml))
    ns = {"x": "http://www.w3.org/1999/xhtml"}
    pages = []
    for page in root.iter("{http://www.w3.org/1999/xhtml}page"):
        words = [(w.text or "", float(w.get("xMin")), float(w.get("yMin")),
                  float(w.get("xMax")), float(w.get("yMax")))
                 for w in page.findall("x:word", ns)]
        pages.append((float(page.get("width")), float(page.get("height")), words))
    return pages


def expected_strings(content: Any, lot: Any) -> list[str]:
    """Everything the report is meant to print in its tables and lists, from the facts."""
    out: list[str] = [content.company, content.part, content.lot, content.run_id,
                      content.signer_fingerprint, f"Lot disposition: {lot.disposition}"]
    out += list(lot.reasons)
    tables = [content.conditions_table, content.setup_table, content.instruments_table,
              content.record_table, content.fixture_table, content.definitions_table,
              content.limits_table, content.bins_table, content.statistics_table,
              content.outliers_table, content.shot_log_table]
    tables += [rows for _, rows in content.budget_tables]
    for rows in tables:
        if len(rows) < 2:  # a header alone is not printed: the report says "none" instead
            continue
        for row in rows:
            out += [str(cell) for cell in row]
    out += list(content.decision_rule)
    for line in content.devices:
        out += [line.serial, line.condition, line.verdict, line.bin or "—"]
        if line.verdict != "conforming" or line.bin == "unbinned":
            out.append(line.note)
    for device in lot.devices:
        if device.verdict != "conforming":
            out += [r for r in device.reasons]
    for entry in content.manifest:
        out += [entry["name"], entry["sha256"]]
    return [s for s in out if s]


def missing_words(pdf: Path, expected: list[str]) -> list[str]:
    """Words of ``expected`` that the PDF's text does not hold as often as they are meant to
    be printed (a clipped, cut or dropped text shows up here). Each distinct expected string
    is counted once, since the report may print the same string in several places."""
    have = collections.Counter(
        w for _, _, words in page_words(pdf) for w, *_ in words)
    want: collections.Counter[str] = collections.Counter()
    for text in dict.fromkeys(expected):
        want |= collections.Counter(text.split())
    return sorted(w for w, n in want.items() if have[w] < n)


def overlapping_words(pdf: Path, tolerance: float = 0.5) -> list[str]:
    """Pairs of words whose boxes overlap (text spilling into other text), and words outside
    the page."""
    problems = []
    for number, (width, height, words) in enumerate(page_words(pdf), start=1):
        boxes = sorted(words, key=lambda w: w[1])
        for k, (text, x1, y1, x2, y2) in enumerate(boxes):
            if x1 < 0 or y1 < 0 or x2 > width or y2 > height:
                problems.append(f"page {number}: {text!r} leaves the page")
            for other, a1, b1, a2, b2 in boxes[k + 1:]:
                if a1 >= x2 - tolerance:
                    break
                dx = min(x2, a2) - max(x1, a1)
                dy = min(y2, b2) - max(y1, b1)
                if dx > tolerance and dy > max(tolerance, 0.3 * min(y2 - y1, b2 - b1)):
                    problems.append(f"page {number}: {text!r} overlaps {other!r}")
    return problems


def fonts_not_embedded(pdf: Path) -> list[str]:
    """Fonts ``pdffonts`` lists as not embedded (read at the header's ``emb`` column)."""
    lines = _run("pdffonts", str(pdf)).splitlines()
    if len(lines) < 2:
        return ["pdffonts gave no listing"]
    column = lines[0].index("emb")
    return [line.strip() for line in lines[2:] if line[column:column + 3] != "yes"]


#: What the traceability and set-up tables must print for sequences/bench-sim.yaml (its probe
#: serials and bandwidths, the switch under test, the lab's stated ambient) and the demo's
#: operator: typed here from the bench file, not taken from the report's own content.
BENCH_SIM_TRACEABILITY = [
    "KPC-PRB-0451", "KPC-SHT-0207", "KPC-PRB-0452",     # probe serials
    "400 MHz", "2 GHz",                                  # probe bandwidths
    "switch SW-9100 (invented), serial SWS-0042;",      # fixture.switch
    "23 °C, 45 % relative humidity",                    # site
]
