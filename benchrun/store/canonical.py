"""Canonical JSON shared by the raw record, the results database and the digests.

Sorted keys, no spaces, floats written with ``repr`` (the shortest string that reads back as
the same IEEE 754 double, Python ``float.__repr__``), so a value stored as JSON comes back
bit-exactly and the same content always gives the same bytes to hash. NaN and infinities are
written as ``NaN`` / ``Infinity`` (accepted by Python's ``json``). NumPy scalars and arrays are
converted to plain Python values.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from benchrun.errors import StoreError


def _plain(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, tuple | set | frozenset):
        return list(value) if isinstance(value, tuple) else sorted(value)
    raise TypeError(f"{type(value).__name__} is not JSON serialisable")


def canonical_json(value: Any) -> str:
    """Canonical JSON text of ``value``.

    Raises
    ------
    StoreError
        The value holds something JSON cannot represent.
    """
    try:
        return json.dumps(
            value, sort_keys=True, separators=(",", ":"), allow_nan=True, default=_plain
        )
    except (TypeError, ValueError) as exc:
        raise StoreError(f"value cannot be stored as JSON: {exc}") from exc


def with_attrs_json(text: str, attrs_json: str) -> str:
    """Canonical JSON of an object with an ``"attrs"`` member added, from the canonical JSON
    ``text`` of the object without it (whose keys all sort after ``"attrs"``) and that of
    the member's value: what :func:`canonical_json` of the whole object gives."""
    return f'{{"attrs":{attrs_json}' + ("," + text[1:] if text != "{}" else "}")
